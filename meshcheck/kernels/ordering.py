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
def lowest_corner_order(cells, k, new_id, n_keys, order):
    """order = the stable argsort of the rows' lowest new_id over their first k nodes
    (0 <= new_id < n_keys): a counting sort in two passes, O(rows + n_keys), the keys
    computed in each pass (no array of them)."""
    start = np.zeros(n_keys + 1, order.dtype)
    for c in range(cells.shape[0]):
        start[_lowest(cells, c, k, new_id) + 1] += 1
    for v in range(n_keys):
        start[v + 1] += start[v]
    for c in range(cells.shape[0]):
        v = _lowest(cells, c, k, new_id)
        order[start[v]] = c
        start[v] += 1


@njit
def gather_relabel(cells, order, new_id, out, i0, i1):
    """out[i, j] = new_id[cells[order[i], j]] for rows i0 <= i < i1: the rows in their
    new order, with their nodes' new numbers."""
    w = cells.shape[1]
    for i in range(i0, i1):
        r = order[i]
        for j in range(w):
            out[i, j] = new_id[cells[r, j]]


@njit
def gather_rows(a, order, out, i0, i1):
    """out[i] = a[order[i]] for rows i0 <= i < i1 of (n, w) arrays."""
    w = a.shape[1]
    for i in range(i0, i1):
        r = order[i]
        for j in range(w):
            out[i, j] = a[r, j]
