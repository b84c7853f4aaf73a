"""Both ventricles: the right ventricle's surfaces and the biventricular wall mesh."""

import numpy as np
import pytest

from fibers.biv import inputs, mesh as biv_mesh, surfaces as biv_surfaces
from fibers.demo import biventricle
from fibers.errors import InputError
from fibers.io.case import resolve_case

from biv_case import SIZE, exact_case

@pytest.fixture(scope="module")
def exact():
    shape, _, stack, lv, right, rs, wall = exact_case()  # oblique frame
    return shape, stack, lv, right, rs, wall


def test_volumes_match_the_analytic_shape(exact):
    shape, *_, wall = exact
    truth = shape.volumes_ml()  # Gauss-Legendre quadrature of the analytic shape (elementary calculus)
    got = biv_mesh.volumes_ml(wall)
    for key in ("lv_cavity_ml", "rv_cavity_ml", "wall_ml"):
        assert got[key] == pytest.approx(truth[key], rel=0.03), key
    # the right free wall (region 3) against its own analytic volume, a looser 6 %: its edges
    # at the insertions are decided cell by cell
    assert got["rv_free_wall_ml"] == pytest.approx(truth["rv_free_wall_ml"], rel=0.06)


def test_tags_and_regions(exact):
    *_, wall = exact
    assert set(np.unique(wall.face_tags)) == {1, 2, 3, 4}
    assert set(np.unique(wall.region)) == {1, 2, 3}
    assert wall.quality["inverted"] == 0
    # each cavity's surface is closed by the base plane: its open edges all lie in that plane
    z = wall.axis.to_local(wall.points)[:, 2]
    for tag in (1, 4):
        f = wall.faces[wall.face_tags == tag]
        edges = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
        uniq, count = np.unique(edges, axis=0, return_counts=True)
        open_edges = uniq[count == 1]
        assert len(open_edges) > 0 and np.abs(z[open_edges]).max() < 1e-6


def test_septum_lies_between_the_cavities(exact):
    shape, *_, wall = exact
    # septal cells lie inside the analytic left epicardium, right free-wall cells outside it
    local = shape.lv.to_local(wall.points[wall.tets].mean(axis=1))
    inside_lv = shape.lv.inside("epi", local)
    assert inside_lv[wall.region == biv_mesh.SEPTUM].mean() > 0.97
    assert (~inside_lv[wall.region == biv_mesh.RV_FREE_WALL]).mean() > 0.9


def test_cavity_width_recovered_from_contours(exact):
    shape, stack, lv, right, rs, _ = exact
    z = np.linspace(-45.0, 0.0, 10)
    t1, t2 = rs.span_at(z)
    p = rs.local_points(z, 0.5 * (t1 + t2), rs.cavity_width(z, 0.5 * (t1 + t2)))
    truth_local = shape.lv.to_local(rs.axis.to_world(p))
    # the last height is the base plane itself: held on it (the analytic width is 0 just above
    # it, where the rigid motion's rounding can put the point)
    tz = np.minimum(truth_local[:, 2], shape.lv.base_z)
    tt = np.arctan2(truth_local[:, 1], truth_local[:, 0])
    rho = np.hypot(truth_local[:, 0], truth_local[:, 1])
    # the free-wall point at mid-crescent lies on the analytic free wall (to the fit's 0.5 mm)
    assert np.abs(rho - shape.lv.radius("epi", tz, tt) - shape.cavity_width(tz, tt)).max() < 0.5


def test_free_wall_grown_by_the_thickness_without_rv_epi(exact):
    shape, stack, lv, right, *_ = exact
    endo_only = inputs.RightContours(*(getattr(right, f)[right.structure == "rv_endo"]
                                       for f in ("structure", "slice_id", "points", "line")))
    rs = biv_surfaces.fit_right(stack, lv, endo_only, wall_thickness=4.0)
    z = np.linspace(-40.0, 0.0, 9)
    t1, t2 = rs.span_at(z)
    mid = 0.5 * (t1 + t2)
    # at mid-crescent the free wall runs nearly normal to the radius, so the disc dilation's
    # radial gap is the thickness itself (offset curve of a circle: common geometry)
    gap = rs.outer_width(z, mid) - rs.cavity_width(z, mid)
    assert np.allclose(gap, 4.0, atol=0.15)
    assert rs.outer_from.startswith("grown")


def test_route_choice_and_refusals():
    shape = biventricle.exact_biventricle()
    contours, _ = shape.sample_stack(spacing=8.0)
    lv_rows, right = inputs.split_contours(contours)
    assert inputs.choose_route(None, right) == "biv"
    assert inputs.choose_route(None, None) == "lv"
    with pytest.warns(UserWarning, match="ignored"):
        assert inputs.choose_route("lv", right) == "lv"
    with pytest.raises(InputError, match="no rv_endo"):
        inputs.choose_route("biv", None)
    only_outer = inputs.RightContours(*(getattr(right, f)[right.structure == "rv_epi"]
                                        for f in ("structure", "slice_id", "points", "line")))
    with pytest.raises(InputError, match="rv_epi contours without any rv_endo"):
        inputs.choose_route(None, only_outer)
    # without right-ventricular rows the contours come back untouched
    same, none = inputs.split_contours(lv_rows)
    assert same is lv_rows and none is None


def test_case_keys():
    case = resolve_case({"input": {"contours": "c.csv"}})
    assert case.ventricles is None and case.rv_wall_thickness == 3.5
    case = resolve_case({"input": {"contours": "c.csv"}, "geometry": {"ventricles": "biv", "rv_wall_thickness": 4.0}})
    assert case.ventricles == "biv" and case.rv_wall_thickness == 4.0
    with pytest.raises(InputError, match="ventricles"):
        resolve_case({"input": {"contours": "c.csv"}, "geometry": {"ventricles": "both"}})


def test_quality_like_the_left_ventricle_alone(exact):
    # the radius-ratio statistics of the same mesher on the left wall alone are the yardstick
    from fibers import mesh as lv_mesh

    shape, stack, lv, right, rs, wall = exact
    alone = lv_mesh.build_mesh(lv, size=SIZE).quality
    assert wall.quality["radius_ratio_mean"] >= 0.97 * alone["radius_ratio_mean"]
    assert wall.quality["radius_ratio_p01"] >= 0.95 * alone["radius_ratio_p01"]
