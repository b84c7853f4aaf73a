"""Rule-based myofiber architecture: fiber, sheet and sheet-normal directions from angle laws.

Given the local frame of :mod:`fibers.coordinates` and the transmural depth, the fiber is turned
from ``e_circ`` toward ``e_long`` by the helix angle, ``fiber = cos(a) e_circ + sin(a) e_long``
(DESIGN.md section 4). The sheet starts as ``e_rad`` and is turned about the fiber by the
transverse angle ``b`` (right-handed): ``sheet = cos(b) e_rad + sin(b) (fiber x e_rad)``.
``sheet_normal = fiber x sheet`` completes a right-handed orthonormal triad. This is the rule
of the Laplace-Dirichlet rule-based method (Bayer et al., Ann Biomed Eng 2012) restricted to the
left ventricle.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fibers.config import FiberLaw
from fibers.coordinates import CardiacCoordinates
from fibers.errors import InputError


@dataclass(frozen=True)
class Architecture:
    """Fiber architecture on a wall mesh.

    Attributes
    ----------
    fiber, sheet, sheet_normal : ndarray (N, 3)
        Nodal right-handed orthonormal triad.
    helix_angle, transverse_angle : ndarray (N,), degrees
    cell_fiber, cell_sheet, cell_sheet_normal : ndarray (M, 3)
        The triad per element, from the element frame and depth.
    """

    fiber: np.ndarray
    sheet: np.ndarray
    sheet_normal: np.ndarray
    helix_angle: np.ndarray
    transverse_angle: np.ndarray
    cell_fiber: np.ndarray
    cell_sheet: np.ndarray
    cell_sheet_normal: np.ndarray


def helix_angle(law: FiberLaw, depth) -> np.ndarray:
    """Helix angle at transmural depth.

    Parameters
    ----------
    law : FiberLaw
        Linear from ``helix_endo`` to ``helix_epi``, or the ``helix_profile`` table of
        (depth, angle) pairs interpolated linearly (constant beyond its first and last depth).
    depth : array_like (K,)
        Transmural depth, 0 endocardium, 1 epicardium; clipped to [0, 1].

    Returns
    -------
    ndarray (K,), degrees
    """
    d = _depth(depth)
    if law.helix_profile is not None:
        table = _profile_table(law.helix_profile)
        return np.interp(d, table[:, 0], table[:, 1])
    return law.helix_endo + (law.helix_epi - law.helix_endo) * d


def transverse_angle(law: FiberLaw, depth) -> np.ndarray:
    """Transverse (sheet) angle at transmural depth, linear from endo to epi value.

    Parameters
    ----------
    law : FiberLaw
    depth : array_like (K,)
        Clipped to [0, 1].

    Returns
    -------
    ndarray (K,), degrees
    """
    d = _depth(depth)
    return law.transverse_endo + (law.transverse_epi - law.transverse_endo) * d


def orient(e_rad, e_long, e_circ, depth, law: FiberLaw):
    """Fiber, sheet and sheet-normal directions from a local frame and a depth.

    Works on any frame arrays, e.g. frames interpolated to sample points: the frame is first
    re-orthonormalised (``e_rad`` normalised, ``e_long`` made orthogonal to it and normalised,
    ``e_circ = e_long x e_rad``). The given ``e_circ`` only serves as a fallback where the
    given ``e_rad`` or ``e_long`` is degenerate (zero, or ``e_long`` parallel to ``e_rad``).

    Parameters
    ----------
    e_rad, e_long, e_circ : ndarray (K, 3)
    depth : ndarray (K,)
        Transmural depth in [0, 1].
    law : FiberLaw

    Returns
    -------
    fiber, sheet, sheet_normal : ndarray (K, 3)
        Right-handed orthonormal triad.
    helix_deg, transverse_deg : ndarray (K,), degrees
    """
    e_rad, e_long, e_circ = _orthonormal_frame(e_rad, e_long, e_circ)
    helix_deg = helix_angle(law, depth)
    transverse_deg = transverse_angle(law, depth)
    if helix_deg.shape != (len(e_rad),):
        raise InputError(f"orient: depth has {helix_deg.size} values for {len(e_rad)} frames; "
                         "pass one depth per frame")
    a = np.radians(helix_deg)[:, None]
    b = np.radians(transverse_deg)[:, None]
    fiber = np.cos(a) * e_circ + np.sin(a) * e_long
    # Rodrigues' rotation of e_rad about the fiber; e_rad is orthogonal to the fiber, so the
    # term along the fiber vanishes.
    sheet = np.cos(b) * e_rad + np.sin(b) * np.cross(fiber, e_rad)
    sheet_normal = np.cross(fiber, sheet)
    return fiber, sheet, sheet_normal, helix_deg, transverse_deg


def assign(coords: CardiacCoordinates, law: FiberLaw, *,
           cell_transmural: np.ndarray | None = None) -> Architecture:
    """Fiber architecture at the nodes and in the elements of a mesh.

    Parameters
    ----------
    coords : CardiacCoordinates
    law : FiberLaw
    cell_transmural : ndarray (M,), optional
        Depth per element; default ``coords.cell_transmural``.

    Returns
    -------
    Architecture
    """
    fiber, sheet, normal, helix, transverse = orient(
        coords.e_rad, coords.e_long, coords.e_circ, coords.transmural, law)
    depth = coords.cell_transmural if cell_transmural is None else cell_transmural
    if depth is None:
        raise InputError("assign: coords carries no cell_transmural; pass cell_transmural= "
                         "(one depth per element)")
    cell_fiber, cell_sheet, cell_normal, _, _ = orient(
        coords.cell_e_rad, coords.cell_e_long, coords.cell_e_circ, depth, law)
    return Architecture(fiber=fiber, sheet=sheet, sheet_normal=normal, helix_angle=helix,
                        transverse_angle=transverse, cell_fiber=cell_fiber,
                        cell_sheet=cell_sheet, cell_sheet_normal=cell_normal)


def _depth(depth) -> np.ndarray:
    d = np.asarray(depth, dtype=float)
    if not np.all(np.isfinite(d)):
        raise InputError("transmural depth contains NaN or infinite values; recompute the "
                         "cardiac coordinates")
    return np.clip(d, 0.0, 1.0)


def _profile_table(profile) -> np.ndarray:
    try:
        table = np.asarray(profile, dtype=float)
    except (TypeError, ValueError):
        raise InputError("fibers.helix_profile must be a list of [depth, angle] pairs of "
                         "numbers") from None
    if table.ndim != 2 or table.shape[1] != 2:
        raise InputError(f"fibers.helix_profile must be a list of [depth, angle] pairs; got "
                         f"an array of shape {table.shape}")
    if len(table) < 2:
        raise InputError(f"fibers.helix_profile has {len(table)} row(s); give at least 2 "
                         "[depth, angle] pairs")
    if not np.all(np.isfinite(table)):
        raise InputError("fibers.helix_profile contains NaN or infinite values")
    d = table[:, 0]
    if d.min() < 0.0 or d.max() > 1.0:
        raise InputError(f"fibers.helix_profile depths must lie in [0, 1] (0 endocardium, "
                         f"1 epicardium); got {d.min():g} to {d.max():g}")
    steps = np.diff(d)
    if np.any(steps <= 0.0):
        row = int(np.flatnonzero(steps <= 0.0)[0]) + 1
        raise InputError(f"fibers.helix_profile depths must increase strictly; row {row + 1} "
                         f"(depth {d[row]:g}) does not follow depth {d[row - 1]:g}")
    return table


def _orthonormal_frame(e_rad, e_long, e_circ):
    """Gram-Schmidt on (e_rad, e_long), e_circ = e_long x e_rad, with fallbacks on degeneracy."""
    arrays = [np.asarray(v, dtype=float) for v in (e_rad, e_long, e_circ)]
    shape = arrays[0].shape
    if len(shape) != 2 or shape[1] != 3 or any(v.shape != shape for v in arrays):
        raise InputError(f"orient: e_rad, e_long, e_circ must be (K, 3) arrays of one shape; "
                         f"got {[v.shape for v in arrays]}")
    if not all(np.all(np.isfinite(v)) for v in arrays):
        raise InputError("orient: the frame contains NaN or infinite values; recompute the "
                         "cardiac coordinates")
    r, lg, c = arrays
    # e_rad = e_circ x e_long in a right-handed frame; use it where the given e_rad is zero.
    r = _unit_rows(r, np.cross(c, lg))
    lg = lg - np.einsum("ij,ij->i", lg, r)[:, None] * r
    # e_long = e_rad x e_circ; use it where the given e_long is parallel to e_rad.
    alt = np.cross(r, c)
    lg = _unit_rows(lg, alt)
    lg = lg - np.einsum("ij,ij->i", lg, r)[:, None] * r
    lg = _unit_rows(lg, _any_orthogonal(r))
    return r, lg, np.cross(lg, r)


def _unit_rows(v, fallback):
    """Unit rows of ``v``; rows shorter than 1e-9 taken from ``fallback`` (then any unit)."""
    norm = np.linalg.norm(v, axis=1)
    bad = norm < 1e-9
    if np.any(bad):
        v = v.copy()
        v[bad] = fallback[bad]
        norm = np.linalg.norm(v, axis=1)
        still = norm < 1e-9
        v[still] = [1.0, 0.0, 0.0]
        norm[still] = 1.0
    return v / norm[:, None]


def _any_orthogonal(r):
    """A unit vector orthogonal to each unit row of ``r``."""
    pick = np.where((np.abs(r[:, 0]) < 0.9)[:, None], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0])
    v = np.cross(r, pick)
    return v / np.linalg.norm(v, axis=1)[:, None]
