"""Stage 3: a tetrahedral mesh of the wall between the fitted surfaces, built with gmsh.

We triangulate the boundary ourselves, at the target edge length, as rings of nearly equilateral
triangles: the endocardium and the epicardium from their apical poles to the base plane, and the
flat base annulus between the two rims. The three surfaces and the two rims go to gmsh as
discrete entities, so every boundary face keeps its tag (endo / epi / base) exactly, and gmsh
fills the volume with its HXT algorithm (on one thread: reproducible, and here no slower).
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from fibers import meshtools
from fibers.surfaces import Surfaces
from fibers.types import BASE, ENDO, EPI, WallMesh

log = logging.getLogger(__name__)

ROW = np.sqrt(3.0) / 2.0  # ring spacing of equilateral triangles, in edge lengths


def build_mesh(surfaces: Surfaces, *, size: float = 1.5, threads: int = 1) -> WallMesh:
    """Tetrahedralise the wall: `wall_boundary`, then `fill_wall`.

    Parameters
    ----------
    surfaces : Surfaces
        Fitted endocardium and epicardium.
    size : float, mm
        Target edge length.
    threads : int
        Threads for gmsh's HXT algorithm. One by default: with two threads the mesh changes
        from run to run (the same input must give the same bytes), and on the 2-core
        machine it was not faster (500k tetrahedra: 5.0 s on one thread, 7.2 s on two).

    Returns
    -------
    WallMesh
        Positively oriented tetrahedra, boundary faces tagged and oriented out of the wall.
    """
    return fill_wall(surfaces, wall_boundary(surfaces, size=size), size=size, threads=threads)


@dataclass(frozen=True)
class Boundary:
    """The wall's closed boundary as we triangulate it, before gmsh fills the volume.

    These triangles are exactly the boundary faces of the finished mesh (gmsh keeps discrete
    surfaces as given), so what needs the boundary alone (the cavity and background pools) can
    be computed from it while gmsh works. ``points``, ``faces``, ``face_tags``, ``axis`` and
    ``face_nodes`` read as a `WallMesh`'s do, in this triangulation's own node numbering.

    Attributes
    ----------
    local : ndarray (P, 3), mm
        Node positions in the long-axis frame.
    tri : dict of int to ndarray (F, 3)
        Triangles per face tag (endo, epi, base), oriented out of the wall.
    rims : dict of str to ndarray
        The endocardial and epicardial rims (closed node loops in the base plane).
    axis : LongAxis
    """

    local: np.ndarray
    tri: dict
    rims: dict
    axis: object

    @cached_property
    def points(self) -> np.ndarray:
        return self.axis.to_world(self.local)

    @cached_property
    def faces(self) -> np.ndarray:
        return np.concatenate(list(self.tri.values()))

    @cached_property
    def face_tags(self) -> np.ndarray:
        return np.concatenate([np.full(len(f), tag) for tag, f in self.tri.items()])

    def face_nodes(self, tag: int) -> np.ndarray:
        """Sorted unique node indices on the triangles with this tag."""
        return np.unique(self.tri[tag])


def wall_boundary(surfaces: Surfaces, *, size: float = 1.5) -> Boundary:
    """Triangulate the wall's boundary at edge length ``size`` mm: endocardium and epicardium
    in rings from their apical poles to the base plane, and the base annulus between the rims."""
    endo_rings = surface_rings(surfaces, "endo", size)
    epi_rings = surface_rings(surfaces, "epi", size)
    base_rings = _base_rings(surfaces, endo_rings[-1], epi_rings[-1], size)

    # global node numbering: each ring's local points, concatenated
    blocks, offset = [], 0
    def add(ring):
        nonlocal offset
        idx = np.arange(offset, offset + len(ring[0]))
        blocks.append(ring[0])
        offset += len(ring[0])
        return idx
    endo_idx = [add(r) for r in endo_rings]
    epi_idx = [add(r) for r in epi_rings]
    base_idx = [endo_idx[-1]] + [add(r) for r in base_rings[1:-1]] + [epi_idx[-1]]
    local = np.concatenate(blocks)

    # the base rings begin and end with the endo and epi rims (their nodes are shared)
    tri = {
        ENDO: stitch_rings(endo_idx, [r[1] for r in endo_rings]),
        EPI: stitch_rings(epi_idx, [r[1] for r in epi_rings]),
        BASE: stitch_rings(base_idx, [r[1] for r in base_rings]),
    }
    # consistently oriented surfaces (out of the wall: endo into the cavity, epi outward, base
    # toward +z); the final mesh's faces come from its tetrahedra themselves
    centre = np.array([0.0, 0.0, surfaces.systems["epi"][0]])
    for tag, faces in tri.items():
        n, a = meshtools.triangle_normals(local, faces)
        c = local[faces].mean(axis=1)
        if tag == BASE:
            wrong = np.sum(a * n[:, 2]) < 0
        else:
            radial = c - centre
            out = np.sum(a * np.einsum("ij,ij->i", n, radial))
            wrong = out < 0 if tag == EPI else out > 0
        if wrong:
            tri[tag] = faces[:, ::-1]
    return Boundary(local=local, tri=tri, rims={"endo": endo_idx[-1], "epi": epi_idx[-1]}, axis=surfaces.axis)


def fill_wall(surfaces: Surfaces, boundary: Boundary, *, size: float = 1.5, threads: int = 1,
              quality: bool = True) -> WallMesh:
    """The tetrahedral wall inside ``boundary`` (from `wall_boundary` at the same ``size``).

    ``quality=False`` leaves ``quality`` empty, for the caller to fill in with `tet_quality`
    once it has handed the mesh to work that does not need it (the pipeline does).
    """
    axis = surfaces.axis
    points, tets, tri = fill_volume(boundary.local, boundary.tri, boundary.rims,
                                    {ENDO: ["endo"], EPI: ["epi"], BASE: ["endo", "epi"]}, size, threads)
    points_world = axis.to_world(points)
    tets, faces, face_tags, owners = tagged_boundary(points_world, tets, tri)
    return WallMesh(points=points_world, tets=tets, faces=faces, face_tags=face_tags, axis=axis,
                    endo_apex=surfaces.apex("endo"), epi_apex=surfaces.apex("epi"),
                    quality=tet_quality(points_world, tets) if quality else {},
                    boundary_nodes=boundary_rows(boundary, points, tri), face_owners=owners)


def boundary_rows(boundary: Boundary, points: np.ndarray, tri: dict) -> np.ndarray | None:
    """Row (P,) in the volume mesh of each boundary node, or None if it cannot be told for sure.

    gmsh renumbers the nodes but keeps each surface's triangles in the order given, so the k-th
    triangle of a tag is ours in its numbering (``tri``, from `fill_volume`). Taken only if
    that gives every node one row, at exactly our position (``points`` in the long-axis frame).
    """
    rows = np.full(len(boundary.local), -1, dtype=np.int64)
    for tag, ours in boundary.tri.items():
        theirs = tri.get(tag)
        if theirs is None or theirs.shape != ours.shape:
            return None
        seen = rows[ours]
        if np.any((seen >= 0) & (seen != theirs)):
            return None
        rows[ours] = theirs
    if np.any(rows < 0) or not np.array_equal(points[rows], boundary.local):
        return None
    return rows


def surface_rings(surfaces: Surfaces, name: str, size: float) -> list[tuple[np.ndarray, np.ndarray]]:
    """Node rings of one fitted surface, from the apical pole (one point) to the base rim.

    Rings are levels of the surface's prolate angle, spaced about ``ROW * size`` apart along
    the meridian; each holds about one node per ``size`` mm of circumference, shifted half a
    step on every other ring so the stitched triangles are near equilateral.

    Parameters
    ----------
    surfaces : Surfaces
    name : str
        ``"endo"`` or ``"epi"``.
    size : float, mm
        Target edge length.

    Returns
    -------
    list of (ndarray (n, 3), ndarray (n,))
        Per ring, the local points (mm) and their angles about the axis (radians, rising from
        about -pi); the last ring lies in the base plane exactly.
    """
    t_fine = np.linspace(0.0, 1.0, 241)
    th_probe = np.linspace(-np.pi, np.pi, 33)[:-1]
    mu_b = surfaces.base_mu(name, th_probe)
    T, TH = np.meshgrid(t_fine, th_probe, indexing="ij")
    MU = T * mu_b[None, :]
    p = surfaces.local_point(name, MU.ravel(), TH.ravel()).reshape(len(t_fine), len(th_probe), 3)
    arc = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(p, axis=0), axis=2).mean(axis=1))])
    n_rows = max(2, int(np.ceil(arc[-1] / (ROW * size))))
    t_rows = np.interp(np.linspace(0.0, arc[-1], n_rows + 1), arc, t_fine)

    rings = [(surfaces.local_point(name, np.array([0.0]), np.array([0.0])), np.array([-np.pi]))]
    th_c = np.linspace(-np.pi, np.pi, 129)[:-1]
    mu_bc = surfaces.base_mu(name, th_c)
    circ = np.linalg.norm(np.diff(
        surfaces.local_point(name, t_rows[1:, None] * mu_bc[None, :], np.broadcast_to(th_c, (n_rows, len(th_c)))
                             ).reshape(n_rows, len(th_c), 3)[:, np.r_[0:len(th_c), 0]], axis=1), axis=2).sum(axis=1)
    counts = [max(6, int(round(c / size))) for c in circ]
    thetas = [-np.pi + 2 * np.pi * (np.arange(n) + 0.5 * (j % 2)) / n for j, n in enumerate(counts, start=1)]
    # every ring's nodes at once: one bisection for the base of all their meridians (the base
    # angle of each meridian is its own root; one call per ring cost seconds at 1 mm)
    theta = np.concatenate(thetas)
    t = np.repeat(t_rows[1:], counts)
    t[-counts[-1]:] = 1.0  # the rim: on the base plane itself
    pts = surfaces.local_point(name, t * surfaces.base_mu(name, theta), theta)
    pts[-counts[-1]:, 2] = 0.0  # the rim lies in the base plane exactly
    ends = np.cumsum(counts)
    rings += list(zip(np.split(pts, ends[:-1]), thetas))
    return rings


def _base_rings(surfaces: Surfaces, endo_rim, epi_rim, size):
    """Rings of the flat base annulus from the endocardial rim to the epicardial rim."""
    def rho(ring):
        return np.hypot(ring[0][:, 0], ring[0][:, 1])
    gap = np.mean(rho(epi_rim)) - np.mean(rho(endo_rim))
    n_rows = max(1, int(np.ceil(gap / (ROW * size))))
    rings = [endo_rim]
    if n_rows > 1:
        f = np.arange(1, n_rows) / n_rows
        r_mean = (1 - f) * rho(endo_rim).mean() + f * rho(epi_rim).mean()
        counts = [max(6, int(round(2 * np.pi * r / size))) for r in r_mean]
        thetas = [-np.pi + 2 * np.pi * (np.arange(n) + 0.5 * (i % 2)) / n for i, n in enumerate(counts, start=1)]
        theta = np.concatenate(thetas)   # every ring at once: one root search per surface
        share = np.repeat(f, counts)
        r = (1 - share) * _rim_radius(surfaces, "endo", theta) + share * _rim_radius(surfaces, "epi", theta)
        flat = np.column_stack([r * np.cos(theta), r * np.sin(theta), np.zeros(len(theta))])
        rings += list(zip(np.split(flat, np.cumsum(counts)[:-1]), thetas))
    rings.append(epi_rim)
    return rings


def _rim_radius(surfaces, name, theta):
    p = surfaces.local_point(name, surfaces.base_mu(name, theta), theta)
    return np.hypot(p[:, 0], p[:, 1])


def stitch_rings(index_rings, angle_rings) -> np.ndarray:
    """Triangles (T, 3) joining each closed ring of node indices to the next one.

    Parameters
    ----------
    index_rings : list of ndarray (n_j,) int
        Node indices of each ring, in the order of ``angle_rings``.
    angle_rings : list of ndarray (n_j,), radians
        Angles about the axis of each ring's nodes, rising from about -pi.
    """
    return np.concatenate([_stitch(index_rings[j], angle_rings[j], index_rings[j + 1], angle_rings[j + 1])
                           for j in range(len(index_rings) - 1)])


def _stitch(ia, aa, ib, ab) -> np.ndarray:
    """Triangles joining two closed rings whose angles both rise from about -pi.

    Walking once around, each step advances along the ring whose next point comes first in
    angle: an advance on ring A gives (A_i, A_i+1, B_j), one on ring B gives (A_i, B_j+1, B_j).
    """
    return stitch_steps(ia, ib, np.append(aa[1:], aa[0] + 2 * np.pi), np.append(ab[1:], ab[0] + 2 * np.pi),
                        closed=True)


def stitch_steps(ia, ib, next_a, next_b, *, closed: bool) -> np.ndarray:
    """Triangles (T, 3) of one walk along two rows of node indices ``ia``, ``ib``.

    ``next_a``, ``next_b`` are the positions (an angle, a fraction) at which each row's next
    point is reached; the walk takes them in rising order. An advance on A gives
    (A_i, A_i+1, B_j), one on B gives (A_i, B_j+1, B_j). ``closed`` rows wrap around to their
    first point; open ones stop at their last. Degenerate triangles are left out.
    """
    is_a = np.concatenate([np.ones(len(next_a), bool), np.zeros(len(next_b), bool)])
    is_a = is_a[np.argsort(np.concatenate([next_a, next_b]), kind="stable")]
    i = np.concatenate([[0], np.cumsum(is_a)[:-1]])      # A-advances before each step
    j = np.concatenate([[0], np.cumsum(~is_a)[:-1]])     # B-advances before each step
    na, nb = len(ia), len(ib)
    at = (lambda k, n: k % n) if closed else (lambda k, n: np.minimum(k, n - 1))  # noqa: E731
    a0, a1 = ia[at(i, na)], ia[at(i + 1, na)]
    b0, b1 = ib[at(j, nb)], ib[at(j + 1, nb)]
    tri = np.where(is_a[:, None], np.column_stack([a0, a1, b0]), np.column_stack([a0, b1, b0]))
    ok = (tri[:, 0] != tri[:, 1]) & (tri[:, 1] != tri[:, 2]) & (tri[:, 0] != tri[:, 2])
    return tri[ok]


def fill_volume(local, tri: dict, rims: dict, bounds: dict, size: float, threads: int = 1, *,
                name: str = "wall"):
    """Hand a tagged closed boundary to gmsh as discrete entities and fill the volume.

    Parameters
    ----------
    local : ndarray (P, 3), mm
        Boundary node positions.
    tri : dict of int to ndarray (F, 3)
        Triangles per face tag, outward.
    rims : dict of str to ndarray (R,)
        Closed node loops where the surfaces meet (the base rings).
    bounds : dict of int to list of str
        For each face tag, the rims that bound it, in gmsh's entity order.

    Returns
    -------
    points (N, 3), tets (M, 4), tri (dict of tag to (F, 3)) in the volume mesh's numbering.
    """
    import gmsh

    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.option.setNumber("General.NumThreads", max(1, int(threads)))
        gmsh.model.add(name)
        m = gmsh.model
        curve = {}
        on_curve = np.zeros(len(local), bool)
        for rim_name, rim in rims.items():
            c = m.addDiscreteEntity(1)
            m.mesh.addNodes(1, c, rim + 1, local[rim].ravel())
            m.mesh.addElementsByType(c, 1, [], (np.column_stack([rim, np.roll(rim, -1)]) + 1).ravel())
            curve[rim_name] = c
            on_curve[rim] = True
        surf = {tag: m.addDiscreteEntity(2, -1, [curve[r] for r in names]) for tag, names in bounds.items()}
        for tag, faces in tri.items():
            nodes = np.unique(faces)
            nodes = nodes[~on_curve[nodes]]
            if len(nodes):
                m.mesh.addNodes(2, surf[tag], nodes + 1, local[nodes].ravel())
            m.mesh.addElementsByType(surf[tag], 2, [], (faces + 1).ravel())
        vol = m.geo.addVolume([m.geo.addSurfaceLoop(list(surf.values()))])
        m.geo.synchronize()
        m.addPhysicalGroup(3, [vol], 1, "wall")
        for tag, s in surf.items():
            m.addPhysicalGroup(2, [s], tag)
        gmsh.option.setNumber("Mesh.MeshSizeMin", 0.5 * size)
        gmsh.option.setNumber("Mesh.MeshSizeMax", size)
        gmsh.option.setNumber("Mesh.Algorithm3D", 10)
        gmsh.option.setNumber("Mesh.Optimize", 1)
        m.mesh.generate(3)
        tags, coords, _ = m.mesh.getNodes()
        _, elem = m.mesh.getElementsByType(4)
        # gmsh may renumber nodes: read our tagged triangles back in its numbering
        tri_back = {tag: m.mesh.getElementsByType(2, s)[1] for tag, s in surf.items()}
    finally:
        gmsh.finalize()
    order = np.argsort(tags)
    lookup = np.full(int(tags.max()) + 1, -1, dtype=np.int64)
    lookup[tags[order]] = np.arange(len(tags))
    points = coords.reshape(-1, 3)[order]
    tets = lookup[elem.astype(np.int64)].reshape(-1, 4)
    tri = {tag: lookup[t.astype(np.int64)].reshape(-1, 3) for tag, t in tri_back.items()}
    used = np.zeros(len(points), bool)
    used[tets.ravel()] = True
    if not used.all():  # drop nodes no tetrahedron uses
        remap = np.cumsum(used) - 1
        points, tets = points[used], remap[tets]
        tri = {tag: remap[t] for tag, t in tri.items()}
    return points, tets, tri


def tagged_boundary(points: np.ndarray, tets: np.ndarray,
                    tri: dict) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Positively oriented tetrahedra, their boundary faces (out of the wall), the faces' tags
    and the element owning each face.

    Only elements touching our triangles' nodes are searched for boundary faces. That finds
    every boundary face when gmsh kept our surfaces; that it did is checked by the count of
    faces found against ours and by the volume of the tetrahedra against the volume our
    triangles enclose (a hole or a part outside them would change it).

    Raises
    ------
    RuntimeError
        gmsh changed the boundary.
    """
    signed = meshtools.signed_volumes(points, tets)
    tets = meshtools.orient_positive(points, tets, volumes=signed)
    ours = np.concatenate(list(tri.values()))
    on = np.zeros(len(points), bool)
    on[ours] = True
    faces, owners = meshtools.boundary_faces(tets, on)
    face_tags = match_face_tags(faces, tri, len(points))
    filled = float(np.abs(signed).sum())
    enclosed = meshtools.enclosed_volume(points, faces)
    if len(faces) != len(ours) or abs(filled - enclosed) > 1e-8 * abs(enclosed):
        raise RuntimeError(f"gmsh's tetrahedra fill {filled:.6g} mm^3 with {len(faces)} boundary faces on our "
                           f"{len(ours)} triangles enclosing {enclosed:.6g} mm^3; the mesh is not bounded by the "
                           "fitted surfaces")
    return tets, faces, face_tags, owners


def match_face_tags(faces, tri, n_points):
    """Tag (F,) of each boundary face of the tetrahedra, looked up among our tagged triangles.

    Parameters
    ----------
    faces : ndarray (F, 3) int
        Boundary triangles of the volume mesh.
    tri : dict int -> ndarray (T, 3) int
        The tagged triangles handed to gmsh (tag -> triangles, any vertex order).
    n_points : int
        Number of mesh points (for the triangle keys).

    Raises
    ------
    RuntimeError
        A boundary face is not one of ours (gmsh changed the boundary).
    """
    ours = np.concatenate(list(tri.values()))
    ours_tag = np.concatenate([np.full(len(f), t) for t, f in tri.items()])
    row = meshtools.match_triangles(faces, ours, n_points)
    if np.any(row < 0):
        raise RuntimeError(f"gmsh changed {np.count_nonzero(row < 0)} boundary faces; the mesh is not bounded by "
                           "the fitted surfaces")
    return ours_tag[row]


def volumes_mm3(wall: WallMesh) -> tuple[float, float]:
    """Wall volume (sum of tetrahedra) and cavity volume (endocardium closed by the base plane).

    The cavity volume is the divergence theorem over the endocardial faces with the origin in
    the base plane, where the cap's contribution x . n vanishes.
    """
    # the endocardial faces point into the cavity, so the volume they enclose is negative
    cavity = -meshtools.enclosed_volume(wall.points, wall.faces[wall.face_tags == ENDO], origin=wall.axis.base_centre)
    return float(wall.cell_volumes.sum()), float(cavity)


def tet_quality(points: np.ndarray, tets: np.ndarray, *, volumes: np.ndarray | None = None,
                gradients: np.ndarray | None = None) -> dict:
    """Quality statistics: volume, radius ratio (1 for a regular tetrahedron) and dihedral angles.

    ``volumes`` (M,) signed and ``gradients`` (M, 4, 3), the barycentric gradients of
    `fibers.fem.tet_gradients`, when the caller has them (the pipeline passes
    `WallMesh.cell_volumes` and the gradients the coordinates then reuse). Every measure follows
    from the gradients:
    ``g_k = -n_k A_k / (3 V)`` with ``n_k`` the outward unit normal and ``A_k`` the area of the
    face opposite vertex k, so the inradius ``3 V / sum A_k`` is ``1 / sum |g_k|``, the
    circumradius (the circumsphere's formula, ``|sum_k |e_k|^2 (e_i x e_j)| / (12 V)`` over the
    edges ``e_k`` from vertex 0) is ``|sum_k |e_k|^2 g_k| / 2``, and the dihedral angle at the
    edge shared by faces i and j is ``pi - arccos(n_i . n_j)``.
    """
    from fibers import fem
    from fibers.meshtools import signed_volumes

    vol = signed_volumes(points, tets) if volumes is None else volumes
    if gradients is None:
        _, gradients = fem.tet_gradients(points, tets)
    g = np.ascontiguousarray(gradients.transpose(1, 2, 0))   # (4, 3, M): contiguous rows
    length = [np.sqrt(v[0] * v[0] + v[1] * v[1] + v[2] * v[2]) for v in g]
    r_in = 1.0 / (length[0] + length[1] + length[2] + length[3])
    p = np.ascontiguousarray(np.asarray(points, float).T)
    t = np.ascontiguousarray(np.asarray(tets).T)
    x0 = p[:, t[0]]
    s = np.zeros_like(x0)
    for k in (1, 2, 3):
        e = p[:, t[k]] - x0
        s += (e[0] * e[0] + e[1] * e[1] + e[2] * e[2]) * g[k]
    r_out = 0.5 * np.sqrt(s[0] * s[0] + s[1] * s[1] + s[2] * s[2])
    ratio = 3 * r_in / r_out
    unit = [v / w for v, w in zip(g, length)]
    pairs = [(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)]
    cosines = np.stack([unit[i][0] * unit[j][0] + unit[i][1] * unit[j][1] + unit[i][2] * unit[j][2]
                        for i, j in pairs])
    # the angle grows with the cosine: the extremes come from the extreme cosines alone
    dihedral = np.degrees(np.pi - np.arccos(np.clip([cosines.min(), cosines.max()], -1, 1)))
    return {
        "tetrahedra": int(len(tets)),
        "nodes": int(len(points)),
        "inverted": int(np.count_nonzero(vol <= 0)),
        "volume_min_mm3": float(vol.min()),
        "radius_ratio_min": float(ratio.min()),
        "radius_ratio_mean": float(ratio.mean()),
        "radius_ratio_p01": float(np.percentile(ratio, 1)),
        "dihedral_min_deg": float(dihedral.min()),
        "dihedral_max_deg": float(dihedral.max()),
    }
