"""The build report: figures and one offline HTML page (DESIGN.md section 3.4).

The report reads what it shows from the files of the output folder (``mesh.vtu``,
``surfaces.vtp``, ``pools/*.npz`` and the manifest), so ``fibers report DIR`` re-draws it from a
finished build alone. It writes ``report/index.html`` and, beside it, one PNG per figure; the
page links them by relative path and loads nothing from the network (inline CSS, no scripts).

This module is the one place outside :mod:`fibers.io` that writes files, and only below
``report/``. pyvista and matplotlib are imported inside the functions that draw, so importing
the package stays fast; 3-D views are rendered off screen by pyvista and framed by matplotlib,
which adds titles, axes and colour bars with units.

Numbers computed here, from the output files:

- wall volume per AHA segment: sum of the tetrahedra's volumes per ``aha_segment`` label;
- wall thickness per segment: for every point of the epicardial pool, the distance to the
  closest point of the endocardial surface (a VTK cell locator on the endocardial triangles of
  ``surfaces.vtp``: exact point-to-triangle distance), averaged over the points labelled with
  each segment. This is the shortest-distance thickness, which is at most the thickness along
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

import html
import json
import logging
import os
import shutil
import sys
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fibers.errors import InputError

log = logging.getLogger("fibers")

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
}


@dataclass
class _Build:
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


# ----------------------------------------------------------------------------- public functions

def write_report(folder, *, result=None, manifest: dict | None = None, name: str | None = None) -> Path:
    """Draw the figures and write ``folder/report/index.html``.

    Parameters
    ----------
    folder : path
        An output folder holding ``mesh.vtu``, ``surfaces.vtp`` and ``pools/*.npz``.
    result : fibers.pipeline.Result, optional
        Only its stage timings are used (the build writes them to the manifest after the
        report); everything else is read from the files.
    manifest : dict, optional
        The manifest; read from ``folder/manifest.json`` when not given.
    name : str, optional
        The output folder's name as the user will see it (the build draws the report in a
        temporary folder that is renamed afterwards); default ``folder``'s own name.

    Returns
    -------
    Path
        The written ``index.html``.
    """
    folder = Path(folder)
    if manifest is None:
        manifest = _read_manifest(folder)
    build = _load(folder, manifest)
    timings = dict(manifest.get("timings_s") or {})
    if result is not None and not timings:
        timings = dict(getattr(result, "timings", {}) or {})

    tmp = folder / f".report.partial-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        facts = _draw_all(build, tmp)
        page = _page(build, facts, timings, name or folder.name)
        (tmp / "index.html").write_text(page, encoding="utf-8")
        target = folder / "report"
        if target.exists():
            shutil.rmtree(target)
        tmp.rename(target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    log.debug("report: %s", target / "index.html")
    return target / "index.html"


def redraw(folder) -> Path:
    """Re-draw the report of a finished build (``fibers report DIR``).

    Raises
    ------
    InputError
        ``folder`` is missing or is not a fibers output folder.
    """
    folder = _check_folder(folder)
    return write_report(folder, manifest=_read_manifest(folder))


def view(folder) -> int:
    """Open a finished build in an interactive 3-D window (``fibers view DIR``).

    The wall is coloured by helix angle and the fibers of a subset of the wall pool are drawn as
    short glyphs. Without a display the files to open in a 3-D viewer (e.g. ParaView) are logged
    instead. Returns 0.
    """
    folder = _check_folder(folder)
    files = [folder / "mesh.vtu", folder / "surfaces.vtp",
             *sorted((folder / "pools").glob("*.vtp")), folder / "report" / "index.html"]
    files = [f for f in files if f.exists()]
    if not _has_display():
        log.warning("view: no display found (DISPLAY and WAYLAND_DISPLAY are unset); "
                    "open these files in a 3-D viewer such as ParaView instead:")
        for f in files:
            log.warning("  %s", f)
        return 0
    import pyvista as pv

    mesh = pv.read(folder / "mesh.vtu")
    plotter = pv.Plotter(title=f"fibers: {folder.name}")
    plotter.add_mesh(mesh, scalars="helix_angle", cmap=HELIX_CMAP, clim=HELIX_RANGE, opacity=0.35,
                     scalar_bar_args={"title": "helix angle (deg)"})
    wall = _pool(folder, "myocardium", ("points", "fiber", "helix_angle"))
    if wall:
        keep = np.random.default_rng(0).permutation(len(wall["points"]))[:20000]
        cloud = pv.PolyData(wall["points"][keep])
        cloud["fiber"] = wall["fiber"][keep]
        cloud["helix angle (deg)"] = wall["helix_angle"][keep]
        glyphs = cloud.glyph(orient="fiber", scale=False, factor=2.5, geom=pv.Line(pointa=(-0.5, 0, 0), pointb=(0.5, 0, 0)))
        plotter.add_mesh(glyphs, scalars="helix angle (deg)", cmap=HELIX_CMAP, clim=HELIX_RANGE,
                         line_width=2, show_scalar_bar=False)
    plotter.add_axes()
    plotter.show()
    return 0


# ----------------------------------------------------------------------------- reading

def _has_display() -> bool:
    if sys.platform.startswith("linux"):
        return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
    return True


def _check_folder(folder) -> Path:
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder; give the --out folder of a finished fibers build")
    try:
        manifest = _read_manifest(folder)
    except InputError:
        raise InputError(f"{folder} is not a fibers output folder (no readable manifest.json); "
                         "give the --out folder of a finished build") from None
    if manifest.get("tool") != "fibers":
        raise InputError(f"{folder}/manifest.json was not written by fibers; give the --out folder of a fibers build")
    missing = [n for n in ("mesh.vtu", "surfaces.vtp") if not (folder / n).is_file()]
    if missing:
        raise InputError(f"{folder} lacks {', '.join(missing)}; build it again with fibers build or fibers demo")
    return folder


def _read_manifest(folder: Path) -> dict:
    path = Path(folder) / "manifest.json"
    try:
        return json.loads(path.read_text())
    except (OSError, ValueError) as err:
        raise InputError(f"{path}: cannot read the manifest ({type(err).__name__}); "
                         "give the --out folder of a finished fibers build") from None


def _pool(folder: Path, name: str, keys) -> dict:
    path = folder / "pools" / f"{name}.npz"
    if not path.is_file():
        return {}
    with np.load(path) as data:
        return {k: data[k] for k in keys if k in data.files}


def _unit(v) -> np.ndarray:
    v = np.asarray(v, float)
    return v / np.linalg.norm(v)


def _load(folder: Path, manifest: dict) -> _Build:
    import pyvista as pv

    try:
        mesh = pv.read(folder / "mesh.vtu")
        surfaces = pv.read(folder / "surfaces.vtp")
    except (FileNotFoundError, OSError, ValueError) as err:
        raise InputError(f"{folder}: cannot read mesh.vtu or surfaces.vtp ({err}); build the folder again") from None
    lacking = [f for f in MESH_FIELDS if f not in mesh.point_data] + \
              [f for f in ("aha_segment",) if f not in mesh.cell_data]
    if lacking:
        raise InputError(f"{folder}/mesh.vtu lacks {', '.join(lacking)}; it was not written by this version of fibers")
    keys = {
        "myocardium": ("points", "transmural", "apicobasal", "fiber", "e_long", "e_circ", "aha_segment"),
        "epi": ("points", "aha_segment"), "endo": ("points",), "base": ("points",), "cavity": ("points",),
        "background": ("points", "region", "region_names"),
    }
    pools = {name: _pool(folder, name, keys[name]) for name in POOL_FILES}

    la = manifest.get("long_axis") or {}
    centre = np.asarray(la.get("base_centre_mm"), float)
    axis = _unit(la.get("direction"))
    depth = lambda p: float((centre - np.asarray(p, float)) @ axis)  # noqa: E731
    lm = manifest.get("landmarks") or {}
    ant, inf = lm.get("rv_insertion_anterior"), lm.get("rv_insertion_inferior")
    septal = ant is not None and inf is not None
    toward_inferior = 1.0
    if septal:
        a = np.asarray(ant, float) - centre
        b = np.asarray(inf, float) - centre
        a, b = (_unit(v - (v @ axis) * axis) for v in (a, b))
        e1 = _unit(a + b)  # bisects the shorter arc
    else:
        trial = np.eye(3)[np.argmin(np.abs(axis))]
        e1 = _unit(trial - (trial @ axis) * axis)
    e2 = np.cross(axis, e1)
    if septal:
        toward_inferior = 1.0 if b @ e2 >= 0 else -1.0
    labelled = bool(np.any(np.asarray(mesh.cell_data["aha_segment"]) > 0))
    return _Build(folder=folder, manifest=manifest, mesh=mesh, surfaces=surfaces, pools=pools,
                  centre=centre, axis=axis, e1=e1, e2=e2, septal=septal, toward_inferior=toward_inferior,
                  cavity_depth=depth(la.get("endo_apex_mm")), wall_depth=depth(la.get("epi_apex_mm")),
                  labelled=labelled)


# ----------------------------------------------------------------------------- numbers

def _tet_volumes(mesh) -> np.ndarray:
    """Unsigned volumes (M,) mm^3 of the tetrahedra."""
    tets = np.asarray(mesh.cells_dict[_tetra_type()]).reshape(-1, 4)
    p = np.asarray(mesh.points)[tets]
    d = p[:, 1:] - p[:, :1]
    return np.abs(np.einsum("ij,ij->i", d[:, 0], np.cross(d[:, 1], d[:, 2]))) / 6.0


def _tetra_type() -> int:
    import pyvista as pv

    return int(pv.CellType.TETRA)


def _outer(data):
    """The outer surface of a dataset as PolyData (pyvista's keyword changed across versions)."""
    try:
        return data.extract_surface(algorithm="dataset_surface")
    except TypeError:
        return data.extract_surface()


def _surface_part(build: _Build, tag: int):
    """The triangles of ``surfaces.vtp`` with one face tag, as PolyData."""
    s = build.surfaces
    idx = np.flatnonzero((np.asarray(s.cell_data["face_tag"]) == tag) & (np.asarray(s.cell_data["is_contour"]) == 0))
    return _outer(s.extract_cells(idx))


def _thickness(build: _Build) -> tuple[np.ndarray, np.ndarray]:
    """Distances (K,) mm from the epicardial pool points to the endocardial surface, and labels (K,)."""
    epi = build.pools.get("epi") or {}
    if "points" not in epi:
        return np.zeros(0), np.zeros(0, int)
    endo = _surface_part(build, 1)
    pts = epi["points"]
    _, closest = endo.find_closest_cell(pts, return_closest_point=True)
    dist = np.linalg.norm(pts - closest, axis=1)
    return dist, np.asarray(epi.get("aha_segment", np.zeros(len(pts), int)), int)


def _segment_table(build: _Build) -> dict:
    """Wall volume and thickness per segment 0-17 (0: not labelled)."""
    labels = np.asarray(build.mesh.cell_data["aha_segment"], int)
    vol = np.bincount(labels, weights=_tet_volumes(build.mesh), minlength=18)[:18] / 1000.0
    dist, seg = _thickness(build)
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


def _law(manifest: dict, depth: np.ndarray) -> np.ndarray:
    """The prescribed helix angle (degrees) at depth, from the manifest's parameters."""
    fib = (manifest.get("parameters") or {}).get("fibers") or {}
    d = np.clip(np.asarray(depth, float), 0.0, 1.0)
    profile = fib.get("helix_profile")
    if profile:
        table = np.asarray(profile, float)
        return np.interp(d, table[:, 0], table[:, 1])
    endo, epi = float(fib.get("helix_endo", 60.0)), float(fib.get("helix_epi", -60.0))
    return endo + (epi - endo) * d


def _measured_helix(pool: dict) -> np.ndarray:
    """Helix angle (K,) degrees from the fiber vectors, folded into [-90, 90)."""
    f = pool["fiber"]
    a = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, pool["e_long"]), np.einsum("ij,ij->i", f, pool["e_circ"])))
    return (a + 90.0) % 180.0 - 90.0


def _geometric_helix(build: _Build, pool: dict) -> np.ndarray:
    """Helix angle (K,) degrees against the circumferential direction of the long axis itself.

    The wall's tangent plane is taken normal to the output ``e_rad``; in it the circumferential
    direction is the long axis crossed with the point's offset from the axis, projected, and the
    longitudinal one completes the frame as ``e_rad x circumferential``. Where the output frame
    is right, this angle equals the one measured from ``e_circ``; near the apex the axis
    direction is ill defined and the two part.
    """
    e_rad = np.cross(pool["e_circ"], pool["e_long"])  # e_circ = e_long x e_rad, so e_rad = e_circ x e_long
    e_rad /= np.linalg.norm(e_rad, axis=1)[:, None]
    c = np.cross(build.axis, pool["points"] - build.centre)
    c -= np.einsum("ij,ij->i", c, e_rad)[:, None] * e_rad
    norm = np.linalg.norm(c, axis=1)
    c /= np.where(norm > 1e-9, norm, np.nan)[:, None]
    long = np.cross(e_rad, c)
    f = pool["fiber"]
    a = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, long), np.einsum("ij,ij->i", f, c)))
    return (a + 90.0) % 180.0 - 90.0


def _ring_masks(build: _Build, pool: dict) -> list[tuple[str, np.ndarray]]:
    if build.labelled and "aha_segment" in pool:
        seg = np.asarray(pool["aha_segment"])
        return [(name, np.isin(seg, list(members))) for name, members in RINGS]
    # by depth below the base in thirds of the cavity, as the segments are cut; the apicobasal
    # coordinate is far from linear in depth near the apex, so it is not used here
    u = ((build.centre - pool["points"]) @ build.axis) / build.cavity_depth
    return [("basal third", u < 1 / 3), ("mid third", (u >= 1 / 3) & (u < 2 / 3)),
            ("apical third", (u >= 2 / 3) & (u < 1)), ("beyond the cavity", u >= 1)]


def _bullseye_place(build: _Build, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
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


def _expected_segment(theta: np.ndarray, r: np.ndarray) -> np.ndarray:
    """The segment of the standard bull's-eye at plot angle theta (deg) and radius r."""
    six = np.floor(((theta - 60.0) % 360.0) / 60.0).astype(int) + 1    # 1 spans 60-120 deg
    four = np.floor(((theta - 45.0) % 360.0) / 90.0).astype(int) + 13  # 13 spans 45-135 deg
    return np.select([r >= 3.0, r >= 2.0, r >= 1.0], [six, six + 6, four], 17)


# ----------------------------------------------------------------------------- drawing helpers

def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 10, "axes.titlesize": 11, "axes.titleweight": "bold",
                         "figure.titlesize": 13, "figure.titleweight": "bold",
                         "axes.edgecolor": INK, "axes.labelcolor": INK, "text.color": INK,
                         "xtick.color": INK, "ytick.color": INK, "savefig.facecolor": "white"})
    return plt


def _save(fig, path: Path) -> None:
    fig.savefig(path, dpi=100)
    import matplotlib.pyplot as plt

    plt.close(fig)


class _Scene:
    """An off-screen pyvista plotter framed around the ventricle, base up."""

    def __init__(self, build: _Build, size=(900, 900), *, view=None, elevation=15.0, zoom=1.0, trim=True):
        import pyvista as pv

        pv.OFF_SCREEN = True
        self.pv = pv
        self.build = build
        self.plotter = pv.Plotter(off_screen=True, window_size=list(size))
        self.plotter.set_background("white")
        self.view = _unit(build.e1 if view is None else view)
        self.elevation = elevation
        self.zoom = zoom
        self.trim = trim

    def add(self, data, **kw):
        kw.setdefault("show_scalar_bar", False)
        self.plotter.add_mesh(data, **kw)

    def image(self) -> np.ndarray:
        b, pl = self.build, self.plotter
        bounds = np.asarray(b.mesh.bounds).reshape(3, 2)
        mid = b.centre - 0.5 * b.wall_depth * b.axis
        span = float(np.linalg.norm(bounds[:, 1] - bounds[:, 0]))
        el = np.radians(self.elevation)
        direction = np.cos(el) * self.view + np.sin(el) * b.axis
        pl.camera.focal_point = tuple(mid)
        pl.camera.position = tuple(mid + 2.2 * span * direction)
        pl.camera.up = tuple(b.axis)
        pl.camera.view_angle = 30.0
        pl.reset_camera_clipping_range()
        pl.camera.zoom(self.zoom)
        img = pl.screenshot(return_img=True)
        pl.close()
        return _trim(img) if self.trim else img


def _trim_common(images: list, pad: int = 8) -> list:
    """Crop the same white margins from images of one size, so they keep one scale."""
    ink = np.logical_or.reduce([np.any(img[..., :3] < 250, axis=2) for img in images])
    box = _ink_box(ink, pad)
    return [img[box] for img in images] if box else images


def _ink_box(ink: np.ndarray, pad: int):
    rows, cols = np.flatnonzero(ink.any(axis=1)), np.flatnonzero(ink.any(axis=0))
    if len(rows) == 0:
        return None
    return (slice(max(rows[0] - pad, 0), min(rows[-1] + pad + 1, ink.shape[0])),
            slice(max(cols[0] - pad, 0), min(cols[-1] + pad + 1, ink.shape[1])))


def _trim(img: np.ndarray, pad: int = 8) -> np.ndarray:
    """Crop white margins of a rendered image."""
    box = _ink_box(np.any(img[..., :3] < 250, axis=2), pad)
    return img[box] if box else img


def _colourbar(fig, ax, cmap, vmin, vmax, label, **kw):
    import matplotlib as mpl

    sm = mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(vmin, vmax), cmap=cmap)
    cb = fig.colorbar(sm, ax=ax, shrink=kw.pop("shrink", 0.8), pad=kw.pop("pad", 0.02), **kw)
    cb.set_label(label)
    return cb


def _show_image(ax, img, title):
    ax.imshow(img)
    ax.set_axis_off()
    ax.set_title(title)


def _lines(pv, points, vectors, length):
    """Line segments of ``length`` mm centred on points along vectors, as PolyData."""
    a = points - 0.5 * length * vectors
    b = points + 0.5 * length * vectors
    pts = np.empty((2 * len(points), 3))
    pts[0::2], pts[1::2] = a, b
    idx = np.arange(2 * len(points)).reshape(-1, 2)
    return pv.PolyData(pts, lines=np.column_stack([np.full(len(points), 2), idx]).ravel())


def _in_plane_xy(build: _Build, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates (mm) in the long-axis plane spanned by e1 (x) and the axis (y, 0 at the base)."""
    rel = points - build.centre
    return rel @ build.e1, rel @ build.axis


def _long_axis_cut(build: _Build):
    """The mesh cut by the long-axis plane through e1, triangulated."""
    cut = build.mesh.slice(normal=tuple(build.e2), origin=tuple(build.centre))
    return cut.triangulate()


def _x_label(build: _Build) -> str:
    return ("mm from the long axis, toward the septal bisector" if build.septal
            else "mm from the long axis (in-plane direction)")


# ----------------------------------------------------------------------------- figures

def _draw_all(build: _Build, out: Path) -> dict:
    import contextlib

    import pyvista as pv

    # VTK warns on stderr when it probes for an X display before falling back to off-screen
    # rendering; only its errors are of interest here
    quiet = getattr(pv, "vtk_verbosity", None)
    facts = {}
    steps = (_fig_fibers, _fig_coordinates, _fig_helix, _fig_bullseye, _fig_contours, _fig_quality, _fig_pools)
    with quiet("error") if quiet else contextlib.nullcontext():
        for (name, _), step in zip(FIGURES, steps):
            facts.update(step(build, out / name) or {})
    return facts


def _fig_fibers(build: _Build, path: Path) -> dict:
    """(a) Fibers on the endocardial and epicardial surfaces and on the faces of a wedge cut."""
    plt = _mpl()
    import pyvista as pv

    b = build
    half = np.radians(45.0)
    # the wedge faces the lateral wall; the camera looks at it from 40 degrees aside, so the cut
    # faces and the uncut epicardium are both in view
    centre_dir = -b.e1
    side = np.cross(b.axis, centre_dir)
    view = _unit(np.cos(np.radians(40.0)) * centre_dir + np.sin(np.radians(40.0)) * side)
    n1 = _unit(np.sin(half) * centre_dir - np.cos(half) * side)   # the wedge is n1.x > 0 and n2.x > 0
    n2 = _unit(np.sin(half) * centre_dir + np.cos(half) * side)
    wedge = lambda p: np.minimum((p - b.centre) @ n1, (p - b.centre) @ n2)  # noqa: E731

    grid = b.mesh.copy(deep=False)
    grid.point_data["wedge"] = wedge(np.asarray(grid.points))
    kept = grid.clip_scalar(scalars="wedge", value=0.0, invert=True)
    surf = _outer(kept)
    on_cut = np.abs(np.asarray(surf.point_data["wedge"])) < 1e-6
    tri = np.asarray(surf.faces).reshape(-1, 4)[:, 1:] if surf.is_all_triangles else None
    if tri is None:
        surf = surf.triangulate()
        on_cut = np.abs(np.asarray(surf.point_data["wedge"])) < 1e-6
        tri = np.asarray(surf.faces).reshape(-1, 4)[:, 1:]
    cut_cells = on_cut[tri].all(axis=1)
    cut = _outer(surf.extract_cells(np.flatnonzero(cut_cells)))
    shell = _outer(surf.extract_cells(np.flatnonzero(~cut_cells)))

    scene = _Scene(b, size=(1000, 1100), view=view, elevation=25.0, zoom=1.25)
    scene.add(shell, color=WALL_GREY, smooth_shading=True, split_sharp_edges=True, ambient=0.2)
    scene.add(cut, scalars="helix_angle", cmap=HELIX_CMAP, clim=HELIX_RANGE, ambient=0.3)
    rng = np.random.default_rng(0)
    counts = {}
    for name, offset in (("epi", 0.35), ("endo", 0.35)):
        pool = _pool(b.folder, name, ("points", "fiber", "helix_angle", "normal"))
        if not pool:
            continue
        p = pool["points"] + offset * pool["normal"]
        # outside the wedge, and not poking out above the base plane
        show = (wedge(p) < -1.0) & ((b.centre - p) @ b.axis > 0.5 * GLYPH_MM)
        idx = rng.permutation(np.flatnonzero(show))[:GLYPHS]
        seg = _lines(pv, p[idx], pool["fiber"][idx], GLYPH_MM)
        seg.point_data["helix"] = np.repeat(pool["helix_angle"][idx], 2)
        scene.add(seg, scalars="helix", cmap=HELIX_CMAP, clim=HELIX_RANGE, line_width=2.5, lighting=False)
        counts[name] = len(idx)
    img = scene.image()

    fig = plt.figure(figsize=(11.5, 9.5))
    ax = fig.add_axes([0.02, 0.04, 0.8, 0.86])
    _show_image(ax, img, "")
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
    _save(fig, path)
    return {}


def _fig_coordinates(build: _Build, path: Path) -> dict:
    """(b) Transmural and apicobasal coordinates on a half-cut wall and on the long-axis cut."""
    plt = _mpl()
    import matplotlib.tri as mtri

    b = build
    half = b.mesh.clip(normal=tuple(b.e2), origin=tuple(b.centre), invert=True)
    view = _unit(b.e2 - 0.8 * b.e1)  # oblique to the cut face, so it and the epicardium show
    cut = _long_axis_cut(b)
    x, y = _in_plane_xy(b, np.asarray(cut.points))
    tri = np.asarray(cut.faces).reshape(-1, 4)[:, 1:]
    triang = mtri.Triangulation(x, y, tri)
    fields = (("transmural", "viridis", "transmural depth (1): 0 endocardium, 1 epicardium"),
              ("apicobasal", "cividis", "apicobasal position (1): 0 apex, 1 base"))
    fig, axes = plt.subplots(2, 2, figsize=(12, 11), gridspec_kw={"width_ratios": [1, 1.05]})
    for row, (name, cmap, label) in enumerate(fields):
        scene = _Scene(b, size=(800, 850), view=view, elevation=20.0, zoom=1.2)
        scene.add(half, scalars=name, cmap=cmap, clim=(0.0, 1.0), smooth_shading=True, split_sharp_edges=True,
                  ambient=0.3)
        _show_image(axes[row, 0], scene.image(), f"{name}: wall cut in half along the long axis")
        _colourbar(fig, axes[row, 0], cmap, 0.0, 1.0, label, shrink=0.75)
        ax = axes[row, 1]
        values = np.asarray(cut.point_data[name])
        tpc = ax.tripcolor(triang, values, cmap=cmap, vmin=0.0, vmax=1.0, shading="gouraud")
        ax.tricontour(triang, values, levels=np.linspace(0.1, 0.9, 9), colors="white", linewidths=0.6)
        ax.set_aspect("equal")
        ax.set_xlabel(_x_label(b))
        ax.set_ylabel("mm along the long axis (0 at the base plane)")
        ax.set_title(f"{name} on the long-axis cut (contours every 0.1)")
        cb = fig.colorbar(tpc, ax=ax, shrink=0.75, pad=0.02)
        cb.set_label(label)
    fig.suptitle("Cardiac coordinates (from Laplace solutions) on the wall and on a long-axis cut")
    fig.tight_layout()
    _save(fig, path)
    return {}


def _fig_helix(build: _Build, path: Path) -> dict:
    """(c) Helix angle measured from the output vectors against the prescribed law, per ring."""
    plt = _mpl()
    pool = build.pools.get("myocardium") or {}
    if "fiber" not in pool:
        fig, ax = plt.subplots(figsize=(10, 4))
        ax.set_axis_off()
        ax.text(0.5, 0.5, "no myocardium pool in pools/: nothing to measure", ha="center", va="center")
        fig.suptitle("Helix angle against transmural depth")
        _save(fig, path)
        return {"helix_rings": []}
    depth = pool["transmural"]
    measured = _measured_helix(pool)
    geometric = _geometric_helix(build, pool)
    law = _law(build.manifest, depth)
    rings = [(n, m) for n, m in _ring_masks(build, pool) if m.any()]
    fig = plt.figure(figsize=(3.2 * len(rings) + 1.8, 5.0))
    width = 0.84 / len(rings)
    axes = [fig.add_axes([0.06 + i * width, 0.14, width - 0.02, 0.64]) for i in range(len(rings))]
    grid = np.linspace(0.0, 1.0, 201)
    edges = np.linspace(0, 1, 11)
    rows = []
    hb = None
    for i, (ax, (name, mask)) in enumerate(zip(axes, rings)):
        hb = ax.hexbin(depth[mask], measured[mask], gridsize=(36, 30), extent=(0, 1, -90, 90), cmap="Greys",
                       mincnt=1, bins="log", linewidths=0)
        ax.plot(grid, _law(build.manifest, grid), color="#d1495b", lw=2.2, label="prescribed law")
        which = np.clip(np.digitize(depth[mask], edges) - 1, 0, 9)
        cnt = np.bincount(which, minlength=10)
        ok = cnt > 0
        at = np.bincount(which, weights=depth[mask], minlength=10) / np.maximum(cnt, 1)
        for values, style, label in ((measured, dict(marker="o", ms=6, mfc=ACCENT, mec="white"),
                                      "from e_long, e_circ of the output"),
                                     (geometric, dict(marker="D", ms=4, mfc="#e0a526", mec=INK, mew=0.5),
                                      "from the geometric circumferential direction")):
            mean = np.bincount(which, weights=values[mask], minlength=10) / np.maximum(cnt, 1)
            ax.plot(at[ok], mean[ok], ls="none", label=f"mean per 0.1 depth, {label}", **style)
        ax.set_title(f"{name} (n = {int(mask.sum()):,})")
        ax.set_xlabel("transmural depth (1)\n0 endocardium, 1 epicardium")
        ax.set_xlim(0, 1)
        ax.set_ylim(-90, 90)
        ax.set_xticks([0, 0.25, 0.5, 0.75, 1.0])
        ax.set_xticklabels(["0", "0.25", "0.5", "0.75", "1"])
        ax.set_yticks(np.arange(-90, 91, 30))
        if i:
            ax.set_yticklabels([])
        ax.grid(alpha=0.3)
        diff = np.abs(measured[mask] - law[mask])
        geo = np.abs(geometric[mask] - law[mask])
        rows.append({"ring": name, "n": int(mask.sum()), "mean_abs_deg": float(diff.mean()),
                     "max_abs_deg": float(diff.max()), "geo_mean_abs_deg": float(np.nanmean(geo)),
                     "geo_p99_abs_deg": float(np.nanpercentile(geo, 99))})
    axes[0].set_ylabel("helix angle (degrees)")
    fig.legend(*axes[0].get_legend_handles_labels(), loc="upper center", bbox_to_anchor=(0.47, 0.915), ncol=3,
               fontsize=8.5, frameon=False)
    cax = fig.add_axes([0.915, 0.14, 0.015, 0.64])
    cb = fig.colorbar(hb, cax=cax)
    cb.set_label("wall pool points per bin (count, log scale)")
    fig.suptitle("Helix angle against transmural depth: measured from the output vectors vs the law", y=0.985)
    _save(fig, path)
    return {"helix_rings": rows}


def _wedge_patches(values: np.ndarray, cmap, norm, ax, fmt):
    """Draw the 17 sectors of the standard bull's-eye coloured by values[1..17]."""
    from matplotlib.patches import Wedge

    for k in range(1, 18):
        centre, rr = _segment_centre(k)
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


def _segment_centre(k: int) -> tuple[float, float]:
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


def _fig_bullseye(build: _Build, path: Path) -> dict:
    """(d) Wall volume and mean thickness per segment, and where the labels fall."""
    plt = _mpl()
    import matplotlib as mpl

    table = _segment_table(build)
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
        _save(fig, path)
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
        _wedge_patches(values, cmap, norm, ax, fmt)
        ax.set_title(title)
        low = np.nanmin(values[1:18]) < lo - 1e-9
        cb = fig.colorbar(mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(lo, hi), cmap=cmap), ax=ax, shrink=0.72,
                          pad=0.02, extend="min" if low else "neither")
        cb.set_label(label)

    # layout check: the labels the epicardial points carry, at their own place on the bull's-eye
    ax = axes[2]
    epi = build.pools.get("epi") or {}
    layout = None
    if "points" in epi and build.septal:
        theta, r = _bullseye_place(build, epi["points"])
        seg = np.asarray(epi["aha_segment"], int)
        expected = _expected_segment(theta, r)
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
            t, rr = _segment_centre(k)
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
    _save(fig, path)
    return {"segments": table, "layout": layout}


def _contour_rows(build: _Build) -> list[dict]:
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


def _fig_contours(build: _Build, path: Path) -> dict:
    """(e) The input contours over the fitted surfaces, and per-slice residuals."""
    plt = _mpl()
    b = build
    s = b.surfaces
    lines = _outer(s.extract_cells(np.flatnonzero(np.asarray(s.cell_data["is_contour"]) == 1)))
    rows = _contour_rows(b)
    vmax = max([r["max_mm"] for r in rows] + [0.5])
    structure = np.asarray(lines.point_data["contour_structure"])
    fig = plt.figure(figsize=(14, 6.6))
    images = []
    for tag in (1, 2):
        mine = lines.extract_points(structure == tag, adjacent_cells=False)
        scene = _Scene(b, size=(700, 850), view=_unit(b.e1 + b.e2), elevation=12.0, zoom=1.25, trim=False)
        scene.add(_surface_part(b, tag), color="#7d838b", smooth_shading=True, ambient=0.25, opacity=0.6)
        scene.add(_outer(mine).tube(radius=0.55, n_sides=8), scalars="residual_mm", cmap=RESIDUAL_CMAP,
                  clim=(-vmax, vmax), ambient=0.3)
        images.append(scene.image())
    images = _trim_common(images)
    for j, (img, title) in enumerate(zip(images, ("endocardial contours on the\nfitted endocardium",
                                                   "epicardial contours on the\nfitted epicardium"))):
        _show_image(fig.add_axes([0.005 + 0.235 * j, 0.03, 0.225, 0.84]), img, title)
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
    _save(fig, path)
    return {"contour_rows": rows}


QUALITY = (("scaled_jacobian", "scaled Jacobian (1)", 1.0, "1 = ideal; <= 0 inverted"),
           ("radius_ratio", "radius ratio (1)", 1.0, "1 = ideal (regular tetrahedron)"),
           ("aspect_ratio", "aspect ratio (1)", 1.0, "1 = ideal"))
REGULAR_DIHEDRAL = float(np.degrees(np.arccos(1.0 / 3.0)))  # 70.53 degrees


def _dihedral_min(mesh) -> np.ndarray:
    """Smallest of the six interior dihedral angles (M,) degrees of each tetrahedron."""
    p = np.asarray(mesh.points)[np.asarray(mesh.cells_dict[_tetra_type()]).reshape(-1, 4)]
    smallest = np.full(len(p), np.inf)
    for i, j, k, l in ((0, 1, 2, 3), (0, 2, 1, 3), (0, 3, 1, 2), (1, 2, 0, 3), (1, 3, 0, 2), (2, 3, 0, 1)):
        e = p[:, j] - p[:, i]
        a, b = np.cross(e, p[:, k] - p[:, i]), np.cross(e, p[:, l] - p[:, i])
        cos = np.einsum("ij,ij->i", a, b) / (np.linalg.norm(a, axis=1) * np.linalg.norm(b, axis=1))
        smallest = np.minimum(smallest, np.degrees(np.arccos(np.clip(cos, -1.0, 1.0))))
    return smallest


def _fig_quality(build: _Build, path: Path) -> dict:
    """(f) Histograms of VTK's cell-quality measures and of the minimum dihedral angle."""
    plt = _mpl()
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
    _save(fig, path)
    return {"vtk_quality": stats}


def _fig_pools(build: _Build, path: Path) -> dict:
    """(g) Pool points by region in a long-axis slab and a short-axis slab."""
    plt = _mpl()
    b = build
    groups = []
    for name in ("cavity", "background", "myocardium", "endo", "epi", "base"):
        pool = b.pools.get(name) or {}
        if "points" not in pool:
            continue
        if name == "background" and "region" in pool:
            names = [str(n) for n in pool["region_names"]]
            for code in np.unique(pool["region"]):
                groups.append((f"background: {names[code]}", pool["points"][pool["region"] == code]))
        else:
            groups.append(("cavity pool" if name == "cavity" else name, pool["points"]))
    half_slab = 1.5
    mid_depth = 0.5 * b.cavity_depth
    fig, axes = plt.subplots(1, 2, figsize=(13, 6.6), gridspec_kw={"width_ratios": [1.0, 1.0]})
    handles = []
    for label, pts in groups:
        rel = pts - b.centre
        colour = REGION_COLOURS.get(label, "#777777")
        size = 2.0 if label.startswith("background") or label in ("myocardium", "cavity pool") else 3.0
        la = np.abs(rel @ b.e2) < half_slab
        h = axes[0].scatter(rel[la] @ b.e1, rel[la] @ b.axis, s=size, color=colour, linewidths=0, rasterized=True,
                            label=f"{label} ({len(pts):,})")
        sa = np.abs(rel @ b.axis + mid_depth) < half_slab
        axes[1].scatter(rel[sa] @ b.e1, b.toward_inferior * (rel[sa] @ b.e2), s=size, color=colour, linewidths=0,
                        rasterized=True)
        handles.append(h)
    axes[0].set_title(f"long-axis slab (|offset| < {half_slab:g} mm)")
    axes[0].set_xlabel(_x_label(b))
    axes[0].set_ylabel("mm along the long axis (0 at the base plane)")
    axes[1].set_title(f"short-axis slab {mid_depth:.0f} mm below the base (|offset| < {half_slab:g} mm)")
    axes[1].set_xlabel(_x_label(b))
    axes[1].set_ylabel("mm, toward the inferior insertion" if b.septal else "mm (second in-plane direction)")
    for ax in axes:
        ax.set_aspect("equal")
        ax.grid(alpha=0.25)
    fig.legend(handles=handles, loc="lower center", ncol=5, fontsize=8.5, markerscale=4, frameon=False,
               title="pool (points in the whole pool)")
    fig.suptitle("Sample-point pools by region")
    fig.subplots_adjust(left=0.07, right=0.98, top=0.89, bottom=0.24, wspace=0.2)
    _save(fig, path)
    return {}


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
    "helix_depth.png": "Wall pool points: helix angle measured back from the output vectors, "
                       "atan2(fiber.e_long, fiber.e_circ), folded into [-90, 90), against their transmural "
                       "depth; the red line is the prescribed law from the resolved parameters.",
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


def _table(header: list[str], rows: list[list], *, numeric_from: int = 1) -> str:
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


def _page(build: _Build, facts: dict, timings: dict, name: str) -> str:
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
            ["Cavity volume (mL)", s.get("cavity_volume_ml")],
            ["LV mass (g, 1.05 g/mL)", s.get("lv_mass_g")],
            ["Long-axis length, base plane to epicardial apex (mm)", s.get("long_axis_length_mm")],
            ["Mean wall thickness, epicardium to endocardium (mm)",
             None if seg is None or not len(seg["thickness_all"]) else float(np.mean(seg["thickness_all"]))],
            ["Slices", counts.get("slices")], ["Nodes", counts.get("nodes")],
            ["Tetrahedra", counts.get("tetrahedra")]]
    rows += [[f"Boundary faces: {k}", v] for k, v in (counts.get("faces") or {}).items()]
    rows += [[f"Pool points: {k}", v] for k, v in (counts.get("pools") or {}).items()]
    parts.append('<h2 id="summary">Summary</h2>' + _table(["quantity", "value"], rows))

    mq = s.get("mesh_quality") or {}
    vq = facts.get("vtk_quality") or {}
    qrows = [[k, v] for k, v in mq.items() if k not in ("tetrahedra", "nodes")]
    qrows += [[f"{'' if name.startswith(('dihedral', 'vtk')) else 'VTK '}{name}: min / median / max",
               f"{_num(st['min'])} / {_num(st['median'])} / {_num(st['max'])}"] for name, st in vq.items()]
    if "vtk_min_angle" in vq:
        qrows.append(["VTK min_angle above the exact minimum dihedral angle (fraction of cells)",
                      vq["vtk_min_angle"]["above_exact_fraction"]])
    parts.append("<h3>Mesh quality</h3>" + _table(["measure", "value"], qrows) +
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
                 _table(["contour", "points", "RMS (mm)", "max |d| (mm)", "mean signed d (mm)"],
                        [r if len(r) == 5 else [r[0], r[1], "", "", ""] for r in rrows]) +
                 '<p class="muted">Per slice from surfaces.vtp (signed distance d of each contour point to its '
                 "fitted surface, positive outside), slices from base to apex.</p>")
    shifts = s.get("slice_shifts_mm") or {}
    if shifts:
        parts.append("<h3>Slice shifts</h3>" + _table(
            ["slice", "in-plane breath-hold shift (mm, x y z)", "length (mm)"],
            [[f"slice {k}", " ".join(f"{c:+.2f}" for c in v), float(np.linalg.norm(v))] for k, v in shifts.items()]))

    keys = list(STAGES) + [k for k in timings if k not in STAGES]
    trows = [[k, timings[k] if k in timings else "measured after this page was written; see manifest.json"]
             for k in keys]
    parts.append("<h3>Stage timings</h3>" + _table(["stage", "seconds"], trows))

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
        parts.append(_table(["segment", "wall volume (mL)", "share of wall (%)", "mean thickness (mm)",
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
    hrows = [[r["ring"], r["n"], r["mean_abs_deg"], r["max_abs_deg"], r["geo_mean_abs_deg"], r["geo_p99_abs_deg"]]
             for r in facts.get("helix_rings", [])]
    parts.append('<h2 id="helix">Helix angle against the law</h2>' +
                 _table(["ring", "wall pool points", "mean |measured - law| (deg)", "max |measured - law| (deg)",
                         "geometric: mean |angle - law| (deg)", "geometric: 99th percentile (deg)"], hrows) +
                 '<p class="muted">Measured: atan2(fiber.e_long, fiber.e_circ) in degrees from the vectors of '
                 "pools/myocardium.npz, folded into [-90, 90); law: the resolved fibers parameters at the point's "
                 "transmural depth. Geometric: the same fiber against the circumferential direction of the long "
                 "axis (axis x offset from the axis, in the plane normal to e_rad); it tests the frame itself and "
                 "departs from the law near the apex, where the axis no longer gives a direction.</p>")

    # figures
    parts.append('<h2 id="figures">Figures</h2>')
    for name, title in FIGURES:
        parts.append(f'<figure><h3>{_e(title)}</h3><img src="{name}" alt="{_e(title)}">'
                     f"<figcaption>{_e(CAPTIONS[name])}</figcaption></figure>")

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
    parts.append('<h2 id="parameters">Resolved parameters</h2>' + _table(["parameter", "value"], prow))
    la = m.get("long_axis") or {}
    lm = m.get("landmarks") or {}
    geo = [[f"long_axis.{k}", json.dumps(v)] for k, v in la.items()] + [[f"landmarks.{k}", json.dumps(v)] for k, v in lm.items()]
    parts.append("<h3>Long axis and landmarks</h3>" + _table(["item", "value"], geo))

    # provenance
    inputs = [[Path(i.get("path", "?")).name, i.get("path", ""), i.get("sha256", "")] for i in m.get("inputs") or []]
    parts.append('<h2 id="provenance">Provenance</h2>' + "<h3>Inputs</h3>" +
                 _table(["input", "path at build time", "sha256"], inputs))
    versions = [["fibers", m.get("version", "")]] + [[k, v] for k, v in (m.get("versions") or {}).items()]
    versions += _report_versions()
    parts.append("<h3>Versions</h3>" + _table(["package", "version"], versions))
    conv = [[k, json.dumps(v) if not isinstance(v, str) else v] for k, v in (m.get("conventions") or {}).items()]
    parts.append("<h3>Conventions</h3>" + _table(["item", "meaning"], conv))
    parts.append(f'<p class="caution">{_e(CAUTION)}</p></body></html>\n')
    return "\n".join(parts)


def _report_versions() -> list[list[str]]:
    import matplotlib
    import pyvista

    return [["pyvista (report)", pyvista.__version__],
            ["vtk (report)", ".".join(str(v) for v in pyvista.vtk_version_info)],
            ["matplotlib (report)", matplotlib.__version__]]
