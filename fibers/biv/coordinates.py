"""Coordinates, frames and rule-based fibers on both ventricles (Bayer et al., Ann Biomed Eng 2012).

The Laplace-Dirichlet rule-based method of Bayer, Blake, Plank and Trayanova (from memory; the
code is ours). On the biventricular wall mesh (faces 1 LV endocardium, 2 epicardium, 3 base,
4 RV endocardium), with P1 finite elements (:mod:`fibers.fem`):

- ``phi_lv``: 1 on the left endocardium, 0 on the epicardium and the right endocardium;
  ``phi_rv`` likewise from the right endocardium; ``phi_epi = 1 - phi_lv - phi_rv`` (the three
  problems share one operator and their boundary values add up to 1, so the third needs no
  solve). Zero flux through the base.
- ``apicobasal``: 0 on a patch at the left epicardial apex, 1 on the base (as on the left
  ventricle alone, see :mod:`fibers.coordinates`).
- **septal depth** ``d = phi_rv / (phi_lv + phi_rv)``: 0 on the left endocardium, 1 on the right
  endocardium, measured from both sides at once; in the free walls it stays near 0 (left) or 1
  (right). **transmural** is ``phi_epi``: 0 on either endocardium, 1 on the epicardium.

Frames. ``axis(u, v)`` is the orthonormal frame with ``e_long = u / |u|``, ``e_rad`` the part of
``v`` normal to it and ``e_circ = e_long x e_rad``. ``orient(Q, a, b)`` turns the fiber from
``e_circ`` toward ``e_long`` by the helix angle ``a`` and the sheet (``e_rad`` at ``b = 0``) about
the fiber by the sheet angle ``b``: the triad (fiber, sheet, sheet-normal) as the columns of a
rotation. Then, at every node (and every cell):

1. ``Q_lv = orient(axis(grad psi, -grad phi_lv), a_s(d))`` and
   ``Q_rv = orient(axis(grad psi, grad phi_rv), a_s(d))`` with
   ``a_s(d) = a_lv_endo (1 - d) - a_rv_endo d``; ``grad phi_rv`` points into the right cavity,
   so in the right free wall the angle ``-a_rv_endo`` in that frame is ``+a_rv_endo`` in the
   wall's own frame: right-handed at both endocardia.
2. ``Q_endo = bislerp(Q_lv, Q_rv, d)``: across the septum the frame turns from the left side's to
   the right side's by the paper's quaternion interpolation.
3. ``Q_epi = orient(axis(grad psi, grad phi_epi), a_w(e))`` with ``e = phi_epi`` and
   ``a_w(e) = a_endo (1 - e) + a_epi e``, each ventricle's own angles, the two laws blended by
   ``d`` where the ventricles meet.
4. The fiber is that of ``bislerp(Q_endo, Q_epi, e)``.
5. The sheet is turned about the fiber from ``e_rad`` (of the local frame below) by
   ``b = (1 - e) b_endo + e b_epi``, with ``b_endo = b_lv_endo (1 - d) - s b_rv_endo d`` and
   ``b_epi`` the ventricles' epicardial values blended by ``d``; ``s = e_rad . grad phi_rv /
   |grad phi_rv|`` is +1 on the septal side of the right cavity and -1 on its free wall (the
   paper's sign turn of the right frame, made continuous around the insertions).

Our choice where the paper turns the frames by the helix and the sheet angles together before
interpolating (step 5 instead): with its defaults (a 90 degree change of both) the turn between
the endocardial and epicardial frames passes 90 degrees in the outer third of the wall, where
the interpolation, which cannot tell a fiber from its reverse, then takes the other way round
and the fiber jumps. Turning by the helix alone keeps every compared pair within ``90 e``
degrees.

``bislerp(A, B, t)`` is the spherical linear interpolation of unit quaternions, taking among the
quaternions of ``B`` and of ``B`` turned by a half-turn about one of its own axes (the same
directions up to sign, since fiber and sheet are lines) the one closest to ``A``.

What this gives in a free wall, where the endocardial and epicardial frames share their axes:
slerp between two turns about one axis turns by the linearly interpolated angle (Shoemake,
SIGGRAPH 1985), so with equal sheet angles the helix is
``a(e) = (1 - e) a_endo + e a_w(e) = a_endo + (a_epi - a_endo) e^2``: it leaves the endocardial
value slowly and reaches the epicardial one at the epicardium. Interpolating toward the fixed
epicardial angle instead would make it linear, but with the paper's defaults (a 90 degree
change, and fibers as lines) the two ends are then equally near both ways round. Helix changes
beyond 90 degrees (per wall or across the septum) are refused for that reason.

The local frame written out (``e_rad``, ``e_long``, ``e_circ``) is the same construction with all
angles 0, with ``e_rad`` turned to point from the endocardium to the epicardium in the free walls
and from the left to the right cavity in the septum; ``helix_angle`` and ``sheet_angle`` are
measured on the final fiber and sheet in that frame, degrees.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass

import numpy as np

from fibers import fem
from fibers.architecture import Architecture, short_axis_frame
from fibers.biv.mesh import RV_ENDO, BiVMesh
from fibers.coordinates import CardiacCoordinates, angle_about_axis, apex_patch, even_along_axis, frame_quality
from fibers.errors import InputError
from fibers.types import BASE, ENDO, EPI
from fibers.vectors import cross


@dataclass(frozen=True)
class BiVLaw:
    """Helix and sheet angles per ventricle, degrees.

    Each helix change (endocardium to epicardium, and across the septum ``lv_helix_endo +
    rv_helix_endo``) must stay within 90 degrees (see the module docstring).

    Defaults from Bayer et al., Ann Biomed Eng 2012 (from memory): helix +40 at the endocardium
    and -50 at the epicardium, sheet -65 and +25, the same for both ventricles.
    """

    lv_helix_endo: float = 40.0
    lv_helix_epi: float = -50.0
    lv_sheet_endo: float = -65.0
    lv_sheet_epi: float = 25.0
    rv_helix_endo: float = 40.0
    rv_helix_epi: float = -50.0
    rv_sheet_endo: float = -65.0
    rv_sheet_epi: float = 25.0

    def as_dict(self) -> dict:
        return asdict(self)

    def check(self) -> None:
        """Refuse helix changes the quaternion interpolation cannot follow (over 90 degrees).

        Raises
        ------
        InputError
        """
        turns = {"lv_helix_endo -> lv_helix_epi": self.lv_helix_epi - self.lv_helix_endo,
                 "rv_helix_endo -> rv_helix_epi": self.rv_helix_epi - self.rv_helix_endo,
                 "across the septum (lv_helix_endo + rv_helix_endo)": self.lv_helix_endo + self.rv_helix_endo}
        for name, turn in turns.items():
            if abs(turn) > 90.0:
                raise InputError(
                    f"[biventricular] helix change {name} is {abs(turn):g} degrees; the interpolation of "
                    f"frames (fibers are lines) can follow at most 90: bring the angles closer")


@dataclass(frozen=True)
class BiVFields:
    """The biventricular Laplace fields besides the usual coordinates (nodal, and per cell)."""

    phi_lv: np.ndarray
    phi_rv: np.ndarray
    septal_depth: np.ndarray
    cell_septal_depth: np.ndarray
    psi: np.ndarray | None = None   # the raw apicobasal Laplace solution (its gradient is e_long's)


def compute(mesh: BiVMesh, law: BiVLaw = BiVLaw(), *, zero_direction=None, tol: float = 1e-10
            ) -> tuple[CardiacCoordinates, Architecture, BiVFields]:
    """Coordinates, local frames and the fiber architecture of a biventricular mesh.

    Parameters
    ----------
    mesh : BiVMesh
    law : BiVLaw
    zero_direction : ndarray (3,), optional
        Where ``circumferential`` is 0 (the septal bisector when known); default the axis'
        reference direction.
    tol : float
        Relative residual of the Laplace solves.

    Returns
    -------
    CardiacCoordinates, Architecture, BiVFields
        The first two have the fields and meanings of the left-ventricular route (see the
        module docstring for ``transmural`` and the frames here).
    """
    points, tets = mesh.points, mesh.tets
    lv, rv, epi, base = (mesh.face_nodes(t) for t in (ENDO, RV_ENDO, EPI, BASE))
    for name, nodes in (("left endocardial", lv), ("right endocardial", rv), ("epicardial", epi)):
        if nodes.size == 0:
            raise InputError(f"biventricular mesh has no {name} faces")
    volumes, grads = fem.tet_gradients(points, tets)
    K = fem.stiffness(points, tets, volumes=volumes, grads=grads)
    fixed = np.concatenate([lv, rv, epi])

    def solve(one):
        values = np.concatenate([np.full(lv.size, one == "lv"), np.full(rv.size, one == "rv"),
                                 np.zeros(epi.size)]).astype(float)
        return np.clip(fem.solve_dirichlet(K, fixed, values, tol=tol), 0.0, 1.0)

    phi_lv, phi_rv = solve("lv"), solve("rv")
    phi_epi = np.clip(1.0 - phi_lv - phi_rv, 0.0, 1.0)
    apex = apex_patch(mesh)
    base_only = np.setdiff1d(base, apex)
    psi = np.clip(fem.solve_dirichlet(K, np.concatenate([base_only, apex]),
                                      np.concatenate([np.ones(base_only.size), np.zeros(apex.size)]),
                                      tol=tol), 0.0, 1.0)
    axis_dir = mesh.axis.direction
    depth_below = (mesh.axis.base_centre - points) @ axis_dir
    position = even_along_axis(psi, depth_below, apex)

    def at_nodes(u):
        return fem.cell_to_nodes(tets, fem.cell_gradient(points, tets, u, grads=grads), volumes,
                                 n_points=len(points))

    def at_cells(u):
        return fem.cell_gradient(points, tets, u, grads=grads)

    septal = _septal_depth(phi_lv, phi_rv, at_nodes(phi_lv), at_nodes(phi_rv))

    nodal = _frames_and_triads(at_nodes, phi_lv, phi_rv, phi_epi, psi, septal, law, axis_dir)
    cell_fields = [f[tets].mean(axis=1) for f in (phi_lv, phi_rv, phi_epi, psi)]
    cell_septal = _septal_depth(cell_fields[0], cell_fields[1], at_cells(phi_lv), at_cells(phi_rv))
    cellwise = _frames_and_triads(at_cells, *cell_fields, cell_septal, law, axis_dir,
                                  values=(phi_lv, phi_rv, phi_epi, psi), d_nodal=septal)

    zero = mesh.axis.reference if zero_direction is None else np.asarray(zero_direction, float)
    zero = zero - (zero @ axis_dir) * axis_dir
    zero /= np.linalg.norm(zero)
    centroids = mesh.cell_centroids
    coords = CardiacCoordinates(
        transmural=phi_epi, apicobasal=position,
        circumferential=angle_about_axis(points, mesh.axis.base_centre, axis_dir, zero),
        e_rad=nodal["e_rad"], e_long=nodal["e_long"], e_circ=nodal["e_circ"],
        cell_e_rad=cellwise["e_rad"], cell_e_long=cellwise["e_long"], cell_e_circ=cellwise["e_circ"],
        cell_transmural=cell_fields[2], cell_apicobasal=position[tets].mean(axis=1),
        cell_circumferential=angle_about_axis(centroids, mesh.axis.base_centre, axis_dir, zero),
        # both ventricles: the depth the laws use is the Laplace one (phi_epi); the LV's
        # surface-distance fraction has no meaning across the septum
        thickness_fraction=phi_epi, cell_thickness_fraction=cell_fields[2],
        frame_quality=frame_quality(points, mesh.axis), cell_frame_quality=frame_quality(centroids, mesh.axis))
    sax, imbrication = _imaging_angles(nodal["fiber"], nodal["e_rad"], points, mesh.axis)
    arch = Architecture(fiber=nodal["fiber"], sheet=nodal["sheet"], sheet_normal=nodal["sheet_normal"],
                        helix_angle=nodal["helix"], helix_angle_sax=sax, imbrication_angle=imbrication,
                        sheet_angle=nodal["sheet_angle"], dispersion=np.zeros(len(points)),
                        cell_fiber=cellwise["fiber"], cell_sheet=cellwise["sheet"],
                        cell_sheet_normal=cellwise["sheet_normal"])
    return coords, arch, BiVFields(phi_lv=phi_lv, phi_rv=phi_rv, septal_depth=septal,
                                   cell_septal_depth=cell_septal, psi=psi)


class PointRule:
    """The rule of :func:`compute` at any points of the wall (pool points, sample points).

    At a point inside tetrahedron ``t`` with barycentric weights ``w`` the Laplace fields are
    interpolated with ``w`` and their gradients are the nodal (volume-weighted recovered)
    gradients interpolated likewise, so the frames and triads are built by the same steps as at
    the nodes (`_frames_and_triads`) and agree with them at the nodes, instead of interpolating
    the nodal fibers (which across a wall one element thick would turn the helix linearly between
    the two surfaces' values rather than along the law).

    Parameters
    ----------
    mesh : BiVMesh
    fields : BiVFields
        From :func:`compute` (``psi`` needed).
    law : BiVLaw
    """

    def __init__(self, mesh: BiVMesh, fields: BiVFields, law: BiVLaw):
        points, tets = mesh.points, mesh.tets
        volumes, grads = fem.tet_gradients(points, tets)
        recover = lambda u: fem.cell_to_nodes(tets, fem.cell_gradient(points, tets, u, grads=grads),  # noqa: E731
                                              volumes, n_points=len(points))
        phi_epi = np.clip(1.0 - fields.phi_lv - fields.phi_rv, 0.0, 1.0)
        self.values = (fields.phi_lv, fields.phi_rv, phi_epi, fields.psi)
        self.d_nodal = fields.septal_depth
        self.gradients = {id(u): recover(u) for u in (*self.values, self.d_nodal)}
        self.mesh, self.law = mesh, law

    def at(self, points: np.ndarray, tet: np.ndarray, weights: np.ndarray) -> dict:
        """Fields at points (K, 3) in tetrahedra ``tet`` (K,) with barycentric ``weights`` (K, 4).

        Returns ``fiber``, ``sheet``, ``sheet_normal``, ``e_rad``, ``e_long``, ``e_circ`` (K, 3),
        ``helix``, ``sheet_angle``, ``helix_sax``, ``imbrication`` (K,) degrees, ``septal_depth``
        and ``transmural`` (K,).
        """
        nodes = self.mesh.tets[tet]
        at = lambda u: np.einsum("km,km...->k...", weights, np.asarray(u)[nodes])  # noqa: E731
        lv, rv, epi, psi = (at(u) for u in self.values)
        gradient = lambda u: at(self.gradients[id(u)])  # noqa: E731
        d = np.clip(_septal_depth(lv, rv, gradient(self.values[0]), gradient(self.values[1])), 0.0, 1.0)
        out = _frames_and_triads(gradient, lv, rv, epi, psi, d, self.law, self.mesh.axis.direction,
                                 values=self.values, d_nodal=self.d_nodal)
        out["helix_sax"], out["imbrication"] = _imaging_angles(out["fiber"], out["e_rad"], points, self.mesh.axis)
        out["septal_depth"], out["transmural"] = d, epi
        return out


def _imaging_angles(fiber, e_rad, points, axis):
    """The fiber's angles in the imaging convention, measured from the vectors (degrees).

    ``helix_angle_sax``: the fiber's projection on the wall's tangent plane against the
    short-axis circumferential direction (`fibers.architecture.short_axis_frame`);
    ``imbrication_angle``: the fiber's angle out of that plane. Folded to [-90, 90): a fiber is
    a line.
    """
    fallback = cross(e_rad, np.eye(3)[np.argmin(np.abs(e_rad), axis=1)])
    fallback /= np.linalg.norm(fallback, axis=1)[:, None]
    c, l = short_axis_frame(e_rad, points, axis, fallback=fallback)
    sign = np.where(np.einsum("ij,ij->i", fiber, c) < 0, -1.0, 1.0)[:, None]
    f = fiber * sign
    sax = np.degrees(np.arctan2(np.einsum("ij,ij->i", f, l), np.einsum("ij,ij->i", f, c)))
    imbrication = np.degrees(np.arcsin(np.clip(np.einsum("ij,ij->i", f, e_rad), -1.0, 1.0)))
    return sax, imbrication


def _septal_depth(phi_lv, phi_rv, g_lv=None, g_rv=None):
    """d = phi_rv / (phi_lv + phi_rv), with its limit where both vanish (the epicardium).

    Near the epicardium both fields fall linearly to 0, so the ratio tends to the ratio of their
    gradients' lengths; below ``_NEAR_EPI`` of the sum the two are blended linearly.
    """
    total = phi_lv + phi_rv
    ratio = phi_rv / np.where(total > 1e-12, total, 1.0)
    if g_lv is None:
        return np.where(total > 1e-12, ratio, 0.0)
    a, b = np.linalg.norm(g_lv, axis=1), np.linalg.norm(g_rv, axis=1)
    limit = b / np.where(a + b > 0, a + b, 1.0)
    w = np.clip(total / _NEAR_EPI, 0.0, 1.0)
    return w * ratio + (1.0 - w) * limit


_NEAR_EPI = 0.05


def _frames_and_triads(gradient, phi_lv, phi_rv, phi_epi, psi, d, law: BiVLaw, axis_dir, *, values=None,
                       d_nodal=None):
    """The frames and triads of the module docstring at K places (nodes or cells).

    ``gradient(u)`` gives the gradient (K, 3) of a nodal field at those places; ``values`` are
    the nodal fields to differentiate and ``d_nodal`` the nodal septal depth (default: the given
    ones, already nodal).
    """
    v_lv, v_rv, v_epi, v_psi = values if values is not None else (phi_lv, phi_rv, phi_epi, psi)
    g_lv, g_rv, g_psi = gradient(v_lv), gradient(v_rv), gradient(v_psi)
    g_epi = -(g_lv + g_rv)
    g_d = gradient(d if d_nodal is None else d_nodal)
    long_fallback = np.broadcast_to(axis_dir, g_psi.shape)
    rad = {"lv": -g_lv, "rv": g_rv, "epi": g_epi}
    frame = {k: axis_frame(g_psi, v, long_fallback) for k, v in rad.items()}

    blend = lambda a, b: (1.0 - d) * a + d * b  # noqa: E731
    e = phi_epi
    zero = np.zeros_like(d)
    # fibers: the paper's two interpolations of frames turned by the helix angle
    a_s = np.radians(law.lv_helix_endo * (1.0 - d) - law.rv_helix_endo * d)
    a_w = np.radians(blend(law.lv_helix_endo * (1 - e) + law.lv_helix_epi * e,
                           law.rv_helix_endo * (1 - e) + law.rv_helix_epi * e))
    q_endo = bislerp(orient(frame["lv"], a_s, zero), orient(frame["rv"], a_s, zero), d)
    fiber = bislerp(q_endo, orient(frame["epi"], a_w, zero), e)[:, :, 0]

    # the local frame: the same blend without rotation, e_rad turned endo -> epi (free walls) and
    # left -> right (septum), e_long apex -> base
    plain = bislerp(bislerp(orient(frame["lv"], zero, zero), orient(frame["rv"], zero, zero), d),
                    orient(frame["epi"], zero, zero), e)
    e_circ, e_rad = plain[:, :, 0], plain[:, :, 1]
    e_long = cross(e_rad, e_circ)
    e_long[np.einsum("ij,ij->i", e_long, g_psi) < 0] *= -1.0
    e_rad[np.einsum("ij,ij->i", e_rad, g_epi + g_d) < 0] *= -1.0
    e_circ = cross(e_long, e_rad)

    # sheets: turned about the final fiber from e_rad by the sheet law (module docstring)
    side = np.einsum("ij,ij->i", e_rad, _unit(g_rv, e_rad))  # +1 septal side of the RV, -1 free wall
    b_endo = law.lv_sheet_endo * (1.0 - d) - side * law.rv_sheet_endo * d
    beta = np.radians((1 - e) * b_endo + e * blend(law.lv_sheet_epi, law.rv_sheet_epi))
    s0 = e_rad - np.einsum("ij,ij->i", e_rad, fiber)[:, None] * fiber
    s0 = _unit(s0, _any_normal(fiber))
    sheet = np.cos(beta)[:, None] * s0 + np.sin(beta)[:, None] * cross(fiber, s0)
    helix = np.degrees(np.arctan2(np.einsum("ij,ij->i", fiber, e_long), np.einsum("ij,ij->i", fiber, e_circ)))
    helix = np.where(helix > 90.0, helix - 180.0, np.where(helix <= -90.0, helix + 180.0, helix))
    sheet_angle = np.degrees(np.arctan2(np.sin(beta), np.cos(beta)))
    sheet_angle = np.where(sheet_angle > 90.0, sheet_angle - 180.0,
                           np.where(sheet_angle <= -90.0, sheet_angle + 180.0, sheet_angle))
    return {"fiber": fiber, "sheet": sheet, "sheet_normal": cross(fiber, sheet), "helix": helix,
            "sheet_angle": sheet_angle, "e_rad": e_rad, "e_long": e_long, "e_circ": e_circ}


# -- frames and quaternions -----------------------------------------------------------------------

def axis_frame(u, v, fallback):
    """Rotations (K, 3, 3) with columns e_circ, e_long, e_rad.

    ``e_long = u / |u|`` (``fallback`` where u vanishes), ``e_rad`` the unit part of v normal to
    it, ``e_circ = e_long x e_rad``.
    """
    e_long = _unit(u, fallback)
    e_rad = v - np.einsum("ij,ij->i", v, e_long)[:, None] * e_long
    e_rad = _unit(e_rad, _any_normal(e_long))
    e_circ = cross(e_long, e_rad)
    return np.stack([e_circ, e_long, e_rad], axis=2)


def orient(frame, helix, sheet):
    """Triads (K, 3, 3), columns fiber, sheet, sheet-normal, from frames of :func:`axis_frame`.

    ``fiber = cos(a) e_circ + sin(a) e_long``; ``sheet = cos(b) e_rad + sin(b) (fiber x e_rad)``;
    ``sheet_normal = fiber x sheet``. Angles (K,) in radians.
    """
    e_circ, e_long, e_rad = frame[:, :, 0], frame[:, :, 1], frame[:, :, 2]
    ca, sa = np.cos(helix)[:, None], np.sin(helix)[:, None]
    cb, sb = np.cos(sheet)[:, None], np.sin(sheet)[:, None]
    fiber = ca * e_circ + sa * e_long
    sheet_dir = cb * e_rad + sb * cross(fiber, e_rad)
    return np.stack([fiber, sheet_dir, cross(fiber, sheet_dir)], axis=2)


def to_quaternion(R):
    """Unit quaternions (K, 4) (w, x, y, z) of rotations (K, 3, 3) (Shepperd's method)."""
    t = np.einsum("kii->k", R)
    d = np.stack([t, R[:, 0, 0], R[:, 1, 1], R[:, 2, 2]], axis=1)
    pick = np.argmax(d, axis=1)
    q = np.empty((len(R), 4))
    r = np.sqrt(np.clip(1.0 + 2.0 * d[np.arange(len(R)), pick] - t, 1e-300, None))
    # w largest
    m = pick == 0
    q[m, 0] = 0.5 * r[m]
    q[m, 1] = (R[m, 2, 1] - R[m, 1, 2]) / (2 * r[m])
    q[m, 2] = (R[m, 0, 2] - R[m, 2, 0]) / (2 * r[m])
    q[m, 3] = (R[m, 1, 0] - R[m, 0, 1]) / (2 * r[m])
    for i, (j, k) in ((1, (2, 3)), (2, (3, 1)), (3, (1, 2))):
        m = pick == i
        a, b, c = i - 1, j - 1, k - 1
        q[m, i] = 0.5 * r[m]
        q[m, 0] = (R[m, c, b] - R[m, b, c]) / (2 * r[m])
        q[m, j] = (R[m, b, a] + R[m, a, b]) / (2 * r[m])
        q[m, k] = (R[m, c, a] + R[m, a, c]) / (2 * r[m])
    return q / np.linalg.norm(q, axis=1)[:, None]


def to_matrix(q):
    """Rotations (K, 3, 3) of unit quaternions (K, 4) (w, x, y, z)."""
    w, x, y, z = q.T
    return np.stack([
        np.stack([1 - 2 * (y * y + z * z), 2 * (x * y - z * w), 2 * (x * z + y * w)], axis=1),
        np.stack([2 * (x * y + z * w), 1 - 2 * (x * x + z * z), 2 * (y * z - x * w)], axis=1),
        np.stack([2 * (x * z - y * w), 2 * (y * z + x * w), 1 - 2 * (x * x + y * y)], axis=1)], axis=1)


def _times_unit(q, axis):
    """q * i, q * j or q * k (axis 1, 2, 3): q turned by a half-turn about its own axis."""
    w, x, y, z = q.T
    if axis == 1:
        return np.stack([-x, w, z, -y], axis=1)
    if axis == 2:
        return np.stack([-y, -z, w, x], axis=1)
    return np.stack([-z, y, -x, w], axis=1)


def bislerp(A, B, t):
    """Interpolated rotations (K, 3, 3) from A (t = 0) to B (t = 1), t (K,) in [0, 1].

    Among B's quaternion and B turned by a half-turn about each of its own axes (the same
    directions up to sign), the one nearest to A's is taken, then slerp.
    """
    qa, qb = to_quaternion(A), to_quaternion(B)
    options = np.stack([qb, _times_unit(qb, 1), _times_unit(qb, 2), _times_unit(qb, 3)], axis=1)
    dots = np.einsum("kj,koj->ko", qa, options)
    best = np.argmax(np.abs(dots), axis=1)
    k = np.arange(len(qa))
    qm = options[k, best] * np.sign(dots[k, best] + (dots[k, best] == 0))[:, None]
    return to_matrix(slerp(qa, qm, np.clip(np.asarray(t, float), 0.0, 1.0)))


def slerp(qa, qb, t):
    """Spherical linear interpolation of unit quaternions (K, 4) with qa . qb >= 0."""
    dot = np.clip(np.einsum("kj,kj->k", qa, qb), -1.0, 1.0)
    omega = np.arccos(dot)
    s = np.sin(omega)
    small = s < 1e-6
    wa = np.where(small, 1.0 - t, np.sin((1.0 - t) * omega) / np.where(small, 1.0, s))
    wb = np.where(small, t, np.sin(t * omega) / np.where(small, 1.0, s))
    q = wa[:, None] * qa + wb[:, None] * qb
    return q / np.linalg.norm(q, axis=1)[:, None]


def _unit(v, fallback):
    n = np.linalg.norm(v, axis=1)
    ok = n > 1e-12 * max(float(np.median(n)), 1e-300)
    out = np.where(ok[:, None], v / np.where(ok, n, 1.0)[:, None], fallback)
    return out / np.linalg.norm(out, axis=1)[:, None]


def _any_normal(e):
    pick = np.where((np.abs(e[:, 0]) < 0.9)[:, None], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0])
    v = cross(e, pick)
    return v / np.linalg.norm(v, axis=1)[:, None]
