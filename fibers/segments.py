"""The 17 AHA segments (Cerqueira et al., Circulation 2002) on the wall mesh.

Convention (README, "Conventions"):

- Rings by the long-axis depth ``h`` below the base plane, with ``L`` the depth of the cavity's
  apical end (``mesh.endo_apex``): ``h < L/3`` basal (1-6), ``L/3 <= h < 2L/3`` mid (7-12),
  ``2L/3 <= h < L`` apical (13-16), ``h >= L`` segment 17. Points a hair above the base plane
  count as basal.
- Around the axis, the segment angle is measured from the septal bisector (the middle of the
  shorter arc between the two right-ventricular insertion points) right-handedly about the
  long axis (apex to base): clockwise as seen from the apex, the sense in which
  ``circumferential`` and ``e_circ`` of :mod:`fibers.coordinates` increase, so the segment
  angle *is* the circumferential coordinate when landmarks are given. In the usual anatomy
  this is toward the anterior insertion; the sector table below is written with the angle
  ``a`` positive toward the anterior insertion (mirrored landmarks mirror it, with a warning).
- ``sectors = "fixed"`` (default): basal and mid rings have six 60-degree sectors with the
  2|3 (8|9) boundary on the bisector, 2 anteroseptal [0, 60), 1 anterior [60, 120),
  6 anterolateral [120, 180), 5 inferolateral [-180, -120), 4 inferior [-120, -60),
  3 inferoseptal [-60, 0); mid numbers add 6. Apical ring: 14 septal [-45, 45), 13 anterior
  [45, 135), 16 lateral [135, -135), 15 inferior [-135, -45).
- ``sectors = "insertions"``: the septal sectors end at the insertion points. The septal arc
  [-h, h] (h half the arc) holds 2|3 (split at the bisector) and the other four sectors share
  the rest equally; in the apical ring 14 is the septal arc and 13, 16, 15 share the rest.
  With a 120-degree arc both rules give the same labels.

Landmark checks (``locate_septum``): each insertion point must lie within
``max_surface_distance`` (15 mm) of the epicardial surface and no deeper than
``max_depth_fraction`` (one half) of the cavity length below the base plane. The half, rather
than a third, admits landmarks picked on the upper mid slice, where the insertions are often
clearest; deeper than that the point no longer marks the basal septum. The septal arc must lie
in [``min_arc``, ``max_arc``] = [60, 175] degrees: the shorter arc is never above 180 degrees,
and near 180 degrees its side (and so the bisector) flips with a millimetre of landmark noise.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from fibers.config import Landmarks
from fibers.errors import InputError
from fibers.types import EPI, LongAxis, WallMesh
from fibers.types import SEGMENT_NAMES as TYPE_SEGMENT_NAMES
from fibers.vectors import cross

SEGMENT_NAMES = {k: v for k, v in TYPE_SEGMENT_NAMES.items() if k}  # 1-17


@dataclass(frozen=True)
class Septum:
    """Where the septum lies around the long axis.

    Attributes
    ----------
    bisector : ndarray (3,)
        Unit vector normal to the long axis, from the axis to the middle of the septal arc.
    toward_inferior : ndarray (3,)
        Unit vector normal to the axis and to ``bisector``; angles from the bisector are positive
        toward it, i.e. toward the inferior insertion.
    half_angle : float, degrees
        Half of the septal arc.
    anterior, inferior : ndarray (3,), mm
        The right-ventricular insertion points as given.
    anterior_sign : float
        +1 when the anterior insertion lies at a positive segment angle (the usual anatomy),
        -1 for mirrored landmarks.
    sectors : {"fixed", "insertions"}
        How the sectors are laid out around the axis (module docstring).
    """

    bisector: np.ndarray
    toward_inferior: np.ndarray
    half_angle: float
    anterior: np.ndarray
    inferior: np.ndarray
    anterior_sign: float = 1.0
    sectors: str = "fixed"


def _in_plane(vectors: np.ndarray, direction: np.ndarray) -> np.ndarray:
    """Components (K, 3) of vectors normal to the unit ``direction``."""
    return vectors - np.outer(vectors @ direction, direction)


def depth_below_base(points: np.ndarray, axis: LongAxis) -> np.ndarray:
    """Long-axis depth (K,) mm of points below the base plane (positive toward the apex)."""
    return (axis.base_centre - np.asarray(points, float).reshape(-1, 3)) @ axis.direction


def _point_triangle_distance(p: np.ndarray, tri: np.ndarray) -> np.ndarray:
    """Distances (F,) mm from one point (3,) to triangles (F, 3, 3)."""
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    n = cross(b - a, c - a)
    n /= np.maximum(np.linalg.norm(n, axis=1), 1e-300)[:, None]
    off = np.einsum("ij,ij->i", p - a, n)
    q = p - off[:, None] * n
    # The foot of the perpendicular is inside iff it is on the inner side of all three edges.
    inside = np.ones(len(tri), bool)
    for u, v in ((a, b), (b, c), (c, a)):
        inside &= np.einsum("ij,ij->i", cross(v - u, q - u), n) >= 0
    edge = np.full(len(tri), np.inf)
    for u, v in ((a, b), (b, c), (c, a)):
        e = v - u
        t = np.clip(np.einsum("ij,ij->i", p - u, e) / np.maximum(np.einsum("ij,ij->i", e, e), 1e-300), 0, 1)
        edge = np.minimum(edge, np.linalg.norm(p - (u + t[:, None] * e), axis=1))
    return np.where(inside, np.abs(off), edge)


def locate_septum(mesh: WallMesh, landmarks: Landmarks | None, *, max_surface_distance: float = 15.0,
                  max_depth_fraction: float = 0.5, min_arc: float = 60.0,
                  max_arc: float = 175.0, sectors: str = "fixed") -> Septum | None:
    """The septal arc from the two right-ventricular insertion points.

    Parameters
    ----------
    mesh : WallMesh
    landmarks : Landmarks or None
        ``rv_insertion_anterior`` and ``rv_insertion_inferior``, ndarray (3,), mm, world frame.
    max_surface_distance : float, mm
        Refuse a landmark farther than this from the epicardial surface.
    max_depth_fraction : float
        Refuse a landmark deeper below the base plane than this fraction of the cavity length.
    min_arc, max_arc : float, degrees
        Refuse a septal arc (the shorter arc between the projected points) outside this range.
    sectors : {"fixed", "insertions"}
        Sector layout (module docstring).

    Returns
    -------
    Septum or None
        None when the landmarks are missing (the labels are then 0; the caller warns).

    Raises
    ------
    InputError
        A landmark is off the basal epicardium, or the arc is implausible.
    """
    if sectors not in ("fixed", "insertions"):
        raise InputError(f"[segments] septal_sectors = {sectors!r}: must be 'fixed' or 'insertions'")
    if landmarks is None or not landmarks.present:
        return None
    axis = mesh.axis
    d = axis.direction
    cavity_length = float(depth_below_base(mesh.endo_apex, axis)[0])
    epi_tri = mesh.points[mesh.faces[mesh.face_tags == EPI]]
    where = f"landmarks from {landmarks.source}"
    named = {"rv_insertion_anterior": landmarks.rv_insertion_anterior,
             "rv_insertion_inferior": landmarks.rv_insertion_inferior}
    radial = {}
    for name, point in named.items():
        point = np.asarray(point, float).reshape(3)
        if not np.all(np.isfinite(point)):
            raise InputError(f"{name} ({where}) is not a finite point: give three numbers in mm")
        gap = float(_point_triangle_distance(point, epi_tri).min()) if len(epi_tri) else np.inf
        if gap > max_surface_distance:
            raise InputError(
                f"{name} ({where}) lies {gap:.1f} mm from the epicardial surface (limit "
                f"{max_surface_distance:g} mm): give it in mm in the contours' world frame, on the "
                f"basal epicardium where the right-ventricular wall meets the septum")
        depth = float(depth_below_base(point, axis)[0])
        if depth > max_depth_fraction * cavity_length:
            raise InputError(
                f"{name} ({where}) lies {depth:.1f} mm below the base plane, deeper than "
                f"{max_depth_fraction:g} of the cavity length ({cavity_length:.1f} mm): pick the "
                f"insertion point on a basal slice")
        r = _in_plane((point - axis.base_centre)[None], d)[0]
        if np.linalg.norm(r) < 1e-6:
            raise InputError(f"{name} ({where}) lies on the long axis: pick it on the epicardium")
        radial[name] = r / np.linalg.norm(r)
    ua, ui = radial["rv_insertion_anterior"], radial["rv_insertion_inferior"]
    arc = float(np.degrees(np.arccos(np.clip(ua @ ui, -1.0, 1.0))))
    if not min_arc <= arc <= max_arc:
        raise InputError(
            f"the septal arc between the right-ventricular insertion points ({where}) is "
            f"{arc:.1f} degrees, outside the plausible {min_arc:g}-{max_arc:g}: check that the two "
            f"points mark the anterior and inferior ends of the septum")
    bisector = ua + ui
    bisector /= np.linalg.norm(bisector)
    toward = _in_plane((ui - ua)[None], d)[0]
    toward -= (toward @ bisector) * bisector
    toward /= np.linalg.norm(toward)
    # Seen from the apex (as short-axis images are shown), anterior -> septum -> inferior runs
    # counter-clockwise (Cerqueira et al. 2002, bull's-eye layout; viewing side from memory),
    # i.e. clockwise about the apex-to-base axis: toward_inferior = bisector x direction.
    if toward @ cross(bisector, d) < 0:
        warnings.warn(
            f"the right-ventricular insertion points ({where}) run anterior -> septum -> inferior "
            "clockwise as seen from the apex, the mirror of the usual anatomy: check that the two "
            "points are not swapped; segments follow the points as given", stacklevel=2)
    sign = 1.0 if ua @ cross(d, bisector) >= 0 else -1.0
    return Septum(bisector=bisector, toward_inferior=toward, half_angle=arc / 2.0,
                  anterior=np.asarray(landmarks.rv_insertion_anterior, float).reshape(3),
                  inferior=np.asarray(landmarks.rv_insertion_inferior, float).reshape(3),
                  anterior_sign=sign, sectors=sectors)


def septal_angle(points: np.ndarray, axis: LongAxis, septum: Septum) -> np.ndarray:
    """Segment angle (K,) degrees in [-180, 180) about the long axis from the septal bisector.

    Right-handed about the long axis (apex to base), i.e. clockwise seen from the apex: the
    sense of ``circumferential``, which it equals when that starts at the bisector. Points on
    the axis get 0.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    axis : LongAxis
    septum : Septum
    """
    r = np.asarray(points, float).reshape(-1, 3) - axis.base_centre
    second = cross(_unit(axis.direction), septum.bisector)
    deg = np.degrees(np.arctan2(r @ second, r @ septum.bisector))
    # arctan2 gives (-180, 180]; fold +180 onto -180 so sectors are half-open [lo, hi).
    return np.where(deg >= 180.0, deg - 360.0, deg)


def label_points(points: np.ndarray, mesh: WallMesh, septum: Septum | None) -> np.ndarray:
    """AHA segment (K,) int8 in 1..17 of each point, 0 for all when ``septum`` is None.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    mesh : WallMesh
        Supplies the long axis (base plane) and ``endo_apex`` (cavity length).
    septum : Septum or None
    """
    points = np.asarray(points, float).reshape(-1, 3)
    if septum is None:
        return np.zeros(len(points), np.int8)
    h = depth_below_base(points, mesh.axis)
    length = float(depth_below_base(mesh.endo_apex, mesh.axis)[0])
    return labels_from_angles(septal_angle(points, mesh.axis, septum), h / length, septum)


def labels_from_angles(angle, depth_fraction, septum: Septum) -> np.ndarray:
    """AHA segment (K,) int8 from the segment angle and the depth below the base.

    Parameters
    ----------
    angle : ndarray (K,), degrees
        Segment angle (`septal_angle`), equal to ``circumferential`` when that starts at the
        septal bisector; one may be used for the other.
    depth_fraction : ndarray (K,)
        Long-axis depth below the base plane over the cavity length (1 at the cavity's apex).
    septum : Septum
    """
    a = np.asarray(angle, float) * septum.anterior_sign   # positive toward the anterior insertion
    h = np.asarray(depth_fraction, float)
    ring_a, apical_a = a, a
    if septum.sectors == "insertions":
        ring_a = _stretch_septum(a, septum.half_angle, 60.0)
        apical_a = _stretch_septum(a, septum.half_angle, 45.0)
    six = 1 + np.mod(4 - np.floor((ring_a + 180.0) / 60.0).astype(np.int64), 6)
    four = 16 - np.mod(np.floor((apical_a + 225.0) / 90.0).astype(np.int64), 4)
    length = 1.0
    labels = np.where(h < length / 3.0, six,
                      np.where(h < 2.0 * length / 3.0, six + 6,
                               np.where(h < length, four, 17)))
    return labels.astype(np.int8)


def _stretch_septum(a, half, fixed_half):
    """Map angles so the septal arc [-half, half] becomes [-fixed_half, fixed_half] (piecewise linear)."""
    inside = np.abs(a) <= half
    free = np.mod(a - half, 360.0)                       # 0 at the anterior insertion
    out = fixed_half + free * (360.0 - 2 * fixed_half) / (360.0 - 2 * half)
    out = np.where(inside, a * fixed_half / half, out)
    return np.mod(out + 180.0, 360.0) - 180.0


def _unit(v):
    v = np.asarray(v, float)
    return v / np.linalg.norm(v)


def label_cells(mesh: WallMesh, septum: Septum | None) -> np.ndarray:
    """AHA segment (M,) int8 of each tetrahedron, taken at its centroid."""
    return label_points(mesh.cell_centroids, mesh, septum)
