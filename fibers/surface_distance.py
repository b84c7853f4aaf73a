"""Exact distances from points to a triangulated surface, vectorised.

Used for the thickness depth of the wall (:func:`fibers.coordinates.surface_distances`). The
candidates of each point are the triangles around its two nearest surface vertices (a k-d tree
over the vertices, then each vertex's ring of triangles); the distance to each candidate is the
exact point-to-triangle distance, by the region test of Ericson, Real-Time Collision Detection
(2005), section 5.1.5, from memory, written for arrays. The closest point of a surface of
nearly even triangles lies in the rings of the nearest vertices. One ring is not always enough:
on a spheroidal shell meshed at 3 mm (2,667 nodes) the ring of the nearest vertex missed the
closest epicardial triangle at one node, by 0.007 mm, and only in one of two rigidly moved
copies, so the depth was not invariant under a rigid motion; the rings of the two nearest equal
brute force at every node of both copies and of the tests' tilted shells. At 547k tetrahedra
the two rings change one of 105,681 nodes (by 1e-4 mm); when they were chosen they cost 0.78 s
for both surfaces against 0.52-0.60 s for one (both are faster now, see `BLOCK`). For points
far from the surface (deep in the cavity, away from the wall) nothing guarantees that the rings
hold the closest triangle; on the tests' tilted shells one ring missed 1 of 250 such points by
3e-4 of the distance and two rings none (tests/test_surface_distance.py).
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

# Points handled at once: small blocks keep the temporaries (about 12 candidate triangles per
# point) in cache and in memory the allocator reuses. On the demo ventricle at 547k tetrahedra
# (70k points inside the wall, both surfaces) 10,000 took 0.75 of the time of one block of all,
# and 4,000 0.88-0.92 of the time of 10,000 (2,000: slower again).
BLOCK = 4_000


def distance_to_surface(points: np.ndarray, vertices: np.ndarray, triangles: np.ndarray, *,
                        nearest: int = 2, block: int = BLOCK) -> np.ndarray:
    """Distance (K,) mm from each point to the nearest of the triangles.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    vertices : ndarray (V, 3), mm
    triangles : ndarray (T, 3) int
        Rows of ``vertices``.
    nearest : int
        Surface vertices whose rings of triangles are tried per point (the nearest ones).
    block : int
        Points handled at once (`BLOCK`).

    Returns
    -------
    ndarray (K,), mm
    """
    return TriangleSurface(vertices, triangles, nearest=nearest).distance(points, block=block)


class TriangleSurface:
    """A triangulated surface made ready for distance queries: a k-d tree over its vertices,
    each vertex's ring of triangles and what the distance needs of each triangle.

    Built once, it answers several sets of points (the pipeline asks for the boundary's nodes
    while gmsh fills the volume and for the volume's own nodes after); `distance_to_surface`
    is the one-off form.
    """

    def __init__(self, vertices: np.ndarray, triangles: np.ndarray, *, nearest: int = 2):
        vertices = np.asarray(vertices, float)
        triangles = np.asarray(triangles).reshape(-1, 3)
        self.empty = not len(triangles)
        if self.empty:
            return
        used, corner_of = np.unique(triangles, return_inverse=True)
        # the ring of each used vertex: its triangles, as a CSR list (``ring[start[v]:start[v + 1]]``)
        corner_of = corner_of.ravel()
        self.ring = np.argsort(corner_of, kind="stable") // 3
        self.start = np.r_[0, np.cumsum(np.bincount(corner_of, minlength=len(used)))]
        self.k = int(min(nearest, len(used)))
        # leaves of 64 vertices split at the sliding midpoint, not the median: for points a
        # wall's thickness away, 0.7-0.9 of the query time of a balanced tree of 32-vertex
        # leaves (the demo ventricle at 547k tetrahedra; the same neighbours, which are exact)
        self.tree = cKDTree(vertices[used], leafsize=64, balanced_tree=False, compact_nodes=False)
        self.rows = _triangle_rows(vertices[triangles].transpose(1, 2, 0))

    def distance(self, points: np.ndarray, *, block: int = BLOCK) -> np.ndarray:
        """Distance (K,) mm from points (K, 3) to the nearest triangle (inf without triangles)."""
        points = np.asarray(points, float).reshape(-1, 3)
        out = np.full(len(points), np.inf)
        if self.empty or not len(points):
            return out
        start, k = self.start, self.k
        by_component = np.ascontiguousarray(points.T)
        for first in range(0, len(points), block):
            p = points[first:first + block]
            _, near = self.tree.query(p, k=k)
            near = near.reshape(len(p), k)
            count = start[near + 1] - start[near]                  # (B, k) ring sizes
            per_point = count.sum(axis=1)
            # position of each candidate in ``ring``: its ring's start plus its rank within the ring
            ring_start = np.repeat(start[near].ravel(), count.ravel())
            rank = np.arange(ring_start.size) - np.repeat(np.cumsum(count.ravel()) - count.ravel(), count.ravel())
            face = self.ring[ring_start + rank]
            # each point once per candidate: a repeat of contiguous rows, a tenth of a gather's time
            d = _distance_from_rows(np.repeat(by_component[:, first:first + block], per_point, axis=1),
                                    self.rows[:, face])
            out[first:first + block] = np.minimum.reduceat(d, np.cumsum(per_point) - per_point)
        return out


def point_triangle_distance(p, a, b, c) -> np.ndarray:
    """Distance (K,) from points p (K, 3) to triangles (a, b, c), each (K, 3): pairwise."""
    corners = np.stack([np.asarray(x, float).T for x in (a, b, c)])
    return _distance_from_rows(np.asarray(p, float).T, _triangle_rows(corners))


def _triangle_rows(corners: np.ndarray) -> np.ndarray:
    """What the distance needs of each triangle, (12, T): a, ab and ac (3 rows each) and the
    products |ab|^2, ab.ac and |ac|^2, from corners (3 corners, 3 components, T)."""
    a, b, c = corners
    ab, ac = b - a, c - a
    return np.concatenate([a, ab, ac, _dot(ab, ab)[None], _dot(ab, ac)[None], _dot(ac, ac)[None]])


def _dot(u, v):
    return u[0] * v[0] + u[1] * v[1] + u[2] * v[2]


def _distance_from_rows(p: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """The distance for component-first points p (3, C) and their triangles' rows (12, C).

    Component-first, every product and sum runs on contiguous rows, and one ``np.select`` per
    barycentric coordinate replaces a chain of ``np.where``: twice as fast as the row-wise form.
    Of Ericson's six dot products only two need the point's own vectors: with bp = ap - ab and
    cp = ap - ac the other four follow from the triangle's products (at 547k tetrahedra the
    two surfaces took 0.75-0.80 s instead of 0.83-0.85 s; the same values to 4e-15 mm).
    """
    a, ab, ac = rows[0:3], rows[3:6], rows[6:9]
    aa, abac, cc = rows[9], rows[10], rows[11]
    ap = p - a
    d1, d2 = _dot(ab, ap), _dot(ac, ap)
    d3, d4, d5, d6 = d1 - aa, d2 - abac, d1 - abac, d2 - cc
    va, vb, vc = d3 * d6 - d5 * d4, d5 * d2 - d1 * d6, d1 * d4 - d3 * d2
    tiny = 1e-300
    e43, e56 = d4 - d3, d5 - d6
    w_bc = e43 / np.maximum(e43 + e56, tiny)
    # The closest point is a + s ab + t ac. Ericson's Voronoi-region tests in his order (the
    # first that holds wins, as np.select takes them); the face interior when none holds.
    regions = [(d1 <= 0) & (d2 <= 0),                    # vertex a
               (d3 >= 0) & (d4 <= d3),                   # vertex b
               (vc <= 0) & (d1 >= 0) & (d3 <= 0),        # edge ab
               (d6 >= 0) & (d5 <= d6),                   # vertex c
               (vb <= 0) & (d2 >= 0) & (d6 <= 0),        # edge ac
               (va <= 0) & (e43 >= 0) & (e56 >= 0)]      # edge bc
    denom = np.maximum(va + vb + vc, tiny)
    s = np.select(regions, [0.0, 1.0, d1 / np.maximum(d1 - d3, tiny), 0.0, 0.0, 1.0 - w_bc], vb / denom)
    t = np.select(regions, [0.0, 0.0, 0.0, 1.0, d2 / np.maximum(d2 - d6, tiny), w_bc], vc / denom)
    # |ap - s ab - t ac|, a component at a time and summed in _dot's order (the same bits):
    # (C,) temporaries instead of (3, C) ones, 0.7-0.85 of the time of this line at once
    squared = None
    for k in range(3):
        part = ap[k] - s * ab[k]
        part -= t * ac[k]
        part *= part
        squared = part if squared is None else squared + part
    return np.sqrt(squared)
