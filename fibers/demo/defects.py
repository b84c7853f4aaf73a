"""Defective inputs of our own, for the tests: label maps and contour sets as they really come.

An automatic segmentation of a clinical short-axis stack has defects a clean phantom lacks. Each
function here starts from a ``SyntheticLV`` (whose volumes have a closed form) and adds one or
more of them, so the truth stays analytic:

- ``outflow``: the basal slice loses the wall over an arc (the outflow tract) and an atrial
  slice above it shows a cavity ringed by wall on less than half its rim;
- ``islands``: blobs of wall and cavity label far from the heart;
- ``holes``: background voxels inside the wall;
- ``noise``: voxels flipped at random along the epicardial boundary;
- ``papillary``: wall blobs inside the cavity, one attached to the wall and one free;
- ``stray``: cavity label inside the right ventricle;
- ``shift``: one mid slice moved in its plane by a whole number of voxels (a breath-hold);
- ``missing``: one mid slice left empty.

Every defect is drawn from ``seed``; the same arguments give the same map.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from fibers.demo.ventricle import SyntheticLV
from fibers.demo.voxels import voxelise
from fibers.masks import LabelValues
from fibers.types import RawContours

ALL_DEFECTS = ("outflow", "islands", "holes", "noise", "papillary", "stray", "shift", "missing")


def defective_labelmap(lv: SyntheticLV, *, defects=ALL_DEFECTS, seed: int = 0,
                       spacing=(1.5, 1.5, 8.0), shift_mm: float = 6.0, gap_deg: float = 100.0,
                       values: LabelValues = LabelValues()):
    """A label map of ``lv`` with the named defects.

    Returns
    -------
    labels : ndarray (I, J, K) uint8
    affine : ndarray (4, 4), mm
    truth : dict
        ``volumes`` (``SyntheticLV.volumes_ml``), ``shifted_slice`` and ``shift_mm`` (the in-plane
        shift (3,) in world mm applied to that slice, zeros when none), ``missing_slice``,
        ``base_slice`` (index of the basal slice) and ``atrium_slice``.
    """
    rng = np.random.default_rng(seed)
    labels, affine = voxelise(lv, spacing=spacing, values=values)
    labels = labels.copy()
    cav, wall, rv = values.cavity, values.wall, values.rv
    filled = np.flatnonzero((labels == cav).any(axis=(0, 1)))
    base, apex_end = int(filled.max()), int(filled.min())    # slice index grows apex -> base
    mid = list(range(apex_end + 2, base - 1))
    truth = {"volumes": lv.volumes_ml(), "shifted_slice": None, "shift_mm": np.zeros(3),
             "missing_slice": None, "base_slice": base, "atrium_slice": None}
    centre = np.argwhere(labels[:, :, base] == cav).mean(axis=0)

    if "outflow" in defects:
        sl = labels[:, :, base]
        ang = _angles(sl.shape, centre)
        start = rng.uniform(0, 2 * np.pi)
        in_gap = ((ang - start) % (2 * np.pi)) < np.radians(gap_deg)
        sl[in_gap & (sl == wall)] = 0
        if base + 1 < labels.shape[2]:
            # the atrium: a cavity ringed by wall on a quarter of its rim only
            above = labels[:, :, base + 1]
            r = _radius(sl.shape, centre) * spacing[0]
            above[r < 22.0] = cav
            ring = (r >= 22.0) & (r < 25.0) & (((ang - start) % (2 * np.pi)) > np.radians(270))
            above[ring] = wall
            truth["atrium_slice"] = base + 1
    if "papillary" in defects:
        for k in mid[len(mid) // 3: len(mid) // 3 + 2]:
            sl = labels[:, :, k]
            c = np.argwhere(sl == cav).mean(axis=0)
            r_cav = np.sqrt((sl == cav).sum() / np.pi)
            a = rng.uniform(0, 2 * np.pi)
            for frac, size in ((0.8, 2.5), (0.3, 2.0)):       # attached, free
                p = c + frac * r_cav * np.array([np.cos(a), np.sin(a)])
                blob = _radius(sl.shape, p) < size
                sl[blob & (sl == cav)] = wall
                a += np.pi * 0.8
    if "holes" in defects:
        for k in mid[:3]:
            sl = labels[:, :, k]
            idx = np.argwhere(ndimage.binary_erosion(sl == wall, iterations=1))
            pick = idx[rng.choice(len(idx), size=min(6, len(idx)), replace=False)]
            sl[pick[:, 0], pick[:, 1]] = 0
    if "noise" in defects:
        for k in mid:
            sl = labels[:, :, k]
            lv_mask = (sl == cav) | (sl == wall)
            edge = lv_mask ^ ndimage.binary_erosion(lv_mask)
            outer = ndimage.binary_dilation(lv_mask) & ~lv_mask & (sl == 0)
            flip_in = edge & (sl == wall) & (rng.random(sl.shape) < 0.25)
            flip_out = outer & (rng.random(sl.shape) < 0.25)
            sl[flip_in] = 0
            sl[flip_out] = wall
    if "stray" in defects and rv is not None:
        for k in mid[len(mid) // 2: len(mid) // 2 + 2]:
            sl = labels[:, :, k]
            idx = np.argwhere(ndimage.binary_erosion(sl == rv, iterations=2))
            if len(idx):
                p = idx[rng.integers(len(idx))]
                sl[(_radius(sl.shape, p) < 2.0) & (sl == rv)] = cav
    if "islands" in defects:
        n_u, n_v, n_s = labels.shape
        labels[1:4, 1:4, base - 2] = wall
        labels[n_u - 4:n_u - 1, 1:4, mid[0]] = cav
    if "shift" in defects:
        k = mid[len(mid) // 2]
        steps = np.round(shift_mm / np.sqrt(2) / np.array(spacing[:2])).astype(int)
        labels[:, :, k] = np.roll(labels[:, :, k], tuple(steps), axis=(0, 1))
        truth["shifted_slice"] = k
        truth["shift_mm"] = affine[:3, :2] @ (steps.astype(float))
    if "missing" in defects:
        k = mid[len(mid) // 2 + 2] if "shift" in defects else mid[len(mid) // 2]
        labels[:, :, k] = 0
        truth["missing_slice"] = k
    return labels, affine, truth


def cine_series(lvs: list[SyntheticLV], **kw):
    """A 4-D label map (I, J, K, T) of several ventricles on one grid (frames of a cine).

    The grid is that of the largest ventricle (the first with the largest cavity), so every
    frame fits; each frame is the ``voxelise`` of its ventricle resampled onto that grid by
    nearest neighbour in index space (the frames share the affine by construction: same frame,
    same spacing, same base plane).
    """
    big = int(np.argmax([lv.volumes_ml()["cavity_ml"] for lv in lvs]))
    ref, affine = voxelise(lvs[big], **kw)
    frames = []
    for lv in lvs:
        lab, aff = voxelise(lv, **kw)
        out = np.zeros_like(ref)
        # same rotation and spacing: the grids differ by a whole-voxel offset
        shift = np.rint(np.linalg.solve(affine[:3, :3], aff[:3, 3] - affine[:3, 3])).astype(int)
        lo = np.maximum(shift, 0)
        hi = np.minimum(shift + lab.shape, ref.shape)
        out[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]] = lab[lo[0] - shift[0]:hi[0] - shift[0],
                                                         lo[1] - shift[1]:hi[1] - shift[1],
                                                         lo[2] - shift[2]:hi[2] - shift[2]]
        frames.append(out)
    return np.stack(frames, axis=3), affine


def looped_contour(points: np.ndarray, *, at: int, size_mm: float = 0.4) -> np.ndarray:
    """A closed contour (n, 3) with a tiny loop (a few points doubling back) after point ``at``.

    The loop is a small circle of diameter ``size_mm`` in the contour's plane that crosses the
    contour once, as a tracing tool leaves when the cursor doubles back.
    """
    p, q = points[at], points[(at + 1) % len(points)]
    t = (q - p) / np.linalg.norm(q - p)
    normal = np.cross(points[at] - points.mean(0), t)
    normal /= np.linalg.norm(normal)
    side = np.cross(normal, t)
    mid = 0.5 * (p + q)
    # forward past the crossing, round, and back across it
    ang = np.linspace(-0.5 * np.pi, 1.5 * np.pi, 7)[1:-1]
    loop = mid + 0.5 * size_mm * (np.outer(np.cos(ang), t) + np.outer(np.sin(ang) + 1.0, side)) \
        - 0.5 * size_mm * side
    loop = np.vstack([mid + 0.3 * size_mm * t - 0.2 * size_mm * side, loop[::-1],
                      mid - 0.3 * size_mm * t - 0.2 * size_mm * side])
    return np.vstack([points[:at + 1], loop, points[at + 1:]])


def edit_contours(contours: RawContours, *, drop=(), replace=None) -> RawContours:
    """Contours without the (structure, slice) pairs in ``drop`` and with ``replace`` mapping
    (structure, slice) -> new points (n, 3)."""
    replace = replace or {}
    s, k, p = [], [], []
    for name in ("endo", "epi"):
        for sid in np.unique(contours.slice_id):
            if (name, int(sid)) in drop or (name, "*") in drop or ("*", int(sid)) in drop:
                continue
            rows = (contours.structure == name) & (contours.slice_id == sid)
            if not rows.any():
                continue
            pts = replace.get((name, int(sid)), contours.points[rows])
            s += [name] * len(pts)
            k.append(np.full(len(pts), int(sid)))
            p.append(pts)
    points = np.concatenate(p)
    return RawContours(structure=np.array(s), slice_id=np.concatenate(k), points=points,
                       line=np.arange(2, len(points) + 2), source=contours.source,
                       slice_thickness=contours.slice_thickness)


def _angles(shape, centre) -> np.ndarray:
    i, j = np.indices(shape)
    return np.arctan2(j - centre[1], i - centre[0])


def _radius(shape, centre) -> np.ndarray:
    i, j = np.indices(shape)
    return np.hypot(i - centre[0], j - centre[1])
