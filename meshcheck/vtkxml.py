"""A small, fast writer of VTK XML unstructured grids (.vtu).

meshio's writer compresses every array with zlib at its default level and
base64-encodes it inline, which dominates the audit's run time on large meshes.
This writer follows the VTK XML file format (VTK User's Guide, "VTK File
Formats", XML formats) with the arrays in an ``AppendedData`` section in
``base64`` encoding, each compressed at zlib level 1 by the ``vtkZLibDataCompressor``
block layout (a header of UInt64 words: number of blocks, block size, size of
the last block, compressed size of each block, then the compressed blocks).
Arrays are compressed one at a time, block by block on all cores, straight from
the caller's memory and written as they are done: memory stays at one array's
compressed bytes.  Connectivity is written as Int32 when the node count allows.  (Raw
appended data would save the base64 step, but meshio 5.3's reader of raw data
renumbers the offsets as it goes and can then mistake one array for another.)
Node orders are meshio's, which are VTK's.  The output is tested by re-reading
it with meshio and with VTK's own reader.
"""
from __future__ import annotations

import base64
import os
import zlib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from xml.sax.saxutils import quoteattr

import numpy as np

__all__ = ["write_vtu", "VTK_CELL_TYPES"]

#: meshio cell type -> VTK cell type id (vtkCellType.h)
VTK_CELL_TYPES = {"triangle": 5, "quad": 9, "tetra": 10, "hexahedron": 12, "wedge": 13,
                  "pyramid": 14, "triangle6": 22, "quad8": 23, "tetra10": 24,
                  "hexahedron20": 25, "wedge15": 26, "quad9": 28, "hexahedron27": 29}
_VTK_TYPE = {np.dtype(np.int8): "Int8", np.dtype(np.uint8): "UInt8",
             np.dtype(np.int32): "Int32", np.dtype(np.int64): "Int64",
             np.dtype(np.float32): "Float32", np.dtype(np.float64): "Float64"}
_BLOCK = 1 << 21  # bytes per compressed block (blocks are compressed in parallel)
_SLOT = 32  # characters reserved in each DataArray tag for ``offset="..."`` and blank padding


def _as_vtk(arr) -> np.ndarray:
    """Contiguous little-endian array of a type VTK names (bool -> Int8)."""
    arr = np.asarray(arr)
    if arr.dtype == bool:
        arr = arr.astype(np.int8)
    if arr.dtype not in _VTK_TYPE:
        arr = arr.astype(np.float64 if arr.dtype.kind == "f" else np.int64)
    return np.ascontiguousarray(arr).astype(arr.dtype.newbyteorder("<"), copy=False)


def _compressed(arr: np.ndarray, level: int, pool) -> tuple[bytes, list[bytes]]:
    """(header, blocks) of one array in the vtkZLibDataCompressor layout."""
    raw = memoryview(arr.reshape(-1).view(np.uint8))
    n = len(raw)
    spans = [raw[i:i + _BLOCK] for i in range(0, n, _BLOCK)] or [raw[0:0]]
    comp = list(pool.map(lambda b: zlib.compress(b, level), spans)) if len(spans) > 1 \
        else [zlib.compress(spans[0], level)]
    last = len(spans[-1])
    header = np.array([len(spans), _BLOCK if len(spans) > 1 else last, last]
                      + [len(c) for c in comp], dtype="<u8").tobytes()
    return header, comp


def _tag(name: str, arr: np.ndarray, ncomp: int, slot: int) -> str:
    comps = f' NumberOfComponents="{ncomp}"' if ncomp > 1 else ""
    return (f'<DataArray type="{_VTK_TYPE[arr.dtype]}" Name={quoteattr(name)}{comps} '
            f'format="appended" {_slot_text(slot)}/>\n')


def _slot_text(slot: int) -> str:
    """A placeholder of :data:`_SLOT` characters, later replaced by the offset attribute
    followed by blanks (whitespace inside a tag is legal XML; readers such as meshio
    compare the offset attribute as written, so it carries no padding itself)."""
    return f"@slot{slot}@".ljust(_SLOT, "@")


def write_vtu(path: str | Path, points: np.ndarray, blocks: list[tuple[str, np.ndarray]],
              cell_data: dict[str, np.ndarray] | None = None,
              point_data: dict[str, np.ndarray] | None = None, level: int = 1) -> Path:
    """Write points (n, 3), cell blocks [(meshio type, (m, k) int)], and per-cell / per-point
    arrays (concatenated over the blocks, (n_cells,) or (n_cells, c)) as a .vtu file.
    ``level``: zlib level, 0 for stored blocks (no compression work; same layout)."""
    path = Path(path)
    points = np.asarray(points, dtype=np.float64)
    n_pts = len(points)
    idx = np.int32 if n_pts < 2**31 else np.int64
    conn = np.concatenate([np.asarray(c).astype(idx, copy=False).ravel() for _, c in blocks]) \
        if blocks else np.zeros(0, idx)
    sizes = [np.full(len(c), np.asarray(c).shape[1], np.int64) for _, c in blocks]
    offsets = np.cumsum(np.concatenate(sizes)) if blocks else np.zeros(0, np.int64)
    if len(offsets) and offsets[-1] < 2**31:
        offsets = offsets.astype(np.int32)
    types = np.concatenate([np.full(len(c), VTK_CELL_TYPES[t], np.uint8) for t, c in blocks]) \
        if blocks else np.zeros(0, np.uint8)
    n_cells = len(types)

    arrays: list[tuple[str, np.ndarray, int]] = []  # (name, values, components)
    xml = ['<?xml version="1.0"?>\n<VTKFile type="UnstructuredGrid" version="1.0" '
           'byte_order="LittleEndian" header_type="UInt64" compressor="vtkZLibDataCompressor">\n'
           f'<UnstructuredGrid>\n<Piece NumberOfPoints="{n_pts}" '
           f'NumberOfCells="{n_cells}">\n']

    def add(name, values, ncomp=1):
        values = _as_vtk(values)
        xml.append(_tag(name, values, ncomp, len(arrays)))
        arrays.append((name, values, ncomp))

    for tag, data, n in (("PointData", point_data, n_pts), ("CellData", cell_data, n_cells)):
        if not data:
            continue
        xml.append(f"<{tag}>\n")
        for name, values in data.items():
            values = np.asarray(values)
            if values.shape[0] != n:
                raise ValueError(f"{tag} array {name!r} has {values.shape[0]} rows, expected {n}")
            add(name, values, 1 if values.ndim == 1 else values.shape[1])
        xml.append(f"</{tag}>\n")
    xml.append("<Points>\n")
    add("Points", points, 3)
    xml.append("</Points>\n<Cells>\n")
    add("connectivity", conn)
    add("offsets", offsets)
    add("types", types)
    xml.append('</Cells>\n</Piece>\n</UnstructuredGrid>\n<AppendedData encoding="base64">\n_')
    head = "".join(xml).encode("ascii")
    where = [head.index(_slot_text(k).encode()) for k in range(len(arrays))]
    head = bytearray(head)
    workers = max(1, min(os.cpu_count() or 1, 8))
    with open(path, "wb") as fh, ThreadPoolExecutor(max_workers=workers) as pool:
        fh.write(head)
        start = fh.tell()
        for k, (_, values, _) in enumerate(arrays):
            at = fh.tell() - start
            head[where[k]:where[k] + _SLOT] = f'offset="{at}"'.ljust(_SLOT).encode()
            header, comp = _compressed(values, level, pool)
            fh.write(base64.b64encode(header))
            fh.write(base64.b64encode(b"".join(comp)))
        fh.write(b"\n</AppendedData>\n</VTKFile>\n")
        fh.seek(0)
        fh.write(head)  # the offsets, now known (same length as before)
    return path
