"""Time and memory of a full audit against references measured in the same run.

Usage::

    python benchmarks/bench_audit.py [--cells 1e6] [--kind tet|tet10|hex] [--dir DIR] [--repeat 3]

Prints, for one reference mesh (generated with benchmarks/make_reference_meshes.py
when missing, binary MSH 4.1):

* ``meshio.read`` of the file alone, in a fresh process (reference 1);
* VTK's quality filter (vtkMeshQuality: aspect ratio, scaled Jacobian, minimum
  angle) on the same cells, excluding the building of the VTK grid (reference 2);
* the issue's audit, ``meshcheck audit --reports json,vtu --no-cost`` (read, validity,
  all quality metrics, edges, advice for a 200-frequency sweep, JSON + VTU written) in a
  fresh process: wall time and peak resident memory, first with an empty numba cache
  (compiling the kernels), then with the cache filled, then with the kernels' module
  built ahead of time (``meshcheck kernels --build``: no numba loaded; the figure the
  targets are for);
* the analysis time after reading (wall time of the stages, from the JSON report), and the
  user and system CPU time and minor page faults of that cached audit (``os.wait4``);
* with ``--numpy``, the same audit on the numpy reference path (MESHCHECK_KERNELS=numpy);
* with ``--full``, the default audit (all reports, figures, the cost quote);
* a 1000-frequency audit against a 10-frequency one (the whole analysis after reading, in
  one process), and the same for advice + sweep alone (a stricter measure).

and the ratios the performance targets are stated in (docs/performance.md).  The
references and the cached audit are each the best of ``--repeat`` fresh processes (3 by
default; a single run of a 4 s audit varied by 1.5 s on the shared machine).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def _child(code: str, env: dict | None = None) -> tuple[float, float, str]:
    """Run python code in a fresh process; (wall s, peak MiB of that child, stdout)."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    t0 = time.perf_counter()
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True,
                         env=env)
    dt = time.perf_counter() - t0
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    return dt, max(peak, before) / 1024.0, out.stdout


def _measured(cmd: list[str], env: dict | None = None, cwd: str | None = None):
    """Wall time, peak MiB, exit code and resource usage (``os.wait4``: user and system
    CPU seconds, minor page faults) of a command."""
    with tempfile.TemporaryFile() as err:  # a file, not a pipe nobody reads while waiting
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=err, env=env, cwd=cwd)
        _, status, usage = os.wait4(proc.pid, 0)
        dt = time.perf_counter() - t0
        err.seek(0)
        _measured.stderr_tail = err.read()[-2000:].decode(errors="replace")
    return dt, usage.ru_maxrss / 1024.0, os.waitstatus_to_exitcode(status), usage


def _peak_of(cmd: list[str], env: dict | None = None,
             cwd: str | None = None) -> tuple[float, float, int]:
    """Wall time, peak MiB (via /usr/bin/time-free wait4) and exit code of a command."""
    return _measured(cmd, env, cwd)[:3]


def compile_package(folder: Path) -> None:
    """Write the bytecode of the package in ``folder`` (``compileall``), as ``pip install``
    does for an installed package and as an editable install's first run does.  Where
    PYTHONDONTWRITEBYTECODE is set (it is on the project's machine), Python never writes
    it itself, so every audit would compile meshcheck's sources again (about 60-90 ms
    per process, some of it inside the timed stages: modules imported on first use),
    while the references import meshio and VTK from their installed bytecode."""
    import compileall

    compileall.compile_dir(str(folder), quiet=1)


def package_folder() -> Path:
    """The folder of the meshcheck package a fresh process here imports."""
    import importlib.util

    return Path(importlib.util.find_spec("meshcheck").origin).parent


def ensure_mesh(folder: Path, cells: float, kind: str) -> Path:
    tag = f"{cells:.0e}".replace("+0", "").replace("+", "")
    name = {"tet": f"box_cylinder_tet4_{tag}.msh", "tet10": f"box_cylinder_tet10_{tag}.msh",
            "hex": f"hex_distorted_{tag}.msh"}[kind]
    path = folder / name
    if not path.is_file():
        args = [sys.executable, str(HERE / "make_reference_meshes.py"), str(folder),
                "--cells", f"{cells:g}"]
        args += {"tet": [], "tet10": ["--order", "2"], "hex": ["--hex"]}[kind]
        subprocess.run(args, check=True)
    return path


VTK_CODE = """
import time, meshio, numpy as np, vtk
from vtk.util.numpy_support import numpy_to_vtk, numpy_to_vtkIdTypeArray
m = meshio.read({path!r})
blk = [b for b in m.cells if b.type in ('tetra', 'hexahedron', 'tetra10')][0]
n, k = blk.data.shape
vtype = {{'tetra': 10, 'hexahedron': 12, 'tetra10': 24}}[blk.type]
pts = vtk.vtkPoints(); pts.SetData(numpy_to_vtk(np.ascontiguousarray(m.points), deep=True))
conn = np.hstack([np.full((n, 1), k), blk.data]).astype(np.int64).ravel()
ca = vtk.vtkCellArray(); ca.SetCells(n, numpy_to_vtkIdTypeArray(conn, deep=True))
g = vtk.vtkUnstructuredGrid(); g.SetPoints(pts); g.SetCells(vtype, ca)
t0 = time.perf_counter()
for measure in ('AspectRatio', 'ScaledJacobian', 'MinAngle'):
    q = vtk.vtkMeshQuality(); q.SetInputData(g)
    for fam in ('Tet', 'Hex'):
        getattr(q, f'Set{{fam}}QualityMeasureTo{{measure}}', lambda: None)()
    q.Update()
print(time.perf_counter() - t0)
"""


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--cells", type=float, default=1e6)
    ap.add_argument("--kind", choices=("tet", "tet10", "hex"), default="tet")
    ap.add_argument("--dir", type=Path, default=Path(tempfile.gettempdir()) / "meshcheck-bench")
    ap.add_argument("--no-vtk", action="store_true", help="skip the VTK reference")
    ap.add_argument("--repeat", type=int, default=3, help="fresh processes per timing of "
                    "the references and the cached audit; the best is used (default 3)")
    ap.add_argument("--numpy", action="store_true", help="also time the numpy reference path")
    ap.add_argument("--full", action="store_true", help="also time the default audit "
                    "(all reports and the cost quote)")
    args = ap.parse_args(argv)
    args.dir.mkdir(parents=True, exist_ok=True)
    path = ensure_mesh(args.dir, args.cells, args.kind)
    compile_package(package_folder())
    rows = []

    n_rep = max(1, args.repeat)
    t_read = min(_child(f"import meshio; meshio.read({str(path)!r})")[0] for _ in range(n_rep))
    rows.append((f"meshio.read, fresh process (ref 1), best of {n_rep}", t_read, None))
    t_vtk = None
    if not args.no_vtk:
        try:
            t_vtk = min(float(_child(VTK_CODE.format(path=str(path)))[2].strip().splitlines()[-1])
                        for _ in range(n_rep))
            rows.append((f"VTK quality, 3 metrics (ref 2), best of {n_rep}", t_vtk, None))
        except subprocess.CalledProcessError as exc:
            print("VTK reference failed:", exc.stderr.strip().splitlines()[-1:], file=sys.stderr)

    cache = Path(tempfile.mkdtemp(prefix="meshcheck-numba-"))
    # meshcheck's own cache (usable-kh tables, the kernels' module) in folders of the run's:
    # the user's may hold a module built ahead of time
    own = Path(tempfile.mkdtemp(prefix="meshcheck-cache-"))
    env = {**os.environ, "NUMBA_CACHE_DIR": str(cache), "MESHCHECK_CACHE_DIR": str(own / "jit")}

    cpu = {}  # label -> resource usage of the run whose time is shown

    def run_audit(label, extra_env=None, lean=True, repeat=1):
        """Best of ``repeat`` fresh processes (time, peak of that run, its report)."""
        runs = [_audit_once(extra_env, lean) for _ in range(repeat)]
        t, peak, report, usage = min(runs, key=lambda r: r[0])
        cpu[label] = usage
        timings = report["timings_s"]
        analysis = timings.get("analysis", sum(v for k, v in timings.items() if k != "read"))
        more = f", best of {repeat} (median {sorted(r[0] for r in runs)[repeat // 2]:.2f} s)" \
            if repeat > 1 else ""
        rows.append((label + more, t, peak))
        rows.append(("  of which analysis after reading", analysis, None))
        return t, peak, report

    def _audit_once(extra_env, lean):
        with tempfile.TemporaryDirectory() as tmp:
            cmd = [sys.executable, "-m", "meshcheck.cli", "audit", str(path), "--units", "m",
                   "--fmin", "50", "--fmax", "2000", "--step", f"{1950 / 199:.6f}", "--quiet",
                   "--out", tmp] + (["--reports", "json,vtu", "--no-cost"] if lean else [])
            t, peak, code, usage = _measured(cmd, {**env, **(extra_env or {})})
            found = list(Path(tmp).glob("*.audit.json"))
            if code not in (0, 1) or not found:
                raise SystemExit(f"audit failed with exit code {code}, files "
                                 f"{sorted(p.name for p in Path(tmp).iterdir())}:\n"
                                 f"{_measured.stderr_tail}")
            report = json.loads(found[0].read_text())
        return t, peak, report, usage

    run_audit("audit json+vtu, empty numba cache (compiles)")
    t_audit, peak, report = run_audit("audit json+vtu, 200 frequencies (cached)",
                                      repeat=n_rep)
    # the kernels built ahead of time, in a copy of the cache folder (usable-kh tables)
    shutil.copytree(own / "jit", own / "ahead")
    ahead_env = {"MESHCHECK_CACHE_DIR": str(own / "ahead")}
    t0 = time.perf_counter()
    built = subprocess.run([sys.executable, "-m", "meshcheck.cli", "kernels", "--build",
                            "--quiet"], env={**env, **ahead_env}, capture_output=True, text=True)
    t_build = time.perf_counter() - t0
    t_jit, peak_jit = t_audit, peak
    aot_label = "audit json+vtu, 200 frequencies (cached)"
    if built.returncode == 0:
        aot_label = "audit json+vtu, kernels built ahead of time"
        t_audit, peak, report = run_audit(aot_label, ahead_env, repeat=n_rep)
    else:  # e.g. no C compiler: the figures of numba's cache stand
        print("meshcheck kernels --build failed:", built.stderr.strip(), file=sys.stderr)
        t_build = float("nan")
    timings = report["timings_s"]
    if args.numpy:
        run_audit("  same on the numpy path", {"MESHCHECK_KERNELS": "numpy"})
    if args.full:
        run_audit("default audit (all reports, cost quote)", lean=False)

    sweep_code = f"""
import time, numpy as np
from meshcheck.reading import read_mesh
from meshcheck.topology import build_topology
from meshcheck.advice import advise, sweep, AdviceSettings
m = read_mesh({str(path)!r}, 'm'); topo = build_topology(m)
c = np.full(m.n_cells, 343.2)
for n in (10, 1000) * 5:  # alternated: the machine's speed drifts
    t0 = time.perf_counter()
    a = advise(m, topo, c, 2000.0, AdviceSettings())
    sweep(m, topo, a, np.linspace(50, 2000, n))
    print("sweep", n, time.perf_counter() - t0)
from meshcheck.pipeline import AuditSettings, audit
for n in (10, 1000) * 3:  # the whole analysis (every stage after reading)
    t0 = time.perf_counter()
    audit(m, AuditSettings(tuple(np.linspace(50, 2000, n))))
    print("audit", n, time.perf_counter() - t0)
"""
    _, _, out = _child(sweep_code, env)
    times = {}
    for line in out.strip().splitlines():
        what, n, t = line.split()
        times.setdefault((what, int(n)), []).append(float(t))
    t10, t1000 = min(times["sweep", 10]), min(times["sweep", 1000])
    a10, a1000 = min(times["audit", 10]), min(times["audit", 1000])

    n_cells = sum(report["input"]["cells"].values())
    print(f"mesh: {path.name}, {n_cells:,} cells, {report['input']['points']:,} points")
    print(f"{'what':72s} {'time s':>8s} {'peak MiB':>9s}")
    for name, t, mem in rows:
        print(f"{name:72s} {t:8.2f} {'' if mem is None else f'{mem:9.0f}'}")
    print("stage timings (s): " + ", ".join(f"{k} {v:.2f}" for k, v in timings.items()))
    u = cpu[aot_label]
    print(f"CPU of that audit: user {u.ru_utime:.2f} s, system {u.ru_stime:.2f} s, "
          f"{u.ru_minflt:,} minor page faults (system time: mostly clearing new pages, "
          f"docs/performance.md)")
    print(f"meshcheck kernels --build (once per code and library versions): {t_build:.1f} s")
    print(f"ratio audit / meshio.read:            {t_audit / t_read:6.2f}   (target <= 6; "
          f"numba's cache instead of the built kernels: {t_jit / t_read:.2f})")
    if t_vtk:
        print(f"ratio audit / VTK quality (3 metrics): {t_audit / t_vtk:6.2f}   (target <= 1; "
              f"numba's cache: {t_jit / t_vtk:.2f})")
    print(f"ratio audit 1000 / 10 frequencies:    {a1000 / a10:6.2f}   (target <= 1.2; analysis "
          f"after reading, best of 3 alternations in one process)")
    print(f"ratio sweep 1000 / 10 frequencies:    {t1000 / t10:6.2f}   (advice + sweep only, "
          f"best of 5: a stricter measure)")
    print(f"peak memory of the audit:             {peak:6.0f} MiB   (numba's cache: "
          f"{peak_jit:.0f} MiB)")
    shutil.rmtree(cache, ignore_errors=True)
    shutil.rmtree(own, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
