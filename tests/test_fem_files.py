"""Files for finite-element codes: the XDMF layout, order-2 files, base rings, self-describing
files, and the README's "Reading the outputs" recipes run against real builds.

References outside the project: meshio and h5py (general-purpose readers from PyPI) read the
files back; the XDMF3 element model (Domain / Grid / Topology / Geometry / Attribute /
Information, xdmf.org, from memory) is checked on the XML itself.
"""

from __future__ import annotations

import json
import os
import re
import xml.etree.ElementTree as ET
from pathlib import Path

import h5py
import meshio
import numpy as np
import pytest

from fibers import cli
from fibers.io.outputs import POINT_FIELDS
from fibers.types import SEGMENT_NAMES

README = Path(__file__).resolve().parents[1] / "README.md"


def _build(tmp_path_factory, order):
    out = tmp_path_factory.mktemp(f"order{order}") / "out"
    assert cli.main(["demo", "--out", str(out), "--mesh-size", "3.5", "--mesh-order", str(order),
                     "--no-report"]) == 0
    return out


@pytest.fixture(scope="module")
def linear(tmp_path_factory):
    return _build(tmp_path_factory, 1)


@pytest.fixture(scope="module")
def quadratic(tmp_path_factory):
    return _build(tmp_path_factory, 2)


@pytest.fixture(params=["linear", "quadratic"])
def build(request):
    return request.getfixturevalue(request.param)


def _grid(path):
    root = ET.parse(path).getroot()
    domains = root.findall("Domain")
    assert len(domains) == 1 and len(domains[0].findall("Grid")) == 1
    return domains[0].find("Grid")


def _h5(folder, item):
    file, dataset = item.text.strip().split(":")
    with h5py.File(folder / file, "r") as f:
        return f[dataset.lstrip("/")][()]


TYPES = {4: ("Tetrahedron", "Triangle"), 10: ("Tetrahedron_10", "Triangle_6")}


def test_xdmf_single_topology_grids_match_vtu(build):
    vtu = meshio.read(build / "mesh.vtu")
    kind = vtu.cells[0].type
    tets = vtu.cells_dict[kind]
    volume_type, face_type = TYPES[tets.shape[1]]
    mesh_grid, facet_grid = _grid(build / "mesh.xdmf"), _grid(build / "facets.xdmf")
    # one Topology per grid, of one cell type (never "Mixed")
    for grid, name, topo in ((mesh_grid, "mesh", volume_type), (facet_grid, "facets", face_type)):
        assert grid.get("Name") == name
        (t,) = grid.findall("Topology")
        assert t.get("TopologyType") == topo
    # the heavy data, read with h5py: same points in both files, the cells of mesh.vtu
    points = _h5(build, mesh_grid.find("Geometry/DataItem"))
    np.testing.assert_array_equal(points, vtu.points)
    np.testing.assert_array_equal(_h5(build, facet_grid.find("Geometry/DataItem")), points)
    np.testing.assert_array_equal(_h5(build, mesh_grid.find("Topology/DataItem")), tets)
    # attributes: aha_segment first (FEniCS-style cell tags), every point field on the nodes
    attrs = mesh_grid.findall("Attribute")
    assert attrs[0].get("Name") == "aha_segment" and attrs[0].get("Center") == "Cell"
    centres = {a.get("Name"): a.get("Center") for a in attrs}
    assert all(centres[name] == "Node" for name in POINT_FIELDS)
    (boundary,) = facet_grid.findall("Attribute")
    assert boundary.get("Name") == "boundary" and boundary.get("Center") == "Cell"
    # facets: exactly the corner triangles used by one tetrahedron each (counted here directly)
    faces = _h5(build, facet_grid.find("Topology/DataItem"))
    local = np.array([[1, 2, 3], [0, 3, 2], [0, 1, 3], [0, 2, 1]])
    all_faces = np.sort(tets[:, :4][:, local].reshape(-1, 3), axis=1)
    uniq, count = np.unique(all_faces, axis=0, return_counts=True)
    assert {tuple(r) for r in uniq[count == 1]} == {tuple(r) for r in np.sort(faces[:, :3], axis=1)}
    assert set(np.unique(_h5(build, boundary.find("DataItem")))) == {1, 2, 3}


def test_round_trip_every_format(build):
    # Round trip: meshio reads every file back with the same points, cells, fields.
    vtu = meshio.read(build / "mesh.vtu")
    xdmf, facets, msh = (meshio.read(build / n) for n in ("mesh.xdmf", "facets.xdmf", "mesh.msh"))
    kind = vtu.cells[0].type
    assert kind in ("tetra", "tetra10") and len(vtu.cells) == 1 and len(xdmf.cells) == 1
    for other in (xdmf, msh, facets):
        np.testing.assert_array_equal(other.points, vtu.points)
    np.testing.assert_array_equal(xdmf.cells_dict[kind], vtu.cells_dict[kind])
    np.testing.assert_array_equal(msh.cells_dict[kind], vtu.cells_dict[kind])
    for name in POINT_FIELDS:
        assert np.isfinite(vtu.point_data[name]).all(), name
        np.testing.assert_array_equal(xdmf.point_data[name], vtu.point_data[name])
    for name, [data] in vtu.cell_data.items():
        np.testing.assert_array_equal(xdmf.cell_data[name][0], data)
        assert xdmf.cell_data[name][0].dtype == data.dtype
    face = "triangle6" if kind == "tetra10" else "triangle"
    msh_tags = dict(zip([c.type for c in msh.cells], msh.cell_data["gmsh:physical"]))
    np.testing.assert_array_equal(msh.cells_dict[face], facets.cells_dict[face])
    np.testing.assert_array_equal(msh_tags[face], facets.cell_data["boundary"][0])
    assert facets.field_data == {} or {k: list(v) for k, v in facets.field_data.items()} == {
        "endo": [1, 2], "epi": [2, 2], "base": [3, 2]}


def test_quadratic_build_files(quadratic):
    m = json.loads((quadratic / "manifest.json").read_text())
    assert m["parameters"]["mesh"]["order"] == 2 and m["summary"]["mesh_order"] == 2
    q = m["summary"]["quadratic"]
    vtu = meshio.read(quadratic / "mesh.vtu")
    assert vtu.cells[0].type == "tetra10" and len(vtu.cells[0].data) == q["elements"]
    assert q["jacobian_min_ratio"] > 0.3 and q["straightened_elements"] == 0
    # every node of the 10-node mesh is used and carries unit, right-handed triads
    assert len(np.unique(vtu.cells[0].data)) == len(vtu.points) == q["nodes"]
    d = vtu.point_data
    np.testing.assert_allclose(np.cross(d["fiber"], d["sheet"]), d["sheet_normal"], atol=1e-9)
    np.testing.assert_allclose(np.linalg.norm(d["e_circ"], axis=1), 1.0, atol=1e-9)
    # cell triads per 10-node element: unit and right-handed; segments 1-17 all present
    c = {k: v[0] for k, v in vtu.cell_data.items()}
    np.testing.assert_allclose(np.cross(c["fiber_cell"], c["sheet_cell"]), c["sheet_normal_cell"], atol=1e-9)
    assert set(np.unique(c["aha_segment"])) == set(range(1, 18))
    # the curved volume is close to the linear children's (same nodes), within 0.5 %
    assert q["myocardial_volume_ml"] == pytest.approx(m["summary"]["myocardial_volume_ml"], rel=5e-3)


def test_msh_base_rings(build):
    msh = meshio.read(build / "mesh.msh")
    assert [int(v) for v in msh.field_data["endo_base_ring"]] == [1, 1]
    assert [int(v) for v in msh.field_data["epi_base_ring"]] == [2, 1]
    lines = [(c, t) for c, t in zip(msh.cells, msh.cell_data["gmsh:physical"]) if c.type in ("line", "line3")]
    edges = np.concatenate([c.data for c, _ in lines])
    tags = np.concatenate([t for _, t in lines])
    assert set(np.unique(tags)) == {1, 2}
    faces = {c.type: (c.data, t) for c, t in zip(msh.cells, msh.cell_data["gmsh:physical"])
             if c.type.startswith("triangle")}
    (tri, ftag), = faces.values()
    for tag in (1, 2):
        ring = edges[tags == tag]
        # every ring node in the base plane (the plane through the base triangles' nodes, by
        # SVD), on a base triangle and on a triangle of its own surface
        base = msh.points[np.unique(tri[ftag == 3])]
        centre = base.mean(axis=0)
        normal = np.linalg.svd(base - centre)[2][-1]
        assert np.abs((base - centre) @ normal).max() < 1e-9
        assert np.abs((msh.points[ring.ravel()] - centre) @ normal).max() < 1e-9
        assert np.isin(ring, tri[ftag == 3]).all() and np.isin(ring, tri[ftag == tag]).all()
        # a closed loop: each end node in exactly two edges
        assert set(np.bincount(ring[:, :2].ravel())[np.unique(ring[:, :2])]) == {2}


def test_conventions_travel_with_the_data(build):
    man = json.loads((build / "manifest.json").read_text())
    vtu = meshio.read(build / "mesh.vtu")
    carried = json.loads(bytes(vtu.field_data["conventions"]).decode("utf-8"))
    for key, line in man["conventions"].items():
        assert carried[key] == line, key
    assert carried["aha_segment_names"] == {str(k): v for k, v in SEGMENT_NAMES.items()}
    # Cerqueira et al., Circulation 2002: the apical septal segment is 14, the apex 17
    assert carried["aha_segment_names"]["14"] == "apical septal" and carried["aha_segment_names"]["17"] == "apex"
    for name in ("mesh.xdmf", "facets.xdmf"):
        info = {i.get("Name"): i.get("Value") for i in _grid(build / name).findall("Information")}
        for key, line in man["conventions"].items():
            assert info[key] == (line if isinstance(line, str) else json.dumps(line)), (name, key)
    names = {k: [int(x) for x in v] for k, v in meshio.read(build / "mesh.xdmf").field_data.items()}
    assert names["apical septal"] == [14, 3] and len(names) == 17


def _recipes() -> list[str]:
    text = README.read_text()
    section = text.split("## Reading the outputs", 1)[1].split("\n## ", 1)[0]
    return re.findall(r"```python\n(.*?)```", section, flags=re.S)


def test_readme_has_recipes():
    assert len(_recipes()) >= 5


@pytest.mark.parametrize("index", range(len(_recipes())))
def test_readme_recipe_runs(build, index, capsys):
    # each recipe runs as a user would, from the folder that holds the build as out/
    here = os.getcwd()
    os.chdir(build.parent)
    try:
        exec(compile(_recipes()[index], f"README recipe {index + 1}", "exec"), {})
    finally:
        os.chdir(here)
    assert capsys.readouterr().out.strip()  # every recipe shows something


@pytest.mark.parametrize("value, words", [(3, "between 1 and 2"), (1.5, "whole number"), ("2", "number")])
def test_mesh_order_refused_with_a_clear_message(value, words):
    from fibers.errors import InputError
    from fibers.io.case import resolve_case

    with pytest.raises(InputError, match=words) as err:
        resolve_case({"input": {"contours": "c.csv"}, "mesh": {"order": value}}, name="case.toml")
    assert "[mesh] order" in str(err.value) and "\n" not in str(err.value)
