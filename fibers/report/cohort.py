"""The cohort page ``DIR/cohort.html``: distributions of the main figures, outliers flagged.

One figure holds a panel per main figure of ``cohort.csv`` (each built subject a dot, jittered
sideways, over a box of the quartiles); a subject is an outlier on a figure when its value lies
outside median ± 3 MAD, the MAD scaled by 1.4826 so it estimates the standard deviation of
normal data (common practice; the factor is 1 / Phi^-1(3/4), from memory). Outliers are drawn
in a warning colour with their names and listed with links to their own reports. The page is
one file readable offline: the figure is inline SVG (`fibers.report.strips`), every dot a link
to its subject's report, no scripts.
"""

from __future__ import annotations

import os
import uuid
from pathlib import Path

import numpy as np

from fibers.report import strips
from fibers.report.page import CSS, _e, _num
from fibers.report.reading import ACCENT, CAUTION, INK

MAD_TO_SIGMA = 1.4826  # 1 / Phi^-1(0.75): MAD of normal data times this is sigma (from memory)
OUTLIER_MADS = 3.0     # median +- 3 scaled MAD (common practice)
OUTLIER_COLOUR = "#b5523b"
COLUMNS = 4  # panels per row

# column, label with unit; the order of the panels
MAIN_FIGURES = (
    ("myocardial_volume_ml", "myocardial volume, mL"),
    ("cavity_volume_ml", "cavity volume, mL"),
    ("lv_mass_g", "LV mass, g"),
    ("long_axis_length_mm", "long-axis length, mm"),
    ("mean_thickness_mm", "mean wall thickness, mm"),
    ("worst_fit_residual_mm", "worst fit residual, mm"),
    ("tetrahedra", "tetrahedra"),
    ("warnings", "warnings"),
)


def outlier_mask(values: np.ndarray) -> np.ndarray:
    """Which values (N,) lie outside median ± 3 scaled MAD; NaN is never an outlier.

    With a MAD of zero (over half the values equal) nothing is flagged: no spread to measure by.
    """
    values = np.asarray(values, float)
    finite = np.isfinite(values)
    out = np.zeros(len(values), bool)
    if finite.sum() < 3:
        return out
    med = np.median(values[finite])
    mad = MAD_TO_SIGMA * np.median(np.abs(values[finite] - med))
    if mad == 0:
        return out
    out[finite] = np.abs(values[finite] - med) > OUTLIER_MADS * mad
    return out


def figure_columns(rows: list[dict]) -> dict[str, np.ndarray]:
    """The main figures of the built subjects (ok or skipped) as arrays, NaN where missing."""
    from fibers.io.cohort import THICKNESS

    def num(v):
        return np.nan if v is None else float(v)

    cols = {key: np.array([num(r.get(key)) for r in rows]) for key, _ in MAIN_FIGURES if key != "mean_thickness_mm"}
    thick = np.array([[num(r.get(k)) for k in THICKNESS] for r in rows]).reshape(len(rows), len(THICKNESS))
    with np.errstate(invalid="ignore"):
        have = np.isfinite(thick).any(axis=1)
        cols["mean_thickness_mm"] = np.where(have, np.nanmean(np.where(have[:, None], thick, 0.0), axis=1), np.nan)
    return cols


def write_cohort_page(folder, rows: list[dict]) -> Path:
    """Write ``folder/cohort.html`` from the table's rows; returns its path."""
    folder = Path(folder)
    built = [r for r in rows if r.get("status") in ("ok", "skipped")]
    cols = figure_columns(built)
    flags = {key: outlier_mask(cols[key]) for key, _ in MAIN_FIGURES}
    svg = _distributions_svg(folder, built, cols, flags) if built else None
    text = _page(folder, rows, built, cols, flags, svg)
    path = folder / "cohort.html"
    tmp = path.with_name(f".cohort.html.{uuid.uuid4().hex[:8]}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def _distributions_svg(folder: Path, built, cols, flags) -> str:
    rng = np.random.default_rng(0)  # jitter only: fixed, so the page is the same for the same table
    panels = []
    for index, (key, label) in enumerate(MAIN_FIGURES):
        v, bad = cols[key], flags[key]
        dots = [strips.Dot(r["subject"], v[i], _report_href(r, folder), bool(bad[i])) for i, r in enumerate(built)]
        ok = np.isfinite(v)
        band = None
        if ok.any():
            med = np.median(v[ok])
            mad = MAD_TO_SIGMA * np.median(np.abs(v[ok] - med))
            band = (med - OUTLIER_MADS * mad, med + OUTLIER_MADS * mad) if mad > 0 else None
        x0, y0 = strips.grid_origin(index, COLUMNS)
        panels.append(strips.strip_panel(x0, y0, label, dots, rng.uniform(-1, 1, len(v)), band=band, ink=INK,
                                         accent=ACCENT, flag_colour=OUTLIER_COLOUR))
    heading = (f"{len(built)} built subjects: shaded band median ± {OUTLIER_MADS:g} MAD (scaled), "
               f"outliers in red")
    return strips.panel_grid(panels, COLUMNS, heading, INK)


def _report_href(row: dict, folder: Path) -> str | None:
    if row.get("status") in ("ok", "skipped") and (folder / row["subject"] / "report" / "index.html").is_file():
        return f"{row['subject']}/report/index.html"
    return None


def _report_link(row: dict, folder: Path) -> str:
    href = _report_href(row, folder)
    return f'<a href="{_e(href)}">{_e(row["subject"])}</a>' if href else _e(row["subject"])


def _page(folder: Path, rows, built, cols, flags, svg) -> str:
    title = folder.name
    counts = {s: sum(r.get("status") == s for r in rows) for s in ("ok", "skipped", "failed")}
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>fibers cohort: {_e(title)}"
             f"</title><style>{CSS}</style></head><body>",
             f"<h1>fibers cohort</h1><p class=\"muted\">{len(rows)} subjects: {counts['ok']} built, "
             f"{counts['skipped']} up to date (skipped), {counts['failed']} failed. Table: "
             f"<code>cohort.csv</code>.</p>",
             f'<p class="caution">Caution. {_e(CAUTION)}</p>']
    if svg is not None:
        parts.append(f'<h2>Distributions</h2><figure>{svg}<figcaption>Each dot a built subject (point at one '
                     f'for its name and value, click it for its report); the box spans the quartiles, its '
                     f'whiskers reach 1.5 interquartile ranges; outside the shaded band of median ± 3 MAD '
                     f'(MAD scaled by 1.4826, common practice) a subject is flagged.</figcaption></figure>')
    parts.append("<h2>Outliers</h2>")
    flagged = [(i, [label for key, label in MAIN_FIGURES if flags[key][i]]) for i in range(len(built))]
    flagged = [(i, what) for i, what in flagged if what]
    if flagged:
        parts.append("<table><thead><tr><th>subject</th><th>outside median ± 3 MAD on</th></tr></thead><tbody>")
        for i, what in flagged:
            parts.append(f"<tr><th scope=\"row\">{_report_link(built[i], folder)}</th><td>{_e(', '.join(what))}</td></tr>")
        parts.append("</tbody></table>")
    else:
        parts.append("<p>No subject lies outside median ± 3 MAD on any main figure.</p>")
    parts.append("<h2>Subjects</h2><table><thead><tr><th>subject</th><th>status</th><th>seconds</th>"
                 + "".join(f"<th>{_e(label)}</th>" for _, label in MAIN_FIGURES) + "<th>error</th></tr></thead><tbody>")
    index = {r["subject"]: i for i, r in enumerate(built)}
    for r in rows:
        i = index.get(r["subject"])
        cells = []
        for key, _ in MAIN_FIGURES:
            if i is None:
                cells.append('<td class="num">-</td>')
                continue
            mark = ' style="color:#b5523b;font-weight:600"' if flags[key][i] else ""
            cells.append(f'<td class="num"{mark}>{_num(cols[key][i])}</td>')
        status = _e(r.get("status", ""))
        if r.get("status") == "failed":
            status = f'<span class="warn">{status}</span>'
        parts.append(f"<tr><th scope=\"row\">{_report_link(r, folder)}</th><td>{status}</td>"
                     f"<td class=\"num\">{_num(r.get('seconds'))}</td>{''.join(cells)}"
                     f"<td>{_e(r.get('error') or '')}</td></tr>")
    parts.append("</tbody></table></body></html>\n")
    return "".join(parts)
