"""Pool files: ``pools/<name>.npz`` (numpy arrays) and ``pools/<name>.vtp`` (point clouds).

The npz files are ordinary numpy archives (``np.load`` reads them) written member by member
with a fixed timestamp and no compression, so the same pools give the same bytes; ``np.savez``
stamps the current time into the zip headers. Arrays are stored without pickling, and only
numbers: name tables (``region_names``) go into a JSON member ``metadata.json`` of the same
archive (``region`` codes there as ``{"region": {"0": "wall", ...}}``), so a generic loader
batches every array of the file. ``np.load(path)["metadata.json"]`` gives its bytes;
`read_pool` turns it back into the ``*_names`` arrays of the Python API.

The VTP copy holds the per-point arrays as point data (vectors as 3-component arrays, name tables
as field data), for viewers: fields in single precision, the points in double.
"""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import numpy as np

from fibers.errors import InputError

_EPOCH = (1980, 1, 1, 0, 0, 0)  # the earliest date a zip header can hold


METADATA = "metadata.json"  # archive member with the name tables and notes


def write_npz(path: Path, arrays: dict, metadata: dict | None = None) -> None:
    """Numbers-only numpy archive with a fixed timestamp; string arrays go to ``metadata.json``.

    A string array ``<x>_names`` becomes ``{"<x>": {"0": name0, ...}}`` in the metadata (the
    codes of the integer array ``<x>``); any other string array is stored as a list.
    """
    meta = dict(metadata or {})
    numeric = {}
    for key, value in arrays.items():
        value = np.asarray(value)
        if value.dtype.kind in "USO":
            names = [str(v) for v in value.ravel()]
            if key.endswith("_names"):
                meta[key[:-len("_names")]] = {str(i): n for i, n in enumerate(names)}
            else:
                meta[key] = names
        else:
            numeric[key] = value
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for key, value in numeric.items():
            info = zipfile.ZipInfo(f"{key}.npy", date_time=_EPOCH)
            info.external_attr = 0o644 << 16
            with zf.open(info, "w", force_zip64=True) as fh:
                np.lib.format.write_array(fh, np.ascontiguousarray(value), allow_pickle=False)
        if meta:
            info = zipfile.ZipInfo(METADATA, date_time=_EPOCH)
            info.external_attr = 0o644 << 16
            zf.writestr(info, json.dumps(meta, indent=1, sort_keys=True) + "\n")



def read_metadata(path) -> dict:
    """The ``metadata.json`` member of a pool or sample archive ({} when it has none)."""
    with zipfile.ZipFile(path) as zf:
        if METADATA not in zf.namelist():
            return {}
        return json.loads(zf.read(METADATA))


def _write_vtp(path: Path, arrays: dict) -> None:
    from fibers.io.vtkxml import write_polydata

    points = np.asarray(arrays["points"], float)
    n = len(points)
    point_data, texts = {}, {}
    for key, value in arrays.items():
        value = np.asarray(value)
        if key == "points":
            continue
        if value.dtype.kind == "U":
            texts[key] = value.tolist()
        elif len(value) == n:
            # VTK has no int8 reader everywhere; widen small integers for viewers. Fields in
            # single precision: a viewer's copy (the npz keeps float64), about half the bytes.
            point_data[key] = value.astype(np.int32 if value.dtype.kind in "iub" else np.float32)
    write_polydata(path, points, vertices=True, point_data=point_data, field_data=texts)


def write_pools(folder, pools: dict, *, vtp: bool = True) -> list[Path]:
    """Write each pool to ``folder/pools/<name>.npz`` (and ``<name>.vtp``).

    Parameters
    ----------
    folder : str or Path
        Output folder; ``pools/`` is created inside it.
    pools : dict of str to fibers.pools.Pool
    vtp : bool
        Also write the VTP point-cloud copies.

    Returns
    -------
    list of Path
        The files written, npz first for each pool.
    """
    out = Path(folder) / "pools"
    out.mkdir(parents=True, exist_ok=True)
    written = []
    for name, pool in pools.items():
        arrays = pool.arrays if hasattr(pool, "arrays") else pool
        write_npz(out / f"{name}.npz", arrays)
        written.append(out / f"{name}.npz")
        if vtp:
            _write_vtp(out / f"{name}.vtp", arrays)
            written.append(out / f"{name}.vtp")
    return written


def read_pool(path) -> dict[str, np.ndarray]:
    """Arrays of one pool file.

    Parameters
    ----------
    path : str or Path
        A ``pools/<name>.npz`` file.

    Returns
    -------
    dict of str to ndarray
        ``points`` (K, 3) mm and the pool's fields; ``<x>_names`` (unicode) rebuilt from the
        archive's metadata for each integer code array ``<x>`` (``region_names``).
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"pool file {path} does not exist: give a pools/<name>.npz file of a build")
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {key: data[key] for key in data.files if key != METADATA}
        meta = read_metadata(path)
    except (OSError, ValueError, zipfile.BadZipFile) as exc:
        raise InputError(f"pool file {path} is not a numpy archive ({exc}): give a "
                         "pools/<name>.npz file of a build") from None
    if "points" not in arrays:
        raise InputError(f"pool file {path} has no 'points' array: give a pools/<name>.npz "
                         "file of a build")
    for key, table in meta.items():
        # name tables of integer codes come back as the ``<key>_names`` arrays of the API
        if key in arrays and isinstance(table, dict) and all(k.isdigit() for k in table):
            names = [""] * (max(int(k) for k in table) + 1)
            for code, name in table.items():
                names[int(code)] = name
            arrays[f"{key}_names"] = np.array(names)
    return arrays
