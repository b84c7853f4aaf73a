"""Many subjects at once on Dask: one build per subject, resumable, one table at the end.

Each subject is a case file; its name is the name of the folder holding the case file (made
unique with a suffix ``-2``, ``-3``, ... when two collide). Every subject builds into
``DIR/<subject>/`` through :func:`fibers.pipeline.build`, so its folder is exactly what
``fibers build CASE --out DIR/<subject>`` writes.

The engine is ``dask.distributed``. By default an embedded local cluster of worker processes
(one thread each, one BLAS thread each, a memory limit each) runs on this machine; with
``scheduler="tcp://host:8786"`` the subjects go to an existing cluster instead, started with::

    dask scheduler                                   # on one machine; prints its address
    dask worker tcp://host:8786 --nworkers 8 --nthreads 1 --memory-limit 6GB   # on each machine

The workers need this package installed (the same version) and must see the case files and
``DIR`` at the same paths (shared storage); set ``OPENBLAS_NUM_THREADS=1`` in their environment.

Failures stay local: a subject whose input is refused (``InputError``) or whose build raises is
recorded with its one-line error; a subject whose worker dies (killed, out of memory) is given
to another worker once and then recorded as failed. A rerun skips subjects whose folder holds a
finished build of unchanged inputs (the manifest's sha256 of the case file and of every input
file, the same resolved parameters); a finished subject's folder is in place the moment its
build ends (the build renames a complete temporary folder), so an interruption loses none.

The table ``DIR/cohort.csv`` is rewritten after every subject, so it is current whenever the
run stops; the rows of skipped subjects are read again from their folders (manifest and
segments.csv), a few milliseconds each.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

from fibers.errors import InputError

log = logging.getLogger("fibers")

# One BLAS thread per worker: our solves are single-threaded sparse code and a worker is one
# core; more threads only contend (the same reason as in the command line).
WORKER_ENV = {"OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
RETRIES_AFTER_WORKER_DEATH = 1
STATUSES = ("ok", "failed", "skipped")
ESTIMATE_LABELMAP_BYTES = 4 * 2**20  # label maps read for the order of the builds (estimated_tets)


@dataclass(frozen=True)
class Subject:
    """One subject of a cohort: its unique name and its case file."""

    name: str
    case: Path


@dataclass(frozen=True)
class Options:
    """What overrides every subject's case file (the flags of ``fibers build``)."""

    report: bool = True
    mesh_size: float | None = None
    seed: int | None = None

    def __post_init__(self):
        from fibers.io.case import check_overrides

        check_overrides(mesh_size=self.mesh_size, seed=self.seed)


@dataclass
class Progress:
    """Counts of a running cohort, handed to the progress callback after every change."""

    total: int
    slots: int = 1  # builds that run at once
    done: int = 0
    failed: int = 0
    skipped: int = 0
    running: int = 0
    started: float = field(default_factory=time.perf_counter)
    built_seconds: list = field(default_factory=list)
    last: dict | None = None

    @property
    def left(self) -> int:
        return self.total - self.done - self.failed - self.skipped - self.running

    @property
    def elapsed(self) -> float:
        return time.perf_counter() - self.started

    def estimate(self) -> float | None:
        """Seconds left: the mean time of a finished build times the builds still to come per slot."""
        if not self.built_seconds:
            return None
        mean = sum(self.built_seconds) / len(self.built_seconds)
        remaining = self.left + 0.5 * self.running
        return mean * remaining / max(self.slots, 1)


# ----------------------------------------------------------------------------- subjects

def find_subjects(paths) -> list[Subject]:
    """Subjects from case files or folders holding ``case.toml``, in the order given.

    Raises
    ------
    InputError
        A path that is neither a case file nor a folder with ``case.toml``; no case at all.
    """
    cases = []
    for p in map(Path, paths):
        if p.is_dir():
            p = p / "case.toml"
        if not p.is_file():
            raise InputError(f"{p}: no case file there; give case files or folders holding case.toml")
        cases.append(p.resolve())
    if not cases:
        raise InputError("no case given; name case files or folders holding case.toml")
    seen, subjects = {}, []
    for case in dict.fromkeys(cases):  # the same case twice is one subject
        base = case.parent.name or "subject"
        name, k = base, 1
        while name in seen:
            k += 1
            name = f"{base}-{k}"
        seen[name] = case
        subjects.append(Subject(name, case))
    return subjects


def resolved_case(case_path: Path, options: Options):
    """The case of a subject with the cohort's overrides applied, as ``fibers build`` applies them."""
    from fibers.io.case import read_case, with_overrides

    return with_overrides(read_case(case_path), mesh_size=options.mesh_size, seed=options.seed)


def up_to_date(subject: Subject, folder: Path, options: Options) -> bool:
    """Whether ``folder`` holds a finished build of the subject's current inputs and parameters.

    Reads the manifest and hashes the inputs it names; a build is only ever renamed into place
    when complete, so a manifest means a finished folder. Milliseconds for usual inputs.
    """
    try:
        manifest = json.loads((folder / "manifest.json").read_text())
        case = resolved_case(subject.case, options)
    except (OSError, ValueError, InputError):
        return False
    inputs = manifest.get("inputs") or []
    if not inputs or inputs[0].get("path") != str(subject.case):
        return False
    for item in inputs:
        try:
            digest = hashlib.sha256(Path(item["path"]).read_bytes()).hexdigest()
        except (OSError, KeyError, TypeError):
            return False
        if digest != item.get("sha256"):
            return False
    if not _same_parameters(manifest.get("parameters") or {}, case):
        return False
    return not options.report or (folder / "report" / "index.html").is_file()


def _same_parameters(built: dict, case) -> bool:
    """Whether a manifest's parameters are those the case resolves to now.

    The build records what it resolved while building (the frame used, the base plane, the slice
    thickness) in place of ``"ed"`` or an unset key; those are compared by what they resolve to.
    """
    from fibers.pipeline import base_choice

    def plain(params):
        params = json.loads(json.dumps(params, default=str))
        params.pop("frame", None)
        params.get("input", {}).pop("frame", None)
        for key in ("base", "slice_thickness"):
            params.get("geometry", {}).pop(key, None)
        return params

    geometry = built.get("geometry", {})
    if plain(built) != plain(case.values) or geometry.get("base") != base_choice(case):
        return False
    if case.slice_thickness is not None and geometry.get("slice_thickness") != case.slice_thickness:
        return False
    return not isinstance(case.frame, int) or built.get("frame") == case.frame


# ----------------------------------------------------------------------------- the order of the builds

def estimated_tets(subject: Subject, options: Options) -> float | None:
    """Roughly how many tetrahedra a subject's build will make; None when it cannot tell cheaply.

    The builds are handed out largest first, so that the last to finish is a small one and no
    worker idles through a long tail (longest processing time first, Graham 1969). The wall
    volume comes from the contours (each slice's epicardial minus endocardial area times the
    slice spacing) or from a label map's myocardial voxels, and the count from the volume as
    :func:`fibers.budget.estimate_tets` counts it. Label maps over ``ESTIMATE_LABELMAP_BYTES``
    (4-D cine files take a second or more to decode) are not read: their subjects get the
    median of the others. A few milliseconds for a usual contours file or 3-D label map.
    """
    import warnings

    import numpy as np

    from fibers.budget import estimate_tets
    from fibers.io.contours import read_contours
    from fibers.io.labelmap import load_labelmap

    try:
        case = resolved_case(subject.case, options)
        if case.contours is not None:
            volume = contour_wall_volume_mm3(read_contours(case.contours))
        elif case.labelmap.stat().st_size <= ESTIMATE_LABELMAP_BYTES:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                image = load_labelmap(case.labelmap, frame=case.frame, cavity=case.labels["cavity"])
            voxels = int(np.count_nonzero(image.labels == case.labels["wall"]))
            volume = voxels * abs(float(np.linalg.det(image.affine[:3, :3])))
        else:
            return None
    except Exception:  # only an order: a broken case's own build says what is wrong with it
        return None
    return float(estimate_tets(volume, case.mesh_size)) if volume > 0 else None


def contour_wall_volume_mm3(raw) -> float:
    """Wall volume (mm^3) of a contour stack: sum over slices of (epi area - endo area) x spacing.

    Each polygon's area is half the norm of its vector area, sum of p_i x p_i+1 (the shoelace
    formula in 3-D, so a tilted stack needs no projection); the spacing is the median gap of the
    slice centroids along the mean slice normal. Only good to a few per cent: it orders builds.
    """
    import numpy as np

    from fibers.vectors import cross

    epi = raw.structure == "epi"
    endo = raw.structure == "endo"
    if not epi.any():
        return 0.0
    rows = np.flatnonzero(epi | endo)
    key = raw.slice_id[rows].astype(np.int64) * 2 + epi[rows]
    order = rows[np.argsort(key, kind="stable")]
    key = np.sort(key, kind="stable")
    p = raw.points[order] - raw.points[order].mean(axis=0)
    start = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    nxt = np.arange(1, len(p) + 1)
    nxt[np.r_[start[1:], len(p)] - 1] = start  # each polygon closes on its first point
    vector_area = 0.5 * np.add.reduceat(cross(p, p[nxt]), start, axis=0)
    area = np.linalg.norm(vector_area, axis=1)
    is_epi = key[start] % 2 == 1
    # the mean normal of the epicardial polygons, whichever way each one runs
    epi_area = vector_area[is_epi]
    normal = np.sum(epi_area * np.sign(epi_area @ epi_area[0])[:, None], axis=0)
    normal /= max(np.linalg.norm(normal), 1e-12)
    centroid = np.add.reduceat(p, start, axis=0) / np.diff(np.r_[start, len(p)])[:, None]
    height = np.sort(centroid[is_epi] @ normal)
    spacing = float(np.median(np.diff(height))) if len(height) > 1 else 0.0
    wall_area = np.sum(np.where(is_epi, area, -area))
    return max(float(wall_area) * spacing, 0.0)


def build_order(subjects: list[Subject], options: Options) -> list[tuple[Subject, float]]:
    """Subjects with their estimated tetrahedra, largest first (unknown ones at the median)."""
    import statistics

    estimates = {s.name: estimated_tets(s, options) for s in subjects}
    known = [e for e in estimates.values() if e is not None]
    middle = statistics.median(known) if known else 0.0
    sized = [(s, middle if estimates[s.name] is None else estimates[s.name]) for s in subjects]
    return sorted(sized, key=lambda item: -item[1])


# ----------------------------------------------------------------------------- one subject (on a worker)

def build_subject(name: str, case_path: str, out: str, options: Options) -> dict:
    """Build one subject into ``out`` and return its table row; never raises for the subject's faults.

    Runs on a Dask worker. A refused input gives ``status = "failed"`` with the one-line message
    of ``fibers build``; an error of ours gives the same one line the command line prints.
    """
    import warnings

    from fibers import pipeline

    _as_worker()
    t0 = time.perf_counter()
    row = {"subject": name, "case": case_path}
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # the build records its own warnings in the manifest
            manifest = pipeline.build(resolved_case(Path(case_path), options), out, report=options.report)
            row.update(subject_figures(Path(out), manifest))
        row.update(status="ok", error="")
    except InputError as err:
        row.update(status="failed", error=_one_line(str(err)))
    except Exception as err:  # a bug of ours, kept to this subject
        row.update(status="failed", error=_one_line(f"internal error ({type(err).__name__}: {err})"))
    row["seconds"] = round(time.perf_counter() - t0, 2)
    return row


def _as_worker() -> None:
    """On a Dask worker: no stage lines, and the build's side work in turn on its one core.

    Stage lines would interleave with the cohort's line. A worker has one thread and the
    cluster as many workers as cores, so a build's second thread would only contend with the
    other workers' builds (the bench's 6 subjects on 2 workers: 17.8 s against 18.6 s with
    the second thread, means of six alternated runs).
    """
    try:
        from distributed import get_worker

        get_worker()
    except (ImportError, ValueError):
        return
    from fibers.sidework import use_one_core

    use_one_core()
    log.handlers[:] = [logging.NullHandler()]
    log.propagate = False


def manifest_figures(manifest: dict) -> dict:
    """The table's figures that the manifest holds: volumes, mass, length, counts, residuals."""
    s = manifest.get("summary", {})
    residuals = [v.get("max") for v in (s.get("fit_residuals_mm") or {}).values() if v.get("max") is not None]
    return {
        "myocardial_volume_ml": s.get("myocardial_volume_ml"),
        "cavity_volume_ml": s.get("cavity_volume_ml"),
        "lv_mass_g": s.get("lv_mass_g"),
        "long_axis_length_mm": s.get("long_axis_length_mm"),
        "tetrahedra": (s.get("counts") or {}).get("tetrahedra"),
        "worst_fit_residual_mm": max(residuals) if residuals else None,
        "warnings": len(manifest.get("warnings") or []),
    }


def _one_line(text: str) -> str:
    return " ".join(text.split())


def subject_figures(folder: Path, manifest: dict) -> dict:
    """The summary figures of one finished build, as the table's columns.

    Volumes, mass, length, tetrahedra and residuals come from the manifest's summary; the
    per-segment mean wall thickness is the build's own ``segments.csv`` column
    ``thickness_mean_mm``.
    """
    row = manifest_figures(manifest)
    thickness = segment_thickness_mm(folder)
    for k in range(1, 18):
        v = float(thickness[k])
        row[f"thickness_mm_{k}"] = None if v != v else round(v, 3)  # NaN: a segment without points
    return row


def segment_thickness_mm(folder: Path):
    """Mean wall thickness (18,) mm per segment 0-17 from ``segments.csv``, NaN where empty.

    The table's figures are then the build's own, to the digit, and reading them costs nothing
    (measuring again from surfaces.vtp through VTK took about 1 s per subject on a worker).
    """
    import csv

    import numpy as np

    mean = np.full(18, np.nan)
    try:
        with open(folder / "segments.csv", newline="", encoding="utf-8") as f:
            for row in csv.DictReader(f):
                key, value = row.get("segment", ""), row.get("thickness_mean_mm", "")
                if key.isdigit() and int(key) < 18 and value not in ("", "nan"):
                    mean[int(key)] = float(value)
    except (OSError, ValueError, csv.Error) as err:
        raise InputError(f"{folder}: cannot read segments.csv ({err}); build the folder again") from None
    return mean


# ----------------------------------------------------------------------------- the run

def default_workers() -> int:
    """The number of cores this process may use."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def fair_memory(workers: int) -> int:
    """Bytes per worker: an equal share of the machine's memory."""
    import psutil

    return int(psutil.virtual_memory().total // max(workers, 1))


def parse_memory(text: str) -> int:
    """``"4GB"``, ``"1.5 GiB"``, ``"800MB"`` to bytes, refused with a one-line message otherwise."""
    from dask.utils import parse_bytes

    try:
        value = int(parse_bytes(text))
    except (ValueError, TypeError):
        value = 0
    if value < 100 * 2**20:
        raise InputError(f"--memory-per-worker {text!r}: expected a size of at least 100MB such as '4GB'")
    return value


def run_cohort(subjects: list[Subject], out, *, options: Options = Options(), workers: int | None = None,
               memory_per_worker: int | None = None, scheduler: str | None = None,
               on_progress=None) -> list[dict]:
    """Build every subject that is not up to date, on Dask; write ``cohort.csv`` and ``cohort.html``.

    Parameters
    ----------
    subjects : list of Subject
    out : str or Path
        The cohort folder; subject ``s`` builds into ``out/s.name``.
    options : Options
        Overrides applied to every case file.
    workers : int, optional
        Worker processes of the embedded cluster (default: the number of cores).
    memory_per_worker : int, optional
        Bytes per worker of the embedded cluster (default: an equal share of the machine).
    scheduler : str, optional
        Address of an existing Dask scheduler; then ``workers`` and ``memory_per_worker`` are
        the cluster's business.
    on_progress : callable, optional
        Called with a :class:`Progress` after every change and about once a second.

    Returns
    -------
    list of dict
        The table's rows, in the order of ``subjects``.
    """
    from fibers.io import cohort as table_io

    out = Path(out)
    table_io.check_cohort_folder(out)
    out.mkdir(parents=True, exist_ok=True)
    progress = Progress(total=len(subjects))
    notify = on_progress or (lambda p: None)
    rows: dict[str, dict] = {}
    todo = []
    for s in subjects:
        t0 = time.perf_counter()
        if up_to_date(s, out / s.name, options):
            rows[s.name] = _skipped_row(s, out / s.name, time.perf_counter() - t0)
            progress.skipped += 1
        else:
            todo.append(s)
    notify(progress)
    _write_tables(out, subjects, rows)
    closing = None
    if todo:
        closing = _run_on_dask(todo, out, options, workers, memory_per_worker, scheduler, rows, progress, notify,
                               lambda: _write_tables(out, subjects, rows))
    _write_tables(out, subjects, rows, html=True)  # while the cluster shuts down
    if closing is not None:
        closing.join()
    return [rows[s.name] for s in subjects]


def _skipped_row(subject: Subject, folder: Path, seconds: float) -> dict:
    """The row of an up-to-date subject, from its own manifest and segments.csv."""
    manifest = json.loads((folder / "manifest.json").read_text())
    row = subject_figures(folder, manifest)
    row.update(subject=subject.name, status="skipped", error="", seconds=round(seconds, 3), case=str(subject.case))
    return row


def _write_tables(out: Path, subjects, rows: dict, html: bool = False) -> None:
    from fibers.io import cohort as table_io

    ordered = [rows[s.name] for s in subjects if s.name in rows]
    table_io.write_table(out, ordered)
    if html:
        from fibers.report.cohort import write_cohort_page

        write_cohort_page(out, ordered)


def _run_on_dask(todo, out, options, workers, memory, scheduler, rows, progress, notify, save):
    """Build ``todo`` on Dask, filling ``rows``; returns the thread that shuts the cluster down.

    The cluster closes on that thread (about 0.5 s) while the caller draws cohort.html.
    """
    from distributed import wait

    order = build_order(todo, options)  # before the cluster starts, which would wait for it idle
    client, cluster, slots = _connect(workers, memory, scheduler)
    progress.slots = slots
    finished_all = False
    try:
        link = _dashboard(client)
        log.info("cohort: %d to build on %d worker%s%s", len(todo), slots, "" if slots == 1 else "s",
                 f"; dashboard {link}" if link else "")
        by_key = {}
        for s, size in order:
            future = client.submit(build_subject, s.name, str(s.case), str(out / s.name), options,
                                   key=f"fibers-build-{s.name}-{os.urandom(4).hex()}", pure=False,
                                   retries=0, priority=int(size))
            by_key[future.key] = (s, future)
        pending = {f for _, f in by_key.values()}
        progress.running = min(slots, len(pending))
        notify(progress)
        while pending:
            try:
                finished, pending = wait(pending, timeout=1.0, return_when="FIRST_COMPLETED")
            except TimeoutError:  # nothing finished within the second: refresh the line
                notify(progress)
                continue
            for future in finished:
                subject, _ = by_key[future.key]
                row = _row_of(future, subject)
                rows[subject.name] = row
                if row["status"] == "ok":
                    progress.done += 1
                    progress.built_seconds.append(row["seconds"])
                else:
                    progress.failed += 1
                progress.last = row
            progress.running = min(slots, len(pending))
            save()
            notify(progress)
        finished_all = True
    finally:
        closing = threading.Thread(target=_close, args=(client, cluster), name="fibers-cohort-close")
        closing.start()
        if not finished_all:  # interrupted or failed: nothing more to draw, close before leaving
            closing.join()
        from fibers.io.folder import remove_stale

        for s in todo:  # a worker killed mid-build cannot remove its temporary folder
            remove_stale(out / s.name)
    return closing


def _row_of(future, subject: Subject) -> dict:
    """The row a finished future gives; a dead worker or a lost task becomes a failed row."""
    try:
        return future.result()
    except Exception as err:
        from distributed import KilledWorker

        if isinstance(err, KilledWorker):
            message = (f"the worker building it died {RETRIES_AFTER_WORKER_DEATH + 1} times (killed, or out of "
                       f"memory: try a larger --memory-per-worker or a coarser --mesh-size)")
        else:
            message = f"lost on the cluster ({type(err).__name__}: {err})"
        return {"subject": subject.name, "status": "failed", "error": _one_line(message), "seconds": None,
                "case": str(subject.case)}


def worker_start_method() -> str:
    """How the embedded cluster starts its worker processes: ``fork`` on Linux, else ``spawn``.

    A forked worker starts with every module of the build already imported by this process;
    a spawned one starts a new interpreter and imports dask, numpy, scipy, gmsh and our stages
    again. Measured on 2 cores: the cluster up and ready to build in 0.1-0.2 s instead of
    0.9-1.0 s, and closed in 0.03 s instead of 0.2 s. macOS and Windows cannot fork safely.
    A forked worker also inherits this process's BLAS threads: the command line sets
    ``OPENBLAS_NUM_THREADS=1`` before numpy is imported; a script calling :func:`run_cohort`
    should do the same.
    """
    return "fork" if sys.platform.startswith("linux") else "spawn"


def _import_build_modules() -> None:
    """Import what a build imports, before the workers fork, so that they inherit it.

    Done here, in this thread, and finished before any fork: a module half imported by another
    thread at the moment of a fork would stay half imported, its lock held, in the worker.
    The cohort page's module too (0.05 s): drawn at the end, while a worker that died may be
    forked again, it would otherwise be imported then.
    """
    import fibers.report.cohort  # noqa: F401
    from fibers import pipeline

    pipeline.import_later_stages(background=False)


def _connect(workers, memory, scheduler):
    """A client of an existing scheduler, or of a new local cluster; and how many builds run at once."""
    import dask
    from distributed import Client, LocalCluster

    if scheduler:
        try:
            client = Client(scheduler, timeout="20s")
        except (OSError, TimeoutError, ValueError) as err:
            raise InputError(f"--scheduler {scheduler}: cannot reach a Dask scheduler there ({_one_line(str(err))}); "
                             f"start one with 'dask scheduler' and workers with 'dask worker ADDRESS'") from None
        slots = sum(w.get("nthreads", 1) for w in client.scheduler_info().get("workers", {}).values())
        return client, None, max(slots, 1)
    workers = workers or default_workers()
    memory = memory or fair_memory(workers)
    method = worker_start_method()
    if method == "fork":
        _import_build_modules()
    # A worker that dies takes its subject with it: one more try elsewhere, then the subject fails.
    with dask.config.set({"distributed.scheduler.allowed-failures": RETRIES_AFTER_WORKER_DEATH,
                          "distributed.nanny.pre-spawn-environ": WORKER_ENV,
                          "distributed.worker.multiprocessing-method": method}):
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True,
                               memory_limit=memory, env=dict(WORKER_ENV), dashboard_address=":0",
                               silence_logs=logging.CRITICAL)
        client = Client(cluster)
    return client, cluster, workers


def _dashboard(client) -> str | None:
    import importlib.util

    try:  # the dashboard's pages need bokeh (pip install bokeh); without it there is none to show
        if importlib.util.find_spec("bokeh") is None or "dashboard" not in client.scheduler_info().get("services", {}):
            return None
        return client.dashboard_link
    except Exception:  # no dashboard (bokeh missing) is no reason to stop
        return None


def _close(client, cluster) -> None:
    try:
        client.close()
    finally:
        if cluster is not None:
            cluster.close()
