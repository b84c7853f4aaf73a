"""P1 finite elements: exact answers on single elements and linear fields, scikit-fem on a shell."""

import numpy as np
import pytest
import shells

from fibers import fem
from fibers.errors import InputError
from fibers.types import ENDO, EPI


@pytest.fixture(scope="module")
def shell():
    return shells.spheroid_shell(inner=(20.0, 20.0), outer=(30.0, 30.0), size=3.0)


def _transmural_bc(mesh):
    endo, epi = mesh.face_nodes(ENDO), mesh.face_nodes(EPI)
    return np.concatenate([endo, epi]), np.concatenate([np.zeros(endo.size), np.ones(epi.size)])


def test_reference_tetrahedron_gradients_and_volume():
    # Unit corner tetrahedron: barycentric coordinates 1-x-y-z, x, y, z, volume 1/6
    # (closed form).
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    vol, grads = fem.tet_gradients(pts, np.array([[0, 1, 2, 3]]))
    assert vol[0] == pytest.approx(1 / 6, rel=1e-14)
    expected = np.array([[-1, -1, -1], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    np.testing.assert_allclose(grads[0], expected, atol=1e-14)
    # Its stiffness matrix is V * G G^T (closed form for P1: constant gradients).
    K = fem.stiffness(pts, np.array([[0, 1, 2, 3]])).toarray()
    np.testing.assert_allclose(K, expected @ expected.T / 6, atol=1e-14)


def test_degenerate_element_is_an_input_error():
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [1, 1, 0]], float)  # four coplanar points
    with pytest.raises(InputError, match="zero volume"):
        fem.tet_gradients(pts, np.array([[0, 1, 2, 3]]))


def test_stiffness_and_solution_match_scikit_fem(shell):
    # Reference: scikit-fem's P1 Laplace assembly, condensation and direct solve on the same
    # mesh.
    from skfem import Basis, ElementTetP1, MeshTet, asm, condense, solve
    from skfem.models.poisson import laplace

    ref_mesh = MeshTet(np.ascontiguousarray(shell.points.T), np.ascontiguousarray(shell.tets.T))
    K_ref = asm(laplace, Basis(ref_mesh, ElementTetP1())).tocsr()
    K = fem.stiffness(shell.points, shell.tets)
    assert K.shape == K_ref.shape
    assert abs(K - K_ref).max() <= 1e-8 * abs(K_ref).max()

    nodes, values = _transmural_bc(shell)
    x = np.zeros(len(shell.points))
    x[nodes] = values
    u_ref = solve(*condense(K_ref, x=x, D=nodes))
    u = fem.solve_dirichlet(K, nodes, values, tol=1e-12)
    assert np.max(np.abs(u - u_ref)) <= 1e-8


def test_linear_field_is_reproduced_exactly(shell):
    # P1 contains the linear functions and they are harmonic, so the discrete Dirichlet solution
    # with linear boundary data is the linear field itself, and so are its gradients
    # (Brenner & Scott, ch. 0/4: exactness on the element's polynomial space).
    a, c = np.array([0.3, -1.2, 0.7]), 4.0
    exact = shell.points @ a + c
    boundary = np.unique(shell.faces)
    K = fem.stiffness(shell.points, shell.tets)
    u = fem.solve_dirichlet(K, boundary, exact[boundary], tol=1e-13)
    interior = np.setdiff1d(np.arange(len(shell.points)), boundary)
    assert interior.size > 100
    assert np.max(np.abs(u - exact)) <= 1e-9 * np.max(np.abs(exact))
    np.testing.assert_allclose(fem.cell_gradient(shell.points, shell.tets, exact),
                               np.broadcast_to(a, (len(shell.tets), 3)), atol=1e-10)
    np.testing.assert_allclose(fem.nodal_gradient(shell.points, shell.tets, exact),
                               np.broadcast_to(a, (len(shell.points), 3)), atol=1e-10)


def test_stiffness_rows_sum_to_zero_and_matrix_is_symmetric(shell):
    # Constants lie in the kernel of the Laplace matrix (common practice).
    K = fem.stiffness(shell.points, shell.tets)
    assert np.max(np.abs(K @ np.ones(K.shape[0]))) <= 1e-12 * abs(K).max()
    assert abs(K - K.T).max() <= 1e-14 * abs(K).max()


def test_barycentric_interpolation_reproduces_linear_fields(shell):
    # Barycentric weights interpolate a linear field exactly and sum to one (closed form).
    rng = np.random.default_rng(3)
    cells = rng.integers(0, len(shell.tets), size=500)
    w_true = rng.dirichlet(np.ones(4), size=500)
    at = np.einsum("kj,kjd->kd", w_true, shell.points[shell.tets[cells]])
    w = fem.barycentric(shell.points, shell.tets, cells, at)
    np.testing.assert_allclose(w, w_true, atol=1e-10)
    field = shell.points @ np.array([1.0, 2.0, -3.0])
    vec = np.column_stack([field, 2 * field])
    np.testing.assert_allclose(fem.interpolate(shell.tets, field, cells, w),
                               at @ np.array([1.0, 2.0, -3.0]), atol=1e-9)
    assert fem.interpolate(shell.tets, vec, cells, w).shape == (500, 2)


def test_solver_reports_non_convergence(shell):
    K = fem.stiffness(shell.points, shell.tets)
    nodes, values = _transmural_bc(shell)
    # a tolerance below rounding: not reached (on this small shell the coarsest level is the whole system)
    with pytest.raises(RuntimeError, match="did not converge"):
        fem.solve_dirichlet(K, nodes, values, tol=1e-30, maxiter=1)


def test_conflicting_dirichlet_values_are_rejected(shell):
    K = fem.stiffness(shell.points, shell.tets)
    with pytest.raises(ValueError, match="different values"):
        fem.solve_dirichlet(K, np.array([0, 0]), np.array([0.0, 1.0]))


def test_solve_is_repeatable_and_leaves_the_global_rng_alone(shell):
    # Same input, same output bytes; the AMG setup draws random vectors,
    # which must neither vary between calls nor disturb the caller's generator.
    K = fem.stiffness(shell.points, shell.tets)
    nodes, values = _transmural_bc(shell)
    np.random.seed(123)
    expected_next = np.random.rand()
    np.random.seed(123)
    first = fem.solve_dirichlet(K, nodes, values)
    assert np.random.rand() == expected_next
    second = fem.solve_dirichlet(K, nodes, values)
    assert first.tobytes() == second.tobytes()
