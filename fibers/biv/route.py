"""The biventricular build, stage after stage: the counterpart of ``fibers.pipeline.run``.

The left ventricle's stack and surfaces are checked and fitted exactly as on the left-ventricular
route; the right ventricle is added over them (:mod:`fibers.biv.surfaces`), then one mesh of both
ventricles, the rule-based fibers of Bayer et al. 2012, the regional labels and the pools.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, replace

import numpy as np

from fibers import meshtools, segments, stack as stack_stage, surfaces as surface_stage
from fibers.biv import coordinates as biv_coords, mesh as biv_mesh, pools as biv_pools, regions
from fibers.biv.inputs import RightContours
from fibers.biv.surfaces import epi_point, fit_right
from fibers.config import Box, Landmarks
from fibers.io.folder import rearm_signals, signals_blocked
from fibers.pipeline import Result, _Clock, _contour_box, _slice_facts, base_choice, summarise
from fibers.segment_table import rv_free_wall_rows, segment_table
from fibers.types import EPI, RawContours

log = logging.getLogger("fibers")


@dataclass
class BiVResult(Result):
    """A biventricular build: everything of :class:`fibers.pipeline.Result`, plus the right
    ventricle's surfaces, the extra Laplace fields, the right free-wall thirds and the law."""

    right: object = None
    fields: object = None
    rv_region: np.ndarray | None = None
    law: biv_coords.BiVLaw | None = None
    right_contours: RightContours | None = None

    @property
    def all_contours(self) -> RawContours:
        """The left and right contours as one table (a label map build's ``contours.csv``)."""
        rc = self.right_contours
        if rc is None:
            return self.contours
        c = self.contours
        return RawContours(structure=np.concatenate([c.structure, rc.structure]),
                           slice_id=np.concatenate([c.slice_id, rc.slice_id]),
                           points=np.concatenate([c.points, rc.points]), line=np.concatenate([c.line, rc.line]),
                           source=c.source, slice_thickness=c.slice_thickness)

    # what the mesh files carry beyond the left-ventricular fields (fibers.io.outputs)
    @property
    def extra_point_data(self) -> dict:
        return {"septal_depth": self.fields.septal_depth, "phi_lv": self.fields.phi_lv,
                "phi_rv": self.fields.phi_rv}

    @property
    def extra_cell_data(self) -> dict:
        return {"region": np.asarray(self.mesh.region, np.int32),
                "rv_region": np.asarray(self.rv_region, np.int32)}

    @property
    def face_names(self) -> dict:
        return dict(biv_mesh.FACE_NAMES)

    def segment_rows(self) -> list[dict]:
        """Rows of ``segments.csv`` on both ventricles (see :func:`segment_rows`)."""
        return segment_rows(self.mesh, self.arch.helix_angle, self.aha, self.septum, self.rv_region)


def run(contours: RawContours, right: RightContours, case, *, box: Box | None = None,
        landmarks: Landmarks | None = None, clock: _Clock | None = None,
        notes: tuple[str, ...] = ()) -> BiVResult:
    """Run every stage of the biventricular route on left contours and right contours."""
    clock = clock or _Clock()
    law = biv_coords.BiVLaw(**getattr(case, "biv_law", {}))
    law.check()
    base = base_choice(case)
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        with clock.stage("stack", lambda: f"{len(stack.slices)} slices, base to apex"):
            stack = stack_stage.check_stack(contours, align_slices=case.align_slices,
                                            centreline=getattr(case, "centreline", "straight"), base=base)
        with clock.stage("surfaces", lambda: f"left fit RMS up to {max(r['rms_mm'] for r in surf.residuals):.2f} mm; "
                         f"right ventricle on {len(rs.heights)} slices, outer surface {rs.outer_from}"):
            surf = surface_stage.fit_surfaces(stack)
            rs = fit_right(stack, surf, right, wall_thickness=case.rv_wall_thickness)
        with clock.stage("mesh", lambda: f"{len(wall.tets):,} tetrahedra, {len(wall.points):,} nodes, both ventricles"):
            with signals_blocked():  # gmsh resets SIGTERM and SIGHUP (as on the LV route)
                try:
                    wall = biv_mesh.build_mesh(surf, rs, size=case.mesh_size)
                finally:
                    rearm_signals()
        # landmarks of the case file (or a label map's) win over the ones found from the geometry
        if landmarks is None or not landmarks.present:
            landmarks = case.landmarks if case.landmarks.present else insertion_points(wall)
        with clock.stage("segments", lambda: "landmarks from " + landmarks.source):
            septum = segments.locate_septum(wall, landmarks)
            aha = regions.aha_cells(wall, septum)
            rv_region = regions.rv_cells(wall)
        with clock.stage("coordinates", "Laplace fields from both endocardia and the epicardium; frames, fibers"):
            coords, arch, fields = biv_coords.compute(wall, law, zero_direction=septum.bisector)
        box = box or _contour_box(contours, case.pools.margin)
        with clock.stage("pools", lambda: ", ".join(f"{k} {len(v):,}" for k, v in pool_set.items())):
            pool_set = biv_pools.build_pools(wall, coords, arch, fields, case.law, septum, case.pools, box=box,
                                             biv_law=law)
        caught = [str(w.message) for w in record]
    for message in caught:
        log.warning("%s", message)
    result = BiVResult(contours=contours, stack=stack, surfaces=surf, mesh=wall, coords=coords, arch=arch,
                       septum=septum, aha=aha, pools=pool_set, landmarks=landmarks, box=box,
                       timings=clock.timings, warnings=list(notes) + list(stack.warnings) + caught,
                       right=rs, fields=fields, rv_region=rv_region, law=law,
                       right_contours=right)
    result.summary = summarise(result)
    result.summary["counts"]["faces"]["rv_endo"] = int(np.count_nonzero(wall.face_tags == biv_mesh.RV_ENDO))
    result.summary.update(_slice_facts(result.stack, contours, base, {}))
    result.summary["biventricular"] = biv_summary(result)
    # the resolved biventricular parameters (left out of "parameters" unless the case gave them)
    result.summary["biventricular"]["rv_wall_thickness_parameter_mm"] = float(case.rv_wall_thickness)
    return result


def segment_rows(wall: biv_mesh.BiVMesh, helix_angle: np.ndarray, aha: np.ndarray, septum,
                 rv_region: np.ndarray) -> list[dict]:
    """``segments.csv`` of both ventricles: the left ventricle's rows 0-17, then the right free wall's.

    The AHA rows are measured on the left ventricle's own surfaces: its endocardium and, as its
    outer surface, the epicardium of the left free wall and the septum's right face (the right
    endocardium over the septum), so a septal segment's thickness is the septum's, not the
    distance across the right cavity. Row 0 is the left ventricle, septum included (every cell
    outside the right free wall). Then ``rv`` (the whole right free wall) and ``rv1``-``rv3``
    (basal, mid, apical thirds), from :func:`fibers.segment_table.rv_free_wall_rows`.
    """
    owner = meshtools.boundary_faces(wall.tets)[1]
    free = wall.region[owner] == biv_mesh.RV_FREE_WALL
    tags = np.where(free, 0, wall.face_tags)            # the right free wall's faces left out
    tags = np.where(~free & (wall.face_tags == biv_mesh.RV_ENDO), EPI, tags)
    lv_cells = wall.region != biv_mesh.RV_FREE_WALL
    left = replace(wall, face_tags=tags)
    rows = segment_table(left, helix_angle, aha, septum)
    lv_ml = float(np.abs(wall.cell_volumes[lv_cells]).sum()) / 1000.0
    rows[0] = dict(rows[0], name="left ventricle (septum included)", volume_ml=lv_ml)
    node_thirds = regions.rv_thirds(wall.points, wall, np.ones(len(wall.points), bool))
    rows += rv_free_wall_rows(wall.points, wall.cell_volumes, helix_angle, rv_region, node_thirds,
                              wall.faces[free & (wall.face_tags == biv_mesh.RV_ENDO)],
                              wall.faces[free & (wall.face_tags == EPI)])
    return rows


def insertion_points(wall: biv_mesh.BiVMesh, *, fraction: float = 1.0 / 6.0) -> Landmarks:
    """RV insertion points from the geometry: where the right cavity's tips meet the left
    epicardium, ``fraction`` of the left cavity's depth below the base (mid basal third).

    Seen from the apex, anterior -> septum -> inferior runs counter-clockwise (the usual
    anatomy, as :mod:`fibers.segments` assumes): the anterior point is the crescent's end at the
    larger angle about the apex-to-base axis.
    """
    rs = wall.right
    cavity = float(segments.depth_below_base(wall.endo_apex, wall.axis)[0])
    z = np.array([max(-fraction * cavity, rs.heights[0])])
    t1, t2 = rs.span_at(z)
    pts, _ = epi_point(rs.lv, np.r_[z, z], np.r_[t2, t1])
    world = wall.axis.to_world(pts)
    return Landmarks(world[0], world[1], source="right-ventricular contours")


def biv_summary(result: BiVResult) -> dict:
    """The manifest's biventricular part: volumes per cavity and region, the law, the sources."""
    vols = biv_mesh.volumes_ml(result.mesh)
    rs = result.right
    return {
        "ventricles": "biv",
        "rv_cavity_volume_ml": round(vols["rv_cavity_ml"], 3),
        "lv_cavity_volume_ml": round(vols["lv_cavity_ml"], 3),
        "wall_volume_ml": round(vols["wall_ml"], 3),
        "wall_volume_per_region_ml": {name: round(vols[f"{name}_ml"], 3)
                                      for name in biv_mesh.REGION_NAMES.values()},
        "rv_outer_surface": rs.outer_from,
        "rv_free_wall_thickness_mm": round(float(rs.thickness), 3),
        "rv_cavity_apical_end_mm_below_base": round(-float(rs.bottom), 3),
        "rv_slices": [r["slice"] for r in rs.residuals],
        "rv_septal_side_gap_mm": list(rs.residuals),
        "face_tags": {name: tag for tag, name in biv_mesh.FACE_NAMES.items()},
        "regions": {name: k for k, name in biv_mesh.REGION_NAMES.items()},
        "rv_regions": {name: k for k, name in regions.RV_REGION_NAMES.items()},
        "fiber_law_deg": result.law.as_dict(),
        "fiber_law_source": "Bayer, Blake, Plank, Trayanova, Ann Biomed Eng 2012 (defaults from memory)",
    }
