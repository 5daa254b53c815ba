"""Compiled kernels of :mod:`meshcheck.directional` (numba; the numpy code there is the
reference the tests compare with)."""
from __future__ import annotations

import numpy as np

from . import njit
from .topology import block_of

__all__ = ["block_face_keys", "group_edge_pairs", "face_dofs", "face_dofs_by_sides", "edge_orders"]


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
def _local_edge(cell_edges, c, e):
    """Local index of edge id ``e`` among the edges of cell ``c`` (-1 if absent)."""
    for k in range(cell_edges.shape[1]):
        if cell_edges[c, k] == e:
            return k
    return -1


@njit
def face_dofs_by_sides(fcells, fcount, flocal, cell_edges, offs, sides, n_sides, group,
                       orders):
    """:func:`face_dofs` from the topology's unique faces (at most two cells each): a
    face's sides are those of local face ``flocal`` of its first cell; a quadrilateral's
    direction a is the pair of opposite sides holding its lowest edge id, b the other
    pair; each cell on the face gives the orders of its own local edges with those ids.

    fcells (n_f, 2) cells (-1 none), fcount (n_f,), flocal (n_f,) local face of the first
    cell; cell_edges (n_cells, w) edge ids; offs (n_blocks + 1,) first cell of each
    block; sides (n_blocks, 6, 4) local edges of each local face, n_sides (n_blocks, 6);
    group (n_blocks, w) direction column of each local edge; orders (n_cells, 3)."""
    total = 0
    for f in range(fcells.shape[0]):
        c0 = fcells[f, 0]
        b0 = block_of(offs, c0)
        lf = flocal[f]
        s0 = sides[b0, lf, 0]
        s1 = sides[b0, lf, 1]
        if n_sides[b0, lf] == 4:
            g0 = cell_edges[c0, s0]
            g1 = cell_edges[c0, s1]
            g2 = cell_edges[c0, sides[b0, lf, 2]]
            g3 = cell_edges[c0, sides[b0, lf, 3]]
            if not min(g0, g2) < min(g1, g3):  # a = the pair holding the lowest id
                s0, s1 = s1, s0
        ea = cell_edges[c0, s0]
        eb = cell_edges[c0, s1]
        pa = np.int64(orders[c0, group[b0, s0]])
        pb = np.int64(orders[c0, group[b0, s1]])
        if fcount[f] >= 2:
            c1 = fcells[f, 1]
            b1 = block_of(offs, c1)
            ka = _local_edge(cell_edges, c1, ea)
            kb = _local_edge(cell_edges, c1, eb)
            if ka >= 0:
                pa = max(pa, np.int64(orders[c1, group[b1, ka]]))
            if kb >= 0:
                pb = max(pb, np.int64(orders[c1, group[b1, kb]]))
        if n_sides[b0, lf] == 3:
            total += (pa - 1) * (pa - 2) // 2
        else:
            total += (pa - 1) * (pb - 1)
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
def group_max(cell_edges, edge_order, group, out):
    """In place into ``out`` (cells, n_groups), zeros on entry: per cell the highest
    ``edge_order`` over the local edges of each group (``group[k]`` the group of local
    edge k, -1 for none)."""
    for c in range(cell_edges.shape[0]):
        for k in range(cell_edges.shape[1]):
            g = group[k]
            if g >= 0:
                v = edge_order[cell_edges[c, k]]
                if v > out[c, g]:
                    out[c, g] = v
