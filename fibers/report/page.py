"""The report's HTML page: captions, tables, inline CSS, no scripts."""

from __future__ import annotations

import html
import json
from pathlib import Path

import numpy as np

from fibers.report.reading import Build, CAUTION, FIGURES, STAGES


# ----------------------------------------------------------------------------- the page

CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;color:#1d2b36;max-width:1180px;margin:0 auto;
padding:0 18px 40px;line-height:1.45;background:#fbfaf7}
h1{color:#2b6f77;margin:22px 0 4px;font-size:1.7em}h2{color:#2b6f77;border-bottom:2px solid #d7d2c8;
padding-bottom:3px;margin-top:34px}h3{margin:22px 0 6px}
.caution{border:2px solid #b5523b;background:#fbeee6;padding:10px 14px;border-radius:6px;font-weight:600}
table{border-collapse:collapse;margin:8px 0 14px;font-size:0.92em}th,td{border:1px solid #d7d2c8;
padding:3px 9px;text-align:left;vertical-align:top}thead th{background:#e9e5dc}tbody th{font-weight:600;
background:#f3f0ea}td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:14px 0 26px}figure img{max-width:100%;border:1px solid #d7d2c8;background:white}
figcaption{font-size:0.92em;color:#41525e;margin-top:4px}.muted{color:#6a7780}.warn{color:#8a2b1a}
code{background:#efece5;padding:0 3px;border-radius:3px}nav a{margin-right:12px;color:#2b6f77}
"""

CAPTIONS = {
    "fiber_field.png": "Fiber glyphs on the epicardial and endocardial pool points (lifted 0.35 mm off the "
                       "wall), coloured by helix angle on a cyclic map (a fiber at +90 degrees is one at -90). "
                       "A wedge is cut away; its faces show the helix turning across the wall.",
    "coordinates.png": "Left: the wall clipped by a plane through the long axis. Right: the same plane as a 2-D "
                       "cut with iso-lines every 0.1. Transmural is the Laplace solution between endocardium "
                       "and epicardium; apicobasal is the Laplace solution between an apical patch and the base, "
                       "remapped monotonically so its levels are evenly spaced along the long axis.",
    "helix_depth.png": "Wall pool points: helix angle measured back from the output vectors in both "
                       "conventions, helix_angle (Laplace frame, atan2(fiber.e_long, fiber.e_circ)) and "
                       "helix_angle_sax (short-axis circumferential direction, as diffusion imaging measures it), "
                       "folded into [-90, 90), against the depth the laws used; grey bins show the convention the "
                       "law is laid out in; the red line is the prescribed law from the resolved parameters.",
    "bullseye.png": "Standard 17-segment layout: basal ring outside, apex in the centre, segment 1 anterior at "
                    "the top, septum on the left. Thickness: distance from each epicardial pool point to the "
                    "closest point of the endocardial surface, averaged per segment.",
    "contour_fit.png": "Input contours after slice alignment, coloured by their signed distance to the fitted "
                       "surface (positive outside); bars: RMS per slice, triangles: largest |distance|, dashes: "
                       "mean signed distance.",
    "mesh_quality.png": "VTK's cell-quality measures (the Verdict library) computed by pyvista's "
                        "cell_quality on every tetrahedron of mesh.vtu. The minimum dihedral angle is computed from "
                        "the vertices over all six edges; VTK's tetrahedron min_angle is drawn as an outline.",
    "pools.png": "Points of every pool within 1.5 mm of a long-axis plane (left) and of a short-axis plane at "
                 "half the cavity depth (right).",
}


def _e(value) -> str:
    return html.escape(str(value))


def _num(value, digits: int = 4) -> str:
    if value is None:
        return "-"
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    try:
        v = float(value)
    except (TypeError, ValueError):
        return _e(value)
    if not np.isfinite(v):
        return "-"
    return f"{v:,.0f}" if abs(v) >= 10 ** digits else f"{v:.{digits}g}"


def html_table(header: list[str], rows: list[list], *, numeric_from: int = 1) -> str:
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = []
    for row in rows:
        cells = [f'<th scope="row">{_e(row[0])}</th>']
        for j, v in enumerate(row[1:], start=1):
            if isinstance(v, str):
                cells.append(f"<td>{_e(v)}</td>")
            else:
                cells.append(f'<td class="num">{_num(v)}</td>' if j >= numeric_from else f"<td>{_num(v)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def page_html(build: Build, facts: dict, timings: dict, name: str) -> str:
    from fibers.segments import SEGMENT_NAMES

    m = build.manifest
    s = m.get("summary") or {}
    counts = s.get("counts") or {}
    parts = [f"<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\"><title>fibers report: "
             f"{_e(name)}</title><style>{CSS}</style></head><body>",
             f"<h1>fibers build report</h1><p class=\"muted\">{_e(m.get('tool', 'fibers'))} "
             f"{_e(m.get('version', ''))}, output folder <code>{_e(name)}</code> "
             "(PNG figures beside this page)</p>",
             f'<p class="caution">Caution. {_e(CAUTION)}</p>',
             "<nav>" + "".join(f'<a href="#{a}">{t}</a>' for a, t in (
                 ("summary", "Summary"), ("segments", "Segments"), ("helix", "Helix check"),
                 ("figures", "Figures"), ("warnings", "Warnings"), ("parameters", "Parameters"),
                 ("provenance", "Provenance"))) + "</nav>"]

    # summary
    seg = facts.get("segments")
    rows = [["Myocardial volume (mL)", s.get("myocardial_volume_ml")],
            ["Myocardial volume from the tetrahedra of mesh.vtu (mL)", None if seg is None else seg["total_ml"]],
            ["Cavity volume (mL)" if "biventricular" not in s else "LV cavity volume (mL)", s.get("cavity_volume_ml")],
            ["LV mass (g, 1.05 g/mL)" if "biventricular" not in s else
             "Myocardial mass, both ventricles (g, 1.05 g/mL)", s.get("lv_mass_g")],
            ["Long-axis length, base plane to epicardial apex (mm)", s.get("long_axis_length_mm")],
            ["Mean wall thickness, epicardium to endocardium (mm)",
             None if seg is None or not len(seg["thickness_all"]) else float(np.mean(seg["thickness_all"]))],
            ["Slices", counts.get("slices")], ["Nodes", counts.get("nodes")],
            ["Tetrahedra", counts.get("tetrahedra")]]
    rows += [[f"Boundary faces: {k}", v] for k, v in (counts.get("faces") or {}).items()]
    rows += [[f"Pool points: {k}", v] for k, v in (counts.get("pools") or {}).items()]
    parts.append('<h2 id="summary">Summary</h2>' + html_table(["quantity", "value"], rows))
    if "biv_figures" in facts:  # both ventricles: their volumes (fibers.report.biventricle)
        from fibers.report import biventricle

        parts.append(biventricle.page_section(build, facts, html_table))

    mq = s.get("mesh_quality") or {}
    vq = facts.get("vtk_quality") or {}
    qrows = [[k, v] for k, v in mq.items() if k not in ("tetrahedra", "nodes")]
    qrows += [[f"{'' if name.startswith(('dihedral', 'vtk')) else 'VTK '}{name}: min / median / max",
               f"{_num(st['min'])} / {_num(st['median'])} / {_num(st['max'])}"] for name, st in vq.items()]
    if "vtk_min_angle" in vq:
        qrows.append(["VTK min_angle above the exact minimum dihedral angle (fraction of cells)",
                      vq["vtk_min_angle"]["above_exact_fraction"]])
    parts.append("<h3>Mesh quality</h3>" + html_table(["measure", "value"], qrows) +
                 '<p class="muted">The first rows come from the manifest (the build\'s own measures; its radius '
                 "ratio is normalised to 1 for a regular tetrahedron, 0 for a flat one); the VTK rows from "
                 "Verdict, whose radius ratio is 1 at best and grows for worse cells. The minimum dihedral angle is "
                 "computed from the vertices over all six edges; VTK's tetrahedron min_angle is shown beside it "
                 "because it exceeds that value on part of the cells.</p>")

    fr = s.get("fit_residuals_mm") or {}
    rrows = [[f"{k}: largest slice RMS / largest point residual (mm)", f"{_num(v.get('rms_max'))} / {_num(v.get('max'))}"]
             for k, v in fr.items()]
    rrows += [[f"slice {r['slice']} {r['structure']}", r["n"], r["rms_mm"], r["max_mm"], r["mean_mm"]]
              for r in sorted(facts.get("contour_rows", []), key=lambda r: (r["depth_mm"], r["structure"]))]
    parts.append("<h3>Fit residuals</h3>" +
                 html_table(["contour", "points", "RMS (mm)", "max |d| (mm)", "mean signed d (mm)"],
                        [r if len(r) == 5 else [r[0], r[1], "", "", ""] for r in rrows]) +
                 '<p class="muted">Per slice from surfaces.vtp (signed distance d of each contour point to its '
                 "fitted surface, positive outside), slices from base to apex.</p>")
    shifts = s.get("slice_shifts_mm") or {}
    if shifts:
        parts.append("<h3>Slice shifts</h3>" + html_table(
            ["slice", "in-plane breath-hold shift (mm, x y z)", "length (mm)"],
            [[f"slice {k}", " ".join(f"{c:+.2f}" for c in v), float(np.linalg.norm(v))] for k, v in shifts.items()]))

    parts.append(_slice_table(s))

    keys = list(STAGES) + [k for k in timings if k not in STAGES]
    trows = [[k, timings[k] if k in timings else "measured after this page was written; see manifest.json"]
             for k in keys]
    parts.append("<h3>Stage timings</h3>" + html_table(["stage", "seconds"], trows))

    # segments
    parts.append('<h2 id="segments">Wall per AHA segment</h2>')
    if seg is None or not build.labelled:
        parts.append('<p class="warn">No segment labels (all aha_segment values are 0): the case gives no '
                     "right-ventricular insertion landmarks. Add [landmarks] to the case file to get the 17 "
                     "segments.</p>")
    else:
        srows = [[f"{k} {SEGMENT_NAMES.get(k, '')}", seg["volume_ml"][k], 100 * seg["volume_ml"][k] / seg["total_ml"],
                  seg["thickness_mm"][k], f"{_num(seg['p10'][k])} - {_num(seg['p90'][k])}", int(seg["n"][k])]
                 for k in range(1, 18)]
        if seg["volume_ml"][0] > 0:
            srows.append(["0 not labelled", seg["volume_ml"][0], 100 * seg["volume_ml"][0] / seg["total_ml"],
                          seg["thickness_mm"][0], "", int(seg["n"][0])])
        parts.append(html_table(["segment", "wall volume (mL)", "share of wall (%)", "mean thickness (mm)",
                             "thickness 10th - 90th percentile (mm)", "epicardial points"], srows))
        layout = facts.get("layout")
        if layout:
            cls = "muted" if layout["agree_fraction"] >= 0.98 else "warn"
            parts.append(f'<p class="{cls}">Layout check: {100 * layout["agree_fraction"]:.2f}% of '
                         f"{layout['points']:,} epicardial pool points carry the label of the standard layout at "
                         "their own angle and depth (disagreement is expected only within a cell of a boundary).</p>")
    parts.append('<p class="muted">Wall thickness: distance from each point of the epicardial pool to the closest '
                 "point of the endocardial surface (exact point-to-triangle distance, VTK cell locator), averaged "
                 "over the points of each segment. Wall volume: sum of the tetrahedra of each label.</p>")

    # helix check
    hrows = [[r["ring"], r["n"], r["mean_abs_deg"], r["max_abs_deg"], r["sax_mean_abs_deg"], r["sax_p99_abs_deg"]]
             for r in facts.get("helix_rings", [])]
    if "biv_helix" in facts:
        from fibers.report import biventricle

        parts.append(biventricle.helix_section(facts, html_table))
    else:
        parts.append('<h2 id="helix">Helix angle against the law</h2>' +
                 html_table(["ring", "wall pool points", "Laplace frame: mean |angle - law| (deg)",
                         "Laplace frame: max (deg)", "short axis: mean |angle - law| (deg)",
                         "short axis: 99th percentile (deg)"], hrows) +
                 '<p class="muted">Laplace frame: atan2(fiber.e_long, fiber.e_circ), the helix_angle field; short '
                 "axis: the fiber projected on the plane normal to e_rad, from the short-axis circumferential "
                 "direction (long axis x e_rad) toward the long axis, the helix_angle_sax field (points whose wall "
                 "normal is within 30 degrees of the axis left out). Both in degrees from the vectors of "
                 "pools/myocardium.npz, folded into [-90, 90); law: the resolved fibers parameters at the point's "
                 "depth (parameters.fibers.depth), with its regional offsets. The law is laid out in the frame "
                 "parameters.fibers.helix_frame names, so that column should read near 0; the other shows how "
                 "far the two conventions part.</p>")

    # figures
    parts.append('<h2 id="figures">Figures</h2>')
    captions = dict(CAPTIONS, **facts.get("captions", {}))  # a route's own captions win
    titles = dict(facts.get("titles", {}))
    for name, title in tuple(FIGURES) + tuple(facts.get("biv_figures", ())):
        title = titles.get(name, title)
        parts.append(f'<figure><h3>{_e(title)}</h3><img src="{name}" alt="{_e(title)}">'
                     f"<figcaption>{_e(captions[name])}</figcaption></figure>")

    # warnings
    warn = m.get("warnings") or []
    parts.append('<h2 id="warnings">Warnings</h2>' + (
        "<ul>" + "".join(f'<li class="warn">{_e(w)}</li>' for w in warn) + "</ul>" if warn else
        '<p class="muted">The build raised no warnings.</p>'))

    # parameters
    prow = []
    for section, values in (m.get("parameters") or {}).items():
        if isinstance(values, dict):
            prow += [[f"{section}.{k}", json.dumps(v)] for k, v in values.items()]
        else:
            prow.append([section, json.dumps(values)])
    parts.append('<h2 id="parameters">Resolved parameters</h2>' + html_table(["parameter", "value"], prow))
    la = m.get("long_axis") or {}
    lm = m.get("landmarks") or {}
    geo = [[f"long_axis.{k}", json.dumps(v)] for k, v in la.items()] + [[f"landmarks.{k}", json.dumps(v)] for k, v in lm.items()]
    parts.append("<h3>Long axis and landmarks</h3>" + html_table(["item", "value"], geo))

    # provenance
    inputs = [[Path(i.get("path", "?")).name, i.get("path", ""), i.get("sha256", "")] for i in m.get("inputs") or []]
    parts.append('<h2 id="provenance">Provenance</h2>' + "<h3>Inputs</h3>" +
                 html_table(["input", "path at build time", "sha256"], inputs))
    versions = [["fibers", m.get("version", "")]] + [[k, v] for k, v in (m.get("versions") or {}).items()]
    versions += _report_versions()
    parts.append("<h3>Versions</h3>" + html_table(["package", "version"], versions))
    conv = [[k, json.dumps(v) if not isinstance(v, str) else v] for k, v in (m.get("conventions") or {}).items()]
    parts.append("<h3>Conventions</h3>" + html_table(["item", "meaning"], conv))
    parts.append(f'<p class="caution">{_e(CAUTION)}</p></body></html>\n')
    return "\n".join(parts)


def _slice_table(s: dict) -> str:
    """The slices the build counted, by the 50% basal rule, and the frame and base used."""
    rows = [[f"slice {r['id']}", "" if r.get("wall_coverage") is None else f"{100 * r['wall_coverage']:.0f}%",
             "yes" if r.get("counted") else "no", r.get("reason", "")] for r in s.get("slices") or []]
    if not rows:
        return ""
    html = "<h3>Slices counted</h3>" + html_table(["slice", "wall around the cavity", "counted", "reason"], rows,
                                              numeric_from=4)
    notes = []
    base = s.get("base") or {}
    if base:
        notes.append(f"Base plane: {_e(base.get('meaning', base.get('plane')))}, slice thickness "
                     f"{_num(base.get('slice_thickness_mm'))} mm.")
    if "frame" in s and len(s.get("frame_cavity_volumes_ml") or []) > 1:
        vols = ", ".join(f"{v:.1f}" for v in s["frame_cavity_volumes_ml"])
        notes.append(f"Frame {s['frame']} built ({_e(s.get('frame_reason', ''))}); cavity per frame (mL): {vols}.")
    notes.append("A basal slice counts when at least half of its cavity's rim is wall (the usual rule of CMR "
                 "volumetry); slices basal to the first counted one are dropped.")
    return html + '<p class="muted">' + " ".join(notes) + "</p>"


def _report_versions() -> list[list[str]]:
    import matplotlib
    import pyvista

    return [["pyvista (report)", pyvista.__version__],
            ["vtk (report)", ".".join(str(v) for v in pyvista.vtk_version_info)],
            ["matplotlib (report)", matplotlib.__version__]]
