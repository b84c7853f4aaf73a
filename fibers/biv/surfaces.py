"""The right ventricle's surfaces as radial widths over the fitted left epicardium.

Along the septum the right cavity is bounded by the left epicardium itself, so the right
ventricle is described by two widths measured radially (normal to the long axis) from the left
epicardium, at local height ``z`` (0 on the base plane, negative toward the apex) and angle
``theta`` about the long axis:

- ``cavity_width(z, theta)``: the right cavity is ``R < r < R + w``, ``R`` the left epicardial
  radius, between two insertion angles ``theta_1(z) < theta_2(z)`` (rising about the axis from
  apex to base) where ``w`` falls to 0;
- ``outer_width(z, theta)``: the biventricular outer surface is ``r = R + wo``; ``wo`` is 0 away
  from the right ventricle, so there the outer surface is the left epicardium.

On each slice the widths come from rays cast from the long axis to the contours (the crescent
must be star-shaped seen from the axis, as a right ventricle beside the left one is). The
cavity width is kept as a function of the fraction ``u`` of the way between the insertions, the
outer width as a function of the angle. Between slices both are joined by monotone cubic
(PCHIP) interpolation in height, which never overshoots the slices' values; above the most
basal right-ventricular slice they are held up to the base plane. Below the most apical one the
cavity closes like a half-ellipse, ``w = w_last sqrt((z - z_b) / (z_last - z_b))``, at ``z_b``
where the half-ellipse through the largest widths of the last two slices ends (an ellipsoidal
apex; kept before the next slice, which shows no right cavity; see ``_cavity_end``);
the outer width closes one wall thickness further down with zero slope at both ends
(``wo_last sin^2(pi/2 f)``, f the fraction of the way up), so the outer surface meets the left
epicardium without a crease; it is kept at least ``MIN_WALL_MM`` beyond the cavity.

Without ``rv_epi`` the outer surface is the free wall grown outward by ``rv_wall_thickness``:
the set of points within that distance of the free-wall curve on each slice (a dilation, so the
wall wraps around the crescent's tips).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import PchipInterpolator

from fibers.biv.inputs import RightContours
from fibers.errors import InputError
from fibers.surfaces import Surfaces
from fibers.types import LongAxis, Stack

U_SAMPLES = 129        # samples of the cavity width between the insertions, per slice
THETA_SAMPLES = 720    # samples of the outer width around the axis (0.5 degree)
MIN_WALL_MM = 1.0      # thinnest free wall accepted between the cavity and the outer surface


@dataclass(frozen=True)
class RightSurfaces:
    """The right cavity and the biventricular outer surface over the left epicardium.

    Attributes
    ----------
    lv : Surfaces
        The fitted left-ventricular surfaces (the epicardium is the widths' reference).
    heights : ndarray (S,), mm
        Local heights of the right-ventricular slices, ascending (apex to base), all <= 0.
    u : ndarray (U,)
        Fractions in [0, 1] from the first insertion ``theta_1`` to the second ``theta_2``.
    widths : ndarray (S, U), mm
        Cavity width on each slice; 0 at both insertions.
    spans : ndarray (S, 2), radians
        ``theta_1, theta_2`` per slice, ``theta_1 < theta_2``, unwrapped about one window.
    theta : ndarray (T,), radians
        Angles of ``outer`` in [-pi, pi).
    outer : ndarray (S, T), mm
        Outer width on each slice.
    bottom : float, mm
        Local height where the cavity closes (its apical end).
    thickness : float, mm
        Typical free-wall thickness (median of outer minus cavity width mid-crescent).
    outer_from : str
        ``"rv_epi"`` or ``"grown by <t> mm"``.
    residuals : tuple of dict
        Per slice: largest distance of the septal side of ``rv_endo`` from the left epicardium.
    """

    lv: Surfaces
    heights: np.ndarray
    u: np.ndarray
    widths: np.ndarray
    spans: np.ndarray
    theta: np.ndarray
    outer: np.ndarray
    bottom: float
    thickness: float
    outer_from: str
    residuals: tuple = ()

    @property
    def axis(self) -> LongAxis:
        return self.lv.axis

    @property
    def outer_bottom(self) -> float:
        """Local height where the outer width reaches 0 (one wall thickness below the cavity)."""
        return self.bottom - self.thickness

    # -- along the axis ------------------------------------------------------------------------
    def _along_at(self, values, z, closes_at, x, grid, *, periodic=False, smooth=False) -> np.ndarray:
        """Slice values (S, C) at heights z (K,) and positions x (K,) across the columns.

        Along the axis: PCHIP between slices, held above, closing like a half-ellipse below the
        last slice down to ``closes_at`` (``smooth``: a squared sine, zero slope at both ends,
        meeting the left epicardium without a crease). Across: linear over ``grid``. Each point
        evaluates only its two columns: a (K, C) table of every column at every point, as
        before, took seconds for the elements of a mesh (same numbers to the bit).
        """
        z = np.asarray(z, float)
        top, last = self.heights[-1], self.heights[0]
        zc = np.clip(z, last, top)
        if len(self.heights) > 1:
            pieces = PchipInterpolator(self.heights, values, axis=0, extrapolate=False)
            piece = np.clip(np.searchsorted(pieces.x, zc, side="right") - 1, 0, len(pieces.x) - 2)
            offset = zc - pieces.x[piece]
        fall = np.clip((z - closes_at) / max(last - closes_at, 1e-9), 0.0, 1.0)
        fall = np.sin(0.5 * np.pi * fall) ** 2 if smooth else np.sqrt(fall)

        def column(col):  # column col[k] of the slice values along the axis at each z[k]
            if len(self.heights) > 1:
                c = pieces.c[:, piece, col]                      # (4, K): cubic, ..., constant
                # summed from the constant term up, in the order of scipy's own evaluation
                inside = c[3] + c[2] * offset
                power = offset * offset
                inside = inside + c[1] * power
                inside = inside + c[0] * (power * offset)
            else:
                inside = values[0][col]
            return np.where(z < last, values[0][col] * fall, inside)

        i0, i1, f = _columns(x, grid, periodic)
        return (1 - f) * column(i0) + f * column(i1)

    def span_at(self, z) -> tuple[np.ndarray, np.ndarray]:
        """Insertion angles (K,), (K,) radians at heights z; constant beyond the slices."""
        z = np.clip(np.asarray(z, float), self.heights[0], self.heights[-1])
        if len(self.heights) > 1:
            s = PchipInterpolator(self.heights, self.spans, axis=0)(z)
        else:
            s = np.broadcast_to(self.spans[0], (len(z), 2))
        return s[:, 0], s[:, 1]

    def fraction(self, z, theta) -> np.ndarray:
        """Fraction u (K,) of the way between the insertions; outside [0, 1] beyond them."""
        t1, t2 = self.span_at(z)
        mid = 0.5 * (t1 + t2)
        t = mid + np.mod(np.asarray(theta, float) - mid + np.pi, 2 * np.pi) - np.pi
        return (t - t1) / (t2 - t1)

    def cavity_width_u(self, z, u) -> np.ndarray:
        """Cavity width (K,) mm at heights z (K,) and fractions u (K,) in [0, 1]."""
        z, u = np.broadcast_arrays(np.asarray(z, float), np.asarray(u, float))
        w = self._along_at(self.widths, z.ravel(), self.bottom, np.clip(u.ravel(), 0, 1), self.u)
        return w.reshape(z.shape) * (z >= self.bottom)

    def cavity_width(self, z, theta) -> np.ndarray:
        """Cavity width (K,) mm at heights z and angles theta (0 outside the crescent)."""
        z, theta = np.broadcast_arrays(np.asarray(z, float).ravel(), np.asarray(theta, float).ravel())
        u = self.fraction(z, theta)
        w = self.cavity_width_u(z, np.clip(u, 0, 1))
        return np.where((u > 0) & (u < 1) & (z <= 1e-6), w, 0.0)  # a hair above the base: rounding

    def outer_width(self, z, theta) -> np.ndarray:
        """Outer width (K,) mm at heights z and angles theta, at least the cavity's plus
        ``MIN_WALL_MM`` where there is a cavity."""
        z, theta = np.broadcast_arrays(np.asarray(z, float).ravel(), np.asarray(theta, float).ravel())
        t = np.mod(theta + np.pi, 2 * np.pi) - np.pi
        wo = self._along_at(self.outer, z, self.outer_bottom, t, self.theta, periodic=True, smooth=True)
        w = self.cavity_width(z, theta)
        return np.where(w > 0, np.maximum(wo, w + MIN_WALL_MM), wo) * (z <= 1e-6)

    # -- points -----------------------------------------------------------------------------------
    def epi_radius(self, z, theta) -> np.ndarray:
        """Radius (K,) mm of the left epicardium at local heights z and angles theta."""
        return epi_point(self.lv, z, theta)[1]

    def local_points(self, z, theta, width) -> np.ndarray:
        """Local points (K, 3) at ``width`` (K,) mm radially beyond the left epicardium."""
        p, r = epi_point(self.lv, z, theta)
        theta = np.asarray(theta, float).ravel()
        return p + np.asarray(width, float).ravel()[:, None] * np.column_stack(
            [np.cos(theta), np.sin(theta), np.zeros_like(theta)])


def epi_point(lv: Surfaces, z, theta) -> tuple[np.ndarray, np.ndarray]:
    """Points (K, 3) local and radii (K,) of the left epicardium at heights z and angles theta.

    The prolate angle mu of the point at height z is found by bisection (height rises
    monotonically with mu from the apical pole to the base).
    """
    z, theta = np.broadcast_arrays(np.asarray(z, float).ravel(), np.asarray(theta, float).ravel())
    height = lv.meridian_heights("epi", theta)  # the Fourier factors of each meridian, once
    lo = np.full(z.shape, 1e-6)
    hi = np.full(z.shape, np.pi - 1e-3)
    for _ in range(34):  # pi / 2^34: well below a micrometre on the surface
        mid = 0.5 * (lo + hi)
        below = height(mid) < z
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    p = lv.local_point("epi", 0.5 * (lo + hi), theta)
    p[:, 2] = z
    return p, np.hypot(p[:, 0], p[:, 1])


def _columns(x, grid, periodic):
    """Columns i0, i1 (K,) of ``grid`` around x (K,) and the weight f (K,) of i1."""
    g = np.asarray(grid)
    if periodic:
        step = g[1] - g[0]
        pos = (x - g[0]) / step
        i0 = np.floor(pos).astype(np.int64) % len(g)
        f = pos - np.floor(pos)
        i1 = (i0 + 1) % len(g)
    else:
        i0 = np.clip(np.searchsorted(g, x, side="right") - 1, 0, len(g) - 2)
        i1 = i0 + 1
        f = np.clip((x - g[i0]) / (g[i1] - g[i0]), 0.0, 1.0)
    return i0, i1, f


# -- from the contours -------------------------------------------------------------------------------

def fit_right(stack: Stack, lv: Surfaces, right: RightContours, *, wall_thickness: float = 3.5
              ) -> RightSurfaces:
    """The right cavity and the outer surface from ``rv_endo`` (and ``rv_epi``) contours.

    Parameters
    ----------
    stack : Stack
        The checked left-ventricular stack (long axis, slice heights and breath-hold shifts,
        which are applied to the right-ventricular contours of the same slice).
    lv : Surfaces
        The fitted left-ventricular surfaces.
    right : RightContours
    wall_thickness : float, mm
        Free-wall thickness used to grow the outer surface when ``rv_epi`` is absent.

    Raises
    ------
    InputError
        A right-ventricular contour on a slice without a left one, one that surrounds the left
        ventricle, or an ``rv_epi`` that lies inside its ``rv_endo``.
    """
    axis = lv.axis
    by_id = {sl.slice_id: sl for sl in stack.slices}
    ids = [int(k) for k in np.unique(right.slice_id[right.structure == "rv_endo"])]
    for k in np.unique(right.slice_id):
        if int(k) not in by_id:
            line = right.line[np.argmax(right.slice_id == k)]
            raise InputError(f"{right.source}, line {line}, slice {int(k)}: a right-ventricular contour "
                             f"on a slice without left-ventricular contours; give endo/epi on that slice too")
    u = np.linspace(0.0, 1.0, U_SAMPLES)
    theta = -np.pi + 2 * np.pi * np.arange(THETA_SAMPLES) / THETA_SAMPLES
    rows = []
    for k in ids:
        sl = by_id[k]
        pts, lines = right.rows("rv_endo", k)
        where = f"{right.source}, slice {k}"
        local = axis.to_local(pts + sl.shift)
        z = float(local[:, 2].mean())
        t1, t2 = _angular_window(local, where, lines)
        tt = t1 + u * (t2 - t1)
        reach = _ray_reach(local[:, :2], tt)
        r_epi = epi_point(lv, np.full_like(tt, z), tt)[1]
        w = np.clip(reach - r_epi, 0.0, None)
        w[[0, -1]] = 0.0
        septal = _septal_gap(local, lv, z, tt)
        if right.has_outer and np.any((right.structure == "rv_epi") & (right.slice_id == k)):
            opts, _ = right.rows("rv_epi", k)
            olocal = axis.to_local(opts + sl.shift)
            wo = _outer_from_contour(olocal, lv, z, theta, f"{right.source}, slice {k} (rv_epi)")
        else:
            wo = _outer_by_growth(lv, z, tt, w, theta, wall_thickness)
        rows.append((z, np.array([t1, t2]), w, wo, {"slice": k, "septal_gap_max_mm": round(septal, 3)}))
    rows.sort(key=lambda r: r[0])
    heights = np.array([r[0] for r in rows])
    spans = _unwrap_spans(np.array([r[1] for r in rows]))
    widths = np.array([r[2] for r in rows])
    outer = np.array([r[3] for r in rows])
    # where the outer width is known only from rv_epi: check it encloses the cavity
    w_on_theta = np.array([_on_full_circle(spans[i], u, widths[i], theta) for i in range(len(rows))])
    thin = (w_on_theta > 0) & (outer < w_on_theta - 0.5)
    if thin.any():
        i = int(np.argmax(thin.any(axis=1)))
        raise InputError(f"{right.source}, slice {rows[i][4]['slice']}: rv_epi lies inside rv_endo; "
                         f"rv_epi must enclose the right-ventricular cavity with its free wall")
    walls = (outer - w_on_theta)[w_on_theta > 0]
    thickness = float(np.median(walls)) if walls.size else float(wall_thickness)
    if not right.has_outer:
        thickness = float(wall_thickness)
    bottom = _cavity_end(stack, heights, widths)
    if len(heights) and heights[0] - bottom < 0:
        raise AssertionError("cavity end above its last slice")
    residuals = tuple(r[4] for r in rows)
    worst = max(residuals, key=lambda r: r["septal_gap_max_mm"])
    if worst["septal_gap_max_mm"] > 5.0:
        warnings.warn(f"{right.source}, slice {worst['slice']}: rv_endo leaves the left epicardium by up "
                      f"to {worst['septal_gap_max_mm']:.1f} mm along the septum; the septal side of "
                      f"rv_endo is taken to be the left epicardium")
    return RightSurfaces(lv=lv, heights=heights, u=u, widths=widths, spans=spans, theta=theta,
                         outer=outer, bottom=bottom, thickness=thickness,
                         outer_from="rv_epi" if right.has_outer else f"grown by {wall_thickness:g} mm",
                         residuals=residuals)


def _angular_window(local, where, lines):
    """The crescent's angular range (t1, t2), t1 < t2, radians: the complement of the widest gap
    between the contour points' angles about the axis."""
    t = np.sort(np.arctan2(local[:, 1], local[:, 0]))
    gaps = np.diff(np.concatenate([t, [t[0] + 2 * np.pi]]))
    j = int(np.argmax(gaps))
    if gaps[j] < np.radians(60.0):
        raise InputError(f"{where}, line {lines[0]}: the rv_endo contour surrounds the long axis; it must be "
                         f"the crescent beside the left ventricle (check the contour labels)")
    t1 = t[(j + 1) % len(t)]
    t2 = t1 + 2 * np.pi - gaps[j]
    return float(t1), float(t2)


def _ray_reach(xy, angles, *, nearest=False):
    """Farthest (or nearest) distance (A,) from the axis at which rays at ``angles`` cross a
    closed polygon (n, 2); 0 where a ray misses it."""
    p = xy
    q = np.roll(xy, -1, axis=0)
    e = q - p
    d = np.column_stack([np.cos(angles), np.sin(angles)])  # (A, 2)
    cross = lambda a, b: a[..., 0] * b[..., 1] - a[..., 1] * b[..., 0]  # noqa: E731
    denom = cross(d[:, None, :], e[None, :, :])                         # (A, n)
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = cross(p, e)[None, :] / denom
        # where along the edge the ray meets it: p + s e = rho d
        s = cross(p[None, :, :], d[:, None, :]) / denom
    hit = (np.abs(denom) > 1e-12) & (s >= 0) & (s <= 1) & (rho > 0)
    if nearest:
        near = np.where(hit, rho, np.inf).min(axis=1)
        return np.where(np.isfinite(near), near, 0.0)
    return np.where(hit, rho, 0.0).max(axis=1)


def _septal_gap(local, lv, z, tt):
    """Largest distance (mm) of the contour's near side (the nearest crossing of each ray, away
    from the insertions) from the left epicardium: the septal side of rv_endo should run on it."""
    inner = tt[len(tt) // 10: -len(tt) // 10]
    near = _ray_reach(local[:, :2], inner, nearest=True)
    r_epi = epi_point(lv, np.full_like(inner, z), inner)[1]
    return float(np.abs(near - r_epi).max())


def _outer_from_contour(local, lv, z, theta, where):
    """Outer width (T,) from an rv_epi contour: ray reach minus the left epicardial radius."""
    t1, t2 = _angular_window(local, where, [0])
    reach = _ray_reach(local[:, :2], theta)
    r_epi = epi_point(lv, np.full_like(theta, z), theta)[1]
    rel = np.mod(theta - t1, 2 * np.pi)
    inside = rel <= (t2 - t1)
    return np.where(inside, np.clip(reach - r_epi, 0.0, None), 0.0)


def _outer_by_growth(lv, z, tt, w, theta, thickness):
    """Outer width (T,) of the free-wall curve dilated by ``thickness`` mm (disc of that radius
    swept along the curve), measured radially from the left epicardium."""
    r_epi_c = epi_point(lv, np.full_like(tt, z), tt)[1]
    c = (r_epi_c + w)[:, None] * np.column_stack([np.cos(tt), np.sin(tt)])  # (P, 2) curve points
    d = np.column_stack([np.cos(theta), np.sin(theta)])                     # (T, 2)
    dc = d @ c.T                                                             # (T, P)
    disc = dc ** 2 - np.einsum("ij,ij->i", c, c)[None, :] + thickness ** 2
    far = np.where(disc >= 0, dc + np.sqrt(np.clip(disc, 0, None)), 0.0).max(axis=1)
    r_epi = epi_point(lv, np.full_like(theta, z), theta)[1]
    return np.clip(far - r_epi, 0.0, None)


def _on_full_circle(span, u, w, theta):
    """Cavity width of one slice (given over u) sampled at full-circle angles theta."""
    t1, t2 = span
    rel = (np.mod(theta - t1, 2 * np.pi)) / (t2 - t1)
    return np.where(rel < 1.0, np.interp(np.clip(rel, 0, 1), u, w), 0.0)


def _unwrap_spans(spans):
    """Shift whole turns so every slice's (t1, t2) lies near the first one's (PCHIP-ready)."""
    out = spans.copy()
    ref = 0.5 * (out[0, 0] + out[0, 1])
    for i in range(len(out)):
        mid = 0.5 * (out[i, 0] + out[i, 1])
        out[i] += 2 * np.pi * np.round((ref - mid) / (2 * np.pi))
    return out


def _cavity_end(stack: Stack, heights: np.ndarray, widths: np.ndarray | None = None) -> float:
    """Local height where the right cavity closes, below its most apical slice.

    The cavity's apex is taken as a half-ellipse in the long-axis section (an ellipsoidal cap,
    the usual model of a ventricle's apex): the largest widths w1, w2 of the two most apical
    slices, at heights z1 > z2, fix ``w^2 = A (d^2 - (z - z0)^2)`` about the base plane
    (z0 = 0), so the end lies at depth ``d = sqrt((w1^2 z2^2 - w2^2 z1^2) / (w1^2 - w2^2))``.
    It is kept between a quarter of the way to the next slice below and that slice (which shows
    no right cavity); with one slice, or widths that do not fall toward the apex, the end is
    half-way to the next slice (half the slice spacing when there is none).
    """
    last = float(heights[0])
    below = [-sl.height for sl in stack.slices if -sl.height < last - 1e-6]
    if below:
        gap = last - max(below)
    else:
        all_z = np.sort([-sl.height for sl in stack.slices])
        gap = float(np.median(np.diff(all_z))) if len(all_z) > 1 else 8.0
    half_way = last - 0.5 * gap
    if widths is None or len(heights) < 2:
        return half_way
    w2, w1 = float(widths[0].max()), float(widths[1].max())   # most apical first
    z2, z1 = -last, -float(heights[1])                         # depths below the base, z2 > z1
    if not (w1 > w2 > 0.0):
        return half_way
    d2 = (w1 ** 2 * z2 ** 2 - w2 ** 2 * z1 ** 2) / (w1 ** 2 - w2 ** 2)
    depth = float(np.sqrt(max(d2, 0.0)))
    return -float(np.clip(depth, z2 + 0.25 * gap, z2 + gap))
