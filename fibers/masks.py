"""Contours and landmarks from a segmentation label volume (issue #6).

A label map gives, per voxel, background, the left-ventricular cavity, the left-ventricular wall
and optionally the right ventricle. This stage turns it into the same plain data the contours
file gives (``RawContours``), plus the right-ventricular insertion points (``Landmarks``) and the
image's field of view (``Box``), so the rest of the pipeline does not know where its contours
came from.

Choices made here
-----------------
- **Slice axis.** The short-axis slices are stacked along the image axis with the largest voxel
  spacing, when it is larger than the other two by more than 1 %; for (near-)isotropic voxels
  the third image axis is taken, as scanners store a stack.
- **Contours.** Per slice, the cavity contour is the boundary of the cavity label and the
  epicardial contour the outer boundary of cavity + wall. Each mask is reduced to its largest
  connected component with its holes filled (papillary muscles labelled as wall inside the
  cavity count as cavity), smoothed lightly (Gaussian, sigma 0.4 voxel: it takes the corners
  off the staircase without shrinking convex outlines measurably) and outlined by marching
  squares (``skimage.measure.find_contours``) at level 0.5, which puts the line on the voxel
  edges with sub-voxel precision. The longest closed line is kept and mapped to world mm through
  the affine; the contour lies in the plane of the slice's voxel centres. Slices at an end of
  the stack whose cavity touches the background (a basal slice through the valve plane) are
  dropped with a warning, with any wall fragments beyond them.
- **Long-axis check.** The long axis is estimated as the principal axis of the cavity + wall
  voxels (in mm); when that axis is well defined (largest second moment at least 1.3 times the
  next) and more than ``MAX_AXIS_ANGLE_DEG`` from the slice normal, the image is not a short-axis
  stack and is refused.
- **Right-ventricular insertion points.** On the basal two thirds of the slices that show a
  cavity, the RV voxels that touch the left-ventricular wall (4-neighbours in the slice) form an
  arc about the cavity centroid. Angles are measured counter-clockwise about the apex-to-base
  direction (the base is the end of the stack whose epicardial cross-section is larger). Going
  counter-clockwise, the arc starts at the inferior insertion and ends at the anterior one: from
  the anterior insertion through the septum to the inferior one is counter-clockwise as seen from
  the apex, the usual anatomy, as in ``fibers.demo.ventricle.SyntheticLV.septum_angles``. The per-slice ends are
  combined by their circular median and placed on the epicardial contour of the most basal slice
  with RV contact.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from fibers.config import Box, Landmarks
from fibers.errors import InputError
from fibers.types import RawContours

#: Largest accepted angle (degrees) between the estimated long axis and the slice normal.
MAX_AXIS_ANGLE_DEG = 40.0
#: Gaussian smoothing of the binary masks before marching squares, in voxels.
SMOOTH_SIGMA = 0.4
# The principal axis only says something when the body is elongated along it.
_MIN_ELONGATION = 1.3
_CROSS = ndimage.generate_binary_structure(2, 1)   # 4-neighbours
_FULL = ndimage.generate_binary_structure(2, 2)    # 8-neighbours


@dataclass(frozen=True)
class LabelValues:
    """Which label value means what in a segmentation volume.

    Attributes
    ----------
    cavity : int
        Left-ventricular blood pool. Default 1.
    wall : int
        Left-ventricular myocardium. Default 2.
    rv : int or None
        Right ventricle (cavity, wall or both), used only for the insertion points. Default 3;
        None when the map has no right ventricle (give the landmarks in the case file instead).
    """

    cavity: int = 1
    wall: int = 2
    rv: int | None = 3

    def __post_init__(self):
        used = [v for v in (self.cavity, self.wall, self.rv) if v is not None]
        if len(set(used)) != len(used):
            raise InputError(f"[input.labels] cavity = {self.cavity}, wall = {self.wall}, "
                             f"rv = {self.rv} must be different values; fix the case file")
        if 0 in used:
            raise InputError("[input.labels] 0 is the background; give the structures "
                             "non-zero label values")


def contours_from_labelmap(labels: np.ndarray, affine: np.ndarray,
                           values: LabelValues = LabelValues(), *,
                           source: str = "labelmap") -> tuple[RawContours, Landmarks, Box]:
    """Endocardial and epicardial contours, RV insertion points and field of view.

    Parameters
    ----------
    labels : ndarray (I, J, K) int
        Label per voxel (see ``fibers.io.labelmap.read_labelmap``).
    affine : ndarray (4, 4), mm
        Voxel index to world mm.
    values : LabelValues
        Label values of cavity, wall and right ventricle.
    source : str
        File name, for messages and ``RawContours.source``.

    Returns
    -------
    contours : RawContours
        ``endo`` and ``epi`` rows, points (K, 3) in world mm; ``slice_id`` and ``line`` are the
        slice index along the slice axis.
    landmarks : Landmarks
        RV insertion points (``source="labelmap"``), or empty (``source="none"``) when the map
        has no RV label or the RV does not touch the wall.
    box : Box
        The image's field of view: corner at the outer voxel edge of voxel (0, 0, 0), edges the
        affine's columns times the shape.

    Raises
    ------
    InputError
        Cavity or wall label missing (the message lists the values present), an empty slice
        between labelled ones, a cavity slice without wall or open to the background, a long
        axis far from the slice axis.
    """
    labels = np.asarray(labels)
    affine = np.asarray(affine, float)
    if labels.ndim != 3 or affine.shape != (4, 4):
        raise ValueError(f"labels must be 3-D and affine 4x4, got {labels.shape}, {affine.shape}")
    box = field_of_view(labels.shape, affine)
    present = np.unique(labels)
    missing = [f"{n} = {v}" for n, v in (("cavity", values.cavity), ("wall", values.wall))
               if v not in present]
    if missing:
        raise InputError(f"{source}: label {', '.join(missing)} not in the image (values present: "
                         f"{', '.join(str(int(v)) for v in present)}); set [input.labels] to "
                         "the values this segmentation uses")
    rv_value = values.rv
    if rv_value is not None and rv_value not in present:
        warnings.warn(f"{source}: no right-ventricle label (rv = {rv_value}); RV insertion points "
                      "not found, give them in [landmarks]", stacklevel=2)
        rv_value = None

    axis = slice_axis(affine)
    order = [a for a in range(3) if a != axis] + [axis]
    lab = np.transpose(labels, order)               # (U, V, S): slices last
    cols = affine[:3, :3][:, order]                  # world mm per index step along u, v, s
    origin = affine[:3, 3]
    normal = np.cross(cols[:, 0], cols[:, 1])
    normal /= np.linalg.norm(normal)
    if normal @ cols[:, 2] < 0:                      # along increasing slice index
        normal = -normal

    cavity_all = lab == values.cavity
    lv_all = cavity_all | (lab == values.wall)
    # In its slice the cavity is ringed by wall; if the "cavity" label touches the background
    # more than the "wall" label does, the two values are most likely swapped.
    in_plane = np.zeros((3, 3, 3), bool)
    in_plane[:, :, 1] = _CROSS
    background = lab == 0
    contact = {name: int((ndimage.binary_dilation(lab == v, in_plane) & background).sum())
               for name, v in (("cavity", values.cavity), ("wall", values.wall))}
    if contact["cavity"] > contact["wall"]:
        raise InputError(
            f"{source}: the cavity label ({values.cavity}) borders the background more than the "
            f"wall label ({values.wall}) does; are the cavity and wall values swapped? Set "
            f"[input.labels] cavity and wall to the values this segmentation uses")
    _check_long_axis(lv_all, cols, origin, normal, axis, source)

    has_lv = lv_all.any(axis=(0, 1))
    kept = np.flatnonzero(has_lv)
    first, last = int(kept[0]), int(kept[-1])
    gaps = np.flatnonzero(~has_lv[first:last + 1]) + first
    if gaps.size:
        raise InputError(f"{source}: slice {gaps[0]} has no cavity or wall label but lies between "
                         f"labelled slices {first} and {last}; label it or crop the stack")

    def to_world(uv: np.ndarray, k: int) -> np.ndarray:
        idx = np.column_stack([uv, np.full(len(uv), float(k))])
        return idx @ cols.T + origin

    slices = []   # (k, cavity mask or None, epi mask, endo contour uv or None, epi contour uv)
    open_slices = []
    for k in range(first, last + 1):
        cav = cavity_all[:, :, k]
        wall = lab[:, :, k] == values.wall
        if not wall.any():
            raise InputError(f"{source}: slice {k} shows cavity but no wall label; label the wall "
                             "or remove the slice's cavity")
        epi = _clean(cav | wall, f"{source}: slice {k}, cavity + wall")
        cav = _clean(cav & epi, f"{source}: slice {k}, cavity") if (cav & epi).any() else None
        if cav is not None and (ndimage.binary_dilation(cav, _CROSS) & ~epi).any():
            open_slices.append(k)    # decided below: dropped at the ends, refused in between
            continue
        epi_uv = _outline(epi)
        if epi_uv is None:
            warnings.warn(f"{source}: slice {k}: wall too small to outline "
                          f"({int(epi.sum())} voxels); slice dropped", stacklevel=2)
            continue
        endo_uv = _outline(cav) if cav is not None else None
        slices.append((k, cav, epi, endo_uv, epi_uv))
    if open_slices:
        # A basal slice that cuts through the valve plane shows a wall open to the background.
        # Such slices, and the wall fragments beyond them, are dropped at the ends of the
        # stack; between slices with a closed cavity they are refused.
        closed = [s[0] for s in slices if s[1] is not None]
        inner = [k for k in open_slices if closed and closed[0] < k < closed[-1]]
        if inner or not closed:
            k = (inner or open_slices)[0]
            raise InputError(f"{source}: slice {k}: the cavity touches the background (the wall "
                             "does not close around it); close the wall or drop the slice")
        above = [k for k in open_slices if k > closed[-1]]
        below = [k for k in open_slices if k < closed[0]]
        lo = max(below) if below else -1
        hi = min(above) if above else lab.shape[2]
        dropped = sorted(set(open_slices) | {s[0] for s in slices if not lo < s[0] < hi})
        slices = [s for s in slices if lo < s[0] < hi]
        warnings.warn(f"{source}: slice(s) {', '.join(map(str, dropped))} at the end of the stack "
                      "dropped: the cavity touches the background there (wall not closed)",
                      stacklevel=2)

    if not slices:
        raise InputError(f"{source}: no slice has a wall large enough to outline; check the "
                         "label values in [input.labels]")
    structure, slice_id, points = [], [], []
    for k, _, _, endo_uv, epi_uv in slices:
        for name, uv in (("endo", endo_uv), ("epi", epi_uv)):
            if uv is None:
                continue
            structure += [name] * len(uv)
            slice_id.append(np.full(len(uv), k))
            points.append(to_world(uv, k))
    slice_id = np.concatenate(slice_id).astype(np.int64)
    contours = RawContours(structure=np.array(structure), slice_id=slice_id,
                           points=np.concatenate(points), line=slice_id.copy(), source=source)

    landmarks = Landmarks()
    if rv_value is not None:
        landmarks = _rv_insertions(lab == rv_value, slices, cols, origin, normal, to_world,
                                   source)
    return contours, landmarks, box


# -- geometry of the image ------------------------------------------------------------------------
def slice_axis(affine: np.ndarray) -> int:
    """Image axis (0, 1 or 2) along which the short-axis slices are stacked.

    The axis with the largest voxel spacing when it exceeds the other two by more than 1 %,
    else axis 2.
    """
    spacing = np.linalg.norm(np.asarray(affine, float)[:3, :3], axis=0)
    big = int(np.argmax(spacing))
    others = np.delete(spacing, big)
    return big if spacing[big] > 1.01 * others.max() else 2


def field_of_view(shape, affine: np.ndarray) -> Box:
    """The image's field of view as a world-frame ``Box`` (outer voxel edges), mm."""
    affine = np.asarray(affine, float)
    corner = affine[:3, :3] @ np.full(3, -0.5) + affine[:3, 3]
    edges = (affine[:3, :3] * np.asarray(shape[:3], float)).T
    return Box(corner=corner, edges=edges)


def _check_long_axis(lv: np.ndarray, cols, origin, normal, axis: int, source: str) -> None:
    """Refuse a stack whose slices are far from short-axis planes."""
    pts = np.argwhere(lv) @ cols.T + origin
    if len(pts) < 10:
        return
    eigval, eigvec = np.linalg.eigh(np.cov(pts.T))
    if eigval[2] < _MIN_ELONGATION * eigval[1]:
        return     # not elongated enough to tell where its axis points
    angle = np.degrees(np.arccos(min(1.0, abs(eigvec[:, 2] @ normal))))
    if angle > MAX_AXIS_ANGLE_DEG:
        raise InputError(f"{source}: the ventricle's long axis is {angle:.0f} deg from the slice "
                         f"normal (image axis {axis}; at most {MAX_AXIS_ANGLE_DEG:.0f} deg); give "
                         "a short-axis stack or resample the segmentation to one")


# -- per-slice masks and outlines -----------------------------------------------------------------
def _clean(mask: np.ndarray, where: str) -> np.ndarray:
    """Largest 8-connected component with holes filled; warns when anything changed."""
    comp, n = ndimage.label(mask, structure=_FULL)
    if n > 1:
        sizes = np.bincount(comp.ravel())[1:]
        keep = comp == (int(np.argmax(sizes)) + 1)
    else:
        keep = mask
    filled = ndimage.binary_fill_holes(keep, structure=_CROSS)
    if n > 1 or (filled != keep).any():
        warnings.warn(f"{where}: removed {max(n - 1, 0)} island(s) and filled "
                      f"{int((filled & ~keep).sum())} hole voxel(s)", stacklevel=3)
    return filled


def _outline(mask: np.ndarray) -> np.ndarray | None:
    """Sub-voxel outline (n, 2) of a binary mask in (u, v) voxel indices; None if too small.

    The mask is padded so every line closes, smoothed lightly and cut at level 0.5 by marching
    squares; the longest closed line is returned without its repeated end point.
    """
    from skimage import measure

    pad = 2
    smooth = ndimage.gaussian_filter(np.pad(mask.astype(float), pad), SMOOTH_SIGMA,
                                     mode="constant")
    lines = [c for c in measure.find_contours(smooth, 0.5) if len(c) > 3
             and np.allclose(c[0], c[-1])]
    if not lines:
        return None
    best = max(lines, key=lambda c: np.linalg.norm(np.diff(c, axis=0), axis=1).sum())
    return best[:-1] - pad


# -- right-ventricular insertion points -----------------------------------------------------------
def _rv_insertions(rv: np.ndarray, slices, cols, origin, normal, to_world,
                   source: str) -> Landmarks:
    """Anterior and inferior RV insertion points from where the RV label touches the wall."""
    with_cavity = [s for s in slices if s[1] is not None]
    if not with_cavity:
        return Landmarks()
    # The base is the end of the stack with the larger epicardial cross-section.
    if slices[0][2].sum() >= slices[-1][2].sum():
        ordered, up = with_cavity, -normal      # slice index grows toward the apex
    else:
        ordered, up = with_cavity[::-1], normal
    e1 = cols[:, 0] - (cols[:, 0] @ up) * up
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(up, e1)

    def angles(points, centre):
        d = points - centre
        return np.arctan2(d @ e2, d @ e1)

    n_basal_mid = int(np.ceil(2 * len(ordered) / 3))
    starts, ends, used = [], [], []
    for k, cav, epi, _, epi_uv in ordered[:n_basal_mid]:
        touch = rv[:, :, k] & ndimage.binary_dilation(epi, _CROSS) & ~epi
        if touch.sum() < 3:
            continue
        centre = to_world(np.argwhere(cav).mean(axis=0)[None, :], k)[0]
        a = np.sort(angles(to_world(np.argwhere(touch).astype(float), k), centre))
        gaps = np.diff(np.concatenate([a, [a[0] + 2 * np.pi]]))
        j = int(np.argmax(gaps))
        if gaps[j] < np.radians(30.0):
            continue      # contact all the way round: no insertion points on this slice
        starts.append(a[(j + 1) % len(a)])
        ends.append(a[j])
        used.append((k, centre, epi_uv))
    if not used:
        warnings.warn(f"{source}: the right ventricle does not touch the wall on basal or mid "
                      "slices; RV insertion points not found, give them in [landmarks]",
                      stacklevel=3)
        return Landmarks()

    k, centre, epi_uv = used[0]                   # the most basal slice with contact
    epi_pts = to_world(epi_uv, k)
    epi_ang = angles(epi_pts, centre)
    found = []
    for a in (_circular_median(np.array(starts)), _circular_median(np.array(ends))):
        found.append(epi_pts[int(np.argmin(np.abs(np.angle(np.exp(1j * (epi_ang - a))))))])
    return Landmarks(rv_insertion_anterior=found[1], rv_insertion_inferior=found[0], source="labelmap")


def _circular_median(a: np.ndarray) -> float:
    """Median of angles (radians) taken about their circular mean."""
    mean = np.angle(np.exp(1j * a).mean())
    return float(mean + np.median(np.angle(np.exp(1j * (a - mean)))))
