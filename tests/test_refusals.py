"""Bad input is refused with one clear line, exit status 2, and nothing written."""

from __future__ import annotations

import numpy as np
import pytest

from fibers import cli
from fibers.demo import ventricle
from fibers.io.case import case_text
from fibers.io.contours import write_contours
from fibers.types import RawContours


def _good():
    lv = ventricle.spheroid_shell(seed=1)
    contours, _ = lv.sample_stack(spacing=8.0, seed=0)
    return lv, contours


def _run(tmp_path, capsys, csv_text=None, contours=None, case=None):
    folder = tmp_path / "case"
    folder.mkdir()
    if contours is not None:
        write_contours(folder / "contours.csv", contours)
    elif csv_text is not None:
        data = csv_text if isinstance(csv_text, bytes) else csv_text.encode()
        (folder / "contours.csv").write_bytes(data)
    (folder / "case.toml").write_text(case if case is not None else case_text(mesh_size=4.0))
    out = tmp_path / "out"
    code = cli.main(["build", str(folder / "case.toml"), "--out", str(out), "--no-report"])
    err = capsys.readouterr().err.strip().splitlines()
    last = err[-1] if err else ""
    # nothing written: no output folder, no partial folder beside it
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["case"]
    assert code == 2, last
    assert last.startswith("error: ") and "Traceback" not in "\n".join(err)
    return last


def _edit(contours, **changes):
    fields = dict(structure=contours.structure, slice_id=contours.slice_id, points=contours.points,
                  line=contours.line, source=contours.source)
    fields.update(changes)
    return RawContours(**fields)


def _rows(contours, slice_index, structure):
    ids = np.unique(contours.slice_id)
    return np.nonzero((contours.slice_id == ids[slice_index]) & (contours.structure == structure))[0]


@pytest.mark.parametrize("text, expected", [
    ("", "is empty"),
    ("   \n\n", "is empty"),
    (b"\x89PNG\r\n\x1a\n\x00\x00\x00\rIHDR", "binary"),
    (b"structure,slice,x,y,z\n\xff\xfe endo,1,2,3\n", "not UTF-8"),
    ("structure,slice,x,y\nendo,0,1,2\n", "missing column(s) z"),
    ("structure;slice;x;y;z\nendo;0;1;2;3\n", "missing column"),
    ("structure,slice,x,y,z\n", "no contour points"),
    ("structure,slice,x,y,z\nendo,0,1.0,abc,3\n", "line 2: y = 'abc' is not a number"),
    ("structure,slice,x,y,z\nendo,0,1.0,nan,3\n", "line 2: y = 'nan' is not a finite number"),
    ("structure,slice,x,y,z\nendo,0.5,1.0,2,3\n", "must be an integer slice id"),
    ("structure,slice,x,y,z\nlv_endo,0,1.0,2,3\n", "unknown structure 'lv_endo'; allowed are 'endo'"),
])
def test_garbled_files(tmp_path, capsys, text, expected):
    assert expected in _run(tmp_path, capsys, csv_text=text)


def test_too_few_points(tmp_path, capsys):
    _, c = _good()
    rows = _rows(c, 3, "endo")
    keep = np.ones(len(c.points), bool)
    keep[rows[4:]] = False
    bad = _edit(c, structure=c.structure[keep], slice_id=c.slice_id[keep], points=c.points[keep], line=c.line[keep])
    msg = _run(tmp_path, capsys, contours=bad)
    assert "only 4 distinct points" in msg and "slice" in msg


def test_self_crossing_contour(tmp_path, capsys):
    _, c = _good()
    rows = _rows(c, 2, "epi")
    pts = c.points.copy()
    n = len(rows)
    a, b = rows[n // 4], rows[n // 2]   # swap two points far apart: a figure-of-eight
    pts[[a, b]] = pts[[b, a]]
    msg = _run(tmp_path, capsys, contours=_edit(c, points=pts))
    assert "crosses itself" in msg and "slice" in msg


def test_duplicate_slice(tmp_path, capsys):
    _, c = _good()
    rows = np.nonzero(c.slice_id == np.unique(c.slice_id)[2])[0]
    dup = _edit(c, structure=np.concatenate([c.structure, c.structure[rows]]),
                slice_id=np.concatenate([c.slice_id, np.full(len(rows), 99)]),
                points=np.concatenate([c.points, c.points[rows] + 0.05]),
                line=np.arange(2, len(c.points) + len(rows) + 2))
    msg = _run(tmp_path, capsys, contours=dup)
    assert "same plane" in msg and "99" in msg


def test_tilted_slice(tmp_path, capsys):
    lv, c = _good()
    sid = np.unique(c.slice_id)[4]
    rows = c.slice_id == sid
    centre = c.points[rows].mean(0)
    turn = ventricle.rotation_about(np.cross(lv.long_axis, [1.0, 0, 0]), np.radians(25))
    pts = c.points.copy()
    pts[rows] = (pts[rows] - centre) @ turn.T + centre
    msg = _run(tmp_path, capsys, contours=_edit(c, points=pts))
    assert f"slice {sid}" in msg and "tilted" in msg


def test_swapped_labels(tmp_path, capsys):
    _, c = _good()
    sid = np.unique(c.slice_id)[3]
    s = c.structure.copy()
    rows = c.slice_id == sid
    s[rows] = np.where(s[rows] == "endo", "epi", "endo")
    msg = _run(tmp_path, capsys, contours=_edit(c, structure=s))
    assert f"slice {sid}" in msg and "swapped" in msg


def test_endo_crossing_epi(tmp_path, capsys):
    _, c = _good()
    rows = _rows(c, 2, "endo")
    pts = c.points.copy()
    centre = pts[rows].mean(0)
    bulge = rows[: len(rows) // 6]
    pts[bulge] = centre + (pts[bulge] - centre) * 1.6
    msg = _run(tmp_path, capsys, contours=_edit(c, points=pts))
    assert "crosses or leaves its epicardial contour" in msg


def test_stack_too_short(tmp_path, capsys):
    _, c = _good()
    keep = np.isin(c.slice_id, np.unique(c.slice_id)[:2])
    bad = _edit(c, structure=c.structure[keep], slice_id=c.slice_id[keep], points=c.points[keep], line=c.line[keep])
    assert "a wall needs at least" in _run(tmp_path, capsys, contours=bad)


@pytest.mark.parametrize("scale, word", [(1e-3, "metres"), (0.1, "centimetres")])
def test_not_millimetres(tmp_path, capsys, scale, word):
    _, c = _good()
    msg = _run(tmp_path, capsys, contours=_edit(c, points=c.points * scale))
    assert word in msg and "mm" in msg


def test_missing_endo_mid_stack(tmp_path, capsys):
    # one missing endocardial contour is bridged (tests/test_defects.py); two in a row are not
    _, c = _good()
    drop = np.isin(np.arange(len(c.points)), np.concatenate([_rows(c, 4, "endo"), _rows(c, 5, "endo")]))
    bad = _edit(c, structure=c.structure[~drop], slice_id=c.slice_id[~drop], points=c.points[~drop], line=c.line[~drop])
    msg = _run(tmp_path, capsys, contours=bad)
    assert "two or more in a row are not" in msg and "only the most apical slices may lack it" in msg


@pytest.mark.parametrize("case, expected", [
    ('[input]\ncontours = "contours.csv"\n[mesh]\nsise = 2.0\n', "unknown key 'sise' in [mesh]; did you mean 'size'?"),
    ('[input]\ncontours = "contours.csv"\n[meshes]\nsize = 2.0\n', "unknown table [meshes]; did you mean 'mesh'?"),
    ('[input]\ncontours = "contours.csv"\n[mesh]\nsize = -1\n', "[mesh] size = -1: must lie between"),
    ('[input]\ncontours = "contours.csv"\n[pools]\nsampler = "halton"\n', "must be one of 'random', 'sobol'"),
    ('[input]\ncontours = "missing.csv"\n', "contours file not found"),
    ('[input]\ncontours = "contours.csv"\n[mesh\nsize = 2\n', "not valid TOML"),
    ('[input]\ncontours = "contours.csv"\n[landmarks]\nrv_insertion_anterior = [1, 2]\n', "expected three numbers"),
    ('[input]\ncontours = "contours.csv"\n[fibers]\nhelix_profile = [[0.5, 10], [0.2, 20]]\n', "depths must rise"),
])
def test_case_file_typos(tmp_path, capsys, case, expected):
    _, c = _good()
    assert expected in _run(tmp_path, capsys, contours=c, case=case)


def test_existing_foreign_folder_is_kept(tmp_path, capsys):
    _, c = _good()
    (tmp_path / "case").mkdir()
    write_contours(tmp_path / "case" / "contours.csv", c)
    (tmp_path / "case" / "case.toml").write_text(case_text(mesh_size=4.0))
    out = tmp_path / "precious"
    out.mkdir()
    (out / "thesis.tex").write_text("keep me")
    code = cli.main(["build", str(tmp_path / "case" / "case.toml"), "--out", str(out), "--no-report"])
    assert code == 2 and "not a fibers output folder" in capsys.readouterr().err
    assert (out / "thesis.tex").read_text() == "keep me"


def test_debug_shows_traceback(tmp_path, capsys):
    (tmp_path / "case.toml").write_text('[input]\ncontours = "nowhere.csv"\n')
    code = cli.main(["--debug", "build", str(tmp_path / "case.toml"), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" in err and "error: " in err


def test_contour_listed_twice(tmp_path, capsys):
    _, c = _good()
    rows = _rows(c, 2, "epi")
    twice = _edit(c, structure=np.concatenate([c.structure, c.structure[rows]]),
                  slice_id=np.concatenate([c.slice_id, c.slice_id[rows]]),
                  points=np.concatenate([c.points, c.points[rows]]),
                  line=np.arange(2, len(c.points) + len(rows) + 2))
    assert "listed twice" in _run(tmp_path, capsys, contours=twice)


def test_collinear_contour(tmp_path, capsys):
    _, c = _good()
    rows = _rows(c, 3, "endo")
    pts = c.points.copy()
    a, b = pts[rows[0]], pts[rows[len(rows) // 2]]
    t = np.linspace(0, 1, len(rows))
    pts[rows] = a + t[:, None] * (b - a)
    assert "encloses almost no area" in _run(tmp_path, capsys, contours=_edit(c, points=pts))


def test_one_slice_id_for_two_slices(tmp_path, capsys):
    _, c = _good()
    ids = np.unique(c.slice_id)
    sid = c.slice_id.copy()
    sid[sid == ids[3]] = ids[2]
    msg = _run(tmp_path, capsys, contours=_edit(c, slice_id=sid))
    assert "two planes 8.0 mm apart" in msg and f"slice {ids[2]}" in msg


def test_warped_slice(tmp_path, capsys):
    lv, c = _good()
    rows = c.slice_id == np.unique(c.slice_id)[3]
    pts = c.points.copy()
    local = lv.to_local(pts[rows])
    pts[rows] += np.outer(0.01 * (local[:, 0] ** 2 - local[:, 1] ** 2), lv.long_axis)  # a saddle
    assert "off a plane" in _run(tmp_path, capsys, contours=_edit(c, points=pts))
