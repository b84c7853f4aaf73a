"""Reading a finished build folder back: the wall mesh with its point and cell fields, and the
manifest. Used by everything that works on a build after the fact (the field evaluator, fresh
pools, voxel volumes).
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from fibers.errors import InputError

# Cell types whose first four nodes are the tetrahedron's corners (meshio's names).
_TETRA_TYPES = ("tetra", "tetra10")


def read_build(folder) -> dict:
    """The mesh, fields and manifest of a build folder.

    Parameters
    ----------
    folder : str or Path
        Output folder of ``fibers build`` (holds ``manifest.json`` and ``mesh.vtu``).

    Returns
    -------
    dict
        ``folder`` (Path), ``manifest`` (dict), ``points`` ndarray (N, 3) mm, ``tets`` ndarray
        (M, 4) int64 (the corner nodes, also for quadratic elements), ``point_data`` and
        ``cell_data`` (dict of str to ndarray, cell data of the tetrahedra only).

    Raises
    ------
    InputError
        The folder is not a finished build, or its files cannot be read.
    """
    folder = Path(folder)
    hint = "give the output folder of a finished fibers build"
    if not folder.is_dir():
        raise InputError(f"{folder} is not a folder: {hint}")
    if not (folder / "manifest.json").is_file():
        raise InputError(f"{folder} has no manifest.json: {hint}")
    try:
        manifest = json.loads((folder / "manifest.json").read_text())
    except (OSError, ValueError) as err:
        raise InputError(f"{folder}/manifest.json cannot be read ({err}): build the folder again") from None
    if not (folder / "mesh.vtu").is_file():
        raise InputError(f"{folder} has no mesh.vtu: {hint}")
    try:
        mesh = read_volume_mesh(folder / "mesh.vtu")
    except Exception as err:  # meshio raises many types for a damaged file
        raise InputError(f"{folder}/mesh.vtu cannot be read ({type(err).__name__}: {err}): build the "
                         "folder again") from None
    if mesh is None:
        raise InputError(f"{folder}/mesh.vtu holds no tetrahedra: {hint}")
    return {"folder": folder, "manifest": manifest, "points": np.asarray(mesh.points, float),
            "tets": np.ascontiguousarray(mesh.cells[:, :4], dtype=np.int64),
            "point_data": mesh.point_data, "cell_data": mesh.cell_data}


@dataclass(frozen=True)
class VolumeMesh:
    """The tetrahedra of a ``mesh.vtu``: ``cells`` (M, 4) or (M, 10) of ``cell_type``."""

    points: np.ndarray
    cells: np.ndarray
    cell_type: str
    point_data: dict
    cell_data: dict


def read_volume_mesh(path) -> VolumeMesh | None:
    """The tetrahedra of a VTU file with their fields, or None if it holds none.

    The raw layout fibers writes is read by `fibers.io.vtkxml.read_grid`; any other VTU (an
    older build's base64 arrays, a file saved again by another program) by meshio, its
    tetrahedron blocks joined (10-node cells only if every block has them, else their corners).
    """
    from fibers.io import vtkxml

    try:
        grid = vtkxml.read_grid(path)
    except vtkxml.NotOurLayout:
        return _read_with_meshio(path)
    if grid["cell_type"] not in _TETRA_TYPES:
        return None
    return VolumeMesh(grid["points"], grid["cells"], grid["cell_type"], grid["point_data"], grid["cell_data"])


def _read_with_meshio(path) -> VolumeMesh | None:
    import meshio

    mesh = meshio.read(path)
    blocks = [i for i, c in enumerate(mesh.cells) if c.type in _TETRA_TYPES]
    if not blocks:
        return None
    quadratic = all(mesh.cells[i].type == "tetra10" for i in blocks)
    cells = np.concatenate([mesh.cells[i].data if quadratic else mesh.cells[i].data[:, :4] for i in blocks])
    cell_data = {k: np.concatenate([np.asarray(v[i]) for i in blocks]) for k, v in mesh.cell_data.items()}
    return VolumeMesh(np.asarray(mesh.points), cells, "tetra10" if quadratic else "tetra",
                      {k: np.asarray(v) for k, v in mesh.point_data.items()}, cell_data)


def input_image(folder, manifest: dict) -> Path | None:
    """The label map a build was made from, or None for a contour build.

    The manifest records the path as read; when that file has moved, the copy inside the build
    (``input/<name>``, as the demo writes it) is taken.
    """
    source = (manifest.get("parameters", {}).get("input", {}) or {}).get("labelmap")
    if not source:
        return None
    name = Path(source).name
    recorded = [Path(i["path"]) for i in manifest.get("inputs", []) if Path(i.get("path", "")).name == name]
    for path in recorded + [Path(folder) / "input" / name]:
        if path.is_file():
            return path
    return None
