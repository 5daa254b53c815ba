"""Compiled kernels of the advice stage (meshcheck/kernels/advice.py) against the numpy
reference (MESHCHECK_KERNELS=numpy): advise, sweep, variable-order unknowns, clusters and
the mesh alignment of the 3D correction, on meshes generated in code (tetrahedra,
quadratic tetrahedra, hexahedra, wedges, pyramids, hexahedra + wedges, 2D triangles and
quadrilaterals), perturbed or exactly structured (ties between edge lengths), one or two
media, with and without mean flow, fixed and variable order, with and without the 3D
correction, and with the topology's index arrays in int32.  Integers and booleans must be
equal; floats equal to 1e-12 relative (the kernels do the same operations in the same
order, so they agree to the bit here; the tolerance leaves room for a libm that rounds a
logarithm differently).  The mesh alignment s of the 3D correction is a 3x3 sum that
numpy takes as d.T @ d and the kernel cell by cell: equal to 1e-12 absolute (s in [0, 1])."""
import dataclasses

import numpy as np
import pytest

pytest.importorskip("numba")

import meshcheck.kernels.advice as KA  # noqa: E402
from meshcheck import kernels  # noqa: E402
from meshcheck.advice import AdviceSettings, _alignment, advise, clusters, sweep  # noqa: E402
from meshcheck.cost import cell_orders_at, system_size, variable_order_dofs  # noqa: E402
from meshcheck.mesh import CellBlock, Mesh  # noqa: E402
from meshcheck.topology import build_topology  # noqa: E402
from meshes import hex_box, tet10_box, tet_box  # noqa: E402
from test_cost import mixed_hex_wedge, pyramid_box, quad_square, tri_square, wedge_box  # noqa: E402


def _perturbed(mesh: Mesh, amount: float, seed: int = 0, two_media: bool = False) -> Mesh:
    """The mesh with its nodes moved at random by up to ``amount`` m per axis (2D: in
    the plane), and optionally a second region (x > 1/2) for a second medium."""
    rng = np.random.default_rng(seed)
    pts = mesh.points.copy()
    axes = 3 if mesh.dim == 3 else 2
    pts[:, :axes] += rng.uniform(-amount, amount, (len(pts), axes))
    blocks = mesh.blocks
    names = dict(mesh.region_names)
    if two_media:
        cen = mesh.centroids[:, 0]
        blocks, start = [], 0
        for b in mesh.blocks:
            reg = np.where(cen[start:start + len(b)] > 0.5, 2, 1)
            blocks.append(CellBlock(b.type, b.cells, reg))
            start += len(b)
        names = {1: "air", 2: "water"}
    return Mesh(pts, tuple(blocks), names, mesh.dim)


def _half_perturbed(mesh: Mesh, amount: float) -> Mesh:
    """Nodes with x > 1/2 moved at random: the cubes left of it keep 12 edges of one
    length (ties of the longest edge in three directions), the cells right of it not."""
    moved = _perturbed(mesh, amount, 9)
    pts = np.where(mesh.points[:, :1] > 0.5, moved.points, mesh.points)
    return Mesh(pts, mesh.blocks, mesh.region_names, mesh.dim)


MESHES = {
    "tet": lambda: _perturbed(tet_box((5, 4, 3), size=(1.0, 0.8, 0.6)), 0.03),
    "tet structured": lambda: tet_box((4, 3, 3), size=(1.0, 0.75, 0.75)),
    "tet two media": lambda: _perturbed(tet_box((5, 4, 3), size=(1.0, 0.8, 0.6)), 0.03, 1,
                                        two_media=True),
    "tet10": lambda: _perturbed(tet10_box((3, 2, 2), size=(1.0, 0.7, 0.6)), 0.01, 8),
    "hex": lambda: _perturbed(hex_box((5, 4, 3), size=(1.0, 0.8, 0.6)), 0.02, 2),
    "hex structured": lambda: hex_box((4, 3, 3)),
    "hex half structured": lambda: _half_perturbed(hex_box((6, 3, 3)), 0.02),
    "wedge": lambda: _perturbed(wedge_box((4, 3, 2)), 0.02, 3),
    "pyramid": lambda: _perturbed(pyramid_box((3, 2, 2)), 0.02, 4),
    "hex+wedge": lambda: _perturbed(mixed_hex_wedge((4, 3, 2)), 0.02, 5, two_media=True),
    "triangle 2D": lambda: _perturbed(tri_square((6, 5)), 0.02, 6),
    "quad 2D": lambda: quad_square((6, 5)),
}
_BUILT = {}


def _mesh(name):
    if name not in _BUILT:
        mesh = MESHES[name]()
        _BUILT[name] = (mesh, build_topology(mesh))
    return _BUILT[name]


def _speeds(mesh):
    return np.where(mesh.region == 2, 1481.0, 343.0)


SETTINGS = {
    "variable": AdviceSettings(),
    "variable p<=3": AdviceSettings(max_order=3, target=0.05),
    "fixed p=2": AdviceSettings(order=2),
    "plain 1D": AdviceSettings(correction_3d=False, max_order=5),
    "fixed p=1 distance": AdviceSettings(order=1, distance=3.0, correction_3d=False),
}


def _both(monkeypatch, fn):
    """(numpy result, compiled result) of fn()."""
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = fn()
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    assert kernels.use_compiled(1)
    return ref, fn()


def _same(a, b, what):
    a, b = np.asarray(a), np.asarray(b)
    assert a.shape == b.shape and a.dtype == b.dtype, what
    if a.dtype.kind == "f":
        assert np.array_equal(np.isnan(a), np.isnan(b)), what
        assert np.allclose(a, b, rtol=1e-12, atol=0.0, equal_nan=True), what
    else:
        assert np.array_equal(a, b), what


ADVICE_FIELDS = ("cell_limit", "cell_size", "cell_distance", "cell_speed", "edge_limit",
                 "edge_order", "cell_order", "target_size", "refine", "coarsen")


def _fmax(mesh, topo, settings):
    """An upper frequency at which some cells need refining and some do not."""
    adv = advise(mesh, topo, _speeds(mesh), 1000.0, settings)
    return float(np.median(adv.cell_limit[:, settings.allowed_order - 1]))


@pytest.mark.parametrize("setting", list(SETTINGS))
@pytest.mark.parametrize("name", list(MESHES))
def test_advise_and_sweep_equal_the_numpy_reference(monkeypatch, name, setting):
    mesh, topo = _mesh(name)
    s = SETTINGS[setting]
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    fmax = _fmax(mesh, topo, s)
    ref, got = _both(monkeypatch, lambda: advise(mesh, topo, _speeds(mesh), fmax, s))
    if name not in ("tet structured", "hex structured", "quad 2D"):  # (all cells alike)
        assert 0 < ref.refine.sum() < mesh.n_cells  # both outcomes present
    for field in ADVICE_FIELDS:
        _same(getattr(ref, field), getattr(got, field), field)
    # frequencies unsorted, repeated, some equal to cell limits (ties at the bin edges)
    rng = np.random.default_rng(7)
    f = np.concatenate([rng.uniform(0.1, 2.0, 40) * fmax, [fmax, fmax],
                        rng.choice(ref.cell_limit.ravel(), 12)])
    rs, gs = _both(monkeypatch, lambda: sweep(mesh, topo, ref, f))
    for field in ("frequencies", "order_counts", "ready", "dofs"):
        _same(getattr(rs, field), getattr(gs, field), field)
    assert rs.condensed_fixed == gs.condensed_fixed
    # the compiled advice keeps one row of limits per longest edge, shared by its cells:
    # every row used, the sweep, mesh and region limits those of the per-cell table
    assert ref.limit_row is None and got.limit_row is not None
    assert np.array_equal(np.unique(got.limit_row), np.arange(len(got.limit_rows)))
    if name.startswith("tet"):
        assert len(got.limit_rows) < 0.8 * mesh.n_cells
    import meshcheck.advice as A
    for p in range(1, ref.pmax + 1):
        _same(ref.limit_at(p), got.limit_at(p), f"limit at {p}")
        _same(ref.limit_at(p, np.float32), got.limit_at(p, np.float32), f"float32 at {p}")
        with monkeypatch.context() as m:  # the shared rows gathered 7 cells at a time
            m.setattr(A, "_TAKE_CHUNK", 7)
            _same(ref.limit_at(p), got.limit_at(p), f"limit at {p}, chunks")
    _same(ref.mesh_limit, got.mesh_limit, "mesh limit")
    for region in (mesh.region, np.arange(mesh.n_cells) % 3):  # runs, scattered
        want, have = ref.region_limit(region), got.region_limit(region)
        assert want.keys() == have.keys()
        for tag in want:
            _same(want[tag], have[tag], f"region {tag}")
    for rows in _both(monkeypatch, lambda: sweep(mesh, topo, got, f)):  # both paths
        for field in ("order_counts", "ready", "dofs"):
            _same(getattr(rs, field), getattr(rows, field), field)
    for q in (1, s.max_order):
        _same(cell_orders_at(ref.cell_limit, fmax, q),
              cell_orders_at(got.limit_rows, fmax, q, got.limit_row), "orders")


@pytest.mark.parametrize("name", ["tet", "hex", "hex+wedge", "triangle 2D"])
def test_advise_with_mean_flow_equals_the_numpy_reference(monkeypatch, name):
    mesh, topo = _mesh(name)
    mach = np.zeros((mesh.n_cells, 3))
    mach[:, 0], mach[:, 1] = 0.3, 0.1
    if name == "hex+wedge":
        mach[mesh.region == 2] = (0.0, 0.0, 0.2)
    ref, got = _both(monkeypatch, lambda: advise(mesh, topo, _speeds(mesh), 600.0,
                                                 AdviceSettings(), cell_mach=mach))
    assert ref.edge_flow_factor is not None
    for field in ADVICE_FIELDS:
        _same(getattr(ref, field), getattr(got, field), field)


@pytest.mark.parametrize("name", ["tet", "tet two media", "hex", "wedge", "hex+wedge",
                                  "quad 2D"])
def test_variable_order_dofs_equal_the_numpy_reference(monkeypatch, name):
    # limits not monotone in the order, ties with the frequencies, NaN rows, and every
    # maximum order: the histogram counts equal the sorted-search counts
    mesh, topo = _mesh(name)
    rng = np.random.default_rng(11)
    lim = rng.uniform(100.0, 3000.0, (mesh.n_cells, 12))
    lim[rng.random(lim.shape) < 0.2] = 1500.0
    lim[rng.integers(0, mesh.n_cells, 3)] = np.nan
    f = np.concatenate([np.linspace(50.0, 3500.0, 23)[::-1], [1500.0, 1500.0]])
    for max_order in (1, 2, 5, 8, 9, 12):
        ref, got = _both(monkeypatch, lambda: variable_order_dofs(mesh, topo, lim, f, max_order))
        _same(ref, got, f"max_order {max_order}")
    monotone = np.maximum.accumulate(np.nan_to_num(lim, nan=500.0), axis=1)
    ref, got = _both(monkeypatch, lambda: variable_order_dofs(mesh, topo, monotone, f, 8))
    _same(ref, got, "monotone")


def test_sweep_of_limits_with_nan_and_many_frequencies(monkeypatch):
    mesh, topo = _mesh("tet")
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    adv = advise(mesh, topo, _speeds(mesh), 500.0, AdviceSettings())
    lim = adv.cell_limit.copy()
    lim[::17, 3:] = np.nan
    odd = dataclasses.replace(adv, limit_rows=lim)
    # bins of one byte up to 254 frequencies, two bytes from 255 (bin + 1, 0 = NaN)
    for f in (np.linspace(10.0, 5000.0, 1000), np.linspace(10.0, 5000.0, 254)[::-1],
              np.linspace(10.0, 5000.0, 255), np.array([500.0]), np.array([3e3, 1e2, 3e3])):
        rs, gs = _both(monkeypatch, lambda: sweep(mesh, topo, odd, f))
        for field in ("order_counts", "ready", "dofs"):
            _same(rs.__dict__[field], gs.__dict__[field], field)


@pytest.mark.parametrize("n_f,dtype", [(1, np.uint8), (254, np.uint8), (255, np.uint16),
                                       (70_000, np.uint32)])
def test_limit_bins_take_the_smallest_unsigned_type(n_f, dtype):
    from meshcheck.cost import _limit_bins
    lim = np.array([[1.0, 2.0], [np.nan, 5.0], [7.0, 7.0]])
    f = np.linspace(0.5, 6.0, n_f)
    order, hist, B = _limit_bins(lim, f, 2)
    assert B.dtype == dtype and B.shape == (3, 8)
    assert np.all(B[:, 2:] == n_f + 1) and B[1, 0] == 0  # padding never counted; NaN
    assert np.array_equal(B[[0, 2], 0] - 1, np.searchsorted(f, lim[[0, 2], 0], side="right"))
    assert np.array_equal(hist.sum(axis=1), [3, 3])


@pytest.mark.parametrize("spread", ["even", "uneven", "clustered", "repeated", "one"])
def test_limit_bins_count_frequencies_as_searchsorted(spread):
    # the kernel's bins from its grid over the frequencies: for every limit, the number
    # of frequencies at or below it (np.searchsorted, side "right"), whatever their
    # spread; limits on frequencies, between, below the first, above the last, NaN, inf
    from meshcheck.cost import _limit_bins

    rng = np.random.default_rng(9)
    f = {"even": np.arange(50.0, 2000.01, 9.798995), "uneven": np.sort(rng.uniform(10, 5e3, 300)),
         "clustered": np.r_[np.linspace(100, 101, 50), np.linspace(4000, 9000, 7), 1e5],
         "repeated": np.repeat([20.0, 31.5, 40.0, 63.0], [3, 1, 5, 2]),
         "one": np.array([500.0])}[spread]
    n = 20_000
    lim = rng.uniform(0.5 * f[0], 1.2 * f[-1], (n, 6))
    lim[::7, 0] = rng.choice(f, len(lim[::7]))  # exactly on a frequency
    lim[::11, 1] = np.nextafter(rng.choice(f, len(lim[::11])), -np.inf)
    lim[::13, 2] = np.nan
    lim[::17, 3] = np.inf
    lim[::19, 4] = -np.inf
    order, hist, B = _limit_bins(lim, f, 6)
    fs = f[order]
    want = np.searchsorted(fs, lim, side="right")
    want[np.isnan(lim)] = len(f)
    assert np.array_equal(B[:, :6].astype(np.int64) - 1, np.where(np.isnan(lim), -1, want))
    for p in range(6):
        assert np.array_equal(hist[p], np.bincount(want[:, p], minlength=len(f) + 1)), p


def _clusters_equal(a, b):
    assert len(a) == len(b)
    for x, y in zip(a, b):
        for field in ("cells", "ids", "regions"):
            _same(getattr(x, field), getattr(y, field), field)
        for field in ("volume", "centroid", "lo", "hi", "size", "target", "factor"):
            _same(getattr(x, field), getattr(y, field), field)


@pytest.mark.parametrize("name", ["tet", "tet two media", "hex", "hex+wedge", "pyramid",
                                  "triangle 2D", "quad 2D"])
def test_clusters_equal_the_numpy_reference(monkeypatch, name):
    # random masks make many clusters of equal size: their order (by size, then by
    # smallest cell id) and everything about them must be the reference's
    mesh, topo = _mesh(name)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    adv = advise(mesh, topo, _speeds(mesh), _fmax(mesh, topo, AdviceSettings()))
    rng = np.random.default_rng(3)
    masks = [adv.refine, adv.coarsen & ~adv.refine, rng.random(mesh.n_cells) < 0.15,
             rng.random(mesh.n_cells) < 0.6, np.ones(mesh.n_cells, bool)]
    for mask in masks:
        for limit, max_ids in ((50, 10), (4, 2)):
            ref, got = _both(monkeypatch, lambda: clusters(mesh, topo, adv, mask, limit, max_ids))
            _clusters_equal(ref, got)
    # clusters of zero volume take the mean of their centroids
    flat = dataclasses.replace(topo, cell_volume=np.where(rng.random(mesh.n_cells) < 0.5, 0.0,
                                                          topo.cell_volume))
    ref, got = _both(monkeypatch, lambda: clusters(mesh, flat, adv, masks[2]))
    assert any(c.volume == 0 for c in ref)
    _clusters_equal(ref, got)


def _parts(mesh: Mesh, copies: int, listed_twice: bool = False) -> Mesh:
    """``copies`` disjoint copies of the mesh side by side along x (one component each),
    the copies' cells interleaved by blocks of 7 so that no component is a run of ids
    (a component's label is its smallest cell id's order); with ``listed_twice`` an
    interior cell listed once more (its faces shared by three cells)."""
    b = mesh.blocks[0]
    n_p, span = len(mesh.points), np.ptp(mesh.points[:, 0]) * 1.5
    shift = np.zeros(mesh.points.shape[1])
    shift[0] = span
    pts = np.vstack([mesh.points + i * shift for i in range(copies)])
    cells = np.stack([b.cells + i * n_p for i in range(copies)])  # (copies, m, k)
    m = len(b)
    pad = -m % 7
    order = np.arange(copies * (m + pad)).reshape(copies, -1, 7).transpose(1, 0, 2).ravel()
    order = order[order % (m + pad) < m]
    idx = order // (m + pad) * m + order % (m + pad)
    flat = cells.reshape(-1, cells.shape[2])[idx]
    reg = np.tile(b.region, copies)[idx]
    if listed_twice:  # a cell of the first copy with no boundary face: its copy
        # shares three-cell faces only, which the clusters' pairs (a face's first two
        # cells) never join, while the components join it
        centre = mesh.points.min(0) + 0.5 * np.ptp(mesh.points, axis=0)
        c = np.argmin(np.linalg.norm(pts[flat].mean(1) - centre, axis=1))
        flat, reg = np.vstack([flat, flat[c:c + 1]]), np.append(reg, reg[c:c + 1])
    return Mesh(pts, (CellBlock(b.type, flat, reg),), mesh.region_names, mesh.dim)


@pytest.mark.parametrize("name,copies,twice", [("tet", 3, False), ("tet", 1, True),
                                               ("tet", 2, True), ("hex", 2, False),
                                               ("triangle 2D", 3, False)])
def test_every_cell_flagged_clusters_are_the_components(monkeypatch, name, copies, twice):
    # all cells flagged (a mesh far finer than the sweep): the compiled path takes the
    # topology's components as clusters unless faces of three cells join more; the
    # clusters (order, sizes, ids, centroids) must be the numpy reference's union-find
    mesh = _parts(MESHES[name](), copies, twice)
    topo = build_topology(mesh)
    assert topo.n_components == copies and (len(topo.nonmanifold_faces) > 0) == twice
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    adv = advise(mesh, topo, _speeds(mesh), _fmax(mesh, topo, AdviceSettings()))
    every = np.ones(mesh.n_cells, bool)
    for limit, max_ids in ((50, 10), (2, 3)):
        ref, got = _both(monkeypatch, lambda: clusters(mesh, topo, adv, every, limit, max_ids))
        assert len(ref) == min(copies + twice, limit)  # the listed-again cell alone
        _clusters_equal(ref, got)


@pytest.mark.parametrize("name,kind", [("tet", "tetra"), ("tet structured", "tetra"),
                                       ("tet10", "tetra"), ("wedge", "wedge"),
                                       ("hex+wedge", "wedge"), ("hex structured", "hexahedron"),
                                       ("hex half structured", "hexahedron")])
def test_alignment_equals_the_numpy_reference(monkeypatch, name, kind):
    # s in [0, 1] from a 3x3 sum that numpy takes as d.T @ d and the kernel cell by cell
    # (in blocks): equal to rounding, 1e-12 absolute on s
    mesh, topo = _mesh(name)
    ref, got = _both(monkeypatch, lambda: _alignment(mesh, topo, kind))
    assert 0.0 <= ref <= 1.0
    assert abs(ref - got) <= 1e-12


@pytest.mark.parametrize("nan_points", [0, 40])
def test_direction_sum_is_the_sum_of_d_dT(nan_points):
    # more cells than one block of the kernel's sum (4096), and cells with NaN corners
    # whose direction is skipped; T equal to d.T @ d of the numpy reference to 1e-12
    mesh = _perturbed(tet_box((14, 12, 10)), 0.01, 12)
    topo = build_topology(mesh)
    pts = mesh.points.copy()
    pts[np.random.default_rng(2).integers(0, len(pts), nan_points)] = np.nan
    ce, b = topo.edges.cell_edges[0], mesh.blocks[0]
    assert len(ce) > 2 * 4096
    e = ce[np.arange(len(ce)), np.argmax(topo.edges.length[ce], axis=1)]
    d = pts[topo.edges.nodes[e, 1]] - pts[topo.edges.nodes[e, 0]]
    d = d[np.all(np.isfinite(d), axis=1)]
    d /= np.maximum(np.linalg.norm(d, axis=1), 1e-300)[:, None]
    T = np.zeros((3, 3))
    n = KA.longest_directions(ce, 0, 6, topo.edges.length, b.cells,
                              np.ascontiguousarray(b.info.edges[:, :2]), pts, T)
    assert n == len(d) and (nan_points == 0) == (n == len(ce))
    assert np.allclose(T, d.T @ d, rtol=0.0, atol=1e-12 * np.abs(d.T @ d).max())
    assert np.array_equal(T, T.T)


@pytest.mark.parametrize("shared", [False, True])
def test_edge_min_bins_in_disjoint_edge_ranges_are_numpys_minimum_at(shared):
    # each thread takes one range of edges and reads every cell: the ranges together give
    # every edge's smallest bins over its cells (np.minimum.at over the cells' edge lists)
    rng = np.random.default_rng(2)
    n_cells, n_e, W = 3000, 900, 8
    ce = rng.integers(0, n_e, (n_cells, 6)).astype(np.int32)
    row = rng.integers(0, 400, n_cells).astype(np.int32) if shared else np.zeros(0, np.int32)
    B = rng.integers(0, 250, (400 if shared else n_cells, W)).astype(np.uint8)
    bins = B[row] if shared else B
    want = np.full((n_e, W), 255, np.uint8)
    np.minimum.at(want, ce.ravel(), np.repeat(bins, 6, axis=0))
    for cuts in ([0, n_e], [0, 450, n_e], [0, 1, 2, 300, 899, n_e]):
        E = np.full((n_e, W), 255, np.uint8)
        for lo, hi in zip(cuts[:-1], cuts[1:]):
            # two blocks of cells (global cell numbers g0 + c)
            KA.edge_min_bins(B, row, ce[:1000], 0, lo, hi, E)
            if shared:
                KA.edge_min_bins(B, row, ce[1000:], 1000, lo, hi, E)
            else:
                KA.edge_min_bins(B[1000:], row, ce[1000:], 0, lo, hi, E)
        np.testing.assert_array_equal(E, want)


@pytest.mark.parametrize("renumber", [False, True])
def test_variable_order_dofs_of_a_large_mesh_on_threads(monkeypatch, renumber):
    # above 50k cells the edges' minima are split by edge ranges over two threads when
    # the mesh is renumbered (its edges run along its cells), else one job: the same
    # unknowns as the numpy reference either way
    from meshcheck.ordering import renumbered

    mesh = tet_box((20, 20, 22))
    assert mesh.n_cells > 50_000
    if renumber:
        mesh = renumbered(mesh)
    topo = build_topology(mesh)
    rng = np.random.default_rng(4)
    lim = np.sort(rng.uniform(100.0, 3000.0, (mesh.n_cells, 8)), axis=1)
    f = np.linspace(50.0, 3500.0, 40)
    ranges = []
    real = KA.edge_min_bins
    monkeypatch.setattr(KA, "edge_min_bins",
                        lambda *a: (ranges.append((a[4], a[5])), real(*a))[1])
    ref, got = _both(monkeypatch, lambda: variable_order_dofs(mesh, topo, lim, f, 8))
    _same(ref, got, "dofs")
    n_e = len(topo.edges)
    assert sorted(set(ranges)) == ([(0, n_e // 2), (n_e // 2, n_e)] if renumber
                                   else [(0, n_e)])


@pytest.mark.parametrize("name", ["tet", "hex+wedge"])
def test_sweep_counts_only_the_orders_exceeded(monkeypatch, name):
    # a sweep whose cells need order 2 at most: the compiled unknowns read one column of
    # bins (orders 3..8 are never exceeded, so they add nothing), the same counts as
    # the numpy reference, which counts every order
    mesh, topo = _mesh(name)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    adv = advise(mesh, topo, _speeds(mesh), 1000.0, AdviceSettings())
    top = float(np.nanmin(adv.limit_at(2)))  # below every cell's order-2 limit
    assert np.nanmin(adv.limit_at(1)) < top
    f = np.linspace(0.2 * top, 0.99 * top, 30)
    widths = []
    for kernel in ("edge_min_bins", "face_dof_hist"):
        real = getattr(KA, kernel)
        monkeypatch.setattr(KA, kernel, lambda B, *a, real=real:
                            (widths.append(B.shape[1]), real(B, *a))[1])
    ref, got = _both(monkeypatch, lambda: sweep(mesh, topo, adv, f))
    _same(ref.dofs, got.dofs, "dofs")
    assert widths and set(widths) == {1}
    assert got.dofs[-1] > got.dofs[0]  # order 2 reached somewhere within the sweep


def test_face_unknowns_of_the_columns_kept_are_those_of_all():
    # face_dof_hist on the columns qs of B only equals it on all columns when the others
    # are never exceeded (n_f + 1 or NaN's 0): the weights follow qs, not the position
    rng = np.random.default_rng(8)
    n_f, n_faces, W = 40, 500, 8
    B = rng.integers(0, n_f + 2, (300, W)).astype(np.uint8)
    drop = [0, 2, 4, 5, 6, 7]
    B[:, drop] = np.where(rng.random((300, len(drop))) < 0.1, 0, n_f + 1)
    fcells = rng.integers(-1, 300, (n_faces, 2)).astype(np.int32)
    fcells[:, 0] = np.abs(fcells[:, 0])
    tri = rng.random(n_faces) < 0.5
    row = np.zeros(0, np.int32)
    full = np.zeros(n_f + 1, np.int64)
    KA.face_dof_hist(B, np.arange(W), row, fcells, tri, 0, n_faces, full)
    kept = np.zeros(n_f + 1, np.int64)
    qs = np.array([1, 3])
    KA.face_dof_hist(np.ascontiguousarray(B[:, qs]), qs, row, fcells, tri, 0, n_faces, kept)
    np.testing.assert_array_equal(kept[:n_f], full[:n_f])  # (bin n_f: never counted)
    assert full[:n_f].sum() > 0


def test_governing_edge_is_numpys_argmax_with_ties_and_nan():
    # np.argmax: the first of equal maxima, the first NaN if there is one
    h = np.array([1.0, 2.0, 2.0, np.nan, 0.5, np.nan, 3.0])
    ce = np.array([[0, 1, 2], [2, 1, 0], [0, 3, 6], [4, 4, 4], [6, 5, 3], [3, 0, 1]])
    gov = np.empty(len(ce), np.int64)
    KA.governing_edges(ce, 0, len(ce), h, gov, 0)
    assert np.array_equal(gov, ce[np.arange(len(ce)), np.argmax(h[ce], axis=1)])
    out = np.empty(len(ce))
    KA.per_cell_max(ce, h, out, 0)
    assert np.array_equal(out, np.maximum.reduce(h[ce], axis=1), equal_nan=True)


KERNELS = ("governing_edges", "mark_rows", "odd_cells", "longest_directions", "gov_index",
           "exact_rows", "finish_limits", "edge_orders", "per_cell_max", "order_hist",
           "edge_min_bins", "edge_bin_hist", "face_dof_hist", "label_flagged", "count_labels",
           "cluster_stats", "lookup", "gov_sizes", "gov_directions")


@pytest.mark.parametrize("name,expected", [
    # two media, wedges: cells of mixed size factors, limits finished after the exact ones
    # (cells whose edges carry different factors: their factor is the largest over the
    # edges, not looked up by their longest edge's code)
    # (the wedges' alignment searches their first triangle's longest edge itself)
    ("hex+wedge", set(KERNELS) - {"lookup", "gov_sizes", "gov_directions"}),
    # two media, one kind: each cell's factor looked up by its longest edge's code
    ("tet two media", set(KERNELS) - {"per_cell_max", "gov_sizes", "longest_directions"}),
    # one medium, one kind: the cell pass finishes the limits and decides the sizes itself
    ("tet", set(KERNELS) - {"odd_cells", "exact_rows", "finish_limits", "per_cell_max",
                            "gov_index", "lookup", "longest_directions"})])
def test_the_compiled_path_is_taken(monkeypatch, name, expected):
    # a comparison with itself would prove nothing: every kernel of the advice stage
    # runs under MESHCHECK_KERNELS=numba and none under numpy
    mesh, topo = _mesh(name)
    calls = {}
    for kname in KERNELS:
        fn = getattr(KA, kname)
        monkeypatch.setattr(KA, kname, lambda *a, _fn=fn, _n=kname: (
            calls.__setitem__(_n, calls.get(_n, 0) + 1), _fn(*a))[1])
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        calls.clear()
        adv = advise(mesh, topo, _speeds(mesh), _fmax(mesh, topo, AdviceSettings()))
        sweep(mesh, topo, adv, np.linspace(100.0, 2000.0, 9))
        clusters(mesh, topo, adv, adv.refine)
        if mode == "numpy":
            assert not calls
        else:
            assert set(calls) == expected


def test_auto_mode_uses_numpy_for_small_meshes(monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", "auto")
    assert not kernels.use_compiled(kernels.MIN_CELLS - 1)
    assert kernels.use_compiled(kernels.MIN_CELLS)


def _int32_topology(topo):
    """The topology with its index arrays (edge nodes, cell edges, incidence, face
    cells and counts) cast to int32, as meshes whose counts fit store them."""
    e, f = topo.edges, topo.faces
    edges = dataclasses.replace(
        e, nodes=e.nodes.astype(np.int32),
        cell_edges=tuple(ce.astype(np.int32) for ce in e.cell_edges),
        incidence=e.incidence.astype(np.int32),
        incidence_starts=e.incidence_starts.astype(np.int32))
    faces = dataclasses.replace(f, cells=f.cells.astype(np.int32), count=f.count.astype(np.int32))
    return dataclasses.replace(topo, edges=edges, faces=faces)


@pytest.mark.parametrize("setting", ["variable", "fixed p=2"])
@pytest.mark.parametrize("name", ["tet", "hex+wedge", "pyramid", "triangle 2D"])
def test_int32_topology_gives_the_int64_results(monkeypatch, name, setting):
    # every kernel of the stage runs on int32 index arrays (numba compiles a variant):
    # the same advice, sweep, unknowns, clusters and alignment as with int64
    mesh, topo = _mesh(name)
    t32 = _int32_topology(topo)
    assert t32.edges.cell_edges[0].dtype == np.int32 and t32.edges.incidence.dtype == np.int32
    s = SETTINGS[setting]
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    fmax = _fmax(mesh, topo, s)
    f = np.linspace(0.2, 2.0, 30) * fmax
    rng = np.random.default_rng(5)
    mask = rng.random(mesh.n_cells) < 0.3
    lim = rng.uniform(100.0, 3000.0, (mesh.n_cells, 12))
    lim[rng.integers(0, mesh.n_cells, 3)] = np.nan
    out = []
    for t in (topo, t32):
        adv = advise(mesh, t, _speeds(mesh), fmax, s)
        sw = sweep(mesh, t, adv, f)
        kinds = {b.info.linear for b in mesh.blocks} & {"tetra", "wedge"}
        out.append((adv, sw, clusters(mesh, t, adv, adv.refine), clusters(mesh, t, adv, mask),
                    variable_order_dofs(mesh, t, lim, f, 8),
                    [_alignment(mesh, t, k) for k in sorted(kinds)]))
    (a64, s64, r64, m64, d64, al64), (a32, s32, r32, m32, d32, al32) = out
    for field in ADVICE_FIELDS:
        _same(getattr(a64, field), getattr(a32, field), field)
    for field in ("order_counts", "ready", "dofs"):
        _same(getattr(s64, field), getattr(s32, field), field)
    _clusters_equal(r64, r32)
    _clusters_equal(m64, m32)
    assert len(m64) > 1
    _same(d64, d32, "variable-order unknowns")
    assert al64 == al32
    # the exact unknowns and non-zeros of the cost model (numpy) too
    orders = rng.integers(1, 6, mesh.n_cells)
    for condensed in (True, False):
        assert system_size(mesh, topo, orders, condensed) == \
            system_size(mesh, t32, orders, condensed)


@pytest.mark.parametrize("extent", [0.0, -1.0])
@pytest.mark.parametrize("name", ["tet", "hex+wedge"])
def test_a_propagation_distance_not_above_zero_is_refused_on_both_paths(monkeypatch, name,
                                                                       extent):
    # the compiled path checks L / h > 0 inside the edge kernel (no (n_e,) ratio array)
    from meshcheck.errors import SettingsError
    mesh, topo = _mesh(name)
    flat = dataclasses.replace(topo, component_extent=np.full_like(topo.component_extent,
                                                                   extent))
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        with pytest.raises(SettingsError, match="L/h"):
            advise(mesh, flat, _speeds(mesh), 500.0, AdviceSettings())
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    assert advise(mesh, topo, _speeds(mesh), 500.0, AdviceSettings()).cell_limit.min() > 0


@pytest.mark.parametrize("size", [0.37, 0.0, np.inf, np.nan])
def test_gov_sizes_decides_as_the_numpy_operations(size):
    # the one-size kernel against numpy's float64 operations on its inputs, with a zero
    # factor (x / 0), NaN and infinite lengths among the governing edges
    h = np.array([0.1, 0.2, np.nan, np.inf, 0.05, 0.3])
    code = np.array([0, 1, 2, 1, 0, 2], np.uint8)
    a_col = np.array([0.8, 0.0, 1.1])
    gov = np.array([0, 1, 2, 3, 4, 5, 1, 0], np.int32)
    owner = np.array([0, 1, 2, 3, 4, 5], np.int32)
    n = len(gov)
    out = [np.empty(n, np.int32), np.empty(n, np.float32), np.empty(n, np.float32),
           np.empty(n, bool)]
    order, ref = np.arange(6, dtype=np.int8), np.zeros(6, bool)
    KA.gov_sizes(gov, owner, 0, n, out[0], h, code, a_col, size, 2.0, True, order, ref,
                 np.empty(n, np.int8), np.empty(n, bool), out[1], out[2], out[3])
    with np.errstate(all="ignore"):
        target = size / a_col[code[gov]]
        coarsen = target >= np.multiply(h[gov], 2.0)
    assert np.array_equal(out[0], owner[gov])
    assert np.array_equal(out[1], h[gov].astype(np.float32), equal_nan=True)
    assert np.array_equal(out[2], target.astype(np.float32), equal_nan=True)
    assert np.array_equal(out[3], coarsen)


@pytest.mark.parametrize("name", ["tet 6k", "tet 105k", "tet10", "hex", "wedge"])
def test_alignment_from_the_known_longest_edges_is_the_same_sum(monkeypatch, name):
    # advise finds every cell's longest edge once; the alignment of cells whose every edge
    # counts reads it (kernel gov_directions) and sums the same directions in the same
    # blocks of 4096 cells (and halves above 100k cells): the same value bit for bit;
    # wedges (first triangle only) keep their own search
    from meshcheck.advice import _longest_edges

    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    mesh = {"tet 6k": lambda: _perturbed(tet_box((10, 10, 10)), 0.02),
            "tet 105k": lambda: _perturbed(tet_box((26, 26, 26)), 0.01)}.get(
        name, lambda: _mesh(name)[0])()
    topo = build_topology(mesh)
    kind = mesh.blocks[0].info.linear
    calls = []
    real = KA.gov_directions
    monkeypatch.setattr(KA, "gov_directions", lambda *a: calls.append(1) or real(*a))
    gov = _longest_edges(mesh, topo)
    assert np.array_equal(gov, [e for ce in topo.edges.cell_edges
                                for e in ce[np.arange(len(ce)),
                                            np.argmax(topo.edges.length[ce], axis=1)]])
    assert _alignment(mesh, topo, kind, gov) == _alignment(mesh, topo, kind)
    assert bool(calls) == (kind != "wedge")
    if name == "tet 105k":
        assert mesh.n_cells > 100_000 and len(calls) == 2
