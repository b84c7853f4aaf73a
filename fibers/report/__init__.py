"""The build report: figures and one offline HTML page.

The report reads what it shows from the files of the output folder (``mesh.vtu``,
``surfaces.vtp``, ``pools/*.npz`` and the manifest), so ``fibers report DIR`` re-draws it from a
finished build alone. It writes ``report/index.html`` and, beside it, one PNG per figure; the
page links them by relative path and loads nothing from the network (inline CSS, no scripts).

One module per figure family: :mod:`.architecture` (fibers, coordinates, helix angle),
:mod:`.segments` (the bull's-eye), :mod:`.geometry` (contour fit, mesh quality, pools);
:mod:`.reading` loads the folder and computes the numbers, :mod:`.drawing` holds the shared
drawing helpers and :mod:`.page` writes the HTML.

This package is the one place outside :mod:`fibers.io` that writes files, and only below
``report/``. pyvista and matplotlib are imported inside the functions that draw, so importing
the package stays fast; 3-D views are rendered off screen by pyvista and framed by matplotlib,
which adds titles, axes and colour bars with units.
"""

from __future__ import annotations

import logging
import shutil
import uuid
from pathlib import Path

import numpy as np

from fibers.report.architecture import fig_coordinates, fig_fibers, fig_helix
from fibers.report.geometry import fig_contours, fig_pools, fig_quality
from fibers.report.page import page_html
from fibers.report.reading import Build, FIGURES, HELIX_CMAP, HELIX_RANGE, check_folder, has_display, load_build, read_manifest, read_pool_arrays
from fibers.report.segments import fig_bullseye

log = logging.getLogger("fibers")


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
        manifest = read_manifest(folder)
    build = load_build(folder, manifest)
    timings = dict(manifest.get("timings_s") or {})
    if result is not None and not timings:
        timings = dict(getattr(result, "timings", {}) or {})

    tmp = folder / f".report.partial-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        facts = _draw_all(build, tmp)
        page = page_html(build, facts, timings, name or folder.name)
        (tmp / "index.html").write_text(page, encoding="utf-8")
        target = place_report(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    log.debug("report: %s", target / "index.html")
    return target / "index.html"


def place_report(tmp: Path, folder: Path) -> Path:
    """Move a finished report folder into ``folder/report``, replacing an older one."""
    target = Path(folder) / "report"
    if target.exists():
        shutil.rmtree(target)
    tmp.rename(target)
    return target


def redraw(folder) -> Path:
    """Re-draw the report of a finished build (``fibers report DIR``).

    Raises
    ------
    InputError
        ``folder`` is missing or is not a fibers output folder.
    """
    folder = check_folder(folder)
    return write_report(folder, manifest=read_manifest(folder))


def view(folder) -> int:
    """Open a finished build in an interactive 3-D window (``fibers view DIR``).

    The wall is coloured by helix angle and the fibers of a subset of the wall pool are drawn as
    short glyphs. Without a display the files to open in a 3-D viewer (e.g. ParaView) are logged
    instead. Returns 0.
    """
    folder = check_folder(folder)
    files = [folder / "mesh.vtu", folder / "surfaces.vtp",
             *sorted((folder / "pools").glob("*.vtp")), folder / "report" / "index.html"]
    files = [f for f in files if f.exists()]
    if not has_display():
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
    wall = read_pool_arrays(folder, "myocardium", ("points", "fiber", "helix_angle"))
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




# ----------------------------------------------------------------------------- figures

def _draw_all(build: Build, out: Path) -> dict:
    import contextlib

    import pyvista as pv

    # VTK warns on stderr when it probes for an X display before falling back to off-screen
    # rendering; only its errors are of interest here
    quiet = getattr(pv, "vtk_verbosity", None)
    from fibers.report import biventricle

    facts = {}
    biv = biventricle.is_biv(build)
    # both ventricles: the helix against each region's own law replaces the left ventricle's
    helix = biventricle.fig_helix if biv else fig_helix
    steps = (fig_fibers, fig_coordinates, helix, fig_bullseye, fig_contours, fig_quality, fig_pools)
    with quiet("error") if quiet else contextlib.nullcontext():
        for (name, _), step in zip(FIGURES, steps):
            facts.update(step(build, out / name) or {})
        if biv:
            facts.update(biventricle.draw(build, out))
    return facts
