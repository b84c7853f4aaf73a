"""Synthetic segmentation label maps made from a ``SyntheticLV``, for the demo and the tests.

The voxel grid is a short-axis stack: its third axis is the ventricle's long axis (optionally
tilted away from it), in-plane voxels are small and slices thick. Each voxel is labelled from
``SyntheticLV.inside`` at ``supersample x supersample`` points spread over its in-plane extent
(majority vote, which keeps the staircase of a coarse grid unbiased on average) in the plane of
the voxel centre: a slice shows the cross-section at its centre height, as a thin slice would.

A right ventricle is drawn as a crescent of label ``values.rv`` lying on the epicardium between
the two ``septum_angles`` (clockwise from the anterior to the inferior insertion about
the apex-to-base axis) on the basal and mid thirds of the cavity's length; its thickness falls
to zero at the insertion points as ``rv_thickness * sqrt(sin(pi s))``, s in [0, 1] along the arc.
"""

from __future__ import annotations

import numpy as np

from fibers.masks import LabelValues
from fibers.demo.ventricle import SyntheticLV, rotation_about


def voxelise(lv: SyntheticLV, *, spacing=(1.5, 1.5, 8.0), rv: bool = True, margin: float = 15.0,
             values: LabelValues = LabelValues(), tilt_deg: float = 0.0, spin_deg: float = 20.0,
             left_handed: bool = False, supersample: int = 3, base_offset: float | None = None,
             rv_thickness: float = 12.0, classes=None) -> tuple[np.ndarray, np.ndarray]:
    """Label volume and voxel-to-world affine of a synthetic ventricle.

    Parameters
    ----------
    lv : SyntheticLV
    spacing : (3,) float, mm
        Voxel size along the two in-plane axes and between slices.
    rv : bool
        Draw the right-ventricular crescent (needs ``values.rv``).
    margin : float, mm
        Background around the ventricle (and the RV) on every side.
    values : LabelValues
    tilt_deg : float, degrees
        Angle between the stack axis (third image axis) and the long axis.
    spin_deg : float, degrees
        Rotation of the in-plane image axes about the stack axis, so they are not aligned with
        anything in the body.
    left_handed : bool
        Flip the first image axis, giving a voxel grid of the other handedness.
    supersample : int
        In-plane samples per voxel side for the majority vote.
    base_offset : float, mm, optional
        Distance of the most basal slice's centre below the base plane (along the stack axis);
        default half a slice.
    rv_thickness : float, mm
        Largest thickness of the RV crescent (with ``classes``: how far the body reaches
        beyond the left epicardium, for the grid's extent).
    classes : (callable, ndarray (C,) int), optional
        Another labelling of the body: a function from local points (N, 3) to class numbers
        (N,) in 0..C-1, and the label value of each class (the biventricular demo's). Default:
        background, cavity, wall and the RV crescent above.

    Returns
    -------
    labels : ndarray (I, J, K) uint8
    affine : ndarray (4, 4), mm
        Voxel index to world mm; the slice index grows from apex to base.
    """
    su, sv, ss = (float(s) for s in spacing)
    base_offset = 0.5 * ss if base_offset is None else float(base_offset)
    if rv and values.rv is None:
        raise ValueError("rv=True needs values.rv")

    # Image axes in the body's local frame (columns): tilt the stack axis off the long axis.
    frame = rotation_about([1.0, 0.0, 0.0], np.radians(tilt_deg)) @ \
        rotation_about([0.0, 0.0, 1.0], np.radians(spin_deg))
    if left_handed:
        frame[:, 0] *= -1.0
    e1, e2, e3 = frame.T

    # Extent of the body in the image axes, from the corners of its local bounding box.
    t_probe = np.linspace(0.0, 2 * np.pi, 181)
    z_probe = np.linspace(-lv.epi[1], lv.base_z, 181)
    r_max = float(lv.radius("epi", z_probe[:, None], t_probe[None, :]).max())
    r_max += rv_thickness if rv or classes is not None else 0.0
    corners = np.array([[x, y, z] for x in (-r_max, r_max) for y in (-r_max, r_max)
                        for z in (-lv.epi[1], lv.base_z)])
    proj = corners @ frame                       # (8, 3) coordinates along e1, e2, e3
    lo, hi = proj.min(axis=0) - margin, proj.max(axis=0) + margin
    n_u = int(np.ceil((hi[0] - lo[0]) / su)) + 1
    n_v = int(np.ceil((hi[1] - lo[1]) / sv)) + 1
    # Slices sit at fixed offsets from where the long axis meets the base plane.
    t_basal = np.array([0.0, 0.0, lv.base_z]) @ e3 - base_offset
    k_lo = int(np.floor((lo[2] - t_basal) / ss))
    k_hi = int(np.ceil((hi[2] - t_basal) / ss))
    t0 = t_basal + k_lo * ss
    n_s = k_hi - k_lo + 1
    origin = lo[0] * e1 + lo[1] * e2 + t0 * e3   # local position of voxel (0, 0, 0)

    offsets = (np.arange(supersample) + 0.5) / supersample - 0.5
    du, dv = (g.ravel() for g in np.meshgrid(offsets * su, offsets * sv, indexing="ij"))
    iu, iv = (g.ravel() for g in np.meshgrid(np.arange(n_u) * su, np.arange(n_v) * sv,
                                             indexing="ij"))
    # In-plane sample positions of one slice, (n_u * n_v, n_sub, 3) in the local frame.
    plane = ((iu[:, None] + du[None, :])[..., None] * e1
             + (iv[:, None] + dv[None, :])[..., None] * e2)

    def lv_classes(local):
        cls = np.zeros(len(local), dtype=np.int64)
        epi = lv.inside("epi", local)
        cls[epi] = 2
        cls[lv.inside("endo", local)] = 1
        if rv:
            cls[~epi & _rv_crescent(lv, local, rv_thickness)] = 3
        return cls

    classify, codes = classes if classes is not None else \
        (lv_classes, np.array([0, values.cavity, values.wall, values.rv if rv else 0]))
    codes = np.asarray(codes)
    labels = np.zeros((n_u, n_v, n_s), dtype=np.uint8)
    for k in range(n_s):                          # one slice at a time keeps memory small
        local = (plane + origin + k * ss * e3).reshape(-1, 3)
        cls = classify(local).reshape(n_u * n_v, -1)
        counts = np.stack([(cls == c).sum(axis=1) for c in range(len(codes))], axis=1)
        labels[:, :, k] = codes[np.argmax(counts, axis=1)].reshape(n_u, n_v)

    affine = np.eye(4)
    rot = np.asarray(lv.rotation, float)
    affine[:3, :3] = rot @ (frame * [su, sv, ss])
    affine[:3, 3] = lv.to_world(origin[None, :])[0]
    return labels, affine


def _rv_crescent(lv: SyntheticLV, local: np.ndarray, thickness: float) -> np.ndarray:
    """Whether local points (N, 3) lie in the RV crescent on the epicardium."""
    z = local[:, 2]
    theta = np.arctan2(local[:, 1], local[:, 0])
    rho = np.hypot(local[:, 0], local[:, 1])
    ant, inf = np.radians(lv.septum_angles)
    # anterior -> septum -> inferior runs clockwise about the apex-to-base axis (counter-clockwise
    # as seen from the apex, the usual anatomy), so counter-clockwise the arc goes inferior -> anterior
    span = (ant - inf) % (2 * np.pi)
    s = ((theta - inf) % (2 * np.pi)) / span
    on_arc = s <= 1.0
    # Basal and mid thirds of the cavity's length below the base plane.
    z_low = lv.base_z - 2.0 / 3.0 * (lv.base_z + lv.endo[1])
    r_epi = lv.radius("epi", z, theta)
    depth = thickness * np.sqrt(np.sin(np.pi * np.clip(s, 0.0, 1.0)))
    return on_arc & (z <= lv.base_z) & (z >= z_low) & (rho >= r_epi) & (rho < r_epi + depth)
