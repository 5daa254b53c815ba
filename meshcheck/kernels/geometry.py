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
def _face_ratio(face_cells, size, f):
    """Size ratio across face f: larger / smaller size, inf when the smaller is not > 0,
    NaN when a size is not finite (as the numpy path)."""
    a = size[face_cells[f, 0]]
    b = size[face_cells[f, 1]]
    if not (np.isfinite(a) and np.isfinite(b)):
        return np.nan
    lo = min(a, b)
    hi = max(a, b)
    return hi / lo if lo > 0 else np.inf


#: faces over the ratio that :func:`face_jumps` keeps in one pass (more: a second pass)
_JUMPS_FIRST = 4096


@njit
def face_jumps(face_cells, count, size, ratio, f0, f1):
    """Size ratios across the faces f0 <= f < f1 of count 2: (number of such faces,
    largest finite ratio or -inf when none, face ids (k,) and ratios (k,) of those over
    ``ratio``, in face order).  The ratio is larger / smaller size, inf when the smaller
    is not > 0, NaN when a size is not finite (as the numpy path).

    The first :data:`_JUMPS_FIRST` faces over the ratio go to fixed buffers; when there
    are more, a second pass fills arrays of the exact size (no array is replaced inside
    the loop: numba would count its references at every step)."""
    ids = np.empty(_JUMPS_FIRST, np.int64)
    rs = np.empty(_JUMPS_FIRST)
    k = 0
    n_pairs = 0
    best = -np.inf
    for f in range(f0, f1):
        if count[f] != 2:
            continue
        n_pairs += 1
        r = _face_ratio(face_cells, size, f)
        if np.isfinite(r) and r > best:
            best = r
        if r > ratio:
            if k < _JUMPS_FIRST:
                ids[k] = f
                rs[k] = r
            k += 1
    if k <= _JUMPS_FIRST:
        return n_pairs, best, ids[:k].copy(), rs[:k].copy()
    all_ids = np.empty(k, np.int64)
    all_rs = np.empty(k)
    j = 0
    for f in range(f0, f1):
        if count[f] == 2:
            r = _face_ratio(face_cells, size, f)
            if r > ratio:
                all_ids[j] = f
                all_rs[j] = r
                j += 1
    return n_pairs, best, all_ids, all_rs
