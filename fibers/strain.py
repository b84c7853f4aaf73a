"""Kinematics from a displacement field: deformation gradient, strain, fiber stretch, per segment.

Everything here is arrays in, arrays out (numpy and scipy.sparse only; files are read and written
by :mod:`fibers.io.motion` and :mod:`fibers.io.strainfiles`). The definitions are the textbook
ones (Holzapfel, Nonlinear Solid Mechanics, 2000):

- deformation gradient ``F = I + grad u``, with ``grad`` taken in the reference (built) geometry;
- right Cauchy-Green tensor ``C = F^T F``, Green-Lagrange strain ``E = (C - I) / 2``;
- volume ratio ``J = det F``;
- on a unit reference direction ``a``: ``E_aa = a . E a`` and the stretch
  ``lambda_a = |F a| = sqrt(a . C a) = sqrt(1 + 2 E_aa)``; the engineering strain imaging papers
  report is ``lambda_a - 1`` (``strain_cc`` and so on); shear components ``E_ab = a . E b``.

Two entry points:

- :func:`kinematics` works on any ``(n, 3, 3)`` array of F with unit reference directions
  ``(n, 3)`` from a pool (``fibers.pools.load``) or from the field evaluator, for training loops;
- :func:`deformation_gradients` gives F per tetrahedron from nodal displacements (P1 gradient,
  constant in each element), and :func:`study` runs the whole per-cell, per-segment analysis
  behind ``fibers strain``.

Order-2 meshes (tetra10): F at the four Gauss points of each cell from the quadratic shape
functions (isoparametric), cell values the Gauss-weighted means over the cell.

Reference frames per cell: the radial / circumferential / longitudinal frame is the mean of the
cell's nodal ``e_rad`` and ``e_long``, re-orthonormalised (radial first, longitudinal made
orthogonal to it, ``e_circ = e_long x e_rad`` as in the build); fiber, sheet and sheet-normal are
the cell-wise triad the build stores in ``mesh.vtu`` (``fiber_cell`` ...), or, when absent, the
mean nodal triad re-orthonormalised the same way. All frames are taken at the reference: strains
are Lagrangian, the directions are material directions of the undeformed wall.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fibers.vectors import cross

# the reference directions, by the one-letter names used in the quantity names
DIRECTIONS = {"r": "e_rad", "c": "e_circ", "l": "e_long", "f": "fiber", "s": "sheet", "n": "sheet_normal"}
NORMAL = ("rr", "cc", "ll", "ff", "ss", "nn")
SHEAR = ("rc", "rl", "cl")
ENGINEERING = ("rr", "cc", "ll", "ff")
QUANTITIES = (tuple(f"E_{p}" for p in ("rr", "cc", "ll", "rc", "rl", "cl", "ff", "ss", "nn"))
              + ("lambda_f",) + tuple(f"strain_{p}" for p in ENGINEERING) + ("J",))

CONVENTIONS = {
    "deformation_gradient": "F = I + grad u per tetrahedron (P1 gradient on the corner nodes), the built geometry as reference",
    "green_lagrange": "E = (F^T F - I) / 2 (Holzapfel, Nonlinear Solid Mechanics, 2000)",
    "components": "E_ab = a . E b on unit reference directions: r = e_rad, c = e_circ, l = e_long, f = fiber, s = sheet, n = sheet_normal",
    "fiber_stretch": "lambda_f = sqrt(1 + 2 E_ff) = |F f|",
    "engineering_strain": "strain_aa = sqrt(1 + 2 E_aa) - 1 (stretch - 1), as imaging papers report",
    "J": "det F; 1 keeps volume",
    "frames": "per cell at the reference: mean nodal e_rad and e_long re-orthonormalised (radial first), e_circ = e_long x e_rad; fiber/sheet/sheet_normal from the cell-wise triad of mesh.vtu",
    "segment_means": "volume-weighted over the reference volume of each AHA segment's tetrahedra; segment 0 is the whole wall; inverted cells (J <= 0) are left out",
    "nodal_fields": "volume-weighted average of the cells around each node",
    "order_2_meshes": "tetra10 cells: F of the quadratic shape functions at the 4 Gauss points of each cell, cell values the Gauss-weighted means; the frames are the cell's",
}


# ----------------------------------------------------------------------------- tensors

def green_lagrange(F: np.ndarray) -> np.ndarray:
    """Green-Lagrange strain ``E = (F^T F - I) / 2`` of ``F`` (..., 3, 3), same shape."""
    C = np.swapaxes(F, -1, -2) @ F     # batched matmul: much faster than einsum here
    return 0.5 * (C - np.eye(3))


def jacobian(F: np.ndarray) -> np.ndarray:
    """``J = det F`` (...,) of ``F`` (..., 3, 3), by the explicit 3 x 3 rule (vectorised)."""
    return (F[..., 0, 0] * (F[..., 1, 1] * F[..., 2, 2] - F[..., 1, 2] * F[..., 2, 1])
            - F[..., 0, 1] * (F[..., 1, 0] * F[..., 2, 2] - F[..., 1, 2] * F[..., 2, 0])
            + F[..., 0, 2] * (F[..., 1, 0] * F[..., 2, 1] - F[..., 1, 1] * F[..., 2, 0]))


def component(E: np.ndarray, a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a . E b`` for tensors (..., n, 3, 3) and directions (n, 3); returns (..., n)."""
    return np.einsum("ni,...nij,nj->...n", a, E, b)


def kinematics(F: np.ndarray, frames: dict, *, quantities=QUANTITIES) -> dict[str, np.ndarray]:
    """Strain components, stretches and J from deformation gradients on reference directions.

    Parameters
    ----------
    F : ndarray (n, 3, 3) or (frames, n, 3, 3)
        Deformation gradients, world frame.
    frames : mapping
        Unit reference directions (n, 3) by name: ``e_rad``, ``e_circ``, ``e_long``, ``fiber``,
        ``sheet``, ``sheet_normal`` (a pool from ``fibers.pools.load`` or the evaluator's
        output has them all). Quantities whose directions are missing are skipped.
    quantities : sequence of str
        Which of :data:`QUANTITIES` to return.

    Returns
    -------
    dict of ndarray (n,) or (frames, n)
        ``E_rr`` ... ``E_nn`` and ``lambda_f`` and ``strain_rr`` ... (dimensionless), ``J``.

    Examples
    --------
    >>> import numpy as np
    >>> F = np.diag([1.1, 1.0, 1.0])[None]
    >>> out = kinematics(F, {"e_rad": np.array([[1.0, 0, 0]])}, quantities=("E_rr", "strain_rr"))
    >>> round(float(out["E_rr"][0]), 3), round(float(out["strain_rr"][0]), 3)
    (0.105, 0.1)
    """
    F = np.asarray(F, dtype=float)
    E = green_lagrange(F)
    local = _in_triads(E, frames)
    index = {"r": ("rcl", 0), "c": ("rcl", 1), "l": ("rcl", 2), "f": ("fsn", 0), "s": ("fsn", 1), "n": ("fsn", 2)}
    out = {}
    for name in quantities:
        if name == "J":
            out[name] = jacobian(F)
            continue
        pair = name.split("_")[1]
        if pair == "f" or name == "lambda_f":
            pair = "ff"
        (ta, ia), (tb, ib) = index[pair[0]], index[pair[1]]
        if ta == tb and ta in local:
            value = local[ta][..., ia, ib]
        else:
            dirs = [frames.get(DIRECTIONS[k]) for k in pair]
            if any(d is None for d in dirs):
                continue
            value = component(E, np.asarray(dirs[0], float), np.asarray(dirs[1], float))
        if name.startswith("E_"):
            out[name] = value
        elif name == "lambda_f":
            out[name] = _stretch(value)
        else:
            out[name] = _stretch(value) - 1.0
    return out


def _in_triads(E: np.ndarray, frames: dict) -> dict:
    """E written in the (r, c, l) and (f, s, n) triads present in ``frames``: ``Q E Q^T``, rows of Q the directions.

    By explicit sums over the three components: for millions of 3 x 3 products this is several
    times faster than numpy's batched matmul or einsum.
    """
    out = {}
    for key, names in (("rcl", ("e_rad", "e_circ", "e_long")), ("fsn", ("fiber", "sheet", "sheet_normal"))):
        if all(frames.get(n) is not None for n in names):
            Q = [np.asarray(frames[n], float) for n in names]
            Eq = [_matvec(E, q) for q in Q]                           # E q_b
            local = np.empty(E.shape)
            for a in range(3):
                for b in range(a, 3):
                    local[..., a, b] = local[..., b, a] = _dot(Q[a], Eq[b])
            out[key] = local
    return out


def _matvec(A: np.ndarray, v: np.ndarray) -> np.ndarray:
    """A v for A (..., n, 3, 3) and v (n, 3): (..., n, 3)."""
    return A[..., 0] * v[:, :1] + A[..., 1] * v[:, 1:2] + A[..., 2] * v[:, 2:3]


def _dot(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Row-wise dot of (n, 3) with (..., n, 3): (..., n)."""
    return a[:, 0] * b[..., 0] + a[:, 1] * b[..., 1] + a[:, 2] * b[..., 2]


def _stretch(e_aa: np.ndarray) -> np.ndarray:
    # 1 + 2 E_aa = |F a|^2 >= 0 in exact arithmetic; clip round-off below zero
    return np.sqrt(np.clip(1.0 + 2.0 * e_aa, 0.0, None))


# ----------------------------------------------------------------------------- P1 gradients

def shape_gradients(points: np.ndarray, tets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gradients of the four linear shape functions of every tetrahedron, and signed volumes.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    tets : ndarray (M, 4) int (order-2 cells: pass their first four, corner, columns)

    Returns
    -------
    grads : ndarray (M, 4, 3), 1/mm
    volume : ndarray (M,), mm^3, signed (positive for positively oriented cells)
    """
    x = points[tets]                                   # (M, 4, 3)
    D = (x[:, 1:] - x[:, :1]).transpose(0, 2, 1)       # columns x_k - x_0
    vol6 = jacobian(D)
    inv = np.linalg.inv(D)                             # rows: gradients of barycentrics 1..3
    grads = np.empty((len(tets), 4, 3))
    grads[:, 1:] = inv
    grads[:, 0] = -inv.sum(axis=1)
    return grads, vol6 / 6.0


def deformation_gradients(grads: np.ndarray, tets: np.ndarray, displacement: np.ndarray) -> np.ndarray:
    """``F = I + grad u`` per tetrahedron from nodal displacements.

    Parameters
    ----------
    grads : ndarray (M, 4, 3), from :func:`shape_gradients`
    tets : ndarray (M, 4) int
    displacement : ndarray (N, 3) or (T, N, 3), mm

    Returns
    -------
    ndarray (M, 3, 3) or (T, M, 3, 3); ``F[..., i, j] = delta_ij + du_i / dX_j``
    """
    u = np.asarray(displacement, float)[..., tets, :]   # (..., M, 4, 3)
    return np.eye(3) + np.swapaxes(u, -1, -2) @ grads


# ----------------------------------------------------------------------------- order 2 (tetra10)

# mid-edge nodes 4..9 of a tetra10 cell lie on these corner pairs (VTK's and meshio's order)
TETRA10_EDGES = ((0, 1), (1, 2), (0, 2), (0, 3), (1, 3), (2, 3))
# the 4-point Gauss rule on a tetrahedron, exact for polynomials of degree 2: barycentric
# coordinates (a, b, b, b) and permutations, equal weights (Zienkiewicz & Taylor, The Finite
# Element Method, vol. 1, table of tetrahedral rules; from memory)
_A, _B = 0.5854101966249685, 0.1381966011250105
GAUSS4 = np.full((4, 4), _B) + np.eye(4) * (_A - _B)


def _p2_reference_gradients() -> np.ndarray:
    """d N_a / d xi (4 points, 10 functions, 3) of the quadratic shape functions at GAUSS4."""
    dL = np.array([[-1.0, -1.0, -1.0], [1.0, 0, 0], [0, 1.0, 0], [0, 0, 1.0]])  # d L_i / d xi
    out = np.empty((4, 10, 3))
    for q, L in enumerate(GAUSS4):
        for i in range(4):                                   # corners: N_i = L_i (2 L_i - 1)
            out[q, i] = (4.0 * L[i] - 1.0) * dL[i]
        for e, (i, j) in enumerate(TETRA10_EDGES):           # edges: N_ij = 4 L_i L_j
            out[q, 4 + e] = 4.0 * (L[i] * dL[j] + L[j] * dL[i])
    return out


def quadrature_gradients(points: np.ndarray, cells: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shape-function gradients of tetra10 cells at the 4 Gauss points, and the points' weights.

    The geometry is isoparametric (curved cells allowed): ``dX/dxi = sum_a X_a (dN_a/dxi)^T``,
    ``grad N_a = (dX/dxi)^-T dN_a/dxi``, weight ``det(dX/dxi) / 24``.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    cells : ndarray (M, 10) int, VTK node order (corners, then the edges of TETRA10_EDGES)

    Returns
    -------
    grads : ndarray (M, 4, 10, 3), 1/mm
    weights : ndarray (M, 4), mm^3, signed (their sum is the cell's volume)
    """
    ref = _p2_reference_gradients()
    jac = np.einsum("mai,qaj->mqij", points[cells], ref)       # dX_i / dxi_j
    inv = np.linalg.inv(jac)
    grads = np.einsum("qaj,mqji->mqai", ref, inv)
    return grads, jacobian(jac) / 24.0


def quadrature_deformation_gradients(grads: np.ndarray, cells: np.ndarray, displacement: np.ndarray) -> np.ndarray:
    """F (M, 4, 3, 3) at the Gauss points of tetra10 cells from nodal displacements (N, 3)."""
    u = np.asarray(displacement, float)[cells]           # (M, 10, 3)
    return np.eye(3) + np.swapaxes(u, -1, -2)[:, None] @ grads


# ----------------------------------------------------------------------------- frames per cell

def orthonormal_frames(e_rad: np.ndarray, e_long: np.ndarray) -> dict[str, np.ndarray]:
    """A right-handed radial / circumferential / longitudinal frame from rough directions (M, 3).

    Radial is normalised first, longitudinal is made orthogonal to it (Gram-Schmidt) and
    ``e_circ = e_long x e_rad``, the build's own convention.
    """
    r = _unit(e_rad)
    l = _unit(e_long - np.einsum("mi,mi->m", e_long, r)[:, None] * r)
    return {"e_rad": r, "e_circ": cross(l, r), "e_long": l}


def cell_frames(tets: np.ndarray, point_fields: dict, cell_fields: dict | None = None) -> dict[str, np.ndarray]:
    """Unit reference directions (M, 3) per cell from the build's nodal and cell-wise fields.

    ``point_fields`` holds nodal ``e_rad``, ``e_long`` (and ``fiber``, ``sheet`` when the cell
    triad is absent); ``cell_fields`` may hold ``fiber_cell``, ``sheet_cell``,
    ``sheet_normal_cell``, used as stored (normalised once more against round-off).
    """
    corner = tets[:, :4]
    mean = {k: np.asarray(v, float)[corner].mean(axis=1) for k, v in point_fields.items()
            if k in ("e_rad", "e_long", "fiber", "sheet")}
    frames = orthonormal_frames(mean["e_rad"], mean["e_long"])
    cell_fields = cell_fields or {}
    if all(f"{k}_cell" in cell_fields for k in ("fiber", "sheet", "sheet_normal")):
        for k in ("fiber", "sheet", "sheet_normal"):
            frames[k] = _unit(np.asarray(cell_fields[f"{k}_cell"], float))
    elif "fiber" in mean and "sheet" in mean:
        f = _unit(mean["fiber"])
        s = _unit(mean["sheet"] - np.einsum("mi,mi->m", mean["sheet"], f)[:, None] * f)
        frames.update(fiber=f, sheet=s, sheet_normal=cross(f, s))
    return frames


def _unit(v: np.ndarray) -> np.ndarray:
    return v / np.linalg.norm(v, axis=-1, keepdims=True)


# ----------------------------------------------------------------------------- averages

def segment_means(values: np.ndarray, volume: np.ndarray, labels: np.ndarray, valid: np.ndarray,
                  n_segments: int = 18) -> np.ndarray:
    """Volume-weighted means per segment of per-cell values.

    Parameters
    ----------
    values : ndarray (T, M)
    volume : ndarray (M,), reference volumes (weights)
    labels : ndarray (M,) int in [0, n_segments); row 0 of the result is the whole wall
    valid : ndarray (T, M) bool, cells taken into the means (inverted cells are not)

    Returns
    -------
    ndarray (T, n_segments); NaN where a segment has no valid cell
    """
    from scipy import sparse

    m = len(labels)
    w = np.where(valid, volume[None, :], 0.0)
    # membership (M, n_segments): each cell in its segment and in segment 0, the whole wall
    rows = np.concatenate([np.arange(m), np.arange(m)])
    cols = np.concatenate([np.asarray(labels, int), np.zeros(m, int)])
    member = sparse.csr_matrix((np.ones(2 * m), (rows, cols)), shape=(m, n_segments))
    member.sum_duplicates()
    member.data[:] = 1.0       # unlabelled cells (label 0) belong to segment 0 once
    total = np.asarray((member.T @ w.T).T)
    weighted = np.asarray((member.T @ (np.where(valid, values, 0.0) * w).T).T)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, weighted / np.where(total > 0, total, 1.0), np.nan)


def nodal_average(values: np.ndarray, tets: np.ndarray, volume: np.ndarray, n_nodes: int) -> np.ndarray:
    """Recovered nodal values (T, N): the volume-weighted mean of the cells around each node.

    ``tets`` may be (M, 4) or (M, 10): every node listed for a cell takes its value. Nodes used by
    no cell get the mean of none: NaN would break viewers, so they get 0.
    """
    from scipy import sparse

    k = tets.shape[1]
    rows = tets.ravel()
    cols = np.repeat(np.arange(len(tets)), k)
    A = sparse.csr_matrix((np.repeat(np.abs(volume), k), (rows, cols)), shape=(n_nodes, len(tets)))
    weight = np.asarray(A.sum(axis=1)).ravel()
    weight[weight == 0] = 1.0
    return np.asarray(A @ np.asarray(values, float).T).T / weight


# ----------------------------------------------------------------------------- the whole study

@dataclass
class StrainStudy:
    """Every per-cell and per-segment array of one motion on one build.

    Attributes
    ----------
    cell : dict of ndarray (T, M)
        Each of :data:`QUANTITIES` per frame and cell.
    segments : dict of ndarray (T, 18)
        Volume-weighted segment means (column 0 the whole wall).
    volume_ml : ndarray (18,)
        Reference volume of each segment (column 0 the whole wall), mL.
    inverted : ndarray (T, M) bool
        Cells with J <= 0 (left out of the means).
    abs_J_minus_1 : ndarray (T, 18)
        Volume-weighted mean of |J - 1| per segment.
    """

    cell: dict
    segments: dict
    volume_ml: np.ndarray
    inverted: np.ndarray
    abs_J_minus_1: np.ndarray
    centroids: np.ndarray
    labels: np.ndarray
    volume: np.ndarray
    notes: list = field(default_factory=list)


def study(points: np.ndarray, tets: np.ndarray, displacement: np.ndarray, frames: dict,
          labels: np.ndarray) -> StrainStudy:
    """Per-cell kinematics of every frame and their volume-weighted segment means.

    Parameters
    ----------
    points : ndarray (N, 3), mm, the reference geometry
    tets : ndarray (M, 4) or (M, 10) int
        Linear cells (one constant F each) or tetra10 cells in VTK node order (F at the 4 Gauss
        points, cell values the Gauss-weighted means, inverted when J <= 0 at any point).
    displacement : ndarray (T, N, 3), mm
    frames : dict of ndarray (M, 3), from :func:`cell_frames`
    labels : ndarray (M,) int, AHA segment 1-17 (0 = not labelled)
    """
    quadratic = tets.shape[1] == 10
    if quadratic:
        grads, weights = quadrature_gradients(points, tets)
        weights = np.abs(weights)
        volume = weights.sum(axis=1)
        at_points = {k: np.repeat(v, 4, axis=0) for k, v in frames.items()}   # cell frames at its 4 points
    else:
        grads, volume = shape_gradients(points, tets)
        volume = np.abs(volume)
    cell = {q: np.empty((len(displacement), len(tets))) for q in QUANTITIES}
    lowest_J = np.empty((len(displacement), len(tets)))
    for t, u in enumerate(displacement):   # one frame at a time keeps (M, 3, 3) temporaries small
        if quadratic:
            F = quadrature_deformation_gradients(grads, tets, u).reshape(-1, 3, 3)
            values = {q: v.reshape(-1, 4) for q, v in kinematics(F, at_points).items()}
            lowest_J[t] = values["J"].min(axis=1)
            # cell values: the Gauss-weighted mean over the cell (a quadrature of the cell's mean)
            values = {q: (v * weights).sum(axis=1) / volume for q, v in values.items()}
        else:
            values = kinematics(deformation_gradients(grads, tets, u), frames)
            lowest_J[t] = values["J"]
        for q in QUANTITIES:
            cell[q][t] = values.get(q, np.nan)
    inverted = lowest_J <= 0.0
    labels = np.asarray(labels, int)
    valid = ~inverted
    segments = {q: segment_means(v, volume, labels, valid) for q, v in cell.items()}
    abs_dev = segment_means(np.abs(cell["J"] - 1.0), volume, labels, valid)
    vol_ml = _segment_volumes(volume, labels) / 1000.0
    centroids = points[tets[:, :4]].mean(axis=1)
    return StrainStudy(cell=cell, segments=segments, volume_ml=vol_ml, inverted=inverted,
                       abs_J_minus_1=abs_dev, centroids=centroids, labels=labels, volume=volume)


def _segment_volumes(volume: np.ndarray, labels: np.ndarray, n_segments: int = 18) -> np.ndarray:
    per = np.bincount(labels, weights=volume, minlength=n_segments)[:n_segments]
    per[0] = volume.sum()
    return per


def peaks(study_: StrainStudy, time_ms: np.ndarray) -> dict:
    """Global and per-segment peaks: most negative strain_cc, strain_ll, strain_ff, most positive strain_rr.

    Returns ``{quantity: {"segment": [{"segment", "value", "frame", "time_ms"}, ...]}}`` with
    segment 0 the whole wall.
    """
    out = {}
    for q, sign in (("strain_cc", -1), ("strain_ll", -1), ("strain_ff", -1), ("strain_rr", +1),
                    ("E_cc", -1), ("E_ll", -1), ("E_ff", -1), ("E_rr", +1)):
        table = study_.segments[q]                   # (T, 18)
        rows = []
        for s in range(table.shape[1]):
            col = table[:, s]
            if not np.isfinite(col).any():
                continue
            k = int(np.nanargmax(sign * col))
            rows.append({"segment": s, "value": float(col[k]), "frame": k,
                         "time_ms": None if not np.isfinite(time_ms[k]) else float(time_ms[k])})
        out[q] = {"kind": "most negative" if sign < 0 else "most positive", "segments": rows}
    return out
