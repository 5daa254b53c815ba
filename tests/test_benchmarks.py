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
    for line in ("ratio audit / meshio.read", "ratio sweep 1000 / 10 frequencies",
                 "peak memory of the audit"):
        assert line in text
