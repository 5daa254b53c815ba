"""Compiled kernels for the hot paths of large meshes, with numpy as the reference.

The numpy code of each module (topology, quality, advice, ...) is the reference
implementation and stays tested; the kernels in this package compute the same
arrays with numba (compiled on first use and cached on disk, so later runs pay
only the load). They are used for meshes of :data:`MIN_CELLS` cells or more.

The environment variable ``MESHCHECK_KERNELS`` chooses:

* ``auto`` (default): compiled kernels for meshes of ``MIN_CELLS`` cells or more
  when numba is installed, numpy otherwise;
* ``numba``: compiled kernels for every mesh (the tests compare both paths);
* ``numpy``: the numpy reference everywhere.
"""
from __future__ import annotations

import functools
import importlib.util
import os
import threading

__all__ = ["MIN_CELLS", "Kernel", "available", "use_compiled", "use_built", "njit",
           "warm_up_async"]

#: smallest mesh (cells) for which ``auto`` takes the compiled kernels. Loading numba and
#: the cached kernels costs about 1 s per process; measured analysis times (2 cores,
#: benchmarks/bench_audit.py) are about 0.84 s + 4.1 us/cell compiled against 8.2 us/cell
#: with numpy, equal near 230,000 cells
MIN_CELLS = 250_000


@functools.lru_cache(maxsize=None)
def available() -> bool:
    """True when numba can be imported."""
    return importlib.util.find_spec("numba") is not None


def mode() -> str:
    """The chosen mode: "auto", "numba" or "numpy" (read at every call)."""
    value = os.environ.get("MESHCHECK_KERNELS", "auto").strip().lower() or "auto"
    if value not in ("auto", "numba", "numpy"):
        from ..errors import SettingsError
        raise SettingsError(f"MESHCHECK_KERNELS={value!r} is not a mode; use auto, numba or numpy")
    return value


def use_compiled(n_items: int) -> bool:
    """Whether work over ``n_items`` cells (or edges) takes the compiled kernels."""
    m = mode()
    if m == "numpy" or not available():
        return False
    return m == "numba" or n_items >= MIN_CELLS


def use_built(n_bytes: int) -> bool:
    """Whether reading a file of ``n_bytes`` bytes takes the compiled field parsers
    (:mod:`meshcheck.kernels.text`): in ``auto`` mode only when the file is at least
    :data:`WARM_UP_BYTES` and the ahead-of-time module (:mod:`meshcheck.kernels.ahead`)
    is built, since the reading comes before numba could be set up beside it (the
    module loads in milliseconds, numba's set-up takes about 0.25 s); always in
    ``numba`` mode, never in ``numpy`` mode."""
    m = mode()
    if m == "numpy" or not available():
        return False
    if m == "numba":
        return True
    from . import ahead

    return n_bytes >= WARM_UP_BYTES and ahead.available()


#: input files of at least this many bytes start loading numba while they are read
#: (about 16 bytes per tetrahedron in binary MSH, more in text formats: 250,000 cells
#: take 4-30 MB)
WARM_UP_BYTES = 16 << 20


#: the shared library of numba's code generator (llvmlite's LLVM)
LLVM_LIBRARY = "libllvmlite"


def _warm_up() -> None:
    """Import numba and load one cached kernel (numba's code generator is set up once
    per process, about 0.4 s, mostly outside the GIL), then drop from the resident set
    the LLVM library pages that set-up touched (:func:`meshcheck.threads.release_library_pages`:
    the audit's later kernel loads touch about 10 of those 67 MiB again; measured peak
    RSS of the 1M-tet json+vtu audit 365-368 -> 307-309 MiB, docs/performance.md)."""
    import numpy as np

    from ..threads import release_library_pages
    from . import topology as kt

    kt.mark_used.dispatcher(np.zeros((1, 1), np.int32), np.zeros(1, bool))
    release_library_pages(LLVM_LIBRARY)


def warm_up_async(file_bytes: int):
    """Start loading numba on a daemon thread when a file of ``file_bytes`` bytes is
    likely to take the compiled kernels; returns the thread, or None (also when the
    ahead-of-time module of :mod:`meshcheck.kernels.ahead` is built: no numba needed)."""
    if mode() == "numpy" or file_bytes < WARM_UP_BYTES or not available():
        return None
    from . import ahead

    if ahead.available():
        return None

    def run():
        try:
            _warm_up()
        except Exception:  # the kernels' own first use reports any real problem
            pass

    t = threading.Thread(target=run, name="meshcheck-warm-up", daemon=True)
    t.start()
    return t


#: the module numba's array functions import to look for BLAS (see :func:`_import_numba`)
_BLAS_MODULE = "scipy.linalg.cython_blas"


def _import_numba():
    """Import numba and its array functions without scipy.linalg.

    ``numba.np.arraymath`` imports :data:`_BLAS_MODULE` when numba first compiles or
    loads a function, only to choose BLAS for ``np.correlate`` / ``np.convolve`` (its
    ``_HAVE_BLAS``; without it they take numba's own loop).  That pulls in all of
    scipy.linalg: 26 MiB resident and 0.15-0.18 s on the project's machine.  No kernel
    of ours calls BLAS, so the module is hidden while numba's array functions load;
    afterwards it imports as usual (numba's ``ensure_blas`` imports it again when a
    jitted ``np.dot`` or ``np.linalg`` function is first typed)."""
    import sys

    hide = _BLAS_MODULE not in sys.modules and "numba.np.arraymath" not in sys.modules
    if hide:
        sys.modules[_BLAS_MODULE] = None  # import of it raises ImportError meanwhile
    try:
        import numba
        import numba.np.arraymath  # noqa: F401
    finally:
        if hide and sys.modules.get(_BLAS_MODULE, 0) is None:
            del sys.modules[_BLAS_MODULE]
    return numba


class Kernel:
    """A compiled kernel, called like the Python function it wraps.

    A call takes the specialisation of the ahead-of-time extension module
    (:mod:`meshcheck.kernels.ahead`) whose argument types match exactly, when such a
    module was built for this code; otherwise numba's dispatcher, which is made (and
    numba imported) on first need, compiled on first use and cached on disk.
    ``py_func`` is the Python function; :attr:`dispatcher` the numba dispatcher."""

    def __init__(self, fn, options: dict):
        self.py_func = fn
        self.options = options
        self.key = (fn.__module__, fn.__qualname__)
        self._dispatcher = None
        self._ahead = None  # {type key: compiled function}, {} when none, None: not looked up
        functools.update_wrapper(self, fn)
        _KERNELS.append(self)

    def __call__(self, *args):
        specs = self._ahead
        if specs is None:
            specs = self._ahead = _ahead.specialisations(self)
        if specs or _ahead.RECORDING is not None:
            full = args
            n = self.py_func.__code__.co_argcount
            if len(args) < n and self.py_func.__defaults__:
                full = args + self.py_func.__defaults__[len(args) - n:]
            key = _ahead.type_key(full)
            if _ahead.RECORDING is not None and key is not None:
                _ahead.RECORDING.add((self.key, key))
            fn = specs.get(key)
            if fn is not None:
                return fn(*full)
            if not _JIT_USED:  # a call the module lacks: numba is set up here, not beside
                return _first_jit_call(self.dispatcher, args)  # the reading
        return self.dispatcher(*args)

    @property
    def dispatcher(self):
        """numba's dispatcher of this kernel (numba is imported on first use)."""
        if self._dispatcher is None:
            _make_dispatchers()
        return self._dispatcher

    @property
    def signatures(self) -> list:
        """The argument types numba has compiled or loaded so far in this process."""
        return self.dispatcher.signatures if self._dispatcher is not None else []

    def __repr__(self):
        return f"<meshcheck kernel {self.key[0]}.{self.key[1]}>"


#: whether a dispatcher ran a call the ahead-of-time module lacks (see _first_jit_call)
_JIT_USED = False


def _first_jit_call(dispatcher, args):
    """The first call of a kernel that the built module lacks: numba's set-up runs here
    (not on the warm-up thread, which is not started when the module is built), so its
    LLVM library pages are dropped after it, as the warm-up does (:func:`_warm_up`)."""
    global _JIT_USED
    out = dispatcher(*args)
    if not _JIT_USED:
        _JIT_USED = True
        from ..threads import release_library_pages

        release_library_pages(LLVM_LIBRARY)
    return out


#: every kernel defined so far, in definition order
_KERNELS: list[Kernel] = []
_DISPATCH_LOCK = threading.RLock()


def _make_dispatchers() -> None:
    """Make numba's dispatcher of every kernel that has none yet.

    Each dispatcher compiles a copy of the kernel's function whose globals are a copy of
    its module's namespace in which every :class:`Kernel` is replaced by its dispatcher:
    numba resolves the kernels a kernel calls (helpers, inlined or not) as dispatchers,
    while the modules' own names stay the kernels (so that Python callers keep the
    ahead-of-time path).  The copies keep the functions' code, file and qualified name,
    so numba's on-disk cache finds them.  The kernels get their dispatchers only once
    every namespace is complete: another thread never compiles against a namespace that
    still holds kernels (numba would not know their type)."""
    import types

    with _DISPATCH_LOCK:
        todo = [k for k in _KERNELS if k._dispatcher is None]
        if not todo:
            return
        numba = _import_numba()
        made = {}
        spaces = {}
        for k in todo:
            f = k.py_func
            ns = spaces.setdefault(f.__module__, dict(f.__globals__))
            g = types.FunctionType(f.__code__, ns, f.__name__, f.__defaults__, f.__closure__)
            g.__qualname__, g.__doc__, g.__module__ = f.__qualname__, f.__doc__, f.__module__
            made[k] = numba.njit(**{"cache": True, "nogil": True, **k.options})(g)
        for k in _KERNELS:  # every namespace (also those made before) sees the dispatchers
            d = made.get(k, k._dispatcher)
            if d is not None:
                glob = d.py_func.__globals__
                for name, value in list(glob.items()):
                    if isinstance(value, Kernel):
                        glob[name] = made.get(value, value._dispatcher)
        for k, d in made.items():
            k._dispatcher = d


def njit(fn=None, **options):
    """Declare a compiled kernel (a :class:`Kernel`; numba options such as
    ``inline="always"`` are passed on, with on-disk caching and the GIL released).
    Usable as a bare decorator or with options."""
    if fn is None:
        return lambda f: Kernel(f, options)
    return Kernel(fn, options)


from . import ahead as _ahead  # noqa: E402 (it needs Kernel's module loaded first)
