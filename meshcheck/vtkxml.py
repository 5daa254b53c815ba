"""A small, fast writer of VTK XML unstructured grids (.vtu).

meshio's writer compresses every array with zlib at its default level and
base64-encodes it inline, which dominates the audit's run time on large meshes.
This writer follows the VTK XML file format (VTK User's Guide, "VTK File
Formats", XML formats) with the arrays in an ``AppendedData`` section in ``raw``
encoding (VTK's own default for appended data): each array is its UInt64 byte count
and its bytes, or, compressed at zlib level 1, the ``vtkZLibDataCompressor`` block
layout (a header of UInt64 words: number of blocks, block size, size of the last
block, compressed size of each block, then the compressed blocks).  Arrays are
compressed one at a time, block by block on all cores, straight from the caller's
memory; at level 0 (large meshes) nothing is compressed and the bytes are written
straight from the arrays.  The pieces go to a writer thread, so the file writes
(which release the GIL) overlap the making of the next array; a large uncompressed
file is written past the page cache (:mod:`meshcheck.bulkfile`).  Connectivity is
written as Int32 when the node count allows.

The arrays are appended in the reverse of their tags' order in the XML (the cells'
arrays first, the point data last).  meshio 5.3's reader of raw data converts the
arrays one after another in file order, renumbering each tag's offset as it goes and
finding the next tag by its offset text: a renumbered earlier tag can carry the text
of a later array's offset, and the first tag in document order with that text wins.
In reverse order every array's tag comes before the renumbered ones, so it is always
the one found.  Node orders are meshio's, which are VTK's.  The output is tested by
re-reading it with meshio and with VTK's own reader.
"""
from __future__ import annotations

import os
import queue
import threading
import zlib
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

from .bulkfile import BulkFile

__all__ = ["write_vtu", "Deferred", "Chunked", "VTK_CELL_TYPES"]

#: meshio cell type -> VTK cell type id (vtkCellType.h)
VTK_CELL_TYPES = {"triangle": 5, "quad": 9, "tetra": 10, "hexahedron": 12, "wedge": 13,
                  "pyramid": 14, "triangle6": 22, "quad8": 23, "tetra10": 24,
                  "hexahedron20": 25, "wedge15": 26, "quad9": 28, "hexahedron27": 29}
_VTK_TYPE = {np.dtype(np.int8): "Int8", np.dtype(np.uint8): "UInt8",
             np.dtype(np.int32): "Int32", np.dtype(np.int64): "Int64",
             np.dtype(np.float32): "Float32", np.dtype(np.float64): "Float64"}
_BLOCK = 1 << 21  # bytes per compressed block (blocks are compressed in parallel)
#: bytes per piece handed to the writer thread (1.5 MiB; with 3 MiB base64 pieces the
#: reports stage of the 1M-tet audit peaked 10 MiB higher, no faster)
_CHUNK = 3 << 19
_OFFSETS_CHUNK = 1 << 20  # cells whose offsets are made at a time
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


class Deferred:
    """A cell or point array made only when its turn to be written comes, then dropped
    (the report's arrays need not all be in memory at once).

    make : () -> (n,) or (n, ncomp) array of ``dtype`` (a type VTK names, not bool).
    """

    def __init__(self, make, dtype, ncomp: int = 1):
        self.make, self.dtype, self.ncomp = make, np.dtype(dtype), int(ncomp)
        if self.dtype not in _VTK_TYPE:
            raise ValueError(f"dtype {self.dtype} has no VTK name")

    def array(self, rows: int, name: str) -> np.ndarray:
        """The array, checked against the declared dtype, rows and components."""
        arr = _as_vtk(self.make())
        ncomp = 1 if arr.ndim == 1 else arr.shape[1]
        if arr.dtype != self.dtype or arr.shape[0] != rows or ncomp != self.ncomp:
            raise ValueError(f"deferred array {name!r} is {arr.dtype} {arr.shape}, declared "
                             f"{self.dtype} with {rows} rows and {self.ncomp} components")
        return arr


class Chunked(Deferred):
    """A 1-D array written a piece at a time (uncompressed files): ``part(lo, hi)`` makes
    its items lo..hi-1 (of ``dtype``); compressed files make it whole (``part(0, n)``)."""

    def __init__(self, part, dtype, n: int):
        super().__init__(lambda: part(0, n), dtype)
        self.part, self.n = part, int(n)

    def __len__(self) -> int:
        """Size in bytes."""
        return self.n * self.dtype.itemsize

    def __getitem__(self, span: slice) -> np.ndarray:
        """Bytes ``span`` (a slice with step 1) as a uint8 array, made from the items
        that hold them."""
        i, j, _ = span.indices(len(self))
        size = self.dtype.itemsize
        lo, hi = i // size, -(-j // size)
        got = np.ascontiguousarray(self.part(lo, hi), dtype=self.dtype)
        if got.shape != (hi - lo,):
            raise ValueError(f"chunk {lo}..{hi} has shape {got.shape}")
        return got.view(np.uint8)[i - lo * size:j - lo * size]


def _nbytes(values, rows: int) -> int:
    """Bytes of an array or of a :class:`Deferred` of ``rows`` rows."""
    if isinstance(values, Deferred):
        return rows * values.ncomp * values.dtype.itemsize
    return values.nbytes


def _raw(values):
    """The bytes of an array (a uint8 view) or of a :class:`Chunked` (itself)."""
    if isinstance(values, Chunked):
        return values
    return values.reshape(-1).view(np.uint8)


def quoteattr(data: str) -> str:
    """``xml.sax.saxutils.quoteattr`` (the same text; tested against it) without
    importing xml.sax, which pulls in urllib and http (35 ms per process)."""
    data = data.replace("&", "&amp;").replace(">", "&gt;").replace("<", "&lt;")
    data = data.replace("\n", "&#10;").replace("\r", "&#13;").replace("\t", "&#9;")
    if '"' in data:
        if "'" in data:
            return '"%s"' % data.replace('"', "&quot;")
        return "'%s'" % data
    return '"%s"' % data


def _tag(name: str, dtype: np.dtype, ncomp: int, slot: int) -> str:
    comps = f' NumberOfComponents="{ncomp}"' if ncomp > 1 else ""
    return (f'<DataArray type="{_VTK_TYPE[dtype]}" Name={quoteattr(name)}{comps} '
            f'format="appended" {_slot_text(slot)}/>\n')


def _slot_text(slot: int) -> str:
    """A placeholder of :data:`_SLOT` characters, later replaced by the offset attribute
    followed by blanks (whitespace inside a tag is legal XML; readers such as meshio
    compare the offset attribute as written, so it carries no padding itself)."""
    return f"@slot{slot}@".ljust(_SLOT, "@")


def _stored(values):
    """Raw pieces of one uncompressed array: its UInt64 byte count, then its bytes (an
    array's uint8 view, or the :class:`Chunked` itself, whose slices make its pieces)."""
    raw = _raw(values)
    yield np.array([len(raw)], dtype="<u8").tobytes()
    yield raw


def _deflated(arr: np.ndarray, level: int, pool):
    """Raw pieces of one array in the vtkZLibDataCompressor layout: the header, then the
    compressed blocks."""
    header, comp = _compressed(arr, level, pool)
    yield header
    yield from comp


def write_vtu(path: str | Path, points: np.ndarray, blocks: list[tuple[str, np.ndarray]],
              cell_data: dict[str, np.ndarray | Deferred] | None = None,
              point_data: dict[str, np.ndarray | Deferred] | None = None,
              level: int = 1) -> Path:
    """Write points (n, 3), cell blocks [(meshio type, (m, k) int)], and per-cell / per-point
    arrays (concatenated over the blocks, (n_cells,) or (n_cells, c)) as a .vtu file.
    ``level``: zlib level 1..9, or 0 for no compression (the file then has no compressor:
    each array is its UInt64 byte count and its bytes).

    The pieces are handed to a writer thread, so the file writes (which release the GIL)
    overlap the making and compressing of the next ones."""
    path = Path(path)
    points = np.asarray(points, dtype=np.float64)
    n_pts = len(points)
    idx = np.int32 if n_pts < 2**31 else np.int64
    n_conn = sum(np.asarray(c).size for _, c in blocks)
    n_cells = sum(len(c) for _, c in blocks)
    off_t = np.int32 if n_conn < 2**31 else np.int64

    # the cells' arrays are made when their turn comes (after the cell data), not held
    # while the other arrays are written; the connectivity a piece at a time (4.8M
    # tetrahedra: 73 MiB in Int32)
    flats = [np.ascontiguousarray(c).reshape(-1) for _, c in blocks]  # views, normally
    starts = np.cumsum([0] + [len(f) for f in flats])

    def connectivity(lo, hi):
        parts = []
        for flat, a, b in zip(flats, starts[:-1], starts[1:]):
            if a < hi and b > lo:
                parts.append(flat[max(lo - a, 0):min(hi, b) - a].astype(idx, copy=False))
        return parts[0] if len(parts) == 1 else (np.concatenate(parts) if parts else
                                                 np.zeros(0, idx))

    def offsets():
        out = np.empty(n_cells, off_t)
        at, end = 0, 0
        for _, c in blocks:
            k = np.asarray(c).shape[1]
            for lo in range(0, len(c), _OFFSETS_CHUNK):  # no (n_cells,) temporary
                hi = min(lo + _OFFSETS_CHUNK, len(c))
                out[at + lo:at + hi] = np.arange(end + k * (lo + 1), end + k * hi + 1, k,
                                                 dtype=off_t)
            at, end = at + len(c), end + k * len(c)
        return out

    codes = [VTK_CELL_TYPES[t] for t, _ in blocks]  # an unknown type fails before writing

    def types():
        return np.concatenate([np.full(len(c), code, np.uint8) for code, (_, c) in
                               zip(codes, blocks)]) if blocks else np.zeros(0, np.uint8)

    arrays: list[tuple[str, np.ndarray | Deferred, int]] = []  # (name, values, rows)
    comp = ' compressor="vtkZLibDataCompressor"' if level > 0 else ""
    xml = ['<?xml version="1.0"?>\n<VTKFile type="UnstructuredGrid" version="1.0" '
           f'byte_order="LittleEndian" header_type="UInt64"{comp}>\n'
           f'<UnstructuredGrid>\n<Piece NumberOfPoints="{n_pts}" '
           f'NumberOfCells="{n_cells}">\n']

    def add(name, values, ncomp, rows):
        if isinstance(values, Deferred):  # made when written
            xml.append(_tag(name, values.dtype, values.ncomp, len(arrays)))
        else:
            values = _as_vtk(values)
            xml.append(_tag(name, values.dtype, ncomp, len(arrays)))
        arrays.append((name, values, rows))

    for tag, data, n in (("PointData", point_data, n_pts), ("CellData", cell_data, n_cells)):
        if not data:
            continue
        xml.append(f"<{tag}>\n")
        for name, values in data.items():
            if not isinstance(values, Deferred):
                values = np.asarray(values)
                if values.shape[0] != n:
                    raise ValueError(f"{tag} array {name!r} has {values.shape[0]} rows, "
                                     f"expected {n}")
            add(name, values, 1 if isinstance(values, Deferred) or values.ndim == 1
                else values.shape[1], n)
        xml.append(f"</{tag}>\n")
    xml.append("<Points>\n")
    add("Points", points, 3, n_pts)
    xml.append("</Points>\n<Cells>\n")
    add("connectivity", Chunked(connectivity, idx, n_conn), 1, n_conn)
    add("offsets", Deferred(offsets, off_t), 1, n_cells)
    add("types", Deferred(types, np.uint8), 1, n_cells)
    xml.append('</Cells>\n</Piece>\n</UnstructuredGrid>\n<AppendedData encoding="raw">\n_')
    head = "".join(xml).encode("ascii")
    where = [head.index(_slot_text(k).encode()) for k in range(len(arrays))]
    # appended data in the reverse of the tags' order (see the module's notes): the cells'
    # arrays, the points, the cell data, then the point data, which is made late (e.g. a
    # field still being computed); each array is found by its offset
    order = list(range(len(arrays)))[::-1]
    head = bytearray(head)
    workers = max(1, min(os.cpu_count() or 1, 8))
    pending: queue.Queue = queue.Queue(maxsize=8)  # at most 8 pieces (12 MiB) in flight
    failed: list[BaseException] = []

    def drain(fh):
        try:
            while (piece := pending.get()) is not None:
                fh.write(piece)
        except BaseException as exc:  # reported by the producer
            failed.append(exc)

    def send(piece, writer):
        while writer.is_alive():
            try:
                pending.put(piece, timeout=0.1)
                return
            except queue.Full:
                continue
        raise failed[0] if failed else OSError(f"the writer of {path} stopped")

    # an uncompressed file's size is known: large ones go past the page cache (bulkfile)
    tail = b"\n</AppendedData>\n</VTKFile>\n"
    size = (len(head) + len(tail) + sum(8 + _nbytes(v, rows) for _, v, rows in arrays)
            if level == 0 else 0)
    with BulkFile(path, size) as fh, ThreadPoolExecutor(max_workers=workers) as pool:
        fh.write(head)
        writer = threading.Thread(target=drain, args=(fh,), daemon=True)
        writer.start()
        try:
            at = 0
            for k in order:
                name, values, rows = arrays[k]
                head[where[k]:where[k] + _SLOT] = f'offset="{at}"'.ljust(_SLOT).encode()
                if isinstance(values, Deferred) and not (level == 0 and
                                                         isinstance(values, Chunked)):
                    values = values.array(rows, name)
                stream = _deflated(values, level, pool) if level > 0 else _stored(values)
                for piece in stream:
                    # sent :data:`_CHUNK` bytes at a time, so that the queue holds little of
                    # an array (a Chunked makes each slice when it is taken)
                    for i in range(0, len(piece), _CHUNK):
                        send(piece[i:i + _CHUNK], writer)
                    at += len(piece)
                # dropped before the next array is made: freed once its last pieces are
                # written (not held beside the next one)
                values = stream = piece = None
        finally:
            while writer.is_alive():  # the end mark, unless the writer stopped
                try:
                    pending.put(None, timeout=0.1)
                    break
                except queue.Full:
                    continue
            writer.join()
        if failed:
            raise failed[0]
        fh.write(tail)
        fh.pwrite(head, 0)  # the offsets, now known (same length as before)
    return path
