"""Small frozen dataclasses that flow from one stage to the next.

Conventions (README): points are ``(N, 3)`` float64 in mm in the scanner's world
frame, tetrahedra ``(M, 4)`` int64, direction vectors unit length.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

# Boundary face tags, shared by the mesh, the FEM boundary conditions and every output file.
ENDO, EPI, BASE = 1, 2, 3
FACE_TAG_NAMES = {ENDO: "endo", EPI: "epi", BASE: "base"}

# The 17 segments by number (Cerqueira et al., Circulation 2002); 0 marks cells left unlabelled.
SEGMENT_NAMES = {
    0: "not labelled",
    1: "basal anterior", 2: "basal anteroseptal", 3: "basal inferoseptal", 4: "basal inferior",
    5: "basal inferolateral", 6: "basal anterolateral",
    7: "mid anterior", 8: "mid anteroseptal", 9: "mid inferoseptal", 10: "mid inferior",
    11: "mid inferolateral", 12: "mid anterolateral",
    13: "apical anterior", 14: "apical septal", 15: "apical inferior", 16: "apical lateral",
    17: "apex",
}


@dataclass(frozen=True)
class RawContours:
    """Contour points exactly as read, one row per point.

    Attributes
    ----------
    structure : ndarray (K,) of str
        ``"endo"`` or ``"epi"``.
    slice_id : ndarray (K,) int
    points : ndarray (K, 3), mm
    line : ndarray (K,) int
        Line number in the source file (1-based, header is line 1), for error messages.
    source : str
        File name the rows came from.
    slice_thickness : float, mm
        Thickness each slice stands for: 0 for contours (the base is the plane of the most
        basal slice), the slice spacing for a label map, whose voxels stand for their whole
        slab (the base is then the slab's upper face, half a slice above its centre).
    """

    structure: np.ndarray
    slice_id: np.ndarray
    points: np.ndarray
    line: np.ndarray
    source: str = "contours"
    slice_thickness: float = 0.0


@dataclass(frozen=True)
class SliceContours:
    """One short-axis slice after checking and alignment."""

    slice_id: int
    height: float            # mm along the long axis from the base plane (0) toward the apex (>0)
    epi: np.ndarray          # (n, 3) mm, closed contour, counter-clockwise about the axis
    endo: np.ndarray | None  # (m, 3) mm, or None on apical slices that show no cavity
    shift: np.ndarray        # (3,) mm, in-plane breath-hold correction added to this slice


@dataclass(frozen=True)
class LongAxis:
    """The left ventricle's long axis.

    ``base_centre`` is where the axis meets the base plane; ``direction`` is a unit vector from
    apex to base (the base plane's outward normal). ``reference`` is a unit vector normal to the
    axis that fixes the zero of angles around it before landmarks are known.
    """

    base_centre: np.ndarray
    direction: np.ndarray
    reference: np.ndarray

    def frame(self) -> np.ndarray:
        """Rows e1, e2, e3 of a right-handed frame with e3 = ``direction`` (apex to base)."""
        e3 = self.direction
        e1 = self.reference
        return np.stack([e1, np.cross(e3, e1), e3])

    def to_local(self, points: np.ndarray) -> np.ndarray:
        """World points (N, 3) mm to axis-frame coordinates (x1, x2, z); z > 0 above the base."""
        # einsum: much faster than a (N, 3) @ (3, 3) matmul for large N
        return np.einsum("...j,ij->...i", np.asarray(points, float) - self.base_centre, self.frame())

    def to_world(self, local: np.ndarray) -> np.ndarray:
        return np.einsum("...j,ji->...i", np.asarray(local, float), self.frame()) + self.base_centre


@dataclass(frozen=True)
class Stack:
    """A checked short-axis stack, slices ordered from base to apex."""

    slices: tuple[SliceContours, ...]
    axis: LongAxis
    source: str = "contours"
    warnings: tuple[str, ...] = ()


@dataclass(frozen=True)
class WallMesh:
    """Tetrahedral mesh of the left-ventricular wall.

    Attributes
    ----------
    points : ndarray (N, 3) float64, mm
    tets : ndarray (M, 4) int64, positively oriented (positive signed volume)
    faces : ndarray (F, 3) int64
        Boundary triangles, ordered so their right-hand normal points out of the wall.
    face_tags : ndarray (F,) int
        ``ENDO``, ``EPI`` or ``BASE``.
    axis : LongAxis
    endo_apex, epi_apex : ndarray (3,), mm
        Apical poles of the fitted endocardial and epicardial surfaces: the apical end of the
        cavity and the apex of the wall.
    quality : dict
        Mesh-quality statistics (name -> value).
    boundary_nodes : ndarray (P,) int, optional
        For a mesh filled in a `fibers.mesh.Boundary`: the row in ``points`` of each of the
        boundary's nodes (gmsh renumbers them). None otherwise (a mesh read from files, say).
    face_owners : ndarray (F,) int, optional
        The element owning each face, when the mesh stage found it with the faces (else
        `fibers.pools.face_owners` searches for it).
    """

    points: np.ndarray
    tets: np.ndarray
    faces: np.ndarray
    face_tags: np.ndarray
    axis: LongAxis
    endo_apex: np.ndarray
    epi_apex: np.ndarray
    quality: dict = field(default_factory=dict)
    boundary_nodes: np.ndarray | None = None
    face_owners: np.ndarray | None = None

    @cached_property
    def cell_volumes(self) -> np.ndarray:
        """Volumes (M,) mm^3 of the tetrahedra (signed; positive for a valid mesh), computed once
        for the stages that weight by them (pools, segments.csv, the summary)."""
        from fibers.meshtools import signed_volumes

        return signed_volumes(self.points, self.tets)

    @cached_property
    def cell_centroids(self) -> np.ndarray:
        """Centroids (M, 3) mm of the tetrahedra, computed once (segments, frames, fibers)."""
        from fibers.meshtools import corner_mean
        from fibers.vectors import columns, rows

        # over contiguous components, not an (M, 4, 3) gather: a quarter of the time at 547k
        return rows(corner_mean(columns(self.points), np.ascontiguousarray(np.asarray(self.tets, np.intp).T)))

    def face_nodes(self, tag: int) -> np.ndarray:
        """Sorted unique node indices on the boundary faces with this tag."""
        return np.unique(self.faces[self.face_tags == tag])
