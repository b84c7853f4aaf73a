"""The whole chain from contours: a hemispherical shell rebuilt from its short-axis stack."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest

from fibers import pipeline
from fibers.demo import ventricle
from fibers.io.case import resolve_case

RI, RO = 22.0, 32.0


@pytest.fixture(scope="module")
def rebuilt():
    lv = ventricle.spheroid_shell(endo=(RI, RI), epi=(RO, RO), base_z=0.0, seed=6)
    contours, _ = lv.sample_stack(spacing=8.0, noise=0.2, seed=2)
    case = resolve_case({"input": {"contours": "shell.csv"}, "mesh": {"size": 2.0},
                         "pools": {"myocardium": 20000, "cavity": 2000, "background": 2000,
                                   "endo": 1000, "epi": 1000, "base": 1000}})
    case = replace(case, landmarks=lv.landmarks(depth=4.0))
    return lv, pipeline.run(contours, case)


def test_transmural_against_closed_form(rebuilt):
    # Laplace in a spherical shell cut at its equator: (1/ri - 1/r) / (1/ri - 1/ro) exactly
    # (closed form). Here the shell is rebuilt from 8 mm slices with 0.2 mm contour noise,
    # so the error includes the surface fit and the extrapolated apex (issue #3 asks for
    # mean <= 0.01 and 99th percentile <= 0.03).
    lv, r = rebuilt
    radius = np.linalg.norm(lv.to_local(r.mesh.points), axis=1)
    exact = np.clip((1 / RI - 1 / radius) / (1 / RI - 1 / RO), 0, 1)
    err = np.abs(r.coords.transmural - exact)
    assert err.mean() <= 0.01
    assert np.percentile(err, 99) <= 0.03


def test_helix_angle_in_the_analytic_frame(rebuilt):
    # Helix angle (README conventions) measured in the sphere's own frame (e_r radial, e_c about
    # the true axis, e_l = e_r x e_c), against the linear law at the closed-form depth, away
    # from the apex axis (issue #3: mean <= 2 deg, 95th percentile <= 5 deg).
    lv, r = rebuilt
    radial = lv.to_local(r.mesh.points) @ np.asarray(lv.rotation).T
    e_r = radial / np.linalg.norm(radial, axis=1, keepdims=True)
    e_c = np.cross(lv.long_axis, e_r)
    norm_c = np.linalg.norm(e_c, axis=1)
    away = norm_c > np.sin(np.radians(20.0))
    e_c = e_c / np.maximum(norm_c, 1e-12)[:, None]
    e_l = np.cross(e_r, e_c)
    f = r.arch.fiber
    measured = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, e_l), np.einsum("ij,ij->i", f, e_c)))
    # the default law uses the fraction of the wall thickness, (r - ri) / (ro - ri) on a sphere
    depth = np.clip((np.linalg.norm(radial, axis=1) - RI) / (RO - RI), 0, 1)
    law = 60.0 - 120.0 * depth
    diff = np.abs((measured - law + 90.0) % 180.0 - 90.0)[away]
    assert diff.mean() <= 2.0
    assert np.percentile(diff, 95) <= 5.0


def test_apex_and_volumes(rebuilt):
    # Exact apices at the sphere radii below the centre; hemisphere volumes 2/3 pi r^3
    # (elementary calculus).
    lv, r = rebuilt
    assert np.linalg.norm(r.mesh.epi_apex - lv.to_world(np.array([[0, 0, -RO]]))[0]) < 1.0
    assert np.linalg.norm(r.mesh.endo_apex - lv.to_world(np.array([[0, 0, -RI]]))[0]) < 1.0
    cavity = 2 / 3 * np.pi * RI**3 / 1000
    wall = 2 / 3 * np.pi * (RO**3 - RI**3) / 1000
    assert r.summary["cavity_volume_ml"] == pytest.approx(cavity, rel=0.03)
    assert r.summary["myocardial_volume_ml"] == pytest.approx(wall, rel=0.03)
