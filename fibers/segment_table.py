"""The per-segment table of a build (``segments.csv``): volume, wall thickness, helix angles.

One row per AHA segment 1-17 (Cerqueira et al., Circulation 2002) and a row 0 for the whole
wall. Per segment:

- ``volume_ml``: the volume of the tetrahedra labelled with the segment (their centroid's label).
- ``thickness_mean_mm``, ``thickness_min_mm``: wall thickness sampled at every node of the
  endocardial surface (its exact distance to the epicardial surface) and of the epicardial
  surface (to the endocardial surface), each sample labelled by the segment at its node: the
  ``wall_thickness`` field of the mesh files at those nodes (:func:`surface_thickness`). Both
  surfaces are sampled so that the apex (segment 17, which has no endocardium) has a thickness
  too; the mean weights each sample by its node's share of the surface area. The distance is
  to the faces, chords of the smooth surface: it overestimates the surface-to-surface
  distance by at most the sagitta h^2 / (8 r) (h the edge length, r the surface's radius of
  curvature), some 0.01 mm at 1.5 mm elements.
- ``helix_endo_deg``, ``helix_epi_deg``: the area-weighted mean helix angle of the nodes on
  the endocardium and on the epicardium in the segment.

Segments without samples (all of them when the build had no landmarks, whose labels are 0) have
empty cells.
"""

from __future__ import annotations

import numpy as np

from fibers import meshtools, segments
from fibers.types import ENDO, EPI, WallMesh

COLUMNS = ("segment", "name", "volume_ml", "thickness_mean_mm", "thickness_min_mm",
           "helix_endo_deg", "helix_epi_deg")
N_SEGMENTS = 17


def face_node_areas(points: np.ndarray, faces: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nodes (K,) of triangles (F, 3) and their share (K,) mm^2 of the area (a third of each)."""
    _, areas = meshtools.triangle_normals(points, faces)
    share = np.bincount(faces.ravel(), weights=np.repeat(areas / 3.0, 3), minlength=len(points))
    nodes = np.unique(faces)
    return nodes, share[nodes]


def surface_thickness(points: np.ndarray, inner: np.ndarray, outer: np.ndarray) -> tuple:
    """Wall thickness sampled on two facing surfaces: each node's exact distance to the other.

    The one measure of wall thickness of fibers (segments.csv, the report's bull's-eye and the
    cohort table): the point-to-triangle distance of :mod:`fibers.surface_distance`.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    inner, outer : ndarray (F, 3) int
        The triangles of the inner (endocardial) and outer (epicardial) surface.

    Returns
    -------
    inner_nodes, outer_nodes : ndarray (K1,), (K2,) int
    inner_area, outer_area : ndarray (K1,), (K2,)
        The nodes' shares of their surface's area, mm^2.
    thickness : ndarray (K1 + K2,), mm
        The inner nodes' distances to the outer surface, then the outer nodes' to the inner one.
    """
    from fibers.surface_distance import distance_to_surface

    inner_nodes, inner_area = face_node_areas(points, inner)
    outer_nodes, outer_area = face_node_areas(points, outer)
    thickness = np.concatenate([distance_to_surface(points[inner_nodes], points, outer),
                                distance_to_surface(points[outer_nodes], points, inner)])
    return inner_nodes, outer_nodes, inner_area, outer_area, thickness


def _per_segment(labels, values, weights):
    """Weighted mean and minimum (18,) of values per label 0..17, row 0 over all; NaN where empty."""
    n = N_SEGMENTS + 1
    w = np.bincount(labels, weights=weights, minlength=n)[:n]
    s = np.bincount(labels, weights=weights * values, minlength=n)[:n]
    mins = np.full(n, np.inf)
    np.minimum.at(mins, labels, values)
    if len(values):
        w[0], s[0], mins[0] = weights.sum(), (weights * values).sum(), values.min()
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(w > 0, s / np.where(w > 0, w, 1.0), np.nan)
    return mean, np.where(np.isfinite(mins), mins, np.nan)


def segment_table(mesh: WallMesh, helix_angle: np.ndarray, cell_labels: np.ndarray, septum, *,
                  wall_thickness: np.ndarray | None = None) -> list[dict]:
    """Rows of ``segments.csv``.

    Parameters
    ----------
    mesh : WallMesh
    helix_angle : ndarray (N,), degrees
        Nodal helix angle.
    cell_labels : ndarray (M,) int
        AHA segment of each tetrahedron (0 = not labelled).
    septum : fibers.segments.Septum or None
        Labels the surface nodes; None leaves them 0.
    wall_thickness : ndarray (N,), mm, optional
        The coordinates' nodal ``wall_thickness``, which is this very distance on the two
        surfaces: read there instead of measured again.

    Returns
    -------
    list of dict
        Keys `COLUMNS`; row 0 the whole wall, then segments 1-17. Floats are NaN where a segment
        has no sample.
    """
    inner, outer = mesh.faces[mesh.face_tags == ENDO], mesh.faces[mesh.face_tags == EPI]
    if wall_thickness is None:
        samples = surface_thickness(mesh.points, inner, outer)
    else:
        (endo, endo_w), (epi, epi_w) = face_node_areas(mesh.points, inner), face_node_areas(mesh.points, outer)
        samples = (endo, epi, endo_w, epi_w, np.asarray(wall_thickness, float)[np.concatenate([endo, epi])])
    sampled = np.concatenate(samples[:2])
    node_labels = segments.label_points(mesh.points[sampled], mesh, septum)
    names = {0: "whole wall", **segments.SEGMENT_NAMES}
    return _rows([(s, names[s]) for s in range(N_SEGMENTS + 1)], np.abs(mesh.cell_volumes), cell_labels,
                 samples, node_labels, helix_angle)


def _rows(keys: list, volumes: np.ndarray, cell_labels: np.ndarray, samples: tuple, node_labels: np.ndarray,
          helix_angle: np.ndarray) -> list[dict]:
    """Rows (`COLUMNS`) for regions 0..len(keys)-1 of a label; region 0 is all the cells given.

    ``samples`` is the output of `surface_thickness`; ``node_labels`` the region of each
    sampled node (inner nodes first).
    """
    n = N_SEGMENTS + 1
    labels = np.asarray(cell_labels, np.int64)
    volume = np.bincount(labels, weights=volumes, minlength=n)[:n] / 1000.0
    volume[0] = volumes.sum() / 1000.0
    inner, outer, inner_w, outer_w, thick = samples
    node_labels = np.asarray(node_labels, np.int64)
    t_mean, t_min = _per_segment(node_labels, thick, np.concatenate([inner_w, outer_w]))
    k = len(inner)
    h_endo, _ = _per_segment(node_labels[:k], helix_angle[inner], inner_w)
    h_epi, _ = _per_segment(node_labels[k:], helix_angle[outer], outer_w)
    return [{"segment": key, "name": name, "volume_ml": float(volume[i]),
             "thickness_mean_mm": float(t_mean[i]), "thickness_min_mm": float(t_min[i]),
             "helix_endo_deg": float(h_endo[i]), "helix_epi_deg": float(h_epi[i])}
            for i, (key, name) in enumerate(keys)]


# -- both ventricles: the right free wall's thirds ------------------------------------------------
#: Row ids and names of the right free wall in ``segments.csv`` (both ventricles only).
RV_SEGMENT_NAMES = {"rv": "rv free wall", "rv1": "rv free wall basal", "rv2": "rv free wall mid",
                    "rv3": "rv free wall apical"}


def rv_free_wall_rows(points: np.ndarray, cell_volumes: np.ndarray, helix_angle: np.ndarray, cell_thirds: np.ndarray,
                      node_thirds: np.ndarray, endo_faces: np.ndarray, epi_faces: np.ndarray) -> list[dict]:
    """Rows ``rv``, ``rv1``-``rv3`` of ``segments.csv``: the right free wall and its thirds.

    The same columns as the AHA rows (`COLUMNS`), measured the same way on the right free
    wall's own surfaces: thickness from each node of its endocardium (the free-wall sheet of the
    right endocardium) to its epicardium and back (`surface_thickness`), area-weighted; helix
    angles area-weighted over the nodes of each surface.

    Parameters
    ----------
    points : ndarray (N, 3), mm
    cell_volumes : ndarray (M,), mm^3
        Volumes of the mesh's tetrahedra (``WallMesh.cell_volumes``).
    helix_angle : ndarray (N,), degrees
    cell_thirds : ndarray (M,) int
        1 basal, 2 mid, 3 apical third of the right free wall, 0 elsewhere.
    node_thirds : ndarray (N,) int
        The third of each node by its depth below the base.
    endo_faces, epi_faces : ndarray (F, 3) int
        The right free wall's endocardial and epicardial triangles.

    Returns
    -------
    list of dict
        ``rv`` (the whole free wall) then ``rv1``-``rv3``.
    """
    thirds = np.asarray(cell_thirds, np.int64)
    free = thirds > 0
    samples = surface_thickness(points, endo_faces, epi_faces)
    node_labels = np.asarray(node_thirds, np.int64)[np.concatenate(samples[:2])]
    return _rows(list(RV_SEGMENT_NAMES.items()), np.abs(np.asarray(cell_volumes)[free]), thirds[free], samples,
                 node_labels, helix_angle)
