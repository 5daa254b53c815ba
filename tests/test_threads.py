"""thread_map: the serial result, in input order, whatever the number of threads; the
CLI's one malloc arena and fixed mmap threshold."""
import platform
import subprocess
import sys

import numpy as np
import pytest

from meshcheck.threads import thread_map


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
libc.free(libc.malloc(20 << 20))   # a large temporary, mapped and freed
before = libc.mallinfo2().hblks    # mapped blocks in use
p = libc.malloc(8 << 20)           # then an 8 MiB array
print(libc.mallinfo2().hblks - before)
"""


@pytest.mark.skipif(not sys.platform.startswith("linux") or platform.libc_ver()[0] != "glibc"
                    or tuple(map(int, platform.libc_ver()[1].split(".")[:2])) < (2, 33),
                    reason="glibc's mmap threshold, mallinfo2 from glibc 2.33")
def test_fixed_mmap_threshold_maps_a_chunk_after_a_large_temporary():
    """glibc's own count of mapped blocks (mallinfo2().hblks): by default a freed 20 MiB
    block raises the threshold and the next 8 MiB block comes from the heap (where freed
    memory stays resident); with fix_mmap_threshold it is mapped on its own."""
    def mapped(mode):
        out = subprocess.run([sys.executable, "-c", _MMAP_CHILD, mode], capture_output=True,
                             text=True, check=True)
        return int(out.stdout.strip())

    assert mapped("default") == 0
    assert mapped("fixed") == 1
