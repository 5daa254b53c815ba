"""Topology against closed-form counts of structured meshes (Euler's formula)."""
import numpy as np
import pytest
from scipy.integrate import quad

from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology, edge_lengths
from meshes import grid_hexes, grid_points, hex_box, tet10_box, tet_box


@pytest.mark.parametrize("n", [1, 2, 5])
def test_hex_grid_counts(n):
    # closed form for an n^3 structured grid: E = 3n(n+1)^2, F = 3n^2(n+1), boundary 6n^2
    topo = build_topology(hex_box((n, n, n)))
    assert len(topo.edges) == 3 * n * (n + 1) ** 2
    assert len(topo.faces) == 3 * n * n * (n + 1)
    assert topo.faces.boundary.sum() == 6 * n * n
    assert topo.n_components == 1


@pytest.mark.parametrize("n", [1, 3])
def test_kuhn_tet_counts_satisfy_euler(n):
    # Freudenthal split: axis edges + face diagonals + body diagonals; Euler V-E+F-T = 1
    mesh = tet_box((n, n, n))
    topo = build_topology(mesh)
    E = 3 * n * (n + 1) ** 2 + 3 * n * n * (n + 1) + n ** 3
    assert len(topo.edges) == E
    V, T = (n + 1) ** 3, 6 * n ** 3
    assert V - E + len(topo.faces) - T == 1
    assert topo.faces.boundary.sum() == 12 * n * n


def test_volumes_and_extent():
    topo = build_topology(tet_box((3, 2, 2), size=(3.0, 2.0, 1.0)))
    assert topo.cell_volume.min() > 0
    assert topo.component_volume[0] == pytest.approx(6.0, rel=1e-12)
    assert topo.component_extent[0] == pytest.approx(np.sqrt(14.0), rel=1e-12)


def test_two_separate_parts_are_two_components():
    a = hex_box((2, 2, 2))
    b = hex_box((2, 2, 2), origin=(5.0, 0.0, 0.0))
    pts = np.vstack([a.points, b.points])
    cells = np.vstack([a.blocks[0].cells, b.blocks[0].cells + len(a.points)])
    mesh = Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells))),))
    topo = build_topology(mesh)
    assert topo.n_components == 2
    assert np.allclose(topo.component_volume, [1.0, 1.0])
    assert len(topo.crack_faces) == 0 and len(topo.duplicate_nodes) == 0


def test_unmerged_interface_is_a_crack():
    # two boxes touching at x = 1 with their own copies of the interface nodes
    a = hex_box((2, 2, 2))
    b = hex_box((2, 2, 2), origin=(1.0, 0.0, 0.0))
    pts = np.vstack([a.points, b.points])
    cells = np.vstack([a.blocks[0].cells, b.blocks[0].cells + len(a.points)])
    topo = build_topology(Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells))),)))
    assert len(topo.duplicate_nodes) == 9          # 3 x 3 interface nodes, one pair each
    assert len(topo.crack_faces) == 2 * 4          # 2 x 2 faces on each side
    assert topo.n_components == 2


def test_duplicate_and_unused():
    m = hex_box((1, 1, 1))
    pts = np.vstack([m.points, [[9.0, 9.0, 9.0]]])
    cells = np.vstack([m.blocks[0].cells, m.blocks[0].cells[:, ::-1]])
    topo = build_topology(Mesh(pts, (CellBlock("hexahedron", cells, np.ones(2)),)))
    assert topo.unused_nodes.tolist() == [8]
    assert topo.duplicate_cells.tolist() == [[0, 1]]
    assert len(topo.nonmanifold_faces) == 0  # each face shared by exactly the two copies


def test_quadratic_edge_is_arc_length():
    # parabola through (0,0), (1/2, a/4... ) : x(s) = (s, 4 a s (1 - s)); closed-form arc length
    # integral of sqrt(1 + (4a(1-2s))^2) ds = (U sqrt(1+U^2) + asinh U) / (2U), U = 4a
    a = 0.3
    pts = np.array([[0.0, 0, 0], [1.0, 0, 0], [0.5, a, 0]])
    L = edge_lengths(pts, np.array([0]), np.array([1]), np.array([2]))[0]
    u = 4 * a
    exact = (u * np.sqrt(1 + u * u) + np.arcsinh(u)) / (2 * u)
    assert L == pytest.approx(exact, rel=1e-6)
    assert L == pytest.approx(quad(lambda s: np.hypot(1, 4 * a * (1 - 2 * s)), 0, 1)[0], rel=1e-6)


def test_tet10_straight_edges_equal_linear():
    quad_topo = build_topology(tet10_box((2, 2, 2)))
    lin_topo = build_topology(tet_box((2, 2, 2)))
    assert np.allclose(np.sort(quad_topo.edges.length), np.sort(lin_topo.edges.length))
    assert (quad_topo.edges.mid >= 0).all()


def test_edges_from_cells_reduces_over_sharing_cells():
    mesh = hex_box((2, 1, 1))
    topo = build_topology(mesh)
    vals = np.array([1.0, 5.0])
    emax = topo.edges.from_cells(vals, np.maximum)
    shared = np.isin(topo.edges.nodes, np.intersect1d(*mesh.blocks[0].cells)).all(axis=1)
    assert (emax[shared] == 5.0).all() and shared.sum() == 4
