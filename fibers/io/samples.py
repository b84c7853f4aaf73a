"""Query points in, fields out: the files of ``fibers sample``.

POINTS is a ``.npy`` array (n, 3), a ``.npz`` archive with a ``points`` array (n, 3), or a CSV
file whose header names the columns ``x,y,z`` (other columns are ignored), all in mm in the
build's world frame. FIELDS is a numbers-only ``.npz`` archive (`fibers.io.pools.write_npz`):
``points`` and every field, with a ``metadata.json`` member holding units and conventions.
"""

from __future__ import annotations

import os
import re
import uuid
import zipfile
from pathlib import Path

import numpy as np

from fibers.errors import InputError

_WHAT = "give an .npy array (n, 3), an .npz with a 'points' array (n, 3), or a CSV with header x,y,z"


def read_points(path) -> np.ndarray:
    """Query points (n, 3) float64, mm, from a .npy, .npz or .csv file.

    Raises
    ------
    InputError
        Missing or unreadable file, wrong suffix, shape or header, a non-number (CSV: with its
        line), or a non-finite value (with its row).
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: points file not found; {_WHAT}")
    suffix = path.suffix.lower()
    if suffix == ".npy":
        points = _load_npy(path)
    elif suffix == ".npz":
        points = _load_npz(path)
    elif suffix == ".csv":
        points = _load_csv(path)
    else:
        raise InputError(f"{path}: unknown points file type {path.suffix!r}; {_WHAT}")
    return _checked(path, points)


def _load_npy(path: Path) -> np.ndarray:
    try:
        return np.load(path, allow_pickle=False)
    except (OSError, ValueError) as err:
        raise InputError(f"{path}: not a numpy .npy array ({err}); {_WHAT}") from None


def _load_npz(path: Path) -> np.ndarray:
    try:
        with np.load(path, allow_pickle=False) as data:
            if "points" not in data.files:
                raise InputError(f"{path}: no 'points' array in the archive (it holds "
                                 f"{', '.join(data.files) or 'nothing'}); {_WHAT}")
            return data["points"]
    except (OSError, ValueError, zipfile.BadZipFile) as err:
        raise InputError(f"{path}: not a numpy .npz archive ({err}); {_WHAT}") from None


def _load_csv(path: Path) -> np.ndarray:
    try:
        with path.open("r", encoding="utf-8-sig") as fh:
            header = fh.readline()
    except UnicodeDecodeError:
        raise InputError(f"{path}: not a UTF-8 text file; {_WHAT}") from None
    names = [h.strip().lower() for h in header.strip().split(",")]
    missing = [c for c in "xyz" if c not in names]
    if missing:
        raise InputError(f"{path} line 1: the header {header.strip()!r} lacks the column(s) "
                         f"{', '.join(missing)}; {_WHAT}")
    cols = [names.index(c) for c in "xyz"]
    try:
        data = np.loadtxt(path, delimiter=",", skiprows=1, usecols=cols, ndmin=2, encoding="utf-8-sig")
    except ValueError as err:
        # numpy names the row counted from the first data line: line = row + 2 (header is line 1)
        text = str(err).splitlines()[-1]
        row = re.search(r"row (\d+)", text)
        where = f" line {int(row.group(1)) + 2}" if row else ""
        raise InputError(f"{path}{where}: {text.rstrip('.')}; give numbers in mm in x, y, z") from None
    return data


def _checked(path: Path, points) -> np.ndarray:
    points = np.asarray(points)
    if points.dtype.kind not in "iuf":
        raise InputError(f"{path}: points have dtype {points.dtype}, not numbers; {_WHAT}")
    if points.ndim != 2 or points.shape[1] != 3:
        raise InputError(f"{path}: points have shape {points.shape}; {_WHAT}")
    if len(points) == 0:
        raise InputError(f"{path}: holds no points; {_WHAT}")
    points = points.astype(float)
    bad = ~np.all(np.isfinite(points), axis=1)
    if bad.any():
        first = int(np.flatnonzero(bad)[0])
        where = f"line {first + 2}" if path.suffix.lower() == ".csv" else f"row {first} (0-based)"
        raise InputError(f"{path} {where}: a coordinate is not finite ({int(bad.sum())} such "
                         "points); give finite x, y, z in mm")
    return points


def write_fields(path, fields: dict, metadata: dict) -> Path:
    """Write ``points`` and the fields to an .npz, atomically (a temporary file, then a rename).

    Parameters
    ----------
    path : str or Path
        The archive; ``.npz`` is appended when missing.
    fields : dict of str to ndarray
    metadata : dict
        Stored as the archive's ``metadata.json``.
    """
    from fibers.io.pools import write_npz

    path = Path(path)
    if path.suffix.lower() != ".npz":
        path = path.with_name(path.name + ".npz")
    if path.is_dir():
        raise InputError(f"{path} is a folder: give a file name for --out, such as fields.npz")
    if not path.parent.is_dir():
        raise InputError(f"{path.parent} does not exist: create it or choose another --out")
    tmp = path.with_name(f".{path.name}.partial-{uuid.uuid4().hex[:8]}")
    try:
        write_npz(tmp, fields, metadata)
        os.replace(tmp, path)
    except OSError as err:
        raise InputError(f"cannot write {path} ({err.strerror}); choose another --out") from None
    finally:
        tmp.unlink(missing_ok=True)
    return path
