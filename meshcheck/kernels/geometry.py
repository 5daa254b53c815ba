"""Compiled kernels of :mod:`meshcheck.gradation` (cell sizes and size jumps across
faces) and of cell centroids (:attr:`meshcheck.mesh.Mesh.centroids`); the numpy code
there is the reference they are tested against."""
from __future__ import annotations

import numpy as np

from . import njit


@njit
def _row_sum(length, ce, c):
    """Sum of length[ce[c, :]] in numpy's order for a contiguous row (``np.add.reduce``:
    one after the other below 8 terms, else 8 running sums combined pairwise, then the
    rest)."""
    w = ce.shape[1]
    if w < 8:
        s = 0.0
        for j in range(w):
            s += length[ce[c, j]]
        return s
    r0 = length[ce[c, 0]]
    r1 = length[ce[c, 1]]
    r2 = length[ce[c, 2]]
    r3 = length[ce[c, 3]]
    r4 = length[ce[c, 4]]
    r5 = length[ce[c, 5]]
    r6 = length[ce[c, 6]]
    r7 = length[ce[c, 7]]
    i = 8
    while i < w - w % 8:
        r0 += length[ce[c, i]]
        r1 += length[ce[c, i + 1]]
        r2 += length[ce[c, i + 2]]
        r3 += length[ce[c, i + 3]]
        r4 += length[ce[c, i + 4]]
        r5 += length[ce[c, i + 5]]
        r6 += length[ce[c, i + 6]]
        r7 += length[ce[c, i + 7]]
        i += 8
    s = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < w:
        s += length[ce[c, i]]
        i += 1
    return s


@njit
def _corner_mean_row(points, cells, c, k, out, i):
    """out[i] = mean of the first k nodes of row c of ``cells``, summed corner by corner
    and divided by k (bitwise as ``mesh._corner_mean``)."""
    for d in range(3):
        s = points[cells[c, 0], d]
        for j in range(1, k):
            s += points[cells[c, j], d]
        out[i, d] = s / k


@njit
def corner_mean(points, cells, k, out):
    """out[c] = centroid (mean of the first k nodes) of every row c of ``cells`` (m, >= k),
    metres."""
    for c in range(cells.shape[0]):
        _corner_mean_row(points, cells, c, k, out, c)


@njit
def corner_mean_rows(points, cells, rows, k, out):
    """out[i] = centroid of row rows[i] of ``cells`` (:func:`corner_mean` of some rows)."""
    for i in range(rows.shape[0]):
        _corner_mean_row(points, cells, rows[i], k, out, i)


@njit
def mean_edge_length(ce, length, out):
    """out[c] = mean of length (n_e,) float64 over the edges ce (m, w) int64 of cell c
    (m), bitwise as ``length[ce].mean(axis=1)`` (w <= 128)."""
    w = ce.shape[1]
    for c in range(ce.shape[0]):
        out[c] = _row_sum(length, ce, c) / w


@njit
def face_jumps(face_cells, count, size, ratio, f0, f1):
    """Size ratios across the faces f0 <= f < f1 of count 2: (number of such faces,
    largest finite ratio or -inf when none, face ids (k,) and ratios (k,) of those over
    ``ratio``, in face order).  The ratio is larger / smaller size, inf when the smaller
    is not > 0, NaN when a size is not finite (as the numpy path)."""
    cap = 16
    ids = np.empty(cap, np.int64)
    rs = np.empty(cap)
    k = 0
    n_pairs = 0
    best = -np.inf
    for f in range(f0, f1):
        if count[f] != 2:
            continue
        n_pairs += 1
        a = size[face_cells[f, 0]]
        b = size[face_cells[f, 1]]
        if not (np.isfinite(a) and np.isfinite(b)):
            continue
        lo = min(a, b)
        hi = max(a, b)
        r = hi / lo if lo > 0 else np.inf
        if np.isfinite(r) and r > best:
            best = r
        if r > ratio:
            if k == cap:  # grow (element loops: compile fast)
                cap *= 2
                ids2 = np.empty(cap, np.int64)
                rs2 = np.empty(cap)
                for q in range(k):
                    ids2[q] = ids[q]
                    rs2[q] = rs[q]
                ids = ids2
                rs = rs2
            ids[k] = f
            rs[k] = r
            k += 1
    return n_pairs, best, ids[:k].copy(), rs[:k].copy()
