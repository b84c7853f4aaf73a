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
    d.add_argument("--biv", action="store_true",
                   help="both ventricles: the synthetic subject with a right ventricle (contours endo, epi, rv_endo, rv_epi)")
    r = sub.add_parser("report", help="re-draw the report of a finished build")
    r.add_argument("folder", type=Path)
    r.add_argument("--debug", action="store_true", default=argparse.SUPPRESS)
    v = sub.add_parser("view", help="open a finished build in an interactive 3-D window")
    v.add_argument("folder", type=Path)
    v.add_argument("--debug", action="store_true", default=argparse.SUPPRESS)
    return p


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
        if args.biv:
            if args.labelmap:
                raise InputError("--biv with --labelmap: the biventricular demo is given as contours only; drop --labelmap")
            return _demo_biv(args, tmp)
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


def _demo_biv(args, tmp: Path) -> int:
    """The synthetic pair of ventricles as contours, built on the biventricular route."""
    from fibers import pipeline
    from fibers.demo import biventricle
    from fibers.io import case as case_io
    from fibers.io.contours import write_contours

    biv = biventricle.demo_subject()
    contours, _ = biv.sample_stack(spacing=8.0, point_spacing=1.5, noise=0.4, shift=2.0, seed=11)
    write_contours(tmp / "contours.csv", contours)
    # no [landmarks]: the insertion points are found from the right-ventricular contours
    text = case_io.case_text(landmarks=None).replace("align_slices = true", 'align_slices = true\nventricles = "biv"')
    (tmp / "case.toml").write_text(text)
    truth = biv.volumes_ml()
    log.info("demo: synthetic ventricles, LV cavity %.0f mL, RV cavity %.0f mL, wall %.0f mL (truth)",
             truth["lv_cavity_ml"], truth["rv_cavity_ml"], truth["wall_ml"])
    case = _override(case_io.read_case(tmp / "case.toml"), args)
    include = {"input/contours.csv": tmp / "contours.csv", "input/case.toml": tmp / "case.toml"}
    pipeline.build(case, args.out, report=not args.no_report, include=include)
    return 0


if __name__ == "__main__":
    sys.exit(main())
