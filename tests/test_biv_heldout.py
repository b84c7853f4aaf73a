"""Both ventricles on analytic shapes of our own that differ from the demo subject.

Other sizes, a wider and a narrower right crescent, a thicker right free wall, an oblique and
shifted stack with 10 mm slices and contour noise: the kind of case a user brings, checked the
way a held-out case is (volumes against the truth, closed tagged surfaces, regions, triads,
right-handed helices at both endocardia).
"""

import numpy as np
import pytest

from fibers import meshtools, pipeline
from fibers.biv import coordinates as bc, mesh as biv_mesh
from fibers.demo.biventricle import SyntheticBiV
from fibers.demo.ventricle import SyntheticLV, oblique_frame
from fibers.io.case import resolve_case

SMALL_POOLS = {"myocardium": 2000, "cavity": 1000, "background": 1000, "endo": 500, "epi": 500, "base": 300}


def _wide_thick(seed=21):
    """A smaller left ventricle with a 150-degree crescent and a 5 mm right free wall."""
    rotation, translation = oblique_frame(seed)
    lv = SyntheticLV(endo=(22.0, 50.0), epi=(30.0, 57.0), base_z=14.0,
                     epi_waves=((1.0, 0.03, 1.1, 0.4),), rotation=rotation, translation=translation,
                     septum_angles=(200.0, 50.0))
    return SyntheticBiV(lv=lv, width=22.0, depth=48.0, wall=5.0, taper=15.0)


def _narrow_deep(seed=4):
    """A larger left ventricle with a 95-degree crescent reaching deep toward the apex."""
    rotation, translation = oblique_frame(seed)
    lv = SyntheticLV(endo=(27.0, 60.0), epi=(36.0, 68.0), base_z=22.0,
                     endo_waves=((2.0, 0.04, 0.2, 0.2),), rotation=rotation, translation=translation,
                     septum_angles=(160.0, 65.0))
    return SyntheticBiV(lv=lv, width=34.0, depth=70.0, wall=3.0, taper=10.0)


SHAPES = {"wide_thick": _wide_thick, "narrow_deep": _narrow_deep}


@pytest.fixture(scope="module", params=sorted(SHAPES))
def built(request, tmp_path_factory):
    shape = SHAPES[request.param]()
    # 10 mm slices, 2 mm breath-hold shifts, 0.3 mm contour noise
    contours, _ = shape.sample_stack(spacing=10.0, point_spacing=1.5, noise=0.3, shift=2.0, seed=5)
    assert {"rv_endo", "rv_epi"} <= set(np.unique(contours.structure))
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 3.0}, "pools": SMALL_POOLS},
                        base=tmp_path_factory.mktemp("heldout"))
    return shape, pipeline.run(contours, case)


def test_volumes_against_the_truth(built):
    shape, result = built
    truth = shape.volumes_ml()   # quadrature of the analytic shape (elementary calculus)
    vols = biv_mesh.volumes_ml(result.mesh)
    assert vols["lv_cavity_ml"] == pytest.approx(truth["lv_cavity_ml"], rel=0.03)
    assert vols["rv_cavity_ml"] == pytest.approx(truth["rv_cavity_ml"], rel=0.03)
    assert vols["wall_ml"] == pytest.approx(truth["wall_ml"], rel=0.03)
    assert vols["rv_free_wall_ml"] == pytest.approx(truth["rv_free_wall_ml"], rel=0.08)


def test_tags_present_and_surfaces_closed(built):
    _, result = built
    wall = result.mesh
    assert set(np.unique(wall.face_tags)) == {1, 2, 3, 4}
    # the boundary is a closed surface: every edge is shared by exactly two boundary triangles
    # (a closed 2-manifold, the condition of the divergence theorem; common practice)
    edges = np.sort(np.concatenate([wall.faces[:, [0, 1]], wall.faces[:, [1, 2]], wall.faces[:, [2, 0]]]), axis=1)
    _, count = np.unique(edges, axis=0, return_counts=True)
    assert np.all(count == 2)
    # each endocardium and the epicardium is open only along its rim in the base plane
    local = wall.axis.to_local(wall.points)
    for tag in (1, 2, 4):
        f = wall.faces[wall.face_tags == tag]
        e = np.sort(np.concatenate([f[:, [0, 1]], f[:, [1, 2]], f[:, [2, 0]]]), axis=1)
        rim, n = np.unique(e, axis=0, return_counts=True)
        assert np.abs(local[rim[n == 1].ravel(), 2]).max() < 1e-6, tag
    assert np.all(meshtools.signed_volumes(wall.points, wall.tets) > 0)


def test_regions_present(built):
    _, result = built
    assert set(np.unique(result.mesh.region)) == {1, 2, 3}
    assert set(np.unique(result.rv_region[result.mesh.region == 3])) == {1, 2, 3}


def test_triads_unit_orthonormal_right_handed(built):
    _, result = built
    arch = result.arch
    for f, s, n in ((arch.fiber, arch.sheet, arch.sheet_normal),
                    (arch.cell_fiber, arch.cell_sheet, arch.cell_sheet_normal)):
        T = np.stack([f, s, n], axis=2)
        # orthonormal columns and determinant +1 (a rotation matrix; common practice)
        assert np.abs(np.einsum("kji,kjl->kil", T, T) - np.eye(3)).max() < 1e-9
        assert np.linalg.det(T).min() > 1 - 1e-9


def test_right_handed_helix_at_both_endocardia(built):
    _, result = built
    wall, arch, law = result.mesh, result.arch, bc.BiVLaw()
    owner = meshtools.boundary_faces(wall.tets)[1]
    lv_nodes = wall.face_nodes(1)
    rv_free = np.unique(wall.faces[(wall.face_tags == 4) & (wall.region[owner] == biv_mesh.RV_FREE_WALL)])
    rv_sept = np.unique(wall.faces[(wall.face_tags == 4) & (wall.region[owner] == biv_mesh.SEPTUM)])
    rv_sept = np.setdiff1d(rv_sept, rv_free)   # the insertions' nodes belong to both
    # positive helix = right-handed (Streeter et al., Circ Res 1969, from memory); the law's
    # endocardial values of Bayer et al. 2012 (from memory)
    assert np.allclose(arch.helix_angle[lv_nodes], law.lv_helix_endo, atol=1e-6)
    h = arch.helix_angle[rv_free]
    assert np.median(h) == pytest.approx(law.rv_helix_endo, abs=2.0) and np.mean(h > 0) > 0.97
    # on the septum's right face helix_angle is measured with e_rad from the left cavity to the
    # right one (out of the wall there): -rv_helix_endo. In the right ventricle's own frame
    # (e_rad into its wall, so e_circ reversed too) the same fiber makes 180 - h, folded to
    # +rv_helix_endo: right-handed as well
    h = arch.helix_angle[rv_sept]
    assert np.median(h) == pytest.approx(-law.rv_helix_endo, abs=2.0)
    own = (180.0 - h + 90.0) % 180.0 - 90.0
    assert np.median(own) == pytest.approx(law.rv_helix_endo, abs=2.0) and np.mean(own > 0) > 0.97
    # over the whole right endocardium (tag 4) most of the surface is free wall
    assert np.median(arch.helix_angle[wall.face_nodes(4)]) > 0
    # measured independently of the build's frame: on the right free wall's endocardium the
    # fiber climbs toward the base while turning about the long axis in the right-handed sense
    # seen from the wall's outward normal (the helix of Streeter et al.): sign of
    # (n x fiber) . axis with n the outward normal of the wall (into the right cavity is inward)
    local = wall.axis.to_local(wall.points[rv_free])
    radial = np.column_stack([local[:, 0], local[:, 1], np.zeros(len(local))])
    radial /= np.linalg.norm(radial, axis=1)[:, None]
    f_local = arch.fiber[rv_free] @ wall.axis.frame().T   # world -> axis-frame components
    circ = np.cross([0.0, 0.0, 1.0], radial)
    along = f_local[:, 2] * np.sign(np.einsum("ij,ij->i", f_local, circ))
    assert np.mean(along > 0) > 0.9


def test_segment_rows_of_both_ventricles(built):
    shape, result = built
    rows = {r["segment"]: r for r in result.segment_rows()}
    assert list(rows)[:18] == list(range(18)) and list(rows)[18:] == ["rv", "rv1", "rv2", "rv3"]
    vols = biv_mesh.volumes_ml(result.mesh)
    # the right free wall's rows partition its cells; the left rows cover the rest
    assert sum(rows[k]["volume_ml"] for k in ("rv1", "rv2", "rv3")) == pytest.approx(rows["rv"]["volume_ml"], rel=1e-9)
    assert rows["rv"]["volume_ml"] == pytest.approx(vols["rv_free_wall_ml"], rel=1e-9)
    assert rows[0]["volume_ml"] == pytest.approx(vols["lv_free_wall_ml"] + vols["septum_ml"], rel=1e-9)
    # against the analytic shape (quadrature, elementary calculus): the free wall's volume
    assert rows["rv"]["volume_ml"] == pytest.approx(shape.volumes_ml()["rv_free_wall_ml"], rel=0.08)
    # mid-third thickness near the free wall's radial thickness: the shortest distance is at
    # most the radial one and the wall is nearly normal to the radius mid-crescent (common practice)
    assert 0.75 * shape.wall < rows["rv2"]["thickness_mean_mm"] <= 1.05 * shape.wall
    # septal segments measured across the septum, not across the right cavity: the left wall of
    # these near-uniform shells is within 15 % of its lateral thickness there
    septal = np.mean([rows[k]["thickness_mean_mm"] for k in (2, 3, 8, 9)])
    lateral = np.mean([rows[k]["thickness_mean_mm"] for k in (5, 6, 11, 12)])
    assert septal == pytest.approx(lateral, rel=0.15)
    # helix at the right free wall's endocardium: the law's right-handed +rv_helix_endo
    assert rows["rv"]["helix_endo_deg"] == pytest.approx(bc.BiVLaw().rv_helix_endo, abs=1.0)


# -- a right ventricle of another make: an ellipsoid beside the left one ------------------------------

class EllipsoidRV:
    """Right cavity: the half-ellipsoid below the base plane with centre ``centre`` (local mm) and
    semi-axes ``axes``, outside the left epicardium; the free wall the ellipsoid grown by
    ``wall`` mm on every semi-axis, outside the cavity and the left epicardium. Unlike
    :class:`SyntheticBiV` nothing here is a width over the left epicardium, so the contours come
    from marching squares on the membership functions (as an imaging tool would outline them)."""

    def __init__(self, lv, centre=(21.0, 3.0), axes=(30.0, 38.0, 56.0), wall=4.0):
        self.lv, self.centre, self.axes, self.wall = lv, np.asarray(centre, float), np.asarray(axes, float), wall

    def _level(self, local, grow=0.0):
        """Ellipsoid level (K,): < 1 inside (centre in the base plane)."""
        a = self.axes + grow
        d = np.column_stack([local[:, 0] - self.centre[0], local[:, 1] - self.centre[1],
                             local[:, 2] - self.lv.base_z])
        return ((d / a) ** 2).sum(axis=1)

    def classify(self, local):
        """0 outside, 1 LV cavity, 2 RV cavity, 3 wall (both ventricles), for local points (K, 3)."""
        below = local[:, 2] <= self.lv.base_z
        lv_body = self.lv.inside("epi", local)
        cav = below & ~lv_body & (self._level(local) < 1.0)
        out = below & ~lv_body & (self._level(local, self.wall) < 1.0)
        cls = np.zeros(len(local), np.int8)
        cls[lv_body | out] = 3
        cls[self.lv.inside("endo", local)] = 1
        cls[cav] = 2
        return cls

    def volumes_ml(self, h=0.5):
        """LV cavity (closed form, spheroid cap) and RV cavity and wall by counting cell centres of a
        0.5 mm grid (a Riemann sum; within 0.5 % on such bodies at 0.75 mm, see test_biv_demo)."""
        lv = self.lv.volumes_ml()
        reach = self.axes + self.wall
        xs = np.arange(-self.lv.epi[0] - 2, self.centre[0] + reach[0] + 2, h) + h / 2
        ys = np.arange(self.centre[1] - reach[1] - 2, self.centre[1] + reach[1] + 2, h) + h / 2
        zs = np.arange(self.lv.base_z - reach[2] - 2, self.lv.base_z, h) + h / 2
        X, Y = np.meshgrid(xs, ys, indexing="ij")
        n = np.zeros(4)
        for z in zs:
            n += np.bincount(self.classify(np.column_stack([X.ravel(), Y.ravel(), np.full(X.size, z)])), minlength=4)
        rv_cav = n[2] * h ** 3 / 1000.0
        outer = 0.0
        for z in zs:   # the right free wall alone: outer body minus cavity, outside the left epicardium
            pts = np.column_stack([X.ravel(), Y.ravel(), np.full(X.size, z)])
            free = ~self.lv.inside("epi", pts) & (self._level(pts, self.wall) < 1.0) & (self._level(pts) >= 1.0)
            outer += free.sum()
        rv_wall = outer * h ** 3 / 1000.0
        return {"lv_cavity_ml": lv["cavity_ml"], "rv_cavity_ml": rv_cav, "wall_ml": lv["myocardium_ml"] + rv_wall,
                "rv_free_wall_ml": rv_wall}

    def contours(self, *, spacing=10.0, noise=0.3, shift=2.0, seed=5):
        """LV contours of ``lv.sample_stack`` plus rv_endo / rv_epi outlined at 0.2 mm on each slice."""
        from skimage import measure

        from fibers.types import RawContours

        left, shifts = self.lv.sample_stack(spacing=spacing, point_spacing=1.5, noise=noise, shift=shift, seed=seed)
        step = 0.2
        reach = self.axes + self.wall
        xs = np.arange(-self.lv.epi[0] - 2, self.centre[0] + reach[0] + 2, step)
        ys = np.arange(self.centre[1] - reach[1] - 2, self.centre[1] + reach[1] + 2, step)
        X, Y = np.meshgrid(xs, ys, indexing="ij")
        rows = []
        for k in np.unique(left.slice_id):
            z = self.lv.base_z - k * spacing
            pts = np.column_stack([X.ravel(), Y.ravel(), np.full(X.size, z)])
            theta = np.arctan2(pts[:, 1], pts[:, 0])
            outside_lv = np.hypot(pts[:, 0], pts[:, 1]) / np.maximum(self.lv.radius("epi", z, theta), 1e-9)
            for name, grow in (("rv_endo", 0.0), ("rv_epi", self.wall)):
                # inside where both are positive: beyond the left epicardium and inside the ellipsoid
                g = np.minimum(outside_lv - 1.0, 1.0 - self._level(pts, grow)).reshape(X.shape)
                if g.max() <= 0.05:
                    continue
                lines = [c for c in measure.find_contours(np.pad(g, 1, constant_values=-1.0), 0.0) if len(c) > 20]
                if not lines:
                    continue
                line = max(lines, key=len)[:-1] - 1.0
                uv = np.column_stack([np.interp(line[:, 0], np.arange(len(xs)), xs),
                                      np.interp(line[:, 1], np.arange(len(ys)), ys)])
                uv = uv[:: max(1, int(round(1.5 / step)))]            # about 1.5 mm apart
                local = np.column_stack([uv, np.full(len(uv), z)]) + np.asarray(self.lv.rotation).T @ shifts[k]
                rows.append((name, k, self.lv.to_world(local)))
        pts = np.concatenate([left.points] + [p for *_, p in rows])
        return RawContours(structure=np.concatenate([left.structure] + [np.full(len(p), n) for n, _, p in rows]),
                           slice_id=np.concatenate([left.slice_id] + [np.full(len(p), k) for _, k, p in rows]),
                           points=pts, line=np.arange(2, len(pts) + 2), source="synthetic")


@pytest.fixture(scope="module")
def ellipsoid_built(tmp_path_factory):
    rotation, translation = oblique_frame(9)
    lv = SyntheticLV(endo=(24.0, 55.0), epi=(33.0, 63.0), base_z=18.0, rotation=rotation, translation=translation)
    shape = EllipsoidRV(lv)
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 3.0}, "pools": SMALL_POOLS},
                        base=tmp_path_factory.mktemp("ellipsoid"))
    return shape, pipeline.run(shape.contours(), case)


def test_ellipsoidal_right_ventricle(ellipsoid_built):
    shape, result = ellipsoid_built
    truth = shape.volumes_ml()
    vols = biv_mesh.volumes_ml(result.mesh)
    # against the exact LV cavity (spheroid cap, CRC Standard Mathematical Tables) and the
    # Riemann sums of the right ventricle (common practice)
    assert vols["lv_cavity_ml"] == pytest.approx(truth["lv_cavity_ml"], rel=0.03)
    assert vols["rv_cavity_ml"] == pytest.approx(truth["rv_cavity_ml"], rel=0.03)
    assert vols["wall_ml"] == pytest.approx(truth["wall_ml"], rel=0.03)
    assert vols["rv_free_wall_ml"] == pytest.approx(truth["rv_free_wall_ml"], rel=0.06)
    wall = result.mesh
    assert set(np.unique(wall.face_tags)) == {1, 2, 3, 4} and set(np.unique(wall.region)) == {1, 2, 3}
    h = result.arch.helix_angle
    assert np.median(h[wall.face_nodes(1)]) > 30 and np.median(h[wall.face_nodes(4)]) > 0
