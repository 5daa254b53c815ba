"""Reference meshes from gmsh: closed-form volumes, orientation, repeatability."""
import numpy as np
import pytest

from meshcheck.topology import build_topology, cell_volumes

gmsh = pytest.importorskip("gmsh")
from meshcheck.gmsh_mesh import generate  # noqa: E402


def _box(g):
    g.model.occ.addBox(0, 0, 0, 1.0, 0.8, 0.6)
    g.model.occ.synchronize()


def _rectangle(g):
    g.model.occ.addRectangle(0, 0, 0, 1.0, 0.8)
    g.model.occ.synchronize()


SIZE = {"Mesh.MeshSizeMin": 0.15, "Mesh.MeshSizeMax": 0.15}


@pytest.mark.parametrize("dim, build, measure", [(3, _box, 1.0 * 0.8 * 0.6),
                                                 (2, _rectangle, 1.0 * 0.8)],
                         ids=["box tets", "rectangle triangles"])
def test_cells_fill_the_domain_positively_with_no_unused_node(dim, build, measure):
    m = generate(build, dim, SIZE)
    vol = cell_volumes(m)
    assert vol.sum() == pytest.approx(measure, rel=1e-12)  # box 0.48 m^3, rectangle 0.8 m^2
    assert (vol > 0).all()
    assert build_topology(m).unused_nodes.size == 0
    assert m.region_names == {1: "air"} and m.dim == dim


def test_same_options_same_mesh():
    a, b = generate(_box, 3, SIZE), generate(_box, 3, SIZE)
    assert np.array_equal(a.points, b.points)
    assert np.array_equal(a.blocks[0].cells, b.blocks[0].cells)


def test_recombined_rectangle_gives_quads():
    m = generate(_rectangle, 2, {**SIZE, "Mesh.RecombineAll": 1, "Mesh.Algorithm": 8})
    assert [b.type for b in m.blocks] == ["quad"]
    assert cell_volumes(m).sum() == pytest.approx(0.8, rel=1e-12)
