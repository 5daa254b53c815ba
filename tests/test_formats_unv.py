"""I-DEAS universal files: nodes 2411, elements 2412, groups 2467/2477, units 164.

References: the universal file dataset layouts (I-DEAS documentation, from
memory) and gmsh's UNV reader/writer for the parabolic node orders
(GModelIO_UNV.cpp); units: SI value = file value / factor of dataset 164
(1000 for millimetres); gmsh round trips in test_formats_roundtrip.py.
"""
import numpy as np
import pytest

from hostile.texts import CUBE, WEDGES, quadratic, to_unv_order, unv
from meshcheck.cells import CELL_TYPES
from meshcheck.errors import MeshReadError
from meshcheck.formats.unv import read_unv
from meshcheck.reading import read_mesh
from meshes import KUHN


def _write(tmp_path, text, name="m.unv"):
    p = tmp_path / name
    p.write_text(text)
    return p


def test_linear_cells_and_groups(tmp_path):
    text = unv(CUBE, [(111, KUHN), (115, [list(range(8))]), (112, WEDGES)],
               groups=[("cavity air", [1, 2, 3, 4, 5, 6]), ("brick", [7])])
    m = read_mesh(_write(tmp_path, text), units="m")
    assert {b.type: len(b) for b in m.blocks} == {"tetra": 6, "hexahedron": 1, "wedge": 2}
    assert np.array_equal(m.points, CUBE)
    assert m.region_names == {1: "cavity air", 2: "brick"}
    assert m.blocks[0].region.tolist() == [1] * 6
    assert m.blocks[1].region.tolist() == [2]
    assert m.blocks[2].region.tolist() == [0, 0]


@pytest.mark.parametrize("ctype, fe, cells", [("tetra10", 118, KUHN),
                                              ("hexahedron20", 116, np.arange(8)[None, :]),
                                              ("wedge15", 113, WEDGES)])
def test_parabolic_orders(tmp_path, ctype, fe, cells):
    pts, q = quadratic(CUBE, cells, ctype)
    m = read_mesh(_write(tmp_path, unv(pts, [(fe, to_unv_order(ctype, q))])), units="m")
    assert np.array_equal(m.blocks[0].cells, q)
    e = CELL_TYPES[ctype].edges
    p = m.points[m.blocks[0].cells]
    assert np.allclose(p[:, e[:, 2]], 0.5 * (p[:, e[:, 0]] + p[:, e[:, 1]]))


@pytest.mark.parametrize("units, expected_unit, scale", [
    ((5, "MM (milli newton)", 1000.0), "mm", 1e-3),
    ((1, "SI: Meter (newton)", 1.0), "m", 1.0),
    ((7, "IN (pound f)", 1 / 0.0254), "in", 0.0254),
    ((6, "CM (centi newton)", 100.0), "cm", 0.01),
])
def test_units_dataset_honoured(tmp_path, units, expected_unit, scale):
    """Dataset 164: metres = file value / length factor (no --units needed)."""
    m = read_mesh(_write(tmp_path, unv(CUBE * 30.0, [(111, KUHN)], units=units)))
    assert m.unit == expected_unit
    assert np.allclose(m.points, CUBE * 30.0 * scale)


def test_units_given_override_the_file(tmp_path):
    m = read_mesh(_write(tmp_path, unv(CUBE, [(111, KUHN)], units=(5, "MM", 1000.0))), units="m")
    assert m.unit == "m" and np.array_equal(m.points, CUBE)


def test_overlapping_groups_smaller_wins(tmp_path):
    text = unv(CUBE, [(111, KUHN)], groups=[("all", [1, 2, 3, 4, 5, 6]), ("two", [2, 3])])
    m = read_mesh(_write(tmp_path, text), units="m")
    assert m.region.tolist() == [1, 2, 2, 1, 1, 1]


def test_beams_are_skipped_with_their_extra_record(tmp_path):
    raw = read_unv(_write(tmp_path, unv(CUBE, [(21, [[0, 1]]), (111, KUHN)])))
    assert raw.ignored == {"FE 21": 1}
    assert [(b.type, len(b.cells)) for b in raw.blocks] == [("tetra", 6)]
    assert raw.blocks[0].ids.tolist() == [2, 3, 4, 5, 6, 7]


@pytest.mark.parametrize("mutate, match", [
    (lambda t: t.replace("       111", "       999", 1), r"FE descriptor 999 is not supported"),
    (lambda t: t.replace("       111", "        81", 1), r"axisymmetric"),
    (lambda t: t.replace("  2411", "  2411b"), r"binary dataset"),
    (lambda t: t.rsplit("    -1", 1)[0], r"dataset not closed"),
    (lambda t: t.replace("         1         1         1        11",
                         "         1         5         5        11"),
     r"node 1 is given in coordinate system 5"),
    (lambda t: t.replace("         8         7", "        99         7", 1),
     r"refers to node 99, which dataset 2411 does not define"),
    (lambda t: t.replace("         2         1         1        11",
                         "         1         1         1        11"), r"node 1 is defined twice"),
    (lambda t: t.replace("  2411", "  2414"), r"no node dataset \(2411\)"),
    (lambda t: t.replace("D+00", "X+00", 1), r"coordinate .* is not a number"),
])
def test_refusals(tmp_path, mutate, match):
    text = mutate(unv(CUBE, [(111, KUHN)]))
    with pytest.raises(MeshReadError, match=match):
        read_mesh(_write(tmp_path, text), units="m")
