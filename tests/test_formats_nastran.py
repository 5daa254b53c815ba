"""Nastran bulk data: field formats, continuations, coordinate systems, INCLUDE, checks.

References: the card layouts of the MSC/NX Nastran Quick Reference Guide (small
field 8 columns, large field 16 columns with ``*``, free field with commas;
CHEXA G9-G12 bottom, G13-G16 vertical, G17-G20 top mid-side nodes; CPENTA
G7-G9 bottom, G10-G12 vertical, G13-G15 top); coordinate systems CORD2R/C/S
(origin A, z axis towards B, x-z plane through C; cylindrical (r, theta deg, z),
spherical (r, theta, phi) with theta from the z axis) - closed forms below;
gmsh's own BDF writer and meshio's for the round trips.
"""
import hashlib
import math

import numpy as np
import pytest

from hostile.texts import (CUBE, PYR_POINTS, WEDGES, nas_free, nas_large, nas_small, nastran,
                           quadratic, to_nastran_order)
from meshcheck.cells import CELL_TYPES
from meshcheck.errors import MeshReadError
from meshcheck.formats.nastran import read_nastran
from meshcheck.reading import read_mesh
from meshes import KUHN


@pytest.fixture(autouse=True, params=["numpy", pytest.param("numba", marks=pytest.mark.skipif(
    not __import__("meshcheck.kernels").kernels.available(), reason="numba not installed"))])
def kernels(request, monkeypatch):
    """Every test twice: the numpy reader, and the compiled line table and field parsers
    (which a small file takes only in MESHCHECK_KERNELS=numba mode)."""
    monkeypatch.setenv("MESHCHECK_KERNELS", request.param)
    return request.param


def _write(tmp_path, text, name="m.bdf"):
    p = tmp_path / name
    p.write_bytes(text.encode() if isinstance(text, str) else text)
    return p


def _mid_ok(mesh) -> bool:
    """Every mid-side node sits at the midpoint of its edge (VTK order of cells.py)."""
    for b in mesh.blocks:
        e = CELL_TYPES[b.type].edges
        if (e[:, 2] < 0).all():
            continue
        p = mesh.points
        mids = p[b.cells[:, e[:, 2]]]
        half = 0.5 * (p[b.cells[:, e[:, 0]]] + p[b.cells[:, e[:, 1]]])
        if not np.allclose(mids, half, atol=1e-12):
            return False
    return True


@pytest.mark.parametrize("style", ["small", "large", "free"])
def test_field_styles_read_the_same(tmp_path, style):
    p = _write(tmp_path, nastran(CUBE, [("CTETRA", KUHN)], style=style))
    m = read_mesh(p, units="m")
    assert np.array_equal(m.points, CUBE)
    assert np.array_equal(m.blocks[0].cells, KUHN)
    assert m.region.tolist() == [1] * 6 and m.region_names == {1: "PID 1"}


@pytest.mark.parametrize("variant", ["lower", "tabs", "crlf", "bom", "no_begin_end",
                                     "case_control", "comments", "blank_lines"])
def test_dialects(tmp_path, variant):
    text = nastran(CUBE, [("CTETRA", KUHN)])
    if variant == "lower":
        text = text.lower()
    elif variant == "tabs":          # fields separated by tabs (each jumps to the next 8-column stop)
        text = "\n".join("\t".join(ln[k:k + 8].strip() for k in range(0, len(ln), 8))
                         if ln[:1].isalpha() and not ln.startswith(("BEGIN", "ENDDATA")) else ln
                         for ln in text.split("\n"))
    elif variant == "crlf":
        text = text.replace("\n", "\r\n")
    elif variant == "bom":
        text = "\ufeff" + text
    elif variant == "no_begin_end":
        text = text.replace("BEGIN BULK\n", "").replace("ENDDATA\n", "")
    elif variant == "case_control":
        text = "SOL 103\nCEND\nTITLE = X\nSUBCASE 1\n  METHOD = 1\n" + text + "GRID,99,,5.,5.,5.\n"
    elif variant == "comments":
        text = text.replace("\nCTETRA", " $ trailing comment\n$ a comment\nCTETRA")
    elif variant == "blank_lines":
        text = text.replace("\nCTETRA", "\n\n   \nCTETRA")
    if variant == "tabs":
        assert "\t" in text
    m = read_mesh(_write(tmp_path, text), units="m")
    assert np.array_equal(m.points[:8], CUBE)
    assert np.array_equal(m.blocks[0].cells, KUHN)
    if variant == "case_control":          # the GRID after ENDDATA is not bulk data
        assert m.n_points == 8


def test_mixed_styles_and_markers(tmp_path):
    """Large-field GRID*, free-field and small-field cards with named continuation markers."""
    lines = ["BEGIN BULK"]
    for i, p in enumerate(CUBE):
        if i % 3 == 0:
            lines.append(nas_large("GRID", [i + 1, "", *map(float, p)]))
        elif i % 3 == 1:
            lines.append(nas_free("GRID", [i + 1, "", *map(float, p)]))
        else:
            lines.append(nas_small("GRID", [i + 1, "", *map(float, p)]))
    lines.append("CHEXA   1       7       1       2       3       4       5       6       +HX1")
    lines.append("+HX1    7       8")
    lines.append("ENDDATA")
    m = read_mesh(_write(tmp_path, "\n".join(lines) + "\n"), units="m")
    assert np.array_equal(m.points, CUBE)
    assert m.blocks[0].type == "hexahedron"
    assert m.blocks[0].cells.tolist() == [list(range(8))]
    assert m.region_names == {7: "PID 7"}


def test_nastran_short_exponent_and_big_ids(tmp_path):
    """Reals like 1.-3 (= 1e-3) and 16-digit ids in large field."""
    text = "\n".join([
        "GRID*   123456789012345                 0.0             1.-3",
        "*       2.5+1",
        "GRID    2               1.      0.      0.",
        "GRID    3               0.      1.D0    0.",
        "GRID    4               0.      0.      1.",
        "CTETRA  1       1       2       3       4       ",
    ]) + "\n"
    text = text.replace("CTETRA  1       1       2       3       4       ",
                        "CTETRA* 1               1               123456789012345 2\n"
                        "*       3               4")
    raw = read_nastran(_write(tmp_path, text))
    assert raw.points[0].tolist() == [0.0, 1e-3, 25.0]
    assert raw.points[2].tolist() == [0.0, 1.0, 0.0]
    assert raw.point_ids[0] == 123456789012345
    assert raw.blocks[0].cells.tolist() == [[0, 1, 2, 3]]


@pytest.mark.parametrize("ctype, card, points, cells", [
    ("tetra10", "CTETRA", CUBE, KUHN),
    ("hexahedron20", "CHEXA", CUBE, np.arange(8)[None, :]),
    ("wedge15", "CPENTA", CUBE, WEDGES),
])
def test_quadratic_mid_nodes_land_on_edge_midpoints(tmp_path, ctype, card, points, cells):
    pts, q = quadratic(points, cells, ctype)
    text = nastran(pts, [(card, to_nastran_order(ctype, q))])
    m = read_mesh(_write(tmp_path, text), units="m")
    assert m.blocks[0].type == ctype
    assert np.array_equal(m.blocks[0].cells, q)
    assert _mid_ok(m)


def test_mixed_linear_cells(tmp_path):
    pts = np.vstack([CUBE, PYR_POINTS + [2, 0, 0]])
    text = nastran(pts, [("CTETRA", KUHN), ("CHEXA", [list(range(8))]), ("CPENTA", WEDGES),
                         ("CPYRAM", [list(range(8, 13))])])
    m = read_mesh(_write(tmp_path, text), units="m")
    assert {b.type: len(b) for b in m.blocks} == {"tetra": 6, "hexahedron": 1, "wedge": 2,
                                                 "pyramid": 1}


def _frame_text(kind, a, b, c, cid=5, rid=0):
    return nas_small(f"CORD2{kind}", [cid, rid, *a, *b, *c])


@pytest.mark.parametrize("kind, local, expected", [
    # rectangular: origin (1,2,3), z along +x, x-z plane through (1,2,4) -> x' = +z
    ("R", (1.0, 0.0, 0.0), (1.0, 2.0, 4.0)),
    ("R", (0.0, 1.0, 0.0), (1.0, 1.0, 3.0)),
    # cylindrical (r, theta deg, z) about the same axes
    ("C", (1.0, 90.0, 0.5), (1.5, 1.0, 3.0)),
    # spherical (r, theta from z, phi)
    ("S", (2.0, 90.0, 0.0), (1.0, 2.0, 5.0)),
    ("S", (2.0, 0.0, 0.0), (3.0, 2.0, 3.0)),
])
def test_grid_in_local_systems(tmp_path, kind, local, expected):
    """CORD2x with A=(1,2,3), B=(2,2,3), C=(1,2,4): e_z=(1,0,0), e_x=(0,0,1), e_y=e_z x e_x=(0,-1,0)."""
    frame = _frame_text(kind, (1, 2, 3), (2, 2, 3), (1, 2, 4))
    text = nastran(CUBE, [("CTETRA", KUHN)], extra=[frame, nas_small("GRID", [9, 5, *local])])
    raw = read_nastran(_write(tmp_path, text))
    got = raw.points[list(raw.point_ids).index(9)]
    assert got == pytest.approx(expected, abs=1e-12)


def test_chained_systems(tmp_path):
    """CORD2R 6 defined in CORD2R 5 (a 90 degree turn about z, shifted): closed form."""
    f5 = _frame_text("R", (10, 0, 0), (10, 0, 1), (10, 1, 0), cid=5)   # x' = +y, y' = -x
    f6 = _frame_text("R", (1, 0, 0), (1, 0, 1), (2, 0, 0), cid=6, rid=5)
    text = nastran(CUBE, [("CTETRA", KUHN)], extra=[f6, f5, nas_small("GRID", [9, 6, 1., 0., 0.])])
    raw = read_nastran(_write(tmp_path, text))
    # in 5: origin (1,0,0), x'' = x' -> point (2,0,0) in 5 -> basic (10, 2, 0)
    assert raw.points[-1] == pytest.approx((10.0, 2.0, 0.0), abs=1e-12)


def test_grdset_default_cp(tmp_path):
    frame = _frame_text("R", (0, 0, 0), (0, 0, 1), (1, 0, 0), cid=3)
    text = nastran(CUBE + 0, [("CTETRA", KUHN)],
                   extra=[frame, nas_small("GRDSET", ["", 3])])
    text = text.replace("CORD2R", "CORD2R")
    raw = read_nastran(_write(tmp_path, text))
    assert np.allclose(raw.points, CUBE)     # identity frame: same points, CP honoured


@pytest.mark.parametrize("extra, match", [
    ([nas_small("GRID", [9, 4, 0., 0., 0.])], r"GRID 9 has CP = 4, which is not defined"),
    ([nas_small("CORD1R", [4, 1, 2, 3]), nas_small("GRID", [9, 4, 0., 0., 0.])],
     r"GRID 9 has CP = 4, which is a CORD1R system"),
    ([nas_small("CORD2R", [4, 7, 0, 0, 0, 0, 0, 1, 1, 0, 0]),
      nas_small("GRID", [9, 4, 0., 0., 0.])], r"CORD2R 4 refers to coordinate system 7"),
    ([nas_small("CORD2R", [4, 5, 0, 0, 0, 0, 0, 1, 1, 0, 0]),
      nas_small("CORD2R", [5, 4, 0, 0, 0, 0, 0, 1, 1, 0, 0]),
      nas_small("GRID", [9, 4, 0., 0., 0.])], r"refer to each other in a cycle"),
    ([nas_small("CORD2R", [4, 0, 0, 0, 0, 0, 0, 1, 0, 0, 2]),
      nas_small("GRID", [9, 4, 0., 0., 0.])], r"has C on the z axis"),
])
def test_coordinate_system_refusals(tmp_path, extra, match):
    text = nastran(CUBE, [("CTETRA", KUHN)], extra=extra)
    with pytest.raises(MeshReadError, match=match):
        read_nastran(_write(tmp_path, text))


# ---- INCLUDE ---------------------------------------------------------------------
def _split(tmp_path, main_include="INCLUDE 'parts/elements.bdf'"):
    grids = nastran(CUBE, [], begin=True, end=False)
    elems = "\n".join(nas_small("CTETRA", [k + 1, 1, *(c + 1)]) for k, c in enumerate(KUHN))
    (tmp_path / "parts").mkdir(exist_ok=True)
    (tmp_path / "parts" / "elements.bdf").write_text(elems + "\n")
    return _write(tmp_path, grids + main_include + "\nENDDATA\n", "main.bdf")


def test_include_relative_to_including_file(tmp_path):
    p = _split(tmp_path)
    before = hashlib.sha256(p.read_bytes()).hexdigest()
    m = read_mesh(p, units="m")
    assert np.array_equal(m.blocks[0].cells, KUHN)
    assert hashlib.sha256(p.read_bytes()).hexdigest() == before


def test_nested_include_and_continued_name(tmp_path):
    p = _split(tmp_path, "include 'parts/\n        elements.bdf'")
    (tmp_path / "parts" / "elements.bdf").write_text(
        "INCLUDE 'more.bdf'\n" + (tmp_path / "parts" / "elements.bdf").read_text())
    (tmp_path / "parts" / "more.bdf").write_text("$ nothing but a comment\n")
    assert read_mesh(p, units="m").n_cells == 6


def test_include_error_points_at_included_file_and_line(tmp_path):
    p = _split(tmp_path)
    f = tmp_path / "parts" / "elements.bdf"
    f.write_text(f.read_text().replace("CTETRA         3", "CTETRA        x3"))
    with pytest.raises(MeshReadError, match=r"parts/elements\.bdf:3: CTETRA field 2 is 'x3'"):
        read_mesh(p, units="m")


@pytest.mark.parametrize("case, match", [
    ("outside", r"points outside the mesh folder .*--allow-outside"),
    ("cycle", r"includes itself"),
    ("twice", r"included a second time"),
    ("missing", r"'parts/nope\.bdf' not found"),
])
def test_include_refusals(tmp_path, case, match):
    sub = tmp_path / "model"
    sub.mkdir()
    if case == "outside":
        (tmp_path / "secret.bdf").write_text("GRID,100,,0.,0.,0.\n")
        p = _split(sub, "INCLUDE '../secret.bdf'")
    elif case == "cycle":
        p = _split(sub, "INCLUDE 'parts/elements.bdf'")
        (sub / "parts" / "elements.bdf").write_text("INCLUDE '../main.bdf'\n")
    elif case == "twice":
        p = _split(sub, "INCLUDE 'parts/elements.bdf'\nINCLUDE 'parts/elements.bdf'")
    else:
        p = _split(sub, "INCLUDE 'parts/nope.bdf'")
    with pytest.raises(MeshReadError, match=match):
        read_mesh(p, units="m")


def test_include_outside_allowed_on_request(tmp_path):
    sub = tmp_path / "model"
    sub.mkdir()
    (tmp_path / "more.bdf").write_text("GRID,100,,0.5,0.5,0.5\n")
    p = _split(sub, "INCLUDE '../more.bdf'")
    raw = read_nastran(p, allow_outside=True)
    assert 100 in raw.point_ids.tolist()


# ---- refusals with place and remedy ------------------------------------------------
@pytest.mark.parametrize("mutate, match", [
    (lambda t: t.replace("CTETRA         1       1       1", "CTETRA         1       1      99"),
     r"m\.bdf:11: CTETRA 1 refers to a GRID that is not defined \(GRID 99\)"),
    (lambda t: t.replace("GRID           2", "GRID           1"),
     r"m\.bdf:4: GRID 1 is defined twice \(first at .*m\.bdf:3\)"),
    (lambda t: t.replace("CTETRA         2", "CTETRA         1"),
     r"element number 1 is used twice"),
    (lambda t: t.replace("CTETRA         1       1       1       2       3       7",
                         "CTETRA         1       1       1       2       3       7       5"),
     r"CTETRA 1 has 5 node numbers where 4 or 10 are expected"),
    (lambda t: t.replace("GRID           3             1.0", "GRID           3             1.x"),
     r"m\.bdf:5: GRID field 4 is '1\.x', not a real number"),
    (lambda t: t.replace("BEGIN BULK", "BEGIN BULK\nBEGIN SUPER=2"), r"a second BEGIN"),
    (lambda t: "CEND\n" + t.replace("BEGIN BULK\n", ""), r"case control \(CEND\) but no BEGIN BULK"),
    (lambda t: t.replace("BEGIN BULK", "BEGIN BULK\n+       1"), r"continuation line without a card"),
    (lambda t: t.replace("ENDDATA", "CHACAB,9,1,1,2,3,4,5,6\nENDDATA"),
     r"element card CHACAB is not supported"),
    (lambda t: t.replace("CTETRA         1       1", "CTETRA,1,1,1,2,3,7,,,,,,,\nX"),
     r"free-field line with 14 fields"),
])
def test_refusals_name_file_line_and_fix(tmp_path, mutate, match):
    text = mutate(nastran(CUBE, [("CTETRA", KUHN)]))
    with pytest.raises(MeshReadError, match=match):
        read_mesh(_write(tmp_path, text), units="m")


def test_material_speed_settles_an_ambiguous_unit(tmp_path):
    """A 50 x 50 x 50 box: 50 m or 50 mm both plausible; MAT10 C = 343000 (mm/s) says mm."""
    pts = CUBE * 50.0
    extra = [nas_small("PSOLID", [1, 3, "", "", "", "", "PFLUID"]),
             nas_small("MAT10", [3, "", "1.2-9", "343000."])]
    p = _write(tmp_path, nastran(pts, [("CTETRA", KUHN)], extra=extra))
    m = read_mesh(p)
    assert m.unit == "mm"
    assert m.region_names == {1: "PID 1 (fluid)"}
    raw = read_nastran(p)
    assert raw.speeds[0].card == "MAT10 3" and raw.speeds[0].speed == 343000.0


@pytest.mark.parametrize("units, c_file", [("mm", 1.481e6), ("m", 1481.0)])
def test_material_speed_reaches_the_mesh_in_metres_per_second(tmp_path, units, c_file):
    # MAT10 C is in the deck's length unit per second: 1.481e6 mm/s = 1481 m/s
    extra = [nas_small("PSOLID", [1, 3, "", "", "", "", "PFLUID"]),
             nas_small("MAT10", [3, "", "", repr(c_file)])]
    m = read_mesh(_write(tmp_path, nastran(CUBE * 50.0, [("CTETRA", KUHN)], extra=extra)),
                  units=units)
    assert m.material_speeds == {1: (pytest.approx(1481.0, rel=1e-12), "MAT10 3")}


def test_material_bulk_and_density_give_the_speed(tmp_path):
    """MAT10 without C: c = sqrt(BULK / RHO) = sqrt(141179 / 1.2) = 343.0 m/s."""
    extra = [nas_small("PSOLID", [1, 3]), nas_small("MAT10", [3, "141179.", "1.2"])]
    raw = read_nastran(_write(tmp_path, nastran(CUBE, [("CTETRA", KUHN)], extra=extra)))
    assert raw.speeds[0].speed == pytest.approx(math.sqrt(141179 / 1.2))
    assert raw.speeds[0].regions == (1,)


def test_surface_only_file_is_refused(tmp_path):
    tris = [[0, 1, 2], [0, 2, 3], [4, 5, 6]]
    p = _write(tmp_path, nastran(CUBE, [("CTRIA3", tris)]))
    with pytest.raises(MeshReadError, match="only surface cells"):
        read_mesh(p, units="m")


@pytest.mark.parametrize("writer", ["meshio_large", "meshio_small", "meshio_free_points",
                                    "gmsh_small", "gmsh_large", "gmsh_free"])
def test_round_trip_external_writers(tmp_path, writer):
    import meshio

    from meshes import tet_box
    mesh = tet_box((2, 2, 2))
    pts, cells = mesh.points, mesh.blocks[0].cells
    p = tmp_path / "rt.bdf"
    if writer.startswith("meshio"):
        kw = {"meshio_small": {"point_format": "fixed-small"},
              "meshio_free_points": {"point_format": "free"}}.get(writer, {})
        meshio.write(p, meshio.Mesh(pts, [("tetra", cells)]), **kw)
        m = read_mesh(p, units="m")
        assert np.allclose(m.points, pts, atol=1e-6)
        assert np.array_equal(m.blocks[0].cells, cells)
        return
    import gmsh
    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        gmsh.model.add("rt")
        tags = np.arange(1, len(pts) + 1)
        gmsh.model.addDiscreteEntity(3, 1)
        gmsh.model.mesh.addNodes(3, 1, tags, pts.ravel())
        gmsh.model.mesh.addElementsByType(1, 4, np.arange(1, len(cells) + 1), (cells + 1).ravel())
        gmsh.option.setNumber("Mesh.BdfFieldFormat", {"gmsh_free": 0, "gmsh_small": 1,
                                                       "gmsh_large": 2}[writer])
        gmsh.option.setNumber("Mesh.SaveAll", 1)
        gmsh.write(str(p))
    finally:
        gmsh.finalize()
    m = read_mesh(p, units="m")
    assert np.allclose(m.points, pts, atol=1e-6)
    assert np.array_equal(m.blocks[0].cells, cells)


def test_columns_73_to_80_hold_no_data(tmp_path):
    """Small and large field: columns 73-80 are the continuation field, not data (here
    digits, which would read as a fifth node)."""
    lines = ["BEGIN BULK"] + [nas_small("GRID", [i + 1, "", *map(float, p)])
                              for i, p in enumerate(CUBE)]
    for k, cell in enumerate(KUHN):
        card = "CTETRA  " + "".join(f"{v:<8d}" for v in (k + 1, 1, *(cell + 1)))
        lines.append(card.ljust(72) + "12345678")
    # a large field GRID* on one line: its z would be field 5, on a continuation line
    lines[1] = "GRID*   1" + " " * 31 + f"{0.0:<16.1f}" * 2 + "1.5"
    lines.append("ENDDATA")
    m = read_mesh(_write(tmp_path, "\n".join(lines) + "\n"), units="m")
    assert m.blocks[0].type == "tetra" and np.array_equal(m.blocks[0].cells, KUHN)
    assert m.points[0].tolist() == [0.0, 0.0, 0.0]
