"""One conforming tetrahedral mesh of both ventricles' wall, built with gmsh.

As for the left ventricle alone, we triangulate the closed boundary ourselves at the target
edge length and let gmsh fill the volume (HXT, one thread), so every boundary face keeps its
tag exactly:

- the left endocardium (tag 1): the rings of the left-ventricular route;
- the epicardium (tag 2): rings over the left epicardium pushed radially out by the outer width,
  so away from the right ventricle it is the left epicardium and over it the right free wall;
- the right endocardium (tag 4): two sheets over the same rows of the crescent, the septal
  sheet on the left epicardium and the free-wall sheet the cavity width beyond it, sharing
  their nodes along both insertions and the cavity's apical end (where the width is 0). Both
  sheets use one triangulation of the rows, so the free wall lies radially beyond the septum
  triangle by triangle and the two never cross;
- the base (tag 3): the flat face between the left endocardial, the epicardial and the right
  cavity's rims, triangulated by gmsh in the base plane with the rims' nodes kept.

Cells get a ``region``: 3 right free wall (outside the left epicardium), 2 septum (inside it,
where the right cavity lies beyond), 1 left free wall (the rest).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from fibers import meshtools
from fibers.biv.surfaces import RightSurfaces
from fibers.mesh import ROW, fill_volume, stitch_rings, stitch_steps, surface_rings, tagged_boundary, tet_quality
from fibers.surfaces import Surfaces
from fibers.types import BASE, ENDO, EPI, WallMesh

RV_ENDO = 4
FACE_NAMES = {ENDO: "lv_endo", EPI: "epi", BASE: "base", RV_ENDO: "rv_endo"}
LV_FREE_WALL, SEPTUM, RV_FREE_WALL = 1, 2, 3
REGION_NAMES = {LV_FREE_WALL: "lv_free_wall", SEPTUM: "septum", RV_FREE_WALL: "rv_free_wall"}


@dataclass(frozen=True)
class BiVMesh(WallMesh):
    """A wall mesh of both ventricles: a :class:`~fibers.types.WallMesh` whose faces also carry
    tag 4 (right endocardium), with a region per cell.

    Attributes
    ----------
    region : ndarray (M,) int8
        1 left free wall, 2 septum, 3 right free wall.
    right : RightSurfaces
        The right ventricle's description the mesh was built from.
    """

    region: np.ndarray | None = None
    right: RightSurfaces | None = None


def build_mesh(lv: Surfaces, right: RightSurfaces, *, size: float = 1.5, threads: int = 1) -> BiVMesh:
    """Tetrahedralise the wall of both ventricles.

    Parameters
    ----------
    lv : Surfaces
        Fitted left endocardium and epicardium.
    right : RightSurfaces
        The right cavity and the outer surface.
    size : float, mm
        Target edge length.
    threads : int
        Threads for gmsh's HXT algorithm (one: reproducible bytes).

    Returns
    -------
    BiVMesh
    """
    nodes = _Nodes()
    endo_rings = surface_rings(lv, "endo", size)
    endo_idx = [nodes.add(p) for p, _ in endo_rings]
    outer_rings = _outer_rings(lv, right, size)
    outer_idx = [nodes.add(p) for p, _ in outer_rings]
    septal_idx, free_idx, rows_u = _right_sheets(right, size, nodes)

    tri = {
        ENDO: stitch_rings(endo_idx, [a for _, a in endo_rings]),
        EPI: stitch_rings(outer_idx, [a for _, a in outer_rings]),
    }
    sheets = _drop_shared(_stitch_rows(septal_idx, rows_u), _stitch_rows(free_idx, rows_u))
    rims = {"endo": endo_idx[-1], "epi": outer_idx[-1],
            "rv": np.concatenate([septal_idx[-1], free_idx[-1][::-1][1:-1]])}
    tri[BASE] = _base_triangles(nodes, rims, size)
    local = nodes.points()
    tri = _orient_outward(local, tri, sheets)
    points, tets, tri = fill_volume(local, tri, rims, {ENDO: ["endo"], EPI: ["epi"], RV_ENDO: ["rv"],
                                                       BASE: ["endo", "epi", "rv"]},
                                    size, threads, name="biventricular wall")
    axis = lv.axis
    points_world = axis.to_world(points)
    tets, faces, face_tags, owners = tagged_boundary(points_world, tets, tri)
    region = label_regions(points, tets, right)
    return BiVMesh(points=points_world, tets=tets, faces=faces, face_tags=face_tags, axis=axis,
                   endo_apex=lv.apex("endo"), epi_apex=lv.apex("epi"),
                   quality=tet_quality(points_world, tets), region=region, right=right, face_owners=owners)


class _Nodes:
    """Accumulates local node coordinates and hands out their global indices."""

    def __init__(self):
        self.blocks, self.count = [], 0

    def add(self, pts: np.ndarray) -> np.ndarray:
        idx = np.arange(self.count, self.count + len(pts))
        self.blocks.append(np.asarray(pts, float))
        self.count += len(pts)
        return idx

    def points(self) -> np.ndarray:
        return np.concatenate(self.blocks)


# -- the outer surface ---------------------------------------------------------------------------

def _outer_rings(lv: Surfaces, right: RightSurfaces, size: float):
    """Rings (points (n, 3) local, angles (n,)) of the outer surface, apex to base rim.

    Each ring is a level of the left epicardium's prolate parameter (a fraction of the way from
    the apex to the base plane), pushed out radially by the outer width; nodes are spaced
    evenly by arc length along the pushed-out ring, shifted half a step on every other ring.
    """
    t_fine = np.linspace(0.0, 1.0, 241)
    th_f = np.linspace(-np.pi, np.pi, 257)
    mu_b = lv.base_mu("epi", th_f)

    def pushed(t, theta, mu_base):
        # (the rim row, t = 1, comes out of the base's root search within 1e-13 mm of the plane)
        p = lv.local_point("epi", t * mu_base, theta)
        wo = right.outer_width(p[:, 2], theta)
        return p + wo[:, None] * np.column_stack([np.cos(theta), np.sin(theta), np.zeros_like(theta)])

    T, TH = np.meshgrid(t_fine, th_f[::8], indexing="ij")
    grid = pushed(T.ravel(), TH.ravel(), np.tile(mu_b[::8], len(t_fine))).reshape(len(t_fine), -1, 3)
    arc = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(grid, axis=0), axis=2).mean(axis=1))])
    n_rows = max(2, int(np.ceil(arc[-1] / (ROW * size))))
    t_rows = np.interp(np.linspace(0.0, arc[-1], n_rows + 1), arc, t_fine)
    rings = [(lv.local_point("epi", np.array([0.0]), np.array([0.0])), np.array([-np.pi]))]
    t_rows = t_rows[1:].copy()
    t_rows[-1] = 1.0
    # every row at once, in two passes: the fine curves (for each row's arc length), then the
    # rows' nodes (one root search for the base of all their meridians)
    fine = len(th_f)
    curves = pushed(np.repeat(t_rows, fine), np.tile(th_f, n_rows), np.tile(mu_b, n_rows)).reshape(n_rows, fine, 3)
    arcs = np.concatenate([np.zeros((n_rows, 1)), np.cumsum(np.linalg.norm(np.diff(curves, axis=1), axis=2), axis=1)],
                          axis=1)
    counts = [max(6, int(round(a[-1] / size))) for a in arcs]
    thetas = [np.interp((np.arange(n) + 0.5 * (j % 2)) * a[-1] / n, a, th_f)
              for j, (n, a) in enumerate(zip(counts, arcs), start=1)]
    theta = np.concatenate(thetas)
    pts = pushed(np.repeat(t_rows, counts), theta, lv.base_mu("epi", theta))
    rings += list(zip(np.split(pts, np.cumsum(counts)[:-1]), thetas))
    return rings


# -- the right endocardium --------------------------------------------------------------------------

def _right_sheets(right: RightSurfaces, size: float, nodes: _Nodes):
    """Node rows of the septal and free-wall sheets, from the cavity's apical end to the base.

    Row ``j`` lies at a fraction ``j / n`` of each sheet's own meridian arc (measured
    mid-crescent): near the cavity's apical end the free wall runs nearly across the axis while
    the septum runs along it, so equal heights would crowd one sheet's rows. A free-wall row
    rises from the septal row's height at the insertions (where the two share their end nodes)
    to its own height mid-crescent.

    Returns the septal and free-wall index rows (lists of (n_j,) arrays; the first row and both
    ends of every row are shared) and each row's fractions u (n_j,) between the insertions.
    """
    z_f = np.linspace(right.bottom, 0.0, 801)
    t1, t2 = right.span_at(z_f)
    mid_t = 0.5 * (t1 + t2)
    free_mid = right.local_points(z_f, mid_t, right.cavity_width_u(z_f, np.full_like(z_f, 0.5)))
    septal_mid = right.local_points(z_f, mid_t, np.zeros_like(z_f))
    arcs = [np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(c, axis=0), axis=1))])
            for c in (septal_mid, free_mid)]
    n_rows = max(2, int(np.ceil(max(a[-1] for a in arcs) / (ROW * size))))
    level = np.linspace(0.0, 1.0, n_rows + 1)
    z_sept, z_free = (np.interp(level * a[-1], a, z_f) for a in arcs)
    z_sept[[0, -1]] = z_free[[0, -1]] = right.bottom, 0.0
    u_f = np.linspace(0.0, 1.0, 257)
    septal, free, rows_u = [], [], []
    for j in range(n_rows + 1):
        curve = _free_row(right, z_sept[j], z_free[j], u_f, flat=j == 0)
        s = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(curve, axis=0), axis=1))])
        n = max(2, int(round(s[-1] / size)))
        u = np.interp(np.linspace(0.0, s[-1], n + 1), s, u_f)
        u[[0, -1]] = 0.0, 1.0
        a, b = right.span_at(np.array([z_sept[j]]))
        zs = np.full_like(u, z_sept[j])
        s_idx = nodes.add(right.local_points(zs, a[0] + u * (b[0] - a[0]), np.zeros_like(u)))
        if j == 0:
            f_idx = s_idx  # the cavity's apical end: both sheets meet along this row
        else:
            inner = nodes.add(_free_row(right, z_sept[j], z_free[j], u[1:-1]))
            f_idx = np.concatenate([s_idx[:1], inner, s_idx[-1:]])
        septal.append(s_idx)
        free.append(f_idx)
        rows_u.append(u)
    return septal, free, rows_u


def _free_row(right: RightSurfaces, z_sept: float, z_free: float, u: np.ndarray, *, flat: bool = False):
    """Local points (K, 3) of a free-wall row at fractions u: at height ``z_sept`` at the
    insertions rising to ``z_free`` mid-crescent, the cavity width beyond the left epicardium."""
    z = z_sept + (z_free - z_sept) * np.sin(np.pi * u)
    a, b = right.span_at(z)
    w = np.zeros_like(u) if flat else right.cavity_width_u(z, u)
    return right.local_points(z, a + u * (b - a), w)


def _drop_shared(septal: np.ndarray, free: np.ndarray):
    """Remove the triangles both sheets have (all three nodes shared: the cavity pinched to no
    width there) from both; the two sheets then join along that triangle's edges."""
    n = int(max(septal.max(initial=0), free.max(initial=0))) + 1
    in_free = meshtools.match_triangles(septal, free, n) >= 0
    if not in_free.any():
        return septal, free
    in_septal = meshtools.match_triangles(free, septal, n) >= 0
    return septal[~in_free], free[~in_septal]


def _stitch_rows(index_rows, u_rows) -> np.ndarray:
    return np.concatenate([_stitch_open(index_rows[j], u_rows[j], index_rows[j + 1], u_rows[j + 1])
                           for j in range(len(index_rows) - 1)])


def _stitch_open(ia, ua, ib, ub) -> np.ndarray:
    """Triangles joining two open rows whose fractions both run from 0 to 1."""
    return stitch_steps(ia, ib, ua[1:], ub[1:], closed=False)


# -- the base ----------------------------------------------------------------------------------------

def _base_triangles(nodes: _Nodes, rims: dict, size: float) -> np.ndarray:
    """Triangles of the flat base between the three rims, by gmsh in the base plane.

    The rims' nodes are kept as they are (each rim edge is one mesh segment); interior nodes
    gmsh adds are appended to ``nodes``.
    """
    import gmsh

    local = nodes.points()
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add("base")
        geo = gmsh.model.geo
        loops = []
        for name in ("epi", "endo", "rv"):
            rim = rims[name]
            pts = [geo.addPoint(*local[k][:2], 0.0, size) for k in rim]
            lines = [geo.addLine(pts[i], pts[(i + 1) % len(pts)]) for i in range(len(pts))]
            loops.append(geo.addCurveLoop(lines))
        surface = geo.addPlaneSurface(loops)
        geo.synchronize()
        for _, line in gmsh.model.getEntities(1):
            gmsh.model.mesh.setTransfiniteCurve(line, 2)
        gmsh.option.setNumber("Mesh.MeshSizeMax", size)
        gmsh.option.setNumber("Mesh.Algorithm", 6)
        gmsh.model.mesh.generate(2)
        tags, coords, _ = gmsh.model.mesh.getNodes()
        _, elem = gmsh.model.mesh.getElementsByType(2, surface)
    finally:
        gmsh.finalize()
    coords = coords.reshape(-1, 3)
    rim_nodes = np.concatenate(list(rims.values()))
    dist, nearest = cKDTree(local[rim_nodes][:, :2]).query(coords[:, :2])
    ours = np.where(dist < 1e-7 * max(1.0, size), rim_nodes[nearest], -1)
    new = ours < 0
    added = nodes.add(np.column_stack([coords[new, :2], np.zeros(np.count_nonzero(new))]))
    ours[new] = added
    lookup = np.full(int(tags.max()) + 1, -1, np.int64)
    lookup[tags.astype(np.int64)] = ours
    return lookup[elem.astype(np.int64)].reshape(-1, 3)


# -- orientation and the volume -----------------------------------------------------------------------

def _orient_outward(local, tri, sheets):
    """Flip whole patches so every normal points out of the wall (as gmsh is handed them).

    ``sheets`` are the septal and free-wall triangles of the right endocardium; out of the wall
    is into the right cavity: away from the axis on the septal sheet, toward it on the free wall.
    """
    def radial_flux(faces):
        n, a = meshtools.triangle_normals(local, faces)
        c = local[faces].mean(axis=1)
        return float(np.sum(a * (n[:, 0] * c[:, 0] + n[:, 1] * c[:, 1]))), float(np.sum(a * n[:, 2]))

    out = {}
    for tag, faces in tri.items():
        flux, up = radial_flux(faces)
        flip = {BASE: up < 0, ENDO: flux > 0, EPI: flux < 0}[tag]
        out[tag] = faces[:, ::-1] if flip else faces
    septal, free = sheets
    septal = septal[:, ::-1] if radial_flux(septal)[0] < 0 else septal
    free = free[:, ::-1] if radial_flux(free)[0] > 0 else free
    out[RV_ENDO] = np.concatenate([septal, free])
    return out


# -- regions and volumes ---------------------------------------------------------------------------

def label_regions(local_points: np.ndarray, tets: np.ndarray, right: RightSurfaces) -> np.ndarray:
    """Region (M,) int8 of each tetrahedron from its centroid (local frame): 3 right free wall
    outside the left epicardium, 2 septum inside it where the right cavity lies beyond, 1 else.

    Outside is read in the epicardium's own prolate coordinates (lambda above the fitted
    surface's), one evaluation per centroid.
    """
    c = local_points[tets].mean(axis=1)
    theta = np.arctan2(c[:, 1], c[:, 0])
    z = np.minimum(c[:, 2], 0.0)
    region = np.full(len(tets), LV_FREE_WALL, np.int8)
    region[right.cavity_width(z, theta) > 0] = SEPTUM
    region[right.lv._local_distance("epi", c) > 0] = RV_FREE_WALL
    return region


def volumes_ml(mesh: BiVMesh) -> dict[str, float]:
    """Wall volume (sum of tetrahedra), per region, and both cavities (mL).

    Each cavity is the divergence theorem over its endocardial faces with the origin in the base
    plane, where the open cap's contribution x . n vanishes.
    """
    rel = mesh.points - mesh.axis.base_centre

    def cavity(tag):
        f = mesh.faces[mesh.face_tags == tag]
        a, b, c = (rel[f[:, k]] for k in range(3))
        return float(-np.einsum("ij,ij->i", a, np.cross(b, c)).sum() / 6.0) / 1000.0

    vol = mesh.cell_volumes / 1000.0
    per = {f"{name}_ml": float(vol[mesh.region == k].sum()) for k, name in REGION_NAMES.items()}
    return {"lv_cavity_ml": cavity(ENDO), "rv_cavity_ml": cavity(RV_ENDO), "wall_ml": float(vol.sum()), **per}
