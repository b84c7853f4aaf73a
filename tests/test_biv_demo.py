"""The synthetic biventricular subject: its quadrature volumes and its contours."""

import numpy as np
import pytest

from fibers.demo import biventricle


def _voxel_volumes_ml(shape, h=0.75):
    """Volumes of LV cavity, RV cavity and wall by counting voxel centres (a Riemann sum)."""
    lo, hi = np.array([-80.0, -80.0, -70.0]), np.array([80.0, 80.0, shape.lv.base_z + 1.0])
    xs = [np.arange(a + h / 2, b, h) for a, b in zip(lo, hi)]
    X, Y = np.meshgrid(xs[0], xs[1], indexing="ij")
    counts = np.zeros(4)
    for z in xs[2]:
        pts = np.column_stack([X.ravel(), Y.ravel(), np.full(X.size, z)])
        counts += np.bincount(shape.classify(pts), minlength=4)
    return counts[1:] * h**3 / 1000.0


@pytest.mark.parametrize("shape", [biventricle.exact_biventricle(), biventricle.demo_subject()],
                         ids=["exact", "demo"])
def test_quadrature_volumes_match_voxel_count(shape):
    # two independent integrations of the same membership rule: Gauss-Legendre quadrature of
    # (r_out^2 - r_in^2)/2 (elementary calculus) against a 0.75 mm voxel count; a Riemann sum
    # of a smooth body converges to well within 0.5 % at this spacing (common practice)
    v = shape.volumes_ml()
    lv, rv, wall = _voxel_volumes_ml(shape)
    assert lv == pytest.approx(v["lv_cavity_ml"], rel=5e-3)
    assert rv == pytest.approx(v["rv_cavity_ml"], rel=5e-3)
    assert wall == pytest.approx(v["wall_ml"], rel=5e-3)


def test_plausible_size():
    # an adult right ventricle at end-diastole: cavity of the same order as the left one
    # (60-150 mL) and a free wall of 3-5 mm (common practice, from memory)
    v = biventricle.demo_subject().volumes_ml()
    assert 60.0 < v["rv_cavity_ml"] < 150.0
    assert 3.0 <= biventricle.demo_subject().wall <= 4.0


def test_crescent_contours_run_on_the_left_epicardium():
    shape = biventricle.exact_biventricle()
    contours, _ = shape.sample_stack(spacing=8.0, point_spacing=1.5)
    assert set(np.unique(contours.structure)) == {"endo", "epi", "rv_endo", "rv_epi"}
    local = shape.lv.to_local(contours.points)
    rv = contours.structure == "rv_endo"
    theta = np.arctan2(local[rv, 1], local[rv, 0])
    rho = np.hypot(local[rv, 0], local[rv, 1])
    r_epi = shape.lv.radius("epi", local[rv, 2], theta)
    gap = rho - r_epi
    # every point is on or outside the left epicardium; about half lie on it (the septal side)
    assert gap.min() > -1e-3  # chords of a fine polygon, not the curve
    on_septum = gap < 1e-3
    assert 0.3 < on_septum.mean() < 0.7
    # the free-wall points lie at the analytic width
    w = shape.cavity_width(local[rv, 2], theta)
    assert np.abs(gap[~on_septum] - w[~on_septum]).max() < 1e-6 + 0.05 * shape.width
