"""The compiled per-cell kernels (meshcheck.kernels.cells) against the numpy reference.

Every cell type of cells.CELL_TYPES, on randomly perturbed cells that include
inverted, collapsed, flat, tiny, huge and non-finite ones: the compiled path
(MESHCHECK_KERNELS=numba) must give the numpy path's values (MESHCHECK_KERNELS=numpy)
to 1e-12 relative, with NaN and inf in the same places.
"""
from __future__ import annotations

import numpy as np
import pytest

from meshcheck import curvature, jacobian, quality, validity
from meshcheck.cells import CELL_TYPES
from meshcheck.mesh import CellBlock, Mesh

pytest.importorskip("numba")

ALL_TYPES = sorted(CELL_TYPES)
QUADRATIC = sorted(t for t, c in CELL_TYPES.items() if c.quadratic)
RTOL = 1e-12


def _mirror(cell_type):
    """Node relabelling swapping the r and s parametric coordinates (a reflection)."""
    ref = CELL_TYPES[cell_type].ref_coords
    return np.array([int(np.flatnonzero(np.all(np.isclose(ref, s), axis=1))[0])
                     for s in ref[:, [1, 0, 2]]])


def _cells(cell_type, m=150, seed=0):
    """(points (m * n_nodes, 3), cells (m, n_nodes)): randomly scaled, rotated and
    perturbed reference cells, each with its own nodes, and the hard cases:
    0-5 inverted (mirrored), 6 collapsed to a point, 7 two corners merged, 8 flat,
    9 tiny (1e-9 m), 10 huge (1e6 m), 11 a NaN coordinate, 12 an infinite one,
    13 strongly perturbed (often folded).  The compiled Jacobian kernel works in
    blocks of 64 cells; cells 64.. (all finite, 64-75 the finite hard cases again)
    take its sparse path."""
    info = CELL_TYPES[cell_type]
    rng = np.random.default_rng(seed + 97 * ALL_TYPES.index(cell_type))
    ref = info.ref_coords
    scale = rng.uniform(0.5, 2.0, size=(m, 1, 3))
    X = (ref[None] + 0.06 * rng.normal(size=(m,) + ref.shape)) * scale
    if info.dim == 3:
        q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
        X = X @ (q * np.sign(np.linalg.det(q))).T
    X[6] = X[6, :1]
    X[7, 1] = X[7, 0]
    X[8, :, 1 if info.dim == 2 else 2] = 0.5
    X[9] *= 1e-9
    X[10] *= 1e6
    X[11, 0, 0] = np.nan
    X[12, -1, 1] = np.inf
    X[13] += 0.6 * rng.normal(size=ref.shape)
    if m > 76:
        X[64:75], X[75] = X[:11], X[13]                 # the finite hard cases again
    X += rng.uniform(-50.0, 50.0, size=(m, 1, 3))
    if info.dim == 2:
        X[..., 2] = 0.0
    cells = np.arange(m * info.n_nodes).reshape(m, info.n_nodes)
    cells[:6] = cells[:6][:, _mirror(cell_type)]
    if m > 76:
        cells[64:70] = cells[64:70][:, _mirror(cell_type)]
    return X.reshape(-1, 3), cells


def _mesh(cell_type, **kw):
    pts, cells = _cells(cell_type, **kw)
    return Mesh(pts, (CellBlock(cell_type, cells, np.zeros(len(cells), np.int64)),),
                dim=CELL_TYPES[cell_type].dim)


def _both(monkeypatch, fn):
    """fn() on the numpy path, then on the compiled path."""
    out = []
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        with np.errstate(all="ignore"):
            out.append(fn())
    return out


def assert_same(expected, got, what=""):
    """Equal to RTOL relative; NaN, +inf and -inf in the same places."""
    expected, got = np.asarray(expected, float), np.asarray(got, float)
    assert expected.shape == got.shape, what
    np.testing.assert_array_equal(np.isnan(got), np.isnan(expected), err_msg=f"{what}: NaN")
    np.testing.assert_array_equal(np.isposinf(got), np.isposinf(expected), err_msg=f"{what}: +inf")
    np.testing.assert_array_equal(np.isneginf(got), np.isneginf(expected), err_msg=f"{what}: -inf")
    ok = np.isfinite(expected)
    np.testing.assert_allclose(got[ok], expected[ok], rtol=RTOL, atol=0.0, err_msg=what)


# ------------------------------------------------------------------ the fixtures cover the cases
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_fixture_has_inverted_degenerate_and_nonfinite_cells(cell_type, monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    mesh = _mesh(cell_type)
    with np.errstate(all="ignore"):
        sj = validity.min_scaled_jacobian(mesh)
        er = quality.mesh_quality(mesh)["edge_ratio"]
    assert np.all(sj[:6] < 0) and np.mean(sj[14:] > 0) > 0.75   # mirrored / mostly valid
    assert er[6] == np.inf and er[7] == np.inf                  # collapsed, merged corners
    assert abs(sj[8]) < 1e-9                                    # flat
    assert np.isnan(er[11]) and np.isinf(mesh.points[mesh.blocks[0].cells[12]]).any()


# ------------------------------------------------------------------ quality
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_block_quality_compiled_equals_numpy(cell_type, monkeypatch):
    pts, cells = _cells(cell_type)
    ref, got = _both(monkeypatch, lambda: quality.block_quality(pts, cells, cell_type))
    assert set(got) == set(quality.METRICS)
    for k in quality.METRICS:
        assert got[k].dtype == np.float64 and got[k].shape == (len(cells),)
        assert_same(ref[k], got[k], f"{cell_type} {k}")


@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_mesh_quality_compiled_equals_numpy(cell_type, monkeypatch):
    mesh = _mesh(cell_type, m=50, seed=3)
    ref, got = _both(monkeypatch, lambda: quality.mesh_quality(mesh, chunk_size=7))
    for k in quality.METRICS:
        assert_same(ref[k], got[k], f"{cell_type} {k}")
        assert not got[k].flags.writeable


def _mixed_mesh(types, m=20):
    blocks, pts, off = [], [], 0
    for k, t in enumerate(types):
        p, c = _cells(t, m=m, seed=k)
        blocks.append(CellBlock(t, c + off, np.full(len(c), k)))
        pts.append(p)
        off += len(p)
    return Mesh(np.vstack(pts), tuple(blocks))


def test_mixed_mesh_quality_and_validity_compiled_equal_numpy(monkeypatch):
    mesh = _mixed_mesh([t for t in ALL_TYPES if CELL_TYPES[t].dim == 3])
    (q0, s0), (q1, s1) = _both(monkeypatch, lambda: (quality.mesh_quality(mesh),
                                                     validity.min_scaled_jacobian(mesh)))
    for k in quality.METRICS:
        assert_same(q0[k], q1[k], k)
    assert_same(s0, s1, "min scaled Jacobian")


# ------------------------------------------------------------------ Jacobians
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_min_scaled_jacobian_compiled_equals_numpy(cell_type, monkeypatch):
    mesh = _mesh(cell_type)
    ref, got = _both(monkeypatch, lambda: validity.min_scaled_jacobian(mesh))
    assert_same(ref, got, cell_type)


@pytest.mark.parametrize("where", ["corners", "nodes", "quadrature", "points"])
@pytest.mark.parametrize("cell_type", ALL_TYPES)
def test_scaled_jacobian_min_compiled_equals_numpy(cell_type, where, monkeypatch):
    pts, cells = _cells(cell_type, seed=5)
    w = np.random.default_rng(1).uniform(0.05, 0.3, size=(5, 3)) if where == "points" else where
    ref, got = _both(monkeypatch, lambda: jacobian.scaled_jacobian_min(pts, cells, cell_type, w))
    assert_same(ref, got, f"{cell_type} {where}")


@pytest.mark.parametrize("cell_type", ["tetra", "quad9"])
def test_no_sample_points_and_no_cells(cell_type, monkeypatch):
    pts, cells = _cells(cell_type, m=20)
    for c, w in ((cells, np.zeros((0, 3))), (cells[:0], "quadrature")):
        ref, got = _both(monkeypatch, lambda: jacobian.scaled_jacobian_min(pts, c, cell_type, w))
        assert_same(ref, got, "empty")
    ref, got = _both(monkeypatch, lambda: quality.block_quality(pts, cells[:0], cell_type))
    for k in quality.METRICS:
        assert got[k].shape == ref[k].shape == (0,)


def test_repeated_sample_points_are_dropped_once():
    """A linear tet has one Jacobian: its four corners collapse to one gradient table row;
    a tetra10's corners do not."""
    assert len(jacobian._gradient_table("tetra", "corners")) == 1
    assert len(jacobian._gradient_table("tetra10", "corners")) == 4
    assert len(jacobian._gradient_table("tetra10", "corners", "quadrature")) == 4 + 27


# ------------------------------------------------------------------ quadratic geometry
@pytest.mark.parametrize("cell_type", QUADRATIC)
def test_quadratic_geometry_compiled_equals_numpy(cell_type, monkeypatch):
    mesh = _mesh(cell_type, seed=7)
    ref, got = _both(monkeypatch, lambda: curvature.quadratic_geometry(mesh, threshold=0.6))
    assert ref.low > 0
    np.testing.assert_array_equal(got.cell_ids, ref.cell_ids)
    assert_same(ref.midnode_deviation, got.midnode_deviation, "midnode deviation")
    assert_same(ref.jacobian_ratio, got.jacobian_ratio, "det J ratio")
    assert got.low == ref.low
    np.testing.assert_array_equal(got.listed, ref.listed)
    np.testing.assert_array_equal(got.listed_locations, ref.listed_locations)


@pytest.mark.parametrize("cell_type", ["tetra10", "hexahedron20", "quad8"])
def test_det_ratio_kept_by_validity_for_quadratic_geometry(cell_type, monkeypatch):
    """The compiled validity check keeps the det J ratio and mid-node deviation of the
    mesh's quadratic cells; quadratic_geometry then takes them (no second pass) and
    equals the numpy reference."""
    mesh = _mesh(cell_type, seed=11)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    with np.errstate(all="ignore"):
        ref = curvature.quadratic_geometry(mesh)
    from meshcheck.kernels import cells as kc

    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    calls = []
    real = kc.jacobian_extremes
    monkeypatch.setattr(kc, "jacobian_extremes",
                        lambda *a: calls.append((a[7], len(a[8]))) or real(*a))
    validity.min_scaled_jacobian(mesh)
    # one pass: corners and quadrature points, the ratio and the mid-nodes
    n_corner_points = len(jacobian._gradient_table(cell_type, "corners"))
    assert calls == [(n_corner_points, CELL_TYPES[cell_type].n_edges)]
    got = curvature.quadratic_geometry(mesh)
    assert len(calls) == 1                             # kept, not recomputed
    assert_same(ref.jacobian_ratio, got.jacobian_ratio, "det J ratio")
    assert_same(ref.midnode_deviation, got.midnode_deviation, "mid-node deviation")


def test_nothing_kept_for_writable_points():
    pts, cells = _cells("tetra10")
    jacobian.remember_quadratic(pts, cells, np.zeros(len(cells)), np.zeros(len(cells)))
    assert (id(pts), id(cells)) not in jacobian._QUADRATIC_MEMO


def test_kept_values_are_dropped_with_the_mesh(monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    mesh = _mesh("tetra10")
    validity.min_scaled_jacobian(mesh)
    key = (id(mesh.points), id(mesh.blocks[0].cells))
    assert key in jacobian._QUADRATIC_MEMO
    del mesh
    import gc
    gc.collect()
    assert key not in jacobian._QUADRATIC_MEMO


# ------------------------------------------------------------------ dispatch
@pytest.mark.parametrize("mode, expected", [("numba", 1), ("numpy", 0), ("auto", 0)])
def test_kernels_run_only_when_chosen(mode, expected, monkeypatch):
    """The switch decides (auto: numpy below kernels.MIN_CELLS), and the comparisons above
    do compare two different code paths."""
    from meshcheck.kernels import cells as kc

    calls = []
    real = kc.tet_quality
    monkeypatch.setattr(kc, "tet_quality", lambda *a: calls.append(1) or real(*a))
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    with np.errstate(all="ignore"):
        quality.mesh_quality(_mesh("tetra", m=20))
    assert len(calls) == expected


@pytest.mark.parametrize("kind", ["tetra", "hexahedron", "wedge", "pyramid", "triangle", "quad"])
def test_metrics_not_defined_for_the_mesh_are_one_broadcast_nan(kind, monkeypatch):
    # the compiled path never writes (nor touches the pages of) the rows of metrics no
    # cell type of the mesh defines; it hands out one broadcast NaN for them, and the
    # defined ones are those the numpy routine computes
    from meshcheck.quality import METRICS, defined_metrics, family_of, mesh_quality
    from test_kernels_topology import MESHES

    mesh = MESHES[kind]()
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = mesh_quality(mesh)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    got = mesh_quality(mesh)
    defined = defined_metrics(family_of(kind))
    for name in METRICS:
        # to RTOL, not bitwise: numpy's arccos on AVX-512 machines (SVML) and the kernels'
        # libm one differ in the last bit of some angles
        assert_same(ref[name], got[name], name)
        assert (name in defined) == bool(np.isfinite(ref[name]).any()), name
        if name not in defined:
            assert got[name].strides == (0,) and got[name].shape == (mesh.n_cells,)


# ------------------------------------------------------------------ the audit's cell checks
def _whole_checks(mesh, limits):
    """The cell checks as the audit made them before checked_quality: whole float64
    metrics flagged and summarised, then narrowed."""
    q = quality.mesh_quality(mesh)
    flags = quality.out_of_range(q, mesh, limits)
    return q.narrowed(np.float32), flags, quality.summarise(q, parallel=False)


def _same_checks(want, got, what):
    (q0, f0, s0), (q1, f1, s1) = want, got
    assert f0.names == f1.names and np.array_equal(f0.bits, f1.bits), what
    for k in quality.METRICS:
        assert q1[k].dtype == np.float32 and not q1[k].flags.writeable, (what, k)
        assert np.array_equal(q0[k], q1[k], equal_nan=True), (what, k)
    assert s0.keys() == s1.keys(), what
    for k in s0:
        if s0[k] is None:
            assert s1[k] is None, (what, k)
            continue
        a, b = dict(s0[k]), dict(s1[k])
        assert np.array_equal(a.pop("worst"), b.pop("worst")), (what, k)
        assert a == b, (what, k)  # floats bit for bit (== on the statistics)


def _flat_tets():
    """Regular-ish tetrahedra, one flattened to 1e-40 m: aspect ratios beyond float32's
    range (its float32 value is inf, its float64 value finite)."""
    rng = np.random.default_rng(5)
    base = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0.3, 0.3, 1.0]])
    X = base[None] + 0.05 * rng.normal(size=(40, 4, 3)) + 3.0 * np.arange(40)[:, None, None]
    X[7] = base
    X[7, 3, 2] = 1e-40  # the fourth corner 1e-40 m above the other three
    return Mesh(X.reshape(-1, 3), (CellBlock("tetra", np.arange(160).reshape(40, 4),
                                             np.zeros(40, np.int64)),))


@pytest.mark.parametrize("case", ALL_TYPES + ["mixed 3D", "flat tet", "identical tets"])
def test_chunked_cell_checks_equal_the_whole_float64_checks(case, monkeypatch):
    # the compiled checked_quality never holds the float64 metrics whole: its flags,
    # float32 values and statistics (taken from the float32 values and the few tied
    # cells recomputed) equal those of the whole float64 metrics, bit for bit; also
    # with the fallback (too many ties: the float64 metrics in one more pass), and in
    # chunks of 7 cells across the blocks
    from meshcheck.kernels import stats as KS
    from meshcheck.quality import QualityLimits
    from meshes import tet_box

    mesh = {"mixed 3D": lambda: _mixed_mesh([t for t in ALL_TYPES if CELL_TYPES[t].dim == 3]),
            "flat tet": _flat_tets, "identical tets": lambda: tet_box((3, 3, 3))}.get(
        case, lambda: _mesh(case, m=50, seed=3))()
    limits = QualityLimits()
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    with np.errstate(all="ignore"):
        want = _whole_checks(mesh, limits)
        _same_checks(want, quality.checked_quality(mesh, limits, chunk=7), case)
        monkeypatch.setattr(KS, "TIE_MAX", 0)
        _same_checks(want, quality.checked_quality(mesh, limits, chunk=7), case + " fallback")
    if case == "flat tet":
        ar = want[2]["aspect_ratio"]
        assert 3.4e38 < ar["max"] < np.inf and want[0]["aspect_ratio"][7] == np.inf
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")  # the numpy path: the same sequence
    with np.errstate(all="ignore"):
        _same_checks(_whole_checks(mesh, limits), quality.checked_quality(mesh, limits), case)


def _atan2_loop():
    """A compiled loop over kernels.cells._atan2 (numba's dispatcher of the helper)."""
    import numba

    from meshcheck.kernels import cells as kc

    f = kc._atan2.dispatcher

    @numba.njit(error_model="numpy")
    def run(y, x, out):
        for i in range(y.shape[0]):
            out[i] = f(y[i], x[i])
    return run


def test_vectorised_atan2_within_two_ulp_of_the_c_library():
    """The tetrahedra's dihedral angles take kernels.cells._atan2 (Cephes' rational
    arctangent, S. L. Moshier, Cephes Math Library, atan.c): against the C library's
    atan2 (math.atan2), at most 2 units in the last place over 10M random (y, x) of
    both signs and 12 decades, around the reduction's thresholds (quotients 0.66 and
    1) and near 0; signed zeros, infinities and NaN exactly as the C library."""
    import math

    run = _atan2_loop()
    rng = np.random.default_rng(7)
    n = 10_000_000
    y = rng.standard_normal(n) * 10.0 ** rng.uniform(-6, 6, n)
    x = rng.standard_normal(n) * 10.0 ** rng.uniform(-6, 6, n)
    t = np.concatenate([np.linspace(0.6, 0.7, 100_001), np.linspace(0.99, 1.01, 10_001),
                        np.linspace(0.0, 1e-8, 1001)])
    y, x = np.concatenate([y, t, np.ones_like(t)]), np.concatenate([x, np.ones_like(t), t])
    got = np.empty(len(y))
    run(y, x, got)
    ref = np.array([math.atan2(a, b) for a, b in zip(y[::97], x[::97])])  # a sample in Python
    from numba import njit

    @njit
    def lib(y, x, out):
        for i in range(y.shape[0]):
            out[i] = math.atan2(y[i], x[i])
    exact = np.empty(len(y))
    lib(y, x, exact)
    np.testing.assert_array_equal(exact[::97], ref)  # numba calls the C library's atan2
    ulp = np.abs(got - exact) / np.spacing(np.abs(exact))
    assert ulp.max() <= 2.0
    special = [0.0, -0.0, 1e-310, -1e-310, 1.0, -1.0, 1e300, -1e300, np.inf, -np.inf, np.nan]
    Y, X = (a.ravel() for a in np.meshgrid(special, special))
    got, exact = np.empty(len(Y)), np.empty(len(Y))
    run(Y, X, got)
    lib(Y, X, exact)
    same = (got == exact) & (np.signbit(got) == np.signbit(exact))
    same |= np.isnan(got) & np.isnan(exact)
    near = np.abs(got - exact) <= 2 * np.spacing(np.abs(exact))  # finite quotients
    finite_q = np.isfinite(Y) & np.isfinite(X) & ((Y != 0) | (X != 0))
    assert (same | (near & finite_q)).all(), list(zip(Y[~same], X[~same]))
    assert (same | finite_q).all()  # zeros, infinities, NaN: exactly the C library's


@pytest.mark.parametrize("mode", ["numpy", "numba"])
def test_checked_quality_writes_the_tetrahedra_min_scaled_jacobian(mode, monkeypatch):
    """checked_quality(min_sj=...) fills the cells of the tetra blocks with exactly
    validity.min_scaled_jacobian's values (the compiled path from the corners gathered
    for the metrics; the hard cases included: inverted, collapsed, flat, tiny, huge,
    NaN and infinite corners), leaves the other blocks' cells as they were, and
    min_scaled_jacobian(out=..., known=MIN_SJ_TYPES) completes the array to the
    values of the plain call; the metrics, flags and statistics are those of the call
    without min_sj."""
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    mesh = _mixed_mesh(["hexahedron", "tetra", "tetra10", "tetra"], m=150)
    lim = quality.QualityLimits()
    with np.errstate(all="ignore"):
        ref = validity.min_scaled_jacobian(mesh)
        plain = quality.checked_quality(mesh, lim, chunk=64)
        sj = np.full(mesh.n_cells, -7.0)
        got = quality.checked_quality(mesh, lim, chunk=64, min_sj=sj)
    tet = np.concatenate([np.full(len(b), b.type in quality.MIN_SJ_TYPES) for b in mesh.blocks])
    assert tet.sum() == 300 and quality.MIN_SJ_TYPES == ("tetra",)
    np.testing.assert_array_equal(sj[tet], ref[tet])  # bit for bit, NaN where NaN
    assert (sj[~tet] == -7.0).all()
    for k in quality.METRICS:
        np.testing.assert_array_equal(got[0][k], plain[0][k])
    assert np.array_equal(got[1].bits, plain[1].bits)
    assert str(got[2]) == str(plain[2])
    with np.errstate(all="ignore"):
        full = validity.min_scaled_jacobian(mesh, out=sj, known=quality.MIN_SJ_TYPES)
    assert full is sj
    np.testing.assert_array_equal(full, ref)
