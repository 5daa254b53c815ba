"""gmsh MSH 4.1 (binary, either byte order, and ASCII): a vectorised reader of our own.

Layout (gmsh reference manual, "MSH file format", version 4.1): sections
``$Name`` ... ``$EndName``; ``$MeshFormat`` gives ``4.1 file-type data-size``
(binary files follow it with the int 1 written in the file's byte order);
``$PhysicalNames`` is always text; ``$Entities`` lists points, curves,
surfaces and volumes with their physical tags; ``$Nodes`` and ``$Elements``
are blocks of one entity each (a header, then the node tags and the
coordinates / the element rows ``tag node...`` of one element type).

The hot path never loops over nodes or elements in Python: a block is read
into a numpy array straight from the file (binary) or parsed by
``np.fromstring`` chunk by chunk (ASCII, each line checked to hold exactly
the numbers its element type needs), node tags are turned into 0-based
rows by one lookup, and gmsh's node orders are permuted to meshio/VTK's by
column indexing.  Memory: the final arrays (points, node tags, cells and
region tags) plus one node block or one chunk of elements (1 MiB binary, up to
8 MiB of text); the input is only opened for reading.

The result is the RawMesh that :mod:`.via_meshio` makes of the same file
(points in file order, every node kept; one block per element block;
region = the first physical tag of the block's entity in ``$Entities``,
0 when it has none; names from ``$PhysicalNames`` of the model's
dimension; lines and vertices counted as ignored).  Partitioned meshes
(``$PartitionedEntities``, which meshio 5.3.5 cannot read) take the region of
each partition entity from its own physical tags, else its parent's; ghost
cells are refused.  :func:`read_msh41` returns None, so that the caller uses
meshio, for any version other than 4.1.
"""
from __future__ import annotations

import os
import shlex
import struct
from pathlib import Path

import numpy as np

from ..cells import CELL_TYPES
from ..errors import MeshReadError
from .ids import index_of
from .raw import RawBlock, RawMesh, clean_name

__all__ = ["read_msh41", "GMSH_TYPES", "GMSH_TO_VTK"]

#: gmsh element type -> (meshio name, nodes per element) (the table meshio 5.3.5 uses)
GMSH_TYPES: dict[int, tuple[str, int]] = {
    1: ("line", 2), 2: ("triangle", 3), 3: ("quad", 4), 4: ("tetra", 4), 5: ("hexahedron", 8),
    6: ("wedge", 6), 7: ("pyramid", 5), 8: ("line3", 3), 9: ("triangle6", 6), 10: ("quad9", 9),
    11: ("tetra10", 10), 12: ("hexahedron27", 27), 13: ("wedge18", 18), 14: ("pyramid14", 14),
    15: ("vertex", 1), 16: ("quad8", 8), 17: ("hexahedron20", 20), 18: ("wedge15", 15),
    19: ("pyramid13", 13), 21: ("triangle10", 10), 23: ("triangle15", 15),
    25: ("triangle21", 21), 26: ("line4", 4), 27: ("line5", 5), 28: ("line6", 6),
    29: ("tetra20", 20), 30: ("tetra35", 35), 31: ("tetra56", 56), 36: ("quad16", 16),
    37: ("quad25", 25), 38: ("quad36", 36), 42: ("triangle28", 28), 43: ("triangle36", 36),
    44: ("triangle45", 45), 45: ("triangle55", 55), 46: ("triangle66", 66),
    47: ("quad49", 49), 48: ("quad64", 64), 49: ("quad81", 81), 50: ("quad100", 100),
    51: ("quad121", 121), 62: ("line7", 7), 63: ("line8", 8), 64: ("line9", 9),
    65: ("line10", 10), 66: ("line11", 11), 71: ("tetra84", 84), 72: ("tetra120", 120),
    73: ("tetra165", 165), 74: ("tetra220", 220), 75: ("tetra286", 286), 90: ("wedge40", 40),
    91: ("wedge75", 75), 92: ("hexahedron64", 64), 93: ("hexahedron125", 125),
    94: ("hexahedron216", 216), 95: ("hexahedron343", 343), 96: ("hexahedron512", 512),
    97: ("hexahedron729", 729), 98: ("hexahedron1000", 1000), 106: ("wedge126", 126),
    107: ("wedge196", 196), 108: ("wedge288", 288), 109: ("wedge405", 405),
    110: ("wedge550", 550)}

#: column j of a meshio/VTK-ordered cell is gmsh's node GMSH_TO_VTK[type][j] (the other
#: types are in the same order in both); the tables meshio 5.3.5 applies (tested equal)
GMSH_TO_VTK: dict[str, list[int]] = {
    "tetra10": [0, 1, 2, 3, 4, 5, 6, 7, 9, 8],
    "hexahedron20": [0, 1, 2, 3, 4, 5, 6, 7, 8, 11, 13, 9, 16, 18, 19, 17, 10, 12, 14, 15],
    "hexahedron27": [0, 1, 2, 3, 4, 5, 6, 7, 8, 11, 13, 9, 16, 18, 19, 17, 10, 12, 14, 15,
                     22, 23, 21, 24, 20, 25, 26],
    "wedge15": [0, 1, 2, 3, 4, 5, 6, 9, 7, 12, 14, 13, 8, 10, 11],
    "pyramid13": [0, 1, 2, 3, 4, 5, 8, 10, 6, 7, 9, 11, 12],
}

#: types refused as the meshio path refuses them (meshio 5.3.5 cannot build a mesh of them;
#: tests/test_formats_roundtrip.py pins the message for wedge15)
_REFUSED = {"wedge15", "pyramid13"}
#: types dropped by the meshio path (counted as ignored, no block)
_DROPPED = ("vertex", "line", "triangle", "quad")
FORMAT = "gmsh MSH"
#: bytes read at a time for ASCII blocks; binary element rows converted at a time
_CHUNK = 1 << 23
_ELEMENT_CHUNK = 1 << 20
#: binary element blocks of this many elements or more are read on two threads
_PARALLEL_ELEMENTS = 200_000
#: end-of-line marker put into ASCII chunks of integers to check the numbers on each line
_INT_MARK = -1


class _Fallback(Exception):
    """The file needs meshio's reader (a version other than 4.1)."""


class _Src:
    """The open file, its path and size, the byte order and size_t of a binary MSH file."""

    def __init__(self, path: Path, fh, size: int):
        self.path, self.fh, self.size = path, fh, size
        self.binary = False
        self.endian = "<"
        self.dsize = 8
        self.section = ""

    @property
    def st(self) -> np.dtype:
        return np.dtype(f"{self.endian}u{self.dsize}")

    def fail(self, what: str, fix: str = "the file is damaged - export it again"):
        raise MeshReadError(f"{self.path}: {what}; {fix}")

    def short(self, what: str):
        """The data of the current section stop early: truncated file or a wrong count."""
        sec = self.section
        if not self._found_later(f"$End{sec}".encode()):
            self.fail(f"the ${sec} section has no $End{sec}", "the file is truncated - export "
                      "it again")
        self.fail(f"the ${sec} section holds less data than it declares ({what})",
                  "the file is truncated or damaged - export it again")

    def _found_later(self, tag: bytes) -> bool:
        pos, fh = self.fh.tell(), self.fh
        try:
            tail = b""
            while True:
                buf = fh.read(1 << 22)
                if not buf:
                    return False
                if tag in tail + buf:
                    return True
                tail = buf[-len(tag):]
        finally:
            fh.seek(pos)

    def remaining(self) -> int:
        return self.size - self.fh.tell()

    def line(self) -> bytes:
        """Next line, stripped (b"" at the end of the file)."""
        return self.fh.readline(1 << 16).strip()

    def content_line(self) -> bytes:
        """Next non-blank line; a missing one means the section is cut short."""
        while True:
            raw = self.fh.readline(1 << 16)
            if not raw or (not raw.endswith(b"\n") and len(raw) < 1 << 16):
                self.short("the file ends")
            s = raw.strip()
            if s:
                return s

    def ints(self, line: bytes, n: int, what: str) -> list[int]:
        parts = line.split()
        if len(parts) != n:
            self.fail(f"the ${self.section} section: {what} has {len(parts)} numbers where "
                      f"{n} are expected ('{clean_name(line[:60])}')")
        try:
            return [int(p) for p in parts]
        except ValueError:
            self.fail(f"the ${self.section} section: {what} '{clean_name(line[:60])}' is not "
                      "made of integers")

    def read(self, n: int, what: str) -> bytes:
        data = self.fh.read(n)
        if len(data) != n:
            self.short(what)
        return data

    def unpack(self, fmt: str, what: str) -> tuple:
        fmt = self.endian + fmt.replace("N", "Q" if self.dsize == 8 else "I")
        return struct.unpack(fmt, self.read(struct.calcsize(fmt), what))

    def header(self, what: str) -> list[int]:
        """numEntityBlocks numItems minTag maxTag (size_t x 4) of $Nodes / $Elements."""
        if self.binary:
            return list(self.unpack("NNNN", what))
        return self.ints(self.content_line(), 4, what)

    def header_n(self, n: int, what: str) -> list[int]:
        """n size_t numbers (binary) or one line of n integers (ASCII)."""
        if self.binary:
            return list(self.unpack("N" * n, what))
        return self.ints(self.content_line(), n, what)

    def block_header(self, what: str) -> list[int]:
        """entityDim entityTag third(int) count(size_t) of a node or element block."""
        if self.binary:
            return list(self.unpack("iiiN", what))
        return self.ints(self.content_line(), 4, what)

    def end(self):
        """The section's $End line must come next (nothing more than declared before it)."""
        sec = self.section
        while True:
            raw = self.fh.readline(1 << 16)
            if not raw:
                self.short("the file ends")
            s = raw.strip()
            if s:
                break
        end = f"$End{sec}".encode()
        if s != end and end.startswith(s) and not self.fh.read(1):
            self.short("the file ends in the $End line")
        if s != end:
            self.fail(f"the ${sec} section holds more than its counts declare (found "
                      f"'{clean_name(s[:40])}' where $End{sec} is expected)")

    def rows(self, n: int, w: int, dtype, what: str) -> np.ndarray:
        """(n, w) array of the next n rows of w numbers (binary: of ``dtype`` in file byte
        order, returned as read; ASCII: n lines of exactly w numbers, int64 or float64)."""
        if self.binary:
            dt = np.dtype(dtype).newbyteorder(self.endian)
            out = np.empty((n, w), dt)
            need = out.nbytes
            if need > self.remaining():
                self.short(f"{what}: {need:,} bytes needed, {self.remaining():,} left")
            got = self.fh.readinto(memoryview(out).cast("B")) if need else 0
            if got != need:
                self.short(what)
            return out
        kind = np.float64 if np.dtype(dtype).kind == "f" else np.int64
        if n * (2 * w) > self.remaining():
            self.short(f"{what}: {n:,} lines of {w} numbers declared, "
                       f"{self.remaining():,} bytes left")
        out = np.empty((n, w), kind)
        done = 0
        while done < n:
            want = min(_CHUNK, max(4096, (n - done) * w * 26))
            buf = self.fh.read(want)
            if not buf:
                self.short(f"{what}: {done:,} of {n:,} lines found")
            nl = np.flatnonzero(np.frombuffer(buf, np.uint8) == 10)
            if not len(nl):
                if len(buf) < want:
                    self.short(f"{what}: {done:,} of {n:,} lines found")
                self.fail(f"the ${self.section} section has a line longer than {want:,} bytes")
            take = min(n - done, len(nl))
            stop = int(nl[take - 1]) + 1
            self.fh.seek(stop - len(buf), 1)
            out[done:done + take] = self._parse(buf[:stop], take, w, kind, what, done)
            done += take
        return out

    def _parse(self, text: bytes, m: int, w: int, kind, what: str, first: int) -> np.ndarray:
        """m lines of w numbers each, every line checked, so that a line with a number too
        many or too few cannot shift the others: integers are parsed with a marker -1 put
        at the end of every line (tags are positive), reals after counting the numbers on
        each line (a marker would cost as much as a coordinate to parse)."""
        if kind is np.float64:
            per = _numbers_per_line(text)
            if (per != w).any():
                self._misaligned(per, w, what, first)
            vals = self._fromstring(text, kind, what, first, m)
            if vals.size == m * w:
                return vals.reshape(m, w)
            self.fail(f"the ${self.section} section: {what} hold text that is not a number "
                      f"(lines {first + 1:,} to {first + m:,} of the block)")
        vals = self._fromstring(text.replace(b"\n", b" -1\n"), kind, what, first, m)
        if vals.size == m * (w + 1):
            vals = vals.reshape(m, w + 1)
            if (vals[:, w] == _INT_MARK).all():
                return vals[:, :w]
        self._misaligned(_numbers_per_line(text), w, what, first)

    def _fromstring(self, text: bytes, kind, what: str, first: int, m: int) -> np.ndarray:
        try:
            return np.fromstring(text, dtype=kind, sep=" ")
        except ValueError:
            self.fail(f"the ${self.section} section: {what} hold text that is not a number "
                      f"(lines {first + 1:,} to {first + m:,} of the block)")

    def _misaligned(self, per: np.ndarray, w: int, what: str, first: int):
        bad = np.flatnonzero(per != w)
        i = int(bad[0]) if bad.size else 0
        self.fail(f"the ${self.section} section: line {first + i + 1:,} of {what} holds "
                  f"{int(per[i]) if bad.size else '?'} numbers where {w} are expected",
                  "the file is damaged or misaligned - export it again")


def _numbers_per_line(text: bytes) -> np.ndarray:
    """Whitespace-separated words on each line of ``text`` (which ends with a newline)."""
    x = np.frombuffer(text, np.uint8)
    ws = x <= 32
    starts = np.flatnonzero(ws[:-1] & ~ws[1:]) + 1
    if len(x) and not ws[0]:
        starts = np.concatenate(([0], starts))
    return np.diff(np.searchsorted(starts, np.flatnonzero(x == 10)), prepend=0)


def read_msh41(path: Path) -> RawMesh | None:
    """Read a gmsh MSH 4.1 file (binary or ASCII) as a RawMesh (file units), or None when
    the file needs meshio's reader (another version)."""
    path = Path(path)
    size = path.stat().st_size
    with open(path, "rb") as fh:
        src = _Src(path, fh, size)
        try:
            return _read(src)
        except _Fallback:
            return None


def _read(src: _Src) -> RawMesh:
    _mesh_format(src)
    field: dict[str, tuple[int, int]] = {}
    phys: dict[tuple[int, int], int] = {}
    nodes = elements = None
    while True:
        raw = src.fh.readline(1 << 16)
        if not raw:
            break
        line = raw.strip()
        if not line:
            continue
        if not line.startswith(b"$"):
            src.fail(f"'{clean_name(line[:40])}' found between sections (a section starts "
                     "with a $Name line)")
        name = line[1:].decode("latin-1").strip()
        src.section = name
        if name == "PartitionedEntities":
            phys.update(_partitioned_entities(src, phys))
        elif name == "PhysicalNames":
            field.update(_physical_names(src))
        elif name == "Entities":
            phys.update(_entities(src))
        elif name == "Nodes":
            if nodes is not None:
                src.fail("a second $Nodes section")
            nodes = _nodes(src)
        elif name == "Elements":
            if nodes is None:
                src.fail("the $Elements section comes before the $Nodes section")
            if elements is not None:
                src.fail("a second $Elements section")
            elements = _elements(src, nodes[1])
        else:
            _skip(src, name)
    if nodes is None or elements is None:
        src.fail(f"no ${'Nodes' if nodes is None else 'Elements'} section",
                 "the file is truncated or holds no mesh - export it again")
    return _raw(src, nodes, elements, field, phys)


def _mesh_format(src: _Src):
    fh = src.fh
    line = fh.readline(1 << 16)
    if line.startswith(b"\xef\xbb\xbf"):
        line = line[3:]
    while line and not line.strip():
        line = fh.readline(1 << 16)
    src.section = "MeshFormat"
    if line.strip() != b"$MeshFormat":
        src.fail("the file does not start with $MeshFormat", "export the mesh from gmsh again")
    fields = src.line().split()
    if len(fields) != 3 or fields[0] != b"4.1":
        raise _Fallback
    if fields[1] not in (b"0", b"1") or fields[2] not in (b"4", b"8"):
        src.fail(f"$MeshFormat header '{clean_name(b' '.join(fields))}' is damaged (file type "
                 "0 or 1, data size 4 or 8 expected)", "export the mesh from gmsh again")
    src.binary, src.dsize = fields[1] == b"1", int(fields[2])
    if src.binary:
        one = fh.read(4)
        if one == b"\x01\x00\x00\x00":
            src.endian = "<"
        elif one == b"\x00\x00\x00\x01":
            src.endian = ">"
        else:
            src.fail("binary $MeshFormat without the byte-order integer 1 after the version "
                     "line", "the file is damaged - export the mesh from gmsh again")
    src.end()


def _skip(src: _Src, name: str):
    """Skip a section this reader does not use (to its $End line, as gmsh says to)."""
    end = f"$End{name}".encode()
    while True:
        raw = src.fh.readline()
        if not raw:
            src.short("the file ends")
        if raw.strip() == end:
            return


def _physical_names(src: _Src) -> dict[str, tuple[int, int]]:
    """name -> (tag, dim), later entries of a name replacing earlier ones (as meshio)."""
    (n,) = src.ints(src.content_line(), 1, "the number of names")
    out = {}
    for i in range(n):
        line = src.content_line()
        try:
            parts = shlex.split(line.decode("utf-8", errors="replace"))
            dim, tag = int(parts[0]), int(parts[1])
            out[parts[2]] = (tag, dim)
        except (ValueError, IndexError):
            src.fail(f"the $PhysicalNames section: line {i + 2} '{clean_name(line[:60])}' is "
                     "not 'dimension tag \"name\"'")
    src.end()
    return out


def _entities(src: _Src) -> dict[tuple[int, int], int]:
    """(dim, entity tag) -> first physical tag, for the entities that have one."""
    counts = src.header("the entity counts")
    if src.binary:
        per = 8 * 3 + 4 + src.dsize
        if sum(counts) * per > src.remaining() or min(counts) < 0:
            src.short(f"{sum(counts):,} entities declared")
    elif sum(counts) * 8 > src.remaining() or min(counts) < 0:
        src.short(f"{sum(counts):,} entities declared")
    out = {}
    for dim, n in enumerate(counts):
        for _ in range(n):
            if src.binary:
                (tag,) = src.unpack("i", "an entity")
                src.read(8 * (3 if dim == 0 else 6), "an entity box")
                (nphys,) = src.unpack("N", "an entity")
                if nphys * 4 > src.remaining():
                    src.short(f"an entity with {nphys:,} physical tags")
                tags = src.unpack(f"{nphys}i", "physical tags") if nphys else ()
                if dim:
                    (nb,) = src.unpack("N", "an entity")
                    if nb * 4 > src.remaining():
                        src.short(f"an entity with {nb:,} bounding entities")
                    src.read(4 * nb, "bounding entities")
            else:
                parts = src.content_line().split()
                k = 4 if dim == 0 else 7
                try:
                    tag, nphys = int(parts[0]), int(parts[k])
                    tags = [int(p) for p in parts[k + 1:k + 1 + nphys]]
                    if len(tags) != nphys:
                        raise ValueError
                    if dim:
                        nb = int(parts[k + 1 + nphys])
                        if len(parts) != k + 2 + nphys + nb:
                            raise ValueError
                    elif len(parts) != k + 1 + nphys:
                        raise ValueError
                except (ValueError, IndexError):
                    src.fail(f"the $Entities section: the line of a dimension-{dim} entity "
                             f"'{clean_name(b' '.join(parts)[:60])}' does not hold what its "
                             "counts declare")
            if nphys:
                out[(dim, int(tag))] = int(tags[0])
    src.end()
    return out


def _partitioned_entities(src: _Src, model: dict) -> dict[tuple[int, int], int]:
    """(dim, tag) -> first physical tag of the entities of a partitioned mesh (their own
    physical tags, else those of their parent entity in ``model``).  Ghost cells would
    be counted twice: refused."""
    (_,) = src.header_n(1, "the number of partitions")
    (ghosts,) = src.header_n(1, "the number of ghost entities")
    if ghosts:
        src.fail(f"partitioned mesh with {ghosts} ghost entities (their cells are copies)",
                 "save it without ghost cells (Mesh.PartitionCreateGhostCells = 0) or "
                 "unpartitioned")
    counts = src.header("the entity counts")
    if min(counts) < 0 or sum(counts) * (3 * 4 + 2 * src.dsize + 24) > src.remaining():
        src.short(f"{sum(counts):,} entities declared")
    out = {}
    for dim, n in enumerate(counts):
        for _ in range(n):
            if src.binary:
                tag, pdim, ptag = src.unpack("iii", "a partitioned entity")
                (npart,) = src.unpack("N", "a partitioned entity")
                if 4 * npart > src.remaining():
                    src.short(f"an entity in {npart:,} partitions")
                src.read(4 * npart, "partition numbers")
                src.read(8 * (3 if dim == 0 else 6), "an entity box")
                tags = _binary_list(src, "physical tags")
                if dim:
                    _binary_list(src, "bounding entities")
            else:
                parts = src.content_line().split()
                try:
                    tag, pdim, ptag, npart = (int(p) for p in parts[:4])
                    k = 4 + npart + (3 if dim == 0 else 6)
                    nphys = int(parts[k])
                    tags = [int(p) for p in parts[k + 1:k + 1 + nphys]]
                    rest = parts[k + 1 + nphys:]
                    if len(tags) != nphys or (len(rest) != (1 + int(rest[0]) if dim else 0)):
                        raise ValueError
                except (ValueError, IndexError):
                    src.fail(f"the $PartitionedEntities section: the line of a dimension-{dim}"
                             f" entity '{clean_name(b' '.join(parts)[:60])}' does not hold "
                             "what its counts declare")
            if len(tags):
                out[(dim, int(tag))] = int(tags[0])
            elif (pdim, ptag) in model:
                out[(dim, int(tag))] = model[(pdim, ptag)]
    src.end()
    return out


def _binary_list(src: _Src, what: str) -> tuple:
    """A size_t count and that many ints (binary)."""
    (n,) = src.unpack("N", what)
    if n * 4 > src.remaining():
        src.short(f"{n:,} {what}")
    return src.unpack(f"{n}i", what) if n else ()


def _nodes(src: _Src):
    """(points (n, 3) float64 in file order, tags (n,) int64)."""
    nb, n, _, _ = src.header("the $Nodes header")
    if nb < 0 or n < 0 or n * (src.dsize + 24 if src.binary else 8) > src.remaining():
        src.short(f"{n:,} nodes in {nb:,} blocks declared, {src.remaining():,} bytes left")
    points = np.empty((n, 3), np.float64)
    tags = np.empty(n, np.int64)
    at = 0
    for b in range(nb):
        what = f"node block {b + 1} of {nb}"
        dim, _, parametric, m = src.block_header(what)
        if not 0 <= dim <= 3 or parametric not in (0, 1) or m < 0:
            src.fail(f"the $Nodes section: {what} has a damaged header (entity dimension "
                     f"{dim}, parametric {parametric}, {m} nodes)")
        if at + m > n:
            src.fail(f"the $Nodes section: its blocks hold more than the {n:,} nodes its "
                     "header declares")
        t = src.rows(m, 1, src.st, f"the node tags of {what}")
        tags[at:at + m] = t[:, 0]
        w = 3 + (dim if parametric else 0)
        xyz = src.rows(m, w, np.float64, f"the coordinates of {what}")
        points[at:at + m] = xyz[:, :3]
        at += m
        del t, xyz
    if at != n:
        src.fail(f"the $Nodes section: its blocks hold {at:,} nodes, its header declares {n:,}")
    src.end()
    return points, tags


def _node_lookup(src: _Src, tags: np.ndarray):
    """Function (q, out) -> bool: writes the 0-based rows of the node tags ``q`` (r, k)
    into ``out`` (r, k) int64 and tells whether every tag is a node (else out < 0 there).

    Tags 1..n in file order (gmsh's usual numbering) need no table; other tags go
    through :func:`.ids.index_of` (a lookup table, or a binary search for huge tags)."""
    n = len(tags)
    if n and tags[0] == 1 and tags[-1] == n and (np.diff(tags) == 1).all():
        def look(q, out):
            np.subtract(q, 1, out=out, casting="unsafe")    # tag 0 or > 2**63: negative
            if out.size and (out.min() < 0 or out.max() >= n):
                out[out >= n] = -1
                return False
            return True
        return look
    if n and int(tags.min()) < 1:
        src.fail(f"the $Nodes section has node tag {int(tags.min())} (tags start at 1)")
    srt = np.sort(tags)
    dup = np.flatnonzero(srt[1:] == srt[:-1])
    if dup.size:
        src.fail(f"the $Nodes section has node tag {int(srt[dup[0]])} twice")
    find = index_of(tags)

    def look(q, out):
        out[...] = find(q.astype(np.int64))           # tags > 2**63 turn negative: -1
        return not out.size or out.min() >= 0
    return look


def _elements(src: _Src, tags: np.ndarray):
    """[(meshio type, entity tag, (m, k) node rows in meshio order or None)] per block:
    rows int32 unless the nodes need int64, None for the types dropped unread-into-memory
    (vertices, lines)."""
    nb, n, _, _ = src.header("the $Elements header")
    if nb < 0 or n < 0 or n * (2 * src.dsize if src.binary else 4) > src.remaining():
        src.short(f"{n:,} elements in {nb:,} blocks declared, {src.remaining():,} bytes left")
    look = _node_lookup(src, tags)
    itype = np.int32 if len(tags) <= 2**31 - 1 else np.int64
    blocks = []
    total = 0
    for b in range(nb):
        what = f"element block {b + 1} of {nb}"
        _, etag, etype, m = src.block_header(what)
        if etype not in GMSH_TYPES or m < 0:
            if etype not in GMSH_TYPES:
                src.fail(f"the $Elements section: {what} has element type {etype}, which is "
                         "not a gmsh element type", "the file is damaged - export it again")
            src.fail(f"the $Elements section: {what} declares {m} elements")
        name, k = GMSH_TYPES[etype]
        if name in _REFUSED:
            src.fail(f"element type {name} cannot be read from this format (quadratic wedges "
                     "and pyramids in .msh files are not supported)",
                     "export linear or quadratic tetrahedra, hexahedra, wedges or 5-node "
                     "pyramids (quadratic wedges as .bdf, .inp or .unv)")
        total += m
        if total > n:
            src.fail(f"the $Elements section: its blocks hold more than the {n:,} elements "
                     "its header declares")
        if m * (k + 1) * (src.dsize if src.binary else 2) > src.remaining():
            src.short(f"{what} declares {m:,} elements of {k} nodes, {src.remaining():,} "
                      "bytes left")
        keep = not name.startswith(("vertex", "line"))
        perm = GMSH_TO_VTK.get(name)
        cols = slice(1, None) if perm is None else 1 + np.asarray(perm)
        # node rows in int32 when every row number fits (the mesh's own index type),
        # looked up chunk by chunk in int64 so that no tag wraps into a valid row
        out = np.empty((m, k), itype) if keep else None
        step = max(1, _ELEMENT_CHUNK // (8 * (k + 1)))
        if keep and src.binary and m >= _PARALLEL_ELEMENTS and _parallel_block(
                src, m, k, cols, perm, look, out, step, what):
            blocks.append((name, etag, out, m))
            continue
        for lo in range(0, m, step):
            hi = min(m, lo + step)
            data = src.rows(hi - lo, k + 1, src.st, f"the elements of {what}")
            rows = out[lo:hi] if keep and itype == np.int64 else np.empty((hi - lo, k), np.int64)
            if not look(data[:, cols], rows):
                i, j = np.argwhere(rows < 0)[0]
                src.fail(f"element {int(data[i, 0])} (in {what}) refers to node "
                         f"{int(data[i, 1:][j] if perm is None else data[i, cols[j]])}, which "
                         "is not in the $Nodes section")
            if keep and itype != np.int64:
                out[lo:hi] = rows
            del data, rows
        blocks.append((name, etag, out, m))
    if total != n:
        src.fail(f"the $Elements section: its blocks hold {total:,} elements, its header "
                 f"declares {n:,}")
    src.end()
    return blocks


def _parallel_block(src: _Src, m: int, k: int, cols, perm, look, out: np.ndarray, step: int,
                    what: str) -> bool:
    """The m rows of a binary element block into ``out``, in two halves on two threads,
    each reading its chunks at their places in the file (``os.preadv``: no shared file
    position) and looking their node tags up (numpy releases the GIL in both); then the
    file is positioned after the block. The same rows and the same errors as the chunk
    loop of :func:`_elements` (the first bad chunk in file order is reported). False
    (nothing read) where there is one core or no ``preadv``."""
    from ..threads import MAX_WORKERS, ranges, thread_map

    if MAX_WORKERS < 2 or (os.cpu_count() or 1) < 2 or not hasattr(os, "preadv"):
        return False
    fd = src.fh.fileno()
    start = src.fh.tell()  # (the buffered reader's position: where the block's rows begin)
    row = (k + 1) * src.dsize
    dt = np.dtype(src.st)

    def half(r):
        for lo in range(r[0], r[1], step):
            hi = min(r[1], lo + step)
            data = np.empty((hi - lo, k + 1), dt)
            mv = memoryview(data).cast("B")
            got = 0
            while got < len(mv):
                n = os.preadv(fd, [mv[got:]], start + lo * row + got)
                if n <= 0:
                    return ("short", lo, None, None)
                got += n
            rows = out[lo:hi] if out.dtype == np.int64 else np.empty((hi - lo, k), np.int64)
            if not look(data[:, cols], rows):
                return ("bad", lo, data, rows)
            if out.dtype != np.int64:
                out[lo:hi] = rows
        return None

    found = [x for x in thread_map(half, ranges(m, 2)) if x is not None]
    src.fh.seek(start + m * row)
    if found:
        kind, _, data, rows = found[0]  # the first half's error comes first in the file
        if kind == "short":
            src.short(f"the elements of {what}")
        i, j = np.argwhere(rows < 0)[0]
        src.fail(f"element {int(data[i, 0])} (in {what}) refers to node "
                 f"{int(data[i, 1:][j] if perm is None else data[i, cols[j]])}, which "
                 "is not in the $Nodes section")
    return True


def _raw(src: _Src, nodes, elements, field, phys) -> RawMesh:
    points, tags = nodes
    blocks, ignored = [], {}
    for name, etag, cells, m in elements:
        info = CELL_TYPES.get(name)
        if info is None:
            ignored[name] = ignored.get(name, 0) + m
            if not name.startswith(_DROPPED):
                blocks.append(RawBlock(name, cells, np.zeros(m, np.int64)))
            continue
        # one tag per entity: a read-only broadcast (a filled (m,) int64 array was 36 MiB
        # of new memory at 4.77M cells, then found uniform and dropped)
        tag = np.int64(phys.get((info.dim, int(etag)), 0))
        blocks.append(RawBlock(name, cells, np.broadcast_to(tag, (m,)), in_range=True))
    vol = any(CELL_TYPES.get(name) is not None and CELL_TYPES[name].dim == 3
              for name, *_ in elements)
    dim_model = 3 if vol else 2
    names = {tag: clean_name(nm) for nm, (tag, dim) in field.items() if dim == dim_model}
    detail = f"MSH 4.1 {'binary' if src.binary else 'ASCII'}"
    return RawMesh(points=points, blocks=tuple(blocks), region_names=names,
                   format=f"{FORMAT} ({detail})", point_ids=tags, ignored=ignored)
