"""Fiber-stretch and volume-change penalties on a pool of wall points (numpy only).

What a physics-informed registration loss would evaluate on a ``myocardium`` (or surface) pool:
for a deformation gradient F at every point, C = F^T F, E = (C - I) / 2, the fiber stretch
sqrt(f . C f) and J = det F (Holzapfel, Nonlinear Solid Mechanics, 2000). Here F is a made-up
field built on each point's own frame: longitudinal shortening by ``lam_long`` with radial
thickening by ``lam_rad``, circumferential length kept:

    F = I + (lam_long - 1) e_long e_long^T + (lam_rad - 1) e_rad e_rad^T

With lam_rad = 1 / lam_long the motion keeps volume (J = 1). With the fiber at helix angle a,
f = cos(a) e_circ + sin(a) e_long, so the fiber stretch is sqrt(cos^2 a + lam_long^2 sin^2 a),
which the script prints beside the computed value as a check.

The kinematics come from ``fibers.strain.kinematics`` (numpy only), which takes F (n, 3, 3) and
the pool's own reference directions and returns E_rr ... E_nn, lambda_f, strain_cc ... and J.

Usage: ``python examples/train_penalties.py OUT/pools/myocardium.npz [--lam-long 0.9]``
"""

from __future__ import annotations

import argparse

import numpy as np

from fibers import strain


def deformation(e_long: np.ndarray, e_rad: np.ndarray, lam_long: float, lam_rad: float) -> np.ndarray:
    """F (K, 3, 3) of the shortening-thickening field at each point."""
    eye = np.eye(3)[None]
    return (eye + (lam_long - 1.0) * np.einsum("ki,kj->kij", e_long, e_long)
            + (lam_rad - 1.0) * np.einsum("ki,kj->kij", e_rad, e_rad))


def penalties(F: np.ndarray, fiber: np.ndarray, frames: dict | None = None) -> dict[str, float]:
    """Kinematics and two penalties from F (K, 3, 3) and unit fibers (K, 3).

    ``frames`` may add the pool's other directions (``e_circ``, ``e_long`` ...) to report their
    mean strains too.
    """
    out = strain.kinematics(F, {**(frames or {}), "fiber": fiber})
    stretch, J = out["lambda_f"], out["J"]
    extra = {f"mean {q}": float(out[q].mean()) for q in ("E_cc", "E_ll", "E_rr") if q in out}
    return {
        "mean fiber stretch": float(stretch.mean()),
        "mean fiber strain E_ff": float(out["E_ff"].mean()),
        "fiber-stretch penalty mean (stretch-1)^2": float(((stretch - 1.0) ** 2).mean()),
        "volume penalty mean (J-1)^2": float(((J - 1.0) ** 2).mean()),
        "mean J": float(J.mean()),
        **extra,
    }


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("pool", help="a pools/<name>.npz file with fiber, e_long, e_rad")
    parser.add_argument("--lam-long", type=float, default=0.9, help="longitudinal stretch")
    args = parser.parse_args(argv)

    with np.load(args.pool, allow_pickle=False) as data:
        pool = {k: data[k] for k in ("fiber", "e_long", "e_rad", "e_circ", "helix_angle")}
    a = np.radians(pool["helix_angle"])
    expected = np.sqrt(np.cos(a) ** 2 + args.lam_long**2 * np.sin(a) ** 2).mean()
    print(f"{len(a)} points from {args.pool}")
    for title, lam_rad in (("volume-keeping (lam_rad = 1/lam_long)", 1.0 / args.lam_long),
                           ("compressible (lam_rad = 1)", 1.0)):
        F = deformation(pool["e_long"], pool["e_rad"], args.lam_long, lam_rad)
        print(title)
        frames = {k: pool[k] for k in ("e_rad", "e_circ", "e_long")}
        for name, value in penalties(F, pool["fiber"], frames).items():
            print(f"  {name:42s} {value: .6f}")
        print(f"  {'closed-form mean fiber stretch':42s} {expected: .6f}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
