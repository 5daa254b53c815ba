"""Order and frequency advice from the 1D dispersion model, edge by edge.

For every edge (length h, propagation distance L, sound speed c) and every
order p the model of :mod:`meshcheck.dispersion` gives the largest usable
k*h; the edge's highest usable frequency is f = c * (kh)_max / (2 pi h).
A cell is usable up to the lowest limit of its edges; a region and the mesh
up to the lowest limit of their cells.  A sweep is advised by binning these
limits (sorted once per order), so its cost does not grow with the number of
frequencies.  By default (``AdviceSettings.correction_3d``) the model sees each
edge as ``a * h`` with a 3D correction factor a fitted to real solves
(:data:`SIZE_FACTOR_TABLE`, :func:`size_correction`, docs/validation.md).
"""
from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property

import numpy as np

from . import kernels
from .cost import condensed_dofs, lagrange_dofs, variable_order_dofs
from .dispersion import _segments, usable_kh
from .errors import SettingsError
from .mesh import Mesh
from .arrays import sorted_distinct
from .threads import pieces, ranges as _chunks, thread_map
from .topology import Topology

__all__ = ["AdviceSettings", "Advice", "Cluster", "Sweep", "advise", "sweep", "clusters",
           "region_runs"]

TWO_PI = 2.0 * np.pi


@dataclass(frozen=True)
class AdviceSettings:
    """What the solver can do and how accurate it must be.

    target : relative L2 error allowed for a propagating wave (0.01 = 1 %).
    max_order : highest polynomial order of a variable-order (p-FEM) solver.
    order : fixed order of the solver (e.g. 1 linear, 2 quadratic); None = variable.
    distance : propagation distance L in metres; None = the bounding-box diagonal
        of the connected fluid domain each cell belongs to.
    coarsen_factor : cells that could be at least this many times larger are
        reported as coarsening candidates.
    correction_3d : apply the 3D correction of the 1D model fitted to real solves
        (:data:`SIZE_FACTOR_TABLE`, docs/validation.md), on by default: tetrahedra,
        wedges and hexahedra are assessed as if their edges were ``a * length`` long;
        False = the plain 1D model (every factor 1).
    """

    target: float = 0.01
    max_order: int = 8
    order: int | None = None
    distance: float | None = None
    coarsen_factor: float = 2.0
    correction_3d: bool = True

    def __post_init__(self):
        if not 1e-8 <= self.target <= 0.5:
            raise SettingsError(f"accuracy target {self.target} must lie between 1e-8 and 0.5 "
                                "(e.g. 0.01 for 1 %)")
        if not 1 <= self.max_order <= 16:
            raise SettingsError(f"maximum order {self.max_order} must be between 1 and 16")
        if self.order is not None and not 1 <= self.order <= self.max_order:
            raise SettingsError(f"fixed order {self.order} must be between 1 and the "
                                f"maximum order {self.max_order}")
        if self.distance is not None and not self.distance > 0:
            raise SettingsError(f"propagation distance {self.distance} m must be positive")
        if not self.coarsen_factor > 1:
            raise SettingsError("coarsening factor must be greater than 1")

    @property
    def allowed_order(self) -> int:
        """The order the mesh must carry the upper frequency with."""
        return self.order if self.order is not None else self.max_order

    @property
    def mode(self) -> str:
        return "fixed" if self.order is not None else "variable"


#: type of the advice's limit table (``Advice.limit_rows``): float32, 7 significant digits
#: of a frequency limit (the model behind it is good to a few percent), half the memory
#: of float64 (206 -> 103 MiB for 4.8M tetrahedra); every comparison of a limit with a
#: frequency is made in float64 on the stored value, on both paths
LIMIT_DTYPE = np.float32
#: storage of the per-cell sizes of the advice (``cell_size``, ``target_size``); the
#: refine / coarsen decisions are made in float64 before they are narrowed
SIZE_DTYPE = np.float32


#: cells whose limit :meth:`Advice.limit_at` gathers at a time
_TAKE_CHUNK = 1 << 18


def _take(table: np.ndarray, index: np.ndarray, out: np.ndarray) -> np.ndarray:
    """out[:] = table[index], :data:`_TAKE_CHUNK` items at a time (np.take casts an index
    of another integer type to intp and buffers its output while it checks bounds: a
    whole-array take costs those copies)."""
    for lo in range(0, len(out), _TAKE_CHUNK):
        np.take(table, index[lo:lo + _TAKE_CHUNK], out=out[lo:lo + _TAKE_CHUNK])
    return out


def order_dtype(pmax: int):
    """Integer type of the advice's orders (1..pmax + 1): int8 (one byte per edge and
    cell) unless pmax is above 126."""
    return np.int8 if pmax < 127 else np.int16


@dataclass(frozen=True)
class Advice:
    """Frequency limits per order and the advice at the upper frequency.

    limit_rows : (n_rows, pmax) float32 (:data:`LIMIT_DTYPE`) highest usable frequency
        per order p = 1..pmax (non-decreasing in p), Hz, of every cell (``limit_row``
        None) or of every limit row: cells share the row of their longest edge (about
        half as many rows as cells in a tetrahedral mesh); see :attr:`cell_limit`.
    limit_row : (n_cells,) integer row of every cell in ``limit_rows``, or None.
    cell_size : (n_cells,) float32 (:data:`SIZE_DTYPE`) longest edge of each cell, m.
    cell_distance : (n_cells,) propagation distance L used, m.
    cell_speed : (n_cells,) sound speed, m/s.
    edge_limit : (n_e,) float32 (:data:`LIMIT_DTYPE`) highest usable frequency of each
        edge at the allowed order, Hz; None when not kept (the audit's, see
        :func:`advise`).
    edge_order : (n_e,) lowest order meeting the target at ``fmax`` (pmax+1 = none),
        int8 (:func:`order_dtype`; cast before arithmetic that may exceed it).
    cell_order : (n_cells,) the same per cell.
    target_size : (n_cells,) float32 (:data:`SIZE_DTYPE`) largest edge length meeting
        the target at ``fmax`` with the allowed order, m.
    refine, coarsen : (n_cells,) bool.
    signed_off : highest frequency every cell carries at the allowed order, Hz.
    edge_flow_factor : (n_e,) worst-case mean-flow factor on each edge's wavenumber
        (>= 1), or None without flow.
    """

    settings: AdviceSettings
    fmax: float
    limit_rows: np.ndarray
    cell_size: np.ndarray
    cell_distance: np.ndarray
    cell_speed: np.ndarray
    edge_limit: np.ndarray | None
    edge_order: np.ndarray
    cell_order: np.ndarray
    target_size: np.ndarray
    refine: np.ndarray
    coarsen: np.ndarray
    edge_flow_factor: np.ndarray | None = None
    limit_row: np.ndarray | None = None

    @property
    def pmax(self) -> int:
        return self.limit_rows.shape[1]

    @property
    def cell_limit(self) -> np.ndarray:
        """(n_cells, pmax) float32 highest usable frequency per cell and order p =
        1..pmax, Hz (a new (n_cells, pmax) array when cells share rows: prefer
        :meth:`limit_at` and :attr:`limit_rows` on large meshes)."""
        if self.limit_row is None:
            return self.limit_rows
        return self.limit_rows[self.limit_row]

    def limit_at(self, p: int, dtype=None) -> np.ndarray:
        """(n_cells,) highest usable frequency of every cell at order p (1-based), Hz
        (float64, or ``dtype``: a new array)."""
        if self.limit_row is None:
            return self.limit_rows[:, p - 1].astype(np.float64 if dtype is None else dtype)
        out = np.empty(len(self.limit_row), np.float64 if dtype is None else dtype)
        # the column made contiguous (and cast) first: the gather's random reads then stay
        # in a table of n_rows values (9 MB at 5M cells in float32) instead of whole rows;
        # gathered a chunk at a time: np.take casts int32 indices to intp and buffers its
        # output when it checks bounds (54 MiB of scratch at 4.8M cells for float32)
        col = np.ascontiguousarray(self.limit_rows[:, p - 1], dtype=out.dtype)
        return _take(col, self.limit_row, out)

    def lowest_cell(self, p: int) -> int:
        """The first cell with the lowest limit at order p (1-based): ``np.argmin`` of
        :meth:`limit_at` (the first NaN, if any), found on the rows (no per-cell array)."""
        col = self.limit_rows[:, p - 1]
        if self.limit_row is None:
            return int(np.argmin(col))
        low = col.dtype.type(self.mesh_limit[p - 1])  # the column's minimum (NaN: a NaN)
        low = np.isnan(col) if low != low else col == low
        rows = np.flatnonzero(low)
        index = self.limit_row
        # the first cell using one of the lowest rows, a piece of the cells at a time
        # (it is usually found early, and no (n_cells,) temporary is made); a few rows
        # (the usual case) by comparisons instead of a gather (4.77M cells: 30 -> 4 ms)
        for lo in range(0, len(index), LOWEST_PIECE):
            part = index[lo:lo + LOWEST_PIECE]
            if len(rows) > 4:
                hit = low[part]
            else:
                hit = part == rows[0]
                for r in rows[1:]:
                    hit |= part == r
            if hit.any():
                return lo + int(np.argmax(hit))
        return 0

    @cached_property
    def mesh_limit(self) -> np.ndarray:
        """(pmax,) highest usable frequency of the whole mesh per order, Hz (computed once;
        read-only).  Every limit row belongs to a cell."""
        out = (column_min(self.limit_rows).astype(np.float64) if len(self.cell_size) and
               len(self.limit_rows) else np.zeros(self.pmax))
        out.setflags(write=False)
        return out

    @property
    def signed_off(self) -> float:
        return float(self.mesh_limit[self.settings.allowed_order - 1])

    def region_limit(self, region: np.ndarray) -> dict[int, np.ndarray]:
        """Region tag -> (pmax,) float64 highest usable frequency per order, Hz."""
        if len(region) and region.strides == (0,) and len(self.cell_size) == len(region):
            return {int(region[0]): np.array(self.mesh_limit)}  # one region: the mesh's
        mins = _region_mins(self.limit_rows, self.limit_row, region)
        return {tag: np.asarray(lim, np.float64) for tag, lim in mins.items()}

    @property
    def coarsen_ratio(self) -> np.ndarray:
        """(n_cells,) target size / current longest edge (above 1: could be coarser)."""
        return self.target_size / self.cell_size


#: cells :meth:`Advice.lowest_cell` looks at a time
LOWEST_PIECE = 1 << 16


def _region_mins(rows: np.ndarray, index: np.ndarray | None, region: np.ndarray) -> dict:
    """:meth:`Advice.region_limit` in the limits' own type."""
    runs = region_runs(region)
    if runs is not None and len(runs) == 1 and len(region):
        # one region: the minimum over all rows (each row belongs to a cell)
        return {tag: column_min(rows) for tag in runs}
    if index is not None:
        return _region_limit_rows(rows, index, region, runs)
    if runs is not None:  # regions in a few runs of cells: minima over views
        return {tag: np.minimum.reduce([column_min(rows[lo:hi]) for lo, hi in r])
                for tag, r in runs.items()}
    return {int(tag): column_min(rows[region == tag]) for tag in np.unique(region)}


def _region_limit_rows(rows: np.ndarray, index: np.ndarray, region: np.ndarray,
                       runs: dict | None) -> dict[int, np.ndarray]:
    """:meth:`Advice.region_limit` over shared rows ``rows`` (n_rows, pmax), cell i using
    row index[i]: the minimum over the rows of each region's cells (compiled, one pass
    over the cells; no (cells, pmax) copy).  ``runs``: :func:`region_runs` of region."""
    from .kernels import advice as _ka

    if runs is None:
        runs = {int(tag): [np.flatnonzero(region == tag)] for tag in np.unique(region)}
    out = {}
    for tag, parts in runs.items():
        m = np.full(rows.shape[1], np.inf)
        for part in parts:
            if isinstance(part, np.ndarray):  # scattered cells: their rows gathered
                _ka.row_min(rows, np.ascontiguousarray(index[part]), 0, len(part), m)
            else:
                _ka.row_min(rows, index, part[0], part[1], m)
        out[tag] = m
    return out


def column_min(a: np.ndarray, block: int = 256) -> np.ndarray:
    """``a.min(axis=0)`` of a C-ordered (n, w) array, n >= 1 (NaN propagates), through
    (n / block, block * w) views whose reductions run along long contiguous rows:
    about 5x faster than numpy's row-by-row reduction for w = 12 (0.17 -> 0.03 s on
    4.8M rows)."""
    n, w = a.shape
    m = n // block * block
    if not m:
        return a.min(axis=0)
    out = np.ascontiguousarray(a[:m]).reshape(-1, block * w).min(axis=0)
    out = out.reshape(block, w).min(axis=0)
    return np.minimum(out, a[m:].min(axis=0)) if m < n else out


def region_runs(region: np.ndarray, max_runs: int = 256) -> dict[int, list] | None:
    """Region tag -> [(lo, hi), ...] the runs of consecutive cells carrying it, in cell
    order (tags ascending), when the (n_cells,) int64 tags form at most ``max_runs`` runs
    (cells are usually grouped by region); None otherwise.  ``np.concatenate`` of
    ``x[lo:hi]`` over a tag's runs equals ``x[region == tag]``."""
    region = np.asarray(region)
    if not len(region):
        return {}
    if region.strides == (0,):  # one tag, held as a broadcast
        return {int(region[0]): [(0, len(region))]}
    cuts = np.flatnonzero(region[1:] != region[:-1]) + 1
    if len(cuts) >= max_runs:
        return None
    starts = np.concatenate([[0], cuts]).tolist()
    ends = np.concatenate([cuts, [len(region)]]).tolist()
    out: dict[int, list] = {}
    for lo, hi in zip(starts, ends):
        out.setdefault(int(region[lo]), []).append((lo, hi))
    return dict(sorted(out.items()))


def _uniform(x: np.ndarray) -> bool:
    """Whether every value of the non-empty (n,) array x equals the first (NaN: never),
    without a pass for a broadcast of one value."""
    if x.strides == (0,):
        return bool(x[0] == x[0])
    return bool(np.all(x == x[0]))


def _edge_values(topo: Topology, cell_values: np.ndarray, reduce) -> np.ndarray:
    """(n_e,) reduction of a cell quantity over the cells of every edge; one value on all
    cells gives a read-only broadcast of it (no (n_e,) array)."""
    if len(cell_values) and _uniform(cell_values):
        return np.broadcast_to(cell_values[:1], (len(topo.edges),))
    return topo.edges.from_cells(cell_values, reduce)


def _governing_edges(topo: Topology, h, edge_c, edge_L):
    """Per cell, the edge whose limit is the cell's limit at every order, and the cells
    for which that shortcut does not hold and the minimum is taken edge by edge.

    With one speed and one distance on all edges of a cell, an edge's limit
    f = c (kh)_max(L/h) / (2 pi h) decreases with h, so the longest edge governs
    at every order.  Cells whose edges differ in c or L are listed as exact.
    """
    govs, exact = [], []
    uniform = (np.ptp(edge_c) == 0 if len(edge_c) else True) and \
        (np.ptp(edge_L) == 0 if len(edge_L) else True)
    start = 0
    for ce in topo.edges.cell_edges:
        hl = h[ce]
        govs.append(ce[np.arange(len(ce)), np.argmax(hl, axis=1)])
        if not uniform:
            cl, ll = edge_c[ce], edge_L[ce]
            odd = (cl.min(1) != cl.max(1)) | (ll.min(1) != ll.max(1)) | ~np.isfinite(hl).all(1)
            exact.append(np.flatnonzero(odd) + start)
        start += len(ce)
    gov = np.concatenate(govs) if govs else np.zeros(0, np.int64)
    ex = np.concatenate(exact) if exact else np.zeros(0, np.int64)
    return gov, ex


def _min_over_cell_edges(topo: Topology, values, cells) -> np.ndarray:
    """Minimum of an edge quantity over the edges of the given global cells."""
    out = np.empty(len(cells))
    offs = np.concatenate([[0], np.cumsum([len(ce) for ce in topo.edges.cell_edges])])
    for b, ce in enumerate(topo.edges.cell_edges):
        sel = (cells >= offs[b]) & (cells < offs[b + 1])
        if sel.any():
            out[sel] = values[ce[cells[sel] - offs[b]]].min(axis=1)
    return out


#: 3D correction of the 1D model, fitted to NGSolve solves (docs/validation.md, regenerated
#: by benchmarks/validation_study.py).  The model is applied to an edge of length h as if
#: its elements were ``a * h`` long.  Per order p = 1..8 (higher orders continue the step
#: from 7 to 8) and per target (1 % and 5 %; log-linear in the target between them,
#: continued down to 0.1 %, the 5 % values above 5 %): ``a = a_free + w (a_aligned - a_free)``
#:
#: * a_free: fitted on unstructured meshes (cells in every orientation; gmsh), whose
#:   alignment s (below) is s_free;
#: * a_aligned: fitted on meshes whose cells' longest edges are all parallel (bricks
#:   split into 6 tetrahedra around one diagonal, or into 2 wedges), s = 1;
#: * s in [0, 1]: alignment of the cells' longest edges over the mesh (see
#:   :func:`_alignment`), w = max(0, s - s_free) / (1 - s_free).
#:
#: Each value is the largest factor fitted over the calibration meshes of its kind (worst of
#: 26 plane waves), rounded up to 0.01; orders 5 and 7 interpolated (hexahedra: 7 and 8
#: repeat 6).  Tetrahedra: every edge; wedges: the triangle edges (the edges joining the
#: triangles take the hexahedron values); hexahedra (structured: free = aligned).  Pyramids
#: and 2D cells keep 1 (not measured).
SIZE_FACTOR_TABLE = {  # key: (s_free, {target: (a_free, a_aligned), per order p = 1..8})
    "tetra": (0.08, {
        0.01: ((0.58, 0.63, 0.64, 0.66, 0.68, 0.69, 0.71, 0.72),
               (0.86, 0.76, 0.77, 0.78, 0.80, 0.81, 0.82, 0.83)),
        0.05: ((0.49, 0.58, 0.62, 0.63, 0.66, 0.68, 0.70, 0.71),
               (0.72, 0.70, 0.74, 0.75, 0.77, 0.79, 0.80, 0.81))}),
    "wedge": (0.10, {
        0.01: ((0.60, 0.73, 0.74, 0.76, 0.78, 0.79, 0.80, 0.81),
               (0.90, 0.84, 0.87, 0.88, 0.89, 0.90, 0.91, 0.91)),
        0.05: ((0.50, 0.65, 0.70, 0.72, 0.74, 0.76, 0.78, 0.79),
               (0.74, 0.76, 0.83, 0.84, 0.85, 0.86, 0.87, 0.88))}),
    "hexahedron": (0.0, {
        0.01: ((0.78, 1.02, 1.01, 1.01, 1.01, 1.01, 1.01, 1.01),) * 2,
        0.05: ((0.68, 0.90, 0.95, 0.95, 0.96, 0.96, 0.96, 0.96),) * 2}),
}
# cell type -> ((local edges, table key), ...), the local edges whose longest gives the
# cell's direction, and the dimension of the isotropic baseline (3D, or the triangle's plane)
_CORRECTED_EDGES = {
    "tetra": (((slice(0, 6), "tetra"),), slice(0, 6), 3),
    "wedge": (((slice(0, 6), "wedge"), (slice(6, 9), "hexahedron")), slice(0, 3), 2),
    "hexahedron": (((slice(0, 12), "hexahedron"),), slice(0, 12), 3),
}


@dataclass(frozen=True)
class SizeCorrection:
    """Effective-size factors of the 3D correction, edge by edge and order by order.

    classes : per table key, ((n_e,) bool edges it applies to, (pmax,) factors).
    touched_plain : (n_e,) bool edges of cells or local edges without correction (a = 1).
    mixed : global ids of cells whose edges can carry different factors.
    alignment : table key -> s (see :func:`_alignment`).
    """

    classes: tuple
    touched_plain: np.ndarray
    mixed: np.ndarray
    alignment: dict

    def at(self, p: int, edges=None) -> np.ndarray:
        """(n_e,) factor of every edge at order p (the largest over its cells), or of the
        edges ``edges`` (ids) only."""
        pick = (lambda x: x) if edges is None else (lambda x: x[edges])
        out = np.where(pick(self.touched_plain), 1.0, 0.0)
        for touched, a in self.classes:
            np.maximum(out, np.where(pick(touched), a[p - 1], 0.0), out=out)
        return out


def _longest_edges(mesh: Mesh, topo: Topology) -> np.ndarray:
    """(n_cells,) the longest edge of every cell (np.argmax over its edges: the first
    maximum, the first NaN), by the compiled kernel, in 4-byte ids when they fit."""
    from .kernels import advice as _ka

    n_cells, n_e = mesh.n_cells, len(topo.edges)
    gov = np.empty(n_cells, np.int32 if max(n_cells, n_e) < 2 ** 31 - 1 else np.int64)
    h = np.ascontiguousarray(topo.edges.length, dtype=float)
    par = n_e > 100_000
    for ce, off in zip(topo.edges.cell_edges, mesh.block_offsets):
        ce = np.ascontiguousarray(ce)
        thread_map(lambda r, ce=ce, off=off: _ka.governing_edges(ce, r[0], r[1], h, gov,
                                                                 int(off)),
                   pieces(len(ce), par), parallel=par)
    return gov


def _alignment(mesh: Mesh, topo: Topology, kind: str, gov: np.ndarray | None = None) -> float:
    """s in [0, 1] from the largest eigenvalue lam of mean(d d^T), d the unit direction of
    each cell's longest edge (wedges: of its first triangle): s = (n lam - 1) / (n - 1),
    n = 3 (tetrahedra) or 2 (wedge triangles), clipped; 0 = isotropic, 1 = all parallel."""
    _, edges, n = _CORRECTED_EDGES[kind]
    T, count = np.zeros((3, 3)), 0
    compiled = kernels.use_compiled(mesh.n_cells)
    for b, ce, off in zip(mesh.blocks, topo.edges.cell_edges, mesh.block_offsets):
        if b.info.linear != kind or not len(ce):
            continue
        if compiled:  # the same sum, one pass over the cells, no (n, 3) directions
            from .kernels import advice as _ka
            c0, c1, _ = edges.indices(ce.shape[1])
            ce = np.ascontiguousarray(ce)
            cells = np.ascontiguousarray(b.cells)
            local = np.ascontiguousarray(b.info.edges[:, :2], dtype=np.int64)
            pts = np.ascontiguousarray(mesh.points, dtype=float)

            off = int(off)
            known = gov is not None and (c0, c1) == (0, ce.shape[1])  # every edge counts

            def part(r):  # a chunk of the cells on each core, its own 3x3 sum
                Tr = np.zeros((3, 3))
                if known:  # the same directions and sums from the known longest edges
                    m = _ka.gov_directions(gov, off + r[0], off + r[1], topo.edges.nodes,
                                           pts, Tr)
                else:
                    m = _ka.longest_directions(ce[r[0]:r[1]], c0, c1, topo.edges.length,
                                               cells[r[0]:r[1]], local, pts, Tr)
                return Tr, m

            ranges = _chunks(len(ce), 2 if len(ce) > 100_000 else 1)
            for Tr, m in thread_map(part, ranges, parallel=len(ranges) > 1):
                T += Tr
                count += m
            continue
        ce = ce[:, edges]
        e = ce[np.arange(len(ce)), np.argmax(topo.edges.length[ce], axis=1)]
        d = mesh.points[topo.edges.nodes[e, 1]] - mesh.points[topo.edges.nodes[e, 0]]
        d = d[np.all(np.isfinite(d), axis=1)]
        d /= np.maximum(np.linalg.norm(d, axis=1), 1e-300)[:, None]
        T += d.T @ d
        count += len(d)
    if not count:
        return 0.0
    lam = float(np.linalg.eigvalsh(T / count)[-1])
    return float(np.clip((n * lam - 1.0) / (n - 1.0), 0.0, 1.0))


def _per_order(a, pmax: int) -> np.ndarray:
    """(pmax,) table values for p = 1..pmax, the last step continued, capped at 1.1."""
    a = np.asarray(a, float)
    p = np.arange(1, pmax + 1)
    last = a[-1] + (p - len(a)) * (a[-1] - a[-2])
    return np.minimum(1.1, np.where(p <= len(a), a[np.minimum(p, len(a)) - 1], last))


def _free_and_aligned(entry, pmax: int, target: float) -> tuple[np.ndarray, np.ndarray]:
    """(pmax,) a_free and a_aligned of a table entry at ``target``: log-linear in the
    target between the fitted ones, continued down to 0.1 %, held above 5 %."""
    _, rows = entry
    t1, t5 = sorted(rows)
    w_t = np.clip(np.log(target / t1) / np.log(t5 / t1), np.log(1e-3 / t1) / np.log(t5 / t1),
                  1.0)
    return tuple((1 - w_t) * _per_order(rows[t1][i], pmax) + w_t * _per_order(rows[t5][i], pmax)
                 for i in (0, 1))


def kind_factors(kind: str, pmax: int, target: float, alignment: float = 0.0,
                 table: dict | None = None) -> np.ndarray:
    """(pmax,) factor a per order p = 1..pmax of the cells of one table kind
    ("tetra", "wedge", "hexahedron") at a mesh alignment s (0 = isotropic, the
    unstructured meshes of the fit; see :func:`size_correction`); ones for a kind
    without a row."""
    table = SIZE_FACTOR_TABLE if table is None else table
    if kind not in table:
        return np.ones(pmax)
    free, aligned = _free_and_aligned(table[kind], pmax, target)
    s_free = table[kind][0]
    w = max(0.0, alignment - s_free) / (1.0 - s_free)
    return free + w * (aligned - free)


def cell_factors(mesh: Mesh, topo: Topology, order: int, settings: "AdviceSettings",
                 pmax: int | None = None) -> np.ndarray:
    """(n_cells,) factor a of every cell at ``order`` as the advice applies it (the
    largest over the cell's edges; ones for the plain 1D model)."""
    if not settings.correction_3d:
        return np.ones(mesh.n_cells)
    corr = size_correction(mesh, topo, max(order, pmax or order), settings.target)
    return topo.edges.per_cell(corr.at(order), np.maximum)


def size_correction(mesh: Mesh, topo: Topology, pmax: int, target: float,
                    table: dict | None = None, gov: np.ndarray | None = None) -> SizeCorrection:
    """The 3D correction for a mesh and an accuracy target (relative error).

    table : None = SIZE_FACTOR_TABLE, {} = none (every factor 1, the plain 1D model).
    gov : optional (n_cells,) longest edge of every cell (:func:`_longest_edges`), which
        the alignment of cells whose every edge counts then reads instead of finding it.
    """
    table = SIZE_FACTOR_TABLE if table is None else table
    n_e = len(topo.edges)
    plain = np.zeros(n_e, bool)
    touched = {k: np.zeros(n_e, bool) for k in table}
    mixed = []
    for b, ce, off in zip(mesh.blocks, topo.edges.cell_edges, mesh.block_offsets):
        # cell kinds without a row (pyramids, 2D cells): all their edges keep a = 1
        groups = _CORRECTED_EDGES.get(b.info.linear, (((slice(None), None),),))[0]
        sources = set()
        for sl, key in groups:
            hit = touched[key] if key in touched else plain
            if len(mesh.blocks) == 1 and len(groups) == 1 and \
                    sl.indices(ce.shape[1]) == (0, ce.shape[1], 1):
                hit[:] = True  # one block, all its local edges: every edge (no scatter)
            else:
                hit[ce[:, sl].ravel()] = True
            sources.add(key if key in touched else None)
        if len(sources) > 1:
            mixed.append(off + np.arange(len(ce)))
    classes, align = [], {}
    for key, t in touched.items():
        if not t.any():
            continue
        free, aligned = _free_and_aligned(table[key], pmax, target)
        align[key] = _alignment(mesh, topo, key, gov) if np.any(free != aligned) else 0.0
        classes.append((t, kind_factors(key, pmax, target, align[key], table)))
    if len(classes) > 1 or (classes and plain.any()):
        # an edge of two kinds (e.g. tetrahedra next to a hexahedron) takes the larger factor
        kinds = plain.astype(np.int64) + sum(t.astype(np.int64) for t, _ in classes)
        mixed.append(np.flatnonzero(topo.edges.per_cell(kinds > 1, np.maximum)))
    mixed = np.unique(np.concatenate(mixed)) if mixed else np.zeros(0, np.int64)
    return SizeCorrection(tuple(classes), plain, mixed.astype(np.int64), align)


def advise(mesh: Mesh, topo: Topology, cell_speed: np.ndarray, fmax: float,
           settings: AdviceSettings = AdviceSettings(), pmax: int = 12,
           cell_mach: np.ndarray | None = None, edge_limits: bool = True) -> Advice:
    """Frequency limits per edge, cell and order, and the advice at ``fmax`` (Hz).

    cell_speed : (n_cells,) sound speed of the medium of every cell, m/s.
    pmax : highest order tabulated (at least ``settings.max_order``).
    cell_mach : optional (n_cells, 3) uniform mean-flow Mach vector of every cell; an
        edge's wavenumber is multiplied by the worst-case projection factor of
        :func:`meshcheck.flow.edge_flow_factor` (its speed divided by it).
    edge_limits : keep ``Advice.edge_limit`` (False: None; the audit, whose reports do
        not use it, saves its (n_e,) float32, 22 MiB at 4.8M tetrahedra).
    With ``settings.correction_3d`` (the default) the model sees every edge as
    ``a * length`` (:func:`size_correction`); ``cell_size`` stays the true longest
    edge and ``target_size`` is a true edge length.
    """
    adv = _advise(mesh, topo, cell_speed, fmax, settings, pmax, cell_mach, edge_limits)
    if not edge_limits and adv.edge_limit is not None:
        from dataclasses import replace
        adv = replace(adv, edge_limit=None)
    return adv


def _advise(mesh: Mesh, topo: Topology, cell_speed: np.ndarray, fmax: float,
            settings: AdviceSettings, pmax: int, cell_mach: np.ndarray | None,
            edge_limits: bool) -> Advice:
    """:func:`advise` (the compiled path makes ``Advice.edge_limit`` only if asked)."""
    if not fmax > 0:
        raise SettingsError(f"upper frequency {fmax} Hz must be positive")
    pmax = max(pmax, settings.max_order)
    table = usable_kh(settings.target, pmax)
    cell_speed = np.asarray(cell_speed, dtype=float)
    if settings.distance is not None:
        cell_L = np.full(mesh.n_cells, float(settings.distance))
    else:
        cell_L = topo.cell_extent()
    h = topo.edges.length
    # compiled: every cell's longest edge first; the size correction's alignment reads it
    gov = _longest_edges(mesh, topo) if kernels.use_compiled(mesh.n_cells) else None
    corr = size_correction(mesh, topo, pmax, settings.target,
                           None if settings.correction_3d else {}, gov=gov)
    edge_c = _edge_values(topo, cell_speed, np.minimum)
    flow = None
    if cell_mach is not None and np.any(cell_mach):
        from .flow import edge_flow_factor
        flow = edge_flow_factor(mesh.points, topo.edges, cell_mach)
        edge_c = edge_c / flow  # wavenumber k * phi on the edge = speed c / phi
    edge_L = _edge_values(topo, cell_L, np.maximum)
    n_cells = mesh.n_cells
    P = settings.allowed_order
    if kernels.use_compiled(n_cells):
        return _advise_compiled(mesh, topo, settings, fmax, pmax, table, cell_speed, cell_L,
                                h, corr, edge_c, edge_L, flow, edge_limits, gov)
    good = np.isfinite(h) & (h > 0) & np.isfinite(edge_L) & np.isfinite(edge_c)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(good, edge_L / np.where(good, h, 1.0), 1.0)
    if not np.all(ratio > 0):  # also False for NaN
        raise SettingsError("L/h ratios must be > 0")  # as UsableKh.max_kh
    log_ratio = np.log(ratio)  # ln(L / (a h)) = ln(L / h) - ln a: one logarithm per edge
    cell_limit = np.empty((n_cells, pmax))
    edge_order = np.full(len(h), pmax + 1, dtype=order_dtype(pmax))
    edge_limit = None
    gov, exact = _governing_edges(topo, h, edge_c, edge_L)
    exact = np.union1d(exact, corr.mixed)  # cells whose edges may differ in factor

    def order_limits(p: int):
        """Fill column p of the cell limits; (edges carrying fmax, edge limits if p = P)."""
        a = corr.at(p)  # the model sees the edge as a * h: a row of L / (a h) elements
        with np.errstate(divide="ignore", invalid="ignore"):
            f_e = np.where(good, edge_c * table.max_kh_log(p, log_ratio - np.log(a)) /
                           (TWO_PI * h * a), 0.0)
        cell_limit[:, p - 1] = f_e[gov]
        if len(exact):
            cell_limit[exact, p - 1] = _min_over_cell_edges(topo, f_e, exact)
        return f_e >= fmax, (f_e if p == P else None)

    # orders are independent (each fills its own column): on the cores for large meshes
    for p, (carries, f_e) in enumerate(thread_map(order_limits, range(1, pmax + 1),
                                                  parallel=len(h) > 100_000), start=1):
        edge_order[(edge_order > pmax) & carries] = p
        if f_e is not None:
            edge_limit = f_e.astype(LIMIT_DTYPE)
    cell_limit = cell_limit.astype(LIMIT_DTYPE)  # stored as the compiled path stores them
    np.maximum.accumulate(cell_limit, axis=1, out=cell_limit)
    fmax = np.float64(fmax)  # compared in float64 (a Python float would be cast to float32)
    cell_order = (1 + np.count_nonzero(cell_limit < fmax, axis=1)).astype(order_dtype(pmax))
    cell_size = topo.edges.per_cell(h, np.maximum)
    k = TWO_PI * fmax / cell_speed
    if flow is not None:
        k = k * topo.edges.per_cell(flow, np.maximum)
    target_size = table.max_size(P, k, cell_L) / topo.edges.per_cell(corr.at(P), np.maximum)
    refine = cell_limit[:, P - 1] < fmax
    with np.errstate(divide="ignore", invalid="ignore"):
        coarsen = target_size >= settings.coarsen_factor * cell_size
    # decided in float64, kept in float32 (as the compiled path keeps them)
    cell_size, target_size = cell_size.astype(SIZE_DTYPE), target_size.astype(SIZE_DTYPE)
    return Advice(settings, float(fmax), cell_limit, cell_size, cell_L, cell_speed,
                  edge_limit, edge_order, cell_order, target_size, refine, coarsen, flow)


def _advise_compiled(mesh, topo, settings, fmax, pmax, table, cell_speed, cell_L, h, corr,
                     edge_c, edge_L, flow, edge_limits: bool = True, gov=None) -> Advice:
    """The tail of :func:`advise` with the kernels of :mod:`meshcheck.kernels.advice`:
    the same arrays as the numpy code (one pass over the cells, one over the edges;
    the edges' L / h and whether they are good are worked out in the kernels)."""
    from .kernels import advice as _ka

    P = settings.allowed_order
    n_cells, n_e = mesh.n_cells, len(h)
    blocks = [np.ascontiguousarray(ce) for ce in topo.edges.cell_edges]
    offs = mesh.block_offsets
    h = np.ascontiguousarray(h, dtype=float)
    # a uniform speed or distance stays a broadcast scalar (stride 0)
    c = edge_c if edge_c.strides == (0,) else np.ascontiguousarray(edge_c, dtype=float)
    L = edge_L if edge_L.strides == (0,) else np.ascontiguousarray(edge_L, dtype=float)
    # the governing (longest) edge of every cell; cells whose edges differ in c or L, or
    # in size factor, take the minimum over their edges
    # cell and edge ids in 4 bytes when they fit (gov and owner are scratch arrays)
    id_type = np.int32 if max(n_cells, n_e) < 2 ** 31 - 1 else np.int64
    odd = np.zeros(n_cells, bool)
    uniform = not n_e or (_uniform(c) and _uniform(L))
    par = n_e > 100_000
    if gov is None:
        gov = _longest_edges(mesh, topo)
    for ce, off in zip(blocks, offs):
        if not uniform:
            _ka.odd_cells(ce, h, c, L, odd, int(off))
    exact = sorted_distinct(np.concatenate((np.flatnonzero(odd), corr.mixed)))  # union1d
    # size factors: code = bit 0 plain, bit j + 1 class j; A[code] = their maximum
    code = corr.touched_plain.astype(np.uint8)  # (at most 3 classes: 4 bits)
    A = np.zeros((1 << (1 + len(corr.classes)), pmax))
    for j, (touched, _) in enumerate(corr.classes):
        code |= touched.astype(np.uint8) << np.uint8(j + 1)
    for row in range(len(A)):  # as SizeCorrection.at: plain 1, classes their factor
        A[row] = np.where(row & 1, 1.0, 0.0)
        for j, (_, a) in enumerate(corr.classes):
            np.maximum(A[row], np.where((row >> (j + 1)) & 1, a[:pmax], 0.0), out=A[row])
    segs = [_segments(table.t_max[p]) for p in range(pmax)]
    base = np.ascontiguousarray([s[0] for s in segs], dtype=float)
    step = np.ascontiguousarray([s[1] for s in segs], dtype=float)
    n_r = table.log_r.size
    scale, top = float((n_r - 1) / table.log_r[-1]), float(n_r - 1)
    with np.errstate(divide="ignore"):  # rows of codes no edge has are 0
        logA = np.log(A)
    args = (h, c, L, code, A, logA, base, step, scale, top)
    cell_order = np.empty(n_cells, order_dtype(pmax))
    refine = np.empty(n_cells, bool)
    edge_order = np.empty(n_e, order_dtype(pmax))
    edge_limit = np.empty(n_e if edge_limits else 0, LIMIT_DTYPE)  # empty: not written

    # the limits at every order of the cells' longest edges (about half the edges, each
    # shared by about two cells), computed once per edge with the edges' orders into one
    # row per such edge, which its cells share; with no cell taking the minimum over its
    # edges the rows are finished (running maximum, orders) there too.  Cells taking the
    # minimum get rows of their own, after the shared ones.
    owner = np.full(n_e, -1, id_type)
    skip = np.zeros(n_cells if len(exact) else 0, bool)
    skip[exact] = True
    n_shared = _ka.mark_rows(gov, skip, owner)
    del skip
    n_rows = n_shared + len(exact)
    limit_rows = np.empty((n_rows, pmax), LIMIT_DTYPE)
    row_order = np.empty(n_rows, order_dtype(pmax))
    row_refine = np.empty(n_rows, bool)
    finish = not len(exact)

    def edges(r):
        return _ka.edge_orders(r[0], r[1], *args, float(fmax), P, edge_order, edge_limit,
                               owner, limit_rows, finish, row_order, row_refine)

    if sum(thread_map(edges, pieces(n_e, par), parallel=par)):
        raise SettingsError("L/h ratios must be > 0")  # as UsableKh.max_kh
    # every cell's row, longest edge and size factor
    limit_row = np.empty(n_cells, id_type if n_rows < 2 ** 31 - 1 else np.int64)
    one_size = flow is None and n_cells and _uniform(cell_speed) and \
        _uniform(cell_L)  # one wavenumber and one distance: one model size
    if one_size and not len(corr.mixed):
        # the sizes, targets and coarsening decided in the same pass, in float64, and
        # kept in float32 (no (n_cells,) float64 array)
        size = table.max_size(P, TWO_PI * fmax / cell_speed[:1], cell_L[:1])[0]
        cell_size, target_size = np.empty(n_cells, SIZE_DTYPE), np.empty(n_cells, SIZE_DTYPE)
        coarsen = np.empty(n_cells, bool)
        a_col = np.ascontiguousarray(A[:, P - 1])
        thread_map(lambda r: _ka.gov_sizes(gov, owner, r[0], r[1], limit_row, h, code, a_col,
                                           float(size), float(settings.coarsen_factor),
                                           finish, row_order, row_refine, cell_order, refine,
                                           cell_size, target_size, coarsen),
                   pieces(n_cells, par), parallel=par)
        code_gov = None
    else:
        cell_size, code_gov = np.empty(n_cells), np.empty(n_cells, np.uint8)
        thread_map(lambda r: _ka.gov_index(gov, owner, r[0], r[1], limit_row, h, code,
                                           cell_size, code_gov, finish, row_order, row_refine,
                                           cell_order, refine),
                   pieces(n_cells, par), parallel=par)
    owner = gov = None  # freed (names the kernels' closures above read stay bound)
    if not finish:
        limit_row[exact] = np.arange(n_shared, n_rows)
        for ce, lo, hi in zip(blocks, offs[:-1], offs[1:]):
            sel = (exact >= lo) & (exact < hi)
            if sel.any():
                _ka.exact_rows(ce, exact[sel] - lo, np.flatnonzero(sel) + n_shared, *args,
                               limit_rows)
        thread_map(lambda r: _ka.finish_limits(limit_rows, r[0], r[1], float(fmax), P,
                                               row_order, row_refine),
                   pieces(n_rows, par), parallel=par)
        np.take(row_order, limit_row, out=cell_order)
        np.take(row_refine, limit_row, out=refine)

    def cell_max(values):
        out = np.empty(n_cells)
        v = np.ascontiguousarray(values, dtype=float)
        for ce, off in zip(blocks, offs):
            _ka.per_cell_max(ce, v, out, int(off))
        return out

    if code_gov is None:  # sizes, targets and coarsening made by gov_sizes
        return Advice(settings, float(fmax), limit_rows, cell_size, cell_L, cell_speed,
                      edge_limit if edge_limits else None, edge_order, cell_order,
                      target_size, refine, coarsen, flow, limit_row)
    # cell_size = h[gov], the longest edge (NaN if one is NaN, like np.maximum)
    if one_size:
        # one wavenumber and one distance: one size for all cells (elementwise the same)
        size = table.max_size(P, TWO_PI * fmax / cell_speed[:1], cell_L[:1])[0]
    else:
        k = TWO_PI * fmax / cell_speed
        if flow is not None:
            k = k * cell_max(flow)
        size = table.max_size(P, k, cell_L)
        del k
    if len(corr.mixed):
        a_cell = cell_max(corr.at(P))
    else:  # all edges of a cell carry one factor: its longest edge's, A[code[gov], P - 1]
        a_cell = np.empty(n_cells)
        _ka.lookup(np.ascontiguousarray(A[:, P - 1]), code_gov, a_cell)
    code_gov = None
    target64 = np.divide(size, a_cell, out=a_cell)  # the factors' buffer (no third array)
    size = a_cell = None
    # decided in float64, kept in float32 (SIZE_DTYPE: 36 MiB less at 4.77M cells); the
    # sizes narrowed first, then their buffer holds the sizes x factor
    kept_size = cell_size.astype(SIZE_DTYPE)
    with np.errstate(divide="ignore", invalid="ignore"):
        coarsen = target64 >= np.multiply(cell_size, settings.coarsen_factor, out=cell_size)
    del cell_size
    cell_size, target_size = kept_size, target64.astype(SIZE_DTYPE)
    del target64
    return Advice(settings, float(fmax), limit_rows, cell_size, cell_L, cell_speed,
                  edge_limit if edge_limits else None, edge_order, cell_order, target_size,
                  refine, coarsen, flow, limit_row)


@dataclass(frozen=True)
class Sweep:
    """Advice over a list of frequencies.

    frequencies : (n_f,) Hz.
    order_counts : (n_f, pmax + 1) cells needing order p = 1..pmax, last column
        = cells that no order up to pmax carries.
    ready : (n_f,) bool, every cell carries the frequency at the allowed order.
    dofs : (n_f,) int64 unknowns: variable order -> condensed hierarchical count
        with advised orders; fixed order -> Lagrange count of that order.
    condensed_fixed : condensed hierarchical count at the fixed order (fixed mode).
    """

    frequencies: np.ndarray
    order_counts: np.ndarray
    ready: np.ndarray
    dofs: np.ndarray
    condensed_fixed: int | None = None


def sweep(mesh: Mesh, topo: Topology, advice: Advice, frequencies: np.ndarray) -> Sweep:
    """Order histogram, readiness and unknowns per frequency (binning, no loop over f)."""
    f = np.asarray(frequencies, dtype=float)
    s = advice.settings
    pmax = advice.pmax
    n = len(advice.cell_size)
    # above[p] = number of cells whose limit at order p+1 is below f
    dofs = None
    if kernels.use_compiled(n) and f.ndim == 1 and len(f) and np.all(np.isfinite(f)):
        # one pass over the cells: histograms of their limits over the sorted frequencies
        from .cost import _dofs_from_bins, _limit_bins
        variable = s.order is None
        order, hist, B = _limit_bins(advice.limit_rows, f, s.max_order - 1 if variable else 0,
                                     advice.limit_row)
        above = np.empty((len(f), pmax), np.int64)
        above[order] = np.cumsum(hist, axis=1)[:, :len(f)].T
        if variable:
            dofs = _dofs_from_bins(mesh, topo, B, order, mesh.dim == 3 and len(topo.faces) > 0,
                                   advice.limit_row, hist)
    else:
        above = np.stack([np.searchsorted(np.sort(advice.limit_at(p + 1)), f, side="left")
                          for p in range(pmax)], axis=1)
    counts = np.empty((len(f), pmax + 1), dtype=np.int64)
    counts[:, 0] = n - above[:, 0]
    counts[:, 1:pmax] = above[:, :-1] - above[:, 1:]
    counts[:, pmax] = above[:, -1]
    ready = above[:, s.allowed_order - 1] == 0
    if s.order is None:
        if dofs is None:
            dofs = variable_order_dofs(mesh, topo, advice.limit_rows, f, s.max_order,
                                       advice.limit_row)
        return Sweep(f, counts, ready, dofs)
    dofs = np.full(len(f), lagrange_dofs(mesh, topo, s.order), dtype=np.int64)
    return Sweep(f, counts, ready, dofs, condensed_dofs(mesh, topo, s.order))


@dataclass(frozen=True)
class Cluster:
    """A connected group of flagged cells.

    cells : number of cells; volume : m^3; centroid, lo, hi : (3,) metres;
    size : longest edge in the group, m; target : smallest target size, m;
    factor : target / size (below 1 refine, above 1 coarsen); ids : some cell ids;
    regions : region tags touched.
    """

    cells: int
    volume: float
    centroid: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    size: float
    target: float
    factor: float
    ids: np.ndarray
    regions: tuple[int, ...]


def clusters(mesh: Mesh, topo: Topology, advice: Advice, mask: np.ndarray,
             limit: int = 50, max_ids: int = 10) -> list[Cluster]:
    """Group flagged cells into face-connected clusters, largest first (at most ``limit``)."""
    n = mesh.n_cells
    if kernels.use_compiled(n):  # union-find, numbered as connected_components numbers them
        from .kernels import advice as _ka
        itype = np.int32 if n < 2 ** 31 - 1 else np.int64
        m = np.ascontiguousarray(mask, dtype=bool)
        k = int(np.count_nonzero(m))
        if not k:
            return []
        if k == n and not len(topo.nonmanifold_faces):
            # every cell flagged (a mesh far finer than the sweep needs): the clusters are
            # the mesh's components, joined through the same faces (edges in 2D) and
            # numbered the same way; only faces of more than two cells join more there
            lab = np.zeros(n, itype)
            if topo.n_components > 1:
                lab[:] = topo.component
            cnt = np.bincount(lab, minlength=topo.n_components) if topo.n_components > 1 \
                else np.array([n], np.int64)
            return _clusters_compiled(mesh, topo, advice, lab, cnt, limit, max_ids)
        lab = np.empty(n, itype)  # the labels of all cells (-1 not flagged), no ids
        if mesh.dim == 3:
            n_lab = _ka.label_flagged(m, np.ascontiguousarray(topo.faces.cells),
                                      np.ascontiguousarray(topo.faces.count), 2, lab)
        else:
            a, b = _edge_pairs(topo)
            n_lab = _ka.label_flagged(m, np.column_stack([a, b]), np.zeros(len(a), np.int64),
                                      0, lab)
        cnt = np.zeros(n_lab, np.int64)
        _ka.count_labels(lab, cnt)
        return _clusters_compiled(mesh, topo, advice, lab, cnt, limit, max_ids)
    ids = np.flatnonzero(mask)
    if not len(ids):
        return []
    if mesh.dim == 3:
        inner = topo.faces.count >= 2
        a, b = topo.faces.cells[inner, 0], topo.faces.cells[inner, 1]
    else:
        a, b = _edge_pairs(topo)
    keep = mask[a] & mask[b]
    local = np.full(n, -1, np.int64)
    local[ids] = np.arange(len(ids))
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components
    g = sparse.coo_matrix((np.ones(int(keep.sum()), np.int8),
                           (local[a[keep]], local[b[keep]])), shape=(len(ids), len(ids)))
    n_lab, lab = connected_components(g, directed=False)
    cnt = np.bincount(lab, minlength=n_lab)
    w = topo.cell_volume[ids]
    np.abs(w, out=w)
    vol = np.bincount(lab, weights=w, minlength=n_lab)
    order = np.argsort(lab, kind="stable")
    starts = np.concatenate([[0], np.cumsum(cnt)])
    cen = mesh.centroids[ids]
    out = []
    for j in np.argsort(-cnt, kind="stable")[:limit]:
        pos = order[starts[j]:starts[j + 1]]
        sel = ids[pos]
        size = float(advice.cell_size[sel].max())
        target = float(advice.target_size[sel].min())
        x = cen[pos]
        c = (x * w[pos, None]).sum(0) / vol[j] if vol[j] > 0 else x.mean(0)
        out.append(Cluster(int(cnt[j]), float(vol[j]), c, x.min(0), x.max(0), size, target,
                           target / size if size > 0 else np.inf, sel[:max_ids],
                           tuple(int(t) for t in np.unique(mesh.region[sel]))))
    return out


def _edge_pairs(topo: Topology) -> tuple[np.ndarray, np.ndarray]:
    """The cell pairs sharing an edge (2D adjacency), from the edges' incidence."""
    inc = topo.edges.incidence
    st = topo.edges.incidence_starts
    return np.repeat(inc[st], np.diff(np.append(st, len(inc)))), inc


def _clusters_compiled(mesh: Mesh, topo: Topology, advice: Advice, lab, cnt,
                       limit: int, max_ids: int) -> list[Cluster]:
    """The clusters of :func:`clusters` from the labels of all cells (lab, -1 for the
    cells not flagged), with one pass over the cells for the chosen clusters (kernel
    ``cluster_stats``: sizes, boxes and the volume sums of those clusters only; no
    per-cell weights, no array of the flagged cells' ids)."""
    from .kernels import advice as _ka

    top = np.argsort(-cnt, kind="stable")[:limit]
    s = len(top)
    slot = np.full(len(cnt), -1, np.int64)
    slot[top] = np.arange(s)
    size, target = np.empty(s), np.empty(s)
    lo, hi, wsum, vol = np.empty((s, 3)), np.empty((s, 3)), np.empty((s, 3)), np.empty(s)
    first = np.empty((s, max_ids), np.int64)
    n_first = np.zeros(s, np.int64)
    if len(mesh.blocks) == 1:  # centroids worked out in the kernel: no (k, 3) array
        b = mesh.blocks[0]
        cen, pts, cells, k = np.zeros((0, 3)), mesh.points, b.cells, b.info.n_corners
    else:  # of the flagged cells only
        cen, pts, cells, k = mesh.centroids_of(np.flatnonzero(lab >= 0)), np.zeros((0, 3)), \
            np.zeros((0, 1), np.int64), 1
    _ka.cluster_stats(lab, slot, np.ascontiguousarray(advice.cell_size),
                      np.ascontiguousarray(advice.target_size), cen,
                      np.ascontiguousarray(pts, dtype=float), np.ascontiguousarray(cells), k,
                      np.ascontiguousarray(topo.cell_volume, dtype=float), size, target, lo,
                      hi, wsum, vol, first, n_first)
    region = mesh.region
    one_region = len(region) and region.min() == region.max()
    members = None
    out = []
    for i, j in enumerate(top):
        if vol[i] > 0 and one_region:
            sel = None
        else:  # the cells of the cluster (a zero volume or several regions)
            if members is None:
                ids = np.flatnonzero(lab >= 0)
                order = np.empty(len(ids), np.int64)
                _ka.group_by_label(lab[ids], cnt.astype(np.int64), order)
                starts = np.concatenate([[0], np.cumsum(cnt)])
                members = (ids, order, starts)
            ids, order, starts = members
            sel = ids[order[starts[j]:starts[j + 1]]]
        c = wsum[i] / vol[i] if vol[i] > 0 else mesh.centroids_of(sel).mean(0)
        regions = (int(region[0]),) if one_region else \
            tuple(int(t) for t in np.unique(region[sel]))
        sz, tg = float(size[i]), float(target[i])
        out.append(Cluster(int(cnt[j]), float(vol[i]), c, lo[i].copy(), hi[i].copy(), sz, tg,
                           tg / sz if sz > 0 else np.inf, first[i, :n_first[i]].copy(),
                           regions))
    return out
