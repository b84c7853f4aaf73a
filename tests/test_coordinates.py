"""Cardiac coordinates and frames: the hemispherical-shell closed form, convergence, invariants."""

import numpy as np
import pytest
import shells

from fibers import coordinates, fem
from fibers.errors import InputError
from fibers.types import BASE, ENDO, EPI

RI, RO = 20.0, 30.0


def _exact_transmural(x):
    # Radial harmonic function with 0 at r = RI and 1 at r = RO. Its normal derivative on the
    # equatorial cut z = 0 is zero, so it also solves the problem with a natural condition on
    # the base (closed form).
    r = np.linalg.norm(x, axis=-1)
    return (1 / RI - 1 / r) / (1 / RI - 1 / RO)


# Degree-2, 4-point rule on the tetrahedron, weights 1/4 of the volume
# (Stroud, Approximate Calculation of Multiple Integrals, 1971; from memory).
_QA, _QB = 0.5854101966249685, 0.1381966011250105
_QUAD = np.full((4, 4), _QB) + np.eye(4) * (_QA - _QB)


def _l2_error(mesh, u):
    vol, _ = fem.tet_gradients(mesh.points, mesh.tets)
    x = np.einsum("qk,mkd->mqd", _QUAD, mesh.points[mesh.tets])
    uh = np.einsum("qk,mk->mq", _QUAD, u[mesh.tets])
    return float(np.sqrt(np.sum(0.25 * vol[:, None] * (uh - _exact_transmural(x)) ** 2)))


@pytest.fixture(scope="module")
def sphere_shells():
    return {h: shells.spheroid_shell(inner=(RI, RI), outer=(RO, RO), size=h)
            for h in (3.0, 2.2, 1.6)}


@pytest.fixture(scope="module")
def spheroid():
    return shells.spheroid_shell(inner=(20.0, 35.0), outer=(30.0, 45.0), size=2.5)


@pytest.fixture(scope="module")
def spheroid_coords(spheroid):
    return coordinates.compute(spheroid)


def test_transmural_matches_spherical_shell_closed_form(sphere_shells):
    mesh = sphere_shells[1.6]
    err = np.abs(coordinates.compute(mesh).transmural - _exact_transmural(mesh.points))
    # Nodal P1 error at h = 1.6 mm in a 10 mm wall: measured mean 1.3e-3, 99th pct 5.4e-3.
    assert err.mean() < 3e-3
    assert np.percentile(err, 99) < 1.5e-2


def test_transmural_converges_at_order_two_in_l2(sphere_shells):
    # P1 Lagrange: ||u - u_h||_L2 = O(h^2) (Brenner & Scott, Mathematical Theory of Finite
    # Element Methods, ch. 5). h is measured as (volume / elements)^(1/3).
    h, e = [], []
    for mesh in sphere_shells.values():
        vol, _ = fem.tet_gradients(mesh.points, mesh.tets)
        h.append((vol.sum() / len(mesh.tets)) ** (1 / 3))
        e.append(_l2_error(mesh, coordinates.compute(mesh).transmural))
    order = np.polyfit(np.log(h), np.log(e), 1)[0]
    assert 1.8 < order < 2.5, (h, e, order)


def test_dirichlet_values_hold(spheroid, spheroid_coords):
    c = spheroid_coords
    # Definitions of the README's conventions; endo/epi values win on the base rim.
    assert np.all(c.transmural[spheroid.face_nodes(ENDO)] == 0.0)
    assert np.all(c.transmural[spheroid.face_nodes(EPI)] == 1.0)
    assert np.all(c.apicobasal[spheroid.face_nodes(BASE)] == 1.0)
    patch = coordinates.apex_patch(spheroid)
    assert np.all(c.apicobasal[patch] == 0.0)
    assert np.all(np.linalg.norm(spheroid.points[patch] - spheroid.epi_apex, axis=1) < 6.0)


def test_apicobasal_increases_from_apex_to_base(spheroid, spheroid_coords):
    # Maximum principle (Evans, Partial Differential Equations, 2.2.3): no interior extremum, so
    # along the epicardium the coordinate rises with height; check the rank correlation.
    epi = spheroid.face_nodes(EPI)
    z = spheroid.points[epi, 2]
    ab = spheroid_coords.apicobasal[epi]
    rank = lambda v: np.argsort(np.argsort(v))  # noqa: E731
    rho = np.corrcoef(rank(z), rank(ab))[0, 1]
    assert rho > 0.99


def test_circumferential_angle_closed_form(spheroid, spheroid_coords):
    # Axis +z, reference +x: the angle is atan2(y, x) in [-180, 180) (closed form).
    p = spheroid.points
    expected = np.degrees(np.arctan2(p[:, 1], p[:, 0]))
    expected[expected >= 180.0] -= 360.0
    got = spheroid_coords.circumferential
    assert got.min() >= -180.0 and got.max() < 180.0
    off_axis = np.hypot(p[:, 0], p[:, 1]) > 1e-6
    np.testing.assert_allclose(got[off_axis], expected[off_axis], atol=1e-9)
    # A zero direction along +y shifts every angle by -90 degrees.
    shifted = coordinates.compute(spheroid, zero_direction=np.array([0.0, 2.0, 0.0]))
    diff = (got - shifted.circumferential - 90.0 + 180.0) % 360.0 - 180.0
    assert np.max(np.abs(diff[off_axis])) < 1e-9


def test_frame_points_the_documented_ways(spheroid, spheroid_coords):
    # On a coaxial spheroid shell by symmetry (common practice): e_circ is the azimuthal
    # direction (-sin phi, cos phi, 0) of increasing angle, e_long points apex -> base.
    c, p = spheroid_coords, spheroid.points
    rho = np.hypot(p[:, 0], p[:, 1])
    away = rho > 5.0
    phi = np.arctan2(p[:, 1], p[:, 0])
    azimuth = np.column_stack([-np.sin(phi), np.cos(phi), np.zeros_like(phi)])
    # The discrete mesh is only nearly axisymmetric: measured min 0.976, 1st percentile 0.998.
    agree = np.einsum("ij,ij->i", c.e_circ[away], azimuth[away])
    assert agree.min() > 0.95 and np.percentile(agree, 1) > 0.99
    assert np.min(c.e_long[away, 2]) > 0.0
    # e_rad points out of the cavity: along the outward normal of the inner spheroid.
    endo = spheroid.face_nodes(ENDO)
    q = p[endo]
    normal = q / np.array([20.0**2, 20.0**2, 35.0**2])
    normal /= np.linalg.norm(normal, axis=1)[:, None]
    assert np.median(np.einsum("ij,ij->i", c.e_rad[endo], normal)) > 0.99


def _assert_right_handed_orthonormal(a, b, c):
    # Orthonormal right-handed triad: unit, pairwise orthogonal, det = +1 (common practice).
    for v in (a, b, c):
        assert np.all(np.isfinite(v))
        np.testing.assert_allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-6)
    for u, v in ((a, b), (b, c), (a, c)):
        assert np.max(np.abs(np.einsum("ij,ij->i", u, v))) < 1e-6
    det = np.einsum("ij,ij->i", np.cross(a, b), c)
    np.testing.assert_allclose(det, 1.0, atol=1e-6)


def test_frames_are_orthonormal_right_handed_everywhere(spheroid, spheroid_coords):
    c = spheroid_coords
    # e_circ = e_long x e_rad means (e_rad, e_circ, e_long) is right-handed.
    _assert_right_handed_orthonormal(c.e_rad, c.e_circ, c.e_long)
    _assert_right_handed_orthonormal(c.cell_e_rad, c.cell_e_circ, c.cell_e_long)
    np.testing.assert_allclose(c.e_circ, np.cross(c.e_long, c.e_rad), atol=1e-12)
    for s in (c.transmural, c.apicobasal, c.circumferential, c.cell_transmural,
              c.cell_apicobasal, c.cell_circumferential):
        assert np.all(np.isfinite(s))
    # The mesh has nodes on the axis at both apices, where the fallbacks act.
    on_axis = np.hypot(spheroid.points[:, 0], spheroid.points[:, 1]) < 1e-9
    assert on_axis.sum() >= 2


def test_rigid_motion_moves_vectors_and_keeps_scalars(spheroid, spheroid_coords):
    # Laplace's equation and the frame rules are invariant under rigid motions (common
    # practice); gmsh meshes the same body identically, the shell helper then moves it.
    R = shells.random_rotation(7)
    t = np.array([12.0, -40.0, 95.0])
    moved = shells.spheroid_shell(inner=(20.0, 35.0), outer=(30.0, 45.0), size=2.5,
                                  rotation=R, translation=t)
    np.testing.assert_allclose(moved.points, spheroid.points @ R.T + t, atol=1e-9)
    a, b = spheroid_coords, coordinates.compute(moved)
    for name in ("transmural", "apicobasal", "cell_transmural"):
        np.testing.assert_allclose(getattr(b, name), getattr(a, name), atol=1e-7)
    diff = (b.circumferential - a.circumferential + 180.0) % 360.0 - 180.0
    off_axis = np.hypot(spheroid.points[:, 0], spheroid.points[:, 1]) > 1e-6
    assert np.max(np.abs(diff[off_axis])) < 1e-7
    for name in ("e_rad", "e_long", "e_circ", "cell_e_rad", "cell_e_long", "cell_e_circ"):
        np.testing.assert_allclose(getattr(b, name), getattr(a, name) @ R.T, atol=1e-5)


def test_zero_direction_along_the_axis_is_an_input_error(spheroid):
    with pytest.raises(InputError, match="parallel to the long axis"):
        coordinates.compute(spheroid, zero_direction=np.array([0.0, 0.0, 1.0]))


def test_apicobasal_levels_evenly_spaced_along_axis(spheroid, spheroid_coords):
    # The remapped apicobasal coordinate is linear in mean depth below the base (its design):
    # on a coaxial spheroidal shell (an exact body) the mean value of nodes at a given depth
    # falls within 0.08 of 1 - depth / (depth of the epicardial apex).
    depth = (spheroid.axis.base_centre - spheroid.points) @ spheroid.axis.direction
    apex_depth = (spheroid.axis.base_centre - spheroid.epi_apex) @ spheroid.axis.direction
    bands = np.linspace(0.0, apex_depth, 11)
    which = np.digitize(depth, bands[1:-1])
    mean_value = np.bincount(which, weights=spheroid_coords.apicobasal) / np.bincount(which)
    expected = 1.0 - 0.5 * (bands[:-1] + bands[1:]) / apex_depth
    assert np.abs(mean_value - expected).max() < 0.08
