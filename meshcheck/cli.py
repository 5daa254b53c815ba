"""Command-line interface: a thin typer layer over :mod:`meshcheck.pipeline`.

Exit codes: 0 the mesh is ready up to the requested upper frequency,
1 findings (not ready, or blocking defects), 2 unusable input or usage error.
"""
from __future__ import annotations

import gc
import os
import sys
import threading
import time
from contextlib import contextmanager, suppress
from enum import Enum
from pathlib import Path
from typing import List, Optional

# BLAS on one thread in the command's process, unless the user says otherwise (set before
# numpy loads OpenBLAS): the audit's few BLAS calls are small (row sums of boundary
# triangles, 3x3 products), and OpenBLAS's threads keep spinning after each call, taking
# a core from the audit's own threads (4.77M tets, three alternating runs: user CPU
# 7.88-7.99 -> 7.52-7.73 s)
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import typer
from typer.exceptions import TyperException
from rich.console import Console
from rich.markup import escape
# (rich's Panel, Table and Progress are imported where used: 8 ms of the audit's
# single-threaded start with --quiet, which shows none until the audit is over)

from .errors import MeshcheckError

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Audit a fluid-domain mesh for frequency-domain (Helmholtz) acoustics.")
SAMPLES = Path(__file__).resolve().parent.parent / "sample_meshes"
DEMO = {"mesh": "enclosure.msh", "units": "m", "fmin": 50.0, "fmax": 2000.0, "bands": "third-octave",
        "target": 0.01, "max_order": 8}


class Bands(str, Enum):
    octave = "octave"
    third = "third-octave"


class Unit(str, Enum):
    m = "m"
    cm = "cm"
    mm = "mm"
    inch = "in"


def _frequencies(fmin, fmax, step, bands, freqs) -> np.ndarray:
    from .acoustics import band_centres, linear_range
    from .errors import SettingsError

    if freqs:
        try:
            out = np.array([float(x) for s in freqs for x in s.replace(";", ",").split(",") if x.strip()])
        except ValueError:
            raise SettingsError(f"--freqs {' '.join(freqs)}: give numbers in Hz separated by commas") from None
        return out
    if fmax is None:
        raise SettingsError("give the upper frequency with --fmax (Hz), or a list with --freqs")
    if bands is not None:
        return band_centres(fmin if fmin else fmax, fmax, 1 if bands == Bands.octave else 3)
    if step is not None:
        return linear_range(fmin if fmin else step, fmax, step)
    if fmin is not None:
        return linear_range(fmin, fmax, (fmax - fmin) / 20 if fmax > fmin else 1.0)
    return np.array([fmax])


def _parse_region_speeds(items: list[str]) -> dict:
    from .errors import SettingsError

    out = {}
    for item in items or []:
        name, sep, value = item.rpartition("=")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            name = ""
        if not sep or not name.strip():
            raise SettingsError(f"--region-speed '{item}': write REGION=SPEED, e.g. water=1481")
    return out


def _fmt_s(t: float) -> str:
    return f"{t:.3g} s" if t < 120 else (f"{t / 60:.3g} min" if t < 7200 else f"{t / 3600:.3g} h")


def _fmt_b(b: float) -> str:
    return f"{b / 1e6:.3g} MB" if b < 1e9 else f"{b / 1e9:.3g} GB"


def _print_cost(console: Console, data: dict) -> None:
    """One line per strategy of the quote, one for the coarsening scenario."""
    c = data.get("cost")
    if not c:
        return
    if "error" in c:
        console.print(f"cost: not estimated ({escape(c['error'])})")
        return
    parts = []
    for q in c["strategies"]:
        lo, hi = q["total_band_s"]
        note = "" if q["carries_all"] else ", misses the target at the top"
        note += ", beyond calibration" if q.get("beyond_calibration") else ""
        parts.append(f"{q['strategy']} {_fmt_s(q['total_s'])} ({_fmt_s(lo)}-{_fmt_s(hi)}), "
                     f"peak {_fmt_b(q['peak_memory_bytes'])}{note}")
    console.print("cost of the sweep (direct solver, this machine): " + "; ".join(parts))
    co = c.get("coarsening")
    if co and co.get("quote"):
        sp = co.get("speedup")
        console.print(f"coarsening scenario (sizes for p={co['order']} at "
                      f"{co['upper_frequency_hz']:g} Hz, gradation {co['gradation']:g}): "
                      f"~{co['estimated_cells']:,.0f} cells, {_fmt_s(co['quote']['total_s'])}"
                      + (f", {sp:.3g}x the speed of the supplied mesh" if sp else ""))


def _print_summary(console: Console, res, files: dict | None, data: dict) -> None:
    from rich.panel import Panel
    from rich.table import Table

    from .report import CAUTION, _fmt_hz

    v, asm = data["verdict"], data["assumptions"]
    unit = data["input"]["unit"]
    mode = (f"fixed order p = {asm['fixed_order']}" if asm["solver_mode"] == "fixed"
            else f"variable order up to p = {asm['max_order']}")
    style = {"ready": "bold green", "limited": "bold yellow", "blocked": "bold red"}[v["state"]]
    if v["state"] == "blocked":
        head = (f"BLOCKED - blocking defects; no frequency signed off "
                f"(model limit once mended: {_fmt_hz(v['model_limit_hz'])} Hz)")
    else:
        head = (f"{v['state'].upper()} - signed off up to {_fmt_hz(v['signed_off_hz'])} Hz "
                f"(requested {_fmt_hz(v['upper_frequency_hz'])} Hz)")
    body = (f"[{style}]{head}[/]\n{mode}, target {asm['target_relative_error']:.3g} relative error, "
            f"c = {asm['sound_speed_m_s']:.1f} m/s, unit {unit}, L = "
            f"{asm['propagation_distance_rule']}, 3D correction "
            f"{'on' if asm.get('correction_3d') else 'off (plain 1D model)'}")
    console.print(Panel(body, title=f"meshcheck audit: {escape(Path(res.mesh.source).name)}"))
    for ms in asm.get("material_speeds", []):
        console.print(f"speed stated by the mesh file: {escape(ms['name'])} "
                      f"{ms['speed_m_s']:.6g} m/s ({escape(ms['card'])}), {escape(ms['note'])}")
    lc = v.get("limiting_cell")
    if lc and v["state"] != "ready":
        console.print(f"Limited by cell {lc['cell']} in {escape(lc['region_name'])} (longest edge "
                      f"{lc['largest_edge']:.4g} {unit}) at "
                      f"({', '.join(f'{x:.4g}' for x in lc['centroid'])}) {unit}")
    t = Table(title="Highest usable frequency per order (Hz)")
    t.add_column("order", justify="right")
    t.add_column("whole mesh", justify="right")
    regions = data["input"]["regions"]
    for r in regions:
        t.add_column(escape(r["name"]), justify="right")
    top = asm["fixed_order"] or asm["max_order"]
    for p in [str(q) for q in range(1, top + 1)]:
        t.add_row(f"p={p}", _fmt_hz(data["limits_hz"]["mesh"][p]),
                  *(_fmt_hz(r["limit_hz_per_order"][p]) for r in regions))
    console.print(t)
    for f in data["findings"]:
        colour = {"blocking": "red", "warning": "yellow"}.get(f["severity"], "dim")
        ids = ", ".join(str(i) for i in f["ids"][:8])
        console.print(f"[{colour}]{f['severity']}[/]: {escape(f['message'])}: {f['count']} "
                      f"({f['id_kind']} ids {ids}{'...' if f['count'] > 8 else ''})")
    q = data["quality"]
    bad = {k: x["out_of_range"] for k, x in q.items() if x["out_of_range"]}
    if bad:
        console.print("quality outside acceptable range: " +
                      ", ".join(f"{k} {n}" for k, n in bad.items()))
    sw = data["sweep"]
    nf = len(sw["frequencies_hz"])
    n_ready = sum(sw["ready"])
    console.print(f"sweep: {nf} frequencies, {n_ready} carried at the allowed order; unknowns "
                  f"{sw['dofs'][0]:,} .. {sw['dofs'][-1]:,} ({sw['dofs_kind']})")
    console.print(f"refine: {sum(c['cells'] for c in data['refine'])} cells in "
                  f"{len(data['refine'])} groups; could be coarser (x"
                  f"{res.settings.advice.coarsen_factor:g} or more): "
                  f"{sum(c['cells'] for c in data['coarsen'])} cells")
    _print_cost(console, data)
    if files:
        for kind, p in files.items():
            console.print(f"wrote {kind}: {escape(str(p))}")
    if _suggest_kernel_build(res.mesh.n_cells):
        console.print("[dim]tip: `meshcheck kernels --build` compiles the kernels once; audits "
                      "of large meshes then skip loading numba (about 0.3 s and 55 MiB each)[/]")
    console.print(f"[dim]{CAUTION}[/]")


def _suggest_kernel_build(n_cells: int) -> bool:
    """Whether this audit ran numba's kernels where a built module would have served."""
    from . import kernels
    from .kernels import ahead

    return (kernels.mode() == "auto" and kernels.use_compiled(n_cells)
            and ahead.module_path() is not None and not ahead.available())


_STAGES = ("reading", "topology", "validity", "quality", "advice", "reports")


@contextmanager
def _stages(quiet: bool):
    """A rich progress bar over the audit stages (on stderr); silent when quiet."""
    if quiet:
        yield lambda name: None
        return
    from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    progress = Progress(SpinnerColumn(), TextColumn("{task.description:<10}"), BarColumn(),
                        TimeElapsedColumn(), console=Console(stderr=True), transient=True)
    with progress:
        task = progress.add_task("reading", total=len(_STAGES))
        done = set()

        def step(name: str) -> None:
            if name in _STAGES and name not in done:
                done.add(name)
                progress.update(task, description=name, completed=len(done) - 1)
        yield step


def _run(mesh_path: Path, units, fmin, fmax, step, bands, freqs, target, order, max_order,
         speed, temperature, region_speed, distance, out: Optional[Path], quiet: bool,
         job: Optional[Path] = None, allow_outside: bool = False,
         correction_3d: bool = True, reports: str = "all", cost: bool = True) -> int:
    from . import kernels

    kinds = _report_kinds(reports)
    if out is not None and "json" in kinds:  # the JSON's checksum beside the audit's
        from .checksum import file_sha256  # imports and the reading (0.17 s at 220 MB)

        file_sha256(mesh_path, aside=True)
    try:  # numba's set-up overlaps the imports and the reading of a large mesh
        kernels.warm_up_async(mesh_path.stat().st_size)
    except OSError:
        pass  # read_mesh reports the file
    from .advice import AdviceSettings
    from .job import load_job
    from .pipeline import OVERLAP_CELLS, TRIM_CELLS, AuditSettings, audit
    from .threads import release_free_heap
    from .report import (EARLY_VTU_CELLS, EarlyVTU, to_dict, write_json, write_markdown,
                         write_vtu)
    from .units import UNIT_FACTORS

    console = Console(highlight=False)
    f = _frequencies(fmin, fmax, step, bands, freqs)
    region_speeds = _parse_region_speeds(region_speed)
    job_spec = load_job(job) if job is not None else None
    if job_spec is not None and temperature is not None:
        job_spec = job_spec.with_temperature(temperature)  # the command line wins
    temperature = 20.0 if temperature is None else temperature
    with _stages(quiet) as step, _no_gc():
        step("reading")
        mesh = _read_mesh(mesh_path, units.value if units is not None else None,
                          fmax_hint=float(np.max(f)) if len(f) else None,
                          allow_outside=allow_outside)
        _fast_exit_after(mesh)
        # large meshes in an order that keeps neighbours near each other in memory (the
        # reports give the file's ids); the file's order is dropped, not held beside it
        from .ordering import renumbered_for_audit
        mesh, t_renumber = renumbered_for_audit(mesh)
        dist = None if distance is None else distance * UNIT_FACTORS[mesh.unit]
        adv = AdviceSettings(target=target, max_order=max_order, order=order, distance=dist,
                             correction_3d=correction_3d)
        settings = AuditSettings(frequencies=tuple(f), advice=adv, temperature=temperature,
                                 speed=speed, region_speeds=region_speeds, job=job_spec)
        big = mesh.n_cells > OVERLAP_CELLS
        stem = mesh_path.stem
        vtu = pos = None
        if out is not None and "vtu" in kinds and big and mesh.n_cells >= EARLY_VTU_CELLS:
            # the VTU written while the audit runs: the cells, points and quality metrics
            # as soon as those are known, the rest once the audit is over (a failed audit
            # leaves no file of its own)
            made = not out.exists()
            out.mkdir(parents=True, exist_ok=True)
            vtu = EarlyVTU(mesh, settings, out / f"{stem}.audit.vtu")
        from .sizefield import audit_size_field, write_size_view

        try:
            res = audit(mesh, settings, progress=step,
                        cells_checked=vtu.start if vtu is not None else None,
                        advised=vtu.advised if vtu is not None else None)
        except BaseException:
            if vtu is not None:
                vtu.abort()
                if made:
                    with suppress(OSError):
                        out.rmdir()  # the folder made for it, if nothing else is there
            raise
        if vtu is not None:
            vtu.finish(res)
        if mesh.n_cells >= TRIM_CELLS and (cost or kinds - {"json", "vtu"}):
            # the scratch freed at the heap's top (held since main) given back before the
            # heavier reports and the quote; the JSON and VTU alone reuse it instead
            # (4.77M tets: 11k fewer page faults, peak unchanged)
            release_free_heap()
        if t_renumber is not None:
            res.timings["renumber"] = t_renumber
        step("reports")
        if out is not None:
            out.mkdir(parents=True, exist_ok=True)
            if ("vtu" in kinds or "pos" in kinds) and big:
                # the size field both need (the VTU last), on a thread of its own beside
                # the JSON; the writers wait for it and find it cached
                _aside(audit_size_field, res)  # (an error here: the writer raises it again)
            if "vtu" in kinds and big and vtu is None:  # the VTU beside the JSON
                vtu = _aside(write_vtu, res, out / f"{stem}.audit.vtu")
            if "pos" in kinds and big:  # the gmsh view too (the field computed once)
                pos = _aside(write_size_view, res, out / f"{stem}.size.pos")
        data = to_dict(res, cost=cost)
        files = None
        if out is not None:
            files = {}
            if "json" in kinds:
                files["json"] = write_json(res, out / f"{stem}.audit.json", data)
            if "md" in kinds:
                files["markdown"] = write_markdown(res, out / f"{stem}.audit.md", data)
            if "vtu" in kinds:
                files["vtu"] = vtu.result() if vtu else write_vtu(res, out / f"{stem}.audit.vtu")
            if "pos" in kinds:
                files["size view (gmsh)"] = (pos.result() if pos else
                                             write_size_view(res, out / f"{stem}.size.pos"))
            if "html" in kinds:
                try:  # figures need matplotlib; without it the other reports still stand
                    from .html_report import write_html
                    files["html"] = write_html(res, out / f"{stem}.audit.html", data)
                except ImportError as exc:
                    if not quiet:
                        console.print(f"note: HTML report skipped: {escape(str(exc))}")
    if not quiet:
        _print_summary(console, res, files, data)
    return 0 if res.ready else 1


@contextmanager
def _no_gc():
    """Python's cycle collector off for the audit: it makes few cycles, while the many
    small objects of the reports and kernel calls would trigger collections that each
    walk every live object (restored on exit)."""
    was = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was:
            gc.enable()


def _aside(fn, *args):
    """``fn(*args)`` started on a daemon thread; a future whose ``result()`` returns its
    value or raises its exception (the file writers release the GIL while they encode
    and write)."""
    from concurrent.futures import Future

    fut: Future = Future()

    def run():
        try:
            fut.set_result(fn(*args))
        except BaseException as exc:  # handed to the caller of result()
            fut.set_exception(exc)

    threading.Thread(target=run, name="meshcheck-report", daemon=True).start()
    return fut


REPORT_KINDS = ("json", "md", "vtu", "html", "pos")


def _read_mesh(path: Path, unit: str | None, **kw):
    """:func:`meshcheck.reading.read_mesh`; below :data:`meshcheck.pipeline.TRIM_CELLS`
    cells the heap's free top is no longer held (:func:`meshcheck.threads.hold_heap_top`,
    where :func:`main` held it)."""
    from .pipeline import TRIM_CELLS
    from .reading import read_mesh
    from .threads import hold_heap_top

    mesh = read_mesh(path, unit, **kw)
    if mesh.n_cells < TRIM_CELLS:
        hold_heap_top(False)
    return mesh


def _report_kinds(text: str) -> set[str]:
    """The report files asked for by ``--reports`` (comma separated, or "all")."""
    from .errors import SettingsError

    words = {w.strip().lower() for w in (text or "all").split(",") if w.strip()}
    if not words or words == {"all"}:
        return set(REPORT_KINDS)
    unknown = sorted(words - set(REPORT_KINDS))
    if unknown:
        raise SettingsError(f"--reports {text}: unknown kind(s) {', '.join(unknown)}; choose "
                            f"from {', '.join(REPORT_KINDS)} or all (e.g. --reports json,vtu)")
    return words


MESH_ARG = typer.Argument(..., help="Volume mesh file (.msh, .vtu, .vtk, .bdf/.nas, .inp, ...).",
                          exists=False, dir_okay=False)


NO_3D_CORRECTION = typer.Option(False, "--no-3d-correction", help="Use the plain 1D "
                                 "dispersion model, without the 3D correction fitted to real "
                                 "solves (docs/validation.md).")


@app.command()
def audit(
    mesh: Path = MESH_ARG,
    units: Optional[Unit] = typer.Option(None, "--units", "-u", help="Length unit of the file; "
                                         "required when the domain size leaves it ambiguous."),
    fmax: Optional[float] = typer.Option(None, help="Upper frequency of the sweep, Hz."),
    fmin: Optional[float] = typer.Option(None, help="Lower frequency, Hz."),
    step: Optional[float] = typer.Option(None, help="Linear step from fmin to fmax, Hz."),
    bands: Optional[Bands] = typer.Option(None, help="Band centres from fmin to fmax (ISO 266)."),
    freqs: Optional[List[str]] = typer.Option(None, help="Explicit frequencies, Hz, comma separated."),
    target: float = typer.Option(0.01, help="Allowed relative error (0.01 = 1 %)."),
    order: Optional[int] = typer.Option(None, help="Fixed element order of the solver (1, 2, ...)."),
    max_order: int = typer.Option(8, help="Highest order of a variable-order solver."),
    speed: Optional[float] = typer.Option(None, help="Sound speed, m/s (default: air)."),
    temperature: Optional[float] = typer.Option(None, help="Air temperature, deg C (default 20; "
                                                "overrides the job file's air media)."),
    region_speed: Optional[List[str]] = typer.Option(None, help="REGION=SPEED in m/s, repeatable."),
    distance: Optional[float] = typer.Option(None, help="Propagation distance L in the mesh's unit "
                                             "(default: diagonal of each fluid part)."),
    out: Optional[Path] = typer.Option(None, help="Folder for the JSON, Markdown and VTU reports "
                                       "(default: <mesh name>-audit next to the working folder)."),
    job: Optional[Path] = typer.Option(None, "--job", help="TOML job file: per-region media, "
                                       "mean flow, losses and roles (the options above override "
                                       "it).", dir_okay=False),
    quiet: bool = typer.Option(False, help="No terminal summary (exit code only)."),
    debug: bool = typer.Option(False, help="Show tracebacks."),
    allow_outside: bool = typer.Option(False, help="Let INCLUDE statements of the mesh file "
                                       "name files outside the mesh's folder tree."),
    no_3d_correction: bool = NO_3D_CORRECTION,
    reports: str = typer.Option("all", help="Report files to write, comma separated: json, "
                                "md, vtu, html (with figures), pos (gmsh size view), or all."),
    no_cost: bool = typer.Option(False, "--no-cost", help="Leave out the quote of the sweep "
                                 "(exact unknown and non-zero counts; the slowest report "
                                 "part on multi-million-cell meshes)."),
):
    """Audit MESH: validity, quality, usable frequency per order, refine/coarsen advice."""
    out = out if out is not None else Path.cwd() / f"{mesh.stem}-audit"
    raise typer.Exit(_run(mesh, units, fmin, fmax, step, bands, freqs, target, order, max_order,
                          speed, temperature, region_speed, distance, out, quiet, job,
                          allow_outside=allow_outside, correction_3d=not no_3d_correction,
                          reports=reports, cost=not no_cost))


@app.command()
def demo(out: Path = typer.Option(Path("meshcheck-demo"), help="Folder for the reports."),
         quiet: bool = typer.Option(False, help="No terminal summary."),
         debug: bool = typer.Option(False, help="Show tracebacks.")):
    """Audit the bundled enclosure mesh (third-octave bands 50 Hz - 2 kHz, 1 %, p <= 8)."""
    mesh = SAMPLES / DEMO["mesh"]
    code = _run(mesh, Unit(DEMO["units"]), DEMO["fmin"], DEMO["fmax"], None, Bands.third, None,
                DEMO["target"], None, DEMO["max_order"], None, 20.0, None, None, out, quiet)
    raise typer.Exit(code)


@app.command()
def calibrate(
    mesh: Optional[Path] = typer.Option(None, "--mesh", help="Calibrate on sub-meshes of this "
                                        "mesh (default: gmsh meshes of a box, 3D and 2D)."),
    units: Optional[Unit] = typer.Option(None, "--units", "-u", help="Length unit of --mesh."),
    out: Optional[Path] = typer.Option(None, help="Constants file to write (default: "
                                       "$XDG_CONFIG_HOME/meshcheck/machine.json, which audits "
                                       "then use)."),
    max_dofs: float = typer.Option(30000, help="Unknowns of the largest system factorised."),
    steps: int = typer.Option(6, help="System sizes per order."),
    orders: str = typer.Option("1,2,3,4", help="Orders factorised, comma separated."),
    quick: bool = typer.Option(False, help="A small run (about a minute): smoke test only."),
    quiet: bool = typer.Option(False, help="No terminal output."),
    debug: bool = typer.Option(False, help="Show tracebacks."),
):
    """Time real factorisations on this machine and fit the cost constants of the quote.

    Assembles complex Helmholtz systems (NGSolve) of sub-meshes of increasing size at
    orders 1-4, factorises them with SciPy's SuperLU in nested-dissection order, and fits
    memory and time against unknowns and non-zeros with the nested-dissection exponents.
    Takes 5-15 minutes with the defaults (the shipped constants: --max-dofs 60000
    --steps 7, 8 minutes on 2 cores).
    """
    from .calibration import calibrate as run_cal, fit_machine, save_machine, user_machine_path
    from .errors import SettingsError

    console = Console(highlight=False, quiet=quiet)
    try:
        import gmsh  # noqa: F401
        import ngsolve  # noqa: F401
    except ImportError as exc:
        raise SettingsError(f"meshcheck calibrate needs NGSolve and gmsh ({exc}); "
                            "pip install ngsolve gmsh") from None
    try:
        order_list = tuple(int(x) for x in orders.split(",") if x.strip())
    except ValueError:
        raise SettingsError(f"--orders {orders}: give integers, e.g. 1,2,3,4") from None
    if not order_list or min(order_list) < 1 or max(order_list) > 8:
        raise SettingsError("--orders must be between 1 and 8")
    src = _read_mesh(mesh, units.value if units is not None else None) if mesh else None
    kw = dict(orders=order_list, max_dofs=max_dofs, steps=steps)
    if quick:
        kw = dict(orders=order_list[:2], max_dofs=5000, steps=4, assembly_orders=(1, 2, 3, 4),
                  assembly_dofs=3000, min_dofs=400)
    t0 = time.perf_counter()
    with console.status("calibrating", spinner="line") as status:
        samples = run_cal(src, progress=lambda m: status.update(f"factorising: {m}"), **kw)
    model = fit_machine(samples)
    path = save_machine(model, out if out is not None else user_machine_path())
    from rich.table import Table
    t = Table(title=f"Fitted cost constants ({len(samples)} systems, "
                    f"{time.perf_counter() - t0:.0f} s)")
    for col in ("quantity", "terms", "coefficients", "spread (x/)", "free exponent per order"):
        t.add_column(col)
    for key, fit in model.fits.items():
        ex = model.exponents.get(key, {})
        t.add_row(key, " + ".join(fit.terms), ", ".join(f"{c:.3g}" for c in fit.coef),
                  f"{np.exp(2 * fit.log_sd):.2f}",
                  ", ".join(f"p{o}: {e:.2f}" for o, e in ex.items()))
    console.print(t)
    console.print(f"wrote machine constants: {escape(str(path))}")
    raise typer.Exit(0)


@app.command()
def kernels(
    build: bool = typer.Option(False, "--build", help="Compile the kernels' usual "
                               "specialisations into one module in the cache folder "
                               "(needs a C compiler; 20 s to a few minutes, once per "
                               "meshcheck, numba, numpy and Python version)."),
    quiet: bool = typer.Option(False, help="No terminal output."),
    debug: bool = typer.Option(False, help="Show tracebacks."),
):
    """Show (or --build) the ahead-of-time module of the compiled kernels.

    Audits of large meshes run compiled kernels.  Without the module, numba compiles
    them on first use and caches them, and every audit then spends about 0.3 s loading
    numba and the kernels; with it, no numba is loaded at all.  Results are the same.
    """
    import json

    from . import kernels as k
    from .kernels import ahead

    console = Console(highlight=False, quiet=quiet)
    if build:
        t0 = time.perf_counter()
        with console.status("compiling the kernels", spinner="line"):
            path = ahead.build()
        console.print(f"built {escape(str(path))} in {time.perf_counter() - t0:.0f} s")
    path = ahead.module_path()
    n = len(json.loads(ahead.SPECIALISATIONS.read_text()))
    state = ("built and loaded" if ahead.available() else
             "not built (meshcheck kernels --build)" if path is None or not path.is_file()
             else "present but does not load: rebuild with meshcheck kernels --build")
    from rich.table import Table
    t = Table(title="Compiled kernels", show_header=False)
    t.add_column("item", no_wrap=True)
    t.add_column("value", overflow="fold")
    t.add_row("mode (MESHCHECK_KERNELS)", k.mode())
    t.add_row("numba", "installed" if k.available() else "not installed (numpy everywhere)")
    t.add_row("specialisations listed", str(n))
    t.add_row("ahead-of-time module", escape(str(path)) if path else "cache folder is off")
    t.add_row("state", state)
    console.print(t)
    raise typer.Exit(0)


@app.command()
def coarsen(
    mesh: Path = MESH_ARG,
    units: Optional[Unit] = typer.Option(None, "--units", "-u", help="Length unit of the file."),
    fmax: Optional[float] = typer.Option(None, help="Upper frequency of the sweep, Hz."),
    fmin: Optional[float] = typer.Option(None, help="Lower frequency, Hz."),
    step: Optional[float] = typer.Option(None, help="Linear step from fmin to fmax, Hz."),
    bands: Optional[Bands] = typer.Option(None, help="Band centres from fmin to fmax (ISO 266)."),
    target: float = typer.Option(0.01, help="Allowed relative error (0.01 = 1 %)."),
    order: Optional[int] = typer.Option(None, help="Fixed element order of the solver."),
    max_order: int = typer.Option(8, help="Highest order of a variable-order solver."),
    size_order: Optional[int] = typer.Option(None, help="Build the sizes for this order (the "
                                             "new mesh is then audited at this fixed order); "
                                             "default: the allowed order."),
    gradation: float = typer.Option(0.3, help="Largest size gradient |grad h| of the field."),
    speed: Optional[float] = typer.Option(None, help="Sound speed, m/s (default: air)."),
    temperature: float = typer.Option(20.0, help="Air temperature, deg C."),
    out: Optional[Path] = typer.Option(None, help="Folder for the reports and the new mesh "
                                       "(default: <mesh name>-coarsen)."),
    quiet: bool = typer.Option(False, help="No terminal output."),
    debug: bool = typer.Option(False, help="Show tracebacks."),
):
    """Remesh MESH with gmsh to the size field of the upper frequency and audit both meshes.

    The boundary faces are reclassified into a discrete geometry and the volume is
    meshed with tetrahedra sized by the field (a .pos background view).  Regions are
    merged into one fluid.  Exit 0 when the new mesh carries the upper frequency.
    """
    import json
    from .advice import AdviceSettings
    from .cost import job_cost, job_cost_dict
    from .pipeline import AuditSettings, audit
    from .report import to_dict, write_all
    from .sizefield import remesh_and_audit
    from .units import UNIT_FACTORS

    console = Console(highlight=False, quiet=quiet)
    f = _frequencies(fmin, fmax, step, bands, None)
    m = _read_mesh(mesh, units.value if units is not None else None)
    scale = UNIT_FACTORS.get(m.unit, 1.0)
    adv = AdviceSettings(target=target, max_order=max_order, order=order)
    settings = AuditSettings(frequencies=tuple(f), advice=adv, temperature=temperature,
                             speed=speed)
    folder = out if out is not None else Path.cwd() / f"{mesh.stem}-coarsen"
    folder.mkdir(parents=True, exist_ok=True)
    with console.status("auditing the supplied mesh", spinner="line") as status:
        res = audit(m, settings)
        job = job_cost(m, res.topology, res.advice, np.asarray(settings.frequencies),
                       size_order=size_order, gradation=gradation)
        scen = job.chosen if size_order is not None else job.coarsening
        files = write_all(res, folder, mesh.stem)
        status.update("remeshing with gmsh and auditing the new mesh")
        adv2 = adv if size_order is None else AdviceSettings(
            target=target, max_order=max(max_order, size_order), order=size_order)
        s2 = AuditSettings(frequencies=tuple(f), advice=adv2, temperature=temperature,
                           speed=speed)
        new_path, res2, shrink = remesh_and_audit(m, res.topology, scen.field, s2,
                                                  folder / f"{mesh.stem}.coarse.msh")
        new = res2.mesh
        files2 = write_all(res2, folder, f"{mesh.stem}.coarse")
    d1, d2 = to_dict(res), to_dict(res2)
    summary = {"schema": "meshcheck-coarsen", "schema_version": 1, "supplied": str(mesh),
               "coarsened": str(new_path), "size_order": scen.field.order,
               "gradation": gradation, "mesher_size_shrink": shrink,
               "estimated": job_cost_dict(job, scale),
               "supplied_cells": m.n_cells, "coarsened_cells": new.n_cells,
               "supplied_verdict": d1["verdict"], "coarsened_verdict": d2["verdict"],
               "supplied_cost": d1["cost"], "coarsened_cost": d2["cost"]}
    spath = folder / f"{mesh.stem}.coarsen.json"
    spath.write_text(json.dumps(summary, indent=1, allow_nan=False), encoding="utf-8")
    from rich.table import Table
    t = Table(title=f"coarsening at {settings.fmax:g} Hz (sizes for p={scen.field.order})")
    for col in ("", "supplied", "estimated", "remeshed"):
        t.add_column(col, justify="right")

    def total(d, strategy):
        for q in (d.get("cost") or {}).get("strategies", []):
            if q["strategy"] == strategy:
                return q
        return None

    name = scen.quote.strategy if scen.quote is not None else None
    q1, q2 = total(d1, name), total(d2, name)
    t.add_row("cells", f"{m.n_cells:,}", f"{scen.cells:,.0f}", f"{new.n_cells:,}")
    if q1 and q2 and scen.quote is not None:
        t.add_row(f"unknowns at {settings.fmax:g} Hz", f"{q1['unknowns'][-1]:,}",
                  f"{int(scen.quote.ndof[-1]):,}", f"{q2['unknowns'][-1]:,}")
        t.add_row(f"sweep time ({name})", _fmt_s(q1["total_s"]), _fmt_s(scen.quote.total_s),
                  _fmt_s(q2["total_s"]))
        t.add_row("peak memory", _fmt_b(q1["peak_memory_bytes"]),
                  _fmt_b(scen.quote.peak_bytes), _fmt_b(q2["peak_memory_bytes"]))
        t.add_row("speed-up", "1", f"{q1['total_s'] / scen.quote.total_s:.3g}",
                  f"{q1['total_s'] / q2['total_s']:.3g}")
    t.add_row("signed off (Hz)", f"{d1['verdict']['signed_off_hz']:,.0f}", "-",
              f"{d2['verdict']['signed_off_hz']:,.0f}")
    console.print(t)
    if shrink < 1.0:
        console.print(f"note: the first mesh missed the upper frequency; the mesher size was "
                      f"scaled by {shrink:.3g}")
    if len(set(m.region_tags.tolist())) > 1:
        console.print("note: the regions of the supplied mesh were merged into one fluid")
    for kind, p_ in {**files, **{f"new {k}": v for k, v in files2.items()},
                     "new mesh": new_path, "summary": spath}.items():
        console.print(f"wrote {kind}: {escape(str(p_))}")
    raise typer.Exit(0 if res2.ready else 1)


@app.command()
def verify(
    mesh: Path = MESH_ARG,
    frequency: List[float] = typer.Option(..., "--frequency", "-f", help="Frequency to verify, "
                                          "Hz (repeatable)."),
    units: Optional[Unit] = typer.Option(None, "--units", "-u", help="Length unit of the file."),
    target: float = typer.Option(0.01, help="Allowed relative error (0.01 = 1 %)."),
    order: Optional[int] = typer.Option(None, help="Fixed element order of the solver."),
    max_order: int = typer.Option(8, help="Highest order of a variable-order solver."),
    speed: Optional[float] = typer.Option(None, help="Sound speed, m/s (default: air)."),
    temperature: float = typer.Option(20.0, help="Air temperature, deg C."),
    distance: Optional[float] = typer.Option(None, help="Propagation distance L in the mesh's unit."),
    point_source: bool = typer.Option(True, help="Also solve the point-source problem."),
    compare: bool = typer.Option(True, help="Also solve at uniform orders p and p-1."),
    no_3d_correction: bool = NO_3D_CORRECTION,
    out: Optional[Path] = typer.Option(None, help="Folder for the JSON (default: <mesh>-audit)."),
    quiet: bool = typer.Option(False, help="No terminal output (exit code only)."),
    debug: bool = typer.Option(False, help="Show tracebacks."),
):
    """Solve plane waves (26 directions) and a point source with NGSolve at the advised orders.

    Exit 0 when the advised orders meet the target at every frequency, 1 when not
    (or the mesh is blocked), 2 without NGSolve or for bad input.
    """
    import json
    from .advice import AdviceSettings, advise
    from .pipeline import AuditSettings, audit, cell_speeds
    from .units import UNIT_FACTORS
    from . import verify as ver

    console = Console(highlight=False, quiet=quiet)
    if not ver.ngsolve_available():
        Console(stderr=True, soft_wrap=True).print("meshcheck verify needs NGSolve, which is "
                                                   "not installed: "
                                                   f"{escape(ver.INSTALL_HINT)}")
        raise typer.Exit(2)
    m = _read_mesh(mesh, units.value if units is not None else None)
    dist = None if distance is None else distance * UNIT_FACTORS[m.unit]
    adv_s = AdviceSettings(target=target, max_order=max_order, order=order, distance=dist,
                           correction_3d=not no_3d_correction)
    settings = AuditSettings(frequencies=tuple(frequency), advice=adv_s, temperature=temperature,
                             speed=speed)
    res = audit(m, settings)
    if res.blocking:
        console.print("[red]blocking defects: the mesh cannot be solved as it is[/] "
                      "(run `meshcheck audit` for the list)")
        raise typer.Exit(1)
    sm = ver.solver_mesh(m, res.topology)
    vs = ver.VerifySettings(point_source=point_source, compare=compare)
    speeds, scale, runs = cell_speeds(m, settings), UNIT_FACTORS[m.unit], []
    from rich.table import Table

    for f in settings.frequencies:
        v = ver.verify(sm, advise(m, res.topology, speeds, f, adv_s), vs)
        runs.append(v)
        t = Table(title=f"{f:g} Hz: k = {v.k:.4g} rad/m, target {v.target:.3g}")
        for col in ("solve", "orders", "predicted", "measured max", "median", "point source",
                    "DOFs", "time (s)"):
            t.add_column(col, justify="left" if col == "solve" else "right")
        for s in v.solves:
            lo, hi = s.orders
            t.add_row(s.label, f"{lo}" if lo == hi else f"{lo}-{hi}", f"{s.predicted:.3g}",
                      f"{s.max_error:.3g}", f"{s.median_error:.3g}", f"{s.point_error:.3g}",
                      f"{s.dofs:,}", f"{s.seconds:.1f}")
        console.print(t)
        console.print("[green]advised orders meet the target[/]" if v.meets_target
                      else "[red]advised orders miss the target[/]")
    folder = out if out is not None else Path.cwd() / f"{mesh.stem}-audit"
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{mesh.stem}.verify.json"
    doc = {"schema": "meshcheck-verify", "schema_version": 1, "mesh": str(mesh), "unit": m.unit,
           "target_relative_error": target, "max_order": max_order, "fixed_order": order,
           "signed_off_hz": res.signed_off,
           "model": ("1D dispersion without the 3D correction" if no_3d_correction else
                     "1D dispersion with the 3D correction (docs/validation.md)"),
           "frequencies": [ver.verification_dict(v, scale) for v in runs]}
    path.write_text(json.dumps(doc, indent=1, allow_nan=False), encoding="utf-8")
    console.print(f"wrote json: {escape(str(path))}")
    raise typer.Exit(0 if all(v.meets_target for v in runs) else 1)


#: an audit of a mesh of this many cells ends its process without the interpreter's
#: teardown (:func:`_exit_now`): after the lean audit of 4.77M tets the teardown took
#: 0.055 s (every module's objects freed one by one)
FAST_EXIT_CELLS = 2_000_000
_fast_exit = False  # set by _fast_exit_after


def _fast_exit_after(mesh) -> None:
    """Let :func:`main` end the process at once (:func:`_exit_now`) when ``mesh`` (the
    audit's) has :data:`FAST_EXIT_CELLS` cells or more."""
    global _fast_exit
    _fast_exit = _fast_exit or mesh.n_cells >= FAST_EXIT_CELLS


def _exit_now(rc: int):
    """End the process with exit code ``rc`` as a normal exit would, but for the
    interpreter's teardown: the threads that are not daemons are waited for, the atexit
    handlers run and the standard streams are flushed, then ``os._exit``."""
    import atexit

    me = threading.current_thread()
    for t in threading.enumerate():
        if t is not me and not t.daemon:
            t.join()
    atexit._run_exitfuncs()  # (CPython's, as at a normal exit)
    for stream in (sys.stdout, sys.stderr):
        with suppress(Exception):
            stream.flush()
    os._exit(rc)


def main(argv: list[str] | None = None) -> int:
    """Entry point; returns the exit code (tests call it in-process). In a process of
    its own (``argv`` None), a command that read a large mesh ends the process itself
    (:data:`FAST_EXIT_CELLS`)."""
    rc = _main(argv)
    if argv is None and _fast_exit:
        _exit_now(rc)
    return rc


def _main(argv: list[str] | None) -> int:
    args = list(sys.argv[1:] if argv is None else argv)
    debug = "--debug" in args
    if argv is None:  # a process of its own (not a test calling main in-process)
        from .threads import (fix_mmap_threshold, hold_heap_top, no_huge_page_advice,
                              share_malloc_arena)
        share_malloc_arena()
        fix_mmap_threshold()
        hold_heap_top()
        no_huge_page_advice()
    err = Console(stderr=True, highlight=False, soft_wrap=True)
    try:
        rc = app(args=args, prog_name="meshcheck", standalone_mode=False)
        return rc if isinstance(rc, int) else 0
    except typer.Exit as exc:
        return exc.exit_code
    except typer.Abort:
        return 2
    except TyperException as exc:  # usage errors (bad option, missing argument)
        msg = exc.format_message() if hasattr(exc, "format_message") else str(exc)
        err.print(f"meshcheck: usage error: {escape(msg)} (see meshcheck --help)")
        return 2
    except MeshcheckError as exc:
        if debug:
            raise
        err.print(f"meshcheck: error: {escape(str(exc))}")
        return 2
    except (OSError, MemoryError) as exc:
        if debug:
            raise
        err.print(f"meshcheck: error: {escape(str(exc))}")
        return 2


if __name__ == "__main__":
    sys.exit(main())
