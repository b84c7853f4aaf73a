"""Sample-point pools on an oblique spheroidal shell: regions, fields, statistics, files."""

import dataclasses

import numpy as np
import pytest
import shells
from scipy import stats

from fibers import coordinates, meshtools, pools, segments
from fibers.config import Box, FiberLaw, Landmarks, PoolSettings
from fibers.errors import InputError
from fibers.io.pools import read_pool, write_pools

INNER, OUTER = (20.0, 35.0), (30.0, 45.0)    # (equatorial radius, polar half-axis), mm
L = INNER[1]
ROT = shells.random_rotation(11)
SHIFT = np.array([-40.0, 22.0, 130.0])
SETTINGS = PoolSettings(myocardium=20_000, cavity=5_000, background=20_000, endo=3_000,
                        epi=3_000, base=3_000, seed=5)
LAW = FiberLaw()


def world(local):
    return np.asarray(local, float) @ ROT.T + SHIFT


def local(points):
    return (np.asarray(points, float) - SHIFT) @ ROT


def levels(points):
    """Implicit functions of the inner and outer spheroids (< 1 inside), and the height z."""
    x, y, z = local(points).T
    rho2 = x * x + y * y
    return rho2 / INNER[0] ** 2 + z * z / INNER[1] ** 2, rho2 / OUTER[0] ** 2 + z * z / OUTER[1] ** 2, z


def on_epi(phi_deg, z):
    r = OUTER[0] * np.sqrt(1 - z * z / OUTER[1] ** 2)
    t = np.radians(phi_deg)
    return world([r * np.cos(t), r * np.sin(t), z])


@pytest.fixture(scope="module")
def case():
    mesh = shells.spheroid_shell(INNER, OUTER, size=3.0, rotation=ROT, translation=SHIFT)
    coords = coordinates.compute(mesh)
    septum = segments.locate_septum(mesh, Landmarks(on_epi(60, -4), on_epi(-60, -4)))
    box = Box(corner=world([-40, -40, -55]), edges=ROT.T * np.array([80, 80, 70.0])[:, None])
    return mesh, coords, septum, box


@pytest.fixture(scope="module")
def built(case):
    mesh, coords, septum, box = case
    return pools.build_pools(mesh, coords, LAW, septum, SETTINGS, box=box)


def test_counts_and_fields(built):
    wall_fields = {"points", "transmural", "apicobasal", "circumferential", "e_rad", "e_long",
                   "e_circ", "fiber", "sheet", "sheet_normal", "helix_angle", "sheet_angle",
                   "helix_angle_sax", "imbrication_angle", "dispersion", "thickness_fraction", "wall_thickness",
                   "frame_quality", "aha_segment", "tet"}
    assert set(built) == set(pools.POOL_NAMES)
    for name in pools.POOL_NAMES:
        assert len(built[name]) == getattr(SETTINGS, name)
    assert set(built["myocardium"].arrays) == wall_fields
    for name in ("endo", "epi", "base"):
        assert set(built[name].arrays) == wall_fields | {"normal", "face"}
    assert built["background"].arrays["region"].dtype == np.int8


def test_points_inside_their_analytic_regions(built):
    # Spheroid implicit functions; the faceted mesh differs from them by the sagitta of its
    # facets (h^2 / 8R, about 0.06 mm here), so a small share near the surfaces may disagree.
    inner, outer, z = levels(built["myocardium"].arrays["points"])
    assert ((inner > 1) & (outer < 1) & (z < 1e-9)).mean() >= 0.995
    inner, outer, z = levels(built["cavity"].arrays["points"])
    assert ((inner < 1) & (z < 0)).mean() >= 0.995
    bg = built["background"].arrays
    inner, outer, z = levels(bg["points"])
    assert (~((inner > 1) & (outer < 1) & (z < 0))).mean() >= 0.995
    analytic = np.where(z >= 0, 2, np.where(inner < 1, 1, 3))
    assert (analytic == bg["region"]).mean() >= 0.995
    assert list(bg["region_names"][[1, 2, 3]]) == ["cavity", "above_base", "outside"]
    # The background is uniform in the box: shares of the regions against their closed-form
    # volumes (spheroid cap, elementary calculus), chi-square over the three regions.
    box_vol = 80 * 80 * 70.0
    cav = 2 / 3 * np.pi * INNER[0] ** 2 * INNER[1]
    wall = 2 / 3 * np.pi * OUTER[0] ** 2 * OUTER[1] - cav
    above = 80 * 80 * 15.0
    share = np.array([cav, above, box_vol - above - cav - wall]) / (box_vol - wall)
    counts = np.bincount(bg["region"], minlength=4)[1:]
    assert stats.chisquare(counts, share * counts.sum()).pvalue > 0.001


def test_surface_points_and_normals(built):
    # On the analytic surface (within 0.2 mm, above the facet sagitta) with the outward
    # normal of the wall: into the cavity on the endocardium (-grad of the inner implicit
    # function), out of the epicardium (+grad), +z on the base (common practice: outward normal).
    def dist_and_normal(points, axes):
        x, y, z = local(points).T
        b, a = axes
        g = np.stack([2 * x / b**2, 2 * y / b**2, 2 * z / a**2], 1)
        f = (x * x + y * y) / b**2 + z * z / a**2 - 1
        gn = np.linalg.norm(g, axis=1)
        return np.abs(f) / gn, g / gn[:, None]

    for name, axes, sign in (("endo", INNER, -1), ("epi", OUTER, +1)):
        arr = built[name].arrays
        d, n = dist_and_normal(arr["points"], axes)
        assert (d < 0.2).mean() >= 0.995
        cos = np.einsum("ij,ij->i", local(arr["normal"] + SHIFT), sign * n)
        assert cos.min() > 0.9
    base = built["base"].arrays
    _, _, z = levels(base["points"])
    assert np.abs(z).max() < 1e-9
    assert np.allclose(local(base["normal"] + SHIFT), [0, 0, 1], atol=1e-9)
    inner, outer, _ = levels(base["points"])
    assert ((inner >= 1 - 1e-2) & (outer <= 1 + 1e-2)).all()


def test_segment_shares_chi_square(built):
    # Uniform by volume: segment counts against the closed-form segment volumes (each ring's
    # shell volume split into 6 or 4 equal sectors, Cerqueira et al. 2002), chi-square test
    # (scipy.stats) at the fixed seed.
    def shell_between(lo, hi):
        def cap(b, a):
            l, h = max(lo, -a), min(hi, a)
            return 0.0 if h <= l else np.pi * b * b * ((h - l) - (h**3 - l**3) / (3 * a * a))
        return cap(*OUTER) - cap(*INNER)

    vol = np.zeros(18)
    for segs, lo, hi in ((range(1, 7), -L / 3, 0), (range(7, 13), -2 * L / 3, -L / 3),
                         (range(13, 17), -L, -2 * L / 3), (range(17, 18), -OUTER[1], -L)):
        vol[list(segs)] = shell_between(lo, hi) / len(segs)
    counts = np.bincount(built["myocardium"].arrays["aha_segment"], minlength=18)
    assert counts[0] == 0
    result = stats.chisquare(counts[1:], vol[1:] / vol.sum() * counts.sum())
    assert result.pvalue > 0.01


def test_helix_angle_follows_law(built, case):
    # The helix angle in the short-axis convention (fiber projected on the plane normal to
    # e_rad, from axis x e_rad toward the axis), read back from the vectors, equals the linear
    # law 60 - 120 d at the point's thickness depth within 1 degree where the wall normal is
    # more than 30 degrees from the axis; the triad is orthonormal and right-handed.
    axis = case[0].axis.direction
    for name in ("myocardium", "endo", "epi"):
        arr = built[name].arrays
        f = arr["fiber"]
        c = np.cross(axis, arr["e_rad"])
        away = np.linalg.norm(c, axis=1) > 0.5
        c /= np.maximum(np.linalg.norm(c, axis=1), 1e-12)[:, None]
        a = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, np.cross(arr["e_rad"], c)),
                                  np.einsum("ij,ij->i", f, c)))
        law = LAW.helix_endo + (LAW.helix_epi - LAW.helix_endo) * arr["thickness_fraction"]
        assert np.abs(a - law)[away].max() < 1.0
        assert np.abs(arr["helix_angle_sax"] - law)[away].max() < 1.0
        frame = np.stack([f, arr["sheet"], arr["sheet_normal"]], axis=1)
        assert np.allclose(frame @ np.transpose(frame, (0, 2, 1)), np.eye(3), atol=1e-9)
        assert np.allclose(np.linalg.det(frame), 1.0)
        assert np.abs(np.einsum("ij,ij->i", f, arr["e_rad"])).max() < 1e-9


def test_circumferential_continuous_across_seam(built):
    # The angle about the axis from coordinates' zero (mesh.axis.reference = local x,
    # increasing right-handedly about the axis) equals atan2(y, x) of the local position,
    # also at the +-180 degree seam where a plain average of nodal angles would jump.
    arr = built["myocardium"].arrays
    x, y, _ = local(arr["points"]).T
    keep = np.hypot(x, y) > 10.0
    diff = (arr["circumferential"] - np.degrees(np.arctan2(y, x)) + 180) % 360 - 180
    assert np.abs(diff[keep]).max() < 1.5
    seam = keep & (np.abs(np.degrees(np.arctan2(y, x))) > 175)
    assert seam.sum() > 50 and np.abs(diff[seam]).max() < 1.5
    assert arr["circumferential"].min() >= -180 and arr["circumferential"].max() < 180


def test_fold_to_tet_uniform():
    # Midpoint subdivision of a tetrahedron: four corner tetrahedra of 1/8 of the volume each
    # (barycentric of one vertex > 1/2) and a central octahedron of 1/2 (elementary geometry);
    # chi-square on the five parts.
    rng = np.random.default_rng(0)
    b = pools.fold_to_tet(rng.random((40_000, 3)))
    assert np.allclose(b.sum(axis=1), 1) and b.min() >= -1e-12
    part = np.where((b > 0.5).any(axis=1), np.argmax(b, axis=1), 4)
    counts = np.bincount(part, minlength=5)
    assert stats.chisquare(counts, np.array([1, 1, 1, 1, 4]) / 8 * len(b)).pvalue > 0.01


def test_same_seed_same_bytes(case, built, tmp_path):
    mesh, coords, septum, box = case
    again = pools.build_pools(mesh, coords, LAW, septum, SETTINGS, box=box)
    a = write_pools(tmp_path / "a", built, vtp=False)
    b = write_pools(tmp_path / "b", again, vtp=False)
    assert [p.read_bytes() for p in a] == [p.read_bytes() for p in b]
    other = pools.build_pools(mesh, coords, LAW, septum, dataclasses.replace(SETTINGS, seed=6),
                              box=box)
    assert not np.array_equal(other["myocardium"].arrays["points"],
                              built["myocardium"].arrays["points"])


def test_one_count_does_not_change_another_pool(case, built):
    mesh, coords, septum, box = case
    fewer = dataclasses.replace(SETTINGS, background=100, myocardium=500)
    other = pools.build_pools(mesh, coords, LAW, septum, fewer, box=box)
    for name in ("cavity", "endo", "epi", "base"):
        for key, value in built[name].arrays.items():
            assert np.array_equal(other[name].arrays[key], value), (name, key)


def test_sobol_sampler(case):
    mesh, coords, septum, box = case
    s = dataclasses.replace(SETTINGS, sampler="sobol", myocardium=4096, background=2048,
                            cavity=1024)
    p = pools.build_pools(mesh, coords, LAW, septum, s, box=box)
    q = pools.build_pools(mesh, coords, LAW, septum, s, box=box)
    assert np.array_equal(p["myocardium"].arrays["points"], q["myocardium"].arrays["points"])
    inner, outer, z = levels(p["myocardium"].arrays["points"])
    assert ((inner > 1) & (outer < 1)).mean() >= 0.995
    inner, _, z = levels(p["cavity"].arrays["points"])
    assert ((inner < 1) & (z < 0)).mean() >= 0.995


def test_rejection_points_do_not_depend_on_the_rate_guess(case):
    # the guess only sizes the draws (a stream of uniform numbers, or a Sobol sequence whose
    # larger blocks start with the smaller ones: scipy.stats.qmc.Sobol.random_base2), so a
    # boundary and its mesh, whose volume sums differ in the last bits, give the same points
    mesh, _, _, box = case
    test = pools.EnclosedTest(mesh, tags=(pools.ENDO, pools.EPI))
    for sampler in ("random", "sobol"):
        picked = [pools._rejection(np.random.default_rng(4), 3_000, sampler, box.sample, lambda p: ~test(p), rate)
                  for rate in (0.05, 0.6, 1.0)]
        assert all(np.array_equal(picked[0], p) for p in picked[1:]), sampler


def test_enclosed_volume_of_the_closed_wall(case):
    # the divergence theorem over the closed boundary equals the sum of the tetrahedra's volumes
    # (both exact for a polyhedron), and a unit cube's twelve triangles enclose 1 (closed form)
    mesh = case[0]
    assert abs(meshtools.enclosed_volume(mesh.points, mesh.faces) - mesh.cell_volumes.sum()) < 1e-9 * mesh.cell_volumes.sum()
    corners = np.array([[x, y, z] for x in (0, 1) for y in (0, 1) for z in (0, 1)], float) + 7.0
    cube = np.array([[0, 1, 3], [0, 3, 2], [4, 6, 7], [4, 7, 5], [0, 4, 5], [0, 5, 1],
                     [2, 3, 7], [2, 7, 6], [0, 2, 6], [0, 6, 4], [1, 5, 7], [1, 7, 3]])
    assert abs(meshtools.enclosed_volume(corners, cube) - 1.0) < 1e-12


def test_bad_settings(case):
    mesh, coords, septum, box = case
    with pytest.raises(InputError, match="pools.sampler is 'halton'"):
        pools.build_pools(mesh, coords, LAW, septum,
                          dataclasses.replace(SETTINGS, sampler="halton"), box=box)
    with pytest.raises(InputError, match="pools.cavity is -1"):
        pools.build_pools(mesh, coords, LAW, septum, dataclasses.replace(SETTINGS, cavity=-1),
                          box=box)


def test_file_round_trip(built, tmp_path):
    # Write, read back, compare values and dtypes (STYLE: one round trip per format).
    import pyvista as pv

    write_pools(tmp_path, built)
    for name, pool in built.items():
        back = pools.load(tmp_path / "pools" / f"{name}.npz")
        assert set(back) == set(pool.arrays)
        for key, value in pool.arrays.items():
            assert back[key].dtype == value.dtype and np.array_equal(back[key], value), key
        cloud = pv.read(tmp_path / "pools" / f"{name}.vtp")
        assert cloud.n_points == len(pool)
        assert np.allclose(cloud.points, pool.arrays["points"])
    cloud = pv.read(tmp_path / "pools" / "myocardium.vtp")
    assert np.allclose(cloud.point_data["fiber"], built["myocardium"].arrays["fiber"])
    with pytest.raises(InputError, match="does not exist"):
        read_pool(tmp_path / "pools" / "nothing.npz")


def test_batches_cover_once_and_repeat(built):
    arrays = built["background"].arrays
    one = list(pools.batches(arrays, 3000, seed=1))
    two = list(pools.batches(arrays, 3000, seed=1))
    assert len(one) == 7 and len(one[-1]["points"]) == 2000
    assert all(np.array_equal(a["points"], b["points"]) for a, b in zip(one, two))
    seen = np.concatenate([b["points"] for b in one])
    assert np.array_equal(np.unique(seen, axis=0), np.unique(arrays["points"], axis=0))
    assert all(b["region_names"] is arrays["region_names"] for b in one)
    assert len(list(pools.batches(arrays, 3000, seed=1, drop_last=True, epochs=2))) == 12


def test_example_penalties(built, tmp_path, capsys):
    # The example's fiber stretch against the closed form sqrt(cos^2 a + lam^2 sin^2 a) of its
    # shortening field, and J = lam_long * lam_rad (Holzapfel 2000: J = det F).
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "examples" / "train_penalties.py"
    spec = importlib.util.spec_from_file_location("train_penalties", path)
    example = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(example)
    arr = built["myocardium"].arrays
    F = example.deformation(arr["e_long"], arr["e_rad"], 0.9, 1.0)
    out = example.penalties(F, arr["fiber"])
    a = np.radians(arr["helix_angle"])
    assert out["mean fiber stretch"] == pytest.approx(
        np.sqrt(np.cos(a) ** 2 + 0.81 * np.sin(a) ** 2).mean(), rel=1e-9)
    assert out["volume penalty mean (J-1)^2"] == pytest.approx(0.01, rel=1e-9)
    write_pools(tmp_path, {"myocardium": built["myocardium"]}, vtp=False)
    assert example.main([str(tmp_path / "pools" / "myocardium.npz")]) == 0
    assert "volume penalty" in capsys.readouterr().out


def test_surface_points_lie_on_their_owner_tet(case, built):
    # The owning element has the face among its faces: a surface point has barycentric weights
    # >= 0 in it, one of them 0 (definition of a boundary face).
    mesh = case[0]
    from fibers.locate import Locator
    for name in ("endo", "epi", "base"):
        arr = built[name].arrays
        assert (arr["tet"] >= 0).all()
        face_nodes = np.sort(mesh.faces[arr["face"]], axis=1)
        tet_nodes = mesh.tets[arr["tet"]]
        assert (face_nodes[:, :, None] == tet_nodes[:, None, :]).any(axis=2).all()
        b = Locator(mesh.points, mesh.tets)._barycentric(arr["points"], arr["tet"])
        assert b.min() > -1e-9 and np.abs(b.min(axis=1)).max() < 1e-9


def test_ray_parity_wall_test_agrees_with_point_location(case):
    # Two independent exact tests of "inside the wall": ray parity against the endo and epi
    # faces (Jordan curve theorem, a ray crosses a closed surface an odd number of times from
    # inside) and element location with barycentric coordinates. They must agree.
    from fibers.locate import Locator
    from fibers.types import ENDO, EPI

    mesh = case[0]
    rng = np.random.default_rng(3)
    lo, hi = mesh.points.min(0) - 5, mesh.points.max(0) + 5
    q = lo + rng.random((40_000, 3)) * (hi - lo)
    by_parity = pools.EnclosedTest(mesh, tags=(ENDO, EPI))(q)
    by_location = Locator(mesh.points, mesh.tets)(q)[0] >= 0
    assert by_location.sum() > 1000
    assert np.count_nonzero(by_parity != by_location) <= 2  # ties on faces only
