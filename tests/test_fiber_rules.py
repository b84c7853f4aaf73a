"""Fiber rules as modellers and imagers specify them: depth, imaging angles, imbrication, presets."""

import numpy as np
import pytest
import shells

from fibers import architecture, coordinates
from fibers.config import FiberLaw
from fibers.errors import InputError
from fibers.fiber_presets import PRESETS
from fibers.io.case import resolve_case
from fibers.surface_distance import point_triangle_distance
from fibers.types import ENDO, EPI

RI, RO = 20.0, 30.0
ELLIPSOID_IN, ELLIPSOID_OUT = (18.0, 26.0, 40.0), (27.0, 35.0, 50.0)   # x, y, polar half-axes


@pytest.fixture(scope="module")
def sphere():
    mesh = shells.spheroid_shell(inner=(RI, RI), outer=(RO, RO), size=3.0)
    return mesh, coordinates.compute(mesh)


@pytest.fixture(scope="module")
def ellipsoid():
    mesh = shells.spheroid_shell(inner=ELLIPSOID_IN, outer=ELLIPSOID_OUT, size=3.0,
                                 rotation=shells.random_rotation(3), translation=[4.0, -2.0, 9.0])
    return mesh, coordinates.compute(mesh)


def _dot(u, v):
    return np.einsum("ij,ij->i", u, v)


def _assert_triad(f, s, n):
    # Orthonormal right-handed triad: unit, pairwise orthogonal, det = +1 (common practice).
    for v in (f, s, n):
        np.testing.assert_allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-9)
    for u, v in ((f, s), (s, n), (f, n)):
        assert np.abs(_dot(u, v)).max() < 1e-9
    np.testing.assert_allclose(_dot(np.cross(f, s), n), 1.0, atol=1e-9)


def test_point_triangle_distance_against_dense_sampling():
    # Reference: the minimum over a dense sampling of each triangle (brute force), which
    # overestimates the exact distance by at most the sampling spacing.
    rng = np.random.default_rng(0)
    tri = rng.normal(size=(40, 3, 3)) * 5.0
    p = rng.normal(size=(40, 3)) * 8.0
    u, v = np.meshgrid(np.linspace(0, 1, 301), np.linspace(0, 1, 301))
    keep = u + v <= 1.0
    u, v = u[keep], v[keep]
    got = point_triangle_distance(p, tri[:, 0], tri[:, 1], tri[:, 2])
    for k in range(len(p)):
        a, b, c = tri[k]
        dense = a + u[:, None] * (b - a) + v[:, None] * (c - a)
        ref = np.linalg.norm(dense - p[k], axis=1).min()
        step = max(np.linalg.norm(b - a), np.linalg.norm(c - a)) / 300.0
        assert ref - step <= got[k] <= ref + 1e-9


def test_thickness_depth_on_a_spherical_shell(sphere):
    # Closed form: on a spherical shell the distances to the two spheres are r - ri and ro - r,
    # so the thickness fraction is (r - ri) / (ro - ri). The mesh's faces are chords of the
    # spheres, inside them by at most the sagitta h^2 / (8 r) = 0.06 mm at h = 3 mm (elementary
    # geometry), i.e. 0.006 of the wall: the bound below.
    mesh, c = sphere
    r = np.linalg.norm(mesh.points, axis=1)
    exact = (r - RI) / (RO - RI)
    err = np.abs(c.thickness_fraction - exact)
    assert err.max() < 0.01
    assert err.mean() < 0.003
    assert np.all(c.thickness_fraction[mesh.face_nodes(ENDO)] == 0.0)
    assert np.all(c.thickness_fraction[mesh.face_nodes(EPI)] == 1.0)
    # The Laplace depth is not: (1/ri - 1/r) / (1/ri - 1/ro) = 0.6 at mid-wall (closed form).
    mid = np.abs(exact - 0.5) < 0.03
    assert c.transmural[mid].mean() == pytest.approx(0.6, abs=0.02)


def test_wall_thickness_on_a_spherical_shell(sphere):
    # Closed form: at every point of a spherical shell the distances to its two spheres add up:
    # d_endo + d_epi = (r - ri) + (ro - r) = ro - ri. The faces are chords, inside their sphere
    # by the sagitta h^2 / (8 r) (elementary geometry): up to 0.1 mm for the longest edges
    # (about 4 mm) on the 20 mm sphere, 0.07 mm on the 30 mm one.
    mesh, c = sphere
    assert np.abs(c.wall_thickness - (RO - RI)).max() < 0.15
    # on the endocardium it is the distance to the epicardium alone, and the other way round
    endo, epi = mesh.face_nodes(ENDO), mesh.face_nodes(EPI)
    r = np.linalg.norm(mesh.points, axis=1)
    assert np.abs(c.wall_thickness[endo] - (RO - r[endo])).max() < 0.08
    assert np.abs(c.wall_thickness[epi] - (r[epi] - RI)).max() < 0.12


def test_helix_is_zero_at_mid_thickness_on_a_sphere(sphere):
    # Linear +-60 law in the thickness depth (the default): 0 degrees at mid-wall. Measured from
    # the output fiber in the sphere's own frame (wall normal radial, circumferential z x r),
    # away from the apex (normal more than 30 degrees from the axis).
    mesh, c = sphere
    arch = architecture.assign(c, FiberLaw(), mesh)
    r = np.linalg.norm(mesh.points, axis=1)
    e_r = mesh.points / r[:, None]
    circ = np.cross([0.0, 0.0, 1.0], e_r)
    away = np.linalg.norm(circ, axis=1) > 0.5
    circ = circ / np.maximum(np.linalg.norm(circ, axis=1), 1e-12)[:, None]
    long = np.cross(e_r, circ)
    helix = np.degrees(np.arctan2(_dot(arch.fiber, long), _dot(arch.fiber, circ)))
    exact = (r - RI) / (RO - RI)
    law = 60.0 - 120.0 * exact
    diff = np.abs(helix - law)[away]
    # e_rad is the discrete Laplace gradient, within about a degree of the radial direction at 3 mm
    assert np.percentile(diff, 95) < 1.5
    mid = away & (np.abs(exact - 0.5) < 0.02)
    assert mid.sum() > 20
    assert abs(helix[mid].mean()) < 1.0
    assert np.abs(helix[mid]).max() < 4.0


def test_helix_angle_sax_matches_the_law_on_an_ellipsoidal_shell(ellipsoid):
    # Imaging convention: the fiber projected on the wall's tangent plane (normal e_rad), its
    # angle from the short-axis circumferential direction (long axis x e_rad) toward the long
    # axis, measured here from the output vectors, against the linear +-60 law at the output
    # depth, away from the apex (normal more than 30 degrees from the axis).
    mesh, c = ellipsoid
    axis = mesh.axis.direction
    for law in (FiberLaw(), FiberLaw(helix_endo=45.0, helix_epi=-70.0, imbrication_endo=5.0)):
        arch = architecture.assign(c, law, mesh)
        n = c.e_rad
        circ = np.cross(axis, n)
        away = np.linalg.norm(circ, axis=1) > 0.5
        circ /= np.maximum(np.linalg.norm(circ, axis=1), 1e-12)[:, None]
        long = np.cross(n, circ)
        measured = np.degrees(np.arctan2(_dot(arch.fiber, long), _dot(arch.fiber, circ)))
        expected = law.helix_endo + (law.helix_epi - law.helix_endo) * c.thickness_fraction
        assert np.abs(measured - expected)[away].max() < 1.0
        np.testing.assert_allclose(arch.helix_angle_sax[away], measured[away], atol=1e-6)
    # The same law laid out in the Laplace frame misses it by more than a degree on these
    # non-circular sections: the check can tell the two apart.
    old = architecture.assign(c, FiberLaw(helix_frame="laplace"), mesh)
    measured = np.degrees(np.arctan2(_dot(old.fiber, long), _dot(old.fiber, circ)))
    assert np.abs(measured - (60.0 - 120.0 * c.thickness_fraction))[away].max() > 1.0


def test_imbrication_measures_back(ellipsoid):
    # An imbrication of 10 degrees: asin(fiber . e_rad) = 10 (definition), triad orthonormal.
    mesh, c = ellipsoid
    law = FiberLaw(imbrication_endo=10.0, imbrication_epi=10.0, sheet_angle_endo=-30.0,
                   sheet_angle_epi=20.0)
    arch = architecture.assign(c, law, mesh)
    tilt = np.degrees(np.arcsin(_dot(arch.fiber, c.e_rad)))
    assert np.abs(tilt - 10.0).max() < 0.5
    assert np.abs(arch.imbrication_angle - 10.0).max() < 0.5
    _assert_triad(arch.fiber, arch.sheet, arch.sheet_normal)
    _assert_triad(arch.cell_fiber, arch.cell_sheet, arch.cell_sheet_normal)
    cell_tilt = np.degrees(np.arcsin(_dot(arch.cell_fiber, c.cell_e_rad)))
    assert np.abs(cell_tilt - 10.0).max() < 0.5


@pytest.mark.parametrize("name", sorted(PRESETS))
def test_presets_reproduce_their_sources(name, ellipsoid):
    # Endocardial and epicardial angles of each source (values from memory, see
    # fibers/fiber_presets.py): Bayer et al., Ann Biomed Eng 2012, helix +40/-50 and sheet
    # -65/+25 in the Laplace frame; Streeter et al., Circ Res 1969, helix +60/-60 against the
    # circumferential direction with 0 at mid-wall.
    source = {"bayer2012": {"helix": (40.0, -50.0), "sheet": (-65.0, 25.0), "frame": "helix_angle"},
              "streeter1969": {"helix": (60.0, -60.0), "sheet": (0.0, 0.0), "frame": "helix_angle_sax"}}[name]
    mesh, c = ellipsoid
    case = resolve_case({"input": {"contours": "c.csv"}, "fibers": {"preset": name}})
    assert case.values["fibers"]["preset_record"]["source"] == PRESETS[name]["source"]
    arch = architecture.assign(c, case.law, mesh)
    endo, epi = mesh.face_nodes(ENDO), mesh.face_nodes(EPI)
    axis_ok = np.linalg.norm(np.cross(mesh.axis.direction, c.e_rad), axis=1) > 0.5
    helix = getattr(arch, source["frame"])
    for nodes, k in ((endo, 0), (epi, 1)):
        nodes = nodes[axis_ok[nodes]]
        np.testing.assert_allclose(helix[nodes], source["helix"][k], atol=1e-6)
        # sheet angle measured back: from the part of e_rad orthogonal to the fiber, about it
        s0 = c.e_rad[nodes]
        b = np.degrees(np.arctan2(_dot(arch.sheet[nodes], np.cross(arch.fiber[nodes], s0)),
                                  _dot(arch.sheet[nodes], s0)))
        np.testing.assert_allclose(b, source["sheet"][k], atol=1e-6)
    if name == "streeter1969":
        np.testing.assert_allclose(architecture.helix_angle(case.law, [0.5]), 0.0, atol=1e-12)


def test_case_keys_preset_override_and_renamed_keys():
    # A key given beside a preset wins; the old sheet keys are refused, naming the new ones.
    case = resolve_case({"input": {"contours": "c.csv"},
                         "fibers": {"preset": "bayer2012", "helix_endo": 50.0}})
    assert case.law.helix_endo == 50.0 and case.law.sheet_angle_endo == -65.0
    assert case.law.preset == "bayer2012" and case.law.depth == "laplace"
    assert resolve_case({"input": {"contours": "c.csv"}}).law == FiberLaw()
    for old, new in (("transverse_endo", "sheet_angle_endo"), ("transverse_epi", "sheet_angle_epi")):
        with pytest.raises(InputError, match=new):
            resolve_case({"input": {"contours": "c.csv"}, "fibers": {old: 10.0}})
    with pytest.raises(InputError, match="positions must rise"):
        resolve_case({"input": {"contours": "c.csv"},
                      "fibers": {"helix_apicobasal": [[0.5, 1.0], [0.2, 2.0]]}})


def test_regional_tables_and_dispersion():
    # Offsets over the apicobasal position add to the depth law (np.interp's piecewise-linear
    # rule, values by hand); the septal weight (1 + cos t) / 2 is 1 on the bisector, 1/2 at 90
    # degrees and 0 opposite; dispersion is linear over depth.
    law = FiberLaw(helix_apicobasal=((0.0, 10.0), (1.0, -10.0)), helix_septal_offset=8.0,
                   sheet_angle_endo=-20.0, sheet_angle_epi=20.0, sheet_apicobasal=((0.0, 0.0), (0.5, 4.0)),
                   dispersion_endo=0.1, dispersion_epi=0.2)
    d, pos = np.array([0.0, 0.5, 1.0]), np.array([0.0, 0.75, 1.0])
    w = architecture.septal_weight([0.0, 90.0, 180.0])
    np.testing.assert_allclose(w, [1.0, 0.5, 0.0], atol=1e-12)
    np.testing.assert_allclose(architecture.helix_angle(law, d, apicobasal=pos, septal_weight=w),
                               [60 + 10 + 8, 0 - 5 + 4, -60 - 10 + 0], atol=1e-12)
    np.testing.assert_allclose(architecture.sheet_angle(law, d, apicobasal=pos), [-20, 4, 24], atol=1e-12)
    np.testing.assert_allclose(architecture.dispersion(law, d), [0.1, 0.15, 0.2], atol=1e-12)
    with pytest.raises(InputError, match="between 0 and 0.333"):
        resolve_case({"input": {"contours": "c.csv"}, "fibers": {"dispersion_epi": 0.5}})


def test_frame_quality_is_the_distance_to_the_axis(sphere):
    # Closed form: the long axis of the test shell is the z axis, so the distance is hypot(x, y).
    mesh, c = sphere
    np.testing.assert_allclose(c.frame_quality, np.hypot(mesh.points[:, 0], mesh.points[:, 1]), atol=1e-9)


def test_apical_cap_cells_agree_with_their_nodes(sphere):
    # Segment 17's rule (fibers.architecture, step 3): in the apical cap, beyond the frame
    # quality threshold, the element fiber and the mean fiber of its nodes agree closely, and
    # far better than with the Laplace frame, which winds about the axis with the gradients'
    # noise (common practice: a smooth field varies by a few degrees over one element).
    mesh, c = sphere
    cap = mesh.points[mesh.tets].mean(axis=1)[:, 2] < -0.8 * RI
    band = cap & (c.cell_frame_quality > coordinates.FRAME_QUALITY_THRESHOLD_MM) & (c.cell_frame_quality < 7.0)
    assert band.sum() > 10
    p95 = {}
    for frame in ("short_axis", "laplace"):
        arch = architecture.assign(c, FiberLaw(helix_frame=frame), mesh)
        mean = arch.fiber[mesh.tets].mean(axis=1)
        mean /= np.linalg.norm(mean, axis=1)[:, None]
        angle = np.degrees(np.arccos(np.clip(np.abs(_dot(mean, arch.cell_fiber)), 0, 1)))
        p95[frame] = np.percentile(angle[band], 95)
    assert p95["short_axis"] < 10.0
    assert p95["laplace"] > 2.0 * p95["short_axis"]


def test_septal_offset_without_landmarks_warns(sphere):
    # The septal weight needs the septal bisector; without it the offset is dropped, said once.
    mesh, c = sphere
    with pytest.warns(UserWarning, match="septal offsets are not applied"):
        arch = architecture.assign(c, FiberLaw(helix_septal_offset=10.0), mesh)
    plain = architecture.assign(c, FiberLaw(), mesh)
    np.testing.assert_allclose(arch.fiber, plain.fiber, atol=1e-12)
