"""fibers cohort: three small synthetic subjects and a broken one on a local Dask cluster of 2 workers."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from fibers import cli, cohort
from fibers.demo.cohort import BROKEN, write_cohort
from fibers.io.cohort import COLUMNS, read_table
from fibers.report.cohort import outlier_mask

SIZE = "4"  # mm: small meshes keep the suite fast
FIGURES = ("myocardial_volume_ml", "cavity_volume_ml", "lv_mass_g", "long_axis_length_mm")


@pytest.fixture(scope="module")
def cases(tmp_path_factory):
    return write_cohort(tmp_path_factory.mktemp("cases"), 3, seed=5, mesh_size=float(SIZE))


@pytest.fixture(scope="module")
def first(cases, tmp_path_factory):
    out = tmp_path_factory.mktemp("cohort") / "run"
    code = cli.main(["cohort", *map(str, cases), "--out", str(out), "--workers", "2"])
    return out, code


def _rows(out):
    return {r["subject"]: r for r in read_table(out)}


def test_three_ok_one_failed(first):
    out, code = first
    assert code == 1  # some failed
    rows = _rows(out)
    assert [rows[f"subject-00{k}"]["status"] for k in (1, 2, 3)] == ["ok"] * 3
    broken = rows[BROKEN]
    assert broken["status"] == "failed"
    assert "not a number" in broken["error"] and "line" in broken["error"]
    assert "\n" not in broken["error"]
    assert (out / "cohort.csv").read_text().splitlines()[0].split(",") == list(COLUMNS)
    assert not (out / BROKEN).exists()
    assert not list(out.glob(".*partial*"))
    page = (out / "cohort.html").read_text()
    assert 'href="subject-001/report/index.html"' in page and "<svg" in page and "<circle" in page
    assert (out / "subject-001" / "report" / "index.html").is_file()


def test_same_figures_and_bytes_as_a_single_build(first, cases, tmp_path):
    out, _ = first
    single = tmp_path / "subject-001"
    # `fibers build` as a user runs it: a fresh process (one BLAS thread, as on the workers)
    subprocess.run([sys.executable, "-m", "fibers.cli", "build", str(cases[0]), "--out", str(single),
                    "--mesh-size", SIZE, "--no-report"], check=True, capture_output=True)
    manifest = json.loads((single / "manifest.json").read_text())
    row = _rows(out)["subject-001"]
    for key in FIGURES:
        assert row[key] == manifest["summary"][key], key
    assert row["tetrahedra"] == manifest["summary"]["counts"]["tetrahedra"]
    for name in ("mesh.vtu", "mesh.h5", "mesh.msh", "surfaces.vtp", "pools/myocardium.npz", "pools/epi.npz"):
        assert (single / name).read_bytes() == (out / "subject-001" / name).read_bytes(), name
    # the thickness columns are the report's per-segment means; an independent check of their
    # size: the synthetic wall is 7-13 mm thick by construction (fibers/demo/cohort.py), the
    # shortest-distance thickness is at most that and well above half of it
    thick = np.array([row[f"thickness_mm_{k}"] for k in range(1, 17)], float)
    assert np.all((thick > 3.5) & (thick < 14.0))


def test_rerun_skips_and_a_changed_case_rebuilds(first, cases):
    out, _ = first
    assert cli.main(["cohort", *map(str, cases), "--out", str(out), "--workers", "2"]) == 1
    rows = _rows(out)
    assert [rows[f"subject-00{k}"]["status"] for k in (1, 2, 3)] == ["skipped"] * 3
    assert rows["subject-002"]["myocardial_volume_ml"] is not None  # figures carried over
    assert rows[BROKEN]["status"] == "failed"  # failed ones are tried again

    case = cases[1]
    case.write_text(case.read_text().replace("seed = 0", "seed = 3"))
    from distributed import LocalCluster

    # the same run on an existing cluster, by its address
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        code = cli.main(["cohort", *map(str, cases[:3]), "--out", str(out),
                         "--scheduler", cluster.scheduler_address])
    assert code == 0
    rows = _rows(out)
    assert rows["subject-002"]["status"] == "ok"
    assert rows["subject-001"]["status"] == rows["subject-003"]["status"] == "skipped"
    assert json.loads((out / "subject-002" / "manifest.json").read_text())["parameters"]["pools"]["seed"] == 3


def test_worker_killed_mid_build(cases, tmp_path):
    import psutil

    out = tmp_path / "killed"
    proc = subprocess.Popen([sys.executable, "-m", "fibers.cli", "cohort", *map(str, cases[:2]), "--out", str(out),
                             "--workers", "2", "--no-report", "--mesh-size", "3"],
                            stderr=subprocess.PIPE, text=True, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    me = psutil.Process(proc.pid)
    workers = []
    deadline = time.monotonic() + 120
    while len(workers) < 2 and time.monotonic() < deadline:
        # a spawned worker runs multiprocessing's spawn_main; a forked one (Linux) keeps our command line
        workers = [p for p in me.children(recursive=True)
                   if "spawn_main" in " ".join(p.cmdline()) or p.cmdline() == me.cmdline()]
        time.sleep(0.2)
    assert len(workers) == 2
    # kill a worker outright the moment its process is busy building (a build here takes about
    # 3 s and its process stays alive until the cohort ends, so the kill always finds it)
    busy = None
    while busy is None and time.monotonic() < deadline:
        busy = next((p for p in workers if p.cpu_percent(0.2) > 50), None)
    assert busy is not None, "no worker started building"
    busy.send_signal(signal.SIGKILL)
    _, err = proc.communicate(timeout=600)
    rows = _rows(out)
    statuses = sorted(r["status"] for r in rows.values())
    assert proc.returncode in (0, 1), err
    # the subject of the killed worker is retried on a fresh one (status ok) or marked failed
    # with the reason; the other completes either way
    assert statuses in (["ok", "ok"], ["failed", "ok"]), err
    for r in rows.values():
        if r["status"] == "failed":
            assert "died" in r["error"]
    assert not list(out.glob(".*partial*"))


def test_subject_names_from_folders_made_unique(tmp_path):
    for parent in ("a/x", "b/x", "c/y"):
        (tmp_path / parent).mkdir(parents=True)
        (tmp_path / parent / "case.toml").write_text("")
    names = [s.name for s in cohort.find_subjects([tmp_path / "a/x", tmp_path / "b/x/case.toml", tmp_path / "c/y"])]
    assert names == ["x", "x-2", "y"]


def test_usage_errors_exit_2(tmp_path, capsys):
    assert cli.main(["cohort", str(tmp_path / "nothing"), "--out", str(tmp_path / "o")]) == 2
    assert "no case file" in capsys.readouterr().err
    (tmp_path / "busy").mkdir()
    (tmp_path / "busy" / "notes.txt").write_text("mine")
    (tmp_path / "s").mkdir()
    (tmp_path / "s" / "case.toml").write_text("")
    assert cli.main(["cohort", str(tmp_path / "s"), "--out", str(tmp_path / "busy")]) == 2
    assert cli.main(["cohort", str(tmp_path / "s"), "--out", str(tmp_path / "o"), "--memory-per-worker", "lots"]) == 2
    with pytest.raises(SystemExit) as exit_info:
        cli.main(["cohort", "--out", str(tmp_path / "o")])
    assert exit_info.value.code == 2


def test_outliers_by_median_and_scaled_mad():
    # reference: scipy.stats.median_abs_deviation(scale="normal") is the MAD scaled by 1.4826
    from scipy.stats import median_abs_deviation

    rng = np.random.default_rng(1)
    values = np.concatenate([rng.normal(100.0, 5.0, 200), [160.0, 40.0]])
    mad = median_abs_deviation(values, scale="normal")
    expected = np.abs(values - np.median(values)) > 3 * mad
    np.testing.assert_array_equal(outlier_mask(values), expected)
    assert outlier_mask(values)[-2:].all()
    assert not outlier_mask(np.full(5, 3.0)).any()  # no spread, nothing to flag


def _ring_stack(r_endo, r_epi, n_sides, slices, spacing, rotation=np.eye(3)):
    """Contours of a thick-walled cylinder: regular polygons, one endo and one epi per slice."""
    from fibers.types import RawContours

    angle = 2 * np.pi * np.arange(n_sides) / n_sides
    ring = np.column_stack([np.cos(angle), np.sin(angle), np.zeros(n_sides)])
    structure, slice_id, points = [], [], []
    for k in range(slices):
        for name, r, turn in (("endo", r_endo, 1), ("epi", r_epi, -1)):  # either winding
            structure += [name] * n_sides
            slice_id += [k] * n_sides
            points.append((r * ring[::turn] + [3.0, -2.0, k * spacing]) @ rotation.T)
    return RawContours(structure=np.array(structure), slice_id=np.array(slice_id), points=np.concatenate(points),
                       line=np.arange(len(slice_id)) + 2)


def test_contour_wall_volume_of_a_tilted_cylinder():
    # Reference: a regular N-gon of circumradius r has area (N/2) r^2 sin(2 pi / N) (elementary
    # geometry); the stack's volume is the sum of the wall areas times the spacing.
    from scipy.spatial.transform import Rotation

    n, r_endo, r_epi, slices, spacing = 48, 22.0, 31.0, 9, 8.0
    area = 0.5 * n * np.sin(2 * np.pi / n) * (r_epi**2 - r_endo**2)
    tilt = Rotation.from_euler("xz", [25.0, 40.0], degrees=True).as_matrix()
    for rotation in (np.eye(3), tilt):
        got = cohort.contour_wall_volume_mm3(_ring_stack(r_endo, r_epi, n, slices, spacing, rotation))
        assert got == pytest.approx(area * slices * spacing, rel=1e-12)


def test_builds_are_handed_out_largest_first(tmp_path):
    # Longest processing time first (Graham 1969): the largest estimated mesh starts first; a
    # case whose inputs cannot be read is placed at the median of the others.
    from fibers.io.case import case_text
    from fibers.io.contours import write_contours

    for name, r_epi in (("small", 26.0), ("large", 36.0), ("middle", 31.0)):
        (tmp_path / name).mkdir()
        write_contours(tmp_path / name / "contours.csv", _ring_stack(20.0, r_epi, 40, 8, 8.0))
        (tmp_path / name / "case.toml").write_text(case_text())
    (tmp_path / "unreadable").mkdir()
    (tmp_path / "unreadable" / "case.toml").write_text(case_text())  # its contours.csv is missing
    subjects = cohort.find_subjects([tmp_path / n for n in ("small", "unreadable", "large", "middle")])
    order = cohort.build_order(subjects, cohort.Options())
    names = [s.name for s, _ in order]
    assert names[0] == "large" and names[-1] == "small"
    sizes = dict((s.name, size) for s, size in order)
    assert sizes["unreadable"] == sizes["middle"]
    assert sizes["large"] > sizes["middle"] > sizes["small"] > 0
