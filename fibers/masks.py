"""Contours and landmarks from a segmentation label volume.

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
- **Clean-up.** Before outlining, the map is cleaned as automatic segmentations need, with one
  warning line per kind of repair naming its slices: small 3-D bodies of cavity or wall label
  away from the heart are removed (islands; cavity pieces touching the RV label are stray RV
  voxels); per slice, single-voxel boundary noise is voted away (3 x 3 majority, only where the
  outline is noisy), in-slice islands dropped, cavity outside the wall's ring taken out, holes
  in the wall filled, and wall inside the cavity (papillary muscles, free or attached up to
  ``PAPILLARY_MM`` wide, by a closing) counted as cavity (common practice in CMR volumetry).
- **The 50 % rule.** A slice counts when at least half of its cavity's rim (the 4-neighbour
  ring around the cavity) is wall; from the base, slices before the first counted one are
  dropped (valve plane, atrium). A counted slice with an open arc (the outflow tract) has both
  outlines bridged across the arc by the shape of the next slice toward the apex, scaled to
  meet the wall at both ends. Every slice gets a row (``Extraction.slices``). One empty slice
  between labelled ones is bridged by the surface fit; two in a row are refused.
- **Contours.** Each cleaned mask is smoothed lightly (Gaussian, sigma 0.4 voxel: it takes the
  corners off the staircase without shrinking convex outlines measurably) and outlined by
  marching squares (``skimage.measure.find_contours``) at level 0.5, which puts the line on the
  voxel edges with sub-voxel precision. The longest closed line is kept and mapped to world mm
  through the affine; the contour lies in the plane of the slice's voxel centres.
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
- **Orientation.** ``orientation_warnings`` checks the heart against normal anatomy in NIfTI's
  right-anterior-superior world frame.
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
        Right-ventricular cavity (or the whole right ventricle when there is no ``rv_wall``).
        On the left-ventricular route it gives only the insertion points. Default 3; None when
        the map has no right ventricle (give the landmarks in the case file instead).
    rv_wall : int or None
        Right-ventricular free wall, read for both ventricles only (``fibers.biv.labels``).
        Default None: the map has no such label.
    """

    cavity: int = 1
    wall: int = 2
    rv: int | None = 3
    rv_wall: int | None = None

    def __post_init__(self):
        used = [v for v in (self.cavity, self.wall, self.rv, self.rv_wall) if v is not None]
        if len(set(used)) != len(used):
            extra = "" if self.rv_wall is None else f", rv_wall = {self.rv_wall}"
            raise InputError(f"[input.labels] cavity = {self.cavity}, wall = {self.wall}, "
                             f"rv = {self.rv}{extra} must be different values; fix the case file")
        if 0 in used:
            raise InputError("[input.labels] 0 is the background; give the structures "
                             "non-zero label values")


@dataclass(frozen=True)
class Extraction:
    """What a label map gives the pipeline, beyond the contours.

    Attributes
    ----------
    contours : RawContours
    landmarks : Landmarks
    box : Box
        The field of view of the array given (see ``field_of_view``).
    slices : tuple of dict
        One entry per slice that holds a label, base first: ``id`` (slice index), ``wall_coverage``
        (0-1, share of the cavity's rim that is wall; None without cavity), ``counted`` and
        ``reason``.
    apex_direction : ndarray (3,)
        Unit vector from the base end of the stack toward the apex, world frame.
    septal_direction : ndarray (3,) or None
        Unit vector normal to the long axis from the cavity centre toward the RV label.
    """

    contours: RawContours
    landmarks: Landmarks
    box: Box
    slices: tuple
    apex_direction: np.ndarray
    septal_direction: np.ndarray | None


def contours_from_labelmap(labels: np.ndarray, affine: np.ndarray,
                           values: LabelValues = LabelValues(), *,
                           source: str = "labelmap") -> tuple[RawContours, Landmarks, Box]:
    """Endocardial and epicardial contours, RV insertion points and field of view.

    The short form of ``extract``: see there for the parameters and refusals.
    """
    found = extract(labels, affine, values, source=source)
    return found.contours, found.landmarks, found.box


def extract(labels: np.ndarray, affine: np.ndarray, values: LabelValues = LabelValues(), *,
            source: str = "labelmap") -> Extraction:
    """Clean a label map, apply the 50 % basal rule and outline every counted slice.

    Parameters
    ----------
    labels : ndarray (I, J, K) int
        Label per voxel (see ``fibers.io.labelmap.load_labelmap``).
    affine : ndarray (4, 4), mm
        Voxel index to world mm.
    values : LabelValues
        Label values of cavity, wall and right ventricle.
    source : str
        File name, for messages and ``RawContours.source``.

    Returns
    -------
    Extraction
        ``contours`` has ``endo`` and ``epi`` rows, points (K, 3) in world mm; ``slice_id`` and
        ``line`` are the slice index along the slice axis.

    Raises
    ------
    InputError
        Cavity or wall label missing (the message lists the values present), two empty slices in
        a row between labelled ones, a cavity slice without wall, a slice nearer the apex than a
        counted one whose cavity is less than half ringed by wall, a long axis far from the slice
        axis.
    """
    labels = np.asarray(labels)
    affine = np.asarray(affine, float)
    if labels.ndim != 3 or affine.shape != (4, 4):
        raise ValueError(f"labels must be 3-D and affine 4x4, got {labels.shape}, {affine.shape}")
    box = field_of_view(labels.shape, affine)
    rv_value = _check_values(labels, values, source)

    axis = slice_axis(affine)
    order = [a for a in range(3) if a != axis] + [axis]
    lab = np.transpose(labels, order)               # (U, V, S): slices last
    cols = affine[:3, :3][:, order]                  # world mm per index step along u, v, s
    origin = affine[:3, 3]
    normal = np.cross(cols[:, 0], cols[:, 1])
    normal /= np.linalg.norm(normal)
    if normal @ cols[:, 2] < 0:                      # along increasing slice index
        normal = -normal
    _check_swapped(lab, values, source)

    repairs = _Repairs(source)
    rv_all = (lab == rv_value) if rv_value is not None else None
    cavity_all, wall_all = _remove_islands(lab == values.cavity, lab == values.wall, rv_all,
                                           repairs)
    _check_long_axis(cavity_all | wall_all, cols, origin, normal, axis, source)

    ks = _labelled_range(cavity_all | wall_all, source)
    pixel_mm = float(np.sqrt(np.linalg.norm(cols[:, 0]) * np.linalg.norm(cols[:, 1])))
    masks = {k: _clean_slice(cavity_all[:, :, k], wall_all[:, :, k], k, pixel_mm, repairs, source)
             for k in ks if (cavity_all[:, :, k] | wall_all[:, :, k]).any()}
    repairs.report()

    base_first = _base_end_first(ks, masks)
    rows, kept = _basal_rule(ks if base_first else ks[::-1], masks, source)

    def to_world(uv: np.ndarray, k: int) -> np.ndarray:
        idx = np.column_stack([uv, np.full(len(uv), float(k))])
        return idx @ cols.T + origin

    slices = _outline_slices(kept, masks, rows, source)
    if not slices:
        raise InputError(f"{source}: no slice has a wall large enough to outline; check the "
                         "label values in [input.labels]")
    contours = _as_raw_contours(slices, to_world, source)
    apex = normal if base_first else -normal          # slice index grows toward the apex?
    landmarks, septal = Landmarks(), None
    if rv_value is not None:
        by_index = sorted(slices, key=lambda e: e[0])      # as _rv_insertions expects
        landmarks = _rv_insertions(rv_all, by_index, cols, origin, normal, to_world, source)
        septal = _septal_direction(rv_all, slices, cols, -apex, to_world)
    return Extraction(contours=contours, landmarks=landmarks, box=box, slices=tuple(rows),
                      apex_direction=apex, septal_direction=septal)


# -- checks of the label values ----------------------------------------------------------------
def _check_values(labels: np.ndarray, values: LabelValues, source: str) -> int | None:
    """Refuse missing cavity or wall labels; the RV value to use (None when absent)."""
    present = np.unique(labels)
    missing = [f"{n} = {v}" for n, v in (("cavity", values.cavity), ("wall", values.wall))
               if v not in present]
    if missing:
        shown = ", ".join(str(int(v)) for v in present[:12]) + (", ..." if len(present) > 12 else "")
        raise InputError(f"{source}: label {', '.join(missing)} not in the image (values present: "
                         f"{shown}); set [input.labels] to the values this segmentation uses")
    if values.rv is not None and values.rv not in present:
        warnings.warn(f"{source}: no right-ventricle label (rv = {values.rv}); RV insertion points "
                      "not found, give them in [landmarks]", stacklevel=3)
        return None
    return values.rv


def _check_swapped(lab: np.ndarray, values: LabelValues, source: str) -> None:
    """In its slice the cavity is ringed by wall; if the "cavity" label touches the background
    more than the "wall" label does, the two values are most likely swapped."""
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


def _labelled_range(lv: np.ndarray, source: str) -> list[int]:
    """Slice indices from the first to the last labelled one; one empty slice between is
    skipped (bridged by the surface fit), two in a row are refused."""
    has_lv = lv.any(axis=(0, 1))
    kept = np.flatnonzero(has_lv)
    first, last = int(kept[0]), int(kept[-1])
    empty = np.flatnonzero(~has_lv[first:last + 1]) + first
    runs = np.split(empty, np.flatnonzero(np.diff(empty) > 1) + 1) if empty.size else []
    for run in runs:
        if len(run) >= 2:
            raise InputError(f"{source}: slices {run[0]} to {run[-1]} have no cavity or wall label "
                             f"but lie between labelled slices {first} and {last}; one missing "
                             "slice is bridged, two or more in a row are not: label them or crop "
                             "the stack")
    if empty.size:
        warnings.warn(f"{source}: slice(s) {', '.join(map(str, empty))} hold no label between "
                      "labelled slices; the gap is bridged by the surface fit", stacklevel=3)
    return list(range(first, last + 1))


# -- clean-up of automatic segmentations --------------------------------------------------------
class _Repairs:
    """Collects the slices of each kind of repair, then warns once per kind."""

    TEXT = {
        "islands": "removed label islands away from the heart",
        "stray": "took stray cavity voxels outside the left ventricle (in the RV) out of the cavity",
        "holes": "filled holes in the wall",
        "papillary": "counted papillary muscles (wall inside the cavity) as cavity",
        "noise": "smoothed boundary noise (voxels flipped by a 3 x 3 majority vote)",
    }

    def __init__(self, source: str):
        self.source = source
        self.found: dict[str, dict[int, int]] = {}

    def add(self, kind: str, k: int, voxels: int) -> None:
        if voxels > 0:
            self.found.setdefault(kind, {})
            self.found[kind][k] = self.found[kind].get(k, 0) + int(voxels)

    def report(self) -> None:
        for kind, text in self.TEXT.items():
            per = self.found.get(kind)
            if per:
                ks = sorted(per)
                warnings.warn(f"{self.source}: {text}: {sum(per.values())} voxel(s) on slice(s) "
                              f"{', '.join(map(str, ks))}", stacklevel=4)


def _remove_islands(cavity: np.ndarray, wall: np.ndarray, rv: np.ndarray | None,
                    repairs: _Repairs):
    """Keep the largest 3-D connected body of cavity + wall (26-neighbours); the rest are
    islands away from the heart (a segmentation's false positives elsewhere in the image), or
    stray cavity voxels when they are cavity touching the RV label."""
    body = cavity | wall
    # one empty slice does not split the heart (it is bridged later)
    bridged = body.copy()
    bridged[:, :, 1:-1] |= body[:, :, :-2] & body[:, :, 2:]
    comp, n = ndimage.label(bridged, structure=np.ones((3, 3, 3), bool))
    if n <= 1:
        return cavity, wall
    sizes = np.bincount(comp.ravel())[1:]
    # islands are small; a large second body (a stack split by missing slices) is kept, to be
    # refused with its gap named
    keep = np.isin(comp, np.flatnonzero(sizes >= ISLAND_FRACTION * sizes.max()) + 1) & body
    dropped = body & ~keep
    stray = np.zeros_like(dropped)
    if rv is not None:
        near_rv = ndimage.binary_dilation(rv, np.ones((3, 3, 1), bool))
        pieces, _ = ndimage.label(dropped & cavity, structure=np.ones((3, 3, 3), bool))
        touching = np.unique(pieces[near_rv & (pieces > 0)])
        stray = np.isin(pieces, touching[touching > 0])
    for k in np.flatnonzero(dropped.any(axis=(0, 1))):
        repairs.add("stray", int(k), int(stray[:, :, k].sum()))
        repairs.add("islands", int(k), int((dropped & ~stray)[:, :, k].sum()))
    return cavity & keep, wall & keep


def _clean_slice(cav: np.ndarray, wall: np.ndarray, k: int, pixel_mm: float,
                 repairs: _Repairs, source: str) -> dict:
    """Cleaned cavity and epicardial masks of one slice, its wall coverage and its rim.

    In this order: boundary noise is voted away when it is there; in-slice islands of cavity +
    wall go; cavity pieces outside the wall's ring are stray (an RV mislabelled as cavity) and
    go; holes in the wall are filled; wall inside the cavity (papillary muscles, free or
    attached, narrower than ``PAPILLARY_MM``) becomes cavity (common practice in CMR volumetry).
    """
    if not cav.any() and not wall.any():
        return {}
    if cav.any() and not wall.any():
        raise InputError(f"{source}: slice {k} shows cavity but no wall label; label the wall "
                         "or remove the slice's cavity")
    body = cav | wall
    if _noisy(body):
        # first: noise leaves specks an island count would take for islands
        voted = _majority(body)
        repairs.add("noise", k, int((voted != body).sum()))
        if voted.any():
            wall = (wall | (voted & ~cav)) & voted
            cav = cav & voted
            body = cav | wall
    kept = _largest(body)
    repairs.add("islands", k, int((body & ~kept).sum()))
    body = kept
    cav, wall = cav & body, wall & body
    if cav.any():
        main = _largest(cav)
        ring = ndimage.binary_fill_holes(wall | main, structure=_CROSS)
        stray = cav & ~main & ~ring
        repairs.add("stray", k, int(stray.sum()))
        cav = cav & ~stray
        body = body & ~stray
    epi = ndimage.binary_fill_holes(body, structure=_CROSS)
    repairs.add("holes", k, int((epi & ~body & ~_filled(cav)).sum()))
    if cav.any():
        cav = _take_papillary(cav, epi, body, pixel_mm, k, repairs)
    coverage = None
    if cav.any():
        rim = ndimage.binary_dilation(cav, _CROSS) & ~cav
        coverage = float((rim & epi).sum() / max(1, rim.sum()))
    return {"cav": cav if cav.any() else None, "epi": epi, "coverage": coverage,
            "rim_open": None if coverage is None else (ndimage.binary_dilation(cav, _CROSS) & ~cav & ~epi)}


def _take_papillary(cav: np.ndarray, epi: np.ndarray, body: np.ndarray, pixel_mm: float,
                    k: int, repairs: _Repairs) -> np.ndarray:
    """The cavity with the papillary muscles in it: wall enclosed by cavity (free muscles) and
    wall bays a closing with a disk of diameter ``PAPILLARY_MM`` fills (attached ones)."""
    free = _filled(cav) & epi
    radius = max(1, int(round(PAPILLARY_MM / 2 / pixel_mm)))
    pad = radius + 1
    closed = ndimage.binary_closing(np.pad(free, pad), _disk(radius))[pad:-pad, pad:-pad]
    attached = _largest(_filled(free | (closed & epi))) & epi
    if (attached & ~free).sum() < MIN_REPAIR_VOXELS:
        attached = free            # the staircase of the grid, not a muscle
    repairs.add("papillary", k, int((attached & ~cav & body).sum()))
    return _largest(attached)


#: A connected body smaller than this share of the largest is an island, not the heart.
ISLAND_FRACTION = 0.1
#: Papillary muscles narrower than this (mm) are taken into the cavity by a closing.
PAPILLARY_MM = 8.0
#: Fewer changed voxels than this in a slice are the staircase of the grid, not a repair.
MIN_REPAIR_VOXELS = 4


def _largest(mask: np.ndarray) -> np.ndarray:
    comp, n = ndimage.label(mask, structure=_FULL)
    if n <= 1:
        return mask
    sizes = np.bincount(comp.ravel())[1:]
    return comp == (int(np.argmax(sizes)) + 1)


def _filled(mask: np.ndarray) -> np.ndarray:
    return ndimage.binary_fill_holes(mask, structure=_CROSS)


def _disk(radius: int) -> np.ndarray:
    y, x = np.mgrid[-radius:radius + 1, -radius:radius + 1]
    return x * x + y * y <= radius * radius + radius


def _noisy(mask: np.ndarray) -> bool:
    """Whether a mask's outline carries single-voxel noise: a 3 x 3 majority vote changes more
    than a tenth of its boundary voxels (a clean digital outline changes by a few corners)."""
    if mask.sum() < 20:
        return False
    boundary = mask & ~ndimage.binary_erosion(mask, _CROSS)
    changed = (_majority(mask) != mask).sum()
    return changed > max(MIN_REPAIR_VOXELS, 0.1 * boundary.sum())


def _majority(mask: np.ndarray) -> np.ndarray:
    return ndimage.uniform_filter(mask.astype(float), size=3, mode="constant") > 0.5


# -- the 50 % basal rule --------------------------------------------------------------------------
def _base_end_first(ks: list[int], masks: dict) -> bool:
    """Whether the stack's first slice index lies at the base: the end with larger epicardial
    cross-sections and more cavity."""
    area = np.array([masks[k]["epi"].sum() if k in masks else 0 for k in ks], float)
    has_cav = np.array([k in masks and masks[k]["cav"] is not None for k in ks], float)
    n3 = max(1, len(ks) // 3)
    score = (area[:n3].mean() - area[-n3:].mean()) / max(area.mean(), 1e-9)
    score += has_cav[:n3].mean() - has_cav[-n3:].mean()
    return score >= 0


def _basal_rule(ordered: list[int], masks: dict, source: str):
    """Rows of the slice table (base first) and the counted slice indices.

    A slice counts when at least half of its cavity's rim is wall (the usual rule of CMR
    volumetry; SCMR post-processing guidelines, from memory); the slices basal to the first
    counted one (valve plane, atrium) are dropped. Nearer the apex than a counted slice, a
    cavity less than half ringed by wall is refused: it is not a ventricle.
    """
    rows, kept, seen = [], [], False
    for k in ordered:
        m = masks.get(k)
        if not m:
            rows.append(_row(k, None, False, "no label: bridged by the surface fit"))
            continue
        cov = m["coverage"]
        if not seen:
            if cov is None:
                rows.append(_row(k, None, False, "wall without cavity basal to the ventricle"))
                continue
            if cov < 0.5:
                rows.append(_row(k, cov, False, "wall rings less than half the cavity "
                                                "(valve plane or atrium)"))
                continue
            seen = True
        if cov is None:
            rows.append(_row(k, None, True, "apical: wall only"))
        elif cov < 0.5:
            raise InputError(f"{source}: slice {k}: only {100 * cov:.0f}% of the cavity's rim is "
                             "wall, but basal slices are counted; close the wall or crop the stack")
        elif cov < 1.0:
            rows.append(_row(k, cov, True, "wall gap bridged along the neighbouring slice's "
                                           "outline"))
        else:
            rows.append(_row(k, cov, True, "closed ring"))
        kept.append(k)
    if not kept:
        raise InputError(f"{source}: no slice has a cavity ringed at least half by wall; check "
                         "the label values in [input.labels]")
    dropped = [r["id"] for r in rows if not r["counted"] and "bridged" not in r["reason"]]
    if dropped:
        warnings.warn(f"{source}: slice(s) {', '.join(map(str, dropped))} at the base not counted: "
                      "less than half of the cavity's rim is wall there (the 50% rule)",
                      stacklevel=3)
    return rows, kept


def _row(k, coverage, counted, reason) -> dict:
    return {"id": int(k), "wall_coverage": None if coverage is None else round(float(coverage), 3),
            "counted": bool(counted), "reason": reason}


# -- outlines and gap bridges ----------------------------------------------------------------------
def _outline_slices(kept: list[int], masks: dict, rows: list, source: str) -> list:
    """(k, cavity mask, epi mask, endo uv, epi uv) per counted slice, apex first for bridging.

    A slice whose cavity rim is partly open (the outflow tract) has the open arcs of both
    outlines replaced by the outline of the nearest closed slice toward the apex, scaled to
    meet the kept arcs at both ends: the bridge follows the wall's own shape one slice down
    instead of a straight chord through the cavity.
    """
    out, below = [], None            # below: the last outlined slice nearer the apex
    for k in kept[::-1]:
        m = masks[k]
        epi_uv = outline(m["epi"])
        if epi_uv is None:
            warnings.warn(f"{source}: slice {k}: wall too small to outline "
                          f"({int(m['epi'].sum())} voxels); slice dropped", stacklevel=4)
            for r in rows:
                if r["id"] == k:
                    r.update(counted=False, reason="wall too small to outline")
            continue
        endo_uv = outline(m["cav"]) if m["cav"] is not None else None
        if m["cav"] is not None and m["coverage"] < 1.0 and endo_uv is not None:
            centre = np.argwhere(m["cav"]).mean(axis=0)
            gap = _angular_gap(np.argwhere(m["rim_open"]) - centre)
            endo_open = gap(endo_uv - centre)
            epi_open = gap(epi_uv - centre)
            ref = below if below is not None else None
            endo_uv = _bridge(endo_uv, endo_open, None if ref is None else ref[3])
            epi_uv = _bridge(epi_uv, epi_open, None if ref is None else ref[4])
        entry = (k, m["cav"], m["epi"], endo_uv, epi_uv)
        out.append(entry)
        if endo_uv is not None:
            below = entry
    return out[::-1]


def _angular_gap(offsets: np.ndarray, *, bin_deg: float = 2.0, widen_deg: float = 8.0):
    """Test (points -> bool) of whether directions fall in the angular sectors of ``offsets``
    (n, 2), each widened by ``widen_deg``: the sectors where the cavity's rim is open."""
    n_bins = int(round(360.0 / bin_deg))
    ang = np.degrees(np.arctan2(offsets[:, 1], offsets[:, 0])) % 360.0
    hit = np.zeros(n_bins, bool)
    hit[(ang / bin_deg).astype(int) % n_bins] = True
    reach = int(np.ceil(widen_deg / bin_deg))
    grown = hit.copy()
    for step in range(1, reach + 1):
        grown |= np.roll(hit, step) | np.roll(hit, -step)

    def inside(points: np.ndarray) -> np.ndarray:
        a = np.degrees(np.arctan2(points[:, 1], points[:, 0])) % 360.0
        return grown[(a / bin_deg).astype(int) % n_bins]
    return inside


def _bridge(uv: np.ndarray, open_: np.ndarray, ref: np.ndarray | None) -> np.ndarray:
    """Replace the open arcs of a closed outline (n, 2) by a smooth bridge.

    Radii about the kept arc's circle centre are interpolated over each gap as the reference
    outline's radius (``ref``, the next slice toward the apex) times a factor that runs
    linearly in angle between the kept ends' factors; without a reference, a low-order
    Fourier series of the kept arc in angle.
    """
    n = len(uv)
    open_ = np.asarray(open_, bool)
    if not open_.any() or open_.all() or open_.sum() > 0.7 * n:
        return uv
    keep = ~open_
    centre = _circle_centre(uv[keep])
    d = uv - centre
    theta = np.arctan2(d[:, 1], d[:, 0])
    radius = np.hypot(d[:, 0], d[:, 1])
    sense = 1.0 if _signed_area(uv) > 0 else -1.0
    ref_r = _radius_law(ref, theta[keep], radius[keep]) if ref is not None and len(ref) > 8 \
        else None
    if ref_r is None:
        ref_r = _fourier_law(theta[keep], radius[keep])
    out = uv.copy()
    # runs of open points, starting after a kept point
    start = int(np.flatnonzero(keep)[0])
    rolled = np.roll(np.arange(n), -start)
    is_open = open_[rolled]
    j = 0
    while j < n:
        if not is_open[j]:
            j += 1
            continue
        r0 = j
        while j < n and is_open[j]:
            j += 1
        a, b = rolled[r0 - 1], rolled[j % n]          # kept points on either side
        span = ((theta[b] - theta[a]) * sense) % (2 * np.pi)
        t = np.arange(1, j - r0 + 1) / (j - r0 + 1)
        ang = theta[a] + sense * span * t
        # the kept ends' scale factors, each averaged over three points against noise
        ends_a = rolled[(r0 - 1 - np.arange(3)) % n]
        ends_b = rolled[(j + np.arange(3)) % n]
        ends_a, ends_b = ends_a[keep[ends_a]], ends_b[keep[ends_b]]
        fa = float(np.mean(radius[ends_a] / ref_r(theta[ends_a])))
        fb = float(np.mean(radius[ends_b] / ref_r(theta[ends_b])))
        r = ref_r(ang) * (fa + (fb - fa) * t)
        out[rolled[r0:j]] = centre + np.column_stack([r * np.cos(ang), r * np.sin(ang)])
    return out


def _circle_centre(uv: np.ndarray) -> np.ndarray:
    """Centre of the least-squares circle through points (n, 2) (algebraic fit, Kasa 1976)."""
    A = np.column_stack([2 * uv, np.ones(len(uv))])
    rhs = (uv ** 2).sum(axis=1)
    sol = np.linalg.lstsq(A, rhs, rcond=None)[0]
    return sol[:2]


def _radius_law(ref: np.ndarray, theta_kept: np.ndarray, r_kept: np.ndarray):
    """Radius of the reference outline as a function of angle about its own circle centre."""
    c = _circle_centre(ref)
    d = ref - c
    th = np.arctan2(d[:, 1], d[:, 0])
    r = np.hypot(d[:, 0], d[:, 1])
    order = np.argsort(th)
    th, r = th[order], r[order]
    th = np.concatenate([th[-1:] - 2 * np.pi, th, th[:1] + 2 * np.pi])
    r = np.concatenate([r[-1:], r, r[:1]])
    return lambda ang: np.interp(np.angle(np.exp(1j * np.asarray(ang))), th, r)


def _fourier_law(theta: np.ndarray, r: np.ndarray, order: int = 2):
    """Radius as a low-order Fourier series in angle, least squares with a small ridge."""
    def design(t):
        cols = [np.ones_like(t)]
        for m in range(1, order + 1):
            cols += [np.cos(m * t), np.sin(m * t)]
        return np.column_stack(cols)
    A = design(theta)
    coef = np.linalg.solve(A.T @ A + 1e-3 * len(theta) * np.diag([0] + [1] * (2 * order)),
                           A.T @ r)
    return lambda ang: design(np.asarray(ang, float)) @ coef


def _signed_area(xy: np.ndarray) -> float:
    x, y = xy[:, 0], xy[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


def _as_raw_contours(slices: list, to_world, source: str) -> RawContours:
    structure, slice_id, points = [], [], []
    for k, _, _, endo_uv, epi_uv in slices:
        for name, uv in (("endo", endo_uv), ("epi", epi_uv)):
            if uv is None:
                continue
            structure += [name] * len(uv)
            slice_id.append(np.full(len(uv), k))
            points.append(to_world(uv, k))
    slice_id = np.concatenate(slice_id).astype(np.int64)
    return RawContours(structure=np.array(structure), slice_id=slice_id,
                       points=np.concatenate(points), line=slice_id.copy(), source=source)


def _septal_direction(rv: np.ndarray, slices: list, cols, up, to_world) -> np.ndarray | None:
    """Unit vector, normal to the long axis, from the cavity centres toward the RV voxels."""
    vecs = []
    for k, cav, _, _, _ in slices:
        if cav is None or not rv[:, :, k].any():
            continue
        c = to_world(np.argwhere(cav).mean(axis=0)[None, :], k)[0]
        r = to_world(np.argwhere(rv[:, :, k]).mean(axis=0)[None, :], k)[0]
        vecs.append(r - c)
    if not vecs:
        return None
    v = np.sum(vecs, axis=0)
    v = v - (v @ up) * up
    norm = np.linalg.norm(v)
    return None if norm < 1e-9 else v / norm


def orientation_warnings(found: Extraction, landmarks: Landmarks, source: str) -> list[str]:
    """Warnings when the heart's orientation in a NIfTI world frame is implausible.

    NIfTI's world frame is right-anterior-superior: +x toward the patient's right, +y anterior,
    +z superior (the NIfTI-1 standard). In normal anatomy the apex points to the patient's left,
    anteriorly and inferiorly, the right ventricle lies right-anterior of the left one, and the
    anterior RV insertion lies anterior and superior of the inferior one (common practice). A
    conversion that flipped an axis breaks at least one of these.
    """
    out = []
    apex = np.asarray(found.apex_direction, float)
    wrong = [name for name, comp in (("to the patient's left", -apex[0]), ("anteriorly", apex[1]),
                                     ("inferiorly", -apex[2])) if comp < -0.1]
    if wrong:
        out.append(f"{source}: the apex does not point {' or '.join(wrong)} "
                   f"(apex direction {np.round(apex, 2).tolist()} in the right-anterior-superior "
                   "world frame); normal anatomy has it left, anterior and inferior: check the "
                   "image's orientation (a flipped axis mirrors the segment labels)")
    sep = found.septal_direction
    if sep is not None and sep @ np.array([1.0, 1.0, 0.0]) / np.sqrt(2.0) < -0.1:
        out.append(f"{source}: the right ventricle lies {np.round(sep, 2).tolist()} from the "
                   "left one, not to the patient's right-anterior side; check the image's "
                   "orientation (a flipped axis mirrors the segment labels)")
    if landmarks.present:
        d = np.asarray(landmarks.rv_insertion_anterior) - np.asarray(landmarks.rv_insertion_inferior)
        if d @ np.array([0.0, 1.0, 1.0]) < 0:
            out.append(f"{source}: the anterior RV insertion point lies posterior-inferior of the "
                       "inferior one; check the image's orientation (a flipped axis mirrors the "
                       "segment labels)")
    return out


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
def outline(mask: np.ndarray) -> np.ndarray | None:
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
