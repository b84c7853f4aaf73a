"""Benchmark of the FEM stage against general-purpose references, measured in one run.

- assembly: ``fibers.fem.stiffness`` vs scikit-fem's ``asm(laplace, Basis(MeshTet, P1))``;
- transmural solve: ``fibers.fem.solve_dirichlet`` (condensation, AMG setup, CG) vs
  ``scipy.sparse.linalg.spsolve`` on the same condensed system (condensation not timed for the
  reference).

Run ``python bench/fem_bench.py`` for a table on spheroidal shells of about 50k to 1M tetrahedra.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np


def _timed(fn, repeat=1):
    best, out = np.inf, None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t)
    return best, out


def fem_rows(mesh, *, direct_limit: int = 600_000) -> list[dict]:
    """Time our FEM against scikit-fem and scipy's direct solver on one mesh.

    Parameters
    ----------
    mesh : WallMesh
    direct_limit : int
        Skip the direct solve on meshes with more tetrahedra than this (its time and memory
        grow fast); the row then has ``reference_s`` NaN and a note.

    Returns
    -------
    list of dict
        Rows with ``name``, ``tets``, ``ours_s``, ``reference_s``, ``ratio``
        (reference / ours, > 1 means ours is faster) and ``note``.
    """
    import pyamg  # noqa: F401  (import once here so its import time is not in the solve row)
    import scipy.sparse.linalg as spla
    from skfem import Basis, ElementTetP1, MeshTet, asm
    from skfem.models.poisson import laplace

    from fibers import fem
    from fibers.types import ENDO, EPI

    points, tets = mesh.points, mesh.tets
    m = len(tets)
    # Best of two runs for ours (the first call pays one-off lazy imports inside scipy/pyamg);
    # the references get the same where they are cheap.
    ours_asm, K = _timed(lambda: fem.stiffness(points, tets), repeat=2)

    def reference_assembly():
        sk = MeshTet(np.ascontiguousarray(points.T), np.ascontiguousarray(tets.T))
        return asm(laplace, Basis(sk, ElementTetP1()))

    ref_asm, K_ref = _timed(reference_assembly, repeat=2)
    asm_diff = abs(K - K_ref).max() / abs(K_ref).max()
    rows = [dict(name="stiffness assembly", tets=m, ours_s=ours_asm, reference_s=ref_asm,
                 ratio=ref_asm / ours_asm, note=f"scikit-fem; max rel diff {asm_diff:.1e}")]

    endo, epi = mesh.face_nodes(ENDO), mesh.face_nodes(EPI)
    nodes = np.concatenate([endo, epi])
    values = np.concatenate([np.zeros(endo.size), np.ones(epi.size)])
    ours_solve, u = _timed(lambda: fem.solve_dirichlet(K, nodes, values), repeat=2)
    if m > direct_limit:
        rows.append(dict(name="transmural solve", tets=m, ours_s=ours_solve,
                         reference_s=float("nan"), ratio=float("nan"),
                         note=f"direct solve skipped above {direct_limit} tets"))
        return rows
    fixed = np.zeros(len(points), dtype=bool)
    fixed[nodes] = True
    free = np.flatnonzero(~fixed)
    x = np.zeros(len(points))
    x[nodes] = values
    A = K[free][:, free].tocsc()
    b = -(K @ x)[free]
    ref_solve, x_free = _timed(lambda: spla.spsolve(A, b))
    diff = float(np.max(np.abs(u[free] - x_free)))
    rows.append(dict(name="transmural solve", tets=m, ours_s=ours_solve, reference_s=ref_solve,
                     ratio=ref_solve / ours_solve,
                     note=f"scipy spsolve; max abs diff {diff:.1e}"))
    return rows


def _format(rows) -> str:
    head = f"{'stage':<20} {'tets':>9} {'ours_s':>9} {'ref_s':>9} {'ratio':>7}  note"
    lines = [head, "-" * len(head)]
    for r in rows:
        lines.append(f"{r['name']:<20} {r['tets']:>9d} {r['ours_s']:>9.3f} "
                     f"{r['reference_s']:>9.3f} {r['ratio']:>7.1f}  {r['note']}")
    return "\n".join(lines)


def main(argv=None) -> int:
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
    import shells

    # Target sizes for outer (30, 45) / inner (20, 35) mm: gmsh gives about 4.9 V / h^3 tets
    # for this body (V = 55,500 mm^3), measured.
    sizes = {"50k": 1.76, "200k": 1.11, "500k": 0.82, "1M": 0.65}
    wanted = argv if argv else list(sizes)
    rows = []
    for label in wanted:
        t = time.perf_counter()
        mesh = shells.spheroid_shell(inner=(20.0, 35.0), outer=(30.0, 45.0), size=sizes[label])
        mesh_s = time.perf_counter() - t
        print(f"# {label}: {len(mesh.tets)} tets, {len(mesh.points)} nodes, gmsh {mesh_s:.1f} s",
              file=sys.stderr, flush=True)
        rows.extend(fem_rows(mesh))
    print(_format(rows))
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
