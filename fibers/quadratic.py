"""Quadratic (10-node) tetrahedra on the wall, for ``[mesh] order = 2``.

The linear mesh of :mod:`fibers.mesh` is raised to second order here rather than by gmsh, so
the mid-edge nodes of the boundary can be put on the fitted surfaces themselves (gmsh only
sees our triangulation of them):

- a mid-edge node of an endocardial or epicardial edge moves along its prolate ``lambda``
  coordinate line onto that fitted surface (a graph ``lambda = L(mu, theta)``);
- a mid-edge node of a base edge stays in the base plane (the midpoint of two points of a
  plane);
- a mid-edge node of a rim edge (where the base meets the endocardium or the epicardium) goes
  to the rim curve of that surface at the node's angle about the axis;
- every other mid-edge node is the midpoint of its edge.

Fields at all nodes: each 10-node tetrahedron is split into 8 linear tetrahedra on the same 10
nodes (4 at the corners, 4 around the shortest diagonal of the inner octahedron), and the
coordinates, frames, fibers, segments and pools are computed on that linear mesh, which is a
valid ``WallMesh``. Every node of the quadratic mesh thus carries the values of the usual
linear solution on the refined node set. The cell fields of a 10-node element are rebuilt
from its 8 children: the segment at the centroid of its corners, the fiber triad by the fiber rule from the
volume-weighted mean frame and depth of the children.

Node order is VTK's (as meshio, XDMF and dolfinx's XDMF reader expect): corners 0-3, then the
mid-edge nodes of edges (0,1), (1,2), (2,0), (0,3), (1,3), (2,3). Boundary triangles have 6
nodes: corners 0-2, then edges (0,1), (1,2), (2,0).
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, field, replace

import numpy as np

from fibers import meshtools
from fibers.types import BASE, ENDO, EPI, FACE_TAG_NAMES, WallMesh
from fibers.vectors import cross

log = logging.getLogger(__name__)

# local corner pairs of the 6 mid-edge nodes of a tetrahedron, in VTK order (nodes 4-9)
TET_EDGES = np.array([[0, 1], [1, 2], [2, 0], [0, 3], [1, 3], [2, 3]])
# local corner pairs of the 3 mid-edge nodes of a triangle (nodes 3-5)
TRI_EDGES = np.array([[0, 1], [1, 2], [2, 0]])
# children of a 10-node tetrahedron at its corners, in its local node numbers
_CORNER_CHILDREN = np.array([[0, 4, 6, 7], [4, 1, 5, 8], [6, 5, 2, 9], [7, 8, 9, 3]])
# the inner octahedron (nodes 4-9): for each of its three diagonals, the four nodes around it
# in cyclic order (no two neighbours opposite each other)
_DIAGONALS = np.array([[4, 9], [5, 7], [6, 8]])
_RINGS = np.array([[5, 6, 7, 8], [4, 6, 9, 8], [4, 5, 9, 7]])
# each boundary triangle of 6 nodes as 4 triangles of the same orientation
_FACE_CHILDREN = np.array([[0, 3, 5], [3, 1, 4], [5, 4, 2], [3, 4, 5]])


@dataclass(frozen=True)
class QuadraticMesh:
    """Quadratic tetrahedra of the wall and the linear mesh the fields are computed on.

    Attributes
    ----------
    points : ndarray (N, 3) float64, mm
        Corners first (the linear mesh's nodes, in its order), then one node per edge.
    tets : ndarray (M, 10) int64
        VTK node order; corners positively oriented.
    faces : ndarray (F, 6) int64
        Boundary triangles, VTK order, right-hand normal out of the wall.
    face_tags : ndarray (F,) int
        ``ENDO``, ``EPI`` or ``BASE``.
    rings : dict
        ``ENDO`` / ``EPI`` -> ndarray (R, 3) int64: the edges where that surface meets the base,
        as 3-node lines (two ends, then the mid-edge node).
    linear : WallMesh
        The 8 linear children of every element on the same points; child ``8 k + j`` belongs
        to element ``k``. Its ``quality`` is that of the straight-sided corner mesh.
    child_volumes : ndarray (8 M,), mm^3
        Volumes of the children.
    jacobian : dict
        ``min_ratio``: the smallest Jacobian determinant over the corners and quadrature points
        of every element divided by its straight-sided value; ``moved_back``: elements whose
        boundary mid-edge nodes were left straight to keep the Jacobian positive.
    cell_data : dict
        Fields per 10-node element (name -> (M, ...) array), set by :func:`with_cell_fields`.
    """

    points: np.ndarray
    tets: np.ndarray
    faces: np.ndarray
    face_tags: np.ndarray
    rings: dict
    linear: WallMesh
    child_volumes: np.ndarray
    jacobian: dict
    cell_data: dict = field(default_factory=dict)


# ------------------------------------------------------------------------------ raising the order

def elevate(wall: WallMesh, surfaces) -> QuadraticMesh:
    """Raise a linear wall mesh to 10-node tetrahedra with mid-edge nodes on the fitted surfaces.

    Parameters
    ----------
    wall : WallMesh
        The linear mesh of :func:`fibers.mesh.build_mesh` (its boundary nodes on ``surfaces``).
    surfaces : fibers.surfaces.Surfaces
        The fitted endocardium and epicardium the wall was meshed between.

    Returns
    -------
    QuadraticMesh
    """
    n = len(wall.points)
    pairs = np.sort(wall.tets[:, TET_EDGES].reshape(-1, 2), axis=1)
    keys, inverse = np.unique(pairs[:, 0] * n + pairs[:, 1], return_inverse=True)
    edges = np.column_stack([keys // n, keys % n])
    tets10 = np.concatenate([wall.tets, n + inverse.reshape(-1, 6)], axis=1)

    def edge_ids(e):
        s = np.sort(e, axis=1).astype(np.int64)
        return np.searchsorted(keys, s[:, 0] * n + s[:, 1])

    straight = 0.5 * (wall.points[edges[:, 0]] + wall.points[edges[:, 1]])
    mids = _curved_midpoints(wall, surfaces, edges, edge_ids, straight)
    points = np.concatenate([wall.points, mids])
    mids, moved_back, ratio = _keep_positive(points, tets10, straight, n)
    points = np.concatenate([wall.points, mids])

    faces6 = np.concatenate([wall.faces, n + edge_ids(wall.faces[:, TRI_EDGES].reshape(-1, 2)).reshape(-1, 3)],
                            axis=1)
    rings = {}
    for tag in (ENDO, EPI):
        e = meshtools.shared_edges(wall.faces[wall.face_tags == tag], wall.faces[wall.face_tags == BASE])
        rings[tag] = np.column_stack([e, n + edge_ids(e)])

    children, _ = split_tet10(points, tets10)
    sub_faces = faces6[:, _FACE_CHILDREN].reshape(-1, 3)
    # quality: that of the corner (gmsh) mesh, the one the element shapes come from; the
    # children's own statistics would cost more than the split and describe no file's cells
    linear = WallMesh(points=points, tets=children, faces=sub_faces, face_tags=np.repeat(wall.face_tags, 4),
                      axis=wall.axis, endo_apex=wall.endo_apex, epi_apex=wall.epi_apex, quality=wall.quality)
    log.debug("quadratic mesh: %d elements, %d nodes, Jacobian ratio >= %.3f", len(tets10), len(points), ratio)
    return QuadraticMesh(points=points, tets=tets10, faces=faces6, face_tags=wall.face_tags.copy(), rings=rings,
                         linear=linear, child_volumes=meshtools.signed_volumes(points, children),
                         jacobian={"min_ratio": ratio, "moved_back": moved_back})


def _curved_midpoints(wall, surfaces, edges, edge_ids, straight) -> np.ndarray:
    """Mid-edge nodes (E, 3) world: boundary edges on their fitted surface, others straight."""
    mids = straight.copy()
    on = {}
    for tag in FACE_TAG_NAMES:
        f = wall.faces[wall.face_tags == tag]
        flag = np.zeros(len(edges), bool)
        flag[edge_ids(f[:, TRI_EDGES].reshape(-1, 2))] = True
        on[tag] = flag
    axis = wall.axis
    for tag, name in ((ENDO, "endo"), (EPI, "epi")):
        rim = on[tag] & on[BASE]
        side = on[tag] & ~on[BASE]
        if side.any():
            mids[side] = axis.to_world(surfaces.project_local(name, axis.to_local(straight[side])))
        if rim.any():
            local = axis.to_local(straight[rim])
            mids[rim] = axis.to_world(surfaces.rim_local(name, np.arctan2(local[:, 1], local[:, 0])))
    flat = on[BASE] & ~on[ENDO] & ~on[EPI]
    if flat.any():  # the midpoint of two base points is in the plane already, up to rounding
        local = axis.to_local(straight[flat])
        local[:, 2] = 0.0
        mids[flat] = axis.to_world(local)
    return mids


def _keep_positive(points, tets10, straight, n):
    """Straighten the mid-edge nodes of any element whose Jacobian is not positive everywhere.

    At the target sizes the curving moves a node by a few hundredths of a mm and no element
    needs this; it guards a thin element against a strongly curved patch of surface.
    """
    ratio = jacobian_ratio(points, tets10)
    bad = ratio <= 0.05
    moved_back = 0
    mids = points[n:].copy()
    if bad.any():
        moved_back = int(np.count_nonzero(bad))
        mids[tets10[bad, 4:].ravel() - n] = straight[tets10[bad, 4:].ravel() - n]
        warnings.warn(f"quadratic mesh: {moved_back} elements near strongly curved parts of the surface keep "
                      "straight edges so their Jacobian stays positive; a smaller [mesh] size avoids it")
        ratio = jacobian_ratio(np.concatenate([points[:n], mids]), tets10)
    return mids, moved_back, float(ratio.min())


# ------------------------------------------------------------------------------ linear children

def split_tet10(points: np.ndarray, tets10: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Split 10-node tetrahedra into 8 linear tetrahedra each, on the same nodes.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    tets10 : ndarray (M, 10) int, VTK node order

    Returns
    -------
    children : ndarray (8 M, 4) int64
        Positively oriented; rows ``8 k .. 8 k + 7`` are the children of element ``k``.
    parent : ndarray (8 M,) int64
    """
    tets10 = np.asarray(tets10, dtype=np.int64)
    m = len(tets10)
    corners = tets10[:, _CORNER_CHILDREN]                                       # (M, 4, 4)
    length = np.stack([np.linalg.norm(points[tets10[:, a]] - points[tets10[:, b]], axis=1)
                       for a, b in _DIAGONALS], axis=1)
    pick = np.argmin(length, axis=1)  # the shortest diagonal gives the best-shaped inner four
    diag = _DIAGONALS[pick]                                                     # (M, 2)
    ring = _RINGS[pick]                                                         # (M, 4)
    local = np.empty((m, 4, 4), np.int64)
    local[:, :, 0] = diag[:, None, 0]
    local[:, :, 1] = diag[:, None, 1]
    local[:, :, 2] = ring
    local[:, :, 3] = np.roll(ring, -1, axis=1)
    inner = np.take_along_axis(tets10, local.reshape(m, -1), axis=1).reshape(m, 4, 4)
    children = np.concatenate([corners, inner], axis=1).reshape(-1, 4)
    return meshtools.orient_positive(points, children), np.repeat(np.arange(m), 8)


# ------------------------------------------------------------------------------ geometry of tet10

def tet_rule(n: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Quadrature on the reference tetrahedron, exact for polynomials of degree ``2 n - 3``.

    A Gauss-Legendre product on the unit cube collapsed onto the tetrahedron (Stroud's conical
    product rule): ``x = u``, ``y = v (1 - u)``, ``z = w (1 - u)(1 - v)``.

    Returns
    -------
    xi : ndarray (n^3, 3)
        Points (x, y, z) with x, y, z >= 0 and x + y + z <= 1.
    weights : ndarray (n^3,)
        Summing to 1/6, the reference volume.
    """
    g, w = np.polynomial.legendre.leggauss(n)
    g, w = 0.5 * (g + 1.0), 0.5 * w
    u, v, t = (a.ravel() for a in np.meshgrid(g, g, g, indexing="ij"))
    wu, wv, wt = (a.ravel() for a in np.meshgrid(w, w, w, indexing="ij"))
    xi = np.column_stack([u, v * (1 - u), t * (1 - u) * (1 - v)])
    return xi, wu * wv * wt * (1 - u) ** 2 * (1 - v)


def triangle_rule(n: int = 3) -> tuple[np.ndarray, np.ndarray]:
    """Collapsed Gauss rule on the reference triangle, exact to degree ``2 n - 2``; weights sum to 1/2."""
    g, w = np.polynomial.legendre.leggauss(n)
    g, w = 0.5 * (g + 1.0), 0.5 * w
    u, v = (a.ravel() for a in np.meshgrid(g, g, indexing="ij"))
    wu, wv = (a.ravel() for a in np.meshgrid(w, w, indexing="ij"))
    return np.column_stack([u, v * (1 - u)]), wu * wv * (1 - u)


def tet10_shape_gradients(xi: np.ndarray) -> np.ndarray:
    """Derivatives (Q, 10, 3) of the 10 quadratic shape functions at reference points (Q, 3).

    With barycentrics ``L = (1 - x - y - z, x, y, z)``: corners ``L_i (2 L_i - 1)``, the node of
    edge (i, j) ``4 L_i L_j`` (the standard serendipity-free P2 basis).
    """
    xi = np.atleast_2d(xi)
    L = np.column_stack([1 - xi.sum(axis=1), xi])                                # (Q, 4)
    dL = np.array([[-1.0, -1.0, -1.0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])          # (4, 3)
    corner = (4 * L - 1)[:, :, None] * dL[None]                                  # (Q, 4, 3)
    i, j = TET_EDGES[:, 0], TET_EDGES[:, 1]
    edge = 4 * (L[:, i, None] * dL[None, j] + L[:, j, None] * dL[None, i])       # (Q, 6, 3)
    return np.concatenate([corner, edge], axis=1)


def jacobian_determinants(points: np.ndarray, tets10: np.ndarray, xi: np.ndarray, *,
                          block: int = 32768) -> np.ndarray:
    """det(dx/dxi) (M, Q) of 10-node tetrahedra at reference points (Q, 3); mm^3 per unit volume.

    Computed ``block`` elements at a time, so the (block, 3, Q, 3) Jacobians stay a few tens
    of MB whatever the mesh size.
    """
    dN = np.ascontiguousarray(np.transpose(tet10_shape_gradients(xi), (1, 0, 2)).reshape(10, -1))  # (10, Q*3)
    q = len(np.atleast_2d(xi))
    out = np.empty((len(tets10), q))
    for start in range(0, len(tets10), block):
        x = points[tets10[start:start + block]]                                  # (B, 10, 3)
        # J[b, d, q, e] = sum_k x[b, k, d] dN[q, k, e]: one matrix product, then cofactors
        J = (np.swapaxes(x, 1, 2).reshape(-1, 10) @ dN).reshape(len(x), 3, q, 3)
        c = lambda d, e: J[:, d, :, e]  # noqa: E731
        out[start:start + block] = (c(0, 0) * (c(1, 1) * c(2, 2) - c(1, 2) * c(2, 1))
                                    - c(0, 1) * (c(1, 0) * c(2, 2) - c(1, 2) * c(2, 0))
                                    + c(0, 2) * (c(1, 0) * c(2, 1) - c(1, 1) * c(2, 0)))
    return out


def check_points() -> np.ndarray:
    """Reference points where Jacobians are checked: the 4 corners, the centroid, the volume rule."""
    corners = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
    return np.concatenate([corners, [[0.25, 0.25, 0.25]], tet_rule(3)[0]])


def jacobian_ratio(points: np.ndarray, tets10: np.ndarray) -> np.ndarray:
    """Smallest Jacobian over :func:`check_points` of each element over its straight-sided value (M,)."""
    det = jacobian_determinants(points, tets10, check_points())
    straight = 6.0 * meshtools.signed_volumes(points, tets10[:, :4])
    return det.min(axis=1) / straight


def volumes_mm3(points: np.ndarray, tets10: np.ndarray) -> np.ndarray:
    """Volumes (M,) mm^3 of curved 10-node tetrahedra (exact: the Jacobian is cubic)."""
    xi, w = tet_rule(3)
    return jacobian_determinants(points, tets10, xi) @ w


def enclosed_volume_mm3(points: np.ndarray, faces6: np.ndarray, origin: np.ndarray) -> float:
    """Volume enclosed by 6-node triangles together with a plane through ``origin``.

    The divergence theorem, ``V = (1/3) sum of the integral of (x - origin) . n dA``; the plane's
    own contribution vanishes because ``(x - origin)`` lies in it. The integrand is a polynomial
    of degree 4 on each triangle and the rule is exact for it. Positive for triangles whose
    normals point away from the enclosed side.
    """
    uv, w = triangle_rule(3)
    L = np.column_stack([1 - uv.sum(axis=1), uv])                               # (Q, 3)
    dL = np.array([[-1.0, -1.0], [1, 0], [0, 1]])
    N = np.concatenate([L * (2 * L - 1), 4 * L[:, TRI_EDGES[:, 0]] * L[:, TRI_EDGES[:, 1]]], axis=1)
    dN = np.concatenate([(4 * L - 1)[:, :, None] * dL[None],
                         4 * (L[:, TRI_EDGES[:, 0], None] * dL[None, TRI_EDGES[:, 1]]
                              + L[:, TRI_EDGES[:, 1], None] * dL[None, TRI_EDGES[:, 0]])], axis=1)
    x = points[faces6] - origin                                                  # (F, 6, 3)
    pos = np.einsum("qk,fkd->fqd", N, x)
    tangent = np.einsum("qke,fkd->fqed", dN, x)
    flux = np.einsum("fqd,fqd->fq", pos, cross(tangent[:, :, 0], tangent[:, :, 1]))
    return float((flux @ w).sum() / 3.0)


# ------------------------------------------------------------------------------ fields per element

def with_cell_fields(quad: QuadraticMesh, coords, law, septum) -> QuadraticMesh:
    """The segment and fiber triad of each 10-node element, from its 8 linear children.

    The segment is taken at the element's centroid (as for linear cells); the triad follows the
    fiber rule (:func:`fibers.architecture.point_triad`) from the children's volume-weighted mean
    frame and depth, so the helix law holds exactly in every element.
    """
    from fibers import architecture, segments

    m = len(quad.tets)
    weight = quad.child_volumes.reshape(m, 8)
    weight = weight / weight.sum(axis=1, keepdims=True)

    def mean(child):
        return np.einsum("mk,mk...->m...", weight, np.asarray(child).reshape((m, 8) + np.shape(child)[1:]))

    # circumferential is an angle: average it on the unit circle
    turn = np.radians(np.asarray(coords.cell_circumferential, float))
    circ = np.degrees(np.arctan2(mean(np.sin(turn)), mean(np.cos(turn))))
    centroid = quad.points[quad.tets[:, :4]].mean(axis=1)
    cells = {"points": centroid, "e_rad": mean(coords.cell_e_rad), "e_long": mean(coords.cell_e_long),
             "e_circ": mean(coords.cell_e_circ), "transmural": mean(coords.cell_transmural),
             "thickness_fraction": mean(coords.cell_thickness_fraction),
             "apicobasal": mean(coords.cell_apicobasal), "circumferential": circ}
    triad = architecture.point_triad(cells, law, axis=quad.linear.axis, septal=septum is not None,
                                     angles=False)
    fiber, sheet, normal = triad["fiber"], triad["sheet"], triad["sheet_normal"]
    aha = segments.label_points(centroid, quad.linear, septum)
    return replace(quad, cell_data={"aha_segment": aha.astype(np.int32), "fiber_cell": fiber,
                                    "sheet_cell": sheet, "sheet_normal_cell": normal})


def parent_cell_data(quad: QuadraticMesh, child_data: dict) -> dict:
    """Cell fields per 10-node element: its own where computed, else gathered from its children.

    ``child_data`` holds fields on the linear children (name -> (8 M, ...) array). Fields that
    :func:`with_cell_fields` computed for the elements win; any other field is reduced over the
    8 children, floating-point fields by volume-weighted mean (unit vectors re-normalised),
    integer fields by the value of the largest child.
    """
    m = len(quad.tets)
    weight = quad.child_volumes.reshape(m, 8)
    largest = np.argmax(weight, axis=1)
    out = {}
    for name, child in child_data.items():
        if name in quad.cell_data:
            out[name] = np.ascontiguousarray(quad.cell_data[name], dtype=np.asarray(child).dtype)
            continue
        child = np.asarray(child).reshape((m, 8) + np.shape(child)[1:])
        if np.issubdtype(child.dtype, np.floating):
            value = np.einsum("mk,mk...->m...", weight / weight.sum(axis=1, keepdims=True), child)
            if child.ndim == 3 and np.allclose(np.linalg.norm(child, axis=2), 1.0, atol=1e-6):
                value /= np.maximum(np.linalg.norm(value, axis=1, keepdims=True), 1e-300)
        else:
            value = child[np.arange(m), largest]
        out[name] = np.ascontiguousarray(value, dtype=child.dtype)
    return out


def summary(quad: QuadraticMesh) -> dict:
    """Counts, the curved volumes (mL) and the Jacobian check, for the manifest."""
    wall = quad.linear
    cavity = enclosed_volume_mm3(quad.points, quad.faces[quad.face_tags == ENDO], wall.axis.base_centre)
    return {
        "elements": int(len(quad.tets)),
        "nodes": int(len(quad.points)),
        "linear_children": int(len(wall.tets)),
        # the endocardial faces point into the cavity, away from the wall: the sign flips
        "myocardial_volume_ml": round(float(volumes_mm3(quad.points, quad.tets).sum()) / 1000.0, 3),
        "cavity_volume_ml": round(-cavity / 1000.0, 3),
        "jacobian_min_ratio": round(quad.jacobian["min_ratio"], 4),
        "straightened_elements": quad.jacobian["moved_back"],
    }


def linear_grid(grid):
    """A pyvista grid of 10-node tetrahedra as its 8 linear children per element (others as given).

    Point data stay; cell data repeat over each element's children. For readers of a build
    that work on linear tetrahedra (the report, point location).
    """
    import pyvista as pv

    kind = int(pv.CellType.QUADRATIC_TETRA)
    if kind not in grid.cells_dict:
        return grid
    points = np.asarray(grid.points, float)
    children, parent = split_tet10(points, np.asarray(grid.cells_dict[kind], np.int64))
    out = pv.UnstructuredGrid({pv.CellType.TETRA: children}, points)
    for name in grid.point_data.keys():
        out.point_data[name] = np.asarray(grid.point_data[name])
    for name in grid.cell_data.keys():
        out.cell_data[name] = np.asarray(grid.cell_data[name])[parent]
    for name in grid.field_data.keys():
        out.field_data[name] = np.asarray(grid.field_data[name])
    return out
