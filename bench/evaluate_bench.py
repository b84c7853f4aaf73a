"""Timing of the field evaluator on a written build (10^6 points in at most 2 s after a load of
at most 2 s at ~500k tetrahedra). Prints nothing itself and asserts nothing; `bench/run.py`
shows the rows as ratios against drawing 10^6 myocardium pool points with all their fields on
the same build, measured in the same run.
"""

from __future__ import annotations

import time

import numpy as np


def evaluator_rows(folder, pool_seconds: float, *, n: int = 1_000_000, seed: int = 0) -> list[dict]:
    """Time ``fibers.open`` and ``.at`` on 10^6 wall points and 10^6 bounding-box points.

    Parameters
    ----------
    folder : Path
        A written build (mesh.vtu, manifest.json, pools/).
    pool_seconds : float
        Seconds of the yardstick (10^6 myocardium pool points with all fields on this build).

    Returns
    -------
    list of dict
        ``step``, ``points``, ``seconds``, ``ratio`` (seconds / yardstick).
    """
    import fibers
    from fibers.io.pools import read_pool

    rows = []
    t0 = time.perf_counter()
    ev = fibers.open(folder)
    rows.append(("load (fibers.open)", 0, time.perf_counter() - t0))
    rng = np.random.default_rng(seed)
    wall = read_pool(folder / "pools" / "myocardium.npz")["points"]
    # pool points jittered by 0.1 mm: fresh positions, nearly all in the wall
    pts = wall[rng.integers(0, len(wall), n)] + rng.normal(scale=0.1, size=(n, 3))
    t0 = time.perf_counter()
    f = ev.at(pts)
    rows.append((f".at, wall points ({f['inside'].mean():.0%} inside)", n, time.perf_counter() - t0))
    lo, hi = ev.mesh.points.min(axis=0), ev.mesh.points.max(axis=0)
    box = lo + rng.random((n, 3)) * (hi - lo)
    t0 = time.perf_counter()
    f = ev.at(box)
    rows.append((f".at, bounding box ({f['inside'].mean():.0%} inside)", n, time.perf_counter() - t0))
    return [{"step": s, "points": k, "seconds": dt, "ratio": dt / pool_seconds} for s, k, dt in rows]
