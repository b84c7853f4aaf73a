"""VTK XML files (``.vtu``, ``.vtp``) written and read with numpy alone.

Every array is stored raw in one appended block (``<AppendedData encoding="raw">``, a UInt64
byte count before each array), the layout VTK, ParaView and pyvista read fastest. Raw bytes
need no base64 pass and are a quarter smaller: at 547k tetrahedra ``mesh.vtu`` is written in
about 0.1 s instead of 0.5 s. meshio reads these files too, but re-encodes the block in Python
(about 5 s at that size), so build folders are read back by :func:`read_grid`, which maps the
file in one read and views its arrays in place (a few hundredths of a second).
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np

from fibers.meshtools import index_dtype

# meshio's cell names (used across fibers) and VTK's cell type numbers
VTK_TYPES = {"vertex": 1, "line": 3, "triangle": 5, "tetra": 10, "line3": 21, "triangle6": 22, "tetra10": 24}
NODES_PER_CELL = {"vertex": 1, "line": 2, "triangle": 3, "tetra": 4, "line3": 3, "triangle6": 6, "tetra10": 10}
_VTK_DTYPES = {"f8": "Float64", "f4": "Float32", "i8": "Int64", "i4": "Int32", "i2": "Int16", "i1": "Int8",
               "u8": "UInt64", "u4": "UInt32", "u2": "UInt16", "u1": "UInt8"}
_NUMPY_DTYPES = {v: np.dtype("<" + k) for k, v in _VTK_DTYPES.items()}
_RAW = b'<AppendedData encoding="raw">'


class _Arrays:
    """The file as XML text, each array referring by offset to its bytes in the appended block."""

    def __init__(self, kind: str):
        self.kind = kind
        self.chunks: list[bytes] = [
            (f'<?xml version="1.0"?>\n<VTKFile type="{kind}" version="1.0" byte_order="LittleEndian" '
             f'header_type="UInt64">\n<{kind}>\n').encode("utf-8")]
        self.blocks: list[np.ndarray] = []
        self.offset = 0

    def text(self, xml: str) -> None:
        self.chunks.append(xml.encode("utf-8"))

    def array(self, name: str | None, values, *, tuples: bool = False) -> None:
        a = np.asarray(values)
        if a.dtype.kind == "b":
            a = a.astype(np.uint8)
        a = np.ascontiguousarray(a, dtype=a.dtype.newbyteorder("<"))
        key = a.dtype.str.lstrip("<|=")
        if key not in _VTK_DTYPES:
            raise TypeError(f"no VTK type for {a.dtype} ({name})")
        components = 1 if a.ndim == 1 else int(np.prod(a.shape[1:]))
        attrs = f'type="{_VTK_DTYPES[key]}"' + (f' Name="{name}"' if name else "")
        attrs += f' NumberOfComponents="{components}"' if components > 1 else ""
        attrs += f' NumberOfTuples="{len(a)}"' if tuples else ""
        self.text(f'<DataArray {attrs} format="appended" offset="{self.offset}"/>\n')
        self.blocks.append(a)
        self.offset += 8 + a.nbytes

    def write(self, path: Path) -> None:
        with open(path, "wb") as f:
            f.writelines(self.chunks)
            f.write(f"</{self.kind}>\n".encode("utf-8") + _RAW + b"\n_")
            for a in self.blocks:  # straight from the arrays' memory: no joined copy
                f.write(np.uint64(a.nbytes).tobytes())
                f.write(memoryview(a).cast("B"))
            f.write(b"\n</AppendedData>\n</VTKFile>\n")


def _field_data(out: _Arrays, texts: dict) -> None:
    """Texts as UInt8 arrays of UTF-8 JSON (meshio refuses VTK's string arrays)."""
    if texts:
        out.text("<FieldData>\n")
        for name, value in texts.items():
            out.array(name, np.frombuffer(json.dumps(value, indent=1).encode("utf-8"), np.uint8), tuples=True)
        out.text("</FieldData>\n")


def _data(out: _Arrays, tag: str, arrays: dict) -> None:
    out.text(f"<{tag}>\n")
    for name, values in arrays.items():
        out.array(name, values)
    out.text(f"</{tag}>\n")


def write_grid(path, points: np.ndarray, cells: np.ndarray, cell_type: str, *, point_data: dict | None = None,
               cell_data: dict | None = None, field_data: dict | None = None) -> None:
    """An unstructured grid of one cell type (``.vtu``).

    Parameters
    ----------
    path : str or Path
    points : ndarray (N, 3)
    cells : ndarray (M, k) int
        Node indices in VTK's order; ``cell_type`` one of :data:`VTK_TYPES`.
    point_data, cell_data : dict of str to ndarray (N, ...) / (M, ...)
    field_data : dict of str to JSON-serialisable values, stored as UTF-8 bytes
    """
    k = NODES_PER_CELL[cell_type]
    cells = np.asarray(cells)
    index = index_dtype(max(len(points), cells.size))
    out = _Arrays("UnstructuredGrid")
    _field_data(out, field_data or {})
    out.text(f'<Piece NumberOfPoints="{len(points)}" NumberOfCells="{len(cells)}">\n<Points>\n')
    out.array("Points", np.asarray(points, np.float64))
    out.text("</Points>\n<Cells>\n")
    out.array("connectivity", cells.reshape(-1).astype(index, copy=False))
    out.array("offsets", np.arange(1, len(cells) + 1, dtype=index) * index(k))
    out.array("types", np.full(len(cells), VTK_TYPES[cell_type], np.uint8))
    out.text("</Cells>\n")
    _data(out, "PointData", point_data or {})
    _data(out, "CellData", cell_data or {})
    out.text("</Piece>\n")
    out.write(Path(path))


def write_polydata(path, points: np.ndarray, *, lines: list | None = None, triangles: np.ndarray | None = None,
                   vertices: bool = False, point_data: dict | None = None, cell_data: dict | None = None,
                   field_data: dict | None = None) -> None:
    """Poly data (``.vtp``): polylines, triangles, or a cloud of vertices (one per point).

    ``lines`` is a list of index arrays, one polyline each. VTK numbers poly-data cells as
    vertices, then lines, then polygons; ``cell_data`` arrays follow that order.
    """
    n = len(points)
    sections = {}
    if vertices:
        index = index_dtype(n + 1)
        sections["Verts"] = (np.arange(n, dtype=index), np.arange(1, n + 1, dtype=index))
    if lines:
        connectivity = np.concatenate(lines)
        index = index_dtype(max(n, connectivity.size))
        sections["Lines"] = (connectivity.astype(index), np.cumsum([len(line) for line in lines]).astype(index))
    if triangles is not None and len(triangles):
        tri = np.asarray(triangles)
        index = index_dtype(max(n, tri.size))
        sections["Polys"] = (tri.reshape(-1).astype(index), np.arange(1, len(tri) + 1, dtype=index) * index(3))
    counts = {name: len(sections[name][1]) if name in sections else 0 for name in ("Verts", "Lines", "Polys")}
    out = _Arrays("PolyData")
    _field_data(out, field_data or {})
    out.text(f'<Piece NumberOfPoints="{n}" NumberOfVerts="{counts["Verts"]}" NumberOfLines="{counts["Lines"]}" '
             f'NumberOfStrips="0" NumberOfPolys="{counts["Polys"]}">\n')
    _data(out, "PointData", point_data or {})
    _data(out, "CellData", cell_data or {})
    out.text("<Points>\n")
    out.array("Points", np.asarray(points, np.float64).reshape(n, 3))
    out.text("</Points>\n")
    for name, (connectivity, offsets) in sections.items():
        out.text(f"<{name}>\n")
        out.array("connectivity", connectivity)
        out.array("offsets", offsets)
        out.text(f"</{name}>\n")
    out.text("</Piece>\n")
    out.write(Path(path))


class NotOurLayout(ValueError):
    """The file is VTK XML, but not the raw appended layout :func:`write_grid` writes."""


def read_grid(path) -> dict:
    """An unstructured grid written by :func:`write_grid`, its arrays mapped from the file.

    Returns
    -------
    dict
        ``points`` (N, 3), ``cells`` (M, k), ``cell_type`` (meshio's name), ``point_data`` and
        ``cell_data`` (dict of str to ndarray), ``field_data`` (dict of str to the decoded JSON).
        The arrays are views of one buffer holding the file (writable; no file stays open).

    Raises
    ------
    NotOurLayout
        The file holds no raw appended block, no cells or mixed cell types, or is not an unstructured grid
        (read it with meshio or pyvista instead).
    ValueError
        The file is cut short or its XML is damaged.
    """
    with open(path, "rb") as f:
        size = f.seek(0, 2)
        if size == 0:
            raise ValueError("the file is empty")
        f.seek(0)
        buf = bytearray(size)
        if f.readinto(buf) != size:
            raise ValueError("the file changed while it was read")
    start = buf.find(_RAW)
    if start < 0:
        raise NotOurLayout("no raw appended data block")
    underscore = buf.find(b"_", start)
    if underscore < 0:
        raise ValueError("the appended data block is cut short")
    try:
        root = ET.fromstring(bytes(buf[:start]) + b"</VTKFile>")
    except ET.ParseError as err:
        raise ValueError(f"its XML header is damaged ({err})") from None
    piece = root.find("UnstructuredGrid/Piece")
    if root.get("type") != "UnstructuredGrid" or piece is None or root.get("header_type") != "UInt64":
        raise NotOurLayout("not an unstructured grid with 64-bit headers")
    data = memoryview(buf)[underscore + 1:]

    def values(element) -> np.ndarray:
        offset = int(element.get("offset"))
        (nbytes,) = np.frombuffer(data, "<u8", 1, offset)
        dtype = _NUMPY_DTYPES[element.get("type")]
        if offset + 8 + int(nbytes) > len(data):
            raise ValueError(f"array {element.get('Name')} runs past the end of the file")
        a = np.frombuffer(data, dtype, int(nbytes) // dtype.itemsize, offset + 8)
        components = int(element.get("NumberOfComponents", 1))
        return a.reshape(-1, components) if components > 1 else a

    def group(tag: str) -> dict:
        node = piece.find(tag)
        return {} if node is None else {e.get("Name"): values(e) for e in node.findall("DataArray")}

    cells = {e.get("Name"): values(e) for e in piece.findall("Cells/DataArray")}
    types = cells["types"]
    names = {v: k for k, v in VTK_TYPES.items()}
    if len(types) == 0 or types.min() != types.max() or int(types[0]) not in names:
        raise NotOurLayout("no cells, more than one cell type, or one fibers does not write")
    cell_type = names[int(types[0])]
    fields = {e.get("Name"): json.loads(bytes(values(e))) for e in root.findall("UnstructuredGrid/FieldData/DataArray")}
    return {"points": values(piece.find("Points/DataArray")),
            "cells": cells["connectivity"].reshape(-1, NODES_PER_CELL[cell_type]), "cell_type": cell_type,
            "point_data": group("PointData"), "cell_data": group("CellData"), "field_data": fields}
