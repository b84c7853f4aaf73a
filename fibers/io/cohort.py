"""The cohort table ``DIR/cohort.csv``: one row per subject, written whole after every subject.

Columns: ``subject``, ``status`` (``ok``, ``failed``, ``skipped``), ``error`` (one line),
``seconds`` (the subject's build, or the check that skipped it), the summary figures in mm, mL,
g and counts, the mean wall thickness of each AHA segment (``thickness_mm_1`` ...
``thickness_mm_17``, empty when a segment has no points or the build has no landmarks) and the
case file. The file is replaced by a rename, so a reader never sees half a table.
"""

from __future__ import annotations

import csv
import os
import uuid
from pathlib import Path

from fibers.errors import InputError

FIGURES = ("myocardial_volume_ml", "cavity_volume_ml", "lv_mass_g", "long_axis_length_mm", "tetrahedra",
           "worst_fit_residual_mm", "warnings")
THICKNESS = tuple(f"thickness_mm_{k}" for k in range(1, 18))
COLUMNS = ("subject", "status", "error", "seconds") + FIGURES + THICKNESS + ("case",)
TABLE = "cohort.csv"
PAGE = "cohort.html"


def check_cohort_folder(folder: Path) -> None:
    """Refuse a folder that holds other things than an earlier cohort (it would be mixed in)."""
    folder = Path(folder)
    if folder.exists() and (not folder.is_dir() or (any(folder.iterdir()) and not (folder / TABLE).is_file())):
        raise InputError(f"{folder} exists and is not a fibers cohort folder (no {TABLE}); "
                         f"choose another --out or remove it")


def write_table(folder: Path, rows: list[dict]) -> Path:
    """Write ``folder/cohort.csv`` from rows (dicts keyed by ``COLUMNS``; missing keys stay empty)."""
    path = Path(folder) / TABLE
    tmp = path.with_name(f".{TABLE}.{uuid.uuid4().hex[:8]}")
    with open(tmp, "w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=COLUMNS, extrasaction="ignore", lineterminator="\n")
        w.writeheader()
        for row in rows:
            w.writerow({k: "" if row.get(k) is None else row.get(k) for k in COLUMNS})
    os.replace(tmp, path)
    return path


def read_table(folder: Path) -> list[dict]:
    """Rows of ``folder/cohort.csv`` with numbers as numbers and empty cells as None; [] if absent."""
    path = Path(folder) / TABLE
    if not path.is_file():
        return []
    with open(path, newline="") as f:
        return [{k: _value(k, v) for k, v in row.items() if k in COLUMNS} for row in csv.DictReader(f)]


def _value(key: str, text: str):
    if text is None or text == "":
        return None
    if key in ("tetrahedra", "warnings"):
        return int(float(text))
    if key in FIGURES or key in THICKNESS or key == "seconds":
        return float(text)
    return text
