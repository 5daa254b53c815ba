"""Ahead-of-time build of the compiled kernels: one extension module, no numba at run time.

numba compiles a kernel on first use and caches it on disk, but every process still
pays for importing numba, setting up its code generator and loading each cached
kernel: measured on the project's 2-core machine about 0.3 s of a 1M-tetrahedron
audit (docs/performance.md).  ``meshcheck kernels --build`` (:func:`build`) compiles
the kernels' usual specialisations, listed in ``specialisations.json``, into one
extension module with numba's ahead-of-time compiler (``numba.pycc``, which needs a C
compiler), stored in meshcheck's cache folder under a name that carries a hash of the
kernels' sources and of the numba, numpy and Python versions.  A
:class:`meshcheck.kernels.Kernel` call takes the module's function when one matches
its arguments' types exactly (:func:`type_key`), else numba's dispatcher as before,
so a stale, missing or partial module only costs speed.  The module's functions are
the same numba code, compiled by the same LLVM with the same options (the GIL released,
the kernel's error model), for this machine's processor.
"""
from __future__ import annotations

import contextlib
import functools
import hashlib
import json
import os
import sys
import threading
from pathlib import Path

import numpy as np

__all__ = ["type_key", "code_tag", "module_path", "available", "specialisations", "build",
           "prune", "recording", "record", "SPECIALISATIONS"]

#: the specialisations built: [module, qualified name, [argument tokens]] (:func:`record`)
SPECIALISATIONS = Path(__file__).with_name("specialisations.json")

#: the kernels' modules (their sources make the hash of the built module's name)
_MODULES = ("advice", "cells", "cost", "directional", "geometry", "ordering", "sizefield",
            "stats", "text", "topology")


def _token(a):
    """Type token of one argument as numba would type it, or None (no ahead-of-time
    specialisation: numba's dispatcher takes the call)."""
    if isinstance(a, np.ndarray):
        if not a.dtype.isnative or a.dtype.kind not in "biuf":
            return None
        f = a.flags
        layout = "C" if f.c_contiguous else "F" if f.f_contiguous else "A"
        # numba.typeof types every array as aligned (the field stays for its Array type)
        return (a.dtype.name, a.ndim, layout, not f.writeable, True)
    if isinstance(a, (bool, np.bool_)):
        return "bool"
    if isinstance(a, int):
        return "int64" if -2**63 <= a < 2**63 else None
    if isinstance(a, float):
        return "float64"
    if isinstance(a, np.generic) and a.dtype.kind in "iuf":
        return a.dtype.name
    return None


def type_key(args: tuple):
    """Hashable key of the argument types of a call (numba's typing of arrays: dtype,
    ndim, layout C/F/A, read-only; Python ints as int64, floats as float64), or
    None when an argument has no token."""
    key = tuple(_token(a) for a in args)
    return None if None in key else key


def _token_of_type(t):
    """The token of a numba type (the inverse of :func:`_numba_type`; the tests check
    :func:`type_key` against ``numba.typeof`` with it)."""
    from numba.core import types
    from numba.np.numpy_support import as_dtype

    if isinstance(t, types.Array):
        return (as_dtype(t.dtype).name, t.ndim, t.layout, not t.mutable, bool(t.aligned))
    if isinstance(t, types.Omitted):
        return _token(t.value)
    if isinstance(t, types.Boolean):
        return "bool"
    return as_dtype(t).name


def _numba_type(token):
    """The numba type of a token."""
    import numba
    from numba.core import types

    if isinstance(token, str):
        return types.boolean if token == "bool" else numba.from_dtype(np.dtype(token))
    name, ndim, layout, readonly, aligned = token
    dt = types.boolean if name == "bool" else numba.from_dtype(np.dtype(name))
    return types.Array(dt, ndim, layout, readonly=readonly, aligned=aligned)


@functools.lru_cache(maxsize=1)
def code_tag() -> str:
    """16 hex digits of the hash of the kernels' sources, the specialisation list and the
    numba, numpy and Python versions and platform: a built module is used only by the
    code and libraries that built it."""
    import platform

    h = hashlib.sha256()
    here = Path(__file__).parent
    for name in ("__init__", "ahead") + _MODULES:
        h.update((here / f"{name}.py").read_bytes())
    h.update(SPECIALISATIONS.read_bytes() if SPECIALISATIONS.is_file() else b"")
    h.update(_numba_version())
    h.update(f" {np.__version__} {sys.version} {platform.machine()}".encode())
    return h.hexdigest()[:16]


def _numba_version() -> bytes:
    """What names the installed numba's version: the bytes of its ``_version.py`` (found
    without importing numba or ``importlib.metadata``, whose import alone takes 17-35 ms
    of a fresh process), else its distribution's version, else b"none"."""
    import importlib.util

    spec = importlib.util.find_spec("numba")
    if spec is None or not spec.origin:
        return b"none"
    try:
        return (Path(spec.origin).parent / "_version.py").read_bytes()
    except OSError:
        import importlib.metadata

        try:
            return importlib.metadata.version("numba").encode()
        except importlib.metadata.PackageNotFoundError:
            return b"none"


def module_name() -> str:
    return f"meshcheck_kernels_{code_tag()}"


def module_path() -> Path | None:
    """Where the built module of this code lives (in the folder of
    :func:`meshcheck.cache.cache_dir`), or None when the cache is off."""
    import importlib.machinery

    from ..cache import cache_dir

    folder = cache_dir()
    if folder is None:
        return None
    return folder / (module_name() + importlib.machinery.EXTENSION_SUFFIXES[0])


_LOAD_LOCK = threading.Lock()
_LOADED: list = []


def _loaded():
    """(module, {kernel key: {type key: function}}) of the built module, or None (looked
    up once per process; :func:`_forget` looks again)."""
    if not _LOADED:
        with _LOAD_LOCK:  # the threads' first kernel calls: the module is loaded once
            if not _LOADED:
                _LOADED.append(_load())
    return _LOADED[0]


def _forget() -> None:
    """Look for the module again at the next call (after a build; the tests)."""
    _LOADED.clear()


def _load():
    from . import mode

    if mode() == "numpy":
        return None
    path = module_path()
    if path is None or not path.is_file():
        return None
    try:
        manifest = json.loads(path.with_suffix(".json").read_text())
        import importlib.util

        spec = importlib.util.spec_from_file_location(module_name(), path)
        mod = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(mod)
    except (OSError, ValueError, ImportError):
        return None  # unreadable or foreign: numba's dispatchers take every call
    table: dict = {}
    for module, qualname, tokens, symbol in manifest["functions"]:
        fn = getattr(mod, symbol, None)
        if fn is not None:
            key = tuple(t if isinstance(t, str) else tuple(t) for t in tokens)
            table.setdefault((module, qualname), {})[key] = fn
    return mod, table


def available() -> bool:
    """Whether a module built for this very code is in the cache folder and loads."""
    return _loaded() is not None


def specialisations(kernel) -> dict:
    """{type key: compiled function} of one kernel in the built module ({} without one)."""
    got = _loaded()
    return {} if got is None else got[1].get(kernel.key, {})


def _kernels():
    """Every kernel of the package (imports the kernels' modules)."""
    import importlib

    from . import _KERNELS

    for name in _MODULES:
        importlib.import_module(f"{__package__}.{name}")
    return list(_KERNELS)


#: the (kernel key, type key) of every call from Python while :func:`recording`, else None
RECORDING: set | None = None


@contextlib.contextmanager
def recording():
    """Collect the kernels' calls from Python (their type keys, defaults filled in) while
    the block runs: the specialisations a module needs.  Only calls from Python count:
    the helper kernels that kernels call are compiled into their callers."""
    global RECORDING
    RECORDING = set()
    try:
        yield RECORDING
    finally:
        RECORDING = None


def record(calls, path: Path | None = None) -> list:
    """Add ``calls`` (from :func:`recording`) to the list ``path`` (default
    :data:`SPECIALISATIONS`) and return the list (sorted, unique; entries of kernels that
    no longer exist, or now take another number of arguments, are dropped).  For
    benchmarks/record_kernels.py, which audits meshes in ``MESHCHECK_KERNELS=numba`` mode."""
    path = Path(path) if path is not None else SPECIALISATIONS
    known = json.loads(path.read_text()) if path.is_file() else []
    arity = {k.key: k.py_func.__code__.co_argcount for k in _kernels()}
    known = [e for e in known if arity.get((e[0], e[1])) == len(e[2])]  # kernels gone or
    seen = {json.dumps(e) for e in known}                                # changed: dropped
    for (module, qualname), key in calls:
        e = [module, qualname, [list(t) if isinstance(t, tuple) else t for t in key]]
        if json.dumps(e) not in seen:
            seen.add(json.dumps(e))
            known.append(e)
    known.sort(key=json.dumps)
    path.write_text("[\n" + ",\n".join(json.dumps(e) for e in known) + "\n]\n")
    return known


def build(listing: Path | None = None, timeout: float = 1800.0) -> Path:
    """Build the module of this code's kernels into the cache folder (in a child process:
    numba's compiler and its memory stay out of this one) and return its path.
    ``listing``: the specialisations to build (default :data:`SPECIALISATIONS`; the tests
    build a few).  Raises :class:`meshcheck.errors.SettingsError` with the reason when
    it cannot."""
    import subprocess

    from ..errors import SettingsError

    path = module_path()
    if path is None:
        raise SettingsError("MESHCHECK_CACHE_DIR is off: set it to a folder to build the "
                            "kernels' module into")
    r = subprocess.run([sys.executable, "-m", __name__, str(path),
                        str(listing or SPECIALISATIONS)], capture_output=True, text=True,
                       timeout=timeout)
    if r.returncode != 0 or not path.is_file():
        lines = [s for s in (r.stderr or r.stdout).strip().splitlines() if s.strip()]
        raise SettingsError(f"building the kernels' module failed: "
                            f"{lines[-1] if lines else 'no message'} (numba's ahead-of-time "
                            "compiler needs a C compiler, e.g. gcc)")
    _forget()
    return path


def _compile(path: Path, listing: Path = SPECIALISATIONS) -> None:
    """Compile the listed specialisations into the extension module ``path`` (and its
    manifest ``path.json``), in this process: numba.pycc with the GIL released and the
    kernels' error model, for this machine's processor."""
    import shutil
    import tempfile
    import warnings

    warnings.simplefilter("ignore")  # numba.pycc's pending-deprecation notice
    import numba.pycc.compiler as pcc
    from numba.pycc import CC

    kernels = {k.key: k for k in _kernels()}
    options: dict = {}
    original = pcc.compile_extra

    def compile_extra(typingctx, targetctx, func, args, return_type, flags, locals,
                      library=None, pipeline_class=None):
        flags = flags.copy()
        flags.release_gil = True
        for name, value in options.get(func, {}).items():
            setattr(flags, name, value)
        kw = {} if pipeline_class is None else {"pipeline_class": pipeline_class}
        return original(typingctx, targetctx, func, args, return_type, flags, locals,
                        library=library, **kw)

    pcc.compile_extra = compile_extra
    entries = json.loads(Path(listing).read_text())
    name = path.name.split(".")[0]
    cc = CC(name)
    cc.target_cpu = "host"
    cc.verbose = False
    done = []
    for i, (module, qualname, tokens) in enumerate(entries):
        k = kernels.get((module, qualname))
        if k is None:
            continue
        args = tuple(_numba_type(t) for t in tokens)
        disp = k.dispatcher
        try:
            disp.compile(args)
            ret = disp.overloads[args].signature.return_type
        except Exception as exc:  # a listed type this code no longer accepts: left out
            print(f"left out {module}.{qualname}{tokens}: {exc}", file=sys.stderr)
            continue
        symbol = f"k{i}"
        if "error_model" in k.options:
            options[disp.py_func] = {"error_model": k.options["error_model"]}
        cc.export(symbol, ret(*args))(disp.py_func)
        done.append([module, qualname, tokens, symbol])
    with tempfile.TemporaryDirectory() as tmp:
        cc.output_dir = tmp
        cc.compile()
        built = Path(tmp) / cc.output_file
        path.parent.mkdir(parents=True, exist_ok=True)
        staged = path.with_name(f"{path.name}.{os.getpid()}.tmp")
        shutil.copyfile(built, staged)
        manifest = path.with_suffix(".json")
        manifest.write_text(json.dumps({"tag": code_tag(), "package": _package(),
                                        "functions": done}))
        os.replace(staged, path)  # the module last: its presence means "complete"
    print(f"{len(done)} of {len(entries)} specialisations in {path}")
    gone = prune(path)
    if gone:
        print(f"removed {len(gone)} module(s) this installation built for other code")


def _package() -> str:
    """This installation, recorded in a module's manifest: the meshcheck package's folder
    and the Python environment (two environments may share one source checkout)."""
    return f"{Path(__file__).resolve().parent.parent} | {Path(sys.prefix).resolve()}"


def prune(keep: Path) -> list:
    """Remove the modules (and manifests) in ``keep``'s folder that this installation
    (the same package folder and Python environment) built for other code: after an
    upgrade or an edit they can never load again.  Modules of other installations sharing
    the folder, and those whose manifest names none (built before 2026-12-04), are left.
    Returns the paths removed."""
    gone = []
    for manifest in keep.parent.glob("meshcheck_kernels_*.json"):
        module = manifest.with_suffix(keep.suffix)
        if module == keep:
            continue
        try:
            if json.loads(manifest.read_text()).get("package") != _package():
                continue
            for f in (module, manifest):
                f.unlink(missing_ok=True)  # a process that loaded it keeps its mapping
        except (OSError, ValueError, AttributeError):
            continue
        gone.append(module)
    return gone


if __name__ == "__main__":
    _compile(Path(sys.argv[1]), Path(sys.argv[2]) if len(sys.argv) > 2 else SPECIALISATIONS)
