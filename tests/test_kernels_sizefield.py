"""Compiled kernels of the size field (meshcheck/kernels/sizefield.py) against the numpy /
scipy reference (MESHCHECK_KERNELS=numpy): node minima, the gradation limit (Dijkstra),
the cell density of the element count and the whole size field, on meshes generated in
code (tetrahedra, quadratic tetrahedra, hexahedra, wedges, pyramids, hexahedra + wedges,
2D triangles and quadrilaterals), perturbed or graded, with nan / inf / zero sizes,
zero-length edges and nodes of no cell.  The minima and the gradation distances are
bit-identical (a min of the same floating-point sums); the densities sum the corners in
order where numpy groups 8 terms pairwise, so floats are compared to 1e-12 relative."""
import numpy as np
import pytest

pytest.importorskip("numba")

import meshcheck.kernels.sizefield as KS  # noqa: E402
from meshcheck.advice import AdviceSettings, advise  # noqa: E402
from meshcheck.mesh import Mesh  # noqa: E402
from meshcheck.sizefield import (_cell_density, _node_mins, estimate_cells,  # noqa: E402
                                 limit_gradation, node_min, size_field)
from meshcheck.topology import build_topology  # noqa: E402
from meshes import hex_box, tet10_box, tet_box  # noqa: E402
from test_cost import mixed_hex_wedge, pyramid_box, quad_square, tri_square, wedge_box  # noqa: E402


def _moved(mesh: Mesh, amount: float, seed: int = 0) -> Mesh:
    """Nodes moved at random by up to ``amount`` m per axis (2D: in the plane)."""
    rng = np.random.default_rng(seed)
    pts = mesh.points.copy()
    axes = 3 if mesh.dim == 3 else 2
    pts[:, :axes] += rng.uniform(-amount, amount, (len(pts), axes))
    return Mesh(pts, mesh.blocks, dict(mesh.region_names), mesh.dim)


def _graded(mesh: Mesh) -> Mesh:
    """Spacing graded along x (x -> x^2.5): cells 1 .. 100 times apart in size."""
    pts = mesh.points.copy()
    pts[:, 0] = pts[:, 0] ** 2.5
    return Mesh(pts, mesh.blocks, dict(mesh.region_names), mesh.dim)


def _with_orphans(mesh: Mesh, k: int = 3) -> Mesh:
    """``k`` extra nodes used by no cell, and two nodes of the first cell at one place (a
    zero-length edge, which the gradation must not follow)."""
    pts = np.vstack([mesh.points, np.full((k, 3), 5.0)])
    c = mesh.blocks[0].cells[0]
    pts[c[1]] = pts[c[0]]
    return Mesh(pts, mesh.blocks, dict(mesh.region_names), mesh.dim)


MESHES = {
    "tet": lambda: _moved(tet_box((5, 4, 3), size=(1.0, 0.8, 0.6)), 0.03),
    "tet graded": lambda: _graded(tet_box((8, 3, 3))),
    "tet10": lambda: _moved(tet10_box((3, 2, 2), size=(1.0, 0.7, 0.6)), 0.01, 8),
    "hex": lambda: _moved(hex_box((5, 4, 3), size=(1.0, 0.8, 0.6)), 0.02, 2),
    "hex graded": lambda: _graded(hex_box((9, 2, 2))),
    "wedge": lambda: _moved(wedge_box((4, 3, 2)), 0.02, 3),
    "pyramid": lambda: _moved(pyramid_box((3, 2, 2)), 0.02, 4),
    "hex+wedge": lambda: _moved(mixed_hex_wedge((4, 2, 2)), 0.02, 5),
    "tri": lambda: _moved(tri_square((6, 5)), 0.03, 6),
    "quad graded": lambda: _graded(quad_square((8, 4))),
    "tet orphans": lambda: _with_orphans(_moved(tet_box((3, 3, 3)), 0.03, 7)),
}


def _run(monkeypatch, mode, fn):
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    with np.errstate(invalid="ignore"):  # np.minimum.at of nan values
        return fn()


def _both(monkeypatch, fn):
    return _run(monkeypatch, "numpy", fn), _run(monkeypatch, "numba", fn)


def _close(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    assert a.shape == b.shape
    assert np.array_equal(np.isnan(a), np.isnan(b))
    ok = ~np.isnan(a)
    np.testing.assert_allclose(b[ok], a[ok], rtol=1e-12, atol=0)


def _sizes(mesh: Mesh, seed: int) -> np.ndarray:
    """Random node sizes 0.01 .. 1 m with some nan, inf and zero."""
    rng = np.random.default_rng(seed)
    h = np.exp(rng.uniform(np.log(0.01), 0.0, mesh.n_points))
    k = rng.permutation(mesh.n_points)
    h[k[:2]], h[k[2:4]], h[k[4]] = np.nan, np.inf, 0.0
    return h


@pytest.mark.parametrize("name", list(MESHES))
def test_node_min_matches(monkeypatch, name):
    mesh = MESHES[name]()
    topo = build_topology(mesh)
    rng = np.random.default_rng(1)
    v = rng.uniform(0.1, 2.0, mesh.n_cells)
    v[rng.permutation(mesh.n_cells)[:2]] = [np.nan, np.inf]
    ref, got = _both(monkeypatch, lambda: node_min(mesh, topo, v))
    assert np.array_equal(ref, got, equal_nan=True)
    assert np.isnan(ref).any() and np.isfinite(ref).any()
    # several fields in one pass (the size field's target, cap and current sizes)
    w = rng.uniform(-1.0, 1.0, mesh.n_cells)
    refs, gots = _both(monkeypatch, lambda: _node_mins(mesh, [w, v, -w]))
    for r, g in zip(refs, gots):
        assert np.array_equal(r, g, equal_nan=True)
    assert np.array_equal(refs[1], ref, equal_nan=True)
    # the fields stacked a few cells at a time, one of them a broadcast: the same
    import meshcheck.sizefield as S

    monkeypatch.setattr(S, "_NODE_MIN_CHUNK", 7)
    const = np.broadcast_to(0.5, (mesh.n_cells,))
    refs, gots = _both(monkeypatch, lambda: _node_mins(mesh, [w, const, v]))
    for r, g in zip(refs, gots):
        assert np.array_equal(r, g, equal_nan=True)
    assert np.array_equal(gots[2], ref, equal_nan=True)
    # a field made a chunk at a time by a function of the cell range: the same minima
    made = _both(monkeypatch, lambda: _node_mins(mesh, [lambda lo, hi: v[lo:hi], w]))
    for r, g in zip(made, _both(monkeypatch, lambda: _node_mins(mesh, [v, w]))):
        for a, b in zip(r, g):
            assert np.array_equal(a, b, equal_nan=True)


@pytest.mark.parametrize("sweeps", [None, 0, 1, 1000],
                         ids=["default", "dijkstra", "sweep+dijkstra", "sweeps"])
@pytest.mark.parametrize("beta", [0.05, 0.3, 2.0])
@pytest.mark.parametrize("name", list(MESHES))
def test_gradation_matches_dijkstra(monkeypatch, name, beta, sweeps):
    # the kernel's two stages: edge sweeps alone (to convergence), Dijkstra alone, and
    # Dijkstra continuing from the labels of one sweep
    mesh = MESHES[name]()
    topo = build_topology(mesh)
    h = _sizes(mesh, 2)
    if sweeps is not None:
        fn = KS.gradation_distances
        monkeypatch.setattr(KS, "gradation_distances", lambda *a: fn(*a, sweeps))
    ref, got = _both(monkeypatch, lambda: limit_gradation(mesh, topo, h, beta))
    assert np.array_equal(ref, got, equal_nan=True)  # bit-identical
    assert np.any(ref < np.where(np.isfinite(h), h, np.inf))  # the limit is active
    if sweeps == 1000:  # the sweeps settled by themselves; one sweep did not
        d = np.where(np.isfinite(h), np.maximum(h / beta, 1e-300), np.inf)
        assert not KS._sweeps(topo.edges.nodes, topo.edges.length, d.copy(), 1)
        assert KS._sweeps(topo.edges.nodes, topo.edges.length, d, 1000)


def test_gradation_with_no_source_and_one_source(monkeypatch):
    mesh = _moved(tet_box((4, 3, 3)), 0.02, 11)
    topo = build_topology(mesh)
    none = np.full(mesh.n_points, np.nan)
    ref, got = _both(monkeypatch, lambda: limit_gradation(mesh, topo, none, 0.3))
    assert np.isnan(ref).all() and np.isnan(got).all()
    one = np.full(mesh.n_points, np.inf)
    one[7] = 0.01
    ref, got = _both(monkeypatch, lambda: limit_gradation(mesh, topo, one, 0.3))
    assert np.array_equal(ref, got) and ref[7] == 0.01
    assert np.all(np.delete(ref, 7) > 0.01)


@pytest.mark.parametrize("name", list(MESHES))
def test_cell_density_and_count_match(monkeypatch, name):
    mesh = MESHES[name]()
    topo = build_topology(mesh)
    h = _sizes(mesh, 3)
    h[np.isinf(h)] = 0.05  # inf -> density 0 is fine, but keep the count finite
    ref, got = _both(monkeypatch, lambda: _cell_density(mesh, topo, h))
    _close(ref, got)
    assert np.isfinite(ref).any()
    e_ref, e_got = _both(monkeypatch, lambda: estimate_cells(mesh, topo, h))
    assert e_got == pytest.approx(e_ref, rel=1e-12)
    # the count sums the cells a chunk at a time: the same as the whole-array integral
    import meshcheck.sizefield as S
    from meshcheck.sizefield import GMSH_COUNT, _boundary_integral

    a, b = GMSH_COUNT[3 if mesh.dim == 3 else 2]
    ok = np.isfinite(ref)
    whole = a * np.sum(np.abs(ref[ok] * topo.cell_volume[ok])) + b * _boundary_integral(
        mesh, topo, h)
    assert e_ref == pytest.approx(whole, rel=1e-12)
    monkeypatch.setattr(S, "_DENSITY_CHUNK", 7)
    monkeypatch.setattr(S, "_FACE_CHUNK", 5)  # the boundary integral 5 faces at a time
    small = _both(monkeypatch, lambda: estimate_cells(mesh, topo, h))
    assert small == pytest.approx([e_ref, e_got], rel=1e-12)


def test_cell_density_all_nan_cell(monkeypatch):
    mesh = tet_box((2, 2, 2))
    topo = build_topology(mesh)
    h = np.full(mesh.n_points, 0.1)
    h[mesh.blocks[0].cells[0]] = np.nan
    with np.errstate(all="ignore"), pytest.warns(RuntimeWarning):  # numpy: "Mean of empty slice"
        ref = _run(monkeypatch, "numpy", lambda: _cell_density(mesh, topo, h))
    got = _run(monkeypatch, "numba", lambda: _cell_density(mesh, topo, h))
    assert np.isnan(ref[0]) and np.isnan(got[0])
    _close(ref, got)


def _advice(mesh, topo, fmax=900.0):
    return advise(mesh, topo, np.full(mesh.n_cells, 343.0), fmax,
                  AdviceSettings(target=0.01, max_order=4))


@pytest.mark.parametrize("name", list(MESHES))
def test_size_field_matches(monkeypatch, name):
    mesh = MESHES[name]()
    topo = build_topology(mesh)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    adv = _advice(mesh, topo)
    corner = np.argmin(mesh.points.sum(axis=1))

    def limit(m, t):  # a small size at one corner: the gradation works over the mesh
        g = np.full(m.n_points, np.inf)
        g[corner] = 1e-3
        return g

    def fld():  # the estimate worked out (when first asked for) in the mode being run
        f = size_field(mesh, topo, adv, gradation=0.2, geometry_limit=limit)
        f.cells_estimate
        return f

    ref, got = _both(monkeypatch, fld)
    for k in ("target", "geometry", "size", "mesher_size", "current"):
        assert np.array_equal(getattr(ref, k), getattr(got, k), equal_nan=True), k
    assert got.cells_estimate == pytest.approx(ref.cells_estimate, rel=1e-12)
    assert np.nanmin(ref.size) == 1e-3 and np.any(ref.size < np.minimum(ref.target, 1.0))


def test_the_kernels_are_taken(monkeypatch):
    # the comparisons above mean something only if "numba" runs the kernels
    calls = []
    for name in ("node_min_pair", "gradation_distances", "corner_nanmean"):
        fn = getattr(KS, name)
        monkeypatch.setattr(KS, name, lambda *a, _f=fn, _n=name: calls.append(_n) or _f(*a))
    mesh = tet_box((3, 3, 3))
    topo = build_topology(mesh)
    adv = _advice(mesh, topo)
    _run(monkeypatch, "numpy", lambda: size_field(mesh, topo, adv).cells_estimate)
    assert calls == []
    _run(monkeypatch, "numba", lambda: size_field(mesh, topo, adv).cells_estimate)
    assert {"node_min_pair", "gradation_distances", "corner_nanmean"} <= set(calls)


def test_mid_nodes_read_the_values_before_any_is_set(monkeypatch):
    # a broken quadratic mesh whose first cell's first mid-node is a corner of another
    # cell: the compiled pass must then read the corners from a copy, as numpy's
    # gathers do (a valid mesh is set in place, with no copy)
    from meshcheck.mesh import CellBlock

    mesh = MESHES["tet10"]()
    b = mesh.blocks[0]
    e = np.ascontiguousarray(b.info.edges)
    assert not KS.mids_are_corners(b.cells, e, 4, mesh.n_points)
    cells = b.cells.copy()
    cells[0, e[0, 2]] = cells[-1, 0]
    broken = Mesh(mesh.points, (CellBlock(b.type, cells, b.region),), dict(mesh.region_names),
                  mesh.dim)
    assert KS.mids_are_corners(cells, e, 4, mesh.n_points)
    topo = build_topology(broken)
    v = np.random.default_rng(3).uniform(0.1, 2.0, broken.n_cells)
    refs, gots = _both(monkeypatch, lambda: _node_mins(broken, [v, -v]))
    for r, g in zip(refs, gots):
        assert np.array_equal(r, g, equal_nan=True)
    h = _sizes(broken, 4)
    ref, got = _both(monkeypatch, lambda: limit_gradation(broken, topo, h, 0.3))
    assert np.array_equal(ref, got, equal_nan=True)


@pytest.mark.parametrize("name", list(MESHES))
def test_pos_view_text_equals_the_numpy_assembly(monkeypatch, tmp_path, name):
    # the compiled lines (kernels.sizefield.pos_lines) against the numpy code's padded
    # byte rows, byte for byte: every cell kind, nan values (their cells dropped),
    # chunks ending mid-block; the numpy text is itself checked against number-by-number
    # formatting in test_sizefield.py
    from meshcheck.sizefield import write_pos
    mesh = MESHES[name]()
    vals = 0.01 + np.random.default_rng(5).random(mesh.n_points) / 7
    vals[::11] = np.nan
    a, b = _both(monkeypatch, lambda: write_pos(tmp_path / f"{len(list(tmp_path.iterdir()))}.pos",
                                                mesh, vals, scale=1e-3, chunk=7).read_bytes())
    assert a == b and b.count(b"\n") > 2
