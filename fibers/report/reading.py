"""What the report reads from an output folder, and the numbers it computes from the files.

Numbers computed here, from the output files:

- wall volume per AHA segment: sum of the tetrahedra's volumes per ``aha_segment`` label;
- wall thickness per segment: for every point of the epicardial pool, the distance to the
  closest point of the endocardial triangles of ``surfaces.vtp`` (the exact point-to-triangle
  distance of segments.csv, :mod:`fibers.surface_distance`), averaged over the points labelled
  with each segment. This is the shortest-distance thickness, which is at most the thickness along
  the wall normal; in segment 17 it measures the apical cap;
- helix angle measured back from the vectors: ``atan2(fiber . e_long, fiber . e_circ)`` in
  degrees, folded into [-90, 90) because a fiber is a line, compared with the law of the
  manifest's parameters at the same transmural depth;
- a layout check of the segment labels: each epicardial pool point is placed on the bull's-eye
  by its own angle about the long axis (from the landmarks: zero at the septal bisector,
  positive toward the inferior insertion) and its depth below the base, and the label it carries
  is compared with the segment of the standard layout at that place;
- mesh quality: VTK's cell-quality measures (the Verdict library, through pyvista): scaled
  Jacobian, radius ratio, aspect ratio; the minimum dihedral angle is computed here from the
  vertices over all six edges, because VTK 9.7's tetrahedron ``min_angle`` exceeds it on about a
  third of the cells of our meshes (it is drawn beside it for comparison).
"""

from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fibers.errors import InputError


CAUTION = ("Research tool, not a medical device. These figures and numbers are not a diagnosis and "
           "must not be used to make clinical decisions; for any question about a patient, defer to "
           "licensed clinical practice.")

# file name, title; the order is the order on the page
FIGURES = (
    ("fiber_field.png", "Fiber field with a cut-away"),
    ("coordinates.png", "Transmural and apicobasal coordinates"),
    ("helix_depth.png", "Helix angle against transmural depth"),
    ("bullseye.png", "17-segment bull's-eye"),
    ("contour_fit.png", "Input contours over the fitted surfaces"),
    ("mesh_quality.png", "Mesh quality (VTK cell-quality measures)"),
    ("pools.png", "Sample-point pools by region"),
)

STAGES = ("read", "stack", "surfaces", "mesh", "segments", "coordinates", "architecture", "pools",
          "outputs", "report", "total")
POOL_FILES = ("myocardium", "cavity", "background", "endo", "epi", "base")
MESH_FIELDS = ("transmural", "apicobasal", "helix_angle", "fiber", "e_long", "e_circ")

HELIX_CMAP, HELIX_RANGE = "twilight", (-90.0, 90.0)  # cyclic: a fiber at +90 is one at -90
RINGS = (("basal", range(1, 7)), ("mid", range(7, 13)), ("apical", range(13, 17)), ("apex", (17,)))

RESIDUAL_CMAP = "PuOr_r"  # diverging: the residuals are signed
GLYPHS, GLYPH_MM = 3000, 4.0  # fiber glyphs per surface in the 3-D figure, and their length

# colours of our own
INK = "#1d2b36"
ACCENT = "#2b6f77"
WALL_GREY = "#62666d"
REGION_COLOURS = {
    "myocardium": "#b5523b", "endo": "#e0a526", "epi": "#5b3f8c", "base": "#2f8f5b",
    "cavity pool": "#8fbfe8", "background: cavity": "#1f4f8a", "background: above_base": "#a9a9a9",
    "background: outside": "#c9b690", "background: wall": "#ff00aa",
    "rv_cavity pool": "#3fa7a0", "rv_endo": "#d17a9e",   # both ventricles only
}


@dataclass
class Build:
    """What the report reads from one output folder."""

    folder: Path
    manifest: dict
    mesh: object        # pyvista.UnstructuredGrid
    surfaces: object    # pyvista.PolyData
    pools: dict         # name -> dict of arrays
    centre: np.ndarray  # (3,) base centre, mm
    axis: np.ndarray    # (3,) unit, apex to base
    e1: np.ndarray      # (3,) unit normal to the axis: toward the septal bisector when known
    e2: np.ndarray      # (3,) axis x e1
    septal: bool        # e1 is the septal bisector (landmarks given)
    toward_inferior: float  # +1 or -1: the sign of e2 that points toward the inferior insertion
    cavity_depth: float     # mm from the base plane to the endocardial apex
    wall_depth: float       # mm from the base plane to the epicardial apex
    labelled: bool          # any aha_segment label is non-zero


# ----------------------------------------------------------------------------- reading

def has_display() -> bool:
    if sys.platform.startswith("linux"):
        return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
    return True


def check_folder(folder) -> Path:
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder; give the --out folder of a finished fibers build")
    try:
        manifest = read_manifest(folder)
    except InputError:
        raise InputError(f"{folder} is not a fibers output folder (no readable manifest.json); "
                         "give the --out folder of a finished build") from None
    if manifest.get("tool") != "fibers":
        raise InputError(f"{folder}/manifest.json was not written by fibers; give the --out folder of a fibers build")
    missing = [n for n in ("mesh.vtu", "surfaces.vtp") if not (folder / n).is_file()]
    if missing:
        raise InputError(f"{folder} lacks {', '.join(missing)}; build it again with fibers build or fibers demo")
    return folder


def read_manifest(folder: Path) -> dict:
    path = Path(folder) / "manifest.json"
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError) as err:
        raise InputError(f"{path}: cannot read the manifest ({type(err).__name__}); "
                         "give the --out folder of a finished fibers build") from None


def read_pool_arrays(folder: Path, name: str, keys) -> dict:
    path = folder / "pools" / f"{name}.npz"
    if not path.is_file():
        return {}
    with np.load(path) as data:
        return {k: data[k] for k in keys if k in data.files}


def unit_vector(v) -> np.ndarray:
    v = np.asarray(v, float)
    return v / np.linalg.norm(v)


def load_build(folder: Path, manifest: dict) -> Build:
    import pyvista as pv

    try:
        from fibers.quadratic import linear_grid

        mesh = linear_grid(pv.read(folder / "mesh.vtu"))  # an order-2 build: its linear children
        surfaces = pv.read(folder / "surfaces.vtp")
    except (FileNotFoundError, OSError, ValueError) as err:
        raise InputError(f"{folder}: cannot read mesh.vtu or surfaces.vtp ({err}); build the folder again") from None
    lacking = [f for f in MESH_FIELDS if f not in mesh.point_data] + \
              [f for f in ("aha_segment",) if f not in mesh.cell_data]
    if lacking:
        raise InputError(f"{folder}/mesh.vtu lacks {', '.join(lacking)}; it was not written by this version of fibers")
    keys = {
        "myocardium": ("points", "transmural", "thickness_fraction", "apicobasal", "circumferential", "fiber",
                       "e_rad", "e_long", "e_circ", "aha_segment"),
        "epi": ("points", "aha_segment"), "endo": ("points",), "base": ("points",), "cavity": ("points",),
        "background": ("points", "region", "region_names"),
    }
    pools = {name: read_pool_arrays(folder, name, keys[name]) for name in POOL_FILES}
    if (manifest.get("summary") or {}).get("biventricular"):  # both ventricles: the right face too
        pools["rv_endo"] = read_pool_arrays(folder, "rv_endo", ("points", "aha_segment"))
        pools["rv_cavity"] = read_pool_arrays(folder, "rv_cavity", ("points",))

    la = manifest.get("long_axis") or {}
    centre = np.asarray(la.get("base_centre_mm"), float)
    axis = unit_vector(la.get("direction"))
    depth = lambda p: float((centre - np.asarray(p, float)) @ axis)  # noqa: E731
    lm = manifest.get("landmarks") or {}
    ant, inf = lm.get("rv_insertion_anterior"), lm.get("rv_insertion_inferior")
    septal = ant is not None and inf is not None
    toward_inferior = 1.0
    if septal:
        a = np.asarray(ant, float) - centre
        b = np.asarray(inf, float) - centre
        a, b = (unit_vector(v - (v @ axis) * axis) for v in (a, b))
        e1 = unit_vector(a + b)  # bisects the shorter arc
    else:
        trial = np.eye(3)[np.argmin(np.abs(axis))]
        e1 = unit_vector(trial - (trial @ axis) * axis)
    e2 = np.cross(axis, e1)
    if septal:
        toward_inferior = 1.0 if b @ e2 >= 0 else -1.0
    labelled = bool(np.any(np.asarray(mesh.cell_data["aha_segment"]) > 0))
    return Build(folder=folder, manifest=manifest, mesh=mesh, surfaces=surfaces, pools=pools,
                  centre=centre, axis=axis, e1=e1, e2=e2, septal=septal, toward_inferior=toward_inferior,
                  cavity_depth=depth(la.get("endo_apex_mm")), wall_depth=depth(la.get("epi_apex_mm")),
                  labelled=labelled)


# ----------------------------------------------------------------------------- numbers

def _tet_volumes(mesh) -> np.ndarray:
    """Unsigned volumes (M,) mm^3 of the tetrahedra."""
    tets = np.asarray(mesh.cells_dict[tetra_type()]).reshape(-1, 4)
    p = np.asarray(mesh.points)[tets]
    d = p[:, 1:] - p[:, :1]
    return np.abs(np.einsum("ij,ij->i", d[:, 0], np.cross(d[:, 1], d[:, 2]))) / 6.0


def tetra_type() -> int:
    import pyvista as pv

    return int(pv.CellType.TETRA)


def outer_surface(data):
    """The outer surface of a dataset as PolyData (pyvista's keyword changed across versions)."""
    try:
        return data.extract_surface(algorithm="dataset_surface")
    except TypeError:
        return data.extract_surface()


def surface_part(build: Build, tag: int):
    """The triangles of ``surfaces.vtp`` with one face tag, as PolyData."""
    s = build.surfaces
    idx = np.flatnonzero((np.asarray(s.cell_data["face_tag"]) == tag) & (np.asarray(s.cell_data["is_contour"]) == 0))
    return outer_surface(s.extract_cells(idx))


def lv_outer_pool(build: Build) -> dict:
    """Points on the left ventricle's outer surface, with their ``aha_segment``.

    The epicardial pool; on both ventricles its points on the left ventricle (``aha_segment`` >
    0) and the right endocardial pool's points on the septum, the septum's right face being the
    left ventricle's outer surface there.
    """
    epi = build.pools.get("epi") or {}
    rv = build.pools.get("rv_endo")
    if rv is None or "points" not in epi:
        return epi
    parts = [p for p in (epi, rv) if "points" in p and "aha_segment" in p]
    keep = [np.asarray(p["aha_segment"]) > 0 for p in parts]
    return {"points": np.concatenate([p["points"][k] for p, k in zip(parts, keep)]),
            "aha_segment": np.concatenate([np.asarray(p["aha_segment"])[k] for p, k in zip(parts, keep)])}


def wall_thickness(build: Build) -> tuple[np.ndarray, np.ndarray]:
    """Distances (K,) mm from the left ventricle's outer-surface points (`lv_outer_pool`) to the
    endocardial surface, and labels (K,).

    The exact point-to-triangle distance that segments.csv uses (:mod:`fibers.surface_distance`),
    here at the pool's evenly spread points rather than at the mesh nodes.
    """
    from fibers.surface_distance import distance_to_surface

    epi = lv_outer_pool(build)
    if "points" not in epi:
        return np.zeros(0), np.zeros(0, int)
    endo = surface_part(build, 1)
    triangles = np.asarray(endo.faces).reshape(-1, 4)[:, 1:]  # every cell a triangle: [3, a, b, c]
    pts = np.asarray(epi["points"], float)
    dist = distance_to_surface(pts, np.asarray(endo.points, float), triangles)
    return dist, np.asarray(epi.get("aha_segment", np.zeros(len(pts), int)), int)


def segment_table(build: Build) -> dict:
    """Wall volume and thickness per segment 0-17 (0: not labelled)."""
    labels = np.asarray(build.mesh.cell_data["aha_segment"], int)
    vol = np.bincount(labels, weights=_tet_volumes(build.mesh), minlength=18)[:18] / 1000.0
    dist, seg = wall_thickness(build)
    n = np.bincount(seg, minlength=18)[:18]
    mean = np.bincount(seg, weights=dist, minlength=18)[:18] / np.maximum(n, 1)
    order = np.lexsort((dist, seg))
    p10 = np.full(18, np.nan)
    p90 = np.full(18, np.nan)
    starts = np.concatenate([[0], np.cumsum(n)])
    has = n > 0
    s_sorted = dist[order]
    p10[has] = s_sorted[(starts[:-1] + (0.1 * (n - 1)).round().astype(int))[has]]
    p90[has] = s_sorted[(starts[:-1] + (0.9 * (n - 1)).round().astype(int))[has]]
    mean[~has] = np.nan
    return {"volume_ml": vol, "thickness_mm": mean, "p10": p10, "p90": p90, "n": n,
            "thickness_all": dist, "total_ml": float(vol.sum())}


def fiber_law(manifest: dict):
    """The FiberLaw of a build, from the manifest's resolved parameters."""
    from fibers.io.case import fiber_law as law_of

    return law_of((manifest.get("parameters") or {}).get("fibers") or {})


def law_depth(manifest: dict, pool: dict) -> np.ndarray:
    """The depth (K,) the build's fiber laws used: thickness fraction or Laplace transmural."""
    law = fiber_law(manifest)
    if law.depth == "thickness" and "thickness_fraction" in pool:
        return np.asarray(pool["thickness_fraction"], float)
    return np.asarray(pool["transmural"], float)


def helix_law(manifest: dict, depth: np.ndarray, pool: dict | None = None, *,
              labelled: bool = False) -> np.ndarray:
    """The prescribed helix angle (degrees) at depth, from the manifest's parameters.

    With ``pool``, the apicobasal offsets and (when ``labelled``) the septal offset at its
    points are added, as the build did.
    """
    from fibers import architecture

    biv = (manifest.get("summary") or {}).get("biventricular")
    if biv:  # both ventricles (fibers.biv.coordinates): the left free wall's law
        d = np.clip(np.asarray(depth, float), 0.0, 1.0)
        law = biv["fiber_law_deg"]
        return law["lv_helix_endo"] + (law["lv_helix_epi"] - law["lv_helix_endo"]) * d * d
    law = fiber_law(manifest)
    position = weight = None
    if pool is not None:
        position = pool.get("apicobasal")
        if labelled and "circumferential" in pool:
            weight = architecture.septal_weight(pool["circumferential"])
    if law.helix_apicobasal is not None and position is None:
        position = np.full(np.shape(depth), 0.5)
    return architecture.helix_angle(law, depth, apicobasal=position, septal_weight=weight)


def measured_helix(pool: dict) -> np.ndarray:
    """Helix angle (K,) degrees from the fiber vectors in the Laplace frame, folded into [-90, 90)."""
    f = pool["fiber"]
    a = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, pool["e_long"]), np.einsum("ij,ij->i", f, pool["e_circ"])))
    return (a + 90.0) % 180.0 - 90.0


def sax_helix(build: Build, pool: dict) -> np.ndarray:
    """Helix angle (K,) degrees in the short-axis (imaging) convention, from the vectors.

    The fiber projected on the plane normal to the output ``e_rad``, its angle from the
    short-axis circumferential direction ``axis x e_rad`` toward the long axis. NaN where the
    wall normal is within 30 degrees of the axis (the apical cap), where that direction is
    lost.
    """
    if "e_rad" in pool:
        e_rad = np.asarray(pool["e_rad"], float)
    else:  # builds of earlier versions: e_circ = e_long x e_rad, so e_rad = e_circ x e_long
        e_rad = np.cross(pool["e_circ"], pool["e_long"])
        e_rad /= np.linalg.norm(e_rad, axis=1)[:, None]
    c = np.cross(build.axis, e_rad)
    norm = np.linalg.norm(c, axis=1)
    c /= np.where(norm > 0.5, norm, np.nan)[:, None]
    long = np.cross(e_rad, c)
    f = pool["fiber"]
    a = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, long), np.einsum("ij,ij->i", f, c)))
    return (a + 90.0) % 180.0 - 90.0


def ring_masks(build: Build, pool: dict) -> list[tuple[str, np.ndarray]]:
    if build.labelled and "aha_segment" in pool:
        seg = np.asarray(pool["aha_segment"])
        return [(name, np.isin(seg, list(members))) for name, members in RINGS]
    # by depth below the base in thirds of the cavity, as the segments are cut; the apicobasal
    # coordinate is far from linear in depth near the apex, so it is not used here
    u = ((build.centre - pool["points"]) @ build.axis) / build.cavity_depth
    return [("basal third", u < 1 / 3), ("mid third", (u >= 1 / 3) & (u < 2 / 3)),
            ("apical third", (u >= 2 / 3) & (u < 1)), ("beyond the cavity", u >= 1)]


def bullseye_place(build: Build, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Plot angle (deg, counter-clockwise from the right) and radius (0-4) of wall points.

    Standard layout: septal bisector on the left (180), anterior at the top, basal ring outside
    (radius 3-4), apex at the centre (below 1).
    """
    rel = points - build.centre
    psi = np.degrees(np.arctan2(build.toward_inferior * (rel @ build.e2), rel @ build.e1))
    theta = (180.0 + psi) % 360.0
    h = -(rel @ build.axis)
    u = h / build.cavity_depth
    cap = max(build.wall_depth - build.cavity_depth, 1e-6)
    r = np.where(u < 1.0, 4.0 - 3.0 * u, 1.0 - (h - build.cavity_depth) / cap)
    return theta, np.clip(r, 0.0, 4.0)


def expected_segment(theta: np.ndarray, r: np.ndarray) -> np.ndarray:
    """The segment of the standard bull's-eye at plot angle theta (deg) and radius r."""
    six = np.floor(((theta - 60.0) % 360.0) / 60.0).astype(int) + 1    # 1 spans 60-120 deg
    four = np.floor(((theta - 45.0) % 360.0) / 90.0).astype(int) + 13  # 13 spans 45-135 deg
    return np.select([r >= 3.0, r >= 2.0, r >= 1.0], [six, six + 6, four], 17)
