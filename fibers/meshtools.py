"""Small vectorised helpers on tetrahedral meshes, shared by the mesh stage and the tests."""

from __future__ import annotations

import numpy as np

# Local faces of a tetrahedron (a, b, c, d), each listed so that, for a positively oriented
# tetrahedron, its right-hand normal points away from the opposite vertex.
_LOCAL_FACES = np.array([[1, 2, 3], [0, 3, 2], [0, 1, 3], [0, 2, 1]])
LOCAL_FACES = _LOCAL_FACES  # face j is the one opposite vertex j


def index_dtype(largest: int):
    """int32 for node or cell numbers up to ``largest``, else int64: every reader of our files
    (VTK, XDMF, scipy's sparse matrices) takes 32-bit ones, at half the bytes."""
    return np.int32 if largest < 2**31 - 1 else np.int64


def corner_mean(values: np.ndarray, corners: np.ndarray) -> np.ndarray:
    """Mean over each element's corners of nodal values (N,) or component-first (C, N), from
    the corners (k, M) (``tets.T``): ``values[tets].mean(axis=1)`` summed in the same order, so
    the same bits, without an (M, k, C) gather."""
    values = np.asarray(values)
    if values.ndim == 2:  # a component at a time: 1-D gathers take half the time of a (C, M) one
        return np.stack([corner_mean(v, corners) for v in values])
    total = values[corners[0]] + values[corners[1]]
    for row in corners[2:]:
        total += values[row]
    return total / float(len(corners))


def signed_volumes(points: np.ndarray, tets: np.ndarray) -> np.ndarray:
    """Signed volumes (M,) in mm^3; positive when (b-a, c-a, d-a) is right-handed."""
    from fibers.vectors import cross

    a, b, c, d = (points[tets[:, k]] for k in range(4))
    return np.einsum("ij,ij->i", cross(b - a, c - a), d - a) / 6.0


def enclosed_volume(points: np.ndarray, faces: np.ndarray, origin: np.ndarray | None = None) -> float:
    """Volume mm^3 inside closed, outward-oriented triangles, by the divergence theorem about
    ``origin`` (default their centroid, which keeps the terms small). An open surface closed
    by a plane through ``origin`` counts as closed: the plane's part, x . n, vanishes there."""
    if origin is None:
        origin = points[faces].reshape(-1, 3).mean(axis=0) if len(faces) else np.zeros(3)
    rel = points - origin
    a, b, c = (rel[faces[:, k]] for k in range(3))
    return float(np.einsum("ij,ij->i", a, np.cross(b, c)).sum() / 6.0)


def orient_positive(points: np.ndarray, tets: np.ndarray, volumes: np.ndarray | None = None) -> np.ndarray:
    """Return a copy of ``tets`` with every element positively oriented (``volumes``: their
    `signed_volumes`, when the caller has them)."""
    tets = np.array(tets, dtype=np.int64, copy=True)
    flip = (signed_volumes(points, tets) if volumes is None else volumes) < 0
    tets[flip, 2], tets[flip, 3] = tets[flip, 3], tets[flip, 2].copy()
    return tets


def face_keys(triangles: np.ndarray, n_points: int) -> np.ndarray:
    """One int64 key (F,) per triangle (F, 3) of node indices, equal for the same node set.

    Sorting one integer column is several times faster than a row-wise ``np.unique`` on
    (F, 3) rows; beyond 2^21 nodes the key no longer fits and the sorted rows are encoded by
    their rank instead.
    """
    s = np.sort(np.asarray(triangles, np.int64).reshape(-1, 3), axis=1)
    if n_points < 2**21:
        return (s[:, 0] * n_points + s[:, 1]) * n_points + s[:, 2]
    return np.unique(s, axis=0, return_inverse=True)[1].ravel().astype(np.int64)


def match_triangles(query: np.ndarray, reference: np.ndarray, n_points: int) -> np.ndarray:
    """Row (Q,) of ``reference`` (T, 3) with the same node set as each row of ``query`` (Q, 3),
    -1 where there is none. Node order within a row does not matter.

    Both sets are keyed in one call of `face_keys`, so its rank keys (beyond 2^21 nodes) stay
    comparable between them.
    """
    query = np.asarray(query).reshape(-1, 3)
    reference = np.asarray(reference).reshape(-1, 3)
    if len(reference) == 0:
        return np.full(len(query), -1, np.int64)
    keys = face_keys(np.concatenate([reference, query]), n_points)
    ref, wanted = keys[:len(reference)], keys[len(reference):]
    order = np.argsort(ref)
    hit = order[np.minimum(np.searchsorted(ref, wanted, sorter=order), len(ref) - 1)]
    return np.where(ref[hit] == wanted, hit, -1)


def boundary_faces(tets: np.ndarray, on: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Boundary triangles of a positively oriented tetrahedral mesh.

    ``on``, a (N,) bool mask of nodes, keeps only the boundary triangles with all three nodes
    in it, and searches only the elements with three or more (both elements of a face whose
    nodes are all in the mask are among them): the same rows, in the same order, for a
    fraction of the sorting when the mask is the boundary's nodes.

    Returns
    -------
    faces : ndarray (F, 3) int64
        Triangles that belong to exactly one tetrahedron, ordered so their normal points out,
        in the order of their first appearance in ``tets`` (element by element).
    owner : ndarray (F,) int64
        Index of the tetrahedron each face belongs to.
    """
    tets = np.asarray(tets, np.int64)
    elements = np.arange(len(tets)) if on is None else np.flatnonzero(on[tets].sum(axis=1) >= 3)
    all_faces = tets[elements][:, _LOCAL_FACES].reshape(-1, 3)
    if not len(all_faces):
        return np.zeros((0, 3), np.int64), np.zeros(0, np.int64)
    key = face_keys(all_faces, int(tets.max()) + 1)
    order = np.argsort(key, kind="stable")
    k = key[order]
    differs = k[1:] != k[:-1]
    single = np.r_[True, differs] & np.r_[differs, True]
    once = np.sort(order[single])
    if on is not None:
        once = once[on[all_faces[once]].all(axis=1)]
    return all_faces[once], elements[once // 4]


def triangle_normals(points: np.ndarray, faces: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit normals (F, 3) and areas (F,) mm^2 of triangles, right-hand rule."""
    a, b, c = (points[faces[:, k]] for k in range(3))
    n = np.cross(b - a, c - a)
    area2 = np.linalg.norm(n, axis=1)
    return n / np.maximum(area2, 1e-300)[:, None], 0.5 * area2


def shared_edges(faces_a: np.ndarray, faces_b: np.ndarray) -> np.ndarray:
    """Edges (E, 2) that belong both to a triangle of ``faces_a`` and to one of ``faces_b``.

    Each edge keeps the direction it has in its ``faces_a`` triangle, so the edges of a ring
    where two oriented surfaces meet all run the same way round.
    """
    def directed(faces):
        return faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2)
    a, b = directed(np.asarray(faces_a)), directed(np.asarray(faces_b))
    n = int(max(a.max(initial=0), b.max(initial=0))) + 1
    key = lambda e: np.sort(e, axis=1).astype(np.int64) @ np.array([n, 1], np.int64)  # noqa: E731
    return a[np.isin(key(a), key(b))].astype(np.int64)
