"""Formats read through meshio (gmsh, VTK, Exodus, MED, CGNS, XDMF, Medit), guarded.

meshio 5.3.5 is called reader by reader (not ``meshio.read``, which prints
and exits); its output is captured and every failure becomes one
MeshReadError.  Before the call the declared sizes are checked against the
file size (a damaged or hostile header cannot make it allocate more than
the file can hold); after it, the declared counts are compared with what
was read.  Known misread fixed here: for MSH 4 files whose entities do not
all carry a physical group, meshio's ``gmsh:physical`` list is shorter than
the list of cell blocks and shifted; region tags are rebuilt from each
block's entity tag and the ``$Entities`` section instead.
"""
from __future__ import annotations

import contextlib
import importlib.util
import io
import mmap
import re
import shutil
import tempfile
from pathlib import Path

import numpy as np

from ..errors import MeshReadError
from .prescan import gmsh_counts, vtk_counts, vtu_counts
from .raw import RawBlock, RawMesh, clean_name

__all__ = ["read_via_meshio", "OPTIONAL_PACKAGES"]

#: reader -> (Python package it needs, human name of the format)
OPTIONAL_PACKAGES = {"exodus": ("netCDF4", "Exodus II"), "med": ("h5py", "MED"),
                     "cgns": ("h5py", "CGNS"), "xdmf": ("h5py", "XDMF")}
_NAMES = {"gmsh": "gmsh MSH", "vtu": "VTK XML", "vtk": "legacy VTK", "exodus": "Exodus II",
          "med": "MED", "cgns": "CGNS", "xdmf": "XDMF", "medit": "Medit"}
#: cell-data keys that carry region tags, in order of preference
_REGION_KEYS = ("gmsh:physical", "medit:ref", "nastran:ref", "CellEntityIds", "cell_tags",
                "region", "regions", "material", "ele_tag", "flac3d:zone")
#: a compressed VTU may expand this much (zlib's largest ratio is about 1032:1)
_ZLIB_RATIO = 1100


def cell_data_region(cell_data: dict, block: int, n_blocks: int, n: int) -> np.ndarray | None:
    """(n,) int64 region tags of cell block ``block`` from a meshio ``cell_data`` dict:
    the first of the usual region keys holding one number per cell; None if none does."""
    for key in _REGION_KEYS:
        values = (cell_data or {}).get(key)
        if values is not None and len(values) == n_blocks:
            arr = np.asarray(values[block]).reshape(-1)
            if arr.shape[0] == n and np.issubdtype(arr.dtype, np.number):
                return arr.astype(np.int64)
    return None


def field_data_names(field_data: dict, dim: int | None = None) -> dict[int, str]:
    """Region tag -> name from meshio ``field_data`` ({name: [tag, dim]}); entries of
    another dimension than ``dim`` (when given and recorded) are skipped."""
    names = {}
    for name, value in (field_data or {}).items():
        arr = np.asarray(value).reshape(-1)
        if arr.size and np.issubdtype(arr.dtype, np.integer):
            if dim is not None and arr.size >= 2 and int(arr[1]) != dim:
                continue
            names[int(arr[0])] = clean_name(str(name))
    return names


def _declared_guard(path: Path, kind: str, size: int) -> dict:
    """Declared counts from the header; refuse counts the file size cannot hold."""
    counts = {}
    if size == 0:
        return counts
    with open(path, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as mm:
        if kind == "gmsh":
            sec = {}
            e = mm.find(b"\n")
            sec["version"] = mm[e + 1:mm.find(b"\n", e + 1)]
            binary = b" 1 " in sec["version"] + b" "
            for key, tag in (("nodes", b"\n$Nodes"), ("elements", b"\n$Elements")):
                k = mm.find(tag)
                if k >= 0:
                    a = mm.find(b"\n", k + 1)
                    b = mm.find(b"\n", a + 1)
                    line = mm[a + 1:b if b > 0 else a + 200]
                    if binary and sec["version"].startswith(b"4"):
                        dsize = 8
                        try:
                            dsize = int(sec["version"].split()[2])
                        except (IndexError, ValueError):
                            pass
                        raw = mm[a + 1:a + 1 + 4 * dsize]
                        if len(raw) == 4 * dsize:
                            vals = np.frombuffer(raw, dtype=f"<u{dsize}")
                            line = b" ".join(str(int(x)).encode() for x in vals)
                    sec[key] = line
            for tag, end in ((b"$Nodes", b"$EndNodes"), (b"$Elements", b"$EndElements")):
                k = mm.find(b"\n" + tag)
                if k >= 0 and mm.find(end, k + 1) < 0:
                    raise MeshReadError(f"{path}: the {tag.decode()} section has no "
                                        f"{end.decode()}; the file is truncated - export it again")
            counts = gmsh_counts(sec)
            need = counts.get("nodes", 0) * (24 if binary else 6) + counts.get("elements", 0) * \
                (8 if binary else 6)
            allowed = size
            if not binary and need <= allowed:
                counts["_lines"] = _msh_ascii_lines(mm, sec) + _msh_ascii_tokens(path, mm, sec)
        elif kind == "vtk":
            head = mm[:4096]
            counts = vtk_counts(head)
            for tag in (b"\nCELLS ", b"\nCELL_TYPES "):
                k = mm.find(tag)
                if k >= 0:
                    line = mm[k + 1:mm.find(b"\n", k + 1)]
                    counts.update(vtk_counts(line))
                    if tag == b"\nCELLS ":
                        parts = line.split()
                        if len(parts) >= 3 and parts[2].isdigit():
                            counts["_size"] = int(parts[2])
            binary = re.search(rb"^BINARY", head, re.M) is not None
            need = counts.get("points", 0) * (12 if binary else 6) + \
                max(counts.get("cells", 0), counts.pop("_size", 0)) * (4 if binary else 2)
            allowed = size
        elif kind == "vtu":
            head = mm[:65536]
            counts = vtu_counts(head)
            need = counts.get("points", 0) * 12 + counts.get("cells", 0) * 4
            allowed = size * (_ZLIB_RATIO if b"compressor" in head else 2)
        else:
            return counts
    if need > allowed:
        npts = counts.get("points", counts.get("nodes", 0))
        raise MeshReadError(f"{path}: the header declares {npts:,} "
                            f"points and {counts.get('cells', counts.get('elements', 0)):,} cells, "
                            f"more than a file of {size:,} bytes can hold; the file is truncated "
                            "or damaged - export it again")
    return counts


def _msh_ascii_lines(mm, sec) -> list:
    """(what, lines the header implies, lines found) for the $Nodes and $Elements sections
    of an ASCII MSH file: a reader that trusts the header would silently drop extra lines."""
    v4 = sec["version"].startswith(b"4")
    out = []
    for key, tag, end in (("nodes", b"\n$Nodes", b"$EndNodes"),
                          ("elements", b"\n$Elements", b"$EndElements")):
        k = mm.find(tag)
        e = mm.find(end, k + 1) if k >= 0 else -1
        head = sec.get(key, b"").split()
        if k < 0 or e < k or not head:
            continue
        a = mm.find(b"\n", k + 1)                     # end of the $Nodes / $Elements line
        b = mm.find(b"\n", a + 1)                     # end of the count line
        if a < 0 or b < 0 or b > e:
            continue
        found = 1 + sum(1 for ln in mm[b + 1:e].split(b"\n") if ln.strip())
        try:
            if v4:
                blocks, n = int(head[0]), int(head[1])
                expected = 1 + blocks + (2 * n if key == "nodes" else n)
            else:
                expected = 1 + int(head[0])
        except ValueError:
            continue
        out.append((f"lines in the {tag.decode().strip()} section", expected, found))
    return out


def _tokens_per_line(body: bytes):
    """(tokens per non-blank line, flat int64 tokens) of a block of ASCII integers."""
    a = np.frombuffer(body, dtype=np.uint8)
    ws = (a == 32) | (a == 10) | (a == 13) | (a == 9)
    start = ~ws & np.concatenate(([True], ws[:-1]))
    nl = np.flatnonzero(a == 10)
    bounds = np.concatenate(([0], nl + 1, [len(a)])) if (len(nl) == 0 or nl[-1] != len(a) - 1) \
        else np.concatenate(([0], nl + 1))
    cs = np.concatenate(([0], np.cumsum(start)))
    per_line = cs[bounds[1:]] - cs[bounds[:-1]]
    per_line = per_line[per_line > 0]
    toks = np.fromstring(body, dtype=np.int64, sep=" ") if body.strip() else np.zeros(0, np.int64)
    return per_line, toks


def _msh_ascii_tokens(path: Path, mm, sec) -> list:
    """Check every element line of an ASCII MSH file holds the numbers its type needs.

    meshio reads element sections as a stream of numbers, so a line with one
    number too many or too few shifts everything after it without an error.
    Returns [(what, expected, found)] for the first disagreement (or []).
    """
    from meshio._common import num_nodes_per_cell
    from meshio.gmsh.common import _gmsh_to_meshio_type

    k = mm.find(b"\n$Elements")
    e = mm.find(b"$EndElements", k + 1) if k >= 0 else -1
    if k < 0 or e < 0:
        return []
    a = mm.find(b"\n", k + 1)
    b = mm.find(b"\n", a + 1)
    if b < 0 or b > e:
        return []
    body = mm[b + 1:e].replace(b"\r", b" ")
    try:
        per_line, toks = _tokens_per_line(body)
    except ValueError:                      # not all numbers: meshio will refuse it
        return []

    def nodes(t):
        try:
            return num_nodes_per_cell[_gmsh_to_meshio_type[int(t)]]
        except KeyError:
            return None
    first = np.concatenate(([0], np.cumsum(per_line)[:-1]))
    if sec["version"].startswith(b"2"):
        if len(toks) < 3 or (first + 2 >= len(toks)).any():
            return []
        types, ntags = toks[first + 1], toks[first + 2]
        table = {int(t): nodes(t) for t in np.unique(types)}
        if any(v is None for v in table.values()):
            return []
        want = 3 + ntags + np.array([table[int(t)] for t in types])
        bad = np.flatnonzero(want != per_line)
        if bad.size:
            i = int(bad[0])
            return [(f"numbers on element line {i + 1} of the $Elements section",
                     int(want[i]), int(per_line[i]))]
        return []
    line = 0                                # MSH 4: blocks of "dim tag type n" + n lines
    while line < len(per_line):
        if per_line[line] != 4:
            return [(f"numbers on block header line {line + 1} of the $Elements section", 4,
                     int(per_line[line]))]
        t, n = toks[first[line] + 2], toks[first[line] + 3]
        nn = nodes(t)
        if nn is None or n < 0 or line + 1 + n > len(per_line):
            return []
        rows = per_line[line + 1:line + 1 + n]
        bad = np.flatnonzero(rows != 1 + nn)
        if bad.size:
            return [(f"numbers on element line {line + 2 + int(bad[0])} of the $Elements "
                     "section", 1 + nn, int(rows[bad[0]]))]
        line += 1 + int(n)
    return []


@contextlib.contextmanager
def _lenient_msh4(active: bool):
    """Let meshio's MSH 4 readers return meshes whose ``gmsh:physical`` list is shorter
    than the list of blocks (entities without a physical group): the list is dropped,
    region tags are rebuilt from ``$Entities`` (:func:`_msh4_physicals`)."""
    if not active:
        yield
        return
    from meshio import Mesh
    from meshio.gmsh import _gmsh40, _gmsh41

    def lenient(points, cells, *args, cell_data=None, **kw):
        if cell_data:
            cell_data = {k: v for k, v in cell_data.items() if len(v) == len(cells)}
        return Mesh(points, cells, *args, cell_data=cell_data, **kw)

    saved = (_gmsh40.Mesh, _gmsh41.Mesh)
    _gmsh40.Mesh = _gmsh41.Mesh = lenient
    try:
        yield
    finally:
        _gmsh40.Mesh, _gmsh41.Mesh = saved


def _call(path: Path, kind: str, detail: str, source: Path | None = None):
    import meshio
    from meshio._helpers import reader_map

    need = OPTIONAL_PACKAGES.get(kind)
    if need and importlib.util.find_spec(need[0]) is None:
        raise MeshReadError(f"{path}: reading {need[1]} files needs the optional Python package "
                            f"'{need[0]}', which is not installed; install it (pip install "
                            f"{need[0]}) or export the mesh as .msh, .vtu, .bdf, .inp or .unv")
    sink = io.StringIO()
    fmt = "gmsh" if kind == "gmsh" else kind
    try:
        with contextlib.redirect_stdout(sink), contextlib.redirect_stderr(sink), \
                _lenient_msh4(kind == "gmsh"):
            return reader_map[fmt](str(source or path))
    except ModuleNotFoundError as exc:
        raise MeshReadError(f"{path}: reading {_NAMES.get(kind, kind)} files needs the Python "
                            f"package '{exc.name}'; install it (pip install {exc.name})") from None
    except SystemExit:
        lines = sink.getvalue().strip().splitlines()
        last = clean_name(lines[-1][:160]) if lines else "no message"
        raise MeshReadError(f"{path}: the {detail or kind} reader gave up ({last}); check that "
                            "the file is complete and export it again") from None
    except MemoryError:
        raise MeshReadError(f"{path}: not enough memory to read this {detail or kind} "
                            "file") from None
    except KeyError as exc:
        what = clean_name(str(exc.args[0]) if exc.args else "?")
        raise MeshReadError(f"{path}: element type {what} cannot be read from this format "
                            "(meshio does not know it) or the file is damaged; export linear or "
                            "quadratic tetrahedra, hexahedra, wedges or 5-node pyramids (quadratic "
                            "wedges as .bdf, .inp or .unv)") from None
    except (meshio.ReadError, Exception) as exc:  # noqa: BLE001 - any reader failure
        msg = str(exc).strip().splitlines()
        what = clean_name(msg[0][:160]) if msg else type(exc).__name__
        raise MeshReadError(f"{path}: cannot be read as {detail or kind} ({type(exc).__name__}: "
                            f"{what}); the file is truncated, damaged or not this format - "
                            "export it again") from None


def _msh4_physicals(path: Path):
    """(dim, entity tag) -> first physical tag, from the $Entities section of an MSH 4 file."""
    from meshio.gmsh import _gmsh40, _gmsh41

    with open(path, "rb") as fh:
        line = fh.readline()
        while line and not line.startswith(b"$MeshFormat"):
            line = fh.readline()
        fields = fh.readline().split()
        version, ascii_ = fields[0].decode(), fields[1] == b"0"
        dsize = int(fields[2]) if len(fields) > 2 else 8
        line = fh.readline()
        while line:
            if line.startswith(b"$Entities"):
                mod = _gmsh41 if version.startswith("4.1") else _gmsh40
                sink = io.StringIO()
                with contextlib.redirect_stdout(sink):
                    phys, _ = mod._read_entities(fh, ascii_, dsize)
                return {(d, int(t)): int(v[0]) for d in range(4) for t, v in phys[d].items()
                        if len(v)}
            line = fh.readline()
    return {}


_WEDGE_NOTE = ("wedges read in the corner order VTK itself computes as positive (the triangle "
               "0-1-2 facing the other one) instead of meshio's: most wedges came out inverted "
               "in meshio's order, as they do for files written by VTK-based tools")


def _vtk_wedge_convention(points: np.ndarray, wedges: np.ndarray) -> tuple[np.ndarray, int]:
    """Wedges of a VTK file as meshio returned them, in the corner order that makes most of
    them positive, and how many were turned (0 when meshio's order stands).

    Two orders are in use for VTK wedges: meshio's reader assumes the documented one (the
    triangle 0-1-2 facing away from 3-4-5) and turns it into gmsh's, while VTK's own
    filters (vtkCellSizeFilter, vtkMeshQuality, VTK 9.7) compute wedges in gmsh's order
    as positive, so files from VTK-based tools come out of meshio inverted.  A file uses
    one order throughout: when more than half the wedges are inverted in meshio's order
    (by the sign of the corner-0 Jacobian), the other order is taken; genuinely inverted
    wedges stay inverted in either case and are reported by the validity check.
    """
    if not len(wedges):
        return wedges, 0
    x = points[wedges[:, :4]]
    det = np.einsum("ij,ij->i", x[:, 1] - x[:, 0], np.cross(x[:, 2] - x[:, 0], x[:, 3] - x[:, 0]))
    if np.count_nonzero(det < 0) * 2 <= len(wedges):
        return wedges, 0
    return wedges[:, [0, 2, 1, 3, 5, 4]], len(wedges)


def read_via_meshio(path: Path, kind: str, detail: str = "") -> RawMesh:
    """Read ``path`` with meshio's reader for ``kind`` and return a RawMesh (file units)."""
    size = path.stat().st_size
    declared = _declared_guard(path, kind, size)
    with open(path, "rb") as fh:
        bom = fh.read(3) == b"\xef\xbb\xbf"
    with contextlib.ExitStack() as stack:
        source = path
        if bom:     # meshio's text readers choke on a byte-order mark: read a copy without it
            tmp = stack.enter_context(tempfile.TemporaryDirectory(prefix="meshcheck-"))
            source = Path(tmp) / path.name
            with open(path, "rb") as src, open(source, "wb") as dst:
                src.seek(3)
                shutil.copyfileobj(src, dst)
        raw = _call(path, kind, detail, source)
        return _to_raw(path, source, raw, kind, detail, declared)


def _to_raw(path: Path, source: Path, raw, kind: str, detail: str, declared: dict) -> RawMesh:
    from ..cells import CELL_TYPES

    points = np.asarray(raw.points, dtype=np.float64)
    if points.ndim != 2 or points.shape[1] not in (2, 3):
        raise MeshReadError(f"{path}: points of shape {points.shape}; the file is damaged")
    if points.shape[1] == 2:
        points = np.column_stack([points, np.zeros(len(points))])
    msh4 = kind == "gmsh" and detail.startswith("MSH 4")
    phys = {}
    if msh4:
        try:
            phys = _msh4_physicals(source)
        except Exception:  # noqa: BLE001 - malformed $Entities: no regions rather than wrong ones
            phys = {}
    geo = raw.cell_data.get("gmsh:geometrical")
    blocks, ignored, notes = [], {}, []
    vol = any(CELL_TYPES.get(b.type) is not None and CELL_TYPES[b.type].dim == 3 for b in raw.cells)
    dim_model = 3 if vol else 2
    for i, cb in enumerate(raw.cells):
        data = np.asarray(cb.data)
        n = len(data)
        info = CELL_TYPES.get(cb.type)
        if info is None:
            ignored[cb.type] = ignored.get(cb.type, 0) + n
            if cb.type not in ("vertex", "line", "line3", "line4") and not \
                    cb.type.startswith(("triangle", "quad", "line")):
                blocks.append(RawBlock(cb.type, data.reshape(n, -1).astype(np.int64),
                                       np.zeros(n, np.int64)))
            continue
        if msh4 and geo is not None and len(geo) == len(raw.cells) and len(geo[i]) == n:
            tags, inv = np.unique(np.asarray(geo[i]).reshape(-1), return_inverse=True)
            region = np.array([phys.get((info.dim, int(t)), 0) for t in tags],
                              dtype=np.int64)[inv.reshape(-1)]
        else:
            region = cell_data_region(raw.cell_data, i, len(raw.cells), n)
            region = np.zeros(n, np.int64) if region is None else region
        data = data.astype(np.int64)
        if cb.type == "wedge" and kind in ("vtu", "vtk"):
            data, flipped = _vtk_wedge_convention(points, data)
            if flipped:
                notes.append(("wedge_corner_order", _WEDGE_NOTE, flipped))
        blocks.append(RawBlock(cb.type, data, region))
    names = field_data_names(raw.field_data, dim_model)
    total = sum(len(c.data) for c in raw.cells)
    checks = list(declared.get("_lines", []))
    for key, got in (("nodes", len(points)), ("points", len(points)), ("elements", total),
                     ("cells", total)):
        if key in declared:
            checks.append((f"declared {key}", int(declared[key]), int(got)))
    return RawMesh(points=points, blocks=tuple(blocks), region_names=names,
                   format=_NAMES.get(kind, kind) + (f" ({detail})" if detail else ""),
                   counts=tuple(checks), ignored=ignored, notes=tuple(notes))
