"""Compiled kernels of :mod:`meshcheck.topology` (unique edges and faces, components,
volumes, duplicates); the numpy code there is the reference they are tested against.

Unique edges and faces are found without a global sort: every local edge (face) of
every cell is dropped into a bucket (a counting sort, rows in cell order), then each
small bucket is sorted on the remaining nodes and read off.  Edges go to the bucket
of their smaller node, triangles to that of the edge of their two smallest nodes (or
of their smallest node when no edges are given), quadrilaterals to that of their
second smallest node: buckets taken in order and sorted within give exactly the
order of the numpy path's keys, so the numbering of edges and faces is the same.
Where the bits fit, the sort key and the row share one int64 ("packed"), which
halves the scattered writes, the bound of these memory-bound passes.

Index conventions: a "row" is one local edge (face) of one cell, numbered over the
blocks in order, cell-major (row = first row of the block + cell * width + local);
``bounds`` (n_blocks + 1,) are the first rows of the blocks, ``widths`` (n_blocks,)
their local entities per cell and ``offsets`` (n_blocks,) their first global cell id.
"""
from __future__ import annotations

import numpy as np

from . import njit

#: buckets (and groups within buckets) up to this long are sorted by insertion
_INSERTION_MAX = 12


def index_dtype(n: int):
    """Smallest of int32 / int64 holding indices below ``n`` (scratch arrays only)."""
    return np.int32 if n < 2**31 - 1 else np.int64


#: largest face count kept (``Faces.count`` is one byte: more cells read as this many)
COUNT_MAX = 255

@njit
def mark_used(cells, used):
    """used[node] = True for every node of ``cells`` (m, k) int64; False when a node
    index is outside [0, len(used)) (nothing is marked past the first such)."""
    n = used.shape[0]
    for c in range(cells.shape[0]):
        for j in range(cells.shape[1]):
            v = cells[c, j]
            if v < 0 or v >= n:
                return False
            used[v] = True
    return True


@njit
def block_of(bounds, r):
    """Index b of the block holding item r: bounds[b] <= r < bounds[b + 1] (bounds
    ascending; the few blocks of a mesh are scanned in order)."""
    b = 0
    while r >= bounds[b + 1]:
        b += 1
    return b


@njit
def _owner(r, bounds, widths, offsets):
    """Global cell id of row ``r``."""
    b = block_of(bounds, r)
    return offsets[b] + (r - bounds[b]) // widths[b]


# ---------------------------------------------------------------------------
# bucket sort: rows dropped in buckets (counting sort, rows ascending in each), then
# every bucket sorted on its key rows (key (n_rows, nk), nk >= 1), stably


@njit
def _less(key, i, j):
    """key[i] < key[j] lexicographically."""
    for k in range(key.shape[1]):
        if key[i, k] != key[j, k]:
            return key[i, k] < key[j, k]
    return False


@njit
def _same(key, i, j):
    for k in range(key.shape[1]):
        if key[i, k] != key[j, k]:
            return False
    return True


@njit
def _insertion(key, row, s, e):
    """Stable insertion sort of the key rows s:e (rows along)."""
    nk = key.shape[1]
    for i in range(s + 1, e):
        j = i
        while j > s and _less(key, j, j - 1):
            for k in range(nk):
                t = key[j, k]
                key[j, k] = key[j - 1, k]
                key[j - 1, k] = t
            t2 = row[j]
            row[j] = row[j - 1]
            row[j - 1] = t2
            j -= 1


@njit
def _sift(a, s, root, n):
    """Sift a[s + root] down the max-heap a[s:s + n]."""
    while True:
        child = 2 * root + 1
        if child >= n:
            return
        if child + 1 < n and a[s + child] < a[s + child + 1]:
            child += 1
        if a[s + root] < a[s + child]:
            t = a[s + root]
            a[s + root] = a[s + child]
            a[s + child] = t
            root = child
        else:
            return


@njit
def _sort_head(values, d):
    """Sort ``values[:d]`` ascending in place: insertion sort when short, heapsort otherwise."""
    if d <= 4 * _INSERTION_MAX:
        for i in range(1, d):
            v = values[i]
            j = i - 1
            while j >= 0 and values[j] > v:
                values[j + 1] = values[j]
                j -= 1
            values[j + 1] = v
    else:
        _heapsort(values, 0, d)


@njit
def _heapsort(a, s, e):
    """Sort a[s:e] ascending in place, O(k log k) (not stable: for distinct values;
    a hand-written sort compiles in a fraction of the time of numba's np.sort)."""
    n = e - s
    for root in range(n // 2 - 1, -1, -1):
        _sift(a, s, root, n)
    for end in range(n - 1, 0, -1):
        t = a[s]
        a[s] = a[s + end]
        a[s + end] = t
        _sift(a, s, 0, end)


@njit
def _less_row(key, row, i, j):
    """(key[i], row[i]) < (key[j], row[j]) lexicographically."""
    for k in range(key.shape[1]):
        if key[i, k] != key[j, k]:
            return key[i, k] < key[j, k]
    return row[i] < row[j]


@njit
def _sort_rows_long(key, row, s, e):
    """Stable lexicographic sort of the key rows s:e (rows along, rows distinct) by a
    heapsort on (key, row) of an index permutation: O(k log k) for hub buckets."""
    n = e - s
    o = np.arange(s, e)
    for root in range(n // 2 - 1, -1, -1):
        _sift_rows(key, row, o, root, n)
    for end in range(n - 1, 0, -1):
        t = o[0]
        o[0] = o[end]
        o[end] = t
        _sift_rows(key, row, o, 0, end)
    nk = key.shape[1]
    kk = np.empty((n, nk), key.dtype)
    rr = np.empty(n, row.dtype)
    for i in range(n):  # element loops: compile far faster than fancy indexing
        rr[i] = row[o[i]]
        for k in range(nk):
            kk[i, k] = key[o[i], k]
    for i in range(n):
        row[s + i] = rr[i]
        for k in range(nk):
            key[s + i, k] = kk[i, k]


@njit
def _sift_rows(key, row, o, root, n):
    while True:
        child = 2 * root + 1
        if child >= n:
            return
        if child + 1 < n and _less_row(key, row, o[child], o[child + 1]):
            child += 1
        if _less_row(key, row, o[root], o[child]):
            t = o[root]
            o[root] = o[child]
            o[child] = t
            root = child
        else:
            return


@njit
def sort_buckets(ptr, key, row, n_values):
    """Sort the rows of every bucket ptr[b]:ptr[b + 1] on their keys (ties keep row
    order); key values in [0, n_values).  Returns the number of distinct key rows
    summed over the buckets.

    A long bucket is counting-sorted on its first key column through a slot per
    distinct value (few: the neighbours of one node), then each group of equal first
    keys is sorted by insertion (by heapsort when long: hub nodes only)."""
    nk = key.shape[1]
    longest = 0
    for b in range(ptr.shape[0] - 1):
        longest = max(longest, ptr[b + 1] - ptr[b])
    slot = np.full(n_values, -1, np.int64)
    values = np.empty(longest, np.int64)
    start = np.empty(longest + 1, np.int64)
    tkey = np.empty((longest, nk), key.dtype)
    trow = np.empty(longest, row.dtype)
    n_unique = 0
    for b in range(ptr.shape[0] - 1):
        s = ptr[b]
        e = ptr[b + 1]
        if e - s <= _INSERTION_MAX:
            _insertion(key, row, s, e)
        else:
            d = 0
            for i in range(s, e):
                v = key[i, 0]
                if slot[v] < 0:
                    slot[v] = 0
                    values[d] = v
                    d += 1
            _sort_head(values, d)
            vs = values
            for j in range(d):
                slot[vs[j]] = j
                start[j + 1] = 0
            for i in range(s, e):
                start[slot[key[i, 0]] + 1] += 1
            start[0] = 0
            for j in range(d):
                start[j + 1] += start[j]
            for i in range(s, e):
                j = slot[key[i, 0]]
                p = start[j]
                start[j] = p + 1
                for k in range(nk):
                    tkey[p, k] = key[i, k]
                trow[p] = row[i]
            # start[j] is now the end of group j
            lo = 0
            for j in range(d):
                hi = start[j]
                slot[vs[j]] = -1
                for p in range(lo, hi):
                    for k in range(nk):
                        key[s + p, k] = tkey[p, k]
                    row[s + p] = trow[p]
                if nk > 1 and hi - lo > 1:
                    if hi - lo <= 4 * _INSERTION_MAX:
                        _insertion(key, row, s + lo, s + hi)
                    else:
                        _sort_rows_long(key, row, s + lo, s + hi)
                lo = hi
        for i in range(s, e):
            if i == s or not _same(key, i, i - 1):
                n_unique += 1
    return n_unique


# ---------------------------------------------------------------------------
# edges


@njit
def edge_count(cells, la, lb, cnt):
    """cnt[lo + 1] += 1 for every local edge (la[j], lb[j]) of ``cells`` (m, k) int64,
    lo its smaller node; cnt (n_points + 1,) int64."""
    for c in range(cells.shape[0]):
        for j in range(la.shape[0]):
            a = cells[c, la[j]]
            b = cells[c, lb[j]]
            cnt[min(a, b) + 1] += 1


@njit
def edge_fill(cells, la, lb, row0, fill, bhi, brow):
    """Drop every local edge of the block into the bucket of its smaller node:
    bhi (., 1) (larger node) and brow (row) at ``fill[lo]``, which advances."""
    w = la.shape[0]
    for c in range(cells.shape[0]):
        for j in range(w):
            a = cells[c, la[j]]
            b = cells[c, lb[j]]
            lo = min(a, b)
            p = fill[lo]
            fill[lo] = p + 1
            bhi[p, 0] = max(a, b)
            brow[p] = row0 + c * w + j


@njit
def edge_emit(ptr, bhi, brow, nodes, starts, inverse, bounds, widths, offsets):
    """Read the buckets sorted by :func:`sort_buckets` off: nodes (n_e, 2), starts
    (n_e,), inverse[row] = edge id;
    brow is overwritten with the owner cell of every sorted row (the incidence)."""
    e = -1
    for lo in range(ptr.shape[0] - 1):
        for i in range(ptr[lo], ptr[lo + 1]):
            if i == ptr[lo] or bhi[i, 0] != bhi[i - 1, 0]:
                e += 1
                nodes[e, 0] = lo
                nodes[e, 1] = bhi[i, 0]
                starts[e] = i
            r = brow[i]
            inverse[r] = e
            brow[i] = _owner(r, bounds, widths, offsets)


@njit
def edge_mid(cells, lm, inverse, umid):
    """umid[edge] = mid-node of every local edge of a quadratic block (last one wins);
    inverse (m * n_local_edges,) edge ids of the block's rows."""
    w = lm.shape[0]
    for c in range(cells.shape[0]):
        for j in range(w):
            umid[inverse[c * w + j]] = cells[c, lm[j]]


@njit
def edge_lengths(points, nodes, mid, gl_s, gl_w, out):
    """Length of every edge (arc length of the parabola through the mid-node when
    mid >= 0, Gauss-Legendre nodes gl_s and weights gl_w on [0, 1]), metres; mid
    empty: every edge straight."""
    curved = mid.shape[0] > 0
    for e in range(nodes.shape[0]):
        a = nodes[e, 0]
        b = nodes[e, 1]
        m = mid[e] if curved else -1
        if m < 0:
            d0 = points[b, 0] - points[a, 0]
            d1 = points[b, 1] - points[a, 1]
            d2 = points[b, 2] - points[a, 2]
            out[e] = np.sqrt(d0 * d0 + d1 * d1 + d2 * d2)
        else:
            arc = 0.0
            for q in range(gl_s.shape[0]):
                s = gl_s[q]
                ca = 4 * s - 3
                cm = 4 - 8 * s
                cb = 4 * s - 1
                d0 = points[a, 0] * ca + points[m, 0] * cm + points[b, 0] * cb
                d1 = points[a, 1] * ca + points[m, 1] * cm + points[b, 1] * cb
                d2 = points[a, 2] * ca + points[m, 2] * cm + points[b, 2] * cb
                arc += gl_w[q] * np.sqrt(d0 * d0 + d1 * d1 + d2 * d2)
            out[e] = arc


# ---------------------------------------------------------------------------
# faces: triangles bucketed by their smallest node and sorted on the next two,
# quadrilaterals bucketed by their second smallest and sorted on (3rd, 1st, 4th),
# the orders of the numpy path's keys


@njit
def _sorted4(g, size):
    """The ``size`` (3 or 4) nodes of g in ascending order, as a 4-tuple."""
    a = g[0]
    b = g[1]
    c = g[2]
    if a > b:
        a, b = b, a
    if size == 4:
        d = g[3]
        if c > d:
            c, d = d, c
        if a > c:
            a, c = c, a
        if b > d:
            b, d = d, b
        if b > c:
            b, c = c, b
        return a, b, c, d
    if b > c:
        b, c = c, b
    if a > b:
        a, b = b, a
    return a, b, c, -1


@njit
def face_count(cells, table, cnt):
    """cnt[bucket + 1] += 1 for every local face (rows of ``table`` (f, size))."""
    size = table.shape[1]
    g = np.empty(4, np.int64)
    for c in range(cells.shape[0]):
        for j in range(table.shape[0]):
            for k in range(size):
                g[k] = cells[c, table[j, k]]
            s0, s1, s2, s3 = _sorted4(g, size)
            cnt[(s0 if size == 3 else s1) + 1] += 1


@njit
def face_fill(cells, table, row0, fill, bkey, brow):
    """Drop every local face in its bucket with its sort keys and row: bkey (., 2)
    (2nd, 3rd node) for triangles, (., 3) (3rd, 1st, 4th) for quadrilaterals."""
    size = table.shape[1]
    w = table.shape[0]
    g = np.empty(4, np.int64)
    for c in range(cells.shape[0]):
        for j in range(w):
            for k in range(size):
                g[k] = cells[c, table[j, k]]
            s0, s1, s2, s3 = _sorted4(g, size)
            if size == 3:
                p = fill[s0]
                fill[s0] = p + 1
                bkey[p, 0] = s1
                bkey[p, 1] = s2
            else:
                p = fill[s1]
                fill[s1] = p + 1
                bkey[p, 0] = s2
                bkey[p, 1] = s0
                bkey[p, 2] = s3
            brow[p] = row0 + c * w + j


@njit
def face_emit(ptr, bkey, brow, first, cells, count, bounds, widths, offsets):
    """Read the buckets sorted by :func:`sort_buckets` off: first (n_f,) first row of
    every face, cells (n_f, 2)
    owners of its first two rows (-1 for none), count (n_f,) rows sharing it (at most
    :data:`COUNT_MAX`)."""
    f = -1
    for b in range(ptr.shape[0] - 1):
        for i in range(ptr[b], ptr[b + 1]):
            if i == ptr[b] or not _same(bkey, i, i - 1):
                f += 1
                first[f] = brow[i]
                cells[f, 0] = _owner(brow[i], bounds, widths, offsets)
                cells[f, 1] = -1
                count[f] = 1
            else:
                if count[f] == 1:
                    cells[f, 1] = _owner(brow[i], bounds, widths, offsets)
                if count[f] < COUNT_MAX:  # saturates (a one-byte count)
                    count[f] += 1


# ---------------------------------------------------------------------------
# packed buckets: (value << shift) | row in one int64, rows below 2**shift; sorting
# the integers sorts by value then row (one scattered write per row instead of two)


@njit
def sort_packed(ptr, packed, shift):
    """Sort every bucket ptr[b]:ptr[b + 1] of ``packed`` ascending; returns the number of
    distinct values (packed >> shift) summed over the buckets."""
    return sort_packed_range(ptr, packed, shift, 0, ptr.shape[0] - 1)


@njit
def sort_packed_range(ptr, packed, shift, b0, b1):
    """:func:`sort_packed` of the buckets b0 <= b < b1 only."""
    n_unique = 0
    for b in range(b0, b1):
        s = ptr[b]
        e = ptr[b + 1]
        if e - s <= 2 * _INSERTION_MAX:
            for i in range(s + 1, e):
                v = packed[i]
                j = i - 1
                while j >= s and packed[j] > v:
                    packed[j + 1] = packed[j]
                    j -= 1
                packed[j + 1] = v
        else:
            _heapsort(packed, s, e)
        for i in range(s, e):
            if i == s or (packed[i] >> shift) != (packed[i - 1] >> shift):
                n_unique += 1
    return n_unique


@njit
def edge_fill_packed(cells, la, lb, g0, fill, packed, shift):
    """:func:`edge_fill` into one packed array: (larger node << shift) | (cell << 4) |
    local edge, cell the global id (g0 + row in the block): ordered like the rows."""
    w = la.shape[0]
    for c in range(cells.shape[0]):
        for j in range(w):
            a = cells[c, la[j]]
            b = cells[c, lb[j]]
            lo = min(a, b)
            p = fill[lo]
            fill[lo] = p + 1
            packed[p] = (max(a, b) << shift) | ((g0 + c) << 4) | j


@njit
def count_distinct_range(ptr, packed, shift, n_values, b0, b1):
    """Number of distinct values (packed >> shift, in [0, n_values < 2**31)) summed
    over the buckets ptr[b]:ptr[b + 1], b0 <= b < b1."""
    seen = np.full(n_values, -1, np.int32)
    total = 0
    for b in range(b0, b1):
        for i in range(ptr[b], ptr[b + 1]):
            h = packed[i] >> shift
            # counted and marked without a branch on whether h was seen (unpredictable:
            # 4.77M tets 0.080 -> 0.048 s)
            total += seen[h] != b
            seen[h] = b
    return total


@njit
def edge_emit_rows_range(ptr, packed, shift, n_values, nodes, inverse, bounds, widths,
                         offsets, b0, b1, e0):
    """Read the unsorted packed buckets b0 <= b < b1 of :func:`edge_fill_packed` off,
    their first edge e0: the distinct larger nodes of every bucket sorted give the edges
    (nodes (n_e, 2), numbered in bucket order), and every row's edge id goes to
    ``inverse`` (n_rows,) (of any integer type holding the ids).  offsets (n_blocks +
    1,): first global cell id of every block, then the cell count.  ``packed`` is only
    read.  Returns the edge after the range's last; disjoint ranges can be read off at
    the same time."""
    mask = (np.int64(1) << shift) - 1
    longest = 0
    for b in range(b0, b1):
        longest = max(longest, ptr[b + 1] - ptr[b])
    slot = np.full(n_values, -1, np.int64)
    vals = np.empty(longest, np.int64)
    for lo in range(b0, b1):
        s = ptr[lo]
        k = ptr[lo + 1] - s
        if k == 0:
            continue
        d = 0
        for i in range(s, s + k):
            h = packed[i] >> shift
            # the distinct values gathered without a branch on whether h was seen
            # (unpredictable: 4.77M tets 0.201 -> 0.172 s); d <= i - s, so vals[d] fits
            vals[d] = h
            d += slot[h] < 0
            slot[h] = 0
        _sort_head(vals, d)
        for j in range(d):
            slot[vals[j]] = e0 + j
            nodes[e0 + j, 0] = lo
            nodes[e0 + j, 1] = vals[j]
        for i in range(s, s + k):
            v = packed[i]
            g = (v & mask) >> 4
            blk = 0
            while g >= offsets[blk + 1]:
                blk += 1
            inverse[bounds[blk] + (g - offsets[blk]) * widths[blk] + (v & 15)] = slot[v >> shift]
        for j in range(d):
            slot[vals[j]] = -1
        e0 += d
    return e0


# ---------------------------------------------------------------------------
# two-level bucket fill (most-significant-digit radix): the rows are first dropped in
# coarse buckets of 2**k fine buckets (few write streams: they stay in cache), each
# carrying its fine bucket mod 2**k in its low bits, then every coarse bucket is
# counted and scattered from a copy of itself into its fine buckets, in place (a small
# range of memory, and no second array of the whole length).  Same result as the
# one-level fill (stable: rows ascending in every bucket).


@njit
def edge_coarse_count(cells, la, lb, k, ccnt):
    """ccnt[(lo >> k) + 1] += 1 for every local edge, lo its smaller node."""
    for c in range(cells.shape[0]):
        for j in range(la.shape[0]):
            a = cells[c, la[j]]
            b = cells[c, lb[j]]
            ccnt[(min(a, b) >> k) + 1] += 1


@njit
def edge_coarse_fill(cells, la, lb, g0, k, cfill, tmp, shift):
    """:func:`edge_fill_packed` into coarse buckets of 2**k nodes: tmp[cfill[lo >> k]]
    = (packed value << k) | (lo mod 2**k), cfill advancing."""
    w = la.shape[0]
    low = (np.int64(1) << k) - 1
    for c in range(cells.shape[0]):
        for j in range(w):
            a = cells[c, la[j]]
            b = cells[c, lb[j]]
            lo = min(a, b)
            v = (max(a, b) << shift) | ((g0 + c) << 4) | j
            p = cfill[lo >> k]
            cfill[lo >> k] = p + 1
            tmp[p] = (v << k) | (lo & low)


@njit
def coarse_refine(cptr, a, k, ptr):
    """Sort every coarse bucket cptr[c]:cptr[c + 1] of ``a`` (entries (value << k) | fine
    bucket mod 2**k) into its fine buckets c * 2**k + i in place, entries becoming their
    values (rows in order: stable), filling the fine bucket starts ptr (n_buckets + 1,)
    on the way.  Each coarse bucket goes through a copy of itself (as long as the
    longest): no second array of the whole length."""
    coarse_refine_range(cptr, a, k, ptr, 0, cptr.shape[0] - 1)
    ptr[ptr.shape[0] - 1] = cptr[cptr.shape[0] - 1]


@njit
def coarse_refine_range(cptr, a, k, ptr, c0, c1):
    """:func:`coarse_refine` of the coarse buckets c0 <= c < c1 only (without the last
    entry of ptr); disjoint ranges can be refined at the same time."""
    nb = ptr.shape[0] - 1
    width = np.int64(1) << k
    low = width - 1
    cnt = np.empty(width + 1, np.int64)
    longest = 0
    for c in range(c0, c1):
        longest = max(longest, cptr[c + 1] - cptr[c])
    buf = np.empty(longest, np.int64)
    for c in range(c0, c1):
        s = cptr[c]
        e = cptr[c + 1]
        base = c << k
        nf = min(width, nb - base)
        if nf <= 0:
            continue
        for j in range(nf + 1):
            cnt[j] = 0
        for i in range(s, e):
            x = a[i]
            buf[i - s] = x
            cnt[(x & low) + 1] += 1
        cnt[0] = s
        for j in range(nf):
            cnt[j + 1] += cnt[j]
            ptr[base + j] = cnt[j]
        for i in range(e - s):
            x = buf[i]
            f = x & low
            p = cnt[f]
            cnt[f] = p + 1
            a[p] = x >> k


@njit
def tri_coarse_count(cells, table, opp, ce, k, ccnt):
    """ccnt[(edge >> k) + 1] += 1 for every local triangle (see :func:`tri_count_edges`)."""
    for c in range(cells.shape[0]):
        for j in range(table.shape[0]):
            e, top = _tri_edge(cells, c, table, opp, ce, j)
            ccnt[(e >> k) + 1] += 1


@njit
def tri_coarse_fill(cells, table, opp, ce, g0, k, cfill, tmp, shift):
    """:func:`tri_fill_edges` into coarse buckets of 2**k edges: tmp[cfill[edge >> k]] =
    (packed value << k) | (edge mod 2**k), cfill advancing."""
    w = table.shape[0]
    low = (np.int64(1) << k) - 1
    for c in range(cells.shape[0]):
        for j in range(w):
            e, top = _tri_edge(cells, c, table, opp, ce, j)
            v = (top << shift) | ((g0 + c) << 3) | j
            p = cfill[e >> k]
            cfill[e >> k] = p + 1
            tmp[p] = (v << k) | (e & low)


@njit
def _tri_edge(cells, c, table, opp, ce, j):
    """(edge id joining the two smallest nodes, largest node) of local triangle j of
    cell c; opp (f, 3) local edge opposite each corner, ce (m, n_edges) edge ids."""
    x = cells[c, table[j, 0]]
    y = cells[c, table[j, 1]]
    z = cells[c, table[j, 2]]
    if x >= y:
        imax = 0 if x >= z else 2
    else:
        imax = 1 if y >= z else 2
    return ce[c, opp[j, imax]], max(x, max(y, z))


@njit
def tri_count_edges(cells, table, opp, ce, cnt):
    """cnt[edge + 1] += 1 for every local triangle, bucketed by the edge of its two
    smallest nodes (cnt (n_edges + 1,))."""
    for c in range(cells.shape[0]):
        for j in range(table.shape[0]):
            e, top = _tri_edge(cells, c, table, opp, ce, j)
            cnt[e + 1] += 1


@njit
def tri_fill_edges(cells, table, opp, ce, g0, fill, packed, shift):
    """Drop every local triangle in its edge bucket as one integer:
    (largest node << shift) | (cell << 3) | local face, cell the global id (g0 + row
    in the block), local faces < 8."""
    w = table.shape[0]
    for c in range(cells.shape[0]):
        for j in range(w):
            e, top = _tri_edge(cells, c, table, opp, ce, j)
            p = fill[e]
            fill[e] = p + 1
            packed[p] = (top << shift) | ((g0 + c) << 3) | j


@njit
def tri_emit_packed(ptr, packed, shift, local, cells, count):
    """:func:`face_emit` from edge buckets sorted by :func:`sort_packed`, with the local
    face (among the first row's cell's triangles) of every triangle's first row."""
    tri_emit_range(ptr, packed, shift, local, cells, count, 0, ptr.shape[0] - 1, 0)


@njit
def tri_emit_range(ptr, packed, shift, local, cells, count, b0, b1, f0):
    """:func:`tri_emit_packed` of the buckets b0 <= b < b1, their first face f0."""
    mask = (np.int64(1) << shift) - 1
    f = f0 - 1
    for b in range(b0, b1):
        prev = -1
        for i in range(ptr[b], ptr[b + 1]):
            v = packed[i]
            g = (v & mask) >> 3
            if (v >> shift) != prev:
                prev = v >> shift
                f += 1
                cells[f, 0] = g
                cells[f, 1] = -1
                count[f] = 1
                local[f] = v & 7
            else:
                if count[f] == 1:
                    cells[f, 1] = g
                if count[f] < COUNT_MAX:  # saturates (a one-byte count)
                    count[f] += 1

# ---------------------------------------------------------------------------
# components, volumes, duplicates


@njit
def _find(parent, x):
    while parent[x] != x:
        parent[x] = parent[parent[x]]
        x = parent[x]
    return x


@njit
def _labels(parent):
    """Component label of every item, numbered by their smallest item (as scipy's
    connected_components): (n_labels, (n,) labels of parent's integer type)."""
    n = parent.shape[0]
    label = np.full(n, -1, parent.dtype)
    out = np.empty(n, parent.dtype)
    k = 0
    for c in range(n):
        r = _find(parent, c)
        if label[r] < 0:
            label[r] = k
            k += 1
        out[c] = label[r]
    return k, out


@njit
def _union(parent, a, b):
    ra = _find(parent, a)
    rb = _find(parent, b)
    if ra != rb:
        if ra < rb:
            parent[rb] = ra
        else:
            parent[ra] = rb


@njit
def components_faces(parent, face_cells, count):
    """Components of the cells joined through the faces of count >= 2 (first two
    cells); parent (n_cells,) int32/int64 holding 0..n_cells-1 (overwritten)."""
    for f in range(count.shape[0]):
        if count[f] >= 2:
            _union(parent, face_cells[f, 0], face_cells[f, 1])
    return _labels(parent)


@njit
def components_pairs(parent, pairs):
    """Components of items joined by the rows of ``pairs`` (k, 2); parent as for
    :func:`components_faces`."""
    for i in range(pairs.shape[0]):
        _union(parent, pairs[i, 0], pairs[i, 1])
    return _labels(parent)


@njit
def components_edges(parent, incidence, starts):
    """Components of the cells joined through shared edges (incidence sorted by edge);
    parent as for :func:`components_faces`."""
    ne = starts.shape[0]
    for e in range(ne):
        s = starts[e]
        t = starts[e + 1] if e + 1 < ne else incidence.shape[0]
        for i in range(s + 1, t):
            _union(parent, incidence[s], incidence[i])
    return _labels(parent)


@njit
def volumes_tetra(points, cells, out):
    """Signed volume (m^3) of tetrahedra from their corners cells[:, :4]."""
    for c in range(cells.shape[0]):
        p = cells[c, 0]
        a0 = points[cells[c, 1], 0] - points[p, 0]
        a1 = points[cells[c, 1], 1] - points[p, 1]
        a2 = points[cells[c, 1], 2] - points[p, 2]
        b0 = points[cells[c, 2], 0] - points[p, 0]
        b1 = points[cells[c, 2], 1] - points[p, 1]
        b2 = points[cells[c, 2], 2] - points[p, 2]
        d0 = points[cells[c, 3], 0] - points[p, 0]
        d1 = points[cells[c, 3], 1] - points[p, 1]
        d2 = points[cells[c, 3], 2] - points[p, 2]
        x0 = b1 * d2 - b2 * d1
        x1 = b2 * d0 - b0 * d2
        x2 = b0 * d1 - b1 * d0
        out[c] = ((a0 * x0 + a2 * x2) + a1 * x1) / 6.0  # numpy einsum's order


@njit
def volumes_faces(points, cells, faces, out):
    """Signed volume (m^3) by the divergence theorem over outward faces (faces (f, 4)
    local corners, -1 last for triangles; quadrilaterals split about their mean)."""
    for c in range(cells.shape[0]):
        vol = 0.0
        for f in range(faces.shape[0]):
            i0 = cells[c, faces[f, 0]]
            i1 = cells[c, faces[f, 1]]
            i2 = cells[c, faces[f, 2]]
            if faces[f, 3] < 0:
                a0, a1, a2 = points[i0, 0], points[i0, 1], points[i0, 2]
                b0, b1, b2 = points[i1, 0], points[i1, 1], points[i1, 2]
                d0, d1, d2 = points[i2, 0], points[i2, 1], points[i2, 2]
            else:
                i3 = cells[c, faces[f, 3]]
                a0 = (((points[i0, 0] + points[i1, 0]) + points[i2, 0]) + points[i3, 0]) / 4
                a1 = (((points[i0, 1] + points[i1, 1]) + points[i2, 1]) + points[i3, 1]) / 4
                a2 = (((points[i0, 2] + points[i1, 2]) + points[i2, 2]) + points[i3, 2]) / 4
                b0 = points[i2, 0] - points[i0, 0]
                b1 = points[i2, 1] - points[i0, 1]
                b2 = points[i2, 2] - points[i0, 2]
                d0 = points[i3, 0] - points[i1, 0]
                d1 = points[i3, 1] - points[i1, 1]
                d2 = points[i3, 2] - points[i1, 2]
            x0 = b1 * d2 - b2 * d1
            x1 = b2 * d0 - b0 * d2
            x2 = b0 * d1 - b1 * d0
            vol += (a0 * x0 + a2 * x2) + a1 * x1  # numpy einsum's order
        out[c] = vol / 6.0


@njit
def areas_polygon(points, cells, k, out):
    """Signed area (m^2) of plane polygons of k corners cells[:, :k] (xy plane)."""
    for c in range(cells.shape[0]):
        acc = 0.0
        for i in range(k):
            p = cells[c, i]
            q = cells[c, (i + 1) % k]
            acc += points[p, 0] * points[q, 1] - points[q, 0] * points[p, 1]
        out[c] = 0.5 * acc


@njit
def min_edge_at_nodes(nodes, length, hmin):
    """hmin[node] = min(hmin[node], length of its edges); non-finite lengths ignored.
    The minima are taken without a branch on the comparison (its outcome is
    unpredictable: 5.6M edges 0.045 -> 0.010 s)."""
    for e in range(nodes.shape[0]):
        v = length[e]
        if not np.isfinite(v):
            continue
        a = nodes[e, 0]
        b = nodes[e, 1]
        hmin[a] = min(hmin[a], v)
        hmin[b] = min(hmin[b], v)


@njit(inline="always")
def _hash4(cells, c, mult):
    """(lowest corner, :func:`corner_hash`) of the four-corner cell c: its corners sorted
    by a five-comparator network of minima and maxima, free of branches."""
    a, b = np.int64(cells[c, 0]), np.int64(cells[c, 1])
    d, e = np.int64(cells[c, 2]), np.int64(cells[c, 3])
    a, b = min(a, b), max(a, b)
    d, e = min(d, e), max(d, e)
    a, d = min(a, d), max(a, d)
    b, e = min(b, e), max(b, e)
    b, d = min(b, d), max(b, d)
    h = (np.uint64(a) * mult[0] + np.uint64(b) * mult[1] + np.uint64(d) * mult[2]
         + np.uint64(e) * mult[3])
    return a, h ^ (h >> np.uint64(29))


@njit(inline="always")
def _hash_k(cells, c, k, mult, s):
    """(lowest corner, :func:`corner_hash`) of the k-corner cell c, its corners sorted
    by insertion into the scratch ``s`` (k,) int64."""
    for i in range(k):
        v = np.int64(cells[c, i])
        j = i - 1
        while j >= 0 and s[j] > v:
            s[j + 1] = s[j]
            j -= 1
        s[j + 1] = v
    h = np.uint64(0)
    for i in range(k):
        h += np.uint64(s[i]) * mult[i]
    return s[0], h ^ (h >> np.uint64(29))


@njit
def corner_hash(cells, k, mult, out):
    """64-bit multiplicative hash of the sorted corners cells[:, :k] of every cell
    (the numpy path's: sum of sorted corner * mult, then h ^= h >> 29).  Four corners
    (tetrahedra) are sorted by a five-comparator network of minima and maxima, free of
    branches (4.77M tets: 0.105 -> 0.03 s), more by insertion."""
    if k == 4:
        for c in range(cells.shape[0]):
            out[c] = _hash4(cells, c, mult)[1]
        return
    s = np.empty(k, np.int64)
    for c in range(cells.shape[0]):
        out[c] = _hash_k(cells, c, k, mult, s)[1]


#: longest run of cells sharing a lowest corner that :func:`distinct_in_runs` compares
#: pairwise (a longer one sends the block to the sort of all hashes)
RUN_MAX = 64


@njit
def distinct_in_runs(cells, k, mult):
    """True when the cells (m, k) are ordered by their lowest corner (as the renumbered
    mesh's are, :func:`meshcheck.ordering.sorted_cells`) and no two cells with the same
    lowest corner have the same :func:`corner_hash`: then no two cells have the same
    corners, since such cells share their lowest corner.  False otherwise (corners out
    of that order, a repeated hash, or a run longer than :data:`RUN_MAX`), when the caller
    must sort the hashes.  Stops at the first such cell; allocates nothing per cell."""
    run = np.empty(RUN_MAX, np.uint64)
    n_run = 0
    prev = np.int64(-1)
    s = np.empty(k, np.int64)
    for c in range(cells.shape[0]):
        if k == 4:
            lo, h = _hash4(cells, c, mult)
        else:
            lo, h = _hash_k(cells, c, k, mult, s)
        if lo != prev:
            if lo < prev:
                return False
            prev = lo
            n_run = 0
        else:
            for i in range(n_run):
                if run[i] == h:
                    return False
            if n_run == RUN_MAX:
                return False
        run[n_run] = h
        n_run += 1
    return True


@njit
def label_abs_sums(label, values, out):
    """out[label[i]] += |values[i]| in index order: np.bincount(label,
    weights=np.abs(values)) (the same sums, bit for bit) without the (n,) temporary."""
    for i in range(label.shape[0]):
        out[label[i]] += abs(values[i])


@njit
def label_bbox(points, cells, k, label, lo, hi):
    """Per label min and max of the corner coordinates cells[:, :k] (NaN-skipping
    within a cell, a cell with no finite coordinate makes its label's bound NaN, as
    the numpy path); lo, hi (n_label, 3) initialised to +inf / -inf."""
    for c in range(cells.shape[0]):
        lab = label[c]
        for d in range(3):
            cmin = np.nan
            cmax = np.nan
            for i in range(k):
                v = points[cells[c, i], d]
                if v == v:
                    if cmin != cmin or v < cmin:
                        cmin = v
                    if cmax != cmax or v > cmax:
                        cmax = v
            if cmin != cmin or lo[lab, d] != lo[lab, d]:
                lo[lab, d] = np.nan
            elif cmin < lo[lab, d]:
                lo[lab, d] = cmin
            if cmax != cmax or hi[lab, d] != hi[lab, d]:
                hi[lab, d] = np.nan
            elif cmax > hi[lab, d]:
                hi[lab, d] = cmax


@njit
def close_pairs(points, used, hmin, rel_tol, u):
    """(k, 2) int64 pairs (i < j, unsorted) of used nodes with finite coordinates at
    distance d <= rel_tol * max finite hmin and d <= rel_tol * min(hmin[i], hmin[j]).

    The nodes are counting-sorted into slabs across the unit direction u (3,) (a
    generic one, so no mesh plane lies across it) at least twice as thick as the
    search radius, so close nodes lie in the same or neighbouring slabs; about one
    node per slab, O(n) work for any mesh without a pile of coincident nodes.
    """
    n = points.shape[0]
    ids = np.empty(n, np.int64)
    k = 0
    hmax = -1.0
    for i in range(n):
        if used[i] and np.isfinite(points[i, 0]) and np.isfinite(points[i, 1]) \
                and np.isfinite(points[i, 2]):
            ids[k] = i
            k += 1
            h = hmin[i]
            if np.isfinite(h) and h > hmax:
                hmax = h
    out = np.empty((0, 2), np.int64)
    if k < 2 or hmax < 0:
        return out
    radius = rel_tol * hmax
    proj = np.empty(k)
    pmin = np.inf
    pmax = -np.inf
    amax = 0.0
    for t in range(k):
        i = ids[t]
        x = points[i, 0] * u[0] + points[i, 1] * u[1] + points[i, 2] * u[2]
        proj[t] = x
        pmin = min(pmin, x)
        pmax = max(pmax, x)
        amax = max(amax, abs(points[i, 0]), abs(points[i, 1]), abs(points[i, 2]))
    # |u.(p - q)| <= |p - q|, with a margin for the rounding of the projections
    tol = radius * (1.0 + 1e-9) + 1e-13 * amax
    width = max(2.0 * tol, (pmax - pmin) / k)
    if not width > 0.0 or not np.isfinite(width):
        width = 1.0
    nb = int((pmax - pmin) / width) + 1
    ptr = np.zeros(nb + 2, np.int64)
    slab = np.empty(k, np.int64)
    for t in range(k):
        s = min(int((proj[t] - pmin) / width), nb - 1)
        slab[t] = s
        ptr[s + 2] += 1
    for s in range(nb + 1):
        ptr[s + 1] += ptr[s]
    order = np.empty(k, np.int64)
    for t in range(k):
        p = ptr[slab[t] + 1]
        ptr[slab[t] + 1] = p + 1
        order[p] = t
    # ptr[s] .. ptr[s + 1] now holds slab s; pairs found as i * n + j
    found = np.empty(16, np.int64)
    m = 0
    for s in range(nb):
        end = ptr[s + 2] if s + 1 < nb else ptr[s + 1]
        for a in range(ptr[s], ptr[s + 1]):
            ta = order[a]
            for b in range(a + 1, end):
                tb = order[b]
                if abs(proj[tb] - proj[ta]) > tol:
                    continue
                i = ids[ta]
                j = ids[tb]
                d0 = points[i, 0] - points[j, 0]
                d1 = points[i, 1] - points[j, 1]
                d2 = points[i, 2] - points[j, 2]
                d = np.sqrt(d0 * d0 + d1 * d1 + d2 * d2)
                if d <= radius and d <= rel_tol * min(hmin[i], hmin[j]):
                    if m == found.shape[0]:  # grow (element loop: compiles fast)
                        grown = np.empty(2 * m, np.int64)
                        for q in range(m):
                            grown[q] = found[q]
                        found = grown
                    found[m] = min(i, j) * n + max(i, j)
                    m += 1
    out = np.empty((m, 2), np.int64)
    for q in range(m):
        out[q, 0] = found[q] // n
        out[q, 1] = found[q] % n
    return out


@njit
def incidence_count(ce, ptr):
    """ptr[e + 1] += 1 for every local edge e of the cells ce (m, k)."""
    for c in range(ce.shape[0]):
        for k in range(ce.shape[1]):
            ptr[ce[c, k] + 1] += 1


@njit
def incidence_fill(ce, g0, pos, inc):
    """inc[pos[e]] = g0 + c for every local edge e of cell c, pos advancing (rows in
    (cell, local edge) order: a stable counting sort by edge)."""
    for c in range(ce.shape[0]):
        for k in range(ce.shape[1]):
            e = ce[c, k]
            inc[pos[e]] = g0 + c
            pos[e] += 1
