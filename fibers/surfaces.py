"""Stage 2: smooth endocardial and epicardial surfaces fitted to the contours.

Each surface is a graph in prolate spheroidal coordinates about the long axis,
``lambda = L(mu, theta)``, fitted by regularised least squares: a smooth field that averages
over contour noise and residual slice shifts instead of passing through every point. Each
surface's coordinate system (focal length, centre) comes from an ellipse fitted to its own
radius profile, so a spheroid-like surface has a nearly constant ``L``. ``mu = 0`` is the apical pole,
where every harmonic of order m >= 1 is damped by ``sin(mu)^m`` so the surface stays smooth; the
apex beyond the last contour follows from that smoothness and the bending penalty. The base is
the plane of the most basal slice, normal to the long axis.

Prolate coordinates in the axis frame (z = height above the base plane, centre at z = zc < 0):
``zc - z = d cosh(lambda) cos(mu)``, ``rho = d sinh(lambda) sin(mu)``, theta about the axis.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from fibers.errors import InputError
from fibers.types import LongAxis, Stack

DEGREE_AXIAL = 6        # polynomial degree in sin^2(mu/2) of the axisymmetric part
DEGREE_HARMONIC = 4     # polynomial degree in sin^2(mu/2) of each harmonic
HARMONICS = 4           # Fourier orders in theta
BENDING = 1e-4          # weight of the bending penalty relative to the data term, both in mm;
                        # tuned on synthetic stacks (0.4-0.5 mm noise, 2 mm shifts): residual RMS
                        # at the noise level and the extrapolated apex within ~0.5 mm


@dataclass(frozen=True)
class Surfaces:
    """The fitted endo and epi surfaces and where they meet the base plane.

    Each surface has its own prolate system, fitted to its own radius profile, so that a
    spheroid-like surface is close to ``lambda = const`` in it and the apex extrapolates well.

    Attributes
    ----------
    axis : LongAxis
    systems : dict
        ``"endo"`` / ``"epi"`` -> (centre height above the base plane, mm; focal length, mm).
    mu_max : dict
        Upper end of the mu range each basis is scaled to, radians.
    coef : dict
        ``"endo"`` / ``"epi"`` -> coefficient vector of ``L(mu, theta)``.
    residuals : tuple of dict
        Per slice and structure: ``slice``, ``structure``, ``rms_mm``, ``max_mm``.
    """

    axis: LongAxis
    systems: dict
    mu_max: dict
    coef: dict
    residuals: tuple

    def lam(self, surface: str, mu, theta) -> np.ndarray:
        return _basis(np.asarray(mu, float), np.asarray(theta, float), self.mu_max[surface]) @ self.coef[surface]

    def local_point(self, surface: str, mu, theta) -> np.ndarray:
        """Points (K, 3) in the axis frame (x1, x2, z) on a surface."""
        mu, theta = np.broadcast_arrays(np.asarray(mu, float), np.asarray(theta, float))
        lam = self.lam(surface, mu.ravel(), theta.ravel())
        zc, d = self.systems[surface]
        return _prolate_to_local(lam, mu.ravel(), theta.ravel(), d, zc)

    def base_mu(self, surface: str, theta: np.ndarray) -> np.ndarray:
        """mu where the surface meets the base plane z = 0, for each theta (bisection)."""
        theta = np.asarray(theta, float)
        height = self.meridian_heights(surface, theta.ravel())
        lo = np.full(theta.size, 1e-3)
        hi = np.full(theta.size, np.pi - 1e-3)
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            below = height(mid) < 0  # still under the base plane: go further toward the base
            lo = np.where(below, mid, lo)
            hi = np.where(below, hi, mid)
        return (0.5 * (lo + hi)).reshape(theta.shape)

    def along_meridians(self, surface: str, theta: np.ndarray):
        """``mu -> L(mu, theta)`` for fixed angles theta (K,): the Fourier factors computed once.

        The same sum as :meth:`lam` grouped by Legendre degree: L = sum_k P_k(u) (a_k + sum_m
        sin(mu)^m (b_mk cos m theta + c_mk sin m theta)), so each call of a root search costs a
        few (K, 7) products instead of the (K, 47) basis.
        """
        coef = self.coef[surface]
        n_axial, n_harm = DEGREE_AXIAL + 1, DEGREE_HARMONIC + 1
        axial = coef[:n_axial]
        harm = coef[n_axial:].reshape(HARMONICS, 2, n_harm)            # m, (cos, sin), k
        m = np.arange(1, HARMONICS + 1)
        per_point = (np.cos(np.outer(theta, m))[:, :, None] * harm[None, :, 0]
                     + np.sin(np.outer(theta, m))[:, :, None] * harm[None, :, 1])   # (K, m, k)
        mu_max = self.mu_max[surface]

        def lam_at(mu):
            u = _axial_variable(mu, mu_max)
            s = np.sin(mu)
            weights = per_point[:, 0] * s[:, None]
            power = s
            for j in range(1, HARMONICS):
                power = power * s
                weights = weights + per_point[:, j] * power[:, None]
            return (np.polynomial.legendre.legvander(u, DEGREE_AXIAL) @ axial
                    + np.einsum("kj,kj->k", np.polynomial.legendre.legvander(u, DEGREE_HARMONIC), weights))

        return lam_at

    def meridian_heights(self, surface: str, theta: np.ndarray):
        """``mu -> z`` (K,): the local height of the surface on fixed meridians theta (K,), for
        root searches along them (`along_meridians`)."""
        lam_at = self.along_meridians(surface, theta)
        zc, d = self.systems[surface]
        return lambda mu: _local_height(lam_at(mu), mu, d, zc)

    def distance(self, surface: str, world: np.ndarray) -> np.ndarray:
        """Signed distance (K,) mm of world points near a surface, positive outside it.

        First order in the offset (the lambda scale factor times the lambda gap): accurate for
        points within a few mm of the surface, such as its own contour points.
        """
        return self._local_distance(surface, self.axis.to_local(world))

    def _local_distance(self, surface, local):
        zc, d = self.systems[surface]
        lam, mu, theta = _local_to_prolate(local, d, zc)
        return _metric(lam, mu, d) * (lam - self.lam(surface, mu, theta))

    def project_local(self, surface: str, local: np.ndarray) -> np.ndarray:
        """Points (K, 3) of the axis frame moved along their lambda coordinate line onto a surface.

        Each surface is nearly ``lambda = const`` in its own system, so the lambda line crosses it
        almost at right angles: for points a fraction of a mm away (the mid-points of the mesh's
        boundary edges) the move is close to the shortest one, and the result lies on the
        fitted surface exactly.
        """
        zc, d = self.systems[surface]
        _lam, mu, theta = _local_to_prolate(np.asarray(local, float), d, zc)
        return _prolate_to_local(self.lam(surface, mu, theta), mu, theta, d, zc)

    def rim_local(self, surface: str, theta: np.ndarray) -> np.ndarray:
        """Points (K, 3) of the axis frame where a surface meets the base plane, at angles theta."""
        theta = np.asarray(theta, float)
        pts = self.local_point(surface, self.base_mu(surface, theta), theta)
        pts[:, 2] = 0.0  # the rim lies in the base plane exactly (as the mesh's rim rings do)
        return pts

    def apex(self, surface: str) -> np.ndarray:
        """World position of a surface's apical pole (mu = 0)."""
        return self.axis.to_world(self.local_point(surface, np.array([0.0]), np.array([0.0])))[0]


def fit_surfaces(stack: Stack) -> Surfaces:
    """Fit the endocardial and epicardial surfaces to a checked stack.

    Raises
    ------
    InputError
        If the fitted endocardium leaves the epicardium (the wall would have no thickness).
    """
    axis = stack.axis
    local = {s: [] for s in ("endo", "epi")}
    tags = {s: [] for s in ("endo", "epi")}
    for sl in stack.slices:
        for s in ("endo", "epi"):
            pts = getattr(sl, s)
            if pts is not None:
                local[s].append(axis.to_local(pts))
                tags[s].append(np.full(len(pts), sl.slice_id))
    local = {s: np.concatenate(v) for s, v in local.items()}
    tags = {s: np.concatenate(v) for s, v in tags.items()}

    extent = max(sl.height for sl in stack.slices)
    systems, mu_max, coef, residuals = {}, {}, {}, []
    for s in ("epi", "endo"):
        systems[s] = _prolate_system(local[s], tags[s], extent, fallback=systems.get("epi"))
        zc, d = systems[s]
        lam, mu, theta = _local_to_prolate(local[s], d, zc)
        # room above the most basal contour: the base plane may lie half a slab above it
        mu_max[s] = min(float(mu.max()) + np.radians(15.0), np.pi - 1e-3)
        coef[s] = _fit(lam, mu, theta, d, mu_max[s])
        dist = _metric(lam, mu, d) * (lam - _basis(mu, theta, mu_max[s]) @ coef[s])
        for k in np.unique(tags[s]):
            dk = dist[tags[s] == k]
            residuals.append({"slice": int(k), "structure": s, "rms_mm": float(np.sqrt(np.mean(dk * dk))),
                              "max_mm": float(np.abs(dk).max())})
    residuals.sort(key=lambda r: (r["structure"] != "endo", [sl.slice_id for sl in stack.slices].index(r["slice"])))
    surfaces = Surfaces(axis=axis, systems=systems, mu_max=mu_max, coef=coef, residuals=tuple(residuals))

    # the wall must have thickness everywhere: every endocardial point inside the epicardium
    # (an exact test: lambda grows outward along each coordinate line) and away from it
    theta = np.linspace(-np.pi, np.pi, 97)[:-1]
    t = np.linspace(0.0, 1.0, 80)
    T, TH = np.meshgrid(t, theta, indexing="ij")
    endo_pts = surfaces.local_point("endo", (T * surfaces.base_mu("endo", theta)[None, :]).ravel(), TH.ravel())
    epi_pts = surfaces.local_point("epi", (T * surfaces.base_mu("epi", theta)[None, :]).ravel(), TH.ravel())
    zc, d = systems["epi"]
    lam, mu, th = _local_to_prolate(endo_pts, d, zc)
    outside = lam > surfaces.lam("epi", mu, th)
    gap = cKDTree(epi_pts).query(endo_pts)[0]
    gap[outside] = -gap[outside]
    below = endo_pts[:, 2] < -1e-6
    if gap[below].min() < 0.5:
        j = np.flatnonzero(below)[np.argmin(gap[below])]
        where = "at the apex" if T.ravel()[j] < 0.3 else "mid-wall"
        raise InputError(
            f"{stack.source}: the fitted endocardium meets the epicardium {where} "
            f"(wall thickness {gap[j]:.1f} mm); check the apical slices' contours")
    return surfaces


def _prolate_system(local: np.ndarray, tags: np.ndarray, extent: float, *, fallback=None) -> tuple[float, float]:
    """Centre height and focal length of the spheroid that best fits a surface's radius profile.

    r^2 = A + B z + C z^2 is fitted to the mean radius of each slice; a spheroid (C < 0) gives
    the centre, the half-axes a, b and so the focal length sqrt(a^2 - b^2), kept above b / 20
    so a sphere is handled as a nearly spherical system. Without a spheroid (too few slices, a
    straight profile) the other surface's system or a generic one is used.
    """
    ids = np.unique(tags)
    z = np.array([local[tags == k, 2].mean() for k in ids])
    r = np.array([np.hypot(local[tags == k, 0], local[tags == k, 1]).mean() for k in ids])
    found = None
    if len(z) >= 3:
        c2, c1, c0 = np.polyfit(z, r * r, 2)
        if c2 < 0:
            zc = -c1 / (2 * c2)
            b2 = c0 - c1 * c1 / (4 * c2)
            if b2 > 0 and -1.2 * extent <= zc <= 0.3 * extent:
                a, b = np.sqrt(b2 / -c2), np.sqrt(b2)
                found = (float(zc), float(np.sqrt(max(a * a - b * b, (0.05 * b) ** 2))))
    if found is not None:
        return found
    if fallback is not None:
        return fallback
    # a stack too straight for an ellipse: centre a quarter down, apex just past the stack
    b = float(r.max())
    zc = -0.25 * extent
    a = 0.75 * extent + 0.3 * b
    return float(zc), float(np.sqrt(max(a * a - b * b, (0.05 * b) ** 2)))


def _local_to_prolate(local: np.ndarray, d: float, zc: float):
    xp = zc - local[:, 2]
    rho = np.hypot(local[:, 0], local[:, 1])
    r1 = np.hypot(xp - d, rho)
    r2 = np.hypot(xp + d, rho)
    lam = np.arccosh(np.clip((r1 + r2) / (2 * d), 1.0, None))
    mu = np.arccos(np.clip((r2 - r1) / (2 * d), -1.0, 1.0))
    theta = np.arctan2(local[:, 1], local[:, 0])
    return lam, mu, theta


def _prolate_to_local(lam, mu, theta, d, zc):
    rho = d * np.sinh(lam) * np.sin(mu)
    return np.column_stack([rho * np.cos(theta), rho * np.sin(theta), _local_height(lam, mu, d, zc)])


def _local_height(lam, mu, d, zc):
    """Height z in the axis frame of the prolate point (lam, mu) of a system (zc, d)."""
    return zc - d * np.cosh(lam) * np.cos(mu)


def _axial_variable(mu, mu_max):
    """The Legendre variable u in [-1, 1]: sin^2(mu / 2) scaled to the surface's mu range."""
    return 2.0 * np.sin(0.5 * np.asarray(mu)) ** 2 / np.sin(0.5 * mu_max) ** 2 - 1.0


def _metric(lam, mu, d):
    """Scale factor of lambda: a change dl moves a point by d sqrt(sinh^2 l + sin^2 mu) dl mm."""
    return d * np.sqrt(np.sinh(lam) ** 2 + np.sin(mu) ** 2)


def _basis(mu: np.ndarray, theta: np.ndarray, mu_max: float) -> np.ndarray:
    """Basis functions (K, P) of L(mu, theta): Legendre polynomials in sin^2(mu / 2), times
    sin(mu)^m cos / sin(m theta) for the harmonics."""
    # polynomials in sin^2(mu / 2), an even function of mu: a smooth surface of revolution has
    # zero slope dL/dmu at the pole, so the extrapolated apex cannot come out as a cone
    u = _axial_variable(mu, mu_max)
    cols = [np.polynomial.legendre.legvander(u, DEGREE_AXIAL)]
    vh = np.polynomial.legendre.legvander(u, DEGREE_HARMONIC)
    s = np.sin(mu)
    for m in range(1, HARMONICS + 1):
        damp = (s ** m)[:, None]
        cols.append(vh * damp * np.cos(m * theta)[:, None])
        cols.append(vh * damp * np.sin(m * theta)[:, None])
    return np.concatenate(cols, axis=1)


def _fit(lam, mu, theta, d, mu_max):
    """Regularised least squares for the coefficients of L, residuals weighted to mm."""
    A = _basis(mu, theta, mu_max)
    w = _metric(lam, mu, d)
    Aw = A * w[:, None]
    yw = lam * w
    # bending penalty on a grid over the whole surface, apex included, in mm of normal motion
    gm = np.linspace(0.0, mu_max, 61)
    gt = np.linspace(-np.pi, np.pi, 49)[:-1]
    M, T = np.meshgrid(gm, gt, indexing="ij")
    G = _basis(M.ravel(), T.ravel(), mu_max).reshape(len(gm), len(gt), -1)
    dmu, dth = gm[1] - gm[0], gt[1] - gt[0]
    scale = float(np.mean(w * w))  # lambda -> mm^2 on this surface
    d2mu = (G[2:] - 2 * G[1:-1] + G[:-2]) / dmu**2
    d2th = (np.roll(G, -1, 1) - 2 * G + np.roll(G, 1, 1)) / dth**2
    d2th = d2th * (np.sin(gm)[:, None, None] ** 2)  # circumferential arc shrinks toward the apex
    P = (np.einsum("ijk,ijl->kl", d2mu, d2mu) / d2mu[..., 0].size
         + np.einsum("ijk,ijl->kl", d2th, d2th) / d2th[..., 0].size) * scale
    lhs = Aw.T @ Aw / len(lam) + BENDING * P
    rhs = Aw.T @ yw / len(lam)
    return np.linalg.solve(lhs + 1e-12 * np.eye(len(lhs)) * np.trace(lhs) / len(lhs), rhs)
