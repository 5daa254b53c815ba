"""Advice against the 1D model solved independently, closed-form scalings and monotonicity."""
import meshio
import numpy as np
import pytest
from scipy.optimize import brentq

from meshcheck import kernels, threads
from meshcheck.advice import SIZE_FACTOR_TABLE, AdviceSettings
from meshcheck.dispersion import predicted_error, usable_kh
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.reading import read_mesh
from meshcheck.mesh import CellBlock, Mesh
from meshes import LIMIT_RTOL, hex_box, tet_box
from test_verify import _gmsh_tets

C = 343.0


def _first_crossing(p, r, tau):
    """Largest kh of the 1D model (first crossing of the target), by scan + brentq."""
    t = np.linspace(1e-3, 4 * p + 8, 40000)
    err = predicted_error(t, p, t * r) - tau
    i = int(np.argmax(err > 0))
    return brentq(lambda x: float(predicted_error(x, p, x * r) - tau), t[i - 1], t[i])


@pytest.mark.parametrize("p", [1, 2, 4, 8])
@pytest.mark.parametrize("target", [0.01, 0.05])
def test_uniform_grid_limit_is_the_1d_model(p, target):
    # structured hex grid of size h: every edge has length h, L = box diagonal, so the
    # highest usable frequency is f = c * (kh)_max / (2 pi h) of the 1D model
    n, size = 6, (1.2, 0.6, 0.6)
    mesh = hex_box((n, 3, 3), size=size)
    h = 0.2
    L = np.linalg.norm(size)
    # correction_3d=False: this checks the plain 1D model (the correction is tested below)
    res = audit(mesh, AuditSettings((100.0,), AdviceSettings(target=target, max_order=8,
                                                             correction_3d=False), speed=C))
    expected = C * _first_crossing(p, L / h, target) / (2 * np.pi * h)
    assert res.advice.mesh_limit[p - 1] == pytest.approx(expected, rel=2e-3)


def _quad_grid(nx=6, ny=3, h=0.2):
    x, y = np.meshgrid(np.arange(nx + 1) * h, np.arange(ny + 1) * h, indexing="ij")
    pts = np.column_stack([x.ravel(), y.ravel(), np.zeros(x.size)])
    i, j = np.meshgrid(np.arange(nx), np.arange(ny), indexing="ij")
    a = (i * (ny + 1) + j).ravel()
    return pts, np.column_stack([a, a + ny + 1, a + ny + 2, a + 1])


def _uncorrected_meshes():
    """Kinds without a correction row (a = 1): 2D quads, 2D triangles, pyramids."""
    pts, quads = _quad_grid()
    one = np.ones(len(quads), np.int64)
    tris = np.vstack([quads[:, [0, 1, 2]], quads[:, [0, 2, 3]]])
    hexes = hex_box((6, 3, 3), size=(1.2, 0.6, 0.6))
    hp = hexes.points
    hc = hexes.blocks[0].cells  # 6 pyramids per cube, apex at an added centre node
    centre = len(hp) + np.arange(len(hc))
    pyr_pts = np.vstack([hp, hp[hc].mean(axis=1)])
    faces = [(0, 3, 2, 1), (4, 5, 6, 7), (0, 1, 5, 4), (1, 2, 6, 5), (2, 3, 7, 6), (3, 0, 4, 7)]
    pyr = np.vstack([np.column_stack([hc[:, list(f)], centre]) for f in faces])
    return {"quads 2D": (Mesh(pts, (CellBlock("quad", quads, one),), dim=2), 0.2,
                         np.hypot(1.2, 0.6)),
            "triangles 2D": (Mesh(pts, (CellBlock("triangle", tris, np.ones(len(tris),
                                                                         np.int64)),), dim=2),
                             0.2 * np.sqrt(2), np.hypot(1.2, 0.6)),
            "pyramids": (Mesh(pyr_pts, (CellBlock("pyramid", pyr, np.ones(len(pyr),
                                                                         np.int64)),)),
                         0.2, np.linalg.norm((1.2, 0.6, 0.6)))}


@pytest.mark.parametrize("correction", [True, False], ids=["default", "plain"])
@pytest.mark.parametrize("name", ["quads 2D", "triangles 2D", "pyramids"])
def test_kinds_without_a_correction_row_keep_the_1d_model(name, correction):
    # no fitted factor for these kinds: with or without the correction the limit of the
    # mesh is the 1D model's at its longest edge, f = c (kh)_max(p, L/h) / (2 pi h)
    mesh, h, L = _uncorrected_meshes()[name]
    res = audit(mesh, AuditSettings((100.0,), AdviceSettings(max_order=4,
                                                             correction_3d=correction), speed=C))
    for p in (1, 2, 4):
        expected = C * _first_crossing(p, L / h, 0.01) / (2 * np.pi * h)
        assert res.advice.mesh_limit[p - 1] == pytest.approx(expected, rel=2e-3)


TET_MESHES = {"split bricks": lambda: tet_box((4, 3, 3), size=(1.2, 0.9, 0.6)),
              "gmsh unstructured": _gmsh_tets}
_TET_AUDITS = {}


def _tet_audit(name: str):
    """(mesh, audit with the default AdviceSettings, plain-model audit), computed once."""
    if name not in _TET_AUDITS:
        mesh = TET_MESHES[name]()
        _TET_AUDITS[name] = (mesh, audit(mesh, AuditSettings((100.0,), speed=C)),
                             audit(mesh, AuditSettings((100.0,), AdviceSettings(
                                 correction_3d=False), speed=C)))
    return _TET_AUDITS[name]


def _longest_edges(mesh):
    """(n,) length and (n, 3) unit direction of each tetrahedron's longest edge."""
    t = mesh.blocks[0].cells
    pairs = np.array([(0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3)])
    vec = mesh.points[t[:, pairs[:, 1]]] - mesh.points[t[:, pairs[:, 0]]]
    length = np.linalg.norm(vec, axis=2)
    h = length.max(axis=1)
    return h, vec[np.arange(len(t)), np.argmax(length, axis=1)] / h[:, None]


def test_default_settings_apply_the_3d_correction():
    assert AdviceSettings().correction_3d is True
    assert AuditSettings((100.0,)).advice.correction_3d is True


@pytest.mark.parametrize("p", [1, 2, 4, 8])
@pytest.mark.parametrize("name", list(TET_MESHES))
def test_default_limit_is_the_1d_model_on_edges_a_times_shorter(name, p):
    # docs/validation.md: with the correction (on by default) the 1D model sees an edge of
    # length h as a*h long, f = c (kh)_max(p, L/(a h)) / (2 pi a h) = f_plain(a h), with
    # a = a_free + w (a_aligned - a_free), w = max(0, s - s_free) / (1 - s_free) and s from
    # the largest eigenvalue lam of mean(d d^T) over the cells' longest-edge directions d,
    # s = (3 lam - 1) / 2.  Split bricks: every d is the brick diagonal (s = 1, a_aligned);
    # gmsh tetrahedra point every way (s below s_free, a_free).  The longest edge of the
    # mesh governs (one speed, one L = the box diagonal).  (kh)_max is the 1D model's
    # first crossing as tabulated by meshcheck.dispersion.usable_kh (checked against root
    # finding in test_dispersion.py); root finding here instead would also test the
    # table's interpolation in L/h, which near a thin stop band (p >= 3) can be off by a
    # few per cent (gmsh mesh, p = 8: 1.9 %, the jump of (kh)_max above 3 pi).
    mesh, default, plain = _tet_audit(name)
    h, d = _longest_edges(mesh)
    lam = np.linalg.eigvalsh(d.T @ d / len(d))[-1]
    s = float(np.clip((3.0 * lam - 1.0) / 2.0, 0.0, 1.0))
    assert s > 0.99 if name == "split bricks" else s < 0.25
    s_free, rows = SIZE_FACTOR_TABLE["tetra"]
    a_free, a_aligned = rows[0.01][0][p - 1], rows[0.01][1][p - 1]
    a = a_free + max(0.0, s - s_free) / (1.0 - s_free) * (a_aligned - a_free)
    L = float(np.linalg.norm(np.ptp(mesh.points, axis=0)))
    hmax = float(h.max())
    kh = usable_kh(0.01, 12).max_kh
    f_plain = C * float(kh(p, L / hmax)) / (2 * np.pi * hmax)
    f_corr = C * float(kh(p, L / (a * hmax))) / (2 * np.pi * a * hmax)
    assert plain.advice.mesh_limit[p - 1] == pytest.approx(f_plain, rel=LIMIT_RTOL)
    assert default.advice.mesh_limit[p - 1] == pytest.approx(f_corr, rel=LIMIT_RTOL)
    # a < 1 for tetrahedra: the 3D meshes did better than the 1D model, the limit rises
    assert f_corr > 1.1 * f_plain


def test_limits_monotone_in_order_and_advice_in_frequency():
    mesh = tet_box((4, 3, 3), size=(1.0, 0.7, 0.7))
    f = np.linspace(50, 3000, 60)
    res = audit(mesh, AuditSettings(tuple(f), AdviceSettings(max_order=8), speed=C))
    assert np.all(np.diff(res.advice.cell_limit, axis=1) >= 0)
    counts = res.sweep.order_counts
    # number of cells needing more than order p never decreases with frequency
    above = counts[:, ::-1].cumsum(axis=1)[:, ::-1]
    assert np.all(np.diff(above, axis=0) >= 0)
    assert np.all(np.diff(res.sweep.dofs) >= 0)
    assert counts.sum(axis=1).tolist() == [mesh.n_cells] * len(f)


def test_same_mesh_in_millimetres_gives_same_limits(tmp_path):
    m = tet_box((3, 2, 2), size=(0.9, 0.6, 0.6))
    cells = [("tetra", m.blocks[0].cells)]
    meshio.write(tmp_path / "m.vtu", meshio.Mesh(m.points, cells))
    meshio.write(tmp_path / "mm.vtu", meshio.Mesh(m.points * 1000.0, cells))
    s = AuditSettings((500.0,), AdviceSettings(order=2))
    a = audit(read_mesh(tmp_path / "m.vtu", "m"), s)
    b = audit(read_mesh(tmp_path / "mm.vtu", "mm"), s)
    assert np.allclose(a.advice.cell_limit, b.advice.cell_limit, rtol=1e-12)


def test_limits_scale_with_sound_speed():
    # closed form: at fixed kh and L/h, f = c kh / (2 pi h) is proportional to c
    mesh = tet_box((3, 3, 3))
    air = audit(mesh, AuditSettings((100.0,), speed=343.0))
    water = audit(mesh, AuditSettings((100.0,), speed=1481.0))
    assert np.allclose(water.advice.mesh_limit / air.advice.mesh_limit, 1481.0 / 343.0)


def test_region_speed_override_by_name():
    mesh = tet_box((2, 2, 2))
    res = audit(mesh, AuditSettings((100.0,), speed=343.0, region_speeds={"air": 686.0}))
    assert np.allclose(res.advice.cell_speed, 686.0)


@pytest.mark.parametrize("p", [1, 2])
def test_target_size_is_the_size_that_passes(p):
    # a uniform hex grid with edges at the advised target size carries fmax, one a bit
    # coarser does not
    f = 400.0
    probe = audit(hex_box((2, 2, 2)), AuditSettings((f,), AdviceSettings(order=p), speed=C,
                                                      ))
    # the target depends on L; build meshes of the same extent L (1 m cube)
    h = float(probe.advice.target_size[0])
    n_ok = int(np.ceil(1.0 / h))
    ok = audit(hex_box((n_ok,) * 3), AuditSettings((f,), AdviceSettings(order=p), speed=C))
    assert ok.ready
    n_bad = max(1, int(np.floor(1.0 / h * 0.9)))
    bad = audit(hex_box((n_bad,) * 3), AuditSettings((f,), AdviceSettings(order=p), speed=C))
    assert not bad.ready
    assert bad.advice.refine.all()


def test_fixed_order_refine_region_is_the_coarse_part():
    # two blocks glued conformingly: fine (h = 0.05) and coarse (h = 0.25) in x
    xs = np.concatenate([np.linspace(0, 0.5, 11), np.linspace(0.5, 1.5, 5)[1:]])
    ys = np.linspace(0, 0.1, 3)
    X, Y, Z = np.meshgrid(xs, ys, ys, indexing="ij")
    pts = np.column_stack([X.ravel(), Y.ravel(), Z.ravel()])
    from meshes import grid_hexes
    from meshcheck.mesh import CellBlock, Mesh
    hexes = grid_hexes((len(xs) - 1, 2, 2))
    mesh = Mesh(pts, (CellBlock("hexahedron", hexes, np.ones(len(hexes))),))
    res = audit(mesh, AuditSettings((600.0,), AdviceSettings(order=2), speed=C))
    centre_x = mesh.centroids[:, 0]
    assert res.advice.refine[centre_x > 0.5].all()
    assert not res.advice.refine[centre_x < 0.5].any()
    assert len(res.refine_clusters) == 1 and res.refine_clusters[0].cells == 4 * 4


def test_cell_limit_is_min_over_its_edges_with_two_media():
    # the longest-edge shortcut must equal the edge-by-edge minimum, also at an interface of
    # two media where an edge takes the lower speed of its cells
    from meshcheck.dispersion import usable_kh
    from meshcheck.mesh import CellBlock, Mesh
    from meshcheck.topology import build_topology
    rng = np.random.default_rng(1)
    base = tet_box((4, 3, 3), size=(1.0, 0.8, 0.6))
    pts = base.points + rng.uniform(-0.02, 0.02, base.points.shape)
    cells = base.blocks[0].cells
    region = np.where(base.centroids[:, 0] < 0.5, 1, 2)
    mesh = Mesh(pts, (CellBlock("tetra", cells, region),), {1: "air", 2: "water"})
    # correction_3d=False: the brute force below is the plain 1D model edge by edge
    res = audit(mesh, AuditSettings((300.0,), AdviceSettings(max_order=8, correction_3d=False),
                                    region_speeds={"air": 343.0, "water": 1481.0}))
    topo = build_topology(mesh)
    c_cell = np.where(region == 1, 343.0, 1481.0)
    L = topo.cell_extent()
    edge_c = topo.edges.from_cells(c_cell, np.minimum)
    edge_L = topo.edges.from_cells(L, np.maximum)
    h = topo.edges.length
    table = usable_kh(0.01, 12)
    brute = np.stack([[(edge_c * table.max_kh(q, edge_L / h) / (2 * np.pi * h))[e].min()
                       for e in topo.edges.cell_edges[0]] for q in range(1, 9)], axis=1)
    brute = np.maximum.accumulate(brute, axis=1)  # the advisor's limits never drop with p
    assert np.allclose(res.advice.cell_limit[:, :8], brute, rtol=LIMIT_RTOL)


@pytest.mark.parametrize("mode", ["numpy", pytest.param("numba", marks=pytest.mark.skipif(
    not kernels.available(), reason="numba not installed"))])
def test_orders_on_threads_give_the_serial_result(monkeypatch, mode):
    # above 100k edges the orders (numpy) or the ranges of edges and cells (compiled
    # kernels, in threads.pieces) are computed on a thread pool; the result must be the
    # same array for array as one after the other, and as the compiled kernels given the
    # whole range at once
    import meshcheck.advice as A

    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    mesh = tet_box((26, 26, 26), size=(2.0, 1.5, 1.0))
    from meshcheck.topology import build_topology
    topo = build_topology(mesh)
    assert len(topo.edges) > 100_000
    speeds = np.full(mesh.n_cells, C)
    split = []
    real = A.pieces
    monkeypatch.setattr(A, "pieces", lambda n, par=True: split.append(real(n, par)) or split[-1])
    par = A.advise(mesh, topo, speeds, 900.0, AdviceSettings(max_order=8))
    assert (max(map(len, split), default=1) >= 4) == (mode == "numba" and threads.workers() > 1)
    monkeypatch.setattr(A, "thread_map", lambda fn, items, parallel=True: [fn(x) for x in items])
    ser = A.advise(mesh, topo, speeds, 900.0, AdviceSettings(max_order=8))
    monkeypatch.setattr(A, "pieces", lambda n, par=True: [(0, n)])
    whole = A.advise(mesh, topo, speeds, 900.0, AdviceSettings(max_order=8))
    for name in ("cell_limit", "edge_limit", "edge_order", "cell_order", "target_size"):
        assert np.array_equal(getattr(par, name), getattr(ser, name)), name
        assert np.array_equal(getattr(par, name), getattr(whole, name)), name


@pytest.mark.parametrize("mode", ["numpy", "numba"])
def test_audit_drops_the_edge_limits_only(monkeypatch, mode):
    # the audit does not keep the per-edge limits (no report uses them); every other
    # field of its advice is the one advise gives with them
    from dataclasses import fields

    from meshcheck.advice import advise
    from meshcheck.pipeline import AuditSettings, audit
    from meshcheck.topology import build_topology

    if mode == "numba":
        pytest.importorskip("numba")
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    mesh = tet_box((5, 4, 3), size=(2.0, 1.5, 1.0))
    res = audit(mesh, AuditSettings((700.0,)))
    full = advise(mesh, build_topology(mesh), res.advice.cell_speed, 700.0,
                    res.settings.advice)
    assert res.advice.edge_limit is None and full.edge_limit.shape == (len(res.topology.edges),)
    for f in fields(full):
        if f.name not in ("edge_limit", "settings"):
            a, b = getattr(res.advice, f.name), getattr(full, f.name)
            assert (a is None and b is None) or np.array_equal(a, b, equal_nan=True), f.name


@pytest.mark.parametrize("n", [1, 7, 256, 257, 1000, 5 * 256 + 3])
def test_column_min_equals_numpy_min_over_rows(n):
    from meshcheck.advice import column_min

    rng = np.random.default_rng(n)
    a = rng.random((n, 12)) * 1e3
    assert np.array_equal(column_min(a), a.min(axis=0))
    a[rng.integers(n), 4] = np.nan  # NaN propagates as in np.min
    a[rng.integers(n), 7] = -np.inf
    assert np.array_equal(column_min(a), a.min(axis=0), equal_nan=True)
    assert np.array_equal(column_min(a[n // 2:]), a[n // 2:].min(axis=0), equal_nan=True)


def test_orders_are_one_byte_and_hold_pmax_plus_one():
    from meshcheck.advice import advise, order_dtype
    from meshcheck.topology import build_topology

    mesh = tet_box((3, 3, 3))
    topo = build_topology(mesh)
    a = advise(mesh, topo, np.full(mesh.n_cells, 343.0), 5000.0, AdviceSettings())
    assert a.cell_order.dtype == a.edge_order.dtype == np.int8
    assert a.edge_order.min() >= 1 and a.edge_order.max() <= a.pmax + 1
    assert np.iinfo(order_dtype(126)).max >= 127 and np.iinfo(order_dtype(127)).max >= 128


@pytest.mark.parametrize("kind", ["tet", "hex", "wedge"])
def test_size_correction_marks_the_edges_of_its_cells(kind):
    # one block whose every local edge takes one factor marks all edges without the
    # scatter; wedges (two factors per cell) scatter: both the cells' own edges
    from meshcheck.advice import _CORRECTED_EDGES, size_correction
    from meshcheck.mesh import CellBlock, Mesh
    from meshcheck.topology import build_topology
    from meshes import grid_hexes, grid_points, hex_box

    if kind == "wedge":
        pts, hx = grid_points((3, 3, 2)), grid_hexes((3, 3, 2))
        w = np.concatenate([hx[:, [0, 1, 3, 4, 5, 7]], hx[:, [1, 2, 3, 5, 6, 7]]])
        mesh = Mesh(pts, (CellBlock("wedge", w, np.ones(len(w), np.int64)),))
    else:
        mesh = tet_box((3, 3, 2)) if kind == "tet" else hex_box((3, 3, 2))
    topo = build_topology(mesh)
    corr = size_correction(mesh, topo, 8, 0.01)
    ce = topo.edges.cell_edges[0]
    groups = _CORRECTED_EDGES[mesh.blocks[0].info.linear][0]
    assert len(corr.classes) == len(groups)
    for (touched, _), (sl, _) in zip(corr.classes, groups):
        want = np.zeros(len(topo.edges), bool)
        want[ce[:, sl].ravel()] = True
        assert np.array_equal(touched, want)
    assert (len(corr.mixed) > 0) == (kind == "wedge") and not corr.touched_plain.any()
    ids = np.array([0, len(topo.edges) - 1, 3, 3])  # factors of some edges only: the same
    for p in range(1, 9):
        assert np.array_equal(corr.at(p, ids), corr.at(p)[ids])
