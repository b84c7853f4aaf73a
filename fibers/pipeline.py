"""The whole build, stage after stage, and the atomic output folder.

``run`` is pure computation from contours to every array of the result; ``build`` reads a case,
runs, and writes the output folder through a temporary folder beside it that is renamed only
when everything is written, so a failed build leaves nothing behind.
"""

from __future__ import annotations

import logging
import shutil
import time
import uuid
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from fibers import architecture, coordinates, mesh as mesh_stage, pools as pool_stage
from fibers import segments, stack as stack_stage, surfaces as surface_stage
from fibers.config import Box, Landmarks
from fibers.errors import InputError
from fibers.types import ENDO, EPI, BASE, RawContours

log = logging.getLogger("fibers")

DENSITY_G_PER_ML = 1.05  # myocardial density (common practice)
AFTER_MESH = ("segments", "coordinates", "architecture", "pools", "outputs")


@dataclass
class Result:
    """Everything a build computes; the io package turns it into files."""

    contours: RawContours
    stack: object
    surfaces: object
    mesh: object
    coords: object
    arch: object
    septum: object
    aha: np.ndarray
    pools: dict
    landmarks: Landmarks
    box: Box
    summary: dict = field(default_factory=dict)
    timings: dict = field(default_factory=dict)
    warnings: list = field(default_factory=list)


class _Clock:
    """Times each stage and logs one progress line per stage."""

    def __init__(self):
        self.timings = {}
        self.start = time.perf_counter()

    @contextmanager
    def stage(self, name: str, what: str = ""):
        t0 = time.perf_counter()
        yield
        dt = time.perf_counter() - t0
        self.timings[name] = round(dt, 4)
        log.info("%-13s %7.2f s  %s", name, dt, what() if callable(what) else what)


def run(contours: RawContours, case, *, box: Box | None = None, landmarks: Landmarks | None = None,
        clock: _Clock | None = None, notes: tuple[str, ...] = ()) -> Result:
    """Run every stage on checked contours and a resolved case (``fibers.io.case.Case``).

    ``notes`` are warnings raised earlier (while reading the inputs) that belong in the result.
    """
    clock = clock or _Clock()
    landmarks = landmarks if landmarks is not None else case.landmarks
    caught = []
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        with clock.stage("stack", lambda: f"{len(stack.slices)} slices, base to apex; breath-hold shifts up to "
                         f"{max(np.linalg.norm(sl.shift) for sl in stack.slices):.1f} mm removed"):
            stack = stack_stage.check_stack(contours, align_slices=case.align_slices)
        with clock.stage("surfaces", lambda: f"fit RMS up to {max(r['rms_mm'] for r in surf.residuals):.2f} mm"):
            surf = surface_stage.fit_surfaces(stack)
        with clock.stage("mesh", lambda: f"{len(wall.tets):,} tetrahedra, {len(wall.points):,} nodes"):
            wall = mesh_stage.build_mesh(surf, size=case.mesh_size)
        with clock.stage("segments", lambda: "landmarks from " + landmarks.source if septum is not None else "no landmarks"):
            septum = segments.locate_septum(wall, landmarks)
            aha = segments.label_cells(wall, septum)
        if septum is None:
            warnings.warn("no right-ventricular insertion landmarks: the 17 segment labels are all 0 and "
                          "circumferential angles start from an arbitrary direction; add [landmarks] to the case file")
        with clock.stage("coordinates", "transmural, apicobasal, circumferential, local frame"):
            coords = coordinates.compute(wall, zero_direction=None if septum is None else septum.bisector)
        with clock.stage("architecture", "fiber, sheet, sheet-normal"):
            arch = architecture.assign(coords, case.law)
        box = box or _contour_box(contours, case.pools.margin)
        with clock.stage("pools", lambda: ", ".join(f"{k} {len(v):,}" for k, v in pool_set.items())):
            pool_set = pool_stage.build_pools(wall, coords, case.law, septum, case.pools, box=box)
        caught = [str(w.message) for w in record]
    for message in caught:
        log.warning("%s", message)
    result = Result(contours=contours, stack=stack, surfaces=surf, mesh=wall, coords=coords, arch=arch,
                    septum=septum, aha=aha, pools=pool_set, landmarks=landmarks, box=box,
                    timings=clock.timings, warnings=list(notes) + list(stack.warnings) + caught)
    result.summary = summarise(result)
    return result


def _contour_box(contours: RawContours, margin: float) -> Box:
    lo = contours.points.min(axis=0) - margin
    hi = contours.points.max(axis=0) + margin
    return Box(corner=lo, edges=np.diag(hi - lo))


def summarise(result: Result) -> dict:
    """The manifest's summary: volumes, mass, counts, quality and fit residuals."""
    wall = result.mesh
    myo, cavity = mesh_stage.volumes_mm3(wall)
    myo_ml = myo / 1000.0
    res = result.surfaces.residuals
    per_structure = {s: [r for r in res if r["structure"] == s] for s in ("endo", "epi")}
    height = (wall.axis.base_centre - wall.epi_apex) @ wall.axis.direction
    return {
        "myocardial_volume_ml": round(myo_ml, 3),
        "cavity_volume_ml": round(float(cavity) / 1000.0, 3),
        "lv_mass_g": round(myo_ml * DENSITY_G_PER_ML, 2),
        "long_axis_length_mm": round(float(height), 2),
        "counts": {
            "slices": len(result.stack.slices),
            "nodes": int(len(wall.points)),
            "tetrahedra": int(len(wall.tets)),
            "faces": {name: int(np.count_nonzero(wall.face_tags == tag))
                      for tag, name in ((ENDO, "endo"), (EPI, "epi"), (BASE, "base"))},
            "pools": {k: len(v) for k, v in result.pools.items()},
        },
        "mesh_quality": wall.quality,
        "fit_residuals_mm": {
            s: {"rms_max": round(max(r["rms_mm"] for r in rows), 3),
                "max": round(max(r["max_mm"] for r in rows), 3)} for s, rows in per_structure.items() if rows},
        "fit_residuals_per_slice": list(res),
        "slice_shifts_mm": {str(sl.slice_id): [round(float(v), 3) for v in sl.shift] for sl in result.stack.slices},
    }


def build(case, out: str | Path, *, report: bool = True, include: dict | None = None,
          debug: bool = False) -> dict:
    """Read the inputs of a case, run every stage and write the output folder atomically.

    ``include`` maps names inside the output folder to files copied in (the demo's inputs).
    Returns the manifest.
    """
    from fibers.io import outputs

    out = Path(out)
    _check_out(out)
    clock = _Clock()
    with clock.stage("read", lambda: f"{len(contours.points):,} contour points from {contours.source}"):
        with warnings.catch_warnings(record=True) as record:
            warnings.simplefilter("always")
            contours, landmarks, box, inputs = _read_inputs(case)
    notes = tuple(str(w.message) for w in record)
    for message in notes:
        log.warning("%s", message)
    result = run(contours, case, box=box, landmarks=landmarks, clock=clock, notes=notes)

    tmp = out.parent / f".{out.name}.partial-{uuid.uuid4().hex[:8]}"
    try:
        try:
            tmp.mkdir(parents=True)
        except OSError as err:
            raise InputError(f"cannot create the output folder beside {out} ({err.strerror}); "
                             f"choose another --out") from None
        for name, src in (include or {}).items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(src, tmp / name)
        with clock.stage("outputs", "mesh.vtu, mesh.xdmf, mesh.msh, surfaces.vtp, pools/"):
            outputs.write_all(tmp, result)
        manifest = outputs.manifest(result, case, inputs)
        if report:
            from fibers import report as report_stage
            with clock.stage("report", "report/index.html"):
                report_stage.write_report(tmp, result=result, manifest=manifest, name=out.name)
        clock.timings["total"] = round(time.perf_counter() - clock.start, 4)
        # every stage after meshing, the report excluded (DESIGN 6 compares it with meshing)
        clock.timings["after_mesh"] = round(sum(clock.timings.get(k, 0.0) for k in AFTER_MESH), 4)
        manifest["timings_s"] = dict(clock.timings)
        outputs.write_manifest(tmp, manifest)
        _replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    log.info("%-13s %7.2f s  wrote %s%s", "total", clock.timings["total"], out,
             f" (open {out / 'report' / 'index.html'})" if report else "")
    return manifest


def _read_inputs(case):
    """Contours (from CSV or label map), landmarks, the background box and input provenance."""
    from fibers.io import contours as contour_io

    if case.contours is not None:
        contours = contour_io.read_contours(case.contours)
        return contours, case.landmarks, None, [_provenance(case.contours)]
    from fibers import masks
    from fibers.io import labelmap as labelmap_io

    labels, affine = labelmap_io.read_labelmap(case.labelmap, frame=case.frame)
    labels_cfg = dict(case.labels)
    if labels_cfg.get("rv") == 0:  # rv = 0 in the case file: the map has no RV label
        labels_cfg["rv"] = None
    values = masks.LabelValues(**labels_cfg)
    contours, found, box = masks.contours_from_labelmap(labels, affine, values, source=case.labelmap.name)
    spacing = float(np.linalg.norm(np.asarray(affine)[:3, masks.slice_axis(affine)]))
    contours = replace(contours, slice_thickness=spacing)
    # the user's explicit points win over the ones read off the label map
    landmarks = case.landmarks if case.landmarks.present else found
    return contours, landmarks, box, [_provenance(case.labelmap)]


def _provenance(path: Path) -> dict:
    import hashlib

    return {"path": str(path), "sha256": hashlib.sha256(Path(path).read_bytes()).hexdigest()}


def _check_out(out: Path) -> None:
    """Refuse, before any work, to replace a folder that is not an earlier build."""
    if out.exists() and (not out.is_dir() or (any(out.iterdir()) and not (out / "manifest.json").exists())):
        raise InputError(f"{out} exists and is not a fibers output folder; choose another --out or remove it")


def _replace(tmp: Path, out: Path) -> None:
    """Move the finished folder into place, replacing an older build only at the very end."""
    old = None
    if out.exists():
        old = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:8]}"
        out.rename(old)
    tmp.rename(out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


@contextmanager
def staged_folder(out: str | Path):
    """A temporary folder beside ``out`` that replaces it when the block ends without error.

    For the commands that write a folder after a build (fresh pools, voxel volumes): the same
    refusal of a foreign folder and the same final rename as `build`. What is written must
    include a ``manifest.json`` so that a later run may replace the folder.
    """
    out = Path(out)
    _check_out(out)
    tmp = out.parent / f".{out.name}.partial-{uuid.uuid4().hex[:8]}"
    try:
        tmp.mkdir(parents=True)
    except OSError as err:
        raise InputError(f"cannot create the output folder beside {out} ({err.strerror}); "
                         f"choose another --out") from None
    try:
        yield tmp
        _replace(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
