"""The build report: kept in step with output_samples/, offline, cautious, and right where it counts."""

import logging
import shutil
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from fibers import cli, report
from fibers.report import reading, segments
from fibers.errors import InputError

SAMPLES = Path(__file__).resolve().parent.parent / "output_samples"


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """The demo at a coarse mesh size; the build draws the report."""
    out = tmp_path_factory.mktemp("report") / "demo"
    assert cli.main(["demo", "--out", str(out), "--mesh-size", "3"]) == 0
    return out


def _copy(built, tmp_path):
    dst = tmp_path / "copy"
    shutil.copytree(built, dst)
    return dst


class _Outline(HTMLParser):
    """Section headings, table row names and every linked resource of a page."""

    def __init__(self):
        super().__init__()
        self.headings, self.rows, self.links = [], [], []
        self._open = None
        self._text = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        for key in ("src", "href"):
            if key in attrs:
                self.links.append(attrs[key])
        if tag in ("h2", "h3") or (tag == "th" and attrs.get("scope") == "row"):
            self._open, self._text = tag, []

    def handle_endtag(self, tag):
        if tag == self._open:
            text = "".join(self._text).strip()
            (self.rows if tag == "th" else self.headings).append(text)
            self._open = None

    def handle_data(self, data):
        if self._open:
            self._text.append(data)


def _outline(path: Path) -> _Outline:
    parser = _Outline()
    parser.feed(path.read_text(encoding="utf-8"))
    return parser


def _png_names(folder: Path) -> set:
    return {p.name for p in folder.glob("*.png")}


def test_samples_exist_and_hold_the_demo_report():
    assert (SAMPLES / "report" / "index.html").is_file()
    assert (SAMPLES / "manifest.json").is_file()
    assert _png_names(SAMPLES / "report") == {name for name, _ in report.FIGURES}


def test_same_figures_as_the_samples(built):
    mine = _png_names(built / "report")
    assert mine == _png_names(SAMPLES / "report")
    for folder in (built / "report", SAMPLES / "report"):
        for name in mine:
            size = (folder / name).stat().st_size
            assert size > 10_000, f"{folder / name} is only {size} bytes"


def test_same_sections_and_rows_as_the_samples(built):
    mine, sample = _outline(built / "report" / "index.html"), _outline(SAMPLES / "report" / "index.html")
    # every section and row of the samples, in the same order; a branch may add sections and
    # rows (new case keys, the slice table) before the samples are re-made
    it = iter(mine.headings)
    assert all(h in it for h in sample.headings), (mine.headings, sample.headings)
    assert set(sample.rows) <= set(mine.rows), set(sample.rows) - set(mine.rows)
    for name in ("Summary", "Wall per AHA segment", "Helix angle against the law", "Warnings",
                 "Resolved parameters", "Provenance", "Mesh quality", "Fit residuals", "Stage timings"):
        assert name in mine.headings
    # every figure is on the page, by relative path
    assert {link for link in mine.links if link.endswith(".png")} == _png_names(built / "report")


@pytest.mark.parametrize("which", ["built", "sample"])
def test_caution_and_no_network(built, which):
    page = (built / "report" / "index.html" if which == "built" else SAMPLES / "report" / "index.html")
    text = page.read_text(encoding="utf-8")
    assert "not a medical device" in text
    assert "not a diagnosis" in text
    assert "licensed clinical practice" in text
    links = _outline(page).links
    assert links, "the page links its figures"
    assert not [x for x in links if x.lower().startswith(("http://", "https://", "//"))]
    assert "<script" not in text.lower()
    assert "@import" not in text and "url(" not in text


def test_inputs_listed_with_sha256(built):
    text = (built / "report" / "index.html").read_text(encoding="utf-8")
    import json

    manifest = json.loads((built / "manifest.json").read_text())
    for item in manifest["inputs"]:
        assert item["sha256"] in text


def test_basal_thickness_matches_the_synthetic_closed_form(built):
    """Mean thickness of the basal segments against the demo subject's own radii.

    Source: the closed-form radius law of ``fibers.ventricle.SyntheticLV`` (elementary geometry:
    thickness = epicardial minus endocardial radius at one height and angle), averaged over each
    basal sector; basal sectors are 60 degrees wide from the septal bisector, 1 anterior ... 6
    anterolateral (Cerqueira et al., Circulation 2002). The report measures the shortest distance
    from the epicardium to the endocardium, which on the near-vertical basal wall is the radial
    thickness to within the contour noise and the faceting of a 3 mm mesh.
    """
    from fibers.demo import ventricle

    lv = ventricle.demo_subject()
    ant, inf = lv.septum_angles
    bisector = 0.5 * (ant + inf)            # the shorter arc: 120 degrees apart
    toward_inferior = np.sign(inf - ant)    # angles from the bisector grow toward the inferior insertion
    cavity = lv.base_z + lv.endo[1]         # base plane to the endocardial apex, mm
    z = np.linspace(lv.base_z - cavity / 3, lv.base_z, 60)[:, None]
    build = reading.load_build(built, reading.read_manifest(built))
    table = reading.segment_table(build)
    for k, centre in zip(range(1, 7), (-90, -30, 30, 90, 150, -150)):
        psi = np.radians(np.linspace(centre - 29, centre + 29, 59))[None, :]
        t = np.radians(bisector) + toward_inferior * psi
        truth = float(np.mean(lv.radius("epi", z, t) - lv.radius("endo", z, t)))
        assert abs(table["thickness_mm"][k] - truth) < 0.5, (k, table["thickness_mm"][k], truth)
    # the segment volumes partition the wall (the manifest's volume comes from the same tetrahedra)
    summary = build.manifest["summary"]
    assert abs(table["total_ml"] - summary["myocardial_volume_ml"]) < 1e-3 * summary["myocardial_volume_ml"]


def test_bullseye_layout_is_the_published_one():
    """Plot positions to segments, after the bull's-eye figure of Cerqueira et al., Circulation 2002:
    segment 1 anterior at the top, 2 and 3 on the septal (left) side, 4 inferior at the bottom,
    numbering counter-clockwise; apical 13 top, 14 septal left, 15 bottom, 16 lateral right; 17 centre."""
    theta = np.array([90, 150, 210, 270, 330, 30, 90, 150, 210, 270, 330, 30, 90, 180, 270, 0, 0], float)
    radius = np.array([3.5] * 6 + [2.5] * 6 + [1.5] * 4 + [0.2])
    assert reading.expected_segment(theta, radius).tolist() == list(range(1, 18))
    for k in range(1, 18):
        t, r = segments.segment_centre(k)
        assert reading.expected_segment(np.array([t]), np.array([r]))[0] == k


def test_labels_of_the_build_follow_the_layout(built):
    """The labels the epicardial pool carries sit where the published layout puts them."""
    build = reading.load_build(built, reading.read_manifest(built))
    epi = build.pools["epi"]
    theta, radius = reading.bullseye_place(build, epi["points"])
    agree = np.mean(reading.expected_segment(theta, radius) == epi["aha_segment"])
    assert agree > 0.98


def test_helix_measured_from_vectors():
    """atan2(f.e_long, f.e_circ) returns the angle of f = cos(a) e_circ + sin(a) e_long
    (README conventions), and a fiber's sign does not change it (a fiber is a line)."""
    a = np.radians(np.array([-80.0, -60.0, -15.0, 0.0, 30.0, 60.0, 89.0]))
    e_circ = np.tile([0.0, 1.0, 0.0], (len(a), 1))
    e_long = np.tile([0.0, 0.0, 1.0], (len(a), 1))
    fiber = np.cos(a)[:, None] * e_circ + np.sin(a)[:, None] * e_long
    for sign in (1.0, -1.0):
        got = reading.measured_helix({"fiber": sign * fiber, "e_long": e_long, "e_circ": e_circ})
        np.testing.assert_allclose(got, np.degrees(a), atol=1e-9)


def test_law_from_the_manifest():
    """The linear law and the table law read back from the parameters (README, case file)."""
    linear = {"parameters": {"fibers": {"helix_endo": 50.0, "helix_epi": -70.0, "helix_profile": None}}}
    np.testing.assert_allclose(reading.helix_law(linear, [0.0, 0.25, 1.0, 1.5]), [50.0, 20.0, -70.0, -70.0])
    table = {"parameters": {"fibers": {"helix_profile": [[0.1, 60.0], [0.5, 0.0], [0.9, -60.0]]}}}
    np.testing.assert_allclose(reading.helix_law(table, [0.0, 0.3, 0.7, 1.0]), [60.0, 30.0, -30.0, -60.0])


def test_redraw_rewrites_the_report(built, tmp_path):
    folder = _copy(built, tmp_path)
    shutil.rmtree(folder / "report")
    page = report.redraw(folder)
    assert page == folder / "report" / "index.html"
    assert _png_names(folder / "report") == _png_names(built / "report")
    # the finished build has the report and total timings, so no row is pending any more
    assert "measured after this page was written" not in page.read_text(encoding="utf-8")
    assert not list(folder.glob(".report.partial-*"))
    assert cli.main(["report", str(folder)]) == 0


def test_redraw_refuses_a_foreign_folder(tmp_path, capsys):
    with pytest.raises(InputError, match="not a folder"):
        report.redraw(tmp_path / "missing")
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("hello\n")
    with pytest.raises(InputError, match="not a fibers output folder"):
        report.redraw(foreign)
    (foreign / "manifest.json").write_text('{"tool": "something else"}')
    with pytest.raises(InputError, match="not written by fibers"):
        report.redraw(foreign)
    assert cli.main(["report", str(foreign)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: ")
    assert not (foreign / "report").exists()


def test_report_notes_missing_labels(built, tmp_path):
    """Without landmarks every label is 0: the bull's-eye says so instead of drawing sectors."""
    import pyvista as pv

    folder = _copy(built, tmp_path)
    mesh = pv.read(folder / "mesh.vtu")
    mesh.cell_data["aha_segment"] = np.zeros(mesh.n_cells, np.int32)
    mesh.save(folder / "mesh.vtu")
    for name in ("myocardium", "epi", "endo", "base"):
        with np.load(folder / "pools" / f"{name}.npz") as data:
            arrays = {k: data[k] for k in data.files}
        arrays["aha_segment"] = np.zeros_like(arrays["aha_segment"])
        np.savez(folder / "pools" / f"{name}.npz", **arrays)
    page = report.redraw(folder).read_text(encoding="utf-8")
    assert "No segment labels" in page
    assert (folder / "report" / "bullseye.png").stat().st_size > 10_000
    assert "beyond the cavity" in page  # helix rings fall back to depth thirds


def test_view_without_display_lists_the_files(built, monkeypatch):
    monkeypatch.delenv("DISPLAY", raising=False)
    monkeypatch.delenv("WAYLAND_DISPLAY", raising=False)
    monkeypatch.setattr(reading.sys, "platform", "linux")
    seen = []

    class Keep(logging.Handler):
        def emit(self, record):
            seen.append(record.getMessage())

    handler = Keep()
    logger = logging.getLogger("fibers")
    logger.addHandler(handler)
    try:
        assert report.view(built) == 0
    finally:
        logger.removeHandler(handler)
    text = "\n".join(seen)
    assert "no display" in text
    for name in ("mesh.vtu", "surfaces.vtp", "myocardium.vtp"):
        assert str(built / name) in text or str(built / "pools" / name) in text


def test_view_refuses_a_foreign_folder(tmp_path):
    with pytest.raises(InputError):
        report.view(tmp_path)
