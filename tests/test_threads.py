"""thread_map: the serial result, in input order, whatever the number of threads; the
CLI's one malloc arena and fixed mmap threshold; scratch pages given back and reused."""
import platform
from pathlib import Path
import subprocess
import sys

import numpy as np
import pytest

from meshcheck.threads import ranges, release_tail, reuse_or_empty, thread_map


def test_results_in_input_order_and_equal_to_serial():
    rng = np.random.default_rng(2)
    arrays = [rng.random(200_000) for _ in range(7)]
    got = thread_map(np.sort, arrays)
    want = [np.sort(a) for a in arrays]
    assert all(np.array_equal(g, w) for g, w in zip(got, want))
    assert thread_map(lambda x: x * x, range(5), parallel=False) == [0, 1, 4, 9, 16]
    assert thread_map(len, []) == []


_ARENA_CHILD = r"""
import ctypes, ctypes.util, sys, tempfile, threading
from meshcheck.threads import share_malloc_arena
if sys.argv[1] == "share":
    assert share_malloc_arena() is True
libc = ctypes.CDLL(ctypes.util.find_library("c"))
libc.malloc.restype, libc.malloc.argtypes = ctypes.c_void_p, (ctypes.c_size_t,)
libc.free.argtypes = (ctypes.c_void_p,)
hold = threading.Barrier(4)
def work():  # each thread allocates while the others still live (arena per thread)
    p = libc.malloc(4096)
    hold.wait()
    libc.free(p)
ts = [threading.Thread(target=work) for _ in range(4)]
[t.start() for t in ts]; [t.join() for t in ts]
libc.fopen.restype, libc.fopen.argtypes = ctypes.c_void_p, (ctypes.c_char_p, ctypes.c_char_p)
libc.malloc_info.argtypes = (ctypes.c_int, ctypes.c_void_p)
libc.fclose.argtypes = (ctypes.c_void_p,)
with tempfile.NamedTemporaryFile(suffix=".xml") as f:
    fp = libc.fopen(f.name.encode(), b"w")
    libc.malloc_info(0, fp)
    libc.fclose(fp)
    print(open(f.name).read().count("<heap nr="))
"""


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc",
                    reason="glibc's arenas")
def test_share_malloc_arena_leaves_one_heap_in_glibcs_own_report():
    """glibc's malloc_info (its own XML report) counts one heap per arena: four live
    threads that allocate make extra arenas by default, none after share_malloc_arena."""
    def heaps(mode):
        out = subprocess.run([sys.executable, "-c", _ARENA_CHILD, mode], capture_output=True,
                             text=True, check=True)
        return int(out.stdout.strip())

    assert heaps("default") > 1
    assert heaps("share") == 1


_MMAP_CHILD = r"""
import ctypes, ctypes.util, sys
from meshcheck.threads import fix_mmap_threshold
if sys.argv[1] == "fixed":
    assert fix_mmap_threshold() is True
libc = ctypes.CDLL(ctypes.util.find_library("c"))
class Info(ctypes.Structure):  # glibc's struct mallinfo2 (malloc.h)
    _fields_ = [(n, ctypes.c_size_t) for n in ("arena ordblks smblks hblks hblkhd usmblks "
                                               "fsmblks uordblks fordblks keepcost").split()]
libc.mallinfo2.restype = Info
libc.malloc.restype, libc.malloc.argtypes = ctypes.c_void_p, (ctypes.c_size_t,)
libc.free.argtypes = (ctypes.c_void_p,)
out = []
for size in (40 << 20, 80 << 20):  # a block below MMAP_THRESHOLD (64 MiB), one above
    before = libc.mallinfo2().hblks    # mapped blocks in use
    p = libc.malloc(size)
    out.append(libc.mallinfo2().hblks - before)
print(*out)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc"
                    or tuple(map(int, platform.libc_ver()[1].split(".")[:2])) < (2, 33),
                    reason="glibc's mmap threshold, mallinfo2 from glibc 2.33")
def test_fixed_mmap_threshold_takes_the_blocks_below_it_from_the_heap():
    """glibc's own count of mapped blocks (mallinfo2().hblks): by default (a threshold of at
    most 32 MiB) a 40 MiB block is mapped on its own; with fix_mmap_threshold it comes from
    the heap, whose freed pages are reused without new page faults, and an 80 MiB block
    is still mapped (and given back when freed)."""
    from meshcheck.threads import MMAP_THRESHOLD

    def mapped(mode):
        out = subprocess.run([sys.executable, "-c", _MMAP_CHILD, mode], capture_output=True,
                             text=True, check=True)
        return [int(x) for x in out.stdout.split()]

    assert 40 << 20 < MMAP_THRESHOLD <= 80 << 20
    assert mapped("default") == [1, 1]
    assert mapped("fixed") == [0, 1]


_TRIM_CHILD = r"""
import ctypes, ctypes.util
import numpy as np
from meshcheck.threads import fix_mmap_threshold, release_free_heap
assert fix_mmap_threshold() is True
def rss():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * 4096
hole = np.empty(40 << 20, np.uint8)   # below the threshold: from the heap
hole[:] = 1                           # resident
keep = np.ones(1 << 20, np.uint8)     # after it in the heap: the hole is not the heap's top
del hole                              # freed: a hole, still resident
before = rss()
done = release_free_heap()
print(int(done), before - rss(), int(keep.sum() == 1 << 20))
"""


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc",
                    reason="glibc's malloc_trim")
def test_release_free_heap_gives_a_freed_hole_back():
    """A 40 MiB block freed inside the heap stays resident (the kernel's count,
    /proc/self/statm) until release_free_heap, which gives its pages back."""
    out = subprocess.run([sys.executable, "-c", _TRIM_CHILD], capture_output=True, text=True,
                         check=True)
    done, dropped, kept = (int(x) for x in out.stdout.split())
    assert done == 1 and kept == 1
    assert dropped >= 36 << 20


_HOLD_CHILD = r"""
import sys
import numpy as np
from meshcheck.threads import fix_mmap_threshold, hold_heap_top
assert fix_mmap_threshold() is True
undo = hold_heap_top(False)           # nothing held yet: nothing to undo
if sys.argv[1] == "held":
    assert hold_heap_top() is True
def rss():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * 4096
top = np.empty(40 << 20, np.uint8)    # below the mmap threshold: the heap's top
top[:] = 1                            # resident
before = rss()
del top                               # freed at the top of the heap
freed = before - rss()
off = hold_heap_top(False)
print(int(undo), freed, before - rss(), int(off))
"""


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc",
                    reason="glibc's M_TRIM_THRESHOLD")
def test_hold_heap_top_keeps_a_freed_top_until_turned_off():
    """glibc gives a freed 40 MiB block at the heap's top back at once by default (the
    kernel's count, /proc/self/statm); held (hold_heap_top), its pages stay resident for
    the next blocks until hold_heap_top(False), which gives them back."""
    def run(mode):
        out = subprocess.run([sys.executable, "-c", _HOLD_CHILD, mode], capture_output=True,
                             text=True, check=True)
        return [int(x) for x in out.stdout.split()]

    undo, freed, after_off, off = run("default")
    assert undo == 0 and off == 0 and freed >= 36 << 20
    undo, freed, after_off, off = run("held")
    assert undo == 0 and off == 1
    assert freed < 4 << 20 and after_off >= 36 << 20


_RELEASE_CHILD = r"""
import numpy as np
from meshcheck.threads import release_tail
def rss():
    with open("/proc/self/statm") as f:
        return int(f.read().split()[1]) * 4096
a = np.empty(64 << 20, np.uint8)
a[:] = 7                                   # every page written: resident
head = (16 << 20) + 123                    # a head ending inside a page
before = rss()
n = release_tail(a, head)
after = rss()
print(n, before - after, int((a[:head] == 7).all()), int((a[(17 << 20):-4096] == 0).all()),
      int((a[-16:] == 7).all()))
"""


@pytest.mark.skipif(platform.system() != "Linux", reason="madvise(MADV_DONTNEED) is Linux's")
def test_release_tail_gives_the_pages_back_and_keeps_the_head():
    # Linux madvise(2): MADV_DONTNEED frees the pages; anonymous private pages read as
    # zeros afterwards.  The kernel's own count of resident pages (/proc/self/statm)
    # must fall by about the 48 MiB past the head; the head (to its last byte, inside a
    # page that must be kept) and the array's last bytes (on a page it shares with
    # whatever follows it) must be intact.
    out = subprocess.run([sys.executable, "-c", _RELEASE_CHILD], capture_output=True,
                         text=True, check=True).stdout.split()
    n, dropped, head_ok, tail_zero, end_ok = map(int, out)
    assert 47 << 20 < n <= 48 << 20
    assert dropped > 40 << 20
    assert head_ok == 1 and tail_zero == 1 and end_ok == 1


_LIBRARY_CHILD = r"""
import ctypes, numpy as np
from meshcheck.kernels import topology as kt
from meshcheck.threads import release_library_pages
def mappings():
    out, cur = [], None
    for line in open("/proc/self/smaps"):
        head = line.split(maxsplit=5)
        if len(head) == 6 and "-" in head[0] and ":" not in head[0]:
            cur = None
            if "libllvmlite" in head[5] and "w" not in head[1]:
                cur = [*(int(x, 16) for x in head[0].split("-")), int(head[2], 16), head[5].strip(), 0]
                out.append(cur)
        elif cur is not None and line.startswith("Rss:"):
            cur[4] = int(line.split()[1]) * 1024
    return out
kt.mark_used(np.zeros((1, 1), np.int32), np.zeros(1, bool))    # sets LLVM up
maps = mappings()
lo, hi, offset, path, _ = max(maps, key=lambda m: m[4])         # the most resident one
page = ctypes.string_at(lo, 4096)
before = sum(m[4] for m in maps)
n = release_library_pages("libllvmlite")
after = sum(m[4] for m in mappings())
again = ctypes.string_at(lo, 4096)                               # faults the page back in
with open(path, "rb") as f:
    f.seek(offset)
    on_disk = f.read(4096)
used = np.zeros(5, bool)
kt.mark_used(np.array([[0, 2], [2, 4]], np.int64), used)        # kernels still run
print(before, n, after, int(page == again == on_disk), "".join(str(int(u)) for u in used))
"""


@pytest.mark.skipif(platform.system() != "Linux", reason="madvise(MADV_DONTNEED) is Linux's")
def test_release_library_pages_drops_llvm_pages_that_read_back_from_the_file():
    # Linux madvise(2): after MADV_DONTNEED, private file mappings are refilled from the
    # file on access.  After numba's set-up LLVM has tens of MiB resident; the release
    # must drop nearly all of them (the kernel's count in /proc/self/smaps), a dropped
    # page must read back byte for byte as the library file holds it, and compiled code
    # must still run and give the right answer.
    pytest.importorskip("numba")
    out = subprocess.run([sys.executable, "-c", _LIBRARY_CHILD], capture_output=True,
                         text=True, check=True).stdout.split()
    before, n, after, same, used = out
    before, n, after = int(before), int(n), int(after)
    assert before > 16 << 20                    # set-up touched much of the library
    assert n > before // 2 and after < before - n // 2
    assert same == "1"
    assert used == "10101"


def test_release_library_pages_of_no_such_library_is_nothing():
    from meshcheck.threads import release_library_pages

    assert release_library_pages("no-such-library-in-this-process") == 0


def test_release_tail_of_nothing_is_nothing():
    a = np.ones(100)                                      # 800 bytes: no whole page
    assert release_tail(a, a.nbytes) == 0 and release_tail(a, 0) == 0
    assert np.all(a == 1)
    assert release_tail(np.ones((100, 100))[:, :3], 0) == 0  # not contiguous


def test_reuse_or_empty_takes_a_long_enough_spare_of_the_type():
    big = np.arange(1000, dtype=np.int64)
    spare = [big]
    got = reuse_or_empty(spare, 600, np.int64)
    assert got.shape == (600,) and got.dtype == np.int64
    assert np.shares_memory(got, big) and spare == []
    for bad in (np.zeros(500, np.int64), np.zeros(1000, np.int32)):  # too short, other type
        spare = [bad]
        got = reuse_or_empty(spare, 600, np.int64)
        assert got.shape == (600,) and got.dtype == np.int64
        assert not np.shares_memory(got, bad) and len(spare) == 1
    assert reuse_or_empty([], 3, np.float32).shape == (3,)


def test_reuse_or_empty_takes_nothing_where_pages_cannot_be_given_back(monkeypatch):
    import meshcheck.threads as th

    monkeypatch.setattr(th, "_madvise", lambda: None)
    assert not th.can_release()
    big = np.arange(1000, dtype=np.int64)
    spare = [big]
    got = reuse_or_empty(spare, 600, np.int64)
    assert got.shape == (600,) and not np.shares_memory(got, big) and len(spare) == 1
    assert release_tail(np.ones(1 << 16), 0) == 0
    assert th.release_library_pages("libllvmlite") == 0


@pytest.mark.parametrize("n, parts", [(0, 2), (1, 2), (7, 2), (10, 3), (5, 8), (1000, 1)])
def test_ranges_cover_the_items_once_in_order(n, parts):
    r = ranges(n, parts)
    assert 1 <= len(r) <= max(1, min(parts, n))
    assert r[0][0] == 0 and r[-1][1] == n
    assert all(a[1] == b[0] for a, b in zip(r, r[1:]))
    sizes = [b - a for a, b in r]
    assert max(sizes) - min(sizes) <= 1


_HUGE_CHILD = r"""
import numpy as np
from meshcheck.threads import no_huge_page_advice
def advised(a):  # the kernel's flags of the mapping holding a's middle: 'hg' = MADV_HUGEPAGE
    addr = a.ctypes.data + a.nbytes // 2  # (numpy advises from the first whole page on)
    with open("/proc/self/smaps") as f:
        lines = f.read().splitlines()
    for i, line in enumerate(lines):
        head = line.split()[0]
        if "-" in head and ":" not in head:
            lo, hi = (int(x, 16) for x in head.split("-"))
            if lo <= addr < hi:
                flags = next(l for l in lines[i + 1:] if l.startswith("VmFlags:"))
                return int("hg" in flags.split()[1:])
    return -1
a = np.ones(64 << 20, np.uint8)
done = no_huge_page_advice()
b = np.ones(64 << 20, np.uint8)
print(advised(a), int(done), advised(b))
"""


@pytest.mark.skipif(platform.system() != "Linux", reason="/proc/self/smaps is Linux's")
def test_no_huge_page_advice_leaves_new_arrays_unadvised():
    # Linux proc(5): VmFlags 'hg' marks a mapping advised MADV_HUGEPAGE. numpy advises
    # its arrays from 4 MiB (where the kernel has transparent huge pages); after the
    # call a new array's mapping must not carry the flag
    out = subprocess.run([sys.executable, "-c", _HUGE_CHILD], capture_output=True,
                         text=True, check=True).stdout.split()
    before, done, after = map(int, out)
    assert done == 1 and after == 0
    if Path("/sys/kernel/mm/transparent_hugepage/enabled").exists():
        assert before == 1  # numpy's own advice, which the call turns off


@pytest.mark.parametrize("n", [0, 1, 7, 8, 1000, 1_000_003])
def test_pieces_cover_the_range_once_in_order(n):
    from meshcheck.threads import PIECES_PER_WORKER, pieces, workers

    for parallel in (True, False):
        got = pieces(n, parallel)
        assert [lo for lo, _ in got] == [0] + [hi for _, hi in got[:-1]]
        assert got[-1][1] == n and all(hi >= lo for lo, hi in got)
        w = workers()
        want = min(PIECES_PER_WORKER * w, max(n, 1)) if parallel and w > 1 else 1
        assert len(got) == want
        sizes = [hi - lo for lo, hi in got]
        assert max(sizes) - min(sizes) <= 1
