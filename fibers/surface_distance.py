"""Exact distances from points to a triangulated surface, vectorised.

Used for the thickness depth of the wall (:func:`fibers.coordinates.surface_distances`). The
candidates of each point are the ``candidates`` triangles whose centroids lie nearest to it (a
k-d tree over the centroids); the distance to each candidate is the exact point-to-triangle
distance, by the region test of Ericson, Real-Time Collision Detection (2005), section 5.1.5,
from memory, written for arrays. On meshes of nearly even triangles the nearest triangle is
always among the few nearest centroids: on the demo ventricle at 0.97 and 2.5 mm, 6 candidates
give the same distances as 12 to the last bit at every node (4 differ at 0.1 % of the nodes,
by up to 4e-5 of the wall thickness), at half the time.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree


def distance_to_surface(points: np.ndarray, vertices: np.ndarray, triangles: np.ndarray, *,
                        candidates: int = 6, block: int = 10_000) -> np.ndarray:
    """Distance (K,) mm from each point to the nearest of the triangles.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    vertices : ndarray (V, 3), mm
    triangles : ndarray (T, 3) int
        Rows of ``vertices``.
    candidates : int
        Triangles tried per point (the nearest by centroid).
    block : int
        Points handled at once. Small blocks keep the (3, block, candidates) temporaries in
        cache and in memory the allocator reuses: at 105k points, 10,000 at a time took 0.75
        of the time of one block of all (the demo ventricle at 547k tetrahedra).

    Returns
    -------
    ndarray (K,), mm
    """
    points = np.asarray(points, float).reshape(-1, 3)
    tri = np.asarray(vertices, float)[np.asarray(triangles)]
    k = int(min(candidates, len(tri)))
    # leaves of 32 centroids: a shallower tree, about 0.8 of the query time of scipy's 16 for
    # points a wall's thickness away (same neighbours: the k nearest are exact either way)
    tree = cKDTree(tri.mean(axis=1), leafsize=32)
    corners = np.ascontiguousarray(tri.transpose(1, 2, 0))   # (3 corners, 3 components, T)
    out = np.empty(len(points))
    for start in range(0, len(points), block):
        p = points[start:start + block]
        _, near = tree.query(p, k=k)
        near = near.reshape(len(p), k)
        a, b, c = (corners[i][:, near] for i in range(3))  # (3, B, k) each
        d = _distance(p.T[:, :, None], a, b, c)
        out[start:start + block] = d.min(axis=1)
    return out


def point_triangle_distance(p, a, b, c) -> np.ndarray:
    """Distance (K,) from points p (K, 3) to triangles (a, b, c), each (K, 3): pairwise."""
    return _distance(*(np.asarray(x, float).T for x in (p, a, b, c)))


def _distance(p, a, b, c) -> np.ndarray:
    """The distance for component-first arrays (3, ...), broadcast against each other.

    Component-first, the dot products are three products and two sums on contiguous rows,
    and one ``np.select`` per barycentric coordinate replaces a chain of ``np.where``: twice
    as fast as the row-wise form.
    """
    ab, ac, ap, bp, cp = b - a, c - a, p - a, p - b, p - c

    def dot(u, v):
        return u[0] * v[0] + u[1] * v[1] + u[2] * v[2]

    d1, d2, d3, d4, d5, d6 = dot(ab, ap), dot(ac, ap), dot(ab, bp), dot(ac, bp), dot(ab, cp), dot(ac, cp)
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
    diff = ap - s * ab - t * ac
    return np.sqrt(dot(diff, diff))
