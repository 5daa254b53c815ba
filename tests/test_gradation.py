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


def _random_sizes_mesh(kind, seed):
    """A tensor grid of jittered, randomly graded spacings (tetrahedra or hexahedra),
    cells shuffled, so sizes jump across many faces with distinct ratios."""
    rng = np.random.default_rng(seed)
    xs, ys, zs = (np.cumsum(np.r_[0, rng.uniform(0.02, 0.2, n)]) for n in (7, 5, 4))
    mesh = _tensor(xs, ys, zs, tets=(kind == "tetra"))
    b = mesh.blocks[0]
    cells = b.cells[rng.permutation(len(b))]
    return Mesh(mesh.points, (CellBlock(b.type, cells, np.ones(len(cells))),))


def _mixed_sizes_mesh():
    """Hexahedra and, beside them, tetrahedra of a second grid (two blocks, 6 and 12 edges
    per cell: both summation orders of the compiled mean)."""
    a = _random_sizes_mesh("hexahedron", 5)
    b = _random_sizes_mesh("tetra", 6)
    n = len(a.points)
    return Mesh(np.vstack([a.points, b.points + [10.0, 0, 0]]),
                (a.blocks[0], CellBlock("tetra", b.blocks[0].cells + n,
                                        np.ones(len(b.blocks[0])))))


@pytest.mark.parametrize("case", ["tetra-0", "tetra-1", "hexahedron-0", "hexahedron-1", "mixed"])
@pytest.mark.parametrize("ratio", [1.2, 1.6, 50.0])
def test_compiled_size_jumps_equal_numpy(case, ratio, monkeypatch):
    """Compiled cell sizes and size jumps (MESHCHECK_KERNELS=numba) against the numpy
    reference: sizes bitwise, the same count, largest ratio, listed pairs and values."""
    if case == "mixed":
        mesh = _mixed_sizes_mesh()
    else:
        kind, seed = case.split("-")
        mesh = _random_sizes_mesh(kind, int(seed))
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    topo = build_topology(mesh)
    ref_size = cell_sizes(topo)
    ref = size_jumps(mesh, topo, ratio=ratio, max_listed=7)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    from meshcheck import gradation

    def boom(*a, **k):
        raise AssertionError("numpy pairs built on the compiled path")
    monkeypatch.setattr(gradation, "neighbour_pairs", boom)
    got_size = cell_sizes(topo)
    got = size_jumps(mesh, topo, ratio=ratio, max_listed=7)
    np.testing.assert_array_equal(got_size, ref_size)
    assert got.count == ref.count and got.max_ratio == ref.max_ratio and got.ratio == ref.ratio
    for f in ("pairs", "ratios", "locations", "sizes"):
        a, b = getattr(ref, f), getattr(got, f)
        assert a.dtype == b.dtype and a.shape == b.shape, f
        np.testing.assert_array_equal(b, a, err_msg=f)
    if ratio < 50:
        assert ref.count > 7  # more jumps than listed: the order of the list is tested
    else:
        assert ref.count == 0 and ref.max_ratio > 1


def test_compiled_size_jumps_nan_zero_and_no_pairs(monkeypatch):
    """A NaN size and a zero size (inf ratio) on both paths; a lone cell has no pairs."""
    mesh = _random_sizes_mesh("hexahedron", 2)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    topo = build_topology(mesh)
    length = topo.edges.length.copy()
    length[topo.edges.cell_edges[0][3]] = 0.0      # cell 3: size 0
    length[topo.edges.cell_edges[0][11, 0]] = np.nan  # cell 11: size NaN
    import dataclasses
    topo = dataclasses.replace(topo, edges=dataclasses.replace(topo.edges, length=length))
    out = {}
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        out[mode] = size_jumps(mesh, topo, ratio=1.5, max_listed=5)
    a, b = out["numpy"], out["numba"]
    assert np.isinf(a.ratios[0]) and a.count == b.count and a.max_ratio == b.max_ratio
    for f in ("pairs", "ratios", "locations", "sizes"):
        np.testing.assert_array_equal(getattr(b, f), getattr(a, f), err_msg=f)
    one = Mesh(mesh.points, (CellBlock("hexahedron", mesh.blocks[0].cells[:1], np.ones(1)),))
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        r = size_jumps(one, build_topology(one))
        assert r.count == 0 and r.max_ratio == 1.0 and r.pairs.shape == (0, 2)


def test_face_jumps_beyond_the_first_buffer():
    """The compiled face loop keeps the first faces over the ratio in fixed buffers and
    makes a second pass when there are more: against numpy on 20,000 random faces
    (about 9,000 over the ratio), zero and NaN sizes and one-cell faces included."""
    from meshcheck.kernels import geometry as kg

    rng = np.random.default_rng(7)
    size = rng.uniform(0.1, 1.0, 3000)
    size[5], size[17] = 0.0, np.nan
    fc = rng.integers(0, 3000, (20000, 2)).astype(np.int32)
    fc[::97, 0] = 5
    fc[::89, 1] = 17
    count = np.where(rng.random(20000) < 0.9, 2, 1).astype(np.int8)
    n_pairs, best, ids, rs = kg.face_jumps(fc, count, size, 1.5, 0, len(count))
    a, b = size[fc[:, 0]], size[fc[:, 1]]
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(lo > 0, hi / np.where(lo > 0, lo, 1.0), np.inf)
    r = np.where(np.isfinite(a) & np.isfinite(b), r, np.nan)
    two = count == 2
    over = np.flatnonzero(two & (r > 1.5))
    assert len(over) > kg._JUMPS_FIRST  # the second pass ran
    assert n_pairs == two.sum()
    assert best == r[two & np.isfinite(r)].max()
    np.testing.assert_array_equal(ids, over)
    np.testing.assert_array_equal(rs, r[over])
    few = kg.face_jumps(fc, count, size, 1.5, 0, 2000)  # one pass
    assert len(few[2]) <= kg._JUMPS_FIRST
    np.testing.assert_array_equal(few[2], over[over < 2000])
