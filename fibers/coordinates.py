"""Cardiac coordinates and the local radial / longitudinal / circumferential frame on the wall.

Two Laplace problems are solved on the wall mesh (the Laplace-Dirichlet approach of Bayer et al.,
Ann Biomed Eng 2012):

- **transmural** depth: 0 on the endocardial nodes, 1 on the epicardial nodes, zero flux through
  the base. Nodes of the base rim lie on both an endo/epi face and a base face; the endo/epi
  value applies there.
- **apicobasal** position: 1 on the base nodes, 0 on an *apical patch*, zero flux through the
  endocardium and the epicardium elsewhere. The apical patch is the set of epicardial nodes
  within a radius ``r_apex`` of ``mesh.epi_apex``, where
  ``r_apex = max(2 h, 0.05 L)``, ``h`` the median epicardial edge length and ``L`` the distance
  from the apex to the base plane; it always holds at least the 4 epicardial nodes nearest the
  apex. A patch of physical size (rather than one node) keeps the solution free of a point
  singularity: for an adult ventricle (L of 80-90 mm) and the default 1.5 mm mesh the radius is
  4-4.5 mm and stays put under refinement; only on coarser meshes does the 2 h floor take over.
  The gradient still concentrates at the patch's rim (where the Dirichlet and zero-flux parts
  meet); that changes its length, not the normalised ``e_long``.

  The raw Laplace value crowds toward the apex (in a cup whose cross-section shrinks to the
  apex, u grows like a logarithm of the radius: about 0.8 already at mid-height), which makes
  a poor position coordinate. The ``apicobasal`` field is therefore the Laplace solution
  remapped by one monotone function of its value, chosen so that each level's mean depth below
  the base falls linearly from the apical patch (0) to the base (1). Level sets, and so the
  direction of its gradient, are those of the Laplace solution; ``e_long`` is taken from the
  unmapped solution.

The **circumferential** coordinate is the angle of a node about the long axis, degrees in
[-180, 180), zero at ``zero_direction`` and increasing right-handedly about the axis (apex to
base), i.e. in the direction of ``e_circ``: clockwise as seen from the apex (looking from the
apex toward the base). The segment angle of :mod:`fibers.segments` increases the same way.

Two more fields: ``thickness_fraction``, the fraction of the wall thickness from the
endocardium (exact distances to the two surfaces), and ``frame_quality``, the distance from the
long axis, where the frame is singular (see `frame_quality`).

The frame (README, "Conventions"): ``e_rad`` is the normalised transmural gradient, ``e_long`` the
apicobasal gradient with its ``e_rad`` part removed, normalised, and ``e_circ = e_long x e_rad``.
Nodal frames use the recovered (volume-weighted) nodal gradients, cell frames the element
gradients.

Fallbacks, so the frame is defined everywhere: where the tangential part of the apicobasal
gradient is small compared with its typical size (near the apex, where that gradient turns
transmural, and on the axis), ``e_long`` is blended smoothly (a cubic smoothstep on the ratio,
between 0.05 and 0.25 of the median gradient) toward the long-axis direction projected
orthogonally to ``e_rad``; where that projection also vanishes (on the axis at the apex,
``e_rad`` parallel to the axis) it is blended in the same way toward the projected
``zero_direction``. Where the transmural gradient vanishes (a cell whose four nodes all
lie on the endocardium, say), ``e_rad`` falls back to the mean nodal ``e_rad`` of the cell (for
cells) or to the direction from the base centre (for nodes). Where a blend of two nearly
opposite vectors would cancel, the heavier of the two is taken instead.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass, replace

import numpy as np

from fibers import fem
from fibers.errors import InputError
from fibers.meshtools import corner_mean
from fibers.sidework import side_thread
from fibers.types import BASE, ENDO, EPI, WallMesh
from fibers.vectors import columns, cross, cross_columns, dot_columns, norm_columns, rows_view

log = logging.getLogger(__name__)

# Fraction of the median apicobasal gradient below which e_long starts to blend toward the
# long-axis fallback (LOW: fallback only, HIGH: gradient only).
_BLEND_LOW, _BLEND_HIGH = 0.05, 0.25


@dataclass(frozen=True)
class CardiacCoordinates:
    """Cardiac coordinates and local frames on a wall mesh.

    Attributes
    ----------
    transmural : ndarray (N,)
        0 on the endocardium, 1 on the epicardium.
    apicobasal : ndarray (N,)
        0 at the apex, 1 on the base plane.
    circumferential : ndarray (N,), degrees
        Angle about the long axis in [-180, 180), increasing along ``e_circ``.
    e_rad, e_long, e_circ : ndarray (N, 3)
        Nodal right-handed orthonormal frame (``e_circ = e_long x e_rad``).
    cell_e_rad, cell_e_long, cell_e_circ : ndarray (M, 3)
        The same frame per element, from the element gradients.
    cell_transmural, cell_apicobasal : ndarray (M,)
        Mean of the nodal values over each element's vertices.
    cell_circumferential : ndarray (M,), degrees
        Angle of each element's centroid.
    wall_thickness : ndarray (N,), mm
        ``d_endo + d_epi`` at each node, the exact distances to the two surfaces (see
        `surface_distances`): on the endocardium the distance to the epicardium and the other
        way round, the wall thickness there. segments.csv, the report and the cohort table
        average it per segment.
    thickness_fraction, cell_thickness_fraction : ndarray (N,), (M,)
        Fraction of the wall thickness from the endocardium (0) to the epicardium (1),
        ``d_endo / (d_endo + d_epi)`` from `surface_distances`; per element the mean over its
        vertices. On a spherical shell this is ``(r - ri) / (ro - ri)``; unlike the Laplace
        depth it does not crowd toward the endocardium where the wall is curved.
    frame_quality, cell_frame_quality : ndarray (N,), (M,), mm
        Distance to the long axis (nodes; element centroids), see `frame_quality`.
    """

    transmural: np.ndarray
    apicobasal: np.ndarray
    circumferential: np.ndarray
    e_rad: np.ndarray
    e_long: np.ndarray
    e_circ: np.ndarray
    cell_e_rad: np.ndarray
    cell_e_long: np.ndarray
    cell_e_circ: np.ndarray
    cell_transmural: np.ndarray | None = None
    cell_apicobasal: np.ndarray | None = None
    cell_circumferential: np.ndarray | None = None
    thickness_fraction: np.ndarray | None = None
    cell_thickness_fraction: np.ndarray | None = None
    wall_thickness: np.ndarray | None = None
    frame_quality: np.ndarray | None = None
    cell_frame_quality: np.ndarray | None = None


def compute(mesh: WallMesh, *, zero_direction: np.ndarray | None = None,
            tol: float = 1e-5, distances=None, gradients=None) -> CardiacCoordinates:
    """Solve for the cardiac coordinates and frames of a wall mesh.

    Parameters
    ----------
    mesh : WallMesh
        Faces tagged ``ENDO``, ``EPI`` and ``BASE``.
    zero_direction : ndarray (3,), optional
        Direction (world frame) where the circumferential angle is 0; it must not be parallel
        to the long axis and is projected onto the plane normal to it. Default
        ``mesh.axis.reference``.
    tol : float
        Relative residual of the two Laplace solves. Measured on the demo ventricle at 547k
        tetrahedra against a 1e-10 solve: 1e-5 leaves at most 2.2e-5 in the transmural and
        5.3e-5 in the apicobasal coordinate (both run from 0 to 1) and turns the frames by at
        most 0.004 degrees (radial) and 0.10 degrees (longitudinal, in an element), for 22 and
        15 CG iterations instead of 28 and 18 at 1e-6 (the l1-Jacobi cycle of `fibers.fem`).
        The rule's own angles are given in whole degrees.
    distances : concurrent.futures.Future, optional
        A future of ``surface_distances(mesh)`` already running elsewhere (the pipeline runs it
        on its second thread, before the pools' points). Default: run on a thread of our own.
    gradients : tuple of ndarray, optional
        ``fem.tet_gradients(mesh.points, mesh.tets)`` when the caller has it (the pipeline
        measures the mesh's quality from it). Default: computed here.

    Returns
    -------
    CardiacCoordinates
    """
    points, tets = mesh.points, mesh.tets
    axis_dir = _unit_vector(mesh.axis.direction, "mesh.axis.direction")
    zero = _zero_direction(axis_dir, mesh.axis.reference if zero_direction is None
                           else zero_direction)

    endo = mesh.face_nodes(ENDO)
    epi = mesh.face_nodes(EPI)
    base = mesh.face_nodes(BASE)
    for name, nodes in (("endocardial", endo), ("epicardial", epi), ("base", base)):
        if nodes.size == 0:
            raise InputError(f"wall mesh has no {name} faces; the mesh stage must tag endo, "
                             "epi and base faces")
    if np.intersect1d(endo, epi).size:
        raise InputError("wall mesh has nodes on both the endocardium and the epicardium; "
                         "the wall is pinched to zero thickness, check the contours")

    # The thickness depth (exact distances to both surfaces) needs nothing of the Laplace
    # fields: it runs on a second thread meanwhile. The k-d tree queries and numpy's array
    # arithmetic release the GIL, so on two cores it costs little more than the solves alone.
    with side_thread("fibers-distances") as pool:  # its thread starts only if used
        if distances is None:
            distances = pool.submit(surface_distances, mesh)
        result = _laplace_frames(mesh, axis_dir, zero, endo, epi, base, tol, gradients)
        d_endo, d_epi = distances.result()
    thickness = _fraction(d_endo, d_epi)
    return replace(result, thickness_fraction=thickness, cell_thickness_fraction=thickness[tets].mean(axis=1),
                   wall_thickness=d_endo + d_epi)


def _laplace_frames(mesh, axis_dir, zero, endo, epi, base, tol, gradients=None) -> CardiacCoordinates:
    """The two Laplace solutions, the circumferential angle and the frames (nodes and cells)."""
    points, tets = mesh.points, mesh.tets
    volumes, grads = fem.tet_gradients(points, tets) if gradients is None else gradients
    K = fem.stiffness(points, tets, volumes=volumes, grads=grads)

    # component-first (3, K) from here (each element's k-th vertex, the gradients (4, 3, M)):
    # every product and sum over the 547k elements runs on contiguous memory; the same sums in
    # the same order as the row-wise forms, so the same bits
    corners = np.ascontiguousarray(np.asarray(tets, dtype=np.intp).T)
    shape_grads = np.ascontiguousarray(grads.transpose(1, 2, 0))  # no copy from fem.tet_gradients

    def to_nodes(cell_columns):
        return columns(fem.cell_to_nodes(tets, cell_columns.T, volumes, n_points=len(points)))

    def radial():
        """The transmural half: its solve, gradients and e_rad (nodes, cells), cell means."""
        transmural = np.clip(fem.solve_dirichlet(  # the discrete maximum principle holds only on
            K, np.concatenate([endo, epi]),        # non-obtuse meshes; clip the tiny overshoot
            np.concatenate([np.zeros(endo.size), np.ones(epi.size)]), tol=tol), 0.0, 1.0)
        g_t_cell = fem.cell_gradient_columns(transmural, corners, shape_grads)
        g_t = to_nodes(g_t_cell)
        radial_guess = columns(points) - np.asarray(mesh.axis.base_centre, float)[:, None]
        e_rad = _unit_with_fallback(g_t, lambda k: _normalise(radial_guess[:, k], -axis_dir))
        cell_e_rad = _unit_with_fallback(
            g_t_cell, lambda k: _normalise(corner_mean(e_rad, corners[:, k]), -axis_dir))
        return transmural, e_rad, cell_e_rad, corner_mean(transmural, corners)

    def about_axis():
        """What needs the positions alone: the circumferential angles and the frame quality."""
        centroids = mesh.cell_centroids
        return (angle_about_axis(points, mesh.axis.base_centre, axis_dir, zero),
                angle_about_axis(centroids, mesh.axis.base_centre, axis_dir, zero),
                frame_quality(points, mesh.axis), frame_quality(centroids, mesh.axis))

    # The two halves need each other only for e_long, which is orthogonal to e_rad: the
    # transmural half runs on a second thread while this one solves the apicobasal problem,
    # then the angles about the axis, while this one forms the apicobasal gradients (in turn
    # on a cohort worker, fibers.sidework). The same bytes either way.
    with side_thread("fibers-transmural") as side:
        transmural_half = side.submit(radial)
        positional = side.submit(about_axis)
        apex = apex_patch(mesh)
        base_only = np.setdiff1d(base, apex)
        apicobasal = np.clip(fem.solve_dirichlet(
            K, np.concatenate([base_only, apex]),
            np.concatenate([np.ones(base_only.size), np.zeros(apex.size)]), tol=tol), 0.0, 1.0)
        depth = (mesh.axis.base_centre - points) @ axis_dir
        position = even_along_axis(apicobasal, depth, apex)
        g_a_cell = fem.cell_gradient_columns(apicobasal, corners, shape_grads)
        g_a = to_nodes(g_a_cell)
        scale = float(np.median(norm_columns(g_a)))

        def cell_frames():
            """The elements' frames as rows, on the other thread while this one does the nodes'."""
            cell_e_rad = transmural_half.result()[2]
            cell_e_long = _longitudinal(g_a_cell, cell_e_rad, axis_dir, zero, scale=scale)
            return rows_view(cell_e_rad), rows_view(cell_e_long), rows_view(cross_columns(cell_e_long, cell_e_rad))

        in_cells = side.submit(cell_frames)
        cell_apicobasal = corner_mean(position, corners)
        transmural, e_rad, _, cell_transmural = transmural_half.result()
        circumferential, cell_circumferential, quality, cell_quality = positional.result()
        e_long = _longitudinal(g_a, e_rad, axis_dir, zero)
        e_circ = cross_columns(e_long, e_rad)
        cell_e_rad, cell_e_long, cell_e_circ = in_cells.result()

    log.debug("cardiac coordinates: %d nodes, apical patch of %d nodes", len(points), apex.size)
    return CardiacCoordinates(
        transmural=transmural, apicobasal=position, circumferential=circumferential,
        # the frames as row views of their component-first arrays: the consumers (the fiber rule,
        # the pools, the writers) take components or contiguous copies anyway
        e_rad=rows_view(e_rad), e_long=rows_view(e_long), e_circ=rows_view(e_circ),
        cell_e_rad=cell_e_rad, cell_e_long=cell_e_long, cell_e_circ=cell_e_circ,
        cell_transmural=cell_transmural, cell_apicobasal=cell_apicobasal,
        cell_circumferential=cell_circumferential, frame_quality=quality, cell_frame_quality=cell_quality)


# Below this distance (mm) from the long axis the frame of the apical cap is unreliable: the
# circumferential direction turns once around the axis, so neighbouring frames differ by
# tens of degrees (measured on the demo ventricle, see the README, "The apex").
FRAME_QUALITY_THRESHOLD_MM = 3.5


def surface_distances(mesh: WallMesh, points: np.ndarray | None = None, *,
                      known: BoundaryDistances | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Exact distances (K,), (K,) mm from points to the endocardial and the epicardial faces.

    Parameters
    ----------
    mesh : WallMesh
    points : ndarray (K, 3), mm, optional
        Default: the mesh nodes, whose distance to their own surface is set to exactly 0.
    known : BoundaryDistances, optional
        From `boundary_distances` of the boundary the mesh was filled in: its nodes' distances
        and its surfaces' search structures are taken from there, and only the nodes gmsh added
        are searched. Ignored (everything is searched) unless the mesh knows where that
        boundary's nodes are (``mesh.boundary_nodes``).

    Returns
    -------
    d_endo, d_epi : ndarray (K,), mm
    """
    from fibers.surface_distance import distance_to_surface

    if points is not None:
        points = np.asarray(points, float).reshape(-1, 3)
        return tuple(distance_to_surface(points, mesh.points, mesh.faces[mesh.face_tags == tag])
                     for tag in (ENDO, EPI))
    on_boundary = None if known is None else known.rows_in(mesh)
    if on_boundary is not None:
        rest = np.ones(len(mesh.points), bool)
        rest[on_boundary] = False
        out = []
        for near, surface in zip(known.near, known.surfaces):
            d = np.empty(len(mesh.points))
            d[on_boundary] = near
            d[rest] = surface.distance(mesh.points[rest])
            out.append(d)
        return tuple(out)
    return _node_distances(mesh.points, {tag: mesh.faces[mesh.face_tags == tag] for tag in (ENDO, EPI)})[1]


@dataclass(frozen=True)
class BoundaryDistances:
    """What the distances to the two surfaces take from the wall's boundary alone.

    Attributes
    ----------
    surfaces : tuple of TriangleSurface
        The endocardium and the epicardium, ready for queries.
    near : tuple of ndarray (P,), mm
        The boundary nodes' distances to each (0 on the surface itself).
    """

    surfaces: tuple
    near: tuple

    def rows_in(self, mesh: WallMesh) -> np.ndarray | None:
        """The rows of these nodes in ``mesh`` (``mesh.boundary_nodes``), None if it has none.

        Its endocardial and epicardial faces are then this boundary's triangles: the mesh stage
        checks that gmsh kept every triangle it was given (`fibers.mesh.tagged_boundary`).
        """
        rows = mesh.boundary_nodes
        return None if rows is None or len(rows) != len(self.near[0]) else rows


def boundary_distances(boundary) -> BoundaryDistances:
    """The distances of a boundary's nodes (a `fibers.mesh.Boundary`) to its two surfaces.

    The pipeline runs this while gmsh fills the volume (a fifth of the nodes are on the
    boundary) and hands it to `surface_distances` as ``known``.
    """
    surfaces, near = _node_distances(boundary.points, {tag: boundary.tri[tag] for tag in (ENDO, EPI)})
    return BoundaryDistances(surfaces=surfaces, near=near)


def _node_distances(points: np.ndarray, triangles: dict) -> tuple[tuple, tuple]:
    """Each surface's `TriangleSurface` and every node's distance to it, 0 on its own nodes."""
    from fibers.surface_distance import TriangleSurface

    surfaces, out = [], []
    for tag in (ENDO, EPI):
        surface = TriangleSurface(points, triangles[tag])
        # nodes of a surface lie on it: exactly 0 there (as for the Laplace depth), not searched
        d = np.zeros(len(points))
        off = np.ones(len(points), bool)
        off[triangles[tag].ravel()] = False
        d[off] = surface.distance(points[off])
        surfaces.append(surface)
        out.append(d)
    return tuple(surfaces), tuple(out)


def _fraction(d_endo: np.ndarray, d_epi: np.ndarray) -> np.ndarray:
    total = d_endo + d_epi
    return np.clip(d_endo / np.where(total > 0, total, 1.0), 0.0, 1.0)


def frame_quality(points: np.ndarray, axis) -> np.ndarray:
    """Distance (K,) mm of points from the long axis, the frame's singular line.

    Every left-ventricular frame whose circumferential direction runs about the long axis is
    singular on the axis, which crosses the wall only in the apical cap (beyond the cavity).
    Values below `FRAME_QUALITY_THRESHOLD_MM` mark points whose frame, and so whose fibers,
    should not be trusted.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    axis : LongAxis

    Returns
    -------
    ndarray (K,), mm
    """
    d = _unit_vector(axis.direction, "axis.direction")
    rel = np.asarray(points, float).reshape(-1, 3) - axis.base_centre
    off = rel - np.outer(rel @ d, d)
    return _row_norm(off)


def even_along_axis(u: np.ndarray, depth: np.ndarray, patch: np.ndarray, bins: int = 64) -> np.ndarray:
    """Monotone remap of apicobasal Laplace values u (N,) so that levels are evenly spaced.

    Parameters
    ----------
    u : ndarray (N,)
        Apicobasal Laplace solution, 0 at the apical patch, 1 at the base.
    depth : ndarray (N,), mm
        Depth of each node below the base plane along the long axis.
    patch : ndarray (P,) int or (N,) bool
        The apical patch's nodes (its mean depth is the full length).
    bins : int
        Groups of equal node count the map is fitted on.

    Returns
    -------
    ndarray (N,)
        The remapped coordinate, non-decreasing in ``u``.

    Nodes are grouped into ``bins`` groups of equal size by u; a group's target value is
    1 - (its mean depth below the base) / (the mean depth of the apical patch). The map runs
    through (0, 0), the groups' (mean u, target) and (1, 1), kept non-decreasing, and is
    applied by linear interpolation, so u = 0 stays 0 and u = 1 stays 1.
    """
    n = len(u)
    order = np.argsort(u, kind="stable")
    group = np.empty(n, dtype=np.int64)
    group[order] = np.arange(n) * bins // n
    count = np.bincount(group, minlength=bins).astype(float)
    keep = count > 0
    u_mean = np.bincount(group, weights=u, minlength=bins)[keep] / count[keep]
    d_mean = np.bincount(group, weights=depth, minlength=bins)[keep] / count[keep]
    apex_depth = float(depth[patch].mean())
    if apex_depth <= 0:
        return u
    target = 1.0 - d_mean / apex_depth
    inner = (u_mean > 0.0) & (u_mean < 1.0)
    knots_u = np.concatenate([[0.0], u_mean[inner], [1.0]])
    knots_t = np.concatenate([[0.0], np.clip(target[inner], 0.0, 1.0), [1.0]])
    knots_u, first = np.unique(knots_u, return_index=True)  # strictly rising for interp
    knots_t = np.maximum.accumulate(knots_t[first])
    return np.interp(u, knots_u, knots_t)


def apex_patch(mesh: WallMesh) -> np.ndarray:
    """Epicardial nodes where the apicobasal coordinate is held at 0.

    The nodes within ``max(2 h, 0.05 L)`` of ``mesh.epi_apex`` (``h`` the median epicardial
    edge length, ``L`` the apex's distance from the base plane), and at least the 4 nearest.

    Returns
    -------
    ndarray (A,) int
        Sorted node indices.
    """
    epi_faces = mesh.faces[mesh.face_tags == EPI]
    epi = np.unique(epi_faces)
    edges = mesh.points[epi_faces] - mesh.points[np.roll(epi_faces, 1, axis=1)]
    h = float(np.median(np.linalg.norm(edges, axis=2)))
    axis_dir = _unit_vector(mesh.axis.direction, "mesh.axis.direction")
    length = abs(float(np.dot(mesh.axis.base_centre - mesh.epi_apex, axis_dir)))
    radius = max(2.0 * h, 0.05 * length)
    dist = np.linalg.norm(mesh.points[epi] - mesh.epi_apex, axis=1)
    nearest = np.argsort(dist)[: min(4, epi.size)]
    keep = dist <= radius
    keep[nearest] = True
    return np.sort(epi[keep])


def angle_about_axis(points, centre, axis_dir, zero):
    """Angle (K,) in degrees in [-180, 180), right-handed about ``axis_dir``, 0 at ``zero``."""
    second = cross(axis_dir, zero)
    rel = np.asarray(points, float) - centre
    deg = np.degrees(np.arctan2(np.einsum("ij,j->i", rel, second),
                                np.einsum("ij,j->i", rel, zero)))
    # arctan2 returns (-180, 180]; move +180 to -180 to get the half-open range.
    return np.where(deg >= 180.0, deg - 360.0, deg)


def _longitudinal(g_long, e_rad, axis_dir, zero, *, scale=None):
    """Unit e_long (3, K) orthogonal to e_rad (3, K), with the blended fallbacks of the module doc."""
    tangential = g_long - dot_columns(g_long, e_rad) * e_rad
    if scale is None:
        scale = float(np.median(norm_columns(g_long)))

    def fallback(k):
        # the axis in the tangent plane, else the zero direction there; last resort, only where
        # e_rad is parallel to both (which are orthogonal, so never both): any vector orthogonal
        r = e_rad[:, k]
        axis_t = axis_dir[:, None] - dot_columns(r, axis_dir) * r
        zero_t = zero[:, None] - dot_columns(r, zero) * r
        along_zero = _unit_with_fallback(zero_t, lambda j: _normalise(cross_columns(r[:, j], zero), axis_dir),
                                         scale=1.0)
        return _unit_with_fallback(axis_t, lambda j: along_zero[:, j], scale=1.0)

    e_long = _unit_with_fallback(tangential, fallback, scale=max(scale, 1e-300))
    # Blending two vectors orthogonal to e_rad stays orthogonal; repeat the projection only to
    # remove rounding.
    e_long = e_long - dot_columns(e_long, e_rad) * e_rad
    return _normalise(e_long, fallback)


def _unit_with_fallback(primary, fallback, *, scale=None):
    """Normalise the vectors ``primary`` (3, K), blending smoothly toward unit fallbacks where short.

    ``fallback(k)`` gives the unit fallback vectors (3, len(k)) of the columns k it is asked
    for: only those of the short ones are computed. ``scale`` is the length taken as "full
    size" (default: the median length); vectors shorter than ``_BLEND_LOW * scale`` are
    replaced by the fallback, those longer than ``_BLEND_HIGH * scale`` are kept, with a cubic
    smoothstep in between.
    """
    norm = norm_columns(primary)
    if scale is None:
        scale = float(np.median(norm))
    if not np.isfinite(scale) or scale <= 0.0:
        return np.array(fallback(np.arange(primary.shape[1])), dtype=float)
    s = np.clip((norm / scale - _BLEND_LOW) / (_BLEND_HIGH - _BLEND_LOW), 0.0, 1.0)
    w = s * s * (3.0 - 2.0 * s)
    unit = primary / np.where(norm > 0, norm, 1.0)
    short = np.flatnonzero(w < 1.0)
    if short.size == 0:
        return unit
    fb, w, u = np.asarray(fallback(short), float), w[short], unit[:, short]
    blended = w * u + (1.0 - w) * fb
    # If primary and fallback point nearly opposite, the blend can cancel; take the heavier one.
    cancelled = norm_columns(blended) < 0.25
    blended[:, cancelled] = np.where(w[cancelled] >= 0.5, u[:, cancelled], fb[:, cancelled])
    unit[:, short] = _normalise(blended, fb)
    return unit


def _normalise(v, fallback):
    """Unit vectors of ``v`` (3, K); those of (near) zero length become the fallback: a vector
    (3,), vectors like ``v``, or a function of the column indices giving those columns."""
    v = np.asarray(v, dtype=float)
    norm = norm_columns(v)
    ok = norm > 1e-12
    # divide every one (no boolean gathers on the hot path), then mend the few short ones
    out = v / np.where(ok, norm, 1.0)
    if not np.all(ok):
        bad = np.flatnonzero(~ok)
        if callable(fallback):
            fb = fallback(bad)
        else:
            fb = np.asarray(fallback, float)
            fb = np.repeat(fb[:, None], bad.size, axis=1) if fb.ndim == 1 else fb[:, bad]
        out[:, bad] = fb / np.linalg.norm(fb, axis=0)
    return out


def _row_norm(v):
    """Row lengths (N,), by einsum: several times faster than np.linalg.norm(axis=1)."""
    return np.sqrt(np.einsum("ij,ij->i", v, v))


def _unit_vector(v, name):
    v = np.asarray(v, dtype=float).reshape(-1)
    n = float(np.linalg.norm(v))
    if v.shape != (3,) or not np.isfinite(n) or n == 0.0:
        raise InputError(f"{name} must be a non-zero 3-vector; got {v.tolist()}")
    return v / n


def _zero_direction(axis_dir, zero_direction):
    zero = _unit_vector(zero_direction, "zero_direction")
    zero = zero - np.dot(zero, axis_dir) * axis_dir
    n = float(np.linalg.norm(zero))
    if n < 1e-3:
        raise InputError("zero_direction is parallel to the long axis; give a direction "
                         "normal to the axis (e.g. toward a right-ventricular insertion point)")
    return zero / n
