"""Strain from a displacement field: kinematics by the book, the synthetic cycle, scattered input, refusals.

Continuum mechanics throughout after Holzapfel, Nonlinear Solid Mechanics, 2000: F = I + grad u,
C = F^T F, E = (C - I) / 2, J = det F, stretch along a unit direction a = |F a| = sqrt(a.C a).
"""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from fibers import cli, strain
from fibers.demo import motion as demo_motion, ventricle
from fibers.io import motion as motion_io, strainfiles


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo subject with its motion, at 2.5 mm (largest segment error of P1 about 0.0012 here, 0.003 at 3.5 mm)."""
    out = tmp_path_factory.mktemp("strain") / "demo"
    assert cli.main(["demo", "--out", str(out), "--mesh-size", "2.5", "--no-report", "--motion"]) == 0
    return out


@pytest.fixture(scope="module")
def analysed(demo):
    return strainfiles.analyse(demo, demo / "motion.npz")


@pytest.fixture(scope="module")
def truth(demo):
    return json.loads((demo / "motion_truth.json").read_text())


def _cube_mesh(seed=0, n=300):
    from scipy.spatial import Delaunay

    rng = np.random.default_rng(seed)
    pts = rng.uniform(-10, 10, (n, 3))
    tets = Delaunay(pts).simplices
    # positively oriented cells, as the build writes them
    _, vol = strain.shape_gradients(pts, tets)
    tets[vol < 0] = tets[vol < 0][:, [0, 2, 1, 3]]
    return pts, tets


# ----------------------------------------------------------------------------- kinematics by the book

def test_homogeneous_F_gives_the_hand_computed_E_in_every_element():
    # F = [[1.1, 0.2, 0], [0, 0.9, 0], [0, 0, 1]]. By hand: C = F^T F has C11 = 1.21, C12 = 1.1 * 0.2
    # = 0.22, C22 = 0.2^2 + 0.9^2 = 0.85, C33 = 1; E = (C - I) / 2 (Holzapfel 2000, eq. 2.67);
    # J = det F = 1.1 * 0.9 = 0.99.
    F0 = np.array([[1.1, 0.2, 0.0], [0.0, 0.9, 0.0], [0.0, 0.0, 1.0]])
    by_hand = np.array([[0.105, 0.11, 0.0], [0.11, -0.075, 0.0], [0.0, 0.0, 0.0]])
    pts, tets = _cube_mesh()
    u = pts @ (F0 - np.eye(3)).T + [3.0, -1.0, 2.0]     # a translation changes nothing
    grads, _ = strain.shape_gradients(pts, tets)
    F = strain.deformation_gradients(grads, tets, u)
    E = strain.green_lagrange(F)
    assert len(tets) > 1000
    assert np.abs(E - by_hand).max() < 1e-12
    assert np.abs(strain.jacobian(F) - 0.99).max() < 1e-12
    # on the axes: E_rr with e_rad = x is E11; the stretch along x is |F e_x| = 1.1 (definition)
    ones = np.ones((len(tets), 1))
    frames = {"e_rad": ones * [1.0, 0, 0], "e_circ": ones * [0, 1.0, 0], "e_long": ones * [0, 0, 1.0]}
    out = strain.kinematics(F, frames)
    assert np.allclose(out["E_rr"], 0.105) and np.allclose(out["E_rc"], 0.11) and np.allclose(out["E_cc"], -0.075)
    assert np.allclose(out["strain_rr"], 0.1, atol=1e-12)
    assert np.allclose(out["strain_cc"], np.hypot(0.2, 0.9) - 1.0, atol=1e-12)


def test_stretch_and_components_against_their_definitions():
    # lambda_a = |F a| and E_ab = a.E b (Holzapfel 2000): computed here by norms and matrix
    # products, independently of the einsum path of strain.kinematics.
    rng = np.random.default_rng(4)
    F = np.eye(3) + 0.2 * rng.normal(size=(50, 3, 3))
    dirs = {k: rng.normal(size=(50, 3)) for k in ("fiber", "e_circ", "e_long")}
    dirs = {k: v / np.linalg.norm(v, axis=1, keepdims=True) for k, v in dirs.items()}
    out = strain.kinematics(F, dirs)
    Fa = np.array([F[i] @ dirs["fiber"][i] for i in range(50)])
    assert np.allclose(out["lambda_f"], np.linalg.norm(Fa, axis=1), atol=1e-12)
    assert np.allclose(out["strain_ff"], np.linalg.norm(Fa, axis=1) - 1.0, atol=1e-12)
    E = np.array([(F[i].T @ F[i] - np.eye(3)) / 2 for i in range(50)])
    cl = np.array([dirs["e_circ"][i] @ E[i] @ dirs["e_long"][i] for i in range(50)])
    assert np.allclose(out["E_cl"], cl, atol=1e-12)
    assert np.allclose(out["J"], np.linalg.det(F), atol=1e-12)
    assert "E_rr" not in out and "E_ss" not in out        # no radial or sheet direction given


def test_rigid_rotation_gives_zero_strain_and_unit_J(demo):
    # Objectivity: x = Q X + c with Q a rotation gives C = Q^T Q = I, so E = 0 and J = 1
    # (Holzapfel 2000, section 2.2); 40 degrees about an oblique axis, on the demo's own mesh.
    mesh = motion_io.read_build_mesh(demo)
    Q = ventricle.rotation_about([1.0, 2.0, -0.5], np.radians(40.0))
    u = mesh.points @ Q.T + [5.0, -3.0, 8.0] - mesh.points
    frames = strain.cell_frames(mesh.tets, mesh.point_fields, mesh.cell_fields)
    study = strain.study(mesh.points, mesh.tets, u[None], frames, mesh.labels)
    for q in ("E_rr", "E_cc", "E_ll", "E_rc", "E_rl", "E_cl", "E_ff", "E_ss", "E_nn", "strain_cc"):
        assert np.abs(study.cell[q]).max() < 1e-12, q
    assert np.abs(study.cell["J"] - 1.0).max() < 1e-12
    assert np.abs(study.cell["lambda_f"] - 1.0).max() < 1e-12


def test_cell_frames_are_orthonormal_and_right_handed(demo):
    # invariants of a frame (common practice): unit, orthogonal, e_circ = e_long x e_rad
    mesh = motion_io.read_build_mesh(demo)
    f = strain.cell_frames(mesh.tets, mesh.point_fields, mesh.cell_fields)
    for k in ("e_rad", "e_circ", "e_long", "fiber", "sheet", "sheet_normal"):
        assert np.abs(np.linalg.norm(f[k], axis=1) - 1).max() < 1e-9
    assert np.abs(np.einsum("mi,mi->m", f["e_rad"], f["e_long"])).max() < 1e-12
    assert np.abs(np.cross(f["e_long"], f["e_rad"]) - f["e_circ"]).max() < 1e-12


# ----------------------------------------------------------------------------- the synthetic cycle

def test_the_closed_form_cycle_keeps_volume_and_matches_its_derivative(demo):
    # The generator's own closed form checked from outside: J = det F = 1 exactly (the
    # cylindrical Jacobian is triangular, see fibers.demo.motion), and F equals a central
    # finite difference of the positions (error O(h^2), h = 1e-5 mm).
    mesh = motion_io.read_build_mesh(demo)
    cycle = demo_motion.IsochoricCycle(ventricle.demo_subject())
    k = cycle.peak_frame
    F = cycle.gradient(mesh.points, k)
    assert np.abs(strain.jacobian(F) - 1.0).max() < 1e-12
    h = 1e-5
    fd = np.stack([(cycle.positions(mesh.points + h * e, k) - cycle.positions(mesh.points - h * e, k)) / (2 * h)
                   for e in np.eye(3)], axis=2)
    assert np.abs(F - fd).max() < 1e-6
    # realistic magnitudes (tagged-MRI values, from memory): whole-wall E_ll and E_cc clearly negative,
    # E_rr clearly positive at the peak
    values = strain.kinematics(F[mesh.tets].mean(axis=1),
                               strain.cell_frames(mesh.tets, mesh.point_fields, mesh.cell_fields))
    assert values["E_ll"].mean() < -0.08 and values["E_cc"].mean() < -0.05 and values["E_rr"].mean() > 0.2


def test_segment_means_match_the_closed_form_at_every_frame(analysed, truth):
    # The P1 analysis of the nodal displacements against the closed-form F at the cells
    # (motion_truth.json), every segment and frame: within 0.005 (the bound).
    study = analysed.study
    assert study.segments["E_cc"].shape == (20, 18)
    assert set(analysed.summary["segments_present"]) == set(range(18))
    for q in strain.QUANTITIES:
        exact = np.array(truth["quantities"][q])
        err = np.abs(study.segments[q] - exact).max()
        assert err < 0.005, (q, err)
    # isochoric motion: every segment's mean J within 0.005 of 1 at every frame
    assert np.abs(study.segments["J"] - 1.0).max() < 0.005
    # the per-cell |J - 1| carries the P1 interpolation error on straight-edged cells (first order
    # in the cell size); at 2.5 mm it stays a few percent, and the recovered nodal J is better
    inc = analysed.summary["incompressibility"]
    assert inc["cell_mean_abs_J_minus_1"]["max_over_frames"] < 0.05
    assert inc["nodal_mean_abs_J_minus_1"]["max_over_frames"] < inc["cell_mean_abs_J_minus_1"]["max_over_frames"]
    assert inc["cell_mean_abs_J_minus_1"]["per_frame"][0] == 0.0


def test_torsion_gives_E_cl_of_the_closed_form_sign_and_size(analysed, truth):
    # The apex turns by +15 degrees about the long axis and the base not at all, so phi_Z < 0
    # and E_cl = r'^2 phi_Z / (2 R) < 0 (closed form in fibers.demo.motion).
    k = truth["motion"]["peak_frame"]
    exact = np.array(truth["quantities"]["E_cl"])[k]
    got = analysed.study.segments["E_cl"][k]
    assert exact[0] < -0.01
    for s in range(1, 17):
        assert np.sign(got[s]) == np.sign(exact[s]) and abs(got[s] - exact[s]) < 0.005, s
    assert abs(got[0] - exact[0]) < 0.1 * abs(exact[0])


@pytest.mark.parametrize("degree, count", [(1, None), (2, 30000)])
def test_scattered_input_from_a_pool_matches_the_node_input(demo, analysed, tmp_path, degree, count):
    # the same motion sampled at the myocardium pool's points (all 100k of them for the affine fit,
    # 30k for the quadratic one), brought to the nodes by the local fit: segment means within 0.01
    # of the node input (the bound)
    from fibers import pools

    pool = pools.load(demo / "pools" / "myocardium.npz")
    pts = pool["points"]
    if count:
        pts = pts[np.random.default_rng(0).permutation(len(pts))[:count]]
    cycle = demo_motion.IsochoricCycle(ventricle.demo_subject())
    motion_io.write_motion(tmp_path / "scattered.npz", cycle.displacement(pts), time_ms=cycle.time_ms, points=pts)
    run = strainfiles.analyse(demo, tmp_path / "scattered.npz", fit_degree=degree)
    assert run.motion.source == "scattered" and run.motion.fit["degree"] == degree
    for q in ("E_rr", "E_cc", "E_ll", "E_ff", "E_cl", "E_ss", "J", "strain_cc"):
        err = np.nanmax(np.abs(run.study.segments[q] - analysed.study.segments[q]))
        assert err < 0.01, (q, err)


def test_local_fit_reproduces_an_affine_field_exactly():
    # an affine field is in the fitted family: the weighted least-squares fit returns it to round-off
    rng = np.random.default_rng(1)
    pts = rng.uniform(0, 30, (4000, 3))
    nodes = rng.uniform(3, 27, (500, 3))
    A = np.array([[0.1, -0.05, 0.02], [0.03, -0.1, 0.0], [0.0, 0.04, 0.08]])
    disp = np.stack([pts @ A.T + 1.0, 2 * (pts @ A.T)])
    out, fit = motion_io.fit_at_nodes(pts, disp, nodes)
    assert np.abs(out[0] - (nodes @ A.T + 1.0)).max() < 1e-9
    assert np.abs(out[1] - 2 * (nodes @ A.T)).max() < 1e-9
    assert fit["neighbours"] == motion_io.NEIGHBOURS[1]
    # degree 2 reproduces a quadratic field, which the affine fit does not
    quad = np.stack([disp[0] + 0.01 * (pts[:, :1] - 15.0) ** 2])
    exact = nodes @ A.T + 1.0 + 0.01 * (nodes[:, :1] - 15.0) ** 2
    out2, _ = motion_io.fit_at_nodes(pts, quad, nodes, degree=2)
    out1, _ = motion_io.fit_at_nodes(pts, quad, nodes, degree=1)
    assert np.abs(out2[0] - exact).max() < 1e-9 < np.abs(out1[0] - exact).max()


# ----------------------------------------------------------------------------- the command and its files

def test_fibers_strain_writes_the_folder(demo, analysed, tmp_path):
    import meshio

    out = tmp_path / "strain"
    assert cli.main(["strain", str(demo), str(demo / "motion.npz"), "--out", str(out)]) == 0
    names = sorted(p.name for p in out.iterdir())
    assert names == ["manifest.json", "report", "segments.csv", "strain.h5", "strain.xdmf", "summary.json"]
    rows = list(csv.DictReader((out / "segments.csv").open()))
    assert len(rows) == 20 * 18
    assert list(rows[0])[:4] == ["frame", "time_ms", "segment", "volume_ml"]
    assert set(strain.QUANTITIES) <= set(rows[0])
    assert {int(r["segment"]) for r in rows} == set(range(18))
    # round trip of the table: the CSV holds the in-memory means (8 significant digits)
    peak = [r for r in rows if r["frame"] == "10" and r["segment"] == "4"][0]
    assert float(peak["E_cc"]) == pytest.approx(analysed.study.segments["E_cc"][10, 4], rel=1e-7)
    assert float(peak["time_ms"]) == 400.0
    # whole-wall volume equals the sum of segments 1-17 (every cell is labelled in the demo)
    vols = {int(r["segment"]): float(r["volume_ml"]) for r in rows if r["frame"] == "0"}
    assert vols[0] == pytest.approx(sum(vols[s] for s in range(1, 18)), rel=1e-5)
    summary = json.loads((out / "summary.json").read_text())
    cc = summary["peaks"]["strain_cc"]["segments"][0]
    assert cc["segment"] == 0 and cc["frame"] == 10 and cc["value"] < -0.05
    assert summary["peaks"]["strain_rr"]["kind"] == "most positive"
    manifest = json.loads((out / "manifest.json").read_text())
    assert manifest["conventions"]["green_lagrange"].startswith("E = (F^T F - I) / 2")
    # the time series reads back with meshio: 20 steps, cell and nodal fields
    with meshio.xdmf.TimeSeriesReader(out / "strain.xdmf") as reader:
        points, cells = reader.read_points_cells()
        assert reader.num_steps == 20
        t, point_data, cell_data = reader.read_data(10)
    assert t == 400.0
    assert np.allclose(cell_data["E_cc_cell"][0], analysed.study.cell["E_cc"][10], atol=1e-6)
    assert np.allclose(point_data["displacement"], analysed.motion.displacement[10], atol=1e-4)
    assert "J" in point_data and len(point_data["J"]) == len(points)
    page = (out / "report" / "index.html").read_text()
    assert "not a medical device" in page
    for name, _ in __import__("fibers.report.strain", fromlist=["FIGURES"]).FIGURES:
        assert (out / "report" / name).stat().st_size > 10000 and f'src="{name}"' in page


def _tetra10(points, tets):
    """Straight-edged tetra10 cells from tetra4: mid-edge nodes appended, VTK edge order."""
    pairs = np.array(strain.TETRA10_EDGES)
    edges = np.sort(tets[:, pairs].reshape(-1, 2), axis=1)
    unique, inverse = np.unique(edges, axis=0, return_inverse=True)
    cells = np.hstack([tets, len(points) + inverse.reshape(-1, 6)])
    return np.vstack([points, points[unique].mean(axis=1)]), cells, unique


def test_quadratic_cells_reproduce_a_quadratic_field_at_the_gauss_points():
    # P2 interpolation is exact for a quadratic displacement (Brenner & Scott, The Mathematical
    # Theory of Finite Element Methods: polynomial reproduction), so F at each Gauss point equals
    # the analytic gradient there: u_i = B_ij X_j + c_i (a . X)^2, du_i/dX_j = B_ij + 2 c_i (a . X) a_j.
    pts, tets = _cube_mesh(seed=2, n=120)
    points, cells, _ = _tetra10(pts, tets)
    B = np.array([[0.05, 0.1, 0.0], [-0.02, 0.03, 0.04], [0.0, 0.01, -0.06]])
    a, c = np.array([0.3, -0.2, 0.5]), np.array([0.002, 0.001, -0.003])
    u = points @ B.T + np.outer((points @ a) ** 2, c)
    grads, weights = strain.quadrature_gradients(points, cells)
    F = strain.quadrature_deformation_gradients(grads, cells, u)
    X = np.einsum("qa,mai->mqi", strain.GAUSS4, pts[tets])      # Gauss points (straight cells)
    exact = np.eye(3) + B + 2 * np.einsum("i,mq,j->mqij", c, X @ a, a)
    assert np.abs(F - exact).max() < 1e-12
    _, vol = strain.shape_gradients(pts, tets)
    assert np.allclose(weights.sum(axis=1), vol, rtol=1e-12)    # the weights sum to the cell volume


def test_order_2_mesh_is_read_and_more_accurate(demo, analysed, truth, tmp_path):
    # A tetra10 copy of the demo mesh (mid-edge nodes appended) keeps the checksum; with the exact
    # motion at every node, its segment means lie closer to the closed form than the P1 ones.
    import meshio
    import shutil

    copy = tmp_path / "order2"
    shutil.copytree(demo, copy)
    mesh = meshio.read(demo / "mesh.vtu")
    points, cells, unique = _tetra10(mesh.points, mesh.cells_dict["tetra"])
    pdata = {k: np.concatenate([v, v[unique[:, 0]]]) for k, v in mesh.point_data.items()}
    meshio.Mesh(points, [("tetra10", cells)], point_data=pdata, cell_data=mesh.cell_data).write(copy / "mesh.vtu")
    cycle = demo_motion.IsochoricCycle(ventricle.demo_subject())
    motion_io.write_motion(tmp_path / "m2.npz", cycle.displacement(points), time_ms=cycle.time_ms,
                           checksum=analysed.mesh.checksum)
    run = strainfiles.analyse(copy, tmp_path / "m2.npz")
    assert run.mesh.order == 2 and run.mesh.checksum == analysed.mesh.checksum
    assert run.mesh.cells.shape[1] == 10
    for q in ("E_rr", "E_cc", "E_ll", "E_ff", "E_ss"):
        exact = np.array(truth["quantities"][q])
        p2 = np.abs(run.study.segments[q] - exact).max()
        p1 = np.abs(analysed.study.segments[q] - exact).max()
        assert p2 < 0.5 * p1 and p2 < 0.002, (q, p1, p2)
    inc = run.summary["incompressibility"]["cell_mean_abs_J_minus_1"]["max_over_frames"]
    assert inc < 0.005        # quadratic cells follow the curved motion: mean |J - 1| below the bound


# ----------------------------------------------------------------------------- refusals

def _refused(demo, tmp_path, capsys, arrays: dict) -> str:
    path = tmp_path / "bad.npz"
    np.savez(path, **arrays)
    out = tmp_path / "out"
    code = cli.main(["strain", str(demo), str(path), "--out", str(out), "--no-report"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and err[-1].startswith("error: ") and "Traceback" not in "\n".join(err)
    assert not out.exists() and not list(tmp_path.glob(".out*"))   # nothing half-written
    return err[-1]


def test_refuses_a_wrong_node_count_naming_both_numbers(demo, analysed, tmp_path, capsys):
    n = len(analysed.mesh.points)
    msg = _refused(demo, tmp_path, capsys, {"displacement": np.zeros((3, n - 7, 3))})
    assert f"{n - 7} nodes" in msg and f"has {n}" in msg


def test_refuses_a_wrong_shape(demo, analysed, tmp_path, capsys):
    n = len(analysed.mesh.points)
    msg = _refused(demo, tmp_path, capsys, {"displacement": np.zeros((n, 3))})
    assert "shape" in msg and f"(frames, {n}, 3)" in msg
    msg = _refused(demo, tmp_path, capsys, {"displacement": np.zeros((2, n, 2))})
    assert "shape (2, " in msg


def test_refuses_nan_naming_the_frame_and_count(demo, analysed, tmp_path, capsys):
    d = np.zeros((5, len(analysed.mesh.points), 3))
    d[3, :4, 1] = np.nan
    d[4, 10, 0] = np.inf
    msg = _refused(demo, tmp_path, capsys, {"displacement": d})
    assert "4 NaN or inf values in frame 3" in msg and "2 frame(s)" in msg


def test_refuses_a_motion_of_another_build(demo, analysed, tmp_path, capsys):
    d = np.zeros((2, len(analysed.mesh.points), 3))
    msg = _refused(demo, tmp_path, capsys, {"displacement": d, "mesh_checksum": np.array("0" * 64)})
    assert "another mesh" in msg


def test_refuses_unknown_arrays_bad_times_and_non_files(demo, analysed, tmp_path, capsys):
    d = np.zeros((2, len(analysed.mesh.points), 3))
    assert "unknown array" in _refused(demo, tmp_path, capsys, {"displacement": d, "displacements": d})
    assert "increasing" in _refused(demo, tmp_path, capsys, {"displacement": d, "time_ms": np.array([5.0, 5.0])})
    assert "no 'displacement'" in _refused(demo, tmp_path, capsys, {"points": np.zeros((4, 3))})
    (tmp_path / "junk.npz").write_text("not a zip")
    code = cli.main(["strain", str(demo), str(tmp_path / "junk.npz"), "--out", str(tmp_path / "o")])
    assert code == 2 and "not a readable .npz" in capsys.readouterr().err
    code = cli.main(["strain", str(tmp_path), str(demo / "motion.npz"), "--out", str(tmp_path / "o")])
    assert code == 2 and "not a finished fibers build" in capsys.readouterr().err


def test_refuses_scattered_points_that_miss_the_wall(demo, tmp_path, capsys):
    pts = np.random.default_rng(0).uniform(0, 10, (500, 3)) + 1000.0
    msg = _refused(demo, tmp_path, capsys, {"points": pts, "displacement": np.zeros((1, 500, 3))})
    assert "farther than" in msg and "cover" in msg


def test_inverted_elements_are_counted_located_and_the_rest_built(demo, analysed, tmp_path, capsys):
    disp = analysed.motion.displacement[:3].copy()
    # push one interior node 30 mm out: the cells around it turn inside out at frame 2
    node = int(np.argmin(np.abs(analysed.mesh.point_fields["transmural"] - 0.5)))
    disp[2, node] += 30.0 * analysed.mesh.point_fields["e_rad"][node]
    path = tmp_path / "inverted.npz"
    motion_io.write_motion(path, disp)
    out = tmp_path / "out"
    assert cli.main(["strain", str(demo), str(path), "--out", str(out), "--no-report"]) == 0
    err = capsys.readouterr().err
    assert "frame 2:" in err and "inverted tetrahedra (J <= 0)" in err and "first near" in err
    summary = json.loads((out / "summary.json").read_text())
    assert summary["inverted"] and summary["inverted"][0]["frame"] == 2 and summary["inverted"][0]["cells"] >= 1
    rows = list(csv.DictReader((out / "segments.csv").open()))
    assert all(r["E_cc"] != "" for r in rows)                # every segment still has a value


def test_a_build_without_labels_reports_the_whole_wall(demo, tmp_path, capsys):
    # no landmarks, no AHA labels: segment 0 only, with a warning; a motion without time_ms
    import meshio
    import shutil

    copy = tmp_path / "unlabelled"
    shutil.copytree(demo, copy)
    mesh = meshio.read(copy / "mesh.vtu")
    mesh.cell_data["aha_segment"] = [np.zeros_like(mesh.cell_data["aha_segment"][0])]
    mesh.write(copy / "mesh.vtu")
    with np.load(demo / "motion.npz") as data:
        motion_io.write_motion(tmp_path / "m.npz", data["displacement"][:4])
    out = tmp_path / "out"
    assert cli.main(["strain", str(copy), str(tmp_path / "m.npz"), "--out", str(out)]) == 0
    assert "no AHA segment labels" in capsys.readouterr().err
    rows = list(csv.DictReader((out / "segments.csv").open()))
    assert [r["segment"] for r in rows] == ["0"] * 4 and rows[0]["time_ms"] == ""
    assert json.loads((out / "summary.json").read_text())["time_ms"] == [None] * 4
