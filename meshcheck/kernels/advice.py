"""Compiled kernels of the advice stage (:mod:`meshcheck.advice`, :mod:`meshcheck.cost`).

Each kernel computes, with the same floating-point operations in the same order, what
the numpy reference computes (tests/test_kernels_advice.py compares both):

* :func:`governing_edges`, :func:`odd_cells`: a cell's longest edge (``np.argmax``
  semantics: the first maximum, the first NaN if any) and the cells whose edges differ
  in speed or distance (``advice._governing_edges``);
* :func:`longest_directions`: the 3x3 sum of d d^T over the unit directions d of the
  cells' longest edges (``advice._alignment``, whose numpy code sums ``d.T @ d``: equal
  to rounding, 1e-12);
* :func:`mark_rows`, :func:`edge_orders`, :func:`gov_index`, :func:`exact_rows`,
  :func:`finish_limits`: the frequency limits of edges and cells at every order
  (``advice.advise``): one pass over the edges (all orders for the cells' longest edges,
  written into one row per such edge), one over the cells (each takes its longest
  edge's row; cells taking the minimum over their edges get rows of their own), no
  (n_edges,) temporaries per order; :func:`row_min`: minima read through the cells'
  rows;
* :func:`per_cell_max`: ``Edges.per_cell(values, np.maximum)`` for one block;
* :func:`order_hist`, :func:`edge_min_bins`, :func:`edge_bin_hist`,
  :func:`face_dof_hist`: histograms of the cells' limits (and of the edges' and faces' smallest limits, weighted by the unknowns
  they add) over the sorted sweep frequencies (``advice.sweep``,
  ``cost.variable_order_dofs``): their cumulative sums are the counts the reference
  gets from ``np.searchsorted`` on sorted limits, whatever the number of frequencies;
* :func:`label_flagged`, :func:`count_labels`, :func:`cluster_stats`,
  :func:`group_by_label`: connected
  components of the flagged cells by union-find over the face (2D: edge) adjacency,
  numbered in the order of their smallest cell id like
  ``scipy.sparse.csgraph.connected_components``, the per-cluster sizes, boxes and
  weighted centroids, and the stable ``np.argsort`` of the labels (``advice.clusters``).

Frequencies in Hz, lengths in m, speeds in m/s; cell and edge ids int64 or int32 (numba
compiles a variant per integer type).
"""
from __future__ import annotations

import numpy as np

from . import njit

TWO_PI = 2.0 * np.pi


# ---------------------------------------------------------------------------
# governing edges and alignment


@njit
def _argmax_edge(ce, i, c0, c1, h):
    """Edge id of ``ce[i, c0:c1]`` with the largest h (np.argmax: first max, first NaN)."""
    best = ce[i, c0]
    hb = h[best]
    if hb != hb:
        return best
    for j in range(c0 + 1, c1):
        e = ce[i, j]
        v = h[e]
        if v != v:
            return e
        if v > hb:
            best = e
            hb = v
    return best


@njit
def governing_edges(ce, lo, hi, h, gov, start):
    """gov[start + i] = the longest edge of cell i of a block, lo <= i < hi.

    ce : (m, k) integer edge ids of the block's cells; h : (n_e,) float64 lengths, m;
    gov : (n_cells,) integer output.
    """
    k = ce.shape[1]
    for i in range(lo, hi):
        gov[start + i] = _argmax_edge(ce, i, 0, k, h)


@njit
def odd_cells(ce, h, c, L, odd, start):
    """odd[start + i] = the edges of cell i differ in speed c or distance L, or one has a
    non-finite length h (cells whose limit is the minimum over all their edges).

    ce : (m, k) int64; h, c, L : (n_e,) float64; odd : (n_cells,) bool output.
    """
    m, k = ce.shape
    for i in range(m):
        e0 = ce[i, 0]
        c0 = c[e0]
        l0 = L[e0]
        flag = not np.isfinite(h[e0])
        for j in range(1, k):
            e = ce[i, j]
            if c[e] != c0 or L[e] != l0 or not np.isfinite(h[e]):
                flag = True
                break
        odd[start + i] = flag


@njit
def _block_directions(points, pa, pb, k, t):
    """Adds to t ((6,) float64: the xx, xy, xz, yy, yz, zz sums) the sums of d d^T over
    the unit directions d from node pa[i] to node pb[i], i < k (one block, summed on its
    own first), skipping directions with a non-finite component; returns how many."""
    b00 = b01 = b02 = b11 = b12 = b22 = 0.0
    n = 0
    for i in range(k):
        a = pa[i]
        b = pb[i]
        d0 = points[b, 0] - points[a, 0]
        d1 = points[b, 1] - points[a, 1]
        d2 = points[b, 2] - points[a, 2]
        if not (np.isfinite(d0) and np.isfinite(d1) and np.isfinite(d2)):
            continue
        r = np.sqrt(d0 * d0 + d1 * d1 + d2 * d2)
        if r < 1e-300:
            r = 1e-300
        d0 /= r
        d1 /= r
        d2 /= r
        b00 += d0 * d0
        b01 += d0 * d1
        b02 += d0 * d2
        b11 += d1 * d1
        b12 += d1 * d2
        b22 += d2 * d2
        n += 1
    t[0] += b00
    t[1] += b01
    t[2] += b02
    t[3] += b11
    t[4] += b12
    t[5] += b22
    return n


@njit
def _add_symmetric(T, t):
    """T (3, 3) += the symmetric matrix of the sums t of :func:`_block_directions`."""
    T[0, 0] += t[0]
    T[1, 1] += t[3]
    T[2, 2] += t[5]
    T[0, 1] += t[1]
    T[1, 0] += t[1]
    T[0, 2] += t[2]
    T[2, 0] += t[2]
    T[1, 2] += t[4]
    T[2, 1] += t[4]


@njit
def longest_directions(ce, c0, c1, length, cells, local, points, T):
    """Sum of d d^T over the unit directions d of each cell's longest edge among local
    edges c0..c1-1, from its smaller to its larger node number (as ``Edges.nodes``),
    skipping directions with a non-finite component; added to T.

    ce : (m, k) integer edge ids of a block's cells; length : (n_e,) float64, m;
    cells : (m, n_nodes) integer the block's nodes; local : (k, 2) int64 local nodes of
    the local edges; points : (n_p, 3) float64, m; T : (3, 3) float64, accumulated
    (symmetric), summed in blocks of 4096 cells.  Returns how many directions.
    """
    m = ce.shape[0]
    blk = 4096
    pa = np.empty(min(m, blk), np.int64)
    pb = np.empty(min(m, blk), np.int64)
    t = np.zeros(6)
    n = 0
    for s in range(0, m, blk):
        stop = min(m, s + blk)
        for i in range(s, stop):  # the edges first: the gathers of the sums do not wait
            j = c0
            hb = length[ce[i, c0]]
            if hb == hb:
                for jj in range(c0 + 1, c1):  # np.argmax: first maximum, first NaN
                    v = length[ce[i, jj]]
                    if v != v:
                        j = jj
                        break
                    if v > hb:
                        j = jj
                        hb = v
            x = cells[i, local[j, 0]]
            y = cells[i, local[j, 1]]
            pa[i - s] = min(x, y)
            pb[i - s] = max(x, y)
        n += _block_directions(points, pa, pb, stop - s, t)
    _add_symmetric(T, t)
    return n


@njit
def gov_directions(gov, lo, hi, nodes, points, T):
    """:func:`longest_directions` of the cells lo <= i < hi whose longest edge gov[i] is
    known (over all their edges): the direction from nodes[gov[i], 0] to nodes[gov[i], 1]
    (smaller to larger node number), the same sums in the same blocks of 4096 cells, so
    the same T bit for bit.  Returns how many directions."""
    blk = 4096
    pa = np.empty(min(max(hi - lo, 0), blk), np.int64)
    pb = np.empty(min(max(hi - lo, 0), blk), np.int64)
    t = np.zeros(6)
    n = 0
    for s in range(lo, hi, blk):
        stop = min(hi, s + blk)
        for i in range(s, stop):
            e = gov[i]
            pa[i - s] = nodes[e, 0]
            pb[i - s] = nodes[e, 1]
        n += _block_directions(points, pa, pb, stop - s, t)
    _add_symmetric(T, t)
    return n


@njit(inline="always")
def _grid(lre, la, scale, top):
    """Grid segment i and position u in it of ln(re / a) = ln re - ln a
    (``UsableKh.max_kh_log``: the same operations in the same order); re = L / h, a the
    size factor, their logarithms given (one ln re per edge, not one per order)."""
    u = lre - la
    u *= scale
    if u < 0.0:
        u = 0.0
    elif u > top:
        u = top
    i = int(u)
    u -= i
    return i, u


# The helpers below take scalars, or use every array they take on every path: numba
# reference-counts an array argument that a helper uses on one branch only, and those
# counting calls stay in the caller's loop (two atomic calls per array and iteration;
# measured: 37 % of the advice kernels' time at 4.8M tetrahedra).


@njit(inline="always")
def _value(kh_base, kh_step, u, a, he, ce):
    """Highest usable frequency (Hz) of an edge of length he (m), speed ce (m/s) and
    size factor a at position u of the grid segment whose usable kh starts at kh_base
    and rises by kh_step: ``c * max_kh / (2 pi h a)`` of ``advise``."""
    kh = kh_base + u * kh_step
    return ce * kh / (TWO_PI * he * a)


@njit(inline="always")
def _good(he, ce, Le):
    """Whether an edge of length he, speed ce and distance Le has limits (``advise``:
    h finite and > 0, L and c finite); the others have limit 0 at every order."""
    return np.isfinite(he) and he > 0.0 and np.isfinite(Le) and np.isfinite(ce)


@njit
def exact_rows(ce, rows, dest, h, c, L, code, A, logA, base, step, scale, top, out):
    """out[dest[k], p] = minimum over the edges of row rows[k] of a block (np.minimum
    semantics) of their limits at order p + 1 (0 for an edge that is not good; logA =
    ln A)."""
    pmax = out.shape[1]
    k = ce.shape[1]
    for q in range(rows.shape[0]):
        r = rows[q]
        for p in range(pmax):
            m = np.inf
            for j in range(k):
                e = ce[r, j]
                he, c_e, Le, kc = h[e], c[e], L[e], code[e]
                v = 0.0
                if _good(he, c_e, Le):
                    g, u = _grid(np.log(Le / he), logA[kc, p], scale, top)
                    v = _value(base[p, g], step[p, g], u, A[kc, p], he, c_e)
                if j == 0 or v < m or v != v:
                    m = v
                if m != m:
                    break
            out[dest[q], p] = m


@njit  # not inlined: edge_orders calls it on a branch, where an inlined copy left `out`
#       reference-counted at every step of the loop (objdump of the built module)
def _finish_row(out, i, fmax, P):
    """Running maximum of row i along the orders (np.maximum.accumulate, NaN
    propagating), in place; returns (cell order, refine) of the row (see
    :func:`finish_limits`)."""
    pmax = out.shape[1]
    m = out[i, 0]
    cnt = 1 if m < fmax else 0
    for p in range(1, pmax):
        v = out[i, p]
        if m == m and not v <= m:
            m = v
        out[i, p] = m
        if m < fmax:
            cnt += 1
    return 1 + cnt, out[i, P - 1] < fmax


@njit
def finish_limits(out, lo, hi, fmax, P, cell_order, refine):
    """Running maximum along the orders (np.maximum.accumulate), then
    cell_order[i] = 1 + #orders whose limit is below fmax, refine[i] = limit at the
    allowed order P below fmax, for cells lo <= i < hi."""
    for i in range(lo, hi):
        cell_order[i], refine[i] = _finish_row(out, i, fmax, P)


@njit
def mark_rows(gov, skip, owner):
    """owner[e] = the limit row of edge e: rows 0, 1, ... in the order of the first
    cell governed by e (gov : (n_cells,) integers), cells with skip[i] left out (skip
    (n_cells,) bool, or empty: none); owner : (n_e,) signed integers set to -1 by the
    caller, left -1 for the other edges.  Returns the number of rows."""
    n = 0
    some = skip.shape[0] > 0
    for i in range(gov.shape[0]):
        if some and skip[i]:
            continue
        e = gov[i]
        if owner[e] < 0:
            owner[e] = n
            n += 1
    return n


@njit
def _take_row(gov, owner, i, limit_row):
    """Cell i takes the row of its longest edge; returns (the edge, the row)."""
    e = gov[i]
    r = owner[e]
    limit_row[i] = r
    return e, r


@njit
def gov_index(gov, owner, lo, hi, limit_row, h, code, size, code_gov, finish,
              row_order, row_refine, cell_order, refine):
    """For cells lo <= i < hi: limit_row[i] = owner[gov[i]], the row that
    :func:`edge_orders` wrote for the cell's longest edge (see :func:`mark_rows`; -1
    for a cell skipped there), with cell_order[i], refine[i] of that row when
    ``finish``; size[i] = h[gov[i]] (m) and code_gov[i] = code[gov[i]] (the row of its
    size factors in A: one byte per cell instead of the float64 factor).  Cells of
    different ranges write different entries: ranges can run on different threads."""
    for i in range(lo, hi):
        e, r = _take_row(gov, owner, i, limit_row)
        if finish:  # the row's order and refine flag
            cell_order[i] = row_order[r]
            refine[i] = row_refine[r]
        size[i] = h[e]
        code_gov[i] = code[e]


@njit
def gov_sizes(gov, owner, lo, hi, limit_row, h, code, a_col, size, factor, finish,
              row_order, row_refine, cell_order, refine, cell_size, target, coarsen):
    """:func:`gov_index` for one model size (one wavenumber and distance) and one factor
    per cell, with the sizes decided here: cell_size[i] = h[gov[i]], target[i] = size /
    a_col[code[gov[i]]] (both stored in the arrays' type, float32) and coarsen[i] =
    target >= factor * cell_size, compared in float64 (as the numpy operations on the
    float64 arrays: NaN never coarsens, a zero factor gives an infinite or NaN target)."""
    for i in range(lo, hi):
        e, r = _take_row(gov, owner, i, limit_row)
        if finish:  # the row's order and refine flag
            cell_order[i] = row_order[r]
            refine[i] = row_refine[r]
        x = h[e]
        a = a_col[code[e]]
        if a != 0.0:
            t = size / a
        elif size != 0.0 and size == size:
            t = np.inf if size > 0 else -np.inf
        else:
            t = np.nan
        cell_size[i] = x
        target[i] = t
        coarsen[i] = t >= x * factor


@njit
def lookup(table, index, out):
    """out[i] = table[index[i]] (e.g. the size factors by code, or a column of the limit
    rows by the cells' rows): np.take would cast the index to intp first."""
    for i in range(index.shape[0]):
        out[i] = table[index[i]]


@njit
def edge_orders(lo, hi, h, c, L, code, A, logA, base, step, scale, top, fmax, P, edge_order,
                edge_limit, owner, out, finish, cell_order, refine):
    """edge_order[e] = lowest order whose limit reaches fmax (pmax + 1 = none),
    edge_limit[e] = limit at the allowed order P (Hz; not written when edge_limit is
    empty), for edges lo <= e < hi; an edge with a row owner[e] >= 0 (it is the longest edge of some cell, see :func:`mark_rows`)
    also writes its limits at every order into out[owner[e]] ((n_rows, pmax) float64,
    Hz; 0 for an edge that is not good), finished by :func:`finish_limits` (with
    cell_order, refine: per row here) when ``finish``.  Rows are distinct, so edge
    ranges on different threads write different rows.

    h, c, L : (n_e,) float64 lengths (m), speeds (m/s), distances (m), any strides
    (a uniform c or L may be a broadcast scalar); code : (n_e,) factor row of every edge
    in A (pmax columns), logA = ln A.  One logarithm ln(L / h) per edge; the grid
    position is recomputed only when the factor changes with the order.  Returns the
    number of good edges whose L / h is not > 0 (the caller raises: ``UsableKh.max_kh``
    refuses them).
    """
    pmax = A.shape[1]
    n_bad = 0
    keep = edge_limit.shape[0] > 0
    for e in range(lo, hi):
        r = owner[e]
        he, ce, Le = h[e], c[e], L[e]
        if not _good(he, ce, Le):  # limit 0 at every order
            edge_order[e] = pmax + 1 if fmax > 0.0 else 1
            if keep:
                edge_limit[e] = 0.0
            if r >= 0:
                for p in range(pmax):
                    out[r, p] = 0.0
                if finish:
                    cell_order[r], refine[r] = _finish_row(out, r, fmax, P)
            continue
        k = code[e]
        re = Le / he
        if not re > 0.0:
            n_bad += 1
        lre = np.log(re)
        o = pmax + 1
        at_p = -1.0
        pa = -1.0
        g, u = 0, 0.0
        for p in range(pmax):
            a = A[k, p]
            if a != pa:
                g, u = _grid(lre, logA[k, p], scale, top)
                pa = a
            f = _value(base[p, g], step[p, g], u, a, he, ce)
            if r >= 0:
                out[r, p] = f
            if p == P - 1:
                at_p = f
            if f >= fmax and o > pmax:
                o = p + 1
                if r < 0 and p >= P - 1:
                    break
                if r < 0:  # the limit at P, then done
                    a = A[k, P - 1]
                    if a != pa:
                        g, u = _grid(lre, logA[k, P - 1], scale, top)
                    at_p = _value(base[P - 1, g], step[P - 1, g], u, a, he, ce)
                    break
        edge_order[e] = o
        if keep:
            edge_limit[e] = at_p
        if r >= 0 and finish:
            cell_order[r], refine[r] = _finish_row(out, r, fmax, P)
    return n_bad


@njit
def per_cell_max(ce, values, out, start):
    """out[start + i] = maximum of values over the edges of cell i (np.maximum.reduce:
    NaN propagates).  ce : (m, k) int64; values : (n_e,) float64."""
    m, k = ce.shape
    for i in range(m):
        x = values[ce[i, 0]]
        for j in range(1, k):
            v = values[ce[i, j]]
            if x == x and not v <= x:
                x = v
        out[start + i] = x


# ---------------------------------------------------------------------------
# sweeps: histograms over the sorted frequencies


@njit
def row_min(rows, index, lo, hi, out):
    """out[p] = minimum (np.minimum semantics: NaN propagates) of out[p] and
    rows[index[i], p] over lo <= i < hi."""
    pmax = rows.shape[1]
    for i in range(lo, hi):
        r = index[i]
        for p in range(pmax):
            x = rows[r, p]
            if x != x or x < out[p]:
                if out[p] == out[p]:
                    out[p] = x


@njit
def order_hist(lim, weight, fs, lo, hi, hist, B, ncol, g0, gs, gidx):
    """hist[p, b] += 1 for every cell lo <= i < hi whose limit at order p + 1 has b sweep
    frequencies at or below it: cumsum(hist[p])[k] = #cells with limit < fs[k];
    B[i, q] = b + 1 for the first ncol orders (0 for a NaN limit, see
    :func:`edge_bin_hist`).  With ``weight`` (n_rows,) integers (not empty), the rows of
    ``lim`` are limit rows standing for weight[i] cells each: hist[p, b] += weight[i].

    lim : (n_cells, pmax) float64, Hz; fs : (n_f,) sorted finite Hz;
    hist : (pmax, n_f + 1) int64, accumulated; B : (n_cells, W) unsigned integers
    holding n_f + 1 (uint8 up to 254 frequencies), W >= ncol, its columns from min(ncol, pmax) on
    set to n_f + 1 here (rows lo..hi - 1).  The bins are counted
    from a grid over the frequencies: x in cell g = int((x - g0) * gs) (clamped to
    0..len(gidx) - 1) has at least gidx[g] frequencies at or below it
    (``cost._bin_grid`` makes it).
    """
    pmax = lim.shape[1]
    weighted = weight.shape[0] > 0
    n = fs.shape[0]
    last = fs[n - 1]
    top = gidx.shape[0] - 1
    pad = n + 1  # B's padding columns (the caller need not fill B first)
    for i in range(lo, hi):
        w = weight[i] if weighted else 1
        for p in range(pmax):
            x = lim[i, p]
            # b = number of frequencies <= x (NaN: n): from the grid's start, a few steps
            # up (a binary search's unpredictable branches cost about twice as much; in
            # the loop itself, not a helper: numba would reference-count fs and gidx at
            # every call of a helper that reads them on one branch only)
            if not x < last:
                b = n
            else:
                u = (x - g0) * gs
                g = min(np.int64(u), top) if u > 0.0 else 0
                b = gidx[g]
                while fs[b] <= x:
                    b += 1
            hist[p, b] += w
            if p < ncol:
                B[i, p] = b + 1 if x == x else 0
        for q in range(min(ncol, pmax), B.shape[1]):
            B[i, q] = pad


@njit
def edge_min_bins(B, row, ce, g0, e_lo, e_hi, E):
    """E[e, :] = min(E[e, :], bins of cell g0 + c) for every local edge e of every cell
    c of one block (ce (m, k) edge ids, global cells g0 + c) with e_lo <= e < e_hi: each
    edge's smallest bins over its cells, by the cells' own edge lists (no edge-to-cell
    incidence).  Threads taking disjoint edge ranges write disjoint rows of E (each
    reads every cell's edge list; minima in any order give the same bins).  The bins of
    cell i are B[row[i]] (rows shared by the cells, see :func:`order_hist`), or B[i]
    when ``row`` is empty."""
    W = B.shape[1]
    shared = row.shape[0] > 0
    for c in range(ce.shape[0]):
        i = -1
        for k in range(ce.shape[1]):
            e = ce[c, k]
            if e < e_lo or e >= e_hi:
                continue
            if i < 0:
                i = row[g0 + c] if shared else g0 + c
            for q in range(W):  # branch-free: compiled to vector minima (2.3x faster)
                E[e, q] = min(E[e, q], B[i, q])


@njit
def edge_bin_hist(E, lo, hi, hist):
    """Edge unknowns added above order q + 1, binned by frequency (maximum rule), for
    edges lo <= e < hi: an edge has order > q + 1 at the frequencies above the smallest
    limit of its cells, hist[E[e, q] - 1] += 1 with E (n_e, W) the edges' smallest bins
    + 1 of :func:`edge_min_bins` (a NaN limit, bin 0, puts the edge at n_f = len(hist) - 1:
    never counted, like a NaN minimum; columns past the orders counted hold n_f + 1)."""
    n_f = hist.shape[0] - 1
    for e in range(lo, hi):
        for q in range(E.shape[1]):
            m = np.int64(E[e, q])
            hist[m - 1 if m > 0 else n_f] += 1


@njit
def face_dof_hist(B, qs, row, fcells, tri, lo, hi, hist):
    """Face unknowns added above order q + 1, binned like :func:`edge_bin_hist`: q per
    triangle (tri True; tri empty: every face), 2 q + 1 per quadrilateral, at the smaller
    bin of the face's
    cells (fcells (n_faces, 2) integers, -1 = no second cell), for faces lo <= f < hi;
    cell i's bins are B[row[i]], or B[i] when ``row`` is empty; column j of B is the
    order qs[j] + 1 (qs (W,) integers: the columns kept, see ``cost._dofs_from_bins``)."""
    n_f = hist.shape[0] - 1
    shared = row.shape[0] > 0
    all_tri = tri.shape[0] == 0  # no array: every face a triangle
    for f in range(lo, hi):
        c0 = fcells[f, 0]
        c1 = fcells[f, 1]
        if shared:
            c0 = row[c0]
            if c1 >= 0:
                c1 = row[c1]
        t = True if all_tri else tri[f]
        for j in range(B.shape[1]):
            q = qs[j]
            w = q if t else 2 * q + 1
            b = np.int64(B[c0, j])
            if c1 >= 0:
                b = min(b, np.int64(B[c1, j]))
            if w > 0:
                hist[b - 1 if b > 0 else n_f] += w


# ---------------------------------------------------------------------------
# clusters


@njit
def _find(parent, i):
    r = i
    while parent[r] != r:
        r = parent[r]
    while parent[i] != r:  # path compression
        j = parent[i]
        parent[i] = r
        i = j
    return r


@njit
def label_flagged(mask, pairs, count, need, lab):
    """Connected components of the flagged cells through the pairs (pairs (n, 2) integer
    global cell ids; pair j joins its cells when count[j] >= need, both are >= 0 and
    flagged), written into lab ((n_cells,) signed integers, int32 will do below 2**31
    cells): the component of every flagged cell, numbered by their smallest cell id, -1
    for the other cells.  Returns the number of components.

    lab is the union-find's parent array first (the root of a component is its smallest
    id), then holds -1 - label for the flagged cells seen, so that the labels need no
    second (n_cells,) or (n_flagged,) array."""
    n = mask.shape[0]
    for i in range(n):
        lab[i] = i
    for j in range(pairs.shape[0]):
        if count[j] < need:
            continue
        a = pairs[j, 0]
        b = pairs[j, 1]
        if a < 0 or b < 0 or not mask[a] or not mask[b]:
            continue
        ra = _find(lab, a)
        rb = _find(lab, b)
        if ra != rb:
            if ra < rb:
                lab[rb] = ra
            else:
                lab[ra] = rb
    n_lab = 0
    for i in range(n):  # parents have smaller ids: every cell on i's path is seen
        if not mask[i]:
            continue
        r = i
        while lab[r] >= 0 and lab[r] != r:
            r = lab[r]
        if lab[r] >= 0:  # r == i, the smallest id of a new component
            lab[r] = -1 - n_lab
            n_lab += 1
        lab[i] = lab[r]
    for i in range(n):
        lab[i] = -1 - lab[i] if mask[i] else -1
    return n_lab


@njit
def count_labels(lab, cnt):
    """cnt[j] += the cells of label j (lab < 0: none), without np.bincount's int64 copy
    of an int32 lab."""
    for i in range(lab.shape[0]):
        j = lab[i]
        if j >= 0:
            cnt[j] += 1


@njit
def group_by_label(lab, cnt, order):
    """order = np.argsort(lab, kind="stable") by counting sort (cnt = bincount(lab))."""
    n_lab = cnt.shape[0]
    ptr = np.empty(n_lab, np.int64)
    s = 0
    for j in range(n_lab):
        ptr[j] = s
        s += cnt[j]
    for i in range(lab.shape[0]):
        j = lab[i]
        order[ptr[j]] = i
        ptr[j] += 1


@njit
def cluster_stats(lab, slot, cell_size, target_size, cen, points, cells, n_corners,
                  volume, size, target, lo, hi, wsum, vsum, first, n_first):
    """Per chosen cluster (slot[label] >= 0), over its cells in increasing id order:
    longest edge ``size`` (max), smallest ``target`` (min), centroid box ``lo``/``hi``
    (NaN propagates, as ndarray.max/min), ``wsum`` = sum of centroid * weight and
    ``vsum`` = sum of the weights (the same sequential sums as numpy's along axis 0 and
    ``np.bincount``'s), and its first cell ids.

    lab : (n_cells,) integer cluster of every cell (-1: not flagged, see
    :func:`label_flagged`); slot : (n_lab,) int64; cell_size, target_size : (n_cells,)
    float64, m; cen : (k, 3) float64 centroids of the k flagged cells (increasing ids),
    m, or empty: then every centroid is the mean of the first n_corners nodes of its row of
    ``cells`` (one block) at
    ``points`` (bitwise as ``Mesh.centroids``), no (k, 3) array; volume : (n_cells,)
    float64 signed volumes, the weight of cell c |volume[c]|; outputs per slot: size,
    target, vsum (s,), lo, hi, wsum (s, 3), first (s, max_ids), n_first (s,).
    """
    max_ids = first.shape[1]
    seen = np.zeros(size.shape[0], np.int64)
    given = cen.shape[0] > 0
    x3 = np.empty(3)
    k = -1  # the flagged cell's number (its row of cen)
    for c in range(lab.shape[0]):
        if lab[c] < 0:
            continue
        k += 1
        s = slot[lab[c]]
        if s < 0:
            continue
        v = cell_size[c]
        t = target_size[c]
        wk = abs(volume[c])
        for j in range(3):
            if given:
                x3[j] = cen[k, j]
            else:  # the corner mean (as kernels.geometry.corner_mean)
                a = points[cells[c, 0], j]
                for q in range(1, n_corners):
                    a += points[cells[c, q], j]
                x3[j] = a / n_corners
        if seen[s] == 0:
            size[s] = v
            target[s] = t
            for j in range(3):
                x = x3[j]
                lo[s, j] = x
                hi[s, j] = x
                wsum[s, j] = x * wk
            vsum[s] = wk
        else:
            m = size[s]
            if m == m and not v <= m:
                size[s] = v
            m = target[s]
            if m == m and not t >= m:
                target[s] = t
            for j in range(3):
                x = x3[j]
                m = lo[s, j]
                if m == m and not x >= m:
                    lo[s, j] = x
                m = hi[s, j]
                if m == m and not x <= m:
                    hi[s, j] = x
                wsum[s, j] += x * wk
            vsum[s] += wk
        seen[s] += 1
        if n_first[s] < max_ids:
            first[s, n_first[s]] = c
            n_first[s] += 1
