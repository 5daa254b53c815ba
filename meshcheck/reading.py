"""Read a supplied mesh into a :class:`~meshcheck.mesh.Mesh` (SI units).

Reading goes through meshio's format readers, called directly so that their
``sys.exit`` and raw exceptions are caught and re-raised as one
:class:`~meshcheck.errors.MeshReadError` that names the file, the format and
the problem.  The input file is opened read-only and never modified.
"""
from __future__ import annotations

import io
import contextlib
from pathlib import Path

import numpy as np

from .cells import CELL_TYPES, SURFACE_TYPES, VOLUME_TYPES
from .errors import MeshReadError, UnitsError
from .mesh import CellBlock, Mesh
from .units import UNIT_NAMES, guess_unit, unit_factor

__all__ = ["read_mesh", "mesh_from_meshio", "detect_format", "FORMATS"]

#: extension -> meshio reader name
FORMATS: dict[str, str] = {
    ".msh": "gmsh", ".vtu": "vtu", ".vtk": "vtk", ".bdf": "nastran", ".nas": "nastran",
    ".fem": "nastran", ".dat": "nastran", ".inp": "abaqus", ".med": "med", ".e": "exodus",
    ".exo": "exodus", ".ex2": "exodus", ".xdmf": "xdmf", ".mesh": "medit", ".cgns": "cgns",
}
_SURFACE_ONLY = {".stl": "STL", ".obj": "OBJ", ".ply": "PLY", ".off": "OFF"}

#: cell-data keys that carry region tags, in order of preference
_REGION_KEYS = ("gmsh:physical", "medit:ref", "nastran:ref", "CellEntityIds", "region",
                "regions", "cell_tags", "material", "ele_tag", "flac3d:zone")

_MAGIC = {b"PK\x03\x04": "a zip archive", b"\x89HDF": "HDF5", b"CDF\x01": "netCDF",
          b"CDF\x02": "netCDF", b"\x1f\x8b": "a gzip archive"}


def detect_format(path: Path, head: bytes) -> str:
    """Return the meshio reader name for a file, checked against its first bytes."""
    ext = path.suffix.lower()
    if ext in _SURFACE_ONLY or head.lstrip().lower().startswith(b"solid"):
        kind = _SURFACE_ONLY.get(ext, "STL")
        raise MeshReadError(f"{path}: this is a {kind} surface file, not a volume mesh; "
                            "mesh the fluid volume (tetrahedra or hexahedra) and audit that")
    fmt = FORMATS.get(ext)
    if fmt is None:
        raise MeshReadError(f"{path}: unknown mesh format '{ext or path.name}'; "
                            f"use one of {', '.join(sorted(FORMATS))}")
    stripped = head.lstrip(b"\xef\xbb\xbf \t\r\n")
    if not stripped:
        raise MeshReadError(f"{path}: the file is empty; export the mesh again")
    for magic, what in _MAGIC.items():
        if head.startswith(magic) and fmt not in ("med", "exodus", "cgns", "xdmf"):
            raise MeshReadError(f"{path}: the file is {what}, not a {fmt} mesh; "
                                "unpack or export it to a mesh format first")
    if fmt == "gmsh" and not stripped.startswith(b"$MeshFormat"):
        raise MeshReadError(f"{path}: a .msh file must start with $MeshFormat; "
                            "this is not a gmsh mesh (export it from gmsh again)")
    if fmt == "vtu" and b"<VTKFile" not in head and not stripped.startswith(b"<?xml"):
        raise MeshReadError(f"{path}: not a VTK XML (.vtu) file; export it again")
    return fmt


def _call_reader(path: Path, fmt: str):
    import meshio
    from meshio._helpers import reader_map

    sink = io.StringIO()
    try:
        with contextlib.redirect_stdout(sink), contextlib.redirect_stderr(sink):
            return reader_map[fmt](str(path))
    except ModuleNotFoundError as exc:
        raise MeshReadError(f"{path}: reading {fmt} files needs the Python package "
                            f"'{exc.name}'; install it (pip install {exc.name})") from None
    except (SystemExit, KeyboardInterrupt) as exc:
        if isinstance(exc, KeyboardInterrupt):
            raise
        detail = sink.getvalue().strip().splitlines()
        raise MeshReadError(f"{path}: the {fmt} reader gave up"
                            f"{': ' + detail[-1] if detail else ''}; check the file "
                            "is complete and exported as " + fmt) from None
    except (meshio.ReadError, Exception) as exc:  # noqa: BLE001 - every reader failure
        what = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        raise MeshReadError(f"{path}: cannot be read as {fmt} ({type(exc).__name__}: "
                            f"{what[:200]}); check the file is complete and not corrupted"
                            ) from None


def read_mesh(path: str | Path, units: str | None = None) -> Mesh:
    """Read a volume (or planar 2D) mesh file and return it in metres.

    Parameters
    ----------
    path : mesh file (gmsh .msh, .vtu, .vtk, Nastran, Abaqus, ...).
    units : length unit of the file ("m", "cm", "mm", "in"); when None it is
        read off the domain size, and an ambiguous size raises UnitsError.
    """
    path = Path(path)
    if not path.is_file():
        raise MeshReadError(f"{path}: no such file; check the path")
    with open(path, "rb") as fh:
        head = fh.read(512)
    fmt = detect_format(path, head)
    raw = _call_reader(path, fmt)
    return mesh_from_meshio(raw, source=str(path), units=units)


def _region_tags(raw, index: int, n: int) -> np.ndarray:
    for key in _REGION_KEYS:
        data = raw.cell_data.get(key)
        if data is not None and index < len(data):
            tags = np.asarray(data[index]).reshape(-1)
            if tags.shape[0] == n and np.issubdtype(tags.dtype, np.number):
                return tags.astype(np.int64)
    tags = np.zeros(n, np.int64)
    # cell sets (Abaqus, VTU written by meshio) name regions by position
    for k, (name, sets) in enumerate(sorted(raw.cell_sets.items())):
        if index < len(sets) and sets[index] is not None and len(sets[index]):
            tags[np.asarray(sets[index], dtype=np.int64)] = k + 1
    return tags


def _region_names(raw) -> dict[int, str]:
    names: dict[int, str] = {}
    for name, value in (raw.field_data or {}).items():
        arr = np.asarray(value).reshape(-1)
        if arr.size and np.issubdtype(arr.dtype, np.integer):
            names[int(arr[0])] = str(name)
    if not names and raw.cell_sets:
        names = {k + 1: str(n) for k, n in enumerate(sorted(raw.cell_sets))}
    return names


def mesh_from_meshio(raw, source: str = "", units: str | None = None) -> Mesh:
    """Turn a ``meshio.Mesh`` into a meshcheck Mesh in metres.

    Keeps the cells of the model's dimension only: volume cells when there are
    any, else planar triangles/quads as a 2D model.  Raises MeshReadError for
    an unusable mesh and UnitsError when the unit cannot be told.
    """
    label = source or "<mesh>"
    points = np.asarray(raw.points, dtype=np.float64)
    if points.ndim != 2 or points.shape[0] == 0:
        raise MeshReadError(f"{label}: the file holds no nodes; export the mesh with its nodes")
    if points.shape[1] == 2:
        points = np.column_stack([points, np.zeros(len(points))])
    types = [b.type for b in raw.cells]
    unsupported = sorted({t for t in types if t not in CELL_TYPES and t not in
                          ("vertex", "line", "line3", "line4")})
    vol = [i for i, t in enumerate(types) if t in VOLUME_TYPES]
    if not vol:
        surf = [i for i, t in enumerate(types) if t in SURFACE_TYPES]
        unsupported_vol = [t for t in unsupported if not t.startswith(("triangle", "quad"))]
        if unsupported_vol:
            raise MeshReadError(f"{label}: cell type(s) {', '.join(unsupported_vol)} are not "
                                "supported; export linear or quadratic (serendipity) cells")
        if not surf:
            raise MeshReadError(f"{label}: the mesh has no volume cells (found: "
                                f"{', '.join(sorted(set(types))) or 'none'}); a volume mesh "
                                "of the fluid domain is needed")
        used = np.unique(np.concatenate([raw.cells[i].data[:, :3].ravel() for i in surf]))
        used = used[(used >= 0) & (used < len(points))]
        z = points[used, 2]
        if np.ptp(z) > 1e-9 * max(np.ptp(points[used, :2]), 1e-300):
            raise MeshReadError(f"{label}: only surface cells (triangles/quads) in 3D space; "
                                "this is a boundary mesh - a volume mesh of the fluid domain "
                                "is needed (or a planar mesh in z = const for a 2D model)")
        keep, dim = surf, 2
    else:
        keep, dim = vol, 3
    bad = [t for t in unsupported if CELL_TYPES.get(t) is None and
           (dim == 3 and not t.startswith(("triangle", "quad")))]
    if bad:
        raise MeshReadError(f"{label}: cell type(s) {', '.join(bad)} are not supported; "
                            "export linear or quadratic (serendipity) cells")
    blocks = []
    for i in keep:
        cb = raw.cells[i]
        data = np.asarray(cb.data)
        if data.ndim != 2 or data.shape[1] != CELL_TYPES[cb.type].n_nodes:
            raise MeshReadError(f"{label}: {cb.type} cells with {data.shape[-1]} nodes "
                                f"(expected {CELL_TYPES[cb.type].n_nodes}); the file is "
                                "inconsistent, export it again")
        if data.size and (data.min() < 0 or data.max() >= len(points)):
            raise MeshReadError(f"{label}: {cb.type} cells refer to nodes that do not exist "
                                f"(index {int(data.max())} of {len(points)} nodes); the file "
                                "is truncated or inconsistent")
        blocks.append(CellBlock(cb.type, data, _region_tags(raw, i, len(data))))
    # merge blocks of the same type (meshio splits them per physical group)
    merged: dict[str, list[CellBlock]] = {}
    for b in blocks:
        merged.setdefault(b.type, []).append(b)
    blocks = [CellBlock(t, np.concatenate([b.cells for b in bs]),
                        np.concatenate([b.region for b in bs])) for t, bs in merged.items()]

    finite = np.isfinite(points).all(axis=1)
    used = np.zeros(len(points), bool)
    for b in blocks:
        used[b.cells] = True
    sel = points[used & finite]
    diagonal = float(np.linalg.norm(np.ptp(sel, axis=0))) if len(sel) else 0.0
    if units is None:
        guess = guess_unit(diagonal)
        if guess.unit is None:
            r = guess.readings
            raise UnitsError(
                f"{label}: the length unit is not stored in the file and the domain size "
                f"does not tell it (diagonal {diagonal:g}: {r['m']:g} m if metres, "
                f"{r['mm']:g} m if millimetres); pass --units m or --units mm")
        units = guess.unit
    factor = unit_factor(units, label)
    return Mesh(points * factor, tuple(blocks), _region_names(raw), dim, label,
                units.strip().lower())


def describe_units(mesh: Mesh) -> str:
    return UNIT_NAMES.get(mesh.unit, mesh.unit)
