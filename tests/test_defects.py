"""Segmentations as they really come: defective label maps and contour sets (issue 9).

The inputs come from our own generator of defects (``fibers.demo.defects``) applied to synthetic
ventricles whose volumes have a closed form or a quadrature of one (``SyntheticLV.volumes_ml``:
the volume of a spheroid cap, elementary calculus, CRC Standard Mathematical Tables). The shifts
applied to slices are known exactly, as are the frames of a synthetic cine.
"""

from __future__ import annotations

import gzip
import json
import warnings
from dataclasses import replace

import nibabel as nib
import numpy as np
import pytest

from fibers import cli, masks, pipeline, stack
from fibers.demo.defects import (ALL_DEFECTS, cine_series, defective_labelmap, edit_contours,
                                 looped_contour)
from fibers.demo.ventricle import SyntheticLV, demo_subject, spheroid_shell
from fibers.demo.voxels import voxelise
from fibers.errors import InputError
from fibers.io.case import resolve_case
from fibers.io.contours import read_contours, write_contours
from fibers.io.labelmap import load_labelmap, write_labelmap

SMALL_POOLS = {k: 100 for k in ("myocardium", "cavity", "background", "endo", "epi", "base")}
# the one warning line each repair gives (its start), by defect
REPAIR_WARNING = {
    "outflow": "at the base not counted: less than half of the cavity's rim is wall there",
    "islands": "removed label islands away from the heart",
    "holes": "filled holes in the wall",
    "noise": "smoothed boundary noise",
    "papillary": "counted papillary muscles (wall inside the cavity) as cavity",
    "stray": "took stray cavity voxels outside the left ventricle (in the RV) out of the cavity",
    "missing": "hold no label between labelled slices; the gap is bridged",
}


@pytest.fixture(scope="module")
def subject():
    return demo_subject()


@pytest.fixture(scope="module")
def all_defects(subject):
    return defective_labelmap(subject, seed=1)


def _extract(labels, affine):
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        found = masks.extract(labels, affine, source="seg.nii.gz")
    return found, [str(w.message) for w in rec]


def _build(contours, landmarks=None, box=None, facts=None, **geometry):
    case = resolve_case({"input": {"labelmap": "seg.nii.gz"}, "mesh": {"size": 3.0},
                         "geometry": geometry, "pools": SMALL_POOLS})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pipeline.run(contours, case, box=box, landmarks=landmarks, facts=facts)


@pytest.fixture(scope="module")
def built(all_defects):
    labels, affine, truth = all_defects
    found, messages = _extract(labels, affine)
    contours = replace(found.contours, slice_thickness=8.0)
    result = _build(contours, found.landmarks, found.box, {"slices": list(found.slices)})
    return found, messages, result, truth


# -- all defects at once --------------------------------------------------------------------------
def test_all_defects_at_once_give_volumes_within_5_percent(built):
    _, _, result, truth = built
    exact = truth["volumes"]          # quadrature of r^2 / 2 (SyntheticLV.volumes_ml)
    assert result.summary["cavity_volume_ml"] == pytest.approx(exact["cavity_ml"], rel=0.05)
    assert result.summary["myocardial_volume_ml"] == pytest.approx(exact["myocardium_ml"], rel=0.05)


def test_all_defects_at_once_warn_once_per_kind(built):
    _, messages, _, _ = built
    for defect, text in REPAIR_WARNING.items():
        hits = [m for m in messages if text in m]
        assert len(hits) == 1, (defect, messages)


def test_slice_table_applies_the_50_percent_rule(built):
    found, _, result, truth = built
    rows = {r["id"]: r for r in result.summary["slices"]}
    atrium, base = rows[truth["atrium_slice"]], rows[truth["base_slice"]]
    # the generator rings the atrial cavity with wall on a quarter of its rim and cuts a 100
    # degree gap into the basal slice's wall: 25% and about 72% (100/360 open) by construction
    assert not atrium["counted"] and atrium["wall_coverage"] < 0.5
    assert base["counted"] and 0.6 < base["wall_coverage"] < 0.85 and "bridged" in base["reason"]
    assert not rows[truth["missing_slice"]]["counted"]
    assert set(found.contours.slice_id) == {k for k, r in rows.items() if r["counted"]}


def test_outflow_gap_is_bridged_outside_the_chord(subject):
    """The bridge of the epicardium across the gap must lie near the true epicardial radius,
    not on the straight chord between the gap's ends (which cuts into the cavity)."""
    labels, affine, truth = defective_labelmap(subject, defects=("outflow",), seed=1)
    found, _ = _extract(labels, affine)
    k = truth["base_slice"]
    epi = found.contours.points[(found.contours.slice_id == k) & (found.contours.structure == "epi")]
    local = subject.to_local(epi)
    r_true = subject.radius("epi", local[:, 2], np.arctan2(local[:, 1], local[:, 0]))
    err = np.hypot(local[:, 0], local[:, 1]) - r_true
    # a chord across 100 degrees of a 34 mm circle sags 34 (1 - cos 50) = 12 mm (closed form)
    assert np.abs(err).max() < 3.0


@pytest.mark.parametrize("defect", sorted(REPAIR_WARNING))
def test_each_repair_warns(subject, defect):
    labels, affine, _ = defective_labelmap(subject, defects=(defect,), seed=2)
    _, messages = _extract(labels, affine)
    assert any(REPAIR_WARNING[defect] in m for m in messages), messages
    others = [d for d in REPAIR_WARNING if d != defect and any(REPAIR_WARNING[d] in m for m in messages)]
    assert not others, messages


# -- one volume, whichever route ------------------------------------------------------------------
def test_label_map_and_its_contours_give_the_same_volumes(tmp_path, built):
    found, _, by_map, _ = built
    write_contours(tmp_path / "contours.csv", found.contours)
    again = read_contours(tmp_path / "contours.csv")
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 3.0},
                         "geometry": {"base": "slab", "slice_thickness": 8.0}, "pools": SMALL_POOLS},
                        base=tmp_path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        by_csv = pipeline.run(again, case, landmarks=found.landmarks)
    for key in ("cavity_volume_ml", "myocardial_volume_ml"):
        assert by_csv.summary[key] == pytest.approx(by_map.summary[key], rel=0.01)
    assert by_csv.summary["base"]["plane"] == "slab"


def test_slice_base_lowers_the_base_by_half_a_slab(built):
    found, _, slab, _ = built
    contours = replace(found.contours, slice_thickness=8.0)
    plane = _build(contours, found.landmarks, found.box, base="slice")
    # half a slab of the basal cross-section (about pi 34^2 x 4 mm = 14.5 mL of wall + cavity,
    # closed form for a 34 mm disc) comes off the two volumes together
    lost = (slab.summary["cavity_volume_ml"] + slab.summary["myocardial_volume_ml"]
            - plane.summary["cavity_volume_ml"] - plane.summary["myocardial_volume_ml"])
    assert 8.0 < lost < 20.0


# -- 4-D label maps -------------------------------------------------------------------------------
def test_end_diastole_is_the_largest_cavity_not_frame_0(tmp_path):
    sizes = [0.8, 0.9, 1.0, 0.85, 0.75]          # frame 2 is end-diastole, frame 4 end-systole
    lvs = [SyntheticLV(endo=(25.0 * s, 57.0 * s), epi=(34.0, 65.0)) for s in sizes]
    series, affine = cine_series(lvs)
    write_labelmap(tmp_path / "cine.nii.gz", series, affine)
    image = load_labelmap(tmp_path / "cine.nii.gz")
    assert image.frame == 2 and "end-diastole" in image.frame_reason
    assert load_labelmap(tmp_path / "cine.nii.gz", frame="es").frame == 4
    # voxel counts follow the closed-form cavity volumes (spheroid caps) within 3%
    for got, lv in zip(image.frame_cavity_ml, lvs):
        assert got == pytest.approx(lv.volumes_ml()["cavity_ml"], rel=0.03)


def test_build_of_a_4d_map_records_the_frame(tmp_path, capsys):
    sizes = [0.85, 1.0, 0.8]
    lvs = [SyntheticLV(endo=(25.0 * s, 57.0 * s), epi=(34.0, 65.0)) for s in sizes]
    series, affine = cine_series(lvs, rv=False)
    case_dir = tmp_path / "case"
    case_dir.mkdir()
    write_labelmap(case_dir / "cine.nii.gz", series, affine)
    (case_dir / "case.toml").write_text('[input]\nlabelmap = "cine.nii.gz"\n[input.labels]\nrv = 0\n'
                                        "[mesh]\nsize = 4.0\n[pools]\n" +
                                        "".join(f"{k} = 100\n" for k in SMALL_POOLS))
    out = tmp_path / "out"
    assert cli.main(["build", str(case_dir / "case.toml"), "--out", str(out), "--no-report"]) == 0
    err = capsys.readouterr().err
    assert "1 of 3: end-diastole (largest cavity" in err
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["parameters"]["input"]["frame"] == 1 and manifest["parameters"]["frame"] == 1
    assert manifest["parameters"]["geometry"]["base"] == "slab"
    assert len(manifest["summary"]["frame_cavity_volumes_ml"]) == 3
    assert {"id", "wall_coverage", "counted", "reason"} <= set(manifest["summary"]["slices"][0])
    # the extracted contours are written so a user can edit and rebuild from them
    back = read_contours(out / "contours.csv")
    assert set(back.structure) == {"endo", "epi"}


# -- alignment ------------------------------------------------------------------------------------
def test_one_slice_shifted_6_mm_in_a_label_map_is_recovered(subject):
    labels, affine, truth = defective_labelmap(subject, defects=("shift",), seed=3)
    found, messages = _extract(labels, affine)
    st = stack.check_stack(replace(found.contours, slice_thickness=8.0), base="slab")
    moved = {sl.slice_id: -sl.shift for sl in st.slices}     # shift undoes the movement
    expect = {k: truth["shift_mm"] if k == truth["shifted_slice"] else np.zeros(3) for k in moved}
    rms = np.sqrt(np.mean([np.sum((moved[k] - expect[k]) ** 2) for k in moved]))
    assert np.linalg.norm(truth["shift_mm"]) > 5.5        # the generator's 6 mm, whole voxels
    assert rms < 1.0
    assert any("moved more than 5 mm" in w for w in st.warnings)


@pytest.mark.parametrize("centreline", ["straight", "quadratic"])
def test_one_slice_shifted_6_mm_in_contours_is_recovered(subject, centreline):
    contours, truth = subject.sample_stack(noise=0.3, seed=4)
    pts = contours.points.copy()
    offset = subject.rotation @ np.array([4.2, -4.3, 0.0])     # 6.0 mm in the slice plane
    pts[contours.slice_id == 4] += offset
    st = stack.check_stack(replace(contours, points=pts), centreline=centreline)
    err = [(-sl.shift - (offset if sl.slice_id == 4 else 0.0)) for sl in st.slices]
    assert np.sqrt(np.mean(np.sum(np.square(err), axis=1))) < 1.0


# -- contours from other tools --------------------------------------------------------------------
@pytest.fixture(scope="module")
def shell_contours():
    lv = spheroid_shell(seed=1)
    contours, _ = lv.sample_stack(spacing=8.0, seed=0)
    return contours


def _points(contours, structure, k):
    return contours.points[(contours.structure == structure) & (contours.slice_id == k)]


def test_tiny_loop_is_cut_with_a_warning(shell_contours):
    looped = looped_contour(_points(shell_contours, "epi", 3), at=10, size_mm=0.6)
    edited = edit_contours(shell_contours, replace={("epi", 3): looped})
    st = stack.check_stack(edited)
    assert any("tiny loops" in w and "epi 3" in w for w in st.warnings)
    got = next(sl for sl in st.slices if sl.slice_id == 3).epi
    assert len(got) <= len(looped) - 3


def test_figure_eight_is_still_refused(shell_contours):
    pts = _points(shell_contours, "epi", 3)
    c = pts.mean(0)
    t = np.linspace(0, 2 * np.pi, 80, endpoint=False)
    d1, d2 = pts[0] - c, pts[len(pts) // 4] - c
    lobe = np.where(np.sin(t) > 0, 1.6, 1.0)          # lobes of unequal size: net area not 0
    eight = c + np.outer(lobe * np.sin(t), d1) + np.outer(lobe * np.sin(t) * np.cos(t), d2)
    with pytest.raises(InputError, match="crosses itself"):
        stack.check_stack(edit_contours(shell_contours, replace={("epi", 3): eight}))


def test_one_missing_slice_is_bridged_two_are_refused(shell_contours):
    st = stack.check_stack(edit_contours(shell_contours, drop={("*", 4)}))
    assert any("one slice is missing" in w for w in st.warnings)
    with pytest.raises(InputError, match="two or more slices are missing"):
        stack.check_stack(edit_contours(shell_contours, drop={("*", 4), ("*", 5)}))


def test_one_missing_endocardium_is_bridged(shell_contours):
    st = stack.check_stack(edit_contours(shell_contours, drop={("endo", 4)}))
    assert any("no endocardial contour between slices" in w for w in st.warnings)
    assert next(sl for sl in st.slices if sl.slice_id == 4).endo is None


def test_dense_contour_is_resampled(shell_contours):
    pts = _points(shell_contours, "epi", 2)
    closed = np.vstack([pts, pts[:1]])
    s = np.linspace(0, len(pts), 100_000, endpoint=False)
    dense = np.column_stack([np.interp(s, np.arange(len(closed)), closed[:, c]) for c in range(3)])
    st = stack.check_stack(edit_contours(shell_contours, replace={("epi", 2): dense}))
    got = next(sl for sl in st.slices if sl.slice_id == 2).epi
    assert len(got) <= stack.MAX_CONTOUR_POINTS
    # the resampled polygon keeps the area of the dense one (shoelace formula) within 0.1%
    def area(p):
        xy = (p - p.mean(0)) @ np.linalg.svd(p - p.mean(0), full_matrices=False)[2][:2].T
        return 0.5 * abs(xy[:, 0] @ np.roll(xy[:, 1], 1) - xy[:, 1] @ np.roll(xy[:, 0], 1))
    assert area(got) == pytest.approx(area(dense), rel=1e-3)


# -- orientation ----------------------------------------------------------------------------------
def test_demo_subject_sits_in_a_plausible_orientation(subject):
    found, messages = _extract(*voxelise(subject))
    assert not messages
    assert masks.orientation_warnings(found, found.landmarks, "seg") == []
    # RAS world (NIfTI standard): apex left (-x), anterior (+y), inferior (-z)
    apex = -subject.long_axis
    assert apex[0] < 0 and apex[1] > 0 and apex[2] < 0


@pytest.mark.parametrize("axis, word", [(0, "to the patient's left"), (1, "anteriorly"),
                                        (2, "inferiorly")])
def test_a_flipped_world_axis_is_reported(subject, axis, word):
    labels, affine = voxelise(subject)
    flipped = affine.copy()
    flipped[axis, :] *= -1.0                     # a conversion that flipped one world axis
    found, _ = _extract(labels, flipped)
    messages = masks.orientation_warnings(found, found.landmarks, "seg")
    assert any(f"does not point {word}" in m for m in messages), messages


# -- hostile label-map files ----------------------------------------------------------------------
def test_header_claiming_a_huge_image_is_refused_before_reading(tmp_path):
    header = nib.Nifti1Header()
    header.set_data_shape((30000, 30000, 30000))
    header.set_data_dtype(np.uint8)
    header["vox_offset"] = 352
    (tmp_path / "huge.nii").write_bytes(header.binaryblock + b"\0" * 4 + b"\0" * 1000)
    with pytest.raises(InputError, match=r"claims a 30000 x 30000 x 30000 image"):
        load_labelmap(tmp_path / "huge.nii")


def test_truncated_and_header_only_files_are_refused(tmp_path):
    labels, affine = voxelise(spheroid_shell(), rv=False)
    write_labelmap(tmp_path / "seg.nii", labels, affine)
    data = (tmp_path / "seg.nii").read_bytes()
    (tmp_path / "cut.nii").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="truncated"):
        load_labelmap(tmp_path / "cut.nii")
    (tmp_path / "short.nii").write_bytes(data[:144])
    with pytest.raises(InputError, match="cannot read label map short.nii"):
        load_labelmap(tmp_path / "short.nii")


def test_labels_beyond_32_bits_do_not_wrap(tmp_path):
    labels, affine = voxelise(spheroid_shell(), rv=False)
    big = labels.astype(np.int64)
    big[big == 2] = 2 ** 32 + 2                  # wraps to 2 in 32 bits
    img = nib.Nifti1Image(big, affine, dtype=np.int64)
    nib.save(img, tmp_path / "wide.nii.gz")
    image = load_labelmap(tmp_path / "wide.nii.gz")
    assert not np.any(image.labels == 2) and np.any(image.labels == 2 ** 32 + 2)
    with pytest.raises(InputError, match=r"wall = 2 not in the image"):
        masks.extract(image.labels, image.affine, masks.LabelValues(rv=None), source="wide")


def test_all_zero_map_is_refused_reading_slab_by_slab(tmp_path):
    # A gzip stream of zeros behind a real header: 400 x 400 x 60 voxels (9.6 MB as uint8).
    header = nib.Nifti1Header()
    header.set_data_shape((400, 400, 60))
    header.set_data_dtype(np.uint8)
    header["vox_offset"] = 352
    header.set_sform(np.diag([1.5, 1.5, 8.0, 1.0]), code=1)
    with gzip.open(tmp_path / "zeros.nii.gz", "wb") as fh:
        fh.write(header.binaryblock + b"\0" * 4)
        for _ in range(60):
            fh.write(bytes(400 * 400))
    with pytest.raises(InputError, match="holds no labels"):
        load_labelmap(tmp_path / "zeros.nii.gz")


def test_case_keys_of_this_issue():
    case = resolve_case({"input": {"labelmap": "seg.nii.gz", "frame": "es"},
                         "geometry": {"centreline": "quadratic", "base": "slice",
                                      "slice_thickness": 6.0}})
    assert (case.frame, case.centreline, case.base, case.slice_thickness) == ("es", "quadratic",
                                                                               "slice", 6.0)
    assert pipeline.base_choice(resolve_case({"input": {"labelmap": "a.nii"}})) == "slab"
    assert pipeline.base_choice(resolve_case({"input": {"contours": "a.csv"}})) == "slice"
    with pytest.raises(InputError, match=r"frame = first: expected a frame number"):
        resolve_case({"input": {"labelmap": "seg.nii.gz", "frame": "first"}})
    with pytest.raises(InputError, match="must be one of 'slab', 'slice'"):
        resolve_case({"input": {"labelmap": "seg.nii.gz"}, "geometry": {"base": "plane"}})
    assert set(ALL_DEFECTS) >= set(REPAIR_WARNING)


def test_non_integer_storage_and_truncated_gzip_are_refused(tmp_path):
    labels, affine = voxelise(spheroid_shell(), rv=False)
    nib.save(nib.Nifti1Image(labels.astype(np.complex64), affine), tmp_path / "c.nii")
    with pytest.raises(InputError, match="stores complex64 voxels"):
        load_labelmap(tmp_path / "c.nii")
    write_labelmap(tmp_path / "ok.nii.gz", labels, affine)
    data = (tmp_path / "ok.nii.gz").read_bytes()
    (tmp_path / "cut.nii.gz").write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError, match="cannot read the voxels of label map cut.nii.gz"):
        load_labelmap(tmp_path / "cut.nii.gz")
