"""Figures of the audit: the plotted data against the JSON report and closed forms.

Every check reads what the matplotlib artists hold (line data, step patches,
stacked polygons, scatter offsets and colour arrays), not only the arrays the
figure keeps in ``fig.meshcheck_data``.
"""
import io
import math

import numpy as np
import pytest

pytest.importorskip("matplotlib")
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.patches import Rectangle, StepPatch  # noqa: E402

from meshcheck import figures  # noqa: E402
from meshcheck.advice import AdviceSettings  # noqa: E402
from meshcheck.mesh import CellBlock, Mesh  # noqa: E402
from meshcheck.pipeline import AuditSettings, audit  # noqa: E402
from meshcheck.report import to_dict  # noqa: E402
from meshes import KUHN, LIMIT_RTOL, grid_hexes, hex_box, tet_box  # noqa: E402

# Speed of sound in dry air, ideal gas: c = 331.3 sqrt(1 + T/273.15) m/s (Kinsler, Frey,
# Coppens & Sanders, "Fundamentals of Acoustics", 4th ed. 2000, eq. 5.6.8 rearranged).
C_AIR_20 = 331.3 * math.sqrt(1.0 + 20.0 / 273.15)


def graded_tets(names=None, unit="m", source="graded.msh") -> Mesh:
    """Tets on a grid graded in x: h = 0.1 m for x < 0.6 (region 1), 0.3 m beyond (region 2)."""
    xs = np.concatenate([np.linspace(0.0, 0.6, 7), np.linspace(0.9, 1.5, 3)])
    ys = zs = np.linspace(0.0, 0.4, 3)
    x, y, z = np.meshgrid(xs, ys, zs, indexing="ij")
    pts = np.column_stack([x.ravel(), y.ravel(), z.ravel()])
    tets = grid_hexes((len(xs) - 1, len(ys) - 1, len(zs) - 1))[:, KUHN].reshape(-1, 4)
    region = np.where(pts[tets].mean(axis=1)[:, 0] < 0.6, 1, 2)
    names = names if names is not None else {1: "cavity", 2: "duct"}
    return Mesh(pts, (CellBlock("tetra", tets, region),), names, 3, source, unit)


# Top of the graded sweep: 1500 Hz / 0.8.  The 3D correction (on by default) sees these
# split-brick tets (alignment 0.93) as a = 0.82 times their size at p = 8, which lifts the
# limits by about 1/0.82; the sweep must end above the coarse duct's limit at p = 8 and
# below the cavity's for the duct alone to need refining (checked in the order-map test).
GRADED_FMAX = 1500.0 / 0.8


def graded_audit(names=None, unit="m", source="graded.msh", order=None, freqs=None):
    mesh = graded_tets(names, unit, source)
    f = tuple(np.linspace(50.0, GRADED_FMAX, 30)) if freqs is None else tuple(freqs)
    return audit(mesh, AuditSettings(frequencies=f, advice=AdviceSettings(order=order)))


@pytest.fixture(scope="module")
def graded():
    res = graded_audit()
    return res, to_dict(res)


@pytest.fixture(scope="module", params=[False, True], ids=["plain_1d", "corrected"])
def uniform(request):
    """Hexahedra with every edge 0.2 m long, fixed order 2, plain 1D model or with the
    3D correction (the lines must follow the model the advice used)."""
    mesh = hex_box((6, 4, 3), size=(1.2, 0.8, 0.6))
    res = audit(mesh, AuditSettings(frequencies=tuple(np.linspace(20.0, 800.0, 12)),
                                    advice=AdviceSettings(order=2, correction_3d=request.param)))
    return res, to_dict(res)


def _lines(ax) -> dict:
    return {ln.get_label(): ln for ln in ax.lines}


# ------------------------------------------------------------ region limits
def test_region_limits_lines_equal_json(graded):
    res, d = graded
    fig = figures.region_limits(res, d)
    lines = _lines(fig.axes[0])
    P = res.settings.advice.max_order
    orders = [str(p) for p in range(1, P + 1)]
    for r in d["input"]["regions"]:
        ln = lines[r["name"]]
        np.testing.assert_array_equal(ln.get_xdata(), np.arange(1, P + 1))
        np.testing.assert_allclose(ln.get_ydata(), [r["limit_hz_per_order"][p] for p in orders],
                                   rtol=1e-12)
    np.testing.assert_allclose(lines["whole mesh (lowest)"].get_ydata(),
                               [d["limits_hz"]["mesh"][p] for p in orders], rtol=1e-12)
    # the coarse region (h three times larger) carries a lower frequency at every order
    assert np.all(lines["duct"].get_ydata() < lines["cavity"].get_ydata())


# ------------------------------------------------------------ order shares
def test_order_shares_stack_tops_equal_json(graded):
    res, d = graded
    fig = figures.order_shares(res, d)
    ax = fig.axes[0]
    P = res.settings.advice.max_order
    f = np.asarray(d["sweep"]["frequencies_hz"])
    counts = np.asarray(d["sweep"]["order_counts"])
    merged = np.column_stack([counts[:, :P], counts[:, P:].sum(axis=1)])
    tops = 100.0 * np.cumsum(merged, axis=1) / counts.sum(axis=1, keepdims=True)
    bands = ax.collections
    assert len(bands) == P + 1
    for j, band in enumerate(bands):
        v = np.vstack([p.vertices for p in band.get_paths()])
        top = [v[np.isclose(v[:, 0], fi), 1].max() for fi in f]
        np.testing.assert_allclose(top, tops[:, j], atol=1e-9)
    assert merged[:, -1].max() > 0  # the sweep reaches frequencies no allowed order carries


def test_order_shares_single_frequency_is_one_bar():
    res = graded_audit(freqs=(900.0,))
    d = to_dict(res)
    fig = figures.order_shares(res, d)
    heights = np.array([p.get_height() for p in fig.axes[0].patches])
    counts = np.asarray(d["sweep"]["order_counts"][0])
    P = res.settings.advice.max_order
    expected = np.append(counts[:P], counts[P:].sum()) / counts.sum() * 100.0
    np.testing.assert_allclose(heights, expected, atol=1e-9)


# ------------------------------------------------------- elements/wavelength
def test_elements_per_wavelength_closed_form(uniform):
    """lambda/h = c / (f h) with h = 0.2 m on every edge and air at 20 deg C."""
    res, d = uniform
    fig = figures.elements_per_wavelength(res, d)
    lines = _lines(fig.axes[0])
    for label in ("minimum (coarsest cell)", "median over cells"):
        ln = lines[label]
        # the advice keeps cell sizes in float32 (0.2 m is stored as 0.2 + 3e-9)
        np.testing.assert_allclose(ln.get_ydata() * ln.get_xdata(), C_AIR_20 / 0.2,
                                   rtol=2**-22)


def test_needed_lines_cross_the_curve_at_the_json_limits(uniform):
    """On a mesh of equal edges the minimum curve meets order p's line at the mesh limit."""
    res, d = uniform
    fig = figures.elements_per_wavelength(res, d)
    needed = fig.meshcheck_data["needed"]
    drawn = sorted(ln.get_ydata()[0] for ln in fig.axes[0].lines
                   if len(ln.get_ydata()) == 2 and ln.get_ydata()[0] == ln.get_ydata()[1]
                   and ln.get_xdata()[0] != ln.get_xdata()[1])
    np.testing.assert_allclose(drawn, sorted(needed.values()), rtol=1e-12)
    crossing = [C_AIR_20 / 0.2 / needed[p] for p in sorted(needed)]
    np.testing.assert_allclose(crossing, [d["limits_hz"]["mesh"][str(p)] for p in sorted(needed)],
                               rtol=LIMIT_RTOL)


# ---------------------------------------------------------------- unknowns
def test_unknowns_variable_order_equal_json(graded):
    res, d = graded
    fig = figures.unknowns(res, d)
    ln = [ln for ln in fig.axes[0].lines if ln.get_label().startswith("variable")][0]
    np.testing.assert_array_equal(ln.get_xdata(), d["sweep"]["frequencies_hz"])
    np.testing.assert_array_equal(ln.get_ydata(), d["sweep"]["dofs"])


def test_unknowns_fixed_orders_are_tensor_lagrange_counts(uniform):
    """Q1 and Q2 Lagrange nodes on a 6 x 4 x 3 hex grid: (6+1)(4+1)(3+1), (12+1)(8+1)(6+1)."""
    res, d = uniform
    fig = figures.unknowns(res, d)
    lines = _lines(fig.axes[0])
    fixed = {p: [ln for k, ln in lines.items() if k.startswith(f"fixed p = {p} ")][0]
             for p in (1, 2)}
    assert set(fixed[1].get_ydata()) == {7 * 5 * 4}
    assert set(fixed[2].get_ydata()) == {13 * 9 * 7}
    assert set(d["sweep"]["dofs"]) == {13 * 9 * 7}  # the audit's own (fixed p = 2) count
    # each fixed line is solid up to the frequency its order carries
    for p, ln in fixed.items():
        assert ln.get_xdata()[-1] == pytest.approx(
            min(max(d["limits_hz"]["mesh"][str(p)], 20.0), 800.0))


# ----------------------------------------------------------------- quality
def _mixed_mesh() -> Mesh:
    hexes = hex_box((2, 2, 2))
    tets = tet_box((2, 2, 2), origin=(2.0, 0.0, 0.0))
    n = hexes.n_points
    return Mesh(np.vstack([hexes.points, tets.points]),
                (hexes.blocks[0], CellBlock("tetra", tets.blocks[0].cells + n,
                                            np.full(len(tets.blocks[0]), 2))),
                {1: "hex part", 2: "tet part"}, 3, "mixed", "m")


@pytest.mark.parametrize("case", ["graded", "mixed"])
def test_quality_histograms_equal_json(case, graded):
    if case == "graded":
        res, d = graded
    else:
        res = audit(_mixed_mesh(), AuditSettings(frequencies=(100.0,)))
        d = to_dict(res)
    fig = figures.quality_histograms(res, d)
    axes = [ax for ax in fig.axes if ax.get_visible()]
    assert len(axes) == len(d["quality"])
    for ax, (name, q) in zip(axes, d["quality"].items()):
        steps = [p for p in ax.patches if isinstance(p, StepPatch)]
        counts = sum(p.get_data().values - p.get_data().baseline for p in steps)
        assert counts.sum() == q["cells"]
        edges = steps[0].get_data().edges
        finite = res.quality[name][np.isfinite(res.quality[name])]
        np.testing.assert_array_equal(counts, np.histogram(finite, edges)[0])
        assert any(t.get_text().startswith(f"{q['out_of_range']:,} of {q['cells']:,} outside")
                   for t in ax.texts)
        # the shaded span is the largest family's acceptable range, clipped to the view
        fam = next(iter(fig.meshcheck_data[name]["counts"]))
        lo, hi = q["acceptable"][fam]
        lo = -np.inf if lo is None else lo
        hi = np.inf if hi is None else hi
        span = [p for p in ax.patches if isinstance(p, Rectangle)]
        x0, x1 = ax.get_xlim()
        if lo < x1 and hi > x0:
            assert len(span) == 1
            xs = span[0].get_x(), span[0].get_x() + span[0].get_width()
            np.testing.assert_allclose(xs, (max(lo, x0), min(hi, x1)), rtol=1e-12)
        if case == "mixed" and name == "scaled_jacobian":
            assert len(steps) == 2  # hex and tet stacked


# --------------------------------------------------------------- order map
def test_order_map_points_and_colours_equal_advice(graded):
    res, d = graded
    fig = figures.order_map(res, d)
    m = fig.meshcheck_data
    P = res.settings.advice.max_order
    ids = m["cell_ids"]
    assert len(ids) == res.mesh.n_cells  # small mesh: every cell drawn
    np.testing.assert_array_equal(m["order"], np.minimum(res.advice.cell_order[ids], P + 1))
    np.testing.assert_array_equal(m["refine"], res.advice.refine[ids])
    refine_ids = set(ids[m["refine"]].tolist())
    for c in d["refine"]:
        assert set(c["some_cell_ids"]) <= refine_ids
    ax2 = fig.axes[1]
    drawn = np.vstack([np.column_stack([c.get_offsets(), c.get_array()])
                       for c in ax2.collections])
    want = np.column_stack([m["xyz"][:, m["axes"]], m["order"]])
    key = lambda a: a[np.lexsort(a.T[::-1])]  # noqa: E731
    np.testing.assert_allclose(key(drawn), key(want), rtol=1e-12)
    # the highest order, not carried, shows where the coarse region needs refining
    assert m["order"][res.mesh.region[ids] == 2].max() > m["order"][res.mesh.region[ids] == 1].max()


@pytest.mark.parametrize("max_points", [40, 200])
def test_order_map_samples_refine_cells_first(graded, max_points):
    res, d = graded
    a = figures.order_map(res, d, max_points=max_points).meshcheck_data
    b = figures.order_map(res, d, max_points=max_points).meshcheck_data
    np.testing.assert_array_equal(a["cell_ids"], b["cell_ids"])  # a fixed seed
    assert len(a["cell_ids"]) == max_points < res.mesh.n_cells
    n_ref = int(res.advice.refine.sum())
    assert 20 < n_ref < 100  # the mesh exercises both branches
    # refine cells fill up to half the points first; the rest are sampled from all others
    assert a["refine"].sum() >= min(n_ref, max_points // 2)
    if n_ref <= max_points // 2:
        assert a["refine"].sum() == n_ref


def test_coordinates_are_in_the_users_unit():
    res = graded_audit(unit="mm")
    fig = figures.order_map(res)
    m = fig.meshcheck_data
    np.testing.assert_allclose(m["xyz"], res.mesh.centroids[m["cell_ids"]] * 1000.0)
    assert fig.axes[1].get_xlabel().endswith("(mm)")


# ---------------------------------------------------------------- general
def test_region_names_are_not_parsed_as_mathtext():
    """A name with TeX-like text must draw literally, not raise in mathtext."""
    res = graded_audit(names={1: r"cost $\frac{", 2: "<b>$x$</b>"})
    d = to_dict(res)
    fig = figures.region_limits(res, d)
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert r"cost \$\frac{" in labels and r"<b>\$x\$</b>" in labels
    fig.savefig(io.BytesIO(), format="svg")  # raises on a mathtext parse error


def test_all_figures_returns_every_figure_with_its_data(graded):
    res, d = graded
    figs = figures.all_figures(res, d)
    assert list(figs) == list(figures.FIGURES)
    for name, fig in figs.items():
        assert isinstance(fig, Figure), name
        assert fig.meshcheck_data, name
