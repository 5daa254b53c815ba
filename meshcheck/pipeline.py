"""The audit: read -> topology -> validity -> quality -> advice -> sweep.

A notebook calls :func:`audit_file` (or :func:`audit` on a Mesh it already
holds) and gets an :class:`AuditResult`; the CLI is a thin layer over this.
"""
from __future__ import annotations

import time
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from types import SimpleNamespace
from typing import Callable

import numpy as np

from .acoustics import air_speed
from .advice import Advice, AdviceSettings, Cluster, Sweep, advise, clusters, sweep
from .arrays import sorted_distinct
from .curvature import CurvedBoundary, QuadraticGeometry, check_curvature, quadratic_geometry
from .directional import DirectionalOrders, directional_orders
from .errors import SettingsError
from .gradation import SizeJumps, size_jumps
from .job import Job, Media, resolve_media
from .layers import LayerCheck, check_layer
from .mesh import Mesh
from .ordering import renumbered_for_audit
from .quality import (MIN_SJ_TYPES, CellFlags, CellQuality, QualityLimits,
                      checked_quality)
from .reading import read_mesh
from .threads import MAX_WORKERS, thread_map
from .topology import Topology, build_topology
from .validity import (BLOCKING, NOTE, Finding, ValiditySettings, check_validity,
                       min_scaled_jacobian)

__all__ = ["AuditSettings", "AuditResult", "audit", "audit_file", "cell_speeds", "media_of"]


@dataclass(frozen=True)
class AuditSettings:
    """Everything an audit depends on, in SI units.

    frequencies : sweep frequencies, Hz (sorted, the last is the upper frequency).
    advice : accuracy target, solver order mode, propagation distance.
    temperature : air temperature, deg C (sets the default sound speed).
    speed : sound speed for every region, m/s (overrides the temperature).
    region_speeds : region tag or name -> sound speed, m/s (overrides ``speed``).
    quality : acceptable ranges of the quality metrics.
    validity : thresholds of the validity checks.
    job : optional job file (per-region media, mean flow, roles, check thresholds);
        ``temperature``, ``speed`` and ``region_speeds`` override it.
    """

    frequencies: tuple[float, ...]
    advice: AdviceSettings = AdviceSettings()
    temperature: float = 20.0
    speed: float | None = None
    region_speeds: dict = field(default_factory=dict)
    quality: QualityLimits = QualityLimits()
    validity: ValiditySettings = ValiditySettings()
    job: Job | None = None

    def __post_init__(self):
        f = sorted_distinct(np.asarray(self.frequencies, dtype=float))
        if not len(f) or not np.all(np.isfinite(f)) or f[0] <= 0:
            raise SettingsError("give at least one positive frequency (e.g. --fmax 1000)")
        object.__setattr__(self, "frequencies", tuple(float(x) for x in f))
        if self.speed is not None and not self.speed > 0:
            raise SettingsError(f"sound speed {self.speed} m/s must be positive")
        for k, v in self.region_speeds.items():
            if not float(v) > 0:
                raise SettingsError(f"sound speed {v} m/s of region {k} must be positive")

    @property
    def fmax(self) -> float:
        return self.frequencies[-1]

    @property
    def default_speed(self) -> float:
        return self.speed if self.speed is not None else air_speed(self.temperature)


def cell_speeds(mesh: Mesh, settings: AuditSettings) -> np.ndarray:
    """(n_cells,) sound speed of every cell, m/s, read-only (see
    :func:`meshcheck.job.resolve_media` for the precedence of job file, file-stated
    speeds and overrides)."""
    if settings.job is not None or mesh.material_speeds:
        return media_of(mesh, settings).cell_speed
    if not settings.region_speeds:  # one speed: a read-only broadcast (no (n_cells,) array)
        return np.broadcast_to(np.float64(settings.default_speed), (mesh.n_cells,))
    c = np.full(mesh.n_cells, settings.default_speed)
    by_name = {v.lower(): k for k, v in mesh.region_names.items()}
    tags = set(mesh.region_tags.tolist())
    for key, value in settings.region_speeds.items():
        tag = key
        if isinstance(key, str):
            tag = int(key) if key.lstrip("-").isdigit() else by_name.get(key.lower())
        if tag is None or tag not in tags:
            known = ", ".join(sorted(f"{t} ({mesh.region_name(t)})" for t in tags))
            raise SettingsError(f"{mesh.source}: no region '{key}' in the mesh; regions: {known}")
        c[mesh.region == tag] = float(value)
    return c


def _same_values(a: np.ndarray, b: np.ndarray) -> bool:
    """``np.array_equal(a, b)`` of (n,) arrays, without a pass when both are broadcasts
    of one value."""
    if a.shape == b.shape and a.strides == b.strides == (0,):
        return not len(a) or bool(a[0] == b[0])
    return np.array_equal(a, b)


def media_of(mesh: Mesh, settings: AuditSettings) -> Media:
    """Media of every region: the job (if any) with the settings' overrides applied."""
    return resolve_media(mesh, settings.job, settings.temperature, settings.speed,
                         settings.region_speeds)


@dataclass(frozen=True)
class AuditResult:
    """Everything the audit measured and advises.

    min_scaled_jacobian : (n_cells,) float32 smallest scaled Jacobian of each cell (the
        validity findings come from the float64 values, before they are narrowed).
    quality : the cells' metrics, kept in float32 (the VTU's type); quality_flags (one
        bit per metric and cell, :class:`meshcheck.quality.CellFlags`) and
        quality_summary (:func:`meshcheck.quality.summarise`: statistics and worst
        cells) come from the float64 values, before they are narrowed.
    blocking : True when a validity finding makes any solve on the mesh wrong.
    ready : no blocking finding and every cell carries the upper frequency at the
        allowed order.
    timings : stage -> seconds; "analysis": wall time of all stages (the validity and
        quality stages of large meshes overlap the topology stage, and the size jumps
        and curvature check of the geometry stage overlap the advice stage).
    media : per-region media, flow and roles (:mod:`meshcheck.job`).
    gradation, curvature, quadratic, layers, directional : results of the geometry
        checks (:mod:`meshcheck.gradation`, :mod:`meshcheck.curvature`,
        :mod:`meshcheck.layers`, :mod:`meshcheck.directional`); None or empty when
        not applicable (e.g. curvature and layers on 2D meshes).
    """

    mesh: Mesh
    settings: AuditSettings
    topology: Topology
    min_scaled_jacobian: np.ndarray
    findings: list[Finding]
    quality: CellQuality
    quality_flags: CellFlags
    advice: Advice
    sweep: Sweep
    refine_clusters: list[Cluster]
    coarsen_clusters: list[Cluster]
    timings: dict[str, float]
    media: Media | None = None
    gradation: SizeJumps | None = None
    curvature: CurvedBoundary | None = None
    quadratic: QuadraticGeometry | None = None
    layers: tuple[LayerCheck, ...] = ()
    directional: DirectionalOrders | None = None
    quality_summary: dict[str, dict | None] | None = None

    @property
    def blocking(self) -> bool:
        return any(f.severity == BLOCKING for f in self.findings)

    @property
    def signed_off(self) -> float:
        """Highest frequency the mesh carries at the allowed order, Hz (0 if blocked)."""
        return 0.0 if self.blocking else self.advice.signed_off

    @property
    def ready(self) -> bool:
        return (not self.blocking) and self.advice.signed_off >= self.settings.fmax


#: meshes with more cells compute their cell checks on a second thread beside the topology
OVERLAP_CELLS = 100_000

#: meshes with at least this many cells run the size jumps and the boundary-curvature check
#: beside the validity and advice stages (on the cell checks' thread) rather than beside
#: the advice's last jobs: 4.77M tets (6 alternating runs each, 2026-12-05) wall median
#: 3.36 -> 3.27 s, peak 957-973 -> 940-958 MB (started once the faces exist, before the
#: topology's last steps: 3.075 -> 3.03 s); at 966k tets 0.92-0.97 -> 0.89-0.92 s, but
#: the peak with numba's cached kernels rose from 301-305 to 313-317 MiB (the heap more
#: fragmented by the two threads' allocations), above the 300 MiB aimed at
EARLY_GEOMETRY_CELLS = 2_000_000

#: meshes from this many cells keep the heap's freed top through the audit (the CLI holds
#: it, :func:`meshcheck.threads.hold_heap_top`, and gives it back before heavier reports).
#: The audit gave the heap's free pages back before the advice stage's side-by-side jobs
#: from 2026-12-04 (then 4.77M tets: peak 960-982 -> 957-973 MiB, wall median 3.58 ->
#: 3.44 s) to 2026-12-05, when keeping them measured better (8 alternating runs: page
#: faults 320k -> 300k, system CPU 0.75 -> 0.67 s, wall median 2.385 -> 2.345 s, peak
#: 907 -> 908 MiB): the sweep and cluster searches reuse the pages instead of faulting
#: them anew
TRIM_CELLS = 2_000_000


def audit(mesh: Mesh, settings: AuditSettings,
          progress: Callable[[str], None] | None = None,
          cells_checked: Callable[[CellQuality], None] | None = None,
          advised: Callable[[Advice, np.ndarray], None] | None = None) -> AuditResult:
    """Audit a mesh already in memory (SI units); the result's arrays index ``mesh`` (for
    speed on large meshes, audit :func:`meshcheck.ordering.renumbered` ``(mesh)``).

    cells_checked : called with the cells' quality metrics (the result's ``quality``) as
        soon as they are known, on the thread that computed them, while the audit goes
        on (e.g. :class:`meshcheck.report.EarlyVTU` starts writing its file).
    advised : called with the advice and the cells' minimum scaled Jacobians (float32) as
        soon as both are known, before the sweep and the cluster searches (e.g. the early
        VTU writes their arrays while those run)."""
    say = progress or (lambda stage: None)
    t: dict[str, float] = {}

    def stage(name):
        say(name)
        t[name] = time.perf_counter()

    def done(name):
        t[name] = time.perf_counter() - t[name]

    t0 = time.perf_counter()
    spent: dict[str, float] = {}

    def timed(name, fn, *args):
        t1 = time.perf_counter()
        out = fn(*args)
        spent[name] = time.perf_counter() - t1
        return out

    stage("topology")
    # the corner Jacobians and the quality metrics need no topology: on a second core
    # while the topology is built (numpy releases the GIL); then, for the largest meshes,
    # on the same core, the size jumps and the boundary-curvature check, which read only
    # the topology's edges and faces, from the moment those exist, beside the topology's
    # last steps and the validity and advice stages (whose kernels leave part of a core
    # idle); else beside the advice's last jobs
    side = mesh.n_cells > OVERLAP_CELLS and MAX_WORKERS > 1
    early = side and mesh.n_cells >= EARLY_GEOMETRY_CELLS
    with ThreadPoolExecutor(max_workers=1) as pool:
        def cell_checks():
            t1 = time.perf_counter()
            # flags and statistics of the float64 metrics, which are kept in float32 (the
            # VTU's type; half the memory; compiled: never held whole in float64); the
            # float64 Jacobians after them, so that the two sets are never held together
            # (the linear tetrahedra's corner Jacobians taken in the same pass)
            sj = np.empty(mesh.n_cells)
            q, flags, summary = checked_quality(mesh, settings.quality, min_sj=sj)
            if cells_checked is not None:
                cells_checked(q)
            t2 = time.perf_counter()
            sj = min_scaled_jacobian(mesh, out=sj, known=MIN_SJ_TYPES)
            return sj, q, flags, summary, time.perf_counter() - t2, t2 - t1

        checks = pool.submit(cell_checks) if side else None
        media = media_of(mesh, settings)
        chk = media.checks

        def jumps(topo):
            return timed("size_jumps", size_jumps, mesh, topo, chk.gradation_ratio,
                         chk.max_listed)

        def curvature(topo):
            return timed("curvature", check_curvature, mesh, topo, media.cell_speed,
                         settings.fmax, settings.advice.target, chk.feature_angle,
                         chk.max_listed)

        geo = []

        def faces_found(edges, faces):  # the two read only the topology's edges and faces
            part = SimpleNamespace(edges=edges, faces=faces)
            geo.append(pool.submit(lambda: (jumps(part), curvature(part))))

        topo = build_topology(mesh, faces_found=faces_found if early else None)
        done("topology")
        sj, q, flags, summary, t_sj, t_q = checks.result() if side else cell_checks()
        stage("validity")
        findings = check_validity(mesh, topo, sj, settings.validity)
        sj = sj.astype(np.float32)  # judged in float64, kept in the VTU's type (half memory)
        findings += [Finding(code, NOTE, message, count) for code, message, count in mesh.notes]
        done("validity")
        t["validity"] += t_sj
        stage("quality")
        done("quality")
        t["quality"] += t_q
        stage("advice")
        speeds = cell_speeds(mesh, settings)
        if speeds is not media.cell_speed and _same_values(speeds, media.cell_speed):
            speeds = media.cell_speed  # one array of the same speeds, not two
        adv = advise(mesh, topo, speeds, settings.fmax, settings.advice,
                     cell_mach=media.cell_mach if media.has_flow else None, edge_limits=False)
        if advised is not None:
            advised(adv, sj)
        # the sweep and the two cluster searches are independent once the advice is known:
        # on two threads (large meshes), beside the geometry checks' end or with them (the
        # size jumps after the sweep: their scratch is then never held beside its)
        f = np.asarray(settings.frequencies)
        jobs = [lambda: (sweep(mesh, topo, adv, f), None if early else jumps(topo)),
                lambda: None if early else curvature(topo),
                lambda: clusters(mesh, topo, adv, adv.refine),
                lambda: clusters(mesh, topo, adv, adv.coarsen & ~adv.refine)]
        (sw, grad), curv, ref, coa = thread_map(lambda job: job(), jobs,
                                                parallel=mesh.n_cells > OVERLAP_CELLS)
        if early:
            grad, curv = geo[0].result()
    done("advice")
    stage("geometry")
    extra = _geometry_checks(mesh, topo, media, adv, settings, grad, curv)
    findings = findings + extra.pop("findings")
    done("geometry")
    t["geometry"] += sum(spent.values())  # (large meshes: beside the advice's last jobs)
    t["analysis"] = time.perf_counter() - t0  # wall time; stages may overlap
    return AuditResult(mesh, settings, topo, sj, findings, q, flags, adv, sw, ref, coa, t,
                       media=media, quality_summary=summary, **extra)


def _geometry_checks(mesh: Mesh, topo: Topology, media: Media, adv: Advice,
                     settings: AuditSettings, grad: SizeJumps, curv: CurvedBoundary | None
                     ) -> dict:
    """Quadratic cells, absorbing layers, directional orders, and the findings they and
    the size jumps ``grad`` and curved boundaries ``curv`` (computed beside the advice)
    raise (warnings and notes, never blocking)."""
    from .validity import NOTE, WARNING

    chk = media.checks
    n = chk.max_listed
    out: list[Finding] = []
    tensor = any(b.info.linear in ("hexahedron", "wedge", "quad") for b in mesh.blocks)
    dirs = (directional_orders(mesh, topo, adv.edge_order, settings.advice.max_order)
            if tensor else None)  # tets and triangles have no parametric directions
    if grad.count:
        out.append(Finding("size_jumps", WARNING, f"neighbouring cells whose sizes differ by more "
                           f"than x{grad.ratio:g} (largest x{grad.max_ratio:.3g})", grad.count,
                           grad.pairs[:, 1], "cell", grad.locations))
    if curv is not None and curv.misfit.any():
        out.append(Finding("curved_boundary_straight_faces", WARNING,
                           f"straight-sided boundary faces depart from the curved surface by more "
                           f"than the accuracy target allows at {settings.fmax:g} Hz (quadratic "
                           f"geometry would do for {int(curv.needs_quadratic.sum())})",
                           int(curv.misfit.sum()), curv.listed_cells, "cell",
                           curv.listed_locations))
    if curv is not None and curv.needs_refinement.any():
        out.append(Finding("curved_boundary_refine", WARNING,
                           "boundary faces too large for the surface curvature even with "
                           "quadratic geometry", int(curv.needs_refinement.sum()),
                           curv.listed_cells, "cell", curv.listed_locations))
    quad = quadratic_geometry(mesh, chk.jacobian_ratio_min, max_listed=n)
    if quad is not None and quad.low:
        out.append(Finding("quadratic_jacobian_variation", WARNING,
                           f"quadratic cells whose det J varies by more than min/max "
                           f"{quad.threshold:g} (strongly curved or misplaced mid-nodes)",
                           quad.low, quad.listed, "cell", quad.listed_locations))
    layers = []
    if mesh.dim == 3:
        layer_tags = {r.tag for r in media.layers()}
        for r in media.layers():
            lc = check_layer(mesh, topo, r.tag, r.effective_speed, settings.frequencies[0],
                             r.surrounds, layer_tags, chk.layer_min_wavelengths,
                             chk.layer_max_wavelengths, chk.layer_min_cells)
            layers.append(lc)
            first = np.flatnonzero(mesh.region == r.tag)[:1]
            for sev, code, text in lc.messages:
                out.append(Finding(code, WARNING if sev == "warning" else NOTE, text, 1,
                                   first, "cell", mesh.centroids_of(first)))
    return {"findings": out, "gradation": grad, "curvature": curv, "quadratic": quad,
            "layers": tuple(layers), "directional": dirs}


def audit_file(path: str | Path, settings: AuditSettings, units: str | None = None,
               progress: Callable[[str], None] | None = None) -> AuditResult:
    """Read a mesh file and audit it; ``units`` as in :func:`meshcheck.reading.read_mesh`.
    Meshes of :data:`~meshcheck.ordering.RENUMBER_CELLS` cells or more whose file order is
    unrelated to space are renumbered for memory locality
    (:func:`meshcheck.ordering.renumbered_for_audit`; the result's arrays index
    ``result.mesh``, the reports give the file's ids)."""
    if progress:
        progress("read")
    t0 = time.perf_counter()
    mesh = read_mesh(path, units)
    t_read = time.perf_counter() - t0
    mesh, t_renumber = renumbered_for_audit(mesh)
    res = audit(mesh, settings, progress)
    res.timings["read"] = t_read
    if t_renumber is not None:
        res.timings["renumber"] = t_renumber
    return res
