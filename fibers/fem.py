"""Linear (P1) finite elements on tetrahedra: gradients, stiffness, Dirichlet solves, recovery.

Everything is vectorised over elements. The helpers chain: ``stiffness`` builds the Laplace
matrix, ``solve_dirichlet`` condenses the prescribed nodes and solves the rest by conjugate
gradients preconditioned with algebraic multigrid (pyamg), ``cell_gradient`` and
``nodal_gradient`` turn a nodal field into directions.
"""

from __future__ import annotations

import logging
import threading

import numpy as np
import scipy.sparse as sp

from fibers.errors import InputError
from fibers.meshtools import index_dtype
from fibers.vectors import cross_columns

log = logging.getLogger(__name__)


def tet_gradients(points: np.ndarray, tets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Volumes and barycentric shape-function gradients of every tetrahedron.

    Parameters
    ----------
    points : ndarray (N, 3) float64, mm
    tets : ndarray (M, 4) int

    Returns
    -------
    volumes : ndarray (M,), mm^3
        Unsigned volumes.
    grads : ndarray (M, 4, 3), 1/mm
        ``grads[m, k]`` is the (constant) gradient of the barycentric coordinate of vertex ``k``
        in element ``m``; the four gradients of one element sum to zero. A view of a
        component-first (4, 3, M) array (``grads.transpose(1, 2, 0)`` is contiguous).

    Raises
    ------
    InputError
        If an element has (numerically) zero volume.
    """
    # Component-first (3, M) rows: each product and sum runs over contiguous memory, about
    # twice as fast as the row-wise (M, 3) form at 547k tetrahedra, with the same arithmetic.
    p = np.ascontiguousarray(np.asarray(points, dtype=np.float64).T)
    t = np.ascontiguousarray(np.asarray(tets).T)
    x0 = p[:, t[0]]
    e1 = p[:, t[1]] - x0
    e2 = p[:, t[2]] - x0
    e3 = p[:, t[3]] - x0
    # Rows of the inverse Jacobian are the cofactor cross products divided by the determinant,
    # which avoids a batched LAPACK inverse.
    c23 = cross_columns(e2, e3)
    c31 = cross_columns(e3, e1)
    c12 = cross_columns(e1, e2)
    det = e1[0] * c23[0] + e1[1] * c23[1] + e1[2] * c23[2]
    scale = (e1[0] * e1[0] + e1[1] * e1[1] + e1[2] * e1[2]) ** 1.5
    bad = np.abs(det) <= 1e-12 * np.maximum(scale, 1e-300)
    if np.any(bad):
        first = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"mesh has {int(bad.sum())} tetrahedra of zero volume (first: element {first}); "
            "re-mesh with a different size or check the surfaces")
    inv_det = 1.0 / det
    # filled component-first (4, 3, M) and handed out as its (M, 4, 3) view: the stiffness and
    # the quality measures take the (4, 3, M) layout back without a copy, and einsum over the
    # view is faster than over (M, 4, 3) rows (the same sums, so the same bits)
    g = np.empty((4, 3, len(det)))
    for k, c in ((1, c23), (2, c31), (3, c12)):
        np.multiply(c, inv_det, out=g[k])
    np.negative(g[1] + g[2] + g[3], out=g[0])
    return np.abs(det) / 6.0, g.transpose(2, 0, 1)


def stiffness(points: np.ndarray, tets: np.ndarray, *, volumes: np.ndarray | None = None,
              grads: np.ndarray | None = None) -> sp.csr_matrix:
    """Assemble the P1 Laplace (stiffness) matrix ``K_ij = integral grad(phi_i) . grad(phi_j)``.

    Parameters
    ----------
    points : ndarray (N, 3) float64, mm
    tets : ndarray (M, 4) int
    volumes, grads : ndarray (M,), (M, 4, 3), optional
        The output of :func:`tet_gradients`, when the caller has it already.

    Returns
    -------
    scipy.sparse.csr_matrix (N, N), mm
        Symmetric positive semi-definite; its rows sum to zero.
    """
    n = len(points)
    vol, grads = tet_gradients(points, tets) if grads is None or volumes is None else (volumes, grads)
    # Only the six edges of each element are assembled (K is symmetric) and the diagonal is
    # minus the row sum of the off-diagonal part (the shape-function gradients of an element
    # sum to zero, so every row of K sums to zero exactly): 3 entries per element to sort
    # instead of 16, about half the time of the full 4 x 4 COO assembly at 500k tetrahedra.
    first, second = _EDGES
    # edge by edge on component-first gradients (4, 3, M): a sixth of the time of one einsum
    # over fancy-indexed (M, 6, 3) copies
    g = np.ascontiguousarray(grads.transpose(1, 2, 0))
    off = np.empty((6, len(vol)))
    for e, (i, j) in enumerate(zip(first, second)):
        np.multiply(g[i, 0], g[j, 0], out=off[e])
        off[e] += g[i, 1] * g[j, 1]
        off[e] += g[i, 2] * g[j, 2]
    off *= vol
    t = np.ascontiguousarray(np.asarray(tets, dtype=index_dtype(n)).T)
    a, b = t[first].ravel(), t[second].ravel()
    low, high = np.minimum(a, b), np.maximum(a, b)
    w = off.ravel()
    upper = sp.csr_matrix((w, (low, high)), shape=(n, n))  # duplicates summed in compiled code
    diagonal = -(np.bincount(low, weights=w, minlength=n) + np.bincount(high, weights=w, minlength=n))
    K = (upper + upper.T + sp.diags(diagonal, format="csr")).tocsr()
    K.sort_indices()
    return K


# local vertex pairs of the six edges of a tetrahedron
_EDGES = (np.array([0, 0, 0, 1, 1, 2]), np.array([1, 2, 3, 2, 3, 3]))


def _amg_vcycle(A: sp.csr_matrix):
    """One aggregation AMG V-cycle as a function ``r -> z ~ A^-1 r``.

    The cycle is written over pyamg's hierarchy (``levels``, coarse solver) rather than through
    ``MultilevelSolver.aspreconditioner``, whose every application also computes two residual
    norms and an extra product with ``A``. The prolongation is plain (unsmoothed) aggregation.
    At 547k tetrahedra the two Laplace solves of :mod:`fibers.coordinates` took 0.54 s this way
    against 1.03 s with smoothed aggregation: CG needs more iterations, but each is cheaper and
    the set-up six times so (the demo ventricle, best of 3 in one run).

    The smoother is one damped l1-Jacobi sweep before the coarse correction and one after,
    ``x += w D1^-1 (b - A x)`` with ``D1`` the rows' sums of ``|a_ij|`` (Baker, Falgout, Kolev
    and Yang, SIAM J Sci Comput 2011). ``D1 - A`` is positive semi-definite, so for any
    ``w < 2`` the sweep converges and the cycle, the same sweep before and after, is a
    symmetric positive definite preconditioner, as CG needs. Of w = 1, 1.33, 1.5, 1.6 and 1.8,
    1.5 and 1.8 were the fastest here; `_L1_DAMPING` is 1.5, further from 2. The sweep is a
    sparse product and vector arithmetic, which release the GIL, where pyamg's Gauss-Seidel
    sweeps hold it: the coordinates' two solves, on two threads, run side by side. At 547k tetrahedra (CG to 1e-5):
    15 and 22 iterations instead of 11 and 20 with a forward and a backward Gauss-Seidel
    sweep, 0.28-0.30 s for both solves on two threads against 0.52-0.57 s, 0.36-0.39 s against
    0.48-0.62 s one after the other (set-ups included).
    """
    # pyamg draws its candidate vectors' improvement from numpy's global generator; seed it for
    # the setup only (and restore the caller's state) so the same input gives the same
    # preconditioner, hence the same solution bytes, on every run.
    with _SEEDED:  # two solves may be set up at once (fibers.coordinates); one at a time here
        ml = _seeded_setup(A)
    levels = ml.levels
    if len(levels) == 1:
        return lambda r: ml.coarse_solver(levels[0].A, r)
    smoothers = []
    for level in levels[:-1]:
        matrix = sp.csr_matrix(level.A)
        smoothers.append((matrix, _L1_DAMPING / np.asarray(abs(matrix).sum(axis=1)).ravel()))

    def cycle(k, b):
        level = levels[k]
        matrix, step = smoothers[k]
        x = step * b  # the sweep from x = 0
        coarse_b = level.R @ (b - matrix @ x)
        if k == len(levels) - 2:
            coarse_x = ml.coarse_solver(levels[-1].A, coarse_b)
        else:
            coarse_x = cycle(k + 1, coarse_b)
        x += level.P @ coarse_x
        x += step * (b - matrix @ x)
        return x

    return lambda r: cycle(0, r)


_L1_DAMPING = 1.5  # w of the l1-Jacobi sweeps (_amg_vcycle)
_SEEDED = threading.Lock()


def _seeded_setup(A):
    """pyamg's aggregation hierarchy of A, drawn with numpy's global generator seeded (the
    caller's state restored after)."""
    import pyamg

    state = np.random.get_state()
    try:
        np.random.seed(0)
        return pyamg.smoothed_aggregation_solver(A, symmetry="symmetric", max_coarse=2000, smooth=None,
                                                 coarse_solver="splu",  # sparse: no dense 2000 x 2000 inverse
                                                 presmoother=None, postsmoother=None)  # ours: _amg_vcycle
    finally:
        np.random.set_state(state)


def _dot(u: np.ndarray, v: np.ndarray) -> float:
    # einsum's own loop, not BLAS: on a small, busy machine a threaded BLAS dot of a vector
    # this size spends longer synchronising its threads than adding.
    return float(np.einsum("i,i->", u, v))


def _pcg(A, b, precondition, *, tol: float, maxiter: int) -> tuple[np.ndarray, int, float]:
    """Preconditioned conjugate gradients from x = 0; returns x, iterations, true residual."""
    b_norm = np.sqrt(_dot(b, b))
    x = np.zeros_like(b)
    r = b.copy()
    iterations = 0
    # The recursively updated residual can drift from the true one; restart from the current
    # iterate (at most twice) if the true residual has not followed it down.
    for _ in range(3):
        z = precondition(r)
        p = z.copy()
        rz = _dot(r, z)
        while iterations < maxiter:
            iterations += 1
            q = A @ p
            pq = _dot(p, q)
            if not pq > 0.0:
                raise RuntimeError("conjugate gradients broke down: the condensed matrix is not "
                                   "positive definite (is a part of the mesh left without a "
                                   "prescribed node?)")
            alpha = rz / pq
            x += alpha * p
            r -= alpha * q
            if np.sqrt(_dot(r, r)) <= tol * b_norm:
                break
            z = precondition(r)
            rz_new = _dot(r, z)
            p *= rz_new / rz
            p += z
            rz = rz_new
        r = b - A @ x
        residual = np.sqrt(_dot(r, r)) / b_norm
        if residual <= 10 * tol or iterations >= maxiter:
            break
    return x, iterations, float(residual)


def solve_dirichlet(K: sp.spmatrix, nodes: np.ndarray, values, *, rhs: np.ndarray | None = None,
                    tol: float = 1e-10, maxiter: int = 500) -> np.ndarray:
    """Solve ``K u = rhs`` with ``u[nodes] = values`` prescribed.

    The prescribed rows and columns are condensed out; the remaining symmetric positive definite
    system is solved by conjugate gradients with an aggregation AMG preconditioner.

    Parameters
    ----------
    K : sparse matrix (N, N)
        Symmetric stiffness matrix, e.g. from :func:`stiffness`.
    nodes : ndarray (D,) int
        Prescribed nodes. A node listed twice must carry the same value both times.
    values : float or ndarray (D,)
        Prescribed values.
    rhs : ndarray (N,), optional
        Load vector; zero (the Laplace equation) when omitted.
    tol : float
        Relative residual ``|b - A x| / |b|`` of the condensed system to reach.
    maxiter : int
        Conjugate-gradient iteration limit.

    Returns
    -------
    ndarray (N,)
        The solution, equal to ``values`` on ``nodes``.

    Raises
    ------
    ValueError
        If no node is prescribed or a node is prescribed twice with different values.
    RuntimeError
        If conjugate gradients do not reach ``tol``.
    """
    K = sp.csr_matrix(K)
    n = K.shape[0]
    nodes = np.asarray(nodes, dtype=np.int64).ravel()
    values = np.broadcast_to(np.asarray(values, dtype=np.float64), nodes.shape)
    if nodes.size == 0:
        raise ValueError("solve_dirichlet needs at least one prescribed node (the Laplace "
                         "matrix is singular without one)")
    fixed = np.zeros(n, dtype=bool)
    u = np.zeros(n)
    u[nodes] = values
    if np.any(u[nodes] != values):
        raise ValueError("solve_dirichlet: a node is prescribed twice with different values")
    fixed[nodes] = True
    free = np.flatnonzero(~fixed)
    if free.size == 0:
        return u
    b = -(K @ u)[free] if rhs is None else (np.asarray(rhs, float) - K @ u)[free]
    A = K[free][:, free]
    if not np.any(b):
        return u
    x, iterations, residual = _pcg(A, b, _amg_vcycle(A), tol=tol, maxiter=maxiter)
    # Accept a true residual a little above tol: its rounding is of that order.
    if not np.isfinite(residual) or residual > 10 * tol:
        raise RuntimeError(
            f"conjugate gradients did not converge: relative residual {residual:.2e} after "
            f"{iterations} iterations (target {tol:.0e}); check that every connected part of "
            "the mesh has a prescribed node")
    log.debug("CG+AMG: %d unknowns, %d iterations, relative residual %.1e", free.size,
              iterations, residual)
    u[free] = x
    return u


def cell_gradient(points: np.ndarray, tets: np.ndarray, u: np.ndarray, *,
                  grads: np.ndarray | None = None) -> np.ndarray:
    """Gradient of a P1 field in every element.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    tets : ndarray (M, 4) int
    u : ndarray (N,)
        Nodal values.
    grads : ndarray (M, 4, 3), optional
        Shape-function gradients from :func:`tet_gradients`, to skip recomputing them.

    Returns
    -------
    ndarray (M, 3), units of ``u`` per mm
    """
    if grads is None:
        _, grads = tet_gradients(points, tets)
    corners = np.ascontiguousarray(np.asarray(tets, dtype=np.intp).T)
    return np.ascontiguousarray(cell_gradient_columns(u, corners, np.ascontiguousarray(grads.transpose(1, 2, 0))).T)


def cell_gradient_columns(u: np.ndarray, corners: np.ndarray, shape_grads: np.ndarray) -> np.ndarray:
    """`cell_gradient` component-first: gradients (3, M) from the corners (4, M) (``tets.T``)
    and the shape-function gradients (4, 3, M) (``grads.transpose(1, 2, 0)``, no copy for
    those of `tet_gradients`). Summed over the corners in order, as einsum sums them."""
    at = np.asarray(u, float)[corners]
    out = at[0] * shape_grads[0]
    for k in (1, 2, 3):
        out += at[k] * shape_grads[k]
    return out


def nodal_gradient(points: np.ndarray, tets: np.ndarray, u: np.ndarray, *,
                   volumes: np.ndarray | None = None, grads: np.ndarray | None = None
                   ) -> np.ndarray:
    """Recovered nodal gradient: the volume-weighted mean of the element gradients around a node.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    tets : ndarray (M, 4) int
    u : ndarray (N,)
    volumes, grads : optional
        Output of :func:`tet_gradients`, to skip recomputing it.

    Returns
    -------
    ndarray (N, 3), units of ``u`` per mm
        Zero at nodes that belong to no element.
    """
    if volumes is None or grads is None:
        volumes, grads = tet_gradients(points, tets)
    g = cell_gradient(points, tets, u, grads=grads)
    return cell_to_nodes(tets, g, volumes, n_points=len(points))


def cell_to_nodes(tets: np.ndarray, cell_values: np.ndarray, volumes: np.ndarray, *,
                  n_points: int) -> np.ndarray:
    """Volume-weighted average of cell values onto the nodes.

    Parameters
    ----------
    tets : ndarray (M, 4) int
    cell_values : ndarray (M,) or (M, C)
    volumes : ndarray (M,), mm^3
    n_points : int

    Returns
    -------
    ndarray (N,) or (N, C)
        Zero at nodes that belong to no element.
    """
    cell_values = np.asarray(cell_values, float)
    flat = cell_values.reshape(len(tets), -1)
    idx = np.asarray(tets, dtype=np.intp).ravel()  # bincount's own index type: converted once
    volumes = np.asarray(volumes, float)
    weight = np.bincount(idx, weights=np.repeat(volumes, 4), minlength=n_points)
    # each element's volume times its value, then repeated for its four corners (the same
    # products as repeating both first, a quarter of the multiplications)
    out = np.stack([np.bincount(idx, weights=np.repeat(volumes * flat[:, c], 4), minlength=n_points)
                    for c in range(flat.shape[1])], axis=1)
    out /= np.where(weight > 0, weight, 1.0)[:, None]
    return out.reshape((n_points,) + cell_values.shape[1:])


def barycentric(points: np.ndarray, tets: np.ndarray, cells: np.ndarray, at: np.ndarray
                ) -> np.ndarray:
    """Barycentric coordinates of query points with respect to given elements.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    tets : ndarray (M, 4) int
    cells : ndarray (K,) int
        Element of each query point.
    at : ndarray (K, 3), mm
        Query points (inside their element for weights in [0, 1]; outside gives extrapolation).

    Returns
    -------
    ndarray (K, 4)
        Weights that sum to one; ``(weights[:, :, None] * points[tets[cells]]).sum(1) == at``.
    """
    t = np.asarray(tets)[np.asarray(cells)]
    x0 = points[t[:, 0]]
    J = np.stack([points[t[:, 1]] - x0, points[t[:, 2]] - x0, points[t[:, 3]] - x0], axis=2)
    lam = np.linalg.solve(J, (np.asarray(at, float) - x0)[:, :, None])[:, :, 0]
    return np.column_stack([1.0 - lam.sum(axis=1), lam])


def interpolate(tets: np.ndarray, values: np.ndarray, cells: np.ndarray, weights: np.ndarray
                ) -> np.ndarray:
    """Evaluate a P1 field at points given by element and barycentric weights.

    Parameters
    ----------
    tets : ndarray (M, 4) int
    values : ndarray (N,) or (N, C)
        Nodal values.
    cells : ndarray (K,) int
    weights : ndarray (K, 4)
        From :func:`barycentric`.

    Returns
    -------
    ndarray (K,) or (K, C)
    """
    v = np.asarray(values, float)[np.asarray(tets)[np.asarray(cells)]]
    return np.einsum("kj,kj...->k...", weights, v)
