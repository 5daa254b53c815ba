"""Hostile inputs: tiny files written by the test, each with its exact outcome.

Every case goes through :func:`meshcheck.reading.read_mesh` end to end and
either reads exactly the values written (points, cells, regions) or raises
MeshReadError / UnitsError with the message given here (file, what, where,
what to do).  The input file must be unchanged afterwards.
"""
import hashlib
import io
import struct
import zipfile

import meshio
import numpy as np
import pytest

from hostile.texts import (CUBE, PYR_POINTS, WEDGES, abaqus, msh22, nas_small, nastran,
                           quadratic, unv)
from meshcheck.cells import CELL_TYPES
from meshcheck.errors import MeshReadError, UnitsError
from meshcheck.reading import read_mesh
from meshes import KUHN

MSH = msh22(CUBE, [("tetra", KUHN)])
NAS = nastran(CUBE, [("CTETRA", KUHN)])
INP = abaqus(CUBE, [("C3D4", KUHN)])
UNV = unv(CUBE, [(111, KUHN)])


def _zip() -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as z:
        z.writestr("mesh.msh", MSH)
    return buf.getvalue()


def _meshio_bytes(fmt, points=CUBE, cells=KUHN, **kw) -> bytes:
    import tempfile
    from pathlib import Path
    with tempfile.TemporaryDirectory() as tmp:
        p = Path(tmp) / f"x.{fmt.split(':')[0]}"
        meshio.write(p, meshio.Mesh(points, [("tetra", cells)]),
                     file_format=fmt.split(":")[1] if ":" in fmt else None, **kw)
        return p.read_bytes()


def _cut(data: bytes, frac: float) -> bytes:
    return data[:int(len(data) * frac)]


def _msh41_binary() -> bytes:
    return _meshio_bytes("msh:gmsh", binary=True)


def _with_nan(text: str) -> str:
    return text.replace("3 1.0 1.0 0.0", "3 nan 1.0 0.0")


TETRA10_GMSH = [0, 1, 2, 3, 4, 5, 6, 7, 9, 8]   # gmsh: node 8 on edge 2-3, node 9 on edge 1-3


def _msh_tetra10() -> str:
    pts, q = quadratic(CUBE, KUHN, "tetra10")
    rows = [" ".join(str(x) for x in [k + 1, 11, 2, 1, 1] + list(c[TETRA10_GMSH] + 1))
            for k, c in enumerate(q)]
    body = MSH.split("$Nodes")[0] + "$Nodes\n" + str(len(pts)) + "\n" + "\n".join(
        f"{i + 1} {float(p[0])!r} {float(p[1])!r} {float(p[2])!r}" for i, p in enumerate(pts)) + \
        "\n$EndNodes\n$Elements\n" + str(len(rows)) + "\n" + "\n".join(rows) + "\n$EndElements\n"
    return body


def _mid_nodes_ok(m):
    b = m.blocks[0]
    e = CELL_TYPES[b.type].edges
    p = m.points[b.cells]
    return np.allclose(p[:, e[:, 2]], 0.5 * (p[:, e[:, 0]] + p[:, e[:, 1]]))


def _tets_ok(m):
    return np.array_equal(m.points[:8], CUBE) and np.array_equal(m.blocks[0].cells, KUHN)


PTS_MIX = np.vstack([CUBE, PYR_POINTS + [0, 0, 1]])
MIXED = msh22(PTS_MIX, [("tetra", KUHN[:3]), ("hexahedron", [list(range(8))]),
                        ("wedge", WEDGES), ("pyramid", [[4, 5, 6, 7, 12]])])
INVERTED = msh22(CUBE, [("tetra", KUHN[:, [0, 2, 1, 3]])])
TWO_VOLUMES = msh22(CUBE, [("tetra", KUHN[:3], 5), ("tetra", KUHN[3:], 9)],
                    names={(3, 5): "air", (3, 9): "water", (2, 1): "wall"})
CONTROL_NAME = msh22(CUBE, [("tetra", KUHN, 5)], names={(3, 5): "air\x1b[31m[bold]x\u202e"})
DUP_NODE = msh22(np.vstack([CUBE, CUBE[:1]]), [("tetra", KUHN)])
SURFACE = msh22(CUBE, [("triangle", [[0, 1, 2], [0, 2, 3], [4, 5, 6]])])
HUGE_COUNT = "$MeshFormat\n2.2 0 8\n$EndMeshFormat\n$Nodes\n999999999999\n1 0 0 0\n$EndNodes\n"
VTU_HUGE = ('<?xml version="1.0"?>\n<VTKFile type="UnstructuredGrid" version="0.1">\n'
            '<UnstructuredGrid><Piece NumberOfPoints="2000000000" NumberOfCells="1">\n'
            '</Piece></UnstructuredGrid></VTKFile>\n')


def E(match, exc=MeshReadError):
    return ("error", exc, match)


# name, file name, content (bytes or str), expected outcome: E(...) or a check(mesh) -> bool
CASES = [
    ("empty-msh", "m.msh", b"", E(r"m\.msh: the file is empty; export the mesh again")),
    ("whitespace-bdf", "m.bdf", b" \n\t\n  ", E(r"m\.bdf: the file is empty \(only white space\)")),
    ("whitespace-inp", "m.inp", b"\r\n\r\n", E(r"the file is empty")),
    ("zip-as-msh", "m.msh", _zip(), E(r"m\.msh: the file is a zip archive, not a mesh; unpack")),
    ("zip-as-bdf", "m.bdf", _zip(), E(r"a zip archive")),
    ("utf16", "m.inp", "\ufeff*NODE\n".encode("utf-16-le"), E(r"UTF-16 text; save it as plain")),
    ("bom-msh", "m.msh", b"\xef\xbb\xbf" + MSH.encode(), _tets_ok),
    ("bom-bdf", "m.bdf", b"\xef\xbb\xbf" + NAS.encode(), _tets_ok),
    ("bom-inp", "m.inp", b"\xef\xbb\xbf" + INP.encode(), _tets_ok),
    ("bom-unv", "m.unv", b"\xef\xbb\xbf" + UNV.encode(), _tets_ok),
    ("crlf-msh", "m.msh", MSH.replace("\n", "\r\n"), _tets_ok),
    ("crlf-bdf", "m.bdf", NAS.replace("\n", "\r\n"), _tets_ok),
    ("crlf-inp", "m.inp", INP.replace("\n", "\r\n"), _tets_ok),
    ("crlf-unv", "m.unv", UNV.replace("\n", "\r\n"), _tets_ok),
    ("truncated-msh-ascii", "m.msh", MSH[:MSH.index("$EndElements") - 20],
     E(r"m\.msh: the \$Elements section has no \$EndElements; the file is truncated")),
    ("truncated-bdf-card", "m.bdf", NAS[:NAS.rindex("CTETRA") + 40],
     E(r"m\.bdf:16: CTETRA 6 has 2 node numbers where 4 or 10 are expected")),
    ("truncated-inp", "m.inp", INP[:-6],
     E(r"C3D4 elements need 4 node numbers but the data lines hold|different numbers of values")),
    ("truncated-unv", "m.unv", UNV[:-20], E(r"dataset not closed by a '    -1' line; the file is truncated")),
    ("truncated-msh41-binary", "m.msh", _cut(_msh41_binary(), 0.7),
     E(r"m\.msh: the \$Elements section has no \$EndElements; the file is truncated")),
    ("truncated-msh22-binary", "m.msh", _cut(_meshio_bytes("msh:gmsh22", binary=True), 0.6),
     E(r"m\.msh: the \$Elements section has no \$EndElements; the file is truncated")),
    ("truncated-vtu-binary", "m.vtu", _cut(_meshio_bytes("vtu"), 0.6),
     E(r"m\.vtu: cannot be read as VTK XML UnstructuredGrid")),
    ("truncated-vtk-binary", "m.vtk", _cut(_meshio_bytes("vtk"), 0.5),
     E(r"m\.vtk: element type vtktype\w* cannot be read from this format \(meshio does not "
       r"know it\) or the file is damaged")),
    ("msh-lines-beyond-header", "m.msh", MSH.replace("$Elements\n6\n", "$Elements\n5\n"),
     E(r"lines in the \$Elements section: 6 expected from the pre-scan or the file's own "
       r"counts, 7 found")),
    ("msh-line-with-extra-numbers", "m.msh", MSH.replace("2 4 2 1 1 1 3 4 7", "2 4 2 1 1 1 3 4 7 5"),
     E(r"numbers on element line 2 of the \$Elements section: 9 expected from the pre-scan or "
       r"the file's own counts, 10 found")),
    ("msh22-binary-cut-inside", "m.msh", _meshio_bytes("msh:gmsh22", binary=True)[:-40] +
     b"\n$EndElements\n", E(r"m\.msh: cannot be read as MSH 2\.2 binary")),
    ("nan-msh", "m.msh", _with_nan(MSH),
     E(r"m\.msh: node 2 has a non-finite coordinate \(nan, 1, 0\)")),
    ("nan-vtu", "m.vtu", _meshio_bytes("vtu", np.where(CUBE == 1.0, np.nan, CUBE)),
     E(r"node 1 has a non-finite coordinate \(nan, 0, 0\) and 7 node\(s\) in all")),
    ("nan-bdf-text", "m.bdf", NAS.replace("     1.0     1.0     0.0", "     NaN     1.0     0.0", 1),
     E(r"m\.bdf:5: GRID field 4 is 'NaN', not a real number")),
    ("inf-inp", "m.inp", INP.replace("3, 1.0, 1.0, 0.0", "3, inf, 1.0, 0.0"),
     E(r"node 3 has a non-finite coordinate \(inf, 1, 0\)")),
    ("duplicate-node-kept", "m.msh", DUP_NODE,
     lambda m: m.n_points == 9 and np.array_equal(m.points[8], m.points[0])),
    ("unused-node-kept", "m.bdf", nastran(np.vstack([CUBE, [[5.0, 5.0, 5.0]]]), [("CTETRA", KUHN)]),
     lambda m: m.n_points == 9 and m.points[8].tolist() == [5.0, 5.0, 5.0] and m.n_cells == 6),
    ("inverted-kept-as-written", "m.msh", INVERTED,
     lambda m: np.array_equal(m.blocks[0].cells, KUHN[:, [0, 2, 1, 3]])),
    ("mixed-tet-pyr-wedge-hex", "m.msh", MIXED,
     lambda m: {b.type: len(b) for b in m.blocks} == {"tetra": 3, "hexahedron": 1, "wedge": 2,
                                                     "pyramid": 1}
     and m.blocks[3].cells.tolist() == [[4, 5, 6, 7, 12]]),
    ("quadratic-msh-mid-nodes", "m.msh", _msh_tetra10(),
     lambda m: m.blocks[0].type == "tetra10" and _mid_nodes_ok(m)),
    ("surface-only-msh", "m.msh", SURFACE,
     E(r"m\.msh: only surface cells \(triangles/quads\) in 3D space; this is a boundary mesh")),
    ("several-physical-volumes", "m.msh", TWO_VOLUMES,
     lambda m: m.region.tolist() == [5, 5, 5, 9, 9, 9] and m.region_names == {5: "air", 9: "water"}),
    ("names-are-data", "m.msh", CONTROL_NAME,
     lambda m: m.region_names == {5: "air\\x1b[31m[bold]x\\u202e"}),
    ("declared-count-too-big", "m.msh", HUGE_COUNT,
     E(r"declares 999,999,999,999 points .* more than a file of \d+ bytes can hold")),
    ("vtu-declared-too-big", "m.vtu", VTU_HUGE, E(r"declares 2,000,000,000 points")),
    ("med-needs-h5py", "m.med", b"\x89HDF\r\n\x1a\n" + b"\0" * 100,
     E(r"reading MED files needs the optional Python package 'h5py'")),
    ("exodus-needs-netcdf4", "m.exo", b"CDF\x01" + b"\0" * 100,
     E(r"reading Exodus II files needs the optional Python package 'netCDF4'")),
    ("cgns-needs-h5py", "m.cgns", b"\x89HDF\r\n\x1a\n" + b"\0" * 100,
     E(r"reading CGNS files needs the optional Python package 'h5py'")),
    ("stl-ascii", "m.stl", "solid s\nfacet normal 0 0 1\nendfacet\nendsolid s\n",
     E(r"ASCII STL surface, not a volume mesh; a volume mesh of the fluid domain")),
    ("obj", "m.obj", "v 0 0 0\nv 1 0 0\nv 0 1 0\nf 1 2 3\n", E(r"Wavefront OBJ surface")),
    ("only-grids", "m.bdf", nastran(CUBE, []), E(r"the mesh has no volume cells \(found: none\)")),
    ("unknown-abaqus-element", "m.inp", abaqus(CUBE, [("ZZ3D4", KUHN)]),
     E(r"m\.inp:\d+: element type ZZ3D4 is unknown")),
    ("unv-absurd-node-count", "m.unv", UNV.replace("         7         4", "         7       999", 1),
     E(r"element 1 claims 999 nodes")),
    ("msh-node-out-of-range", "m.msh", MSH.replace(" 1 2 3 7", " 1 2 3 70"),
     E(r"m\.msh: (cannot be read|tetra cells refer to nodes that do not exist)")),
    # 40-unit cube: diagonal 40 sqrt(3) = 69.28; median edge of the Kuhn tets (18 edges of 40,
    # 12 of 40 sqrt(2), 6 of 40 sqrt(3)) = 20 (1 + sqrt(2)) = 48.28; air 343.2 m/s at 1 kHz:
    # wavelength 0.3432 m -> 0.3432 / 48.28 = 0.0071 elements if metres, 7.1 if millimetres
    ("nastran-unit-ambiguous", "m.bdf", nastran(CUBE * 40.0, [("CTETRA", KUHN)]),
     E(r"diagonal 69\.28: 69\.28 m if metres, 0\.06928 m if millimetres; elements per "
       r"wavelength at 1 kHz in air: 0\.0071 if metres, 7\.1 if millimetres\); pass --units",
       UnitsError)),
    ("material-contradicts-size", "m.bdf",
     nastran(CUBE, [("CTETRA", KUHN)], extra=[nas_small("PSOLID", [1, 2]),
                                              nas_small("MAT10", [2, "", "", "343000."])]),
     E(r"the domain size reads as metres .* MAT10 2 gives a speed of sound of 3\.43e\+05, which "
       r"reads as millimetres per second", UnitsError)),
]


@pytest.mark.parametrize("name, filename, content, expected", CASES, ids=[c[0] for c in CASES])
def test_hostile(tmp_path, name, filename, content, expected):
    p = tmp_path / filename
    p.write_bytes(content.encode("utf-8") if isinstance(content, str) else content)
    before = hashlib.sha256(p.read_bytes()).hexdigest()
    units = None if name.startswith(("nastran-unit", "material")) else "m"
    if isinstance(expected, tuple):
        _, exc, match = expected
        with pytest.raises(exc, match=match) as info:
            read_mesh(p, units=units)
        assert "\n" not in str(info.value)                 # one line
        assert str(p) in str(info.value) or p.name in str(info.value)
    else:
        assert expected(read_mesh(p, units=units))
    assert hashlib.sha256(p.read_bytes()).hexdigest() == before


def test_at_least_forty_cases():
    assert len(CASES) >= 40


def test_missing_and_folder(tmp_path):
    with pytest.raises(MeshReadError, match="no such file"):
        read_mesh(tmp_path / "nope.bdf")
    with pytest.raises(MeshReadError, match=r"not a file \(a folder\?\)"):
        read_mesh(tmp_path)


def test_binary_stl_even_with_solid_header(tmp_path):
    data = b"solid lies".ljust(80) + struct.pack("<I", 1) + b"\0" * 50
    (tmp_path / "x.stl").write_bytes(data)
    with pytest.raises(MeshReadError, match=r"binary STL surface \(1 triangles\)"):
        read_mesh(tmp_path / "x.stl")
