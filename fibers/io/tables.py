"""Small CSV tables of a build (``segments.csv``)."""

from __future__ import annotations

import csv
import math
from pathlib import Path


def write_table(path, rows: list[dict], columns) -> Path:
    """Write rows as CSV with a header; floats to 4 decimals, NaN as an empty cell."""
    def cell(v):
        if isinstance(v, float):
            return "" if math.isnan(v) else f"{v:.4f}"
        return v

    path = Path(path)
    with path.open("w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(columns)
        for row in rows:
            writer.writerow([cell(row[c]) for c in columns])
    return path
