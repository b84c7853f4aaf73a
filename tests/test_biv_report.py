"""The report of a biventricular build: its own figures and tables, no left-ventricular law."""

import re

import numpy as np
import pytest

from fibers import pipeline
from fibers.demo import biventricle
from fibers.io.case import resolve_case
from fibers.io.contours import write_contours
from fibers.report import biventricle as biv_report

POOLS = {"myocardium": 20000, "cavity": 1000, "background": 2000, "endo": 3000, "epi": 3000, "base": 500}


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("bivreport")
    contours, _ = biventricle.exact_biventricle(seed=2).sample_stack(spacing=8.0, point_spacing=1.5)
    write_contours(tmp / "contours.csv", contours)
    case = resolve_case({"input": {"contours": "contours.csv"}, "mesh": {"size": 3.0}, "pools": POOLS}, base=tmp)
    manifest = pipeline.build(case, tmp / "out", report=True)
    return tmp / "out", manifest


def test_page_shows_both_ventricles(built):
    out, manifest = built
    page = (out / "report" / "index.html").read_text()
    for name, _ in biv_report.FIGURES:
        assert f'src="{name}"' in page
        assert (out / "report" / name).stat().st_size > 20_000    # a drawn figure, not an empty frame
    assert "RV cavity volume (mL)" in page and "Wall volume: septum (mL)" in page
    assert "Myocardial mass, both ventricles" in page and "LV mass (g" not in page
    assert "Helix angle against the law (both ventricles)" in page
    rv = manifest["summary"]["biventricular"]["rv_cavity_volume_ml"]
    assert f"{rv:.4g}" in page


def test_helix_table_per_region(built):
    out, _ = built
    page = (out / "report" / "index.html").read_text()
    start = page.index("Helix angle against the law (both ventricles)")
    rows = re.findall(r'<tr><th scope="row">([^<]+)</th><td>(\w+)</td><td class="num">([\d,]+)</td>'
                      r'<td class="num">([\d.]+)</td>', page[start:start + 4000])
    got = {r[0]: float(r[3]) for r in rows}
    assert set(got) == {"LV free wall", "septum", "RV free wall"}
    # across the septum the two frames share their axes, so the blend turns the helix linearly
    # in septal depth (Shoemake 1985): the measured angle follows the law within a degree on average
    assert got["septum"] < 1.0


def test_law_lines():
    law = {"lv_helix_endo": 40.0, "lv_helix_epi": -50.0, "rv_helix_endo": 30.0, "rv_helix_epi": -40.0}
    d = np.array([0.0, 0.5, 1.0])
    # septum: +lv_helix_endo on the left face to -rv_helix_endo on the right face, linear
    assert np.allclose(biv_report.helix_law(law, 2, d), [40.0, 5.0, -30.0])
    # free walls: a_endo + (a_epi - a_endo) e^2 (slerp of frames turned about one axis, Shoemake 1985)
    assert np.allclose(biv_report.helix_law(law, 3, d), [30.0, 30.0 - 70.0 / 4, -40.0])
