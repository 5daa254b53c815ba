"""Audit reports: a JSON document (schema in docs/report-schema.md), a
Markdown report and a VTU file with per-cell results.

Everything is built from an :class:`~meshcheck.audit.AuditResult`; lengths
are given in the user's unit at this edge (``*_m`` keys are metres).
"""
from __future__ import annotations

import datetime as _dt
import json
import threading
from concurrent.futures import FIRST_COMPLETED, Future, ThreadPoolExecutor, wait
from pathlib import Path

import numpy as np

from . import __version__, kernels
from .advice import region_runs
from .pipeline import AuditResult
from .quality import METRIC_BAD, summarise
from . import vtkxml
from .checksum import file_sha256
from .units import UNIT_FACTORS

__all__ = ["SCHEMA", "SCHEMA_VERSION", "CAUTION", "to_dict", "write_json", "write_markdown",
           "write_vtu", "EarlyVTU", "EARLY_VTU_CELLS", "write_all", "state", "METRIC_BAD", "CORRECTION_3D"]

SCHEMA = "meshcheck-audit"
SCHEMA_VERSION = 1
CAUTION = ("This is engineering advice from a 1D dispersion model applied edge by edge "
           "(with a 3D correction fitted to real solves unless switched off); "
           "confirm it with a convergence check (solve again on a refined mesh or at a higher "
           "order) before relying on the results. It does not replace the analyst's judgement.")
MODEL = ("Exact 1D discrete dispersion relation of order-p elements (Ihlenburg & Babuska "
         "1995/1997; Ainsworth 2004) plus the best-approximation error, applied to every edge "
         "with a plane wave carried over the propagation distance L; a cell takes the limit "
         "of its worst edge.")
#: the 3D correction of the 1D model (meshcheck.advice.size_correction), as reported
CORRECTION_3D = {
    True: "applied (fitted factors, docs/validation.md): every edge of a tetrahedron, wedge "
          "or hexahedron is assessed as if it were a times its length, a fitted to NGSolve "
          "solves per cell type, order and target; pyramids and 2D cells keep the plain model",
    False: "not applied (plain 1D model)"}



def state(res: AuditResult) -> str:
    """"blocked" (blocking defects), "ready" (carries the upper frequency) or "limited"."""
    if res.blocking:
        return "blocked"
    return "ready" if res.ready else "limited"


def _f(x) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None




def _cluster(c, scale: float, mesh) -> dict:
    return {"cells": c.cells, "volume_m3": c.volume, "centroid": (c.centroid / scale).tolist(),
            "box_min": (c.lo / scale).tolist(), "box_max": (c.hi / scale).tolist(),
            "largest_edge": c.size / scale, "target_size": c.target / scale,
            "factor": _f(c.factor), "regions": list(c.regions),
            "some_cell_ids": mesh.file_cells(c.ids).tolist()}


def _quality(res: AuditResult, scale: float) -> dict:
    lim = res.settings.quality
    # summarised by the audit from the float64 metrics (its result keeps float32 ones)
    summary = res.quality_summary if res.quality_summary is not None else \
        summarise(res.quality, parallel=res.mesh.n_cells > 200_000)
    out = {}
    flags = res.quality_flags  # a CellFlags: counted without unpacking the bits
    counts = flags.counts([k for k, st in summary.items() if st is not None and k in flags])
    for name, st in summary.items():
        if st is None:
            continue
        st = dict(st)
        worst, values, bad = st.pop("worst"), st.pop("worst_values"), METRIC_BAD.get(name, "high")
        out[name] = {
            **st, "out_of_range": counts.get(name, 0),
            "worse_when": bad,
            "acceptable": lim.describe(name) if hasattr(lim, "describe") else None,
            "worst": [{"cell": int(res.mesh.file_cells(i)), "value": float(v),
                       "type": res.mesh.cell_type_of(int(i)),
                       "region": int(res.mesh.region[i]),
                       "centroid": (c / scale).tolist()}
                      for i, v, c in zip(worst, values, res.mesh.centroids_of(worst))],
        }
    return out


def _region_cells(region: np.ndarray, cell_volume: np.ndarray, region_lim: dict):
    """(tag, limits, cells, first cell id, volume m^3) per region of ``region_lim``: the
    count, first cell and sum of |volume| of the cells of the tag (the sum over
    ``cell_volume[region == tag]``, from views when the regions form a few runs)."""
    runs = region_runs(region)
    for tag, lim in region_lim.items():
        if runs is not None:
            r = runs[tag]
            vals = (cell_volume[r[0][0]:r[0][1]] if len(r) == 1 else
                    np.concatenate([cell_volume[lo:hi] for lo, hi in r]))
            yield tag, lim, sum(hi - lo for lo, hi in r), r[0][0], _abs_sum(vals)
        else:
            sel = region == tag
            yield (tag, lim, int(np.count_nonzero(sel)), int(np.argmax(sel)),
                   float(np.abs(cell_volume[sel]).sum()))


def _abs_sum(x: np.ndarray) -> float:
    """``float(np.abs(x).sum())``, bit for bit, without the (n,) copy when no value is
    negative (the usual cell volumes; 38 MB of new memory at 4.77M cells): the sum of x
    itself then, with -0.0 made +0.0 as abs makes it."""
    if len(x) and x.min() >= 0.0:  # (False for NaN)
        return float(x.sum()) + 0.0
    return float(np.abs(x).sum())


def _file_ids(mesh, f) -> np.ndarray:
    """The ids of finding ``f`` in the file's numbering (cells and nodes of a renumbered
    mesh, :mod:`meshcheck.ordering`)."""
    if f.id_kind == "cell":
        return mesh.file_cells(f.ids)
    if f.id_kind == "node":
        return mesh.file_points(f.ids)
    return np.asarray(f.ids)


def to_dict(res: AuditResult, cost: bool = True) -> dict:
    """The JSON report as plain Python data; ``cost`` False leaves out the quote of the
    sweep (the section is then null and ``assumptions.cost_quote`` says so)."""
    m, s, a, sw, topo = res.mesh, res.settings, res.advice, res.sweep, res.topology
    scale = UNIT_FACTORS.get(m.unit, 1.0)
    pmax = a.pmax
    orders = list(range(1, pmax + 1))
    # the file's checksum on a second thread (reading and hashing release the GIL), or
    # the one started when the file was read
    pool = ThreadPoolExecutor(max_workers=1)
    sha = pool.submit(file_sha256, m.source)
    pool.shutdown(wait=False)
    region_lim = a.region_limit(m.region)
    regions = []
    for tag, lim, cells, first, vol in _region_cells(m.region, topo.cell_volume, region_lim):
        regions.append({"tag": tag, "name": m.region_name(tag), "cells": cells,
                        "volume_m3": vol, "sound_speed_m_s": float(a.cell_speed[first]),
                        "limit_hz_per_order": {str(p): _f(lim[p - 1]) for p in orders}})
    counts = {b.type: len(b) for b in m.blocks}
    P = s.advice.allowed_order
    limiting = None
    if len(a.cell_size):
        worst = a.lowest_cell(P)
        limiting = {"cell": int(m.file_cells(worst)), "region": int(m.region[worst]),
                    "region_name": m.region_name(m.region[worst]),
                    "largest_edge": float(a.cell_size[worst] / scale),
                    "centroid": (m.centroids_of([worst])[0] / scale).tolist()}
    freq = np.asarray(sw.frequencies)
    return {
        "schema": SCHEMA, "schema_version": SCHEMA_VERSION, "meshcheck_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "input": {"file": m.source, "sha256": sha.result(), "unit": m.unit,
                  "dimension": m.dim, "points": m.n_points, "cells": counts,
                  "bounding_box": (m.bounding_box / scale).tolist(), "regions": regions},
        "assumptions": {
            "sound_speed_m_s": s.default_speed, "temperature_c": s.temperature,
            "region_speeds_m_s": {str(k): float(v) for k, v in s.region_speeds.items()},
            "material_speeds": _material_speeds(res),
            "target_relative_error": s.advice.target, "solver_mode": s.advice.mode,
            "fixed_order": s.advice.order, "max_order": s.advice.max_order,
            "propagation_distance_m": (s.advice.distance if s.advice.distance is not None
                                       else [float(x) for x in topo.component_extent]),
            "propagation_distance_rule": ("given" if s.advice.distance is not None else
                                          "bounding-box diagonal of each connected fluid part"),
            "length_unit": m.unit, "model": MODEL,
            "correction_3d": bool(s.advice.correction_3d),
            "correction_3d_note": CORRECTION_3D[bool(s.advice.correction_3d)],
            "cost_quote": "computed" if cost else "not asked for",
            "caution": CAUTION},
        "verdict": {"state": state(res), "ready": res.ready, "blocking": res.blocking,
                    "upper_frequency_hz": s.fmax, "signed_off_hz": res.signed_off,
                    "model_limit_hz": a.signed_off, "allowed_order": P,
                    "limiting_cell": limiting},
        "limits_hz": {"mesh": {str(p): _f(a.mesh_limit[p - 1]) for p in orders}},
        "findings": [{"code": f.code, "severity": f.severity, "message": f.message,
                      "count": f.count, "id_kind": f.id_kind, "ids": _file_ids(m, f).tolist(),
                      "locations": (f.locations / scale).tolist()} for f in res.findings],
        "quality": _quality(res, scale),
        "sweep": {"frequencies_hz": freq.tolist(),
                  "ready": sw.ready.tolist(),
                  "order_counts": sw.order_counts.tolist(),
                  "order_columns": orders + ["beyond"],
                  "dofs": sw.dofs.tolist(),
                  "dofs_kind": ("hierarchical, interiors condensed, maximum rule"
                                if s.advice.order is None else f"Lagrange order {s.advice.order}"),
                  "condensed_fixed_dofs": sw.condensed_fixed},
        "refine": [_cluster(c, scale, m) for c in res.refine_clusters],
        "coarsen": [_cluster(c, scale, m) for c in res.coarsen_clusters],
        "topology": {"edges": len(topo.edges), "faces": len(topo.faces),
                     "boundary_faces": int(np.count_nonzero(topo.faces.boundary)),
                     "components": [{"volume_m3": float(v), "extent_m": float(e)} for v, e in
                                    zip(topo.component_volume, topo.component_extent)],
                     "edge_length_min": float(np.nanmin(topo.edges.length) / scale),
                     "edge_length_max": float(np.nanmax(topo.edges.length) / scale)},
        "timings_s": {k: round(v, 4) for k, v in res.timings.items()},
        **_physics_sections(res, scale),
        "cost": _cost_section(res, scale) if cost else None,
    }


def _material_speeds(res: AuditResult) -> list[dict]:
    """Speeds of sound stated by the mesh file's material cards, and whether each sets
    its region's medium (see :func:`meshcheck.job.resolve_media`)."""
    from .job import PLAUSIBLE_SPEED

    media = getattr(res, "media", None)
    out = []
    for tag, (c, card) in sorted(res.mesh.material_speeds.items()):
        r = media.regions.get(tag) if media is not None else None
        used = r is not None and r.source == f"{card} in the mesh file"
        if used:
            why = "sets the region's medium"
        elif not PLAUSIBLE_SPEED[0] <= c <= PLAUSIBLE_SPEED[1]:
            why = (f"not used: outside {PLAUSIBLE_SPEED[0]:g}-{PLAUSIBLE_SPEED[1]:g} m/s "
                   f"(is the card in another length unit than --units {res.mesh.unit}?)")
        else:
            why = f"not used: {r.source if r is not None else 'overridden'} takes precedence"
        out.append({"region": int(tag), "name": res.mesh.region_name(tag), "card": card,
                    "speed_m_s": float(c), "used": bool(used), "note": why})
    return out


def _cost_section(res: AuditResult, scale: float) -> dict:
    """Quote of the sweep and the coarsening scenario (meshcheck.cost)."""
    from .cost import cost_section
    return cost_section(res, scale)


def _physics_sections(res: AuditResult, scale: float) -> dict:
    """Media, mean flow, losses, gradation, curvature, quadratic cells, absorbing layers
    and directional orders (sections absent from results made without them are null)."""
    def loc(x):
        return (np.asarray(x) / scale).tolist()

    out: dict = {"media": None, "gradation": None, "curvature": None, "quadratic_cells": None,
                 "absorbing_layers": [], "directional_orders": None}
    media = getattr(res, "media", None)
    if media is not None:
        out["media"] = [{
            "tag": r.tag, "name": r.name, "role": r.role, "surrounds": r.surrounds,
            "speed_m_s": [r.speed.real, r.speed.imag], "effective_speed_m_s": r.effective_speed,
            "density_kg_m3": r.density, "attenuation_db_per_wavelength": r.attenuation_db,
            "flow_m_s": list(r.flow), "mach": list(r.mach), "mach_number": r.mach_number,
            "flow_limit_factor_along": 1.0 - r.mach_number,
            "flow_limit_factor_across": float(np.sqrt(1.0 - r.mach_number ** 2)),
            "source": r.source} for r in media.regions.values()]
    g = getattr(res, "gradation", None)
    if g is not None:
        out["gradation"] = {
            "ratio": g.ratio, "count": g.count, "max_ratio": _f(g.max_ratio),
            "size_measure": "mean edge length",
            "worst": [{"cells": res.mesh.file_cells(p).tolist(), "ratio": _f(r), "sizes": loc(sz),
                       "location": loc(x)}
                      for p, r, sz, x in zip(g.pairs, g.ratios, g.sizes, g.locations)]}
    c = getattr(res, "curvature", None)
    if c is not None:
        out["curvature"] = {
            "boundary_faces": c.n_faces, "smooth_patches": c.n_patches,
            "feature_edges": c.feature_edges, "min_radius": _f(c.min_radius / scale),
            "straight_faces_off_surface": int(c.misfit.sum()),
            "quadratic_geometry_would_do": int(c.needs_quadratic.sum()),
            "too_large_even_quadratic": int(c.needs_refinement.sum()),
            "curved_quadratic_faces": int(c.curved.sum()),
            "midnode_over_chord_height": c.midnode_on_surface,
            "criterion": "chord height <= target / (2k) at the upper frequency",
            "worst": [{"face": int(f), "cell": int(res.mesh.file_cells(ce)), "location": loc(x),
                       "gap_over_tolerance": _f(r), "max_straight_size": _f(hl / scale),
                       "max_quadratic_size": _f(hq / scale)}
                      for f, ce, x, r, hl, hq in zip(c.listed, c.listed_cells, c.listed_locations,
                                                     c.listed_ratio, c.listed_straight_size,
                                                     c.listed_quadratic_size)]}
    q = getattr(res, "quadratic", None)
    if q is not None:
        out["quadratic_cells"] = {
            "cells": q.n_cells, "midnode_deviation_max": _f(q.midnode_deviation.max()),
            "midnode_deviation_median": _f(np.median(q.midnode_deviation)),
            "jacobian_ratio_min": _f(q.jacobian_ratio.min()),
            "jacobian_ratio_median": _f(np.median(q.jacobian_ratio)),
            "threshold": q.threshold, "below_threshold": q.low,
            "worst": [{"cell": int(res.mesh.file_cells(i)), "location": loc(x)}
                      for i, x in zip(q.listed, q.listed_locations)]}
    for lc in getattr(res, "layers", ()):
        out["absorbing_layers"].append({
            "tag": lc.tag, "name": lc.name, "surrounds": list(lc.surrounds),
            "wavelength_m": lc.wavelength,
            "thickness_m": dict(zip(("min", "median", "max"), map(_f, lc.thickness))),
            "thickness_wavelengths": dict(zip(("min", "median", "max"),
                                              map(_f, lc.thickness_wavelengths))),
            "cells_across": dict(zip(("min", "median"), map(_f, lc.cells_across))),
            "interface_faces": lc.interface_faces, "nonconforming_faces": lc.nonconforming_faces,
            "outer_faces": lc.outer_faces, "lateral_faces": lc.lateral_faces,
            "conforming": lc.conforming,
            "messages": [{"severity": a, "code": b, "message": m} for a, b, m in lc.messages]})
    d = getattr(res, "directional", None)
    if d is not None:
        out["directional_orders"] = {
            "anisotropic_cells": d.anisotropic_cells,
            "dofs_directional": d.dofs_directional, "dofs_isotropic": d.dofs_isotropic,
            "saving": d.saving, "total_directional": d.total_directional,
            "total_isotropic": d.total_isotropic, "saving_total": d.saving_total,
            "max_order": res.settings.advice.max_order,
            "basis": "hierarchical, maximum rule, orders needed at the upper frequency; "
                     "dofs without and total with cell interiors"}
    return out


def write_json(res: AuditResult, path: str | Path, data: dict | None = None) -> Path:
    path = Path(path)
    path.write_text(json.dumps(data or to_dict(res), indent=1, allow_nan=False))
    return path


def _fmt_hz(x) -> str:
    if x is None or not np.isfinite(x):
        return "-"
    return f"{x:,.0f}" if x >= 100 else f"{x:.3g}"


def _md_escape(text: str) -> str:
    out = str(text)
    for ch in "\\`*_{}[]<>()#+!|":
        out = out.replace(ch, "\\" + ch)
    return out


def write_markdown(res: AuditResult, path: str | Path, data: dict | None = None,
                   max_rows: int = 40) -> Path:
    d = data or to_dict(res)
    v, asm = d["verdict"], d["assumptions"]
    unit = d["input"]["unit"]
    mode = (f"fixed order p = {asm['fixed_order']}" if asm["solver_mode"] == "fixed"
            else f"variable order up to p = {asm['max_order']}")
    L = []
    L.append(f"# Mesh audit: {_md_escape(Path(d['input']['file']).name)}\n")
    L.append("## Verdict\n")
    word = {"ready": "READY", "limited": "LIMITED", "blocked": "BLOCKED"}[v["state"]]
    if v["state"] == "blocked":
        L.append(f"**{word}**: the mesh has blocking defects (below); no frequency is signed off. "
                 f"Once they are mended the model would allow up to {_fmt_hz(v['model_limit_hz'])} Hz.\n")
    else:
        L.append(f"**{word}**: signed off up to **{_fmt_hz(v['signed_off_hz'])} Hz** with {mode} "
                 f"for a {asm['target_relative_error']:.3g} relative error target "
                 f"(requested upper frequency {_fmt_hz(v['upper_frequency_hz'])} Hz).\n")
    L.append(f"Assumptions: sound speed {asm['sound_speed_m_s']:.1f} m/s "
             f"(air at {asm['temperature_c']:g} deg C unless overridden), length unit "
             f"{unit}, propagation distance {asm['propagation_distance_rule']}, 3D correction "
             f"of the 1D model {'applied' if asm['correction_3d'] else 'not applied'}.\n")
    L.append(f"> {CAUTION}\n")
    lc = v.get("limiting_cell")
    if lc:
        L.append(f"Limiting cell: {lc['cell']} in region {_md_escape(lc['region_name'])}, "
                 f"longest edge {lc['largest_edge']:.4g} {unit}, at "
                 f"({', '.join(f'{x:.4g}' for x in lc['centroid'])}) {unit}.\n")
    L.append("## Highest usable frequency per order (Hz)\n")
    orders = list(d["limits_hz"]["mesh"])
    L.append("| region | " + " | ".join(f"p={p}" for p in orders) + " |")
    L.append("|---|" + "---|" * len(orders))
    L.append("| whole mesh | " + " | ".join(_fmt_hz(d["limits_hz"]["mesh"][p]) for p in orders) + " |")
    for r in d["input"]["regions"]:
        L.append(f"| {_md_escape(r['name'])} | " +
                 " | ".join(_fmt_hz(r["limit_hz_per_order"][p]) for p in orders) + " |")
    L.append("")
    L.append("## Findings\n")
    if not d["findings"]:
        L.append("No validity findings.\n")
    for f in d["findings"]:
        ids = ", ".join(str(i) for i in f["ids"][:10])
        loc = f["locations"][0] if f["locations"] else None
        where = f" first at ({', '.join(f'{x:.4g}' for x in loc)}) {unit}" if loc else ""
        L.append(f"- **{f['severity']}** {_md_escape(f['message'])}: {f['count']} "
                 f"({f['id_kind']} ids {ids}){where}")
    L.append("")
    L.append("## Advice per frequency\n")
    sw = d["sweep"]
    cols = sw["order_columns"]
    L.append("| f (Hz) | ready | unknowns | " + " | ".join(f"p={c}" if c != "beyond" else ">pmax"
                                                           for c in cols) + " |")
    L.append("|---|---|---|" + "---|" * len(cols))
    n = len(sw["frequencies_hz"])
    rows = range(n) if n <= max_rows else np.unique(np.linspace(0, n - 1, max_rows).astype(int))
    for i in rows:
        L.append(f"| {_fmt_hz(sw['frequencies_hz'][i])} | {'yes' if sw['ready'][i] else 'no'} | "
                 f"{sw['dofs'][i]:,} | " + " | ".join(str(c) for c in sw["order_counts"][i]) + " |")
    if n > max_rows:
        L.append(f"\n({max_rows} of {n} frequencies shown; all are in the JSON report.)")
    L.append("")
    for key, title, what in (("refine", "Regions to refine",
                              "need more than the allowed order at the upper frequency"),
                             ("coarsen", "Regions that could be coarser",
                              "could be coarsened and still meet the target")):
        L.append(f"## {title}\n")
        items = d[key]
        if not items:
            L.append(f"No cells {what}.\n")
            continue
        L.append(f"Cells that {what}; target size is the largest edge length meeting the target "
                 f"at {_fmt_hz(v['upper_frequency_hz'])} Hz ({unit}).\n")
        L.append(f"| cells | centroid ({unit}) | longest edge | target size | factor | cell ids |")
        L.append("|---|---|---|---|---|---|")
        for c in items[:20]:
            L.append(f"| {c['cells']} | {', '.join(f'{x:.4g}' for x in c['centroid'])} | "
                     f"{c['largest_edge']:.4g} | {c['target_size']:.4g} | {c['factor']:.3g} | "
                     f"{', '.join(str(i) for i in c['some_cell_ids'][:5])} |")
        L.append("")
    from .cost import cost_markdown
    L.extend(cost_markdown(d.get("cost")))
    L.append("## Quality\n")
    L.append("| metric | cells | min | median | max | out of range | acceptable |")
    L.append("|---|---|---|---|---|---|---|")
    for name, q in d["quality"].items():
        L.append(f"| {name} | {q['cells']} | {q['min']:.4g} | {q['median']:.4g} | {q['max']:.4g} | "
                 f"{q['out_of_range']} | {_md_escape(q['acceptable'] or '')} |")
    L.append("")
    L.append("## Method and assumptions\n")
    L.append(f"- Model: {MODEL}")
    L.append(f"- 3D correction of the 1D model: {asm['correction_3d_note']}.")
    L.append(f"- Target: relative L2 error {asm['target_relative_error']:.3g}; mode: {mode}.")
    L.append(f"- Sound speed: {asm['sound_speed_m_s']:.2f} m/s; per-region overrides: "
             f"{asm['region_speeds_m_s'] or 'none'}.")
    for ms in asm["material_speeds"]:
        L.append(f"- Speed stated by the mesh file: {_md_escape(ms['name'])} "
                 f"{ms['speed_m_s']:.6g} m/s ({_md_escape(ms['card'])}), {ms['note']}.")
    L.append(f"- Unknowns: {sw['dofs_kind']}.")
    L.append(f"- {CAUTION}")
    path = Path(path)
    path.write_text("\n".join(L) + "\n")
    return path


#: meshes with more cells get an uncompressed VTU (zlib at level 1 costs about 2.4 s per
#: million cells on the project's machine and saves about a third of the file)
VTU_COMPRESS_CELLS = 500_000


def write_vtu(res: "AuditResult | EarlyVTU", path: str | Path,
              compress: bool | None = None) -> Path:
    """VTU with per-cell results; coordinates and lengths in the mesh's own unit. Cells
    and points in the order of ``res.mesh``: a renumbered mesh (:mod:`meshcheck.ordering`)
    adds the file's numbers as ``file_cell_id`` and ``file_point_id``.
    ``compress``: zlib level 1 (True) or stored (False); None: compressed up to
    :data:`VTU_COMPRESS_CELLS` cells.

    ``res`` may be an :class:`EarlyVTU` of an audit still running: the arrays known
    before the advice (the cells, points, ids and quality metrics, first in the file) are
    then written at once, the advice's when it is handed over (during the sweep), the
    size field's point data when the result is."""
    m = res.mesh
    early = isinstance(res, EarlyVTU)
    done = res.final if early else (lambda: res)  # (waits)
    # the advice and the scaled Jacobians: an early VTU gets them before the audit ends
    known = res.advised_result if early else (lambda: (res.advice, res.min_scaled_jacobian))
    scale = UNIT_FACTORS.get(m.unit, 1.0)
    cells = [(b.type, b.cells) for b in m.blocks]

    f32, i8 = np.float32, np.int8
    lazy = vtkxml.Deferred  # each array made when written, then dropped (1 array in memory)
    n = m.n_cells

    def parts(fn, dtype):  # an array made a piece at a time (uncompressed files; else whole)
        return vtkxml.Chunked(lambda lo, hi: np.asarray(fn(lo, hi)).astype(dtype, copy=False),
                              dtype, n)

    def adv():
        return known()[0]

    # the arrays are written in the reverse of this order: those of the advice first here,
    # those known before the advice last
    data = {"min_scaled_jacobian": lazy(lambda: known()[1].astype(f32, copy=False), f32),
            "order_needed": lazy(lambda: adv().cell_order.astype(i8, copy=False), i8),
            "refine": parts(lambda lo, hi: adv().refine[lo:hi], i8),
            "coarsen": parts(lambda lo, hi: adv().coarsen[lo:hi], i8),
            "largest_edge": parts(lambda lo, hi: adv().cell_size[lo:hi] / scale, f32),
            "target_size": parts(lambda lo, hi: adv().target_size[lo:hi] / scale, f32),
            "coarsen_ratio": parts(lambda lo, hi: adv().target_size[lo:hi] /
                                   adv().cell_size[lo:hi], f32)}
    column: dict = {}  # the limit column being written (one at a time)
    compiled = kernels.use_compiled(n)
    if compiled:
        from .kernels import advice as _ka

    def limits(p, lo, hi):  # Advice.limit_at(p, float32)[lo:hi]
        a = adv()
        if a.limit_row is None:
            return a.limit_rows[lo:hi, p - 1]
        if p not in column:  # cast first (the same values): half the bytes gathered
            column.clear()
            column[p] = np.ascontiguousarray(a.limit_rows[:, p - 1], dtype=f32)
        rows = a.limit_row[lo:hi]
        if compiled:  # a compiled gather: no intp copy of the int32 rows (4.77M cells:
            out = np.empty(hi - lo, f32)  # 7-11 -> 3.3 ms per order)
            _ka.lookup(column[p], np.ascontiguousarray(rows), out)
            return out
        return np.take(column[p], rows)  # 2x fancy indexing's speed

    for p in range(1, res.settings.advice.max_order + 1):
        data[f"limit_hz_p{p}"] = parts(lambda lo, hi, p=p: limits(p, lo, hi), f32)
    data["region"] = parts(lambda lo, hi: m.region[lo:hi], np.int32)
    if m.file_cell_ids is not None:  # a renumbered mesh: the file's numbers
        data["file_cell_id"] = parts(lambda lo, hi: m.file_cell_ids[lo:hi], np.int32)
    for name, values in res.quality.metrics.items():
        if np.isfinite(values).any():
            data[f"quality_{name}"] = lazy(lambda v=values: v.astype(f32, copy=False), f32)
    from .sizefield import size_point_data
    if compress is None:
        compress = m.n_cells <= VTU_COMPRESS_CELLS
    # the size field's point data made when written (last in the file), so that the
    # cell data are written while the field may still be computed on another thread
    made: dict = {}

    def point_array(name):  # the three arrays made once, each handed over as written
        if not made:
            made.update(size_point_data(done(), scale))
        return made.pop(name)

    point = {name: lazy(lambda name=name: point_array(name), f32) for name in POINT_ARRAYS}
    if m.file_point_ids is not None:
        point["file_point_id"] = lazy(lambda: m.file_point_ids.astype(np.int32, copy=False),
                                      np.int32)
    pts = m.points if scale == 1.0 else m.points / scale  # no copy for metres
    return vtkxml.write_vtu(path, pts, cells, cell_data=data,
                            point_data=point, level=1 if compress else 0)


#: meshes from this many cells get their VTU written during the audit (:class:`EarlyVTU`,
#: the CLI's choice): 4.77M tets, median 3.48 -> 3.41 s (2026-12-05); at 966k tets the
#: gain is a few hundredths of a second and its pieces in flight during the analysis
#: added about 2 MiB to the peak with numba's cached kernels, which is at its 300 MiB
EARLY_VTU_CELLS = 2_000_000


class EarlyVTU:
    """The VTU report of an audit still running (large meshes; the CLI's).

    Give :meth:`start` to :func:`meshcheck.pipeline.audit` as ``cells_checked``: with
    the cells' quality metrics known it writes, on a thread of its own, the arrays that
    need nothing more (cells, points, ids, metrics: about half the file at 4.77M
    tetrahedra) while the audit goes on; give :meth:`advised` as ``advised``: the
    advice's arrays (about 40 %) are written while the sweep and the cluster searches
    run; then it waits for :meth:`finish` to hand over the result for the rest (the size
    field's point data). The file is written under a hidden temporary name beside
    ``path`` and renamed to ``path`` when complete; :meth:`abort` (the audit failed)
    stops the writer and removes the temporary file, so that a failed audit leaves an
    earlier report at ``path`` as it was.
    """

    def __init__(self, mesh, settings, path: str | Path):
        self.mesh, self.settings, self.path = mesh, settings, Path(path)
        self.quality = None
        self._result: Future = Future()
        self._advice: Future = Future()
        self._written: Future = Future()
        self._temp = self.path.with_name(f".{self.path.name}.part")
        self._thread: threading.Thread | None = None

    def start(self, quality) -> None:
        """Start writing, the cells' metrics being ``quality``
        (:class:`~meshcheck.quality.CellQuality`)."""
        self.quality = quality

        def run():
            try:
                write_vtu(self, self._temp)
                self._temp.replace(self.path)
                self._written.set_result(self.path)
            except BaseException as exc:  # raised again by result()
                self._temp.unlink(missing_ok=True)
                self._written.set_exception(exc)

        self._thread = threading.Thread(target=run, name="meshcheck-vtu", daemon=True)
        self._thread.start()

    def final(self) -> AuditResult:
        """The finished audit's result (waits for :meth:`finish`)."""
        return self._result.result()

    def advised(self, advice, min_sj: np.ndarray) -> None:
        """Hand over the advice and the cells' minimum scaled Jacobians (returns at
        once)."""
        self._advice.set_result((advice, min_sj))

    def advised_result(self) -> tuple:
        """(advice, minimum scaled Jacobians), from :meth:`advised` or else from the
        finished result (waits)."""
        done = wait([self._advice, self._result], return_when=FIRST_COMPLETED).done
        if self._advice in done:
            return self._advice.result()
        res = self._result.result()
        return res.advice, res.min_scaled_jacobian

    def finish(self, res: AuditResult) -> None:
        """Hand over the finished result (returns at once; :meth:`result` waits)."""
        self._result.set_result(res)

    def result(self) -> Path:
        """The report's path once it is written (raises the writer's error)."""
        if self._thread is None:  # never started (no cell checks were made): written now
            self.quality = self.final().quality
            return write_vtu(self, self.path)
        return self._written.result()

    def abort(self) -> None:
        """The audit failed: stop the writer and remove its temporary file."""
        if not self._result.done():
            self._result.set_exception(_Aborted(f"{self.path}: the audit stopped"))
        if self._thread is not None:
            self._thread.join()
        self._temp.unlink(missing_ok=True)


class _Aborted(Exception):
    """The audit an :class:`EarlyVTU` waited for failed."""


#: the VTU's point data (:func:`meshcheck.sizefield.size_point_data`)
POINT_ARRAYS = ("target_size", "mesher_size", "size_ratio")


def write_all(res: AuditResult, folder: str | Path, stem: str | None = None) -> dict[str, Path]:
    """Write JSON, Markdown and VTU into ``folder``; returns kind -> path."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    stem = stem or (Path(res.mesh.source).stem or "mesh")
    data = to_dict(res)
    src = Path(res.mesh.source).resolve() if res.mesh.source else None
    out = {"json": folder / f"{stem}.audit.json", "markdown": folder / f"{stem}.audit.md",
           "vtu": folder / f"{stem}.audit.vtu"}
    if src is not None and any(p.resolve() == src for p in out.values()):
        raise ValueError("refusing to overwrite the input mesh")
    write_json(res, out["json"], data)
    write_markdown(res, out["markdown"], data)
    write_vtu(res, out["vtu"])
    from .sizefield import write_size_view
    pos = write_size_view(res, folder / f"{stem}.size.pos")
    if pos is not None:
        out["size_view"] = pos
    return out
