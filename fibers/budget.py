"""The size budget of a build, checked before the expensive stages run.

Meshing cost and memory grow as the wall volume over the cube of the target size, so a size that
the case file accepts (0.3 mm) can still ask gmsh for tens of millions of tetrahedra and end in a
memory error minutes later. This module estimates the tetrahedron count from the fitted
surfaces in a fraction of a second and refuses a size beyond ``[mesh] max_tets``, naming a size
that fits; it warns when the thinnest part of the wall is spanned by fewer than three elements.
Pool counts are bounded the same way, by the memory their arrays will take.
"""

from __future__ import annotations

import math
import os
import warnings

import numpy as np

from fibers.errors import InputError

# Tetrahedron count ~ V / size^3 * (TETS_PER_MM3 + TETS_BOUNDARY_PER_MM * size): gmsh packs
# count * size^3 / V = 4.06-4.09 elements at 1 mm and 5.0-5.1 at 4 mm (the boundary layer's share
# grows with the size). Calibrated on real gmsh builds of the demo ventricle and the synthetic
# spheroidal shell at 1, 1.5, 2, 3 and 4 mm; the straight line fits every build within 7 %
# (demo: 500,386 tetrahedra at 1.0 mm, estimate 509,000; 155,291 at 1.5 mm, estimate 160,000).
# For scale: a regular tetrahedron of edge h has volume h^3 / (6 sqrt 2) (elementary geometry),
# 8.5 per h^3; gmsh's elements are larger than the target on average.
TETS_PER_MM3 = 3.75
TETS_BOUNDARY_PER_MM = 0.33
MAX_TETS = 5_000_000          # default of [mesh] max_tets
ELEMENTS_ACROSS_WALL = 3      # fewer elements across the wall and the transmural field is coarse
_GRID_MU, _GRID_THETA = 96, 128

# Memory of one pool point through sampling and writing: the point, 11 fields (5 vectors,
# 3 angles, 3 coordinates), owner indices and the temporaries of interpolation and the file
# writers: about 60 float64 values (measured: peak RSS grew by 503 bytes per point for 2M wall
# points on the demo at 4 mm, writing included).
POOL_BYTES_PER_POINT = 500
POOL_MEMORY_SHARE = 0.5       # of the machine's physical memory


def wall_volume_mm3(surfaces) -> float:
    """Volume (mm^3) between the fitted endocardium and epicardium below the base plane.

    Each surface is triangulated on a (mu, theta) grid up to its base rim, which lies in the
    plane z = 0 of the axis frame; the divergence theorem with the origin in that plane makes
    the flat cap contribute nothing, so V = sum over triangles of det[p0, p1, p2] / 6.
    """
    return abs(_enclosed_mm3(surfaces, "epi") - _enclosed_mm3(surfaces, "endo"))


def thinnest_wall_mm(surfaces) -> float:
    """Smallest distance (mm) from an epicardial grid point to the endocardial surface."""
    from scipy.spatial import cKDTree

    epi = _grid(surfaces, "epi").reshape(-1, 3)
    endo = _grid(surfaces, "endo").reshape(-1, 3)
    distance, _ = cKDTree(endo).query(epi)
    return float(distance.min())


def estimate_tets(volume_mm3: float, size: float) -> int:
    """Estimated tetrahedron count of a wall of ``volume_mm3`` meshed at edge length ``size`` mm."""
    return int(round((TETS_PER_MM3 + TETS_BOUNDARY_PER_MM * size) * volume_mm3 / size**3))


def size_for(volume_mm3: float, max_tets: int) -> float:
    """The smallest size (mm, rounded up to 0.05 mm) whose estimate stays within ``max_tets``."""
    size = (TETS_PER_MM3 * volume_mm3 / max_tets) ** (1.0 / 3.0)
    for _ in range(50):  # fixed point of the estimate = max_tets; contracts fast (b h << a)
        size = ((TETS_PER_MM3 + TETS_BOUNDARY_PER_MM * size) * volume_mm3 / max_tets) ** (1.0 / 3.0)
    return math.ceil(size * 20.0 - 1e-6) / 20.0


def check_mesh_size(surfaces, size: float, max_tets: int = MAX_TETS) -> dict:
    """Refuse a size that would exceed ``max_tets``; warn when the wall is thinner than 3 sizes.

    Returns
    -------
    dict
        ``estimated_tets``, ``wall_volume_ml``, ``thinnest_wall_mm``: for the manifest.

    Raises
    ------
    InputError
        When the estimate exceeds ``max_tets``, with the estimate and a size that fits.
    """
    volume = wall_volume_mm3(surfaces)
    estimate = estimate_tets(volume, size)
    if estimate > max_tets:
        raise InputError(
            f"[mesh] size = {size:g} mm would give about {estimate:,} tetrahedra for this "
            f"{volume / 1000:.0f} mL wall, more than [mesh] max_tets = {max_tets:,}; use --mesh-size "
            f"{size_for(volume, max_tets):g} or larger (or raise max_tets if the machine has the memory)")
    thinnest = thinnest_wall_mm(surfaces)
    if thinnest < ELEMENTS_ACROSS_WALL * size:
        warnings.warn(
            f"the thinnest part of the wall is {thinnest:.1f} mm: fewer than {ELEMENTS_ACROSS_WALL} "
            f"elements of {size:g} mm span it; --mesh-size {math.floor(thinnest / ELEMENTS_ACROSS_WALL * 20) / 20:g} "
            f"gives {ELEMENTS_ACROSS_WALL}")
    return {"estimated_tets": estimate, "wall_volume_ml": round(volume / 1000.0, 3),
            "thinnest_wall_mm": round(thinnest, 3)}


def check_pools(settings, *, where: str = "[pools]", memory_bytes: int | None = None) -> None:
    """Refuse pool counts whose arrays would not fit in half of the machine's memory."""
    from fibers.pools import POOL_NAMES

    total = sum(int(getattr(settings, name)) for name in POOL_NAMES)
    memory = physical_memory_bytes() if memory_bytes is None else memory_bytes
    need = total * POOL_BYTES_PER_POINT
    if memory and need > POOL_MEMORY_SHARE * memory:
        fit = int(POOL_MEMORY_SHARE * memory / POOL_BYTES_PER_POINT)
        raise InputError(f"{where}: {total:,} pool points in all would need about {need / 2**30:.1f} GB, more than "
                         f"half of this machine's {memory / 2**30:.0f} GB; ask for at most {fit:,} points in all")


def physical_memory_bytes() -> int:
    """Physical memory of the machine in bytes (0 when the system does not say)."""
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (ValueError, OSError, AttributeError):
        return 0


def _grid(surfaces, name: str, *, n_mu: int = _GRID_MU, n_theta: int = _GRID_THETA) -> np.ndarray:
    """Points (n_mu, n_theta + 1, 3) of a surface in the axis frame, apex row first, theta closed."""
    theta = np.linspace(-np.pi, np.pi, n_theta + 1)
    rim = surfaces.base_mu(name, theta[:-1])
    rim = np.r_[rim, rim[:1]]
    t = np.linspace(0.0, 1.0, n_mu)
    mu = t[:, None] * rim[None, :]
    points = surfaces.local_point(name, mu.ravel(), np.broadcast_to(theta, mu.shape).ravel())
    points = points.reshape(n_mu, n_theta + 1, 3)
    points[-1, :, 2] = 0.0  # the rim lies in the base plane
    return points


def _enclosed_mm3(surfaces, name: str) -> float:
    p = _grid(surfaces, name)
    a, b, c, d = p[:-1, :-1], p[1:, :-1], p[1:, 1:], p[:-1, 1:]
    six_v = (np.einsum("...i,...i", a, np.cross(b, c)) + np.einsum("...i,...i", a, np.cross(c, d)))
    return float(abs(six_v.sum()) / 6.0)
