"""Format detection by content (magic bytes and first keywords), not by extension.

References: the published magic numbers and headers of each format (HDF5
signature 89 48 44 46 0D 0A 1A 0A; netCDF 'CDF' 01/02; zip 'PK' 03 04; gzip
1F 8B; binary STL = 80-byte header + uint32 count + 50 bytes per triangle;
MSH '$MeshFormat'; VTK '# vtk DataFile Version' and '<VTKFile type=...>';
universal files open with a '    -1' delimiter; Abaqus with '*' keywords).
"""
import struct

import pytest

from meshcheck.errors import MeshReadError
from meshcheck.formats.sniff import sniff

CASES = [
    ("a.msh", b"$MeshFormat\n4.1 0 8\n$EndMeshFormat\n", "gmsh", "MSH 4.1 ASCII"),
    ("a.msh", b"$MeshFormat\n2.2 1 8\n\x01\x00\x00\x00\n$EndMeshFormat\n", "gmsh", "MSH 2.2 binary"),
    ("a.txt", b"\n\n$MeshFormat\n4.1 0 8\n", "gmsh", "MSH 4.1 ASCII"),
    ("a.bdf", b"$MeshFormat\n4.1 0 8\n", "gmsh", "MSH 4.1 ASCII"),          # content wins
    ("a.dat", b"$ comment\n$ more\nGRID,1,,0.,0.,0.\n", "nastran", ""),
    ("a.nas", b"SOL 103\nCEND\nBEGIN BULK\n", "nastran", ""),
    ("a.bdf", b"INCLUDE 'x.bdf'\n", "nastran", ""),
    ("a.bdf", b"pbush   1\n", "nastran", ""),                                # by extension
    ("a.inp", b"** comment\n*HEADING\n", "abaqus", ""),
    ("a.txt", b"*node\n1, 0, 0, 0\n", "abaqus", ""),
    ("a.unv", b"    -1\n  2411\n", "unv", ""),
    ("a.dat", b"    -1\n   164\n", "unv", ""),
    ("a.vtu", b"<?xml version='1.0'?>\n<VTKFile type=\"UnstructuredGrid\">", "vtu", ""),
    ("a.xml", b"<VTKFile type='UnstructuredGrid' version='1.0'>", "vtu", ""),
    ("a.vtk", b"# vtk DataFile Version 4.2\nx\nASCII\nDATASET UNSTRUCTURED_GRID\n", "vtk", ""),
    ("a.med", b"\x89HDF\r\n\x1a\n" + b"\0" * 64, "med", ""),
    ("a.cgns", b"\x89HDF\r\n\x1a\n" + b"\0" * 64, "cgns", ""),
    ("a.e", b"\x89HDF\r\n\x1a\n" + b"\0" * 64, "exodus", ""),
    ("a.exo", b"CDF\x01" + b"\0" * 64, "exodus", ""),
    ("a.mesh", b"MeshVersionFormatted 2\n", "medit", ""),
]


@pytest.mark.parametrize("name, head, kind, detail", CASES,
                         ids=[f"{c[2]}-{i}" for i, c in enumerate(CASES)])
def test_detected(tmp_path, name, head, kind, detail):
    s = sniff(tmp_path / name, head, len(head))
    assert s.kind == kind
    if detail:
        assert s.detail == detail


def _binary_stl(n=2):
    return b"solid but binary".ljust(80, b" ") + struct.pack("<I", n) + b"\0" * (50 * n)


REFUSED = [
    ("a.msh", b"", "the file is empty; export"),
    ("a.bdf", b"  \n\t \n", r"empty \(only white space\)"),
    ("a.msh", b"PK\x03\x04rest", "a zip archive, not a mesh; unpack it"),
    ("a.inp", b"\x1f\x8b\x08\x00", "a gzip archive"),
    ("a.bdf", b"\xff\xfeG\x00R\x00", "UTF-16 text"),
    ("a.stl", b"solid part\nfacet normal 0 0 1\n", "ASCII STL surface, not a volume mesh"),
    ("a.msh", _binary_stl(), r"binary STL surface \(2 triangles\)"),
    ("a.obj", b"# obj\nv 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", "Wavefront OBJ surface"),
    ("a.ply", b"ply\nformat ascii 1.0\n", "PLY surface"),
    ("a.off", b"OFF\n3 1 0\n", "OFF surface"),
    ("a.vtp", b"<?xml version='1.0'?><VTKFile type='PolyData'>", "PolyData is a surface"),
    ("a.vts", b"<VTKFile type='StructuredGrid'>", "StructuredGrid is not an unstructured mesh"),
    ("a.vtk", b"# vtk DataFile Version 3.0\nx\nASCII\nDATASET POLYDATA\n", "POLYDATA is a surface"),
    ("a.h5", b"\x89HDF\r\n\x1a\n" + b"\0" * 64, "HDF5 container whose content is not recognisable"),
    ("a.nc", b"CDF\x02" + b"\0" * 8, None),
    ("a.msh", b"$NOD\n1\n1 0 0 0\n$ENDNOD\n", "legacy gmsh 1 format"),
    ("a.msh", b"$MeshFormat\n3.0 0 8\n", "MSH version 3.0 is not supported"),
    ("a.msh", b"hello world\n", r"unknown mesh format \(first line 'hello world'; a gmsh \.msh file"),
    ("a.xyz", b"\x00\x01\x02\x03binary", "binary content of no recognised mesh format"),
]


@pytest.mark.parametrize("name, head, match", REFUSED, ids=[f"refused-{i}" for i in range(len(REFUSED))])
def test_refused(tmp_path, name, head, match):
    if match is None:     # netCDF named .nc is taken as Exodus (netCDF is how Exodus is stored)
        assert sniff(tmp_path / name, head, len(head)).kind == "exodus"
        return
    with pytest.raises(MeshReadError, match=match):
        sniff(tmp_path / name, head, len(head))
