"""Command line: a thin layer over the Python API (DESIGN.md section 3.3)."""

from __future__ import annotations

import argparse
import logging
import os
import sys
import tempfile
import traceback
from dataclasses import replace
from pathlib import Path

from fibers.errors import InputError

log = logging.getLogger("fibers")


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="fibers",
        description="Build a left-ventricular wall mesh with cardiac coordinates, rule-based fibers, "
                    "17 segments and sample-point pools from a short-axis stack. Research use only; "
                    "not a medical device.")
    p.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = p.add_subparsers(dest="command", required=True)

    def build_options(q):
        q.add_argument("--out", required=True, type=Path, help="output folder (written atomically)")
        q.add_argument("--mesh-size", type=float, help="target tetrahedron edge length, mm")
        q.add_argument("--seed", type=int, help="seed of the sample-point pools")
        q.add_argument("--no-report", action="store_true", help="skip the report")
        q.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks")

    b = sub.add_parser("build", help="build a case file")
    b.add_argument("case", type=Path, help="case file (TOML)")
    build_options(b)
    d = sub.add_parser("demo", help="write the synthetic case of our own and build it")
    build_options(d)
    d.add_argument("--labelmap", action="store_true", help="give the synthetic subject as a label map (NIfTI)")
    r = sub.add_parser("report", help="re-draw the report of a finished build")
    r.add_argument("folder", type=Path)
    r.add_argument("--debug", action="store_true", default=argparse.SUPPRESS)
    _after_build_parsers(sub)
    v = sub.add_parser("view", help="open a finished build in an interactive 3-D window")
    v.add_argument("folder", type=Path)
    v.add_argument("--debug", action="store_true", default=argparse.SUPPRESS)
    return p


def _after_build_parsers(sub) -> None:
    """``sample``, ``pools`` and ``voxelize``: commands on a finished build."""
    s = sub.add_parser("sample", help="every field of a finished build at the points of a file")
    s.add_argument("folder", type=Path, help="a finished build")
    s.add_argument("points", type=Path, help=".npy (n, 3), .npz with 'points', or CSV with header x,y,z (mm)")
    s.add_argument("--out", required=True, type=Path, help="fields file (.npz)")
    p = sub.add_parser("pools", help="fresh sample-point pools from a finished build")
    p.add_argument("folder", type=Path, help="a finished build")
    p.add_argument("--seed", required=True, type=int, help="seed of the new pools")
    p.add_argument("--out", required=True, type=Path, help="output folder (written atomically)")
    from fibers.pools import POOL_NAMES

    for name in POOL_NAMES:
        p.add_argument(f"--{name}", type=int, metavar="N", help=f"points in the {name} pool (default: the build's)")
    p.add_argument("--sampler", choices=("random", "sobol"), help="default: the build's")
    p.add_argument("--float32", action="store_true", default=None, help="float fields as float32")
    p.add_argument("--vtp", action="store_true", help="also write VTP point clouds")
    x = sub.add_parser("voxelize", help="labels and fields of a finished build as NIfTI volumes")
    x.add_argument("folder", type=Path, help="a finished build")
    grid = x.add_mutually_exclusive_group()
    grid.add_argument("--like", type=Path, help="take the grid of this NIfTI image")
    grid.add_argument("--spacing", type=float, help="cubic voxels of this size (mm) on the build's box")
    x.add_argument("--out", required=True, type=Path, help="output folder (written atomically)")
    for q in (s, p, x):
        q.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks")


def _after_build(args) -> int:
    if args.command == "sample":
        from fibers.evaluate import sample

        log.info("%-13s %s", "wrote", sample(args.folder, args.points, args.out))
        return 0
    if args.command == "pools":
        from fibers.evaluate import write_fresh_pools
        from fibers.pools import POOL_NAMES

        if args.seed < 0:
            raise InputError(f"--seed {args.seed}: must be 0 or more")
        counts = {name: getattr(args, name) for name in POOL_NAMES}
        bad = [f"--{k} {v}" for k, v in counts.items() if v is not None and v < 0]
        if bad:
            raise InputError(f"{bad[0]}: give a whole number >= 0")
        write_fresh_pools(args.folder, args.out, seed=args.seed, counts=counts, sampler=args.sampler,
                          float32=args.float32, vtp=args.vtp)
        log.info("%-13s %s", "wrote", args.out)
        return 0
    from fibers.voxelize import voxelize_build

    voxelize_build(args.folder, args.out, like=args.like, spacing=args.spacing)
    log.info("%-13s %s", "wrote", args.out)
    return 0


def main(argv: list[str] | None = None) -> int:
    # Our heavy work is single-threaded sparse code; OpenBLAS worker threads only spin against
    # it (measured: coordinates at 500k tetrahedra 6-7 s with default threads, 2.5 s with one).
    # Takes effect when numpy is not imported yet; a user's own setting wins.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    args = _parser().parse_args(argv)
    _logging()
    try:
        return _dispatch(args)
    except InputError as err:
        if args.debug:
            traceback.print_exc()
        print(f"error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("error: interrupted; nothing was written", file=sys.stderr)
        return 130
    except Exception as err:  # a bug of ours: say so plainly, details on request
        if args.debug:
            traceback.print_exc()
        print(f"error: internal error ({type(err).__name__}: {err}); nothing was written. "
              f"Run again with --debug and report the traceback", file=sys.stderr)
        return 1


class _Stderr(logging.Handler):
    """Progress lines to whatever sys.stderr is at the time (main() may run many times)."""

    def emit(self, record):
        try:
            sys.stderr.write(self.format(record) + "\n")
        except (ValueError, OSError):
            pass


def _logging() -> None:
    if not any(isinstance(h, _Stderr) for h in log.handlers):
        handler = _Stderr()
        handler.setFormatter(logging.Formatter("fibers: %(message)s"))
        log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False


def _dispatch(args) -> int:
    from fibers import pipeline
    from fibers.io.case import read_case

    if args.command == "build":
        case = _override(read_case(args.case), args)
        pipeline.build(case, args.out, report=not args.no_report)
        return 0
    if args.command == "demo":
        return _demo(args)
    if args.command == "report":
        from fibers import report

        import time

        t0 = time.perf_counter()
        page = report.redraw(args.folder)
        log.info("%-13s %7.2f s  %s", "report", time.perf_counter() - t0, page)
        return 0
    if args.command in ("sample", "pools", "voxelize"):
        return _after_build(args)
    if args.command == "view":
        from fibers import report

        return report.view(args.folder)
    raise AssertionError(args.command)


def _override(case, args):
    values = {k: dict(v) for k, v in case.values.items()}
    if args.mesh_size is not None:
        if not 0.3 <= args.mesh_size <= 10.0:
            raise InputError(f"--mesh-size {args.mesh_size:g}: must lie between 0.3 and 10 mm")
        values["mesh"]["size"] = args.mesh_size
        case = replace(case, mesh_size=args.mesh_size)
    if args.seed is not None:
        if args.seed < 0:
            raise InputError(f"--seed {args.seed}: must be 0 or more")
        values["pools"]["seed"] = args.seed
        case = replace(case, pools=replace(case.pools, seed=args.seed))
    return replace(case, values=values)


def _demo(args) -> int:
    from fibers import pipeline
    from fibers.demo import ventricle
    from fibers.io import case as case_io
    from fibers.io.contours import write_contours

    lv = ventricle.demo_subject()
    with tempfile.TemporaryDirectory(prefix="fibers-demo-") as tmp:
        tmp = Path(tmp)
        include = {}
        if args.labelmap:
            from fibers.demo import voxels
            from fibers.io.labelmap import write_labelmap

            labels, affine = voxels.voxelise(lv)
            write_labelmap(tmp / "labelmap.nii.gz", labels, affine)
            text = case_io.case_text(landmarks=None).replace('contours = "contours.csv"', 'labelmap = "labelmap.nii.gz"')
            include["input/labelmap.nii.gz"] = tmp / "labelmap.nii.gz"
        else:
            contours, _ = lv.sample_stack(spacing=8.0, point_spacing=1.5, noise=0.4, shift=2.0, seed=11)
            write_contours(tmp / "contours.csv", contours)
            text = case_io.case_text(landmarks=lv.landmarks())
            include["input/contours.csv"] = tmp / "contours.csv"
        (tmp / "case.toml").write_text(text)
        include["input/case.toml"] = tmp / "case.toml"
        log.info("demo: synthetic left ventricle, %.0f mL cavity, %.0f mL wall (truth)",
                 lv.volumes_ml()["cavity_ml"], lv.volumes_ml()["myocardium_ml"])
        case = _override(case_io.read_case(tmp / "case.toml"), args)
        pipeline.build(case, args.out, report=not args.no_report, include=include)
    return 0


if __name__ == "__main__":
    sys.exit(main())
