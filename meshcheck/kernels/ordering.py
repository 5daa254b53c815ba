"""Compiled kernels of :mod:`meshcheck.ordering` (Morton keys, cells sorted by their
lowest renumbered corner, rows gathered); the numpy code there is the
reference they are tested against."""
from __future__ import annotations

import numpy as np

from . import njit


@njit
def _spread(x):
    """The low 21 bits of uint64 ``x`` moved to bit positions 0, 3, 6, ..."""
    x &= np.uint64(0x1FFFFF)
    x = (x | (x << np.uint64(32))) & np.uint64(0x1F00000000FFFF)
    x = (x | (x << np.uint64(16))) & np.uint64(0x1F0000FF0000FF)
    x = (x | (x << np.uint64(8))) & np.uint64(0x100F00F00F00F00F)
    x = (x | (x << np.uint64(4))) & np.uint64(0x10C30C30C30C30C3)
    x = (x | (x << np.uint64(2))) & np.uint64(0x1249249249249249)
    return x


#: bits per digit of :func:`radix_argsort` (2048 buckets: their write positions stay in
#: the caches; 16-bit digits, four passes, were no faster than numpy's sort)
RADIX_BITS = 11


@njit
def radix_argsort(keys, order):
    """order[:] = np.argsort(keys, kind="stable") of the (n,) uint64 ``keys``: a radix
    sort of their :data:`RADIX_BITS`-bit digits from the lowest, the (key, index) pairs
    moved together (sequential reads); a digit all keys share is skipped. The digits'
    histograms come from one pass over the keys."""
    n = keys.shape[0]
    nd = (64 + RADIX_BITS - 1) // RADIX_BITS
    nb = 1 << RADIX_BITS
    mask = np.uint64(nb - 1)
    hist = np.zeros((nd, nb), np.int64)
    for i in range(n):
        k = keys[i]
        for p in range(nd):
            hist[p, (k >> np.uint64(RADIX_BITS * p)) & mask] += 1
    k_src = keys.copy()
    i_src = np.arange(n).astype(order.dtype)
    k_dst = np.empty_like(k_src)
    i_dst = np.empty_like(i_src)
    for p in range(nd):
        h = hist[p]
        if h.max() == n:  # one value of this digit: the order stays
            continue
        start = 0
        for d in range(nb):
            c = h[d]
            h[d] = start
            start += c
        sh = np.uint64(RADIX_BITS * p)
        for i in range(n):
            k = k_src[i]
            j = h[(k >> sh) & mask]
            h[(k >> sh) & mask] = j + 1
            k_dst[j] = k
            i_dst[j] = i_src[i]
        k_src, k_dst = k_dst, k_src
        i_src, i_dst = i_dst, i_src
    order[:] = i_src


@njit
def morton_keys(points, lo, scale, top, keys):
    """keys[i] = Morton key of point i: each coordinate (p - lo) * scale clipped to
    [0, top] and truncated (non-finite: 0), bits interleaved x, y, z from the lowest."""
    for i in range(points.shape[0]):
        key = np.uint64(0)
        for d in range(3):
            q = (points[i, d] - lo[d]) * scale
            if not np.isfinite(q) or q < 0.0:
                q = 0.0
            elif q > top:
                q = top
            key |= _spread(np.uint64(q)) << np.uint64(d)
        keys[i] = key


@njit
def _lowest(cells, c, k, new_id):
    m = new_id[cells[c, 0]]
    for j in range(1, k):
        v = new_id[cells[c, j]]
        if v < m:
            m = v
    return m


@njit
def bounds(points, lo, hi):
    """lo, hi = smallest and largest finite coordinate of (n, 3) ``points`` per axis
    (+inf and -inf for an axis without any)."""
    for d in range(3):
        lo[d] = np.inf
        hi[d] = -np.inf
    for i in range(points.shape[0]):
        for d in range(3):
            v = points[i, d]
            if np.isfinite(v):
                if v < lo[d]:
                    lo[d] = v
                if v > hi[d]:
                    hi[d] = v


@njit
def lowest_corner_counts(cells, k, new_id, counts, c0, c1):
    """counts[v] += 1 for the lowest new_id v over the first k nodes of each row
    c0 <= c < c1 of ``cells``."""
    for c in range(c0, c1):
        counts[_lowest(cells, c, k, new_id)] += 1


@njit
def part_starts(counts):
    """Turn the per-part counts (parts, n_keys) of :func:`lowest_corner_counts` into each
    part's first position per key, in place: keys in order, within a key the parts in
    order (a stable counting sort's offsets)."""
    parts, n = counts.shape
    total = 0
    for v in range(n):
        for q in range(parts):
            c = counts[q, v]
            counts[q, v] = total
            total += c


@njit
def scatter_rows(cells, k, new_id, start, out, order, c0, c1):
    """Rows c0 <= c < c1 of ``cells`` to their places by lowest new_id over the first k
    nodes (``start``: this part's next position per key, advanced): out[pos] =
    new_id[cells[c]], order[pos] = c."""
    w = cells.shape[1]
    for c in range(c0, c1):
        v = _lowest(cells, c, k, new_id)
        pos = start[v]
        start[v] += 1
        order[pos] = c
        for j in range(w):
            out[pos, j] = new_id[cells[c, j]]


@njit
def gather_rows(a, order, out, i0, i1):
    """out[i] = a[order[i]] for rows i0 <= i < i1 of (n, w) arrays."""
    w = a.shape[1]
    for i in range(i0, i1):
        r = order[i]
        for j in range(w):
            out[i, j] = a[r, j]
