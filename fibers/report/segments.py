"""The 17-segment bull's-eye figure."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.report.drawing import pyplot, save_figure
from fibers.report.reading import Build, INK, bullseye_place, expected_segment, lv_outer_pool, segment_table


def wedge_patches(values: np.ndarray, cmap, norm, ax, fmt):
    """Draw the 17 sectors of the standard bull's-eye coloured by values[1..17]."""
    from matplotlib.patches import Wedge

    for k in range(1, 18):
        centre, rr = segment_centre(k)
        half = 30.0 if k <= 12 else 45.0 if k <= 16 else 180.0
        r0 = max(rr - 0.5, 0.0)
        t0, t1 = centre - half, centre + half
        v = values[k]
        face = "#eeeeee" if not np.isfinite(v) else cmap(norm(v))
        ax.add_patch(Wedge((0, 0), r0 + 1.0, t0, t1, width=1.0, facecolor=face, edgecolor="white", lw=1.5))
        tx, ty = rr * np.cos(np.radians(centre)), rr * np.sin(np.radians(centre))
        lum = 1.0 if not np.isfinite(v) else np.dot(cmap(norm(v))[:3], (0.299, 0.587, 0.114))
        colour = INK if lum > 0.5 else "white"
        text = f"{k}\n{fmt(v)}" if np.isfinite(v) else f"{k}\n-"
        ax.text(tx, ty, text, ha="center", va="center", fontsize=8.5, color=colour, linespacing=1.1)
    _frame_bullseye(ax)


def segment_centre(k: int) -> tuple[float, float]:
    """Plot angle (deg) and radius of the middle of segment k in the standard bull's-eye."""
    if k <= 12:
        return 90.0 + 60.0 * ((k - 1) % 6), 3.5 if k <= 6 else 2.5
    if k <= 16:
        return 90.0 + 90.0 * (k - 13), 1.5
    return 0.0, 0.0


def _frame_bullseye(ax):
    ax.set_xlim(-4.6, 4.6)
    ax.set_ylim(-4.6, 4.6)
    ax.set_aspect("equal")
    ax.set_axis_off()
    style = {"fontsize": 8.5, "color": "#555555", "ha": "center", "va": "center"}
    ax.text(0, 4.35, "anterior", **style)
    ax.text(0, -4.35, "inferior", **style)
    ax.text(-4.35, 0, "septal", rotation=90, **style)
    ax.text(4.35, 0, "lateral", rotation=-90, **style)


def fig_bullseye(build: Build, path: Path) -> dict:
    """(d) Wall volume and mean thickness per segment, and where the labels fall."""
    plt = pyplot()
    import matplotlib as mpl

    table = segment_table(build)
    if not build.labelled:
        fig, ax = plt.subplots(figsize=(10, 5))
        ax.set_axis_off()
        ax.text(0.5, 0.55, "No segment labels: every aha_segment is 0.", ha="center", va="center", fontsize=15,
                weight="bold")
        ax.text(0.5, 0.38, "The case gives no right-ventricular insertion landmarks, so the septum is unknown.\n"
                "Add [landmarks] rv_insertion_anterior and rv_insertion_inferior to the case file.\n"
                f"Mean wall thickness over the whole epicardium: {np.nanmean(table['thickness_all']):.2f} mm.",
                ha="center", va="center", fontsize=11)
        fig.suptitle("17-segment bull's-eye: not available")
        save_figure(fig, path)
        return {"segments": table, "layout": None}

    fig, axes = plt.subplots(1, 3, figsize=(14, 5.6))
    vol = table["volume_ml"].copy()
    thick = table["thickness_mm"]
    for ax, values, cmap_name, label, fmt, title, span in (
            (axes[0], vol, "viridis", "wall volume per segment (mL); range of 1-16", lambda v: f"{v:.1f}",
             "Wall volume", slice(1, 17)),
            (axes[1], thick, "plasma", "mean wall thickness (mm)", lambda v: f"{v:.1f}", "Mean wall thickness",
             slice(1, 18))):
        finite = values[span][np.isfinite(values[span])]
        lo, hi = (float(finite.min()), float(finite.max())) if len(finite) else (0.0, 1.0)
        if hi - lo < 1e-9:
            lo, hi = lo - 0.5, hi + 0.5
        cmap = mpl.colormaps[cmap_name]
        norm = mpl.colors.Normalize(lo, hi, clip=True)
        wedge_patches(values, cmap, norm, ax, fmt)
        ax.set_title(title)
        low = np.nanmin(values[1:18]) < lo - 1e-9
        cb = fig.colorbar(mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(lo, hi), cmap=cmap), ax=ax, shrink=0.72,
                          pad=0.02, extend="min" if low else "neither")
        cb.set_label(label)

    # layout check: the labels the epicardial points carry, at their own place on the bull's-eye
    ax = axes[2]
    epi = lv_outer_pool(build)   # the epicardial pool (on both ventricles, the left ventricle's outer surface)
    layout = None
    if "points" in epi and build.septal:
        theta, r = bullseye_place(build, epi["points"])
        seg = np.asarray(epi["aha_segment"], int)
        expected = expected_segment(theta, r)
        agree = seg == expected
        x, y = r * np.cos(np.radians(theta)), r * np.sin(np.radians(theta))
        palette = mpl.colormaps["twilight"]
        hue = np.where(seg <= 12, (seg - 1) % 6 / 6.0, np.where(seg <= 16, (seg - 13) / 4.0, 0.5))
        colours = palette(0.08 + 0.84 * hue)
        colours[seg == 0] = (0.6, 0.6, 0.6, 1.0)
        ax.scatter(x[agree], y[agree], s=2, c=colours[agree], linewidths=0, rasterized=True)
        ax.scatter(x[~agree], y[~agree], s=9, c="#d1495b", linewidths=0, label="label differs from layout")
        from matplotlib.patches import Circle

        for rr in (1, 2, 3, 4):
            ax.add_patch(Circle((0, 0), rr, fill=False, ec=INK, lw=0.8))
        for t in np.radians(np.arange(0, 360, 60)):
            ax.plot([2 * np.cos(t), 4 * np.cos(t)], [2 * np.sin(t), 4 * np.sin(t)], color=INK, lw=0.8)
        for t in np.radians(np.arange(45, 360, 90)):
            ax.plot([np.cos(t), 2 * np.cos(t)], [np.sin(t), 2 * np.sin(t)], color=INK, lw=0.8)
        _frame_bullseye(ax)
        for k in range(1, 18):
            t, rr = segment_centre(k)
            ax.text(rr * np.cos(np.radians(t)), rr * np.sin(np.radians(t)), str(k), ha="center", va="center",
                    fontsize=9, weight="bold", color=INK,
                    bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none", "alpha": 0.75})
        layout = {"points": int(len(seg)), "agree_fraction": float(agree.mean())}
        ax.set_title(f"Layout check: {100 * agree.mean():.2f}% of points\ncarry the label of their place")
        if (~agree).any():
            ax.legend(loc="lower center", bbox_to_anchor=(0.5, -0.12), fontsize=8, frameon=False,
                      markerscale=1.5)
    else:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "no epicardial pool: layout check skipped", ha="center", transform=ax.transAxes)
    fig.suptitle("17-segment bull's-eye (Cerqueira et al. 2002 layout; viewed from the apex)")
    fig.text(0.5, 0.02, "Right panel: epicardial pool points placed by their angle about the long axis (from "
             "the landmarks) and depth below the base, coloured by the label they carry.",
             ha="center", fontsize=9)
    fig.subplots_adjust(left=0.01, right=0.99, top=0.86, bottom=0.08, wspace=0.12)
    save_figure(fig, path)
    return {"segments": table, "layout": layout}
