"""Compiled kernels of :mod:`meshcheck.directional` (numba; the numpy code there is the
reference the tests compare with)."""
from __future__ import annotations

import numpy as np

from . import njit

__all__ = ["block_face_keys", "group_edge_pairs", "face_dofs", "edge_orders"]


@njit
def block_face_keys(ce, sides, n_sides, cols, first_cell, m, o, cell, ca, cb, tri, at):
    """Write the edge-pair keys of every local face of one block's cells into the rows
    ``at, at + 1, ...`` of m, o (keys), cell (global id), ca, cb (direction columns along
    the pair (m, o) and the other pair), tri.  ce (cells, local edges) unique-edge ids;
    sides (faces, 4) local edges of each face's sides (3 used for triangles), n_sides,
    cols (faces, 4) direction column of each side.  Keys as in
    :func:`meshcheck.directional._edge_pair_rows`; returns the next free row."""
    r = at
    for c in range(ce.shape[0]):
        for f in range(sides.shape[0]):
            e0 = ce[c, sides[f, 0]]
            e1 = ce[c, sides[f, 1]]
            e2 = ce[c, sides[f, 2]]
            if n_sides[f] == 3:
                lo = min(e0, min(e1, e2))
                hi = max(e0, max(e1, e2))
                m[r] = lo
                o[r] = e0 + e1 + e2 - lo - hi
                ca[r] = cols[f, 0]
                cb[r] = cols[f, 0]
                tri[r] = True
            else:
                e3 = ce[c, sides[f, 3]]
                lo02 = min(e0, e2)
                lo13 = min(e1, e3)
                if lo02 < lo13:
                    m[r] = lo02
                    o[r] = max(e0, e2)
                    ca[r] = cols[f, 0]
                    cb[r] = cols[f, 1]
                else:
                    m[r] = lo13
                    o[r] = max(e1, e3)
                    ca[r] = cols[f, 1]
                    cb[r] = cols[f, 0]
                tri[r] = False
            cell[r] = first_cell + c
            r += 1
    return r


@njit
def group_edge_pairs(m, o, n_edges):
    """Face id of every row keyed by an edge pair (m, o), m < n_edges: rows with equal
    pairs get one id.  A counting sort by ``m`` and a scan of each (short) bucket; O(rows).
    Returns ((rows,) int64 ids numbered by first appearance in ``m`` order, count)."""
    n = m.shape[0]
    start = np.zeros(n_edges + 1, np.int64)
    for i in range(n):
        start[m[i] + 1] += 1
    for e in range(n_edges):
        start[e + 1] += start[e]
    pos = start[:-1].copy()
    rows = np.empty(n, np.int64)
    for i in range(n):
        rows[pos[m[i]]] = i
        pos[m[i]] += 1
    gid = np.empty(n, np.int32)
    count = 0
    for e in range(n_edges):
        for a in range(start[e], start[e + 1]):
            i = rows[a]
            found = -1
            for b in range(start[e], a):
                j = rows[b]
                if o[j] == o[i]:
                    found = gid[j]
                    break
            if found < 0:
                gid[i] = count
                count += 1
            else:
                gid[i] = found
    return gid, count


@njit
def face_dofs(gid, n_faces, tri, cell, ca, cb, orders):
    """Face unknowns by the maximum rule: per face the highest order along each pair of
    sides over its rows (``orders[cell, ca]`` and ``orders[cell, cb]``); (p-1)(p-2)/2 for
    triangles, (p_a-1)(p_b-1) for quadrilaterals."""
    low = np.iinfo(np.int64).min
    pa = np.full(n_faces, low, np.int64)
    pb = np.full(n_faces, low, np.int64)
    is_tri = np.zeros(n_faces, np.bool_)
    for i in range(gid.shape[0]):
        g = gid[i]
        va = orders[cell[i], ca[i]]
        vb = orders[cell[i], cb[i]]
        if va > pa[g]:
            pa[g] = va
        if vb > pb[g]:
            pb[g] = vb
        is_tri[g] = tri[i]
    total = 0
    for g in range(n_faces):
        if is_tri[g]:
            total += (pa[g] - 1) * (pa[g] - 2) // 2
        else:
            total += (pa[g] - 1) * (pb[g] - 1)
    return total


@njit
def edge_orders(edge_p, cell_edges, orders, group):
    """In place: ``edge_p[e] = max(edge_p[e], orders[c, group[k]])`` over every local edge
    k of every cell c, cell_edges (m, n_local) edge ids, orders (m, 3)."""
    for c in range(cell_edges.shape[0]):
        for k in range(cell_edges.shape[1]):
            e = cell_edges[c, k]
            v = orders[c, group[k]]
            if v > edge_p[e]:
                edge_p[e] = v


@njit
def group_max(cell_edges, edge_order, group, n_groups):
    """(cells, n_groups) int64: per cell the highest ``edge_order`` over the local edges of
    each group (``group[k]`` the group of local edge k, -1 for none)."""
    out = np.zeros((cell_edges.shape[0], n_groups), np.int64)
    for c in range(cell_edges.shape[0]):
        for k in range(cell_edges.shape[1]):
            g = group[k]
            if g >= 0:
                v = edge_order[cell_edges[c, k]]
                if v > out[c, g]:
                    out[c, g] = v
    return out
