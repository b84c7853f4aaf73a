"""Both ventricles from a segmentation label map: outlines, the route, refusals, the demo."""

import warnings
from functools import lru_cache

import numpy as np
import pytest

from fibers import masks, pipeline
from fibers.biv import labels as biv_labels
from fibers.cli import main
from fibers.demo import biventricle
from fibers.errors import InputError
from fibers.io.case import resolve_case
from fibers.io.contours import read_contours
from fibers.io.labelmap import write_labelmap

V = biventricle.BIV_LABELS
SMALL_POOLS = {"myocardium": 3000, "cavity": 2000, "background": 3000, "endo": 1000, "epi": 1000, "base": 500}


@lru_cache(maxsize=None)
def _demo_map():
    shape = biventricle.demo_subject()
    labels, affine = shape.voxelise()
    return shape, labels, affine


def _right(labels, affine, values=V):
    with warnings.catch_warnings(record=True) as record:
        warnings.simplefilter("always")
        found = masks.extract(labels, affine, values, source="seg.nii.gz")
        right = biv_labels.right_contours(labels, affine, values, found.contours, source="seg.nii.gz")
    return found, right, [str(w.message) for w in record]


def _area(points, shape):
    """Area (mm^2) of a closed planar contour in world mm (shoelace formula in its own plane)."""
    local = shape.lv.to_local(points)[:, :2]
    x, y = local[:, 0], local[:, 1]
    return 0.5 * abs(float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y)))


def test_voxel_counts_match_the_analytic_volumes():
    # the rasterised subject against its quadrature volumes (elementary calculus): a majority
    # vote of 3 x 3 in-plane samples on 1.5 mm voxels, slices standing for their 8 mm slab (disc
    # summation, common practice in CMR volumetry) keeps each volume within 2 %
    shape, labels, affine = _demo_map()
    ml = abs(np.linalg.det(affine[:3, :3])) / 1000.0
    truth = shape.volumes_ml()
    count = {k: np.count_nonzero(labels == k) * ml for k in (1, 2, 3, 4)}
    assert count[1] == pytest.approx(truth["lv_cavity_ml"], rel=0.02)
    assert count[3] == pytest.approx(truth["rv_cavity_ml"], rel=0.02)
    assert count[2] + count[4] == pytest.approx(truth["wall_ml"], rel=0.02)
    assert count[4] == pytest.approx(truth["rv_free_wall_ml"], rel=0.05)


def test_outlines_lie_on_the_analytic_crescent():
    shape, labels, affine = _demo_map()
    found, right, notes = _right(labels, affine)
    assert not notes
    assert set(np.unique(right.structure)) == {"rv_endo", "rv_epi"}
    # every RV slice is one the left ventricle counts
    assert set(np.unique(right.slice_id)) <= set(np.unique(found.contours.slice_id))
    for k in np.unique(right.slice_id):
        pts = right.points[(right.structure == "rv_endo") & (right.slice_id == k)]
        local = shape.lv.to_local(pts)
        theta = np.arctan2(local[:, 1], local[:, 0])
        rho = np.hypot(local[:, 0], local[:, 1])
        r_epi = shape.lv.radius("epi", local[:, 2], theta)
        gap = rho - r_epi
        # the outline runs on the left epicardium along the septum and at the analytic width on
        # the free wall, within a voxel (1.5 mm) of either (marching squares on the voxel
        # staircase, common practice)
        w = shape.cavity_width(local[:, 2], theta)
        off = np.minimum(np.abs(gap), np.abs(gap - w))
        assert np.percentile(off, 95) < 1.5, k


def test_left_cavity_label_spilled_into_the_right_stays_right_cavity():
    # a segmentation that gave part of the right cavity the left cavity's label: those voxels lie
    # outside the left epicardium and touch the right cavity, so they are right cavity (the
    # left-ventricular clean-up takes them out of the left cavity; here they must not be lost)
    shape, labels, affine = _demo_map()
    _, right, _ = _right(labels, affine)
    spilled = labels.copy()
    k = int(np.argmax((labels == V.rv).sum(axis=(0, 1))))
    rv = np.argwhere(labels[:, :, k] == V.rv)
    half = rv[rv[:, 0] > np.median(rv[:, 0])]
    spilled[half[:, 0], half[:, 1], k] = V.cavity
    _, right2, notes = _right(spilled, affine)
    assert any(f"as right cavity, on slice(s) {k}" in n for n in notes)
    pick = lambda r: r.points[(r.structure == "rv_endo") & (r.slice_id == k)]  # noqa: E731
    # the same cavity outline: areas by the shoelace formula agree within 1 %
    assert _area(pick(right2), shape) == pytest.approx(_area(pick(right), shape), rel=0.01)


def test_route_rule():
    lv_only = masks.LabelValues()                       # today's maps: rv = 3 gives landmarks only
    assert not biv_labels.right_wanted(None, lv_only, "seg")
    assert biv_labels.right_wanted("biv", lv_only, "seg")   # asked: the RV label is the cavity
    assert biv_labels.right_wanted(None, V, "seg")          # rv_wall given: both ventricles
    with pytest.warns(UserWarning, match="ventricles = \"lv\""):
        assert not biv_labels.right_wanted("lv", V, "seg")
    with pytest.raises(InputError, match="rv = 0"):
        biv_labels.right_wanted("biv", masks.LabelValues(rv=None), "seg")
    with pytest.raises(InputError, match="rv_wall = 4 asks for both ventricles"):
        biv_labels.right_wanted(None, masks.LabelValues(rv=None, rv_wall=4), "seg")


def test_without_rv_wall_only_rv_endo():
    _, labels, affine = _demo_map()
    values = masks.LabelValues(cavity=1, wall=2, rv=3)
    _, right, _ = _right(np.where(labels == V.rv_wall, 0, labels), affine, values)
    assert set(np.unique(right.structure)) == {"rv_endo"}


@pytest.mark.parametrize("change, values, message", [
    ("none", masks.LabelValues(cavity=1, wall=2, rv=3, rv_wall=9), "rv_wall = 9 not in the image"),
    ("no_rv", V, "rv = 3 not in the image"),
    ("rv_apical_only", V, "lies on no slice the left ventricle counts"),
    ("rv_detached", V, "does not touch the left ventricle's epicardium"),
])
def test_refusals_are_one_line(change, values, message):
    _, labels, affine = _demo_map()
    labels = labels.copy()
    if change == "no_rv":
        labels[labels == V.rv] = 0
    elif change == "rv_apical_only":
        counted = np.flatnonzero((labels == V.wall).any(axis=(0, 1)))
        moved = labels == V.rv
        labels[moved] = 0
        # RV voxels only beyond the left ventricle's apex, away from any counted slice
        labels[:3, :3, counted.min() - 1] = V.rv
    elif change == "rv_detached":
        k = int(np.argmax((labels == V.rv).sum(axis=(0, 1))))
        ring = masks.ndimage.binary_dilation(labels[:, :, k] == V.wall, iterations=3) & (labels[:, :, k] == V.rv)
        labels[:, :, k][ring] = 0   # a gap of 3 voxels between the right cavity and the septum
    with pytest.raises(InputError) as err:
        _right(labels, affine, values)
    text = str(err.value)
    assert message in text and "seg.nii.gz" in text and "\n" not in text
    if change == "rv_detached":
        assert f"slice {k}" in text


@pytest.fixture(scope="module")
def builds(tmp_path_factory):
    """The demo subject built from its label map and from its contours (3.5 mm elements)."""
    tmp = tmp_path_factory.mktemp("bivlab")
    shape, labels, affine = _demo_map()
    write_labelmap(tmp / "seg.nii.gz", labels, affine)
    case = resolve_case({"input": {"labelmap": "seg.nii.gz", "labels": {"cavity": 1, "wall": 2, "rv": 3, "rv_wall": 4}},
                         "mesh": {"size": 3.5}, "pools": SMALL_POOLS}, base=tmp)
    from_map = pipeline.build(case, tmp / "map", report=False)
    contours, _ = shape.sample_stack(spacing=8.0, point_spacing=1.5)
    from fibers.io.contours import write_contours
    write_contours(tmp / "contours.csv", contours)
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 3.5}, "pools": SMALL_POOLS},
                        base=tmp)
    from_contours = pipeline.build(case, tmp / "contours", report=False)
    return shape, tmp, from_map, from_contours


def test_label_map_build_volumes(builds):
    shape, tmp, from_map, from_contours = builds
    truth = shape.volumes_ml()   # quadrature of the analytic shape (elementary calculus)
    biv = from_map["summary"]["biventricular"]
    assert biv["rv_outer_surface"] == "rv_epi"
    assert from_map["parameters"]["geometry"]["base"] == "slab"
    assert biv["lv_cavity_volume_ml"] == pytest.approx(truth["lv_cavity_ml"], rel=0.03)
    assert biv["rv_cavity_volume_ml"] == pytest.approx(truth["rv_cavity_ml"], rel=0.03)
    assert biv["wall_volume_ml"] == pytest.approx(truth["wall_ml"], rel=0.03)
    assert biv["wall_volume_per_region_ml"]["rv_free_wall"] == pytest.approx(truth["rv_free_wall_ml"], rel=0.06)
    # the same subject from its contours: the same figures within a few per cent
    other = from_contours["summary"]["biventricular"]
    for key in ("lv_cavity_volume_ml", "rv_cavity_volume_ml", "wall_volume_ml"):
        assert biv[key] == pytest.approx(other[key], rel=0.03), key
    for name, vol in other["wall_volume_per_region_ml"].items():
        assert biv["wall_volume_per_region_ml"][name] == pytest.approx(vol, rel=0.06), name
    # insertion points from the geometry, as on the contours route
    assert from_map["landmarks"]["source"] == "right-ventricular contours"


def test_label_map_build_writes_right_contours(builds):
    _, tmp, _, _ = builds
    written = read_contours(tmp / "map" / "contours.csv")
    assert {"rv_endo", "rv_epi", "endo", "epi"} == set(np.unique(written.structure))


def test_lv_label_map_unchanged_without_rv_wall(tmp_path):
    # today's left-ventricular label maps (an RV label for the insertion points, no rv_wall)
    # stay on the left-ventricular route: no biventricular summary, no rv_wall parameter
    from fibers.demo import ventricle, voxels

    labels, affine = voxels.voxelise(ventricle.demo_subject(), spacing=(2.0, 2.0, 10.0))
    write_labelmap(tmp_path / "seg.nii.gz", labels, affine)
    case = resolve_case({"input": {"labelmap": "seg.nii.gz"}, "mesh": {"size": 4.0}, "pools": SMALL_POOLS},
                        base=tmp_path)
    assert "rv_wall" not in case.labels
    contours, landmarks, *_ = pipeline._read_inputs(case)
    assert set(np.unique(contours.structure)) == {"endo", "epi"}
    assert landmarks.source == "labelmap"


def test_cli_demo_biv_labelmap(tmp_path):
    assert main(["demo", "--biv", "--labelmap", "--out", str(tmp_path / "d"), "--mesh-size", "4", "--no-report"]) == 0
    import json

    manifest = json.loads((tmp_path / "d" / "manifest.json").read_text())
    assert manifest["summary"]["biventricular"]["ventricles"] == "biv"
    assert (tmp_path / "d" / "input" / "labelmap.nii.gz").is_file()
    assert manifest["parameters"]["input.labels"]["rv_wall"] == 4


def test_cli_refuses_a_missing_rv_wall_label(tmp_path, capsys):
    _, labels, affine = _demo_map()
    write_labelmap(tmp_path / "seg.nii.gz", labels, affine)
    (tmp_path / "case.toml").write_text('[input]\nlabelmap = "seg.nii.gz"\n[input.labels]\nrv_wall = 7\n')
    assert main(["build", str(tmp_path / "case.toml"), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    line = [e for e in err if e.startswith("error:")]
    assert len(line) == 1 and "seg.nii.gz" in line[0] and "rv_wall = 7 not in the image" in line[0]
    assert "Traceback" not in "\n".join(err)
    assert not (tmp_path / "out").exists()                  # nothing written
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case.toml", "seg.nii.gz"]
