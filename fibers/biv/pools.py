"""Sample-point pools on both ventricles.

The six pools of :mod:`fibers.pools` are drawn on the biventricular mesh as for the left
ventricle; then

- their fiber, sheet and sheet-normal directions, frames and angles come from the biventricular
  rule evaluated at each point (:class:`fibers.biv.coordinates.PointRule`; the left-ventricular
  angle law does not hold here); without the law, from the nodal triads interpolated and
  re-orthonormalised;
- the background's wall test counts the right endocardium too, so the right cavity is outside
  the wall;
- two pools are added: ``rv_cavity`` (uniform in the right cavity, closed by the base plane) and
  ``rv_endo`` (uniform on the right endocardium, ``normal`` out of the wall, all wall fields).

Wall pools also carry ``region`` (1 LV free wall, 2 septum, 3 RV free wall), ``septal_depth``
and ``rv_region`` (1-3 basal/mid/apical thirds of the right free wall, 0 elsewhere).
"""

from __future__ import annotations

import numpy as np

from fibers import meshtools, pools as pool_stage
from fibers.biv.mesh import RV_ENDO, RV_FREE_WALL, BiVMesh
from fibers.biv.regions import rv_thirds
from fibers.config import Box
from fibers.types import ENDO, EPI
from fibers.vectors import cross, unit_rows

RV_POOLS = ("rv_cavity", "rv_endo")


def build_pools(mesh: BiVMesh, coords, arch, fields, law, septum, settings, *, box: Box | None = None,
                biv_law=None) -> dict:
    """All pools on a biventricular mesh (see the module docstring).

    ``rv_cavity`` takes the count of ``settings.cavity`` and ``rv_endo`` that of ``settings.endo``.
    With ``biv_law`` (and ``fields.psi``) the directions and angles at the points come from the
    rule itself (:class:`fibers.biv.coordinates.PointRule`); otherwise the nodal triads are
    interpolated.
    """
    wall_test = pool_stage.EnclosedTest(mesh, tags=(ENDO, EPI, RV_ENDO))
    in_wall = lambda p: (np.where(wall_test(p), 0, -1),)  # noqa: E731  the locator's contract
    pools = pool_stage.build_pools(mesh, coords, law, septum, settings, box=box, locator=in_wall)
    rule = None
    if biv_law is not None and getattr(fields, "psi", None) is not None:
        from fibers.biv.coordinates import PointRule

        rule = PointRule(mesh, fields, biv_law)
    for name, pool in pools.items():
        if "tet" in pool.arrays:
            _biv_fields(pool.arrays, mesh, arch, fields, rule)
    seed = np.random.default_rng(settings.seed).spawn(len(pool_stage.POOL_NAMES) + 2)[-2:]
    pools["rv_cavity"] = pool_stage.Pool("rv_cavity", {"points": _rv_cavity_points(mesh, settings, seed[0])})
    pools["rv_endo"] = pool_stage.Pool("rv_endo", _rv_endo_arrays(mesh, coords, arch, fields, law, septum,
                                                                  settings, seed[1], rule))
    return pools


def _interp(arrays, mesh, nodal):
    """Nodal values interpolated at pool points with the barycentric weights of their element."""
    pts = arrays["points"]
    tets = mesh.tets[arrays["tet"]]
    from fibers import fem

    w = fem.barycentric(mesh.points, mesh.tets, arrays["tet"], pts) if len(pts) else np.zeros((0, 4))
    return np.einsum("km,km...->k...", w, np.asarray(nodal)[tets])


def _biv_fields(arrays, mesh, arch, fields, rule=None):
    """Replace the direction fields of a pool by the biventricular ones: from the rule at the
    points when given, else interpolated from the nodes."""
    if rule is not None and len(arrays["points"]):
        from fibers import fem

        w = fem.barycentric(mesh.points, mesh.tets, arrays["tet"], arrays["points"])
        got = rule.at(arrays["points"], arrays["tet"], w)
        for key in ("fiber", "sheet", "sheet_normal", "e_rad", "e_long", "e_circ", "septal_depth"):
            arrays[key] = got[key]
        arrays["helix_angle"], arrays["sheet_angle"] = got["helix"], got["sheet_angle"]
        arrays["helix_angle_sax"], arrays["imbrication_angle"] = got["helix_sax"], got["imbrication"]
        arrays["dispersion"] = np.zeros(len(arrays["points"]))
        _regions(arrays, mesh)
        return
    fiber = unit_rows(_interp(arrays, mesh, arch.fiber))
    sheet = _interp(arrays, mesh, arch.sheet)
    sheet = unit_rows(sheet - np.einsum("ij,ij->i", sheet, fiber)[:, None] * fiber)
    arrays["fiber"], arrays["sheet"] = fiber, sheet
    arrays["sheet_normal"] = cross(fiber, sheet)
    arrays["helix_angle"] = _interp(arrays, mesh, arch.helix_angle)
    for name in ("helix_angle_sax", "imbrication_angle", "sheet_angle", "dispersion"):
        arrays[name] = _interp(arrays, mesh, getattr(arch, name))
    arrays["septal_depth"] = np.clip(_interp(arrays, mesh, fields.septal_depth), 0.0, 1.0)
    _regions(arrays, mesh)


def _regions(arrays, mesh):
    """``region``, ``rv_region`` and the AHA label (0 on the right free wall) of pool points."""
    region = mesh.region[arrays["tet"]]
    arrays["region"] = region
    arrays["rv_region"] = rv_thirds(arrays["points"], mesh, region == RV_FREE_WALL)
    arrays["aha_segment"] = np.where(region == RV_FREE_WALL, 0, arrays["aha_segment"]).astype(np.int8)


def _rv_cavity_points(mesh, settings, rng):
    """Uniform points in the right cavity (rejection in its bounding box, ray-parity test)."""
    inside = pool_stage.EnclosedTest(mesh, tags=(RV_ENDO,))
    local = mesh.axis.to_local(mesh.points[mesh.face_nodes(RV_ENDO)])
    lo = local.min(axis=0)
    hi = np.r_[local[:, :2].max(axis=0), 0.0]
    lo[2] = min(lo[2], -1e-9)
    box = Box(corner=mesh.axis.to_world(lo), edges=(hi - lo)[:, None] * mesh.axis.frame())
    return pool_stage._rejection(rng, int(settings.cavity), settings.sampler, box.sample, inside, 0.3)


def _rv_endo_arrays(mesh, coords, arch, fields, law, septum, settings, rng, rule=None):
    """Uniform points on the right endocardium with all wall fields and the outward normal."""
    n = int(settings.endo)
    rows = np.flatnonzero(mesh.face_tags == RV_ENDO)
    normals, areas = meshtools.triangle_normals(mesh.points, mesh.faces)
    unit = pool_stage._unit(rng, n, 3, settings.sampler)
    face = rows[pool_stage._pick(areas[rows], unit[:, 0])] if n else np.zeros(0, np.int64)
    w = pool_stage.fold_to_triangle(unit[:, 1:])
    points = np.einsum("km,kmj->kj", w, mesh.points[mesh.faces[face]])
    arrays = {"points": points, "normal": normals[face]}
    arrays.update(pool_stage.point_fields(points, mesh.faces[face], w, mesh, coords, law, septum))
    owner = pool_stage.face_owners(mesh)
    arrays["face"] = face
    arrays["tet"] = owner[face] if n else np.zeros(0, np.int64)
    _biv_fields(arrays, mesh, arch, fields, rule)
    return arrays
