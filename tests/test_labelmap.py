"""Label maps as input (issue #6): NIfTI reading, contours, RV insertion points, refusals.

References named beside each check: nibabel (the reference NIfTI library) for the file round
trips; closed-form cross-sections of a spheroid for the contour areas; the synthetic subject's
own insertion angles for the landmarks.
"""

from __future__ import annotations

import re
import warnings

import nibabel as nib
import numpy as np
import pytest
from scipy.spatial import cKDTree

from fibers.errors import InputError
from fibers.io.labelmap import load_labelmap, read_labelmap, write_labelmap
from fibers.masks import LabelValues, contours_from_labelmap, field_of_view, slice_axis
from fibers.demo.voxels import voxelise
from fibers.demo.ventricle import demo_subject, spheroid_shell


@pytest.fixture(scope="module")
def shell():
    return spheroid_shell(seed=3)


@pytest.fixture(scope="module")
def shell_map(shell):
    return voxelise(shell)


def _quiet(labels, affine, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("error")       # the clean phantom must not warn
        return contours_from_labelmap(labels, affine, **kw)


def _polygon_area(xy):
    """Shoelace formula."""
    x, y = xy[:, 0], xy[:, 1]
    return 0.5 * abs(x @ np.roll(y, 1) - y @ np.roll(x, 1))


def _by_slice(contours):
    out = {}
    for s, k in set(zip(contours.structure, contours.slice_id)):
        out[(s, int(k))] = contours.points[(contours.structure == s) & (contours.slice_id == k)]
    return out


def _flip_axis(labels, affine, axis):
    """The same image with one voxel axis reversed: same world geometry, other handedness."""
    flipped = np.flip(labels, axis=axis)
    aff = affine.copy()
    aff[:3, 3] += (labels.shape[axis] - 1) * affine[:3, axis]
    aff[:3, axis] *= -1.0
    return flipped, aff


# -- file round trips (reference: nibabel writes and reads the header fields we rely on) --------
@pytest.mark.parametrize("nifti", [1, 2])
@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_round_trip_keeps_labels_and_affine(tmp_path, shell_map, nifti, suffix):
    labels, affine = _flip_axis(*shell_map, axis=0)          # a left-handed oblique grid
    assert np.linalg.det(affine[:3, :3]) < 0
    path = write_labelmap(tmp_path / f"seg{suffix}", labels, affine, nifti=nifti)
    assert isinstance(nib.load(path), nib.Nifti2Image if nifti == 2 else nib.Nifti1Image)
    image = load_labelmap(path)
    assert image.labels.dtype.kind == "i" and image.full_shape == labels.shape
    np.testing.assert_allclose(image.full_affine, affine, atol=1e-4)   # float32 header fields
    # only the labelled box is loaded: the crop's corner is a whole voxel of the full grid
    corner = np.linalg.solve(affine[:3, :3], image.affine[:3, 3] - affine[:3, 3])
    np.testing.assert_allclose(corner, np.rint(corner), atol=1e-3)
    lo = np.rint(corner).astype(int)
    box = tuple(slice(a, a + n) for a, n in zip(lo, image.labels.shape))
    np.testing.assert_array_equal(image.labels, labels[box])
    assert np.count_nonzero(image.labels) == np.count_nonzero(labels)


def test_qform_only_header_is_honoured(tmp_path, shell_map):
    # nibabel's best affine falls back to the qform (with qfac = -1 for a left-handed grid).
    labels, affine = _flip_axis(*shell_map, axis=1)
    img = nib.Nifti1Image(labels, None)
    img.set_qform(affine, code=1)
    img.set_sform(None, code=0)
    nib.save(img, tmp_path / "q.nii")
    aff = load_labelmap(tmp_path / "q.nii").full_affine
    np.testing.assert_allclose(aff, affine, atol=1e-3)


def test_metres_are_converted_to_mm(tmp_path, shell_map):
    labels, affine = shell_map
    in_m = affine.copy()
    in_m[:3, :] /= 1000.0
    img = nib.Nifti1Image(labels, in_m)
    img.header.set_xyzt_units(xyz="meter")
    nib.save(img, tmp_path / "m.nii.gz")
    with pytest.warns(UserWarning, match="meter; converted to mm"):
        aff = load_labelmap(tmp_path / "m.nii.gz").full_affine
    np.testing.assert_allclose(aff, affine, atol=1e-3)


def test_4d_frames_by_number_or_cavity_size(tmp_path, shell_map):
    labels, affine = shell_map
    small = np.where(labels == 1, 2, labels)          # a frame with no cavity at all
    series = np.stack([small, labels, small], axis=3)
    write_labelmap(tmp_path / "cine.nii.gz", series, affine)
    image = load_labelmap(tmp_path / "cine.nii.gz")
    # cavity volume = voxel count x voxel volume |det A| (closed form)
    voxel_ml = abs(np.linalg.det(affine[:3, :3])) / 1000.0
    assert image.frame == 1 and image.frame_reason.startswith("end-diastole")
    assert image.frame_cavity_ml[1] == pytest.approx((labels == 1).sum() * voxel_ml, rel=1e-4)
    assert image.frame_cavity_ml[0] == 0.0
    assert load_labelmap(tmp_path / "cine.nii.gz", frame="es").frame == 0
    with pytest.raises(InputError, match="frame 3 is out of range"):
        read_labelmap(tmp_path / "cine.nii.gz", frame=3)
    given = load_labelmap(tmp_path / "cine.nii.gz", frame=2)
    assert given.frame == 2 and given.frame_reason == "given in [input] frame"


def test_2d_and_unreadable_files_are_refused(tmp_path, shell_map):
    labels, affine = shell_map
    nib.save(nib.Nifti1Image(labels[:, :, 8], affine), tmp_path / "one.nii")
    with pytest.raises(InputError, match=r"one.nii is a 2-D image \(shape \(\d+, \d+\)\)"):
        read_labelmap(tmp_path / "one.nii")
    (tmp_path / "empty.nii").write_bytes(b"")
    with pytest.raises(InputError, match="empty.nii is an empty file"):
        read_labelmap(tmp_path / "empty.nii")
    (tmp_path / "junk.nii").write_bytes(b"not a nifti header" * 40)
    with pytest.raises(InputError, match="cannot read label map junk.nii"):
        read_labelmap(tmp_path / "junk.nii")
    with pytest.raises(InputError, match="not found"):
        read_labelmap(tmp_path / "missing.nii.gz")
    nib.save(nib.Nifti1Image(labels * 0.5, affine), tmp_path / "prob.nii")
    with pytest.raises(InputError, match="non-integer values"):
        read_labelmap(tmp_path / "prob.nii")


# -- geometry of the image ---------------------------------------------------------------------
def test_field_of_view_is_the_voxel_grid(shell_map):
    labels, affine = shell_map
    box = field_of_view(labels.shape, affine)
    # Closed form: the grid's volume is |det A| times the voxel count.
    assert box.volume == pytest.approx(abs(np.linalg.det(affine[:3, :3])) * labels.size)
    far = np.array(labels.shape) - 0.5
    np.testing.assert_allclose(box.sample(np.ones((1, 3)))[0], affine[:3, :3] @ far + affine[:3, 3])
    assert slice_axis(affine) == 2


def test_either_handedness_and_axis_order_give_the_same_world_contours(shell_map):
    labels, affine = shell_map
    ref, ref_lm, _ = _quiet(labels, affine)
    ref_slices = _by_slice(ref)
    flipped = _flip_axis(labels, affine, axis=0)
    permuted = (np.transpose(labels, (2, 0, 1)), affine[:, [2, 0, 1, 3]])
    for lab, aff in (flipped, _flip_axis(*flipped, axis=2), permuted):
        got, lm, _ = _quiet(lab, aff)
        slices = _by_slice(got)
        assert len(slices) == len(ref_slices)
        # Slice ids follow the voxel index, which a flip reverses: match slices by position.
        for pts in slices.values():
            near = min(ref_slices.values(), key=lambda r: np.linalg.norm(r.mean(0) - pts.mean(0)))
            assert len(near) == len(pts)
            dist, _ = cKDTree(near).query(pts)
            assert dist.max() < 1e-6
        assert np.linalg.norm(lm.rv_insertion_anterior - ref_lm.rv_insertion_anterior) < 1.0
        assert np.linalg.norm(lm.rv_insertion_inferior - ref_lm.rv_insertion_inferior) < 1.0


# -- contour accuracy against closed-form cross-sections -------------------------------------------
@pytest.mark.parametrize("pixel", [0.75, 1.5, 2.5])
def test_contour_areas_match_spheroid_sections(shell, pixel):
    """Cross-section of the spheroid x^2/b^2 + y^2/b^2 + z^2/a^2 <= 1 at height z is a circle of
    area pi b^2 (1 - z^2/a^2) (closed form)."""
    labels, affine = voxelise(shell, spacing=(pixel, pixel, 8.0))
    contours, _, _ = _quiet(labels, affine)
    checked = 0
    for (structure, _), pts in _by_slice(contours).items():
        local = shell.to_local(pts)
        z = local[:, 2].mean()
        assert np.ptp(local[:, 2]) < 1e-6                # planar, in the voxel-centre plane
        b, a = shell.endo if structure == "endo" else shell.epi
        radius = b * np.sqrt(max(0.0, 1.0 - (z / a) ** 2))
        if radius < 6 * pixel:                            # too few voxels across to judge
            continue
        exact = np.pi * radius**2
        assert abs(_polygon_area(local[:, :2]) / exact - 1.0) < 0.03, (structure, z, pixel)
        checked += 1
    assert checked >= 16


def test_tilted_stack_areas_match_oblique_sections(shell):
    """Area of the section of an ellipsoid with semi-axes (b, b, a) by the plane n.x = d,
    |n| = 1: pi b b a / sqrt(q) * (1 - d^2 / q), q = b^2 (n1^2 + n2^2) + a^2 n3^2 (closed form,
    from memory). Mid slices only, away from the base plane."""
    labels, affine = voxelise(shell, tilt_deg=12.0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")   # the basal slice crosses the base plane: 50% rule
        contours, _, _ = contours_from_labelmap(labels, affine)
    normal = shell.to_local(affine[:3, 2][None, :] + shell.translation)[0]
    normal /= np.linalg.norm(normal)
    checked = 0
    for (structure, _), pts in _by_slice(contours).items():
        local = shell.to_local(pts)
        if local[:, 2].max() > shell.base_z - 3 or local[:, 2].min() < -35:
            continue
        b, a = shell.endo if structure == "endo" else shell.epi
        q = b * b * (normal[0] ** 2 + normal[1] ** 2) + a * a * normal[2] ** 2
        d = float(local.mean(0) @ normal)
        exact = np.pi * b * b * a / np.sqrt(q) * (1 - d * d / q)
        u = np.cross(normal, [1.0, 0.0, 0.0])
        u /= np.linalg.norm(u)
        xy = np.column_stack([local @ u, local @ np.cross(normal, u)])
        assert abs(_polygon_area(xy) / exact - 1.0) < 0.03, (structure, d)
        checked += 1
    assert checked >= 6


# -- right-ventricular insertion points ----------------------------------------------------------
@pytest.mark.parametrize("subject", ["shell", "demo"])
def test_rv_insertions_match_truth(shell, subject):
    lv = shell if subject == "shell" else demo_subject()
    _, found, _ = _quiet(*voxelise(lv))
    truth = lv.landmarks()
    assert found.source == "labelmap" and found.present

    def angle(p):
        local = lv.to_local(np.asarray(p)[None, :])[0]
        return np.degrees(np.arctan2(local[1], local[0]))

    for ours, exact in ((found.rv_insertion_anterior, truth.rv_insertion_anterior),
                        (found.rv_insertion_inferior, truth.rv_insertion_inferior)):
        error = (angle(ours) - angle(exact) + 180.0) % 360.0 - 180.0
        assert abs(error) < 10.0
        # On the epicardium of a basal slice.
        local = lv.to_local(ours[None, :])[0]
        r_epi = lv.radius("epi", local[2], np.arctan2(local[1], local[0]))
        assert abs(np.hypot(local[0], local[1]) - r_epi) < 1.5
        assert local[2] > lv.base_z - 16.0


def test_no_rv_label_gives_no_landmarks(shell_map):
    labels, affine = shell_map
    labels = np.where(labels == 3, 0, labels)
    with pytest.warns(UserWarning, match=r"no right-ventricle label \(rv = 3\)"):
        _, lm, _ = contours_from_labelmap(labels, affine)
    assert lm.source == "none" and not lm.present
    _, lm, _ = _quiet(labels, affine, values=LabelValues(rv=None))
    assert not lm.present


# -- cleaning and refusals -----------------------------------------------------------------------
def test_islands_and_holes_are_removed_with_a_warning(shell_map):
    labels, affine = shell_map
    ref, _, _ = _quiet(labels, affine)
    dirty = labels.copy()
    k = 8
    dirty[2:4, 2:4, k] = 2                                  # a wall island in a corner
    cav = np.argwhere(dirty[:, :, k] == 1).mean(0).astype(int)
    dirty[cav[0], cav[1], k] = 2                            # a "papillary muscle" hole
    with pytest.warns(UserWarning) as rec:
        got, _, _ = contours_from_labelmap(dirty, affine, source="seg.nii.gz")
    messages = sorted(str(w.message) for w in rec)
    assert messages == [f"seg.nii.gz: counted papillary muscles (wall inside the cavity) as cavity: "
                        f"1 voxel(s) on slice(s) {k}",
                        f"seg.nii.gz: removed label islands away from the heart: 4 voxel(s) on "
                        f"slice(s) {k}"]
    np.testing.assert_allclose(got.points, ref.points)


def test_missing_labels_list_the_values_present(shell):
    labels, affine = voxelise(shell, values=LabelValues(cavity=5, wall=6, rv=7))
    with pytest.raises(InputError, match=r"seg.nii: label cavity = 1, wall = 2 not in the image "
                                         r"\(values present: 0, 5, 6, 7\)"):
        contours_from_labelmap(labels, affine, source="seg.nii")
    contours, lm, _ = _quiet(labels, affine, values=LabelValues(cavity=5, wall=6, rv=7))
    assert lm.present and set(contours.structure) == {"endo", "epi"}


def test_swapped_cavity_and_wall_values(shell_map):
    # A cavity is ringed by wall in every short-axis slice (anatomy, common practice); with
    # the two values exchanged the "cavity" borders the background instead.
    labels, affine = shell_map
    with pytest.raises(InputError, match=r"cavity and wall values swapped"):
        contours_from_labelmap(labels, affine, LabelValues(cavity=2, wall=1, rv=3), source="seg.nii")


def test_one_empty_middle_slice_is_bridged_two_are_refused(shell_map):
    labels, affine = shell_map
    holed = labels.copy()
    holed[:, :, 7] = 0
    with pytest.warns(UserWarning, match=r"seg.nii: slice\(s\) 7 hold no label between labelled "
                                         r"slices; the gap is bridged"):
        got, _, _ = contours_from_labelmap(holed, affine, source="seg.nii")
    assert 7 not in set(got.slice_id) and {6, 8} <= set(got.slice_id)
    holed[:, :, 8] = 0
    with pytest.raises(InputError, match=r"seg.nii: slices 7 to 8 have no cavity or wall label "
                                         r"but lie between labelled slices 2 and 12"):
        contours_from_labelmap(holed, affine, source="seg.nii")


def test_long_axis_far_from_slice_axis_is_refused_with_its_angle(shell):
    labels, affine = voxelise(shell, tilt_deg=70.0)
    with pytest.raises(InputError, match="long axis is") as err:
        contours_from_labelmap(labels, affine, source="seg.nii")
    angle = float(re.search(r"is (\d+) deg from the slice normal", str(err.value)).group(1))
    assert abs(angle - 70.0) <= 3.0


# -- end to end ----------------------------------------------------------------------------------
def test_voxelised_shell_builds_to_the_spheroid_volumes(shell):
    """Wall and cavity volumes of the built mesh against the spheroid caps below the basal slice
    plane, V = pi b^2 [(c + a) - (c^3 + a^3) / (3 a^2)] (elementary calculus; CRC Standard
    Mathematical Tables), through ``SyntheticLV.volumes_ml``."""
    from dataclasses import replace

    from fibers import pipeline
    from fibers.io.case import resolve_case

    labels, affine = voxelise(shell, left_handed=True)
    contours, landmarks, box = _quiet(labels, affine)
    contours = replace(contours, slice_thickness=8.0)   # as the pipeline sets it for label maps
    case = resolve_case({"input": {"labelmap": "seg.nii.gz"}, "mesh": {"size": 4.0},
                         "pools": {k: 100 for k in ("myocardium", "cavity", "background",
                                                     "endo", "epi", "base")}})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")      # the phantom's landmark handedness note
        result = pipeline.run(contours, case, box=box, landmarks=landmarks)
    # For a label map the base is the upper face of the most basal slab, where the phantom's
    # base plane lies (closed form: spheroid caps below it, SyntheticLV.volumes_ml).
    truth = shell.volumes_ml()
    assert result.summary["myocardial_volume_ml"] == pytest.approx(truth["myocardium_ml"], rel=0.04)
    assert result.summary["cavity_volume_ml"] == pytest.approx(truth["cavity_ml"], rel=0.04)
