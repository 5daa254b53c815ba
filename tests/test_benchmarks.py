"""The benchmark scripts run (on a small size) and print their ratios."""
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def test_bench_audit_small(tmp_path):
    pytest.importorskip("gmsh")
    out = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "bench_audit.py"),
                          "--cells", "5e3", "--dir", str(tmp_path)],
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    text = out.stdout
    for line in ("ratio audit / meshio.read", "ratio audit 1000 / 10 frequencies",
                 "ratio sweep 1000 / 10 frequencies",
                 "peak memory of the audit", "meshcheck kernels --build"):
        assert line in text


@pytest.mark.parametrize("extra", [[], ["--numpy"]])
def test_bench_nastran_small(tmp_path, extra):
    pytest.importorskip("gmsh")
    out = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "bench_nastran.py"),
                          str(tmp_path), "--cells", "5e3", "--repeat", "1", "--fresh", "1"]
                         + extra, capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    text = out.stdout
    assert ("(ours on the numpy path)" in text) == bool(extra)
    for line in ("identical to gmsh: coordinates True, tetrahedra True",
                 "identical to meshio: coordinates and tetrahedra True",
                 "speed-up vs gmsh", "speed-up vs meshio", "first read in a fresh process"):
        assert line in text


def test_bench_ab_runs_each_version_from_its_own_tree(tmp_path):
    # "python -m" puts the working folder first on sys.path: a child started inside a
    # checkout would import that checkout whatever PYTHONPATH says
    sys.path.insert(0, str(ROOT / "benchmarks"))
    try:
        import bench_ab
    finally:
        sys.path.remove(str(ROOT / "benchmarks"))
    assert bench_ab.package_of(ROOT) == (ROOT / "meshcheck").resolve()
    other = tmp_path / "tree"
    (other / "meshcheck").mkdir(parents=True)
    (other / "meshcheck" / "__init__.py").write_text("")
    assert bench_ab.package_of(other) == (other / "meshcheck").resolve()
    # and with cache folders of its own (the kernels' module is named by the kernels'
    # hash: a shared cache would leave one version without its module)
    bench_ab._CACHES.update({ROOT: tmp_path / "cache-new", other: tmp_path / "cache-old"})
    try:
        envs = [bench_ab._env(t) for t in (ROOT, other)]
    finally:
        bench_ab._CACHES.clear()
    assert [e["MESHCHECK_CACHE_DIR"] for e in envs] == [str(tmp_path / "cache-new"),
                                                         str(tmp_path / "cache-old")]
    assert envs[1]["NUMBA_CACHE_DIR"] == str(tmp_path / "cache-old" / "numba")
    assert envs[1]["PYTHONPATH"] == str(other)


def test_bench_ab_compares_two_versions_by_alternating_runs():
    # HEAD against this checkout on the small sample mesh: both rows and the ratios
    if subprocess.run(["git", "-C", str(ROOT), "rev-parse", "HEAD"],
                      capture_output=True).returncode:
        pytest.skip("not a git checkout")
    out = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "bench_ab.py"),
                          str(ROOT / "sample_meshes" / "enclosure.msh"), "--rev", "HEAD",
                          "--runs", "1", "--no-build"],  # (the sample takes no kernels)
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    lines = out.stdout.splitlines()
    rows = {ln.split()[0]: [float(x) for x in ln.split()[1:]] for ln in lines
            if ln.split() and ln.split()[0] in ("old", "new")}
    assert set(rows) == {"old", "new"} and all(len(v) == 4 and v[0] > 0 for v in rows.values())
    assert any(ln.startswith("ratio new / old: wall best") for ln in lines)
    assert "old = HEAD, new = " in out.stdout
    listed = subprocess.run(["git", "-C", str(ROOT), "worktree", "list"],
                            capture_output=True, text=True).stdout
    assert "meshcheck-ab-" not in listed  # the temporary worktree is removed


@pytest.mark.skipif(not Path("/proc/self/statm").exists(), reason="reads /proc/self/statm")
def test_stage_memory_prints_a_peak_per_stage_and_the_whole_run():
    out = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "stage_memory.py"),
                          str(ROOT / "sample_meshes" / "enclosure.msh"), "--runs", "1"],
                         capture_output=True, text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-2000:]
    rows = {ln[:12].strip(): float(ln[12:]) for ln in out.stdout.splitlines()[1:]}
    for stage in ("reading", "topology", "advice", "reports", "whole run"):
        assert rows[stage] > 0, stage
    # the whole run's peak is the highest stage peak, and the audit holds more than the
    # interpreter did before reading
    assert rows["whole run"] == max(v for k, v in rows.items() if k != "whole run")
    assert rows["topology"] > rows["start"]
