"""Degrees of freedom of an H1-conforming discretisation on a mesh.

Counts are exact for the mesh's entities:

* Lagrange (or any complete) fixed order p: one unknown per vertex, p-1 per
  edge, (p-1)(p-2)/2 per triangular face, (p-1)^2 per quadrilateral face, and
  the cell interiors (tet (p-1)(p-2)(p-3)/6, hex (p-1)^3, wedge
  (p-1)^2(p-2)/2, pyramid (p-1)(p-2)(2p-3)/6) — the dimensions of the standard
  H1 spaces, e.g. Szabo & Babuska, "Finite Element Analysis", Wiley 1991, and
  Solin, Segeth & Dolezel, "Higher-Order Finite Element Methods", CRC 2004, ch. 2.
* Hierarchical variable order with interior (bubble) unknowns condensed: the
  same vertex, edge and face counts with the order of every edge and face set
  by the *maximum rule* (the highest order of the cells sharing it), cell
  interiors not counted because they are eliminated element by element.

Matrix non-zeros (structural, both triangles and the diagonal) follow from the
entity adjacency: the unknowns of two entities are coupled when a cell holds
both.  In a conforming mesh the cells holding two entities of one cell are the
cells holding their *join* (the smallest entity containing both), so every
coupled pair is counted once at its join.  Summing over all pairs inside the
closure of an entity S gives T(S)^2, T(S) = unknowns on the closure of S;
Moebius inversion on the face lattice of a polytope (Eulerian: mu = (-1)^(dim
difference); e.g. Stanley, "Enumerative Combinatorics" vol. 1, sec. 3.16)
turns this into

    nnz = sum over entities S of chi(S) T(S)^2,
    chi(S) = sum over entities R containing S (R = S included) of (-1)^(dim R - dim S),

so an interior edge of a tetrahedral mesh has chi = 1 - (faces) + (cells) = 1,
an interior face chi = -1, a cell chi = 1.  The count is exact for conforming
meshes of simplices, hexahedra, wedges and pyramids, in O(number of entities)
array operations per order configuration (no pair list, no sparse product);
it is checked against NGSolve's matrix graph and a brute-force pair count in
tests/test_cost.py.  (The lattice facts are textbook combinatorics, cited from
memory.)

Quotes.  :func:`quote` turns one system per frequency into time and memory with
the fitted machine constants of :mod:`meshcheck.calibration` (sparse direct
factorisation per frequency; bands from the fits' spread); :func:`job_cost`
quotes variable order and fixed orders 1 and 2 on the supplied mesh and the
coarsening scenario of :mod:`meshcheck.sizefield`.  See docs/cost.md.
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path

import numpy as np

from . import kernels
from .mesh import Mesh
from .threads import pieces, ranges as _chunks, thread_map
from .topology import Topology

__all__ = ["face_dofs", "interior_dofs", "lagrange_dofs", "condensed_dofs",
           "variable_order_dofs", "Adjacency", "build_adjacency", "entity_orders",
           "SystemSize", "system_size", "cell_orders_at", "variable_order_systems",
           "fixed_order_system", "matrix_bytes", "Quote", "quote", "sweep_quotes",
           "Coarsening", "JobCost", "job_cost", "job_cost_dict", "audit_job_cost",
           "cost_section", "cost_markdown"]


def face_dofs(n_corners: int, p) -> np.ndarray:
    """Interior unknowns of a triangular (3) or quadrilateral (4) face of order p."""
    p = np.asarray(p)
    return (p - 1) * (p - 2) // 2 if n_corners == 3 else (p - 1) ** 2


def interior_dofs(cell: str, p: int) -> int:
    """Interior (bubble) unknowns of an order-p cell of a linear type name."""
    q = p - 1
    return {"tetra": q * (q - 1) * (q - 2) // 6, "hexahedron": q ** 3,
            "wedge": q * q * (q - 1) // 2, "pyramid": q * (q - 1) * (2 * p - 3) // 6,
            "triangle": q * (q - 1) // 2, "quad": q ** 2}[cell]


def _used_vertices(mesh: Mesh, topo: Topology) -> int:
    """Nodes that are a corner of some cell: with linear cells only, the nodes the
    topology found used (no pass over the cells: 0.1-0.15 s of the sweep at 4.77M tets,
    mostly numpy's int32 -> intp copy of the cells for the scatter)."""
    if all(b.cells.shape[1] == b.info.n_corners for b in mesh.blocks):
        return mesh.n_points - len(topo.unused_nodes)
    used = np.zeros(mesh.n_points, bool)
    for b in mesh.blocks:
        used[b.cells[:, :b.info.n_corners]] = True
    return int(used.sum())


def _face_kinds(topo: Topology) -> tuple[int, int]:
    tri = int(np.count_nonzero(topo.faces.is_tri))
    return tri, len(topo.faces) - tri


def condensed_dofs(mesh: Mesh, topo: Topology, p: int) -> int:
    """Global unknowns at uniform order p with cell interiors condensed."""
    n_tri, n_quad = _face_kinds(topo)
    return int(_used_vertices(mesh, topo) + (p - 1) * len(topo.edges)
               + n_tri * face_dofs(3, p) + n_quad * face_dofs(4, p))


def lagrange_dofs(mesh: Mesh, topo: Topology, p: int) -> int:
    """Global unknowns of the order-p Lagrange space (interiors included)."""
    inner = sum(len(b) * interior_dofs(b.info.linear, p) for b in mesh.blocks)
    if mesh.dim == 2:  # the cells are the faces
        return int(_used_vertices(mesh, topo) + (p - 1) * len(topo.edges) + inner)
    return condensed_dofs(mesh, topo, p) + int(inner)


def variable_order_dofs(mesh: Mesh, topo: Topology, cell_limits: np.ndarray,
                        frequencies: np.ndarray, max_order: int,
                        limit_row: np.ndarray | None = None) -> np.ndarray:
    """Condensed hierarchical unknowns per frequency for variable order.

    cell_limits : (n_cells, pmax) highest usable frequency of each cell per order
        (non-decreasing along the order axis), Hz; or, with ``limit_row`` ((n_cells,)
        integers), the rows the cells share (``Advice.limit_rows``).
    frequencies : (n_f,) Hz.  A cell takes the lowest order whose limit reaches
    the frequency, capped at ``max_order``; edges and faces take the highest
    order of their cells (maximum rule).  Cost O((n_entities) log n) per order,
    independent of the number of frequencies.
    Returns (n_f,) int64.
    """
    f = np.asarray(frequencies, dtype=float)
    faces = topo.faces
    three = mesh.dim == 3 and len(faces) > 0
    if kernels.use_compiled(mesh.n_cells) and f.ndim == 1 and len(f) and \
            np.all(np.isfinite(f)) and max_order - 1 <= np.shape(cell_limits)[1]:
        return _variable_order_dofs_compiled(mesh, topo, cell_limits, f, max_order, three,
                                             limit_row)
    if three:
        c0, c1 = faces.cells[:, 0], faces.cells[:, 1]
        two = c1 >= 0
        c1 = np.maximum(c1, 0)
        is_tri = faces.is_tri
        kinds = [(is_tri, lambda q: q - 1), (~is_tri, lambda q: 2 * q - 1)]
        kinds = [(np.flatnonzero(k), inc) for k, inc in kinds if k.any()]

    def above(q: int) -> np.ndarray:
        """Unknowns added where entities need more than order q, per frequency."""
        col = np.ascontiguousarray(cell_limits[:, q - 1] if limit_row is None else
                                   cell_limits[limit_row, q - 1])
        # an edge has order > q where one of its cells has (limit at q below f)
        g_edge = np.sort(topo.edges.from_cells(col, np.minimum))
        out = np.searchsorted(g_edge, f, side="left").astype(np.int64)
        if three:
            g_face = col[c0]
            np.minimum(g_face, col[c1], out=g_face, where=two)
            for idx, inc in kinds:
                if inc(q) > 0:
                    out += inc(q) * np.searchsorted(np.sort(g_face[idx]), f, side="left")
        return out

    total = np.full(f.shape, _used_vertices(mesh, topo), dtype=np.int64)
    parts = thread_map(above, range(1, max_order), parallel=mesh.n_cells > 50_000)
    for part in parts:
        total += part
    return total


def _limit_bins(cell_limits: np.ndarray, f: np.ndarray, ncol: int,
                limit_row: np.ndarray | None = None):
    """Histograms of the cells' limits over the sorted (finite) frequencies, with the
    kernel :func:`meshcheck.kernels.advice.order_hist`.

    Returns (order, hist, B): ``order`` sorts f (stable); hist (pmax, n_f + 1) int64,
    ``cumsum(hist[p])[k]`` = cells whose limit at order p + 1 is below ``f[order[k]]``;
    B (n_rows, W) bin + 1 of each row's limit at orders 1..ncol (0 for NaN), in the
    smallest unsigned type holding n_f + 1 (uint8 up to 254 frequencies: one byte per
    row and order for the random reads of :func:`_dofs_from_bins`), W = ncol rounded up
    to a multiple of 8, the columns past ncol set to n_f + 1.
    With ``limit_row`` (n_cells,), ``cell_limits`` are rows shared by the cells: the
    rows are binned once and counted as often as cells use them; B stays one row per
    limit row (cell i's bins are ``B[limit_row[i]]``).
    """
    from .kernels import advice as _ka

    order = np.argsort(f, kind="stable")
    fs = np.ascontiguousarray(f[order], dtype=float)
    lim = np.ascontiguousarray(cell_limits)  # float32 (the advice's) or float64, no copy
    if lim.dtype not in (np.float32, np.float64):
        lim = lim.astype(np.float64)
    hist = np.zeros((lim.shape[1], len(f) + 1), np.int64)
    dtype = np.uint8 if len(f) < 255 else np.uint16 if len(f) < 65_535 else np.uint32
    # every row written by order_hist, the padding columns too (a fill first took 10 ms)
    B = np.empty((lim.shape[0], 0 if ncol == 0 else 8 * -(-ncol // 8)), dtype)
    par = lim.shape[0] > 50_000
    chunks = pieces(lim.shape[0], par)
    # cells per row, in 4 bytes when the cells' count fits (8.5 MiB less at the sweep's
    # peak for 4.77M tets)
    wtype = np.int32 if limit_row is None or len(limit_row) < 2**31 - 1 else np.int64
    weight = np.zeros(0 if limit_row is None else lim.shape[0], wtype)
    if limit_row is not None:  # cells per row (np.bincount would copy int32 rows to int64)
        _ka.count_labels(np.ascontiguousarray(limit_row), weight)

    grid = _bin_grid(fs)

    def run(r):
        part = np.zeros_like(hist)
        _ka.order_hist(lim, weight, fs, r[0], r[1], part, B, ncol, *grid)
        return part

    for part in thread_map(run, chunks, parallel=par):
        hist += part
    return order, hist, B


#: cells of :func:`_bin_grid` per frequency
BIN_GRID = 4


def _bin_grid(fs: np.ndarray) -> tuple[float, float, np.ndarray]:
    """(g0, gs, gidx) of :func:`meshcheck.kernels.advice.order_hist` for the sorted
    finite frequencies fs (Hz, n_f >= 1): :data:`BIN_GRID` x n_f equal cells over
    [fs[0], fs[-1]], x in cell int((x - g0) * gs); gidx[g] the number of frequencies at
    or below the start of the cell before g (a cell's margin against rounding), so that
    at most a few frequencies lie between it and x's bin when they are about evenly
    spread (any spread stays exact: the kernel steps up from it)."""
    G = BIN_GRID * len(fs)
    span = float(fs[-1] - fs[0])
    if not span > 0.0:  # one frequency (or all equal): every x starts from 0
        return float(fs[0]), 0.0, np.zeros(1, np.int64)
    gs = (G - 1) / span
    starts = fs[0] + (np.arange(G) - 1.0) / gs
    return float(fs[0]), gs, np.searchsorted(fs, starts, side="right").astype(np.int64)


def _dofs_from_bins(mesh: Mesh, topo: Topology, B: np.ndarray, order: np.ndarray,
                    three: bool, limit_row: np.ndarray | None = None,
                    limit_hist: np.ndarray | None = None) -> np.ndarray:
    """(n_f,) int64 variable-order unknowns from the bins B of :func:`_limit_bins` (one
    row per cell, or per limit row with ``limit_row``): vertices + edge and face
    unknowns by the maximum rule.  With its histogram ``limit_hist``, only the orders that some cell
    exceeds within the sweep are counted (the others add nothing: every bin there is
    past the last frequency or NaN's): a mesh that needs order 2 at most over the sweep
    has one column of seven, and its (edges x columns) table fits in cache."""
    from .kernels import advice as _ka

    n_f = len(order)
    qs = np.arange(B.shape[1], dtype=np.int64)
    if limit_hist is not None and B.shape[1]:
        qs = np.flatnonzero(limit_hist[:B.shape[1], :n_f].any(axis=1))
        B = np.ascontiguousarray(B[:, qs])
    edges = topo.edges
    par = mesh.n_cells > 50_000
    parts = 2 if par else 1
    row = (np.zeros(0, np.int64) if limit_row is None else
           np.ascontiguousarray(limit_row))
    jobs = []
    if len(edges) and B.shape[1]:
        # every edge's smallest bins over its cells, scattered from the cells' edge lists
        # into one table: each thread reads every cell's edges and takes those of its
        # own range of edges (no table per thread; 4.77M tets: 0.19 s on one thread ->
        # about 0.1 s on each of two), then bins them. Only for a renumbered mesh (it
        # has the file's ids): its edges are numbered along its cells, so each thread's
        # edges come in runs; in a file's order they alternate at random, and each
        # thread took as long as one thread for all (966k tets, 0.08 -> 0.11 s each):
        # there one job does the edges beside the faces' jobs
        E = np.empty((len(edges), B.shape[1]), B.dtype)

        def edge_job(hist, lo, hi):
            E[lo:hi] = n_f + 1
            g0 = 0
            for ce in edges.cell_edges:
                _ka.edge_min_bins(B, row, ce, g0, lo, hi, E)
                g0 += len(ce)
            _ka.edge_bin_hist(E, lo, hi, hist)

        for lo, hi in _chunks(len(edges), parts if mesh.file_cell_ids is not None else 1):
            jobs.append(lambda hist, lo=lo, hi=hi: edge_job(hist, lo, hi))
    if three and B.shape[1]:
        fcells = np.ascontiguousarray(topo.faces.cells)
        # only triangular faces (tetrahedra): no (n_faces,) mask (9 MiB at 4.8M cells)
        tri = (np.zeros(0, bool) if all(b.info.linear == "tetra" for b in mesh.blocks)
               else topo.faces.is_tri)
        for lo, hi in pieces(len(fcells), par):  # (a job per piece: balanced)
            jobs.append(lambda hist, lo=lo, hi=hi:
                        _ka.face_dof_hist(B, qs, row, fcells, tri, lo, hi, hist))

    def run(job):
        hist = np.zeros(n_f + 1, np.int64)
        job(hist)
        return hist

    hist = np.zeros(n_f + 1, np.int64)
    for part in thread_map(run, jobs, parallel=par):
        hist += part
    total = np.empty(n_f, np.int64)
    total[order] = _used_vertices(mesh, topo) + np.cumsum(hist)[:n_f]
    return total


def _variable_order_dofs_compiled(mesh: Mesh, topo: Topology, cell_limits: np.ndarray,
                                  f: np.ndarray, max_order: int, three: bool,
                                  limit_row: np.ndarray | None = None) -> np.ndarray:
    """:func:`variable_order_dofs` by histograms over the sorted frequencies (kernels of
    :mod:`meshcheck.kernels.advice`): the same (n_f,) int64 counts."""
    order, hist, B = _limit_bins(cell_limits, f, max(max_order - 1, 0), limit_row)
    return _dofs_from_bins(mesh, topo, B, order, three, limit_row, hist)


# ---------------------------------------------------------------------------
# exact matrix non-zeros


@dataclass(frozen=True)
class Adjacency:
    """Incidence data for exact non-zero counts (built once per mesh).

    vertices : (n_v,) int64 ids of the used vertices.
    chi_vertex, chi_edge, chi_face : (n_v,), (n_e,), (n_f,) signed star counts chi(S)
        (see the module docstring), int64 (``chi_face`` int16, empty in 2D).
    face_edges : (n_f, 4) edge ids of every face (int32 unless an id exceeds it), -1
        padded (triangles).
    face_corners : (n_f,) int64 3 or 4.
    face_tri : (n_f,) bool.
    cell_corners : (n_cells,) int64 corner count of every cell.
    cell_kind : (n_cells,) int8 index into ``kinds`` (linear cell type names).
    kinds : tuple of linear cell type names present.
    cell_faces : (n_cells, 2) uint8 faces listing each cell as one of their two cells,
        quadrilaterals then triangles ((n_cells, 0) in 2D): the face terms of a cell's
        unknowns at a uniform order.
    """

    dim: int
    vertices: np.ndarray
    chi_vertex: np.ndarray
    chi_edge: np.ndarray
    chi_face: np.ndarray
    face_edges: np.ndarray
    face_corners: np.ndarray
    face_tri: np.ndarray
    cell_corners: np.ndarray
    cell_kind: np.ndarray
    kinds: tuple[str, ...]
    cell_faces: np.ndarray | None = None


#: faces handled at a time where a per-face table is gathered (bounded scratch memory)
_FACE_CHUNK = 1 << 20


@lru_cache(maxsize=None)
def _face_edge_table(cell_type: str) -> np.ndarray:
    """(n_faces, 4) local edge of each side of each face of a 3D cell type (sides
    (c0, c1), (c1, c2), ... of the face's corners), -1 padding triangles."""
    from .cells import CELL_TYPES

    info = CELL_TYPES[cell_type]
    local = {frozenset(map(int, e[:2])): i for i, e in enumerate(info.edges)}
    out = np.full((len(info.faces), 4), -1, np.int64)
    for k, f in enumerate(info.faces):
        for i in range(len(f)):
            out[k, i] = local[frozenset((f[i], f[(i + 1) % len(f)]))]
    out.setflags(write=False)
    return out


def _face_edges(mesh: Mesh, topo: Topology) -> np.ndarray:
    """(n_f, 4) unique-edge ids of the sides of every face, -1 padding triangles: read
    from the cell edges of each face's first cell (its local face's local edges)."""
    from .topology import _block_parts, index_type

    faces = topo.faces
    c0, loc = faces.cells[:, 0], faces.local
    out = np.full((len(faces), 4), -1, index_type(max(len(topo.edges), 1)))
    for part, (bi, off) in _block_parts(mesh, c0):
        ce = topo.edges.cell_edges[bi]
        flat, k = ce.reshape(-1), ce.shape[1]
        table = _face_edge_table(mesh.blocks[bi].type)
        for s in range(0, len(c0) if part is None else len(part), _FACE_CHUNK):
            p = slice(s, s + _FACE_CHUNK) if part is None else part[s:s + _FACE_CHUNK]
            t = table[loc[p]]
            got = flat[(c0[p].astype(np.int64) - off)[:, None] * k + np.maximum(t, 0)]
            got[t < 0] = -1
            out[p] = got
    return out


def _face_counts(mesh: Mesh, topo: Topology, tri: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """(face edges (n_f, 4), faces per edge (n_e,) int32, ends of face sides at each
    node (n_points,) int64, faces per cell by kind (n_cells, 2) uint8: quadrilaterals,
    triangles); one compiled pass over the faces
    (:func:`meshcheck.kernels.cost.face_pass`) for large meshes of one volume block."""
    from .topology import _block_parts, index_type

    faces, edges, n = topo.faces, topo.edges, mesh.n_cells
    n_e, n_pts = len(edges), mesh.n_points
    parts = _block_parts(mesh, faces.cells[:, 0])
    if kernels.use_compiled(n) and len(parts) == 1 and parts[0][0] is None:
        from .kernels import cost as _kc

        bi, off = parts[0][1]
        face_edges = np.empty((len(faces), 4), index_type(max(n_e, 1)))
        faces_per_edge = np.zeros(n_e, np.int32)
        side_ends = np.zeros(n_pts, np.int64)
        cell_faces = np.zeros((n, 2), np.uint8)
        _kc.face_pass(np.ascontiguousarray(faces.cells), np.ascontiguousarray(faces.local),
                      tri.view(np.uint8), np.ascontiguousarray(edges.cell_edges[bi]), off,
                      _face_edge_table(mesh.blocks[bi].type), np.ascontiguousarray(edges.nodes),
                      face_edges, faces_per_edge, side_ends, cell_faces)
        return face_edges, faces_per_edge, side_ends, cell_faces
    face_edges = _face_edges(mesh, topo)
    faces_per_edge = np.zeros(n_e, np.int32)
    for s in range(0, len(faces), _FACE_CHUNK):
        fe = face_edges[s:s + _FACE_CHUNK]
        faces_per_edge += np.bincount(fe.reshape(-1) + 1, minlength=n_e + 1)[1:].astype(np.int32)
    side_ends = np.bincount(edges.nodes.ravel(), np.repeat(faces_per_edge, 2),
                            minlength=n_pts).astype(np.int64)
    c = faces.cells
    kind = tri.view(np.int8)  # 0 quadrilateral, 1 triangle
    cell_faces = np.bincount(2 * c[:, 0].astype(np.int64) + kind, minlength=2 * n)
    second = np.where(c[:, 1] >= 0, 2 * c[:, 1].astype(np.int64) + kind, 2 * n)
    cell_faces += np.bincount(second, minlength=2 * n + 1)[:2 * n]
    return face_edges, faces_per_edge, side_ends, cell_faces.reshape(n, 2).astype(np.uint8)


def build_adjacency(mesh: Mesh, topo: Topology) -> Adjacency:
    """Star counts chi of every vertex, edge and face, and face -> edge ids.

    Every count comes from the cells' edge lists and the faces' first cells (no
    edge-to-cell table, no search of edges by their nodes): 4.77M tets 4.5 s and a
    2.3 GiB peak before, on the project's machine."""
    n_pts = mesh.n_points
    corners = [b.cells[:, :b.info.n_corners] for b in mesh.blocks]
    cell_per_node = np.zeros(n_pts, np.int64)
    for c in corners:
        cell_per_node += np.bincount(c.ravel(), minlength=n_pts)
    vertices = np.flatnonzero(cell_per_node > 0)
    edges = topo.edges
    edge_per_node = np.bincount(edges.nodes.ravel(), minlength=n_pts) if len(edges) else \
        np.zeros(n_pts, np.int64)
    cells_per_edge = np.zeros(len(edges), np.int64)
    for ce in edges.cell_edges:  # (a cell listing an edge twice counts it twice, as before)
        cells_per_edge += np.bincount(ce.ravel(), minlength=len(edges))
    kinds = tuple(dict.fromkeys(b.info.linear for b in mesh.blocks))
    cell_kind = np.concatenate([np.full(len(b), kinds.index(b.info.linear), np.int8)
                                for b in mesh.blocks]) if mesh.blocks else np.zeros(0, np.int8)
    cell_corners = np.concatenate([np.full(len(b), b.info.n_corners, np.int64)
                                   for b in mesh.blocks]) if mesh.blocks else np.zeros(0, np.int64)
    if mesh.dim == 3 and len(topo.faces):
        faces = topo.faces
        tri = faces.is_tri
        fc = np.where(tri, 3, 4).astype(np.int64)
        face_edges, faces_per_edge, side_ends, cell_faces = _face_counts(mesh, topo, tri)
        # every corner of a face lies on two of its sides: the faces at a node are half
        # the ends of face sides at it (exact; no pass over the faces' nodes)
        face_per_node = side_ends // 2
        chi_face = 1 - faces.count.astype(np.int16)  # (counts are uint8)
        chi_edge = 1 - faces_per_edge + cells_per_edge
        chi_vertex = 1 - edge_per_node + face_per_node - cell_per_node
    else:
        face_edges = np.zeros((0, 4), np.int64)
        fc = np.zeros(0, np.int64)
        tri = np.zeros(0, bool)
        chi_face = np.zeros(0, np.int16)
        chi_edge = 1 - cells_per_edge
        chi_vertex = 1 - edge_per_node + cell_per_node
        cell_faces = np.zeros((mesh.n_cells, 0), np.uint8)
    return Adjacency(mesh.dim, vertices, chi_vertex[vertices], chi_edge, chi_face, face_edges,
                     fc, tri, cell_corners, cell_kind, kinds, cell_faces)


#: at most this many distinct cell orders are scattered one order at a time
_SCATTER_ORDERS = 64


def _edge_max(mesh: Mesh, topo: Topology, q: np.ndarray) -> np.ndarray:
    """(n_e,) highest of ``q`` (n_cells,) int64 over the cells of each edge.

    The cells of each order in turn, lowest first, write their order into their edges,
    so each edge ends with its highest (no edge-to-cell table); the edge-to-cell
    reduction where the orders are too many to take in turn."""
    n_e = len(topo.edges)
    lo, hi = (int(q.min()), int(q.max())) if len(q) else (0, 0)
    if lo == hi:
        return np.full(n_e, lo, np.int64)
    if hi - lo >= _SCATTER_ORDERS:
        return topo.edges.from_cells(q, np.maximum)
    out = np.full(n_e, lo, np.int64)
    for p in range(lo + 1, hi + 1):  # every block at one order before the next order
        for ce, a in zip(topo.edges.cell_edges, mesh.block_offsets[:-1]):
            rows = np.flatnonzero(q[a:a + len(ce)] == p)
            if len(rows):
                out[ce[rows]] = p
    return out


def entity_orders(mesh: Mesh, topo: Topology, cell_order: np.ndarray
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Edge and face orders by the maximum rule -> ((n_e,), (n_f,)) int64."""
    q = np.asarray(cell_order, dtype=np.int64)
    q_edge = _edge_max(mesh, topo, q) if len(topo.edges) else np.zeros(0, np.int64)
    if mesh.dim == 3 and len(topo.faces):
        c = topo.faces.cells
        q_face = np.where(c[:, 1] >= 0, np.maximum(q[c[:, 0]], q[np.maximum(c[:, 1], 0)]),
                          q[c[:, 0]])
    else:
        q_face = np.zeros(0, np.int64)
    return q_edge, q_face


@dataclass(frozen=True)
class SystemSize:
    """Size of one global system.

    ndof : unknowns; nnz : structural non-zeros (full matrix, diagonal included);
    ndof_interior : interior unknowns condensed out (or kept, when ``condensed`` is
    False); cell_entries, cell_cubes : sum over cells of n_loc^2 and n_loc^3, n_loc =
    unknowns of the cell before condensation (element-matrix work of the assembly).
    """

    ndof: int
    nnz: int
    ndof_interior: int
    condensed: bool
    cell_entries: int = 0
    cell_cubes: int = 0


def _interior_table(kinds: tuple[str, ...], pmax: int) -> np.ndarray:
    """(n_kinds, pmax + 1) interior unknowns per cell kind and order (column 0 unused)."""
    return np.array([[interior_dofs(k, max(p, 1)) for p in range(pmax + 1)] for k in kinds],
                    dtype=np.int64).reshape(len(kinds), pmax + 1)


def system_size(mesh: Mesh, topo: Topology, cell_order, condensed: bool = True,
                adjacency: Adjacency | None = None) -> SystemSize:
    """Exact unknowns and non-zeros of the hierarchical H1 system.

    cell_order : int or (n_cells,) int order of every cell; edges and faces take the
        highest order of their cells (maximum rule).
    condensed : True -> interior (bubble) unknowns eliminated cell by cell (they are
        neither counted nor coupled); False -> kept (at uniform order this is the
        Lagrange space of that order, the same count and graph).
    """
    adj = adjacency if adjacency is not None else build_adjacency(mesh, topo)
    q = np.broadcast_to(np.asarray(cell_order, dtype=np.int64), (mesh.n_cells,))
    if mesh.n_cells and q.min() < 1:
        raise ValueError("cell orders must be at least 1")
    if mesh.n_cells and adj.cell_faces is not None and (np.ndim(cell_order) == 0
                                                        or q.min() == q.max()):
        return _uniform_system(mesh, topo, adj, int(q[0]), condensed)
    return _system_size(mesh, topo, q, condensed, adj)


def _uniform_system(mesh: Mesh, topo: Topology, adj: Adjacency, p: int,
                    condensed: bool) -> SystemSize:
    """:func:`system_size` with every cell at order ``p``: every edge, triangle and
    quadrilateral then has the same unknowns, so the sums over them are star-count sums
    times constants, and a cell's coupled unknowns follow from its type and face counts
    (4.77M tets: 1.5 s per order before)."""
    w_e = p - 1
    nnz = int(adj.chi_vertex.sum()) + (2 + w_e) ** 2 * int(adj.chi_edge.sum())
    ndof = len(adj.vertices) + w_e * len(topo.edges)
    edges_of = np.concatenate([np.full(len(ce), ce.shape[1], np.int64)
                               for ce in topo.edges.cell_edges])
    t_cell = adj.cell_corners + w_e * edges_of
    if adj.dim == 3 and len(adj.chi_face):
        w_quad, w_tri = (p - 1) ** 2, (p - 1) * (p - 2) // 2
        n_tri = int(np.count_nonzero(adj.face_tri))
        ndof += n_tri * w_tri + (len(adj.face_tri) - n_tri) * w_quad
        chi_tri = int(adj.chi_face[adj.face_tri].sum())
        chi_quad = int(adj.chi_face.sum()) - chi_tri
        nnz += (3 + 3 * w_e + w_tri) ** 2 * chi_tri + (4 + 4 * w_e + w_quad) ** 2 * chi_quad
        t_cell += w_quad * adj.cell_faces[:, 0].astype(np.int64)
        t_cell += w_tri * adj.cell_faces[:, 1].astype(np.int64)
    w_cell = _interior_table(adj.kinds, p)[adj.cell_kind, p]
    n_int = int(w_cell.sum())
    n_loc = t_cell + w_cell
    if not condensed:
        t_cell = n_loc
        ndof += n_int
    nnz += int(np.dot(t_cell, t_cell))
    return SystemSize(int(ndof), int(nnz), n_int, bool(condensed), int(np.dot(n_loc, n_loc)),
                      int(np.dot(n_loc * n_loc, n_loc)))


def _system_size(mesh: Mesh, topo: Topology, q: np.ndarray, condensed: bool,
                 adj: Adjacency) -> SystemSize:
    """:func:`system_size` for any orders ``q`` (n_cells,) int64."""
    q_edge, q_face = entity_orders(mesh, topo, q)
    w_edge = q_edge - 1
    # vertices: T = 1
    nnz = int(adj.chi_vertex.sum())
    ndof = len(adj.vertices) + int(w_edge.sum())
    t_edge = 2 + w_edge
    nnz += int(np.dot(adj.chi_edge, t_edge * t_edge))
    t_cell = adj.cell_corners.copy()
    step = _FACE_CHUNK  # the gathers a chunk at a time (bounded scratch memory)
    for ce, off in zip(topo.edges.cell_edges, mesh.block_offsets[:-1]):
        for s in range(0, len(ce), step):
            part = ce[s:s + step]
            t_cell[off + s:off + s + len(part)] += w_edge[part].sum(axis=1)
    if adj.dim == 3 and len(q_face):
        # face unknowns by a table of (triangle?, order): (p-1)(p-2)/2 and (p-1)^2
        pf = np.arange(int(q_face.max()) + 1)
        w_face = np.array([(pf - 1) ** 2, (pf - 1) * (pf - 2) // 2])[adj.face_tri.view(np.int8),
                                                                      q_face]
        ndof += int(w_face.sum())
        fe = adj.face_edges
        w_pad = np.append(w_edge, 0)  # a triangle's padding side (-1) reads the last: 0
        for s in range(0, len(fe), step):
            t_face = (adj.face_corners[s:s + step] + w_pad[fe[s:s + step]].sum(axis=1)
                      + w_face[s:s + step])
            nnz += int(np.dot(adj.chi_face[s:s + step], t_face * t_face))
        c = topo.faces.cells
        n = mesh.n_cells
        t_cell += np.bincount(c[:, 0], w_face, minlength=n).astype(np.int64)
        # the second cells; boundary faces (-1) counted into a spare bin n, dropped
        t_cell += np.bincount(np.where(c[:, 1] >= 0, c[:, 1], n), w_face,
                              minlength=n + 1)[:n].astype(np.int64)
    table = _interior_table(adj.kinds, int(q.max()) if len(q) else 1)
    w_cell = table[adj.cell_kind, q] if len(q) else np.zeros(0, np.int64)
    n_int = int(w_cell.sum())
    n_loc = (t_cell + w_cell).astype(float)
    if not condensed:
        t_cell = t_cell + w_cell
        ndof += n_int
    nnz += int(np.dot(t_cell, t_cell))
    return SystemSize(int(ndof), int(nnz), n_int, bool(condensed),
                      int(np.dot(n_loc, n_loc)), int(np.sum(n_loc ** 3)))


def cell_orders_at(cell_limits: np.ndarray, frequency: float, max_order: int,
                   limit_row: np.ndarray | None = None) -> np.ndarray:
    """(n_cells,) lowest order whose limit reaches ``frequency`` (Hz), capped at max_order
    (``limit_row``: the cells' rows of shared ``cell_limits``, see
    :func:`variable_order_dofs`)."""
    lim = np.asarray(cell_limits)[:, :max(max_order - 1, 0)]
    q = 1 + np.count_nonzero(lim < np.float64(frequency), axis=1)  # in float64
    return q if limit_row is None else q[limit_row]


#: most frequencies of a sweep whose systems are counted exactly (see variable_order_systems)
EXACT_SYSTEMS = 16


def variable_order_systems(mesh: Mesh, topo: Topology, cell_limits: np.ndarray,
                           frequencies: np.ndarray, max_order: int,
                           adjacency: Adjacency | None = None,
                           exact: int = EXACT_SYSTEMS,
                           limit_row: np.ndarray | None = None) -> list[SystemSize]:
    """Condensed hierarchical system per frequency with the advised orders.

    The system is counted exactly at ``exact`` frequencies spread evenly over the
    sweep (all of them when there are no more); in between, every count is
    interpolated linearly in frequency (and rounded), so a fine sweep costs no
    more than ``exact`` counts.  Frequencies with the same order configuration
    share one computation.  Returns one :class:`SystemSize` per frequency.
    """
    adj = adjacency if adjacency is not None else build_adjacency(mesh, topo)
    f = np.asarray(frequencies, dtype=float)
    picks = np.arange(len(f)) if len(f) <= exact else \
        np.unique(np.round(np.linspace(0, len(f) - 1, exact)).astype(int))
    configs, slot = [], []  # distinct order configurations, in sweep order
    for i in picks:
        q = cell_orders_at(cell_limits, f[i], max_order, limit_row)
        if not configs or not np.array_equal(q, configs[-1]):
            configs.append(q)
        slot.append(len(configs) - 1)
    # the counts are independent and numpy releases the GIL in them: use the cores
    sizes = thread_map(lambda q: system_size(mesh, topo, q, True, adj), configs)
    known = {int(i): sizes[j] for i, j in zip(picks, slot)}
    if len(picks) == len(f):
        return [known[i] for i in range(len(f))]
    fields = ("ndof", "nnz", "ndof_interior", "cell_entries", "cell_cubes")
    xs = f[picks]
    cols = {k: np.interp(f, xs, [getattr(known[int(i)], k) for i in picks]) for k in fields}
    return [known[i] if i in known else
            SystemSize(**{k: int(round(cols[k][i])) for k in fields}, condensed=True)
            for i in range(len(f))]


def fixed_order_system(mesh: Mesh, topo: Topology, p: int,
                       adjacency: Adjacency | None = None) -> SystemSize:
    """Order-p Lagrange system (interiors kept): ``lagrange_dofs`` unknowns."""
    return system_size(mesh, topo, p, False, adjacency)


# ---------------------------------------------------------------------------
# time and memory of a sweep


def matrix_bytes(ndof, nnz, value_bytes: int = 16) -> np.ndarray:
    """Bytes of a CSR matrix: values, column indices and row pointers (int32 indices
    while nnz < 2^31, else int64); value_bytes 16 complex128, 8 float64."""
    n = np.asarray(ndof, dtype=float)
    z = np.asarray(nnz, dtype=float)
    idx = np.where(z < 2.0 ** 31, 4.0, 8.0)
    return z * (value_bytes + idx) + (n + 1) * idx


@dataclass(frozen=True)
class Quote:
    """Predicted cost of a frequency sweep with one strategy (direct solver, one
    factorisation per frequency).

    strategy : e.g. "variable p<=8", "fixed p=2".
    frequencies : (n_f,) Hz.  ndof, nnz : (n_f,) int64 (exact on the supplied mesh,
        estimates in a scenario: ``exact``).
    carried : (n_f,) bool, the strategy meets the accuracy target at f on this mesh.
    factor_s, solve_s, assembly_s : (n_f,) s per frequency (assembly_s: per-frequency
        assembly and condensation, 0 when K and M are assembled once).
    time_s : (n_f,) s, their sum; time_low, time_high : (n_f,) band from the fits' spread.
    memory_bytes : (n_f,) peak of one frequency (factorisation peak + system matrix, and
        K and M when assembled once); memory_low, memory_high : band.
    assembly_once_s : one-off assembly of K and M at the highest order, s.
    fill : (n_f,) predicted factor entries.
    """

    strategy: str
    frequencies: np.ndarray
    ndof: np.ndarray
    nnz: np.ndarray
    carried: np.ndarray
    factor_s: np.ndarray
    solve_s: np.ndarray
    assembly_s: np.ndarray
    time_s: np.ndarray
    time_low: np.ndarray
    time_high: np.ndarray
    memory_bytes: np.ndarray
    memory_low: np.ndarray
    memory_high: np.ndarray
    assembly_once_s: float
    assembly_once_band: tuple[float, float]
    fill: np.ndarray
    exact: bool = True
    extrapolated: bool = False

    @property
    def total_s(self) -> float:
        return float(self.assembly_once_s + self.time_s.sum())

    @property
    def total_band(self) -> tuple[float, float]:
        return (float(self.assembly_once_band[0] + self.time_low.sum()),
                float(self.assembly_once_band[1] + self.time_high.sum()))

    @property
    def peak_bytes(self) -> float:
        return float(self.memory_bytes.max()) if len(self.memory_bytes) else 0.0

    @property
    def peak_band(self) -> tuple[float, float]:
        if not len(self.memory_bytes):
            return (0.0, 0.0)
        i = int(np.argmax(self.memory_bytes))
        return float(self.memory_low[i]), float(self.memory_high[i])


def quote(strategy: str, dim: int, frequencies, systems: list[SystemSize], carried,
          machine, once: SystemSize | None = None, cells: int = 0,
          exact: bool = True) -> Quote:
    """Cost of a sweep from its systems (one per frequency) and a machine model.

    once : system whose K and M are assembled once at the highest order (fixed order);
        None -> every frequency assembles (and condenses) its own system.
    cells : number of cells (assembly model).
    """
    f = np.asarray(frequencies, dtype=float)
    N = np.array([s.ndof for s in systems], dtype=np.int64)
    Z = np.array([s.nnz for s in systems], dtype=np.int64)
    E = np.array([s.cell_entries for s in systems], dtype=float)
    C3 = np.array([s.cell_cubes for s in systems], dtype=float)
    pr = machine.predict(dim, N, Z, np.full(len(N), float(cells)), E, C3)
    a_mat = matrix_bytes(N, Z, 16)
    if once is None:
        asm, asm_lo, asm_hi = pr.assembly_s, pr.assembly_band[0], pr.assembly_band[1]
        once_s, once_band, extra = 0.0, (0.0, 0.0), 0.0
    else:
        po = machine.predict(dim, [once.ndof], [once.nnz], [float(cells)], [once.cell_entries],
                             [once.cell_cubes])
        once_s = float(po.assembly_s[0])
        once_band = (float(po.assembly_band[0][0]), float(po.assembly_band[1][0]))
        asm = asm_lo = asm_hi = np.zeros(len(N))
        extra = 2.0 * float(matrix_bytes(once.ndof, once.nnz, 8))
    t = pr.factor_s + pr.solve_s + asm
    lo, hi = pr.time_band[0] + asm_lo, pr.time_band[1] + asm_hi
    mem = pr.factor_bytes + a_mat + extra
    top = machine.largest_calibrated(dim) if hasattr(machine, "largest_calibrated") else None
    beyond = bool(top is not None and len(N) and N.max() > 2 * top)
    return Quote(strategy, f, N, Z, np.asarray(carried, bool), np.asarray(pr.factor_s, float),
                 np.asarray(pr.solve_s, float), np.asarray(asm, float), np.asarray(t, float),
                 np.asarray(lo, float), np.asarray(hi, float), np.asarray(mem, float),
                 np.asarray(pr.bytes_band[0] + a_mat + extra, float),
                 np.asarray(pr.bytes_band[1] + a_mat + extra, float), once_s, once_band,
                 np.asarray(pr.fill, float), exact, beyond)


def sweep_quotes(mesh: Mesh, topo: Topology, advice, frequencies, machine,
                 fixed_orders=(1, 2), adjacency: Adjacency | None = None) -> list[Quote]:
    """Quotes on the supplied mesh: variable order up to the maximum order (condensed,
    advised orders), and fixed Lagrange orders ``fixed_orders`` (plus the audit's fixed
    order, if any).  ``carried`` tells where each strategy meets the target."""
    adj = adjacency if adjacency is not None else build_adjacency(mesh, topo)
    f = np.asarray(frequencies, dtype=float)
    s = advice.settings
    lim = advice.mesh_limit
    P = s.max_order
    out = []
    systems = variable_order_systems(mesh, topo, advice.limit_rows, f, P, adj,
                                     limit_row=advice.limit_row)
    out.append(quote(f"variable p<={P}", mesh.dim, f, systems, f <= lim[P - 1], machine,
                     None, mesh.n_cells))
    orders = list(dict.fromkeys([*fixed_orders, *( [s.order] if s.order else [])]))
    for p in orders:
        sys_p = fixed_order_system(mesh, topo, p, adj)
        out.append(quote(f"fixed p={p}", mesh.dim, f, [sys_p] * len(f),
                         f <= lim[min(p, advice.pmax) - 1], machine, sys_p, mesh.n_cells))
    return out


# ---------------------------------------------------------------------------
# the quote of an audit: strategies on the supplied mesh and the coarsening scenario


@dataclass(frozen=True)
class Coarsening:
    """A mesh built to a size field, estimated.

    field : :class:`~meshcheck.sizefield.SizeField`; cells : estimated cell count;
    quote : sweep on that mesh (``exact`` False) or None (2D); reference : the quote on
    the supplied mesh with the same strategy; speedup : reference total / quote total.
    """

    field: object
    cells: float
    quote: Quote | None
    reference: Quote | None
    speedup: float | None


@dataclass(frozen=True)
class JobCost:
    """Everything the quote needs: machine constants, strategies on the supplied mesh
    (variable order first), the coarsening scenario at the allowed order and, if asked
    for, at a chosen order."""

    machine: object
    quotes: tuple[Quote, ...]
    coarsening: Coarsening | None
    chosen: Coarsening | None = None


def _scenario(mesh, topo, advice, field, frequencies, machine, fixed: int | None,
              reference: Quote | None, adj: Adjacency | None = None) -> Coarsening:
    from .sizefield import scenario_systems

    if mesh.dim != 3:
        return Coarsening(field, field.cells_estimate, None, reference, None)
    P = advice.settings.max_order
    systems, n_cells = scenario_systems(mesh, topo, advice, field, frequencies, P, fixed,
                                        adjacency=adj)
    f = np.asarray(frequencies, dtype=float)
    name = f"fixed p={fixed}" if fixed else f"variable p<={P}"
    once = systems[0] if fixed else None
    q = quote(name, 3, f, systems, np.ones(len(f), bool), machine, once, int(round(n_cells)),
              exact=False)
    speed = reference.total_s / q.total_s if reference is not None and q.total_s > 0 else None
    return Coarsening(field, n_cells, q, reference, speed)


def job_cost(mesh: Mesh, topo: Topology, advice, frequencies, machine=None,
             fixed_orders=(1, 2), size_order: int | None = None, gradation: float = 0.3,
             geometry_limit=None, field=None) -> JobCost:
    """Quote a sweep: variable order and fixed orders on the supplied mesh, and the
    coarsening scenario (size field at the upper frequency for the allowed order, and
    for ``size_order`` if given) with its estimated cost and speed-up.

    machine : :class:`~meshcheck.calibration.MachineModel` (default: ``load_machine()``).
    geometry_limit : hook ``(mesh, topo) -> (n_points,)`` largest size the boundary
        allows, m (see :func:`meshcheck.sizefield.size_field`).
    field : the size field of the allowed order with these settings, when already built.
    """
    from .calibration import load_machine
    from .sizefield import size_field

    machine = machine if machine is not None else load_machine()
    adj = build_adjacency(mesh, topo)
    f = np.asarray(frequencies, dtype=float)
    s = advice.settings
    orders = list(fixed_orders)
    if size_order is not None and size_order not in orders and size_order != s.order:
        orders.append(int(size_order))
    quotes = sweep_quotes(mesh, topo, advice, f, machine, orders, adj)
    by_name = {q.strategy: q for q in quotes}
    if field is None:
        field = size_field(mesh, topo, advice, None, gradation, geometry_limit)
    ref_name = f"fixed p={s.order}" if s.order else f"variable p<={s.max_order}"
    main = _scenario(mesh, topo, advice, field, f, machine, s.order, by_name.get(ref_name), adj)
    chosen = None
    if size_order is not None:
        fld = size_field(mesh, topo, advice, size_order, gradation, geometry_limit)
        chosen = _scenario(mesh, topo, advice, fld, f, machine, int(size_order),
                           by_name.get(f"fixed p={int(size_order)}"), adj)
    return JobCost(machine, tuple(quotes), main, chosen)


def _q_dict(q: Quote) -> dict:
    def fl(a):
        return [float(x) for x in np.asarray(a)]

    return {"strategy": q.strategy, "exact_counts": q.exact, "unknowns": q.ndof.tolist(),
            "nonzeros": q.nnz.tolist(), "carried": q.carried.tolist(),
            "carries_all": bool(q.carried.all()),
            "factor_entries": fl(q.fill), "time_s": fl(q.time_s), "time_low_s": fl(q.time_low),
            "time_high_s": fl(q.time_high), "factor_s": fl(q.factor_s),
            "solve_s": fl(q.solve_s), "assembly_s": fl(q.assembly_s),
            "memory_bytes": fl(q.memory_bytes), "memory_low_bytes": fl(q.memory_low),
            "memory_high_bytes": fl(q.memory_high),
            "assembly_once_s": q.assembly_once_s,
            "assembly_highest_order_s": (q.assembly_once_s if q.assembly_once_s > 0 else
                                         float(q.assembly_s[-1]) if len(q.assembly_s) else 0.0),
            "assembly_once_band_s": list(q.assembly_once_band),
            "total_s": q.total_s, "total_band_s": list(q.total_band),
            "peak_memory_bytes": q.peak_bytes, "peak_memory_band_bytes": list(q.peak_band),
            "beyond_calibration": bool(q.extrapolated)}


def _c_dict(c: Coarsening | None, scale: float) -> dict | None:
    if c is None:
        return None
    fld = c.field
    ok = np.isfinite(fld.size)
    return {"order": fld.order, "upper_frequency_hz": fld.fmax, "gradation": fld.gradation,
            "mesher_size_factor": 1.0 / fld.edge_factor,
            "geometry_limited_nodes": int(np.count_nonzero(np.isfinite(fld.geometry))),
            "target_size_min": float(np.min(fld.size[ok]) / scale) if ok.any() else None,
            "target_size_max": float(np.max(fld.size[ok]) / scale) if ok.any() else None,
            "estimated_cells": float(c.cells),
            "cell_count_rule": "gmsh tetrahedra: 0.501 int 6 sqrt(2)/h^3 dV + 1.604 int "
                               "1/h^2 dS, h = mesher size (measured with gmsh 4.15)",
            "quote": _q_dict(c.quote) if c.quote is not None else None,
            "compared_with": c.reference.strategy if c.reference is not None else None,
            "speedup": c.speedup}


def job_cost_dict(job: JobCost, scale: float = 1.0) -> dict:
    """The "cost" section of the JSON report (lengths in the mesh's unit: ``scale`` m
    per unit)."""
    m = job.machine
    qs = [_q_dict(q) for q in job.quotes]
    var = job.quotes[0]
    savings = {q.strategy: (q.total_s / var.total_s if var.total_s > 0 else None)
               for q in job.quotes[1:]}
    return {"solver": m.solver, "machine_constants": m.source, "calibrated": m.created,
            "machine": m.machine,
            "calibrated_up_to_unknowns": {str(d): m.largest_calibrated(d) for d in (2, 3)},
            "model": ("factor memory and solve time ~ c1 X1 + c2 nnz - c3 N, factor time ~ "
                      "c1 X2 + c2 nnz^2/N + c3 nnz - c4 N (nested dissection: X1 = N^(4/3), "
                      "X2 = N^2 in 3D; N log2 N, N^(3/2) in 2D), assembly ~ cells, sum "
                      "n_loc^2, sum n_loc^3; constants fitted to real factorisations "
                      "(meshcheck calibrate)"),
            "band": "exp(+-2 x root-mean-square of ln(measured / fitted)) of the calibration",
            "per_frequency": ("variable order: assemble and condense at the advised orders, "
                              "factorise, solve; fixed order: K and M assembled once, then "
                              "factorise K - k^2 M and solve"),
            "strategies": qs,
            "time_ratio_to_variable": savings,
            "coarsening": _c_dict(job.coarsening, scale),
            "coarsening_chosen_order": _c_dict(job.chosen, scale)}


_CACHE: dict = {}


def audit_job_cost(res, machine=None) -> JobCost:
    """:func:`job_cost` of an :class:`~meshcheck.pipeline.AuditResult` (cached per result,
    so the JSON, VTU and size-view writers share one computation)."""
    import weakref

    key = id(res)
    hit = _CACHE.get(key)
    if hit is not None and hit[0]() is res and machine is None:
        return hit[1]
    from .sizefield import audit_size_field

    job = job_cost(res.mesh, res.topology, res.advice, np.asarray(res.settings.frequencies),
                   machine, field=audit_size_field(res))
    if machine is None:
        _CACHE[key] = (weakref.ref(res, lambda _, k=key: _CACHE.pop(k, None)), job)
    return job


def cost_section(res, scale: float = 1.0) -> dict:
    """The "cost" section of the audit report, or {"error": message} when no machine
    constants can be loaded."""
    from .errors import MeshcheckError

    try:
        return job_cost_dict(audit_job_cost(res), scale)
    except MeshcheckError as exc:
        return {"error": str(exc)}


def cost_markdown(cost: dict | None) -> list[str]:
    """Markdown lines of the report's "cost" section (empty without one)."""
    if not cost:
        return []
    if "error" in cost:
        return ["## Cost of the sweep\n", f"Not estimated: {cost['error']}\n"]

    def t(s):
        return f"{s:.3g} s" if s < 120 else (f"{s / 60:.3g} min" if s < 7200 else
                                              f"{s / 3600:.3g} h")

    def b(x):
        return f"{x / 1e6:.3g} MB" if x < 1e9 else f"{x / 1e9:.3g} GB"

    cpu = (cost.get("machine") or {}).get("cpu", "unknown CPU")
    L = ["## Cost of the sweep\n",
         f"Solver: {cost['solver']}. Constants: {Path(cost['machine_constants']).name} "
         f"(calibrated {cost['calibrated']} on {cpu}; `meshcheck calibrate` measures this "
         f"machine). Bands: {cost['band']}.\n",
         "| strategy | unknowns at the top | non-zeros | sweep time | band | peak memory | "
         "carries every frequency |", "|---|---|---|---|---|---|---|"]
    for q in cost["strategies"]:
        lo, hi = q["total_band_s"]
        flag = " (beyond calibration)" if q.get("beyond_calibration") else ""
        L.append(f"| {q['strategy'].replace('<=', '≤')} | {q['unknowns'][-1]:,} | {q['nonzeros'][-1]:,} | "
                 f"{t(q['total_s'])}{flag} | {t(lo)} - {t(hi)} | "
                 f"{b(q['peak_memory_bytes'])} | {'yes' if q['carries_all'] else 'no'} |")
    co = cost.get("coarsening")
    if co and co.get("quote"):
        q = co["quote"]
        sp = f", {co['speedup']:.3g} times faster than on the supplied mesh" \
            if co.get("speedup") else ""
        L.append(f"\nCoarsening scenario: a mesh sized for order {co['order']} at "
                 f"{co['upper_frequency_hz']:g} Hz (gradation {co['gradation']:g}) would hold "
                 f"about {co['estimated_cells']:,.0f} tetrahedra and "
                 f"{q['unknowns'][-1]:,} unknowns at the top; the sweep would take "
                 f"{t(q['total_s'])}{sp}. The size field is in the VTU (point data "
                 f"`target_size`, `mesher_size`) and in the gmsh view `*.size.pos` "
                 f"(`gmsh model.geo -bgm <mesh>.size.pos -3`).")
    L.append("")
    return L
