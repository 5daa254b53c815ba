"""Peak resident memory of each stage of the audit, in fresh processes (Linux).

Usage::

    python benchmarks/stage_memory.py MESH [--runs 2]

Runs ``meshcheck audit MESH --reports json,vtu --no-cost`` (the audit and arguments of
``bench_ab.py``) through the command line's own entry point, so with its malloc settings,
in a fresh process per run after one untimed run (which fills the numba cache).  A thread
samples the process's resident memory (``/proc/self/statm``) every millisecond and keeps
the highest value per stage: the stages the audit reports through its progress callback
(reading, topology, validity, quality, advice, geometry, reports) and the size field the
reports compute.  Prints each stage's peak per run and the peak of the whole run.

The whole run's peak is ``bench_audit.py``'s figure; the stage peaks show which stage sets
it and what a change moves (a stage's peak includes everything held from earlier stages).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from contextlib import contextmanager
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench_ab import AUDIT  # noqa: E402

MARK = "stage-peaks:"


def _rss_mib() -> float:
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * os.sysconf("SC_PAGE_SIZE") / 2**20


def child(mesh: str, out: str) -> None:
    """One audit in this process; prints MARK and {stage: peak MiB} as JSON."""
    import meshcheck.cli as cli
    import meshcheck.sizefield as sf

    stage, peaks, order, done = ["start"], {}, ["start"], threading.Event()

    def sample():
        while not done.is_set():
            r, s = _rss_mib(), stage[0]
            if r > peaks.get(s, 0.0):
                peaks[s] = r
            time.sleep(0.001)

    def enter(name):
        stage[0] = name
        if name not in order:
            order.append(name)

    @contextmanager
    def stages(quiet):  # the CLI's progress display, replaced by the stage record
        yield enter

    size_field = sf.audit_size_field

    def timed_size_field(res, *args, **kw):  # computed beside the reports
        before = stage[0]
        enter("size field")
        try:
            return size_field(res, *args, **kw)
        finally:
            stage[0] = before

    cli._stages, sf.audit_size_field = stages, timed_size_field
    # a large mesh's audit ends its process itself (cli._exit_now): returned instead, so
    # that the peaks are printed (the teardown after them is not measured)
    cli._exit_now = lambda rc: rc
    thread = threading.Thread(target=sample, daemon=True)
    thread.start()
    sys.argv = ["meshcheck", "audit", mesh, *AUDIT, "--out", out]
    code = cli.main()  # argv None: the malloc settings of a process of its own
    done.set()
    thread.join()
    if code not in (0, 1):
        raise SystemExit(f"audit failed with exit code {code}")
    print(MARK + json.dumps({s: round(peaks[s], 1) for s in order if s in peaks}))


def run_once(mesh: Path) -> dict[str, float]:
    with tempfile.TemporaryDirectory() as out:
        p = subprocess.run([sys.executable, __file__, str(mesh.resolve()), "--child", out],
                           capture_output=True, text=True, cwd=out)
    if p.returncode:
        raise SystemExit(p.stderr[-2000:])
    line = next(ln for ln in p.stdout.splitlines() if ln.startswith(MARK))
    return json.loads(line[len(MARK):])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("mesh", type=Path)
    ap.add_argument("--runs", type=int, default=2, help="measured runs (fresh processes)")
    ap.add_argument("--child", metavar="OUT", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if not Path("/proc/self/statm").exists():
        raise SystemExit("stage_memory.py reads /proc/self/statm: Linux only")
    if args.child:
        child(str(args.mesh), args.child)
        return 0
    run_once(args.mesh)  # untimed: fills the numba cache
    runs = [run_once(args.mesh) for _ in range(args.runs)]
    names = list(dict.fromkeys(s for r in runs for s in r))
    print(f"mesh: {args.mesh.name}; peak resident memory per stage, MiB, {args.runs} runs")
    for s in names:
        print(f"{s:12s} " + " ".join(f"{r.get(s, float('nan')):8.0f}" for r in runs))
    print(f"{'whole run':12s} " + " ".join(f"{max(r.values()):8.0f}" for r in runs))
    return 0


if __name__ == "__main__":
    sys.exit(main())
