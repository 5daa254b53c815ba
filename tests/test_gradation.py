"""Size gradation against closed-form ratios of mean edge lengths on tensor grids."""
import numpy as np
import pytest

from meshcheck.gradation import cell_sizes, size_jumps
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology
from meshes import KUHN, grid_hexes


def _tensor(xs, ys, zs, tets=False):
    X, Y, Z = np.meshgrid(xs, ys, zs, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    h = grid_hexes((len(xs) - 1, len(ys) - 1, len(zs) - 1))
    if tets:
        return Mesh(pts, (CellBlock("tetra", h[:, KUHN].reshape(-1, 4), np.ones(6 * len(h))),))
    return Mesh(pts, (CellBlock("hexahedron", h, np.ones(len(h))),))


def _mean_edge_hex(dx, dy, dz):
    return (4 * dx + 4 * dy + 4 * dz) / 12


@pytest.mark.parametrize("coarse", [0.15, 0.25, 0.5])
def test_step_in_size_is_listed_at_the_interface(coarse):
    fine = 0.05
    xs = np.concatenate([np.arange(0, 0.5 + 1e-9, fine), 0.5 + coarse * np.arange(1, 4)])
    ys = np.linspace(0, 0.1, 3)
    mesh = _tensor(xs, ys, ys)
    topo = build_topology(mesh)
    expected = _mean_edge_hex(coarse, fine, fine) / _mean_edge_hex(fine, fine, fine)
    res = size_jumps(mesh, topo, ratio=1.5)
    assert res.max_ratio == pytest.approx(expected, rel=1e-12)
    if expected > 1.5:
        assert res.count == 4  # the 2 x 2 faces of the interface plane x = 0.5
        assert np.allclose(res.ratios, expected)
        assert np.allclose(res.locations[:, 0], 0.5 + (coarse - fine) / 4)
        assert np.all(res.sizes[:, 0] < res.sizes[:, 1])
    else:
        assert res.count == 0


@pytest.mark.parametrize("q", [1.3, 2.5])
def test_geometric_grading_ratio(q):
    # cells of width d q^i along x: neighbour ratio of mean edge lengths in closed form
    d, n, dy = 0.01, 6, 0.02
    xs = np.concatenate([[0], np.cumsum(d * q ** np.arange(n))])
    ys = np.linspace(0, dy, 2)
    mesh = _tensor(xs, ys, ys)
    topo = build_topology(mesh)
    sizes = _mean_edge_hex(d * q ** np.arange(n), dy, dy)
    ratios = sizes[1:] / sizes[:-1]
    assert np.allclose(cell_sizes(topo), sizes, rtol=1e-12)
    thr = float(np.mean(np.sort(ratios)[2:4]))  # between two neighbour ratios
    res = size_jumps(mesh, topo, ratio=thr)
    assert res.count == int(np.sum(ratios > thr))
    assert res.max_ratio == pytest.approx(ratios.max(), rel=1e-12)
    assert np.allclose(res.ratios, np.sort(ratios[ratios > thr])[::-1], rtol=1e-12)


def test_uniform_tets_have_no_jump():
    xs = np.linspace(0, 1, 5)
    mesh = _tensor(xs, xs, xs, tets=True)
    res = size_jumps(mesh, build_topology(mesh), ratio=1.01)
    assert res.count == 0 and res.max_ratio == pytest.approx(1.0)


def test_quads_in_2d_neighbours_share_an_edge():
    xs = np.array([0.0, 0.1, 0.2, 0.6, 1.0])
    ys = np.array([0.0, 0.1, 0.2])
    X, Y = np.meshgrid(xs, ys, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), np.zeros(X.size)])
    idx = np.arange(X.size).reshape(X.shape)
    i, j = np.meshgrid(np.arange(len(xs) - 1), np.arange(len(ys) - 1), indexing="ij")
    i, j = i.ravel(), j.ravel()
    quads = np.column_stack([idx[i, j], idx[i + 1, j], idx[i + 1, j + 1], idx[i, j + 1]])
    mesh = Mesh(pts, (CellBlock("quad", quads, np.ones(len(quads))),), dim=2)
    res = size_jumps(mesh, build_topology(mesh), ratio=1.5)
    # quad mean edge (2 dx + 2 dy) / 4: 0.1 | 0.1 -> 0.25 between x = 0.2 and 0.6
    assert res.count == 2 and res.ratios[0] == pytest.approx(0.25 / 0.1)
