"""Rule-based myofiber architecture: fiber, sheet and sheet-normal directions from angle laws.

The rule (one function, `point_triad`, serves the nodes, the elements and any sample point):

1. **Depth** ``d``: the fraction of the wall thickness (``law.depth = "thickness"``, default)
   or the Laplace transmural value (``"laplace"``), 0 at the endocardium, 1 at the epicardium.
2. **Angles** at ``d``: helix ``a``, imbrication ``i`` and sheet angle ``b``, each linear from
   its endocardial to its epicardial value or read from a depth table; helix and sheet may add
   an offset over the apicobasal position (a table) and a septal offset weighted by
   ``w = (1 + cos t) / 2``, ``t`` the circumferential angle from the septal bisector (1 on
   the bisector, 0 opposite it, smooth everywhere).
3. **Frame** the angles are laid out in: the wall normal ``n = e_rad`` and, in it tangent
   plane, a circumferential direction ``c`` and ``l = n x c``. With ``law.helix_frame =
   "short_axis"`` (default) ``c`` is the short-axis circumferential direction of imaging,
   ``axis x n`` normalised: orthogonal to the long axis and to the wall normal. Where the
   normal comes within 30 degrees of the axis (the apical cap, segment 17 and its rim), ``axis
   x n`` loses its direction; there ``c`` is blended (cubic smoothstep on ``|axis x n|`` from 0.5
   down to 0.2) into the direction about the axis at the point's own position, ``axis x (x -
   base_centre)`` projected on the tangent plane. This is the smoothing rule of segment 17:
   it depends on the position only, so nodes, elements and sample points agree, and the field
   is smooth everywhere except on the long axis itself, where every left-ventricular frame
   winds once (see `fibers.coordinates.frame_quality`). With ``"laplace"``, ``c = e_circ`` and
   ``l = e_long`` (the Laplace-Dirichlet frame of Bayer et al., Ann Biomed Eng 2012).
4. **Triad**: ``fiber = cos(i) (cos(a) c + sin(a) l) + sin(i) n``; the sheet starts as the part
   of ``n`` orthogonal to the fiber, ``s0``, and turns about the fiber by ``b`` (right-handed):
   ``sheet = cos(b) s0 + sin(b) (fiber x s0)``; ``sheet_normal = fiber x sheet``. With
   ``i = b = 0`` the sheet is ``e_rad``.

Angles measured back from the vectors (output fields): ``helix_angle`` in the Laplace frame,
``atan2(f . e_long, f . e_circ)`` (the angle of earlier versions), ``helix_angle_sax`` in the
short-axis frame of step 3, ``atan2(f . l, f . c)``, and ``imbrication_angle``
``asin(f . e_rad)``. ``sheet_angle`` and ``dispersion`` (the kappa of Gasser, Ogden and
Holzapfel, J R Soc Interface 2006, linear over depth) are the prescribed values.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from fibers.config import FiberLaw
from fibers.coordinates import CardiacCoordinates
from fibers.errors import InputError
from fibers.sidework import side_thread
from fibers.vectors import columns, cross_columns, dot_columns, norm_columns, rows

# |axis x n| between these values blends the short-axis direction into the direction about
# the axis at the point (sin 11.5 and sin 30 degrees).
_SAX_LOW, _SAX_HIGH = 0.2, 0.5

_CHUNK = 32_768  # rows `point_triad` lays out at once (16-64k were as fast)

TRIAD_FIELDS = ("fiber", "sheet", "sheet_normal", "helix_angle", "helix_angle_sax",
                "imbrication_angle", "sheet_angle", "dispersion")


@dataclass(frozen=True)
class Architecture:
    """Fiber architecture on a wall mesh.

    Attributes
    ----------
    fiber, sheet, sheet_normal : ndarray (N, 3)
        Nodal right-handed orthonormal triad.
    helix_angle, helix_angle_sax, imbrication_angle, sheet_angle : ndarray (N,), degrees
        See the module docstring.
    dispersion : ndarray (N,)
        Fiber dispersion kappa, 0 to 1/3.
    cell_fiber, cell_sheet, cell_sheet_normal : ndarray (M, 3)
        The triad per element, from the element frame at the centroid.
    """

    fiber: np.ndarray
    sheet: np.ndarray
    sheet_normal: np.ndarray
    helix_angle: np.ndarray
    helix_angle_sax: np.ndarray
    imbrication_angle: np.ndarray
    sheet_angle: np.ndarray
    dispersion: np.ndarray
    cell_fiber: np.ndarray
    cell_sheet: np.ndarray
    cell_sheet_normal: np.ndarray


def helix_angle(law: FiberLaw, depth, *, apicobasal=None, septal_weight=None) -> np.ndarray:
    """Prescribed helix angle at depth (and position), degrees.

    Parameters
    ----------
    law : FiberLaw
        Linear from ``helix_endo`` to ``helix_epi``, or the ``helix_profile`` table of
        (depth, angle) pairs interpolated linearly (constant beyond its first and last depth),
        plus the ``helix_apicobasal`` offset and the weighted ``helix_septal_offset``.
    depth : array_like (K,)
        0 endocardium, 1 epicardium; clipped to [0, 1].
    apicobasal : array_like (K,), optional
        0 apex, 1 base; needed when the law has an apicobasal table.
    septal_weight : array_like (K,), optional
        1 in the septum, 0 on the free wall (`septal_weight`); None: no septal offset.

    Returns
    -------
    ndarray (K,), degrees
    """
    return _angle(depth, law.helix_endo, law.helix_epi, law.helix_profile, "helix_profile",
                  apicobasal, law.helix_apicobasal, "helix_apicobasal",
                  septal_weight, law.helix_septal_offset)


def sheet_angle(law: FiberLaw, depth, *, apicobasal=None, septal_weight=None) -> np.ndarray:
    """Prescribed sheet angle (rotation of the sheet about the fiber) at depth, degrees.

    As `helix_angle`, with ``sheet_angle_endo``/``_epi``, ``sheet_profile``,
    ``sheet_apicobasal`` and ``sheet_septal_offset``.
    """
    return _angle(depth, law.sheet_angle_endo, law.sheet_angle_epi, law.sheet_profile,
                  "sheet_profile", apicobasal, law.sheet_apicobasal, "sheet_apicobasal",
                  septal_weight, law.sheet_septal_offset)


def imbrication_angle(law: FiberLaw, depth) -> np.ndarray:
    """Prescribed imbrication (tilt out of the tangent plane), linear over depth, degrees (K,)."""
    d = _depth(depth)
    return law.imbrication_endo + (law.imbrication_epi - law.imbrication_endo) * d


def dispersion(law: FiberLaw, depth) -> np.ndarray:
    """Fiber dispersion kappa (K,), linear over depth (constant when both ends are equal)."""
    d = _depth(depth)
    return law.dispersion_endo + (law.dispersion_epi - law.dispersion_endo) * d


def septal_weight(circumferential) -> np.ndarray:
    """Smooth septal weight (K,): ``(1 + cos t) / 2``, t degrees from the septal bisector."""
    return 0.5 * (1.0 + np.cos(np.radians(np.asarray(circumferential, float))))


def point_triad(fields: dict, law: FiberLaw, *, axis, septal: bool = False, angles: bool = True) -> dict:
    """The fiber rule at any points: triad and angles from coordinates and frames there.

    The one place the rule is applied: the nodes and elements (`assign`), the pools and any
    evaluator pass the coordinates and frames they interpolated.

    Parameters
    ----------
    fields : dict of str to ndarray
        ``points`` (K, 3) mm; ``e_rad``, ``e_long``, ``e_circ`` (K, 3), re-orthonormalised here
        (``e_rad`` kept, ``e_long`` made orthogonal to it); ``transmural`` and
        ``thickness_fraction`` (K,) (only the one ``law.depth`` names is needed);
        ``apicobasal`` (K,) when the law has apicobasal tables; ``circumferential`` (K,)
        degrees from the septal bisector when ``septal``.
    law : FiberLaw
    axis : LongAxis
        ``direction`` (apex to base) and ``base_centre``.
    septal : bool
        Whether ``circumferential`` is measured from the septal bisector (landmarks given);
        otherwise septal offsets are not applied.
    angles : bool
        Also measure the angles of the triad (False: the triad alone, as the elements need).

    Returns
    -------
    dict of str to ndarray
        ``fiber``, ``sheet``, ``sheet_normal`` (K, 3), a right-handed orthonormal triad;
        with ``angles``, ``helix_angle``, ``helix_angle_sax``, ``imbrication_angle``,
        ``sheet_angle`` (K,) degrees and ``dispersion`` (K,).
    """
    need = ["points", "e_rad", "e_long", "e_circ",
            "thickness_fraction" if law.depth == "thickness" else "transmural"]
    if law.helix_apicobasal is not None or law.sheet_apicobasal is not None:
        need.append("apicobasal")
    if septal and (law.helix_septal_offset or law.sheet_septal_offset):
        need.append("circumferential")
    missing = [k for k in need if k not in fields or fields[k] is None]
    if missing:
        raise InputError(f"point_triad: fields {', '.join(missing)} are missing; pass them "
                         "interpolated at the points")
    k = len(fields["points"])
    if k > _CHUNK and all(len(fields[name]) == k for name in need):
        # row by row arithmetic, so chunks give the same bits; their temporaries stay in cache:
        # the 547k elements of the demo ventricle in 0.11 s instead of 0.18 s
        parts = [point_triad({name: fields[name][first:first + _CHUNK] for name in need}, law, axis=axis,
                             septal=septal, angles=angles) for first in range(0, k, _CHUNK)]
        return {name: np.concatenate([part[name] for part in parts]) for name in parts[0]}
    # component-first (3, K) from here on: every product runs over contiguous memory
    n, e_long, e_circ = _orthonormal_frame(fields["e_rad"], fields["e_long"], fields["e_circ"])
    k = n.shape[1]
    depth = np.asarray(fields[need[4]], float)
    if depth.shape != (k,):
        raise InputError(f"point_triad: depth has {depth.size} values for {k} frames; "
                         "pass one depth per frame")
    position = fields.get("apicobasal") if "apicobasal" in need else None
    weight = septal_weight(fields["circumferential"]) if "circumferential" in need else None
    a = helix_angle(law, depth, apicobasal=position, septal_weight=weight)
    b = sheet_angle(law, depth, apicobasal=position, septal_weight=weight)
    i = imbrication_angle(law, depth)
    if angles or law.helix_frame == "short_axis":
        c_sax, l_sax = _short_axis_columns(n, columns(fields["points"]), axis, e_circ)
    c, l = (c_sax, l_sax) if law.helix_frame == "short_axis" else (e_circ, e_long)
    fiber, sheet, normal = _triad_columns(n, c, l, a, i, b)
    triad = {"fiber": rows(fiber), "sheet": rows(sheet), "sheet_normal": rows(normal)}
    if not angles:
        return triad
    return {**triad,
            "helix_angle": np.degrees(np.arctan2(dot_columns(fiber, e_long), dot_columns(fiber, e_circ))),
            "helix_angle_sax": np.degrees(np.arctan2(dot_columns(fiber, l_sax), dot_columns(fiber, c_sax))),
            "imbrication_angle": np.degrees(np.arcsin(np.clip(dot_columns(fiber, n), -1.0, 1.0))),
            "sheet_angle": np.asarray(b, float), "dispersion": dispersion(law, depth)}


def short_axis_frame(normal, points, axis, *, fallback) -> tuple[np.ndarray, np.ndarray]:
    """Short-axis circumferential and longitudinal directions in the wall's tangent plane.

    Parameters
    ----------
    normal : ndarray (K, 3)
        Unit wall normal (``e_rad``).
    points : ndarray (K, 3), mm
    axis : LongAxis
    fallback : ndarray (K, 3)
        Unit vectors orthogonal to ``normal``, used only on the axis itself.

    Returns
    -------
    c, l : ndarray (K, 3)
        ``c`` the short-axis circumferential direction (step 3 of the module docstring),
        ``l = normal x c``.
    """
    c, l = _short_axis_columns(columns(normal), columns(points), axis, columns(fallback))
    return rows(c), rows(l)


def _short_axis_columns(normal, points, axis, fallback):
    """`short_axis_frame` on component-first arrays (3, K)."""
    d = np.asarray(axis.direction, float)
    d = d / np.linalg.norm(d)
    sax = cross_columns(d, normal)
    s = norm_columns(sax)
    about = cross_columns(d, points - np.asarray(axis.base_centre, float)[:, None])
    about -= dot_columns(about, normal) * normal
    about = _unit_or(about, fallback)
    t = np.clip((s - _SAX_LOW) / (_SAX_HIGH - _SAX_LOW), 0.0, 1.0)
    w = t * t * (3.0 - 2.0 * t)
    c = w * sax / np.maximum(s, 1e-300) + (1.0 - w) * about
    # the two agree in sense (both turn right-handedly about the axis), so the blend only
    # cancels if the wall normal tilts toward the axis; keep the heavier one there
    weak = norm_columns(c) < 0.25
    if np.any(weak):
        c[:, weak] = np.where(w[weak] >= 0.5, sax[:, weak] / np.maximum(s[weak], 1e-300), about[:, weak])
    c = _unit_or(c, fallback)
    return c, cross_columns(normal, c)


def triad_from_angles(normal, circ, long, helix_deg, imbrication_deg, sheet_deg):
    """Fiber, sheet and sheet-normal (K, 3) from a frame (unit rows, ``long = normal x circ``)."""
    triad = _triad_columns(columns(normal), columns(circ), columns(long), helix_deg, imbrication_deg, sheet_deg)
    return tuple(rows(v) for v in triad)


def _triad_columns(normal, circ, long, helix_deg, imbrication_deg, sheet_deg):
    """`triad_from_angles` on component-first arrays (3, K)."""
    a = np.radians(np.asarray(helix_deg, float))
    i = np.radians(np.asarray(imbrication_deg, float))
    b = np.radians(np.asarray(sheet_deg, float))
    cos_i, sin_i = np.cos(i), np.sin(i)
    in_plane = np.cos(a) * circ + np.sin(a) * long
    fiber = cos_i * in_plane + sin_i * normal
    # s0: the unit part of the normal orthogonal to the fiber, exactly, without a division
    s0 = cos_i * normal - sin_i * in_plane
    # Rodrigues' rotation of s0 about the fiber; s0 is orthogonal to it.
    sheet = np.cos(b) * s0 + np.sin(b) * cross_columns(fiber, s0)
    return fiber, sheet, cross_columns(fiber, sheet)


def orient(e_rad, e_long, e_circ, depth, law: FiberLaw):
    """The rule in a given frame, without positions: laid out in the Laplace frame.

    Kept for callers that have no positions; `point_triad` is the full rule. Returns
    ``fiber, sheet, sheet_normal`` (K, 3) and the prescribed ``helix_deg, sheet_deg`` (K,).
    """
    n, e_long, e_circ = _orthonormal_frame(e_rad, e_long, e_circ)
    a = helix_angle(law, depth)
    if a.shape != (n.shape[1],):
        raise InputError(f"orient: depth has {a.size} values for {n.shape[1]} frames; "
                         "pass one depth per frame")
    b = sheet_angle(law, depth)
    fiber, sheet, normal = _triad_columns(n, e_circ, e_long, a, imbrication_angle(law, depth), b)
    return rows(fiber), rows(sheet), rows(normal), a, b


def assign(coords: CardiacCoordinates, law: FiberLaw, mesh, *, septal: bool = False) -> Architecture:
    """Fiber architecture at the nodes and in the elements of a mesh.

    Parameters
    ----------
    coords : CardiacCoordinates
    law : FiberLaw
    mesh : WallMesh
        Node positions, elements and the long axis.
    septal : bool
        Whether ``coords.circumferential`` starts at the septal bisector (landmarks given).

    Returns
    -------
    Architecture
    """
    nodes = {"points": mesh.points, "e_rad": coords.e_rad, "e_long": coords.e_long,
             "e_circ": coords.e_circ, "transmural": coords.transmural,
             "thickness_fraction": coords.thickness_fraction, "apicobasal": coords.apicobasal,
             "circumferential": coords.circumferential}
    cells = {"points": mesh.cell_centroids, "e_rad": coords.cell_e_rad,
             "e_long": coords.cell_e_long, "e_circ": coords.cell_e_circ,
             "transmural": coords.cell_transmural,
             "thickness_fraction": coords.cell_thickness_fraction,
             "apicobasal": coords.cell_apicobasal,
             "circumferential": coords.cell_circumferential}
    if not septal and (law.helix_septal_offset or law.sheet_septal_offset):
        warnings.warn("[fibers] helix_septal_offset / sheet_septal_offset need the septum, and there are no "
                      "right-ventricular insertion landmarks: the septal offsets are not applied; add [landmarks]",
                      stacklevel=2)
    # the nodes on a second thread while the elements (five times as many) are done here: the
    # array work releases the GIL (fibers.sidework; in turn on a cohort worker's one core)
    with side_thread("fibers-nodes") as side:
        node_job = side.submit(point_triad, nodes, law, axis=mesh.axis, septal=septal)
        at_cells = point_triad(cells, law, axis=mesh.axis, septal=septal, angles=False)
        at_nodes = node_job.result()
    return Architecture(**{k: at_nodes[k] for k in TRIAD_FIELDS},
                        cell_fiber=at_cells["fiber"], cell_sheet=at_cells["sheet"],
                        cell_sheet_normal=at_cells["sheet_normal"])


def _angle(depth, endo, epi, profile, profile_name, position, offsets, offsets_name,
           weight, septal_offset):
    d = _depth(depth)
    if profile is not None:
        table = _profile_table(profile, profile_name)
        angle = np.interp(d, table[:, 0], table[:, 1])
    else:
        angle = endo + (epi - endo) * d
    if offsets is not None:
        if position is None:
            raise InputError(f"fibers.{offsets_name} needs the apicobasal position at the points")
        table = _profile_table(offsets, offsets_name, what="position")
        angle = angle + np.interp(_depth(position), table[:, 0], table[:, 1])
    if weight is not None and septal_offset:
        angle = angle + septal_offset * np.asarray(weight, float)
    return angle


def _unit_or(v, fallback):
    """Unit columns of ``v`` (3, K); those shorter than 1e-9 taken from ``fallback`` (3, K)."""
    norm = norm_columns(v)
    ok = norm > 1e-9
    out = v / np.where(ok, norm, 1.0)
    if not np.all(ok):
        out[:, ~ok] = fallback[:, ~ok]
    return out


def _depth(depth) -> np.ndarray:
    d = np.asarray(depth, dtype=float)
    if not np.all(np.isfinite(d)):
        raise InputError("transmural depth contains NaN or infinite values; recompute the "
                         "cardiac coordinates")
    return np.clip(d, 0.0, 1.0)


def _profile_table(profile, name: str = "helix_profile", what: str = "depth") -> np.ndarray:
    try:
        table = np.asarray(profile, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"fibers.{name} must be a list of [{what}, angle] pairs of "
                         "numbers") from None
    if table.ndim != 2 or table.shape[1] != 2:
        raise InputError(f"fibers.{name} must be a list of [{what}, angle] pairs; got "
                         f"an array of shape {table.shape}")
    if len(table) < 2:
        raise InputError(f"fibers.{name} has {len(table)} row(s); give at least 2 "
                         f"[{what}, angle] pairs")
    if not np.all(np.isfinite(table)):
        raise InputError(f"fibers.{name} contains NaN or infinite values")
    d = table[:, 0]
    if d.min() < 0.0 or d.max() > 1.0:
        raise InputError(f"fibers.{name}: {what} values must lie in [0, 1]; got {d.min():g} to {d.max():g}")
    steps = np.diff(d)
    if np.any(steps <= 0.0):
        row = int(np.flatnonzero(steps <= 0.0)[0]) + 1
        raise InputError(f"fibers.{name}: {what} values must increase strictly; row {row + 1} "
                         f"({what} {d[row]:g}) does not follow {d[row - 1]:g}")
    return table


def _orthonormal_frame(e_rad, e_long, e_circ):
    """Gram-Schmidt on (e_rad, e_long), e_circ = e_long x e_rad, with fallbacks on degeneracy.

    Takes rows (K, 3), returns the three component-first (3, K).
    """
    arrays = [np.asarray(v, dtype=float) for v in (e_rad, e_long, e_circ)]
    shape = arrays[0].shape
    if len(shape) != 2 or shape[1] != 3 or any(v.shape != shape for v in arrays):
        raise InputError(f"orient: e_rad, e_long, e_circ must be (K, 3) arrays of one shape; "
                         f"got {[v.shape for v in arrays]}")
    if not all(np.all(np.isfinite(v)) for v in arrays):
        raise InputError("orient: the frame contains NaN or infinite values; recompute the "
                         "cardiac coordinates")
    r, lg, c = (columns(v) for v in arrays)
    # The fallbacks are computed only for the rows that need them (almost never).
    # e_rad = e_circ x e_long in a right-handed frame; use it where the given e_rad is zero.
    r = _unit_columns(r, lambda k: cross_columns(c[:, k], lg[:, k]))
    lg = lg - dot_columns(lg, r) * r
    # e_long = e_rad x e_circ; use it where the given e_long is parallel to e_rad.
    lg = _unit_columns(lg, lambda k: cross_columns(r[:, k], c[:, k]))
    lg = lg - dot_columns(lg, r) * r
    lg = _unit_columns(lg, lambda k: _any_orthogonal(r[:, k]))
    return r, lg, cross_columns(lg, r)


def _unit_columns(v, fallback):
    """Unit columns of ``v`` (3, K); those shorter than 1e-9 taken from ``fallback(k)`` (then any unit)."""
    norm = norm_columns(v)
    bad = norm < 1e-9
    if np.any(bad):  # row by row: the other rows keep their own norms (chunks, see point_triad)
        v = v.copy()
        v[:, bad] = fallback(np.flatnonzero(bad))
        norm[bad] = np.linalg.norm(v[:, bad], axis=0)
        still = bad & (norm < 1e-9)
        v[:, still] = [[1.0], [0.0], [0.0]]
        norm[still] = 1.0
    return v / norm


def _any_orthogonal(r):
    """A unit vector orthogonal to each unit column of ``r`` (3, K)."""
    pick = np.where(np.abs(r[0]) < 0.9, [[1.0], [0.0], [0.0]], [[0.0], [1.0], [0.0]])
    v = cross_columns(r, pick)
    return v / np.linalg.norm(v, axis=0)
