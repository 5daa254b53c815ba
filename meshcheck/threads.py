"""Run independent numpy-heavy pieces of work on the machine's cores.

numpy releases the GIL in sorts, gathers and ufunc loops on large arrays, so a
thread pool spreads such work over the cores without copying the mesh.
"""
from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import Callable, Iterable

__all__ = ["thread_map", "MAX_WORKERS"]

#: most threads used (the project's target machine has 2 cores); the environment
#: variable MESHCHECK_THREADS sets it (1 = everything serial)
MAX_WORKERS = max(1, int(os.environ.get("MESHCHECK_THREADS", "4") or 4))


def thread_map(fn: Callable, items: Iterable, parallel: bool = True) -> list:
    """``[fn(x) for x in items]``, computed on up to :data:`MAX_WORKERS` threads when
    ``parallel`` and the machine has more than one core (results in input order)."""
    items = list(items)
    workers = min(len(items), os.cpu_count() or 1, MAX_WORKERS)
    if not parallel or workers < 2:
        return [fn(x) for x in items]
    with ThreadPoolExecutor(max_workers=workers) as pool:
        return list(pool.map(fn, items))
