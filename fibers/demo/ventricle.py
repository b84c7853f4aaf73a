"""A synthetic left ventricle of our own, sampled like a short-axis cine stack.

Two modes share one generator:

- the demo subject: an end-diastolic ventricle of realistic size whose wall thickness varies
  around and along the axis, with contour noise and breath-hold shifts, placed as a heart sits
  in the chest (``anatomical_frame``);
- the exact mode: coaxial spheroids cut by a base plane, whose volumes have a closed form
  (elementary calculus: the volume of a spheroid cap), for the tests.

The body lives in a local frame whose z axis points from apex to base, the spheroids centred at
the origin and the base plane at ``z = base_z``. ``rotation`` and ``translation`` put it into the
scanner's world frame: ``world = rotation @ local + translation``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from fibers.config import Landmarks
from fibers.types import RawContours


@dataclass(frozen=True)
class SyntheticLV:
    """Endocardial and epicardial surfaces of a synthetic ventricle.

    ``endo`` and ``epi`` are (equatorial radius, polar half-axis) in mm. The radius of a surface
    at height z and angle t about the axis is ``b(t, z) * sqrt(1 - z^2 / a^2)`` with
    ``b(t, z) = b * (1 + sum_k amp_k cos(m_k t - phase_k) * (1 + slope_k * z / a))``:
    ``endo_waves`` and ``epi_waves`` hold (m, amp, phase, slope) rows, empty in exact mode.
    """

    endo: tuple[float, float] = (25.0, 57.0)
    epi: tuple[float, float] = (34.0, 65.0)
    base_z: float = 20.0
    endo_waves: tuple[tuple[float, float, float, float], ...] = ()
    epi_waves: tuple[tuple[float, float, float, float], ...] = ()
    rotation: np.ndarray = field(default_factory=lambda: np.eye(3))
    translation: np.ndarray = field(default_factory=lambda: np.zeros(3))
    septum_angles: tuple[float, float] = (175.0, 55.0)  # anterior, inferior insertion, degrees
    # about +z (apex to base): from the anterior insertion through the septum to the inferior one
    # the angle falls, i.e. counter-clockwise as seen from the apex, as in the usual anatomy

    # -- geometry in the local frame ---------------------------------------------------------
    def radius(self, surface: str, z: np.ndarray, theta: np.ndarray) -> np.ndarray:
        """Radius (mm) of ``"endo"`` or ``"epi"`` at local height z and angle theta (radians)."""
        b, a = self.endo if surface == "endo" else self.epi
        waves = self.endo_waves if surface == "endo" else self.epi_waves
        z, theta = np.broadcast_arrays(np.asarray(z, float), np.asarray(theta, float))
        scale = np.ones_like(z)
        for m, amp, phase, slope in waves:
            scale = scale + amp * np.cos(m * theta - phase) * (1.0 + slope * z / a)
        return b * scale * np.sqrt(np.clip(1.0 - (z / a) ** 2, 0.0, None))

    def inside(self, surface: str, local: np.ndarray) -> np.ndarray:
        """Whether local points (N, 3) lie inside a surface and below the base plane."""
        z = local[:, 2]
        a = (self.endo if surface == "endo" else self.epi)[1]
        rho = np.hypot(local[:, 0], local[:, 1])
        theta = np.arctan2(local[:, 1], local[:, 0])
        return (z <= self.base_z) & (np.abs(z) < a) & (rho < self.radius(surface, z, theta))

    def to_world(self, local: np.ndarray) -> np.ndarray:
        return np.asarray(local, float) @ np.asarray(self.rotation).T + self.translation

    def to_local(self, world: np.ndarray) -> np.ndarray:
        return (np.asarray(world, float) - self.translation) @ np.asarray(self.rotation)

    @property
    def long_axis(self) -> np.ndarray:
        """True long axis in the world frame, unit, apex to base."""
        return np.asarray(self.rotation) @ np.array([0.0, 0.0, 1.0])

    @property
    def length(self) -> float:
        """Base plane to epicardial apex, mm."""
        return self.base_z + self.epi[1]

    # -- volumes -------------------------------------------------------------------------------
    def volumes_ml(self) -> dict[str, float]:
        """Cavity and wall volumes in mL.

        Exact mode: the spheroid cap below the plane z = c, V = pi b^2 [(c + a) - (c^3 + a^3) /
        (3 a^2)] (elementary calculus; CRC Standard Mathematical Tables). With waves: the same
        integral of r^2 / 2 over angle and height, by quadrature.
        """
        def cap(surface):
            b, a = self.endo if surface == "endo" else self.epi
            c = min(self.base_z, a)
            waves = self.endo_waves if surface == "endo" else self.epi_waves
            if not waves:
                return np.pi * b * b * ((c + a) - (c**3 + a**3) / (3 * a * a))
            z = np.linspace(-a, c, 2001)
            t = np.linspace(0, 2 * np.pi, 721)[:-1]
            r = self.radius(surface, z[:, None], t[None, :])
            area = 0.5 * (r**2).mean(axis=1) * 2 * np.pi
            return float(np.trapezoid(area, z))
        cavity, outer = cap("endo"), cap("epi")
        return {"cavity_ml": cavity / 1000.0, "myocardium_ml": (outer - cavity) / 1000.0}

    # -- sampling like a scanner ----------------------------------------------------------------
    def landmarks(self, depth: float = 8.0) -> Landmarks:
        """RV insertion points on the epicardium ``depth`` mm below the base plane."""
        z = self.base_z - depth
        pts = []
        for deg in self.septum_angles:
            t = np.radians(deg)
            r = float(self.radius("epi", z, t))
            pts.append(self.to_world(np.array([[r * np.cos(t), r * np.sin(t), z]]))[0])
        return Landmarks(pts[0], pts[1], source="synthetic")

    def sample_stack(self, *, spacing: float = 8.0, point_spacing: float = 1.5,
                     noise: float = 0.0, shift: float = 0.0, tilt_deg: float = 0.0,
                     min_radius: float = 3.0, seed: int = 0) -> tuple[RawContours, np.ndarray]:
        """Contours of short-axis slices from the base plane toward the apex.

        Slices are ``spacing`` mm apart, the first in the base plane. A slice shows an
        endocardial contour where the cavity radius exceeds ``min_radius`` and is kept while the
        epicardial radius does; the last slice kept beyond the cavity shows the epicardium only.
        Points are ``point_spacing`` mm apart with Gaussian ``noise`` (mm, normal to the contour)
        and each slice is shifted in its plane by a Gaussian breath-hold offset of ``shift`` mm
        per direction (none on the first slice). ``tilt_deg`` tilts each slice plane at random by
        up to that angle. Returns the contours and the true in-plane shifts (S, 3), world frame.
        """
        rng = np.random.default_rng(seed)
        rows_s, rows_id, rows_p, shifts = [], [], [], []
        sid = 0
        for k in range(200):
            z = self.base_z - k * spacing
            t_probe = np.linspace(0, 2 * np.pi, 64)
            if self.radius("epi", z, t_probe).min() < min_radius:
                break
            offset = np.zeros(3)
            if k > 0 and shift > 0:
                offset[:2] = rng.normal(0.0, shift, 2)
            tilt = _small_rotation(rng, tilt_deg) if tilt_deg > 0 else np.eye(3)
            for surface in ("endo", "epi"):
                probe = self.radius(surface, z, t_probe)
                if probe.min() < min_radius:
                    continue
                n = max(12, int(round(2 * np.pi * probe.mean() / point_spacing)))
                t = rng.uniform(0, 2 * np.pi) + np.linspace(0, 2 * np.pi, n, endpoint=False)
                r = self.radius(surface, z, t) + (rng.normal(0.0, noise, n) if noise > 0 else 0.0)
                local = np.column_stack([r * np.cos(t), r * np.sin(t), np.zeros(n)])
                local = local @ tilt.T + [0.0, 0.0, z] + offset
                rows_s += [surface] * n
                rows_id.append(np.full(n, sid))
                rows_p.append(self.to_world(local))
            shifts.append(np.asarray(self.rotation) @ offset)
            sid += 1
        points = np.concatenate(rows_p)
        contours = RawContours(structure=np.array(rows_s), slice_id=np.concatenate(rows_id),
                               points=points, line=np.arange(2, len(points) + 2),
                               source="synthetic")
        return contours, np.array(shifts)


def _small_rotation(rng: np.random.Generator, max_deg: float) -> np.ndarray:
    """A rotation about a random in-plane axis by up to ``max_deg`` degrees."""
    phi = rng.uniform(0, 2 * np.pi)
    axis = np.array([np.cos(phi), np.sin(phi), 0.0])
    return rotation_about(axis, np.radians(rng.uniform(0, max_deg)))


def rotation_about(axis: np.ndarray, angle: float) -> np.ndarray:
    """Rotation matrix about a unit ``axis`` by ``angle`` radians (Rodrigues' formula)."""
    axis = np.asarray(axis, float) / np.linalg.norm(axis)
    k = np.array([[0, -axis[2], axis[1]], [axis[2], 0, -axis[0]], [-axis[1], axis[0], 0]])
    return np.eye(3) + np.sin(angle) * k + (1 - np.cos(angle)) * (k @ k)


def oblique_frame(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """A rotation tilting the long axis 30-60 degrees off the scanner axes, and a translation."""
    rng = np.random.default_rng(seed)
    tilt = rotation_about([1.0, 0.0, 0.0], np.radians(rng.uniform(30, 60)))
    spin = rotation_about([0.0, 0.0, 1.0], rng.uniform(0, 2 * np.pi))
    turn = rotation_about([0.0, 1.0, 0.0], np.radians(rng.uniform(-30, 30)))
    return turn @ spin @ tilt, rng.uniform(-60, 60, 3) + [0.0, -40.0, 80.0]


def anatomical_frame(septum_deg: float = 115.0, *, seed: int = 7) -> tuple[np.ndarray, np.ndarray]:
    """A rotation and translation that place the body as a heart sits in the chest.

    The world frame is NIfTI's right-anterior-superior (+x toward the patient's right, +y
    anterior, +z superior). The apex points to the left, anteriorly and inferiorly (apex
    direction about (-0.6, 0.55, -0.58), common practice for normal anatomy), and the local
    angle ``septum_deg`` (the septal bisector) faces the right-anterior side, where the right
    ventricle lies. ``seed`` turns the axis by a few degrees so subjects differ.
    """
    rng = np.random.default_rng(seed)
    apex = np.array([-0.6, 0.55, -0.58]) + rng.normal(0.0, 0.05, 3)
    up = -apex / np.linalg.norm(apex)                       # local +z: apex to base
    toward_rv = np.array([0.7, 0.7, 0.1])
    s = toward_rv - (toward_rv @ up) * up
    s /= np.linalg.norm(s)
    t = np.cross(up, s)
    phi = np.radians(septum_deg)
    # local e1, e2 such that cos(phi) e1 + sin(phi) e2 = s
    e1 = np.cos(phi) * s - np.sin(phi) * t
    e2 = np.cross(up, e1)
    rotation = np.column_stack([e1, e2, up])
    return rotation, np.array([20.0, -30.0, 60.0]) + rng.uniform(-10, 10, 3)


def demo_subject(seed: int = 7) -> SyntheticLV:
    """The built-in end-diastolic ventricle: about 120 mL cavity, 9-11 mm wall, 85 mm long.

    Thickness varies around (a thicker septum side, a slightly elliptic cavity) and along the
    axis (the modulation grows toward the base). It sits as a heart does in the right-anterior-
    superior world frame (``anatomical_frame``): apex to the left, anterior and inferior, the
    septum facing right-anterior.
    """
    rotation, translation = anatomical_frame(seed=seed)
    return SyntheticLV(
        endo=(25.0, 57.0), epi=(34.5, 65.0), base_z=20.0,
        endo_waves=((2.0, 0.05, 0.4, 0.3),),
        epi_waves=((1.0, 0.035, 2.6, 0.5), (2.0, 0.03, 0.9, 0.2)),
        rotation=rotation, translation=translation,
    )


def spheroid_shell(endo=(25.0, 57.0), epi=(34.0, 65.0), base_z=20.0, *, seed=None) -> SyntheticLV:
    """Exact mode: coaxial spheroids, optionally in an oblique frame drawn from ``seed``."""
    if seed is None:
        return SyntheticLV(endo=tuple(endo), epi=tuple(epi), base_z=base_z)
    rotation, translation = oblique_frame(seed)
    return SyntheticLV(endo=tuple(endo), epi=tuple(epi), base_z=base_z, rotation=rotation,
                       translation=translation)
