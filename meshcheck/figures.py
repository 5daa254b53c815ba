"""Figures of an audit, as matplotlib :class:`~matplotlib.figure.Figure` objects.

Every function takes an :class:`~meshcheck.pipeline.AuditResult` and,
optionally, the report dict of :func:`meshcheck.report.to_dict` (built when
not given; pass it to avoid rebuilding it per figure).  Nothing is shown or
saved: a notebook displays the returned figure, :mod:`meshcheck.html_report`
embeds it as SVG.  Figures are built on :class:`matplotlib.figure.Figure`
directly (no pyplot state, no GUI backend).

Each figure carries the arrays it plots in ``fig.meshcheck_data`` (a dict of
numpy arrays / numbers, frequencies in Hz, lengths in the mesh's unit), so a
caller can check or re-plot them.

Colours vary in lightness and every series also differs in marker, line style
or hatch, so the figures read when printed in greyscale.
"""
from __future__ import annotations

from contextlib import contextmanager

import matplotlib
import numpy as np
from matplotlib.cm import ScalarMappable
from matplotlib.colors import BoundaryNorm, ListedColormap, to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import LogFormatter, MaxNLocator, NullLocator

from .cost import lagrange_dofs, variable_order_dofs
from .dispersion import usable_kh
from .pipeline import AuditResult
from .quality import family_of
from .units import UNIT_FACTORS

__all__ = ["FIGURES", "all_figures", "region_limits", "elements_per_wavelength", "order_map",
           "order_shares", "unknowns", "quality_histograms", "order_colours", "mpl_text"]

WIDTH = 7.0  # inches: fits the text width of A4 and Letter with 12 mm margins
_RC = {
    "font.family": "DejaVu Sans", "font.size": 8, "axes.titlesize": 8.5,
    "axes.labelsize": 8, "legend.fontsize": 7, "xtick.labelsize": 7, "ytick.labelsize": 7,
    "axes.grid": True, "grid.color": "#d4d4d4", "grid.linewidth": 0.5,
    "axes.spines.top": False, "axes.spines.right": False, "axes.edgecolor": "#444444",
    "axes.linewidth": 0.6, "lines.linewidth": 1.3, "legend.frameon": False,
    "svg.fonttype": "path", "svg.hashsalt": "meshcheck", "savefig.dpi": 150,
    "hatch.linewidth": 0.5, "axes.titlelocation": "left", "axes.titleweight": "bold",
}
#: region series: (colour, marker, line style); lightness and shape both vary
_SERIES = [("#2f5d8c", "o", "-"), ("#c0781f", "s", "--"), ("#4f8a3c", "^", "-."),
           ("#8a4f9e", "D", ":"), ("#8c8c8c", "v", "-"), ("#a63d3d", "P", "--"),
           ("#2a8c82", "X", "-."), ("#5a5a5a", "*", ":")]
_HATCHES = ["", "//", "..", "\\\\", "xx", "--", "oo", "++"]
_NOT_CARRIED = "#1a1a1a"
_LABELS = {"edge_ratio": "edge ratio", "aspect_ratio": "aspect ratio",
           "radius_ratio": "radius ratio", "scaled_jacobian": "scaled Jacobian",
           "min_dihedral": "min. dihedral angle (deg)", "max_dihedral": "max. dihedral angle (deg)",
           "skew": "skew", "min_angle": "min. angle (deg)"}
_FAMILY_STYLE = {"tet": ("#7f9fc4", ""), "hex": ("#d8b26e", "//"), "wedge": ("#95c285", ".."),
                 "pyramid": ("#b98ab0", "xx"), "tri": ("#7f9fc4", ""), "quad": ("#d8b26e", "//")}
_MAX_REGIONS = 8


@contextmanager
def _style():
    with matplotlib.rc_context(_RC):
        yield


def _axes(height: float, right: float = 0.15, left: float = 0.8, bottom: float = 0.45,
          top: float = 0.3):
    """A figure WIDTH x height inches with one axes at fixed margins (inches).

    Fixed margins instead of a layout engine: drawing is several times faster.
    """
    fig = Figure(figsize=(WIDTH, height))
    ax = fig.add_axes((left / WIDTH, bottom / height, 1 - (left + right) / WIDTH,
                       1 - (bottom + top) / height))
    return fig, ax


def mpl_text(text) -> str:
    """A string from the mesh file made safe for matplotlib text (no mathtext)."""
    return str(text).replace("$", r"\$")


def _report(res: AuditResult, data: dict | None) -> dict:
    if data is not None:
        return data
    from .report import to_dict
    return to_dict(res)


def _hz(values) -> np.ndarray:
    return np.array([np.nan if v is None else float(v) for v in values], dtype=float)


class _PlainLogFormatter(LogFormatter):
    """Log-axis labels as plain numbers ("2,000" rather than "2 x 10^3"); which
    ticks get a label is left to :class:`~matplotlib.ticker.LogFormatter`."""

    def __call__(self, x, pos=None):
        if not super().__call__(x, pos):
            return ""
        return f"{x:,.0f}" if x >= 1 else f"{x:.2g}"


def _log(ax, which: str = "y") -> None:
    """Log scale on an axis, labelled with plain numbers."""
    axis = ax.yaxis if which == "y" else ax.xaxis
    (ax.set_yscale if which == "y" else ax.set_xscale)("log")
    axis.set_major_formatter(_PlainLogFormatter(labelOnlyBase=False))
    axis.set_minor_formatter(_PlainLogFormatter(labelOnlyBase=False))


def _freq_axis(ax, f: np.ndarray) -> None:
    if len(f) > 1 and f.max() / f.min() > 5:
        _log(ax, "x")
    ax.set_xlabel("frequency (Hz)")


def order_colours(max_order: int) -> ListedColormap:
    """Colours for orders 1..max_order (light to dark) plus one for "not carried"."""
    from matplotlib import colormaps
    base = colormaps["viridis_r"](np.linspace(0.05, 0.92, max_order))
    return ListedColormap(np.vstack([base, to_rgba(_NOT_CARRIED)]),
                          name="meshcheck_orders")


def _band_hatch(j: int) -> str:
    """Every other band plain, the others hatched in turn."""
    return _HATCHES[j % 2 * (1 + j // 2 % 3)]


def _max_order(res: AuditResult) -> int:
    return res.settings.advice.max_order


# ------------------------------------------------------------------ figures
def region_limits(res: AuditResult, data: dict | None = None) -> Figure:
    """Highest usable frequency (Hz) per region and order p = 1..max_order.

    One line per region (the ``_MAX_REGIONS`` most limiting ones when there are
    more) and a bold line for the whole mesh; the requested upper frequency is
    drawn across.  ``meshcheck_data``: orders (P,), mesh (P,) Hz, regions
    {name: (P,) Hz}, upper_frequency.
    """
    d = _report(res, data)
    P = _max_order(res)
    orders = np.arange(1, P + 1)
    keys = [str(p) for p in orders]
    mesh = _hz(d["limits_hz"]["mesh"][k] for k in keys)
    regions = d["input"]["regions"]
    allowed = res.settings.advice.allowed_order
    if len(regions) > _MAX_REGIONS:
        regions = sorted(regions, key=lambda r: (r["limit_hz_per_order"][str(allowed)] or 0))
        regions = regions[:_MAX_REGIONS]
    fmax = d["verdict"]["upper_frequency_hz"]
    series = {}
    with _style():
        fig, ax = _axes(3.0)
        if len(d["input"]["regions"]) > 1:
            for i, r in enumerate(regions):
                c, m, ls = _SERIES[i % len(_SERIES)]
                y = _hz(r["limit_hz_per_order"][k] for k in keys)
                series[r["name"]] = y
                ax.plot(orders, y, color=c, marker=m, ls=ls, ms=4.5, lw=1.1,
                        label=mpl_text(r["name"]))
        ax.plot(orders, mesh, color="#b0b0b0", lw=6.0, solid_capstyle="round",
                label="whole mesh (lowest)", zorder=1.5)
        ax.axhline(fmax, color="#555555", lw=1.0, ls=(0, (6, 3)), zorder=1)
        ax.annotate(f"requested {fmax:,.0f} Hz", (1, fmax), xycoords=("axes fraction", "data"),
                    xytext=(-2, 3), textcoords="offset points", ha="right", va="bottom",
                    fontsize=7, color="#333333")
        if res.settings.advice.order is not None:
            ax.axvline(allowed, color="#555555", lw=0.8, ls=":")
        _log(ax, "y")
        ax.set_xticks(orders)
        ax.set_xlabel("polynomial order p")
        ax.set_ylabel("highest usable frequency (Hz)")
        ax.set_title("Highest usable frequency per region and element order")
        ax.legend(loc="upper left", ncols=1 if len(series) < 4 else 2)
    fig.meshcheck_data = {"orders": orders, "mesh": mesh, "regions": series,
                          "upper_frequency": fmax}
    return fig


def order_shares(res: AuditResult, data: dict | None = None) -> Figure:
    """Share of cells needing each order against frequency (stacked area).

    Orders above the solver's maximum are merged into one "not carried" band.
    ``meshcheck_data``: frequencies (n_f,) Hz, shares (n_f, P + 1) fractions
    (columns p = 1..P, then not carried), labels.
    """
    d = _report(res, data)
    P = _max_order(res)
    sw = d["sweep"]
    f = np.asarray(sw["frequencies_hz"], dtype=float)
    counts = np.asarray(sw["order_counts"], dtype=float).reshape(len(f), -1)
    merged = np.column_stack([counts[:, :P], counts[:, P:].sum(axis=1)])
    total = merged.sum(axis=1, keepdims=True)
    shares = merged / np.where(total > 0, total, 1.0)
    labels = [f"p = {p}" for p in range(1, P + 1)] + [f"not carried (p > {P})"]
    cmap = order_colours(P)
    colours = [cmap(i) for i in range(P + 1)]
    used = shares.max(axis=0) > 0
    with _style():
        fig, ax = _axes(3.0, right=1.45)
        if len(f) > 1:
            polys = ax.stackplot(f, shares.T * 100.0, colors=colours, edgecolor="white",
                                 linewidth=0.4)
            for j, poly in enumerate(polys):
                poly.set_hatch(_band_hatch(j))
                poly.set_label(labels[j] if used[j] else "_nolegend_")
            polys[-1].set_hatch("xx")
            polys[-1].set_edgecolor("#bbbbbb")
            ax.set_xlim(f[0], f[-1])
        else:
            bottom = 0.0
            for j in range(P + 1):
                ax.bar([0], [shares[0, j] * 100.0], bottom=bottom, color=colours[j], width=0.5,
                       hatch="xx" if j == P else _band_hatch(j),
                       edgecolor="white", label=labels[j] if used[j] else "_nolegend_")
                bottom += shares[0, j] * 100.0
            ax.set_xticks([0], [f"{f[0]:,.0f} Hz"])
        if len(f) > 1:
            _freq_axis(ax, f)
        ax.set_ylim(0, 100)
        ax.set_ylabel("share of cells (%)")
        ax.set_title("Order each cell needs, against frequency")
        handles, labs = ax.get_legend_handles_labels()
        ax.legend(handles[::-1], labs[::-1], loc="center left", bbox_to_anchor=(1.01, 0.5))
        ax.grid(False)
    fig.meshcheck_data = {"frequencies": f, "shares": shares, "labels": labels}
    return fig


def _cell_size_factors(res: AuditResult, cell: int, pmax: int) -> np.ndarray:
    """(pmax,) 3D-correction factor a of one cell per order (the largest over its
    edges, as for the advice's target size); ones for the plain 1D model."""
    from .advice import size_correction

    if not res.settings.advice.correction_3d:
        return np.ones(pmax)
    mesh, topo = res.mesh, res.topology
    corr = size_correction(mesh, topo, pmax, res.settings.advice.target)
    bi = int(np.searchsorted(mesh.block_offsets, cell, side="right") - 1)
    edges = topo.edges.cell_edges[bi][cell - mesh.block_offsets[bi]]
    return np.array([float(np.max(corr.at(p, edges))) for p in range(1, pmax + 1)])


def elements_per_wavelength(res: AuditResult, data: dict | None = None,
                            n_points: int = 200) -> Figure:
    """Elements per wavelength lambda/h against frequency, with the need per order.

    lambda/h = c / (f h) per cell (h its longest edge; with mean flow c is divided
    by the worst-case flow factor, the upstream wavelength); the minimum
    (coarsest cell) and the median over cells are drawn.  The horizontal lines are the
    lambda/h each order p needs to meet the target at the coarsest cell's
    propagation-distance ratio L/h, 2 pi a / (kh)_max(p, L/(a h)) from the 1D model
    with the cell's 3D-correction factor a (1 for the plain model);
    where the minimum curve crosses a line, that order stops carrying the
    coarsest cell.  ``meshcheck_data``: frequencies (n,) Hz, min (n,),
    median (n,), needed {p: lambda/h}, ratio (L/h of the coarsest cell),
    coarsest_cell (id).
    """
    a, s = res.advice, res.settings
    P = _max_order(res)
    fmax = s.fmax
    f_sweep = np.asarray(s.frequencies)
    f_lo = f_sweep[0] if len(f_sweep) > 1 else fmax / 10.0
    f = np.geomspace(f_lo, 1.25 * fmax, n_points)
    speed = a.cell_speed
    flow = getattr(a, "edge_flow_factor", None)
    if flow is not None:  # mean flow: the upstream wavelength is the shortest
        speed = speed / res.topology.edges.per_cell(flow, np.maximum)
    with np.errstate(divide="ignore", invalid="ignore"):
        c_over_h = np.where(a.cell_size > 0, speed / a.cell_size, np.nan)
    ok = np.isfinite(c_over_h)
    if ok.any():
        coarsest = int(np.flatnonzero(ok)[np.argmin(c_over_h[ok])])
        lo, med = float(c_over_h[coarsest]), float(np.median(c_over_h[ok]))
        ratio = float(max(a.cell_distance[coarsest] / a.cell_size[coarsest], 1.0))
        table = usable_kh(s.advice.target, max(P, 1))
        factor = _cell_size_factors(res, coarsest, P)
        # the model sees the cell's edges as a h: lambda/h >= 2 pi a / (kh)_max(p, L/(a h))
        needed = {p: float(2.0 * np.pi * factor[p - 1] / table.max_kh(p, ratio / factor[p - 1]))
                  for p in range(1, P + 1)}
    else:
        coarsest, lo, med, ratio, needed = -1, np.nan, np.nan, np.nan, {}
    y_min, y_med = lo / f, med / f
    with _style():
        fig, ax = _axes(3.3, right=0.4, bottom=0.75)
        ax.plot(f, y_med, color="#7a7a7a", lw=1.4, ls="--", label="median over cells")
        ax.plot(f, y_min, color="black", lw=2.0, label="minimum (coarsest cell)")
        for p, n in needed.items():
            ax.axhline(n, color="#3c3c3c" if p % 2 else "#8a8a8a", lw=0.8,
                       ls=(0, (4, 2)) if p % 2 else "-", zorder=1)
            ax.annotate(f"p={p}", (1, n), xycoords=("axes fraction", "data"), xytext=(3, 0),
                        textcoords="offset points", va="center", fontsize=6.5,
                        color="#222222", annotation_clip=False)
        ax.axvline(fmax, color="#555555", lw=0.9, ls=":", label=f"requested {fmax:,.0f} Hz")
        _log(ax, "x")
        _log(ax, "y")
        ax.set_xlim(f[0], f[-1])
        ax.set_xlabel("frequency (Hz)")
        ax.set_ylabel("elements per wavelength  \u03bb/h")
        ax.set_title("Elements per wavelength; lines: what order p needs "
                     f"(at the coarsest cell's L/h = {ratio:,.3g})")
        fig.legend(loc="lower center", ncols=3, bbox_to_anchor=(0.5, 0.0))
    fig.meshcheck_data = {"frequencies": f, "min": y_min, "median": y_med, "needed": needed,
                          "ratio": ratio, "coarsest_cell": coarsest}
    return fig


def unknowns(res: AuditResult, data: dict | None = None) -> Figure:
    """Estimated unknowns (DOFs) against frequency.

    Variable order up to max_order (hierarchical, interiors condensed, maximum
    rule; the sweep's count in variable mode) and fixed orders p = 1, 2 (and
    the solver's fixed order) as Lagrange counts, drawn solid up to the
    frequency each fixed order carries and dotted beyond.
    ``meshcheck_data``: frequencies (n_f,) Hz, variable (n_f,) int64,
    fixed {p: count}, fixed_limit {p: Hz}.
    """
    d = _report(res, data)
    s, a = res.settings, res.advice
    P = _max_order(res)
    f = np.asarray(d["sweep"]["frequencies_hz"], dtype=float)
    if s.advice.order is None:
        var = np.asarray(d["sweep"]["dofs"], dtype=np.int64)
    else:
        var = variable_order_dofs(res.mesh, res.topology, a.limit_rows, f, P, a.limit_row)
    fixed_orders = sorted({1, 2, s.advice.order or 1} & set(range(1, P + 1)))
    fixed = {p: lagrange_dofs(res.mesh, res.topology, p) for p in fixed_orders}
    limit = {p: float(a.mesh_limit[p - 1]) for p in fixed_orders}
    lo, hi = (f[0], f[-1]) if len(f) > 1 else (f[0] / 2.0, f[0] * 1.5)
    with _style():
        fig, ax = _axes(3.0)
        ax.plot(f, var, color="black", lw=2.0, marker="o", ms=3,
                label=f"variable order, p \u2264 {P} (condensed)")
        for i, p in enumerate(fixed_orders):
            c, m, _ = _SERIES[i % len(_SERIES)]
            end = min(max(limit[p], lo), hi)
            ax.plot([lo, end], [fixed[p]] * 2, color=c, lw=1.4, ls="-",
                    label=f"fixed p = {p} (Lagrange), carries up to {limit[p]:,.0f} Hz")
            if end < hi:
                ax.plot([end, hi], [fixed[p]] * 2, color=c, lw=1.0, ls=":")
                ax.plot([end], [fixed[p]], color=c, marker=m, ms=5)
        _freq_axis(ax, f)
        ax.set_xlim(lo, hi)
        _log(ax, "y")
        ax.set_ylabel("unknowns (DOFs)")
        ax.set_title("Estimated unknowns against frequency")
        ax.legend(loc="best")
    fig.meshcheck_data = {"frequencies": f, "variable": var, "fixed": fixed,
                          "fixed_limit": limit}
    return fig


def _bins(v: np.ndarray, n: int = 40) -> tuple[np.ndarray, bool]:
    lo, hi = float(v.min()), float(v.max())
    if lo > 0 and hi / lo > 20:
        return np.geomspace(lo, hi, n + 1), True
    if hi - lo <= 1e-12 * max(abs(lo), 1.0):
        pad = max(abs(lo) * 0.01, 1e-3)
        return np.linspace(lo - pad, hi + pad, n + 1), False
    return np.linspace(lo, hi, n + 1), False


def quality_histograms(res: AuditResult, data: dict | None = None) -> Figure:
    """Histograms of the quality metrics, the acceptable range shaded.

    One panel per metric defined on some cell; bars stacked per cell family
    (tet, hex, ...) with hatches; the acceptable range of the largest family
    shaded, every present family's bounds drawn as dashed lines; infinite
    values (degenerate cells) are counted in the title, not binned.
    ``meshcheck_data``: {metric: {"bins", "counts" {family: (n_bins,)},
    "bounds" {family: (lo, hi)}, "out_of_range", "infinite"}}.
    """
    d = _report(res, data)
    names = list(d["quality"])
    m = res.mesh
    block_fams = [family_of(b.type) for b in m.blocks]
    names_f = sorted(set(block_fams))
    fam_code = np.repeat(np.array([names_f.index(f) for f in block_fams], dtype=np.int8),
                         [len(b) for b in m.blocks]) if m.blocks else np.zeros(0, np.int8)
    size = np.bincount(fam_code, minlength=len(names_f))
    order = sorted(names_f, key=lambda x: -size[names_f.index(x)])
    fam_mask = {fm: fam_code == names_f.index(fm) for fm in order}
    limits = res.settings.quality
    ncols = 3
    nrows = max(1, -(-len(names) // ncols))
    out = {}
    with _style():
        # fixed margins (inches) instead of a layout engine: 4x faster to draw
        legend = 0.2 if len(order) > 1 else 0.0
        height = 1.9 * nrows + 0.55 + legend
        fig = Figure(figsize=(WIDTH, height))
        axes = fig.subplots(nrows, ncols, squeeze=False, gridspec_kw={
            "left": 0.45 / WIDTH, "right": 1 - 0.1 / WIDTH, "top": 1 - 0.45 / height,
            "bottom": (0.35 + legend) / height, "wspace": 0.28, "hspace": 0.5}).ravel()
        for ax in axes[len(names):]:
            ax.set_visible(False)
        for ax, name in zip(axes, names):
            values = res.quality[name]
            finite = np.isfinite(values)
            n_inf = int(np.count_nonzero(np.isinf(values)))
            present = [fm for fm in order if (finite & fam_mask[fm]).any()]
            bins, logx = _bins(values[finite])
            series = [values[finite & fam_mask[fm]] for fm in present]
            counts = {}
            for j, (fm, v) in enumerate(zip(present, series)):
                c, _ = np.histogram(v, bins)
                counts[fm] = c
            bottom = np.zeros(len(bins) - 1)
            for fm in present:  # one step patch per family, stacked
                colour, hatch = _FAMILY_STYLE.get(fm, ("#999999", ""))
                ax.stairs(bottom + counts[fm], bins, baseline=bottom.copy(), fill=True,
                          facecolor=colour, hatch=hatch, edgecolor="#555555", linewidth=0.4,
                          label=fm)
                bottom = bottom + counts[fm]
            _log(ax, "y")
            if logx:
                _log(ax, "x")
            pad = 0.02 * (bins[-1] - bins[0])
            xlim = (bins[0] / 1.05, bins[-1] * 1.05) if logx else (bins[0] - pad, bins[-1] + pad)
            bounds = {fm: limits.bounds(fm, name) for fm in present}
            for j, fm in enumerate(present):
                lo, hi = bounds[fm]
                if j == 0 and (np.isfinite(lo) or np.isfinite(hi)):
                    ax.axvspan(max(lo, xlim[0]), min(hi, xlim[1]), color="#dcebdc", zorder=0,
                               lw=0)
                for b in (lo, hi):
                    if np.isfinite(b) and xlim[0] <= b <= xlim[1]:
                        ax.axvline(b, color="#1f5f1f", lw=1.0, ls=(0, (3, 2)) if j == 0 else ":")
            ax.set_xlim(*xlim)
            ax.set_ylim(0.7, max(1.0, bottom.max()) * 2.0)
            n_out = d["quality"][name]["out_of_range"]
            extra = f", {n_inf} infinite" if n_inf else ""
            ax.set_title(f"{_LABELS.get(name, name)}", fontsize=8)
            ax.text(0.99, 0.97, f"{n_out:,} of {int(finite.sum()):,} outside{extra}",
                    transform=ax.transAxes, ha="right", va="top", fontsize=6.5,
                    bbox={"facecolor": "white", "edgecolor": "none", "alpha": 0.8, "pad": 1})
            ax.grid(False)
            ax.tick_params(labelsize=6.5)
            ax.yaxis.set_minor_locator(NullLocator())
            out[name] = {"bins": bins, "counts": counts, "bounds": bounds, "out_of_range": n_out,
                         "infinite": n_inf}
        if len(order) > 1:
            handles = [Patch(facecolor=_FAMILY_STYLE.get(fm, ("#999999", ""))[0],
                                                hatch=_FAMILY_STYLE.get(fm, ("", ""))[1],
                                                edgecolor="#555555", label=fm) for fm in order]
            fig.legend(handles=handles, loc="lower center", ncols=len(order),
                       bbox_to_anchor=(0.5, 0.0))
        fig.suptitle("Quality metrics (cells per bin, log scale); shaded: acceptable range",
                     fontsize=8.5, fontweight="bold", x=0.01, y=1 - 0.08 / height, ha="left",
                     va="top")
    fig.meshcheck_data = out
    return fig


def _sample(n: int, keep: np.ndarray, max_points: int, seed: int = 0) -> np.ndarray:
    """Sorted ids of at most max_points cells, the ``keep`` ones first (deterministic)."""
    if n <= max_points:
        return np.arange(n)
    rng = np.random.default_rng(seed)
    first = np.flatnonzero(keep)
    if len(first) > max_points // 2:
        first = rng.choice(first, max_points // 2, replace=False)
    rest = np.setdiff1d(np.arange(n), first, assume_unique=True)
    rest = rng.choice(rest, max_points - len(first), replace=False)
    return np.sort(np.concatenate([first, rest]))


def order_map(res: AuditResult, data: dict | None = None, max_points: int = 6000) -> Figure:
    """Cell centroids coloured by the order needed at the upper frequency.

    Left: 3D scatter; right: projection onto the plane of the two largest
    extents with higher orders drawn on top (the highest order through the
    depth shows).  Triangles mark cells to refine (they need more than the
    allowed order), squares cells that could be coarser.  At most
    ``max_points`` cells are drawn (cells to refine first, the rest sampled
    with a fixed seed).  ``meshcheck_data``: cell_ids (n,), order (n,)
    (max_order + 1 = not carried), xyz (n, 3) in the mesh's unit, refine,
    coarsen (n,) bool, axes (2,) projected axes.
    """
    d = _report(res, data)
    a, m = res.advice, res.mesh
    P = _max_order(res)
    unit = d["input"]["unit"]
    scale = UNIT_FACTORS.get(m.unit, 1.0)
    refine = a.refine
    coarsen = a.coarsen & ~a.refine
    ids = _sample(m.n_cells, refine, max_points)
    xyz = m.centroids_of(ids) / scale  # the sampled cells only
    order = np.minimum(a.cell_order[ids], P + 1)
    ref, coa = refine[ids], coarsen[ids]
    ext = np.ptp(xyz, axis=0) if len(xyz) else np.ones(3)
    plane = np.sort(np.argsort(-ext)[:2])
    cmap = order_colours(P)
    norm = BoundaryNorm(np.arange(0.5, P + 2.0), cmap.N)
    groups = [(~ref & ~coa, "o", 3.0, "none", 0.0), (coa, "s", 6.0, "#555555", 0.3),
              (ref, "^", 9.0, "#000000", 0.3)]
    axn = "xyz"
    height = 3.5
    with _style():
        fig = Figure(figsize=(WIDTH, height))
        ax3 = fig.add_axes((0.0, 0.12, 0.44, 0.8), projection="3d")
        ax2 = fig.add_axes((0.585, 0.17, 0.3, 0.7))
        cax = fig.add_axes((0.91, 0.17, 0.018, 0.7))
        for mask, marker, size, edge, lw in groups:
            if mask.any():
                x = xyz[mask]
                ax3.scatter(x[:, 0], x[:, 1], x[:, 2], c=order[mask], cmap=cmap, norm=norm,
                            marker=marker, s=size, edgecolors=edge, linewidths=lw,
                            depthshade=False, rasterized=True)
        srt = np.lexsort((ref, order))  # low orders first, refine cells last: on top
        for mask, marker, size, edge, lw in groups:
            sel = srt[mask[srt]]
            if len(sel):
                ax2.scatter(xyz[sel, plane[0]], xyz[sel, plane[1]], c=order[sel], cmap=cmap,
                            norm=norm, marker=marker, s=size, edgecolors=edge, linewidths=lw,
                            rasterized=True)
        for axis, name in zip((ax3.xaxis, ax3.yaxis, ax3.zaxis), axn):
            axis.set_major_locator(MaxNLocator(4))
            axis.set_label_text(f"{name} ({unit})")
            axis.labelpad = -3
        ax3.tick_params(labelsize=6, pad=-2)
        ax3.set_box_aspect(np.maximum(ext, 0.05 * ext.max()) if ext.max() > 0 else None,
                           zoom=0.92)
        ax3.view_init(elev=22, azim=-58)
        ax2.set_aspect("equal", adjustable="datalim")
        ax2.set_xlabel(f"{axn[plane[0]]} ({unit})")
        ax2.set_ylabel(f"{axn[plane[1]]} ({unit})")
        ax2.grid(False)
        fmax = res.settings.fmax
        fig.text(0.01, 1 - 0.08 / height, f"Order each cell needs at {fmax:,.0f} Hz",
                 fontsize=8.5, fontweight="bold", va="top")
        ax2.set_title(f"projection on {axn[plane[0]]}{axn[plane[1]]}, highest order on top",
                      fontsize=7.5, fontweight="normal")
        cb = fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), cax=cax)
        cb.set_ticks(np.arange(1, P + 2), labels=[str(p) for p in range(1, P + 1)] + [f">{P}"])
        cb.set_label("order p")
        cb.ax.tick_params(labelsize=6.5)
        handles = [Line2D([], [], ls="", marker="o", ms=3, color="#888888", label="cell"),
                   Line2D([], [], ls="", marker="s", ms=4, color="#bbbbbb", mec="#555555",
                          label=f"could be {res.settings.advice.coarsen_factor:g}x coarser"),
                   Line2D([], [], ls="", marker="^", ms=5, color="#888888", mec="black",
                          label="refine")]
        fig.legend(handles=handles, loc="lower left", bbox_to_anchor=(0.01, 0.0), ncols=3)
        if len(ids) < m.n_cells:
            fig.text(0.99, 0.01, f"{len(ids):,} of {m.n_cells:,} cells drawn", ha="right",
                     va="bottom", fontsize=6.5, color="#444444")
    fig.meshcheck_data = {"cell_ids": ids, "order": order, "xyz": xyz, "refine": ref,
                          "coarsen": coa, "axes": plane}
    return fig


#: name -> figure function, in the order the HTML report shows them
FIGURES = {
    "region_limits": region_limits,
    "elements_per_wavelength": elements_per_wavelength,
    "order_map": order_map,
    "order_shares": order_shares,
    "unknowns": unknowns,
    "quality_histograms": quality_histograms,
}


def all_figures(res: AuditResult, data: dict | None = None) -> dict[str, Figure]:
    """Every figure of the report, name -> Figure (report order)."""
    d = _report(res, data)
    return {name: fn(res, d) for name, fn in FIGURES.items()}
