"""The output folder: every file reads back with the values and dtypes we wrote (round trips)."""

from __future__ import annotations

import json

import meshio
import numpy as np
import pytest

from fibers import cli
from fibers.io.outputs import POINT_FIELDS
from fibers.types import FACE_TAG_NAMES


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    out = tmp_path_factory.mktemp("build") / "demo"
    assert cli.main(["demo", "--out", str(out), "--mesh-size", "3.5", "--no-report"]) == 0
    return out


def test_folder_contents(built):
    names = {p.name for p in built.iterdir()}
    assert {"mesh.vtu", "mesh.xdmf", "mesh.h5", "facets.xdmf", "facets.h5", "mesh.msh", "surfaces.vtp", "manifest.json", "pools", "input"} <= names
    assert {p.name for p in (built / "pools").glob("*.npz")} == {
        f"{n}.npz" for n in ("myocardium", "cavity", "background", "endo", "epi", "base")}
    assert not list(built.parent.glob(".demo.*"))  # no partial folder left beside it


def test_vtu_xdmf_msh_agree(built):
    # Round trip (STYLE.md): the three mesh files carry the same points, tetrahedra and fields.
    vtu = meshio.read(built / "mesh.vtu")
    xdmf = meshio.read(built / "mesh.xdmf")
    msh = meshio.read(built / "mesh.msh")
    tets = vtu.cells_dict["tetra"]
    for other in (xdmf, msh):
        np.testing.assert_allclose(other.points, vtu.points, atol=1e-9)
        np.testing.assert_array_equal(other.cells_dict["tetra"], tets)
    for name in POINT_FIELDS:
        assert vtu.point_data[name].dtype == np.float64
        np.testing.assert_allclose(xdmf.point_data[name], vtu.point_data[name])
    aha = vtu.cell_data["aha_segment"][0]
    assert aha.dtype == np.int32 and set(np.unique(aha)) == set(range(1, 18))
    # boundary faces tagged endo / epi / base in the finite-element copies
    tags = np.concatenate([d for d, c in zip(msh.cell_data["gmsh:physical"], msh.cells) if c.type == "triangle"])
    assert set(np.unique(tags)) == set(FACE_TAG_NAMES)
    assert {"endo", "epi", "base", "wall"} <= set(msh.field_data)
    facets = meshio.read(built / "facets.xdmf")  # the boundary triangles, on the same points
    xtags = facets.cell_data["boundary"][0]
    np.testing.assert_array_equal(np.sort(xtags), np.sort(tags))


def test_fields_are_unit_and_right_handed(built):
    # Invariants (README conventions): unit vectors, e_circ = e_long x e_rad, sheet_normal = fiber x sheet.
    m = meshio.read(built / "mesh.vtu")
    d = m.point_data
    for name in ("e_rad", "e_long", "e_circ", "fiber", "sheet", "sheet_normal"):
        np.testing.assert_allclose(np.linalg.norm(d[name], axis=1), 1.0, atol=1e-6)
    np.testing.assert_allclose(np.cross(d["e_long"], d["e_rad"]), d["e_circ"], atol=1e-6)
    np.testing.assert_allclose(np.cross(d["fiber"], d["sheet"]), d["sheet_normal"], atol=1e-6)
    assert d["transmural"].min() >= -1e-9 and d["transmural"].max() <= 1 + 1e-9


def test_manifest(built):
    m = json.loads((built / "manifest.json").read_text())
    s = m["summary"]
    # lv mass at 1.05 g/mL (common practice)
    assert s["lv_mass_g"] == pytest.approx(1.05 * s["myocardial_volume_ml"], rel=1e-3)
    assert 90 < s["cavity_volume_ml"] < 160 and 90 < s["myocardial_volume_ml"] < 160
    assert {"mesh", "total", "coordinates", "pools"} <= set(m["timings_s"])
    assert all(len(v) == 64 for v in (i["sha256"] for i in m["inputs"]))
    assert m["landmarks"]["source"] == "case file" and len(m["landmarks"]["rv_insertion_anterior"]) == 3
    assert "not a medical device" in m["caution"]
    assert m["conventions"]["e_circ"] == "e_long x e_rad"


def test_same_input_same_bytes(built, tmp_path):
    # Same input and seed, same output bytes (meshing on one thread, seeded
    # multigrid set-up, seeded pools, fixed zip timestamps).
    again = tmp_path / "again"
    assert cli.main(["demo", "--out", str(again), "--mesh-size", "3.5", "--no-report"]) == 0
    for name in ("mesh.vtu", "mesh.h5", "facets.h5", "mesh.xdmf", "mesh.msh", "surfaces.vtp", "pools/myocardium.npz",
                 "pools/background.npz", "pools/epi.npz"):
        assert (built / name).read_bytes() == (again / name).read_bytes(), name


def test_files_written_while_later_stages_run_match_a_write_at_the_end(built, tmp_path):
    # A build writes the mesh's own files (mesh.msh, facets, surfaces.vtp) while the coordinates
    # are solved and the pools while the architecture is assigned (pipeline.run's write_to);
    # they must be the bytes write_all writes from the finished result.
    from dataclasses import replace

    from fibers import pipeline
    from fibers.io import case as case_io, outputs

    case = case_io.read_case(built / "input" / "case.toml")
    contours, landmarks, box, _, facts = pipeline._read_inputs(case)
    early, late = tmp_path / "early", tmp_path / "late"
    early.mkdir()
    late.mkdir()
    result = pipeline.run(contours, case, box=box, landmarks=landmarks, facts=facts, write_to=early)
    assert set(result.written) == {"mesh.msh", "facets.xdmf", "surfaces.vtp", "pools"}
    assert {p.name for p in early.iterdir()} == {"mesh.msh", "facets.xdmf", "facets.h5", "surfaces.vtp", "pools"}
    outputs.write_all(early, result)
    outputs.write_all(late, replace(result, written=()))
    names = sorted(str(p.relative_to(late)) for p in late.rglob("*") if p.is_file())
    assert names == sorted(str(p.relative_to(early)) for p in early.rglob("*") if p.is_file())
    for name in names:
        assert (early / name).read_bytes() == (late / name).read_bytes(), name
