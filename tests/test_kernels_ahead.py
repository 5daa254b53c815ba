"""The ahead-of-time module of the kernels (meshcheck.kernels.ahead).

References: numba's own typing (``numba.typeof``) for the type keys, numba's
just-in-time dispatchers for the results (the same kernels compiled on first use),
and Python's GIL (a pure-Python thread must run while a kernel runs).
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import sysconfig
from pathlib import Path

import numpy as np
import pytest

from meshcheck.kernels import ahead

numba = pytest.importorskip("numba")

ROOT = Path(__file__).resolve().parent.parent


def _can_compile() -> str | None:
    """Why numba.pycc cannot build here (None when it can)."""
    if not shutil.which(os.environ.get("CC", "cc")) and not shutil.which("gcc"):
        return "no C compiler"
    if not (Path(sysconfig.get_paths()["include"]) / "Python.h").is_file():
        return "no Python.h"
    return None


def _values():
    a = np.arange(24, dtype=np.int32).reshape(6, 4)
    ro = np.linspace(0, 1, 9).reshape(3, 3)
    ro.setflags(write=False)
    unaligned = np.frombuffer(b"\0" + np.arange(4.0).tobytes(), np.float64, 4, offset=1)
    return [a, np.asfortranarray(a.astype(np.float64)), a[:, ::2], a[::2, 0], ro, unaligned,
            np.zeros(3, bool), np.zeros(5, np.uint8), np.zeros((2, 2, 2), np.float32),
            np.zeros(0, np.int64), 3, -7, 2.5, True, np.int32(4), np.float32(1.5),
            np.uint64(9), np.int64(-1), np.bool_(False)]


@pytest.mark.parametrize("value", _values(), ids=lambda v: type(v).__name__ + (
    f"-{v.dtype}-{v.ndim}d" if isinstance(v, np.ndarray) else f"-{v!r}"))
def test_type_key_matches_numba_typeof(value):
    # the key of a call must be numba's typing of its arguments: dtype, ndim, layout
    # (C / F / A), read-only, aligned for arrays; int64 / float64 / bool for Python scalars
    assert ahead.type_key((value,)) == (ahead._token_of_type(numba.typeof(value)),)


def test_type_key_declines_what_it_cannot_type():
    # other objects and non-native byte orders go to numba's dispatcher
    assert ahead.type_key((None,)) is None
    assert ahead.type_key(((1, 2),)) is None
    assert ahead.type_key((np.zeros(3, ">f8"),)) is None
    assert ahead.type_key((2**64,)) is None


def test_listed_specialisations_name_real_kernels():
    # every listed entry is a kernel of the package with as many argument types as the
    # function has parameters, each a type numba can build
    entries = json.loads(ahead.SPECIALISATIONS.read_text())
    kernels = {k.key: k for k in ahead._kernels()}
    assert len(entries) >= 60
    assert len({json.dumps(e) for e in entries}) == len(entries)
    for module, qualname, tokens in entries:
        k = kernels[(module, qualname)]
        assert len(tokens) == k.py_func.__code__.co_argcount, (module, qualname)
        for t in tokens:
            ahead._numba_type(t if isinstance(t, str) else tuple(t))


def test_recording_drops_entries_of_kernels_gone_or_changed(tmp_path):
    listing = tmp_path / "list.json"
    real = json.loads(ahead.SPECIALISATIONS.read_text())[:3]
    stale = [["meshcheck.kernels.text", "line_table", [["uint8", 1, "C", True, True]]],
             [real[0][0], real[0][1], real[0][2][:-1]]]       # one argument fewer
    listing.write_text(json.dumps(real + stale))
    assert ahead.record(set(), listing) == sorted(real, key=json.dumps)


def test_sample_audits_use_only_listed_specialisations(tmp_path):
    # the list is what the audits of the bundled meshes use: recording them again (numba's
    # dispatchers, in a fresh process) adds nothing
    listing = tmp_path / "list.json"
    shutil.copyfile(ahead.SPECIALISATIONS, listing)
    before = json.loads(listing.read_text())
    env = {**os.environ, "MESHCHECK_CACHE_DIR": str(tmp_path / "cache")}
    subprocess.run([sys.executable, str(ROOT / "benchmarks" / "record_kernels.py"), "--out",
                    str(listing)], check=True, env=env, capture_output=True, timeout=900)
    assert json.loads(listing.read_text()) == before


#: a few kernels of every kind: arrays in and out, a bool result, a tuple result, a
#: default argument, a raised exception, inf and nan (a flat tetrahedron)
_SUBSET = [
    ["meshcheck.kernels.topology", "mark_used", [["int32", 2, "C", False, True],
                                                 ["bool", 1, "C", False, True]]],
    ["meshcheck.kernels.topology", "volumes_tetra", [["float64", 2, "C", True, True],
                                                     ["int32", 2, "C", False, True],
                                                     ["float64", 1, "C", False, True]]],
    ["meshcheck.kernels.cells", "tet_quality", [["float64", 2, "C", True, True],
                                                ["int32", 2, "C", False, True],
                                                ["float64", 2, "C", False, True], "int64"]],
    ["meshcheck.kernels.geometry", "face_jumps", [["int32", 2, "C", False, True],
                                                  ["uint8", 1, "C", False, True],
                                                  ["float64", 1, "C", False, True],
                                                  "float64", "int64", "int64"]],
    ["meshcheck.kernels.advice", "per_cell_max", [["int32", 2, "C", False, True],
                                                  ["float64", 1, "C", False, True],
                                                  ["float64", 1, "C", False, True], "int64"]],
    ["meshcheck.kernels.sizefield", "gradation_distances", [
        "int64", ["int32", 2, "C", False, True], ["float64", 1, "C", False, True],
        ["float64", 1, "C", False, True], "float64", "int64"]],
]

_CHECK = r"""
import sys, threading, numpy as np
from meshcheck.kernels import ahead, advice as ka
from meshcheck.kernels import topology as kt, cells as kc, geometry as kg, sizefield as ks
assert ahead.available()
rng = np.random.default_rng(5)
pts = rng.random((400, 3)); pts[7] = pts[8] = pts[9] = pts[10] = 0.5   # one flat tet
pts.setflags(write=False)
cells = rng.integers(0, 400, (900, 4)).astype(np.int32); cells[0] = (7, 8, 9, 10)
fc = rng.integers(0, 900, (1500, 2)).astype(np.int32)
cnt = rng.integers(1, 3, 1500).astype(np.uint8)
size = rng.random(900) * 3; size[4] = 0.0; size[5] = np.nan
vals = rng.random(400); vals[3] = np.nan
ed = rng.integers(0, 400, (3000, 2)).astype(np.int32)
w = rng.random(3000); h = np.where(rng.random(400) < 0.1, rng.random(400), np.inf)

def run(call):
    used = np.zeros(400, bool); vol = np.empty(900); q = np.full((8, 900), -1.0)
    mx = np.full(905, -1.0)
    r = [call(kt.mark_used, cells, used), used, call(kt.volumes_tetra, pts, cells, vol), vol,
         call(kc.tet_quality, pts, cells, q, 0), q,
         call(kg.face_jumps, fc, cnt, size, 1.5, 0, 1500),
         call(ka.per_cell_max, cells, vals, mx, 5), mx,
         call(ks.gradation_distances, 400, ed, w, h, 1.3)]
    return r

aot = run(lambda k, *a: k(*a))
loaded_numba = "numba" in sys.modules
hits = sum(bool(ahead.specialisations(k)) for k in (kt.mark_used, kt.volumes_tetra,
           kc.tet_quality, kg.face_jumps, ka.per_cell_max, ks.gradation_distances))
jit = run(lambda k, *a: k.dispatcher(*a))

def same(a, b):
    if isinstance(a, tuple):
        return len(a) == len(b) and all(same(x, y) for x, y in zip(a, b))
    if isinstance(a, np.ndarray):
        return a.dtype == b.dtype and a.shape == b.shape and np.array_equal(a, b, equal_nan=True)
    return a == b or (a != a and b != b)

# GIL: a pure-Python thread counts while the main thread runs one long kernel call.  With
# a switch interval of 0.2 s, a thread holding the GIL keeps it for 0.2 s: a kernel that
# does not release it leaves the count unchanged, one that does lets it grow
import time
sys.setswitchinterval(0.2)
big = np.zeros((3_000_000, 4), np.int32); mark = np.zeros(1, bool)
count = [0]; stop = [False]
def spin():
    while not stop[0]:
        count[0] += 1
t = threading.Thread(target=spin); t.start()
def during(fn):
    total = 0
    for _ in range(5):          # five windows: on a loaded machine the spinner may not be
        time.sleep(0.01)        # scheduled in one.  The spinner runs; the main thread gets
        c0 = count[0]           # the GIL back, then holds it for up to 0.2 s unless the
        fn(big, mark)           # call releases it
        total += count[0] - c0
    return total
free_aot = during(kt.mark_used)
free_jit = during(kt.mark_used.dispatcher)
held = during(lambda a, b: sum(range(300_000)))   # Python code keeps the GIL (reference)
stop[0] = True; t.join()
# a call the module lacks (int64 cells) takes numba, and LLVM's pages are dropped after it
from meshcheck import kernels as K
assert not K._JIT_USED
kt.mark_used(np.zeros((2, 2), np.int64), np.zeros(3, bool))
llvm, on = 0, False
for line in open("/proc/self/smaps"):
    h = line.split(maxsplit=5)
    if len(h) >= 5 and "-" in h[0] and ":" not in h[0]:
        on = len(h) == 6 and "libllvmlite" in h[5]
    elif on and line.startswith("Rss:"):
        llvm += int(line.split()[1])
print(loaded_numba, hits, all(same(a, b) for a, b in zip(aot, jit)), np.isnan(aot[5][:, 0]).any()
      or np.isinf(aot[5][:, 0]).any(), np.isnan(aot[8][5:]).any(), free_aot > 1000,
      free_jit > 1000, held == 0,
      K._JIT_USED, 0 < llvm < 24 * 1024)
"""


@pytest.mark.skipif(_can_compile() is not None, reason=str(_can_compile()))
@pytest.mark.skipif(sys.platform != "linux", reason="the check reads /proc/self/smaps")
def test_built_module_runs_the_kernels_as_numba_without_numba(tmp_path):
    # a module of a few specialisations: its calls give numba's results bit for bit
    # (arrays written, bool and tuple results, a default argument, NaN propagated by a
    # maximum, inf and nan of a flat tetrahedron), numba is never imported for them,
    # and they release the GIL as numba's nogil kernels do; a call the module lacks runs
    # through numba, after which LLVM's library pages are dropped (Linux's smaps)
    listing = tmp_path / "subset.json"
    listing.write_text(json.dumps(_SUBSET))
    env = {**os.environ, "MESHCHECK_CACHE_DIR": str(tmp_path / "cache")}
    env.pop("MESHCHECK_KERNELS", None)
    code = "from meshcheck.kernels import ahead; from pathlib import Path; " \
           f"print(ahead.build(Path({str(listing)!r})))"
    built = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                           text=True, timeout=900)
    assert built.returncode == 0, built.stderr
    path = Path(built.stdout.split()[-1])
    assert path.is_file() and path.parent == tmp_path / "cache"
    manifest = json.loads(path.with_suffix(".json").read_text())
    assert len(manifest["functions"]) == len(_SUBSET)
    out = subprocess.run([sys.executable, "-c", _CHECK], env=env, capture_output=True,
                         text=True, timeout=600)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == ["False", "6", "True", "True", "True", "True", "True", "True",
                                  "True", "True"], \
        out.stdout


def test_a_broken_module_is_ignored_and_numba_takes_the_calls(tmp_path, monkeypatch):
    # a file at the module's place that does not load (here: not a shared library) costs
    # only speed: no module, and the kernels run through numba's dispatchers
    monkeypatch.setenv("MESHCHECK_CACHE_DIR", str(tmp_path))
    monkeypatch.delenv("MESHCHECK_KERNELS", raising=False)
    ahead._forget()
    try:
        path = ahead.module_path()
        path.write_bytes(b"not a shared library")
        path.with_suffix(".json").write_text(json.dumps({"functions": []}))
        assert not ahead.available()
        from meshcheck.kernels import topology as kt

        used = np.zeros(4, bool)
        assert kt.mark_used(np.array([[0, 2]], np.int64), used)
        assert used.tolist() == [True, False, True, False]
    finally:
        ahead._forget()


def test_cli_kernels_reports_the_module_state(tmp_path, monkeypatch, capsys):
    from meshcheck.cli import main

    monkeypatch.setenv("MESHCHECK_CACHE_DIR", str(tmp_path))
    ahead._forget()
    try:
        assert main(["kernels"]) == 0
        text = " ".join(capsys.readouterr().out.split())
        assert "not built (meshcheck kernels --build)" in text
        assert f"specialisations listed │ {len(json.loads(ahead.SPECIALISATIONS.read_text()))}" \
            in text
    finally:
        ahead._forget()


def test_prune_removes_only_this_installations_modules_for_other_code(tmp_path):
    suffix = ".cpython-311-x86_64-linux-gnu"

    def module(tag, package):
        so = tmp_path / f"meshcheck_kernels_{tag}{suffix}.so"
        so.write_bytes(b"x")
        meta = {"tag": tag, "functions": []}
        if package is not None:
            meta["package"] = package
        so.with_suffix(".json").write_text(json.dumps(meta))
        return so

    keep = module("0000000000000000", ahead._package())
    old = module("1111111111111111", ahead._package())
    other = module("2222222222222222", "/elsewhere/meshcheck | /other/venv")
    legacy = module("3333333333333333", None)
    (tmp_path / "usable_kh_table.npy").write_bytes(b"y")        # not a module: left
    assert ahead.prune(keep) == [old]
    left = sorted(p.name for p in tmp_path.iterdir())
    assert left == sorted([keep.name, keep.with_suffix(".json").name, other.name,
                           other.with_suffix(".json").name, legacy.name,
                           legacy.with_suffix(".json").name, "usable_kh_table.npy"])


_RACE = r"""
import threading, time, numpy as np
from meshcheck import kernels as K
from meshcheck.kernels import cells as kc, topology as kt
numba = K._import_numba()
orig = numba.njit
total = sum(k._dispatcher is None for k in K._KERNELS)
made = [0]
def slow_njit(*args, **opts):
    if opts.get("cache"):     # ours (numba's own modules call njit too)
        made[0] += 1
        if made[0] == total:  # the last dispatcher: the others are made, the namespaces
            time.sleep(1.0)   # not yet filled
    return orig(*args, **opts)
numba.njit = slow_njit
t = threading.Thread(target=lambda: kt.mark_used.dispatcher(np.zeros((1, 1), np.int32),
                                                            np.zeros(1, bool)))
t.start()
time.sleep(0.3)
pts = np.array([[0.0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
q = np.zeros((8, 1))
kc.tet_quality(pts, np.array([[0, 1, 2, 3]], np.int32), q, 0)   # calls helper kernels
t.join()
print(round(q[3, 0], 12))
"""


def test_dispatchers_appear_only_with_their_namespaces_complete(tmp_path):
    # two threads' first kernel calls at once (the audit's topology and cell checks): the
    # second must wait until every namespace maps kernels to dispatchers, or numba, with
    # an empty cache, fails to type the helper kernels it calls
    env = {**os.environ, "NUMBA_CACHE_DIR": str(tmp_path / "numba"),
           "MESHCHECK_CACHE_DIR": str(tmp_path / "cache")}
    out = subprocess.run([sys.executable, "-c", _RACE], env=env, capture_output=True,
                         text=True, timeout=600)
    assert out.returncode == 0, out.stderr[-3000:]
    assert out.stdout.split() == ["0.707106781187"]  # scaled Jacobian of the corner tet


def test_audit_suggests_the_build_only_where_it_would_serve(tmp_path, monkeypatch, capsys):
    # a mesh that takes the compiled kernels (here: MIN_CELLS lowered to 1) without a built
    # module ends its summary with the tip; a small mesh, or the numpy mode, does not
    import meshio

    import meshcheck.kernels as K
    from meshcheck.cli import main
    from meshes import tet_box

    m = tet_box((2, 2, 2))
    path = tmp_path / "box.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("tetra", m.blocks[0].cells)]))
    monkeypatch.setenv("MESHCHECK_CACHE_DIR", str(tmp_path / "cache"))
    monkeypatch.delenv("MESHCHECK_KERNELS", raising=False)
    ahead._forget()
    args = ["audit", str(path), "-u", "m", "--fmax", "100", "--reports", "json", "--no-cost",
            "--out", str(tmp_path / "o")]
    try:
        main(args)
        assert "kernels --build" not in capsys.readouterr().out   # 48 cells: numpy
        monkeypatch.setattr(K, "MIN_CELLS", 1)
        main(args)
        assert "tip: `meshcheck kernels --build`" in " ".join(capsys.readouterr().out.split())
        monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
        main(args)
        assert "kernels --build" not in capsys.readouterr().out
    finally:
        ahead._forget()


def test_code_tag_follows_numbas_version_without_importing_metadata(monkeypatch):
    # the built module's name changes with the installed numba: its _version.py is
    # hashed (found without importing numba, or importlib.metadata, 17-35 ms of a fresh
    # process); the version importlib.metadata reports is in that file
    import importlib.metadata

    pytest.importorskip("numba")
    found = ahead._numba_version()
    assert importlib.metadata.version("numba").encode() in found
    tag = ahead.code_tag()
    ahead.code_tag.cache_clear()
    monkeypatch.setattr(ahead, "_numba_version", lambda: found + b"# another release\n")
    try:
        assert ahead.code_tag() != tag
    finally:
        ahead.code_tag.cache_clear()
    code = ("import sys; from meshcheck.kernels import ahead; ahead.code_tag(); "
            "print('importlib.metadata' in sys.modules, 'numba' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True)
    assert out.stdout.split() == ["False", "False"]
