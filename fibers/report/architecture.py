"""Figures of the fiber architecture: the fiber field, the cardiac coordinates, helix angle over depth."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.report.drawing import Scene, colourbar, in_plane_xy, line_glyphs, long_axis_cut, pyplot, save_figure, show_image, x_label
from fibers.report.reading import ACCENT, Build, fiber_law, GLYPHS, GLYPH_MM, HELIX_CMAP, HELIX_RANGE, INK, WALL_GREY, helix_law, law_depth, measured_helix, sax_helix, outer_surface, read_pool_arrays, ring_masks, unit_vector


def fig_fibers(build: Build, path: Path) -> dict:
    """(a) Fibers on the endocardial and epicardial surfaces and on the faces of a wedge cut."""
    plt = pyplot()
    import pyvista as pv

    b = build
    half = np.radians(45.0)
    # the wedge faces the lateral wall; the camera looks at it from 40 degrees aside, so the cut
    # faces and the uncut epicardium are both in view
    centre_dir = -b.e1
    side = np.cross(b.axis, centre_dir)
    view = unit_vector(np.cos(np.radians(40.0)) * centre_dir + np.sin(np.radians(40.0)) * side)
    n1 = unit_vector(np.sin(half) * centre_dir - np.cos(half) * side)   # the wedge is n1.x > 0 and n2.x > 0
    n2 = unit_vector(np.sin(half) * centre_dir + np.cos(half) * side)
    wedge = lambda p: np.minimum((p - b.centre) @ n1, (p - b.centre) @ n2)  # noqa: E731

    grid = b.mesh.copy(deep=False)
    grid.point_data["wedge"] = wedge(np.asarray(grid.points))
    kept = grid.clip_scalar(scalars="wedge", value=0.0, invert=True)
    surf = outer_surface(kept)
    on_cut = np.abs(np.asarray(surf.point_data["wedge"])) < 1e-6
    tri = np.asarray(surf.faces).reshape(-1, 4)[:, 1:] if surf.is_all_triangles else None
    if tri is None:
        surf = surf.triangulate()
        on_cut = np.abs(np.asarray(surf.point_data["wedge"])) < 1e-6
        tri = np.asarray(surf.faces).reshape(-1, 4)[:, 1:]
    cut_cells = on_cut[tri].all(axis=1)
    cut = outer_surface(surf.extract_cells(np.flatnonzero(cut_cells)))
    shell = outer_surface(surf.extract_cells(np.flatnonzero(~cut_cells)))

    scene = Scene(b, size=(1000, 1100), view=view, elevation=25.0, zoom=1.25)
    scene.add(shell, color=WALL_GREY, smooth_shading=True, split_sharp_edges=True, ambient=0.2)
    scene.add(cut, scalars="helix_angle", cmap=HELIX_CMAP, clim=HELIX_RANGE, ambient=0.3)
    rng = np.random.default_rng(0)
    counts = {}
    for name, offset in (("epi", 0.35), ("endo", 0.35)):
        pool = read_pool_arrays(b.folder, name, ("points", "fiber", "helix_angle", "normal"))
        if not pool:
            continue
        p = pool["points"] + offset * pool["normal"]
        # outside the wedge, and not poking out above the base plane
        show = (wedge(p) < -1.0) & ((b.centre - p) @ b.axis > 0.5 * GLYPH_MM)
        idx = rng.permutation(np.flatnonzero(show))[:GLYPHS]
        seg = line_glyphs(pv, p[idx], pool["fiber"][idx], GLYPH_MM)
        seg.point_data["helix"] = np.repeat(pool["helix_angle"][idx], 2)
        scene.add(seg, scalars="helix", cmap=HELIX_CMAP, clim=HELIX_RANGE, line_width=2.5, lighting=False)
        counts[name] = len(idx)
    img = scene.image()

    fig = plt.figure(figsize=(11.5, 9.5))
    ax = fig.add_axes([0.02, 0.04, 0.8, 0.86])
    show_image(ax, img, "")
    cax = fig.add_axes([0.86, 0.15, 0.025, 0.65])
    import matplotlib as mpl

    cb = fig.colorbar(mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(*HELIX_RANGE), cmap=HELIX_CMAP), cax=cax)
    cb.set_label("helix angle (degrees)")
    cb.set_ticks(np.arange(-90, 91, 30))
    fig.suptitle("Fiber field: glyphs on the epicardium and endocardium, wedge cut away", x=0.45)
    fig.text(0.45, 0.925, "Cut faces coloured by helix angle; base at the top. "
             f"{counts.get('epi', 0):,} epicardial and {counts.get('endo', 0):,} endocardial fiber glyphs "
             f"({GLYPH_MM:g} mm long).",
             ha="center", fontsize=9.5)
    save_figure(fig, path)
    return {}


def fig_coordinates(build: Build, path: Path) -> dict:
    """(b) Transmural and apicobasal coordinates on a half-cut wall and on the long-axis cut."""
    plt = pyplot()
    import matplotlib.tri as mtri

    b = build
    half = b.mesh.clip(normal=tuple(b.e2), origin=tuple(b.centre), invert=True)
    view = unit_vector(b.e2 - 0.8 * b.e1)  # oblique to the cut face, so it and the epicardium show
    cut = long_axis_cut(b)
    x, y = in_plane_xy(b, np.asarray(cut.points))
    tri = np.asarray(cut.faces).reshape(-1, 4)[:, 1:]
    triang = mtri.Triangulation(x, y, tri)
    fields = (("transmural", "viridis", "transmural depth (1): 0 endocardium, 1 epicardium"),
              ("apicobasal", "cividis", "apicobasal position (1): 0 apex, 1 base"))
    fig, axes = plt.subplots(2, 2, figsize=(12, 11), gridspec_kw={"width_ratios": [1, 1.05]})
    for row, (name, cmap, label) in enumerate(fields):
        scene = Scene(b, size=(800, 850), view=view, elevation=20.0, zoom=1.2)
        scene.add(half, scalars=name, cmap=cmap, clim=(0.0, 1.0), smooth_shading=True, split_sharp_edges=True,
                  ambient=0.3)
        show_image(axes[row, 0], scene.image(), f"{name}: wall cut in half along the long axis")
        colourbar(fig, axes[row, 0], cmap, 0.0, 1.0, label, shrink=0.75)
        ax = axes[row, 1]
        values = np.asarray(cut.point_data[name])
        tpc = ax.tripcolor(triang, values, cmap=cmap, vmin=0.0, vmax=1.0, shading="gouraud")
        ax.tricontour(triang, values, levels=np.linspace(0.1, 0.9, 9), colors="white", linewidths=0.6)
        ax.set_aspect("equal")
        ax.set_xlabel(x_label(b))
        ax.set_ylabel("mm along the long axis (0 at the base plane)")
        ax.set_title(f"{name} on the long-axis cut (contours every 0.1)")
        cb = fig.colorbar(tpc, ax=ax, shrink=0.75, pad=0.02)
        cb.set_label(label)
    fig.suptitle("Cardiac coordinates (from Laplace solutions) on the wall and on a long-axis cut")
    fig.tight_layout()
    save_figure(fig, path)
    return {}


def fig_helix(build: Build, path: Path) -> dict:
    """(c) Helix angle measured from the output vectors against the prescribed law, per ring."""
    plt = pyplot()
    pool = build.pools.get("myocardium") or {}
    if "fiber" not in pool:
        fig, ax = plt.subplots(figsize=(10, 4))
        ax.set_axis_off()
        ax.text(0.5, 0.5, "no myocardium pool in pools/: nothing to measure", ha="center", va="center")
        fig.suptitle("Helix angle against transmural depth")
        save_figure(fig, path)
        return {"helix_rings": []}
    depth = law_depth(build.manifest, pool)
    measured = measured_helix(pool)
    sax = sax_helix(build, pool)
    law = helix_law(build.manifest, depth, pool, labelled=build.labelled)
    frame = fiber_law(build.manifest).helix_frame
    rings = [(n, m) for n, m in ring_masks(build, pool) if m.any()]
    fig = plt.figure(figsize=(3.2 * len(rings) + 1.8, 7.6))
    width = 0.84 / len(rings)
    axes = [fig.add_axes([0.06 + i * width, 0.43, width - 0.02, 0.42]) for i in range(len(rings))]
    lower = [fig.add_axes([0.06 + i * width, 0.09, width - 0.02, 0.22]) for i in range(len(rings))]
    grid = np.linspace(0.0, 1.0, 201)
    edges = np.linspace(0, 1, 11)
    rows = []
    hb = None
    chosen = sax if frame == "short_axis" else measured
    depth_name = ("thickness fraction" if fiber_law(build.manifest).depth == "thickness"
                  else "Laplace transmural depth")
    for i, (ax, (name, mask)) in enumerate(zip(axes, rings)):
        ok_pts = mask & np.isfinite(chosen)
        hb = ax.hexbin(depth[ok_pts], chosen[ok_pts], gridsize=(36, 30), extent=(0, 1, -90, 90), cmap="Greys",
                       mincnt=1, bins="log", linewidths=0)
        ax.plot(grid, helix_law(build.manifest, grid), color="#d1495b", lw=2.2,
                label="prescribed law (no regional offsets)")
        which = np.clip(np.digitize(depth[mask], edges) - 1, 0, 9)
        cnt = np.bincount(which, minlength=10)
        ok = cnt > 0
        at = np.bincount(which, weights=depth[mask], minlength=10) / np.maximum(cnt, 1)
        for values, style, label in ((measured, dict(marker="o", ms=6, mfc=ACCENT, mec="white"),
                                      "helix_angle (Laplace frame e_circ, e_long)"),
                                     (sax, dict(marker="D", ms=4, mfc="#e0a526", mec=INK, mew=0.5),
                                      "helix_angle_sax (short-axis imaging convention)")):
            v = values[mask]
            good = np.isfinite(v)
            c = np.bincount(which[good], minlength=10)
            mean = np.bincount(which[good], weights=v[good], minlength=10) / np.maximum(c, 1)
            ax.plot(at[ok & (c > 0)], mean[ok & (c > 0)], ls="none", label=f"mean per 0.1 depth, {label}", **style)
            _deviation(lower[i], depth[mask], (values - law)[mask], edges, style)
        _dress_deviation(lower[i], i, depth_name)
        ax.set_title(f"{name} (n = {int(mask.sum()):,})")
        ax.set_xticklabels([])
        ax.set_xlim(0, 1)
        ax.set_ylim(-90, 90)
        ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0])
        ax.set_yticks(np.arange(-90, 91, 30))
        if i:
            ax.set_yticklabels([])
        ax.grid(alpha=0.3)
        diff = np.abs(measured[mask] - law[mask])
        geo = np.abs(sax[mask] - law[mask])
        rows.append({"ring": name, "n": int(mask.sum()), "mean_abs_deg": float(diff.mean()),
                     "max_abs_deg": float(diff.max()),
                     "sax_mean_abs_deg": float(np.nanmean(geo)) if np.isfinite(geo).any() else float("nan"),
                     "sax_p99_abs_deg": float(np.nanpercentile(geo, 99)) if np.isfinite(geo).any() else float("nan")})
    axes[0].set_ylabel("helix angle (degrees)")
    fig.legend(*axes[0].get_legend_handles_labels(), loc="upper center", bbox_to_anchor=(0.47, 0.945), ncol=3,
               fontsize=8.5, frameon=False)
    lower[0].set_ylabel("measured - law (degrees)\nmean, 5-95% band")
    cax = fig.add_axes([0.915, 0.43, 0.015, 0.42])
    cb = fig.colorbar(hb, cax=cax)
    cb.set_label(f"wall pool points per bin ({'helix_angle_sax' if frame == 'short_axis' else 'helix_angle'}; log)")
    fig.suptitle("Helix angle against depth: both conventions measured from the output vectors vs the law", y=0.985)
    save_figure(fig, path)
    return {"helix_rings": rows}


def _deviation(ax, depth, error, edges, style):
    """Mean and 5-95 percentile band of ``error`` (degrees) per depth bin."""
    good = np.isfinite(error)
    depth, error = depth[good], error[good]
    error = (error + 90.0) % 180.0 - 90.0
    which = np.clip(np.digitize(depth, edges) - 1, 0, len(edges) - 2)
    rows = [(depth[which == k].mean(), *np.percentile(error[which == k], [5, 50, 95]), error[which == k].mean())
            for k in range(len(edges) - 1) if np.count_nonzero(which == k) >= 5]
    if not rows:
        return
    at, lo, _med, hi, mean = (np.array(v) for v in zip(*rows))
    ax.fill_between(at, lo, hi, color=style["mfc"], alpha=0.25, lw=0)
    ax.plot(at, mean, color=style["mfc"], lw=1.2, marker=style["marker"], ms=style["ms"] * 0.7,
            mec=style.get("mec", "white"))


def _dress_deviation(ax, i, depth_name):
    ax.axhline(0.0, color="#d1495b", lw=1.2)
    ax.set_xlim(0, 1)
    ax.set_ylim(-6, 6)
    ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0])
    ax.set_xticklabels(["0", "0.25", "0.5", "0.75", "1"])
    if i:
        ax.set_yticklabels([])
    ax.grid(alpha=0.3)
    ax.set_xlabel(depth_name + " (1)\n0 endocardium, 1 epicardium")
