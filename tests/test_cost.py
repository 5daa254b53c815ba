"""Unknown counts against closed forms and a brute-force count."""
import itertools

import numpy as np
import pytest

from meshcheck.cost import condensed_dofs, face_dofs, interior_dofs, lagrange_dofs, \
    variable_order_dofs
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology
from meshes import hex_box, tet_box


@pytest.mark.parametrize("p", [1, 2, 3, 5])
@pytest.mark.parametrize("make", [hex_box, tet_box], ids=["hex", "kuhn-tet"])
def test_lagrange_dofs_structured_cube(make, p):
    # the order-p Lagrange nodes of an n^3 grid (hexes, or its Kuhn tets) are the points of
    # the p-times finer lattice: (p n + 1)^3 (closed form)
    n = 3
    mesh = make((n, n, n))
    assert lagrange_dofs(mesh, build_topology(mesh), p) == (p * n + 1) ** 3


def _lattice_count(mesh: Mesh, p: int) -> int:
    """Brute force: distinct points of all order-p Lagrange lattices of the cells."""
    pts = set()
    for b in mesh.blocks:
        X = mesh.points[b.cells[:, :b.info.n_corners]]
        if b.info.linear == "tetra":
            for i, j, k in itertools.product(range(p + 1), repeat=3):
                if i + j + k <= p:
                    lam = np.array([p - i - j - k, i, j, k]) / p
                    for q in np.einsum("k,ckd->cd", lam, X):
                        pts.add(tuple(np.round(q, 9)))
    return len(pts)


@pytest.mark.parametrize("p", [2, 3, 4])
def test_lagrange_dofs_brute_force_tets(p):
    mesh = tet_box((2, 1, 1), size=(2.0, 1.0, 1.0))
    assert lagrange_dofs(mesh, build_topology(mesh), p) == _lattice_count(mesh, p)


@pytest.mark.parametrize("p", [1, 2, 4, 7])
def test_interior_counts_are_dimension_of_bubbles(p):
    # dim P_p(tet) = (p+1)(p+2)(p+3)/6 = 4 + 6(p-1) + 4 (p-1)(p-2)/2 + interior
    assert 4 + 6 * (p - 1) + 4 * face_dofs(3, p) + interior_dofs("tetra", p) == \
        (p + 1) * (p + 2) * (p + 3) // 6
    # dim Q_p(hex) = (p+1)^3
    assert 8 + 12 * (p - 1) + 6 * face_dofs(4, p) + interior_dofs("hexahedron", p) == (p + 1) ** 3
    # wedge: P_p(triangle) x P_p(line) = (p+1)(p+2)/2 (p+1)
    assert (6 + 9 * (p - 1) + 2 * face_dofs(3, p) + 3 * face_dofs(4, p)
            + interior_dofs("wedge", p)) == (p + 1) ** 2 * (p + 2) // 2


def _brute_variable(mesh, topo, orders):
    """Maximum rule, entity by entity, with Python loops (reference)."""
    edge_order = {}
    for c, edges in enumerate(np.concatenate([ce for ce in topo.edges.cell_edges])):
        for e in edges:
            edge_order[e] = max(edge_order.get(e, 1), orders[c])
    total = len(np.unique(np.concatenate([b.cells.ravel() for b in mesh.blocks])))
    total += sum(q - 1 for q in edge_order.values())
    for f in range(len(topo.faces)):
        c0, c1 = topo.faces.cells[f]
        q = max(orders[c0], orders[c1] if c1 >= 0 else 1)
        total += face_dofs(3 if topo.faces.nodes[f, 3] < 0 else 4, q)
    return total


def test_variable_order_dofs_match_brute_force():
    rng = np.random.default_rng(3)
    mesh = tet_box((3, 2, 2))
    topo = build_topology(mesh)
    pmax = 6
    need = rng.integers(1, pmax + 1, mesh.n_cells)
    # limits that make cell c need order need[c] at 100 Hz
    limits = np.where(np.arange(1, pmax + 1)[None, :] >= need[:, None], 1000.0, 10.0)
    got = variable_order_dofs(mesh, topo, limits, np.array([100.0]), pmax)[0]
    assert got == _brute_variable(mesh, topo, need)


@pytest.mark.parametrize("p", [1, 3, 5])
def test_variable_order_uniform_equals_condensed(p):
    mesh = hex_box((3, 3, 2))
    topo = build_topology(mesh)
    limits = np.where(np.arange(1, 9)[None, :] >= p, 1e9, 0.0) * np.ones((mesh.n_cells, 1))
    assert variable_order_dofs(mesh, topo, limits, np.array([10.0]), 8)[0] == \
        condensed_dofs(mesh, topo, p)
