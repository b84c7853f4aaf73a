"""Fiber architecture: angle laws measured back from the vectors, triad invariants, bad tables."""

import numpy as np
import pytest
import shells

from fibers import architecture, coordinates
from fibers.config import FiberLaw
from fibers.errors import InputError
from fibers.types import ENDO, EPI


@pytest.fixture(scope="module")
def mesh():
    return shells.spheroid_shell(inner=(20.0, 35.0), outer=(30.0, 45.0), size=3.0)


@pytest.fixture(scope="module")
def coords(mesh):
    return coordinates.compute(mesh)


def _random_frames(k, seed):
    """Right-handed orthonormal frames (e_rad, e_long, e_circ) from random rotations."""
    rng = np.random.default_rng(seed)
    q, r = np.linalg.qr(rng.normal(size=(k, 3, 3)))
    q = q * np.sign(np.diagonal(r, axis1=1, axis2=2))[:, None, :]
    q[np.linalg.det(q) < 0, :, 0] *= -1
    e_rad, e_long = q[:, :, 0], q[:, :, 1]
    return e_rad, e_long, np.cross(e_long, e_rad)


def _assert_triad(f, s, n):
    # Orthonormal right-handed triad: unit, pairwise orthogonal, det = +1 (common practice).
    for v in (f, s, n):
        assert np.all(np.isfinite(v))
        np.testing.assert_allclose(np.linalg.norm(v, axis=1), 1.0, atol=1e-6)
    for u, v in ((f, s), (s, n), (f, n)):
        assert np.max(np.abs(np.einsum("ij,ij->i", u, v))) < 1e-6
    np.testing.assert_allclose(np.einsum("ij,ij->i", np.cross(f, s), n), 1.0, atol=1e-6)


def test_linear_laws():
    # Default law +60 at the endocardium to -60 at the epicardium, linear (README conventions,
    # Streeter et al. 1969 from memory); the endpoints and midpoint follow by hand.
    law = FiberLaw()
    np.testing.assert_allclose(architecture.helix_angle(law, [0.0, 0.5, 1.0, 0.25]),
                               [60.0, 0.0, -60.0, 30.0], atol=1e-12)
    law = FiberLaw(sheet_angle_endo=10.0, sheet_angle_epi=-20.0)
    np.testing.assert_allclose(architecture.sheet_angle(law, [0.0, 1.0, 0.5]),
                               [10.0, -20.0, -5.0], atol=1e-12)


def test_helix_and_sheet_angles_measured_back_from_vectors():
    # Definitions of the README's conventions: helix = atan2(f.e_long, f.e_circ); the sheet angle
    # turns the sheet about the fiber starting from e_rad, so
    # sheet = cos(b) e_rad + sin(b) (fiber x e_rad).
    e_rad, e_long, e_circ = _random_frames(2000, seed=1)
    depth = np.random.default_rng(2).uniform(0.0, 1.0, 2000)
    law = FiberLaw(helix_endo=70.0, helix_epi=-50.0, sheet_angle_endo=-15.0, sheet_angle_epi=25.0)
    f, s, n, helix, trans = architecture.orient(e_rad, e_long, e_circ, depth, law)
    measured = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, e_long),
                                     np.einsum("ij,ij->i", f, e_circ)))
    np.testing.assert_allclose(measured, 70.0 - 120.0 * depth, atol=1e-9)
    np.testing.assert_allclose(helix, 70.0 - 120.0 * depth, atol=1e-12)
    assert np.max(np.abs(np.einsum("ij,ij->i", f, e_rad))) < 1e-12
    b = np.degrees(np.arctan2(np.einsum("ij,ij->i", s, np.cross(f, e_rad)),
                              np.einsum("ij,ij->i", s, e_rad)))
    np.testing.assert_allclose(b, -15.0 + 40.0 * depth, atol=1e-9)
    np.testing.assert_allclose(trans, -15.0 + 40.0 * depth, atol=1e-12)
    _assert_triad(f, s, n)


def test_zero_angles_give_the_frame_itself():
    # Helix 0 and sheet angle 0: fiber = e_circ, sheet = e_rad, sheet_normal = e_circ x e_rad =
    # -e_long (the README's conventions).
    e_rad, e_long, e_circ = _random_frames(50, seed=4)
    law = FiberLaw(helix_endo=0.0, helix_epi=0.0)
    f, s, n, _, _ = architecture.orient(e_rad, e_long, e_circ, np.zeros(50), law)
    np.testing.assert_allclose(f, e_circ, atol=1e-12)
    np.testing.assert_allclose(s, e_rad, atol=1e-12)
    np.testing.assert_allclose(n, -e_long, atol=1e-12)


def test_helix_profile_table_is_interpolated():
    # Piecewise-linear interpolation of the table, constant beyond its ends (np.interp's rule,
    # values by hand).
    law = FiberLaw(helix_profile=((0.1, 80.0), (0.5, 20.0), (1.0, -40.0)))
    got = architecture.helix_angle(law, [0.0, 0.1, 0.3, 0.5, 0.75, 1.0])
    np.testing.assert_allclose(got, [80.0, 80.0, 50.0, 20.0, -10.0, -40.0], atol=1e-12)
    e_rad, e_long, e_circ = _random_frames(10, seed=5)
    f, _, _, _, _ = architecture.orient(e_rad, e_long, e_circ, np.full(10, 0.3), law)
    measured = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, e_long),
                                     np.einsum("ij,ij->i", f, e_circ)))
    np.testing.assert_allclose(measured, 50.0, atol=1e-9)


@pytest.mark.parametrize("table, message", [
    (((0.0, 60.0),), "at least 2"),
    (((0.5, 60.0), (0.2, 0.0)), "increase strictly"),
    (((0.0, 60.0), (0.0, 10.0)), "increase strictly"),
    (((-0.1, 60.0), (1.0, -60.0)), r"in \[0, 1\]"),
    (((0.0, 60.0), (1.2, -60.0)), r"in \[0, 1\]"),
    (((0.0, 60.0, 1.0), (1.0, -60.0, 1.0)), "pairs"),
])
def test_bad_profile_tables_are_input_errors(table, message):
    with pytest.raises(InputError, match=message):
        architecture.helix_angle(FiberLaw(helix_profile=table), [0.5])


def test_orient_reorthonormalises_perturbed_frames():
    # Interpolated frames are neither unit nor orthogonal; after Gram-Schmidt the helix angle
    # is measured in the cleaned frame (the README's conventions).
    e_rad, e_long, e_circ = _random_frames(500, seed=6)
    rng = np.random.default_rng(7)
    noisy = [v * rng.uniform(0.3, 2.0, (500, 1)) + 0.2 * rng.normal(size=(500, 3))
             for v in (e_rad, e_long, e_circ)]
    depth = rng.uniform(0, 1, 500)
    f, s, n, _, _ = architecture.orient(*noisy, depth, FiberLaw())
    _assert_triad(f, s, n)
    r = noisy[0] / np.linalg.norm(noisy[0], axis=1)[:, None]
    np.testing.assert_allclose(s, r, atol=1e-12)  # sheet angle 0: the sheet is the unit e_rad
    # Degenerate rows: zero e_rad, e_long parallel to e_rad.
    bad_rad = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]])
    bad_long = np.array([[0.0, 0.0, 1.0], [2.0, 0.0, 0.0]])
    bad_circ = np.array([[0.0, 1.0, 0.0], [0.0, 1.0, 0.0]])
    f, s, n, _, _ = architecture.orient(bad_rad, bad_long, bad_circ, np.array([0.2, 0.8]),
                                        FiberLaw())
    _assert_triad(f, s, n)


def test_orient_rejects_nan_frames():
    e_rad, e_long, e_circ = _random_frames(3, seed=8)
    e_rad[1, 0] = np.nan
    with pytest.raises(InputError, match="NaN"):
        architecture.orient(e_rad, e_long, e_circ, np.zeros(3), FiberLaw())


def test_assign_on_a_mesh(mesh, coords):
    law = FiberLaw()
    arch = architecture.assign(coords, law, mesh)
    _assert_triad(arch.fiber, arch.sheet, arch.sheet_normal)
    _assert_triad(arch.cell_fiber, arch.cell_sheet, arch.cell_sheet_normal)
    assert arch.cell_fiber.shape == (len(mesh.tets), 3)
    # Endocardial nodes carry the endocardial angle and epicardial ones the epicardial angle
    # (the README's default law), in the short-axis frame the default lays it out in.
    np.testing.assert_allclose(arch.helix_angle_sax[mesh.face_nodes(ENDO)], 60.0, atol=1e-9)
    np.testing.assert_allclose(arch.helix_angle_sax[mesh.face_nodes(EPI)], -60.0, atol=1e-9)
    measured = np.degrees(np.arctan2(np.einsum("ij,ij->i", arch.fiber, coords.e_long),
                                     np.einsum("ij,ij->i", arch.fiber, coords.e_circ)))
    np.testing.assert_allclose(measured, arch.helix_angle, atol=1e-6)
    # The rule of earlier versions: Laplace depth, Laplace frame.
    old = architecture.assign(coords, FiberLaw(depth="laplace", helix_frame="laplace"), mesh)
    np.testing.assert_allclose(old.helix_angle, 60.0 - 120.0 * coords.transmural, atol=1e-9)
    cell_helix = np.degrees(np.arctan2(np.einsum("ij,ij->i", old.cell_fiber, coords.cell_e_long),
                                       np.einsum("ij,ij->i", old.cell_fiber, coords.cell_e_circ)))
    np.testing.assert_allclose(cell_helix, 60.0 - 120.0 * coords.cell_transmural, atol=1e-6)


def test_fibers_rotate_with_the_mesh(mesh, coords):
    # Rigid-motion invariance of the rules (common practice): vectors rotate, angles stay.
    R = shells.random_rotation(11)
    moved = shells.spheroid_shell(inner=(20.0, 35.0), outer=(30.0, 45.0), size=3.0, rotation=R,
                                  translation=[5.0, 6.0, -7.0])
    a = architecture.assign(coords, FiberLaw(), mesh)
    b = architecture.assign(coordinates.compute(moved), FiberLaw(), moved)
    np.testing.assert_allclose(b.helix_angle, a.helix_angle, atol=1e-5)
    np.testing.assert_allclose(b.helix_angle_sax, a.helix_angle_sax, atol=1e-5)
    for name in ("fiber", "sheet", "sheet_normal", "cell_fiber", "cell_sheet",
                 "cell_sheet_normal"):
        np.testing.assert_allclose(getattr(b, name), getattr(a, name) @ R.T, atol=1e-5)


def test_point_triad_in_chunks_gives_the_same_bits(monkeypatch):
    # point_triad lays out long inputs chunk by chunk (cache-sized temporaries); its arithmetic is
    # row by row, so the chunks must give the bits of one pass, degenerate rows included (a zero
    # e_rad takes the fallback in its own row only). The reference is the same function with
    # chunking off: a self-consistency check of the chunking, not of the rule.
    from dataclasses import replace

    from fibers.types import LongAxis

    rng = np.random.default_rng(5)
    k = 5000
    e_rad = rng.normal(size=(k, 3))
    e_rad /= np.linalg.norm(e_rad, axis=1, keepdims=True)
    e_rad[[7, 4321]] = 0.0  # degenerate: the fallback (e_circ x e_long) in these rows
    e_long = rng.normal(size=(k, 3))
    e_circ = np.cross(e_long, e_rad + 0.3)
    fields = {"points": rng.normal(scale=30.0, size=(k, 3)), "e_rad": e_rad, "e_long": e_long, "e_circ": e_circ,
              "transmural": rng.random(k), "thickness_fraction": rng.random(k), "apicobasal": rng.random(k),
              "circumferential": rng.uniform(-180, 180, k)}
    axis = LongAxis(base_centre=np.zeros(3), direction=np.array([0.0, 0.0, 1.0]), reference=np.array([1.0, 0.0, 0.0]))
    for law in (FiberLaw(), replace(FiberLaw(), helix_frame="laplace", helix_septal_offset=10.0)):
        monkeypatch.setattr(architecture, "_CHUNK", 10 * k)
        whole = architecture.point_triad(fields, law, axis=axis, septal=True)
        monkeypatch.setattr(architecture, "_CHUNK", 777)
        chunked = architecture.point_triad(fields, law, axis=axis, septal=True)
        assert whole.keys() == chunked.keys()
        for name in whole:
            assert np.array_equal(whole[name], chunked[name]), name
        assert np.all(np.isfinite(whole["fiber"]))
