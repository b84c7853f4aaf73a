"""Exact point location in a tetrahedral mesh, vectorised.

A point is inside tetrahedron t iff all four barycentric coordinates are >= ``-eps``.

How a point is found, all steps vectorised over the points:

1. A uniform grid covers the mesh; a cell is *occupied* when some element's bounding box meets
   it. A point in an unoccupied cell (or off the grid) lies in no element, exactly.
2. Each occupied cell keeps a start element (the one whose centroid is nearest the cell centre).
   From it the point walks through face neighbours, each step crossing the face opposite the
   most negative barycentric, until an element contains it.
3. A walk that leaves the mesh (the point is outside, or a concave boundary lies between it and
   the start) or runs out of steps falls back to a complete search: every element whose
   centroid lies within ``reach`` (the largest centroid-to-vertex distance of the mesh) of the
   point, from a KD-tree. An element that contains a point has its centroid that close, so the
   fallback misses nothing; there the most-inside candidate wins.

On a face shared by two elements either may be returned; both are correct.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from fibers import meshtools

_CHUNK = 262_144   # points per block, bounds the temporaries to some 100 MB
_MAX_STEPS = 64    # walk steps before the complete search takes over


def face_neighbours(tets: np.ndarray) -> np.ndarray:
    """Element (M, 4) across the face opposite each local vertex, -1 on the boundary."""
    m = len(tets)
    if m == 0:
        return np.full((0, 4), -1, np.int64)
    opposite = np.array([[1, 2, 3], [0, 2, 3], [0, 1, 3], [0, 1, 2]])
    key = meshtools.face_keys(tets[:, opposite], int(np.max(tets)) + 1)
    order = np.argsort(key)
    k = key[order]
    same = k[1:] == k[:-1]
    a, b = order[:-1][same], order[1:][same]
    out = np.full(4 * m, -1, np.int64)
    out[a], out[b] = b // 4, a // 4
    return out.reshape(m, 4)


class Locator:
    """Reusable search structure for one mesh.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    tets : ndarray (M, 4) int
    eps : float
        Tolerance on barycentric coordinates (dimensionless).
    cell : float, mm, optional
        Grid spacing; default twice the median element bounding-box edge.
    """

    def __init__(self, points: np.ndarray, tets: np.ndarray, *, eps: float = 1e-9,
                 cell: float | None = None):
        self.points = np.asarray(points, float)
        self.tets = np.asarray(tets, np.int64).reshape(-1, 4)
        self.eps = float(eps)
        v = self.points[self.tets]                            # (M, 4, 3)
        self._origin = v[:, 0].copy()
        edges = np.transpose(v[:, 1:] - v[:, :1], (0, 2, 1))  # columns b-a, c-a, d-a
        det = np.linalg.det(edges)
        size = np.max(np.abs(edges), axis=(1, 2)) if len(v) else np.zeros(0)
        ok = np.abs(det) > 1e-14 * size**3
        inv = np.zeros_like(edges)
        inv[ok] = np.linalg.inv(edges[ok])                    # flat elements claim no point
        self._inverse, self._valid = inv, ok
        if len(v) == 0:
            return
        centroid = v.mean(axis=1)
        self.reach = float(np.sqrt(((v - centroid[:, None]) ** 2).sum(axis=2).max()))
        self._tree = cKDTree(centroid)
        self._neighbours = face_neighbours(self.tets)

        # pairwise over the four corners: 4x faster than a reduction along the short axis
        bmin = np.minimum(np.minimum(v[:, 0], v[:, 1]), np.minimum(v[:, 2], v[:, 3]))
        bmax = np.maximum(np.maximum(v[:, 0], v[:, 1]), np.maximum(v[:, 2], v[:, 3]))
        self._cell = float(cell) if cell else 2.0 * float(np.median((bmax - bmin).max(axis=1)))
        pad = 1e-6 * self._cell                               # covers the eps tolerance
        self._lo = bmin.min(axis=0) - pad
        self._shape = np.floor((bmax.max(axis=0) + pad - self._lo) / self._cell).astype(np.int64) + 1
        i0 = self._cells(bmin - pad)
        span = self._cells(bmax + pad) - i0 + 1
        count = span.prod(axis=1)
        owner = np.repeat(np.arange(len(v)), count)
        r = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
        s = span[owner]
        ijk = i0[owner] + np.stack([r // (s[:, 1] * s[:, 2]), (r // s[:, 2]) % s[:, 1], r % s[:, 2]], 1)
        occupied = np.unique(self._flat(ijk))
        ijk_occ = np.stack(np.unravel_index(occupied, self._shape), axis=1)
        centre = self._lo + (ijk_occ + 0.5) * self._cell
        self._start = np.full(int(self._shape.prod()), -1, np.int64)
        self._start[occupied] = self._tree.query(centre, workers=-1)[1]

    @property
    def neighbours(self) -> np.ndarray:
        """Element (M, 4) across the face opposite each local vertex, -1 on the boundary."""
        return self._neighbours

    def _cells(self, p: np.ndarray) -> np.ndarray:
        # Clipped to one cell beyond the grid so far points cast safely and stay off it.
        f = np.clip(np.floor((p - self._lo) / self._cell), -1, self._shape)
        return np.nan_to_num(f, nan=-1.0).astype(np.int64)

    def _flat(self, ijk: np.ndarray) -> np.ndarray:
        return (ijk[:, 0] * self._shape[1] + ijk[:, 1]) * self._shape[2] + ijk[:, 2]

    def _barycentric(self, q: np.ndarray, cand: np.ndarray) -> np.ndarray:
        """Barycentrics (..., 4) of q (..., 3) in elements cand (...)."""
        lam = np.einsum("...ij,...j->...i", self._inverse[cand], q - self._origin[cand])
        return np.concatenate([1.0 - lam.sum(axis=-1, keepdims=True), lam], axis=-1)

    def _walk(self, q: np.ndarray, tet: np.ndarray):
        """Walk from start elements; returns (tet, bary, found)."""
        bary = np.zeros((len(q), 4))
        found = np.zeros(len(q), bool)
        active = np.arange(len(q))
        for _ in range(_MAX_STEPS):
            b = self._barycentric(q[active], tet[active])
            worst = np.argmin(b, axis=1)
            inside = (b[np.arange(len(active)), worst] >= -self.eps) & self._valid[tet[active]]
            done = active[inside]
            found[done], bary[done] = True, b[inside]
            active, worst = active[~inside], worst[~inside]
            step = self._neighbours[tet[active], worst]
            inner = step >= 0                      # a walk that leaves the mesh stops here
            active = active[inner]
            tet[active] = step[inner]
            if not len(active):
                break
        return tet, bary, found

    def _complete(self, q: np.ndarray):
        """Every candidate within ``reach``; the most-inside one wins."""
        tet = np.full(len(q), -1, np.int64)
        bary = np.zeros((len(q), 4))
        lists = self._tree.query_ball_point(q, self.reach, workers=-1)
        sizes = np.fromiter((len(x) for x in lists), np.int64, len(lists))
        if sizes.sum() == 0:
            return tet, bary
        owner = np.repeat(np.arange(len(q)), sizes)
        cand = np.concatenate([np.asarray(x, np.int64) for x in lists if len(x)])
        b = self._barycentric(q[owner], cand)
        score = np.where(self._valid[cand], b.min(axis=1), -np.inf)
        order = np.lexsort((cand, -score, owner))
        first = order[np.r_[True, owner[order][1:] != owner[order][:-1]]]
        keep = first[score[first] >= -self.eps]
        tet[owner[keep]] = cand[keep]
        bary[owner[keep]] = b[keep]
        return tet, bary

    def __call__(self, query: np.ndarray, *, known_outside=None) -> tuple[np.ndarray, np.ndarray]:
        """Locate points.

        Parameters
        ----------
        query : ndarray (K, 3), mm
        known_outside : callable, optional
            Flags (J,) bool for points (J, 3) that certainly lie in no element; points whose
            walk left the mesh and that it flags skip the complete search (its costliest step).

        Returns
        -------
        tet : ndarray (K,) int64
            Containing element, -1 outside the mesh.
        barycentric : ndarray (K, 4)
            Weights of the element's four nodes (zeros outside).
        """
        query = np.asarray(query, float).reshape(-1, 3)
        tet = np.full(len(query), -1, np.int64)
        bary = np.zeros((len(query), 4))
        if len(self.tets) == 0:
            return tet, bary
        for s in range(0, len(query), _CHUNK):
            q = query[s:s + _CHUNK]
            ijk = self._cells(q)
            on_grid = np.all((ijk >= 0) & (ijk < self._shape), axis=1)
            start = np.full(len(q), -1, np.int64)
            start[on_grid] = self._start[self._flat(ijk[on_grid])]
            rows = np.flatnonzero(start >= 0)
            t, b, found = self._walk(q[rows], start[rows])
            tet[s + rows[found]], bary[s + rows[found]] = t[found], b[found]
            missed = rows[~found]
            if len(missed) and known_outside is not None:
                missed = missed[~known_outside(q[missed])]
            if len(missed):
                t2, b2 = self._complete(q[missed])
                tet[s + missed], bary[s + missed] = t2, b2
        return tet, bary


def locate(points_query: np.ndarray, mesh_points: np.ndarray, tets: np.ndarray, *,
           eps: float = 1e-9) -> tuple[np.ndarray, np.ndarray]:
    """Containing tetrahedron and barycentric weights of each query point.

    Builds a `Locator`; keep one to query the same mesh repeatedly.

    Parameters
    ----------
    points_query : ndarray (K, 3), mm
    mesh_points : ndarray (N, 3), mm
    tets : ndarray (M, 4) int
    eps : float
        Tolerance on barycentric coordinates.

    Returns
    -------
    tet : ndarray (K,) int64, -1 outside
    barycentric : ndarray (K, 4)

    Examples
    --------
    >>> pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1.0]])
    >>> locate(np.array([[0.1, 0.1, 0.1], [1, 1, 1.0]]), pts, np.array([[0, 1, 2, 3]]))[0]
    array([ 0, -1])
    """
    return Locator(mesh_points, tets, eps=eps)(points_query)
