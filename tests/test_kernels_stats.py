"""The compiled summary of a quality metric (meshcheck/kernels/stats.py, radix selection)
against the numpy reference ``quality.metric_stats`` (a copy, np.partition,
np.percentile, np.mean): on random arrays (uniform, normal, heavy-tailed, rounded
values with many ties, constant, a few distinct values, negative values and -0.0 mixed
with +0.0, NaN / inf sprinkled, no finite value), sizes 0 to 100,000, worst cells
"low" and "high", n_worst 1, 10 and more than the number of values.  The counts and
the worst ids must be equal, and the floats equal exactly (==): the kernel selects the
same order statistics and interpolates them with numpy's own operations, so it agrees
to the bit (a zero may differ in sign only, which == does not see).  The default tuning
takes the common two passes; small tunings (few bins, tiny gather limits) force the
refinement levels (up to 12 passes) and the cut of the worst cells on the same arrays.
Also: the quality metrics of generated meshes of every cell type (structured: ties;
moved nodes; tangled: negative scaled Jacobians)."""
import numpy as np
import pytest

pytest.importorskip("numba")

from meshcheck.kernels import stats as KS  # noqa: E402
from meshcheck.quality import metric_stats as _metric_stats  # noqa: E402


@pytest.fixture(autouse=True)
def _numpy_reference(monkeypatch):
    """The reference stays numpy even once quality.metric_stats takes the kernel for
    large meshes (the kernel is called directly here)."""
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")


#: default tuning, and ones that refine the bins over many levels (down to single keys)
TUNINGS = {"default": {}, "tiny": {"nb1": 16, "nb2": 2, "gather_max": 1, "worst_max": 1},
           "small": {"nb1": 64, "nb2": 8, "gather_max": 4, "worst_max": 8, "sample": 7}}


def _arrays(n: int, seed: int) -> dict:
    rng = np.random.default_rng(seed)
    out = {
        "uniform": rng.random(n),
        "normal": rng.normal(0.0, 3.0, n),
        "heavy tail": 1.0 + rng.pareto(1.2, n) * 50.0,
        "rounded": np.round(rng.random(n), 2),
        "few values": rng.choice([-1.0, 0.25, 0.5, 3.0], n),
        "constant": np.full(n, 0.731),
        "zeros": np.where(rng.random(n) < 0.5, 0.0, -0.0),
        "scaled jacobian": np.clip(rng.normal(0.8, 0.4, n), -1.0, 1.0),
        "tiny and huge": rng.choice([-1e300, -5e-320, 0.0, 1e-310, 2.0, 1e300], n)
        * rng.random(n),
    }
    mixed = np.round(rng.normal(0.0, 1.0, n), 1)
    mixed[rng.random(n) < 0.2] = -0.0
    out["signed zeros mixed"] = mixed
    bad = rng.random(n) * 10.0
    r = rng.random(n)
    bad[r < 0.1] = np.nan
    bad[(r >= 0.1) & (r < 0.15)] = np.inf
    bad[(r >= 0.15) & (r < 0.2)] = -np.inf
    out["nan inf"] = bad
    out["all nan"] = np.full(n, np.nan)
    return out


def _check(values: np.ndarray, bad: str, k: int, **tuning) -> None:
    ref = _metric_stats(values, bad, k)
    got = KS.metric_summary(values, bad, k, **tuning)
    if ref is None:
        assert got is None
        return
    assert got is not None
    assert set(got) == set(ref)
    assert got["cells"] == ref["cells"]
    for key in ("min", "p05", "median", "p95", "max"):
        assert type(got[key]) is float
        assert got[key] == ref[key], (key, got[key], ref[key])
    assert got["worst"].dtype == np.int64
    np.testing.assert_array_equal(got["worst"], ref["worst"])


@pytest.mark.parametrize("tuning", sorted(TUNINGS))
@pytest.mark.parametrize("n", [1, 2, 3, 10, 1000, 100_000])
@pytest.mark.parametrize("bad", ["low", "high"])
def test_summary_equals_reference(n, bad, tuning):
    if tuning == "tiny" and n > 1000:
        pytest.skip("the tiny tuning takes a pass per bit level: small arrays only")
    for seed in range(2 if n < 1000 else 1):
        for name, v in _arrays(n, seed + 7 * n).items():
            for k in (1, 10):
                try:
                    _check(v, bad, k, **TUNINGS[tuning])
                except AssertionError as e:
                    raise AssertionError(f"{name} n={n} k={k} seed={seed}: {e}") from None


def test_empty_and_all_nan():
    assert KS.metric_summary(np.zeros(0), "low", 10) is None
    assert KS.metric_summary(np.array([np.nan, np.inf, -np.inf]), "high", 10) is None
    assert _metric_stats(np.array([np.nan]), "low", 10) is None


@pytest.mark.parametrize("bad", ["low", "high"])
def test_more_worst_than_values(bad):
    rng = np.random.default_rng(3)
    v = np.round(rng.random(40), 1)
    v[::7] = np.nan
    _check(v, bad, 100)
    _check(v, bad, 100, **TUNINGS["tiny"])


def test_zero_worst_low():
    v = np.random.default_rng(4).random(500)
    _check(v, "low", 0)
    assert KS.metric_summary(v, "high", 0)["worst"].size == 0


@pytest.mark.parametrize("bad", ["low", "high"])
def test_many_ties_at_the_extreme(bad):
    """More cells tied at the worst value than the worst-cell gather takes: the kernel
    cuts at the k-th worst key in an extra pass (ties kept in id order)."""
    rng = np.random.default_rng(5)
    v = rng.random(60_000)
    v[rng.random(60_000) < 0.5] = 0.0 if bad == "low" else 1.0
    _check(v, bad, 10)
    info = {}
    KS.metric_summary(v, bad, 10, info=info)
    assert info["passes"] == 3


def test_views_and_strides():
    v = np.random.default_rng(6).normal(size=3001)
    _check(v[::3], "low", 10)
    _check(v[1:-1], "high", 10)


def test_rejects_other_dtypes():
    with pytest.raises(TypeError):
        KS.metric_summary(np.zeros(5, np.float32), "low", 10)
    with pytest.raises(TypeError):
        KS.metric_summary(np.zeros((2, 3)), "low", 10)


def test_spread_values_take_two_compiled_passes():
    """The common case is the compiled kernel in two passes over the values
    (histogram, gather), not a fallback."""
    rng = np.random.default_rng(8)
    for v in (rng.random(200_000), rng.normal(size=200_000), 1.0 + rng.pareto(1.5, 200_000)):
        info = {}
        got = KS.metric_summary(v, "high", 10, info=info)
        assert info["passes"] == 2
        assert got["median"] == np.median(v)
    assert KS.refine_pass.signatures
    assert KS.histogram.signatures


def _moved(mesh, amount: float, seed: int):
    from meshcheck.mesh import Mesh
    rng = np.random.default_rng(seed)
    pts = mesh.points.copy()
    pts += rng.uniform(-amount, amount, pts.shape)
    return Mesh(pts, mesh.blocks, dict(mesh.region_names), mesh.dim)


@pytest.mark.parametrize("kind", ["tet", "tet moved", "tet10", "hex", "hex moved",
                                  "hex tangled", "wedge", "pyramid", "hex+wedge"])
def test_quality_metrics_of_generated_meshes(kind):
    """Every quality metric of a generated mesh (structured: many equal values; moved
    nodes: spread values; tangled: negative scaled Jacobians), low and high worst."""
    from meshcheck.quality import mesh_quality
    from meshes import hex_box, tet10_box, tet_box
    from test_cost import mixed_hex_wedge, pyramid_box, wedge_box
    mesh = {"tet": lambda: tet_box((6, 5, 4)),
            "tet moved": lambda: _moved(tet_box((8, 6, 5)), 0.04, 1),
            "tet10": lambda: _moved(tet10_box((3, 3, 2)), 0.02, 2),
            "hex": lambda: hex_box((7, 5, 4)),
            "hex moved": lambda: _moved(hex_box((9, 7, 6)), 0.03, 3),
            "hex tangled": lambda: _moved(hex_box((6, 5, 4)), 0.15, 4),
            "wedge": lambda: _moved(wedge_box((5, 4, 3)), 0.02, 5),
            "pyramid": lambda: _moved(pyramid_box((3, 3, 2)), 0.02, 6),
            "hex+wedge": lambda: _moved(mixed_hex_wedge((4, 3, 3)), 0.02, 7)}[kind]()
    metrics = mesh_quality(mesh).metrics
    seen = 0
    for name, values in metrics.items():
        for bad in ("low", "high"):
            for tuning in ("default", "small"):
                _check(values, bad, 10, **TUNINGS[tuning])
        seen += int(np.isfinite(values).any())
    assert seen >= 1
    if kind == "hex tangled":
        assert np.nanmin(metrics["scaled_jacobian"]) < 0


# ---------------------------------------------------------------------------
# statistics of float64 values known through their float32 rounding


def _rounded(x: np.ndarray) -> np.ndarray:
    """x's float32 values widened back, x itself beyond float32's range (the audit's
    kept metrics, see quality.checked_quality)."""
    with np.errstate(over="ignore"):
        w = x.astype(np.float32).astype(np.float64)
    big = np.isinf(w)
    w[big] = x[big]
    return w


def test_float32_bits_widen_as_numpy_widens():
    # every class of float32 bit pattern (zeros, subnormals, normals, inf, NaN) against
    # numpy's own float32 -> float64 conversion (IEEE 754 widening is exact)
    rng = np.random.default_rng(7)
    b = rng.integers(0, 2**32, 200_000, dtype=np.uint64).astype(np.uint32)
    special = np.array([0, 1, 2, 3, 0x7FFFFF, 0x400000, 0x800000, 0x7F7FFFFF, 0x7F800000,
                        0x3F800000, 0x00000010], np.uint32)
    b = np.concatenate([b, special, special | np.uint32(0x80000000),
                        rng.integers(0, 0x800000, 5000).astype(np.uint32)])  # subnormals
    x = b.view(np.float32)
    with np.errstate(invalid="ignore"):  # signalling NaNs are quieted by the cast
        want = x.astype(np.float64).view(np.uint64)
    got = np.array([KS._wide32(v) for v in b], np.uint64)
    num = ~np.isnan(x)
    np.testing.assert_array_equal(got[num], want[num])
    # NaN stays non-finite for the kernels (all-ones exponent)
    assert (~num).any() and np.all(got[~num] & KS._EXP == KS._EXP)


@pytest.mark.parametrize("n", [1, 2, 3, 10, 1000, 20_000])
@pytest.mark.parametrize("bad", ["low", "high"])
@pytest.mark.parametrize("k", [1, 10, 25])
@pytest.mark.parametrize("form", ["float64", "float32"])
@pytest.mark.parametrize("tuning", ["default", "small"])
def test_summary_of_rounded_equals_the_float64_summary(n, bad, k, form, tuning):
    # every array of the radix tests, and values that differ only below float32's
    # resolution (all tied after rounding): the statistics and worst cells of x itself,
    # bit for bit, from the rounding and the recomputed tied cells alone
    arrays = _arrays(n, seed=n + 11)
    rng = np.random.default_rng(n)
    arrays["below float32 resolution"] = 1.0 + rng.integers(0, 40, n) * 2.0 ** -40
    arrays["near float32 limit"] = rng.choice([-1e39, -3.3e38, 1.0, 3.3e38, 3.5e38, 1e300], n)
    for name, x in arrays.items():
        asked = []

        def exact(ids, x=x):
            ids = np.asarray(ids)
            asked.append(len(ids))
            return x[ids]

        if form == "float32":  # the kept metrics read in place, as the audit reads them
            with np.errstate(over="ignore"):
                w = x.astype(np.float32)
            if np.any(np.isinf(w) & np.isfinite(x)):
                continue  # not a rounding (the audit widens these, as _rounded does)
        else:
            w = _rounded(x)
        want = _metric_stats(x, bad, k)
        info = {}
        got = KS.summary_of_rounded(w, exact, bad, k, tie_max=n + k, info=info,
                                    **TUNINGS[tuning])
        if want is None:
            assert got is None, name
            continue
        assert set(got) == set(want), name
        assert got["cells"] == want["cells"], name
        for key in ("min", "p05", "median", "p95", "max"):
            assert type(got[key]) is float
            assert got[key] == want[key], (name, key, got[key], want[key])
        assert got["worst"].dtype == np.int64
        np.testing.assert_array_equal(got["worst"], want["worst"], err_msg=name)
        if name in ("uniform", "normal", "heavy tail") and n >= 1000:
            assert sum(asked) < 100, name  # spread values: a few cells recomputed
            if tuning == "default":  # the ties come with the selection's two passes
                assert info["passes"] == 2, name


def test_summary_of_rounded_raises_on_too_many_ties():
    x = np.full(1000, 0.731)  # identical cells: every one tied at every rank
    with pytest.raises(KS.TooManyTies):
        KS.summary_of_rounded(_rounded(x), lambda ids: x[ids], "high", 10, tie_max=999)
    got = KS.summary_of_rounded(_rounded(x), lambda ids: x[ids], "high", 10, tie_max=1000)
    assert got["min"] == got["max"] == 0.731 and list(got["worst"]) == list(range(10))
    got = KS.summary_of_rounded(x.astype(np.float32), lambda ids: x[ids], "high", 10,
                                tie_max=1000)
    assert got["min"] == got["max"] == 0.731 and list(got["worst"]) == list(range(10))
    with pytest.raises(TypeError):
        KS.summary_of_rounded(x.astype(np.float16), lambda ids: x[ids], "high", 10)
