"""Writing the output folder (the table in the README): mesh files, surfaces, pools, manifest.

meshio writes the XDMF and gmsh formats; VTK XML goes through fibers.io.vtkxml. This module maps our names onto them.
"""

from __future__ import annotations

import json
import platform
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import fibers
from fibers import meshtools
from fibers.types import BASE, ENDO, EPI, FACE_TAG_NAMES, SEGMENT_NAMES

POINT_FIELDS = ("transmural", "thickness_fraction", "wall_thickness", "apicobasal", "circumferential",
                "e_rad", "e_long", "e_circ", "frame_quality", "fiber", "sheet", "sheet_normal",
                "helix_angle", "helix_angle_sax", "imbrication_angle", "sheet_angle", "dispersion")
CELL_TRIAD = {"fiber": "cell_fiber", "sheet": "cell_sheet", "sheet_normal": "cell_sheet_normal"}
WALL_TAG = 1  # physical tag of the wall volume in mesh.msh (the faces use 1, 2, 3 in dimension 2)

CONVENTIONS = {
    "units": "lengths mm, volumes mL, mass g, angles degrees",
    "transmural": "0 on the endocardium, 1 on the epicardium (Laplace solution)",
    "apicobasal": "0 at the apex, 1 at the base plane (Laplace solution from an apical patch, remapped monotonically to even spacing along the long axis)",
    "circumferential": "degrees about the long axis in [-180, 180), increasing along e_circ (clockwise seen from the apex), as the segment angle does; 0 at the septal bisector when landmarks are given",
    "e_rad": "endocardium to epicardium",
    "e_long": "apex to base, orthogonal to e_rad",
    "e_circ": "e_long x e_rad",
    "helix_angle": "angle of the fiber (projected on the plane normal to e_rad) from e_circ toward e_long, atan2(fiber . e_long, fiber . e_circ), the Laplace frame; positive is a right-handed helix; the law is laid out in the frame parameters.fibers.helix_frame names",
    "thickness_fraction": "fraction of the wall thickness, d_endo / (d_endo + d_epi) from the distances to the two surfaces; 0 endocardium, 1 epicardium",
    "wall_thickness": "d_endo + d_epi in mm, the exact distances from the node to the endocardial and epicardial surfaces: on each surface the wall thickness there (segments.csv, the report and cohort.csv average it per segment)",
    "fiber_depth": "the fiber laws use the depth named by parameters.fibers.depth: thickness_fraction ('thickness') or transmural ('laplace')",
    "helix_angle_sax": "angle of the fiber's projection on the wall's tangent plane (normal e_rad) from the short-axis circumferential direction (long axis x e_rad, normalised) toward the long axis; near the apex (e_rad within 30 degrees of the axis) the direction about the axis at the point",
    "imbrication_angle": "angle of the fiber out of the wall's tangent plane, asin(fiber . e_rad); positive toward the epicardium",
    "sheet_angle": "rotation of the sheet about the fiber, from the part of e_rad orthogonal to the fiber; 0 means sheet = e_rad when the imbrication is 0",
    "dispersion": "fiber dispersion kappa of Gasser, Ogden and Holzapfel 2006: 0 aligned, 1/3 isotropic",
    "frame_quality": "mm from the long axis, where the frame is singular (it winds once about the axis in the apical cap); below 3.5 mm do not trust the frame or the fibers",
    "sheet_normal": "fiber x sheet (right-handed triad)",
    "aha_segment": "1-17 after Cerqueira et al., Circulation 2002; 0 = not labelled; the segment angle is circumferential (same sense), sectors per parameters.segments.septal_sectors",
    "face_tags": {name: tag for tag, name in FACE_TAG_NAMES.items()},
    "base": "normal to the long axis; summary.base.plane says where: 'slab' = the upper face of the basal slab (half a slice thickness above the basal contour, as disc summation counts it), 'slice' = the basal contour's plane",
    "slice_shifts_mm": "per slice, the in-plane vector (world mm) added to its input points to move its epicardial centroid onto the fitted centreline; the input slice sat at minus this vector",
    "slices": "summary.slices: one entry per input slice; a basal slice counts when at least half of its cavity's rim is wall (wall_coverage >= 0.5, SCMR post-processing guidelines, from memory)",
    "mass": "myocardial volume x 1.05 g/mL",
}
NODE_ORDER = ("VTK order: tetra corners 0-3, tetra10 adds the mid-edge nodes of edges (0,1) (1,2) (2,0) "
              "(0,3) (1,3) (2,3); triangle6 adds (0,1) (1,2) (2,0); line3 is end, end, middle")


def point_data(result) -> dict:
    c, a = result.coords, result.arch
    data = {name: getattr(c, name) for name in ("transmural", "thickness_fraction", "apicobasal", "circumferential",
                                                "e_rad", "e_long", "e_circ", "frame_quality")}
    if getattr(c, "wall_thickness", None) is not None:
        data["wall_thickness"] = c.wall_thickness
    data.update({name: getattr(a, name) for name in ("fiber", "sheet", "sheet_normal", "helix_angle", "helix_angle_sax",
                                                     "imbrication_angle", "sheet_angle", "dispersion")})
    data.update(getattr(result, "extra_point_data", {}))  # a route's own fields (both ventricles)
    return {k: np.ascontiguousarray(v, dtype=np.float64) for k, v in data.items()}


def cell_data(result) -> dict:
    data = {"aha_segment": np.asarray(result.aha, dtype=np.int32)}
    for name, attr in CELL_TRIAD.items():
        data[f"{name}_cell"] = np.ascontiguousarray(getattr(result.arch, attr), dtype=np.float64)
    data.update(getattr(result, "extra_cell_data", {}))
    return data


def write_all(folder: Path, result) -> None:
    """Write mesh.vtu, mesh.xdmf + facets.xdmf (+ .h5), mesh.msh, surfaces.vtp and the pools.

    Files the build wrote already, while later stages ran (``result.written``, see
    `write_mesh_files`), are not written again. Uncompressed binary throughout: zlib
    compression tripled the writing time for files that shrink by less than half.
    """
    from fibers.io.pools import write_pools
    from fibers.sidework import side_thread

    done = set(getattr(result, "written", ()))
    fem = fem_mesh(result)
    # Writing is mostly the kernel copying bytes into new file pages, which releases the GIL:
    # mesh.vtu (and mesh.msh, if not written yet) go on a second thread while the rest is
    # written here, 0.5-0.6 of the time in sequence at 547k tetrahedra (about 230 MB in all).
    with side_thread("fibers-write") as pool:
        job = pool.submit(_write_vtu_and_msh, folder, fem, msh="mesh.msh" not in done)
        write_xdmf(folder, fem)
        if "facets.xdmf" not in done:
            write_facets(folder, fem)
        if "surfaces.vtp" not in done:
            write_surfaces(folder / "surfaces.vtp", result.mesh, result.surfaces, result.stack)
        if "pools" not in done:
            write_pools(folder, result.pools)
        write_segments_csv(folder / "segments.csv", result)
        job.result()


def write_mesh_files(folder: Path, wall, surfaces, stack) -> tuple[str, ...]:
    """The files of the linear mesh alone, before any field exists: mesh.msh, facets.xdmf (+ .h5)
    and surfaces.vtp, the same bytes as `write_all` writes. The pipeline writes them into the
    build's folder while the coordinates are solved; returns their names, for ``result.written``."""
    fem = _linear(wall, {}, {}, dict(FACE_TAG_NAMES))
    write_msh(folder / "mesh.msh", fem)
    write_facets(folder, fem)
    write_surfaces(folder / "surfaces.vtp", wall, surfaces, stack)
    return "mesh.msh", "facets.xdmf", "surfaces.vtp"


def _write_vtu_and_msh(folder: Path, fem: "FemMesh", *, msh: bool = True) -> None:
    write_vtu(folder / "mesh.vtu", fem)
    if msh:
        write_msh(folder / "mesh.msh", fem)


def write_segments_csv(path: Path, result) -> None:
    """``segments.csv``: volume, wall thickness and helix angles per AHA segment."""
    from fibers.io.tables import write_table
    from fibers.segment_table import COLUMNS, segment_table

    if hasattr(result, "segment_rows"):  # a route's own rows (both ventricles add the right free wall)
        rows = result.segment_rows()
    else:
        rows = segment_table(result.mesh, result.arch.helix_angle, result.aha, result.septum,
                             wall_thickness=getattr(result.coords, "wall_thickness", None))
    write_table(path, rows, COLUMNS)


# ----------------------------------------------------------------------------- mesh files

RING_TAGS = {ENDO: 1, EPI: 2}  # dimension-1 tags in mesh.msh: the rim of face tag k on the base
RING_NAMES = {ENDO: "endo_base_ring", EPI: "epi_base_ring"}
CELL_TYPES = {1: ("tetra", "triangle", "line"), 2: ("tetra10", "triangle6", "line3")}


@dataclass(frozen=True)
class FemMesh:
    """The wall as the mesh files carry it: one volume cell type, its boundary, its base rings.

    ``order`` 1: ``tetra`` / ``triangle`` / ``line``; 2: ``tetra10`` / ``triangle6`` / ``line3``
    (meshio's names, VTK node order). ``point_data`` and ``cell_data`` map field names to
    arrays over the points and the volume cells, whatever fields the build carries.
    """

    order: int
    points: np.ndarray
    cells: np.ndarray
    faces: np.ndarray
    face_tags: np.ndarray
    rings: dict
    point_data: dict
    cell_data: dict
    face_names: dict = field(default_factory=lambda: dict(FACE_TAG_NAMES))

    @property
    def types(self) -> tuple[str, str, str]:
        return CELL_TYPES[self.order]


def fem_mesh(result) -> FemMesh:
    """The mesh files' view of a build: linear, or the 10-node elements of ``[mesh] order = 2``."""
    from fibers import quadratic

    pdata, cdata = point_data(result), cell_data(result)
    names = dict(getattr(result, "face_names", FACE_TAG_NAMES))
    quad = getattr(result, "quadratic", None)
    if quad is not None:
        return FemMesh(2, quad.points, quad.tets, quad.faces, quad.face_tags, quad.rings, pdata,
                       quadratic.parent_cell_data(quad, cdata), names)
    return _linear(result.mesh, pdata, cdata, names)


def _linear(wall, pdata: dict, cdata: dict, names: dict) -> FemMesh:
    base = wall.faces[wall.face_tags == BASE]
    rings = {tag: meshtools.shared_edges(wall.faces[wall.face_tags == tag], base) for tag in RING_TAGS}
    return FemMesh(1, wall.points, wall.tets, wall.faces, wall.face_tags, rings, pdata, cdata, names)


def field_lines() -> dict:
    """The conventions every mesh file carries: the manifest's lines, the tags, the segment names."""
    return {**CONVENTIONS,
            "aha_segment_names": {str(k): v for k, v in SEGMENT_NAMES.items()},
            "node_order": NODE_ORDER,
            "base_rings": "mesh.msh dimension-1 groups: 1 endo_base_ring (endocardium meets base), "
                          "2 epi_base_ring (epicardium meets base)"}


def write_vtu(path: Path, fem: FemMesh) -> None:
    """mesh.vtu with the convention lines as field data ``conventions`` (UTF-8 JSON bytes)."""
    from fibers.io.vtkxml import write_grid

    write_grid(path, fem.points, fem.cells, fem.types[0], point_data=fem.point_data, cell_data=fem.cell_data,
               field_data={"conventions": field_lines()})


def write_xdmf(folder: Path, fem: FemMesh) -> None:
    """mesh.xdmf (+ mesh.h5): volume cells, point and cell fields (facets.xdmf: `write_facets`).

    One cell type per grid, both grids on the same points, as FEniCS-style codes read them:
    grid ``mesh`` with the segment labels as its first attribute, grid ``facets`` with the
    face tags. Each grid carries the convention lines as XDMF ``Information`` elements.
    """
    import meshio

    volume = fem.types[0]
    index = meshtools.index_dtype(len(fem.points))  # 9 MB less than int64 at 550k cells
    meshio.Mesh(fem.points, [(volume, fem.cells.astype(index, copy=False))], point_data=fem.point_data,
                cell_data={k: [v] for k, v in fem.cell_data.items()}).write(folder / "mesh.xdmf", compression=None)
    segments = {name: (number, 3) for number, name in SEGMENT_NAMES.items() if number > 0}
    _describe_xdmf(folder / "mesh.xdmf", "mesh", segments,
                   "aha_segment numbers and names; cell fields per element, point fields per node",
                   first="aha_segment")


def write_facets(folder: Path, fem: FemMesh) -> None:
    """facets.xdmf (+ facets.h5): the boundary faces on the mesh's points, tag ``boundary``."""
    import meshio

    face = fem.types[1]
    index = meshtools.index_dtype(len(fem.points))
    meshio.Mesh(fem.points, [(face, fem.faces.astype(index, copy=False))],
                cell_data={"boundary": [fem.face_tags.astype(np.int32)]}).write(folder / "facets.xdmf",
                                                                                compression=None)
    faces = {name: (tag, 2) for tag, name in fem.face_names.items()}
    _describe_xdmf(folder / "facets.xdmf", "facets", faces,
                   "boundary: " + ", ".join(f"{tag} {name}" for tag, name in fem.face_names.items()))


def _describe_xdmf(path: Path, grid_name: str, tags: dict, tags_line: str, *, first: str | None = None) -> None:
    """Name the grid, put attribute ``first`` first, add one ``Information`` per convention line.

    Readers that take a grid's first attribute as its cell tags (FEniCS-style mesh-tag
    readers) then find the segment labels.

    meshio's XDMF reader parses the text of every ``Information`` element as a map of tag
    names (``<map key=NAME dim=D>TAG</map>``, read as its ``field_data``), so each one gets such
    a text: empty for the convention lines, the grid's tag names for the last (``tags``).
    """
    import xml.etree.ElementTree as ET

    tree = ET.parse(path)
    grid = tree.getroot().find("Domain/Grid")
    grid.set("Name", grid_name)
    moved = [a for a in grid.findall("Attribute") if a.get("Name") == first]
    for att in moved:
        grid.remove(att)
        grid.insert(list(grid).index(grid.find("Topology")) + 1, att)
    texts = {}
    for key, line in field_lines().items():
        value = line if isinstance(line, str) else json.dumps(line)
        info = ET.SubElement(grid, "Information", Name=key, Value=value)
        info.text = texts.setdefault("<main/>", f"@@{len(texts)}@@")
    info = ET.SubElement(grid, "Information", Name="tags", Value=tags_line)
    tag_map = "<main>" + "".join(f'<map key="{k}" dim="{d}">{t}</map>' for k, (t, d) in tags.items()) + "</main>"
    info.text = texts.setdefault(tag_map, f"@@{len(texts)}@@")
    ET.indent(tree)
    xml = ET.tostring(tree.getroot(), encoding="unicode")
    for content, placeholder in texts.items():
        xml = xml.replace(placeholder, f"<![CDATA[{content}]]>")
    Path(path).write_text('<?xml version="1.0"?>\n' + xml + "\n")


def write_msh(path: Path, fem: FemMesh) -> None:
    """mesh.msh (gmsh 2.2 binary): volume group 1 ``wall``, face groups 1-3, base rings 1-2 (dimension 1)."""
    import meshio

    volume, face, line = fem.types
    rings = [fem.rings[tag] for tag in RING_TAGS]
    blocks = [(volume, fem.cells), (face, fem.faces)] + [(line, r) for r in rings]
    phys = [np.full(len(fem.cells), WALL_TAG, np.int32), fem.face_tags.astype(np.int32)] + \
           [np.full(len(r), RING_TAGS[tag], np.int32) for tag, r in zip(RING_TAGS, rings)]
    msh = meshio.Mesh(fem.points, blocks, cell_data={"gmsh:physical": phys, "gmsh:geometrical": phys})
    msh.field_data = {"wall": np.array([WALL_TAG, 3]),
                      **{name: np.array([tag, 2]) for tag, name in fem.face_names.items()},
                      **{RING_NAMES[tag]: np.array([t, 1]) for tag, t in RING_TAGS.items()}}
    meshio.write(path, msh, file_format="gmsh22", binary=True)


def write_surfaces(path: Path, wall, surf, stack) -> None:
    """The fitted surfaces (as the mesh's tagged boundary) and the input contours with residuals."""
    from fibers.io.vtkxml import write_polydata

    used = np.unique(wall.faces)
    remap = np.full(len(wall.points), -1)
    remap[used] = np.arange(len(used))
    tri = remap[wall.faces]
    pts = [wall.points[used]]
    n0 = next_index = len(used)
    lines, residual, slice_ids, structure = [], [], [], []
    for sl in stack.slices:
        for s, code in (("endo", 1), ("epi", 2)):
            c = getattr(sl, s)
            if c is None:
                continue
            idx = next_index + np.arange(len(c))
            next_index += len(c)
            pts.append(c)
            lines.append(np.concatenate([idx, idx[:1]]))  # closed
            residual.append(surf.distance(s, c))
            slice_ids.append(np.full(len(c), sl.slice_id))
            structure.append(np.full(len(c), code))
    n_lines = len(lines)
    # VTK numbers poly-data cells as verts, lines, polys
    write_polydata(path, np.concatenate(pts), lines=lines, triangles=tri, cell_data={
        "face_tag": np.concatenate([np.zeros(n_lines, np.int32), wall.face_tags.astype(np.int32)]),
        "is_contour": np.concatenate([np.ones(n_lines, np.int8), np.zeros(len(tri), np.int8)])}, point_data={
        "residual_mm": np.concatenate([np.zeros(n0), *residual]),
        "slice": np.concatenate([np.full(n0, -1), *slice_ids]).astype(np.int32),
        "contour_structure": np.concatenate([np.zeros(n0, np.int8), *structure]).astype(np.int8)})


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

    def exact(p):  # the long axis to the last bit: fibers.open rebuilds the fiber rule on it
        return [float(v) for v in p]
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
        "long_axis": {"base_centre_mm": exact(result.mesh.axis.base_centre),
                      "direction": exact(result.mesh.axis.direction),
                      "endo_apex_mm": pt(result.mesh.endo_apex), "epi_apex_mm": pt(result.mesh.epi_apex)},
        # ties a later motion file (fibers strain) to this very mesh
        "mesh_checksum": _mesh_checksum(result.mesh),
        "background_box": {"corner_mm": pt(result.box.corner), "edges_mm": [pt(e) for e in result.box.edges]},
        "conventions": CONVENTIONS,
        "versions": {"python": platform.python_version(), "numpy": np.__version__, "scipy": scipy.__version__,
                     "gmsh": gmsh.__version__, "meshio": meshio.__version__, "pyamg": pyamg.__version__},
        "warnings": list(result.warnings),
        "summary": result.summary,
    }


def _mesh_checksum(wall) -> str:
    from fibers.io.motion import mesh_checksum

    return mesh_checksum(wall.points, wall.tets)


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
