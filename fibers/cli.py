"""Command line: a thin layer over the Python API."""

from __future__ import annotations

import argparse
import logging
import os
import signal
import sys
import tempfile
import traceback
import warnings
from contextlib import contextmanager
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
        q.add_argument("--mesh-order", type=int, choices=(1, 2),
                       help="element order: 1 linear, 2 quadratic (10-node) tetrahedra")
        q.add_argument("--seed", type=int, help="seed of the sample-point pools")
        q.add_argument("--no-report", action="store_true", help="skip the report")
        q.add_argument("--force", action="store_true",
                       help="replace --out even when it holds files fibers did not write (they are deleted); "
                            "a folder holding the build's own inputs is never replaced")
        q.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks")

    b = sub.add_parser("build", help="build a case file")
    b.add_argument("case", type=Path, help="case file (TOML)")
    build_options(b)
    d = sub.add_parser("demo", help="write the synthetic case of our own and build it")
    build_options(d)
    d.add_argument("--labelmap", action="store_true", help="give the synthetic subject as a label map (NIfTI)")
    d.add_argument("--motion", action="store_true",
                   help="also write motion.npz, a closed-form isochoric cycle, and its truth (motion_truth.json)")
    k = sub.add_parser("strain", help="strain and fiber stretch of a displacement field on a finished build")
    k.add_argument("folder", type=Path, help="the --out folder of a finished build (the reference geometry)")
    k.add_argument("motion", type=Path, help="MOTION.npz: displacement (frames, nodes, 3) mm, or points + displacement")
    k.add_argument("--out", required=True, type=Path, help="output folder (written atomically)")
    k.add_argument("--no-report", action="store_true", help="skip the report")
    k.add_argument("--fit-degree", type=int, choices=(1, 2), default=1,
                   help="local fit of scattered samples: 1 affine (default), 2 quadratic")
    k.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help="show tracebacks")
    d.add_argument("--cohort", type=int, metavar="N",
                   help="instead, write N varied synthetic subjects and one broken case into --out, for fibers cohort")
    _cohort_parser(sub, build_options)
    d.add_argument("--biv", action="store_true",
                   help="both ventricles: the synthetic subject with a right ventricle (contours endo, epi, rv_endo, rv_epi)")
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
        with _terminating_signals():
            return _dispatch(args)
    except InputError as err:
        if args.debug:
            traceback.print_exc()
        print(f"error: {err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("error: interrupted; nothing was written", file=sys.stderr)
        return 128 + signal.SIGINT
    except Terminated as err:
        print(f"error: stopped by {signal.Signals(err.signum).name}; nothing was written", file=sys.stderr)
        return 128 + err.signum
    except MemoryError:
        if args.debug:
            traceback.print_exc()
        print("error: out of memory; nothing was written. Use a larger --mesh-size or smaller [pools] counts",
              file=sys.stderr)
        return 2
    except OSError as err:  # the file system said no (disk full, permissions changed mid-run)
        if args.debug:
            traceback.print_exc()
        where = f" ({err.filename})" if err.filename else ""
        print(f"error: {err.strerror or err}{where}; nothing was written. Free space or choose another --out",
              file=sys.stderr)
        return 2
    except Exception as err:  # a bug of ours: say so plainly, details on request
        if args.debug:
            traceback.print_exc()
        print(f"error: internal error ({type(err).__name__}: {err}); nothing was written. "
              f"Run again with --debug and report the traceback", file=sys.stderr)
        return 1


class Terminated(BaseException):
    """SIGTERM or SIGHUP arrived: unwind (temporary folders are removed on the way) and exit."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


@contextmanager
def _terminating_signals():
    """SIGTERM (timeout, batch schedulers) and SIGHUP (a closed terminal) unwind like Ctrl-C.

    Their default action kills the process at once, leaving the temporary folder behind;
    raised as an exception they pass through every clean-up on the way out.
    """
    def handler(signum, _frame):
        raise Terminated(signum)

    previous = {}
    try:
        for sig in (signal.SIGTERM, signal.SIGHUP):
            previous[sig] = signal.signal(sig, handler)
    except ValueError:  # not the main thread: leave the signals alone
        pass
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


class _Levels(logging.Formatter):
    """``warning: ...`` for warnings, ``fibers: ...`` for progress, so the two never look alike."""

    def format(self, record):
        prefix = "warning" if record.levelno >= logging.WARNING else "fibers"
        return f"{prefix}: {record.getMessage()}"


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
        handler.setFormatter(_Levels())
        log.addHandler(handler)
    log.setLevel(logging.INFO)
    log.propagate = False
    # a warning nobody caught (outside a build's own record) still reads "warning: ...",
    # never Python's "file.py:67: RuntimeWarning: ..." with a source line
    warnings.showwarning = _show_warning


def _show_warning(message, category, filename, lineno, file=None, line=None):
    log.warning("%s", message)


def _dispatch(args) -> int:
    from fibers import pipeline
    from fibers.io.case import read_case

    if args.command == "build":
        case = _override(read_case(args.case), args)
        pipeline.build(case, args.out, report=not args.no_report, force=args.force)
        return 0
    if args.command == "demo":
        return _demo_cohort(args) if args.cohort is not None else _demo(args)
    if args.command == "strain":
        from fibers.io.strainfiles import write_strain_folder

        write_strain_folder(args.folder, args.motion, args.out, report=not args.no_report,
                            fit_degree=args.fit_degree)
        return 0
    if args.command == "cohort":
        return _cohort(args)
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
    from fibers.io.case import with_overrides

    return with_overrides(case, mesh_size=args.mesh_size, mesh_order=getattr(args, "mesh_order", None),
                          seed=args.seed)


def _motion_writer(lv):
    """The demo's motion files, written inside the build so that they count as its own."""
    from fibers.demo.motion import write_demo_motion

    def write(folder):
        truth = write_demo_motion(folder, lv)
        log.info("demo: motion.npz, %d frames of an isochoric cycle; closed-form segment strains "
                 "in motion_truth.json", truth["motion"]["frames"])
    return write


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
        pipeline.build(case, args.out, report=not args.no_report, include=include, force=args.force,
                       extra=_motion_writer(lv) if args.motion else None)
    return 0


# ----------------------------------------------------------------------------- cohorts

def _cohort_parser(sub, build_options) -> None:
    c = sub.add_parser("cohort", help="build many case files on Dask into one folder, with one table")
    c.add_argument("cases", nargs="+", type=Path, help="case files, or folders holding case.toml")
    build_options(c)
    c.add_argument("--workers", type=int, help="worker processes of the local cluster (default: the number of cores)")
    c.add_argument("--memory-per-worker", help="memory limit of each local worker, e.g. 4GB (default: an equal share)")
    c.add_argument("--scheduler", help="address of a running Dask scheduler (tcp://host:8786) instead of a local cluster")


def _cohort(args) -> int:
    from fibers import cohort

    if args.workers is not None and args.workers < 1:
        raise InputError(f"--workers {args.workers}: must be 1 or more")
    if args.scheduler and (args.workers is not None or args.memory_per_worker is not None):
        raise InputError("--scheduler submits to an existing cluster; --workers and --memory-per-worker "
                         "are for the local one: give one or the other")
    options = cohort.Options(report=not args.no_report, mesh_size=args.mesh_size, seed=args.seed)
    memory = None if args.memory_per_worker is None else cohort.parse_memory(args.memory_per_worker)
    subjects = cohort.find_subjects(args.cases)
    line = _CohortLine()
    try:
        rows = cohort.run_cohort(subjects, args.out, options=options, workers=args.workers,
                                 memory_per_worker=memory, scheduler=args.scheduler, on_progress=line)
    except KeyboardInterrupt:
        line.finish()
        print(f"error: interrupted; finished subjects stay in {args.out} (see cohort.csv); "
              f"run the same command again to go on", file=sys.stderr)
        return 130
    line.finish()
    failed = [r for r in rows if r["status"] == "failed"]
    log.info("cohort: %d ok, %d skipped, %d failed; wrote %s and %s", sum(r["status"] == "ok" for r in rows),
             sum(r["status"] == "skipped" for r in rows), len(failed), args.out / "cohort.csv",
             args.out / "cohort.html")
    return 1 if failed else 0


class _CohortLine:
    """The cohort's progress: one line rewritten in place on a terminal, plain lines otherwise."""

    def __init__(self):
        self.live = sys.stderr.isatty()
        self.shown = None
        self.last = None

    def __call__(self, p) -> None:
        if p.last is not None and p.last is not self.last:
            self.last = p.last
            r = p.last
            self._print(f"fibers: cohort  {r['subject']}: {r['status']}"
                        + (f" in {r['seconds']:.1f} s" if r.get("seconds") else "")
                        + (f" ({r['error']})" if r.get("error") else ""))
        text = (f"fibers: cohort  {p.done} done, {p.failed} failed, {p.skipped} skipped, {p.running} running, "
                f"{p.left} left; {_clock(p.elapsed)} elapsed")
        eta = p.estimate()
        if eta is not None and (p.left or p.running):
            text += f", about {_clock(eta)} left"
        if self.live:
            sys.stderr.write("\r\033[K" + text)
            sys.stderr.flush()
            self.shown = text
        elif (p.done, p.failed, p.skipped) != getattr(self, "_counts", None):
            self._counts = (p.done, p.failed, p.skipped)
            print(text, file=sys.stderr)

    def _print(self, text: str) -> None:
        if self.live and self.shown:
            sys.stderr.write("\r\033[K")
        print(text, file=sys.stderr)
        if self.live and self.shown:
            sys.stderr.write(self.shown)
        sys.stderr.flush()

    def finish(self) -> None:
        if self.live and self.shown:
            sys.stderr.write("\n")
            self.shown = None


def _clock(seconds: float) -> str:
    m, s = divmod(int(round(seconds)), 60)
    h, m = divmod(m, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def _demo_cohort(args) -> int:
    from fibers.demo.cohort import write_cohort

    if args.cohort < 1:
        raise InputError(f"--cohort {args.cohort}: must be 1 or more")
    cases = write_cohort(args.out, args.cohort, mesh_size=args.mesh_size or 1.5)
    log.info("demo: wrote %d synthetic subjects and 1 broken case into %s; try: fibers cohort %s/*/ --out RESULTS",
             len(cases) - 1, args.out, args.out)
    return 0


def _demo_biv(args, tmp: Path) -> int:
    """The synthetic pair of ventricles as contours (or a label map), built on the biventricular route."""
    from fibers import pipeline
    from fibers.demo import biventricle
    from fibers.io import case as case_io
    from fibers.io.contours import write_contours

    biv = biventricle.demo_subject()
    # no [landmarks]: the insertion points are found from the right ventricle's geometry
    text = case_io.case_text(landmarks=None).replace("align_slices = true", 'align_slices = true\nventricles = "biv"')
    if args.labelmap:
        from fibers.io.labelmap import write_labelmap

        labels, affine = biv.voxelise()
        write_labelmap(tmp / "labelmap.nii.gz", labels, affine)
        v = biventricle.BIV_LABELS
        text = text.replace('contours = "contours.csv"', 'labelmap = "labelmap.nii.gz"\n\n[input.labels]\n'
                            f"cavity = {v.cavity}\nwall = {v.wall}\nrv = {v.rv}\nrv_wall = {v.rv_wall}")
        name = "labelmap.nii.gz"
    else:
        contours, _ = biv.sample_stack(spacing=8.0, point_spacing=1.5, noise=0.4, shift=2.0, seed=11)
        write_contours(tmp / "contours.csv", contours)
        name = "contours.csv"
    (tmp / "case.toml").write_text(text)
    truth = biv.volumes_ml()
    log.info("demo: synthetic ventricles, LV cavity %.0f mL, RV cavity %.0f mL, wall %.0f mL (truth)",
             truth["lv_cavity_ml"], truth["rv_cavity_ml"], truth["wall_ml"])
    case = _override(case_io.read_case(tmp / "case.toml"), args)
    include = {f"input/{name}": tmp / name, "input/case.toml": tmp / "case.toml"}
    pipeline.build(case, args.out, report=not args.no_report, include=include)
    return 0


if __name__ == "__main__":
    sys.exit(main())
