"""Reading a finished build's mesh and a MOTION.npz displacement file, with their checks.

MOTION.npz holds, in mm in the scanner's world frame, relative to the built geometry (the
reference, usually end-diastole):

- ``displacement`` float (frames, nodes, 3) at the nodes of ``BUILD_DIR/mesh.vtu`` in their
  order; or
- ``points`` (n, 3) with ``displacement`` (frames, n, 3): scattered samples (from a pool, a
  registration grid, feature tracking). They are brought to the mesh nodes by a local fit, see
  :func:`fit_at_nodes`;
- optionally ``time_ms`` (frames,), increasing, and ``mesh_checksum`` (str), the build's
  ``mesh_checksum`` from its manifest, which ties the motion to that mesh.

Every problem the user can fix is one :class:`~fibers.errors.InputError` naming the file.
"""

from __future__ import annotations

import hashlib
import uuid
import zipfile
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fibers.errors import InputError

KNOWN_KEYS = ("displacement", "points", "time_ms", "mesh_checksum")
NEIGHBOURS = {1: 20, 2: 40}  # scattered points per local fit: 4 unknowns per component (affine), 10 (quadratic)


def mesh_checksum(points: np.ndarray, cells: np.ndarray) -> str:
    """sha256 of the corner coordinates of every cell, in cell order, as float64.

    Taken on the corners, so an order-2 copy of the same mesh (extra mid-edge nodes) has the
    same checksum; any change of a node, of the cell order or of the node numbering changes it.
    """
    corners = np.ascontiguousarray(np.asarray(points, np.float64)[np.asarray(cells)[:, :4]])
    return hashlib.sha256(corners.tobytes()).hexdigest()


@dataclass(frozen=True)
class BuildMesh:
    """The reference geometry and fields of a finished build, as ``fibers strain`` needs them.

    ``tets`` are the corner nodes (M, 4) of every tetrahedron (of tetra10 cells too: their
    first four nodes); ``cells`` the full connectivity, (M, 4) or (M, 10) in VTK node order;
    ``order`` is 1 or 2.
    """

    folder: Path
    points: np.ndarray
    tets: np.ndarray
    cells: np.ndarray
    order: int
    point_fields: dict
    cell_fields: dict
    labels: np.ndarray
    checksum: str
    manifest: dict


def read_build_mesh(folder, *, finished: bool = True) -> BuildMesh:
    """Read ``mesh.vtu`` and ``manifest.json`` of a build folder.

    ``finished=False`` reads a build still being written (no manifest yet; the demo writes its
    motion there so that the motion files count as the build's own).

    Raises
    ------
    InputError
        Not a build folder, an unreadable mesh, missing frames, or a mesh.vtu changed since
        the build (its checksum differs from the manifest's).
    """
    from fibers.io.build import read_volume_mesh
    from fibers.io.outputs import read_manifest

    folder = Path(folder)
    if not (folder / "mesh.vtu").is_file() or (finished and not (folder / "manifest.json").is_file()):
        raise InputError(f"{folder} is not a finished fibers build (no mesh.vtu or manifest.json); "
                         "give the --out folder of fibers build or fibers demo")
    try:
        manifest = read_manifest(folder) if finished else {}
        mesh = read_volume_mesh(folder / "mesh.vtu")
    except (OSError, ValueError, KeyError) as err:
        raise InputError(f"{folder}: cannot read mesh.vtu or manifest.json ({type(err).__name__}); "
                         "build the folder again") from None
    if mesh is None:
        raise InputError(f"{folder}/mesh.vtu holds no tetrahedra; build the folder again")
    tets = np.ascontiguousarray(mesh.cells[:, :4], dtype=np.int64)
    order = 2 if mesh.cell_type == "tetra10" else 1
    cells = tets
    if order == 2:
        cells = _vtk_tetra10(folder, np.asarray(mesh.points, np.float64), mesh.cells.astype(np.int64))
        order = 2 if cells.shape[1] == 10 else 1
    need = ("e_rad", "e_long")
    missing = [k for k in need if k not in mesh.point_data]
    if missing:
        raise InputError(f"{folder}/mesh.vtu lacks the point fields {', '.join(missing)}; "
                         "it was not written by this version of fibers: build it again")
    cell_fields = {k: np.asarray(v) for k, v in mesh.cell_data.items()
                   if k in ("aha_segment", "fiber_cell", "sheet_cell", "sheet_normal_cell")}
    labels = np.asarray(cell_fields.pop("aha_segment", np.zeros(len(tets))), np.int64).ravel()
    points = np.asarray(mesh.points, np.float64)
    checksum = mesh_checksum(points, tets)
    stored = manifest.get("mesh_checksum")
    if stored is not None and stored != checksum:
        raise InputError(f"{folder}/mesh.vtu has changed since it was built (mesh checksum "
                         f"{checksum[:12]} differs from the manifest's {stored[:12]}); build the folder again")
    return BuildMesh(folder=folder, points=points, tets=tets, cells=cells, order=order,
                     point_fields={k: np.asarray(v, float) for k, v in mesh.point_data.items()},
                     cell_fields=cell_fields, labels=labels, checksum=checksum, manifest=manifest)


def _vtk_tetra10(folder: Path, points: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """tetra10 connectivity in VTK node order, or the corners alone if the order is not recognised.

    VTK (and meshio) put the mid-edge nodes on edges 01, 12, 02, 03, 13, 23; gmsh's own files
    swap the last two. Each mid-edge node must lie near the middle of its edge (a curved
    boundary moves it by a fraction of the edge's length at most).
    """
    import warnings

    from fibers.strain import TETRA10_EDGES

    def fits(order):
        pairs = np.array(TETRA10_EDGES)
        mid = points[cells[:, 4:][:, order]]
        a, b = points[cells[:, pairs[:, 0]]], points[cells[:, pairs[:, 1]]]
        off = np.linalg.norm(mid - 0.5 * (a + b), axis=2) / np.maximum(np.linalg.norm(a - b, axis=2), 1e-12)
        return float(off.max()) < 0.3
    for order in ([0, 1, 2, 3, 4, 5], [0, 1, 2, 3, 5, 4]):
        if fits(order):
            return np.concatenate([cells[:, :4], cells[:, 4:][:, order]], axis=1)
    warnings.warn(f"{folder}/mesh.vtu: the mid-edge nodes of its tetra10 cells are not in a known order; "
                  "strain is computed from the corner nodes (linear gradient per cell)")
    return cells[:, :4]


@dataclass(frozen=True)
class Motion:
    """Nodal displacements of every frame, checked.

    Attributes
    ----------
    displacement : ndarray (T, N, 3), mm, at the mesh nodes
    time_ms : ndarray (T,), NaN when the file gives no times
    source : str, ``"nodes"`` or ``"scattered"``
    path : Path
    fit : dict, how scattered points were brought to the nodes (empty for node input)
    """

    displacement: np.ndarray
    time_ms: np.ndarray
    source: str
    path: Path
    fit: dict


def read_motion(path, mesh: BuildMesh, *, degree: int = 1, neighbours: int | None = None) -> Motion:
    """Read and check MOTION.npz against a build's mesh.

    Raises
    ------
    InputError
        Unreadable file, a missing or unknown array, a wrong shape or node count (both numbers
        named), non-finite values (frame and count named), times that do not increase, a motion
        made for another mesh (checksum), scattered points that do not cover the mesh.
    """
    path = Path(path)
    neighbours = neighbours or NEIGHBOURS[degree]
    arrays = _load(path)
    unknown = sorted(set(arrays) - set(KNOWN_KEYS))
    if unknown:
        raise InputError(f"{path}: unknown array(s) {', '.join(unknown)}; a motion file holds "
                         f"{', '.join(KNOWN_KEYS)} (only displacement is required)")
    if "displacement" not in arrays:
        raise InputError(f"{path}: no 'displacement' array; save displacements in mm as "
                         "displacement (frames, nodes, 3), with points (n, 3) for scattered samples")
    _check_checksum(path, arrays, mesh)
    disp = _numeric(path, "displacement", arrays["displacement"])
    n_nodes = len(mesh.points)
    scattered = "points" in arrays
    if disp.ndim != 3 or disp.shape[2] != 3 or disp.shape[0] < 1:
        expect = "(frames, n, 3) matching points (n, 3)" if scattered else f"(frames, {n_nodes}, 3)"
        raise InputError(f"{path}: displacement has shape {disp.shape}; expected {expect} in mm "
                         "(one frame is shape (1, nodes, 3))")
    if scattered:
        pts = _numeric(path, "points", arrays["points"])
        if pts.ndim != 2 or pts.shape[1] != 3:
            raise InputError(f"{path}: points has shape {pts.shape}; expected (n, 3) in mm")
        if len(pts) != disp.shape[1]:
            raise InputError(f"{path}: points holds {len(pts)} points but displacement has {disp.shape[1]} per frame; "
                             "give one displacement per point and frame")
        bad = ~np.isfinite(pts).all(axis=1)
        if bad.any():
            raise InputError(f"{path}: points has {int(bad.sum())} rows with NaN or inf (first row {int(np.argmax(bad))}); "
                             "drop them together with their displacements")
        if len(pts) < neighbours:
            raise InputError(f"{path}: {len(pts)} scattered points; the local fit needs at least {neighbours}")
    elif disp.shape[1] != n_nodes:
        raise InputError(f"{path}: displacement has {disp.shape[1]} nodes per frame but "
                         f"{mesh.folder}/mesh.vtu has {n_nodes}; give displacements at the nodes of this build's "
                         "mesh in their order, or scattered samples with their points (n, 3)")
    _check_finite(path, disp)
    time_ms = _times(path, arrays.get("time_ms"), len(disp))
    if not scattered:
        return Motion(displacement=disp, time_ms=time_ms, source="nodes", path=path, fit={})
    node_disp, fit = fit_at_nodes(pts, disp, mesh.points, degree=degree, neighbours=neighbours, path=path)
    return Motion(displacement=node_disp, time_ms=time_ms, source="scattered", path=path, fit=fit)


def _load(path: Path) -> dict:
    if not path.is_file():
        raise InputError(f"{path}: no such file; give a MOTION.npz written with numpy.savez")
    try:
        with np.load(path, allow_pickle=False) as data:
            if not hasattr(data, "files"):
                raise ValueError("a bare .npy array")
            return {k: data[k] for k in data.files}
    except (OSError, ValueError, zipfile.BadZipFile, EOFError) as err:
        raise InputError(f"{path}: not a readable .npz archive ({err}); save it with numpy.savez "
                         "(no pickled objects)") from None


def _numeric(path: Path, name: str, a: np.ndarray) -> np.ndarray:
    if not (np.issubdtype(a.dtype, np.floating) or np.issubdtype(a.dtype, np.integer)):
        raise InputError(f"{path}: {name} has dtype {a.dtype}; expected numbers (float, mm)")
    return np.asarray(a, np.float64)


def _check_finite(path: Path, disp: np.ndarray) -> None:
    bad = ~np.isfinite(disp)
    if bad.any():
        per_frame = bad.reshape(len(disp), -1).sum(axis=1)
        frames = np.flatnonzero(per_frame)
        first = int(frames[0])
        raise InputError(f"{path}: displacement has {int(per_frame[first])} NaN or inf values in frame {first} "
                         f"({len(frames)} frame(s) affected, {int(per_frame.sum())} values in all); "
                         "fill the gaps or drop the frames")


def _times(path: Path, t, frames: int) -> np.ndarray:
    if t is None:
        return np.full(frames, np.nan)
    t = _numeric(path, "time_ms", t).ravel()
    if len(t) != frames:
        raise InputError(f"{path}: time_ms holds {len(t)} values for {frames} frames; give one time per frame")
    if not np.isfinite(t).all() or (np.diff(t) <= 0).any():
        raise InputError(f"{path}: time_ms must be finite and increasing (ms); check frame "
                         f"{int(np.argmax(~np.isfinite(t) | np.r_[False, np.diff(t) <= 0]))}")
    return t


def _check_checksum(path: Path, arrays: dict, mesh: BuildMesh) -> None:
    if "mesh_checksum" not in arrays:
        return
    theirs = str(arrays["mesh_checksum"])
    if theirs != mesh.checksum:
        raise InputError(f"{path} was made for another mesh (its mesh_checksum {theirs[:12]} is not "
                         f"{mesh.folder.name}'s {mesh.checksum[:12]}); give the motion of this build, or drop "
                         "mesh_checksum from the file if the nodes really are this mesh's")


# ----------------------------------------------------------------------------- scattered samples

def fit_at_nodes(points: np.ndarray, displacement: np.ndarray, nodes: np.ndarray, *,
                 degree: int = 1, neighbours: int | None = None,
                 path: Path | str = "motion") -> tuple[np.ndarray, dict]:
    """Displacements at the mesh nodes from scattered samples by a local affine fit.

    At each node x0, an affine map ``u(x) = a + G (x - x0)`` is fitted by weighted least squares
    to the ``neighbours`` nearest samples (scipy cKDTree), with the tricube weight
    ``(1 - (d / d_max)^3)^3`` of locally weighted regression (Cleveland, J Am Stat Assoc 1979),
    ``d_max`` 1.5 times the distance to the farthest of them; the node's displacement is ``a``.
    An affine map is reproduced exactly; the error of a smooth field is second order in the
    samples' spacing. One fit serves every frame (the weights depend only on the points).
    ``degree=2`` fits a quadratic map instead (10 unknowns per component, 40 neighbours by
    default; Cleveland's local regression of degree 2), exact for quadratic fields: use it when
    the samples stop at the wall's surfaces, where the affine fit extrapolates a curved field.

    Parameters
    ----------
    points : ndarray (n, 3), mm
    displacement : ndarray (T, n, 3), mm
    nodes : ndarray (N, 3), mm

    Returns
    -------
    ndarray (T, N, 3), mm, and a dict describing the fit (for the output's manifest)

    Raises
    ------
    InputError
        The samples do not cover the mesh (nodes far from every sample) or lie on a plane or
        line near some node, where an affine map is not determined.
    """
    from scipy.spatial import cKDTree

    if degree not in NEIGHBOURS:
        raise InputError(f"local fit of degree {degree}: use 1 (affine) or 2 (quadratic)")
    neighbours = neighbours or NEIGHBOURS[degree]
    tree = cKDTree(points)
    dist, idx = tree.query(nodes, k=neighbours)
    spacing = float(np.median(dist[:, 0]))
    # the samples' own spacing sets the scale of "far": nearest-neighbour distance among them
    own = float(np.median(tree.query(points, k=2)[0][:, 1]))
    reach = max(5.0, 5.0 * own)
    far = dist[:, 0] > reach
    if far.any():
        k = int(np.argmax(far))
        raise InputError(f"{path}: {int(far.sum())} mesh nodes lie farther than {reach:.1f} mm from every scattered "
                         f"point (e.g. node {k} at {np.round(nodes[k], 1).tolist()} mm); the samples must cover "
                         "the wall of this build")
    d_max = 1.5 * dist[:, -1:] + 1e-12
    w = (1.0 - (dist / d_max) ** 3) ** 3                                   # (N, k)
    scale = dist[:, -1:, None] + 1e-12                                     # unitless offsets: a well-scaled system
    d = (points[idx] - nodes[:, None]) / scale
    terms = [np.ones(idx.shape + (1,)), d]
    if degree == 2:
        i, j = np.triu_indices(3)
        terms.append(d[..., i] * d[..., j])
    A = np.concatenate(terms, axis=2)                                      # (N, k, 4) or (N, k, 10)
    AtW = A.transpose(0, 2, 1) * w[:, None, :]                             # (N, p, k)
    normal = AtW @ A                                                       # (N, p, p)
    cond = np.linalg.cond(normal)
    degenerate = ~np.isfinite(cond) | (cond > 1e10)
    if degenerate.any():
        k = int(np.argmax(degenerate))
        raise InputError(f"{path}: near {int(degenerate.sum())} mesh nodes (e.g. node {k}) the scattered points lie on "
                         "a plane or a line, so the local affine fit is not determined; give samples through the wall")
    # the row of (A^T W A)^-1 A^T W that yields the constant term a, i.e. u at the node
    e0 = np.zeros((len(nodes), A.shape[2], 1))
    e0[:, 0] = 1.0
    row0 = np.linalg.solve(normal.transpose(0, 2, 1), e0)[:, :, 0]         # (N, p): first row of the inverse
    weights = np.einsum("na,nak->nk", row0, AtW)                           # (N, k), sum to 1
    out = np.stack([np.einsum("nk,nkc->nc", weights, u[idx]) for u in displacement])  # frame by frame: less memory
    fit = {"method": f"weighted least squares of {'an affine' if degree == 1 else 'a quadratic'} map per node over "
                     "its nearest scattered points (tricube weights, Cleveland 1979)",
           "degree": degree, "neighbours": neighbours, "median_nearest_mm": round(spacing, 4), "sample_spacing_mm": round(own, 4),
           "median_reach_mm": round(float(np.median(dist[:, -1])), 4), "points": int(len(points))}
    return out, fit


def write_motion(path, displacement: np.ndarray, *, time_ms: np.ndarray | None = None,
                 checksum: str | None = None, points: np.ndarray | None = None) -> None:
    """Write a MOTION.npz (the layout :func:`read_motion` reads), atomically."""
    path = Path(path)
    arrays = {"displacement": np.asarray(displacement, np.float64)}
    if time_ms is not None:
        arrays["time_ms"] = np.asarray(time_ms, np.float64)
    if checksum is not None:
        arrays["mesh_checksum"] = np.array(checksum)
    if points is not None:
        arrays["points"] = np.asarray(points, np.float64)
    tmp = path.with_name(f".{path.name}.partial-{uuid.uuid4().hex[:8]}.npz")
    try:
        np.savez(tmp, **arrays)
        tmp.replace(path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
