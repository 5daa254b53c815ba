"""Directional (anisotropic) polynomial orders for hexahedra, prisms and quads.

A tensor-product cell can carry a different order along each parametric
direction: a hexahedron Q_{p_r, p_s, p_t}, a prism P_{p_tri} x P_{p_t}, a
quadrilateral Q_{p_r, p_s}.  The order a direction needs is the highest order
its edges need at the upper frequency (the advisor's ``edge_order``):

    hexahedron (VTK)  r: edges 0-1, 3-2, 4-5, 7-6   s: 1-2, 0-3, 5-6, 4-7   t: 0-4, 1-5, 2-6, 3-7
    wedge             triangle (r, s): the six edges of the two triangles    t: 0-3, 1-4, 2-5
    quad              r: 0-1, 3-2   s: 1-2, 0-3

Tetrahedra, pyramids and triangles keep one order (the highest of their edges).

Unknowns of a hierarchical H1 space (e.g. Szabo & Babuska, "Finite Element
Analysis", 1991; Solin, Segeth & Dolezel, "Higher-Order Finite Element
Methods", 2004, ch. 2 and 3 on anisotropic orders), conforming by the maximum
rule (an edge or face takes the highest order its cells give it in its own
direction):  one per vertex; p - 1 per edge; a quadrilateral face spanned by
directions of orders (p_a, p_b) (p_a - 1)(p_b - 1); a triangular face
(p - 1)(p - 2)/2; interiors (not counted when condensed) hexahedron
(p_r - 1)(p_s - 1)(p_t - 1), prism (p_tri - 1)(p_tri - 2)/2 (p_t - 1),
quadrilateral (p_r - 1)(p_s - 1).  The isotropic count gives every cell its
highest directional order in all directions.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import NamedTuple

import numpy as np

from .cells import CELL_TYPES
from .cost import interior_dofs
from .kernels import use_compiled
from .mesh import Mesh
from .topology import Topology

__all__ = ["DirectionalOrders", "direction_groups", "cell_direction_orders", "count_dofs",
           "directional_orders"]

#: linear type -> local edge indices of each parametric direction (r, s, t)
_GROUPS = {
    "hexahedron": ((0, 2, 4, 6), (1, 3, 5, 7), (8, 9, 10, 11)),
    "wedge": ((0, 1, 2, 3, 4, 5), (0, 1, 2, 3, 4, 5), (6, 7, 8)),
    "quad": ((0, 2), (1, 3)),
}


def direction_groups(cell_type: str) -> tuple[tuple[int, ...], ...]:
    """Local edge indices of each parametric direction of a cell type (meshio name).

    Hexahedra 3 groups, wedges 3 (the first two both the triangle edges), quads 2;
    every other type one group with all its edges (isotropic).
    """
    info = CELL_TYPES[cell_type]
    g = _GROUPS.get(info.linear)
    return g if g is not None else (tuple(range(info.n_edges)),)


def _edge_group(cell_type: str) -> np.ndarray:
    """(n_local_edges,) direction column (0, 1, 2) of every local edge."""
    info = CELL_TYPES[cell_type]
    out = np.zeros(info.n_edges, np.int64)
    groups = direction_groups(cell_type)
    for j, g in enumerate(groups):
        if info.linear == "wedge" and j == 1:
            continue
        out[list(g)] = j
    return out


def cell_direction_orders(mesh: Mesh, topo: Topology, edge_order: np.ndarray,
                          max_order: int) -> np.ndarray:
    """(n_cells, 3) int8 order per parametric direction r, s, t (cast before arithmetic
    that may exceed it).

    edge_order : (n_e,) order each edge needs (values above ``max_order`` are capped).
    Wedges have equal r and s (the triangle order); isotropic types repeat their
    one order; 2D cells have 0 in the t column.
    """
    eo = np.clip(np.asarray(edge_order), 1, max_order).astype(np.int8)  # max_order <= 16
    compiled = use_compiled(mesh.n_cells)
    if compiled:
        from .kernels import directional as _kd
    out = []
    for b, ce in zip(mesh.blocks, topo.edges.cell_edges):
        groups = direction_groups(b.type)
        if compiled:
            member = np.full(ce.shape[1], -1, np.int64)
            for j, g in enumerate(groups):
                member[[k for k in g if member[k] < 0]] = j
            tab = np.zeros((len(ce), len(groups)), np.int8)
            _kd.group_max(np.ascontiguousarray(ce), eo, member, tab)
            cols = [tab[:, j] if j == 0 or groups[j] != groups[0] else tab[:, 0]
                    for j in range(len(groups))]
        else:
            cols = [eo[ce[:, list(g)]].max(axis=1) for g in groups]
        if len(cols) == 1:
            cols = cols * (3 if b.info.dim == 3 else 2)
        if b.info.dim == 2:
            cols = cols + [np.zeros(len(b), np.int8)]
        out.append(np.column_stack(cols))
    return np.concatenate(out) if out else np.zeros((0, 3), np.int8)


def _local_faces(cell_type: str):
    """Per local face: corners and, for quads, the direction column of sides 0 and 1."""
    info = CELL_TYPES[cell_type]
    edge_of = {}
    for i, (a, b, _) in enumerate(info.edges):
        edge_of[(int(a), int(b))] = edge_of[(int(b), int(a))] = i
    grp = _edge_group(cell_type)
    out = []
    for f in info.faces:
        sides = [edge_of[(f[i], f[(i + 1) % len(f)])] for i in range(len(f))]
        out.append((f, sides, [int(grp[s]) for s in sides]))
    return out


class _EdgePairRows(NamedTuple):
    """Local faces of the 3D cells grouped by edge pairs (compiled path): face id per row,
    number of faces, and per row triangle flag, cell id, direction columns of the sides."""

    group: np.ndarray
    n_faces: int
    tri: np.ndarray
    cell: np.ndarray
    col_a: np.ndarray
    col_b: np.ndarray


def _edge_pair_rows(mesh: Mesh, topo: Topology) -> _EdgePairRows | None:
    """Compiled-path twin of :func:`_face_rows`.  A face is keyed by two of its unique edges:
    a triangle by its two lowest edge ids (two edges sharing a node fix the triangle), a
    quadrilateral by its lowest edge id and the edge opposite it (two disjoint opposite
    sides fix the quadrilateral; they never share a node, so no triangle key equals a
    quadrilateral's).  The rows are grouped by a counting sort on the first edge."""
    from .kernels import directional as _kd

    blocks = [(bi, b, ce) for bi, (b, ce) in enumerate(zip(mesh.blocks, topo.edges.cell_edges))
              if b.info.dim == 3]
    n_rows = sum(len(b) * len(b.info.faces) for _, b, _ in blocks)
    if not blocks:
        return None
    m, o = np.empty(n_rows, np.int64), np.empty(n_rows, np.int64)
    cell = np.empty(n_rows, np.int32 if mesh.n_cells < 2**31 else np.int64)
    ca, cb, tri = np.empty(n_rows, np.int8), np.empty(n_rows, np.int8), np.empty(n_rows, bool)
    at = 0
    for bi, b, ce in blocks:
        local = _local_faces(b.type)
        sides = np.zeros((len(local), 4), np.int64)
        cols = np.zeros((len(local), 4), np.int8)
        n_sides = np.array([len(sd) for _, sd, _ in local], np.int64)
        for f, (_, sd, cl) in enumerate(local):
            sides[f, :len(sd)] = sd
            cols[f, :len(cl)] = cl
        at = _kd.block_face_keys(np.ascontiguousarray(ce), sides, n_sides, cols,
                                 int(mesh.block_offsets[bi]), m, o, cell, ca, cb, tri, at)
    group, n_faces = _kd.group_edge_pairs(m, o, len(topo.edges))
    return _EdgePairRows(group, int(n_faces), tri, cell, ca, cb)


class _FaceSides(NamedTuple):
    """The topology's unique faces with the tables :func:`meshcheck.kernels.directional.
    face_dofs_by_sides` reads their sides from (compiled path)."""
    cells: np.ndarray
    count: np.ndarray
    local: np.ndarray
    cell_edges: np.ndarray
    offs: np.ndarray
    sides: np.ndarray
    n_sides: np.ndarray
    group: np.ndarray


def _face_sides(mesh: Mesh, topo: Topology) -> _FaceSides | None:
    """:class:`_FaceSides` of a volume mesh whose faces have at most two cells (None
    otherwise: a face of more cells keeps only two in the topology)."""
    f = topo.faces
    if mesh.dim != 3 or not len(f) or int(f.count.max()) > 2:
        return None
    ces = topo.edges.cell_edges
    width = max(b.info.n_edges for b in mesh.blocks)
    n_b = len(mesh.blocks)
    sides = np.zeros((n_b, 6, 4), np.int64)
    n_sides = np.zeros((n_b, 6), np.int64)
    group = np.zeros((n_b, width), np.int64)
    for bi, b in enumerate(mesh.blocks):
        if b.info.dim != 3:
            continue
        group[bi, :b.info.n_edges] = _edge_group(b.type)
        for j, (_, sd, _) in enumerate(_local_faces(b.type)):
            sides[bi, j, :len(sd)] = sd
            n_sides[bi, j] = len(sd)
    if n_b == 1:
        cell_edges = np.ascontiguousarray(ces[0])
    else:  # the blocks' edge lists side by side, padded with -1
        cell_edges = np.full((mesh.n_cells, width), -1, ces[0].dtype)
        for ce, lo in zip(ces, mesh.block_offsets[:-1]):
            cell_edges[lo:lo + len(ce), :ce.shape[1]] = ce
    return _FaceSides(np.ascontiguousarray(f.cells), np.ascontiguousarray(f.count),
                      np.ascontiguousarray(f.local), cell_edges,
                      np.asarray(mesh.block_offsets, np.int64), sides, n_sides, group)


def _face_rows(mesh: Mesh, topo: Topology):
    """Every local face of every 3D cell, grouped by its node set (order-independent).
    On the compiled path (:func:`meshcheck.kernels.use_compiled`) the topology's faces as
    a :class:`_FaceSides`, or an :class:`_EdgePairRows` when a face has more than two cells.

    Returns (order, starts, tri, cell, col_a, col_b): ``order`` sorts the face rows so
    that equal faces are consecutive, ``starts`` begins each unique face, ``tri`` tells
    triangles (at the starts), and per row the cell id and the columns of the cell's
    direction orders that run along the face's two sides (col_b unused for triangles).
    """
    if use_compiled(mesh.n_cells):  # the topology's faces, or their own table
        return _face_sides(mesh, topo) or _edge_pair_rows(mesh, topo)
    n = np.int64(mesh.n_points + 1)
    lo_k, hi_k, cells, ca, cb, tri = [], [], [], [], [], []
    for bi, (b, ce) in enumerate(zip(mesh.blocks, topo.edges.cell_edges)):
        if b.info.dim != 3:
            continue
        ids = np.arange(len(b), dtype=np.int64) + mesh.block_offsets[bi]
        for corners, sides, cols in _local_faces(b.type):
            s = np.sort(b.cells[:, list(corners)], axis=1)
            cells.append(ids)
            if len(corners) == 3:
                lo_k.append(s[:, 0])
                hi_k.append(s[:, 1] * n + s[:, 2])
                ca.append(np.full(len(b), cols[0], np.int8))
                cb.append(np.full(len(b), cols[0], np.int8))
                tri.append(np.ones(len(b), bool))
            else:
                lo_k.append((s[:, 0] + 1) * n + s[:, 3])
                hi_k.append(s[:, 1] * n + s[:, 2])
                e = ce[:, sides]
                x_first = np.minimum(e[:, 0], e[:, 2]) < np.minimum(e[:, 1], e[:, 3])
                ca.append(np.where(x_first, cols[0], cols[1]).astype(np.int8))
                cb.append(np.where(x_first, cols[1], cols[0]).astype(np.int8))
                tri.append(np.zeros(len(b), bool))
    if not lo_k:
        return None
    # triangle low keys s0 < n never equal a quadrilateral's (s0 + 1) n + s3 >= n
    lo, hi = np.concatenate(lo_k), np.concatenate(hi_k)
    order = np.lexsort((hi, lo))
    lo_s, hi_s = lo[order], hi[order]
    new = np.ones(len(order), bool)
    new[1:] = (lo_s[1:] != lo_s[:-1]) | (hi_s[1:] != hi_s[:-1])
    starts = np.flatnonzero(new)
    cell = np.concatenate(cells)[order]
    return (starts, np.concatenate(tri)[order][starts], cell,
            np.concatenate(ca)[order], np.concatenate(cb)[order])


def count_dofs(mesh: Mesh, topo: Topology, orders: np.ndarray,
               face_rows=None) -> tuple[int, int]:
    """Unknowns of the conforming space with per-direction cell orders.

    orders : (n_cells, 3) int orders per direction (see :func:`cell_direction_orders`).
    face_rows : :func:`_face_rows` of the mesh, when already built.
    Returns (condensed, total): vertices + edges + faces, and that plus the cell
    interiors.  Maximum rule on shared edges and faces.
    """
    compiled = use_compiled(mesh.n_cells)
    used = np.zeros(mesh.n_points, bool)
    if compiled:  # the orders in their own type (int8): the kernels widen them
        from .kernels import directional as _kd
        from .kernels import topology as _kt
        orders = np.ascontiguousarray(orders)
        for b in mesh.blocks:
            nc = b.info.n_corners
            _kt.mark_used(b.cells if b.cells.shape[1] == nc else
                          np.ascontiguousarray(b.cells[:, :nc]), used)
    else:
        orders = np.asarray(orders, dtype=np.int64)
        for b in mesh.blocks:
            used[b.cells[:, :b.info.n_corners]] = True
    # the edges' orders (at most 16): one byte each on the compiled path
    edge_p = np.ones(len(topo.edges), np.int8 if compiled else np.int64)
    interior = 0
    for bi, (b, ce) in enumerate(zip(mesh.blocks, topo.edges.cell_edges)):
        o = orders[mesh.block_offsets[bi]:mesh.block_offsets[bi + 1]]
        grp = _edge_group(b.type)
        if compiled:
            _kd.edge_orders(edge_p, ce, o, grp)
        else:
            np.maximum.at(edge_p, ce.ravel(), o[:, grp].ravel())
        lin = b.info.linear
        if lin == "hexahedron":  # products in int64 (orders up to 16: 15^3)
            interior += int(np.sum(np.prod(o - 1, axis=1, dtype=np.int64)))
        elif lin == "wedge":
            o = o.astype(np.int64)
            interior += int(np.sum((o[:, 0] - 1) * (o[:, 0] - 2) // 2 * (o[:, 2] - 1)))
        elif lin == "quad":
            o = o.astype(np.int64)
            interior += int(np.sum((o[:, 0] - 1) * (o[:, 1] - 1)))
        else:
            ps, counts = np.unique(o[:, 0], return_counts=True)
            interior += int(sum(int(c) * interior_dofs(lin, int(p)) for p, c in zip(ps, counts)))
    total_v = int(used.sum()) + int(np.sum(edge_p - 1))
    faces = 0
    rows = face_rows if face_rows is not None else _face_rows(mesh, topo)
    if isinstance(rows, _FaceSides):
        faces = int(_kd.face_dofs_by_sides(*rows, orders))
    elif isinstance(rows, _EdgePairRows):
        faces = int(_kd.face_dofs(rows.group, rows.n_faces, rows.tri, rows.cell, rows.col_a,
                                  rows.col_b, orders))
    elif rows is not None:
        starts, is_tri, cell, col_a, col_b = rows
        pa = np.maximum.reduceat(orders[cell, col_a], starts)
        pb = np.maximum.reduceat(orders[cell, col_b], starts)
        faces = int(np.sum(np.where(is_tri, (pa - 1) * (pa - 2) // 2, (pa - 1) * (pb - 1))))
    condensed = total_v + faces
    return condensed, condensed + interior


@dataclass(frozen=True)
class DirectionalOrders:
    """Orders per parametric direction at the upper frequency and what they save.

    orders : (n_cells, 3) int8 (see :func:`cell_direction_orders`).
    isotropic : (n_cells,) int8 highest order of each cell.
    anisotropic_cells : cells whose directions need different orders.
    dofs_directional, dofs_isotropic : condensed unknowns (vertices, edges, faces).
    total_directional, total_isotropic : the same with cell interiors.
    saving : 1 - dofs_directional / dofs_isotropic (condensed), and
    saving_total likewise with interiors.
    """

    orders: np.ndarray
    isotropic: np.ndarray
    anisotropic_cells: int
    dofs_directional: int
    dofs_isotropic: int
    total_directional: int
    total_isotropic: int

    @property
    def saving(self) -> float:
        return 1.0 - self.dofs_directional / self.dofs_isotropic if self.dofs_isotropic else 0.0

    @property
    def saving_total(self) -> float:
        return 1.0 - self.total_directional / self.total_isotropic if self.total_isotropic else 0.0


def directional_orders(mesh: Mesh, topo: Topology, edge_order: np.ndarray,
                       max_order: int) -> DirectionalOrders:
    """Directional orders from the order every edge needs, and the unknowns saved."""
    o = cell_direction_orders(mesh, topo, edge_order, max_order)
    iso = o.max(axis=1)
    o_iso = np.where(o > 0, iso[:, None], 0)
    dims = np.concatenate([np.full(len(b), b.info.dim, np.int8) for b in mesh.blocks]) \
        if mesh.blocks else np.zeros(0, np.int8)
    lowest = np.where(dims == 2, o[:, :2].min(axis=1), o.min(axis=1))
    aniso = int(np.count_nonzero(lowest != iso))
    rows = _face_rows(mesh, topo)  # shared by both counts
    cd, td = count_dofs(mesh, topo, o, rows)
    ci, ti = count_dofs(mesh, topo, o_iso, rows)
    return DirectionalOrders(o, iso, aniso, cd, ci, td, ti)
