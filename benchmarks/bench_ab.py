"""Compare the audit of two meshcheck versions by alternating fresh processes.

Usage::

    python benchmarks/bench_ab.py MESH --rev REV [--runs 3] [--tree DIR] [--pause S]

The project's machine changes speed by tens of percent within the hour (the same audit
of 4.77M tets took 9.5 s at one time of a day and 12.5-14 s an hour later, the
references with it), so a figure measured now cannot be compared with one from an
earlier table.  This script runs ``meshcheck audit MESH --reports json,vtu --no-cost``
of the git revision REV (checked out in a temporary worktree, put first on PYTHONPATH)
and of the source tree DIR (default: this checkout) in turn, ``--runs`` times each, in
fresh processes, after writing each tree's bytecode (``compileall``, as an installed
package has it) and one untimed run of each (which fills its numba cache), and prints
for both the best and median wall time, the best analysis time (from the JSON report)
and the highest peak resident memory, and the ratios new / old.

Each version gets cache folders of its own (``MESHCHECK_CACHE_DIR``, ``NUMBA_CACHE_DIR``)
and, unless ``--no-build``, its own kernels' module (``meshcheck kernels --build``, about a
minute each): the module is named by a hash of the kernels' sources, so with one shared
cache a version whose kernels differ from the built ones ran on numba's cached kernels
instead (on 2026-12-05 that made an old version look 0.3 s slower and 55 MiB larger).

``--pause S`` waits S seconds before each timed run. The project's machine is a virtual
machine whose host takes back the memory its guest leaves free for a few seconds (free
page reporting), and a page it must then supply anew costs about 2 ms per MiB at its first
touch (a 529 MB file written through the page cache: 0.12 s right after another process
freed its memory, 1.2-1.4 s after a pause of 4 s). Runs back to back measure the first
case, runs after a pause of 5 s the second, which is that of an audit started on a machine
left idle.
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
from bench_audit import _peak_of, compile_package  # noqa: E402

AUDIT = ["--units", "m", "--fmin", "50", "--fmax", "2000", "--step", f"{1950 / 199:.6f}",
         "--quiet", "--reports", "json,vtu", "--no-cost"]


#: each version's own meshcheck and numba cache folders (set in main): the kernels'
#: module is named by a hash of the kernels' sources, so two versions whose kernels differ
#: cannot share one (the other would run on numba's cached kernels, not its own module)
_CACHES: dict = {}


def _env(tree: Path) -> dict:
    env = {**os.environ, "PYTHONPATH": str(tree)}
    cache = _CACHES.get(tree)
    if cache is not None:
        env.update(MESHCHECK_CACHE_DIR=str(cache), NUMBA_CACHE_DIR=str(cache / "numba"))
    return env


def build_kernels(tree: Path) -> str:
    """``meshcheck kernels --build`` of the version in ``tree`` into its own cache folder;
    returns the state line of ``meshcheck kernels`` afterwards."""
    with tempfile.TemporaryDirectory() as cwd:
        subprocess.run([sys.executable, "-m", "meshcheck.cli", "kernels", "--build"],
                       env=_env(tree), cwd=cwd, capture_output=True, text=True)
        out = subprocess.run([sys.executable, "-m", "meshcheck.cli", "kernels"],
                             env=_env(tree), cwd=cwd, capture_output=True, text=True).stdout
    state = [ln for ln in out.splitlines() if "state" in ln]
    return " ".join(state[0].replace("│", " ").split()) if state else "state unknown"


def package_of(tree: Path) -> Path:
    """Where a fresh process with ``tree`` first on PYTHONPATH imports meshcheck from
    (run outside any source tree: ``python -m`` puts the working folder first)."""
    with tempfile.TemporaryDirectory() as cwd:
        out = subprocess.run([sys.executable, "-c", "import meshcheck; print(meshcheck.__file__)"],
                             env=_env(tree), cwd=cwd, check=True, capture_output=True, text=True)
    return Path(out.stdout.strip()).resolve().parent


def audit_once(tree: Path, mesh: Path) -> tuple[float, float, float]:
    """(wall s, peak MiB, analysis s) of one audit with the package of source tree
    ``tree`` in a fresh process (started in its output folder, outside any tree)."""
    with tempfile.TemporaryDirectory() as out:
        t, peak, code = _peak_of([sys.executable, "-m", "meshcheck.cli", "audit",
                                  str(mesh.resolve()), *AUDIT, "--out", out], _env(tree), out)
        if code not in (0, 1):
            raise SystemExit(f"{tree}: audit failed with exit code {code}")
        report = json.loads(next(Path(out).glob("*.audit.json")).read_text())
    return t, peak, report["timings_s"]["analysis"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("mesh", type=Path)
    ap.add_argument("--rev", required=True, help="git revision of the version to compare with")
    ap.add_argument("--tree", type=Path, default=HERE.parent,
                    help="source tree of the version under test (default: this checkout)")
    ap.add_argument("--runs", type=int, default=3, help="timed runs of each version")
    ap.add_argument("--pause", type=float, default=0.0,
                    help="seconds to wait before each timed run (see above)")
    ap.add_argument("--no-build", action="store_true",
                    help="do not build each version's kernels' module (numba's cache then)")
    args = ap.parse_args(argv)
    repo = HERE.parent
    base = Path(tempfile.mkdtemp(prefix="meshcheck-ab-")) / "tree"
    subprocess.run(["git", "-C", str(repo), "worktree", "add", "--detach", str(base), args.rev],
                   check=True, capture_output=True)
    try:
        trees = {"old": base, "new": args.tree.resolve()}
        for name, tree in trees.items():
            _CACHES[tree] = base.parent / f"cache-{name}"
            if package_of(tree) != (tree / "meshcheck").resolve():
                raise SystemExit(f"the {name} version's audit would not import meshcheck from "
                                 f"{tree} (found {package_of(tree)})")
            compile_package(tree / "meshcheck")  # both as installed: bytecode written
            if not args.no_build:
                print(f"{name}: kernels' module {build_kernels(tree)}", flush=True)
            audit_once(tree, args.mesh)  # fills the tree's numba cache; not timed
        runs = {k: [] for k in trees}
        for _ in range(max(1, args.runs)):
            for name, tree in trees.items():
                time.sleep(args.pause)
                runs[name].append(audit_once(tree, args.mesh))
    finally:
        subprocess.run(["git", "-C", str(repo), "worktree", "remove", "--force", str(base)],
                       capture_output=True)
        shutil.rmtree(base.parent, ignore_errors=True)
    print(f"mesh: {args.mesh.name}; old = {args.rev}, new = {trees['new']}; "
          f"{len(runs['old'])} alternating runs each"
          + (f", each after a pause of {args.pause:g} s" if args.pause else ""))
    print(f"{'version':8s} {'wall best':>10s} {'median':>8s} {'analysis best':>14s} "
          f"{'peak MiB':>9s}")
    figures = {}
    for name, r in runs.items():
        wall = sorted(x[0] for x in r)
        figures[name] = (wall[0], statistics.median(wall), min(x[2] for x in r),
                         max(x[1] for x in r))
        print(f"{name:8s} {figures[name][0]:10.2f} {figures[name][1]:8.2f} "
              f"{figures[name][2]:14.2f} {figures[name][3]:9.0f}")
    o, n = figures["old"], figures["new"]
    print(f"ratio new / old: wall best {n[0] / o[0]:.3f}, median {n[1] / o[1]:.3f}, "
          f"analysis {n[2] / o[2]:.3f}, peak {n[3] / o[3]:.3f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
