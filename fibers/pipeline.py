"""The whole build, stage after stage, and the atomic output folder.

``run`` is pure computation from contours to every array of the result; ``build`` reads a case,
runs, and writes the output folder through a temporary folder beside it that is renamed only
when everything is written, so a failed build leaves nothing behind.
"""

from __future__ import annotations

import logging
import shutil
import time
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from fibers import architecture, budget, coordinates, fem, mesh as mesh_stage, pools as pool_stage
from fibers import quadratic, segments, stack as stack_stage, surfaces as surface_stage
from fibers.config import Box, Landmarks
from fibers.io.folder import rearm_signals, signals_blocked
from fibers.sidework import side_thread
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
    # [mesh] order = 2: the 10-node elements; ``mesh`` is then their linear children
    quadratic: quadratic.QuadraticMesh | None = None
    # files `run` wrote into its ``write_to`` folder already, which outputs.write_all skips
    written: tuple = ()


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
        clock: _Clock | None = None, notes: tuple[str, ...] = (), facts: dict | None = None,
        write_to: Path | None = None) -> Result:
    """Run every stage on checked contours and a resolved case (``fibers.io.case.Case``).

    ``notes`` are warnings raised earlier (while reading the inputs) that belong in the result;
    ``facts`` are summary entries found while reading them (the label map's slice table and
    frames), merged into the summary. ``write_to``: the build's (temporary) output folder; the
    files that need part of the result only (the linear mesh's own files, the pools) are
    written there on the second thread as soon as that part exists, and listed in
    ``Result.written`` for `fibers.io.outputs.write_all` to skip.
    """
    clock = clock or _Clock()
    contours, right, route_notes = _split_ventricles(contours, case)
    notes = tuple(notes) + route_notes
    if right is not None:  # both ventricles: fibers.biv, its own stages
        from fibers.biv import route

        return route.run(contours, right, case, box=box, landmarks=landmarks, clock=clock, notes=notes)
    base = base_choice(case)
    if getattr(case, "slice_thickness", None):
        contours = replace(contours, slice_thickness=float(case.slice_thickness))
    landmarks = landmarks if landmarks is not None else case.landmarks
    caught = []
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        with clock.stage("stack", lambda: f"{len(stack.slices)} slices, base to apex; breath-hold shifts up to "
                         f"{max(np.linalg.norm(sl.shift) for sl in stack.slices):.1f} mm removed"):
            stack = stack_stage.check_stack(contours, align_slices=case.align_slices,
                                            centreline=getattr(case, "centreline", "straight"),
                                            base=base)
        with clock.stage("surfaces", lambda: f"fit RMS up to {max(r['rms_mm'] for r in surf.residuals):.2f} mm"):
            surf = surface_stage.fit_surfaces(stack)
        # the size budget, before gmsh (a fraction of a second; a progress line, not a timed stage)
        plan = budget.check_mesh_size(surf, case.mesh_size, getattr(case, "max_tets", budget.MAX_TETS))
        log.info("%-13s %7s    about %s tetrahedra expected; thinnest wall %.1f mm", "budget", "",
                 f"{plan['estimated_tets']:,}", plan["thinnest_wall_mm"])
        import_later_stages()
        box = box or _contour_box(contours, case.pools.margin)
        # What needs the mesh alone runs on a second thread beside the main line (numpy's array
        # work, the k-d queries and gmsh's calls release the GIL): the cavity and background
        # pools need only the boundary we triangulate, so they are drawn while gmsh fills the
        # volume, and the boundary nodes' distances to the two surfaces found; then the septum,
        # the other nodes' distances (the coordinates wait for them) and the other pools' points
        # (only their fields wait for the coordinates), begun while the mesh's quality is
        # measured, and the elements' segment labels and the mesh's own files, while the
        # Laplace problems are solved; the pools' files while the architecture is assigned.
        # On a cohort worker, which has one core, each runs when the stage that needs it asks
        # for it (fibers.sidework), so its time counts there. Same numbers, same bytes.
        order = getattr(case, "mesh_order", 1)
        with side_thread("fibers-side") as second:
            with clock.stage("mesh", lambda: _mesh_line(wall, quad)):
                # gmsh resets SIGTERM and SIGHUP to "kill at once"; held back while it meshes (a
                # Python handler could not run inside gmsh anyway, as with Ctrl-C), re-armed after,
                # a signal that came meanwhile then unwinds the build like Ctrl-C
                with signals_blocked():
                    try:
                        boundary = mesh_stage.wall_boundary(surf, size=case.mesh_size)
                        # at order 2 the pools are drawn on the linear children's finer faces
                        outside = (second.submit(pool_stage.draw_outside, boundary, case.pools, box=box)
                                   if order == 1 else None)
                        # the boundary nodes' distances to the two surfaces, a fifth of the search
                        near = second.submit(coordinates.boundary_distances, boundary) if order == 1 else None
                        wall = mesh_stage.fill_wall(surf, boundary, size=case.mesh_size, quality=False)
                    finally:
                        rearm_signals()
                quad = None
                if order == 2:
                    # every later stage works on the 8 linear children of each 10-node element
                    wall.quality.update(mesh_stage.tet_quality(wall.points, wall.tets))
                    quad = quadratic.elevate(wall, surf)
                    wall = quad.linear
                # the septum from the landmarks first: the coordinates start from it
                located = second.submit(segments.locate_septum, wall, landmarks,
                                        sectors=getattr(case, "septal_sectors", "fixed"))
                distances = second.submit(lambda: coordinates.surface_distances(
                    wall, known=None if near is None else near.result()))
                drawn = second.submit(lambda: pool_stage.draw_positions(
                    wall, case.pools, box=box, outside=None if outside is None else outside.result()))
                # the elements' gradients, of which the quality's measures and the Laplace matrix
                # are made (while the side thread starts on the above)
                geometry = fem.tet_gradients(wall.points, wall.tets)
                if order == 1:  # the mesh's own statistics
                    wall.quality.update(mesh_stage.tet_quality(wall.points, wall.tets, volumes=wall.cell_volumes,
                                                               gradients=geometry[1]))
            with clock.stage("segments", lambda: "landmarks from " + landmarks.source if septum is not None
                             else "no landmarks"):
                septum = located.result()
            if septum is None:
                warnings.warn("no right-ventricular insertion landmarks: the 17 segment labels are all 0 and "
                              "circumferential angles start from an arbitrary direction; add [landmarks] to the "
                              "case file")
            labels = second.submit(segments.label_cells, wall, septum)
            # the mesh's own files, written while the Laplace problems are solved
            mesh_files = (second.submit(_mesh_files, write_to, wall, surf, stack)
                          if write_to is not None and order == 1 else None)
            with clock.stage("coordinates", "transmural, apicobasal, circumferential, local frame"):
                coords = coordinates.compute(wall, zero_direction=None if septum is None else septum.bisector,
                                             distances=distances, gradients=geometry)
            del geometry  # 12 floats per element, not needed further
            # the pools' fields beside the architecture: both need only the coordinates (the
            # second thread runs jobs in order, so the points it waits for are drawn by then).
            # At 547k: architecture plus pools 0.29-0.39 s instead of 0.44-0.49 s.
            fields = second.submit(lambda: _kept(pool_stage.build_pools(wall, coords, case.law, septum, case.pools,
                                                                        box=box, drawn=drawn.result()), case.pools))
            # and the pools' files, while the architecture is assigned
            pool_files = (second.submit(lambda: _pool_files(write_to, fields.result()))
                          if write_to is not None else None)
            with clock.stage("architecture", "fiber, sheet, sheet-normal"):
                arch = architecture.assign(coords, case.law, wall, septal=septum is not None)
                if quad is not None:
                    quad = quadratic.with_cell_fields(quad, coords, case.law, septum)
            with clock.stage("pools", lambda: ", ".join(f"{k} {len(v):,}" for k, v in pool_set.items())):
                pool_set = fields.result()
                aha = labels.result()
                # the files written meanwhile (the wait for them counts here)
                written = tuple(f.result() for f in (mesh_files, pool_files) if f is not None)
        caught = [str(w.message) for w in record]
    for message in list(stack.warnings) + caught:
        log.warning("%s", message)
    result = Result(contours=contours, stack=stack, surfaces=surf, mesh=wall, coords=coords, arch=arch,
                    septum=septum, aha=aha, pools=pool_set, landmarks=landmarks, box=box,
                    timings=clock.timings, warnings=list(notes) + list(stack.warnings) + caught,
                    quadratic=quad, written=tuple(name for names in written for name in names))
    result.summary = summarise(result)
    result.summary.update(_slice_facts(result.stack, contours, base, facts or {}))
    result.summary["mesh_budget"] = plan  # the estimate beside the actual count, for the record
    return result


def _kept(pools: dict, settings) -> dict:
    """The pools asked for: a count of 0 means "no such pool", absent from the files and the report."""
    return {k: v for k, v in pools.items() if getattr(settings, k, 1) > 0}


def _mesh_files(folder: Path, wall, surf, stack) -> tuple[str, ...]:
    from fibers.io.outputs import write_mesh_files

    return write_mesh_files(folder, wall, surf, stack)


def _pool_files(folder: Path, pools: dict) -> tuple[str, ...]:
    from fibers.io.pools import write_pools

    write_pools(folder, pools)
    return ("pools",)


# What the stages after meshing import on first use (the multigrid, the mesh-file writers):
# about 0.15 s, imported on a second thread while gmsh meshes (gmsh's calls release the GIL).
LATER_IMPORTS = ("pyamg", "scipy.sparse.linalg", "scipy.spatial", "meshio", "h5py", "fibers.surface_distance",
                 "fibers.segment_table", "fibers.io.outputs", "fibers.io.pools", "fibers.io.vtkxml")


def import_later_stages(*, background: bool = True) -> None:
    """Import `LATER_IMPORTS` not imported yet: on a daemon thread, or here and now
    (``background=False``, as `fibers.cohort` does before it forks its workers)."""
    import importlib
    import sys
    import threading

    missing = [name for name in LATER_IMPORTS if name not in sys.modules]

    def load():
        for name in missing:
            importlib.import_module(name)

    if missing and background:
        threading.Thread(target=load, name="fibers-imports", daemon=True).start()
    elif missing:
        load()


def _mesh_line(wall, quad) -> str:
    if quad is None:
        return f"{len(wall.tets):,} tetrahedra, {len(wall.points):,} nodes"
    return (f"{len(quad.tets):,} quadratic tetrahedra, {len(quad.points):,} nodes "
            f"(fields on their {len(wall.tets):,} linear children)")


def base_choice(case) -> str:
    """``[geometry] base`` as resolved: "slab" for a label map, "slice" for contours by default."""
    chosen = getattr(case, "base", None)
    return chosen or ("slab" if getattr(case, "labelmap", None) is not None else "slice")


def _slice_facts(stack, contours: RawContours, base: str, facts: dict) -> dict:
    """Summary entries on slices: the slice table, the base plane and the frame facts."""
    heights = sorted(sl.height for sl in stack.slices)
    spacing = float(np.median(np.diff(heights))) if len(heights) > 1 else 0.0
    thickness = float(contours.slice_thickness) or spacing
    slices = facts.get("slices") or [
        {"id": sl.slice_id, "wall_coverage": None, "counted": True,
         "reason": "contour given" + ("" if sl.endo is not None else " (epicardium only)")}
        for sl in stack.slices]
    out = {"slices": slices,
           "base": {"plane": base, "slice_thickness_mm": round(thickness, 3),
                    "meaning": "upper face of the basal slab (half a slice above the basal "
                               "contour)" if base == "slab" else "the basal contour's plane"}}
    out.update({k: v for k, v in facts.items() if k != "slices"})
    return out


def _split_ventricles(contours: RawContours, case):
    """Left contours, the right ones when the biventricular route applies (else None), notes.

    Without right-ventricular rows the contours come back as they are (the LV route unchanged).
    """
    from fibers.biv import inputs as biv_inputs

    left, right = biv_inputs.split_contours(contours)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        route = biv_inputs.choose_route(getattr(case, "ventricles", None), right)
    return left, (right if route == "biv" else None), tuple(str(w.message) for w in record)


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
        **_order_summary(result),
    }


def _order_summary(result: Result) -> dict:
    """Order 2 only: the 10-node mesh's counts, curved volumes and Jacobian check."""
    if result.quadratic is None:
        return {}
    return {"mesh_order": 2, "quadratic": quadratic.summary(result.quadratic)}


def build(case, out: str | Path, *, report: bool = True, include: dict | None = None,
          debug: bool = False, force: bool = False, extra=None) -> dict:
    """Read the inputs of a case, run every stage and write the output folder atomically.

    ``include`` maps names inside the output folder to files copied in (the demo's inputs);
    ``extra``, when given, is called with the temporary folder once the mesh files are written, to
    add files derived from them (the demo's motion) that then count as the build's own.
    An existing ``out`` is replaced only when every file in it is one an earlier build wrote
    (the manifest's ``files``), or with ``force``; never when it holds the build's own inputs
    (see `fibers.io.folder`). Returns the manifest.
    """
    from fibers.io import folder

    own_inputs = [p for p in (case.path, case.contours, case.labelmap) if p is not None]
    with folder.guarded(out, inputs=own_inputs, force=force) as out:
        return _build_locked(case, out, report=report, include=include, force=force, inputs=own_inputs,
                             extra=extra)


def _build_locked(case, out: Path, *, report, include, force, inputs, extra=None) -> dict:
    from fibers.io import folder, outputs

    clock = _Clock()
    with clock.stage("read", lambda: f"{len(contours.points):,} contour points from {contours.source}"):
        with warnings.catch_warnings(record=True) as record:
            warnings.simplefilter("always")
            contours, landmarks, box, provenance, facts = _read_inputs(case)
    notes = tuple(str(w.message) for w in record)
    for message in notes:
        log.warning("%s", message)
    # the temporary folder exists from here, so files can be written as their parts are ready
    # (`run`'s write_to); on any error it goes, as before
    with folder.partial(out, inputs=inputs, force=force) as tmp:
        result = run(contours, case, box=box, landmarks=landmarks, clock=clock, notes=notes,
                     facts=facts, write_to=tmp)
        for name, src in (include or {}).items():
            (tmp / name).parent.mkdir(parents=True, exist_ok=True)
            shutil.copyfile(src, tmp / name)
        with warnings.catch_warnings(record=True) as record:
            warnings.simplefilter("always")
            with clock.stage("outputs", lambda: _outputs_line(result)):
                outputs.write_all(tmp, result)
                if case.labelmap is not None:   # the extracted contours, to edit and rebuild
                    from fibers.io import contours as contour_io
                    contour_io.write_contours(tmp / "contours.csv", getattr(result, "all_contours", result.contours))
            if extra is not None:
                extra(tmp)
            manifest = outputs.manifest(result, case, provenance)
            _record_resolved(manifest, case, facts)
            if getattr(result, "right", None) is not None:  # both ventricles: their conventions
                from fibers.biv import outputs as biv_outputs
                biv_outputs.amend_manifest(manifest, result)
            if report:
                from fibers import report as report_stage
                with clock.stage("report", "report/index.html"):
                    report_stage.write_report(tmp, result=result, manifest=manifest, name=out.name)
        late = _distinct(str(w.message) for w in record)  # from writing files and drawing the report
        for message in late:
            log.warning("%s", message)
        manifest["warnings"] = list(manifest.get("warnings", [])) + late
        clock.timings["total"] = round(time.perf_counter() - clock.start, 4)
        # every stage after meshing, the report excluded (the speed targets compare it with meshing)
        clock.timings["after_mesh"] = round(sum(clock.timings.get(k, 0.0) for k in AFTER_MESH), 4)
        manifest["timings_s"] = dict(clock.timings)
        # every file this build wrote, so a later build knows what it may replace
        manifest["files"] = folder.listing(tmp)
        outputs.write_manifest(tmp, manifest)
    log.info("%-13s %7.2f s  wrote %s%s", "total", clock.timings["total"], out,
             f" (open {out / 'report' / 'index.html'})" if report else "")
    return manifest


def _outputs_line(result) -> str:
    """The outputs stage's progress line: the files it writes, and those written meanwhile."""
    files = ("mesh.vtu", "mesh.xdmf", "facets.xdmf", "mesh.msh", "surfaces.vtp", "pools/", "segments.csv")
    earlier = set(getattr(result, "written", ()))
    now = [f for f in files if f.rstrip("/") not in earlier]
    before = [f for f in files if f.rstrip("/") in earlier]
    return ", ".join(now) + (f" ({', '.join(before)} written while the stages ran)" if before else "")


def _distinct(messages) -> list[str]:
    """Messages in order, each once (a warning repeated per figure says nothing new)."""
    return list(dict.fromkeys(messages))


def _read_inputs(case):
    """Contours (from CSV or label map), landmarks, the background box and input provenance."""
    from fibers.io import contours as contour_io

    if case.contours is not None:
        contours = contour_io.read_contours(case.contours)
        return contours, case.landmarks, None, [_provenance(case.contours)], {}
    from fibers import masks
    from fibers.io import labelmap as labelmap_io

    labels_cfg = dict(case.labels)
    for key in ("rv", "rv_wall"):  # 0 in the case file: the map has no such label
        if labels_cfg.get(key) == 0:
            labels_cfg[key] = None
    values = masks.LabelValues(**labels_cfg)
    image = labelmap_io.load_labelmap(case.labelmap, frame=case.frame, cavity=values.cavity)
    if len(image.frame_cavity_ml) > 1:
        log.info("%-13s %s", "frame", f"{image.frame} of {len(image.frame_cavity_ml)}: "
                 f"{image.frame_reason}, cavity {image.frame_cavity_ml[image.frame]:.1f} mL")
    found = masks.extract(image.labels, image.affine, values, source=case.labelmap.name)
    # the user's explicit points win over the ones read off the label map
    landmarks = case.landmarks if case.landmarks.present else found.landmarks
    for message in masks.orientation_warnings(found, landmarks, case.labelmap.name):
        warnings.warn(message)
    spacing = float(np.linalg.norm(image.affine[:3, masks.slice_axis(image.affine)]))
    contours = replace(found.contours, slice_thickness=case.slice_thickness or spacing)
    from fibers.biv import labels as biv_labels

    if biv_labels.right_wanted(getattr(case, "ventricles", None), values, case.labelmap.name):
        right = biv_labels.right_contours(image.labels, image.affine, values, contours, source=case.labelmap.name)
        contours = biv_labels.with_right(contours, right)
        # both ventricles: the insertion points come from the geometry unless the case gives them
        landmarks = case.landmarks
    box = masks.field_of_view(image.full_shape, image.full_affine)
    facts = {"slices": list(found.slices), "frame": image.frame,
             "frame_reason": image.frame_reason,
             "frame_cavity_volumes_ml": list(image.frame_cavity_ml)}
    return contours, landmarks, box, [_provenance(case.labelmap)], facts


def _record_resolved(manifest: dict, case, facts: dict) -> None:
    """Parameters resolved while building: the frame used, the base plane, the thickness."""
    import copy

    params = manifest["parameters"] = copy.deepcopy(manifest["parameters"])
    if "frame" in facts:   # the frame used, in its table and at the top for a quick look
        params.setdefault("input", {})["frame"] = facts["frame"]
        params["frame"] = facts["frame"]
    geometry = params.setdefault("geometry", {})
    geometry["base"] = base_choice(case)
    geometry["slice_thickness"] = manifest["summary"]["base"]["slice_thickness_mm"]


def _provenance(path: Path) -> dict:
    import hashlib

    return {"path": str(path), "sha256": hashlib.sha256(Path(path).read_bytes()).hexdigest()}
