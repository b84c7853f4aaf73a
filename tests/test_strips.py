"""The cohort page's hand-written strip plots (fibers.report.strips)."""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest

from fibers.report import strips


@pytest.mark.parametrize("seed", range(5))
def test_box_matches_matplotlib(seed):
    # Reference: matplotlib.cbook.boxplot_stats (PyPI), the statistics behind its boxplot, whose
    # whiskers default to Tukey's 1.5 interquartile ranges.
    from matplotlib.cbook import boxplot_stats

    values = np.random.default_rng(seed).lognormal(size=23)
    values[0] = 40.0  # one far value, beyond the whisker
    ref = boxplot_stats(values)[0]
    assert strips.tukey_box(values) == pytest.approx((ref["whislo"], ref["q1"], ref["med"], ref["q3"], ref["whishi"]))


@pytest.mark.parametrize("lo, hi", [(0.0, 1.0), (93.2, 117.4), (120_423.0, 243_539.0), (-3.0, -2.9), (0.0, 7.0)])
def test_ticks_are_round_and_inside(lo, hi):
    ticks = strips.nice_ticks(lo, hi)
    step = np.diff(ticks)
    assert 2 <= len(ticks) <= 11
    assert np.allclose(step, step[0])
    mantissa = step[0] / 10.0 ** np.floor(np.log10(step[0]))
    assert any(np.isclose(mantissa, m) for m in (1, 2, 2.5, 5))  # round steps (common practice)
    assert ticks[0] >= lo - 1e-9 * abs(step[0]) and ticks[-1] <= hi + 1e-9 * abs(step[0])


def test_tick_labels():
    assert strips.tick_label(150000.0, 50000.0) == "150,000"
    assert strips.tick_label(2.5, 0.5) == "2.5"
    assert strips.tick_label(7.5, 2.5) == "7.5"
    assert strips.tick_label(0.25, 0.25) == "0.25"


def test_panel_is_valid_svg_with_links_and_flags():
    dots = [strips.Dot(f"s{i}", v, f"s{i}/report/index.html", flagged=(i == 3))
            for i, v in enumerate([1.0, 1.1, 0.9, 5.0, np.nan])]
    panel = strips.strip_panel(0, 30, "volume <mL>", dots, np.zeros(5), band=(0.5, 1.5), ink="#000",
                               accent="#0a0", flag_colour="#a00")
    root = ET.fromstring(strips.panel_grid([panel], 4, "a & b", "#000"))  # well-formed XML
    ns = "{http://www.w3.org/2000/svg}"
    links = root.findall(f".//{ns}a")
    assert [a.get("href") for a in links] == [f"s{i}/report/index.html" for i in (0, 1, 2, 3)]  # NaN not drawn
    flagged = [c for c in root.iter(f"{ns}circle") if c.get("fill") == "#a00"]
    assert len(flagged) == 1 and flagged[0].find(f"{ns}title").text.startswith("s3")
    assert any(t.text == "s3" for t in root.iter(f"{ns}text"))
    assert any(t.text == "volume <mL>" for t in root.iter(f"{ns}text"))


def test_panel_without_values():
    panel = strips.strip_panel(0, 30, "t", [strips.Dot("a", np.nan)], np.zeros(1), band=None, ink="#000",
                               accent="#0a0", flag_colour="#a00")
    assert "no values" in panel
