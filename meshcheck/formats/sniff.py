"""Tell the format of a mesh file from its content (magic bytes and first keywords).

The extension only breaks ties that the content cannot (which HDF5
container: MED, CGNS or Exodus).  Files that are recognised but cannot be
audited (surface meshes, archives, empty files, UTF-16 text) are refused
here with a message saying what the file is and what to do.
"""
from __future__ import annotations

import re
import struct
from dataclasses import dataclass
from pathlib import Path

from ..errors import MeshReadError

__all__ = ["Sniffed", "sniff", "HEAD_BYTES"]

#: bytes read to decide (Nastran files may open with long comment blocks)
HEAD_BYTES = 1 << 20

_HDF5 = b"\x89HDF\r\n\x1a\n"
_ARCHIVES = {b"PK\x03\x04": "a zip archive", b"PK\x05\x06": "an empty zip archive",
             b"\x1f\x8b": "a gzip archive", b"BZh": "a bzip2 archive",
             b"\xfd7zXZ\x00": "an xz archive", b"7z\xbc\xaf\x27\x1c": "a 7-zip archive",
             b"Rar!": "a RAR archive"}
_SURFACE_HINT = ("a volume mesh of the fluid domain (tetrahedra, hexahedra, wedges or "
                 "pyramids) is needed: mesh the volume enclosed by this surface and audit that")
_NASTRAN_WORDS = {
    "GRID", "CTETRA", "CHEXA", "CPENTA", "CPYRAM", "CTRIA3", "CTRIA6", "CQUAD4", "CQUAD8",
    "BEGIN", "SOL", "CEND", "ID", "TIME", "INCLUDE", "ASSIGN", "NASTRAN", "INIT", "PARAM",
    "PSOLID", "PSHELL", "MAT1", "MAT10", "CORD2R", "CORD2C", "CORD2S", "GRDSET", "TITLE",
    "SUBCASE", "ECHO", "SPC", "SPC1", "LOAD", "FORCE", "EIGRL", "EIGR", "ENDDATA", "RBE2",
    "RBE3", "CBAR", "CBEAM", "CROD", "CONM2", "SET", "DISP", "METHOD", "SUBTITLE", "LABEL",
    "APP", "DIAG", "PFLUID", "ACMODL", "FREQ", "FREQ1", "DLOAD", "RLOAD1", "TABLED1",
    "SPOINT", "CELAS1", "CELAS2", "MAT9", "PLOTEL", "ANALYSIS", "SOL101", "SOL103", "SOL108",
    "SOL111", "OUTPUT", "BULK"}


@dataclass(frozen=True)
class Sniffed:
    """What a file is.

    kind : reader key: gmsh, nastran, abaqus, unv, vtu, vtk, exodus, med, cgns, xdmf, medit.
    detail : e.g. "MSH 4.1 binary" (for messages).
    """

    kind: str
    detail: str = ""


def _first_lines(text: bytes, n: int = 400):
    out = []
    for ln in text.split(b"\n", n)[:n]:
        s = ln.strip()
        if s:
            out.append(s)
    return out


def sniff(path: Path, head: bytes, size: int) -> Sniffed:
    """Format of ``path`` from its first bytes ``head`` (up to HEAD_BYTES) and its size."""
    ext = path.suffix.lower()
    if size == 0 or not head.strip(b" \t\r\n\x00\x0b\x0c\xef\xbb\xbf"):
        raise MeshReadError(f"{path}: the file is empty{' (only white space)' if size else ''}; "
                            "export the mesh again")
    for magic, what in _ARCHIVES.items():
        if head.startswith(magic):
            raise MeshReadError(f"{path}: the file is {what}, not a mesh; unpack it and audit "
                                "the mesh file inside")
    if head.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise MeshReadError(f"{path}: the file is UTF-16 text; save it as plain ASCII or UTF-8 "
                            "text and read it again")
    for off in (0, 512, 1024, 2048):
        if head[off:off + 8] == _HDF5:
            return _hdf5_kind(path, head, ext)
    if head[:4] in (b"CDF\x01", b"CDF\x02", b"CDF\x05"):
        if ext in (".nc", ".e", ".exo", ".ex2", ".exii", ".g", ".gen") or b"coord" in head:
            return Sniffed("exodus", "Exodus II (netCDF)")
        raise MeshReadError(f"{path}: a netCDF file that is not recognisable as Exodus II; "
                            "export the mesh as .msh, .vtu, .bdf, .inp or .unv")
    if size >= 84 and len(head) >= 84:
        (n_tri,) = struct.unpack("<I", head[80:84])
        if size == 84 + 50 * n_tri:
            raise MeshReadError(f"{path}: this is a binary STL surface ({n_tri} triangles), not "
                                f"a volume mesh; {_SURFACE_HINT}")
    text = head[3:] if head.startswith(b"\xef\xbb\xbf") else head
    stripped = text.lstrip()
    low = stripped[:2000].lower()
    if stripped.startswith(b"$MeshFormat"):
        return _gmsh_kind(path, stripped)
    if stripped.startswith((b"$NOD", b"$NOE")):
        raise MeshReadError(f"{path}: legacy gmsh 1 format; open it in gmsh and save it as "
                            "MSH 4.1 (or 2.2)")
    if low.startswith(b"<?xml") or low.startswith(b"<vtkfile") or low.startswith(b"<xdmf"):
        return _xml_kind(path, stripped)
    if low.startswith(b"# vtk datafile"):
        m = re.search(rb"^\s*DATASET\s+(\w+)", stripped, re.M | re.I)
        kind = m.group(1).upper().decode("ascii", "replace") if m else "?"
        if kind == "UNSTRUCTURED_GRID":
            return Sniffed("vtk", "legacy VTK")
        if kind == "POLYDATA":
            raise MeshReadError(f"{path}: legacy VTK POLYDATA is a surface, not a volume mesh; "
                                f"{_SURFACE_HINT}")
        raise MeshReadError(f"{path}: legacy VTK dataset {kind} is not an unstructured mesh; "
                            "export it as an UNSTRUCTURED_GRID (.vtu or .vtk)")
    if low.startswith(b"solid") and (b"facet" in low or b"endsolid" in low):
        raise MeshReadError(f"{path}: this is an ASCII STL surface, not a volume mesh; "
                            f"{_SURFACE_HINT}")
    if low.startswith(b"ply\n") or low.startswith(b"ply\r"):
        raise MeshReadError(f"{path}: this is a PLY surface, not a volume mesh; {_SURFACE_HINT}")
    if re.match(rb"(n|st|c)?off\s", low):
        raise MeshReadError(f"{path}: this is an OFF surface, not a volume mesh; {_SURFACE_HINT}")
    if low.startswith(b"meshversionformatted") or low.startswith(b"meshversionunformatted"):
        return Sniffed("medit", "Medit .mesh")
    lines = _first_lines(stripped)
    if lines and lines[0] == b"-1" and len(lines) > 1 and re.match(rb"\d+", lines[1]):
        return Sniffed("unv", "I-DEAS universal")
    data_lines = [ln for ln in lines if not ln.startswith((b"**", b"$", b"#"))]
    if data_lines and re.match(rb"\*\s*[A-Za-z]", data_lines[0]):
        return Sniffed("abaqus", "Abaqus input")
    if lines and _is_obj(lines):
        raise MeshReadError(f"{path}: this is a Wavefront OBJ surface, not a volume mesh; "
                            f"{_SURFACE_HINT}")
    for ln in lines:
        if ln.startswith(b"$"):
            continue
        word = re.split(rb"[ ,=*\t]", ln, maxsplit=1)[0].upper().decode("latin-1")
        if word in _NASTRAN_WORDS or word.startswith(("SOL", "BEGIN")):
            return Sniffed("nastran", "Nastran bulk data")
        break
    if ext in (".bdf", ".nas", ".dat", ".fem", ".blk", ".bulk") and data_lines and \
            re.match(rb"[A-Za-z][A-Za-z0-9]{0,7}[* ,]", data_lines[0] + b" "):
        return Sniffed("nastran", "Nastran bulk data")
    if b"\x00" in head[:4096]:
        raise MeshReadError(f"{path}: binary content of no recognised mesh format; export the "
                            "mesh as .msh, .vtu, .bdf, .inp or .unv")
    first = clean(lines[0][:40]) if lines else ""
    expect = _EXPECT.get(ext, "")
    raise MeshReadError(f"{path}: unknown mesh format (first line '{first}'"
                        f"{'; ' + expect if expect else ''}); export the mesh as gmsh .msh, "
                        ".vtu/.vtk, Nastran .bdf, Abaqus .inp or I-DEAS .unv")


_EXPECT = {".msh": "a gmsh .msh file must start with $MeshFormat",
           ".vtu": "a .vtu file is VTK XML starting with <?xml or <VTKFile",
           ".vtk": "a legacy .vtk file starts with '# vtk DataFile Version'",
           ".inp": "an Abaqus .inp file is made of *KEYWORD lines",
           ".unv": "a universal file starts with a '    -1' line",
           ".bdf": "a Nastran file holds cards such as GRID and CTETRA",
           ".nas": "a Nastran file holds cards such as GRID and CTETRA"}


def clean(b: bytes) -> str:
    from .raw import clean_name
    return clean_name(b.decode("latin-1"))


def _is_obj(lines) -> bool:
    keys = [ln.split(None, 1)[0] for ln in lines[:200] if not ln.startswith(b"#")]
    objish = sum(k in (b"v", b"vn", b"vt", b"f", b"o", b"g", b"s", b"mtllib", b"usemtl")
                 for k in keys)
    return bool(keys) and objish == len(keys) and b"v" in keys


def _gmsh_kind(path: Path, text: bytes) -> Sniffed:
    parts = text.split(b"\n", 2)
    fields = parts[1].split() if len(parts) > 1 else []
    try:
        version = fields[0].decode("ascii")
        binary = int(fields[1]) == 1
    except (IndexError, ValueError, UnicodeDecodeError):
        raise MeshReadError(f"{path}: $MeshFormat header is damaged; export the mesh from gmsh "
                            "again") from None
    if not version.startswith(("2", "4")):
        raise MeshReadError(f"{path}: MSH version {clean(fields[0])} is not supported; save it "
                            "as MSH 4.1 or 2.2")
    return Sniffed("gmsh", f"MSH {version} {'binary' if binary else 'ASCII'}")


def _xml_kind(path: Path, text: bytes) -> Sniffed:
    m = re.search(rb"<VTKFile[^>]*\btype\s*=\s*[\"'](\w+)", text, re.I)
    if re.search(rb"<Xdmf", text, re.I):
        return Sniffed("xdmf", "XDMF")
    if not m:
        raise MeshReadError(f"{path}: XML file that is not a VTK mesh (no <VTKFile type=...>); "
                            "export the mesh as .vtu")
    kind = m.group(1).decode("ascii", "replace")
    if kind == "UnstructuredGrid":
        return Sniffed("vtu", "VTK XML UnstructuredGrid")
    if kind == "PolyData":
        raise MeshReadError(f"{path}: VTK PolyData is a surface, not a volume mesh; "
                            f"{_SURFACE_HINT}")
    raise MeshReadError(f"{path}: VTK XML {clean(m.group(1))} is not an unstructured mesh; "
                        "export it as an UnstructuredGrid (.vtu)")


def _hdf5_kind(path: Path, head: bytes, ext: str) -> Sniffed:
    if ext == ".med" or b"INFOS_GENERALES" in head or b"ENS_MAA" in head:
        return Sniffed("med", "MED (HDF5)")
    if ext in (".cgns", ".adf") or b"CGNSLibraryVersion" in head:
        return Sniffed("cgns", "CGNS (HDF5)")
    if ext in (".e", ".exo", ".ex2", ".exii", ".g", ".gen", ".nc") or b"coordx" in head:
        return Sniffed("exodus", "Exodus II (netCDF-4/HDF5)")
    raise MeshReadError(f"{path}: an HDF5 container whose content is not recognisable (MED, "
                        "CGNS and Exodus are read by their extension .med, .cgns, .e); rename "
                        "it accordingly or export the mesh as .msh or .vtu")
