"""Pool files: ``pools/<name>.npz`` (numpy arrays) and ``pools/<name>.vtp`` (point clouds).

The npz files are ordinary numpy archives (``np.load`` reads them) written member by member
with a fixed timestamp and no compression, so the same pools give the same bytes; ``np.savez``
stamps the current time into the zip headers. Arrays are stored without pickling: name tables
(``region_names``) are fixed-width unicode arrays.

The VTP copy holds the per-point arrays as point data (vectors as 3-component arrays, name tables
as field data), for viewers.
"""

from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np

from fibers.errors import InputError

_EPOCH = (1980, 1, 1, 0, 0, 0)  # the earliest date a zip header can hold


def _write_npz(path: Path, arrays: dict) -> None:
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as zf:
        for key, value in arrays.items():
            info = zipfile.ZipInfo(f"{key}.npy", date_time=_EPOCH)
            info.external_attr = 0o644 << 16
            with zf.open(info, "w", force_zip64=True) as fh:
                np.lib.format.write_array(fh, np.ascontiguousarray(value), allow_pickle=False)


def _write_vtp(path: Path, arrays: dict) -> None:
    import pyvista as pv

    cloud = pv.PolyData(np.asarray(arrays["points"], float))
    n = len(arrays["points"])
    for key, value in arrays.items():
        value = np.asarray(value)
        if key == "points":
            continue
        if value.dtype.kind == "U":
            cloud.field_data[key] = value
        elif len(value) == n:
            # VTK has no int8 reader everywhere; widen small integers for viewers.
            cloud.point_data[key] = value.astype(np.int32) if value.dtype.kind in "iub" else value
    cloud.save(str(path), binary=True, compression=None)  # zlib tripled the time


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
        _write_npz(out / f"{name}.npz", arrays)
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
        ``points`` (K, 3) mm and the pool's fields.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"pool file {path} does not exist: give a pools/<name>.npz file of a build")
    try:
        with np.load(path, allow_pickle=False) as data:
            arrays = {key: data[key] for key in data.files}
    except (OSError, ValueError, zipfile.BadZipFile) as exc:
        raise InputError(f"pool file {path} is not a numpy archive ({exc}): give a "
                         "pools/<name>.npz file of a build") from None
    if "points" not in arrays:
        raise InputError(f"pool file {path} has no 'points' array: give a pools/<name>.npz "
                         "file of a build")
    return arrays
