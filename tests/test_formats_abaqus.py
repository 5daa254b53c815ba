"""Abaqus input files: parts and instances, element names, keywords, sets, materials.

References: Abaqus keyword conventions (case-insensitive keywords, ``**``
comments, ``*PART``/``*INSTANCE``/``*ASSEMBLY``, instance data lines =
translation then rotation about the axis a-b by an angle in degrees, applied
after the translation - from memory of the Abaqus Keywords Reference);
rotation checked against the closed form of a quarter turn; node orders of
C3D10/C3D20/C3D15 checked geometrically (mid-side nodes at edge midpoints)
and against meshio's and gmsh's .inp writers in test_formats_roundtrip.py.
"""
import math

import numpy as np
import pytest

from hostile.texts import CUBE, WEDGES, abaqus, quadratic
from meshcheck.cells import CELL_TYPES
from meshcheck.errors import MeshReadError
from meshcheck.formats.abaqus import abaqus_cell_type, read_abaqus
from meshcheck.reading import read_mesh
from meshes import KUHN


def _write(tmp_path, text, name="m.inp"):
    p = tmp_path / name
    p.write_text(text)
    return p


@pytest.mark.parametrize("name, expected", [
    ("C3D4", "tetra"), ("C3D4H", "tetra"), ("AC3D4", "tetra"), ("DC3D4", "tetra"),
    ("C3D10", "tetra10"), ("C3D10MH", "tetra10"), ("C3D10HS", "tetra10"), ("AC3D10", "tetra10"),
    ("DC3D10", "tetra10"), ("C3D8", "hexahedron"), ("C3D8R", "hexahedron"),
    ("C3D8RH", "hexahedron"), ("C3D8I", "hexahedron"), ("AC3D8R", "hexahedron"),
    ("DC3D8", "hexahedron"), ("C3D20R", "hexahedron20"), ("AC3D20", "hexahedron20"),
    ("DC3D20", "hexahedron20"), ("C3D6", "wedge"), ("AC3D6", "wedge"), ("C3D15", "wedge15"),
    ("AC3D15", "wedge15"), ("C3D5", "pyramid"), ("c3d4", "tetra"), ("CPS4R", "quad"),
    ("AC2D3", "triangle"), ("CPE8", "quad8"), ("S4R", None), ("SFM3D3", None), ("B31", None),
    ("ACIN3D8", None), ("ASI4", None), ("R3D4", None), ("MASS", None),
])
def test_element_names(name, expected):
    assert abaqus_cell_type(name) == expected


@pytest.mark.parametrize("name, match", [("C3D27", "27-node C3D27 elements are not supported"),
                                         ("CAX4", "axisymmetric"), ("XYZ8", "XYZ8 is unknown")])
def test_element_names_refused(name, match):
    with pytest.raises(ValueError, match=match):
        abaqus_cell_type(name)


def test_keywords_case_comments_and_several_node_blocks(tmp_path):
    lines = ["*heading", "keywords in any case", "*Node, Nset=first"]
    lines += [f"{i + 1}, {p[0]}, {p[1]}, {p[2]}" for i, p in enumerate(CUBE[:4])]
    lines += ["** a comment between node blocks", "*NODE", "** comment inside the block"]
    lines += [f"{i + 5}, {p[0]}, {p[1]}, {p[2]}" for i, p in enumerate(CUBE[4:])]
    lines += ["", "*element, type=c3d4, elset=Air", "** comment in element data"]
    lines += [", ".join(str(x) for x in [k + 1, *(c + 1)]) for k, c in enumerate(KUHN)]
    m = read_mesh(_write(tmp_path, "\n".join(lines) + "\n"), units="m")
    assert np.array_equal(m.points, CUBE)
    assert np.array_equal(m.blocks[0].cells, KUHN)
    assert m.region_names == {1: "Air"}


def test_continued_element_lines(tmp_path):
    """C3D20: 21 numbers, written over two lines (the first ends with a comma)."""
    pts, q = quadratic(CUBE, np.arange(8)[None, :], "hexahedron20")
    nodes = [1] + list(q[0] + 1)
    text = abaqus(pts, []) + "*ELEMENT, TYPE=C3D20R\n" + \
        ", ".join(map(str, nodes[:16])) + ",\n" + ", ".join(map(str, nodes[16:])) + "\n"
    m = read_mesh(_write(tmp_path, text), units="m")
    assert m.blocks[0].type == "hexahedron20"
    assert np.array_equal(m.blocks[0].cells, q)


@pytest.mark.parametrize("ctype, etype, cells", [("tetra10", "C3D10", KUHN),
                                                  ("wedge15", "C3D15", WEDGES)])
def test_quadratic_mid_nodes(tmp_path, ctype, etype, cells):
    pts, q = quadratic(CUBE, cells, ctype)
    m = read_mesh(_write(tmp_path, abaqus(pts, [(etype, q)])), units="m")
    e = CELL_TYPES[ctype].edges
    p = m.points[m.blocks[0].cells]
    assert np.allclose(p[:, e[:, 2]], 0.5 * (p[:, e[:, 0]] + p[:, e[:, 1]]))


PART = """*Part, name=Box
*Node
1, 0., 0., 0.
2, 1., 0., 0.
3, 0., 1., 0.
4, 0., 0., 1.
*Element, type=AC3D4
1, 1, 2, 3, 4
*Elset, elset=fluid
1
*Solid Section, elset=fluid, material=Air
*End Part
"""
MATERIAL = """*Material, name=Air
*Acoustic Medium, bulk modulus
141179.,
*Density
1.2,
"""


def test_instances_translated_rotated_and_renumbered(tmp_path):
    text = PART + """*Assembly, name=A
*Instance, name=B1, part=Box
*End Instance
*Instance, name=B2, part=Box
 10., 0., 0.
 0., 0., 0., 0., 0., 1., 90.
*End Instance
*End Assembly
""" + MATERIAL
    raw = read_abaqus(_write(tmp_path, text))
    # B2: translate by (10,0,0), then a quarter turn about z: (x, y) -> (-y, x)
    expected_b2 = [[0, 10, 0], [0, 11, 0], [-1, 10, 0], [0, 10, 1]]
    assert raw.points[:4].tolist() == [[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]]
    assert np.allclose(raw.points[4:], expected_b2, atol=1e-12)
    assert raw.blocks[0].cells.tolist() == [[0, 1, 2, 3], [4, 5, 6, 7]]
    assert raw.region_names == {1: "B1.fluid", 2: "B2.fluid"}
    assert raw.blocks[0].region.tolist() == [1, 2]
    assert [s.speed for s in raw.speeds] == [pytest.approx(math.sqrt(141179 / 1.2))] * 2


@pytest.mark.parametrize("text, match", [
    (PART, r"parts are defined but no \*INSTANCE uses them"),
    (PART + "*Assembly, name=A\n*Instance, name=I, part=Nope\n*End Instance\n*End Assembly\n",
     r"instance 'I' uses part 'Nope', which is not defined"),
    (PART + "*Assembly, name=A\n*Instance, name=I, part=Box\n 1., 2.\n*End Instance\n",
     r"translation needs 3 values"),
    ("*NODE, SYSTEM=C\n1, 1., 0., 0.\n", r"SYSTEM=C .* is not supported"),
    ("*SYSTEM\n0.,0.,0.\n*NODE\n1, 1., 0., 0.\n", r"\*SYSTEM .* is not supported"),
    ("*NODE\n1, 0., 0., 0.\n*NGEN\n1, 5\n", r"\*NGEN .* is not supported"),
    ("*NODE\n1,0,0,0\n2,1,0,0\n3,0,1,0\n4,0,0,1\n*ELEMENT, TYPE=C3D4\n1, 1, 2, 3\n",
     r"C3D4 elements need 4 node numbers but the data lines hold 3"),
    ("*NODE\n1,0,0,0\n2,1,0,0\n3,0,1,0\n4,0,0,1\n*ELEMENT, TYPE=C3D4\n1, 1, 2, 3, 9\n",
     r"element 1 refers to node 9, which is not defined"),
    ("*NODE\n1,0,0,0\n1,1,0,0\n", r"node 1 is defined twice"),
    ("*NODE\n1,0,0,0\n2,1,x,0\n", r"m\.inp:3: \*NODE data line '2,1,x,0' is not a list of numbers"),
    ("*NODE\n1,0,0,0\n*ELEMENT, TYPE=CAX4\n1,1,1,1,1\n", r"axisymmetric"),
])
def test_refusals(tmp_path, text, match):
    with pytest.raises(MeshReadError, match=match):
        read_mesh(_write(tmp_path, text), units="m")


def test_overlapping_sets_smaller_wins(tmp_path):
    text = abaqus(CUBE, [("C3D4", KUHN)], extra="*ELSET, ELSET=all, GENERATE\n1, 6, 1\n"
                  "*ELSET, ELSET=corner\n2, 3\n")
    m = read_mesh(_write(tmp_path, text), units="m")
    names = {v: k for k, v in m.region_names.items()}
    assert m.region.tolist() == [names["all"], names["corner"], names["corner"],
                                 names["all"], names["all"], names["all"]]


def test_include(tmp_path):
    nodes = "\n".join(f"{i + 1}, {p[0]}, {p[1]}, {p[2]}" for i, p in enumerate(CUBE))
    (tmp_path / "nodes.inc").write_text(nodes + "\n")
    text = "*HEADING\n*NODE\n*Include, input=nodes.inc\n*ELEMENT, TYPE=C3D4\n" + \
        "\n".join(", ".join(str(x) for x in [k + 1, *(c + 1)]) for k, c in enumerate(KUHN)) + "\n"
    m = read_mesh(_write(tmp_path, text), units="m")
    assert np.array_equal(m.points, CUBE) and m.n_cells == 6


def test_include_outside_refused(tmp_path):
    (tmp_path / "nodes.inc").write_text("1, 0., 0., 0.\n")
    sub = tmp_path / "job"
    sub.mkdir()
    p = _write(sub, "*NODE\n*INCLUDE, INPUT=../nodes.inc\n")
    with pytest.raises(MeshReadError, match="points outside the mesh folder"):
        read_mesh(p, units="m")


def test_auxiliary_elements_are_counted_not_used(tmp_path):
    text = abaqus(CUBE, [("C3D4", KUHN), ("S3", [[0, 1, 2]]), ("B31", [[0, 1]])])
    raw = read_abaqus(_write(tmp_path, text))
    assert raw.ignored == {"S3": 1, "B31": 1}
    assert [(b.type, len(b.cells)) for b in raw.blocks] == [("tetra", 6)]
