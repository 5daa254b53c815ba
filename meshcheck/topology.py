"""Mesh topology, vectorised: unique edges and faces, boundary, components.

Edges and faces are found by sorting integer keys built from their sorted
node numbers (no hashing, no Python loop over cells).  Edge lengths of
quadratic cells are the arc lengths of the parabola through the mid-node.

Index arrays (edge and face nodes, cell edges, incidence, face cells and counts) are
int32 whenever every index fits (:func:`index_type`): half the memory of int64 for
the largest arrays of an audit.  Build keys from them in int64 (``a * np.int64(n)``).

Large meshes (see :func:`meshcheck.kernels.use_compiled`) take the compiled
kernels of :mod:`meshcheck.kernels.topology`, which give the same arrays (same
numbering, order and dtypes) in a fraction of the time and memory; the numpy
code here is their reference.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from functools import lru_cache
from typing import Callable

import numpy as np

from . import kernels
from .mesh import Mesh
from .threads import can_release, reuse_or_empty, thread_map

__all__ = ["Edges", "Faces", "Topology", "build_edges", "build_faces", "cell_volumes",
           "build_topology", "edge_lengths", "index_type"]


def index_type(n: int) -> np.dtype:
    """dtype of the topology's index arrays for indices below ``n``: int32 when they
    fit (``n <= 2**31 - 1``), else int64."""
    return np.dtype(np.int32) if n <= 2**31 - 1 else np.dtype(np.int64)

# 12-point Gauss-Legendre rule on [0, 1] for the arc length of a quadratic edge
_GL_X, _GL_WT = np.polynomial.legendre.leggauss(12)
_GL_S, _GL_W = 0.5 + 0.5 * _GL_X, 0.5 * _GL_WT


def _packed_sort(key: np.ndarray, key_max: int) -> tuple[np.ndarray, np.ndarray]:
    """(order, key[order]) for int64 keys in [0, key_max]; equal keys keep row order.

    Key and row number are packed into one int64 and sorted with ``np.sort`` (SIMD,
    about 10 times faster than ``np.argsort``: 0.7 s against 7.4 s for 28M keys).
    When they do not fit in 63 bits together, the rows are first split by the top
    bits of the key into 2**s buckets (a stable radix sort of a small integer),
    each bucket then fits: key bits - s + row bits <= 63.
    """
    n = key.shape[0]
    pos_bits = max(int(n - 1).bit_length(), 1)
    key_bits = max(int(key_max).bit_length(), 1)
    s = max(0, key_bits + pos_bits - 63)
    if s == 0:
        packed = np.left_shift(key, pos_bits)
        packed |= np.arange(n, dtype=np.int64)
        packed.sort()
        skey = packed >> pos_bits
        packed &= (1 << pos_bits) - 1
        return packed, skey
    if s > 16:
        order = np.argsort(key, kind="stable")
        return order, key[order]
    low_bits = key_bits - s
    bucket = (key >> low_bits).astype(np.uint16)
    rows = np.argsort(bucket, kind="stable")  # radix sort: O(n), rows ascending per bucket
    bounds = np.searchsorted(bucket[rows], np.arange((1 << s) + 1), side="left")
    del bucket
    order = np.empty(n, np.int64)
    skey = np.empty(n, np.int64)
    mask = (1 << low_bits) - 1
    for j in range(1 << s):
        lo, hi = bounds[j], bounds[j + 1]
        if hi == lo:
            continue
        r = rows[lo:hi]
        pb = max(int(hi - lo - 1).bit_length(), 1)
        packed = np.left_shift(key[r] & mask, pb)
        packed |= np.arange(hi - lo, dtype=np.int64)
        packed.sort()
        skey[lo:hi] = (packed >> pb) | (j << low_bits)
        order[lo:hi] = r[packed & ((1 << pb) - 1)]
    return order, skey


def _argsort_key(key: np.ndarray, key_max: int) -> np.ndarray:
    """Permutation sorting an int64 key array (keys in [0, key_max]), stable
    (see :func:`_packed_sort`)."""
    return _packed_sort(key, key_max)[0]


def _group_sorted(keys: tuple[np.ndarray, ...], key_max: int | None = None):
    """Sort rows given as key columns (last key primary, like np.lexsort).

    Returns (order, starts, inverse): ``order`` sorts the rows, ``starts``
    indexes the first sorted row of every group of equal rows, ``inverse``
    maps every row to its group number.  A single key with a known maximum
    takes the packed fast path of :func:`_argsort_key`.
    """
    if len(keys) == 1 and key_max is not None:
        order = _argsort_key(keys[0], key_max)
    elif len(keys) == 1:
        order = np.argsort(keys[0], kind="stable")
    else:
        order = np.lexsort(keys)
    n = order.shape[0]
    new = np.ones(n, dtype=bool)
    if n:
        diff = np.zeros(n - 1, dtype=bool)
        for k in keys:
            ks = k[order]
            diff |= ks[1:] != ks[:-1]
        new[1:] = diff
    group_of_sorted = np.cumsum(new) - 1
    inverse = np.empty(n, dtype=np.int64)
    inverse[order] = group_of_sorted
    return order, np.flatnonzero(new), inverse


def edge_lengths(points: np.ndarray, a: np.ndarray, b: np.ndarray,
                 mid: np.ndarray | None = None) -> np.ndarray:
    """Length of straight edges a-b, or arc length of the parabola a-mid-b.

    points : (n, 3) float64, metres; a, b, mid : (k,) int64 (mid -1 = straight).
    Returns (k,) float64 metres.
    """
    pa, pb = points[a], points[b]
    length = np.linalg.norm(pb - pa, axis=1)
    if mid is not None and (mid >= 0).any():
        q = np.flatnonzero(mid >= 0)
        xa, xb, xm = pa[q], pb[q], points[mid[q]]
        # x(s) = xa (1-s)(1-2s) + 4 xm s(1-s) + xb s(2s-1); x'(s) below
        arc = np.zeros(len(q))
        for s, w in zip(_GL_S, _GL_W):
            d = xa * (4 * s - 3) + xm * (4 - 8 * s) + xb * (4 * s - 1)
            arc += w * np.linalg.norm(d, axis=1)
        length[q] = arc
    return length


@dataclass(frozen=True)
class Edges:
    """Unique edges of a mesh.

    nodes : (n_e, 2) corner nodes (smaller first).
    mid : (n_e,) mid-node of quadratic edges, -1 for straight ones.
    length : (n_e,) float64 metres (arc length for quadratic edges).
    cell_edges : per block, (m, n_local_edges) unique-edge id of each local edge.
    incidence : (sum m * n_local_edges,) global cell id of every local edge,
        sorted by unique edge (then by cell and local edge); ``incidence_starts[e]`` is
        where edge e begins.  Given by the numpy builder; the compiled one leaves them
        out (131 MiB for 4.8M tetrahedra, which 3D audits do not need) and they are
        counted out of ``cell_edges`` on first use (the same arrays).
    Integer arrays are of :func:`index_type` (int32 unless an index exceeds it).
    """

    nodes: np.ndarray
    mid: np.ndarray
    length: np.ndarray
    cell_edges: tuple[np.ndarray, ...]
    _incidence: tuple | None = field(default=None, init=False, repr=False, compare=False)

    def __init__(self, nodes, mid, length, cell_edges, incidence=None, incidence_starts=None):
        for name, value in (("nodes", nodes), ("mid", mid), ("length", length),
                            ("cell_edges", cell_edges)):
            object.__setattr__(self, name, value)
        object.__setattr__(self, "_incidence", None if incidence is None else
                           (incidence, incidence_starts))

    def __len__(self) -> int:
        return self.nodes.shape[0]

    @property
    def has_mids(self) -> bool:
        """Whether any edge has a mid-node (quadratic geometry somewhere)."""
        m = self.mid
        if len(m) and m.strides == (0,):  # one value broadcast (a linear mesh's -1)
            return bool(m[0] >= 0)
        return bool((m >= 0).any())

    @property
    def incidence(self) -> np.ndarray:
        return self._incidence_pair()[0]

    @property
    def incidence_starts(self) -> np.ndarray:
        return self._incidence_pair()[1]

    def _incidence_pair(self):
        if self._incidence is None:  # made once (a second thread may make it again)
            object.__setattr__(self, "_incidence", _count_incidence(self.cell_edges, len(self)))
        return self._incidence

    def per_cell(self, values: np.ndarray, reduce=np.minimum) -> np.ndarray:
        """Reduce an edge quantity over the edges of every cell -> (n_cells,) (global order)."""
        out = [reduce.reduce(values[ce], axis=1) for ce in self.cell_edges]
        return np.concatenate(out) if out else np.zeros(0, values.dtype)

    def from_cells(self, cell_values: np.ndarray, reduce=np.minimum) -> np.ndarray:
        """Reduce a cell quantity over the cells sharing each edge -> (n_e,)."""
        return reduce.reduceat(cell_values[self.incidence], self.incidence_starts)

    def per_cell_table(self, values: np.ndarray, reduce=np.minimum) -> np.ndarray:
        """Like :meth:`per_cell` for (n_e, k) tables -> (n_cells, k)."""
        out = [reduce.reduce(values[ce], axis=1) for ce in self.cell_edges]
        return np.concatenate(out) if out else np.zeros((0,) + values.shape[1:], values.dtype)


def _sorted_groups(key: np.ndarray, key_max: int):
    """Group equal int64 keys: (order, starts, inverse, sorted keys at starts).

    ``order`` sorts the keys (equal keys keep their row order), ``starts`` indexes
    the first sorted row of every group, ``inverse`` maps each row to its group.
    The sort packs key and row number in one int64 (:func:`_packed_sort`) and reads
    the sorted keys back from the high bits, so no gather of the keys by the
    permutation is needed.
    """
    n = key.shape[0]
    order, skey = _packed_sort(key, key_max)
    new = np.empty(n, dtype=bool)
    if n:
        new[0] = True
        np.not_equal(skey[1:], skey[:-1], out=new[1:])
    starts = np.flatnonzero(new)
    ukey = skey[starts]
    del skey
    group = np.cumsum(new, dtype=np.int64)
    group -= 1
    inverse = np.empty(n, dtype=np.int64)
    inverse[order] = group
    return order, starts, inverse, ukey


def _row_owner(rows: np.ndarray, widths: list[int], lengths: list[int],
               offsets: np.ndarray) -> np.ndarray:
    """Global cell id of flattened (cells x local entities) rows of consecutive blocks.

    rows : positions in the concatenation of blocks of ``lengths[i]`` cells with
    ``widths[i]`` local entities each; ``offsets[i]`` is block i's first cell id.
    """
    bounds = np.cumsum([0] + [w * m for w, m in zip(widths, lengths)])
    if len(widths) == 1:
        return rows // widths[0] + offsets[0]
    blk = np.searchsorted(bounds, rows, side="right") - 1
    w = np.asarray(widths, dtype=np.int64)[blk]
    return (rows - bounds[blk]) // w + np.asarray(offsets, dtype=np.int64)[blk]


def build_edges(mesh: Mesh) -> Edges:
    """Unique edges of all cells with their lengths (vectorised sort of node-pair keys).

    Memory: the pair keys, the sort permutation and the group numbers of the
    (cells x local edges) rows, int64 each; owners and mid-nodes are derived from
    the permutation instead of being stored per row.
    """
    if kernels.use_compiled(mesh.n_cells):
        _used_compiled(mesh)
        return _build_edges_compiled(mesh)
    n = np.int64(mesh.n_points + 1)
    keys, widths, lengths = [], [], []
    for b in mesh.blocks:
        e = b.info.edges
        a = b.cells[:, e[:, 0]]
        c = b.cells[:, e[:, 1]]
        lo = np.minimum(a, c, dtype=np.int64)  # keys in int64 (cells may be int32)
        np.maximum(a, c, out=a)
        del c
        lo *= n
        lo += a
        keys.append(lo.ravel())
        widths.append(e.shape[0])
        lengths.append(len(b))
    if not keys:
        return _no_edges(mesh)
    key = keys[0] if len(keys) == 1 else np.concatenate(keys)
    del keys
    order, starts, inverse, ukey = _sorted_groups(key, int(n) * int(n))
    del key
    nodes = np.empty((len(ukey), 2), np.int64)
    np.floor_divide(ukey, n, out=nodes[:, 0])
    np.remainder(ukey, n, out=nodes[:, 1])
    del ukey
    n_e = len(starts)
    node_t = index_type(mesh.n_points)
    nodes = nodes.astype(node_t)
    inverse = inverse.astype(index_type(n_e))
    umid = _no_mids(mesh, n_e, node_t)
    cell_edges, pos = [], 0
    for b, w, m in zip(mesh.blocks, widths, lengths):
        ce = inverse[pos:pos + w * m].reshape(m, w)
        cell_edges.append(ce)
        if b.info.quadratic:
            umid[ce] = b.cells[:, b.info.edges[:, 2]]
        pos += w * m
    length = edge_lengths(mesh.points, nodes[:, 0], nodes[:, 1], umid)
    incidence = _row_owner(order, widths, lengths, mesh.block_offsets[:-1])
    return Edges(nodes, umid, length, tuple(cell_edges),
                 incidence.astype(index_type(mesh.n_cells)),
                 starts.astype(index_type(len(order))))


def _count_incidence(cell_edges: tuple, n_e: int) -> tuple[np.ndarray, np.ndarray]:
    """(incidence, starts) of :class:`Edges` from the blocks' cell edges: a stable
    counting sort of the (block, cell, local edge) rows by edge id, the rows' global cell
    ids in that order."""
    n_cells = sum(len(ce) for ce in cell_edges)
    n_rows = sum(ce.size for ce in cell_edges)
    inc = np.empty(n_rows, index_type(n_cells))
    starts_t = index_type(n_rows)
    if kernels.use_compiled(n_cells) and n_rows:
        from .kernels import topology as kt
        ptr = np.zeros(n_e + 1, np.int64)
        for ce in cell_edges:
            kt.incidence_count(ce, ptr)
        np.cumsum(ptr, out=ptr)
        starts = ptr[:-1].astype(starts_t)
        g0 = 0
        for ce in cell_edges:
            kt.incidence_fill(ce, g0, ptr, inc)
            g0 += len(ce)
        return inc, starts
    flat = np.concatenate([ce.ravel() for ce in cell_edges]) if cell_edges else \
        np.zeros(0, np.int64)
    owner = np.concatenate([np.repeat(np.arange(len(ce), dtype=np.int64), ce.shape[1]) + off
                            for ce, off in zip(cell_edges, np.cumsum(
                                [0] + [len(ce) for ce in cell_edges[:-1]]))]) \
        if cell_edges else np.zeros(0, np.int64)
    inc[...] = owner[np.argsort(flat, kind="stable")]
    counts = np.bincount(flat, minlength=n_e)
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]]).astype(starts_t) if n_e else \
        np.zeros(0, starts_t)
    return inc, starts


def _no_edges(mesh: Mesh) -> Edges:
    """The edges of a mesh without cells (index arrays of :func:`index_type`)."""
    t = index_type(mesh.n_points)
    return Edges(np.zeros((0, 2), t), np.zeros(0, t), np.zeros(0), (), np.zeros(0, t),
                 np.zeros(0, t))


@dataclass(frozen=True)
class Faces:
    """Unique faces (triangles and quadrilaterals) of a volume mesh.

    local : (n_f,) uint8 index of the face among the faces of its first cell,
        ``cells[:, 0]`` (``mesh.blocks[..].info.faces``): the corners are that cell's,
        in its outward orientation, made when asked (:meth:`nodes_of`, :attr:`nodes`)
        instead of kept (16 bytes per face, 147 MiB for 4.8M tetrahedra).
    cells : (n_f, 2) global ids of the cells on each side (-1 for none), of
        :func:`index_type` (int32 unless an index exceeds it).
    count : (n_f,) uint8 number of cells sharing the face (1 boundary, 2 interior,
        more = non-manifold; 255 stands for 255 or more); cast before arithmetic.
    mesh : the mesh the faces belong to (not compared, not shown).
    """

    local: np.ndarray
    cells: np.ndarray
    count: np.ndarray
    mesh: Mesh = field(repr=False, compare=False)

    @property
    def boundary(self) -> np.ndarray:
        return self.count == 1

    def __len__(self) -> int:
        return self.local.shape[0]

    def nodes_of(self, ids) -> np.ndarray:
        """(k, 4) corners of the faces ``ids`` (indices or a boolean mask) in the outward
        orientation of their first cell, -1 in the last column for triangles; of
        :func:`index_type` of the mesh's points."""
        m = self.mesh
        c0 = self.cells[ids, 0]
        loc = self.local[ids]
        out = np.full((len(c0), 4), -1, index_type(m.n_points))
        for part, (bi, off) in _block_parts(m, c0):
            b = m.blocks[bi]
            table = _padded_faces(b.type)
            pos = np.arange(len(c0)) if part is None else part
            for s in range(0, len(pos), _NODES_CHUNK):  # bounded scratch memory
                p = pos[s:s + _NODES_CHUNK]
                t = table[loc[p]]
                got = b.cells[(c0[p] - off)[:, None], np.maximum(t, 0)]
                got[t < 0] = -1
                out[p] = got
        return out

    @property
    def nodes(self) -> np.ndarray:
        """(n_f, 4) :meth:`nodes_of` every face (made on each access: prefer
        :meth:`nodes_of` for a subset, :attr:`is_tri` for the kind)."""
        return self.nodes_of(slice(None))

    @property
    def is_tri(self) -> np.ndarray:
        """(n_f,) bool: the face is a triangle."""
        out = np.empty(len(self), bool)
        c0 = self.cells[:, 0]
        for part, (bi, _) in _block_parts(self.mesh, c0):
            tri = _padded_faces(self.mesh.blocks[bi].type)[:, 3] < 0
            if part is None:
                out[...] = tri[self.local]
            else:
                out[part] = tri[self.local[part]]
        return out


#: faces whose corners :meth:`Faces.nodes_of` gathers at a time
_NODES_CHUNK = 1 << 20


def _block_parts(mesh: Mesh, cell_ids: np.ndarray):
    """[(positions or None for all, (block index, first cell id of the block))] of the
    3D blocks holding ``cell_ids`` (global ids)."""
    vol = [bi for bi, b in enumerate(mesh.blocks) if b.info.dim == 3]
    offs = mesh.block_offsets
    if len(vol) == 1:
        return [(None, (vol[0], int(offs[vol[0]])))]
    blk = np.searchsorted(offs, cell_ids, side="right") - 1
    return [(np.flatnonzero(blk == bi), (bi, int(offs[bi]))) for bi in vol]


@lru_cache(maxsize=None)
def _padded_faces(cell_type: str) -> np.ndarray:
    """(n_faces, 4) local corners of the faces of a 3D cell type, -1 padding triangles."""
    from .cells import CELL_TYPES

    faces = CELL_TYPES[cell_type].faces
    out = np.array([list(f) + [-1] * (4 - len(f)) for f in faces], np.int64).reshape(-1, 4)
    out.setflags(write=False)
    return out


def _face_tables(mesh: Mesh, size: int):
    """Per block: (block index, (f, size) local corner indices of its faces of ``size``
    corners); blocks without such faces are skipped."""
    out = []
    for bi, b in enumerate(mesh.blocks):
        faces = b.info.faces if b.info.dim == 3 else ()
        sel = [f for f in faces if len(f) == size]
        if sel:
            out.append((bi, np.array(sel, dtype=np.int64)))
    return out


def _tri_keys(mesh: Mesh, tables, edges: Edges | None):
    """Keys identifying triangular faces by their node set, and the largest key.

    With the mesh's edges at hand a triangle is keyed by (id of the edge joining its
    two smallest nodes, largest node): fewer bits than three node numbers, so the
    packed sort needs fewer buckets (none up to about a million tetrahedra);
    otherwise by its three sorted nodes.
    """
    n = int(mesh.n_points + 1)
    by_edge = (edges is not None and len(edges) > 0 and
               int(len(edges)).bit_length() + n.bit_length() <= 62)
    if not by_edge and 3 * n.bit_length() > 63:
        return None, None
    keys = []
    for bi, t in tables:
        b = mesh.blocks[bi]
        g = b.cells[:, t]  # (m, f, 3)
        if by_edge:
            # the edge joining the two smallest nodes is the one opposite the largest
            x, y, z = g[..., 0], g[..., 1], g[..., 2]
            imax = np.where(x >= y, np.where(x >= z, 0, 2), np.where(y >= z, 1, 2))
            table = np.full((b.info.n_corners, b.info.n_corners), -1, np.int64)
            ed = b.info.edges
            table[ed[:, 0], ed[:, 1]] = np.arange(len(ed))
            table[ed[:, 1], ed[:, 0]] = np.arange(len(ed))
            opposite = np.stack([table[t[:, 1], t[:, 2]], table[t[:, 2], t[:, 0]],
                                 table[t[:, 0], t[:, 1]]], axis=1)  # (f, 3)
            le = opposite[np.arange(len(t)), imax]
            k = np.take_along_axis(edges.cell_edges[bi], le, axis=1).astype(np.int64)
            k *= n
            k += np.maximum(np.maximum(x, y), z)
        else:
            g.sort(axis=2)
            k = g[..., 0] * np.int64(n)  # int64 keys (cells may be int32)
            k += g[..., 1]
            k *= n
            k += g[..., 2]
        keys.append(k.ravel())
    key = keys[0] if len(keys) == 1 else np.concatenate(keys)
    return key, (len(edges) * n if by_edge else n ** 3)


def _group_faces(mesh: Mesh, size: int, edges: Edges | None):
    """Unique faces of ``size`` corners: (local (k,) uint8 index among the first cell's
    faces of that size, cells (k, 2), count (k,))."""
    tables = _face_tables(mesh, size)
    if not tables:
        return None
    widths = [len(t) for _, t in tables]
    lengths = [len(mesh.blocks[bi]) for bi, _ in tables]
    offsets = np.array([mesh.block_offsets[bi] for bi, _ in tables], np.int64)
    key = None
    if size == 3:
        key, key_max = _tri_keys(mesh, tables, edges)
    if key is not None:
        order, starts, inverse, _ = _sorted_groups(key, key_max)
        del key, inverse
    else:
        n = np.int64(mesh.n_points + 1)
        s = np.concatenate([np.sort(mesh.blocks[bi].cells[:, t], axis=2).reshape(-1, size)
                            for bi, t in tables])
        if size == 3:
            order, starts, _ = _group_sorted((s[:, 2], s[:, 1] * n + s[:, 0]))
        else:
            order, starts, _ = _group_sorted(((s[:, 0] + 1) * n + s[:, 3], s[:, 1] * n + s[:, 2]))
        del s
    count = np.diff(np.append(starts, len(order)))
    first = order[starts]
    cells = np.full((len(starts), 2), -1, np.int64)
    cells[:, 0] = _row_owner(first, widths, lengths, offsets)
    two = count >= 2
    cells[two, 1] = _row_owner(order[starts[two] + 1], widths, lengths, offsets)
    return (_row_local(first, widths, lengths), cells.astype(index_type(mesh.n_cells)),
            np.minimum(count, 255).astype(np.uint8))


def _row_local(first: np.ndarray, widths, lengths) -> np.ndarray:
    """(k,) uint8 local face (index in its block's table of faces of one size) of each
    row ``first`` of the face rows (block after block, ``widths[i]`` rows per cell)."""
    if len(widths) == 1:
        return (first % widths[0]).astype(np.uint8)
    bounds = np.cumsum([0] + [w * m for w, m in zip(widths, lengths)])
    blk = np.searchsorted(bounds, first, side="right") - 1
    out = np.empty(len(first), np.uint8)
    for i, w in enumerate(widths):
        sel = blk == i
        out[sel] = (first[sel] - bounds[i]) % w
    return out


def build_faces(mesh: Mesh, edges: Edges | None = None) -> Faces:
    """Unique faces of a volume mesh with the cells on each side (triangles first,
    then quadrilaterals; a triangle never equals a quadrilateral).

    edges : the mesh's :func:`build_edges`, if already built; it lets triangles be
    keyed by (edge, node) in few enough bits for the packed sort.
    """
    if kernels.use_compiled(mesh.n_cells):
        _used_compiled(mesh)
        return _build_faces_compiled(mesh, edges)
    parts = [(k, p) for k, p in ((3, _group_faces(mesh, 3, edges)),
                                 (4, _group_faces(mesh, 4, edges))) if p is not None]
    return _faces_of(mesh, parts)


def no_faces(mesh: Mesh) -> Faces:
    """The faces of a mesh without volume cells."""
    return Faces(np.zeros(0, np.uint8), np.zeros((0, 2), index_type(mesh.n_cells)),
                 np.zeros(0, np.int32), mesh)


def _faces_of(mesh: Mesh, parts) -> Faces:
    """Faces from the (local, cells, count) groups of triangles and quadrilaterals
    (``parts``: [(size, group)]; local = index among the cell's faces of that size)."""
    if not parts:
        return no_faces(mesh)
    groups = [(_face_numbers(mesh, size, g[0], g[1][:, 0]),) + tuple(g[1:]) for size, g in parts]
    if len(groups) == 1:
        return Faces(*groups[0], mesh)
    return Faces(*(np.concatenate([g[k] for g in groups]) for k in range(3)), mesh)


def _face_numbers(mesh: Mesh, size: int, local: np.ndarray, c0: np.ndarray) -> np.ndarray:
    """(k,) uint8 index in ``info.faces`` of the cells ``c0`` of their faces numbered
    ``local`` among the faces of ``size`` corners."""
    out = None
    for part, (bi, _) in _block_parts(mesh, c0):
        faces = mesh.blocks[bi].info.faces
        numbers = np.array([k for k, f in enumerate(faces) if len(f) == size] or [0], np.uint8)
        if part is None:
            if np.array_equal(numbers, np.arange(len(numbers))):
                return local  # the faces of this size come first: the same numbers
            return numbers[local]
        if out is None:
            out = local.copy()
        out[part] = numbers[local[part]]
    return local if out is None else out


def _block_volumes(P: np.ndarray, info, corners: np.ndarray) -> np.ndarray:
    """Signed volumes (areas) of cells of one kind from their (m, n_corners) corners."""
    if info.dim == 2:
        x = P[corners][:, :, :2]
        xs = np.roll(x, -1, axis=1)
        return 0.5 * np.sum(x[..., 0] * xs[..., 1] - xs[..., 0] * x[..., 1], axis=1)
    if info.linear == "tetra":
        x = P[corners]
        d = x[:, 1:] - x[:, :1]
        return np.einsum("ij,ij->i", d[:, 0], np.cross(d[:, 1], d[:, 2])) / 6.0
    vol = np.zeros(len(corners))
    x = P[corners]  # gathered once, (m, n_corners, 3)
    for f in info.faces:
        pts = x[:, list(f)]
        if len(f) == 3:
            vol += np.einsum("ij,ij->i", pts[:, 0], np.cross(pts[:, 1], pts[:, 2]))
        else:
            # the four triangles about the mean point c: sum_i c . (p_i x p_i+1), and
            # sum_i p_i x p_i+1 = (p2 - p0) x (p3 - p1) for any quadrilateral
            c = pts.mean(axis=1)
            vol += np.einsum("ij,ij->i", c, np.cross(pts[:, 2] - pts[:, 0], pts[:, 3] - pts[:, 1]))
    return vol / 6.0


def cell_volumes(mesh: Mesh, chunk_size: int = 200_000) -> np.ndarray:
    """(n_cells,) signed volume (3D, m^3) or area (2D, m^2) from the corner nodes.

    3D: divergence theorem over the outward faces, quadrilaterals split into
    four triangles about their mean point (exact for planar faces).  Cells are
    taken ``chunk_size`` at a time, so the gathered coordinates stay small.
    """
    if kernels.use_compiled(mesh.n_cells):
        _used_compiled(mesh)
        return _cell_volumes_compiled(mesh)
    out = np.empty(mesh.n_cells)
    for b, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
        corners = b.cells[:, :b.info.n_corners]
        for s in range(0, len(b), chunk_size):
            e = min(s + chunk_size, len(b))
            out[off + s:off + e] = _block_volumes(mesh.points, b.info, corners[s:e])
    return out


@dataclass(frozen=True)
class Topology:
    """Everything meshcheck derives from connectivity.

    edges, faces : see :class:`Edges`, :class:`Faces` (faces empty for 2D models).
    component : (n_cells,) int32 (int64 from 2**31 cells) connected component of each
        cell (through shared faces in 3D, shared edges in 2D); for one component a
        read-only broadcast of 0 (no (n_cells,) array held).
    component_volume : (n_comp,) float64 m^3 (m^2 in 2D).
    component_extent : (n_comp,) float64 bounding-box diagonal, metres.
    cell_volume : (n_cells,) float64 signed volume from the corners.
    unused_nodes : node ids referenced by no cell.
    duplicate_nodes : (k, 2) int64 pairs of used nodes closer than ``rel_tol`` times
        the shorter of their shortest incident edges.
    duplicate_cells : (k, 2) int64 pairs of cells with the same corner set.
    crack_faces : ids of boundary faces that coincide with another boundary face
        once duplicate nodes are merged (unmerged interfaces).
    nonmanifold_faces : ids of faces shared by more than two cells.
    """

    edges: Edges
    faces: Faces
    component: np.ndarray
    component_volume: np.ndarray
    component_extent: np.ndarray
    cell_volume: np.ndarray
    unused_nodes: np.ndarray
    duplicate_nodes: np.ndarray
    duplicate_cells: np.ndarray
    crack_faces: np.ndarray
    nonmanifold_faces: np.ndarray

    @property
    def n_components(self) -> int:
        return len(self.component_volume)

    def cell_extent(self) -> np.ndarray:
        """(n_cells,) extent (bbox diagonal, m) of the component of each cell (one
        component: a read-only broadcast of its extent, no (n_cells,) array)."""
        if len(self.component_extent) == 1:
            return np.broadcast_to(self.component_extent[:1], self.component.shape)
        return self.component_extent[self.component]


def _components(mesh: Mesh, faces: Faces, edges: Edges) -> tuple[int, np.ndarray]:
    n = mesh.n_cells
    if mesh.dim == 3:
        inner = faces.count >= 2
        a, b = faces.cells[inner, 0], faces.cells[inner, 1]
    else:
        # 2D: cells sharing an edge; pair each cell edge with the first cell having it
        ids = np.concatenate([np.repeat(np.arange(len(bl)) + mesh.block_offsets[i],
                                        ce.shape[1]) for i, (bl, ce) in
                              enumerate(zip(mesh.blocks, edges.cell_edges))])
        eid = np.concatenate([ce.ravel() for ce in edges.cell_edges])
        first = np.full(len(edges), -1, np.int64)
        first[eid[::-1]] = ids[::-1]
        a, b = ids, first[eid]
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components
    g = sparse.coo_matrix((np.ones(len(a), np.int8), (a, b)), shape=(n, n)).tocsr()
    return connected_components(g, directed=False)


def _join_crowded_faces(mesh: Mesh, faces: Faces, n_comp: int, comp: np.ndarray
                        ) -> tuple[int, np.ndarray]:
    """(n_comp, comp) with the cells of every face shared by more than two cells joined.

    The face arrays keep two of such a face's cells (the lowest ids), so the components
    of the pairs alone depend on the numbering (an interior cell listed twice, numbered
    before its neighbours, made a component of its own). Every cell having one of those
    faces is found (its corners include three of the faces' nodes, then its faces'
    sorted corners match) and joined to the face's first cell; the labels are numbered
    again in the order of each component's lowest cell, as connected_components numbers
    them. Only meshes with such faces (broken meshes) pay for it (scipy.sparse too,
    which takes 0.1-0.2 s to import)."""
    fids = np.flatnonzero(faces.count > 2)
    if mesh.dim != 3 or not len(fids):
        return n_comp, comp
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components

    n = np.int64(mesh.n_points)
    fn = faces.nodes_of(fids).astype(np.int64)
    hit = np.zeros(mesh.n_points, bool)
    hit[fn[fn >= 0]] = True
    keys, owners = [np.sort(np.where(fn < 0, n, fn), axis=1)], [np.full(len(fids), -1)]
    for b, off in zip(mesh.blocks, mesh.block_offsets):
        if b.info.dim != 3:
            continue
        table = _padded_faces(b.type)
        k = b.info.n_corners
        for s in range(0, len(b), _NODES_CHUNK):
            corners = b.cells[s:s + _NODES_CHUNK, :k]
            cand = np.flatnonzero(np.count_nonzero(hit[corners], axis=1) >= 3)
            if not len(cand):
                continue
            got = corners[cand][:, np.maximum(table, 0)].astype(np.int64)  # (m, f, 4)
            got[:, table < 0] = n
            keys.append(np.sort(got.reshape(-1, 4), axis=1))
            owners.append(np.repeat(cand + int(off) + s, len(table)))
    # equal sorted corner rows grouped by a sort of two packed keys (np.unique(axis=0)
    # is far slower on many rows, e.g. a whole mesh listed twice)
    rows = np.concatenate(keys)
    w = n + 1
    hi, lo = rows[:, 0] * w + rows[:, 1], rows[:, 2] * w + rows[:, 3]
    order = np.lexsort((lo, hi))
    hi, lo = hi[order], lo[order]
    inv = np.empty(len(rows), np.int64)
    inv[order] = np.cumsum(np.r_[True, (hi[1:] != hi[:-1]) | (lo[1:] != lo[:-1])]) - 1
    which = np.full(inv.max() + 1, -1, np.int64)
    which[inv[:len(fids)]] = np.arange(len(fids))
    owner = np.concatenate(owners)[len(fids):]
    match = which[inv[len(fids):]]
    cells, first = owner[match >= 0], faces.cells[fids[match[match >= 0]], 0]
    a, b_ = comp[cells].astype(np.int64), comp[first].astype(np.int64)
    g = sparse.coo_matrix((np.ones(len(a), np.int8), (a, b_)), shape=(n_comp, n_comp))
    n_new, merged = connected_components(g.tocsr(), directed=False)
    if n_new == n_comp:
        return n_comp, comp
    lab = merged[comp]
    lowest = np.full(n_new, len(lab))
    np.minimum.at(lowest, lab, np.arange(len(lab)))
    rank = np.empty(n_new, np.int64)
    rank[np.argsort(lowest, kind="stable")] = np.arange(n_new)
    return int(n_new), rank[lab].astype(comp.dtype)


def _per_label_bbox(points: np.ndarray, mesh: Mesh, label: np.ndarray, n_label: int,
                    used: np.ndarray):
    """(lo, hi) (n_label, 3) bounding boxes of the cells of each label (``used``: the
    points the cells reference)."""
    if n_label == 1:
        bb = mesh.bounding_box_from(used)
        return bb[:1].copy(), bb[1:].copy()
    lo = np.full((n_label, 3), np.inf)
    hi = np.full((n_label, 3), -np.inf)
    for i, b in enumerate(mesh.blocks):
        x = points[b.cells[:, :b.info.n_corners]]
        lab = label[mesh.block_offsets[i]:mesh.block_offsets[i + 1]]
        order = np.argsort(lab, kind="stable")
        ls = lab[order]
        starts = np.flatnonzero(np.r_[True, ls[1:] != ls[:-1]]) if len(ls) else np.zeros(0, int)
        if len(starts):
            lo[ls[starts]] = np.minimum(lo[ls[starts]],
                                        np.minimum.reduceat(np.nanmin(x, axis=1)[order], starts))
            hi[ls[starts]] = np.maximum(hi[ls[starts]],
                                        np.maximum.reduceat(np.nanmax(x, axis=1)[order], starts))
    return lo, hi


def _duplicate_nodes(points, used, edges: Edges, rel_tol: float) -> np.ndarray:
    """Pairs of used nodes closer than rel_tol x their shortest incident edge."""
    if len(edges) == 0:
        return np.zeros((0, 2), np.int64)
    hmin = np.full(len(points), np.inf)
    finite_len = np.where(np.isfinite(edges.length), edges.length, np.inf)
    np.minimum.at(hmin, edges.nodes[:, 0], finite_len)
    np.minimum.at(hmin, edges.nodes[:, 1], finite_len)
    ids = np.flatnonzero(used & np.isfinite(points).all(axis=1))
    if len(ids) < 2:
        return np.zeros((0, 2), np.int64)
    h = hmin[ids]
    h_fin = h[np.isfinite(h)]
    if not len(h_fin):
        return np.zeros((0, 2), np.int64)
    radius = rel_tol * float(h_fin.max())
    from scipy.spatial import cKDTree  # imported here: scipy.spatial takes 0.2 s to load

    tree = cKDTree(points[ids])
    pairs = tree.query_pairs(radius, output_type="ndarray")
    if not len(pairs):
        return np.zeros((0, 2), np.int64)
    d = np.linalg.norm(points[ids[pairs[:, 0]]] - points[ids[pairs[:, 1]]], axis=1)
    keep = d <= rel_tol * np.minimum(h[pairs[:, 0]], h[pairs[:, 1]])
    return _sorted_pairs(np.sort(ids[pairs[keep]], axis=1))


def _sorted_pairs(out: np.ndarray) -> np.ndarray:
    """(k, 2) int64 pairs (smaller first) in lexicographic order."""
    return out[np.lexsort((out[:, 1], out[:, 0]))]


_HASH_MULT = np.array([0x9E3779B97F4A7C15, 0xC2B2AE3D27D4EB4F, 0x165667B19E3779F9,
                       0xD6E8FEB86659FD93, 0xFF51AFD7ED558CCD, 0xC4CEB9FE1A85EC53,
                       0x94D049BB133111EB, 0xBF58476D1CE4E5B9], dtype=np.uint64)


def _duplicate_cells(mesh: Mesh) -> np.ndarray:
    """(k, 2) pairs (first cell, repeat) of cells of one block with the same corners.

    Candidates come from a 64-bit multiplicative hash of the sorted corners
    (one fast ``np.sort``); only cells whose hash repeats are compared exactly.
    """
    out = []
    for i, b in enumerate(mesh.blocks):
        s = np.sort(b.cells[:, :b.info.n_corners], axis=1)
        if len(s) < 2:
            continue
        with np.errstate(over="ignore"):
            h = (s.astype(np.uint64) * _HASH_MULT[:s.shape[1]]).sum(axis=1, dtype=np.uint64)
            h ^= h >> np.uint64(29)
        hs = np.sort(h)
        rep = hs[1:][hs[1:] == hs[:-1]]
        if not len(rep):
            continue
        cand = np.flatnonzero(np.isin(h, rep))
        out.append(_equal_rows(s[cand], cand) + mesh.block_offsets[i])
    return np.concatenate(out).astype(np.int64) if out else np.zeros((0, 2), np.int64)


def _equal_rows(sc: np.ndarray, cand: np.ndarray) -> np.ndarray:
    """(k, 2) pairs (first, repeat) of the candidate cells ``cand`` (c,) with equal
    sorted corners ``sc`` (c, n_corners), groups in lexicographic order of the corners."""
    order, starts, inverse = _group_sorted(tuple(sc[:, k] for k in range(sc.shape[1] - 1, -1, -1)))
    group_sorted = inverse[order]
    repeat = np.ones(len(order), bool)
    repeat[starts] = False
    first = cand[order[starts[group_sorted[repeat]]]]
    return np.column_stack([first, cand[order[repeat]]])


def _cracks(mesh: Mesh, faces: Faces, dup_pairs: np.ndarray) -> np.ndarray:
    """Boundary faces that coincide with other boundary faces once duplicates merge."""
    if not len(dup_pairs) or not len(faces):
        return np.zeros(0, np.int64)
    n = mesh.n_points
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components
    g = sparse.coo_matrix((np.ones(len(dup_pairs)), (dup_pairs[:, 0], dup_pairs[:, 1])),
                          shape=(n, n))
    _, rep = connected_components(g, directed=False)
    bnd = np.flatnonzero(faces.boundary)
    fn = faces.nodes_of(bnd)
    r = np.where(fn >= 0, rep[np.maximum(fn, 0)], -1)
    s = np.sort(r, axis=1)
    nn = np.int64(n + 1)
    order, starts, inverse = _group_sorted(((s[:, 0] + 1) * nn + s[:, 3], s[:, 1] * nn + s[:, 2]))
    count = np.diff(np.append(starts, len(order)))
    return np.sort(bnd[count[inverse] > 1])


def build_topology(mesh: Mesh, rel_tol: float = 1e-6,
                   faces_found: Callable[[Edges, Faces], None] | None = None) -> Topology:
    """Derive edges, faces, components and connectivity defects of a mesh.

    rel_tol : two used nodes closer than rel_tol times the shorter of their
        shortest incident edges are duplicates (default 1e-6).
    faces_found : called with the edges and the faces as soon as both are final, before
        the components and the rest (e.g. the audit starts the checks that need only
        them).
    """
    if kernels.use_compiled(mesh.n_cells):
        return _build_topology_compiled(mesh, rel_tol, faces_found)
    edges = build_edges(mesh)
    used = np.zeros(mesh.n_points, bool)
    for b in mesh.blocks:
        used[b.cells] = True
    empty = no_faces(mesh)
    # (run one after the other: on threads they added 160 MiB of peak memory on 1M
    # tetrahedra for no measurable gain, the sorts being bound by memory bandwidth)
    faces = build_faces(mesh, edges) if mesh.dim == 3 else empty
    if faces_found is not None:
        faces_found(edges, faces)
    vol = cell_volumes(mesh)
    dup = _duplicate_nodes(mesh.points, used, edges, rel_tol)
    dup_cells = _duplicate_cells(mesh)
    n_comp, comp = _join_crowded_faces(mesh, faces, *_components(mesh, faces, edges))
    comp = comp.astype(index_type(mesh.n_cells))  # as the compiled path's labels
    lo, hi = _per_label_bbox(mesh.points, mesh, comp, n_comp, used)
    return _topology_of(mesh, edges, faces, used, vol, dup, dup_cells, n_comp, comp, lo, hi)


def _topology_of(mesh: Mesh, edges: Edges, faces: Faces, used, vol, dup, dup_cells,
                 n_comp: int, comp, lo, hi) -> Topology:
    """The :class:`Topology` from the parts both paths compute (component bounding boxes
    lo, hi (n_comp, 3))."""
    if kernels.use_compiled(len(comp)):
        from .kernels import topology as kt

        comp_vol = np.zeros(n_comp)
        kt.label_abs_sums(comp, np.ascontiguousarray(vol, dtype=float), comp_vol)
    else:
        comp_vol = np.bincount(comp, weights=np.abs(vol), minlength=n_comp)
    extent = np.linalg.norm(hi - lo, axis=1)
    if n_comp == 1:  # one part: every label 0, held as a broadcast (18 MiB at 4.8M cells)
        comp = np.broadcast_to(np.zeros(1, comp.dtype), comp.shape)
    cracks = _cracks(mesh, faces, dup) if mesh.dim == 3 else np.zeros(0, np.int64)
    return Topology(
        edges=edges, faces=faces, component=comp, component_volume=comp_vol,
        component_extent=extent, cell_volume=vol, unused_nodes=np.flatnonzero(~used),
        duplicate_nodes=dup, duplicate_cells=dup_cells, crack_faces=cracks,
        nonmanifold_faces=np.flatnonzero(faces.count > 2))


# ---------------------------------------------------------------------------
# the compiled path (meshcheck.kernels.topology): same arrays as the numpy code above

#: bits of the packed (node, cell, local entity) integers of the compiled bucket sorts
#: (tests lower it to take the unpacked branch)
_PACK_BITS = 63

#: largest number of coarse buckets (2**bits) of the two-level bucket fills: their write
#: streams stay in cache; tests lower it to take the two-level branch on small meshes
_FANOUT_BITS = 10
#: fewest fine buckets per coarse bucket worth a two-level fill (below: one level)
_MIN_COARSE_BITS = 4
#: the edges of a renumbered mesh (cells sorted by their lowest node) filled into their
#: buckets in one level. Measured (twenty-third session, built kernels): the first
#: edge build of a fresh process, 4.77M tets, one level 0.47 s wall / 0.63-0.67 s CPU
#: against two levels on two threads 0.40-0.43 s / 0.73-0.76 s; in the audit, where the
#: quality metrics run beside the edges, 6 alternating runs: wall median 2.93 -> 2.82 s,
#: analysis 1.93 -> 1.86 s; 966k tets 1.03 -> 0.97 s, 0.466 -> 0.44 s. The faces'
#: triangles (bucketed by edge) gained nothing from one level (median 2.74 -> 2.77 s)
ONE_LEVEL_WHEN_RENUMBERED = True


#: local edges (triangles) from which the compiled bucket fills and read-offs split their
#: passes over two threads (disjoint ranges of cells, buckets and rows; the same arrays);
#: tests lower it
_SPLIT_ROWS = 4_000_000


def _n_parts(n_rows: int) -> int:
    """Threads for the bucket passes over ``n_rows`` rows (1 or 2)."""
    return 2 if n_rows >= _SPLIT_ROWS else 1


def _cell_parts(lengths: list[int], widths: list[int], parts: int) -> list[list[tuple]]:
    """The rows of consecutive blocks (``lengths`` cells of ``widths`` rows each) in
    ``parts`` consecutive pieces of about equal rows, each a list of (block position,
    first cell, end cell) ranges, in row order."""
    bounds = np.cumsum([0] + [w * m for w, m in zip(widths, lengths)])
    cuts = [int(bounds[-1]) * i // parts for i in range(parts + 1)]
    out = []
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        piece = []
        for i, (w, m) in enumerate(zip(widths, lengths)):
            if not w or not m:
                continue
            r0 = min(max(-(-(lo - int(bounds[i])) // w), 0), m)  # first cell from row lo
            r1 = min(max(-(-(hi - int(bounds[i])) // w), 0), m)
            if r1 > r0:
                piece.append((i, r0, r1))
        out.append(piece)
    return out


def _fill_starts(counts: list[np.ndarray]) -> tuple[np.ndarray, list[np.ndarray]]:
    """Bucket starts (n_b + 1,) from per-part counts (each (n_b + 1,), count of bucket b
    at b + 1) and every part's first free entry per bucket (parts in order: stable)."""
    total = counts[0].copy()
    for c in counts[1:]:
        total += c
    ptr = np.cumsum(total, out=total)
    run = ptr[:-1].copy()
    fills = []
    for c in counts:
        fills.append(run.copy())
        run += c[1:]
    return ptr, fills


def _halves(starts: np.ndarray, parts: int) -> list[tuple[int, int]]:
    """``parts`` consecutive bucket ranges (b0, b1) of about equal entries, buckets
    b starting at starts[b] (starts (n_b + 1,) ascending)."""
    n_b = len(starts) - 1
    cuts = [0] + [int(np.searchsorted(starts, starts[-1] * i // parts))
                  for i in range(1, parts)] + [n_b]
    cuts = np.maximum.accumulate(np.minimum(cuts, n_b))
    return [(int(a), int(b)) for a, b in zip(cuts[:-1], cuts[1:])]


def _refine(cptr, a, k, ptr, parts: int) -> None:
    """:func:`meshcheck.kernels.topology.coarse_refine` (in place), on ``parts`` threads."""
    from .kernels import topology as kt

    if parts == 1:
        kt.coarse_refine(cptr, a, k, ptr)
        return
    thread_map(lambda r: kt.coarse_refine_range(cptr, a, k, ptr, r[0], r[1]),
               _halves(cptr, parts))
    ptr[-1] = cptr[-1]


def _narrow(a: np.ndarray, dtype, parts: int) -> np.ndarray:
    """``a.astype(dtype, copy=False)``, the copy cast in ``parts`` pieces on threads."""
    if a.dtype == dtype:
        return a
    if parts == 1:
        return a.astype(dtype)
    out = np.empty(a.shape, dtype)
    cuts = [len(a) * i // parts for i in range(parts + 1)]
    thread_map(lambda r: np.copyto(out[r[0]:r[1]], a[r[0]:r[1]], casting="unsafe"),
               list(zip(cuts[:-1], cuts[1:])))
    return out


def _emit_edges(ptr, packed, shift, n, n_rows, layout, parts, node_t):
    """Count the distinct edges of the packed buckets and read them off
    (:func:`meshcheck.kernels.topology.edge_emit_rows_range`), the buckets in ``parts``
    ranges on threads: (nodes (n_e, 2), the edge id of every row (n_rows,) of
    :func:`index_type`)."""
    from .kernels import topology as kt

    ranges = _halves(ptr, parts)
    counts = thread_map(lambda r: kt.count_distinct_range(ptr, packed, shift, n, *r), ranges,
                        parallel=parts > 1)
    n_e = int(sum(counts))
    e0 = np.cumsum([0] + counts[:-1])
    nodes = np.empty((n_e, 2), node_t)
    inverse = np.empty(n_rows, index_type(n_e))
    thread_map(lambda i: kt.edge_emit_rows_range(ptr, packed, shift, n, nodes, inverse,
                                                 *layout, *ranges[i], int(e0[i])),
               range(parts), parallel=parts > 1)
    return nodes, inverse


def _no_mids(mesh: Mesh, n_e: int, node_t) -> np.ndarray:
    """(n_e,) mid-node of every edge set to -1 (straight), to be filled for quadratic
    blocks; without any, a read-only broadcast of -1 (no (n_e,) array held)."""
    if any(b.info.quadratic for b in mesh.blocks):
        return np.full(n_e, -1, node_t)
    return np.broadcast_to(np.array(-1, node_t), (n_e,))


def _coarse_bits(n_buckets: int) -> int:
    """log2 of the fine buckets per coarse bucket for ``n_buckets`` buckets (0 = one
    level: few enough buckets to scatter into directly)."""
    k = max(int(n_buckets).bit_length() - _FANOUT_BITS, 0)
    return k if k >= _MIN_COARSE_BITS else 0


#: a generic unit direction (no mesh plane is normal to it) for the slabs of close_pairs
_SLAB_DIRECTION = np.array([0.7548776662466927, 0.5698402909980532, 0.3247179572447460])
_SLAB_DIRECTION /= np.linalg.norm(_SLAB_DIRECTION) * (1 + 4 * np.finfo(float).eps)


def _used_compiled(mesh: Mesh) -> np.ndarray:
    """(n_points,) bool nodes referenced by a cell; IndexError for a node index out of
    range (the kernels do not check bounds, so every compiled entry point calls this)."""
    from .kernels import topology as kt

    used = np.zeros(mesh.n_points, bool)
    for b in mesh.blocks:
        if not kt.mark_used(b.cells, used):
            raise IndexError(f"{b.type} cell with a node index outside 0..{mesh.n_points - 1}")
    return used


def _row_layout(widths: list[int], lengths: list[int], offsets) -> tuple[np.ndarray, ...]:
    """(bounds, widths, offsets) int64 arrays of consecutive blocks of rows (see
    :mod:`meshcheck.kernels.topology`)."""
    bounds = np.cumsum([0] + [w * m for w, m in zip(widths, lengths)]).astype(np.int64)
    return (bounds, np.asarray(widths, np.int64).reshape(-1),
            np.asarray(offsets, np.int64).reshape(-1))


def _build_edges_compiled(mesh: Mesh, spare: list | None = None) -> Edges:
    """:func:`build_edges` by a counting sort of the local edges on their smaller node.

    Scratch memory: (larger node, cell, local edge) of every local edge packed in one
    int64 (two arrays, int64 and of the node type, when the bits do not fit) and one
    int64 per node.  Large meshes fill the buckets in two levels (coarse buckets of
    2**k nodes, then the nodes within each, in place), which keeps the scattered writes
    within cache-sized ranges, unless renumbered (:mod:`meshcheck.ordering`): with the
    cells in the order of their lowest node the one-level fill writes near its last
    writes already, and its count and fill, one pass each on one thread, cost less CPU
    than the two levels' three on two (:data:`ONE_LEVEL_WHEN_RENUMBERED`).  The edge ids
    of the rows (the cell edges) are written straight into their array of
    :func:`index_type`.

    The packed int64 scratch, dead once read off, is appended to ``spare`` (a list, when
    given) for the faces' pass to reuse (:func:`meshcheck.threads.reuse_or_empty`: its
    pages are written already, so the kernel clears no new ones)."""
    from .kernels import topology as kt

    if not mesh.blocks:
        return _no_edges(mesh)
    n = mesh.n_points
    node_t = index_type(n)
    loc = [(b.info.edges[:, 0].copy(), b.info.edges[:, 1].copy()) for b in mesh.blocks]
    widths = [len(b.info.edges) for b in mesh.blocks]
    lengths = [len(b) for b in mesh.blocks]
    layout = _row_layout(widths, lengths, mesh.block_offsets[:-1])
    n_rows = sum(w * m for w, m in zip(widths, lengths))
    parts = _n_parts(n_rows)
    shift = max(int(mesh.n_cells - 1).bit_length(), 1) + 4  # (cell, local edge < 16)
    k = 0 if ONE_LEVEL_WHEN_RENUMBERED and mesh.file_cell_ids is not None else _coarse_bits(n)
    if n < 2**31 and int(n - 1).bit_length() + shift <= _PACK_BITS:
        # larger node, cell and local edge packed in one int64
        packed = np.empty(n_rows, np.int64)
        ptr = np.empty(n + 1, np.int64)
        if k and int(n - 1).bit_length() + shift + k <= _PACK_BITS:
            # two-level fill; cells split over threads
            pieces = _cell_parts(lengths, widths, parts)
            n_coarse = ((n - 1) >> k) + 2
            blocks, g0s = mesh.blocks, mesh.block_offsets

            def count(piece):
                c = np.zeros(n_coarse, np.int64)
                for i, r0, r1 in piece:
                    kt.edge_coarse_count(blocks[i].cells[r0:r1], *loc[i], k, c)
                return c

            def fill(j):
                for i, r0, r1 in pieces[j]:
                    kt.edge_coarse_fill(blocks[i].cells[r0:r1], *loc[i], int(g0s[i]) + r0,
                                        k, cfill[j], packed, shift)

            cptr, cfill = _fill_starts(thread_map(count, pieces, parallel=parts > 1))
            thread_map(fill, range(parts), parallel=parts > 1)
            del cfill
            _refine(cptr, packed, k, ptr, parts)
        else:
            ptr[:] = 0
            for b, (la, lb) in zip(mesh.blocks, loc):
                kt.edge_count(b.cells, la, lb, ptr)
            np.cumsum(ptr, out=ptr)
            fill = ptr[:-1].copy()
            for b, (la, lb), g0 in zip(mesh.blocks, loc, mesh.block_offsets):
                kt.edge_fill_packed(b.cells, la, lb, int(g0), fill, packed, shift)
            del fill
        nodes, inverse = _emit_edges(ptr, packed, shift, n, n_rows,
                                     (layout[0], layout[1], mesh.block_offsets), parts, node_t)
        del ptr
        if spare is not None and can_release():  # else its whole length would stay held
            spare.append(packed)
        del packed
    else:
        ptr = np.zeros(n + 1, np.int64)
        for b, (la, lb) in zip(mesh.blocks, loc):
            kt.edge_count(b.cells, la, lb, ptr)
        np.cumsum(ptr, out=ptr)
        fill = ptr[:-1].copy()
        bhi = np.empty((n_rows, 1), kt.index_dtype(n))
        incidence = np.empty(n_rows, np.int64)
        row0 = 0
        for b, (la, lb), w in zip(mesh.blocks, loc, widths):
            kt.edge_fill(b.cells, la, lb, row0, fill, bhi, incidence)
            row0 += w * len(b)
        del fill
        n_e = kt.sort_buckets(ptr, bhi, incidence, n)
        nodes = np.empty((n_e, 2), node_t)
        starts = np.empty(n_e, index_type(n_rows))
        inverse = np.empty(n_rows, np.int64)
        kt.edge_emit(ptr, bhi, incidence, nodes, starts, inverse, *layout)
        del bhi, ptr, starts, incidence  # counted again from the cell edges if ever asked for
        inverse = _narrow(inverse, index_type(n_e), parts)
    n_e = len(nodes)
    umid = _no_mids(mesh, n_e, node_t)
    cell_edges, pos = [], 0
    for b, w, m in zip(mesh.blocks, widths, lengths):
        ce = inverse[pos:pos + w * m]
        cell_edges.append(ce.reshape(m, w))
        if b.info.quadratic:
            kt.edge_mid(b.cells, b.info.edges[:, 2].copy(), ce, umid)
        pos += w * m
    length = np.empty(n_e)
    kt.edge_lengths(mesh.points, nodes, umid if umid.strides != (0,) else umid[:0],
                    _GL_S, _GL_W, length)
    return Edges(nodes, umid, length, tuple(cell_edges))


def _group_faces_compiled(mesh: Mesh, size: int, edges: Edges | None = None,
                          spare: list | None = None):
    """:func:`_group_faces` by a counting sort of the local faces into buckets: triangles
    by the edge of their two smallest nodes when ``edges`` are given, else by their
    smallest node, quadrilaterals by their second smallest node (the orders of the
    numpy keys), then a sort of every small bucket on the other nodes.

    Scratch memory: for triangles with edges one int64 per local face and per edge;
    otherwise the other sorted nodes and the row of every local face (int32 below
    2**31) and one int64 per node.  ``spare``: int64 scratch arrays the triangles' pass
    may reuse (the list is emptied either way)."""
    tables = _face_tables(mesh, size)
    if not tables:
        return None
    n = mesh.n_points
    blocks = [mesh.blocks[bi] for bi, _ in tables]
    widths = [len(t) for _, t in tables]
    lengths = [len(b) for b in blocks]
    offsets = [mesh.block_offsets[bi] for bi, _ in tables]
    shift = max(int(mesh.n_cells - 1).bit_length(), 1) + 3  # (cell, local face < 8)
    if (size == 3 and edges is not None and len(edges) and
            int(n - 1).bit_length() + shift <= _PACK_BITS):
        return _tri_by_edges(mesh, tables, edges, shift, spare)
    if spare is not None:
        spare.clear()
    first, cells, count = _faces_by_node(mesh, tables, blocks, widths,
                                         _row_layout(widths, lengths, offsets))
    return _row_local(first, widths, lengths), cells, count


def _tri_by_edges(mesh: Mesh, tables, edges: Edges, shift: int, spare: list | None = None):
    """(local, cells, count) of the unique triangles, bucketed by the edge of their two
    smallest nodes and sorted on packed integers (largest node << shift | cell << 3 |
    local face), one int64 per local triangle (153 MB on 4.8M tetrahedra), taken from
    ``spare`` when it holds an int64 array long enough (the edge pass's, whose pages are
    written already, see :func:`_build_edges_compiled`).  Above
    2**(_FANOUT_BITS + _MIN_COARSE_BITS) edges the buckets are filled in two levels, the
    second in place (:func:`meshcheck.kernels.topology.coarse_refine`): a third of the
    scattered writes' time.  ``spare`` is emptied."""
    from .kernels import topology as kt

    opps = []
    for bi, t in tables:
        info = mesh.blocks[bi].info
        table = np.full((info.n_corners, info.n_corners), -1, np.int64)
        ed = info.edges
        table[ed[:, 0], ed[:, 1]] = np.arange(len(ed))
        table[ed[:, 1], ed[:, 0]] = np.arange(len(ed))
        opps.append(np.stack([table[t[:, 1], t[:, 2]], table[t[:, 2], t[:, 0]],
                              table[t[:, 0], t[:, 1]]], axis=1))
    n_rows = sum(len(t) * len(mesh.blocks[bi]) for bi, t in tables)
    parts = _n_parts(n_rows)
    n_e = len(edges)
    k = _coarse_bits(n_e)
    two_level = bool(k) and int(mesh.n_points - 1).bit_length() + shift + k <= _PACK_BITS
    # the spare taken first, so that its unused tail is given back before new arrays
    packed = reuse_or_empty(spare if spare is not None else [], n_rows, np.int64)
    if spare is not None:
        spare.clear()
    ptr = np.zeros(n_e + 1, kt.index_dtype(n_rows + 1))
    if two_level:
        # cells split over threads (consecutive ranges: the buckets stay stable)
        pieces = _cell_parts([len(mesh.blocks[bi]) for bi, _ in tables],
                             [len(t) for _, t in tables], parts)
        n_coarse = ((n_e - 1) >> k) + 2

        def args(i, r0, r1):
            bi, t = tables[i]
            return mesh.blocks[bi].cells[r0:r1], t, opps[i], edges.cell_edges[bi][r0:r1]

        def count(piece):
            c = np.zeros(n_coarse, np.int64)
            for i, r0, r1 in piece:
                kt.tri_coarse_count(*args(i, r0, r1), k, c)
            return c

        def fill(j):
            for i, r0, r1 in pieces[j]:
                kt.tri_coarse_fill(*args(i, r0, r1), int(mesh.block_offsets[tables[i][0]]) + r0,
                                   k, cfill[j], packed, shift)

        cptr, cfill = _fill_starts(thread_map(count, pieces, parallel=parts > 1))
        thread_map(fill, range(parts), parallel=parts > 1)
        del cfill
        _refine(cptr, packed, k, ptr, parts)
    else:
        for (bi, t), opp in zip(tables, opps):
            kt.tri_count_edges(mesh.blocks[bi].cells, t, opp, edges.cell_edges[bi], ptr)
        np.cumsum(ptr, out=ptr)
        fill = ptr[:-1].copy()
        for (bi, t), opp in zip(tables, opps):
            kt.tri_fill_edges(mesh.blocks[bi].cells, t, opp, edges.cell_edges[bi],
                              int(mesh.block_offsets[bi]), fill, packed, shift)
        del fill
    ranges = _halves(ptr, parts)
    n_fs = thread_map(lambda r: kt.sort_packed_range(ptr, packed, shift, *r), ranges,
                      parallel=parts > 1)
    n_f = int(sum(n_fs))
    f0 = np.cumsum([0] + n_fs[:-1])
    local = np.empty(n_f, np.uint8)
    cells = np.empty((n_f, 2), index_type(mesh.n_cells))
    count = np.empty(n_f, np.uint8)
    thread_map(lambda i: kt.tri_emit_range(ptr, packed, shift, local, cells, count,
                                           *ranges[i], int(f0[i])),
               range(parts), parallel=parts > 1)
    return local, cells, count


def _faces_by_node(mesh: Mesh, tables, blocks, widths, layout):
    """(first row, cells, count) of the unique faces, bucketed by one node (smallest of
    a triangle, second smallest of a quadrilateral) and sorted on the others."""
    from .kernels import topology as kt

    n = mesh.n_points
    size = tables[0][1].shape[1]
    ptr = np.zeros(n + 1, np.int64)
    for b, (_, t) in zip(blocks, tables):
        kt.face_count(b.cells, t, ptr)
    np.cumsum(ptr, out=ptr)
    n_rows = int(ptr[-1])
    bkey = np.empty((n_rows, size - 1), kt.index_dtype(n))
    brow = np.empty(n_rows, kt.index_dtype(n_rows))
    fill = ptr[:-1].copy()
    row0 = 0
    for b, (_, t), w in zip(blocks, tables, widths):
        kt.face_fill(b.cells, t, row0, fill, bkey, brow)
        row0 += w * len(b)
    del fill
    n_f = kt.sort_buckets(ptr, bkey, brow, n)
    first = np.empty(n_f, np.int64)
    cells = np.empty((n_f, 2), index_type(mesh.n_cells))
    count = np.empty(n_f, np.uint8)
    kt.face_emit(ptr, bkey, brow, first, cells, count, *layout)
    return first, cells, count


def _build_faces_compiled(mesh: Mesh, edges: Edges | None = None,
                          spare: list | None = None) -> Faces:
    tri = _group_faces_compiled(mesh, 3, edges, spare)
    if spare is not None:
        spare.clear()  # not held while the quadrilaterals are grouped
    parts = [(k, p) for k, p in ((3, tri), (4, _group_faces_compiled(mesh, 4)))
             if p is not None]
    return _faces_of(mesh, parts)


def _cell_volumes_compiled(mesh: Mesh) -> np.ndarray:
    """:func:`cell_volumes`, one compiled loop over the cells of each block."""
    from .kernels import topology as kt

    out = np.empty(mesh.n_cells)
    for b, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
        info, o = b.info, out[off:off + len(b)]
        if info.dim == 2:
            kt.areas_polygon(mesh.points, b.cells, info.n_corners, o)
        elif info.linear == "tetra":
            kt.volumes_tetra(mesh.points, b.cells, o)
        else:
            faces = np.array([list(f) + [-1] * (4 - len(f)) for f in info.faces], np.int64)
            kt.volumes_faces(mesh.points, b.cells, faces, o)
    return out


def _duplicate_nodes_compiled(points, used, edges: Edges, rel_tol: float) -> np.ndarray:
    """:func:`_duplicate_nodes` with the pairs found by sweeping slabs (no k-d tree).

    Same pairs, except (in principle) one at a distance within a rounding error of the
    search radius, which the k-d tree measures its own way."""
    from .kernels import topology as kt

    if len(edges) == 0:
        return np.zeros((0, 2), np.int64)
    hmin = np.full(len(points), np.inf)
    kt.min_edge_at_nodes(edges.nodes, edges.length, hmin)
    pairs = kt.close_pairs(points, used, hmin, float(rel_tol), _SLAB_DIRECTION)
    return _sorted_pairs(pairs) if len(pairs) else np.zeros((0, 2), np.int64)


def _duplicate_cells_compiled(mesh: Mesh) -> np.ndarray:
    """:func:`_duplicate_cells` with the hashes and their repeats found in compiled loops."""
    from .kernels import topology as kt

    out = []
    for i, b in enumerate(mesh.blocks):
        k = b.info.n_corners
        if len(b) < 2:
            continue
        mult = _HASH_MULT[:k].copy()
        # cells ordered by their lowest corner (a renumbered mesh, which has the file's
        # ids; others are not tried, so numba need not load the kernel): repeats can only
        # sit in one run of equal lowest corners, so one pass without a sort settles it
        # when none repeats (4.77M tetrahedra: 0.03 s against the sort's 0.1-0.25 s)
        if mesh.file_cell_ids is not None and kt.distinct_in_runs(b.cells, k, mult):
            continue
        h = np.empty(len(b), np.uint64)
        kt.corner_hash(b.cells, k, mult, h)
        # repeated hashes by numpy's sort (SIMD, in cache-sized runs): 0.1 s against
        # 0.35 s for an open-addressing table on 4.8M tetrahedra; sorted in place (no
        # second n_cells array beside the topology's scratch: 36 MiB at 4.8M cells) and
        # hashed again in cell order only when some hash repeats
        h.sort()
        rep = h[1:][h[1:] == h[:-1]]
        if not len(rep):
            continue
        kt.corner_hash(b.cells, k, mult, h)
        cand = np.flatnonzero(np.isin(h, rep))
        del h
        sc = np.sort(b.cells[cand, :k], axis=1)
        out.append(_equal_rows(sc, cand) + mesh.block_offsets[i])
    return np.concatenate(out).astype(np.int64) if out else np.zeros((0, 2), np.int64)


def _per_label_bbox_compiled(points, mesh: Mesh, label: np.ndarray, n_label: int,
                             used: np.ndarray):
    """:func:`_per_label_bbox` in one compiled pass over the corners of each block."""
    from .kernels import topology as kt

    if n_label == 1:
        bb = mesh.bounding_box_from(used)
        return bb[:1].copy(), bb[1:].copy()
    lo = np.full((n_label, 3), np.inf)
    hi = np.full((n_label, 3), -np.inf)
    for i, b in enumerate(mesh.blocks):
        kt.label_bbox(points, b.cells, b.info.n_corners,
                      label[mesh.block_offsets[i]:mesh.block_offsets[i + 1]], lo, hi)
    return lo, hi


def _build_topology_compiled(mesh: Mesh, rel_tol: float,
                             faces_found: Callable[[Edges, Faces], None] | None = None
                             ) -> Topology:
    """:func:`build_topology` with the kernels of :mod:`meshcheck.kernels.topology`."""
    from .kernels import topology as kt

    used = _used_compiled(mesh)
    # the edges' int64 scratch reused by the faces (3D): already written pages
    spare: list | None = [] if mesh.dim == 3 else None
    edges = _build_edges_compiled(mesh, spare)
    # volumes and duplicates need no faces: beside them on a second thread (the kernels
    # and numpy's sort release the GIL)
    tail = thread_map(lambda job: job(), [
        lambda: _build_faces_compiled(mesh, edges, spare) if mesh.dim == 3 else no_faces(mesh),
        lambda: (_cell_volumes_compiled(mesh),
                 _duplicate_nodes_compiled(mesh.points, used, edges, rel_tol),
                 _duplicate_cells_compiled(mesh))])
    faces, (vol, dup, dup_cells) = tail
    if faces_found is not None:
        faces_found(edges, faces)
    parent = np.arange(mesh.n_cells, dtype=kt.index_dtype(mesh.n_cells))
    if mesh.dim == 3:
        n_comp, comp = kt.components_faces(parent, faces.cells, faces.count)
    elif len(edges.cell_edges):
        n_comp, comp = kt.components_edges(parent, edges.incidence, edges.incidence_starts)
    else:
        n_comp, comp = 0, np.zeros(0, np.int64)
    del parent
    if mesh.dim == 3:
        n_comp, comp = _join_crowded_faces(mesh, faces, n_comp, comp)
    comp = comp.astype(index_type(mesh.n_cells), copy=False)  # as the numpy path's
    lo, hi = _per_label_bbox_compiled(mesh.points, mesh, comp, n_comp, used)
    return _topology_of(mesh, edges, faces, used, vol, dup, dup_cells, n_comp, comp, lo, hi)
