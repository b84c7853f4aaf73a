"""fibers.io.vtkxml: raw appended VTK XML, checked against two outside readers (meshio, VTK via
pyvista) and read back by our own reader."""

import meshio
import numpy as np
import pytest

from fibers.io import vtkxml


@pytest.fixture
def grid(tmp_path):
    rng = np.random.default_rng(3)
    points = rng.random((40, 3))
    cells = rng.integers(0, 40, (25, 4))
    point_data = {"scalar": rng.random(40), "vector": rng.random((40, 3))}
    cell_data = {"label": rng.integers(0, 17, 25).astype(np.int32), "triad": rng.random((25, 3))}
    path = tmp_path / "g.vtu"
    vtkxml.write_grid(path, points, cells, "tetra", point_data=point_data, cell_data=cell_data,
                      field_data={"conventions": {"a": "b"}})
    return path, points, cells, point_data, cell_data


def test_grid_reads_the_same_in_meshio_vtk_and_our_reader(grid):
    import pyvista as pv

    path, points, cells, point_data, cell_data = grid
    theirs = meshio.read(path)  # meshio, a general reader from PyPI
    assert np.array_equal(theirs.points, points) and np.array_equal(theirs.cells[0].data, cells)
    vtk = pv.read(path)  # VTK's own XML reader
    assert vtk.n_cells == 25 and np.array_equal(vtk.points, points)
    ours = vtkxml.read_grid(path)
    assert ours["cell_type"] == "tetra" and np.array_equal(ours["cells"], cells)
    assert ours["field_data"] == {"conventions": {"a": "b"}}
    for key, value in point_data.items():
        assert np.array_equal(theirs.point_data[key], value) and np.array_equal(vtk.point_data[key], value)
        assert np.array_equal(ours["point_data"][key], value)
    for key, value in cell_data.items():
        assert np.array_equal(theirs.cell_data[key][0], value) and np.array_equal(vtk.cell_data[key], value)
        assert ours["cell_data"][key].dtype == value.dtype and np.array_equal(ours["cell_data"][key], value)


def test_damaged_or_foreign_files_are_told_apart(grid, tmp_path):
    path, *_ = grid
    data = path.read_bytes()
    short = tmp_path / "short.vtu"
    short.write_bytes(data[: len(data) - 400])
    with pytest.raises(ValueError, match="past the end"):
        vtkxml.read_grid(short)
    inline = tmp_path / "inline.vtu"  # meshio's own layout: base64 inline arrays
    meshio.write(inline, meshio.read(path))
    with pytest.raises(vtkxml.NotOurLayout):
        vtkxml.read_grid(inline)
    empty = tmp_path / "empty.vtu"
    empty.write_bytes(b"")
    with pytest.raises(ValueError, match="empty"):
        vtkxml.read_grid(empty)


def test_build_reader_takes_both_layouts(grid, tmp_path):
    # an older build's mesh.vtu (base64 inline, as meshio writes) reads as the raw one does
    from fibers.io.build import read_volume_mesh

    path, points, cells, point_data, cell_data = grid
    inline = tmp_path / "inline.vtu"
    meshio.write(inline, meshio.read(path))
    for mesh in (read_volume_mesh(path), read_volume_mesh(inline)):
        assert mesh.cell_type == "tetra" and np.array_equal(mesh.cells, cells)
        assert np.array_equal(mesh.points, points)
        assert np.array_equal(mesh.point_data["vector"], point_data["vector"])
        assert np.array_equal(mesh.cell_data["triad"], cell_data["triad"])
