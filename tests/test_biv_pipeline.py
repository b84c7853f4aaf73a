"""Both ventricles through the whole pipeline, the command line, and the LV route left alone."""

import json

import meshio
import numpy as np
import pytest

from fibers import pipeline
from fibers.biv import inputs
from fibers.cli import main
from fibers.demo import biventricle
from fibers.io.case import resolve_case
from fibers.io.contours import write_contours

SMALL_POOLS = {"myocardium": 3000, "cavity": 2000, "background": 3000, "endo": 1000, "epi": 1000, "base": 500}


def _case(tmp_path, contours, **geometry):
    write_contours(tmp_path / "contours.csv", contours)
    return resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 3.5},
                         "pools": SMALL_POOLS, "geometry": geometry}, base=tmp_path)


@pytest.fixture(scope="module")
def build(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("biv")
    shape = biventricle.exact_biventricle(seed=5)
    contours, _ = shape.sample_stack(spacing=8.0, point_spacing=1.5)
    manifest = pipeline.build(_case(tmp, contours), tmp / "out", report=False)
    return shape, tmp / "out", manifest


def test_manifest_volumes_and_landmarks(build):
    shape, out, manifest = build
    biv = manifest["summary"]["biventricular"]
    truth = shape.volumes_ml()  # quadrature of the analytic shape (elementary calculus)
    assert biv["lv_cavity_volume_ml"] == pytest.approx(truth["lv_cavity_ml"], rel=0.03)
    assert biv["rv_cavity_volume_ml"] == pytest.approx(truth["rv_cavity_ml"], rel=0.03)
    assert biv["wall_volume_ml"] == pytest.approx(truth["wall_ml"], rel=0.03)
    assert sum(biv["wall_volume_per_region_ml"].values()) == pytest.approx(biv["wall_volume_ml"], rel=1e-6)
    assert manifest["landmarks"]["source"] == "right-ventricular contours"
    # the insertion points found from the geometry lie near the analytic ones (the crescent's tips)
    found = np.array([manifest["landmarks"]["rv_insertion_anterior"], manifest["landmarks"]["rv_insertion_inferior"]])
    local = shape.lv.to_local(found)
    angles = np.degrees(np.arctan2(local[:, 1], local[:, 0]))
    assert np.abs((angles - np.array(shape.lv.septum_angles) + 180) % 360 - 180).max() < 3.0
    assert manifest["summary"]["biventricular"]["fiber_law_deg"]["rv_helix_endo"] == 40.0


def test_files_carry_tags_regions_and_fields(build):
    shape, out, _ = build
    msh = meshio.read(out / "mesh.msh")
    assert msh.field_data["rv_endo"][0] == 4 and msh.field_data["lv_endo"][0] == 1
    vtu = meshio.read(out / "mesh.vtu")
    region = vtu.cell_data["region"][0]
    rv_region = vtu.cell_data["rv_region"][0]
    aha = vtu.cell_data["aha_segment"][0]
    assert set(np.unique(region)) == {1, 2, 3}
    assert set(np.unique(rv_region[region == 3])) == {1, 2, 3} and np.all(rv_region[region != 3] == 0)
    assert np.all(aha[region == 3] == 0) and set(np.unique(aha[region != 3])) == set(range(1, 18))
    d = vtu.point_data["septal_depth"]
    assert d.min() >= 0 and d.max() <= 1
    faces = meshio.read(out / "facets.xdmf").cell_data["boundary"][0]
    assert set(np.unique(faces)) == {1, 2, 3, 4}


def test_right_pools(build):
    shape, out, _ = build
    cav = np.load(out / "pools" / "rv_cavity.npz")["points"]
    # the analytic membership rule of the synthetic shape
    assert (shape.classify(shape.lv.to_local(cav)) == 2).mean() > 0.95
    endo = np.load(out / "pools" / "rv_endo.npz")
    assert len(endo["points"]) == SMALL_POOLS["endo"]
    assert np.allclose(np.linalg.norm(endo["fiber"], axis=1), 1.0)
    wall = np.load(out / "pools" / "myocardium.npz")
    assert set(np.unique(wall["region"])) == {1, 2, 3}
    bg = np.load(out / "pools" / "background.npz")["points"]
    assert (shape.classify(shape.lv.to_local(bg)) == 3).mean() < 0.03  # the background is off the wall


def test_case_landmarks_win(tmp_path):
    shape = biventricle.exact_biventricle()
    contours, _ = shape.sample_stack(spacing=8.0, point_spacing=1.5)
    case = _case(tmp_path, contours)
    from dataclasses import replace

    case = replace(case, landmarks=shape.landmarks())
    result = pipeline.run(contours, replace(case, pools=replace(case.pools, myocardium=10, background=10,
                                                                 cavity=10, endo=10, epi=10, base=10)))
    assert result.landmarks.source == "synthetic"


def test_lv_route_unchanged_without_rv_input(tmp_path):
    shape = biventricle.exact_biventricle()
    contours, _ = shape.sample_stack(spacing=8.0, point_spacing=1.5)
    left, right = inputs.split_contours(contours)
    small = dict(SMALL_POOLS, background=500)
    case = resolve_case({"input": {"contours": "c.csv"}, "mesh": {"size": 4.0}, "pools": small,
                         "landmarks": {"rv_insertion_anterior": list(shape.landmarks().rv_insertion_anterior),
                                       "rv_insertion_inferior": list(shape.landmarks().rv_insertion_inferior)}})
    plain = pipeline.run(left, case)
    ignored = pipeline.run(contours, resolve_case({**{"input": {"contours": "c.csv"}, "mesh": {"size": 4.0},
                                                      "pools": small, "geometry": {"ventricles": "lv"}},
                                                   "landmarks": case.values["landmarks"]}))
    assert type(plain) is pipeline.Result
    for a, b in ((plain.mesh.points, ignored.mesh.points), (plain.mesh.tets, ignored.mesh.tets),
                 (plain.coords.transmural, ignored.coords.transmural), (plain.arch.fiber, ignored.arch.fiber),
                 (plain.aha, ignored.aha), (plain.pools["myocardium"].arrays["points"],
                                            ignored.pools["myocardium"].arrays["points"])):
        assert np.array_equal(a, b)
    assert any("ignored" in w for w in ignored.warnings)
    assert not hasattr(plain, "right")


def test_cli_demo_biv(tmp_path):
    out = tmp_path / "demo"
    assert main(["demo", "--biv", "--out", str(out), "--mesh-size", "4", "--no-report"]) == 0
    manifest = json.loads((out / "manifest.json").read_text())
    biv = manifest["summary"]["biventricular"]
    assert biv["ventricles"] == "biv"
    # the noisy, shifted demo stack against its analytic volumes (quadrature, elementary calculus)
    truth = biventricle.demo_subject().volumes_ml()
    assert biv["lv_cavity_volume_ml"] == pytest.approx(truth["lv_cavity_ml"], rel=0.03)
    assert biv["rv_cavity_volume_ml"] == pytest.approx(truth["rv_cavity_ml"], rel=0.03)
    assert biv["wall_volume_ml"] == pytest.approx(truth["wall_ml"], rel=0.03)
    assert (out / "input" / "contours.csv").read_text().count("rv_endo") > 100
    # the evaluator follows the left-ventricular rule: it refuses a biventricular build in one line
    # rather than give the right ventricle the wrong fibers (common practice: refuse, do not guess)
    assert main(["pools", str(out), "--seed", "1", "--out", str(tmp_path / "again")]) == 2
    assert not (tmp_path / "again").exists()
