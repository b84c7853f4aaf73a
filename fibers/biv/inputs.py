"""Right-ventricular contours: split off the left ones and choose the route (lv or biv)."""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from fibers.errors import InputError
from fibers.types import RawContours

RV_STRUCTURES = ("rv_endo", "rv_epi")


@dataclass(frozen=True)
class RightContours:
    """Right-ventricular contour rows exactly as read (``rv_endo`` and optionally ``rv_epi``).

    Attributes
    ----------
    structure, slice_id, line : ndarray (K,)
    points : ndarray (K, 3), mm, world frame
    source : str
    """

    structure: np.ndarray
    slice_id: np.ndarray
    points: np.ndarray
    line: np.ndarray
    source: str = "contours"

    @property
    def has_outer(self) -> bool:
        return bool(np.any(self.structure == "rv_epi"))

    def rows(self, structure: str, slice_id: int) -> tuple[np.ndarray, np.ndarray]:
        """Points (n, 3) and line numbers (n,) of one contour, closing duplicate removed."""
        keep = (self.structure == structure) & (self.slice_id == slice_id)
        pts, lines = self.points[keep], self.line[keep]
        if len(pts) > 1 and np.allclose(pts[0], pts[-1]):
            pts, lines = pts[:-1], lines[:-1]
        return pts, lines


def split_contours(contours: RawContours) -> tuple[RawContours, RightContours | None]:
    """The left-ventricular rows (``endo``, ``epi``) and the right-ventricular ones, if any.

    Without right-ventricular rows the input comes back as it is (the same object).
    """
    rv = np.isin(contours.structure, RV_STRUCTURES)
    if not rv.any():
        return contours, None
    lv = RawContours(structure=contours.structure[~rv], slice_id=contours.slice_id[~rv],
                     points=contours.points[~rv], line=contours.line[~rv], source=contours.source,
                     slice_thickness=contours.slice_thickness)
    right = RightContours(structure=contours.structure[rv], slice_id=contours.slice_id[rv],
                          points=contours.points[rv], line=contours.line[rv], source=contours.source)
    return lv, right


def choose_route(ventricles: str | None, right: RightContours | None) -> str:
    """``"lv"`` or ``"biv"``: the case file's choice, else ``"biv"`` when RV contours are given.

    Raises
    ------
    InputError
        ``ventricles = "biv"`` without right-ventricular contours, or ``rv_epi`` without
        ``rv_endo``.
    """
    if right is not None and not np.any(right.structure == "rv_endo"):
        k = int(np.argmax(right.structure == "rv_epi"))
        raise InputError(f"{right.source}, line {right.line[k]}: rv_epi contours without any rv_endo; "
                         f"give the right-ventricular cavity (rv_endo) on each slice that shows it")
    if ventricles == "biv" and right is None:
        raise InputError("[geometry] ventricles = \"biv\" but the contours have no rv_endo rows; add the "
                         "right-ventricular cavity contours or set ventricles = \"lv\"")
    if ventricles == "lv" and right is not None:
        warnings.warn("[geometry] ventricles = \"lv\": the right-ventricular contours are ignored")
        return "lv"
    return "biv" if right is not None else "lv"
