"""Contours to wall mesh: volumes, base plane and invariances against closed forms."""

from __future__ import annotations

import numpy as np
import pytest

from fibers import mesh, stack, surfaces
from fibers.demo import ventricle
from fibers.types import BASE, ENDO, EPI, RawContours

SIZE = 2.5  # mm; coarse enough for speed, fine enough that the mesh error is far below 3 %


def _build(contours, size=SIZE):
    st = stack.check_stack(contours)
    sf = surfaces.fit_surfaces(st)
    return st, sf, mesh.build_mesh(sf, size=size)


def _volumes_ml(wall):
    myo, cav = mesh.volumes_mm3(wall)
    return myo / 1000.0, cav / 1000.0


@pytest.fixture(scope="module")
def exact_oblique():
    lv = ventricle.spheroid_shell(seed=4)
    contours, _ = lv.sample_stack(spacing=8.0, seed=2)
    return lv, contours, _build(contours)


def test_exact_shell_volumes_match_closed_form(exact_oblique):
    # Closed form: volume of a spheroid cap below a plane (CRC Standard Mathematical Tables),
    # SyntheticLV.volumes_ml. Issue #2 asks for 3 %.
    lv, _, (_, _, wall) = exact_oblique
    truth = lv.volumes_ml()
    myo, cav = _volumes_ml(wall)
    assert abs(myo / truth["myocardium_ml"] - 1) < 0.03
    assert abs(cav / truth["cavity_ml"] - 1) < 0.03


def test_oblique_frame_same_volumes_and_base_normal(exact_oblique):
    # Rigid motion leaves volumes unchanged (elementary geometry); the base plane is normal to
    # the true long axis within 2 degrees (issue #2).
    lv, _, (st, _, wall) = exact_oblique
    upright = ventricle.spheroid_shell()
    contours, _ = upright.sample_stack(spacing=8.0, seed=2)
    myo0, cav0 = _volumes_ml(_build(contours)[2])
    myo, cav = _volumes_ml(wall)
    assert abs(myo / myo0 - 1) < 0.01 and abs(cav / cav0 - 1) < 0.01
    angle = np.degrees(np.arccos(np.clip(st.axis.direction @ lv.long_axis, -1, 1)))
    assert angle < 2.0
    # the base faces are flat and normal to the true axis
    base = wall.faces[wall.face_tags == BASE]
    a, b, c = (wall.points[base[:, k]] for k in range(3))
    n = np.cross(b - a, c - a)
    n /= np.linalg.norm(n, axis=1, keepdims=True)
    assert np.degrees(np.arccos(np.clip(n @ lv.long_axis, -1, 1))).max() < 2.0
    heights = (wall.points[np.unique(base)] - st.axis.base_centre) @ st.axis.direction
    assert np.abs(heights).max() < 1e-6


def test_noisy_shifted_stack_volumes(exact_oblique):
    # Noise 0.5 mm and breath-hold shifts of 2.5 mm: alignment and the smoothing fit keep
    # the volumes within 3 % of the closed form (issue #2's held-out condition).
    lv = ventricle.spheroid_shell(endo=(24.0, 55.0), epi=(33.0, 63.0), base_z=18.0, seed=9)
    contours, shifts = lv.sample_stack(spacing=8.0, noise=0.5, shift=2.5, seed=5)
    assert np.abs(shifts).max() > 1.0  # the shifts are really there
    myo, cav = _volumes_ml(_build(contours)[2])
    truth = lv.volumes_ml()
    assert abs(myo / truth["myocardium_ml"] - 1) < 0.03
    assert abs(cav / truth["cavity_ml"] - 1) < 0.03


def test_winding_and_slice_order_do_not_matter(exact_oblique):
    # Invariance (common practice): reversing every contour and shuffling the slices and their
    # ids describes the same stack, so the result must not change.
    lv, contours, (_, _, wall) = exact_oblique
    rng = np.random.default_rng(0)
    ids = np.unique(contours.slice_id)
    new_id = dict(zip(ids, rng.permutation(ids) * 7 + 3))
    rows = []
    for k in rng.permutation(ids):
        for s in ("epi", "endo"):
            sel = np.nonzero((contours.slice_id == k) & (contours.structure == s))[0]
            rows.append(sel[::-1])
    rows = np.concatenate(rows)
    shuffled = RawContours(structure=contours.structure[rows],
                           slice_id=np.array([new_id[k] for k in contours.slice_id[rows]]),
                           points=contours.points[rows], line=np.arange(2, len(rows) + 2))
    myo0, cav0 = _volumes_ml(wall)
    myo, cav = _volumes_ml(_build(shuffled)[2])
    assert abs(myo / myo0 - 1) < 1e-6 and abs(cav / cav0 - 1) < 1e-6


def test_mesh_is_valid_and_tagged(exact_oblique):
    # Invariants: positive volumes, every boundary face tagged, closed boundary (Euler
    # characteristic of a sphere-like surface is 2: V - E + F = 2).
    _, _, (_, _, wall) = exact_oblique
    assert wall.quality["inverted"] == 0 and wall.quality["radius_ratio_min"] > 0.05
    assert set(np.unique(wall.face_tags)) == {ENDO, EPI, BASE}
    faces = wall.faces
    edges = np.unique(np.sort(np.concatenate([faces[:, [0, 1]], faces[:, [1, 2]], faces[:, [2, 0]]]), axis=1), axis=0)
    assert len(np.unique(faces)) - len(edges) + len(faces) == 2


def test_apex_extrapolated_beyond_last_slice(exact_oblique):
    # The apex lies beyond the last contour and near the true apex of the spheroid
    # (exact body: apex at the polar half-axis below the centre).
    lv, _, (st, _, wall) = exact_oblique
    true_epi_apex = lv.to_world(np.array([[0.0, 0.0, -lv.epi[1]]]))[0]
    true_endo_apex = lv.to_world(np.array([[0.0, 0.0, -lv.endo[1]]]))[0]
    assert np.linalg.norm(wall.epi_apex - true_epi_apex) < 1.5
    assert np.linalg.norm(wall.endo_apex - true_endo_apex) < 2.5
    assert (st.axis.base_centre - wall.epi_apex) @ st.axis.direction > st.slices[-1].height


def test_base_of_the_meridians(exact_oblique):
    # The root search of the base runs on the surface's sum grouped by Legendre degree; it must
    # be the same function as the full basis, and its roots must lie in the base plane z = 0.
    _, _, (_, sf, _) = exact_oblique
    rng = np.random.default_rng(3)
    theta = rng.uniform(-np.pi, np.pi, 500)
    mu = rng.uniform(0.0, 3.0, 500)
    for name in ("endo", "epi"):
        np.testing.assert_allclose(sf.along_meridians(name, theta)(mu), sf.lam(name, mu, theta), atol=1e-13)
        rim = sf.local_point(name, sf.base_mu(name, theta), theta)
        assert np.abs(rim[:, 2]).max() < 1e-9


def test_boundary_is_the_finished_meshs_boundary(exact_oblique):
    # gmsh keeps discrete surfaces as given (its documented behaviour for discrete entities),
    # so the pipeline may draw the cavity and background pools from our triangulation while
    # gmsh fills the volume: the same triangles, the same points, the same tags
    _, _, (_, sf, wall) = exact_oblique
    boundary = mesh.wall_boundary(sf, size=SIZE)

    def keyed(points, faces, tags):
        tri = np.sort(points[faces].round(12).view([("", float)] * 3).reshape(-1, 3), axis=1)
        return sorted(zip(map(bytes, tri), tags.tolist()))

    assert len(boundary.faces) == len(wall.faces)
    assert keyed(boundary.points, boundary.faces, boundary.face_tags) == keyed(wall.points, wall.faces, wall.face_tags)
    from fibers import pools
    from fibers.config import PoolSettings

    for sampler in ("random", "sobol"):
        settings = PoolSettings(cavity=3_000, background=5_000, seed=3, sampler=sampler)
        ours, theirs = pools.draw_outside(boundary, settings), pools.draw_outside(wall, settings)
        for name in ("cavity", "background"):
            for key, value in theirs[name].items():
                assert np.array_equal(ours[name][key], value), (sampler, name, key)


def test_boundary_nodes_and_their_distances_carry_over_to_the_filled_mesh(exact_oblique):
    # gmsh renumbers the nodes; the mesh records where each of ours went (its position is the
    # same), and the distances found on the boundary before the fill are the full search's
    # (to rounding: the boundary's world positions are computed from the same local ones)
    from fibers import coordinates

    _, _, (_, sf, wall) = exact_oblique
    boundary = mesh.wall_boundary(sf, size=SIZE)
    rows = wall.boundary_nodes
    assert rows is not None and len(np.unique(rows)) == len(boundary.points)
    np.testing.assert_allclose(wall.points[rows], boundary.points, rtol=0, atol=1e-12)
    known = coordinates.boundary_distances(boundary)
    assert known.rows_in(wall) is rows
    for ours, full in zip(coordinates.surface_distances(wall, known=known), coordinates.surface_distances(wall)):
        np.testing.assert_allclose(ours, full, rtol=0, atol=1e-12)
    for tag, d in zip((ENDO, EPI), coordinates.surface_distances(wall, known=known)):
        assert np.all(d[wall.face_nodes(tag)] == 0.0) and np.all(d[np.setdiff1d(np.arange(len(d)), wall.face_nodes(tag))] > 0)
    # a mesh that does not know its boundary's nodes (read from files, say) is searched in full
    from dataclasses import replace

    alone = replace(wall, boundary_nodes=None)
    assert known.rows_in(alone) is None
    for ours, full in zip(coordinates.surface_distances(alone, known=known), coordinates.surface_distances(wall)):
        assert np.array_equal(ours, full)


def test_boundary_search_near_our_nodes_finds_every_face(exact_oblique):
    # the faces found near our triangles' nodes are the full search's, row for row
    from fibers import meshtools

    _, _, (_, _, wall) = exact_oblique
    on = np.zeros(len(wall.points), bool)
    on[wall.faces] = True
    full, owner = meshtools.boundary_faces(wall.tets)
    near, near_owner = meshtools.boundary_faces(wall.tets, on)
    assert np.array_equal(full, near) and np.array_equal(owner, near_owner)
    assert np.array_equal(near, wall.faces)


def test_a_boundary_gmsh_changed_is_refused(exact_oblique):
    # a hole inside the wall (an element with no node on the boundary taken out) leaves the
    # faces near our nodes as they were, so only the volume check can see it; an element
    # with a boundary face taken out changes the faces found
    from fibers import meshtools

    _, _, (_, _, wall) = exact_oblique
    tri = {tag: wall.faces[wall.face_tags == tag] for tag in (ENDO, EPI, BASE)}
    tets, faces, tags, owners = mesh.tagged_boundary(wall.points, wall.tets, tri)
    assert np.array_equal(faces, wall.faces) and np.array_equal(tags, wall.face_tags)
    # each face is one of its owner's four faces
    local = np.sort(tets[owners][:, [[1, 2, 3], [0, 2, 3], [0, 1, 3], [0, 1, 2]]], axis=2)
    assert (local == np.sort(faces, axis=1)[:, None, :]).all(axis=2).any(axis=1).all()
    on = np.zeros(len(wall.points), bool)
    on[wall.faces] = True
    inner = np.flatnonzero(~on[wall.tets].any(axis=1))[0]
    outer = meshtools.boundary_faces(wall.tets)[1][0]
    for dropped in (inner, outer):
        with pytest.raises(RuntimeError, match="not bounded by the fitted surfaces"):
            mesh.tagged_boundary(wall.points, np.delete(wall.tets, dropped, axis=0), tri)


def test_tet_quality_closed_forms():
    # Closed forms (handbook geometry of the tetrahedron): the regular one has radius ratio 1 and
    # every dihedral angle arccos(1/3) = 70.53 deg; the right-corner one (0, e1, e2, e3) has
    # inradius 1 / (3 + sqrt 3), circumradius sqrt(3) / 2, dihedral angles 90 deg at the three
    # edges through the corner and arccos(1 / sqrt 3) = 54.74 deg at the other three.
    from fibers.mesh import tet_quality

    regular = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]], float)
    corner = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    q = tet_quality(regular, np.array([[0, 2, 1, 3]]))  # positively oriented
    assert q["radius_ratio_min"] == pytest.approx(1.0, rel=1e-12)
    assert q["dihedral_min_deg"] == pytest.approx(np.degrees(np.arccos(1 / 3)), rel=1e-12)
    assert q["dihedral_max_deg"] == pytest.approx(np.degrees(np.arccos(1 / 3)), rel=1e-12)
    assert q["volume_min_mm3"] == pytest.approx(8 / 3, rel=1e-12) and q["inverted"] == 0
    q = tet_quality(corner, np.array([[0, 1, 2, 3]]))
    assert q["radius_ratio_min"] == pytest.approx(3 / (3 + np.sqrt(3)) / (np.sqrt(3) / 2), rel=1e-12)
    assert q["dihedral_min_deg"] == pytest.approx(np.degrees(np.arccos(1 / np.sqrt(3))), rel=1e-12)
    assert q["dihedral_max_deg"] == pytest.approx(90.0, rel=1e-12)
    assert q["volume_min_mm3"] == pytest.approx(1 / 6, rel=1e-12)
    # an element listed in the wrong orientation counts as inverted
    assert tet_quality(corner, np.array([[0, 2, 1, 3]]))["inverted"] == 1
