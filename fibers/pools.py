"""Pools of sample points in the wall, the cavity, the background and on the surfaces.

Pools (README, Output folder) and what each point carries:

- ``myocardium``: uniform by volume in the wall. A tetrahedron is drawn with probability
  proportional to its volume and a point uniformly inside it. Fields at the point's own position:
  ``transmural``, ``apicobasal`` and the nodal frame interpolated with the barycentric weights
  (the frame then re-orthonormalised), ``circumferential`` as the angle of the weighted mean of
  the nodes' unit phasors exp(i angle) (so the +-180 degree seam does not average to 0, and the
  value agrees with the nodal field), ``thickness_fraction`` interpolated, ``frame_quality``
  at the point, the fiber triad and its angles from `fibers.architecture.point_triad` at the
  interpolated coordinates, ``aha_segment`` from
  `fibers.segments.label_points` at the point, and ``tet``, the containing element.
- ``endo``, ``epi``, ``base``: uniform by area on the tagged boundary faces, with the same fields
  interpolated from the face's three nodes, ``normal`` (unit, out of the wall: into the cavity on
  the endocardium), ``face`` (row of ``mesh.faces``) and ``tet`` (the element owning the face).
- ``cavity``: uniform in the volume closed by the endocardial faces and the base plane.
- ``background``: uniform in the oriented box and outside the wall, with ``region`` (int8) and
  ``region_names`` (``region_names[code]``): 1 cavity, 2 above the base plane, 3 outside the
  heart below the base plane (0, the wall, never occurs). In the files the names travel in the
  archive's ``metadata.json`` member, never as a string array (see `fibers.io.pools`).

With ``settings.float32`` every float field (points included) is float32, for training loops.

Inside the cavity: a point below the base plane is inside iff a ray from it toward the apex
(along ``-axis.direction``) crosses the endocardial faces an odd number of times. The ray never
reaches the base plane, so the surface need not be capped. Crossings are found on a 2-D grid of
the faces projected onto the base plane, all vectorised.

Randomness: one ``np.random.default_rng(settings.seed)`` spawns one child generator per pool
name, in the fixed order of `POOL_NAMES`, so the count of one pool never changes another. With
``sampler="sobol"`` each pool draws scrambled Sobol points (scipy.stats.qmc) seeded by its child
generator: 4-D in the wall (one coordinate picks the element through the cumulative volume,
three fold into a uniform point in it), 3-D on surfaces and in boxes. Same seed, same bytes.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from fibers import architecture, coordinates, meshtools, segments
from fibers.config import Box, FiberLaw, PoolSettings
from fibers.errors import InputError
from fibers.locate import Locator
from fibers.types import BASE, ENDO, EPI, WallMesh
from fibers.vectors import cross, unit_rows

log = logging.getLogger(__name__)

POOL_NAMES = ("myocardium", "cavity", "background", "endo", "epi", "base")
REGION_NAMES = ("wall", "cavity", "above_base", "outside")
WALL, CAVITY, ABOVE_BASE, OUTSIDE = 0, 1, 2, 3
_SURFACE_TAGS = {"endo": ENDO, "epi": EPI, "base": BASE}


@dataclass(frozen=True)
class Pool:
    """One pool of sample points.

    Attributes
    ----------
    name : str
        One of `POOL_NAMES`.
    arrays : dict of str to ndarray
        Always ``points`` (K, 3) mm; per-point fields share the first dimension K.
    """

    name: str
    arrays: dict

    def __len__(self) -> int:
        return len(self.arrays["points"])


# -- unit-cube draws -------------------------------------------------------------------------

def _unit(rng: np.random.Generator, n: int, dim: int, sampler: str) -> np.ndarray:
    """n points (n, dim) in the unit cube, pseudo-random or scrambled Sobol."""
    if sampler == "random":
        return rng.random((n, dim))
    from scipy.stats import qmc
    if n == 0:
        return np.zeros((0, dim))
    m = int(np.ceil(np.log2(max(n, 2))))
    # A prefix of a 2^m block: the same points a bigger block would start with.
    return qmc.Sobol(dim, scramble=True, rng=rng).random_base2(m)[:n]


def fold_to_tet(stu: np.ndarray) -> np.ndarray:
    """Map uniform points of the unit cube (K, 3) to uniform barycentrics (K, 4) of a tetrahedron.

    Folding of the cube into the tetrahedron with unit Jacobian (Rocchini & Cignoni, J Graphics
    Tools 2000, from memory), so uniform (and low-discrepancy) points stay so.
    """
    s, t, u = (np.array(stu[:, k], float) for k in range(3))
    f = s + t > 1.0
    s[f], t[f] = 1.0 - s[f], 1.0 - t[f]
    g = t + u > 1.0
    s_, t_, u_ = s.copy(), t.copy(), u.copy()
    t[g], u[g] = 1.0 - u_[g], 1.0 - s_[g] - t_[g]
    h = ~g & (s_ + t_ + u_ > 1.0)
    s[h], u[h] = 1.0 - t_[h] - u_[h], s_[h] + t_[h] + u_[h] - 1.0
    return np.stack([1.0 - s - t - u, s, t, u], axis=1)


def fold_to_triangle(uv: np.ndarray) -> np.ndarray:
    """Map uniform points of the unit square (K, 2) to uniform barycentrics (K, 3) of a triangle."""
    u, v = np.array(uv[:, 0], float), np.array(uv[:, 1], float)
    f = u + v > 1.0
    u[f], v[f] = 1.0 - u[f], 1.0 - v[f]
    return np.stack([1.0 - u - v, u, v], axis=1)


def _pick(weights: np.ndarray, unit: np.ndarray) -> np.ndarray:
    """Indices drawn with probability proportional to ``weights`` from uniforms ``unit`` (K,)."""
    cdf = np.cumsum(weights)
    keys = unit * cdf[-1]
    # searched in sorted order, each search starts from the last one's place: the same indices
    # in half the time (100k points among 547k elements: 13 ms against 27 ms)
    order = np.argsort(keys)
    picked = np.empty(len(keys), np.int64)
    picked[order] = np.searchsorted(cdf, keys[order], side="right")
    return np.minimum(picked, len(weights) - 1)


# -- fields at points ------------------------------------------------------------------------

def point_fields(points: np.ndarray, nodes: np.ndarray, weights: np.ndarray, mesh: WallMesh,
                 coords, law: FiberLaw, septum) -> dict[str, np.ndarray]:
    """All wall fields at points, interpolated from the nodes of their element or face.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    nodes : ndarray (K, m) int
        Mesh nodes each point is interpolated from (m = 4 in a tetrahedron, 3 on a face).
    weights : ndarray (K, m)
        Barycentric weights, rows summing to 1.
    mesh : WallMesh
    coords : fibers.coordinates.CardiacCoordinates
    law : FiberLaw
    septum : fibers.segments.Septum or None

    Returns
    -------
    dict of str to ndarray
        ``transmural``, ``thickness_fraction``, ``wall_thickness`` (mm, when the coordinates
        carry it), ``apicobasal``, ``circumferential``
        (degrees), ``e_rad``, ``e_long``, ``e_circ``, ``frame_quality`` (mm), the fields of
        `fibers.architecture.point_triad` (``fiber``, ``sheet``, ``sheet_normal``,
        ``helix_angle``, ``helix_angle_sax``, ``imbrication_angle``, ``sheet_angle``,
        ``dispersion``) and ``aha_segment`` (int8).
    """
    def interp(nodal):
        nodal = np.asarray(nodal)
        if nodal.ndim == 1:
            return np.einsum("km,km->k", weights, nodal[nodes])
        # one 1-D gather per component: gathering (K, m, 3) rows at once was 2-3x slower
        return np.stack([np.einsum("km,km->k", weights, nodal[:, j][nodes])
                         for j in range(nodal.shape[1])], axis=1)

    transmural = np.clip(interp(coords.transmural), 0.0, 1.0)
    apicobasal = np.clip(interp(coords.apicobasal), 0.0, 1.0)
    phase = interp(np.exp(1j * np.radians(coords.circumferential)))
    circ = np.degrees(np.angle(phase))
    circ = np.where(circ >= 180.0, circ - 360.0, circ)
    e_rad = unit_rows(interp(coords.e_rad))
    e_long = interp(coords.e_long)
    e_long = unit_rows(e_long - np.einsum("ij,ij->i", e_long, e_rad)[:, None] * e_rad)
    e_circ = cross(e_long, e_rad)
    out = {"transmural": transmural, "apicobasal": apicobasal, "circumferential": circ,
           "e_rad": e_rad, "e_long": e_long, "e_circ": e_circ}
    if coords.thickness_fraction is not None:
        out["thickness_fraction"] = np.clip(interp(coords.thickness_fraction), 0.0, 1.0)
    if getattr(coords, "wall_thickness", None) is not None:
        out["wall_thickness"] = interp(coords.wall_thickness)
    out["frame_quality"] = coordinates.frame_quality(points, mesh.axis)
    out.update(architecture.point_triad({"points": points, **out}, law, axis=mesh.axis,
                                        septal=septum is not None))
    out["aha_segment"] = segments.label_points(points, mesh, septum)
    return out


# -- inside the cavity -----------------------------------------------------------------------

class EnclosedTest:
    """Whether points below the base plane lie inside the surface made of some boundary faces.

    Parity of the crossings of a ray toward the apex with the faces (see the module docstring).
    With the endocardial faces it tells the cavity (closed by the base plane); with the
    endocardial and epicardial faces it tells the wall itself, since a ray from below the base
    toward the apex never meets the base faces. Faces are binned on a 2-D grid over their
    projection onto the base plane.

    Parameters
    ----------
    mesh : WallMesh or fibers.mesh.Boundary
        Anything with ``axis``, ``points``, ``faces`` and ``face_tags``.
    tags : tuple of int
        Face tags making up the surface.
    """

    def __init__(self, mesh: WallMesh, tags: tuple[int, ...] = (ENDO,)):
        self.axis = mesh.axis
        tri = mesh.faces[np.isin(mesh.face_tags, tags)]
        local = mesh.axis.to_local(mesh.points)[tri]        # (T, 3, 3): x1, x2, z
        xy = local[:, :, :2]
        a, u, v = xy[:, 0], xy[:, 1] - xy[:, 0], xy[:, 2] - xy[:, 0]
        self._det = u[:, 0] * v[:, 1] - u[:, 1] * v[:, 0]
        # per face, each component its own contiguous array: every gather in __call__ is of one row
        self._a_x, self._a_y, self._u_x, self._u_y, self._v_x, self._v_y = (
            np.ascontiguousarray(w[:, k]) for w in (a, u, v) for k in (0, 1))
        self._z = tuple(np.ascontiguousarray(local[:, k, 2]) for k in range(3))
        scale = np.ptp(xy.reshape(-1, 2), axis=0).max() if len(tri) else 1.0
        # Faces seen edge-on from the axis cannot be crossed by an axial ray.
        keep = np.abs(self._det) > 1e-12 * scale**2
        self._lo = xy.reshape(-1, 2).min(axis=0) if len(tri) else np.zeros(2)
        hi = xy.reshape(-1, 2).max(axis=0) if len(tri) else np.ones(2)
        area = 0.5 * np.abs(self._det[keep]).sum()
        self._cell = max(np.sqrt(2.0 * area / max(keep.sum(), 1)), 1e-9 * scale, 1e-12)
        self._shape = np.maximum(np.ceil((hi - self._lo) / self._cell).astype(np.int64), 1)
        ids = np.flatnonzero(keep)
        i0 = self._bin(xy[ids].min(axis=1))
        i1 = self._bin(xy[ids].max(axis=1))
        span = i1 - i0 + 1
        count = span[:, 0] * span[:, 1]
        owner = np.repeat(np.arange(len(ids)), count)
        r = np.arange(count.sum()) - np.repeat(np.cumsum(count) - count, count)
        cx = i0[owner, 0] + r // span[owner, 1]
        cy = i0[owner, 1] + r % span[owner, 1]
        cell = cx * self._shape[1] + cy
        order = np.argsort(cell, kind="stable")
        self._faces_by_cell = ids[owner[order]]
        self._start = np.searchsorted(cell[order], np.arange(self._shape.prod() + 1))

    def _bin(self, xy: np.ndarray) -> np.ndarray:
        return np.clip(np.floor((xy - self._lo) / self._cell).astype(np.int64), 0, self._shape - 1)

    def __call__(self, points: np.ndarray) -> np.ndarray:
        """Inside flags (K,) bool for points (K, 3), mm."""
        local = self.axis.to_local(np.asarray(points, float).reshape(-1, 3))
        inside = np.zeros(len(local), bool)
        ext = self._lo + self._shape * self._cell
        cand = np.flatnonzero((local[:, 2] < 0.0) & np.all(local[:, :2] >= self._lo, axis=1)
                              & np.all(local[:, :2] <= ext, axis=1))
        a_x, a_y, u_x, u_y, v_x, v_y = self._a_x, self._a_y, self._u_x, self._u_y, self._v_x, self._v_y
        z0, z1, z2 = self._z
        for start in range(0, len(cand), 65_536):
            rows = cand[start:start + 65_536]
            p = local[rows]
            b = self._bin(p[:, :2])
            cell = b[:, 0] * self._shape[1] + b[:, 1]
            n = self._start[cell + 1] - self._start[cell]
            who = np.repeat(np.arange(len(rows)), n)
            f = self._faces_by_cell[np.arange(n.sum()) - np.repeat(np.cumsum(n) - n, n)
                                    + np.repeat(self._start[cell], n)]
            px, py, pz = (np.ascontiguousarray(p[:, k]) for k in (0, 1, 2))
            w_x, w_y = px[who] - a_x[f], py[who] - a_y[f]
            det = self._det[f]
            l1 = (w_x * v_y[f] - w_y * v_x[f]) / det
            l2 = (u_x[f] * w_y - u_y[f] * w_x) / det
            l0 = 1.0 - l1 - l2
            hit = np.flatnonzero((l0 >= 0) & (l1 >= 0) & (l2 >= 0))
            fh = f[hit]  # the height only where the ray meets the face
            z_hit = l0[hit] * z0[fh] + l1[hit] * z1[fh] + l2[hit] * z2[fh]
            crossing = who[hit][z_hit < pz[who[hit]]]
            inside[rows] = np.bincount(crossing, minlength=len(rows)) % 2 == 1
        return inside


# -- the pools -------------------------------------------------------------------------------

def _rejection(rng, n, sampler, draw, accept, rate) -> np.ndarray:
    """The first n points of ``draw(unit cube points)`` that pass ``accept``.

    ``rate`` guesses the acceptance rate to size the draws, and only that: random draws come
    in batches of one stream, and Sobol draws grow by doubling the block, whose larger blocks
    start with the points of the smaller ones, so the points are the same whatever the guess.
    """
    if n == 0:
        return np.zeros((0, 3))
    if sampler == "sobol":
        from scipy.stats import qmc
        seed = rng.integers(2**63)
        m = int(np.ceil(np.log2(max(2, n / max(rate, 1e-3) * 1.2))))
        while True:
            pts = draw(qmc.Sobol(3, scramble=True, rng=np.random.default_rng(seed)).random_base2(m))
            ok = np.flatnonzero(accept(pts))
            if len(ok) >= n or m >= 30:
                break
            m += 1
        if len(ok) < n:
            raise InputError(f"only {len(ok)} of {n} points fall in the sampling region: "
                             "check the box and the mesh")
        return pts[ok[:n]]
    got, total = [], 0
    batch = int(n / max(rate, 1e-3) * 1.2) + 64
    for _ in range(200):
        pts = draw(rng.random((batch, 3)))
        pts = pts[accept(pts)]
        got.append(pts)
        total += len(pts)
        if total >= n:
            return np.concatenate(got)[:n]
    raise InputError(f"only {total} of {n} points fall in the sampling region: check the box "
                     "and the mesh")


def face_owners(mesh: WallMesh) -> np.ndarray:
    """Element (F,) owning each row of ``mesh.faces`` (-1 if none has that face): the mesh
    stage's (``mesh.face_owners``) when it found them, else searched for."""
    known = getattr(mesh, "face_owners", None)
    if known is not None and len(known) == len(mesh.faces):
        return known
    n = len(mesh.points)
    # Only an element with three vertices on the boundary can own a boundary face: searching
    # their faces alone sorts about a tenth of all faces (an element owns a face at most once,
    # so the answer is the same).
    on_boundary = np.zeros(n, bool)
    on_boundary[mesh.faces] = True
    candidates = np.flatnonzero(on_boundary[mesh.tets].sum(axis=1) >= 3)
    local = mesh.tets[candidates][:, [[1, 2, 3], [0, 2, 3], [0, 1, 3], [0, 1, 2]]].reshape(-1, 3)
    owner = meshtools.match_triangles(mesh.faces, local, n)
    return np.where(owner >= 0, candidates[owner // 4], -1)


def _generators(settings: PoolSettings) -> dict[str, np.random.Generator]:
    """One child generator per pool name, spawned in the fixed order of `POOL_NAMES`."""
    return dict(zip(POOL_NAMES, np.random.default_rng(settings.seed).spawn(len(POOL_NAMES))))


def default_box(mesh: WallMesh, margin: float) -> Box:
    """The wall's bounding box in the long-axis frame, grown by ``margin`` mm on every side."""
    local = mesh.axis.to_local(mesh.points)
    lo, hi = local.min(axis=0) - margin, local.max(axis=0) + margin
    frame = mesh.axis.frame()
    return Box(corner=mesh.axis.to_world(lo), edges=(hi - lo)[:, None] * frame)


def _check(settings: PoolSettings) -> None:
    if settings.sampler not in ("random", "sobol"):
        raise InputError(f"pools.sampler is {settings.sampler!r}: use \"random\" or \"sobol\"")
    for name in POOL_NAMES:
        n = getattr(settings, name)
        if int(n) != n or n < 0:
            raise InputError(f"pools.{name} is {n!r}: give a whole number >= 0")


def build_pools(mesh: WallMesh, coords, law: FiberLaw, septum, settings: PoolSettings, *,
                box: Box | None = None, locator: Locator | None = None,
                drawn: dict | None = None) -> dict[str, Pool]:
    """Draw all six pools.

    Parameters
    ----------
    mesh : WallMesh
    coords : fibers.coordinates.CardiacCoordinates
    law : FiberLaw
    septum : fibers.segments.Septum or None
        None gives ``aha_segment`` 0 everywhere.
    settings : PoolSettings
        Counts per pool, ``seed``, ``sampler`` and ``margin`` (used only without ``box``).
    box : Box, optional
        Region of the background pool. Default: `default_box` with ``settings.margin``.
    locator : Locator, optional
        A locator of this mesh to reuse.
    drawn : dict, optional
        The positions from :func:`draw_positions` for this mesh, settings and box, drawn
        earlier (the pipeline draws them while the coordinates are solved).

    Returns
    -------
    dict of str to Pool
        Keyed by `POOL_NAMES`.
    """
    drawn = draw_positions(mesh, settings, box=box, locator=locator) if drawn is None else drawn
    pools = {}
    for name in POOL_NAMES:
        arrays = dict(drawn[name])
        if "_cells" in arrays:  # a pool in the wall or on its faces: the fields at its points
            cells, weights = arrays.pop("_cells"), arrays.pop("_weights")
            ids = {k: arrays.pop(k) for k in ("face", "tet") if k in arrays}
            arrays.update(point_fields(arrays["points"], cells, weights, mesh, coords, law, septum))
            arrays.update(ids)
        pools[name] = Pool(name, arrays)
    if settings.float32:
        pools = {name: Pool(name, as_float32(pool.arrays)) for name, pool in pools.items()}
    return pools


def draw_positions(mesh: WallMesh, settings: PoolSettings, *, box: Box | None = None,
                   locator: Locator | None = None, outside: dict | None = None) -> dict[str, dict]:
    """The points of every pool and what they are drawn from, before any field is evaluated.

    Needs the mesh alone, not the coordinates. Returns, per pool name, its arrays; the pools in
    the wall and on the faces also carry ``_cells`` (the nodes of each point's element or face)
    and ``_weights`` (its barycentric weights), from which :func:`build_pools` interpolates.
    ``outside``: the cavity and background pools from :func:`draw_outside`, drawn earlier
    with the same settings and box.
    """
    _check(settings)
    box = default_box(mesh, settings.margin) if box is None else box
    rngs = _generators(settings)
    drawn = {}

    n = int(settings.myocardium)
    unit = _unit(rngs["myocardium"], n, 4, settings.sampler)
    volumes = mesh.cell_volumes
    tet = _pick(np.abs(volumes), unit[:, 0])
    bary = fold_to_tet(unit[:, 1:])
    cells = mesh.tets[tet]
    drawn["myocardium"] = {"points": np.einsum("km,kmj->kj", bary, mesh.points[cells]), "tet": tet,
                           "_cells": cells, "_weights": bary}
    log.debug("pool myocardium: %d points", n)

    normals, areas = meshtools.triangle_normals(mesh.points, mesh.faces)
    owner = face_owners(mesh) if any(getattr(settings, k) for k in _SURFACE_TAGS) else None
    for name, tag in _SURFACE_TAGS.items():
        n = int(getattr(settings, name))
        rows = np.flatnonzero(mesh.face_tags == tag)
        if n and not len(rows):
            raise InputError(f"the mesh has no {name} faces to sample the {name} pool on: "
                             f"set pools.{name} = 0 or check the face tags")
        unit = _unit(rngs[name], n, 3, settings.sampler)
        face = rows[_pick(areas[rows], unit[:, 0])] if n else np.zeros(0, np.int64)
        w = fold_to_triangle(unit[:, 1:])
        cells = mesh.faces[face]
        drawn[name] = {"points": np.einsum("km,kmj->kj", w, mesh.points[cells]), "normal": normals[face],
                       "face": face, "tet": owner[face] if n else np.zeros(0, np.int64),
                       "_cells": cells, "_weights": w}
        log.debug("pool %s: %d points", name, n)

    drawn.update(draw_outside(mesh, settings, box=box, locator=locator) if outside is None else outside)
    return drawn


def draw_outside(surface, settings: PoolSettings, *, box: Box | None = None,
                 locator: Locator | None = None) -> dict[str, dict]:
    """The cavity and background pools' points, which need the wall's boundary alone.

    ``surface`` is a `WallMesh` or the `fibers.mesh.Boundary` it is filled from: the same
    triangles, so the same points (the pipeline draws them while gmsh fills the volume).
    A ``locator`` (of a mesh) tells the wall instead of the boundary's parity.
    """
    _check(settings)
    box = default_box(surface, settings.margin) if box is None else box
    rngs = _generators(settings)
    drawn = {}
    if (settings.cavity or settings.background) and not np.any(surface.face_tags == ENDO):
        raise InputError("the mesh has no endo faces, so the cavity cannot be told from the "
                         "background: set pools.cavity and pools.background to 0 or check the "
                         "face tags")
    cavity = EnclosedTest(surface) if settings.cavity or settings.background else None
    endo_local = surface.axis.to_local(surface.points[surface.face_nodes(ENDO)])
    lo = endo_local.min(axis=0)
    hi = np.r_[endo_local[:, :2].max(axis=0), 0.0]
    lo[2] = min(lo[2], -1e-9)
    frame = surface.axis.frame()
    cav_box = Box(corner=surface.axis.to_world(lo), edges=(hi - lo)[:, None] * frame)
    points = _rejection(rngs["cavity"], int(settings.cavity), settings.sampler,
                        cav_box.sample, cavity, 0.5)
    drawn["cavity"] = {"points": points}
    log.debug("pool cavity: %d points", len(points))

    # outside the wall: the ray-parity test against endo and epi faces is exact for this mesh
    # and needs no element search structure (a Locator costs ~2 s to build at 500k tetrahedra);
    # a given locator is used instead
    if locator is not None:
        in_wall = lambda p: locator(p)[0] >= 0  # noqa: E731
    elif settings.background:
        in_wall = EnclosedTest(surface, tags=(ENDO, EPI))
    # the guess only sizes the draws: the points are the same whatever it is (see _rejection)
    wall_share = meshtools.enclosed_volume(surface.points, surface.faces) / max(box.volume, 1e-300)
    points = _rejection(rngs["background"], int(settings.background), settings.sampler,
                        box.sample, lambda p: ~in_wall(p), max(1.0 - wall_share, 0.05))
    depth = segments.depth_below_base(points, surface.axis)
    region = np.where(depth < 0.0, ABOVE_BASE,
                      np.where(cavity(points) if len(points) else False, CAVITY, OUTSIDE))
    drawn["background"] = {"points": points, "region": region.astype(np.int8),
                           "region_names": np.array(REGION_NAMES)}
    log.debug("pool background: %d points", len(points))
    return drawn


def as_float32(arrays: dict) -> dict:
    """The same arrays with every float64 one as float32 (points, fields); integers unchanged."""
    return {k: v.astype(np.float32) if v.dtype == np.float64 else v for k, v in arrays.items()}


# -- reading and batching --------------------------------------------------------------------

def load(path) -> dict[str, np.ndarray]:
    """Arrays of one pool file (``pools/<name>.npz``); see `fibers.io.pools.read_pool`."""
    from fibers.io.pools import read_pool
    return read_pool(path)


def batches(arrays: dict, batch_size: int, *, seed: int, epochs: int = 1,
            drop_last: bool = False) -> Iterator[dict[str, np.ndarray]]:
    """Random mini-batches of a pool's per-point arrays.

    Parameters
    ----------
    arrays : dict of str to ndarray
        A pool's arrays; per-point arrays are batched, name tables (keys ending in
        ``_names``, such as ``region_names``) are passed through unchanged.
    batch_size : int
    seed : int
        Seeds the shuffles: same seed, same batches.
    epochs : int
        Passes over the pool, each in a fresh random order.
    drop_last : bool
        Skip a final batch smaller than ``batch_size``.

    Yields
    ------
    dict of str to ndarray
    """
    if int(batch_size) != batch_size or batch_size < 1:
        raise InputError(f"batch_size is {batch_size!r}: give a whole number >= 1")
    n = len(arrays["points"])
    per_point = {k: v for k, v in arrays.items() if not k.endswith("_names")}
    shared = {k: v for k, v in arrays.items() if k not in per_point}
    rng = np.random.default_rng(seed)
    for _ in range(epochs):
        order = rng.permutation(n)
        for start in range(0, n, int(batch_size)):
            idx = order[start:start + int(batch_size)]
            if drop_last and len(idx) < batch_size:
                break
            batch = {k: v[idx] for k, v in per_point.items()}
            batch.update(shared)
            yield batch
