"""Point location against brute force and closed-form geometry."""

import numpy as np
import pytest
import shells

from fibers.locate import Locator, face_neighbours, locate


@pytest.fixture(scope="module")
def small():
    return shells.spheroid_shell((20.0, 30.0), (26.0, 36.0), size=5.0,
                                 rotation=shells.random_rotation(2), translation=[5.0, 1.0, -3.0])


def brute_force(q, points, tets):
    """All barycentrics of every query point in every element, (K, M, 4)."""
    v = points[tets]
    T = np.transpose(v[:, 1:] - v[:, :1], (0, 2, 1))
    lam = np.einsum("mij,kmj->kmi", np.linalg.inv(T), q[:, None, :] - v[None, :, 0])
    return np.concatenate([1 - lam.sum(axis=2, keepdims=True), lam], axis=2)


def test_agrees_with_brute_force(small):
    # Containment by definition (all barycentrics >= 0), checked over every element.
    rng = np.random.default_rng(1)
    lo, hi = small.points.min(0) - 3, small.points.max(0) + 3
    q = np.concatenate([lo + rng.random((3000, 3)) * (hi - lo),
                        small.points[rng.integers(0, len(small.points), 200)],   # on nodes
                        small.points[small.faces[:200]].mean(axis=1)])          # on faces
    tet, bary = locate(q, small.points, small.tets)
    bf = brute_force(q, small.points, small.tets).min(axis=2)          # (K, M)
    inside_any = (bf >= -1e-9).any(axis=1)
    assert np.array_equal(tet >= 0, inside_any)
    hit = tet >= 0
    assert (bf[np.flatnonzero(hit), tet[hit]] >= -1e-9).all()
    # The weights rebuild the point and sum to one (definition of barycentric coordinates).
    rebuilt = np.einsum("km,kmj->kj", bary[hit], small.points[small.tets[tet[hit]]])
    assert np.allclose(rebuilt, q[hit], atol=1e-9)
    assert np.allclose(bary[hit].sum(axis=1), 1.0)
    assert 0.05 < hit.mean() < 0.95       # the sample really has both kinds of point


def test_matches_analytic_shell():
    # Inside the meshed shell iff between the two spheroids and below z = 0 (the implicit
    # functions of the shell), except within a thin layer of the faceted surfaces.
    mesh = shells.spheroid_shell((20.0, 35.0), (30.0, 45.0), size=2.5)
    rng = np.random.default_rng(4)
    q = rng.uniform([-35, -35, -50], [35, 35, 5], size=(200_000, 3))
    tet, _ = Locator(mesh.points, mesh.tets)(q)
    x, y, z = q.T
    inner = (x * x + y * y) / 20.0**2 + z * z / 35.0**2
    outer = (x * x + y * y) / 30.0**2 + z * z / 45.0**2
    analytic = (inner > 1) & (outer < 1) & (z < 0)
    assert (analytic == (tet >= 0)).mean() > 0.995


def test_neighbours_are_mutual(small):
    # Adjacency is symmetric and boundary faces (one element) number as in the mesh.
    nb = face_neighbours(small.tets)
    m, k = np.nonzero(nb >= 0)
    assert np.all((nb[nb[m, k]] == m[:, None]).any(axis=1))
    assert (nb < 0).sum() == len(small.faces)


def test_empty_and_far_queries(small):
    loc = Locator(small.points, small.tets)
    tet, bary = loc(np.zeros((0, 3)))
    assert tet.shape == (0,) and bary.shape == (0, 4)
    tet, bary = loc(np.array([[1e4, 0, 0], [np.nan, 0, 0]]))
    assert tet.tolist() == [-1, -1] and not bary.any()


@pytest.mark.parametrize("n_points", [50, 2**22])  # integer keys, and the rank keys beyond 2^21 nodes
def test_triangles_match_in_any_vertex_order(n_points):
    # against a plain dictionary of node sets (frozensets), written independently of the keys
    from fibers.meshtools import match_triangles

    rng = np.random.default_rng(5)
    reference = np.array([rng.choice(n_points, 3, replace=False) for _ in range(40)])
    query = np.concatenate([reference[::3][:, ::-1], [rng.choice(n_points, 3, replace=False) for _ in range(5)]])
    rows = match_triangles(query, reference, n_points)
    where = {frozenset(r): i for i, r in enumerate(reference.tolist())}
    assert rows.tolist() == [where.get(frozenset(q), -1) for q in query.tolist()]
    assert match_triangles(query, reference[:0], n_points).tolist() == [-1] * len(query)
