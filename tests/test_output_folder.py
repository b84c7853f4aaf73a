"""The output folder never loses a file: foreign folders, a user's file in our own folder, the
build's own inputs, a second build at the same time, killed builds, signals, special paths."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from fibers import cli
from fibers.demo import ventricle
from fibers.io import folder
from fibers.io.case import case_text
from fibers.io.contours import write_contours

SMALL_POOLS = ("\n[pools]\nmyocardium = 2000\ncavity = 200\nbackground = 2000\nendo = 200\n"
               "epi = 200\nbase = 200\n")


@pytest.fixture()
def case(tmp_path):
    lv = ventricle.spheroid_shell(seed=1)
    contours, _ = lv.sample_stack(spacing=8.0, seed=0)
    (tmp_path / "case").mkdir()
    write_contours(tmp_path / "case" / "contours.csv", contours)
    text = case_text(mesh_size=4.0).replace("[pools]\nmyocardium = 100000\ncavity = 20000\nbackground = 100000\n"
                                            "endo = 10000\nepi = 10000\nbase = 10000\n", "[pools]\n")
    (tmp_path / "case" / "case.toml").write_text(text.replace("[pools]\n", SMALL_POOLS.lstrip("\n"), 1))
    return tmp_path / "case" / "case.toml"


def _build(case, out, *extra):
    return cli.main(["build", str(case), "--out", str(out), "--no-report", *extra])


def _leftovers(parent: Path):
    return [p.name for p in parent.iterdir() if ".fibers-" in p.name or ".partial" in p.name]


def test_manifest_lists_every_file_written(case, tmp_path):
    out = tmp_path / "out"
    assert _build(case, out) == 0
    listed = json.loads((out / "manifest.json").read_text())["files"]
    assert listed == folder.files_in(out)  # relative paths, every one, nothing more
    assert "mesh.vtu" in listed and "pools/myocardium.npz" in listed and "manifest.json" in listed
    assert _build(case, out) == 0  # our own folder is replaced
    assert not _leftovers(tmp_path)


def test_foreign_folder_refused_naming_its_files(case, tmp_path, capsys):
    out = tmp_path / "other_project"
    out.mkdir()
    (out / "manifest.json").write_text('{"tool": "another program"}')
    (out / "notes.txt").write_text("keep me")
    assert _build(case, out) == 2
    err = capsys.readouterr().err
    assert "manifest.json" in err and "notes.txt" in err and "--force" in err
    assert (out / "notes.txt").read_text() == "keep me" and sorted(os.listdir(out)) == ["manifest.json", "notes.txt"]


def test_user_file_in_our_folder_survives(case, tmp_path, capsys):
    out = tmp_path / "out"
    assert _build(case, out) == 0
    (out / "my_notes.md").write_text("mine")
    (out / "pools" / "extra.npz").write_bytes(b"mine too")
    capsys.readouterr()
    assert _build(case, out) == 2
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert "my_notes.md" in err and "pools/extra.npz" in err
    assert (out / "my_notes.md").read_text() == "mine"
    # --force replaces the folder (and deletes the user's files, as it says)
    assert _build(case, out, "--force") == 0
    assert not (out / "my_notes.md").exists()


def test_more_than_three_foreign_files_named_three(case, tmp_path, capsys):
    out = tmp_path / "busy"
    out.mkdir()
    for i in range(5):
        (out / f"f{i}.txt").write_text("x")
    assert _build(case, out) == 2
    err = capsys.readouterr().err
    assert "f0.txt, f1.txt, f2.txt and 2 more" in err


def test_folder_holding_the_inputs_is_never_replaced(tmp_path, capsys):
    demo = tmp_path / "demo"
    assert cli.main(["demo", "--out", str(demo), "--mesh-size", "4", "--no-report"]) == 0
    before = {p: (demo / p).read_bytes() for p in ("input/case.toml", "input/contours.csv")}
    for extra in ([], ["--force"]):
        capsys.readouterr()
        assert cli.main(["build", str(demo / "input" / "case.toml"), "--out", str(demo), "--no-report", *extra]) == 2
        assert "holds this build's own input input/case.toml" in capsys.readouterr().err
    assert {p: (demo / p).read_bytes() for p in before} == before


def test_second_build_at_the_same_time_refuses_at_once(case, tmp_path, capsys):
    out = tmp_path / "out"
    assert _build(case, out) == 0
    first = (out / "manifest.json").read_bytes()
    with folder.locked(out):  # a build of another process holds the folder (flock is per open file)
        capsys.readouterr()
        assert _build(case, out) == 2
        assert "another fibers build is writing this folder right now" in capsys.readouterr().err
    assert (out / "manifest.json").read_bytes() == first  # the first result is intact
    assert not _leftovers(tmp_path)


def test_a_killed_build_leaves_nothing_the_next_one_keeps(case, tmp_path):
    out = tmp_path / "out"
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    stale = out.parent / f"{folder._stem(out)}-{dead.pid}.partial"
    (stale / "pools").mkdir(parents=True)
    (stale / "mesh.vtu").write_bytes(b"half-written")
    legacy = out.parent / f".{out.name}.partial-0badc0de"  # older versions' name
    legacy.mkdir()
    assert _build(case, out) == 0
    assert not stale.exists() and not legacy.exists() and not _leftovers(tmp_path)


def test_out_dot_and_a_long_name(case, tmp_path, monkeypatch):
    here = tmp_path / "here"
    here.mkdir()
    monkeypatch.chdir(here)
    assert _build(case, ".") == 0
    assert (here / "manifest.json").exists()
    long = tmp_path / ("n" * 250)  # legal: a file name may have 255 bytes
    assert _build(case, long) == 0 and (long / "mesh.vtu").exists()
    assert not _leftovers(tmp_path)


@pytest.mark.parametrize("out, expected", [
    ("a\x00b", "NUL byte"),
    ("x" * 300, "more than the 255"),
])
def test_impossible_out_paths_refused(case, tmp_path, capsys, out, expected):
    assert _build(case, tmp_path / out) == 2
    assert expected in capsys.readouterr().err


def test_symlink_loop_and_file_as_out(case, tmp_path, capsys):
    (tmp_path / "l1").symlink_to(tmp_path / "l2")
    (tmp_path / "l2").symlink_to(tmp_path / "l1")
    assert _build(case, tmp_path / "l1") == 2
    assert "loop" in capsys.readouterr().err
    (tmp_path / "afile").write_text("x")
    assert _build(case, tmp_path / "afile" / "out") == 2
    assert "is a file, not a folder" in capsys.readouterr().err


@pytest.mark.skipif(os.geteuid() == 0, reason="root may write anywhere")
def test_unwritable_parent_refused_before_computing(case, tmp_path, capsys):
    locked_dir = tmp_path / "ro"
    locked_dir.mkdir()
    locked_dir.chmod(0o500)
    try:
        assert _build(case, locked_dir / "out") == 2
        err = capsys.readouterr().err
        assert "no permission to write" in err and "fibers: stack" not in err
    finally:
        locked_dir.chmod(0o700)


def test_warnings_are_warning_lines_and_in_the_manifest(case, tmp_path, capsys):
    out = tmp_path / "out"
    assert _build(case, out) == 0
    err = capsys.readouterr().err.splitlines()
    shown = [line[len("warning: "):] for line in err if line.startswith("warning: ")]
    assert shown and all(line.startswith(("fibers: ", "warning: ")) for line in err)
    assert set(shown) <= set(json.loads((out / "manifest.json").read_text())["warnings"])


# -- signals at several stages of a real small build, run as a subprocess --------------------

@pytest.mark.parametrize("sig, stage", [
    (signal.SIGINT, "budget"),      # during meshing (held back until gmsh returns)
    (signal.SIGTERM, "mesh"),       # during the coordinates
    (signal.SIGTERM, "pools"),      # while the files are written into the temporary folder
    (signal.SIGHUP, "outputs"),     # while the report is drawn
    (signal.SIGINT, "outputs"),
])
def test_signals_clean_up(case, tmp_path, sig, stage):
    out = tmp_path / "out"
    assert _build(case, out) == 0  # an earlier build, which must survive untouched
    before = folder.files_in(out)
    manifest = (out / "manifest.json").read_bytes()
    proc = subprocess.Popen([sys.executable, "-m", "fibers.cli", "build", str(case), "--out", str(out),
                             "--force"], stderr=subprocess.PIPE, text=True)
    lines = []
    for line in proc.stderr:
        lines.append(line)
        if line.startswith(f"fibers: {stage} "):
            proc.send_signal(sig)
            break
    rest = proc.stderr.read()
    code = proc.wait(timeout=120)
    assert code == 128 + sig, "".join(lines) + rest
    assert "nothing was written" in rest and "Traceback" not in rest
    assert folder.files_in(out) == before and (out / "manifest.json").read_bytes() == manifest
    assert not _leftovers(tmp_path)


def test_report_drawn_later_counts_as_ours(case, tmp_path):
    out = tmp_path / "out"
    assert _build(case, out) == 0  # --no-report
    (out / "report").mkdir()
    (out / "report" / "index.html").write_text("<html></html>")  # as `fibers report` would write
    (out / "report" / "fibers.png").write_bytes(b"png")
    assert _build(case, out) == 0
