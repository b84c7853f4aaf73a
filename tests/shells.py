"""Analytic test bodies meshed with gmsh: a spherical or spheroidal shell cut by a base plane.

Test support only. The shell's long axis is +z (apex to base), the base plane is z = 0 and the
wall lies below it. Faces are tagged by where they lie, which is exact for these bodies.
"""

from __future__ import annotations

import numpy as np

from fibers import meshtools
from fibers.types import BASE, ENDO, EPI, LongAxis, WallMesh


def spheroid_shell(inner=(20.0, 20.0), outer=(30.0, 30.0), *, size=3.0, rotation=None,
                   translation=None) -> WallMesh:
    """Mesh of the shell between two coaxial spheroids below z = 0.

    ``inner`` and ``outer`` are (equatorial radius, polar half-axis) in mm, or (x half-axis,
    y half-axis, polar half-axis) for ellipsoids with elliptic cross-sections. Equal numbers
    give spheres (the hemispherical shell, whose Laplace solution has a closed form). ``rotation`` (3x3) and ``translation``
    (3,) move the finished mesh rigidly into an oblique world frame.
    """
    import gmsh

    (bi, ci, ai), (bo, co, ao) = _three(inner), _three(outer)
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        occ = gmsh.model.occ
        so = occ.addSphere(0, 0, 0, 1.0)
        occ.dilate([(3, so)], 0, 0, 0, bo, co, ao)
        si = occ.addSphere(0, 0, 0, 1.0)
        occ.dilate([(3, si)], 0, 0, 0, bi, ci, ai)
        shell, _ = occ.cut([(3, so)], [(3, si)])
        big = 2.5 * max(bo, co, ao)
        box = occ.addBox(-big, -big, 0.0, 2 * big, 2 * big, big)
        wall, _ = occ.cut(shell, [(3, box)])
        occ.synchronize()
        gmsh.model.addPhysicalGroup(3, [t for _, t in wall], 1)
        gmsh.option.setNumber("Mesh.MeshSizeMin", size)
        gmsh.option.setNumber("Mesh.MeshSizeMax", size)
        gmsh.option.setNumber("Mesh.MeshSizeFromCurvature", 0)
        gmsh.model.mesh.generate(3)
        tags, coords, _ = gmsh.model.mesh.getNodes()
        _, elem_nodes = gmsh.model.mesh.getElementsByType(4)
    finally:
        gmsh.finalize()

    order = np.argsort(tags)
    index = np.empty(int(tags.max()) + 1, dtype=np.int64)
    index[tags[order]] = np.arange(len(tags))
    points = coords.reshape(-1, 3)[order]
    tets = index[elem_nodes.astype(np.int64)].reshape(-1, 4)
    used = np.unique(tets)
    remap = np.full(len(points), -1, dtype=np.int64)
    remap[used] = np.arange(len(used))
    points, tets = points[used], remap[tets]
    tets = meshtools.orient_positive(points, tets)
    faces, _ = meshtools.boundary_faces(tets)

    centroid = points[faces].mean(axis=1)
    on_base = np.abs(centroid[:, 2]) < 1e-6 * max(ao, bo) + 1e-9
    inner_level = centroid[:, 0] ** 2 / bi**2 + centroid[:, 1] ** 2 / ci**2 + centroid[:, 2] ** 2 / ai**2
    outer_level = centroid[:, 0] ** 2 / bo**2 + centroid[:, 1] ** 2 / co**2 + centroid[:, 2] ** 2 / ao**2
    tags_ = np.where(on_base, BASE, np.where(np.abs(inner_level - 1) < np.abs(outer_level - 1), ENDO, EPI))

    rotation = np.eye(3) if rotation is None else np.asarray(rotation, float)
    translation = np.zeros(3) if translation is None else np.asarray(translation, float)
    move = lambda p: np.asarray(p, float) @ rotation.T + translation  # noqa: E731
    axis = LongAxis(base_centre=move([0, 0, 0]), direction=rotation @ [0, 0, 1.0],
                    reference=rotation @ [1.0, 0, 0])
    return WallMesh(points=move(points), tets=tets, faces=faces, face_tags=tags_, axis=axis,
                    endo_apex=move([0, 0, -ai]), epi_apex=move([0, 0, -ao]))


def _three(axes):
    """(x, y, polar) half-axes from (equatorial, polar) or (x, y, polar)."""
    return (axes[0], axes[0], axes[1]) if len(axes) == 2 else tuple(axes)


def random_rotation(seed: int = 0) -> np.ndarray:
    """A proper rotation matrix drawn from a seed (QR of a Gaussian matrix)."""
    q, r = np.linalg.qr(np.random.default_rng(seed).normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q
