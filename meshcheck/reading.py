"""Read a supplied mesh into a :class:`~meshcheck.mesh.Mesh` (SI units), trustworthily.

1. :func:`~meshcheck.formats.sniff.sniff` tells the format from the content.
2. A reader produces a :class:`~meshcheck.formats.raw.RawMesh`: meshcheck's own
   for Nastran bulk data, Abaqus input, I-DEAS universal files and gmsh MSH 4.1;
   meshio's, guarded, for older MSH versions, VTK and the HDF5/netCDF formats.
3. Cross-checks: the counts of an independent pre-scan (element cards,
   data lines, declared header counts) against what was read; the node count
   of every cell against its type; node indices in range; region tags aligned
   with cells; finite coordinates; a non-empty result.
4. The length unit: given, stated by the file, or settled by the domain size
   and material speeds of sound (:func:`meshcheck.units.decide_unit`).

Every failure is one :class:`~meshcheck.errors.MeshReadError` (or
UnitsError) naming the file, what is wrong, where, and what to do.  The
input file is only ever opened for reading.
"""
from __future__ import annotations

import struct
from pathlib import Path

import numpy as np

from .cells import CELL_TYPES, SURFACE_TYPES, VOLUME_TYPES
from .errors import MeshcheckError, MeshReadError
from .formats.ids import distinct
from .formats.raw import RawBlock, RawMesh, clean_name
from .formats.sniff import HEAD_BYTES, Sniffed, sniff
from .mesh import CellBlock, Mesh
from .units import UNIT_NAMES, decide_unit, unit_factor

__all__ = ["read_mesh", "read_raw", "mesh_from_raw", "mesh_from_meshio", "describe_units"]

#: sample of cells used to measure the typical edge length for unit messages
_EDGE_SAMPLE = 20000


def read_raw(path: str | Path, allow_outside: bool = False) -> RawMesh:
    """Sniff and read a mesh file as found (coordinates in the file's unit).

    allow_outside : let INCLUDE statements name files outside the folder of ``path``.
    """
    path = Path(path)
    if not path.exists():
        raise MeshReadError(f"{path}: no such file; check the path")
    if not path.is_file():
        raise MeshReadError(f"{path}: not a file (a folder?); give the mesh file itself")
    try:
        size = path.stat().st_size
        with open(path, "rb") as fh:
            head = fh.read(HEAD_BYTES)
    except OSError as exc:
        raise MeshReadError(f"{path}: cannot be opened ({exc.strerror}); check the permissions"
                            ) from None
    kind = sniff(path, head, size)
    try:
        return _dispatch(path, kind, allow_outside)
    except MeshcheckError:
        raise
    except MemoryError:
        raise MeshReadError(f"{path}: not enough memory to read this {kind.detail} file") from None
    except (ValueError, IndexError, KeyError, TypeError, OverflowError, UnicodeError,
            struct.error, OSError, ZeroDivisionError, RecursionError) as exc:
        what = clean_name(str(exc).splitlines()[0][:160]) if str(exc).strip() else ""
        raise MeshReadError(f"{path}: cannot be read as {kind.detail} ({type(exc).__name__}"
                            f"{': ' + what if what else ''}); the file is damaged or of a "
                            "dialect this reader does not take - export it again") from None


def _dispatch(path: Path, kind: Sniffed, allow_outside: bool) -> RawMesh:
    if kind.kind == "nastran":
        from .formats.nastran import read_nastran
        return read_nastran(path, allow_outside)
    if kind.kind == "abaqus":
        from .formats.abaqus import read_abaqus
        return read_abaqus(path, allow_outside)
    if kind.kind == "unv":
        from .formats.unv import read_unv
        return read_unv(path)
    if kind.kind == "gmsh" and kind.detail.startswith("MSH 4.1 "):
        from .formats.gmsh import read_msh41
        raw = read_msh41(path)          # None: left to meshio
        if raw is not None:
            return raw
    from .formats.via_meshio import read_via_meshio
    return read_via_meshio(path, kind.kind, kind.detail)


def read_mesh(path: str | Path, units: str | None = None, *, fmax_hint: float | None = None,
              allow_outside: bool = False) -> Mesh:
    """Read a volume (or planar 2D) mesh file and return it in metres.

    Parameters
    ----------
    path : mesh file; the format is told from the content (gmsh .msh, .vtu,
        .vtk, Nastran .bdf/.nas/.dat, Abaqus .inp, I-DEAS .unv, Exodus, MED, CGNS).
    units : length unit of the file ("m", "cm", "mm", "in", "ft"); when None it
        is taken from the file (I-DEAS dataset 164) or settled by the domain
        size and material speeds of sound; an ambiguous case raises UnitsError.
    fmax_hint : upper frequency of the study, Hz, only to word the UnitsError.
    allow_outside : let INCLUDE statements reach outside the mesh's folder tree.
    """
    raw = read_raw(path, allow_outside)
    return mesh_from_raw(raw, source=str(path), units=units, fmax_hint=fmax_hint)


def _typical_edge(points: np.ndarray, blocks: list[RawBlock]) -> float:
    """Median corner-edge length (file units) over a sample of cells."""
    lengths = []
    for b in blocks:
        info = CELL_TYPES[b.type]
        cells = b.cells[:: max(1, len(b.cells) // _EDGE_SAMPLE + 1)]
        e = info.edges[:, :2]
        d = points[cells[:, e[:, 0]]] - points[cells[:, e[:, 1]]]
        lengths.append(np.linalg.norm(d, axis=-1).ravel())
    if not lengths:
        return 0.0
    all_l = np.concatenate(lengths)
    all_l = all_l[np.isfinite(all_l)]
    return float(np.median(all_l)) if all_l.size else 0.0


def _joined_regions(bs: list) -> np.ndarray:
    """The region tags of blocks read separately, joined: one broadcast when every block
    holds one tag as a broadcast and the tags are equal (no (m,) array)."""
    if len(bs) == 1:
        return bs[0].region
    r0 = bs[0].region
    if all(b.region.strides == (0,) and len(b.region) and b.region[0] == r0[0] for b in bs):
        return np.broadcast_to(r0[:1], (sum(len(b.region) for b in bs),))
    return np.concatenate([b.region for b in bs])


def mesh_from_raw(raw: RawMesh, source: str = "", units: str | None = None,
                  fmax_hint: float | None = None) -> Mesh:
    """Cross-check a RawMesh, settle its unit and return the Mesh in metres.

    Keeps the cells of the model's dimension only: volume cells when there
    are any, else planar triangles/quads as a 2D model.
    """
    label = source or "<mesh>"
    for what, expected, got in raw.counts:
        if expected != got:
            raise MeshReadError(f"{label}: {what}: {expected:,} expected from the pre-scan or "
                                f"the file's own counts, {got:,} found; the file is inconsistent "
                                "or laid out in a way that would be misread - export it again")
    points = np.asarray(raw.points, dtype=np.float64)
    if points.ndim != 2 or points.shape[0] == 0:
        raise MeshReadError(f"{label}: the file holds no nodes; export the mesh with its nodes")
    bad = ~np.isfinite(points).all(axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        nid = int(raw.point_ids[i]) if raw.point_ids is not None else i
        raise MeshReadError(f"{label}: node {nid} has a non-finite coordinate "
                            f"({', '.join(f'{x:g}' for x in points[i])}) and {int(bad.sum())} "
                            "node(s) in all; the export is damaged - export the mesh again")
    unknown = sorted({b.type for b in raw.blocks if b.type not in CELL_TYPES})
    if unknown:
        raise MeshReadError(f"{label}: cell type(s) {', '.join(unknown)} are not supported; "
                            "export linear or quadratic (serendipity) tetrahedra, hexahedra, "
                            "wedges or pyramids")
    n = len(points)
    for b in raw.blocks:
        info = CELL_TYPES[b.type]
        if b.cells.ndim != 2 or b.cells.shape[1] != info.n_nodes:
            raise MeshReadError(f"{label}: {b.type} cells with {b.cells.shape[-1]} nodes "
                                f"(expected {info.n_nodes}); the file is truncated or "
                                "inconsistent - export it again")
        if len(b.region) != len(b.cells):
            raise MeshReadError(f"{label}: {len(b.region)} region tags for {len(b.cells)} "
                                f"{b.type} cells; the file's region data are inconsistent")
        if b.cells.size and not b.in_range and (b.cells.min() < 0 or b.cells.max() >= n):
            bad_index = int(b.cells.max()) if b.cells.max() >= n else int(b.cells.min())
            raise MeshReadError(f"{label}: {b.type} cells refer to nodes that do not exist "
                                f"(index {bad_index} "
                                f"of {n} nodes); the file is truncated or inconsistent")
    vol = [b for b in raw.blocks if b.type in VOLUME_TYPES and len(b.cells)]
    if vol:
        keep, dim = vol, 3
    else:
        surf = [b for b in raw.blocks if b.type in SURFACE_TYPES and len(b.cells)]
        if not surf:
            found = sorted({b.type for b in raw.blocks if len(b.cells)} | set(raw.ignored))
            raise MeshReadError(f"{label}: the mesh has no volume cells (found: "
                                f"{', '.join(found) or 'none'}); a volume mesh of the fluid "
                                "domain is needed")
        used = np.unique(np.concatenate([b.cells.ravel() for b in surf]))
        z = points[used, 2]
        span = max(float(np.ptp(points[used, :2])), 1e-300)
        if float(np.ptp(z)) > 1e-9 * span:
            raise MeshReadError(f"{label}: only surface cells (triangles/quads) in 3D space; "
                                "this is a boundary mesh - a volume mesh of the fluid domain "
                                "is needed (or a planar mesh in z = const for a 2D model)")
        keep, dim = surf, 2
    merged: dict[str, list[RawBlock]] = {}
    for b in keep:
        merged.setdefault(b.type, []).append(b)
    blocks = tuple(CellBlock(t, bs[0].cells if len(bs) == 1 else
                             np.concatenate([b.cells for b in bs]), _joined_regions(bs))
                   for t, bs in merged.items())
    if units is not None:
        unit = units.strip().lower() if isinstance(units, str) else units
    elif raw.unit is not None:
        unit = raw.unit
    else:
        used = np.zeros(n, bool)
        for b in blocks:
            used[b.cells] = True
        diagonal = float(np.linalg.norm(np.ptp(points[used], axis=0)))
        speeds = tuple((s.card, s.speed) for s in raw.speeds)
        unit = decide_unit(diagonal, _typical_edge(points, keep), label, speeds, fmax_hint).unit
    factor = unit_factor(unit, label)
    tags = {int(t) for b in blocks for t in distinct(b.region)}
    names = {t: nm for t, nm in raw.region_names.items() if t in tags}
    stated = {int(t): (float(s.speed) * factor, s.card) for s in raw.speeds for t in s.regions
              if int(t) in tags}
    # (metres: the reader's array itself, no copy)
    return Mesh(points if factor == 1.0 else points * factor, blocks, names, dim, label, unit,
                stated, tuple(raw.notes))


def raw_from_meshio(mesh, fmt: str = "meshio") -> RawMesh:
    """RawMesh of an in-memory ``meshio.Mesh`` (region tags from the usual cell-data keys)."""
    from .formats.via_meshio import cell_data_region, field_data_names

    points = np.asarray(mesh.points, dtype=np.float64)
    if points.ndim == 2 and points.shape[1] == 2:
        points = np.column_stack([points, np.zeros(len(points))])
    blocks, ignored = [], {}
    for i, cb in enumerate(mesh.cells):
        data = np.asarray(cb.data)
        nc = len(data)
        if cb.type in ("vertex", "line", "line3", "line4"):
            ignored[cb.type] = ignored.get(cb.type, 0) + nc
            continue
        region = cell_data_region(mesh.cell_data, i, len(mesh.cells), nc)
        if region is None:
            region = np.zeros(nc, np.int64)
            for k, (name, sets) in enumerate(sorted(mesh.cell_sets.items())):
                if i < len(sets) and sets[i] is not None and len(sets[i]):
                    region[np.asarray(sets[i], dtype=np.int64)] = k + 1
        blocks.append(RawBlock(cb.type, data.reshape(nc, -1).astype(np.int64), region))
    names = field_data_names(mesh.field_data)
    if not names and mesh.cell_sets:
        names = {k + 1: clean_name(str(nm)) for k, nm in enumerate(sorted(mesh.cell_sets))}
    return RawMesh(points=points, blocks=tuple(blocks), region_names=names, format=fmt,
                   ignored=ignored)


def mesh_from_meshio(raw, source: str = "", units: str | None = None) -> Mesh:
    """Turn a ``meshio.Mesh`` into a meshcheck Mesh in metres (same checks as a file read)."""
    return mesh_from_raw(raw_from_meshio(raw), source=source, units=units)


def describe_units(mesh: Mesh) -> str:
    return UNIT_NAMES.get(mesh.unit, mesh.unit)

