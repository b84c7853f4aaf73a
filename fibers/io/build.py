"""Reading a finished build folder back: the wall mesh with its point and cell fields, and the
manifest. Used by everything that works on a build after the fact (the field evaluator, fresh
pools, voxel volumes).
"""

from __future__ import annotations

import json
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
    import meshio

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
        mesh = meshio.read(folder / "mesh.vtu")
    except Exception as err:  # meshio raises many types for a damaged file
        raise InputError(f"{folder}/mesh.vtu cannot be read ({type(err).__name__}: {err}): build the "
                         "folder again") from None
    block = next((i for i, c in enumerate(mesh.cells) if c.type in _TETRA_TYPES), None)
    if block is None:
        raise InputError(f"{folder}/mesh.vtu holds no tetrahedra: {hint}")
    tets = np.ascontiguousarray(mesh.cells[block].data[:, :4], dtype=np.int64)
    cell_data = {k: np.asarray(v[block]) for k, v in mesh.cell_data.items()}
    return {"folder": folder, "manifest": manifest, "points": np.asarray(mesh.points, float),
            "tets": tets, "point_data": {k: np.asarray(v) for k, v in mesh.point_data.items()},
            "cell_data": cell_data}


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
