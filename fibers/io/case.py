"""Reading the case file (see the README, "Case file"): TOML, every key documented and range-checked.

An unknown key is refused with the nearest valid one suggested: it is nearly always a typo.
"""

from __future__ import annotations

import difflib
import hashlib
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from fibers import budget
from fibers.config import FiberLaw, Landmarks, PoolSettings
from fibers.errors import InputError
from fibers.io.paths import checked_path

MAX_COORDINATE_MM = 1e5  # 100 m: anything larger is not a scanner position in mm
MAX_CASE_BYTES = 1 << 20  # a case file is a few hundred bytes; a megabyte is surely another file

# table -> key -> (kind, default, low, high, meaning). Kinds: float, int, bool, str, path,
# point (three floats), choice:<a|b>, profile (list of [depth, angle]), offsets (list of
# [position, degrees]), labels (sub-table).

# Keys renamed so that no word means two things: old key -> new key (the old one is refused).
RENAMED = {("fibers", "transverse_endo"): "sheet_angle_endo",
           ("fibers", "transverse_epi"): "sheet_angle_epi"}
SCHEMA: dict[str, dict[str, tuple]] = {
    "input": {
        "contours": ("path", None, None, None, "contours CSV, relative to the case file"),
        "labelmap": ("path", None, None, None, "segmentation label map (NIfTI), instead of contours"),
        "frame": ("frame", None, 0, 10_000, "frame of a 4-D label map: a number, \"ed\" (largest cavity, the default) or \"es\" (smallest)"),
    },
    "input.labels": {
        "cavity": ("int", 1, 0, 65535, "label value of the left-ventricular cavity"),
        "wall": ("int", 2, 0, 65535, "label value of the left-ventricular myocardium"),
        "rv": ("int", 3, 0, 65535, "label value of the right-ventricular cavity; 0 when the map has none"),
        "rv_wall": ("int", 0, 0, 65535, "label value of the right-ventricular free wall (both ventricles); 0 when the map has none"),
    },
    "landmarks": {
        "rv_insertion_anterior": ("point", None, None, None, "anterior RV insertion point, mm"),
        "rv_insertion_inferior": ("point", None, None, None, "inferior RV insertion point, mm"),
    },
    "geometry": {
        "align_slices": ("bool", True, None, None, "remove in-plane breath-hold shifts"),
        "centreline": ("choice:straight|quadratic", "straight", None, None, "model of the centreline the slices are aligned to"),
        "base": ("choice:slab|slice", None, None, None, "base plane at the upper face of the basal slab or at the basal contour's plane (default: slab for a label map, slice for contours)"),
        "slice_thickness": ("float", None, 0.5, 50.0, "thickness a slice stands for, mm (default: the image's slice spacing, or the contours' median spacing)"),
        "ventricles": ("choice:lv|biv", None, None, None,
                       "'lv' or 'biv'; by default 'biv' when right-ventricular contours are given"),
        "rv_wall_thickness": ("float", 3.5, 0.5, 15.0,
                              "mm the right free wall is grown outward from rv_endo when rv_epi is absent"),
    },
    "mesh": {
        "size": ("float", 1.5, 0.3, 10.0, "target tetrahedron edge length, mm"),
        "order": ("int", 1, 1, 2, "element order: 1 linear (4-node), 2 quadratic (10-node) tetrahedra"),
        "max_tets": ("int", 5_000_000, 1_000, 1_000_000_000, "refuse a mesh size whose estimated tetrahedron count exceeds this"),
    },
    "fibers": {
        "preset": ("choice:none|bayer2012|streeter1969", "none", None, None,
                   "published rule whose values fill the [fibers] keys not given here"),
        "depth": ("choice:thickness|laplace", "thickness", None, None,
                  "depth the laws use: fraction of the wall thickness, or the Laplace solution"),
        "helix_frame": ("choice:short_axis|laplace", "short_axis", None, None,
                        "frame of the helix angle: short-axis circumferential direction, or Laplace e_circ"),
        "helix_endo": ("float", 60.0, -90.0, 90.0, "helix angle at the endocardium, degrees"),
        "helix_epi": ("float", -60.0, -90.0, 90.0, "helix angle at the epicardium, degrees"),
        "sheet_angle_endo": ("float", 0.0, -90.0, 90.0, "rotation of the sheet about the fiber at the endocardium, degrees"),
        "sheet_angle_epi": ("float", 0.0, -90.0, 90.0, "rotation of the sheet about the fiber at the epicardium, degrees"),
        "imbrication_endo": ("float", 0.0, -45.0, 45.0, "tilt of the fiber out of the wall plane at the endocardium, degrees"),
        "imbrication_epi": ("float", 0.0, -45.0, 45.0, "tilt of the fiber out of the wall plane at the epicardium, degrees"),
        "helix_profile": ("profile", None, None, None, "[[depth, angle], ...] replacing the linear helix law"),
        "sheet_profile": ("profile", None, None, None, "[[depth, angle], ...] replacing the linear sheet law"),
        "helix_apicobasal": ("offsets", None, None, None, "[[position, degrees], ...] added to the helix, 0 apex 1 base"),
        "sheet_apicobasal": ("offsets", None, None, None, "[[position, degrees], ...] added to the sheet angle, 0 apex 1 base"),
        "helix_septal_offset": ("float", 0.0, -45.0, 45.0, "degrees added to the helix in the septum, tapering to 0 on the free wall"),
        "sheet_septal_offset": ("float", 0.0, -45.0, 45.0, "degrees added to the sheet angle in the septum, tapering to 0 on the free wall"),
        "dispersion_endo": ("float", 0.0, 0.0, 1.0 / 3.0, "fiber dispersion kappa at the endocardium (0 aligned, 1/3 isotropic)"),
        "dispersion_epi": ("float", 0.0, 0.0, 1.0 / 3.0, "fiber dispersion kappa at the epicardium"),
    },
    "segments": {
        "septal_sectors": ("choice:fixed|insertions", "fixed", None, None,
                           "60-degree sectors about the septal bisector, or septal sectors ending at the insertion points"),
    },
    "biventricular": {  # fibers.biv: the rule-based law of Bayer et al. 2012 (defaults from memory)
        **{f"{v}_{k}_{w}": ("float", d, -90.0, 90.0, f"{'left' if v == 'lv' else 'right'} ventricle's {k} angle at the "
                            f"{'endocardium' if w == 'endo' else 'epicardium'}, degrees (both ventricles only)")
           for v in ("lv", "rv") for k, w, d in (("helix", "endo", 40.0), ("helix", "epi", -50.0),
                                                  ("sheet", "endo", -65.0), ("sheet", "epi", 25.0))},
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
    septal_sectors: str = "fixed"
    mesh_order: int = 1                          # [mesh] order: 1 linear, 2 quadratic tetrahedra
    centreline: str = "straight"
    base: str | None = None          # None: "slab" for a label map, "slice" for contours
    slice_thickness: float | None = None
    max_tets: int = 5_000_000  # [mesh] max_tets: the mesh-size budget (fibers.budget)
    ventricles: str | None = None   # "lv", "biv" or None (decided by the input: fibers.biv)
    rv_wall_thickness: float = 3.5  # mm
    biv_law: dict = field(default_factory=dict)  # [biventricular] angles, degrees


def read_case(path: str | Path) -> Case:
    """Read and check a case file; paths in it are taken relative to its folder."""
    path = checked_path(path, "case file")
    if not path.is_file():
        raise InputError(f"{path}: case file not found")
    if path.stat().st_size > MAX_CASE_BYTES:
        raise InputError(f"{path.name} is {path.stat().st_size:,} bytes: far too large for a case file "
                         f"(a few hundred bytes of TOML); check the file name")
    try:
        raw = path.read_bytes()
    except OSError as err:
        raise InputError(f"{path}: cannot read the case file ({err.strerror or err})") from None
    return parse_case(raw, base=path.parent, name=path.name, path=path)


def parse_case(raw: bytes, *, base: Path = Path("."), name: str = "case", path=None) -> Case:
    """Parse and check the bytes of a case file (see `read_case`); nothing is read from disk."""
    try:
        data = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise InputError(f"{name}: not a UTF-8 text file; the case file must be TOML") from None
    except tomllib.TOMLDecodeError as err:
        raise InputError(f"{name}: not valid TOML ({_short(str(err), 120)}); see the case-file format in the README") from None
    except ValueError:  # an integer of thousands of digits (Python's conversion limit)
        raise InputError(f"{name}: a number with thousands of digits; no case-file value needs more than a few") from None
    except RecursionError:
        raise InputError(f"{name}: tables or arrays nested hundreds deep; a case file needs at most two levels") from None
    return resolve_case(data, base=base, name=name, path=path, sha256=hashlib.sha256(raw).hexdigest())


def resolve_case(data: dict, *, base: Path = Path("."), name: str = "case", path=None,
                 sha256=None) -> Case:
    """Check a parsed case-file dictionary against ``SCHEMA`` and fill in the defaults."""
    values = {table: {} for table in SCHEMA}
    _walk(data, "", values, name)
    _apply_preset(values["fibers"])
    for table, keys in SCHEMA.items():
        for key, (kind, default, *_rest) in keys.items():
            values[table].setdefault(key, default)

    inp = values["input"]
    if inp["contours"] is None and inp["labelmap"] is None:
        raise InputError(f"{name}: [input] needs contours = \"contours.csv\" or labelmap = \"seg.nii.gz\"")
    if inp["contours"] is not None and inp["labelmap"] is not None:
        raise InputError(f"{name}: [input] gives both contours and labelmap; keep one")
    resolve = lambda p: None if p is None else _input_path(base, p, name)  # noqa: E731
    lm = values["landmarks"]
    if (lm["rv_insertion_anterior"] is None) != (lm["rv_insertion_inferior"] is None):
        raise InputError(f"{name}: [landmarks] needs both rv_insertion_anterior and rv_insertion_inferior, or neither")
    landmarks = Landmarks(
        None if lm["rv_insertion_anterior"] is None else np.array(lm["rv_insertion_anterior"], float),
        None if lm["rv_insertion_inferior"] is None else np.array(lm["rv_insertion_inferior"], float),
        source="case file" if lm["rv_insertion_anterior"] is not None else "none")
    law = fiber_law(values["fibers"])
    pools = PoolSettings(**values["pools"])
    budget.check_pools(pools, where=f"{name}: [pools]")
    biv = {"ventricles": values["geometry"]["ventricles"],
           "rv_wall_thickness": values["geometry"]["rv_wall_thickness"],
           "biv_law": dict(values["biventricular"])}
    _drop_untouched_biv_keys(values, data)
    return Case(path=path, sha256=sha256, contours=resolve(inp["contours"]),
                labelmap=resolve(inp["labelmap"]), frame=inp["frame"],
                labels=dict(values["input.labels"]), landmarks=landmarks,
                align_slices=values["geometry"]["align_slices"], mesh_size=values["mesh"]["size"],
                law=law, pools=pools, values=values,
                septal_sectors=values["segments"]["septal_sectors"],
                mesh_order=values["mesh"]["order"],
                centreline=values["geometry"]["centreline"], base=values["geometry"]["base"],
                slice_thickness=values["geometry"]["slice_thickness"],
                max_tets=values["mesh"]["max_tets"], **biv)


# case keys of both ventricles only (fibers.biv): left out of the resolved parameters unless
# given, so a left-ventricular build's manifest and report stay as they were
_BIV_ONLY = {"geometry": ("ventricles", "rv_wall_thickness"), "biventricular": tuple(SCHEMA["biventricular"]),
             "input.labels": ("rv_wall",)}


def _drop_untouched_biv_keys(values: dict, data: dict) -> None:
    for table, keys in _BIV_ONLY.items():
        given = data
        for part in table.split("."):  # "input.labels" is [input] labels = {...}
            given = given.get(part, {}) if isinstance(given, dict) else {}
        given = given if isinstance(given, dict) else {}
        for key in keys:
            if key not in given:
                values[table].pop(key, None)
    if not values["biventricular"]:
        del values["biventricular"]


def fiber_law(fib: dict) -> FiberLaw:
    """The FiberLaw of a resolved [fibers] table (also as read back from a manifest)."""
    table = lambda key: None if fib.get(key) is None else tuple(tuple(r) for r in fib[key])  # noqa: E731
    plain = {k: fib[k] for k in FiberLaw.__dataclass_fields__
             if k in fib and k not in ("preset",) and not k.endswith(("_profile", "_apicobasal"))}
    preset = fib.get("preset")
    return FiberLaw(**plain, **{k: table(k) for k in ("helix_profile", "sheet_profile",
                                                       "helix_apicobasal", "sheet_apicobasal")},
                    preset=None if preset in (None, "none") else preset)


def _apply_preset(fib: dict) -> None:
    """Fill the [fibers] keys not given in the case file from the preset; record it in full."""
    from fibers.fiber_presets import preset_record

    name = fib.get("preset", "none")
    if name == "none":
        return
    record = preset_record(name)
    for key, value in record["values"].items():
        fib.setdefault(key, value)
    fib["preset_record"] = record


def _input_path(base: Path, relative: str, name: str) -> Path:
    path = checked_path(base / relative, f"{name}: [input] {_short(relative)}")
    try:
        return path.resolve()
    except (OSError, RuntimeError, ValueError):  # checked_path has refused loops and NUL bytes
        raise InputError(f"{name}: [input] path '{_short(relative)}' cannot be resolved; check it") from None


def _short(text, n: int = 40) -> str:
    """A value for a message: printable, at most ``n`` characters, never a 5000-digit number."""
    if isinstance(text, int) and not isinstance(text, bool) and abs(text) > 10**30:
        return f"a {len(str(abs(text))) if abs(text).bit_length() < 14000 else 'many'}-digit number"
    text = text if isinstance(text, str) else repr(text)
    text = "".join(ch if ch.isprintable() else "?" for ch in text)
    return text if len(text) <= n else text[: n - 3] + "..."


def _walk(data: dict, prefix: str, values: dict, name: str) -> None:
    for key, value in data.items():
        where = f"{prefix}.{key}" if prefix else key
        key, where = _short(key), _short(where)
        if isinstance(value, dict):
            if where not in SCHEMA:
                raise InputError(f"{name}: unknown table [{where}]{_suggest(where, list(SCHEMA))}")
            _walk(value, where, values, name)
            continue
        if prefix not in SCHEMA:
            raise InputError(f"{name}: key '{where}' must sit inside a table such as [mesh]{_suggest(key, _all_keys())}")
        keys = SCHEMA[prefix]
        if (prefix, key) in RENAMED:
            new = RENAMED[(prefix, key)]
            raise InputError(f"{name}: [{prefix}] {key} is now called {new} (the rotation of the sheet "
                             f"about the fiber; imaging's transverse angle is imbrication_endo/_epi): rename it")
        if key not in keys:
            raise InputError(f"{name}: unknown key '{key}' in [{prefix}]{_suggest(key, list(keys))}")
        values[prefix][key] = _check(value, keys[key], f"[{prefix}] {key}", name)


def _check(value, spec, where, name):
    kind, _default, low, high, meaning = spec
    bad = lambda what: InputError(f"{name}: {where} = {_short(value)}: {what} ({meaning})")  # noqa: E731
    if kind == "bool":
        if not isinstance(value, bool):
            raise bad("expected true or false")
        return value
    if kind in ("float", "int"):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise bad("expected a number")
        if kind == "int" and not isinstance(value, int):
            raise bad("expected a whole number")
        if (isinstance(value, float) and not np.isfinite(value)) or value < low or value > high:
            span = f"{low:g} and {high:g}" if kind == "float" else f"{low:,} and {high:,}"
            raise bad(f"must lie between {span}")
        return float(value) if kind == "float" else int(value)
    if kind == "frame":
        if value in ("ed", "es"):
            return value
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise bad(f"expected a frame number {low}-{high}, \"ed\" or \"es\"")
        return int(value)
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
                or not all(abs(v) <= MAX_COORDINATE_MM for v in value)):  # also refuses nan
            raise bad(f"expected three numbers [x, y, z] in mm, each within {MAX_COORDINATE_MM:g} mm of the origin")
        return [float(v) for v in value]
    if kind == "offsets":
        return _angle_table(value, bad, pair="[position, degrees]",
                            rise="positions must rise strictly from 0 (apex) to 1 (base)",
                            within="offsets must lie between -90 and 90 degrees")
    if kind == "profile":
        return _angle_table(value, bad, pair="[depth, angle]",
                            rise="depths must rise strictly from 0 (endocardium) to 1 (epicardium)",
                            within="angles must lie between -90 and 90 degrees")
    raise AssertionError(kind)


def _angle_table(value, bad, *, pair: str, rise: str, within: str) -> list:
    """A table of [x, angle] rows: x rising strictly within [0, 1], angles within +-90 degrees."""
    rows = value if isinstance(value, list) else None
    if (not rows or len(rows) < 2 or not all(isinstance(r, list) and len(r) == 2 for r in rows)
            or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for r in rows for v in r)):
        raise bad(f"expected at least two {pair} pairs")
    x = np.array([r[0] for r in rows], float)
    angle = np.array([r[1] for r in rows], float)
    if x.min() < 0 or x.max() > 1 or np.any(np.diff(x) <= 0):
        raise bad(rise)
    if np.abs(angle).max() > 90:
        raise bad(within)
    return [[float(a), float(b)] for a, b in rows]


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
              "[fibers]", "helix_endo = 60.0", "helix_epi = -60.0", "sheet_angle_endo = 0.0",
              "sheet_angle_epi = 0.0", "", "[pools]", "myocardium = 100000", "cavity = 20000",
              "background = 100000", "endo = 10000", "epi = 10000", "base = 10000",
              f"seed = {seed}", 'sampler = "random"', "margin = 10.0", ""]
    return "\n".join(lines) + extra


def with_overrides(case: Case, *, mesh_size: float | None = None, mesh_order: int | None = None,
                   seed: int | None = None) -> Case:
    """The case with the command line's overrides (``--mesh-size``, ``--mesh-order``, ``--seed``).

    Checked like the case file's own keys; ``None`` keeps the case file's value. Used by
    ``fibers build``, ``fibers demo`` and every subject of ``fibers cohort`` alike.
    """
    from dataclasses import replace

    check_overrides(mesh_size=mesh_size, seed=seed)
    values = {k: dict(v) for k, v in case.values.items()}
    if mesh_size is not None:
        values["mesh"]["size"] = mesh_size
        case = replace(case, mesh_size=mesh_size)
    if mesh_order is not None:
        values["mesh"]["order"] = mesh_order
        case = replace(case, mesh_order=mesh_order)
    if seed is not None:
        values["pools"]["seed"] = seed
        case = replace(case, pools=replace(case.pools, seed=seed))
    return replace(case, values=values)


def check_overrides(*, mesh_size: float | None = None, seed: int | None = None) -> None:
    """Refuse command-line overrides out of range, before any work."""
    if mesh_size is not None and not 0.3 <= mesh_size <= 10.0:
        raise InputError(f"--mesh-size {mesh_size:g}: must lie between 0.3 and 10 mm")
    if seed is not None and not 0 <= seed <= 2**63 - 1:
        raise InputError("--seed: must lie between 0 and 2**63 - 1 (a whole number of at most 19 digits)")
