"""Run independent numpy-heavy pieces of work on the machine's cores.

numpy releases the GIL in sorts, gathers and ufunc loops on large arrays, so a
thread pool spreads such work over the cores without copying the mesh.
"""
from __future__ import annotations

import functools
import os
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, Iterable

__all__ = ["thread_map", "ranges", "pieces", "workers", "MAX_WORKERS", "share_malloc_arena", "fix_mmap_threshold",
           "hold_heap_top", "no_huge_page_advice", "can_release", "release_tail", "reuse_or_empty",
           "release_library_pages"]

#: most threads used (the project's target machine has 2 cores); the environment
#: variable MESHCHECK_THREADS sets it (1 = everything serial)
MAX_WORKERS = max(1, int(os.environ.get("MESHCHECK_THREADS", "4") or 4))


def ranges(n: int, parts: int) -> list[tuple[int, int]]:
    """(lo, hi) ranges splitting range(n) into at most ``parts`` pieces of nearly equal
    size (for kernels that take a range of items, run by :func:`thread_map`)."""
    import numpy as np

    cuts = np.linspace(0, n, max(1, min(parts, n)) + 1).astype(np.int64)
    return [(int(a), int(b)) for a, b in zip(cuts[:-1], cuts[1:])]


#: pieces per thread of the work :func:`pieces` splits: a thread that shares its core
#: with another stage's job (the stages overlap) then takes fewer of them, where two
#: fixed halves left one core idle while the other half finished
PIECES_PER_WORKER = 4


def pieces(n: int, parallel: bool = True) -> list[tuple[int, int]]:
    """:func:`ranges` of ``n`` items for :func:`thread_map`: :data:`PIECES_PER_WORKER`
    per worker thread when ``parallel`` and there are two or more, else one. For kernels
    whose cost does not grow with the number of pieces and whose result does not depend
    on the split."""
    w = workers()
    return ranges(n, PIECES_PER_WORKER * w if parallel and w > 1 else 1)


def workers() -> int:
    """Threads :func:`thread_map` would use for many items: the cores, at most
    :data:`MAX_WORKERS`."""
    return max(1, min(os.cpu_count() or 1, MAX_WORKERS))


def thread_map(fn: Callable, items: Iterable, parallel: bool = True) -> list:
    """``[fn(x) for x in items]``, computed on up to :data:`MAX_WORKERS` threads when
    ``parallel`` and the machine has more than one core (results in input order)."""
    items = list(items)
    workers = min(len(items), os.cpu_count() or 1, MAX_WORKERS)
    if not parallel or workers < 2:
        return [fn(x) for x in items]
    with ThreadPoolExecutor(max_workers=workers) as pool:
        return list(pool.map(fn, items))


#: glibc's mallopt parameter numbers of M_ARENA_MAX, M_MMAP_THRESHOLD and
#: M_TRIM_THRESHOLD (malloc.h), and the last one's default (bytes)
_M_ARENA_MAX = -8
_M_MMAP_THRESHOLD = -3
_M_TRIM_THRESHOLD = -1
_DEFAULT_TRIM_THRESHOLD = 128 * 1024
#: blocks from this size (bytes) up are mapped on their own and returned when freed
#: (smaller blocks reuse the heap's pages without new page faults)
MMAP_THRESHOLD = 64 * 2**20


@functools.lru_cache(maxsize=None)
def _libc():
    """The C library (ctypes), or None where it cannot be loaded."""
    import ctypes
    import ctypes.util

    try:
        return ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None


def _mallopt():
    """glibc's ``mallopt``, or None where the C library is not glibc."""
    import ctypes

    libc = _libc()
    try:
        mallopt = libc.mallopt
        libc.gnu_get_libc_version  # glibc only (mallopt's parameters are glibc's)
    except AttributeError:  # also: no C library (None)
        return None
    mallopt.argtypes, mallopt.restype = (ctypes.c_int, ctypes.c_int), ctypes.c_int
    return mallopt


def share_malloc_arena() -> bool:
    """Make every thread allocate from glibc's one main arena (``mallopt(M_ARENA_MAX,
    1)``, the same as MALLOC_ARENA_MAX=1); True when set, False where the C library is
    not glibc.  For a process's owner (the CLI calls it first), not for a library.

    By default each worker thread gets an arena of its own, and memory a thread frees
    there stays resident, unusable by the others: measured peak RSS of an audit with and
    without it (2 cores): 1M tetrahedra 648 -> 612 MiB, 1M hexahedra 1,183 -> 1,087 MiB,
    1M tetra10 1,057 -> 988 MiB, 4.8M tetrahedra 2,274 -> 2,159 MiB, no slower.  Threads
    that already have an arena keep it.
    """
    mallopt = _mallopt()
    return mallopt is not None and mallopt(_M_ARENA_MAX, 1) == 1


def no_huge_page_advice() -> bool:
    """Stop numpy from advising transparent huge pages for its new arrays (numpy's
    ``_set_madvise_hugepage(False)``, the same as NUMPY_MADVISE_HUGEPAGE=0 before numpy
    is imported); True when done, False where numpy lacks the switch.  For a process's
    owner (the CLI calls it first), not for a library.

    numpy asks Linux for huge pages (``madvise(MADV_HUGEPAGE)``) on every array from
    4 MiB, so with the kernel's ``defrag`` setting ``madvise`` (the default of many
    distributions) each new array waits while the kernel compacts memory into 2 MiB
    blocks.  On the project's 2-core virtual machine (2026-12-04): a process's first
    256 MiB array filled in 0.46-0.61 s with the advice against 0.10-0.25 s without; the
    json+vtu audit with and without it (``bench_ab.py``, alternating fresh runs, best /
    median wall): 4.77M tets 4.33 / 4.50 -> 3.71 / 3.92 s (analysis 3.30 -> 2.58 s, 5
    runs; system CPU 2.0-2.6 -> 0.9-1.2 s under ``time``), 966k tets 1.30 / 1.31 -> 1.14 /
    1.18 s, 1M hexahedra 1.95 / 2.04 -> 1.92 / 1.94 s, 966k tetra10 2.12 / 2.28 -> 2.08 /
    2.15 s (4 runs each), peaks within 7 MiB.  The gain depends on how fragmented free
    memory is: alternating the switch alone later (5 runs each), 4.77M tets 3.68-4.83 ->
    3.61-3.76 s, 966k tets 1.02-1.10 and 1.03-1.08 s (no change)."""
    try:
        from numpy._core.multiarray import _set_madvise_hugepage
    except ImportError:
        try:
            from numpy.core.multiarray import _set_madvise_hugepage
        except ImportError:
            return False
    _set_madvise_hugepage(False)
    return True


def release_free_heap() -> bool:
    """Give the heap's free pages back to the system (glibc's ``malloc_trim(0)``); True
    where done, False where the C library is not glibc.

    Blocks below :data:`MMAP_THRESHOLD` freed by earlier stages stay resident in the
    heap's holes (115 MiB of them after the advice of a 4.77M-tet audit); the pages
    given back are faulted in afresh when used again (the CLI calls it after a large
    audit when heavier reports follow, see :data:`meshcheck.pipeline.TRIM_CELLS`)."""
    libc = _libc()
    try:
        trim = libc.malloc_trim
        libc.gnu_get_libc_version
    except AttributeError:
        return False
    trim(0)
    return True


def fix_mmap_threshold() -> bool:
    """Keep glibc's mmap threshold at :data:`MMAP_THRESHOLD` (``mallopt(M_MMAP_THRESHOLD)``,
    the same as MALLOC_MMAP_THRESHOLD_): every block from 64 MiB up is mapped on its own
    and given back to the system when freed; smaller ones come from the heap, whose freed
    pages the next blocks reuse without the kernel clearing new ones.  True when set,
    False where the C library is not glibc.  For a process's owner (the CLI calls it
    first), not for a library.

    glibc's own rule (raise the threshold to the size of each mapped block freed, up to
    32 MiB) depends on the order of the frees.  A fixed threshold trades speed against
    the heap's holes: 4.77M tetrahedra (json+vtu audit, 5 alternating runs each, 2026-12-04)
    4 MiB: wall 4.14-4.68 s (median 4.35), system CPU 1.05-1.96 s, peak 928-932 MiB;
    64 MiB (the per-cell float64 arrays of that mesh, 36 MiB, and the chunk buffers from
    the heap): 3.93-4.21 s (median 4.05), 0.76-1.00 s, 940-963 MiB; 32 MiB between the
    two.  966k tetrahedra: the same time and peak (251 MiB) with either; 1M hexahedra
    (3 runs) 2.02-2.04 -> 1.75-1.92 s, peak 386-395 -> 447-449 MiB; 966k tetra10 (2 runs)
    2.09-2.29 -> 1.94-2.00 s, 403-404 -> 408-415 MiB.  On this
    virtual machine the kernel's clearing of new pages was a fifth of the 4.77M audit's
    CPU samples (``perf``).  The eighth session measured glibc's dynamic rule against
    4 MiB: peaks 1,196-1,198 -> 1,155 MiB at the time.
    """
    mallopt = _mallopt()
    return mallopt is not None and mallopt(_M_MMAP_THRESHOLD, MMAP_THRESHOLD) == 1


#: free memory at the top of the heap kept while :func:`hold_heap_top` is on (bytes)
HELD_HEAP_TOP = 2**30
_heap_top_held = False


def hold_heap_top(on: bool = True) -> bool:
    """Keep the free memory at the top of glibc's heap up to :data:`HELD_HEAP_TOP` (on;
    ``mallopt(M_TRIM_THRESHOLD)``), or give the heap's free pages back
    (:func:`release_free_heap`) and trim its top again as glibc does by default (off, 128
    KiB; only after an ``on``).  True when done, False where the C library is not glibc
    or there was nothing to undo.  For a process's owner (the CLI turns it on first and
    off once a mesh below :data:`meshcheck.pipeline.TRIM_CELLS` cells is read), not for a
    library.

    By default glibc returns the heap's top to the system whenever more than 128 KiB of
    it is free, so a stage that frees its scratch there and the next that allocates
    again fault the same memory in twice (the kernel clears every new page: a sixth of a
    4.77M-tet audit's CPU samples, ``perf``, 2026-12-05).  Held, the pages are reused;
    the audit gives them back at its end (:func:`release_free_heap`), before the
    reports.  4.77M tetrahedra, json+vtu audit, 6 alternating fresh runs each: wall
    median 2.96 -> 2.885 s, system CPU 0.72-0.82 -> 0.61-0.70 s, peak unchanged (919-921
    MiB); page faults 381-437k -> 353-355k (held to the end instead: 334-338k faults, the
    peak 944-959 MiB).  Held through a whole 966k-tet audit, the peak with numba's cached
    kernels rose 4 MiB (302-304 -> 305-309 MiB), hence off below 2M cells."""
    global _heap_top_held
    if not on and not _heap_top_held:
        return False
    mallopt = _mallopt()
    size = HELD_HEAP_TOP if on else _DEFAULT_TRIM_THRESHOLD
    if mallopt is None or mallopt(_M_TRIM_THRESHOLD, size) != 1:
        return False
    _heap_top_held = on
    if not on:
        release_free_heap()
    return True


#: ``madvise`` advice number of MADV_DONTNEED (Linux, <sys/mman.h>)
_MADV_DONTNEED = 4


@functools.lru_cache(maxsize=None)
def _madvise():
    """The C library's ``madvise`` on Linux, or None."""
    import ctypes
    import sys

    if not sys.platform.startswith("linux"):
        return None
    try:
        fn = _libc().madvise
    except AttributeError:  # also: no C library (None)
        return None
    fn.argtypes, fn.restype = (ctypes.c_void_p, ctypes.c_size_t, ctypes.c_int), ctypes.c_int
    return fn


def can_release() -> bool:
    """Whether :func:`release_tail` can give pages back here (Linux's ``madvise``)."""
    return _madvise() is not None


def release_tail(a, start: int) -> int:
    """Give back to the system the whole memory pages of the bytes ``start:`` of the
    C-contiguous array ``a`` (``madvise(MADV_DONTNEED)``; Linux only) and return how many
    bytes that was (0 where not supported or nothing to give).

    For scratch arrays of which only a head is used from now on: the pages keep their
    place in the address space and read as zeros if touched again (Linux madvise(2):
    anonymous private pages are zero-filled on demand), so the caller must never read
    those bytes again.  Pages shared with memory beyond ``a`` are kept (the range is
    rounded inwards to page boundaries)."""
    import mmap

    fn = _madvise()
    if fn is None or not a.flags.c_contiguous or a.nbytes <= start:
        return 0
    page = mmap.PAGESIZE
    addr = a.ctypes.data
    lo = -(-(addr + max(start, 0)) // page) * page
    hi = (addr + a.nbytes) // page * page
    if hi <= lo or fn(lo, hi - lo, _MADV_DONTNEED) != 0:
        return 0
    return hi - lo


def reuse_or_empty(spare: list, n: int, dtype):
    """A (n,) array of ``dtype``: the head of the last array in ``spare`` (popped, its
    unused tail given back with :func:`release_tail`) when that one is C-contiguous, of
    the same type and at least as long and the tail can be given back, else a new
    ``np.empty``.  Contents are undefined either way.  Reusing a scratch array that was
    already written spares the kernel from clearing new pages (about 0.4 s per GiB on the
    project's machine, more with huge pages)."""
    import numpy as np

    if spare and can_release() and spare[-1].dtype == dtype and spare[-1].ndim == 1 and \
            len(spare[-1]) >= n and spare[-1].flags.c_contiguous:
        buf = spare.pop()
        release_tail(buf, n * buf.itemsize)
        return buf[:n]
    return np.empty(n, dtype)


def release_library_pages(name: str) -> int:
    """Drop from the resident set the pages of the read-only mappings of the shared
    library whose file name contains ``name`` (Linux; ``madvise(MADV_DONTNEED)`` on each
    mapping that is not writable and holds no privately modified page, read from
    ``/proc/self/smaps``) and return how many resident bytes that was (0 where not
    supported or nothing matched).

    The pages are the library file's own, unchanged: they stay in the page cache and
    fault back in, with the same contents, when the code runs again (Linux madvise(2):
    private file mappings are re-read from the file).  For a library whose one-time
    set-up touches much more of it than later use does: numba's LLVM (about 67 MiB of a
    179 MB file resident after numba's set-up, of which the audit touches again about
    10 MiB)."""
    fn = _madvise()
    if fn is None:
        return 0
    try:
        with open("/proc/self/smaps") as f:
            text = f.read()
    except OSError:
        return 0
    done = 0
    vma = None
    for line in text.splitlines():
        head = line.split(maxsplit=5)
        if len(head) >= 5 and "-" in head[0] and ":" not in head[0]:
            vma = None
            if len(head) == 6 and name in head[5].rsplit("/", 1)[-1] and "w" not in head[1]:
                lo, hi = (int(x, 16) for x in head[0].split("-"))
                vma = {"lo": lo, "hi": hi}
        elif vma is not None and line.startswith(("Rss:", "Private_Dirty:", "Anonymous:")):
            key, value = line.split(":", 1)
            vma[key] = int(value.split()[0]) * 1024
            if "Rss" in vma and "Private_Dirty" in vma and "Anonymous" in vma:
                if vma["Private_Dirty"] == 0 and vma["Anonymous"] == 0 and vma["Rss"] and \
                        fn(vma["lo"], vma["hi"] - vma["lo"], _MADV_DONTNEED) == 0:
                    done += vma["Rss"]
                vma = None
    return done
