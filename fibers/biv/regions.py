"""Regional labels on both ventricles: AHA segments on the left, thirds of the right free wall.

- The 17 AHA segments (Cerqueira et al., Circulation 2002) cover the left ventricle, the septum
  included, as the standard says: the labels of :mod:`fibers.segments` on every cell except
  those of the right free wall (region 3), which get 0.
- The right free wall (region 3) is cut along the long axis into basal (1), mid (2) and apical
  (3) thirds of the right cavity's depth below the base plane; cells below the cavity's apical
  end count as apical. Every other cell gets 0.
"""

from __future__ import annotations

import numpy as np

from fibers import segments
from fibers.biv.mesh import RV_FREE_WALL, BiVMesh

RV_REGION_NAMES = {1: "rv basal", 2: "rv mid", 3: "rv apical"}


def aha_cells(mesh: BiVMesh, septum) -> np.ndarray:
    """AHA segment (M,) int8 per cell on the left ventricle and septum; 0 on the right free wall."""
    labels = segments.label_cells(mesh, septum)
    return np.where(mesh.region == RV_FREE_WALL, 0, labels).astype(np.int8)


def rv_thirds(points_world: np.ndarray, mesh: BiVMesh, in_free_wall: np.ndarray) -> np.ndarray:
    """Basal (1) / mid (2) / apical (3) third (K,) int8 of points of the right free wall, else 0.

    Parameters
    ----------
    points_world : ndarray (K, 3), mm
    mesh : BiVMesh
        Supplies the long axis and the right cavity's depth (``mesh.right.bottom``).
    in_free_wall : ndarray (K,) bool
    """
    depth = segments.depth_below_base(points_world, mesh.axis)
    length = -float(mesh.right.bottom)
    third = 1 + np.clip(np.floor(3.0 * depth / length), 0, 2).astype(np.int8)
    return np.where(in_free_wall, third, 0).astype(np.int8)


def rv_cells(mesh: BiVMesh) -> np.ndarray:
    """Right free-wall third (M,) int8 of each cell (0 outside the right free wall)."""
    return rv_thirds(mesh.cell_centroids, mesh, mesh.region == RV_FREE_WALL)
