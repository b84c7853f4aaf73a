"""Quadratic (10-node) tetrahedra: quadrature, Jacobians, curved boundary, volume accuracy."""

from __future__ import annotations

from math import factorial

import numpy as np
import pytest

from fibers import meshtools, quadratic, stack, surfaces as surface_stage
from fibers.demo.ventricle import spheroid_shell
from fibers.mesh import build_mesh, volumes_mm3
from fibers.types import BASE, ENDO, EPI

SIZE = 3.5  # mm, the same target size for the linear and the quadratic mesh


@pytest.fixture(scope="module")
def shell():
    """An exact spheroid shell (closed-form volumes), meshed at SIZE and raised to order 2."""
    lv = spheroid_shell()
    contours, _ = lv.sample_stack(spacing=8.0, point_spacing=1.0)
    checked = stack.check_stack(contours, align_slices=False)
    surf = surface_stage.fit_surfaces(checked)
    wall = build_mesh(surf, size=SIZE)
    return lv, surf, wall, quadratic.elevate(wall, surf)


def _monomials(degree, dim):
    return [e for e in np.ndindex(*(degree + 1,) * dim) if sum(e) <= degree]


def test_tet_rule_is_exact_to_degree_three():
    # Dirichlet's integral over the unit simplex: int x^a y^b z^c = a! b! c! / (a + b + c + 3)!
    # (a closed form; e.g. CRC Standard Mathematical Tables, integrals over a simplex)
    xi, w = quadratic.tet_rule(3)
    for a, b, c in _monomials(3, 3):
        exact = factorial(a) * factorial(b) * factorial(c) / factorial(a + b + c + 3)
        assert w @ (xi[:, 0] ** a * xi[:, 1] ** b * xi[:, 2] ** c) == pytest.approx(exact, rel=1e-12)
    # and not beyond: the rule has limits, so the check above can fail
    a = 8
    assert abs(w @ xi[:, 0] ** a - factorial(a) / factorial(a + 3)) > 1e-6


def test_triangle_rule_is_exact_to_degree_four():
    # Same closed form in two dimensions: int x^a y^b = a! b! / (a + b + 2)!
    uv, w = quadratic.triangle_rule(3)
    for a, b in _monomials(4, 2):
        exact = factorial(a) * factorial(b) / factorial(a + b + 2)
        assert w @ (uv[:, 0] ** a * uv[:, 1] ** b) == pytest.approx(exact, rel=1e-12)


def test_shape_functions_partition_unity_and_reproduce_quadratics():
    # P2 Lagrange basis (Brenner & Scott): the gradients of sum N_k x_k^2 equal 2 x exactly.
    rng = np.random.default_rng(0)
    corners = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
    nodes = np.concatenate([corners, 0.5 * (corners[quadratic.TET_EDGES[:, 0]] + corners[quadratic.TET_EDGES[:, 1]])])
    xi = rng.dirichlet(np.ones(4), 50)[:, 1:]
    dN = quadratic.tet10_shape_gradients(xi)
    np.testing.assert_allclose(dN.sum(axis=1), 0.0, atol=1e-12)
    f = (nodes ** 2).sum(axis=1)
    np.testing.assert_allclose(np.einsum("qkd,k->qd", dN, f), 2 * xi, atol=1e-12)


def test_tet10_cells_and_positive_jacobians(shell):
    _, _, wall, quad = shell
    assert quad.tets.shape == (len(wall.tets), 10) and quad.faces.shape == (len(wall.faces), 6)
    # corners, centroid and the volume rule's points; and the classic 4-point rule
    # (a = (5 + 3 sqrt 5) / 20, b = (5 - sqrt 5) / 20: Stroud, Approximate Calculation of
    # Multiple Integrals, 1971, from memory) used by most tet10 codes for stiffness
    a, b = (5 + 3 * np.sqrt(5)) / 20, (5 - np.sqrt(5)) / 20
    four = np.array([[b, b, b], [a, b, b], [b, a, b], [b, b, a]])
    det = quadratic.jacobian_determinants(quad.points, quad.tets, np.concatenate([quadratic.check_points(), four]))
    assert det.min() > 0
    assert quad.jacobian["moved_back"] == 0 and quad.jacobian["min_ratio"] > 0.5
    # the 8 linear children tile each element: all positive, and they meet the element's nodes
    vol = meshtools.signed_volumes(quad.points, quad.linear.tets)
    assert vol.min() > 0 and len(quad.linear.tets) == 8 * len(quad.tets)
    assert set(np.unique(quad.linear.tets)) == set(range(len(quad.points)))


def test_boundary_mid_nodes_lie_on_the_fitted_surfaces(shell):
    _, surf, wall, quad = shell
    n = len(wall.points)
    for tag, name in ((ENDO, "endo"), (EPI, "epi")):
        mids = np.unique(quad.faces[quad.face_tags == tag][:, 3:])
        d = surf.distance(name, quad.points[mids])
        assert np.abs(d).max() < 0.05, name  # the bound
        # the straight midpoints miss the surface by more: the check has teeth
        edges = quad.tets[:, :4][:, quadratic.TET_EDGES].reshape(-1, 2)
        ids = quad.tets[:, 4:].ravel()
        first = np.unique(ids, return_index=True)[1]
        straight = np.zeros((len(quad.points), 3))
        straight[ids[first]] = wall.points[edges[first]].mean(axis=1)
        assert np.abs(surf.distance(name, straight[mids])).max() > 0.05
    base = np.unique(quad.faces[quad.face_tags == BASE][:, 3:])
    height = (quad.points[base] - wall.axis.base_centre) @ wall.axis.direction
    assert np.abs(height).max() < 1e-9  # the base is a plane: its mid nodes stay in it
    assert (base >= n).all()


def test_base_rings_are_closed_loops_on_both_surfaces(shell):
    _, surf, wall, quad = shell
    for tag, name in ((ENDO, "endo"), (EPI, "epi")):
        ring = quad.rings[tag]
        degree = np.bincount(ring[:, :2].ravel())
        assert set(np.unique(degree[degree > 0])) == {2}  # a closed curve: each end node twice
        p = quad.points[ring.ravel()]
        assert np.abs((p - wall.axis.base_centre) @ wall.axis.direction).max() < 1e-9
        assert np.abs(surf.distance(name, p)).max() < 0.05


def test_quadratic_volume_beats_linear_on_exact_spheroid_shell(shell):
    # Closed form: the spheroid cap below a plane, V = pi b^2 [(c + a) - (c^3 + a^3) / (3 a^2)]
    # (elementary calculus; CRC Standard Mathematical Tables), via SyntheticLV.volumes_ml.
    lv, _, wall, quad = shell
    truth = lv.volumes_ml()
    linear_wall, linear_cavity = (v / 1000.0 for v in volumes_mm3(wall))
    q = quadratic.summary(quad)
    err_lin = abs(linear_wall - truth["myocardium_ml"])
    err_quad = abs(q["myocardial_volume_ml"] - truth["myocardium_ml"])
    assert err_quad < 0.25 * err_lin, (err_quad, err_lin)
    assert abs(q["cavity_volume_ml"] - truth["cavity_ml"]) < 0.25 * abs(linear_cavity - truth["cavity_ml"])
    assert err_quad / truth["myocardium_ml"] < 2e-3


def test_split_mesh_boundary_matches_its_tetrahedra(shell):
    # the children's own boundary (faces used once) is exactly the split boundary triangles
    _, _, _, quad = shell
    lin = quad.linear
    faces, _ = meshtools.boundary_faces(lin.tets)
    key = lambda f: {tuple(r) for r in np.sort(f, axis=1)}  # noqa: E731
    assert key(faces) == key(lin.faces)
    # and the split triangles keep the outward orientation of their parents (same normals)
    n_child, _ = meshtools.triangle_normals(lin.points, lin.faces)
    n_parent, _ = meshtools.triangle_normals(quad.points, np.repeat(quad.faces[:, :3], 4, axis=0))
    assert np.einsum("ij,ij->i", n_child, n_parent).min() > 0.9
