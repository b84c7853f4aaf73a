"""Timing of point location and pool building (the speed targets: 10^6 pool points with all
fields in a few seconds). Prints a table; asserts nothing.

Run: ``.venv/bin/python bench/pools_bench.py [mesh_size_mm]``.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

from fibers import coordinates, pools, segments
from fibers.config import FiberLaw, Landmarks, PoolSettings
from fibers.locate import Locator


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return out, time.perf_counter() - t0


def pool_rows(mesh, coords, *, law: FiberLaw | None = None, septum=None, n: int = 1_000_000,
              seed: int = 0) -> list[dict]:
    """Time locating and sampling ``n`` points on one mesh.

    Parameters
    ----------
    mesh : WallMesh
    coords : CardiacCoordinates
    law : FiberLaw, optional
    septum : Septum, optional
    n : int
        Points per timed step.
    seed : int

    Returns
    -------
    list of dict
        One row per step: ``step``, ``points``, ``seconds``, ``points_per_s``.
    """
    law = FiberLaw() if law is None else law
    rng = np.random.default_rng(seed)
    rows = []

    def row(step, points, seconds):
        rows.append({"step": step, "points": points, "seconds": seconds,
                     "points_per_s": points / seconds if seconds > 0 else float("inf")})

    locator, dt = _timed(lambda: Locator(mesh.points, mesh.tets))
    row("locator build", 0, dt)
    lo, hi = mesh.points.min(axis=0), mesh.points.max(axis=0)
    box_points = lo + rng.random((n, 3)) * (hi - lo)
    (tet, _), dt = _timed(lambda: locator(box_points))
    row(f"locate, bounding box ({(tet >= 0).mean():.0%} in wall)", n, dt)
    wall_points = pools.build_pools(mesh, coords, law, septum, PoolSettings(
        myocardium=n, cavity=0, background=0, endo=0, epi=0, base=0, seed=seed))
    inside = wall_points["myocardium"].arrays["points"]
    _, dt = _timed(lambda: locator(inside))
    row("locate, all in wall", n, dt)
    for name in ("myocardium", "endo", "cavity", "background"):
        counts = {k: 0 for k in pools.POOL_NAMES} | {name: n}
        settings = PoolSettings(**counts, seed=seed)
        _, dt = _timed(lambda: pools.build_pools(mesh, coords, law, septum, settings,
                                                 locator=locator))
        row(f"pool {name}, all fields", n, dt)
    return rows


def _table(rows) -> str:
    lines = [f"{'step':44s} {'points':>9s} {'seconds':>8s} {'points/s':>10s}"]
    for r in rows:
        lines.append(f"{r['step']:44s} {r['points']:9d} {r['seconds']:8.2f} {r['points_per_s']:10.3g}")
    return "\n".join(lines)


def main(argv=None) -> None:
    argv = sys.argv[1:] if argv is None else argv
    size = float(argv[0]) if argv else 0.8
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
    import shells

    (mesh, dt_mesh) = _timed(lambda: shells.spheroid_shell((20.0, 35.0), (30.0, 45.0), size=size))
    coords, dt_coords = _timed(lambda: coordinates.compute(mesh))
    z = -5.0
    r = 30.0 * np.sqrt(1 - z * z / 45.0**2)
    marks = Landmarks(np.array([r * np.cos(1.0), r * np.sin(1.0), z]),
                      np.array([r * np.cos(-1.0), r * np.sin(-1.0), z]), source="bench")
    septum = segments.locate_septum(mesh, marks)
    print(f"spheroid shell, size {size} mm: {len(mesh.tets)} tets, {len(mesh.points)} nodes; "
          f"meshing {dt_mesh:.1f} s, coordinates {dt_coords:.1f} s")
    print(_table(pool_rows(mesh, coords, septum=septum)))


if __name__ == "__main__":
    main()
