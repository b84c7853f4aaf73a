"""A moving synthetic subject: a closed-form cardiac cycle that keeps volume exactly.

The motion is of our own design, written in the local frame of a :class:`SyntheticLV` (z along
the long axis from apex to base, cylindrical radius R and angle Theta about it). A material
point (R, Theta, Z) moves to

    z' = z0 + int_z0^Z lam(zeta) dzeta         long-axis shortening toward the fixed apex z0
    r'^2 = R^2 / lam(Z) + c(Z)                  the cavity closes, the wall thickens
    theta' = Theta + phi(Z)                     torsion, growing linearly from the base to the apex

With ``theta'`` and ``z'`` depending on Z alone, the Jacobian matrix in cylindrical coordinates
is upper triangular and ``J = (r'/R) (dr'/dR) lam = (r'/R) (R / (lam r')) lam = 1`` for every
lam(Z), c and phi: the motion is isochoric exactly (not just to first order). lam(Z) is 1 at the
apex and reaches its peak value 20 mm above it (a smooth step), so the apex barely moves. In the
local cylindrical basis (e_R, e_Theta, e_z) the deformation gradient is

    F = r'_R e_r' (x) e_R + (r'/R) e_theta' (x) e_Theta + (r'_Z e_r' + r' phi_Z e_theta' + lam e_z) (x) e_z

with ``r'_R = R / (lam r')`` and ``r'_Z = (c_Z - R^2 lam_Z / lam^2) / (2 r')``. Here
``c(Z) = -kappa rho(Z)^2 q(Z)``, ``rho(Z)`` the wave-free endocardial radius, and ``q`` a smooth
step from 0 at 3 mm above the endocardial apex to 1 over 10 mm: c vanishes where the wall
crosses the axis, so no point of the solid apical cap is torn open, and c is continuously
differentiable. Each of lam, kappa and phi follows ``s(t) = (1 - cos 2 pi t / T) / 2``: frame 0
is the reference, the peak of contraction lies halfway through the cycle.

Magnitudes at the peak (chosen to resemble published tagged-MRI values, from memory): long-axis
stretch 0.85; on the demo build the whole-wall means are E_ll -0.13, E_cc -0.12 (-0.16 in the
mid segments, about -0.2 at the endocardium), E_rr +0.45, E_cl -0.03, with 15 degrees of apical
rotation; the apical cap (segment 17) stays nearly unstrained.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from fibers.demo.ventricle import SyntheticLV


@dataclass(frozen=True)
class IsochoricCycle:
    """The closed-form cycle on a synthetic ventricle.

    Attributes
    ----------
    lv : SyntheticLV
        Gives the local frame (rotation, translation) and the endocardial radius.
    frames : int
        Frames per cycle; frame 0 is the reference (no displacement).
    period_ms : float
    long_stretch : float
        Long-axis stretch lam at the peak, away from the apex.
    squeeze : float
        kappa at the peak (dimensionless; the endocardial circumferential stretch at mid height is
        ``sqrt(1 / lam - kappa)``).
    apex_rotation_deg : float
        Rotation of the apex about +z (the long axis, apex to base) at the peak; the base does not turn.
    """

    lv: SyntheticLV
    frames: int = 20
    period_ms: float = 800.0
    long_stretch: float = 0.85
    squeeze: float = 0.65
    apex_rotation_deg: float = 15.0
    ramp_mm: float = 10.0
    tip_mm: float = 3.0
    apex_mm: float = 20.0

    # -- time -------------------------------------------------------------------------------
    @property
    def time_ms(self) -> np.ndarray:
        return np.arange(self.frames) * self.period_ms / self.frames

    def activation(self) -> np.ndarray:
        """s(t) in [0, 1] per frame."""
        return 0.5 * (1.0 - np.cos(2.0 * np.pi * np.arange(self.frames) / self.frames))

    @property
    def peak_frame(self) -> int:
        return int(np.argmax(self.activation()))

    # -- the map ------------------------------------------------------------------------------
    @property
    def fixed_z(self) -> float:
        """The plane that does not move along the axis: the epicardial apex."""
        return -self.lv.epi[1]

    def _c(self, z: np.ndarray, kappa: float) -> tuple[np.ndarray, np.ndarray]:
        """c(Z) and dc/dZ (mm^2, mm)."""
        b, a = self.lv.endo
        rho2 = b * b * (1.0 - (z / a) ** 2)
        drho2 = -2.0 * b * b * z / (a * a)
        s = np.clip((z - (-a + self.tip_mm)) / self.ramp_mm, 0.0, 1.0)
        q = s * s * (3.0 - 2.0 * s)                       # smoothstep: C1 at both ends
        dq = np.where((s > 0) & (s < 1), 6.0 * s * (1.0 - s) / self.ramp_mm, 0.0)
        return -kappa * rho2 * q, -kappa * (drho2 * q + rho2 * dq)

    def _long(self, z: np.ndarray, amount: float):
        """lam(Z) = 1 - amount g(Z), dlam/dZ, and z'(Z) = z0 + int_z0^Z lam.

        g rises smoothly from 0 at the fixed apex to 1 over ``apex_mm``: the apex itself does not
        shorten, so the solid cap (where c = 0 and r' = R / sqrt(lam)) does not bulge.
        """
        w = self.apex_mm
        u = np.clip((z - self.fixed_z) / w, 0.0, 1.0)
        g = u * u * (3.0 - 2.0 * u)
        dg = np.where((u > 0) & (u < 1), 6.0 * u * (1.0 - u) / w, 0.0)
        # int_z0^Z g = w (u^3 - u^4 / 2) inside the ramp, w / 2 + (Z - z0 - w) beyond it
        G = np.where(z - self.fixed_z > w, 0.5 * w + (z - self.fixed_z - w), w * (u ** 3 - 0.5 * u ** 4))
        return 1.0 - amount * g, -amount * dg, self.fixed_z + (z - self.fixed_z) - amount * G

    def _state(self, local: np.ndarray, frame: int):
        s = self.activation()[frame]
        kappa = self.squeeze * s
        twist = np.radians(self.apex_rotation_deg) * s
        X, Y, Z = local[:, 0], local[:, 1], local[:, 2]
        lam, dlam, z_new = self._long(Z, (1.0 - self.long_stretch) * s)
        R = np.hypot(X, Y)
        Theta = np.arctan2(Y, X)
        c, dc = self._c(Z, kappa)
        # r'^2 = R^2 / lam(Z) + c(Z): d(r'^2)/dZ = -R^2 lam' / lam^2 + c'
        dc = dc - R * R * dlam / (lam * lam)
        r2 = R * R / lam + c
        if np.any(r2 < 0.25 * R * R / lam):
            raise ValueError("the synthetic motion is not defined for points this close to the axis inside the cavity")
        r = np.sqrt(r2)
        span = self.lv.base_z - self.fixed_z
        phi = twist * (self.lv.base_z - Z) / span
        dphi = -twist / span
        return dict(lam=lam, R=R, Theta=Theta, Z=Z, z_new=z_new, r=r, dc=dc, phi=phi, dphi=dphi)

    def positions(self, points: np.ndarray, frame: int) -> np.ndarray:
        """Deformed world positions (N, 3) mm of reference world points at a frame."""
        st = self._state(self.lv.to_local(points), frame)
        theta = st["Theta"] + st["phi"]
        z = st["z_new"]
        return self.lv.to_world(np.column_stack([st["r"] * np.cos(theta), st["r"] * np.sin(theta), z]))

    def displacement(self, points: np.ndarray) -> np.ndarray:
        """Displacements (frames, N, 3) mm of reference world points."""
        return np.stack([self.positions(points, k) - points for k in range(self.frames)])

    def gradient(self, points: np.ndarray, frame: int) -> np.ndarray:
        """The closed-form deformation gradient F (N, 3, 3) at reference world points, world frame."""
        st = self._state(self.lv.to_local(points), frame)
        R = np.maximum(st["R"], 1e-12)
        r, lam = st["r"], st["lam"]
        T, t = st["Theta"], st["Theta"] + st["phi"]
        e_R = np.column_stack([np.cos(T), np.sin(T), np.zeros_like(T)])
        e_T = np.column_stack([-np.sin(T), np.cos(T), np.zeros_like(T)])
        e_r = np.column_stack([np.cos(t), np.sin(t), np.zeros_like(t)])
        e_t = np.column_stack([-np.sin(t), np.cos(t), np.zeros_like(t)])
        e_z = np.broadcast_to([0.0, 0.0, 1.0], e_R.shape)
        dr_dR = R / (lam * r)
        dr_dZ = st["dc"] / (2.0 * r)
        column_z = dr_dZ[:, None] * e_r + (r * st["dphi"])[:, None] * e_t + lam[:, None] * e_z
        F = (dr_dR[:, None, None] * e_r[:, :, None] * e_R[:, None, :]
             + (r / R)[:, None, None] * e_t[:, :, None] * e_T[:, None, :]
             + column_z[:, :, None] * e_z[:, None, :])
        Q = np.asarray(self.lv.rotation)
        # local to world, Q F Q^T, as two small matrix products over the stacked rows (BLAS)
        FQt = (F.reshape(-1, 3) @ Q.T).reshape(F.shape)
        return np.swapaxes((np.swapaxes(FQt, 1, 2).reshape(-1, 3) @ Q.T).reshape(F.shape), 1, 2)

    def describe(self) -> dict:
        return {"design": "isochoric closed-form cycle (fibers.demo.motion.IsochoricCycle)",
                "frames": self.frames, "period_ms": self.period_ms, "long_stretch_peak": self.long_stretch,
                "squeeze_peak": self.squeeze, "apex_rotation_deg_peak": self.apex_rotation_deg,
                "peak_frame": self.peak_frame,
                "map": "z' = z0 + int lam(Z) dZ; r'^2 = R^2 / lam(Z) + c(Z); theta' = Theta + phi(Z); J = 1 exactly"}


def closed_form_segments(cycle: IsochoricCycle, points: np.ndarray, tets: np.ndarray, frames: dict,
                         labels: np.ndarray) -> dict[str, np.ndarray]:
    """The closed-form segment means (T, 18) of every strain quantity on a build.

    The exact F of the motion at the 4 Gauss points of each cell, projected on the cell's
    reference frames (the same frames ``fibers strain`` uses), averaged over the cell by the
    Gauss rule and volume-weighted over each segment: what the analysis of the nodal
    displacements should reproduce.
    """
    from fibers import strain

    _, volume = strain.shape_gradients(points, tets)
    volume = np.abs(volume)
    # the cell means by the 4-point Gauss rule (degree 2): a closed form good to O(h^4) per cell
    gauss = np.einsum("qa,mai->mqi", strain.GAUSS4, points[tets[:, :4]]).reshape(-1, 3)
    at_points = {k: np.repeat(v, 4, axis=0) for k, v in frames.items()}
    out = {q: np.empty((cycle.frames, 18)) for q in strain.QUANTITIES}
    abs_dev = np.empty((cycle.frames, 18))
    valid = np.ones((1, len(tets)), bool)
    for k in range(cycle.frames):
        values = {q: v.reshape(-1, 4).mean(axis=1) for q, v in
                  strain.kinematics(cycle.gradient(gauss, k), at_points).items()}
        for q in strain.QUANTITIES:
            out[q][k] = strain.segment_means(values[q][None], volume, labels, valid)[0]
        abs_dev[k] = strain.segment_means(np.abs(values["J"] - 1.0)[None], volume, labels, valid)[0]
    out["abs_J_minus_1"] = abs_dev
    return out


def write_demo_motion(folder, lv: SyntheticLV, **cycle_options) -> dict:
    """Write ``motion.npz`` and ``motion_truth.json`` of the isochoric cycle into a build folder.

    The displacements are those of the closed-form map at the nodes of ``folder/mesh.vtu``;
    the truth file holds the cycle's parameters and the closed-form segment means (see
    :func:`closed_form_segments`) of every quantity, per frame, with segment 0 the whole wall.
    Returns the truth.
    """
    import json
    from pathlib import Path

    from fibers import strain
    from fibers.io.motion import read_build_mesh, write_motion

    folder = Path(folder)
    mesh = read_build_mesh(folder, finished=(folder / "manifest.json").is_file())
    cycle = IsochoricCycle(lv, **cycle_options)
    write_motion(folder / "motion.npz", cycle.displacement(mesh.points), time_ms=cycle.time_ms,
                 checksum=mesh.checksum)
    frames = strain.cell_frames(mesh.tets, mesh.point_fields, mesh.cell_fields)
    table = closed_form_segments(cycle, mesh.points, mesh.tets, frames, mesh.labels)
    truth = {
        "motion": cycle.describe(),
        "how": "the exact F of the map at the 4 Gauss points of each tetrahedron, on the cell's reference frames (as fibers "
               "strain takes them), volume-weighted per AHA segment; segment 0 is the whole wall",
        "time_ms": cycle.time_ms.tolist(),
        "segments": list(range(18)),
        "quantities": {q: np.round(v, 8).tolist() for q, v in table.items()},
    }
    tmp = folder / ".motion_truth.json.partial"
    tmp.write_text(json.dumps(truth, indent=1) + "\n")
    tmp.replace(folder / "motion_truth.json")
    return truth
