"""Drawing helpers shared by the figure families: matplotlib set-up, off-screen 3-D scenes, framing."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from fibers.report.reading import Build, INK, unit_vector


# ----------------------------------------------------------------------------- drawing helpers

def pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 10, "axes.titlesize": 11, "axes.titleweight": "bold",
                         "figure.titlesize": 13, "figure.titleweight": "bold",
                         "axes.edgecolor": INK, "axes.labelcolor": INK, "text.color": INK,
                         "xtick.color": INK, "ytick.color": INK, "savefig.facecolor": "white"})
    return plt


def save_figure(fig, path: Path) -> None:
    fig.savefig(path, dpi=100)
    import matplotlib.pyplot as plt

    plt.close(fig)


class Scene:
    """An off-screen pyvista plotter framed around the ventricle, base up."""

    def __init__(self, build: Build, size=(900, 900), *, view=None, elevation=15.0, zoom=1.0, trim=True):
        import pyvista as pv

        pv.OFF_SCREEN = True
        self.pv = pv
        self.build = build
        self.plotter = pv.Plotter(off_screen=True, window_size=list(size))
        self.plotter.set_background("white")
        self.view = unit_vector(build.e1 if view is None else view)
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


def trim_common(images: list, pad: int = 8) -> list:
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


def colourbar(fig, ax, cmap, vmin, vmax, label, **kw):
    import matplotlib as mpl

    sm = mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(vmin, vmax), cmap=cmap)
    cb = fig.colorbar(sm, ax=ax, shrink=kw.pop("shrink", 0.8), pad=kw.pop("pad", 0.02), **kw)
    cb.set_label(label)
    return cb


def show_image(ax, img, title):
    ax.imshow(img)
    ax.set_axis_off()
    ax.set_title(title)


def line_glyphs(pv, points, vectors, length):
    """Line segments of ``length`` mm centred on points along vectors, as PolyData."""
    a = points - 0.5 * length * vectors
    b = points + 0.5 * length * vectors
    pts = np.empty((2 * len(points), 3))
    pts[0::2], pts[1::2] = a, b
    idx = np.arange(2 * len(points)).reshape(-1, 2)
    return pv.PolyData(pts, lines=np.column_stack([np.full(len(points), 2), idx]).ravel())


def in_plane_xy(build: Build, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Coordinates (mm) in the long-axis plane spanned by e1 (x) and the axis (y, 0 at the base)."""
    rel = points - build.centre
    return rel @ build.e1, rel @ build.axis


def long_axis_cut(build: Build):
    """The mesh cut by the long-axis plane through e1, triangulated."""
    cut = build.mesh.slice(normal=tuple(build.e2), origin=tuple(build.centre))
    return cut.triangulate()


def x_label(build: Build) -> str:
    return ("mm from the long axis, toward the septal bisector" if build.septal
            else "mm from the long axis (in-plane direction)")
