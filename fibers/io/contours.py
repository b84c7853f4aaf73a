"""Reading and writing the contours CSV of DESIGN.md section 3.1."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import numpy as np

from fibers.errors import InputError
from fibers.types import RawContours

COLUMNS = ("structure", "slice", "x", "y", "z")
STRUCTURES = ("endo", "epi", "rv_endo", "rv_epi")  # rv_*: both ventricles (fibers.biv)


def read_contours(path: str | Path) -> RawContours:
    """Read a contours CSV (header ``structure,slice,x,y,z``; extra columns are ignored).

    Raises
    ------
    InputError
        For a missing, empty, binary or garbled file, missing columns, an unknown structure,
        a non-integer slice id or a non-numeric or non-finite coordinate, naming the line.
    """
    path = Path(path)
    name = path.name
    if not path.is_file():
        raise InputError(f"{path}: contours file not found; check [input] contours in the case file")
    raw = path.read_bytes()
    if not raw.strip():
        raise InputError(f"{name} is empty: expected the header 'structure,slice,x,y,z' and one row per contour point")
    if b"\x00" in raw[:4096]:
        raise InputError(f"{name} looks like a binary file, not a CSV: export the contours as text with the header 'structure,slice,x,y,z'")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = raw[: err.start].count(b"\n") + 1
        raise InputError(f"{name}, line {line}: not UTF-8 text; save the contours as a plain UTF-8 CSV") from None

    rows = list(csv.reader(io.StringIO(text)))
    numbered = [(i + 1, r) for i, r in enumerate(rows) if r and any(c.strip() for c in r)]
    if not numbered:
        raise InputError(f"{name} is empty: expected the header 'structure,slice,x,y,z' and one row per contour point")
    header_line, header = numbered[0]
    header = [h.strip().lower() for h in header]
    missing = [c for c in COLUMNS if c not in header]
    if missing:
        raise InputError(
            f"{name}, line {header_line}: missing column(s) {', '.join(missing)}; the header must name "
            f"structure,slice,x,y,z (found: {','.join(header) or 'nothing'})")
    col = [header.index(c) for c in COLUMNS]
    body = numbered[1:]
    if not body:
        raise InputError(f"{name} has a header but no contour points")
    width = max(col) + 1
    short = [ln for ln, r in body if len(r) < width]
    if short:
        raise InputError(f"{name}, line {short[0]}: expected {len(header)} fields (structure,slice,x,y,z), found fewer; check the delimiter is a comma")

    lines = np.array([ln for ln, _ in body])
    structure = np.array([r[col[0]].strip().lower() for _, r in body])
    bad = ~np.isin(structure, STRUCTURES)
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(
            f"{name}, line {lines[k]}: unknown structure '{structure[k]}'; allowed are 'endo' "
            f"(endocardium), 'epi' (epicardium), 'rv_endo' and 'rv_epi' (right ventricle)")
    slice_id = _column(body, col[1], lines, name, "slice", integer=True)
    points = np.column_stack([_column(body, col[k], lines, name, c) for k, c in zip(col[2:], "xyz")])
    return RawContours(structure=structure, slice_id=slice_id, points=points, line=lines, source=name)


def _column(body, index, lines, name, label, integer=False):
    values = [r[index].strip() for _, r in body]
    try:
        out = np.array(values, dtype=float)
    except ValueError:
        out = None
    if out is None:  # find the first bad cell only on the error path
        for ln, v in zip(lines, values):
            try:
                float(v)
            except ValueError:
                raise InputError(f"{name}, line {ln}: {label} = '{v}' is not a number") from None
    finite = np.isfinite(out)
    if not finite.all():
        k = int(np.argmin(finite))
        raise InputError(f"{name}, line {lines[k]}: {label} = '{values[k]}' is not a finite number")
    if integer:
        if np.any(out != np.round(out)):
            k = int(np.argmax(out != np.round(out)))
            raise InputError(f"{name}, line {lines[k]}: slice = '{values[k]}' must be an integer slice id")
        return out.astype(np.int64)
    return out


def write_contours(path: str | Path, contours: RawContours) -> None:
    """Write contours as CSV with the header of DESIGN.md section 3.1."""
    with open(path, "w", newline="") as fh:
        fh.write("structure,slice,x,y,z\n")
        for s, k, (x, y, z) in zip(contours.structure, contours.slice_id, contours.points):
            fh.write(f"{s},{int(k)},{x:.4f},{y:.4f},{z:.4f}\n")
