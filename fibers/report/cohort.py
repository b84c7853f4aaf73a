"""The cohort page ``DIR/cohort.html``: distributions of the main figures, outliers flagged.

One figure holds a panel per main figure of ``cohort.csv`` (each built subject a dot, jittered
sideways, over a box of the quartiles); a subject is an outlier on a figure when its value lies
outside median ± 3 MAD, the MAD scaled by 1.4826 so it estimates the standard deviation of
normal data (common practice; the factor is 1 / Phi^-1(3/4), from memory). Outliers are drawn
in a warning colour with their names and listed with links to their own reports. The page is
one file readable offline: the figure is embedded as a PNG data URI, no scripts.
"""

from __future__ import annotations

import base64
import io
import os
import uuid
from pathlib import Path

import numpy as np

from fibers.report.drawing import pyplot
from fibers.report.page import CSS, _e, _num
from fibers.report.reading import ACCENT, CAUTION, INK

MAD_TO_SIGMA = 1.4826  # 1 / Phi^-1(0.75): MAD of normal data times this is sigma (from memory)
OUTLIER_MADS = 3.0     # median +- 3 scaled MAD (common practice)
OUTLIER_COLOUR = "#b5523b"

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
    png = _distributions_png(built, cols, flags) if built else None
    text = _page(folder, rows, built, cols, flags, png)
    path = folder / "cohort.html"
    tmp = path.with_name(f".cohort.html.{uuid.uuid4().hex[:8]}")
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, path)
    return path


def _distributions_png(built, cols, flags) -> bytes:
    plt = pyplot()
    n = len(MAIN_FIGURES)
    ncol = 4
    fig, axes = plt.subplots((n + ncol - 1) // ncol, ncol, figsize=(14, 3.4 * ((n + ncol - 1) // ncol)))
    rng = np.random.default_rng(0)  # jitter only: fixed, so the page is the same for the same table
    names = [r["subject"] for r in built]
    for ax, (key, label) in zip(axes.ravel(), MAIN_FIGURES):
        v, bad = cols[key], flags[key]
        ok = np.isfinite(v)
        x = rng.uniform(-0.18, 0.18, len(v))
        if ok.any():
            ax.boxplot(v[ok], positions=[0], widths=0.55, showfliers=False,
                       medianprops={"color": ACCENT}, boxprops={"color": INK}, whiskerprops={"color": INK})
            med = np.median(v[ok])
            mad = MAD_TO_SIGMA * np.median(np.abs(v[ok] - med))
            if mad > 0:
                ax.axhspan(med - OUTLIER_MADS * mad, med + OUTLIER_MADS * mad, color=ACCENT, alpha=0.08, lw=0)
        ax.scatter(x[ok & ~bad], v[ok & ~bad], s=18, color=INK, alpha=0.7, zorder=3)
        ax.scatter(x[bad], v[bad], s=30, color=OUTLIER_COLOUR, zorder=4)
        for i in np.flatnonzero(bad):
            ax.annotate(names[i], (x[i], v[i]), xytext=(6, 0), textcoords="offset points", fontsize=8,
                        color=OUTLIER_COLOUR, va="center")
        ax.set_xlim(-0.6, 0.9)
        ax.set_xticks([])
        ax.set_title(label)
    for ax in axes.ravel()[n:]:
        ax.set_axis_off()
    fig.suptitle(f"{len(built)} built subjects: shaded band median ± {OUTLIER_MADS:g} MAD (scaled), "
                 f"outliers in red")
    # fixed margins: tight_layout measured every tick label first, a third of the drawing time
    fig.subplots_adjust(left=0.045, right=0.99, top=0.89, bottom=0.03, wspace=0.28, hspace=0.22)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90)
    plt.close(fig)
    return buf.getvalue()


def _report_link(row: dict, folder: Path) -> str:
    name = _e(row["subject"])
    if row.get("status") in ("ok", "skipped") and (folder / row["subject"] / "report" / "index.html").is_file():
        return f'<a href="{name}/report/index.html">{name}</a>'
    return name


def _page(folder: Path, rows, built, cols, flags, png) -> str:
    title = folder.name
    counts = {s: sum(r.get("status") == s for r in rows) for s in ("ok", "skipped", "failed")}
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>fibers cohort: {_e(title)}"
             f"</title><style>{CSS}</style></head><body>",
             f"<h1>fibers cohort</h1><p class=\"muted\">{len(rows)} subjects: {counts['ok']} built, "
             f"{counts['skipped']} up to date (skipped), {counts['failed']} failed. Table: "
             f"<code>cohort.csv</code>.</p>",
             f'<p class="caution">Caution. {_e(CAUTION)}</p>']
    if png is not None:
        data = base64.b64encode(png).decode("ascii")
        parts.append(f'<h2>Distributions</h2><figure><img alt="distributions of the main figures" '
                     f'src="data:image/png;base64,{data}"><figcaption>Each dot a built subject; the box spans '
                     f'the quartiles; outside the shaded band of median ± 3 MAD (MAD scaled by 1.4826, '
                     f'common practice) a subject is flagged.</figcaption></figure>')
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
