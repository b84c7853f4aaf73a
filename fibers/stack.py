"""Stage 1: check a short-axis contour stack, order it from base to apex and align its slices.

The long axis is taken as the stack normal (the mean normal of the slice planes): short-axis
slices are planned normal to the ventricle's long axis, and the normal is not disturbed by the
in-plane breath-hold shifts that corrupt slice centroids. Its sense (apex to base) is fixed by
which end of the stack has the larger contours and the endocardial contours.

Breath-hold shifts are removed by fitting a centreline through the epicardial centroids (a
straight line, or a quadratic in height for six slices or more, as ``centreline`` says) with a
robust loss (``scipy.optimize.least_squares``, ``soft_l1`` with a 1 mm scale), so one slice
moved by a bad breath-hold does not bend the line, and moving each slice in its plane onto it.
A slice's ``shift`` is the vector added to its input points (centreline minus centroid).

Contours from other tools: dense contours are resampled by arc length to at most
``MAX_CONTOUR_POINTS`` points first, so every check stays fast; tiny loops (a few points doubling
back, enclosing less than ``MAX_LOOP_AREA_MM2``) are cut out with a warning, a real
self-crossing is refused. One missing slice, or one missing endocardial contour, between slices
that have them is bridged by the surface fit with a warning; two or more in a row are refused.
"""

from __future__ import annotations

import logging

import numpy as np

from fibers.errors import InputError
from fibers.types import LongAxis, RawContours, SliceContours, Stack

log = logging.getLogger(__name__)

MIN_POINTS = 6               # fewer points cannot describe a closed contour
MAX_TILT_DEG = 10.0          # "parallel within a few degrees", with room for noise
MAX_OUT_OF_PLANE_MM = 2.0    # RMS distance of a slice's points from its plane
MIN_SLICE_GAP_MM = 1.0       # closer than this, two slices are the same plane
MIN_ENDO_SLICES = 2
MIN_EXTENT_MM = 20.0
EPI_RADIUS_MM = (5.0, 120.0)  # plausible epicardial radius in mm; outside, the units are wrong
MAX_CONTOUR_POINTS = 1000    # denser contours are resampled by arc length (0.5 mm or coarser)
RESAMPLE_STEP_MM = 0.5
MAX_LOOP_AREA_MM2 = 1.0      # loops smaller than this are a tracing tool's slip, cut out
MAX_SHIFT_MM = 5.0           # a breath-hold shift larger than this is reported
ROBUST_SCALE_MM = 1.0        # soft_l1 scale of the centreline fit: shifts beyond it count less


def _refuse_odd_unit_slice(groups, typical: float, src: str) -> None:
    """Name the one slice given in other units (cm, m) among slices in mm.

    Such a slice is both far smaller (or larger) than the rest and away from the stack, its
    position scaled with it; an apical slice is small too, but sits on the stack.
    """
    epi = {k: p for (s, k), (p, _lines) in groups.items() if s == "epi"}
    centre = np.median([p.mean(0) for p in epi.values()], axis=0)
    for (s, k), (p, lines) in groups.items():
        if s != "epi":
            continue
        radius = float(np.linalg.norm(p - p.mean(0), axis=1).mean())
        away = float(np.linalg.norm(p.mean(0) - centre)) > 2.0 * typical
        if away and (radius < typical / 5 or radius > typical * 5):
            unit = ("centimetres (multiply by 10)" if 0.05 * typical < radius < typical / 5 else
                    "metres (multiply by 1000)" if radius <= 0.05 * typical else "not millimetres")
            raise InputError(
                f"{src}, line {lines[0]}, slice {k}: the epicardial radius is {radius:.3g}, against "
                f"{typical:.3g} mm for the other slices, and the slice lies away from them; it looks "
                f"like {unit}: give x, y, z in mm")


def check_stack(contours: RawContours, *, align_slices: bool = True,
                centreline: str = "straight", base: str = "slice") -> Stack:
    """Check, order and align a contour stack.

    Parameters
    ----------
    contours : RawContours
        Points as read, any slice order, either winding.
    align_slices : bool
        Remove in-plane breath-hold shifts by fitting a centreline.
    centreline : {"straight", "quadratic"}
        Model of the centreline (a quadratic needs six slices; fewer fall back to straight).
    base : {"slice", "slab"}
        Base plane at the most basal contour's plane, or at the upper face of its slab, half a
        slice thickness above it (``contours.slice_thickness``, or the median slice spacing
        when that is 0).

    Returns
    -------
    Stack
        Slices ordered from base to apex, contours counter-clockwise about the long axis
        (apex to base), with the shift applied to each slice.

    Raises
    ------
    InputError
        On too few points, self-crossing or non-planar contours, duplicate or tilted slices, an
        endocardium outside its epicardium, a stack too short, or coordinates not in mm.
    """
    src = contours.source
    notes = []
    groups = _group(contours)
    ids = sorted({k for _, k in groups})

    # units: an LV's epicardial radius is tens of millimetres
    epi_radii = [np.linalg.norm(p - p.mean(0), axis=1).mean() for (s, _), (p, _l) in groups.items() if s == "epi"]
    if not epi_radii:
        raise InputError(f"{src}: no epicardial contour found; every slice needs an 'epi' contour")
    typical = float(np.median(epi_radii))
    if typical < EPI_RADIUS_MM[0] or typical > EPI_RADIUS_MM[1]:
        guess = ("metres (multiply by 1000)" if typical < 0.5 else "centimetres (multiply by 10)"
                 if typical < EPI_RADIUS_MM[0] else "micrometres or voxels")
        raise InputError(
            f"{src}: the typical epicardial radius is {typical:.3g}, not the 15-50 mm of a left "
            f"ventricle; the coordinates look like {guess}: give x, y, z in mm")
    _refuse_odd_unit_slice(groups, typical, src)

    for k in ids:
        if ("epi", k) not in groups:
            line = groups[("endo", k)][1][0]
            raise InputError(f"{src}, line {line}, slice {k}: an endocardial contour but no epicardial one; add the 'epi' contour or drop the slice")

    # slice planes and the stack normal
    normals, centres = {}, {}
    for k in ids:
        pts = np.concatenate([groups[(s, k)][0] for s in ("endo", "epi") if (s, k) in groups])
        centre = pts.mean(0)
        _, sv, vt = np.linalg.svd(pts - centre, full_matrices=False)
        off = sv[2] / np.sqrt(len(pts))
        if off > MAX_OUT_OF_PLANE_MM:
            height = (pts - centre) @ vt[2]
            far = np.abs(height) > 0.5 * np.abs(height).max()
            if far.mean() > 0.8 and (height > 0).mean() > 0.2 and (height < 0).mean() > 0.2:
                gap = height[height > 0].mean() - height[height < 0].mean()
                raise InputError(
                    f"{src}, slice {k}: the points lie in two planes {gap:.1f} mm apart; one slice "
                    f"id was given to two slices: give each slice its own id")
            raise InputError(f"{src}, slice {k}: points lie {off:.1f} mm (RMS) off a plane; each slice must be one short-axis plane")
        normals[k], centres[k] = vt[2], centre
    ref = normals[ids[0]]
    for k in ids:
        if normals[k] @ ref < 0:
            normals[k] = -normals[k]
    if len(ids) < 2:
        raise InputError(f"{src}: only {len(ids)} slice; a wall needs at least {MIN_ENDO_SLICES} slices with both contours")
    axis = np.mean([normals[k] for k in ids], axis=0)
    axis /= np.linalg.norm(axis)
    for _ in range(2):  # re-estimate without the worst slice's pull
        tilts = {k: np.degrees(np.arccos(np.clip(abs(normals[k] @ axis), -1, 1))) for k in ids}
        good = [k for k in ids if tilts[k] <= MAX_TILT_DEG] or ids
        axis = np.mean([normals[k] for k in good], axis=0)
        axis /= np.linalg.norm(axis)
    tilts = {k: np.degrees(np.arccos(np.clip(abs(normals[k] @ axis), -1, 1))) for k in ids}
    worst = max(ids, key=lambda k: tilts[k])
    if tilts[worst] > MAX_TILT_DEG:
        raise InputError(
            f"{src}, slice {worst}: the slice plane is tilted {tilts[worst]:.0f} degrees from the "
            f"rest of the stack; all slices must be parallel short-axis planes (within {MAX_TILT_DEG:.0f} degrees)")

    height = {k: float(centres[k] @ axis) for k in ids}
    order = sorted(ids, key=lambda k: height[k])
    gaps = np.diff([height[k] for k in order])
    if gaps.size and gaps.min() < MIN_SLICE_GAP_MM:
        j = int(np.argmin(gaps))
        a, b = order[j], order[j + 1]
        raise InputError(
            f"{src}, slices {a} and {b}: the two slices lie {gaps[j]:.2f} mm apart, in the same "
            f"plane; remove the duplicate slice")

    # sense of the axis: base is the end with endocardial contours and larger epicardia
    has_endo = np.array([("endo", k) in groups for k in order])
    in_plane = _plane_frame(axis)
    epi_area = np.array([abs(_signed_area(groups[("epi", k)][0] @ in_plane.T)) for k in order])
    n3 = max(1, len(order) // 3)
    score = (epi_area[-n3:].mean() - epi_area[:n3].mean()) / max(epi_area.mean(), 1e-9)
    score += has_endo[-n3:].mean() - has_endo[:n3].mean()
    if score < 0:
        axis = -axis
        order = order[::-1]
        has_endo = has_endo[::-1]
    # now `order` runs apex -> base; flip to base -> apex
    order = order[::-1]
    has_endo = has_endo[::-1]

    n_endo = int(has_endo.sum())
    if n_endo < MIN_ENDO_SLICES:
        raise InputError(f"{src}: only {n_endo} slice(s) show the endocardium; a wall needs at least {MIN_ENDO_SLICES}")
    last_endo = int(np.nonzero(has_endo)[0].max())
    notes += _check_endo_gaps(has_endo[: last_endo + 1], order, src)
    heights_bta = np.array([float(centres[k] @ axis) for k in order])
    spacing = _check_slice_gaps(heights_bta, order, src, notes)
    # the base plane: the most basal slice, or the upper face of its slab
    thickness = float(contours.slice_thickness) or spacing
    base_h = float(centres[order[0]] @ axis) + (0.5 * thickness if base == "slab" else 0.0)
    extent = base_h - float(centres[order[-1]] @ axis)
    if extent < MIN_EXTENT_MM:
        raise InputError(f"{src}: the stack spans only {extent:.1f} mm from base to apex; a wall needs at least {MIN_EXTENT_MM:.0f} mm")

    # per-slice contour checks, in the plane of the stack (axis now points apex to base)
    plane = _plane_frame(axis)
    e1 = plane[0]
    slices_2d = {}
    looped = []
    for k in order:
        entry = {}
        for s in ("epi", "endo"):
            if (s, k) not in groups:
                continue
            pts, lines = groups[(s, k)]
            xy = pts @ plane.T
            area = _signed_area(xy)
            if abs(area) < 1.0 or abs(area) < 0.02 * np.ptp(xy, axis=0).max() ** 2:
                raise InputError(
                    f"{src}, line {lines[0]}, slice {k}: the {s} contour encloses almost no area "
                    f"({abs(area):.2g} mm^2); its points lie on a line or fold back on themselves")
            if area < 0:
                pts, xy, lines = pts[::-1], xy[::-1], lines[::-1]
            keep, loops, cross = _untangle(xy)
            if cross is not None:
                raise InputError(
                    f"{src}, line {lines[cross]}, slice {k}: the {s}cardial contour crosses itself "
                    f"near this point; redraw the contour as one simple closed curve")
            if loops:
                looped.append(f"{s} {k}")
                pts, xy, lines = pts[keep], xy[keep], lines[keep]
            entry[s] = (pts, xy, lines)
        if "endo" in entry:
            inside = _inside_polygon(entry["endo"][1], entry["epi"][1])
            if not inside.all():
                outside_epi = _inside_polygon(entry["epi"][1], entry["endo"][1]).mean() > 0.5
                j = int(np.argmin(inside))
                if outside_epi:
                    raise InputError(
                        f"{src}, slice {k}: the endocardial contour encloses the epicardial one; "
                        f"are the labels 'endo' and 'epi' swapped?")
                raise InputError(
                    f"{src}, line {entry['endo'][2][j]}, slice {k}: the endocardial contour crosses "
                    f"or leaves its epicardial contour; the endocardium must lie inside the epicardium")
        slices_2d[k] = entry

    if looped:
        notes.append(f"{src}: tiny loops (under {MAX_LOOP_AREA_MM2:g} mm^2) cut out of the "
                     f"contours of {', '.join(looped)} (structure and slice)")

    # robust centreline through the epicardial centroids
    hs = np.array([float(centres[k] @ axis) for k in order])
    cents = np.array([_centroid2d(slices_2d[k]["epi"][1]) for k in order])
    z = hs - hs.mean()
    degree = 2 if centreline == "quadratic" and len(order) >= 6 else 1
    line = fit_centreline(z, cents, degree)
    shifts2d = (line - cents) if align_slices else np.zeros_like(cents)
    base_xy = fit_centreline(z, cents, 1, at=z[:1])[0] if align_slices else cents[0]
    base_centre = base_xy @ plane + base_h * axis

    out = []
    for j, k in enumerate(order):
        shift = shifts2d[j] @ plane
        entry = slices_2d[k]
        epi = entry["epi"][0] + shift
        endo = entry["endo"][0] + shift if "endo" in entry else None
        out.append(SliceContours(slice_id=int(k), height=float(base_h - hs[j]), epi=epi, endo=endo,
                                 shift=shift))
    if align_slices:
        mags = np.linalg.norm(shifts2d, axis=1)
        log.debug("aligned %d slices: breath-hold shifts up to %.1f mm (mean %.1f mm)", len(order), mags.max(), mags.mean())
    mags = np.linalg.norm(shifts2d, axis=1)
    moved = [f"{k} ({m:.1f} mm)" for k, m in zip(order, mags) if m > MAX_SHIFT_MM]
    if moved:
        notes.append(f"{src}: slice(s) {', '.join(moved)} moved more than {MAX_SHIFT_MM:g} mm in "
                     "plane to the centreline (breath-hold shift); check they belong to one "
                     "breath-hold series")
    return Stack(slices=tuple(out), axis=LongAxis(base_centre=base_centre, direction=axis, reference=e1),
                 source=src, warnings=tuple(notes))


def _group(contours: RawContours) -> dict:
    """(structure, slice) -> (points (n, 3), line numbers (n,)), closing duplicate removed."""
    src = contours.source
    key = np.char.add(np.char.add(contours.structure.astype(str), ":"), contours.slice_id.astype(str))
    _, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    groups = {}
    for g, f in enumerate(first):
        rows = np.nonzero(inverse == g)[0]
        pts, lines = contours.points[rows], contours.line[rows]
        scale = np.ptp(pts, axis=0).max() if len(pts) > 1 else 0.0
        if len(pts) > 1 and np.linalg.norm(pts[0] - pts[-1]) <= 1e-6 * max(scale, 1e-12):
            pts, lines = pts[:-1], lines[:-1]
        step = np.linalg.norm(np.diff(pts, axis=0), axis=1)
        keep = np.concatenate([[True], step > 1e-9 * max(scale, 1e-12)])  # drop repeated points
        pts, lines = pts[keep], lines[keep]
        s, k = str(contours.structure[f]), int(contours.slice_id[f])
        distinct = len(np.unique(np.round(pts / max(scale, 1e-12) * 1e6), axis=0))
        if distinct < 0.9 * len(pts):
            raise InputError(
                f"{src}, line {contours.line[rows[0]]}, slice {k}: the {s} contour repeats "
                f"{len(pts) - distinct} of its {len(pts)} points; was it listed twice? Give each "
                f"contour once")
        if len(pts) < MIN_POINTS:
            raise InputError(
                f"{src}, line {contours.line[rows[0]]}, slice {k}: the {s} contour has only "
                f"{len(pts)} distinct points; a closed contour needs at least {MIN_POINTS}")
        if len(pts) > MAX_CONTOUR_POINTS:
            pts, lines = _resample(pts, lines)
        groups[(s, k)] = (pts, lines)
    return groups


def _perpendicular(axis: np.ndarray) -> np.ndarray:
    """A unit vector normal to ``axis``, from the world axis least aligned with it."""
    e = np.eye(3)[int(np.argmin(np.abs(axis)))]
    v = e - (e @ axis) * axis
    return v / np.linalg.norm(v)


def _signed_area(xy: np.ndarray) -> float:
    x, y = xy[:, 0], xy[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _plane_frame(axis: np.ndarray) -> np.ndarray:
    """Rows e1, e2 (2, 3) of a frame in the plane normal to ``axis``, right-handed about it."""
    e1 = _perpendicular(axis)
    return np.stack([e1, np.cross(axis, e1)])


def _centroid2d(xy: np.ndarray) -> np.ndarray:
    """Area centroid of a simple polygon (shoelace formula)."""
    x, y = xy[:, 0], xy[:, 1]
    xn, yn = np.roll(x, -1), np.roll(y, -1)
    c = x * yn - xn * y
    a = c.sum() / 2
    return np.array([((x + xn) * c).sum(), ((y + yn) * c).sum()]) / (6 * a)


def fit_centreline(z: np.ndarray, centroids: np.ndarray, degree: int, *,
                   at: np.ndarray | None = None) -> np.ndarray:
    """Robust polynomial centreline through slice centroids.

    Parameters
    ----------
    z : ndarray (S,), mm
        Slice heights (centred).
    centroids : ndarray (S, 2), mm
        In-plane centroids.
    degree : int
        1 (straight) or 2 (quadratic).
    at : ndarray (T,), mm, optional
        Heights to evaluate at; default ``z``.

    Returns
    -------
    ndarray (T, 2), mm
        The centreline's in-plane position at each height. Fitted by
        ``scipy.optimize.least_squares`` with the ``soft_l1`` loss (scale ``ROBUST_SCALE_MM``),
        started from ordinary least squares, so one shifted slice barely pulls the line.
    """
    from scipy.optimize import least_squares

    z = np.asarray(z, float)
    at = z if at is None else np.asarray(at, float)
    degree = min(degree, len(z) - 1)
    V = np.polynomial.polynomial.polyvander(z, degree)
    start = np.linalg.lstsq(V, centroids, rcond=None)[0]          # (degree + 1, 2)

    def residual(c):
        return (V @ c.reshape(degree + 1, 2) - centroids).ravel()
    fit = least_squares(residual, start.ravel(), loss="soft_l1", f_scale=ROBUST_SCALE_MM)
    return np.polynomial.polynomial.polyvander(at, degree) @ fit.x.reshape(degree + 1, 2)


def _check_endo_gaps(has_endo: np.ndarray, order: list, src: str) -> list[str]:
    """One slice without endocardium between slices with it is bridged; two in a row refused."""
    missing = np.flatnonzero(~has_endo)
    if not missing.size:
        return []
    runs = np.split(missing, np.flatnonzero(np.diff(missing) > 1) + 1)
    for run in runs:
        if len(run) >= 2:
            raise InputError(
                f"{src}, slices {order[run[0]]} to {order[run[-1]]}: no endocardial contour on "
                f"{len(run)} slices in a row, but slices nearer the apex have one; one missing "
                "contour is bridged, two or more in a row are not: add the contours (only the "
                "most apical slices may lack it)")
    ids = ", ".join(str(order[j]) for j in missing)
    return [f"{src}: slice(s) {ids} have no endocardial contour between slices that do; the "
            "endocardium there is bridged by the surface fit"]


def _check_slice_gaps(heights: np.ndarray, order: list, src: str, notes: list) -> float:
    """Median slice spacing (mm); a gap of about two spacings (one slice missing) is bridged
    with a note, a gap of three or more spacings refused."""
    gaps = np.abs(np.diff(heights))
    if not gaps.size:
        return 0.0
    spacing = float(np.median(gaps))
    ratio = gaps / max(spacing, 1e-9)
    worst = int(np.argmax(ratio))
    if ratio[worst] >= 2.5:
        raise InputError(
            f"{src}, slices {order[worst]} and {order[worst + 1]}: {gaps[worst]:.1f} mm apart, "
            f"{ratio[worst]:.1f} times the usual {spacing:.1f} mm; two or more slices are missing "
            "there: one missing slice is bridged, two in a row are not")
    one = np.flatnonzero(ratio >= 1.5)
    if one.size:
        pairs = ", ".join(f"{order[j]}-{order[j + 1]}" for j in one)
        notes.append(f"{src}: one slice is missing between slices {pairs} ({spacing:.1f} mm "
                     "spacing elsewhere); the gap is bridged by the surface fit")
    return spacing


def _resample(pts: np.ndarray, lines: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A dense closed contour resampled evenly by arc length to at most ``MAX_CONTOUR_POINTS``
    points, ``RESAMPLE_STEP_MM`` apart or more; each new point keeps the line number of the
    input point it falls after."""
    closed = np.vstack([pts, pts[:1]])
    step = np.linalg.norm(np.diff(closed, axis=0), axis=1)
    arc = np.concatenate([[0.0], np.cumsum(step)])
    n = int(min(MAX_CONTOUR_POINTS, max(MIN_POINTS * 4, arc[-1] / RESAMPLE_STEP_MM)))
    at = np.linspace(0.0, arc[-1], n, endpoint=False)
    out = np.column_stack([np.interp(at, arc, closed[:, c]) for c in range(3)])
    where = np.clip(np.searchsorted(arc, at, side="right") - 1, 0, len(pts) - 1)
    return out, lines[where]


def _crossings(xy: np.ndarray) -> np.ndarray:
    """Pairs (i, j), i < j, of non-adjacent edges of a closed polygon that cross, (P, 2).

    Every pair is tested (orientation signs) in blocks of rows; contours reach this after
    resampling to at most ``MAX_CONTOUR_POINTS`` points, so the work stays bounded.
    """
    p, q = xy, np.roll(xy, -1, axis=0)
    n = len(xy)
    idx = np.arange(n)

    def orient(a, b, c):
        return (b[..., 0] - a[..., 0]) * (c[..., 1] - a[..., 1]) - (b[..., 1] - a[..., 1]) * (c[..., 0] - a[..., 0])

    pj, qj = p[None, :, :], q[None, :, :]
    found = []
    for start in range(0, n, 256):
        rows = idx[start:start + 256]
        pi, qi = p[rows, None, :], q[rows, None, :]
        hit = (orient(pi, qi, pj) * orient(pi, qi, qj) < 0) & (orient(pj, qj, pi) * orient(pj, qj, qi) < 0)
        gap = rows[:, None] - idx[None, :]
        hit &= (gap < -1) & (gap != -(n - 1))  # j > i + 1; neighbouring edges share a point
        r, c = np.nonzero(hit)
        found.append(np.column_stack([rows[r], c]))
    return np.concatenate(found) if found else np.zeros((0, 2), int)


def _untangle(xy: np.ndarray) -> tuple[np.ndarray, int, int | None]:
    """Cut tiny loops out of a closed polygon (n, 2), mm.

    Returns the indices of the points kept, the number of loops cut, and the index of a point
    near a real self-crossing (both sides of it enclose ``MAX_LOOP_AREA_MM2`` or more), or None.
    """
    keep = np.arange(len(xy))
    cut = 0
    for _ in range(64):
        pairs = _crossings(xy[keep])
        if not len(pairs):
            return keep, cut, None
        i, j = (int(v) for v in pairs[0])
        inner = np.arange(i + 1, j + 1)             # points between the two crossing edges
        a_in = abs(_signed_area(xy[keep[inner]]))
        a_out = abs(_signed_area(xy[keep[np.setdiff1d(np.arange(len(keep)), inner)]]))
        if min(a_in, a_out) >= MAX_LOOP_AREA_MM2 or len(keep) - len(inner) < MIN_POINTS:
            return keep, cut, int(keep[i])
        drop = inner if a_in <= a_out else np.setdiff1d(np.arange(len(keep)), inner)
        keep = np.delete(keep, drop)
        cut += 1
    return keep, cut, int(keep[0])


def _inside_polygon(points: np.ndarray, polygon: np.ndarray) -> np.ndarray:
    """Crossing-number test of points (K, 2) against a closed polygon (n, 2), in blocks."""
    a, b = polygon[None, :, :], np.roll(polygon, -1, axis=0)[None, :, :]
    out = np.zeros(len(points), bool)
    for start in range(0, len(points), 512):
        px, py = points[start:start + 512, 0:1], points[start:start + 512, 1:2]
        straddle = (a[..., 1] > py) != (b[..., 1] > py)
        with np.errstate(divide="ignore", invalid="ignore"):
            xcross = a[..., 0] + (py - a[..., 1]) * (b[..., 0] - a[..., 0]) / (b[..., 1] - a[..., 1])
        out[start:start + 512] = (np.sum(straddle & (px < xcross), axis=1) % 2) == 1
    return out
