"""A synthetic pair of ventricles of our own: the analytic left ventricle plus a crescent right one.

The right-ventricular cavity is a crescent wrapped around the left ventricle's epicardium. In
the left ventricle's local frame (z from apex to base, base plane at ``z = base_z``), with
``h = base_z - z`` the depth below the base and ``theta`` the angle about the axis:

- the cavity is ``R(z, theta) < r < R(z, theta) + w(h, theta)`` for ``theta`` between the two
  insertion angles, ``R`` the left epicardial radius, and
  ``w = width * sqrt(1 - (h / depth)^2) * sin(pi u)``, ``u`` the angle's fraction of the way
  from the inferior to the anterior insertion. Along the septum the cavity is bounded by the
  left epicardium itself (the septum is the left ventricle's wall there);
- the outer surface of the right ventricle lies ``wall`` mm beyond the cavity radially:
  ``r < R + w + wall * c(h, theta)``, where ``c`` is 1 over the cavity and falls smoothly to 0
  (a squared cosine) within ``taper`` degrees beyond each insertion and ``wall`` mm below the
  cavity's apical end, so the free wall wraps the crescent's tips and its apex.

Volumes are integrals of ``(r_out^2 - r_in^2) / 2`` over angle and height (elementary calculus,
cylindrical coordinates), evaluated by Gauss-Legendre quadrature on pieces where the integrand is
smooth: they are exact to about 1e-8 relative, the yardstick of the biventricular tests.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fibers.config import Landmarks
from fibers.demo import ventricle
from fibers.demo.ventricle import SyntheticLV
from fibers.masks import LabelValues
from fibers.types import RawContours

# Right-ventricular free-wall thickness of the synthetic subject, mm: adult free walls are
# 3-5 mm thick (upper normal 5 mm: Rudski et al., J Am Soc Echocardiogr 2010, from memory).
RV_WALL_MM = 3.5
#: Label values of the biventricular demo's label map: LV cavity, LV wall, RV cavity, RV wall.
BIV_LABELS = LabelValues(cavity=1, wall=2, rv=3, rv_wall=4)


@dataclass(frozen=True)
class SyntheticBiV:
    """A synthetic biventricular shape (see the module docstring for the formulas).

    Attributes
    ----------
    lv : SyntheticLV
        The left ventricle, its frame and its base plane.
    width : float, mm
        Largest radial width of the right-ventricular cavity (at the base, mid-crescent).
    depth : float, mm
        Depth below the base plane where the cavity ends (its apex).
    wall : float, mm
        Free-wall thickness beyond the cavity (radial).
    taper : float, degrees
        Angle beyond each insertion over which the free wall thins to nothing.
    """

    lv: SyntheticLV = field(default_factory=SyntheticLV)
    width: float = 28.0
    depth: float = 62.0
    wall: float = RV_WALL_MM
    taper: float = 12.0

    # -- the insertion angles -------------------------------------------------------------------
    @property
    def span(self) -> tuple[float, float]:
        """(start, end) radians of the cavity, rising about +z: inferior to anterior insertion."""
        anterior, inferior = np.radians(self.lv.septum_angles)
        return float(inferior), float(inferior + np.mod(anterior - inferior, 2 * np.pi))

    def _u(self, theta):
        """Fraction (K,) of the way from the inferior to the anterior insertion; outside [0, 1]
        beyond them (angles taken in the window centred on the crescent)."""
        lo, hi = self.span
        mid = 0.5 * (lo + hi)
        t = mid + np.mod(np.asarray(theta, float) - mid + np.pi, 2 * np.pi) - np.pi
        return (t - lo) / (hi - lo)

    # -- radii ----------------------------------------------------------------------------------
    def cavity_width(self, z, theta) -> np.ndarray:
        """Radial width w (mm) of the right-ventricular cavity at local height z, angle theta."""
        z, theta = np.broadcast_arrays(np.asarray(z, float), np.asarray(theta, float))
        h = self.lv.base_z - z
        u = self._u(theta)
        along = np.sqrt(np.clip(1.0 - (h / self.depth) ** 2, 0.0, None)) * (h >= 0) * (h <= self.depth)
        around = np.where((u > 0) & (u < 1), np.sin(np.pi * np.clip(u, 0, 1)), 0.0)
        return self.width * along * around

    def outer_width(self, z, theta) -> np.ndarray:
        """Radial distance (mm) from the left epicardium to the right ventricle's outer surface."""
        z, theta = np.broadcast_arrays(np.asarray(z, float), np.asarray(theta, float))
        h = self.lv.base_z - z
        u = self._u(theta)
        lo, hi = self.span
        beyond = np.maximum(-u, u - 1.0) * (hi - lo)        # radians past the nearer insertion
        c_theta = _squared_cosine(np.clip(beyond, 0, None) / np.radians(self.taper))
        c_h = _squared_cosine(np.clip(h - self.depth, 0, None) / self.wall) * (h >= 0)
        return self.cavity_width(z, theta) + self.wall * c_theta * c_h

    # -- volumes ---------------------------------------------------------------------------------
    def volumes_ml(self) -> dict[str, float]:
        """LV cavity, RV cavity and wall volumes in mL (both ventricles' myocardium together).

        ``lv_myocardium_ml`` is the left wall alone (as the left-ventricular route sees it).
        """
        lv = self.lv.volumes_ml()
        rv_cavity = self._ring_volume(self.cavity_width, taper=False) / 1000.0
        rv_outer = self._ring_volume(self.outer_width, taper=True) / 1000.0
        return {"lv_cavity_ml": lv["cavity_ml"], "rv_cavity_ml": rv_cavity,
                "wall_ml": lv["myocardium_ml"] + rv_outer - rv_cavity,
                "lv_myocardium_ml": lv["myocardium_ml"], "rv_free_wall_ml": rv_outer - rv_cavity}

    def _ring_volume(self, width, *, taper: bool, n: int = 96) -> float:
        """Volume (mm^3) between the left epicardium R and R + width(z, theta), by quadrature."""
        lo, hi = self.span
        pieces_t = [(lo, hi)]
        pieces_h = [("sqrt", 0.0, self.depth)]
        if taper:
            tap = np.radians(self.taper)
            pieces_t += [(lo - tap, lo), (hi, hi + tap)]
            pieces_h.append(("plain", self.depth, self.depth + self.wall))
        x, wx = np.polynomial.legendre.leggauss(n)
        total = 0.0
        for kind, h0, h1 in pieces_h:
            if kind == "sqrt":  # h = depth sin(phi) removes the square-root end point
                phi = 0.25 * np.pi * (x + 1.0)
                h, wh = self.depth * np.sin(phi), 0.25 * np.pi * wx * self.depth * np.cos(phi)
            else:
                h, wh = 0.5 * (h1 - h0) * (x + 1.0) + h0, 0.5 * (h1 - h0) * wx
            for t0, t1 in pieces_t:
                t, wt = 0.5 * (t1 - t0) * (x + 1.0) + t0, 0.5 * (t1 - t0) * wx
                Z, T = np.meshgrid(self.lv.base_z - h, t, indexing="ij")
                r = self.lv.radius("epi", Z, T)
                w = width(Z, T)
                total += float(np.einsum("i,j,ij->", wh, wt, r * w + 0.5 * w * w))
        return total

    # -- membership, for independent checks ------------------------------------------------------
    def classify(self, local: np.ndarray) -> np.ndarray:
        """0 outside, 1 LV cavity, 2 RV cavity, 3 wall, for local points (N, 3)."""
        z = local[:, 2]
        theta = np.arctan2(local[:, 1], local[:, 0])
        rho = np.hypot(local[:, 0], local[:, 1])
        r_epi = self.lv.radius("epi", z, theta)
        in_lv_epi = self.lv.inside("epi", local)
        below = z <= self.lv.base_z
        ring = below & ~in_lv_epi & (rho >= r_epi)
        in_rv = ring & (rho < r_epi + self.cavity_width(z, theta))
        in_outer = ring & (rho < r_epi + self.outer_width(z, theta))
        out = np.zeros(len(local), np.int8)
        out[in_lv_epi | in_outer] = 3
        out[self.lv.inside("endo", local)] = 1
        out[in_rv] = 2
        return out

    # -- label map --------------------------------------------------------------------------------
    def voxelise(self, *, spacing=(1.5, 1.5, 8.0), values=None, **kwargs) -> tuple[np.ndarray, np.ndarray]:
        """Label volume and voxel-to-world affine of both ventricles (a short-axis stack).

        Labels (``values``, default `BIV_LABELS`): background 0, left cavity, left wall (the
        septum included: it is left-ventricular wall), right cavity, right free wall. Each voxel
        takes the majority class of in-plane samples at its centre's plane, from
        :meth:`classify`, on the grid of :func:`fibers.demo.voxels.voxelise` (``kwargs`` go
        there: tilt, spin, handedness, supersampling, base offset).

        Returns
        -------
        labels : ndarray (I, J, K) uint8
        affine : ndarray (4, 4), mm
        """
        from fibers.demo import voxels

        values = values or BIV_LABELS

        def classes(local):
            cls = self.classify(local)            # 0 outside, 1 LV cavity, 2 RV cavity, 3 wall
            lv_wall = (cls == 3) & self.lv.inside("epi", local)
            out = np.zeros(len(local), np.int64)
            out[cls == 1] = 1
            out[lv_wall] = 2
            out[cls == 2] = 3
            out[(cls == 3) & ~lv_wall] = 4
            return out

        codes = np.array([0, values.cavity, values.wall, values.rv, values.rv_wall])
        return voxels.voxelise(self.lv, spacing=spacing, rv=False, values=values, classes=(classes, codes),
                               rv_thickness=self.width + self.wall + 2.0, **kwargs)

    # -- landmarks and contours -------------------------------------------------------------------
    def landmarks(self, depth: float = 8.0) -> Landmarks:
        """The insertion points: where the cavity's tips meet the left epicardium."""
        return self.lv.landmarks(depth)

    def sample_stack(self, *, spacing: float = 8.0, point_spacing: float = 1.5, noise: float = 0.0,
                     shift: float = 0.0, seed: int = 0, rv_epi: bool = True) -> tuple[RawContours, np.ndarray]:
        """Contours ``endo``, ``epi``, ``rv_endo`` (and ``rv_epi``) of short-axis slices.

        The left ventricle's contours are those of :meth:`SyntheticLV.sample_stack`; each slice
        that cuts the right cavity (wider than ``point_spacing``) also gets the closed crescent
        ``rv_endo``, running on the left epicardium along the septum, and ``rv_epi``, the outer
        boundary of the right ventricle, again closed along the left epicardium. The slice's
        breath-hold shift is applied to them too; noise (mm) moves the free-wall points only.
        """
        lv_contours, shifts = self.lv.sample_stack(spacing=spacing, point_spacing=point_spacing,
                                                   noise=noise, shift=shift, seed=seed)
        rng = np.random.default_rng(seed + 1)
        rows_s, rows_id, rows_p = [], [], []
        structures = (("rv_endo", self.cavity_width), ("rv_epi", self.outer_width))[: 2 if rv_epi else 1]
        for k in np.unique(lv_contours.slice_id):
            z = self.lv.base_z - k * spacing
            offset = np.asarray(self.lv.rotation).T @ shifts[k]
            for name, width in structures:
                local = self._crescent(z, width, point_spacing, noise, rng)
                if local is None:
                    continue
                rows_s += [name] * len(local)
                rows_id.append(np.full(len(local), k))
                rows_p.append(self.lv.to_world(local + offset))
        if not rows_p:
            return lv_contours, shifts
        points = np.concatenate([lv_contours.points] + rows_p)
        contours = RawContours(structure=np.concatenate([lv_contours.structure, np.array(rows_s)]),
                               slice_id=np.concatenate([lv_contours.slice_id] + rows_id), points=points,
                               line=np.arange(2, len(points) + 2), source="synthetic")
        return contours, shifts

    def _crescent(self, z, width, point_spacing, noise, rng):
        """Closed crescent (n, 3) local at height z between R and R + width, or None if thin."""
        ends = self._support_ends(z, width)
        tt = np.linspace(ends[0], ends[1], 2001)
        if width(np.full_like(tt, z), tt).max() < point_spacing:
            return None
        r_in = self.lv.radius("epi", z, tt)
        r_out = r_in + width(np.full_like(tt, z), tt)
        inner = np.column_stack([r_in * np.cos(tt), r_in * np.sin(tt)])
        outer = np.column_stack([r_out * np.cos(tt), r_out * np.sin(tt)])[::-1][1:-1]
        loop = np.concatenate([inner, outer])
        n = len(inner)
        resampled, is_outer = _resample_closed(loop, point_spacing, n)
        if noise > 0:
            normal = _outward_normals(resampled)
            resampled = resampled + normal * (rng.normal(0.0, noise, len(resampled)) * is_outer)[:, None]
        return np.column_stack([resampled, np.full(len(resampled), z)])

    def _support_ends(self, z, width):
        """Angles (radians) where width(z, .) falls to zero at each end of the crescent."""
        lo, hi = self.span
        tap = np.radians(self.taper) if width == self.outer_width else 0.0  # bound methods: ==, not is
        ends = []
        for start, inward in ((lo - tap, +1.0), (hi + tap, -1.0)):
            a, b = start, 0.5 * (lo + hi)  # a: zero width, b: positive width
            for _ in range(50):
                m = 0.5 * (a + b)
                if width(np.array([z]), np.array([m]))[0] > 1e-9:
                    b = m
                else:
                    a = m
            ends.append(a)
        return ends


def _squared_cosine(x):
    """1 at x = 0 falling to 0 at x = 1 with zero slope at both ends; 0 beyond."""
    return np.where(x < 1.0, np.cos(0.5 * np.pi * np.clip(x, 0, 1)) ** 2, 0.0)


def _resample_closed(loop: np.ndarray, step: float, n_inner: int):
    """Points about ``step`` apart along a closed polygon (K, 2); also which lie past ``n_inner``
    (on the outer arc)."""
    closed = np.vstack([loop, loop[:1]])
    seg = np.linalg.norm(np.diff(closed, axis=0), axis=1)
    arc = np.concatenate([[0.0], np.cumsum(seg)])
    n = max(12, int(round(arc[-1] / step)))
    s = np.linspace(0.0, arc[-1], n, endpoint=False)
    pts = np.column_stack([np.interp(s, arc, closed[:, 0]), np.interp(s, arc, closed[:, 1])])
    return pts, s > arc[n_inner - 1]


def _outward_normals(loop: np.ndarray) -> np.ndarray:
    """Unit normals (K, 2) of a closed polygon, pointing away from its area's side."""
    tangent = np.roll(loop, -1, axis=0) - np.roll(loop, 1, axis=0)
    normal = np.column_stack([tangent[:, 1], -tangent[:, 0]])
    normal /= np.maximum(np.linalg.norm(normal, axis=1), 1e-12)[:, None]
    area = 0.5 * np.sum(loop[:, 0] * np.roll(loop[:, 1], -1) - np.roll(loop[:, 0], -1) * loop[:, 1])
    return normal if area > 0 else -normal


def demo_subject(seed: int = 7) -> SyntheticBiV:
    """The built-in biventricular subject: the demo left ventricle with a crescent right one."""
    return SyntheticBiV(lv=ventricle.demo_subject(seed))


def exact_biventricle(*, seed=None, **kwargs) -> SyntheticBiV:
    """Coaxial spheroids (exact mode) with the crescent right ventricle, for the tests."""
    return SyntheticBiV(lv=ventricle.spheroid_shell(seed=seed), **kwargs)
