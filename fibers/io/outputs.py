"""Writing the output folder (DESIGN.md section 3.4): mesh files, surfaces, pools, manifest.

meshio owns the mesh formats; this module only maps our names onto its structures.
"""

from __future__ import annotations

import json
import platform
from pathlib import Path

import numpy as np

import fibers
from fibers.types import FACE_TAG_NAMES

POINT_FIELDS = ("transmural", "apicobasal", "circumferential", "e_rad", "e_long", "e_circ",
                "fiber", "sheet", "sheet_normal", "helix_angle", "transverse_angle")
CELL_TRIAD = {"fiber": "cell_fiber", "sheet": "cell_sheet", "sheet_normal": "cell_sheet_normal"}
WALL_TAG = 1  # physical tag of the wall volume in mesh.msh (the faces use 1, 2, 3 in dimension 2)

CONVENTIONS = {
    "units": "lengths mm, volumes mL, mass g, angles degrees",
    "transmural": "0 on the endocardium, 1 on the epicardium (Laplace solution)",
    "apicobasal": "0 at the apex, 1 at the base plane (Laplace solution from an apical patch, remapped monotonically to even spacing along the long axis)",
    "circumferential": "degrees about the long axis in [-180, 180), increasing along e_circ; 0 at the septal bisector when landmarks are given",
    "e_rad": "endocardium to epicardium",
    "e_long": "apex to base, orthogonal to e_rad",
    "e_circ": "e_long x e_rad",
    "helix_angle": "angle of the fiber from e_circ toward e_long: fiber = cos(a) e_circ + sin(a) e_long; positive is a right-handed helix",
    "transverse_angle": "rotation of the sheet about the fiber; 0 means sheet = e_rad",
    "sheet_normal": "fiber x sheet (right-handed triad)",
    "aha_segment": "1-17 after Cerqueira et al., Circulation 2002; 0 = not labelled",
    "face_tags": {name: tag for tag, name in FACE_TAG_NAMES.items()},
    "base": "the plane of the most basal slice, normal to the long axis",
    "mass": "myocardial volume x 1.05 g/mL",
}


def point_data(result) -> dict:
    c, a = result.coords, result.arch
    data = {name: getattr(c, name) for name in ("transmural", "apicobasal", "circumferential", "e_rad", "e_long", "e_circ")}
    data.update({name: getattr(a, name) for name in ("fiber", "sheet", "sheet_normal", "helix_angle", "transverse_angle")})
    return {k: np.ascontiguousarray(v, dtype=np.float64) for k, v in data.items()}


def cell_data(result) -> dict:
    data = {"aha_segment": np.asarray(result.aha, dtype=np.int32)}
    for name, attr in CELL_TRIAD.items():
        data[f"{name}_cell"] = np.ascontiguousarray(getattr(result.arch, attr), dtype=np.float64)
    return data


def write_all(folder: Path, result) -> None:
    """Write mesh.vtu, mesh.xdmf (+ .h5), mesh.msh, surfaces.vtp and the pools.

    Uncompressed binary throughout: zlib compression tripled the writing time for files that
    shrink by less than half.
    """
    import meshio

    from fibers.io.pools import write_pools

    wall = result.mesh
    pdata, cdata = point_data(result), cell_data(result)
    meshio.Mesh(wall.points, [("tetra", wall.tets)], point_data=pdata,
                cell_data={k: [v] for k, v in cdata.items()}).write(folder / "mesh.vtu", compression=None)

    # finite-element copies: the tetrahedra plus the tagged boundary triangles
    faces = wall.faces
    blocks = [("tetra", wall.tets), ("triangle", faces)]
    boundary = [np.zeros(len(wall.tets), np.int32), wall.face_tags.astype(np.int32)]
    padded = {k: [v, np.zeros((len(faces),) + v.shape[1:], v.dtype)] for k, v in cdata.items()}
    meshio.Mesh(wall.points, blocks, point_data=pdata,
                cell_data={"boundary": boundary, **padded}).write(folder / "mesh.xdmf", compression=None)
    phys = [np.full(len(wall.tets), WALL_TAG, np.int32), wall.face_tags.astype(np.int32)]
    msh = meshio.Mesh(wall.points, blocks, cell_data={"gmsh:physical": phys, "gmsh:geometrical": phys})
    msh.field_data = {"wall": np.array([WALL_TAG, 3]),
                      **{name: np.array([tag, 2]) for tag, name in FACE_TAG_NAMES.items()}}
    meshio.write(folder / "mesh.msh", msh, file_format="gmsh22", binary=True)

    write_surfaces(folder / "surfaces.vtp", result)
    write_pools(folder, result.pools)
    write_segments_csv(folder / "segments.csv", result)


def write_segments_csv(path: Path, result) -> None:
    """``segments.csv``: volume, wall thickness and helix angles per AHA segment."""
    from fibers.io.tables import write_table
    from fibers.segment_table import COLUMNS, segment_table

    rows = segment_table(result.mesh, result.arch.helix_angle, result.aha, result.septum)
    write_table(path, rows, COLUMNS)


def write_surfaces(path: Path, result) -> None:
    """The fitted surfaces (as the mesh's tagged boundary) and the input contours with residuals."""
    import pyvista as pv

    wall, surf = result.mesh, result.surfaces
    used = np.unique(wall.faces)
    remap = np.full(len(wall.points), -1)
    remap[used] = np.arange(len(used))
    tri = remap[wall.faces]
    pts = [wall.points[used]]
    n0 = next_index = len(used)
    lines, residual, slice_ids, structure = [], [], [], []
    for sl in result.stack.slices:
        for s, code in (("endo", 1), ("epi", 2)):
            c = getattr(sl, s)
            if c is None:
                continue
            idx = next_index + np.arange(len(c))
            next_index += len(c)
            pts.append(c)
            lines.append(np.concatenate([[len(c) + 1], idx, idx[:1]]))
            residual.append(surf.distance(s, c))
            slice_ids.append(np.full(len(c), sl.slice_id))
            structure.append(np.full(len(c), code))
    points = np.concatenate(pts)
    poly = pv.PolyData(points, faces=np.column_stack([np.full(len(tri), 3), tri]).ravel(),
                       lines=np.concatenate(lines))
    n_lines = len(lines)
    # VTK orders poly-data cells as verts, lines, polys
    poly.cell_data["face_tag"] = np.concatenate([np.zeros(n_lines, np.int32), wall.face_tags.astype(np.int32)])
    poly.cell_data["is_contour"] = np.concatenate([np.ones(n_lines, np.int8), np.zeros(len(tri), np.int8)])
    poly.point_data["residual_mm"] = np.concatenate([np.zeros(n0), *residual])
    poly.point_data["slice"] = np.concatenate([np.full(n0, -1), *slice_ids]).astype(np.int32)
    poly.point_data["contour_structure"] = np.concatenate([np.zeros(n0, np.int8), *structure]).astype(np.int8)
    poly.save(path, compression=None)


def manifest(result, case, inputs: list) -> dict:
    """The manifest: inputs with sha256, resolved parameters, versions, warnings, summary."""
    import gmsh
    import meshio
    import pyamg
    import scipy

    lm = result.landmarks
    def pt(p):
        # 1e-9 mm: fibers.open rebuilds the segment boundaries from these (at 1e-4 a few
        # points in 10^5 fell across a boundary)
        return None if p is None else [round(float(v), 9) for v in p]
    septum = result.septum
    return {
        "tool": "fibers",
        "version": fibers.__version__,
        "caution": "Research tool, not a medical device; its output is not a diagnosis.",
        "inputs": ([{"path": str(case.path), "sha256": case.sha256}] if case.path else []) + inputs,
        "parameters": case.values,
        "landmarks": {"rv_insertion_anterior": pt(lm.rv_insertion_anterior),
                      "rv_insertion_inferior": pt(lm.rv_insertion_inferior), "source": lm.source,
                      "septal_arc_deg": None if septum is None else round(2 * float(septum.half_angle), 2)},
        "long_axis": {"base_centre_mm": pt(result.mesh.axis.base_centre),
                      "direction": pt(result.mesh.axis.direction),
                      "endo_apex_mm": pt(result.mesh.endo_apex), "epi_apex_mm": pt(result.mesh.epi_apex)},
        "background_box": {"corner_mm": pt(result.box.corner), "edges_mm": [pt(e) for e in result.box.edges]},
        "conventions": CONVENTIONS,
        "versions": {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
                     "gmsh": gmsh.__version__, "meshio": meshio.__version__, "pyamg": pyamg.__version__},
        "warnings": list(result.warnings),
        "summary": result.summary,
    }


def write_manifest(folder: Path, manifest: dict) -> None:
    (Path(folder) / "manifest.json").write_text(json.dumps(manifest, indent=2, default=_plain) + "\n")


def read_manifest(folder: Path) -> dict:
    return json.loads((Path(folder) / "manifest.json").read_text())


def _plain(value):
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(type(value))
