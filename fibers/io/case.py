"""Reading the case file (DESIGN.md section 3.2): TOML, every key documented and range-checked.

An unknown key is refused with the nearest valid one suggested: it is nearly always a typo.
"""

from __future__ import annotations

import difflib
import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fibers.config import FiberLaw, Landmarks, PoolSettings
from fibers.errors import InputError

# table -> key -> (kind, default, low, high, meaning). Kinds: float, int, bool, str, path,
# point (three floats), choice:<a|b>, profile (list of [depth, angle]), labels (sub-table).
SCHEMA: dict[str, dict[str, tuple]] = {
    "input": {
        "contours": ("path", None, None, None, "contours CSV, relative to the case file"),
        "labelmap": ("path", None, None, None, "segmentation label map (NIfTI), instead of contours"),
        "frame": ("int", None, 0, 10_000, "frame of a 4-D label map to build (end-diastole)"),
    },
    "input.labels": {
        "cavity": ("int", 1, 0, 65535, "label value of the left-ventricular cavity"),
        "wall": ("int", 2, 0, 65535, "label value of the left-ventricular myocardium"),
        "rv": ("int", 3, 0, 65535, "label value of the right-ventricular cavity; 0 when the map has none"),
    },
    "landmarks": {
        "rv_insertion_anterior": ("point", None, None, None, "anterior RV insertion point, mm"),
        "rv_insertion_inferior": ("point", None, None, None, "inferior RV insertion point, mm"),
    },
    "geometry": {
        "align_slices": ("bool", True, None, None, "remove in-plane breath-hold shifts"),
    },
    "mesh": {
        "size": ("float", 1.5, 0.3, 10.0, "target tetrahedron edge length, mm"),
    },
    "fibers": {
        "helix_endo": ("float", 60.0, -90.0, 90.0, "helix angle at the endocardium, degrees"),
        "helix_epi": ("float", -60.0, -90.0, 90.0, "helix angle at the epicardium, degrees"),
        "transverse_endo": ("float", 0.0, -90.0, 90.0, "transverse angle at the endocardium, degrees"),
        "transverse_epi": ("float", 0.0, -90.0, 90.0, "transverse angle at the epicardium, degrees"),
        "helix_profile": ("profile", None, None, None, "[[depth, angle], ...] replacing the linear helix law"),
    },
    "pools": {
        "myocardium": ("int", 100_000, 0, 20_000_000, "wall points"),
        "cavity": ("int", 20_000, 0, 20_000_000, "cavity points"),
        "background": ("int", 100_000, 0, 20_000_000, "image-box points outside the wall"),
        "endo": ("int", 10_000, 0, 20_000_000, "endocardial surface points"),
        "epi": ("int", 10_000, 0, 20_000_000, "epicardial surface points"),
        "base": ("int", 10_000, 0, 20_000_000, "base surface points"),
        "seed": ("int", 0, 0, 2**63 - 1, "seed of every random draw"),
        "sampler": ("choice:random|sobol", "random", None, None, "source of sample positions"),
        "margin": ("float", 10.0, 0.0, 500.0, "mm the contours' bounding box grows for the background"),
        "float32": ("bool", False, None, None, "store the pools' float fields as float32"),
    },
}


@dataclass(frozen=True)
class Case:
    """A resolved case: every parameter of the build, with its defaults filled in."""

    path: Path | None
    sha256: str | None
    contours: Path | None
    labelmap: Path | None
    frame: int | None
    labels: dict
    landmarks: Landmarks
    align_slices: bool
    mesh_size: float
    law: FiberLaw
    pools: PoolSettings
    values: dict = field(default_factory=dict)  # the resolved tables, for the manifest


def read_case(path: str | Path) -> Case:
    """Read and check a case file; paths in it are taken relative to its folder."""
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: case file not found")
    raw = path.read_bytes()
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"{path.name}: not a UTF-8 text file; the case file must be TOML") from None
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"{path.name}: not valid TOML ({err}); see the case-file format in the README") from None
    return resolve_case(data, base=path.parent, name=path.name, path=path,
                        sha256=hashlib.sha256(raw).hexdigest())


def resolve_case(data: dict, *, base: Path = Path("."), name: str = "case", path=None,
                 sha256=None) -> Case:
    """Check a parsed case-file dictionary against ``SCHEMA`` and fill in the defaults."""
    values = {table: {} for table in SCHEMA}
    _walk(data, "", values, name)
    for table, keys in SCHEMA.items():
        for key, (kind, default, *_rest) in keys.items():
            values[table].setdefault(key, default)

    inp = values["input"]
    if inp["contours"] is None and inp["labelmap"] is None:
        raise InputError(f"{name}: [input] needs contours = \"contours.csv\" or labelmap = \"seg.nii.gz\"")
    if inp["contours"] is not None and inp["labelmap"] is not None:
        raise InputError(f"{name}: [input] gives both contours and labelmap; keep one")
    resolve = lambda p: None if p is None else (base / p).resolve()  # noqa: E731
    lm = values["landmarks"]
    if (lm["rv_insertion_anterior"] is None) != (lm["rv_insertion_inferior"] is None):
        raise InputError(f"{name}: [landmarks] needs both rv_insertion_anterior and rv_insertion_inferior, or neither")
    landmarks = Landmarks(
        None if lm["rv_insertion_anterior"] is None else np.array(lm["rv_insertion_anterior"], float),
        None if lm["rv_insertion_inferior"] is None else np.array(lm["rv_insertion_inferior"], float),
        source="case file" if lm["rv_insertion_anterior"] is not None else "none")
    fib = values["fibers"]
    law = FiberLaw(fib["helix_endo"], fib["helix_epi"], fib["transverse_endo"], fib["transverse_epi"],
                   None if fib["helix_profile"] is None else tuple(tuple(r) for r in fib["helix_profile"]))
    pools = PoolSettings(**values["pools"])
    return Case(path=path, sha256=sha256, contours=resolve(inp["contours"]),
                labelmap=resolve(inp["labelmap"]), frame=inp["frame"],
                labels=dict(values["input.labels"]), landmarks=landmarks,
                align_slices=values["geometry"]["align_slices"], mesh_size=values["mesh"]["size"],
                law=law, pools=pools, values=values)


def _walk(data: dict, prefix: str, values: dict, name: str) -> None:
    for key, value in data.items():
        where = f"{prefix}.{key}" if prefix else key
        if isinstance(value, dict):
            if where not in SCHEMA:
                raise InputError(f"{name}: unknown table [{where}]{_suggest(where, list(SCHEMA))}")
            _walk(value, where, values, name)
            continue
        if prefix not in SCHEMA:
            raise InputError(f"{name}: key '{where}' must sit inside a table such as [mesh]{_suggest(key, _all_keys())}")
        keys = SCHEMA[prefix]
        if key not in keys:
            raise InputError(f"{name}: unknown key '{key}' in [{prefix}]{_suggest(key, list(keys))}")
        values[prefix][key] = _check(value, keys[key], f"[{prefix}] {key}", name)


def _check(value, spec, where, name):
    kind, _default, low, high, meaning = spec
    bad = lambda what: InputError(f"{name}: {where} = {value!r}: {what} ({meaning})")  # noqa: E731
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad("expected true or false")
        return value
    if kind in ("float", "int"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad("expected a number")
        if kind == "int" and not isinstance(value, int):
            raise bad("expected a whole number")
        if not np.isfinite(value) or value < low or value > high:
            raise bad(f"must lie between {low:g} and {high:g}")
        return float(value) if kind == "float" else int(value)
    if kind == "path":
        if not isinstance(value, str) or not value.strip():
            raise bad("expected a file name in quotes")
        return value
    if kind.startswith("choice:"):
        options = kind.split(":", 1)[1].split("|")
        if value not in options:
            raise bad(f"must be one of {', '.join(repr(o) for o in options)}")
        return value
    if kind == "point":
        if (not isinstance(value, list) or len(value) != 3
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value)
                or not np.all(np.isfinite(value))):
            raise bad("expected three numbers [x, y, z] in mm")
        return [float(v) for v in value]
    if kind == "profile":
        rows = value if isinstance(value, list) else None
        if (not rows or len(rows) < 2 or not all(isinstance(r, list) and len(r) == 2 for r in rows)
                or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for r in rows for v in r)):
            raise bad("expected at least two [depth, angle] pairs")
        depth = np.array([r[0] for r in rows], float)
        angle = np.array([r[1] for r in rows], float)
        if depth.min() < 0 or depth.max() > 1 or np.any(np.diff(depth) <= 0):
            raise bad("depths must rise strictly from 0 (endocardium) to 1 (epicardium)")
        if np.abs(angle).max() > 90:
            raise bad("angles must lie between -90 and 90 degrees")
        return [[float(a), float(b)] for a, b in rows]
    raise AssertionError(kind)


def _all_keys():
    return [k for keys in SCHEMA.values() for k in keys]


def _suggest(word, options):
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.5)
    return f"; did you mean '{close[0]}'?" if close else f"; valid: {', '.join(options)}"


def case_text(*, contours="contours.csv", landmarks: Landmarks | None = None, mesh_size=1.5,
              seed=0, extra: str = "") -> str:
    """A case file for ``fibers demo``, with every table spelled out."""
    lines = ["# fibers case file (TOML). Paths are relative to this file; lengths in mm, angles in degrees.",
             "[input]", f'contours = "{contours}"', ""]
    if landmarks is not None and landmarks.present:
        fmt = lambda p: "[" + ", ".join(f"{v:.3f}" for v in p) + "]"  # noqa: E731
        lines += ["[landmarks]  # right-ventricular insertion points, world frame",
                  f"rv_insertion_anterior = {fmt(landmarks.rv_insertion_anterior)}",
                  f"rv_insertion_inferior = {fmt(landmarks.rv_insertion_inferior)}", ""]
    lines += ["[geometry]", "align_slices = true", "", "[mesh]", f"size = {mesh_size}", "",
              "[fibers]", "helix_endo = 60.0", "helix_epi = -60.0", "transverse_endo = 0.0",
              "transverse_epi = 0.0", "", "[pools]", "myocardium = 100000", "cavity = 20000",
              "background = 100000", "endo = 10000", "epi = 10000", "base = 10000",
              f"seed = {seed}", 'sampler = "random"', "margin = 10.0", ""]
    return "\n".join(lines) + extra
