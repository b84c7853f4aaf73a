"""Right-ventricular contours from a segmentation label map, for the biventricular route.

The left ventricle's contours come from :func:`fibers.masks.extract` exactly as on the
left-ventricular route; this module adds, on every slice the left ventricle counts, the two
right-ventricular contours the biventricular route reads from a contours file:

- ``rv_endo``: the outline of the right cavity (label ``rv``). Cavity-labelled voxels outside
  the left epicardium that touch it (a segmentation that spilled the left cavity's label into
  the right one) are counted as right cavity, not thrown away; holes in it are filled.
- ``rv_epi``: the outline of the right cavity together with the right free wall (label
  ``rv_wall``). Along the septum the right cavity meets the left wall (the septum is left
  ventricular wall, as the AHA segments count it), so there the outline runs on the left
  epicardium, as the biventricular route expects. On a slice where the ``rv_wall`` label
  covers less than half of the cavity's free rim, ``rv_epi`` is left out and the free wall is
  grown by ``[geometry] rv_wall_thickness`` there (a warning names the slices).

Both are outlined like the left contours (:func:`fibers.masks.outline`: light smoothing,
marching squares at level 0.5) and placed in the plane of the slice's voxel centres; on each
slice only the piece of right cavity that touches the left epicardium is kept.

The route (:func:`right_wanted`): both ventricles when the case sets ``ventricles = "biv"``, or
by default when ``[input.labels] rv_wall`` is given (the map's RV cavity label is then required);
without ``rv_wall`` a map stays on the left-ventricular route (its RV label gives only the
insertion points), so left-ventricular builds of today are unchanged. ``ventricles = "biv"``
without ``rv_wall`` reads the RV label as the cavity and grows the free wall.
"""

from __future__ import annotations

import warnings

import numpy as np
from scipy import ndimage

from fibers import masks
from fibers.errors import InputError
from fibers.types import RawContours

_CROSS = ndimage.generate_binary_structure(2, 1)
_FULL = ndimage.generate_binary_structure(2, 2)
#: A right cavity smaller than this on a slice (voxels) is not outlined (the tip of its apex).
MIN_CAVITY_VOXELS = 6
#: Share of the right cavity's free rim the ``rv_wall`` label must cover for ``rv_epi``.
MIN_WALL_COVER = 0.5
#: Voxels of right cavity dropped on a slice before a warning names it.
MIN_REPORTED = 4


def right_wanted(ventricles: str | None, values: masks.LabelValues, source: str) -> bool:
    """Whether a label map goes on the biventricular route (see the module docstring).

    Raises
    ------
    InputError
        ``ventricles = "biv"`` with ``rv = 0`` (no RV cavity label).
    """
    if ventricles == "lv":
        if values.rv_wall is not None:
            warnings.warn(f"{source}: [geometry] ventricles = \"lv\": the right ventricle (rv = {values.rv}, "
                          f"rv_wall = {values.rv_wall}) gives only the insertion points", stacklevel=3)
        return False
    wanted = ventricles == "biv" or values.rv_wall is not None
    if wanted and values.rv is None:
        why = "[geometry] ventricles = \"biv\"" if ventricles == "biv" else f"[input.labels] rv_wall = {values.rv_wall}"
        raise InputError(f"{source}: {why} asks for both ventricles but [input.labels] rv = 0; set rv to the "
                         "right-ventricular cavity's label value, or ventricles = \"lv\"")
    return wanted


def right_contours(labels: np.ndarray, affine: np.ndarray, values: masks.LabelValues, left: RawContours,
                   *, source: str = "labelmap") -> RawContours:
    """``rv_endo`` (and ``rv_epi``) rows on the slices of the left contours.

    Parameters
    ----------
    labels : ndarray (I, J, K) int
        The label volume ``left`` was extracted from.
    affine : ndarray (4, 4), mm
        Voxel index to world mm.
    values : LabelValues
        ``rv`` is the right cavity, ``rv_wall`` (or None) its free wall.
    left : RawContours
        The left contours from :func:`fibers.masks.extract` (slice ids are slice indices).
    source : str
        File name, for messages.

    Returns
    -------
    RawContours
        Right-ventricular rows only; points (K, 3) world mm; ``slice_id`` and ``line`` the slice
        index, as for the left contours.

    Raises
    ------
    InputError
        A label missing from the map, no right cavity on any counted slice, a right cavity that
        does not touch the left epicardium.
    """
    labels = np.asarray(labels)
    _check_present(labels, values, source)
    axis = masks.slice_axis(affine)
    order = [a for a in range(3) if a != axis] + [axis]
    lab = np.transpose(labels, order)                   # (U, V, S): slices last
    cols = np.asarray(affine, float)[:3, :3][:, order]
    origin = np.asarray(affine, float)[:3, 3]
    to_index = np.linalg.inv(cols)

    counted = [int(k) for k in np.unique(left.slice_id[left.structure == "epi"])]
    _warn_outside(lab, values, counted, source)
    rows, dropped, no_wall, adopted = [], {}, [], {}
    for k in counted:
        epi = left.points[(left.structure == "epi") & (left.slice_id == k)]
        uv = ((epi - origin) @ to_index.T)[:, :2]
        lv = _polygon_mask(uv, lab.shape[:2])
        cavity, lost = _right_cavity(lab[:, :, k], lv, values, k, source)
        if lost >= MIN_REPORTED:
            dropped[k] = lost
        if cavity is None:
            continue
        spilled = int((cavity & (lab[:, :, k] == values.cavity)).sum())
        if spilled >= MIN_REPORTED:
            adopted[k] = spilled
        found = {"rv_endo": masks.outline(cavity)}
        if values.rv_wall is not None:
            body, covered = _right_body(lab[:, :, k], lv, cavity, values.rv_wall)
            if covered >= MIN_WALL_COVER:
                found["rv_epi"] = masks.outline(body)
            else:
                no_wall.append(k)
        for name, outline_uv in found.items():
            if outline_uv is None:
                continue
            idx = np.column_stack([outline_uv, np.full(len(outline_uv), float(k))])
            rows.append((name, k, idx @ cols.T + origin))
    if not rows:
        raise InputError(f"{source}: the right-ventricular cavity label (rv = {values.rv}) lies on no slice the "
                         f"left ventricle counts (slices {counted[0]}-{counted[-1]}); check [input.labels] rv, or "
                         "set [geometry] ventricles = \"lv\"")
    _warn_repairs(dropped, no_wall, values, source)
    if adopted:
        warnings.warn(f"{source}: counted {sum(adopted.values())} voxel(s) labelled as left cavity (cavity = "
                      f"{values.cavity}) outside the left epicardium as right cavity, on slice(s) "
                      f"{', '.join(map(str, sorted(adopted)))}", stacklevel=2)
    structure = np.concatenate([np.full(len(p), name) for name, _, p in rows])
    slice_id = np.concatenate([np.full(len(p), k, np.int64) for _, k, p in rows])
    return RawContours(structure=structure, slice_id=slice_id, points=np.concatenate([p for *_, p in rows]),
                       line=slice_id.copy(), source=source)


def with_right(left: RawContours, right: RawContours) -> RawContours:
    """The left contours with the right-ventricular rows appended (one contours table)."""
    return RawContours(structure=np.concatenate([left.structure, right.structure]),
                       slice_id=np.concatenate([left.slice_id, right.slice_id]),
                       points=np.concatenate([left.points, right.points]),
                       line=np.concatenate([left.line, right.line]), source=left.source,
                       slice_thickness=left.slice_thickness)


# -- checks ------------------------------------------------------------------------------------------

def _check_present(labels: np.ndarray, values: masks.LabelValues, source: str) -> None:
    present = np.unique(labels)
    shown = ", ".join(str(int(v)) for v in present[:12]) + (", ..." if len(present) > 12 else "")
    if values.rv not in present:
        raise InputError(f"{source}: right-ventricular cavity label rv = {values.rv} not in the image (values "
                         f"present: {shown}); set [input.labels] rv to its value, or [geometry] ventricles = \"lv\"")
    if values.rv_wall is not None and values.rv_wall not in present:
        raise InputError(f"{source}: right-ventricular wall label rv_wall = {values.rv_wall} not in the image "
                         f"(values present: {shown}); set [input.labels] rv_wall to its value, or rv_wall = 0 to "
                         "grow the free wall by [geometry] rv_wall_thickness")


def _warn_outside(lab: np.ndarray, values: masks.LabelValues, counted: list[int], source: str) -> None:
    """Warn about right-ventricular labels on slices the left ventricle does not count."""
    codes = [v for v in (values.rv, values.rv_wall) if v is not None]
    has = np.flatnonzero(np.isin(lab, codes).any(axis=(0, 1)))
    outside = sorted(set(int(k) for k in has) - set(counted))
    if outside:
        warnings.warn(f"{source}: right-ventricular labels on slice(s) {', '.join(map(str, outside))} are not used: "
                      "the left ventricle is not counted there (valve plane, atrium or beyond its apex)",
                      stacklevel=3)


def _warn_repairs(dropped: dict, no_wall: list, values: masks.LabelValues, source: str) -> None:
    if dropped:
        warnings.warn(f"{source}: removed {sum(dropped.values())} right-cavity voxel(s) not connected to the right "
                      f"ventricle beside the left one, on slice(s) {', '.join(map(str, sorted(dropped)))}",
                      stacklevel=3)
    if no_wall:
        warnings.warn(f"{source}: the right wall label (rv_wall = {values.rv_wall}) covers less than half of the "
                      f"right cavity's free rim on slice(s) {', '.join(map(str, no_wall))}; the free wall there is "
                      "grown by [geometry] rv_wall_thickness", stacklevel=3)


# -- masks of one slice --------------------------------------------------------------------------------

def _polygon_mask(uv: np.ndarray, shape: tuple) -> np.ndarray:
    """Voxels (U, V) bool whose centres lie inside the closed polygon uv (n, 2), voxel indices."""
    from matplotlib.path import Path

    u, v = np.meshgrid(np.arange(shape[0]), np.arange(shape[1]), indexing="ij")
    inside = Path(uv).contains_points(np.column_stack([u.ravel(), v.ravel()]))
    return inside.reshape(shape)


def _right_cavity(lab: np.ndarray, lv: np.ndarray, values: masks.LabelValues, k: int, source: str):
    """The right cavity's mask (U, V) on one slice (None when there is none) and the voxels dropped.

    Right-cavity voxels and left-cavity-labelled voxels outside the left epicardium ``lv``; only
    the largest piece touching the left epicardium is kept, with its holes filled.

    Raises
    ------
    InputError
        Right cavity on the slice, but no piece of it touches the left epicardium.
    """
    candidate = ((lab == values.rv) | (lab == values.cavity)) & ~lv
    if candidate.sum() < MIN_CAVITY_VOXELS or not (lab == values.rv).any():
        return None, 0
    pieces, n = ndimage.label(candidate, structure=_FULL)
    near_lv = ndimage.binary_dilation(lv, _CROSS, iterations=2)
    touching = np.unique(pieces[near_lv & (pieces > 0)])
    touching = touching[touching > 0]
    sizes = np.bincount(pieces.ravel(), minlength=n + 1)
    if not touching.size:
        raise InputError(f"{source}, slice {k}: the right-ventricular cavity (rv = {values.rv}) does not touch the "
                         f"left ventricle's epicardium; the septum must be labelled as left-ventricular wall "
                         f"(wall = {values.wall}) right up to the right cavity: check the segmentation or "
                         f"[input.labels]")
    best = int(touching[np.argmax(sizes[touching])])
    cavity = pieces == best
    lost = int(candidate.sum() - cavity.sum())
    if cavity.sum() < MIN_CAVITY_VOXELS:
        return None, lost
    cavity = ndimage.binary_fill_holes(cavity, structure=_CROSS) & ~lv
    return cavity, lost


def _right_body(lab: np.ndarray, lv: np.ndarray, cavity: np.ndarray, rv_wall: int):
    """The right ventricle (cavity and free wall) on one slice, and the share of the cavity's
    free rim (the ring of voxels around it outside the left epicardium) that is wall."""
    wall = (lab == rv_wall) & ~lv
    pieces, _ = ndimage.label(cavity | wall, structure=_FULL)
    mine = np.unique(pieces[cavity])
    body = np.isin(pieces, mine[mine > 0])
    body = ndimage.binary_fill_holes(body, structure=_CROSS) & ~lv
    rim = ndimage.binary_dilation(cavity, _CROSS) & ~cavity & ~ndimage.binary_dilation(lv, _CROSS)
    covered = float((rim & wall).sum() / max(1, rim.sum()))
    return body, covered
