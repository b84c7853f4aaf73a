"""The strain report: strain-time curves per ring and segment, bull's-eyes of peaks and of |J - 1|,
and the deformed mesh at the peak of contraction.

Written by ``fibers strain`` into ``DIR/report/index.html`` with one PNG per figure beside it
(offline: inline CSS, no scripts). The bull's-eyes reuse the 17-segment drawing of
:mod:`fibers.report.segments`; the 3-D view uses the off-screen scene of
:mod:`fibers.report.drawing`.
"""

from __future__ import annotations

import html
import shutil
import uuid
import warnings
from pathlib import Path

import numpy as np

from fibers.report import place_report
from fibers.report.drawing import Scene, colourbar, pyplot, save_figure, show_image
from fibers.report.page import CSS, html_table
from fibers.report.reading import CAUTION, RINGS, load_build, outer_surface
from fibers.report.segments import wedge_patches

CURVES = ("strain_cc", "strain_ll", "strain_rr", "strain_ff")
LABELS = {"strain_cc": "circumferential strain", "strain_ll": "longitudinal strain",
          "strain_rr": "radial strain", "strain_ff": "fiber strain"}
FIGURES = (
    ("strain_rings.png", "Strain against time per ring"),
    ("strain_segments.png", "Strain against time per segment"),
    ("strain_bullseye.png", "Peak strains and mean |J - 1| per segment"),
    ("strain_deformed.png", "The wall at the peak of contraction"),
)
CAPTIONS = {
    "strain_rings.png": "Engineering strain (stretch - 1) along the reference directions, volume-weighted means over "
                        "each ring of AHA segments (basal 1-6, mid 7-12, apical 13-16, apex 17) and the whole wall.",
    "strain_segments.png": "Circumferential (top) and longitudinal (bottom) strain of every segment, one panel per ring.",
    "strain_bullseye.png": "Per segment: the most negative circumferential, longitudinal and fiber strain, the most "
                           "positive radial strain over the frames, and the volume-weighted mean |J - 1| of the "
                           "tetrahedra averaged over the frames (J of the P1 gradient; it carries the interpolation "
                           "error of a curved motion on straight-edged cells).",
    "strain_deformed.png": "Left: the reference wall (the build). Right: the wall moved by the displacement at the frame "
                           "of the most negative whole-wall circumferential strain, coloured by the recovered nodal "
                           "circumferential strain; the reference outline is drawn in grey.",
}


def ring_means(segments: dict, volume_ml: np.ndarray) -> dict:
    """Volume-weighted ring means (T,) per quantity from segment means (T, 18)."""
    out = {}
    for name, members in RINGS:
        members = [m for m in members if volume_ml[m] > 0]
        if not members:
            continue
        w = volume_ml[members]
        out[name] = {q: (v[:, members] * w).sum(axis=1) / w.sum() for q, v in segments.items()}
    return out


def write_strain_report(folder, run, *, name: str | None = None) -> Path:
    """Draw the figures and write ``folder/report/index.html`` for a :class:`~fibers.io.strainfiles.StrainRun`."""
    import contextlib

    import pyvista as pv

    folder = Path(folder)
    tmp = folder / f".report.partial-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        quiet = getattr(pv, "vtk_verbosity", None)
        with quiet("error") if quiet else contextlib.nullcontext():
            times = _times(run.motion.time_ms)
            fig_rings(run, times, tmp / FIGURES[0][0])
            fig_segments(run, times, tmp / FIGURES[1][0])
            fig_bullseyes(run, tmp / FIGURES[2][0])
            fig_deformed(run, tmp / FIGURES[3][0])
        (tmp / "index.html").write_text(page_html(run, name or folder.name), encoding="utf-8")
        target = place_report(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return target / "index.html"


def _times(time_ms: np.ndarray) -> tuple[np.ndarray, str]:
    if np.isfinite(time_ms).all():
        return time_ms, "time (ms)"
    return np.arange(len(time_ms), dtype=float), "frame"


def fig_rings(run, times, path: Path) -> None:
    plt = pyplot()
    t, label = times
    rings = ring_means(run.study.segments, run.study.volume_ml)
    fig, axes = plt.subplots(2, 2, figsize=(12, 7.5), sharex=True)
    colours = {"basal": "#2b6f77", "mid": "#e0a526", "apical": "#b5523b", "apex": "#5b3f8c"}
    for ax, q in zip(axes.ravel(), CURVES):
        ax.plot(t, 100 * run.study.segments[q][:, 0], color="#1d2b36", lw=2.6, label="whole wall")
        for ring, values in rings.items():
            ax.plot(t, 100 * values[q], color=colours[ring], lw=1.6, label=ring)
        ax.axhline(0, color="#999999", lw=0.8)
        ax.set_title(LABELS[q])
        ax.set_ylabel(f"{q} (%)")
        ax.grid(alpha=0.3)
    for ax in axes[1]:
        ax.set_xlabel(label)
    axes[0, 0].legend(fontsize=8, loc="best")
    fig.suptitle("Strain against time: whole wall and rings (volume-weighted means)")
    fig.tight_layout()
    save_figure(fig, path)


def fig_segments(run, times, path: Path) -> None:
    plt = pyplot()
    import matplotlib as mpl

    t, label = times
    fig, axes = plt.subplots(2, 4, figsize=(15, 7), sharex=True, sharey="row")
    palette = mpl.colormaps["tab10"]
    for row, q in enumerate(("strain_cc", "strain_ll")):
        for col, (ring, members) in enumerate(RINGS):
            ax = axes[row, col]
            for j, s in enumerate(members):
                if run.study.volume_ml[s] > 0:
                    ax.plot(t, 100 * run.study.segments[q][:, s], color=palette(j), lw=1.5, label=f"{s}")
            ax.axhline(0, color="#999999", lw=0.8)
            ax.grid(alpha=0.3)
            if row == 0:
                ax.set_title(ring)
            if row == 0 and ax.get_lines()[:-1]:
                ax.legend(fontsize=7, ncol=2, loc="best", title="segment", title_fontsize=7)
            if col == 0:
                ax.set_ylabel(f"{q} (%)")
            if row == 1:
                ax.set_xlabel(label)
    fig.suptitle("Circumferential and longitudinal strain per AHA segment")
    fig.tight_layout()
    save_figure(fig, path)


def fig_bullseyes(run, path: Path) -> None:
    plt = pyplot()
    import matplotlib as mpl

    seg = run.study.segments
    if not (run.study.volume_ml[1:] > 0).any():
        fig, ax = plt.subplots(figsize=(10, 3))
        ax.set_axis_off()
        ax.text(0.5, 0.5, "No segment labels in the build (no right-ventricular landmarks):\n"
                "only the whole wall is reported.", ha="center", va="center", fontsize=13)
        save_figure(fig, path)
        return
    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)    # all-NaN columns of empty segments
        panels = [(q, np.nanmin(seg[q], axis=0) if q != "strain_rr" else np.nanmax(seg[q], axis=0),
                   "peak " + LABELS[q] + " (%)", 100.0) for q in CURVES]
        panels.append(("abs_J", np.nanmean(run.study.abs_J_minus_1, axis=0), "mean |J - 1| (%)", 100.0))
    fig, axes = plt.subplots(1, 5, figsize=(22, 5.2))
    for ax, (q, values, title, scale) in zip(axes, panels):
        v = np.where(run.study.volume_ml > 0, values * scale, np.nan)
        finite = v[1:18][np.isfinite(v[1:18])]
        lo, hi = (float(finite.min()), float(finite.max())) if len(finite) else (0.0, 1.0)
        if hi - lo < 1e-9:
            lo, hi = lo - 0.5, hi + 0.5
        cmap = mpl.colormaps["magma" if q == "abs_J" else "RdBu_r"]
        if q != "abs_J":   # diverging map centred on zero: shortening blue, lengthening red
            m = max(abs(lo), abs(hi))
            lo, hi = -m, m
        norm = mpl.colors.Normalize(lo, hi, clip=True)
        wedge_patches(v, cmap, norm, ax, lambda x: f"{x:.1f}")
        ax.set_title(title, fontsize=10)
        colourbar(fig, ax, cmap, lo, hi, "%", shrink=0.7)
    fig.suptitle("Per AHA segment (Cerqueira et al. 2002 layout; viewed from the apex)")
    fig.subplots_adjust(left=0.01, right=0.98, top=0.84, bottom=0.04, wspace=0.15)
    save_figure(fig, path)


def fig_deformed(run, path: Path) -> None:
    import pyvista as pv

    plt = pyplot()
    build = load_build(run.mesh.folder, run.mesh.manifest)
    peak = int(np.nanargmin(run.study.segments["strain_cc"][:, 0]))
    cells = np.column_stack([np.full(len(run.mesh.tets), 4), run.mesh.tets]).ravel()
    ref = pv.UnstructuredGrid(cells, np.full(len(run.mesh.tets), pv.CellType.TETRA), run.mesh.points)
    moved = ref.copy()
    moved.points = run.mesh.points + run.motion.displacement[peak]
    moved.point_data["strain_cc"] = 100 * run.nodal["strain_cc"][peak]
    values = moved.point_data["strain_cc"]
    m = float(np.nanpercentile(np.abs(values), 99)) or 1.0
    images = []
    scene = Scene(build, size=(800, 800), trim=False)
    scene.add(outer_surface(ref), color="#c9b690", smooth_shading=True)
    images.append(scene.image())
    scene = Scene(build, size=(800, 800), trim=False)
    scene.add(outer_surface(ref).extract_feature_edges(), color="#aaaaaa", line_width=1)
    scene.add(outer_surface(moved), scalars="strain_cc", cmap="RdBu_r", clim=(-m, m), smooth_shading=True)
    images.append(scene.image())
    from fibers.report.drawing import trim_common

    images = trim_common(images)
    fig, axes = plt.subplots(1, 2, figsize=(13, 6.4))
    show_image(axes[0], images[0], "reference (frame 0 geometry)")
    tm = run.motion.time_ms[peak]
    when = f"frame {peak}" + (f", {tm:.0f} ms" if np.isfinite(tm) else "")
    show_image(axes[1], images[1], f"deformed at the peak ({when})")
    colourbar(fig, axes[1], "RdBu_r", -m, m, "strain_cc (%)", shrink=0.7)
    fig.suptitle("The wall at the peak of contraction")
    fig.tight_layout()
    save_figure(fig, path)


def page_html(run, name: str) -> str:
    from fibers.segments import SEGMENT_NAMES

    s, study = run.summary, run.study
    e = html.escape
    inc = s["incompressibility"]
    parts = [f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>fibers strain report: {e(name)}'
             f"</title><style>{CSS}</style></head><body>",
             f'<h1>fibers strain report</h1><p class="muted">output folder <code>{e(name)}</code>; build '
             f"<code>{e(str(run.mesh.folder))}</code>; motion <code>{e(str(run.motion.path))}</code> "
             f"({e(run.motion.source)} input, {s['frames']} frames)</p>",
             f'<p class="caution">Caution. {e(CAUTION)}</p>']
    rows = [["Frames", s["frames"]], ["Tetrahedra", int(len(run.mesh.tets))],
            ["Mesh order", run.mesh.order],
            ["Cell mean |J - 1|, worst frame", inc["cell_mean_abs_J_minus_1"]["max_over_frames"]],
            ["Cell max |J - 1|", inc["cell_max_abs_J_minus_1"]],
            ["Segment mean J: largest |mean J - 1|", inc["segment_mean_J_max_deviation"]],
            ["Recovered nodal mean |J - 1|, worst frame", inc["nodal_mean_abs_J_minus_1"]["max_over_frames"]],
            ["Inverted cells (J <= 0), all frames", int(study.inverted.sum())]]
    parts.append('<h2>Summary</h2>' + html_table(["quantity", "value"], rows))
    header = ["segment", "volume (mL)"] + [f"peak {q}" for q in CURVES] + ["frame of peak strain_cc"]
    peak = s["peaks"]
    by = {q: {r["segment"]: r for r in peak[q]["segments"]} for q in CURVES}
    srows = []
    for seg in s["segments_present"]:
        label = "0 whole wall" if seg == 0 else f"{seg} {SEGMENT_NAMES.get(seg, '')}"
        srows.append([label, float(study.volume_ml[seg])] + [by[q][seg]["value"] for q in CURVES]
                     + [by["strain_cc"][seg]["frame"]])
    parts.append('<h2>Peaks per segment</h2>' + html_table(header, srows) +
                 '<p class="muted">Engineering strain, stretch - 1 (dimensionless); most negative for cc, ll, ff and '
                 "most positive for rr over the frames. Full tables: segments.csv and summary.json.</p>")
    parts.append("<h2>Figures</h2>")
    for file, title in FIGURES:
        parts.append(f'<figure><h3>{e(title)}</h3><img src="{file}" alt="{e(title)}">'
                     f"<figcaption>{e(CAPTIONS[file])}</figcaption></figure>")
    from fibers.strain import CONVENTIONS

    parts.append("<h2>Conventions</h2>" + html_table(["item", "meaning"], [[k, v] for k, v in CONVENTIONS.items()]))
    warn = run.warnings
    parts.append("<h2>Warnings</h2>" + ("<ul>" + "".join(f'<li class="warn">{e(w)}</li>' for w in warn) + "</ul>"
                                         if warn else '<p class="muted">No warnings.</p>'))
    parts.append(f'<p class="caution">{e(CAUTION)}</p></body></html>\n')
    return "\n".join(parts)
