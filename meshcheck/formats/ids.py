"""Entity numbers of mesh files: lookup, duplicates, distinct values (vectorised)."""
from __future__ import annotations

import numpy as np

__all__ = ["index_of", "first_duplicate", "distinct"]

#: a direct lookup table is used while the largest number is below 8 n + this (else binary search)
_LOOKUP_SLACK = 1_000_000


def index_of(ids: np.ndarray):
    """Map from node numbers to 0-based rows: returns a function ids -> rows (-1 if missing),
    int32 from the lookup table (the mesh's own index type: half the memory of int64)."""
    n = len(ids)
    if n == 0:
        return lambda q: np.full(np.shape(q), -1, np.int64)
    lo, hi = int(ids.min()), int(ids.max())
    if lo >= 1 and hi < 8 * n + _LOOKUP_SLACK:
        lut = np.full(hi + 2, -1, dtype=np.int32 if n < 2**31 else np.int64)
        lut[ids] = np.arange(n)

        def look(q):
            return np.take(lut, q, mode="clip")     # lut[0] and lut[hi + 1] are -1
        return look
    order = np.argsort(ids, kind="stable")
    sid = ids[order]

    def look(q):
        q = np.asarray(q)
        k = np.clip(np.searchsorted(sid, q), 0, n - 1)
        return np.where(sid[k] == q, order[k], -1)
    return look


def distinct(a: np.ndarray) -> np.ndarray:
    """Sorted distinct values of a non-negative int array (bincount when the range is small)."""
    if not a.size:
        return np.zeros(0, np.int64)
    lo, hi = int(a.min()), int(a.max())
    if lo == hi:
        return np.array([lo], dtype=np.int64)
    if lo >= 0 and hi < 4 * a.size + 1024:
        return np.flatnonzero(np.bincount(a))
    return np.unique(a)


def first_duplicate(ids: np.ndarray):
    """Index pair (first, second occurrence) of a repeated value, or None."""
    if len(ids) < 2 or (np.diff(ids) > 0).all():
        return None
    order = np.argsort(ids, kind="stable")
    s = ids[order]
    k = np.flatnonzero(s[1:] == s[:-1])
    if not k.size:
        return None
    return int(order[k[0]]), int(order[k[0] + 1])
