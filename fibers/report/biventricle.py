"""Figures and tables of a biventricular build: the tagged mesh, fibers on both ventricles, the
helix angle across the septum and in each free wall, the right ventricle's volumes.

Drawn only when the manifest holds ``summary.biventricular``. The helix figure takes the place
of the left-ventricular one (``helix_depth.png``), whose law and depth do not apply on both
ventricles: here each region is drawn against the depth its law uses, the helix measured back
from the pool's vectors as ``atan2(fiber . e_long, fiber . e_circ)`` folded into [-90, 90):

- LV and RV free walls: against ``transmural`` (0 endocardium, 1 epicardium), law
  ``a_endo + (a_epi - a_endo) transmural^2`` (Bayer et al. 2012's quaternion blend of two frames
  turned about one axis; Shoemake 1985);
- septum: against ``septal_depth`` (0 on the left endocardium, 1 on the right), law
  ``lv_helix_endo (1 - d) - rv_helix_endo d`` (``e_rad`` runs from the left cavity to the right
  one there, so the right face's right-handed helix reads as ``-rv_helix_endo``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.report.drawing import Scene, line_glyphs, pyplot, save_figure, show_image
from fibers.report.reading import (Build, HELIX_CMAP, HELIX_RANGE, INK, WALL_GREY, measured_helix, outer_surface,
                                   read_pool_arrays, unit_vector)

FIGURES = (("biv_mesh.png", "Both ventricles: boundary tags and wall regions"),
           ("biv_fibers.png", "Fibers on the left free wall, the septum and the right free wall"))

CAPTIONS = {
    "biv_mesh.png": "Left: the boundary of mesh.vtu cut along the long-axis plane through the septal bisector, faces "
                    "coloured by their tag (1 LV endocardium, 2 epicardium, 3 base, 4 RV endocardium). Right: the "
                    "wall below a short-axis cut at 40% of the cavity depth, seen from the base, cells coloured by "
                    "region (1 LV free wall, 2 septum, 3 RV free wall).",
    "biv_fibers.png": "Fiber glyphs on surface pool points, coloured by helix angle (cyclic map). Left: the left free "
                      "wall's epicardium seen from the lateral side. Middle: the septum seen from the right cavity "
                      "(the right free wall removed), glyphs on its right face, where the helix reads -rv_helix_endo "
                      "in the septal frame (e_rad from the left to the right cavity); along the insertions the glyphs "
                      "of the free wall's side read +rv_helix_endo in the free wall's frame, whose e_rad points the "
                      "other way: the same line, so the colour changes but the fiber does not turn. Right: the right "
                      "free wall's epicardium seen from the right.",
    "helix_depth.png": "Wall pool points per region: helix angle measured back from the output vectors "
                       "(atan2(fiber.e_long, fiber.e_circ), folded into [-90, 90)) against the depth the biventricular "
                       "law uses: transmural in the free walls, septal_depth across the septum (0 left endocardium, "
                       "1 right endocardium). Red: the law from the manifest (summary.biventricular.fiber_law_deg). "
                       "Lower row: mean and 5-95% band of measured minus law per 0.1 of depth. Points within 15% "
                       "of the septal arc from an insertion are left out (the frames blend there between the "
                       "ventricles). The pool points carry the rule evaluated at their own place (fields and "
                       "gradients interpolated from the nodes), so the angle follows the law inside the elements too.",
    "coordinates.png": "Left: the wall clipped by a plane through the long axis. Right: the same plane as a 2-D cut with "
                       "iso-lines every 0.1. On both ventricles transmural is 1 - phi_lv - phi_rv (Bayer et al. 2012): "
                       "0 on either endocardium and 1 on the epicardium, so it stays near 0 through the septum, whose "
                       "depth is septal_depth instead (see the helix figure). Apicobasal is the Laplace solution "
                       "between an apical patch and the base, remapped so its levels are evenly spaced along the axis.",
}

TAG_COLOURS = {1: ("LV endocardium", "#e0a526"), 2: ("epicardium", "#5b3f8c"), 3: ("base", "#2f8f5b"),
               4: ("RV endocardium", "#3b8bc2")}
REGION_COLOURS = {1: ("LV free wall", "#b5523b"), 2: ("septum", "#e9c46a"), 3: ("RV free wall", "#2a7f8f")}
REGIONS = ((1, "LV free wall", "transmural"), (2, "septum", "septal_depth"), (3, "RV free wall", "transmural"))


def is_biv(build: Build) -> bool:
    return bool((build.manifest.get("summary") or {}).get("biventricular"))


def law_of(build: Build) -> dict:
    return build.manifest["summary"]["biventricular"]["fiber_law_deg"]


def helix_law(law: dict, region: int, depth: np.ndarray) -> np.ndarray:
    """The prescribed helix (degrees) of a region at its depth (see the module docstring)."""
    d = np.clip(np.asarray(depth, float), 0.0, 1.0)
    if region == 2:
        return law["lv_helix_endo"] * (1.0 - d) - law["rv_helix_endo"] * d
    v = "lv" if region == 1 else "rv"
    return law[f"{v}_helix_endo"] + (law[f"{v}_helix_epi"] - law[f"{v}_helix_endo"]) * d * d


def draw(build: Build, out: Path) -> dict:
    """Draw the biventricular figures into ``out``; facts for the page."""
    fig_mesh(build, out / "biv_mesh.png")
    fig_fibers(build, out / "biv_fibers.png")
    return {"biv_figures": FIGURES, "captions": dict(CAPTIONS),
            "titles": {"helix_depth.png": "Helix angle against depth per region (both ventricles)"}}


# ----------------------------------------------------------------------------- the mesh

def _categorical(ids: np.ndarray, colours: dict) -> np.ndarray:
    """RGB (K, 3) uint8 per id from a {id: (name, hex)} table."""
    from matplotlib.colors import to_rgb

    table = np.zeros((max(colours) + 1, 3))
    for k, (_, hexcode) in colours.items():
        table[k] = to_rgb(hexcode)
    return (255 * table[np.clip(ids, 0, max(colours))]).astype(np.uint8)


def fig_mesh(build: Build, path: Path) -> None:
    """The four face tags on a long-axis cut of the boundary, the three regions on a short-axis cut."""
    plt = pyplot()
    from matplotlib.patches import Patch

    b = build
    s = b.surfaces
    faces = outer_surface(s.extract_cells(np.flatnonzero(np.asarray(s.cell_data["is_contour"]) == 0)))
    # the half of the boundary behind the long-axis plane through the septal bisector: both
    # cavities open, the camera in front of the plane
    half = faces.clip(normal=tuple(b.e2), origin=tuple(b.centre), invert=False)
    half.cell_data["rgb"] = _categorical(np.asarray(half.cell_data["face_tag"], int), TAG_COLOURS)
    view = unit_vector(-b.e2 + 0.35 * b.e1)
    scene = Scene(b, size=(900, 950), view=view, elevation=25.0, zoom=1.3)
    scene.add(half, scalars="rgb", rgb=True, smooth_shading=False, ambient=0.35)
    left = scene.image()

    depth = 0.4 * b.cavity_depth
    below = b.mesh.clip(normal=tuple(b.axis), origin=tuple(b.centre - depth * b.axis), invert=True)
    below.cell_data["rgb"] = _categorical(np.asarray(below.cell_data["region"], int), REGION_COLOURS)
    scene = Scene(b, size=(900, 950), view=unit_vector(b.e1 + 0.2 * b.e2), elevation=62.0, zoom=1.25)
    scene.add(below, scalars="rgb", rgb=True, ambient=0.35)
    right = scene.image()

    fig, axes = plt.subplots(1, 2, figsize=(13, 7.2))
    show_image(axes[0], left, "Boundary faces by tag (long-axis cut)")
    show_image(axes[1], right, "Cells by region (short-axis cut, seen from the base)")
    axes[0].legend(handles=[Patch(color=c, label=f"{k} {n}") for k, (n, c) in TAG_COLOURS.items()],
                   loc="lower center", bbox_to_anchor=(0.5, -0.1), ncol=4, frameon=False, fontsize=9)
    axes[1].legend(handles=[Patch(color=c, label=f"{k} {n}") for k, (n, c) in REGION_COLOURS.items()],
                   loc="lower center", bbox_to_anchor=(0.5, -0.1), ncol=3, frameon=False, fontsize=9)
    fig.suptitle("Both ventricles in one mesh: face tags and regions")
    fig.subplots_adjust(left=0.01, right=0.99, top=0.9, bottom=0.08, wspace=0.04)
    save_figure(fig, path)


# ----------------------------------------------------------------------------- fibers

def fig_fibers(build: Build, path: Path, *, glyphs: int = 2500, length: float = 4.0) -> None:
    """Fiber glyphs on the left free wall, the septum's right face and the right free wall."""
    plt = pyplot()
    import matplotlib as mpl
    import pyvista as pv

    b = build
    region = np.asarray(b.mesh.cell_data["region"])
    keys = ("points", "fiber", "helix_angle", "normal", "region")
    epi = read_pool_arrays(b.folder, "epi", keys)
    rv_endo = read_pool_arrays(b.folder, "rv_endo", keys)
    rng = np.random.default_rng(0)
    panels = (("LV free wall (epicardium)", 1, epi, -b.e1, (1, 2, 3)),
              ("septum (right face)", 2, rv_endo, b.e1, (1, 2)),
              ("RV free wall (epicardium)", 3, epi, b.e1, (1, 2, 3)))
    images, counts = [], []
    for _, k, pool, view, shown in panels:
        solid = b.mesh.extract_cells(np.flatnonzero(np.isin(region, shown)))
        scene = Scene(b, size=(800, 900), view=unit_vector(view + 0.3 * b.e2), elevation=18.0, zoom=1.3)
        scene.add(outer_surface(solid), color=WALL_GREY, smooth_shading=True, ambient=0.25)
        n = 0
        if pool and "region" in pool:
            p = pool["points"] + 0.35 * pool["normal"]
            keep = (pool["region"] == k) & ((b.centre - p) @ b.axis > 0.5 * length)
            idx = rng.permutation(np.flatnonzero(keep))[:glyphs]
            seg = line_glyphs(pv, p[idx], pool["fiber"][idx], length)
            seg.point_data["helix"] = np.repeat(pool["helix_angle"][idx], 2)
            scene.add(seg, scalars="helix", cmap=HELIX_CMAP, clim=HELIX_RANGE, line_width=2.5, lighting=False)
            n = len(idx)
        images.append(scene.image())
        counts.append(n)
    fig = plt.figure(figsize=(15, 6.6))
    for j, ((title, *_), img, n) in enumerate(zip(panels, images, counts)):
        ax = fig.add_axes([0.01 + 0.30 * j, 0.04, 0.29, 0.8])
        show_image(ax, img, f"{title}\n{n:,} glyphs")
    cax = fig.add_axes([0.925, 0.15, 0.015, 0.6])
    cb = fig.colorbar(mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(*HELIX_RANGE), cmap=HELIX_CMAP), cax=cax)
    cb.set_label("helix angle (degrees)")
    cb.set_ticks(np.arange(-90, 91, 30))
    fig.suptitle("Fibers on both ventricles (rule-based, Bayer et al. 2012), base at the top")
    save_figure(fig, path)


# ----------------------------------------------------------------------------- helix across the septum

def fig_helix(build: Build, path: Path) -> dict:
    """Helix angle against depth per region with the law drawn over it (replaces helix_depth.png)."""
    plt = pyplot()

    b = build
    keys = ("points", "fiber", "e_long", "e_circ", "transmural", "septal_depth", "region")
    pool = read_pool_arrays(b.folder, "myocardium", keys)
    law = law_of(b)
    fig, axes = plt.subplots(2, 3, figsize=(15, 7.6), gridspec_kw={"height_ratios": [2.2, 1]}, sharex=True)
    rows = []
    if not pool or "region" not in pool:
        for ax in axes.ravel():
            ax.set_axis_off()
        axes[0, 1].text(0.5, 0.5, "no wall pool with regions: nothing to draw", ha="center",
                        transform=axes[0, 1].transAxes)
        save_figure(fig, path)
        return {"biv_helix": rows}
    helix = measured_helix(pool)
    away = _away_from_insertions(b, pool["points"])
    edges = np.linspace(0.0, 1.0, 11)
    for j, (k, name, depth_key) in enumerate(REGIONS):
        sel = (pool["region"] == k) & away
        d = np.clip(pool[depth_key][sel], 0.0, 1.0)
        h = helix[sel]
        want = helix_law(law, k, d)
        diff = (h - want + 90.0) % 180.0 - 90.0          # a fiber is a line
        ax = axes[0, j]
        if len(d):
            ax.hexbin(d, h, gridsize=(28, 36), extent=(0, 1, -90, 90), cmap="Greys", bins="log", mincnt=1,
                      linewidths=0)
        grid = np.linspace(0.0, 1.0, 101)
        ax.plot(grid, helix_law(law, k, grid), color="#d1495b", lw=2.2, label="law")
        ax.set_ylim(-90, 90)
        ax.set_yticks(np.arange(-90, 91, 30))
        ax.grid(alpha=0.3)
        ax.set_title(f"{name} (n = {len(d):,})")
        if j == 0:
            ax.set_ylabel("helix angle (degrees)")
            ax.legend(loc="upper right", frameon=False)
        lo = axes[1, j]
        which = np.clip(np.digitize(d, edges) - 1, 0, 9)
        mid = 0.5 * (edges[1:] + edges[:-1])
        stats = [(np.mean(diff[which == i]), *np.percentile(diff[which == i], [5, 95])) if np.any(which == i)
                 else (np.nan, np.nan, np.nan) for i in range(10)]
        mean, p5, p95 = np.array(stats).T
        lo.fill_between(mid, p5, p95, color="#8fbfe8", alpha=0.6, lw=0)
        lo.plot(mid, mean, "o-", color=INK, ms=4)
        lo.axhline(0.0, color="#d1495b", lw=1)
        lo.set_ylim(-10, 10)
        lo.grid(alpha=0.3)
        lo.set_xlabel(("septal_depth (1): 0 left endocardium, 1 right endocardium" if k == 2
                       else "transmural (1): 0 endocardium, 1 epicardium"))
        if j == 0:
            lo.set_ylabel("measured - law (deg)\nmean, 5-95% band")
        if len(d):
            rows.append({"region": name, "depth": depth_key, "n": int(len(d)),
                         "mean_abs_deg": float(np.mean(np.abs(diff))),
                         "p95_abs_deg": float(np.percentile(np.abs(diff), 95)),
                         "max_abs_deg": float(np.max(np.abs(diff)))})
    fig.suptitle("Helix angle against depth on both ventricles: measured from the output vectors vs the law")
    fig.subplots_adjust(left=0.07, right=0.98, top=0.9, bottom=0.1, hspace=0.12, wspace=0.15)
    save_figure(fig, path)
    return {"biv_helix": rows}


def _away_from_insertions(build: Build, points: np.ndarray, margin: float = 0.15) -> np.ndarray:
    """Points (K,) bool whose angle about the axis lies at least ``margin`` of the septal arc
    from both insertion points (from the manifest's landmarks)."""
    lm = build.manifest.get("landmarks") or {}
    if lm.get("rv_insertion_anterior") is None:
        return np.ones(len(points), bool)

    def angle(p):
        rel = np.asarray(p, float) - build.centre
        return np.arctan2(rel @ build.e2, rel @ build.e1)

    a, c = angle(lm["rv_insertion_anterior"]), angle(lm["rv_insertion_inferior"])
    half = 0.5 * abs(np.angle(np.exp(1j * (a - c))))       # half the septal arc, about e1 (angle 0)
    t = np.abs(angle(points))
    # inside the septal arc: away from its ends; outside it: away from them on the free-wall side
    return np.abs(t - half) > margin * 2 * half


# ----------------------------------------------------------------------------- the page

def page_section(build: Build, facts: dict, html_table) -> str:
    """HTML: the volumes of both ventricles and the helix check per region."""
    biv = build.manifest["summary"]["biventricular"]
    rows = [["LV cavity volume (mL)", biv.get("lv_cavity_volume_ml")],
            ["RV cavity volume (mL)", biv.get("rv_cavity_volume_ml")],
            ["Wall volume, both ventricles (mL)", biv.get("wall_volume_ml")]]
    rows += [[f"Wall volume: {name.replace('_', ' ')} (mL)", v]
             for name, v in (biv.get("wall_volume_per_region_ml") or {}).items()]
    rows += [["RV free-wall thickness, typical (mm)", biv.get("rv_free_wall_thickness_mm")],
             ["RV outer surface from", biv.get("rv_outer_surface")],
             ["RV cavity's apical end below the base (mm)", biv.get("rv_cavity_apical_end_mm_below_base")]]
    law = biv.get("fiber_law_deg") or {}
    rows += [[f"law: {k} (deg)", v] for k, v in law.items()]
    out = ['<h3 id="biventricular">Both ventricles</h3>' + html_table(["quantity", "value"], rows),
           '<p class="muted">From the manifest\'s summary.biventricular: cavities by the divergence theorem over '
           "their endocardial faces closed by the base plane, wall volumes as sums of the tetrahedra of each "
           "region (1 LV free wall, 2 septum, 3 RV free wall). The myocardial volume and mass above are both "
           "ventricles' wall.</p>"]
    return "\n".join(out)


def helix_section(facts: dict, html_table) -> str:
    rows = [[r["region"], r["depth"], r["n"], r["mean_abs_deg"], r["p95_abs_deg"], r["max_abs_deg"]]
            for r in facts.get("biv_helix", [])]
    return ('<h2 id="helix">Helix angle against the law (both ventricles)</h2>' +
            html_table(["region", "depth", "wall pool points", "mean |angle - law| (deg)",
                        "95th percentile (deg)", "max (deg)"], rows) +
            '<p class="muted">Helix measured back from the vectors of pools/myocardium.npz, atan2(fiber.e_long, '
            "fiber.e_circ), folded into [-90, 90); law of summary.biventricular.fiber_law_deg at the point's depth "
            "(transmural in the free walls, septal_depth across the septum); every region without "
            "the points near the insertions, where the frames blend between the ventricles.</p>")
