"""A finished build on an image grid: labels and fields as voxel volumes.

Each voxel takes the value at its centre (`fibers.evaluate.FieldEvaluator.at`): ``labels`` is 2
where the centre lies in the wall (in a tetrahedron), 1 where it lies in the cavity (inside the
endocardium and below the base plane, the ray-parity test of the pools) and 0 elsewhere;
``aha_segment`` (0 outside the wall), ``transmural`` and ``apicobasal`` (0 outside the wall) and
``fiber``, the unit fiber direction as a 4-D image (x, y, z, 3) whose three components are in
world axes (the mm frame of the mesh points, the frame the image affine maps voxels into), not in
voxel axes; zero outside the wall.

Sampling at voxel centres counts a voxel as wall when its centre is: an unbiased estimate of the
wall volume whose error shrinks with the voxel size relative to the wall's curvature.

Grids: the grid of a given image (its shape and affine), or a grid of cubic voxels of a given
spacing on an oriented box (the build's background box by default). Only the block of voxels
around the wall is evaluated, in chunks, so a large image costs what the wall covers.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np

from fibers.config import Box
from fibers.errors import InputError

log = logging.getLogger(__name__)

BACKGROUND, CAVITY, WALL = 0, 1, 2
LABEL_NAMES = {BACKGROUND: "background", CAVITY: "cavity", WALL: "wall"}
_CHUNK = 1_000_000  # voxels evaluated at once (bounds the temporaries to a few hundred MB)
MAX_VOXELS = 200_000_000


@dataclass(frozen=True)
class Grid:
    """A voxel grid: ``shape`` (3,) and the 4x4 ``affine`` from voxel indices to world mm."""

    shape: tuple[int, int, int]
    affine: np.ndarray

    @property
    def spacing(self) -> np.ndarray:
        """Voxel edge lengths (3,), mm."""
        return np.linalg.norm(self.affine[:3, :3], axis=0)

    @property
    def voxel_volume(self) -> float:
        """mm^3."""
        return float(abs(np.linalg.det(self.affine[:3, :3])))

    def world(self, ijk: np.ndarray) -> np.ndarray:
        """World points (K, 3) mm of voxel indices (K, 3)."""
        return ijk @ self.affine[:3, :3].T + self.affine[:3, 3]

    def index(self, points: np.ndarray) -> np.ndarray:
        """Continuous voxel indices (K, 3) of world points (K, 3) mm."""
        return (np.asarray(points, float) - self.affine[:3, 3]) @ np.linalg.inv(self.affine[:3, :3]).T


def grid_like(shape, affine) -> Grid:
    """The grid of an image: its first three dimensions and its affine."""
    shape = tuple(int(s) for s in tuple(shape)[:3])
    affine = np.asarray(affine, float)
    if len(shape) != 3 or min(shape) < 1 or affine.shape != (4, 4) or abs(np.linalg.det(affine[:3, :3])) < 1e-12:
        raise InputError(f"the image grid (shape {shape}) has no usable 3-D affine: give a 3-D or 4-D NIfTI image")
    return Grid(shape, affine)


def grid_on_box(box: Box, spacing: float) -> Grid:
    """Cubic voxels of ``spacing`` mm filling an oriented box (its edges as the voxel axes).

    The box is covered by whole voxels (its far faces may move out by less than a voxel).
    """
    if not np.isfinite(spacing) or spacing <= 0:
        raise InputError(f"--spacing {spacing!r}: give a voxel size in mm greater than 0")
    lengths = np.linalg.norm(box.edges, axis=1)
    shape = np.maximum(np.ceil(lengths / spacing - 1e-9).astype(np.int64), 1)
    if np.prod(shape.astype(float)) > MAX_VOXELS:
        raise InputError(f"--spacing {spacing:g} mm gives {int(np.prod(shape.astype(float))):,} voxels "
                         f"(limit {MAX_VOXELS:,}): choose a larger spacing")
    axes = box.edges / lengths[:, None]
    affine = np.eye(4)
    affine[:3, :3] = axes.T * spacing
    affine[:3, 3] = box.corner + 0.5 * spacing * axes.sum(axis=0)
    return Grid(tuple(int(s) for s in shape), affine)


def voxelize(evaluator, grid: Grid) -> dict[str, np.ndarray]:
    """Labels and fields of a build on a grid.

    Parameters
    ----------
    evaluator : fibers.evaluate.FieldEvaluator
    grid : Grid

    Returns
    -------
    dict of str to ndarray
        ``labels`` (X, Y, Z) uint8, ``aha_segment`` (X, Y, Z) uint8, ``transmural`` and
        ``apicobasal`` (X, Y, Z) float32, ``fiber`` (X, Y, Z, 3) float32, world axes.
    """
    from fibers.pools import EnclosedTest

    mesh = evaluator.mesh
    lo, hi = _block(grid, mesh.points)
    out = {"labels": np.zeros(grid.shape, np.uint8), "aha_segment": np.zeros(grid.shape, np.uint8),
           "transmural": np.zeros(grid.shape, np.float32), "apicobasal": np.zeros(grid.shape, np.float32),
           "fiber": np.zeros(grid.shape + (3,), np.float32)}
    if np.any(hi <= lo):
        log.warning("the wall lies outside the grid: every volume is empty")
        return out
    cavity = EnclosedTest(mesh)
    block = hi - lo
    n = int(np.prod(block))
    log.debug("voxelize: %d voxels around the wall of %d", n, int(np.prod(grid.shape)))
    for start in range(0, n, _CHUNK):
        flat = np.arange(start, min(start + _CHUNK, n))
        ijk = np.stack(np.unravel_index(flat, tuple(block)), axis=1) + lo
        centres = grid.world(ijk.astype(float))
        f = evaluator.at(centres)
        wall = f["inside"]
        label = np.where(wall, WALL, np.where(cavity(centres), CAVITY, BACKGROUND)).astype(np.uint8)
        i, j, k = ijk.T
        out["labels"][i, j, k] = label
        out["aha_segment"][i, j, k] = f["aha_segment"].astype(np.uint8)
        for name in ("transmural", "apicobasal"):
            out[name][i, j, k] = np.where(wall, f[name], 0.0)
        out["fiber"][i, j, k] = f["fiber"]
    return out


def _block(grid: Grid, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Index range [lo, hi) (3,) of the voxels whose centres can fall in the mesh's bounding box."""
    idx = grid.index(points)
    lo = np.clip(np.floor(idx.min(axis=0)).astype(np.int64), 0, grid.shape)
    hi = np.clip(np.ceil(idx.max(axis=0)).astype(np.int64) + 1, 0, grid.shape)
    return lo, hi


def wall_volume_ml(labels: np.ndarray, grid: Grid) -> float:
    """Volume (mL) of the voxels labelled wall."""
    return float(np.count_nonzero(labels == WALL)) * grid.voxel_volume / 1000.0


def voxelize_build(build_dir, out, *, like=None, spacing: float | None = None) -> dict:
    """``fibers voxelize``: NIfTI volumes of a finished build, written to the folder ``out``.

    Parameters
    ----------
    build_dir : str or Path
    out : str or Path
        Output folder (written beside, then renamed).
    like : str or Path, optional
        A NIfTI image whose grid (shape, affine) the volumes take.
    spacing : float, mm, optional
        Cubic voxels of this size on the build's background box instead.
        With neither, a build made from a label map takes that label map's grid; a contour
        build needs one of the two.

    Returns
    -------
    dict
        The manifest written (grid, source of the grid, wall volume of the labels and of the mesh).
    """
    import time
    from pathlib import Path

    import fibers
    from fibers import evaluate, meshtools
    from fibers.io.build import input_image
    from fibers.io.outputs import write_manifest
    from fibers.io.volumes import DESCRIPTIONS, read_grid, write_volumes
    from fibers.io import folder

    if like is not None and spacing is not None:
        raise InputError("give either --like IMAGE or --spacing MM, not both")
    t0 = time.perf_counter()
    evaluator = evaluate.open(build_dir)
    if like is None and spacing is None:
        like = input_image(build_dir, evaluator.manifest)
        if like is None:
            raise InputError(f"{build_dir} was not built from a label map (or its label map has moved): "
                             "give --like IMAGE.nii.gz or --spacing MM")
        source = f"the build's input label map {like}"
    else:
        source = f"--like {like}" if like is not None else f"--spacing {spacing:g} mm on the build's box"
    if like is not None:
        grid = grid_like(*read_grid(like))
    else:
        if evaluator.box is None:
            raise InputError(f"{build_dir}/manifest.json has no background_box: give --like IMAGE.nii.gz")
        grid = grid_on_box(evaluator.box, float(spacing))
    volumes = voxelize(evaluator, grid)
    mesh_ml = float(meshtools.signed_volumes(evaluator.mesh.points, evaluator.mesh.tets).sum()) / 1000.0
    labels_ml = wall_volume_ml(volumes["labels"], grid)
    with folder.staged(out, inputs=(Path(build_dir) / "mesh.vtu",)) as tmp:
        files = write_volumes(tmp, volumes, grid.affine)
        manifest = {"tool": "fibers", "version": fibers.__version__, "caution": evaluate.CAUTION,
                    "command": "voxelize", "build": str(Path(build_dir).resolve()), "grid_source": source,
                    "shape": list(grid.shape), "affine": grid.affine.round(6).tolist(),
                    "spacing_mm": grid.spacing.round(6).tolist(),
                    "labels": {str(k): v for k, v in LABEL_NAMES.items()},
                    "volumes": {p.name: DESCRIPTIONS.get(p.name.split(".")[0], "") for p in files},
                    "fiber_components": "world axes x, y, z (the frame of the mesh points), not voxel axes",
                    "wall_volume_ml": {"labels": round(labels_ml, 3), "mesh": round(mesh_ml, 3)},
                    "timings_s": {"total": round(time.perf_counter() - t0, 4)}}
        manifest["files"] = folder.listing(tmp)
        write_manifest(tmp, manifest)
    log.info("%-13s %s grid, wall %.2f mL in the labels, %.2f mL in the mesh", "voxelize",
             "x".join(map(str, grid.shape)), labels_ml, mesh_ml)
    return manifest
