"""Fields at any point of a finished build: the field evaluator.

``fibers.open(build_dir)`` loads a build once (its ``mesh.vtu`` and ``manifest.json``) and
``.at(points)`` answers every field at any (n, 3) array of world points in mm.

How a value is made at a point: the point is located in its tetrahedron (exact barycentric
test, `fibers.locate.Locator`), and the fields are rebuilt there by the very function that
gives the pools their fields (`fibers.pools.point_fields`): the scalar coordinates and the
nodal frame are interpolated with the barycentric weights, the frame re-orthonormalised, the
circumferential angle taken from the weighted mean of unit phasors (no jump at the +-180 seam),
and the fiber triad and its angles rebuilt by the architecture rule at the interpolated depth.
Unit vectors are never averaged, so the triads are unit, orthonormal and follow the helix law
exactly at the point. ``aha_segment`` comes from the segment rule at the point itself.

Outside the wall (no tetrahedron contains the point) ``inside`` is False, scalars are NaN,
vectors zero and ``aha_segment`` 0. Any further point field the mesh carries (one this module
does not know) is interpolated linearly with the same weights.

What the build does not store is derived from what it does: the boundary faces from the
tetrahedra (the same order as the build's), their tags from the transmural field (0 on the
endocardium, 1 on the epicardium) and from lying flat in the base plane, the base plane itself
refined from the base faces, the fiber law and pool settings from the manifest's resolved
parameters, the septum from its landmarks.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import replace
from pathlib import Path

import numpy as np

from fibers import meshtools, pools as pool_stage, segments
from fibers.config import Box, FiberLaw, Landmarks, PoolSettings
from fibers.coordinates import CardiacCoordinates
from fibers.errors import InputError
from fibers.locate import Locator
from fibers.types import BASE, ENDO, EPI, LongAxis, WallMesh

log = logging.getLogger(__name__)

NODAL_FIELDS = ("transmural", "apicobasal", "circumferential", "e_rad", "e_long", "e_circ")
OPTIONAL_NODAL = ("thickness_fraction",    # needed by the laws with depth = "thickness"
                  "wall_thickness")        # absent from builds before it was written
SCALARS = ("transmural", "thickness_fraction", "wall_thickness", "apicobasal", "circumferential", "frame_quality",
           "helix_angle", "helix_angle_sax", "imbrication_angle", "sheet_angle", "dispersion")
VECTORS = ("e_rad", "e_circ", "e_long", "fiber", "sheet", "sheet_normal")
# nodal outputs of the build that the evaluator rebuilds rather than interpolates
_REBUILT = set(SCALARS) | set(VECTORS)
_BASE_NORMAL_COS = 0.999   # a boundary face this parallel to the base plane, and in it, is base


class FieldEvaluator:
    """Fields of a wall mesh at any points.

    Parameters
    ----------
    mesh : WallMesh
    coords : CardiacCoordinates
        Only the nodal fields are used.
    law : FiberLaw
    septum : fibers.segments.Septum or None
        None gives ``aha_segment`` 0 everywhere.
    extra : dict of str to ndarray (N,) or (N, k), optional
        Further nodal fields, interpolated linearly.
    box : Box, optional
        The build's background box (for fresh pools).
    settings : PoolSettings, optional
        The build's pool settings (for fresh pools).
    manifest : dict, optional
        The build's manifest.
    locator : Locator, optional
        A locator of this mesh to reuse.
    """

    def __init__(self, mesh: WallMesh, coords: CardiacCoordinates, law: FiberLaw, septum=None, *,
                 extra: dict | None = None, box: Box | None = None,
                 settings: PoolSettings | None = None, manifest: dict | None = None,
                 locator: Locator | None = None):
        self.mesh, self.coords, self.law, self.septum = mesh, coords, law, septum
        self.extra = dict(extra or {})
        self.box = box
        self.settings = settings if settings is not None else PoolSettings()
        self.manifest = manifest or {}
        self.locator = Locator(mesh.points, mesh.tets) if locator is None else locator
        self._outside = _ClearlyOutside(mesh)

    def locate(self, points: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Containing tetrahedron (K,) (-1 outside) and barycentric weights (K, 4)."""
        return self.locator(checked_points(points), known_outside=self._outside)

    def at(self, points) -> dict[str, np.ndarray]:
        """Every field at points.

        Parameters
        ----------
        points : array_like (K, 3), mm, world frame

        Returns
        -------
        dict of str to ndarray
            ``inside`` (K,) bool; ``transmural``, ``apicobasal``, ``circumferential`` (degrees),
            ``helix_angle``, ``helix_angle_sax``, ``imbrication_angle``, ``sheet_angle`` (degrees), ``dispersion``, ``thickness_fraction``, ``wall_thickness`` (mm, when the build has it), ``frame_quality`` (mm) (K,) float64, NaN outside;
            ``e_rad``, ``e_circ``, ``e_long``, ``fiber``, ``sheet``, ``sheet_normal`` (K, 3)
            unit, zero outside; ``aha_segment`` (K,) int8, 0 outside; ``tet`` (K,) int64, -1
            outside; and every further point field of the mesh (NaN outside).

        Raises
        ------
        InputError
            ``points`` is not an (K, 3) array of finite numbers.
        """
        points = checked_points(points)
        tet, bary = self.locator(points, known_outside=self._outside)
        rows = np.flatnonzero(tet >= 0)
        fields = wall_fields(points[rows], self.mesh.tets[tet[rows]], bary[rows], self)
        for name, nodal in self.extra.items():
            fields[name] = np.einsum("km,km...->k...", bary[rows], np.asarray(nodal, float)[self.mesh.tets[tet[rows]]])
        out = {"inside": tet >= 0}
        for name, value in fields.items():
            out[name] = _scatter(value, rows, len(points))
        out["tet"] = tet
        return out

    def pools(self, settings: PoolSettings | None = None) -> dict:
        """Fresh pools drawn from this build (`fibers.pools.build_pools`), same fields as the build's.

        Parameters
        ----------
        settings : PoolSettings, optional
            Counts, seed, sampler; default the build's own (which redraws the build's
            myocardium pool exactly).

        Returns
        -------
        dict of str to fibers.pools.Pool
        """
        settings = self.settings if settings is None else settings
        return pool_stage.build_pools(self.mesh, self.coords, self.law, self.septum, settings, box=self.box)


class _ClearlyOutside:
    """Points certainly outside the wall: the pools' ray-parity test against the endocardial
    and epicardial faces says so, and they lie farther than 1e-6 of the wall's size from the
    base plane (a point on a face may go either way in the parity test; the locator's
    tolerance decides those)."""

    def __init__(self, mesh: WallMesh):
        self._parity = pool_stage.EnclosedTest(mesh, tags=(ENDO, EPI))
        self._axis = mesh.axis
        self._tol = 1e-6 * float(np.ptp(mesh.points, axis=0).max()) if len(mesh.points) else 0.0

    def __call__(self, points: np.ndarray) -> np.ndarray:
        depth = segments.depth_below_base(points, self._axis)
        return (np.abs(depth) > self._tol) & ~self._parity(points)


def wall_fields(points, nodes, weights, evaluator: FieldEvaluator) -> dict[str, np.ndarray]:
    """The wall fields at points inside elements: the pools' own rule, in one place.

    Parameters
    ----------
    points : ndarray (K, 3), mm
    nodes : ndarray (K, 4) int
    weights : ndarray (K, 4)
        Barycentric weights.
    evaluator : FieldEvaluator

    Returns
    -------
    dict of str to ndarray
    """
    e = evaluator
    return pool_stage.point_fields(points, nodes, weights, e.mesh, e.coords, e.law, e.septum)


def checked_points(points) -> np.ndarray:
    """Points as a float64 (K, 3) array, refused with one line when they are not that."""
    try:
        arr = np.asarray(points, dtype=float)
    except (TypeError, ValueError):
        raise InputError("points must be numbers: give an (n, 3) array of x, y, z in mm") from None
    if arr.ndim == 1 and arr.shape == (3,):
        arr = arr[None]
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise InputError(f"points have shape {arr.shape}: give an (n, 3) array of x, y, z in mm")
    bad = ~np.all(np.isfinite(arr), axis=1)
    if bad.any():
        raise InputError(f"point {int(np.flatnonzero(bad)[0])} (0-based row) is not finite "
                         f"({bad.sum()} such rows): give finite x, y, z in mm")
    return arr


def _scatter(value: np.ndarray, rows: np.ndarray, n: int) -> np.ndarray:
    """Values at ``rows`` of an n-row array; NaN elsewhere for floats, 0 for integers and vectors."""
    value = np.asarray(value)
    if value.dtype.kind == "f" and value.ndim == 1:
        full = np.full(n, np.nan, value.dtype)
    else:
        full = np.zeros((n,) + value.shape[1:], value.dtype)
    full[rows] = value
    return full


# -- loading a build -------------------------------------------------------------------------

def open(folder) -> FieldEvaluator:  # noqa: A001  (fibers.open reads like the builtin on purpose)
    """Load a finished build once for field queries and fresh pools.

    Parameters
    ----------
    folder : str or Path
        Output folder of ``fibers build``.

    Returns
    -------
    FieldEvaluator

    Examples
    --------
    >>> fields = fibers.open("out/")                       # doctest: +SKIP
    >>> f = fields.at([[10.0, -3.0, 40.0]])                # doctest: +SKIP
    >>> f["fiber"], f["helix_angle"], f["inside"]          # doctest: +SKIP
    """
    from fibers.io.build import read_build

    data = read_build(folder)
    manifest, point_data = data["manifest"], data["point_data"]
    if (manifest.get("summary") or {}).get("biventricular"):
        # the evaluator applies the left-ventricular rule; on both ventricles it would give the
        # right free wall and the septum fibers of the wrong law
        raise InputError(f"{data['folder']} is a biventricular build: fibers.open, fibers sample and fibers pools "
                         "follow the left-ventricular rule only; use the fields of its mesh.vtu and pools/ "
                         "(they follow both ventricles' rule)")
    missing = [k for k in NODAL_FIELDS if k not in point_data]
    if missing:
        raise InputError(f"{data['folder']}/mesh.vtu lacks the point fields {', '.join(missing)}: "
                         "it was not written by fibers build; build the folder again")
    case = _case_of(manifest, data["folder"])
    points, tets = data["points"], data["tets"]
    coords = _coordinates(point_data, len(tets))
    axis, ends = _axis_of(manifest, data["folder"])
    locator = Locator(points, tets)
    faces = _boundary_faces(tets, locator)
    face_tags, axis = _tag_faces(points, faces, coords.transmural, axis)
    mesh = WallMesh(points=points, tets=tets, faces=faces, face_tags=face_tags, axis=axis,
                    endo_apex=ends[0], epi_apex=ends[1])
    septum = _septum_of(mesh, manifest)
    extra = {k: v for k, v in point_data.items() if k not in _REBUILT}
    log.debug("opened %s: %d tetrahedra, %d nodes", data["folder"], len(tets), len(points))
    return FieldEvaluator(mesh, coords, case.law, septum, extra=extra, box=_box_of(manifest),
                          settings=case.pools, manifest=manifest, locator=locator)


def _boundary_faces(tets: np.ndarray, locator: Locator) -> np.ndarray:
    """`fibers.meshtools.boundary_faces` (same rows, same order) from the locator's neighbours.

    A face with no neighbour across it is on the boundary; face j of an element is the one
    opposite its vertex j in both, so the element-major order of the flat index is the same.
    """
    flat = np.flatnonzero(locator.neighbours.ravel() < 0)
    return tets[flat // 4][np.arange(len(flat))[:, None], meshtools.LOCAL_FACES[flat % 4]]


def _case_of(manifest: dict, folder: Path):
    """The build's resolved case (fiber law, pool settings) from the manifest's parameters."""
    from fibers.io.case import resolve_case

    params = manifest.get("parameters")
    if not isinstance(params, dict):
        raise InputError(f"{folder}/manifest.json has no parameters: build the folder again")
    # the manifest lists every key with its default; unset optional keys appear as null
    data = {table: {k: v for k, v in keys.items() if v is not None}
            for table, keys in params.items() if isinstance(keys, dict)}
    return resolve_case(data, base=Path(folder), name=f"{folder}/manifest.json")


def _coordinates(point_data: dict, n_cells: int) -> CardiacCoordinates:
    nodal = {k: np.ascontiguousarray(point_data[k], dtype=float)
             for k in NODAL_FIELDS + OPTIONAL_NODAL if k in point_data}
    empty = np.zeros((0, 3))
    return CardiacCoordinates(**nodal, cell_e_rad=empty, cell_e_long=empty, cell_e_circ=empty)


def _axis_of(manifest: dict, folder: Path):
    try:
        la = manifest["long_axis"]
        centre = np.asarray(la["base_centre_mm"], float).reshape(3)
        direction = np.asarray(la["direction"], float).reshape(3)
        ends = (np.asarray(la["endo_apex_mm"], float).reshape(3),
                np.asarray(la["epi_apex_mm"], float).reshape(3))
    except (KeyError, TypeError, ValueError):
        raise InputError(f"{folder}/manifest.json has no complete long_axis: build the folder again") from None
    direction = direction / np.linalg.norm(direction)
    return LongAxis(base_centre=centre, direction=direction, reference=_normal_to(direction)), ends


def _normal_to(direction: np.ndarray) -> np.ndarray:
    trial = np.eye(3)[np.argmin(np.abs(direction))]
    v = trial - (trial @ direction) * direction
    return v / np.linalg.norm(v)


def _tag_faces(points, faces, transmural, axis: LongAxis):
    """Tags (F,) of the boundary faces, and the long axis (the manifest's, stored exactly).

    Base: faces facing along the axis and lying in the base plane (within 0.05 mm). Of the rest, faces whose nodes average a transmural value below
    1/2 are endocardial (the endocardium is held at 0, the epicardium at 1).
    """
    normals, areas = meshtools.triangle_normals(points, faces)
    depth = np.abs(segments.depth_below_base(points, axis))[faces].max(axis=1)
    base = (normals @ axis.direction > _BASE_NORMAL_COS) & (depth < 0.05)
    tags = np.where(base, BASE, np.where(transmural[faces].mean(axis=1) < 0.5, ENDO, EPI))
    return tags.astype(np.int64), axis


def _septum_of(mesh: WallMesh, manifest: dict):
    lm = manifest.get("landmarks") or {}
    ant, inf = lm.get("rv_insertion_anterior"), lm.get("rv_insertion_inferior")
    if ant is None or inf is None:
        return None
    landmarks = Landmarks(np.asarray(ant, float), np.asarray(inf, float), source=str(lm.get("source", "manifest")))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the build has already warned about these landmarks
        return segments.locate_septum(mesh, landmarks)


def _box_of(manifest: dict) -> Box | None:
    box = manifest.get("background_box")
    if not box:
        return None
    return Box(corner=np.asarray(box["corner_mm"], float), edges=np.asarray(box["edges_mm"], float))


def pool_settings(base: PoolSettings, *, seed: int | None = None, counts: dict | None = None,
                  sampler: str | None = None, float32: bool | None = None) -> PoolSettings:
    """The build's pool settings with some replaced (None keeps the build's value)."""
    changes = {k: v for k, v in (counts or {}).items() if v is not None}
    for key, value in (("seed", seed), ("sampler", sampler), ("float32", float32)):
        if value is not None:
            changes[key] = value
    return replace(base, **changes)


# -- commands on a finished build --------------------------------------------------------------

CAUTION = "Research tool, not a medical device; its output is not a diagnosis."


def sample(build_dir, points_path, out) -> Path:
    """``fibers sample``: every field at the points of a file, written to an .npz.

    Parameters
    ----------
    build_dir : str or Path
    points_path : str or Path
        .npy (n, 3), .npz with ``points``, or CSV with header x,y,z (`fibers.io.samples`).
    out : str or Path
        The .npz to write (atomically).

    Returns
    -------
    Path
        The file written.
    """
    from fibers.io.samples import read_points, write_fields

    points = read_points(points_path)
    evaluator = open(build_dir)
    fields = {"points": points, **evaluator.at(points)}
    log.info("%-13s %d points, %d in the wall", "sample", len(points), int(fields["inside"].sum()))
    return write_fields(out, fields, _field_metadata(evaluator, build_dir))


def _field_metadata(evaluator: FieldEvaluator, build_dir) -> dict:
    import fibers

    conventions = dict(evaluator.manifest.get("conventions", {}))
    conventions["outside"] = ("inside False: scalars NaN, vectors 0, aha_segment 0, tet -1")
    return {"tool": "fibers", "version": fibers.__version__, "caution": CAUTION,
            "build": str(Path(build_dir).resolve()), "conventions": conventions,
            "aha_segment": {str(k): v for k, v in segments.SEGMENT_NAMES.items()}}


def write_fresh_pools(build_dir, out, *, seed: int, counts: dict | None = None,
                      sampler: str | None = None, float32: bool | None = None,
                      vtp: bool = False) -> dict:
    """``fibers pools``: new pools from a finished build, written to ``out/<name>.npz``.

    The folder is written beside ``out`` and renamed at the end; it holds one npz per pool (the
    build's format: numbers only, name tables in each archive's ``metadata.json``) and a
    ``manifest.json`` with the settings used.

    Returns
    -------
    dict
        The manifest written.
    """
    import time

    import fibers
    from fibers.io.outputs import write_manifest
    from fibers.io.pools import write_pools
    from fibers.io import folder

    t0 = time.perf_counter()
    evaluator = open(build_dir)
    settings = pool_settings(evaluator.settings, seed=seed, counts=counts, sampler=sampler, float32=float32)
    with folder.staged(out, inputs=(Path(build_dir) / "mesh.vtu",)) as tmp:
        drawn = evaluator.pools(settings)
        for path in write_pools(tmp, drawn, vtp=vtp):
            path.rename(tmp / path.name)
        (tmp / "pools").rmdir()
        manifest = {"tool": "fibers", "version": fibers.__version__, "caution": CAUTION,
                    "command": "pools", "build": str(Path(build_dir).resolve()),
                    "pools": {k: getattr(settings, k) for k in settings.__dataclass_fields__},
                    "counts": {k: len(v) for k, v in drawn.items()},
                    "timings_s": {"total": round(time.perf_counter() - t0, 4)}}
        manifest["files"] = folder.listing(tmp)
        write_manifest(tmp, manifest)
    log.info("%-13s %s", "pools", ", ".join(f"{k} {len(v):,}" for k, v in drawn.items()))
    return manifest
