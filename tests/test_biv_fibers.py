"""Both ventricles: septal depth, frames and the rule-based fibers of Bayer et al. 2012."""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from fibers.biv import coordinates as bc, mesh as biv_mesh

from biv_case import exact_case

EQUAL_SHEETS = bc.BiVLaw(lv_sheet_endo=0.0, lv_sheet_epi=0.0, rv_sheet_endo=0.0, rv_sheet_epi=0.0)


@pytest.fixture(scope="module")
def built():
    *_, wall = exact_case()
    return wall, bc.compute(wall), bc.compute(wall, EQUAL_SHEETS)


def _cell_helix(coords, arch, cells):
    f = arch.cell_fiber[cells]
    h = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, coords.cell_e_long[cells]),
                              np.einsum("ij,ij->i", f, coords.cell_e_circ[cells])))
    return np.where(h > 90, h - 180, np.where(h <= -90, h + 180, h))  # a fiber is a line


def _away_from_insertions(wall, region):
    local = wall.axis.to_local(wall.points[wall.tets].mean(axis=1))
    u = wall.right.fraction(local[:, 2], np.arctan2(local[:, 1], local[:, 0]))
    return np.flatnonzero((wall.region == region) & (u > 0.2) & (u < 0.8)
                          & (local[:, 2] < -5.0) & (local[:, 2] > -40.0))


def test_septal_depth_runs_from_left_to_right(built):
    wall, (coords, arch, fields), _ = built
    d = fields.septal_depth
    # boundary values by construction; within [0, 1] by the maximum principle of harmonic
    # functions (Evans, Partial Differential Equations, 2.2.3)
    assert np.all(d[wall.face_nodes(1)] == 0.0) and np.allclose(d[wall.face_nodes(4)], 1.0)
    assert d.min() >= 0.0 and d.max() <= 1.0
    # across the septum it grows with the distance from the left cavity (toward the right one)
    sept = wall.region == biv_mesh.SEPTUM
    local = wall.axis.to_local(wall.points[wall.tets].mean(axis=1))
    rho = np.hypot(local[:, 0], local[:, 1])
    r_epi = wall.right.epi_radius(np.minimum(local[:, 2], 0), np.arctan2(local[:, 1], local[:, 0]))
    assert np.corrcoef(fields.cell_septal_depth[sept], (rho - r_epi)[sept])[0, 1] > 0.9


def test_triads_orthonormal_and_right_handed(built):
    _, (coords, arch, _), _ = built
    for f, s, n in ((arch.fiber, arch.sheet, arch.sheet_normal),
                    (arch.cell_fiber, arch.cell_sheet, arch.cell_sheet_normal),
                    (coords.e_circ, coords.e_long, coords.e_rad)):
        T = np.stack([f, s, n], axis=2)
        assert np.abs(np.einsum("kji,kjl->kil", T, T) - np.eye(3)).max() < 1e-9  # orthonormal
        assert np.linalg.det(T).min() > 1 - 1e-9                                    # right-handed


def test_rv_free_wall_helix_follows_its_law(built):
    wall, (coords, arch, _), _ = built
    law = bc.BiVLaw()
    cells = _away_from_insertions(wall, biv_mesh.RV_FREE_WALL)
    assert len(cells) > 100
    e = coords.cell_transmural[cells]
    # slerp between turns about one axis interpolates the angle linearly (Shoemake, SIGGRAPH
    # 1985): from the endocardial frame toward the epicardial one turned by a_w(e) with weight e,
    # a(e) = a_endo + (a_epi - a_endo) e^2
    want = law.rv_helix_endo + (law.rv_helix_epi - law.rv_helix_endo) * e ** 2
    assert np.abs(_cell_helix(coords, arch, cells) - want).max() < 3.0


def test_lv_free_wall_helix_exact_with_equal_sheets(built):
    wall, _, (coords, arch, _) = built
    law = EQUAL_SHEETS
    local = wall.axis.to_local(wall.points[wall.tets].mean(axis=1))
    u = wall.right.fraction(local[:, 2], np.arctan2(local[:, 1], local[:, 0]))
    # away from the right ventricle and from the apex (where e_long is undefined at the pole)
    cells = np.flatnonzero((wall.region == biv_mesh.LV_FREE_WALL) & (np.abs(u - 0.5) > 1.0)
                           & (local[:, 2] > -60.0))
    e = coords.cell_transmural[cells]
    want = law.lv_helix_endo + (law.lv_helix_epi - law.lv_helix_endo) * e ** 2  # Shoemake 1985, as above
    assert np.abs(_cell_helix(coords, arch, cells) - want).max() < 0.5


def test_right_handed_helix_at_both_endocardia(built):
    wall, (coords, arch, _), _ = built
    law = bc.BiVLaw()
    owner = biv_mesh.meshtools.boundary_faces(wall.tets)[1]
    lv_nodes = wall.face_nodes(1)
    rv_free = np.unique(wall.faces[(wall.face_tags == 4) & (wall.region[owner] == biv_mesh.RV_FREE_WALL)])
    # positive helix = right-handed (Streeter et al., Circ Res 1969, from memory)
    assert np.allclose(arch.helix_angle[lv_nodes], law.lv_helix_endo, atol=1e-6)
    assert np.median(arch.helix_angle[rv_free]) == pytest.approx(law.rv_helix_endo, abs=1.0)


def test_quaternions_against_scipy():
    # scipy's Rotation (a general-purpose reference library) for the matrix <-> quaternion maps
    R = Rotation.random(200, random_state=1)
    q = bc.to_quaternion(R.as_matrix())
    ref = R.as_quat()[:, [3, 0, 1, 2]]  # scipy stores (x, y, z, w)
    assert np.allclose(np.abs(np.einsum("ij,ij->i", q, ref)), 1.0)
    assert np.allclose(bc.to_matrix(q), R.as_matrix())


def test_bislerp_invariants():
    A = Rotation.random(50, random_state=2).as_matrix()
    t = np.linspace(0, 1, 50)
    assert np.allclose(bc.bislerp(A, A, t), A)
    # B = A turned by a half-turn about its own fiber axis: the same directions up to sign, so
    # the interpolation stays at A
    half = Rotation.from_rotvec([np.pi, 0, 0]).as_matrix()
    assert np.allclose(bc.bislerp(A, A @ half, t), A)
    # turns about a common axis by a and b: the angle interpolates linearly (Shoemake 1985)
    a, b = np.radians(10.0), np.radians(70.0)
    Ra = Rotation.from_rotvec(np.outer(np.full(50, a), [0, 0, 1])).as_matrix()
    Rb = Rotation.from_rotvec(np.outer(np.full(50, b), [0, 0, 1])).as_matrix()
    got = Rotation.from_matrix(bc.bislerp(Ra, Rb, t)).as_rotvec()[:, 2]
    assert np.allclose(got, (1 - t) * a + t * b)


def test_law_from_the_case_file_and_refusals():
    from fibers.errors import InputError
    from fibers.io.case import resolve_case

    case = resolve_case({"input": {"contours": "c.csv"}, "biventricular": {"rv_helix_endo": 30.0}})
    law = bc.BiVLaw(**case.biv_law)
    assert law.rv_helix_endo == 30.0 and law.lv_helix_endo == 40.0
    law.check()
    with pytest.raises(InputError, match="at most 90"):
        bc.BiVLaw(lv_helix_endo=60.0, lv_helix_epi=-60.0).check()


def test_septal_helix_runs_smoothly_from_left_to_right(built):
    wall, (coords, arch, fields), _ = built
    law = bc.BiVLaw()
    local = wall.axis.to_local(wall.points[wall.tets].mean(axis=1))
    u = wall.right.fraction(local[:, 2], np.arctan2(local[:, 1], local[:, 0]))
    cells = np.flatnonzero((wall.region == biv_mesh.SEPTUM) & (u > 0.2) & (u < 0.8)
                           & (local[:, 2] < -5.0) & (local[:, 2] > -45.0))
    d = fields.cell_septal_depth[cells]
    # the two septal frames share their axes there, so the slerp turns the helix linearly in d
    # (Shoemake 1985): +lv_helix_endo on the left side to -rv_helix_endo on the right side, with
    # no jump at mid-wall
    want = law.lv_helix_endo * (1 - d) - law.rv_helix_endo * d
    assert np.abs(_cell_helix(coords, arch, cells) - want).max() < 1.0
    assert d.min() < 0.1 and d.max() > 0.9


def test_point_rule_agrees_with_the_nodes(built):
    wall, (coords, arch, fields), _ = built
    rule = bc.PointRule(wall, fields, bc.BiVLaw())
    rng = np.random.default_rng(0)
    tet = rng.integers(0, len(wall.tets), 400)
    corner = rng.integers(0, 4, 400)
    w = np.eye(4)[corner]
    nodes = wall.tets[tet, corner]
    got = rule.at(wall.points[nodes], tet, w)
    # at a vertex the interpolated fields and gradients are the nodal ones: the same rule, the
    # same triads (invariant check, common practice)
    for name, ref in (("fiber", arch.fiber), ("sheet", arch.sheet), ("e_rad", coords.e_rad)):
        assert np.abs(np.abs(np.einsum("ij,ij->i", got[name], ref[nodes])) - 1.0).max() < 1e-9
    assert np.allclose(got["helix"], arch.helix_angle[nodes], atol=1e-6)


def test_point_rule_follows_the_law_inside_elements(built):
    wall, (coords, arch, fields), _ = built
    law = bc.BiVLaw()
    cells = _away_from_insertions(wall, biv_mesh.RV_FREE_WALL)
    rng = np.random.default_rng(1)
    w = rng.dirichlet(np.ones(4), len(cells))
    pts = np.einsum("km,kmj->kj", w, wall.points[wall.tets[cells]])
    got = bc.PointRule(wall, fields, law).at(pts, cells, w)
    # inside an element of a wall one or two elements thick the law still holds at the point's
    # own depth (Shoemake 1985, as above), where interpolating the nodal fibers would not
    want = law.rv_helix_endo + (law.rv_helix_epi - law.rv_helix_endo) * got["transmural"] ** 2
    assert np.abs(got["helix"] - want).max() < 3.0
    T = np.stack([got["fiber"], got["sheet"], got["sheet_normal"]], axis=2)
    assert np.abs(np.einsum("kji,kjl->kil", T, T) - np.eye(3)).max() < 1e-9
