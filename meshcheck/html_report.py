"""A self-contained HTML audit report (one file, figures inline, prints cleanly).

The page needs no network and runs no script: figures are matplotlib SVGs
embedded as ``data:`` images, the style sheet is inline and a
Content-Security-Policy forbids any other source.  Every string is escaped
with :func:`html.escape` (region names and file names come from the mesh file);
only markup built here is emitted raw.

Sections, most important first: 1 the verdict (signed-off upper frequency per
solver mode, with the assumptions and, when a job file or the mesh file's
material cards set them, the media per region), 2 what blocks or limits it,
3 the advice per frequency (ending with the geometry checks and the cost of the
sweep), 4 quality, 5 method and cautions.  Figures come from the report dict
of :func:`meshcheck.report.to_dict`, formatted, not recomputed (the unknowns of
the solver-mode table excepted, see :func:`solver_modes`).  A print style sheet
lays the page out for A4 or Letter (whichever the print dialog uses; the
content is at most 186 mm wide), one section per page start.

matplotlib is imported only when figures are rendered; without it
:func:`render_html` raises ImportError with the install hint.
"""
from __future__ import annotations

import base64
import html
import io
from pathlib import Path

import numpy as np

from . import __version__
from .pipeline import AuditResult

__all__ = ["render_html", "write_html", "solver_modes", "figure_data_uri"]

_MISSING = "the HTML report needs matplotlib: pip install matplotlib (or meshcheck[plot])"
_MAX_FREQ_ROWS = 40
_MAX_CLUSTERS = 12
_CAPTIONS = {
    "region_limits": "Highest frequency each region carries with order p (lowest over its "
                     "cells), against the requested upper frequency. The grey band is the "
                     "whole mesh.",
    "elements_per_wavelength": "Elements per wavelength \u03bb/h = c/(f h), h the longest "
                               "edge of a cell. Horizontal lines: the \u03bb/h order p needs "
                               "for the accuracy target at the coarsest cell's ratio L/h; "
                               "where the solid curve falls below a line, that order no longer "
                               "carries the coarsest cell.",
    "order_map": "Cell centroids coloured by the order each cell needs at the upper frequency. "
                 "Triangles: cells to refine (they need more than the allowed order); squares: "
                 "cells that could be coarser.",
    "order_shares": "Share of cells needing each order, per sweep frequency; the dark hatched "
                    "band holds cells no allowed order carries.",
    "unknowns": "Estimated unknowns. Variable order: hierarchical basis, cell interiors "
                "condensed, each edge and face at the highest order of its cells. Fixed "
                "orders: Lagrange counts, solid up to the frequency that order carries.",
    "quality_histograms": "Quality metrics of all cells (Verdict definitions); shaded: the "
                          "acceptable range, dashed: its bounds.",
}


class _Raw(str):
    """Markup built by this module (not escaped again)."""


def _e(x) -> str:
    """Escape anything for HTML text or a quoted attribute (raw markup passes through)."""
    return x if isinstance(x, _Raw) else html.escape(str(x), quote=True)


def _hz(x) -> str:
    if x is None:
        return "\u2013"
    x = float(x)
    if not np.isfinite(x):
        return "\u2013"
    return f"{x:,.0f}" if abs(x) >= 100 else f"{x:.3g}"


def _g(x, digits: int = 4) -> str:
    if x is None or not np.isfinite(float(x)):
        return "\u2013"
    return f"{float(x):.{digits}g}"


def _xyz(v, digits: int = 4) -> str:
    return "(" + ", ".join(_g(c, digits) for c in v) + ")"


def _int(n) -> str:
    return f"{int(n):,}"


def _pct(n: int, total: int) -> str:
    if not n:
        return ""
    s = 100.0 * n / total
    return "<0.1" if s < 0.1 else f"{s:.1f}"


def _dur(s: float) -> str:
    """Seconds as s, min or h (as in the Markdown report's cost table)."""
    s = float(s)
    return f"{s:.3g} s" if s < 120 else (f"{s / 60:.3g} min" if s < 7200 else
                                          f"{s / 3600:.3g} h")


def _bytes(x: float) -> str:
    """Bytes as MB or GB (as in the Markdown report's cost table)."""
    x = float(x)
    return f"{x / 1e6:.3g} MB" if x < 1e9 else f"{x / 1e9:.3g} GB"


def _sentence(text: str) -> str:
    text = str(text).strip()
    return text if text.endswith((".", "!", "?")) else text + "."


def _table(head, rows, text=(0,), cls: str = "", tid: str = "") -> str:
    """An HTML table.  Every cell is escaped unless it is _Raw; columns not in
    ``text`` are numeric (right-aligned).  A row is a list of cells or
    (cells, {attribute: value})."""
    num = ' class="num"'
    table_attrs = (f' id="{_e(tid)}"' if tid else "") + (f' class="{_e(cls)}"' if cls else "")
    out = [f"<table{table_attrs}>",
           "<thead><tr>" + "".join(f"<th{'' if j in text else num}>{_e(h)}</th>"
                                   for j, h in enumerate(head)) + "</tr></thead><tbody>"]
    for r in rows:
        attrs = ""
        if isinstance(r, tuple):
            r, a = r
            attrs = "".join(f' {k}="{_e(v)}"' for k, v in a.items())
        cells = "".join(f"<td{'' if j in text else num}>{_e(x)}</td>" for j, x in enumerate(r))
        out.append(f"<tr{attrs}>{cells}</tr>")
    out.append("</tbody></table>")
    return "\n".join(out)


# ------------------------------------------------------------------ figures
def figure_data_uri(fig) -> tuple[str, float, float]:
    """(data: URI of the figure as SVG, width px, height px) at 96 px per inch."""
    import matplotlib

    buf = io.BytesIO()
    with matplotlib.rc_context({"svg.fonttype": "path", "svg.hashsalt": "meshcheck"}):
        fig.savefig(buf, format="svg", metadata={"Date": None})
    w, h = fig.get_size_inches() * 96.0
    return "data:image/svg+xml;base64," + base64.b64encode(buf.getvalue()).decode("ascii"), w, h


def _figures(res: AuditResult, data: dict) -> dict[str, str]:
    try:
        from . import figures
    except ModuleNotFoundError as exc:
        if exc.name and exc.name.split(".")[0] == "matplotlib":
            raise ImportError(_MISSING) from exc
        raise
    out = {}
    for n, (name, fn) in enumerate(figures.FIGURES.items(), start=1):
        fig = fn(res, data)
        uri, w, h = figure_data_uri(fig)
        alt = f"Figure {n}: {_CAPTIONS[name].split('.')[0]}"
        out[name] = _Raw(
            f'<figure id="fig-{name}"><img src="{uri}" alt="{_e(alt)}" width="{w:.0f}" '
            f'height="{h:.0f}"><figcaption><b>Figure {n}.</b> {_e(_CAPTIONS[name])}'
            f"</figcaption></figure>")
    return out


# ------------------------------------------------------------------ content
def solver_modes(res: AuditResult, data: dict | None = None) -> list[dict]:
    """Signed-off upper frequency per solver mode, the audit's own mode first.

    Rows: variable order up to max_order, fixed p = 1, fixed p = 2 and the fixed
    order of the audit (if any).  Each row: mode ("variable"/"fixed"), order,
    label, signed_off_hz (0 when blocking defects), model_limit_hz (the mesh's
    limit once the defects are mended), carries (bool, reaches the upper
    frequency), unknowns (at the upper frequency; Lagrange count for a fixed
    order, condensed hierarchical count with advised orders for variable order),
    selected (bool, the audit's mode).
    """
    from .cost import lagrange_dofs, variable_order_dofs

    if data is None:
        from .report import to_dict
        data = to_dict(res)
    s, a = res.settings, res.advice
    fmax = s.fmax
    P = s.advice.max_order
    blocked = res.blocking
    rows = []
    if s.advice.order is None:
        dof_var = int(data["sweep"]["dofs"][-1])
    else:
        dof_var = int(variable_order_dofs(res.mesh, res.topology, a.limit_rows,
                                          np.array([fmax]), P, a.limit_row)[0])
    model = float(a.mesh_limit[P - 1])
    rows.append({"mode": "variable", "order": P, "label": f"variable order, p \u2264 {P}",
                 "signed_off_hz": 0.0 if blocked else model, "model_limit_hz": model,
                 "carries": (not blocked) and model >= fmax, "unknowns": dof_var,
                 "selected": s.advice.order is None})
    for p in sorted({1, 2, s.advice.order or 1}):
        if p > a.pmax:
            continue
        model = float(a.mesh_limit[p - 1])
        name = {1: "linear", 2: "quadratic", 3: "cubic"}.get(p, "")
        rows.append({"mode": "fixed", "order": p,
                     "label": f"fixed order p = {p}" + (f" ({name})" if name else ""),
                     "signed_off_hz": 0.0 if blocked else model, "model_limit_hz": model,
                     "carries": (not blocked) and model >= fmax,
                     "unknowns": int(lagrange_dofs(res.mesh, res.topology, p)),
                     "selected": s.advice.order == p})
    rows.sort(key=lambda r: not r["selected"])
    return rows


def _mode_text(asm: dict) -> str:
    return (f"fixed order p = {asm['fixed_order']}" if asm["solver_mode"] == "fixed"
            else f"variable order up to p = {asm['max_order']}")


def _region_names(d: dict) -> dict[int, str]:
    return {int(r["tag"]): r["name"] for r in d["input"]["regions"]}


def _verdict(res: AuditResult, d: dict) -> str:
    v, asm = d["verdict"], d["assumptions"]
    fmax = v["upper_frequency_hz"]
    mode = _mode_text(asm)
    target = asm["target_relative_error"]
    n_block = sum(1 for f in d["findings"] if f["severity"] == "blocking")
    mesh_lim = [x if x is not None else float("inf") for x in d["limits_hz"]["mesh"].values()]
    need = next((p for p, x in enumerate(mesh_lim, start=1) if x >= fmax), None)
    if v["state"] == "blocked":
        word, head = "BLOCKED", _Raw(
            f"No frequency is signed off: the mesh has {n_block} kind"
            f"{'s' if n_block != 1 else ''} of blocking defect (section 2). Once they are "
            f"mended the model allows up to <strong>{_hz(v['model_limit_hz'])} Hz</strong> "
            f"with {_e(mode)}.")
    elif v["state"] == "ready":
        word, head = "READY", _Raw(
            f"Signed off up to <strong>{_hz(v['signed_off_hz'])} Hz</strong> with {_e(mode)}; "
            f"this covers the requested upper frequency of {_hz(fmax)} Hz.")
    else:
        n_ref = sum(c["cells"] for c in d["refine"])
        P = asm["max_order"]
        fix = (f" Order p = {need} would carry it everywhere"
               + (f" (above this solver's maximum p = {P})" if need > P else "") if need else
               " No order up to the tabulated maximum carries it")
        word, head = "LIMITED", _Raw(
            f"Signed off up to <strong>{_hz(v['signed_off_hz'])} Hz</strong> with {_e(mode)}, "
            f"below the requested {_hz(fmax)} Hz. {_int(n_ref)} cells in {len(d['refine'])} "
            f"group{'s' if len(d['refine']) != 1 else ''} need refining (section 2).{fix}.")
    out = ['<section id="verdict"><h2><span class="secno">1</span> Verdict</h2>',
           f'<div class="verdict state-{v["state"]}"><p class="state">{word}</p>'
           f'<p class="headline">{head}</p>'
           f'<p class="sub">Accuracy target: relative error {target:.3g} '
           f"({100 * target:.3g} %) of a propagating wave over the propagation distance.</p>"
           "</div>"]
    rows = []
    for r in solver_modes(res, d):
        so = ("\u2013 (blocked)" if v["state"] == "blocked" else _hz(r["signed_off_hz"]))
        rows.append(([_Raw(f"{_e(r['label'])}{' <b>(this audit)</b>' if r['selected'] else ''}"),
                      so, _hz(r["model_limit_hz"]), "yes" if r["carries"] else "no",
                      _int(r["unknowns"])],
                     {"class": ("selected " if r["selected"] else "") +
                      ("carries" if r["carries"] else "short"),
                      "data-mode": r["mode"], "data-order": r["order"]}))
    out.append("<h3>Signed-off upper frequency per solver mode</h3>")
    out.append(_table(["solver", "signed off up to (Hz)", "model limit (Hz)",
                       f"carries {_hz(fmax)} Hz", f"unknowns at {_hz(fmax)} Hz"],
                      rows, text=(0, 3), tid="solver-modes", cls="modes"))
    out.append('<p class="note">Unknowns: variable order counts a hierarchical basis with cell '
               "interiors condensed and the advised order per cell; fixed orders count Lagrange "
               "nodes. The model limit ignores blocking defects.</p>")
    out.append(_assumptions(res, d))
    out.append("</section>")
    return "\n".join(out)


def _assumptions(res: AuditResult, d: dict) -> str:
    asm, inp = d["assumptions"], d["input"]
    unit = inp["unit"]
    from .units import UNIT_FACTORS
    scale = UNIT_FACTORS.get(unit, 1.0)
    f = d["sweep"]["frequencies_hz"]
    names = _region_names(d)
    speeds = ", ".join(f"{names.get(int(k), k) if str(k).lstrip('-').isdigit() else k} "
                       f"{float(c):.1f} m/s" for k, c in asm["region_speeds_m_s"].items())
    L = asm["propagation_distance_m"]
    L = L if isinstance(L, list) else [L]
    Ltxt = ", ".join(f"{_g(x / scale)} {unit}" for x in L[:6]) + (" ..." if len(L) > 6 else "")
    items = [
        ("sound speed", f"{asm['sound_speed_m_s']:.1f} m/s" +
         ("" if res.settings.speed is not None else
          f" (air at {asm['temperature_c']:g} \u00b0C, c = 331.3\u221a(1 + T/273.15))")
         + (f"; per region: {speeds}" if speeds else "")),
    ] + [("speed stated by the mesh file", f"{ms['name']}: {ms['speed_m_s']:.6g} m/s "
          f"({ms['card']}), {ms['note']}") for ms in asm.get("material_speeds", [])] + [
        ("solver", _mode_text(asm)),
        ("accuracy target", f"relative error {asm['target_relative_error']:.3g}"),
        ("3D correction of the 1D model", asm["correction_3d_note"]),
        ("propagation distance L", f"{Ltxt} ({asm['propagation_distance_rule']})"),
        ("frequencies", f"{len(f)} from {_hz(f[0])} to {_hz(f[-1])} Hz"),
        ("length unit", f"{unit} (lengths and coordinates below are in {unit})"),
        ("mesh", f"{Path(inp['file']).name or 'in memory'}: "
         + ", ".join(f"{_int(n)} {t}" for t, n in inp["cells"].items())
         + f", {_int(inp['points'])} nodes, {len(inp['regions'])} region"
         + ("s" if len(inp["regions"]) != 1 else "")
         + f"; box {_xyz(inp['bounding_box'][0])} to {_xyz(inp['bounding_box'][1])} {unit}"),
    ]
    dl = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in items)
    return f'<h3>Assumptions</h3><dl class="assumptions">{dl}</dl>' + _media(d)


def _default_medium(r: dict, temperature_c: float) -> bool:
    """True for a region neither a job file nor the mesh file's material cards set: still
    fluid, no flow, and air at the audit's temperature (or a speed from the command line,
    stated above)."""
    return (r["role"] == "fluid" and not r["mach_number"]
            and r["source"] in (f"air at {temperature_c:g} deg C (ideal gas)", "command line"))


def _speed(c) -> str:
    re_, im = (float(c[0]), float(c[1])) if isinstance(c, (list, tuple)) else (float(c), 0.0)
    if not im:
        return f"{re_:.1f}"
    sign = "+" if im > 0 else "\u2212"
    return f"{re_:.1f} {sign} {abs(im):.3g}i"


def _media(d: dict) -> str:
    """Per-region media table, only when a region is not default air (a medium, role or
    flow set by a job file, or a speed stated by the mesh file)."""
    media = d.get("media")
    asm = d["assumptions"]
    if not media or all(_default_medium(r, asm["temperature_c"]) for r in media):
        return ""
    names = _region_names(d)
    rows = []
    for r in media:
        role = r["role"].replace("_", " ")
        if r.get("surrounds") is not None:
            role += f" around {names.get(int(r['surrounds']), r['surrounds'])}"
        rows.append(([r["name"], role, _speed(r["speed_m_s"]), f"{r['effective_speed_m_s']:.1f}",
                      _g(r["attenuation_db_per_wavelength"], 3), _g(r["mach_number"]),
                      r["source"]],
                     {"class": "default" if _default_medium(r, asm["temperature_c"]) else "set",
                      "data-tag": r["tag"]}))
    return ("<p><b>Media per region</b> (set by the job file or the mesh file's material "
            "cards; the speed per region replaces the sound speed above). The effective speed "
            "1/Re(1/c) sets the wavelength; the Mach number is the mean flow over it.</p>"
            + _table(["region", "role", "speed (m/s)", "effective speed (m/s)",
                      "attenuation (dB per wavelength)", "Mach", "source"], rows,
                     text=(0, 1, 6), tid="media-table", cls="media"))


def _findings_list(items: list[dict], unit: str) -> str:
    out = ['<ul class="findings">']
    for f in items:
        ids = ", ".join(str(i) for i in f["ids"][:10]) + (" ..." if f["count"] > 10 else "")
        loc = f" first at {_xyz(f['locations'][0])} {unit}" if f["locations"] else ""
        out.append(f'<li class="sev-{_e(f["severity"])}"><b>{_e(f["severity"])}</b>: '
                   f"{_e(f['message'])}: {_int(f['count'])} ({_e(f['id_kind'])} ids "
                   f"{_e(ids)}){_e(loc)}</li>")
    out.append("</ul>")
    return "\n".join(out)


def _clusters(items: list[dict], d: dict, what: str) -> str:
    unit = d["input"]["unit"]
    names = _region_names(d)
    rows = []
    for i, c in enumerate(items[:_MAX_CLUSTERS], start=1):
        regions = ", ".join(names.get(int(t), f"region {t}") for t in c["regions"])
        box = _Raw(f"{_e(_xyz(c['box_min'], 3))} to<br>{_e(_xyz(c['box_max'], 3))}")
        ids = ", ".join(str(x) for x in c["some_cell_ids"][:4])
        rows.append([i, _int(c["cells"]), regions, _xyz(c["centroid"], 3), box,
                     _g(c["largest_edge"], 3), _g(c["target_size"], 3), _g(c["factor"], 3),
                     ids + (" ..." if c["cells"] > 4 else "")])
    more = (f'<p class="note">{len(items) - _MAX_CLUSTERS} smaller groups are in the JSON '
            "report.</p>" if len(items) > _MAX_CLUSTERS else "")
    return _table(["#", "cells", "regions", f"centroid ({unit})",
                   f"cell centroids span ({unit})", f"longest edge ({unit})",
                   f"target size ({unit})", "factor", "some cell ids"], rows, text=(2, 8),
                  tid=f"{what}-table", cls="clusters") + more


def _limits(res: AuditResult, d: dict, figs: dict) -> str:
    v = d["verdict"]
    unit = d["input"]["unit"]
    fmax = v["upper_frequency_hz"]
    P = d["assumptions"]["max_order"]
    out = ['<section id="limits"><h2><span class="secno">2</span> What blocks or limits it</h2>']
    blocking = [f for f in d["findings"] if f["severity"] == "blocking"]
    if blocking:
        out.append('<h3>Blocking defects</h3><div class="blocking">'
                   "<p>A solver would fail or give wrong results on this mesh until these are "
                   "mended:</p>" + _findings_list(blocking, unit) + "</div>")
    else:
        out.append("<p>No blocking defects: the mesh is valid for a solve.</p>")
    lc = v.get("limiting_cell")
    if lc:
        out.append(f"<p>The signed-off frequency at order p = {v['allowed_order']} is set by "
                   f"<b>cell {lc['cell']}</b> in region <b>{_e(lc['region_name'])}</b> "
                   f"(longest edge {_g(lc['largest_edge'])} {_e(unit)}, centroid "
                   f"{_xyz(lc['centroid'])} {_e(unit)}).</p>")
    keys = [str(p) for p in range(1, P + 1)]
    rows = []
    table = [("whole mesh", d["limits_hz"]["mesh"], "mesh")] + \
        [(r["name"], r["limit_hz_per_order"], "region") for r in d["input"]["regions"]]
    for name, lim, kind in table:
        cells = [_Raw(f'<span class="{"ok" if (lim[k] or 0) >= fmax else "short"}">'
                      f"{_hz(lim[k])}</span>") for k in keys]
        rows.append(([name] + cells, {"class": kind}))
    out.append("<h3>Highest usable frequency per region and order (Hz)</h3>")
    out.append(_table(["region"] + [f"p = {p}" for p in keys], rows, tid="region-limits",
                      cls="limits" + (" compact" if P > 10 else "")))
    out.append(f'<p class="note">Bold: carries the requested {_hz(fmax)} Hz.</p>')
    out.append(figs["region_limits"])
    out.append(figs["elements_per_wavelength"])
    out.append(f"<h3>Regions to refine at {_hz(fmax)} Hz</h3>")
    if d["refine"]:
        out.append(f"<p>Face-connected groups of cells that need more than order p = "
                   f"{v['allowed_order']} at {_hz(fmax)} Hz, largest first. Target size: the "
                   f"longest edge that meets the target there; factor = target / longest "
                   f"edge.</p>")
        out.append(_clusters(d["refine"], d, "refine"))
    else:
        out.append(f"<p>No cell needs refining: every cell carries {_hz(fmax)} Hz at the "
                   f"allowed order.</p>")
    out.append(figs["order_map"])
    out.append("</section>")
    return "\n".join(out)


def _advice(res: AuditResult, d: dict, figs: dict) -> str:
    sw = d["sweep"]
    P = d["assumptions"]["max_order"]
    f = sw["frequencies_hz"]
    counts = np.asarray(sw["order_counts"], dtype=np.int64).reshape(len(f), -1)
    merged = np.column_stack([counts[:, :P], counts[:, P:].sum(axis=1)])
    total = int(merged[0].sum()) if len(merged) else 0
    ready = np.asarray(sw["ready"], dtype=bool)
    out = ['<section id="advice"><h2><span class="secno">3</span> Advice per frequency</h2>']
    lead = int(np.argmin(ready)) if not ready.all() else len(f)  # leading carried ones
    upto = f" (every one up to {_hz(f[lead - 1])} Hz)" if 0 < lead < len(f) else ""
    out.append(f"<p>{len(f)} frequencies from {_hz(f[0])} to {_hz(f[-1])} Hz; "
               f"{int(ready.sum())} carried at the allowed order{upto}. Unknowns "
               f"{_int(sw['dofs'][0])} to {_int(sw['dofs'][-1])} ({_e(sw['dofs_kind'])}).</p>")
    out.append(figs["order_shares"])
    out.append(figs["unknowns"])
    n = len(f)
    idx = range(n) if n <= _MAX_FREQ_ROWS else np.unique(
        np.linspace(0, n - 1, _MAX_FREQ_ROWS).astype(int))
    rows = []
    for i in idx:
        rows.append(([_hz(f[i]), "yes" if ready[i] else "no", _int(sw["dofs"][i])] +
                     [_pct(int(c), total) for c in merged[i]],
                     {"class": "ready" if ready[i] else "short"}))
    out.append("<h3>Share of cells per order (%) and unknowns</h3>")
    out.append(_table(["f (Hz)", "carried", "unknowns"] + [f"p = {p}" for p in range(1, P + 1)]
                      + [f"> {P}"], rows, text=(1,), tid="sweep-table",
                      cls="sweep" + (" compact" if P > 8 else "")))
    if n > _MAX_FREQ_ROWS:
        out.append(f'<p class="note">{_MAX_FREQ_ROWS} of {n} frequencies shown; all are in the '
                   "JSON report.</p>")
    fc = res.settings.advice.coarsen_factor
    out.append(f"<h3>Regions that could be coarser (by {fc:g}x or more)</h3>")
    if d["coarsen"]:
        out.append(f"<p>Cells whose target size at {_hz(f[-1])} Hz is at least {fc:g} times "
                   "their longest edge: coarsening them saves unknowns without losing "
                   "accuracy at the allowed order.</p>")
        out.append(_clusters(d["coarsen"], d, "coarsen"))
    else:
        out.append("<p>No cell could be coarsened by that factor.</p>")
    out.append(_geometry_checks(d))
    out.append(_cost(d))
    out.append("</section>")
    return "\n".join(out)


def _len3(x) -> str:
    """A length to 3 digits, without an exponent from 1,000 to 10^7."""
    return f"{float(x):,.0f}" if x is not None and 1e3 <= abs(float(x)) < 1e7 else _g(x, 3)


def _span(lo, hi, unit: str) -> str:
    """'lo to hi unit', or one value when both print alike (3 digits)."""
    a, b = _len3(lo), _len3(hi)
    return f"{a} {unit}" if a == b else f"{a} to {b} {unit}"


def _pct_of(x) -> str:
    return "\u2013" if x is None else f"{100.0 * float(x):.1f} %"


def _geometry_checks(d: dict) -> str:
    """Rows of the checks that ran (gradation, curved boundaries, quadratic cells,
    absorbing layers, directional orders): what each flags and its details."""
    unit = d["input"]["unit"]
    from .units import UNIT_FACTORS
    scale = UNIT_FACTORS.get(unit, 1.0)
    names = _region_names(d)
    rows = []
    g = d.get("gradation")
    if g is not None:
        worst = g.get("worst") or []
        where = f"; worst at {_xyz(worst[0]['location'], 3)} {unit}" if worst else ""
        rows.append((["size jumps", _int(g["count"]),
                      f"neighbouring cell pairs whose sizes ({g['size_measure']}) differ by "
                      f"more than x{g['ratio']:g} (threshold); largest ratio "
                      f"x{_g(g['max_ratio'], 3)}{where}"], {"data-check": "gradation"}))
    c = d.get("curvature")
    if c is not None:
        rad = c["min_radius"]
        text = (f"straight boundary faces off the curved surface, of "
                f"{_int(c['boundary_faces'])} boundary faces in {_int(c['smooth_patches'])} "
                f"smooth patches; quadratic geometry would do for "
                f"{_int(c['quadratic_geometry_would_do'])}, too large even quadratic: "
                f"{_int(c['too_large_even_quadratic'])}; smallest radius of curvature "
                + (f"{_len3(rad)} {unit}" if rad is not None else "\u2013 (no curved patch)"))
        if c.get("curved_quadratic_faces"):
            text += f"; curved quadratic faces {_int(c['curved_quadratic_faces'])}"
        text += f"; criterion: {c['criterion']}"
        rows.append((["curved boundaries", _int(c["straight_faces_off_surface"]), text],
                     {"data-check": "curvature"}))
    q = d.get("quadratic_cells")
    if q is not None:
        rows.append((["quadratic cells", _int(q["below_threshold"]),
                      f"of {_int(q['cells'])} quadratic cells, det J min/max below "
                      f"{q['threshold']:g} (threshold); lowest {_g(q['jacobian_ratio_min'], 3)}, "
                      f"median {_g(q['jacobian_ratio_median'], 3)}"],
                     {"data-check": "quadratic_cells"}))
    for lay in d.get("absorbing_layers") or []:
        tw, tm, ca = lay["thickness_wavelengths"], lay["thickness_m"], lay["cells_across"]
        around = ", ".join(names.get(int(t), f"region {t}") for t in lay["surrounds"]) \
            or "\u2013"
        msgs = "; ".join(f"{m['severity']}: {str(m['message']).rstrip('.')}"
                         for m in lay["messages"])
        thick = ("\u2013" if tm["min"] is None else
                 _span(tm["min"] / scale, tm["max"] / scale, unit))
        rows.append(([f"absorbing layer {lay['name']}", _int(len(lay["messages"])),
                      f"messages{': ' + msgs if msgs else ': none'}; around {around}; "
                      f"thickness {thick}, min {_g(tw['min'], 3)} / median "
                      f"{_g(tw['median'], 3)} wavelengths at the lowest frequency; cells "
                      f"across min {_g(ca['min'], 3)} / median {_g(ca['median'], 3)}; "
                      + ("conforming" if lay["conforming"] else
                         f"not conforming ({_int(lay['nonconforming_faces'])} faces)")],
                     {"data-check": "absorbing_layer", "data-tag": lay["tag"]}))
    o = d.get("directional_orders")
    if o is not None:
        rows.append((["directional orders", _int(o["anisotropic_cells"]),
                      f"cells whose parametric directions need different orders (p \u2264 "
                      f"{o['max_order']}); unknowns {_int(o['dofs_isotropic'])} \u2192 "
                      f"{_int(o['dofs_directional'])} with interiors condensed, saving "
                      f"{_pct_of(o['saving'])}; {_int(o['total_isotropic'])} \u2192 "
                      f"{_int(o['total_directional'])} with interiors, saving "
                      f"{_pct_of(o['saving_total'])}"], {"data-check": "directional_orders"}))
    out = ["<h3>Geometry checks</h3>"]
    if not rows:
        out.append("<p>No geometry check applied.</p>")
        return "\n".join(out)
    out.append("<p>Checks of the geometry the mesh must follow (warnings and notes, never "
               "blocking); the flagged items are listed in the JSON report.</p>")
    out.append(_table(["check", "flagged", "details"], rows, text=(0, 2), tid="geometry-table",
                      cls="geometry"))
    return "\n".join(out)


def _cost(d: dict) -> str:
    """The quote of the sweep (JSON "cost"; the Markdown report's cost section)."""
    cost = d.get("cost")
    if not cost:
        return ""
    out = ['<h3 id="cost">Cost of the sweep</h3>']
    if "error" in cost:
        out.append(f'<p class="not-estimated">The cost of the sweep was not estimated: '
                   f"{_e(_sentence(cost['error']))}</p>")
        return "\n".join(out)
    asm = d["assumptions"]
    f = d["sweep"]["frequencies_hz"]
    mach = cost.get("machine") or {}
    cpu = mach.get("cpu", "unknown CPU")
    cores = f", {mach['cores']} cores" if mach.get("cores") else ""
    top = cost.get("calibrated_up_to_unknowns") or {}
    upto = (f"; calibrated up to {_int(top['3'])} unknowns in 3D and {_int(top['2'])} in 2D"
            if top.get("3") and top.get("2") else "")
    out.append(f"<p>Solver: {_e(cost['solver'])}. Machine constants: "
               f"{_e(Path(cost['machine_constants']).name)} (calibrated {_e(cost['calibrated'])} "
               f"on {_e(cpu)}{_e(cores)}{_e(upto)}; <code>meshcheck calibrate</code> measures "
               f"this machine). Per frequency: {_e(cost['per_frequency'])}. Bands: "
               f"{_e(cost['band'])}.</p>")
    own = (f"fixed p={asm['fixed_order']}" if asm["solver_mode"] == "fixed"
           else f"variable p<={asm['max_order']}")
    rows, beyond = [], False
    for q in cost["strategies"]:
        lo, hi = q["total_band_s"]
        flag = " (beyond calibration)" if q.get("beyond_calibration") else ""
        beyond |= bool(flag)
        sel = q["strategy"] == own
        label = q["strategy"].replace("<=", "\u2264")
        rows.append(([_Raw(f"{_e(label)}"
                           f"{' <b>(this audit)</b>' if sel else ''}"),
                      _int(q["unknowns"][-1]), _int(q["nonzeros"][-1]), _dur(q["total_s"]) + flag,
                      f"{_dur(lo)} \u2013 {_dur(hi)}", _bytes(q["peak_memory_bytes"]),
                      "yes" if q["carries_all"] else "no"],
                     {"class": ("selected " if sel else "") +
                      ("carries" if q["carries_all"] else "short"),
                      "data-strategy": q["strategy"]}))
    out.append(_table(["strategy", f"unknowns at {_hz(f[-1])} Hz", "non-zeros", "sweep time",
                       "band", "peak memory", "carries every frequency"], rows, text=(0, 6),
                      tid="cost-table", cls="cost"))
    out.append(f'<p class="note">Sweep time: all {len(f)} frequencies (factorise, solve, '
               "assembly) plus any one-off assembly; peak memory: the largest over the "
               "frequencies. Fixed orders are quoted on the supplied mesh even where they do "
               "not carry every frequency."
               + (" Beyond calibration: more than twice the largest system measured; the "
                  "prediction is extrapolated." if beyond else "") + "</p>")
    unit = d["input"]["unit"]
    for key in ("coarsening", "coarsening_chosen_order"):
        co = cost.get(key)
        if co:
            out.append(_coarsening(co, unit, d["input"]["dimension"], key == "coarsening"))
    return "\n".join(out)


def _coarsening(co: dict, unit: str, dim: int, written: bool) -> str:
    """The coarsening-scenario sentence of the cost subsection (``written``: its size
    field is the one the VTU and the gmsh view hold)."""
    lo, hi = co.get("target_size_min"), co.get("target_size_max")
    sizes = f"; target size {_span(lo, hi, unit)}" if lo is not None else ""
    if co.get("geometry_limited_nodes"):
        sizes += f", {_int(co['geometry_limited_nodes'])} nodes limited by the geometry"
    head = (f"Coarsening scenario: a mesh sized for order {co['order']} at "
            f"{_hz(co['upper_frequency_hz'])} Hz (gradation {co['gradation']:g}{sizes}) ")
    q = co.get("quote")
    if q is None:
        text = (head + f"would hold about {_int(round(co['estimated_cells']))} cells; its cost "
                + ("is quoted for 3D meshes only." if dim != 3 else "is not estimated."))
    else:
        ref = str(co.get("compared_with") or "").replace("<=", "\u2264")
        sp = (f" (speed-up {co['speedup']:.3g} over {ref} on the supplied mesh)"
              if co.get("speedup") and ref else "")
        text = (head + f"would hold about {_int(round(co['estimated_cells']))} tetrahedra and "
                f"{_int(q['unknowns'][-1])} unknowns at the top frequency; the sweep would take "
                f"{_dur(q['total_s'])}{sp}.")
    where = ("The size field is in the VTU report (point data target_size and mesher_size) "
             f"and in the gmsh view *.size.pos (gmsh model.geo -bgm <mesh>.size.pos -{dim})."
             if written else "")
    return f'<p class="coarsening">{_e(text)} {_e(where)}</p>'


def _range(rng) -> str:
    lo, hi = rng
    lo = "\u2212\u221e" if lo is None else _g(lo)
    hi = "\u221e" if hi is None else _g(hi)
    return f"[{lo}, {hi}]"


def _quality(res: AuditResult, d: dict, figs: dict) -> str:
    from .quality import family_of

    unit = d["input"]["unit"]
    names = _region_names(d)
    fams = sorted({family_of(t) for t in d["input"]["cells"]})
    out = ['<section id="quality"><h2><span class="secno">4</span> Quality</h2>']
    other = [f for f in d["findings"] if f["severity"] != "blocking"]
    if other:
        out.append("<h3>Other findings</h3>" + _findings_list(other, unit))
    rows = []
    for name, q in d["quality"].items():
        acc = q["acceptable"] or {}
        rng = "; ".join(f"{fm} {_range(acc[fm])}" for fm in fams if fm in acc) or "not checked"
        rows.append(([name.replace("_", " "), _int(q["cells"]), _g(q["min"]), _g(q["median"]),
                      _g(q["max"]), _int(q["out_of_range"]), rng],
                     {"class": "bad" if q["out_of_range"] else "good"}))
    out.append(_table(["metric", "cells", "min", "median", "max", "outside", "acceptable"],
                      rows, text=(0, 6), tid="quality-table", cls="quality"))
    out.append(figs["quality_histograms"])
    bad = [k for k, q in d["quality"].items() if q["out_of_range"]]
    show = bad or list(d["quality"])
    n_show = 5 if bad else 3
    rows = []
    for k in show:
        q = d["quality"][k]
        for w in q["worst"][:n_show]:
            rows.append([k.replace("_", " "), w["cell"], w["type"],
                         names.get(int(w["region"]), f"region {w['region']}"), _g(w["value"]),
                         _xyz(w["centroid"])])
    out.append("<h3>Worst cells</h3>")
    out.append(f"<p>The {n_show} worst cells of "
               + ("each metric with cells outside its acceptable range"
                  if bad else "each metric (all cells are within the acceptable ranges)")
               + "; all ten per metric are in the JSON report.</p>")
    out.append(_table(["metric", "cell id", "type", "region", "value",
                       f"centroid ({unit})"], rows, text=(0, 2, 3), tid="worst-table",
                      cls="worst"))
    out.append("</section>")
    return "\n".join(out)


def _method(res: AuditResult, d: dict) -> str:
    from .report import CAUTION, MODEL
    import matplotlib

    asm, inp = d["assumptions"], d["input"]
    t = d.get("timings_s", {})
    out = ['<section id="method"><h2><span class="secno">5</span> Method and cautions</h2>',
           f'<div class="caution"><p><b>Caution.</b> {_e(CAUTION)}</p></div>',
           f"<p><b>Model.</b> {_e(MODEL)}</p>",
           "<ul>",
           "<li>The usable frequency of an edge of length h is f = c (kh)<sub>max</sub> / "
           "(2\u03c0 h), where (kh)<sub>max</sub> is the largest kh whose predicted error over "
           "the propagation distance L meets the target; a cell takes its worst edge, a region "
           "and the mesh their worst cell.</li>",
           f"<li>Propagation distance L: {_e(asm['propagation_distance_rule'])}. A longer "
           "path accumulates more phase error, so the same mesh carries a lower frequency in a "
           "larger domain.</li>",
           "<li>Refine/coarsen advice is given at the upper frequency for the allowed order; "
           "the order per cell and frequency assumes a variable-order solver that can set the "
           "order cell by cell.</li>",
           "<li>Quality metrics and acceptable ranges follow the Verdict library manual "
           "(Stimpson et al., Sandia SAND2007-2853P); some ranges are common practice without "
           "a published source (see the meshcheck documentation). Quality does not change the "
           "frequency limits but poor cells degrade a solve locally.</li>",
           "<li>Cell ids are 0-based, counting the mesh's cell blocks in file order; "
           f"coordinates are in {_e(inp['unit'])}.</li>",
           "</ul>",
           "<h3>Run</h3>"]
    items = [("input file", Path(inp["file"]).name or "in memory"),
             ("sha256", inp["sha256"] or "\u2013"),
             ("created", d["created"]),
             ("software", f"meshcheck {d['meshcheck_version']}, numpy {np.__version__}, "
                          f"matplotlib {matplotlib.__version__}"),
             ("timings", ", ".join(f"{k} {v:.2g} s" for k, v in t.items()) or "\u2013")]
    out.append('<dl class="run">' + "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>"
                                          for k, v in items) + "</dl>")
    out.append("</section>")
    return "\n".join(out)


_CSS = """
:root { --ink: #161616; --muted: #555; --rule: #c8c8c8; --soft: #f3f3f3; }
* { box-sizing: border-box; }
html { background: #fff; }
body { margin: 0; color: var(--ink); background: #fff;
  font: 10pt/1.45 "DejaVu Sans", "Helvetica Neue", Arial, sans-serif; }
main { max-width: 186mm; margin: 0 auto; padding: 10mm 6mm 14mm; }
header.doc { border-bottom: 2px solid var(--ink); margin-bottom: 6mm; padding-bottom: 2mm; }
header.doc h1 { font-size: 17pt; margin: 0 0 1mm; word-break: break-all; }
header.doc p { margin: 0; color: var(--muted); font-size: 8.5pt; }
h2 { font-size: 14pt; margin: 9mm 0 3mm; padding-bottom: 1mm;
  border-bottom: 1px solid var(--rule); }
h2 .secno { display: inline-block; min-width: 1.4em; color: var(--muted); }
h3 { font-size: 11pt; margin: 6mm 0 2mm; }
p { margin: 0 0 2.5mm; }
.note { color: var(--muted); font-size: 8.5pt; }
.verdict { border: 3px solid; padding: 3mm 4mm; margin: 0 0 4mm; }
.verdict .state { font-size: 20pt; font-weight: bold; letter-spacing: .06em; margin: 0 0 1mm; }
.verdict .headline { font-size: 11.5pt; }
.verdict .sub { color: var(--muted); font-size: 8.5pt; margin: 0; }
.state-ready { border-color: #2e6b30; background: #f1f7f1; }
.state-limited { border-style: dashed; border-color: #8a6200; background: #fbf6e9; }
.state-blocked { border: 6px double #9b1d1d; background: #fbefef; }
table { border-collapse: collapse; width: 100%; margin: 1mm 0 3mm; font-size: 8.5pt; }
table.compact { font-size: 7.5pt; }
caption { text-align: left; font-weight: bold; padding-bottom: 1mm; }
th, td { border-bottom: 1px solid var(--rule); padding: 1mm 1.6mm; vertical-align: top; }
th { text-align: left; vertical-align: bottom; border-bottom: 1.5px solid var(--ink);
  font-weight: bold; }
th.num { text-align: right; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr.selected td { font-weight: bold; background: var(--soft); }
table.modes tr.short td:nth-child(4), table.sweep tr.short td:nth-child(2) { font-style: italic; }
table.limits .ok { font-weight: bold; }
table.limits .short { color: #444; }
table.limits tr.mesh td { background: var(--soft); }
table.clusters td { font-size: 7.8pt; }
table.clusters td:last-child { min-width: 19mm; }
table.quality tr.bad td:nth-child(6) { font-weight: bold; }
dl { display: grid; grid-template-columns: max-content 1fr; gap: .6mm 4mm; margin: 0 0 3mm;
  font-size: 9pt; }
dt { color: var(--muted); }
dd { margin: 0; word-break: break-word; }
figure { margin: 4mm 0 5mm; }
figure img { display: block; width: 100%; max-width: 178mm; height: auto; margin: 0 auto; }
figcaption { font-size: 8.5pt; color: #333; margin-top: 1.5mm; }
.blocking { border-left: 4px solid #9b1d1d; padding: .5mm 0 .5mm 3mm; margin-bottom: 3mm; }
ul.findings { margin: 0 0 2mm; padding-left: 5mm; }
ul.findings li { margin-bottom: 1mm; }
.caution { border: 1.5px solid var(--ink); padding: 2mm 3mm; margin: 0 0 3mm;
  background: var(--soft); }
footer { margin-top: 10mm; border-top: 1px solid var(--rule); padding-top: 2mm; color: var(--muted);
  font-size: 8pt; }
/* Print: A4 or Letter, whichever the print dialog uses (content <= 186 mm wide). */
@page { size: auto; margin: 14mm 12mm 15mm; }
@media print {
  body { font-size: 9.5pt; }
  main { max-width: none; padding: 0; }
  section { break-before: page; }
  section#verdict { break-before: auto; }
  h2, h3 { break-after: avoid; }
  figure, .verdict, .caution, .blocking, dl, tr { break-inside: avoid; }
  figure img { max-height: 235mm; width: auto; max-width: 100%; }
  thead { display: table-header-group; }
  .verdict, tr.selected td, .caution, table.limits tr.mesh td { background: none !important; }
  a { color: inherit; text-decoration: none; }
}
"""

_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; "
        "form-action 'none'")


def render_html(res: AuditResult, data: dict | None = None) -> str:
    """The audit report as one self-contained HTML document (str).

    data : the report dict of :func:`meshcheck.report.to_dict` (built when None).
    Raises ImportError when matplotlib is not installed.
    """
    if data is None:
        from .report import to_dict
        data = to_dict(res)
    d = data
    figs = _figures(res, d)
    name = Path(d["input"]["file"]).name or "mesh in memory"
    v = d["verdict"]
    state = {"ready": "ready", "limited": "limited", "blocked": "BLOCKED"}[v["state"]]
    sha = (d["input"]["sha256"] or "none")[:16]
    body = [
        '<header class="doc">',
        f"<h1>Mesh audit: {_e(name)}</h1>",
        f"<p>{_e(state)} \u00b7 acoustic (Helmholtz) mesh audit by meshcheck "
        f"{_e(d['meshcheck_version'])} \u00b7 {_e(d['created'])} \u00b7 unit "
        f"{_e(d['input']['unit'])}"
        f" \u00b7 sha256 {_e(sha)}</p>",
        "</header>",
        _verdict(res, d),
        _limits(res, d, figs),
        _advice(res, d, figs),
        _quality(res, d, figs),
        _method(res, d),
        f"<footer>meshcheck {_e(__version__)}: engineering advice from a 1D dispersion model; "
        "see section 5 before relying on it.</footer>",
    ]
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            '<meta name="generator" content="meshcheck">\n'
            f"<title>Mesh audit: {_e(name)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            "<main>\n" + "\n".join(body) + "\n</main>\n</body>\n</html>\n")


def write_html(res: AuditResult, path: str | Path, data: dict | None = None) -> Path:
    """Write :func:`render_html` to ``path`` (UTF-8); returns the path."""
    path = Path(path)
    path.write_text(render_html(res, data), encoding="utf-8")
    return path
