"""Figures of the geometry: input contours over the fitted surfaces, mesh quality, the sample pools."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.pools import REGION_NAMES
from fibers.report.drawing import Scene, pyplot, save_figure, show_image, trim_common, x_label
from fibers.report.reading import ACCENT, Build, INK, REGION_COLOURS, RESIDUAL_CMAP, outer_surface, surface_part, tetra_type, unit_vector


def _contour_rows(build: Build) -> list[dict]:
    """Per-slice RMS and max residual (mm) of the input contours, from surfaces.vtp."""
    s = build.surfaces
    mask = np.asarray(s.point_data["contour_structure"]) > 0
    res = np.asarray(s.point_data["residual_mm"])[mask]
    sl = np.asarray(s.point_data["slice"])[mask]
    st = np.asarray(s.point_data["contour_structure"])[mask]
    key = sl * 4 + st
    keys, inverse = np.unique(key, return_inverse=True)
    n = np.bincount(inverse)
    depth = np.bincount(inverse, weights=(build.centre - np.asarray(s.points)[mask]) @ build.axis) / n
    rms = np.sqrt(np.bincount(inverse, weights=res ** 2) / n)
    mx = np.full(len(keys), -np.inf)
    np.maximum.at(mx, inverse, np.abs(res))  # residual_mm is signed, positive outside the surface
    bias = np.bincount(inverse, weights=res) / n
    return [{"slice": int(k // 4), "structure": "endo" if k % 4 == 1 else "epi", "n": int(c),
             "rms_mm": float(r), "max_mm": float(m), "mean_mm": float(a), "depth_mm": float(d)}
            for k, c, r, m, a, d in zip(keys, n, rms, mx, bias, depth)]


def fig_contours(build: Build, path: Path) -> dict:
    """(e) The input contours over the fitted surfaces, and per-slice residuals."""
    plt = pyplot()
    b = build
    s = b.surfaces
    lines = outer_surface(s.extract_cells(np.flatnonzero(np.asarray(s.cell_data["is_contour"]) == 1)))
    rows = _contour_rows(b)
    vmax = max([r["max_mm"] for r in rows] + [0.5])
    structure = np.asarray(lines.point_data["contour_structure"])
    fig = plt.figure(figsize=(14, 6.6))
    images = []
    for tag in (1, 2):
        mine = lines.extract_points(structure == tag, adjacent_cells=False)
        scene = Scene(b, size=(700, 850), view=unit_vector(b.e1 + b.e2), elevation=12.0, zoom=1.25, trim=False)
        scene.add(surface_part(b, tag), color="#7d838b", smooth_shading=True, ambient=0.25, opacity=0.6)
        scene.add(outer_surface(mine).tube(radius=0.55, n_sides=8), scalars="residual_mm", cmap=RESIDUAL_CMAP,
                  clim=(-vmax, vmax), ambient=0.3)
        images.append(scene.image())
    images = trim_common(images)
    for j, (img, title) in enumerate(zip(images, ("endocardial contours on the\nfitted endocardium",
                                                   "epicardial contours on the\nfitted epicardium"))):
        show_image(fig.add_axes([0.005 + 0.235 * j, 0.03, 0.225, 0.84]), img, title)
    cax = fig.add_axes([0.475, 0.16, 0.012, 0.6])
    import matplotlib as mpl

    cb = fig.colorbar(mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(-vmax, vmax), cmap=RESIDUAL_CMAP), cax=cax)
    cb.set_label("signed distance to the fitted surface (mm), + outside")
    ax = fig.add_axes([0.6, 0.12, 0.38, 0.72])
    slices = [r["slice"] for r in sorted({r["slice"]: r for r in rows}.values(), key=lambda r: r["depth_mm"])]
    pos = {k: i for i, k in enumerate(slices)}
    w = 0.38
    for j, (name, colour) in enumerate((("endo", "#e0a526"), ("epi", "#5b3f8c"))):
        sel = [r for r in rows if r["structure"] == name]
        xs = np.array([pos[r["slice"]] for r in sel]) + (j - 0.5) * w
        ax.bar(xs, [r["rms_mm"] for r in sel], width=w, color=colour, label=f"{name} RMS")
        ax.plot(xs, [r["max_mm"] for r in sel], "v", color=colour, mec=INK, mew=0.6, ms=7, label=f"{name} max |d|")
        ax.plot(xs, [r["mean_mm"] for r in sel], "_", color=INK, ms=11, mew=2,
                label="mean signed d" if j else None)
    ax.set_xticks(range(len(slices)))
    ax.set_xticklabels([str(k) for k in slices])
    ax.set_xlabel("slice id (as in the contours file), ordered base to apex")
    ax.set_ylabel("residual d (mm)")
    ax.axhline(0.0, color=INK, lw=0.8)
    ax.set_title("Fit residual per slice")
    ax.grid(axis="y", alpha=0.3)
    ax.legend(ncol=2, fontsize=8.5)
    fig.suptitle("Input contours over the fitted surfaces")
    save_figure(fig, path)
    return {"contour_rows": rows}


QUALITY = (("scaled_jacobian", "scaled Jacobian (1)", 1.0, "1 = ideal; <= 0 inverted"),
           ("radius_ratio", "radius ratio (1)", 1.0, "1 = ideal (regular tetrahedron)"),
           ("aspect_ratio", "aspect ratio (1)", 1.0, "1 = ideal"))
REGULAR_DIHEDRAL = float(np.degrees(np.arccos(1.0 / 3.0)))  # 70.53 degrees


def _dihedral_min(mesh) -> np.ndarray:
    """Smallest of the six interior dihedral angles (M,) degrees of each tetrahedron."""
    p = np.asarray(mesh.points)[np.asarray(mesh.cells_dict[tetra_type()]).reshape(-1, 4)]
    smallest = np.full(len(p), np.inf)
    for i, j, k, l in ((0, 1, 2, 3), (0, 2, 1, 3), (0, 3, 1, 2), (1, 2, 0, 3), (1, 3, 0, 2), (2, 3, 0, 1)):
        e = p[:, j] - p[:, i]
        a, b = np.cross(e, p[:, k] - p[:, i]), np.cross(e, p[:, l] - p[:, i])
        cos = np.einsum("ij,ij->i", a, b) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
        smallest = np.minimum(smallest, np.degrees(np.arccos(np.clip(cos, -1.0, 1.0))))
    return smallest


def fig_quality(build: Build, path: Path) -> dict:
    """(f) Histograms of VTK's cell-quality measures and of the minimum dihedral angle."""
    plt = pyplot()
    grid = build.mesh.copy(deep=False)
    q = grid.cell_quality([name for name, *_ in QUALITY] + ["min_angle"])
    fig, axes = plt.subplots(2, 2, figsize=(11, 7.5))
    stats = {}
    for ax, (name, label, ideal, note) in zip(axes.ravel(), QUALITY):
        v = np.asarray(q.cell_data[name])
        stats[name] = {"min": float(v.min()), "median": float(np.median(v)), "max": float(v.max())}
        ax.hist(v, bins=80, color=ACCENT, edgecolor="none")
        ax.axvline(ideal, color="#d1495b", ls="--", lw=1.2, label=note)
        ax.set_xlabel(label)
        ax.set_title(f"VTK {name}: min {v.min():.3g}, median {np.median(v):.3g}, max {v.max():.3g}")
    ax = axes[1, 1]
    exact = _dihedral_min(grid)
    vtk_angle = np.asarray(q.cell_data["min_angle"])
    above = float(np.mean(vtk_angle > exact + 1e-3))
    bins = np.linspace(0.0, max(90.0, float(vtk_angle.max())), 91)
    ax.hist(exact, bins=bins, color=ACCENT, edgecolor="none", label="from the vertices (all 6 edges)")
    ax.hist(vtk_angle, bins=bins, histtype="step", color="#e0a526", lw=1.5,
            label=f"VTK min_angle (above the exact value in {100 * above:.0f}% of cells)")
    ax.axvline(REGULAR_DIHEDRAL, color="#d1495b", ls="--", lw=1.2, label="70.5 = regular tetrahedron")
    ax.set_xlabel("minimum dihedral angle (degrees)")
    ax.set_title(f"minimum dihedral angle: min {exact.min():.3g}, median {np.median(exact):.3g}")
    stats["dihedral_min_deg"] = {"min": float(exact.min()), "median": float(np.median(exact)), "max": float(exact.max())}
    stats["vtk_min_angle"] = {"min": float(vtk_angle.min()), "median": float(np.median(vtk_angle)),
                              "max": float(vtk_angle.max()), "above_exact_fraction": above}
    for ax in axes.ravel():
        ax.set_yscale("log")
        ax.set_ylabel("tetrahedra (count, log scale)")
        if ax is axes[1, 1]:
            lo, hi = ax.get_ylim()
            ax.set_ylim(lo, hi * 40)  # room for the legend above the bars
        ax.legend(fontsize=8.5, loc="upper left" if ax is axes[1, 1] else "best")
        ax.grid(alpha=0.3)
    fig.suptitle(f"Mesh quality of {grid.n_cells:,} tetrahedra (VTK / Verdict cell-quality measures)")
    fig.tight_layout()
    save_figure(fig, path)
    return {"vtk_quality": stats}


def fig_pools(build: Build, path: Path) -> dict:
    """(g) Pool points by region in a long-axis slab and a short-axis slab."""
    plt = pyplot()
    b = build
    groups = []
    for name in ("cavity", "background", "myocardium", "endo", "epi", "base", "rv_cavity", "rv_endo"):
        pool = b.pools.get(name) or {}   # rv_*: both ventricles only
        if "points" not in pool:
            continue
        if name == "background" and "region" in pool:
            # the files carry the names in their metadata, not as a string array
            names = [str(n) for n in pool.get("region_names", REGION_NAMES)]
            for code in np.unique(pool["region"]):
                groups.append((f"background: {names[code]}", pool["points"][pool["region"] == code]))
        else:
            groups.append((f"{name} pool" if name in ("cavity", "rv_cavity") else name, pool["points"]))
    half_slab = 1.5
    mid_depth = 0.5 * b.cavity_depth
    fig, axes = plt.subplots(1, 2, figsize=(13, 6.6), gridspec_kw={"width_ratios": [1.0, 1.0]})
    handles = []
    for label, pts in groups:
        rel = pts - b.centre
        colour = REGION_COLOURS.get(label, "#777777")
        size = 2.0 if label.startswith("background") or label in ("myocardium", "cavity pool", "rv_cavity pool") else 3.0
        la = np.abs(rel @ b.e2) < half_slab
        h = axes[0].scatter(rel[la] @ b.e1, rel[la] @ b.axis, s=size, color=colour, linewidths=0, rasterized=True,
                            label=f"{label} ({len(pts):,})")
        sa = np.abs(rel @ b.axis + mid_depth) < half_slab
        axes[1].scatter(rel[sa] @ b.e1, b.toward_inferior * (rel[sa] @ b.e2), s=size, color=colour, linewidths=0,
                        rasterized=True)
        handles.append(h)
    axes[0].set_title(f"long-axis slab (|offset| < {half_slab:g} mm)")
    axes[0].set_xlabel(x_label(b))
    axes[0].set_ylabel("mm along the long axis (0 at the base plane)")
    axes[1].set_title(f"short-axis slab {mid_depth:.0f} mm below the base (|offset| < {half_slab:g} mm)")
    axes[1].set_xlabel(x_label(b))
    axes[1].set_ylabel("mm, toward the inferior insertion" if b.septal else "mm (second in-plane direction)")
    for ax in axes:
        ax.set_aspect("equal")
        ax.grid(alpha=0.25)
    fig.legend(handles=handles, loc="lower center", ncol=5, fontsize=8.5, markerscale=4, frameon=False,
               title="pool (points in the whole pool)")
    fig.suptitle("Sample-point pools by region")
    fig.subplots_adjust(left=0.07, right=0.98, top=0.89, bottom=0.24, wspace=0.2)
    save_figure(fig, path)
    return {}
