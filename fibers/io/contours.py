"""Reading and writing the contours CSV (header structure,slice,x,y,z; see the README, "Input").

Columns are found by their header names, in any order; columns the tool does not use are
ignored with a warning. A leading byte-order mark and any line ends (LF, CRLF, old Mac CR) are
accepted. Nothing of a file that turns out not to be a contours file is quoted back: the case
may point at a file the user did not mean to show.
"""

from __future__ import annotations

import csv
import io
import warnings
from pathlib import Path

import numpy as np

from fibers.errors import InputError
from fibers.types import RawContours

COLUMNS = ("structure", "slice", "x", "y", "z")
STRUCTURES = ("endo", "epi", "rv_endo", "rv_epi")  # rv_*: both ventricles (fibers.biv)
MAX_FILE_BYTES = 512 * 2**20   # a short-axis stack is a few MB; beyond this it is not one
MAX_COORDINATE_MM = 1e5        # 100 m: anything larger is not a scanner position in mm
MAX_SLICE_ID = 2**31 - 1
_SHOWN = 3                     # names quoted back at most


def read_contours(path: str | Path) -> RawContours:
    """Read a contours CSV (header naming ``structure,slice,x,y,z`` in any order).

    Raises
    ------
    InputError
        For a missing, empty, huge, binary or garbled file, a header without the needed
        columns, an unknown structure, a non-integer slice id or a non-numeric, non-finite or
        absurdly large coordinate, naming the line.
    """
    path = Path(path)
    name = path.name
    try:
        if not path.is_file():
            raise InputError(f"{path}: contours file not found; check [input] contours in the case file")
        if path.stat().st_size > MAX_FILE_BYTES:
            raise InputError(f"{name} is {path.stat().st_size / 2**20:.0f} MB, more than a contours file of a "
                             f"short-axis stack can be ({MAX_FILE_BYTES // 2**20} MB); check [input] contours")
        raw = path.read_bytes()
    except OSError as err:
        raise InputError(f"{name}: cannot read the contours file ({err.strerror or err}); "
                         f"check [input] contours in the case file") from None
    return parse_contours(raw, name)


def parse_contours(raw: bytes, name: str = "contours.csv") -> RawContours:
    """Parse the bytes of a contours CSV; ``name`` is used in messages. See `read_contours`."""
    if not raw.strip():
        raise InputError(f"{name} is empty: expected the header 'structure,slice,x,y,z' and one row per contour point")
    if raw[:2] in (b"\xff\xfe", b"\xfe\xff"):  # UTF-16 with its byte-order mark (some spreadsheet exports)
        try:
            raw = raw.decode("utf-16").encode("utf-8")
        except UnicodeDecodeError:
            raise InputError(f"{name}: starts like UTF-16 text but does not decode; save the contours as a plain UTF-8 CSV") from None
    if b"\x00" in raw:
        raise InputError(f"{name} looks like a binary file, not a CSV: export the contours as text with the header 'structure,slice,x,y,z'")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as err:
        line = raw[: err.start].replace(b"\r\n", b"\n").replace(b"\r", b"\n").count(b"\n") + 1
        raise InputError(f"{name}, line {line}: not UTF-8 text; save the contours as a plain UTF-8 CSV") from None
    text = text.replace("\r\n", "\n").replace("\r", "\n")  # LF, CRLF and old Mac CR alike
    rows = _csv_rows(text, name)
    numbered = [(i + 1, r) for i, r in enumerate(rows) if r and any(c.strip() for c in r)]
    if not numbered:
        raise InputError(f"{name} is empty: expected the header 'structure,slice,x,y,z' and one row per contour point")
    header_line, header = numbered[0]
    col = _columns(header, header_line, name)
    body = numbered[1:]
    if not body:
        raise InputError(f"{name} has a header but no contour points")
    width = max(col.values()) + 1
    short = [ln for ln, r in body if len(r) < width]
    if short:
        raise InputError(f"{name}, line {short[0]}: fewer fields than the header's structure,slice,x,y,z "
                         f"columns; check the delimiter is a comma")

    lines = np.array([ln for ln, _ in body])
    structure = np.array([r[col["structure"]].strip().lower() for _, r in body])
    bad = ~np.isin(structure, STRUCTURES)
    if bad.any():
        k = int(np.argmax(bad))
        raise InputError(
            f"{name}, line {lines[k]}: unknown structure '{_short(structure[k])}'; allowed are 'endo' "
            f"(endocardium), 'epi' (epicardium), 'rv_endo' and 'rv_epi' (right ventricle)")
    slice_id = _column(body, col["slice"], lines, name, "slice", integer=True)
    points = np.column_stack([_column(body, col[c], lines, name, c) for c in "xyz"])
    return RawContours(structure=structure, slice_id=slice_id, points=points, line=lines, source=name)


def _csv_rows(text: str, name: str) -> list[list[str]]:
    reader = csv.reader(io.StringIO(text, newline=None))
    try:
        return list(reader)
    except csv.Error:  # e.g. a field beyond the csv module's size limit, an unclosed quote
        raise InputError(f"{name}, line {reader.line_num}: not a readable CSV row; export the contours as a "
                         f"plain comma-separated file with the header 'structure,slice,x,y,z'") from None


def _columns(header: list[str], line: int, name: str) -> dict[str, int]:
    """Index of each needed column by its name; warn about the ones ignored."""
    names = [h.strip().strip('"').strip().lower() for h in header]
    missing = [c for c in COLUMNS if c not in names]
    if len(names) == 1 and any(d in names[0] for d in ";\t|"):
        raise InputError(f"{name}, line {line}: missing column(s): the header is a single field; the "
                         f"delimiter must be a comma (structure,slice,x,y,z)")
    if len(missing) == len(COLUMNS):
        # most likely not a contours file at all: say so without echoing its content
        raise InputError(f"{name} does not look like a contours CSV: its first line (line {line}) names none of "
                         f"the columns structure,slice,x,y,z; check [input] contours in the case file")
    if missing:
        raise InputError(f"{name}, line {line}: missing column(s) {', '.join(missing)}; the header must name "
                         f"structure,slice,x,y,z (in any order)")
    twice = [c for c in COLUMNS if names.count(c) > 1]
    if twice:
        raise InputError(f"{name}, line {line}: column '{twice[0]}' appears twice in the header; keep one")
    extra = [h for h in names if h not in COLUMNS]
    if extra:
        shown = ", ".join(f"'{_short(h)}'" for h in extra[:_SHOWN]) + (" ..." if len(extra) > _SHOWN else "")
        warnings.warn(f"{name}: {len(extra)} column(s) not used and ignored ({shown}); only "
                      f"structure,slice,x,y,z are read")
    return {c: names.index(c) for c in COLUMNS}


def _short(text: str, n: int = 24) -> str:
    text = "".join(ch if ch.isprintable() else "?" for ch in text)
    return text if len(text) <= n else text[: n - 3] + "..."


def _column(body, index, lines, name, label, integer=False):
    values = [r[index].strip() for _, r in body]
    try:
        out = np.array(values, dtype=float)
    except ValueError:
        out = None
    # Python reads "32_169" as 32169: a digit separator no CSV writer uses, more likely a typo
    if out is not None and any("_" in v for v in values):
        out = None
    if out is None:  # find the first bad cell only on the error path
        for ln, v in zip(lines, values):
            try:
                float(v.replace("_", "?"))
            except ValueError:
                raise InputError(f"{name}, line {ln}: {label} = '{_short(v)}' is not a number") from None
    finite = np.isfinite(out)
    if not finite.all():
        k = int(np.argmin(finite))
        raise InputError(f"{name}, line {lines[k]}: {label} = '{_short(values[k])}' is not a finite number")
    if integer:
        wrong = (out != np.round(out)) | (np.abs(out) > MAX_SLICE_ID)
        if np.any(wrong):
            k = int(np.argmax(wrong))
            raise InputError(f"{name}, line {lines[k]}: slice = '{_short(values[k])}' must be an integer slice id "
                             f"between -{MAX_SLICE_ID} and {MAX_SLICE_ID}")
        return out.astype(np.int64)
    huge = np.abs(out) > MAX_COORDINATE_MM
    if huge.any():
        k = int(np.argmax(huge))
        raise InputError(f"{name}, line {lines[k]}: {label} = '{_short(values[k])}' lies more than 100 m from the "
                         f"scanner origin; coordinates must be in mm")
    return out


def write_contours(path: str | Path, contours: RawContours) -> None:
    """Write contours as CSV with the header structure,slice,x,y,z."""
    with open(path, "w", newline="") as fh:
        fh.write("structure,slice,x,y,z\n")
        for s, k, (x, y, z) in zip(contours.structure, contours.slice_id, contours.points):
            fh.write(f"{s},{int(k)},{x:.4f},{y:.4f},{z:.4f}\n")
