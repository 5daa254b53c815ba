"""Coarsening scenario: a target element-size field and what a mesh built to it costs.

Target size.  At the upper frequency every cell has a largest edge length
that meets the accuracy target with a given order (the 1D dispersion model of
:mod:`meshcheck.dispersion`, inverted by ``usable_kh(...).max_size``; the
advice's ``target_size`` for the allowed order).  A node takes the smallest
target of the cells around it.

Limits.  A geometry limit (largest size the boundary allows, per node, e.g.
from its curvature) is a hook: any function ``(mesh, topo) -> (n_points,)``
metres (inf = no limit).  The size gradation is then limited to
|grad h| <= beta along the mesh edges:

    h_i = min_j (h_j + beta d_ij),   d_ij = shortest path along mesh edges,

the smallest field below the targets whose growth rate is at most beta (the
"H-variation" control of Borouchaki, Hecht & Frey, "Mesh gradation control",
IJNME 43 (1998) 1143-1165; cited from memory), solved exactly by one Dijkstra
search from a virtual source joined to every node j by an edge of length
h_j / beta (h_i = beta x distance).  On meshes of :data:`meshcheck.kernels.MIN_CELLS`
cells or more the node minima, this search and the cell density of the count run as
compiled kernels (:mod:`meshcheck.kernels.sizefield`, same results).  beta = 0.3 (neighbouring cells differ by
about 30 %) is common practice, no source.

Mesher size.  gmsh's unstructured tetrahedra are longer than the size asked
for: with a uniform size h (gmsh 4.15.2, ``Mesh.Algorithm3D`` = 1, box
1 x 0.8 x 0.6 m) the longest edge of a cell is 1.6 h (median), 1.92 h (99th
percentile), 2.07 h at most (measured; :data:`GMSH_LONGEST_EDGE`).  The size
handed to gmsh is therefore the target divided by 2, so that the longest
edges meet the target.

Element count.  A regular tetrahedron of edge a has volume a^3 / (6 sqrt 2),
so a size field h(x) would hold int 6 sqrt(2) / h^3 dV regular tetrahedra
(regular triangles in 2D: int 4 / (sqrt(3) h^2) dA).  gmsh's cells are larger
inside and smaller near the boundary; with uniform sizes on the box
1 x 0.8 x 0.6 m (h = 0.2 .. 0.025 m, 403 .. 140,189 tetrahedra) its counts
are, within +-7 % (least squares on relative errors; measured with gmsh
4.15.2, Delaunay):

    N = 0.501 int 6 sqrt(2) / h^3 dV + 1.604 int 1 / h^2 dS      (3D, S = boundary)
    N = 0.998 int 4 / (sqrt(3) h^2) dA + 0.428 int 1 / h dl       (2D, h = 0.2 .. 0.006 m
                                                                   on 1 x 0.8 m)

(:data:`GMSH_COUNT`).  Per cell of the supplied mesh h^-d is averaged over
the corners, per boundary face h^-(d-1).

Cost on the coarsened mesh.  Per frequency every new cell takes the order its
size needs (longest edge = target, conservative), and the unknowns and
non-zeros per cell follow from the entity ratios and the star counts of
:mod:`meshcheck.cost` (interior entities: chi = -1, 1, -1, 1 for vertices,
edges, faces, cells), measured on the supplied mesh when it is tetrahedral.
The maximum rule and the boundary are neglected there (estimates).
"""
from __future__ import annotations

import math
import threading
from dataclasses import dataclass
from dataclasses import field as dataclass_field
from functools import cached_property
from pathlib import Path
from typing import Callable

import numpy as np

from . import kernels
from .bulkfile import BulkFile
from .errors import SettingsError
from .mesh import Mesh
from .topology import Topology

__all__ = ["GMSH_LONGEST_EDGE", "GMSH_COUNT", "REGULAR_TET", "GeometryLimit",
           "SizeField", "TetRatios", "node_min", "cell_target_size", "limit_gradation",
           "size_field", "estimate_cells", "write_pos", "tet_ratios", "scenario_systems",
           "remesh", "remesh_and_audit", "size_point_data", "write_size_view", "audit_size_field"]

#: regular tetrahedra of edge h per h^3 of volume: 6 sqrt(2)
REGULAR_TET = 6.0 * math.sqrt(2.0)
#: longest edge of a gmsh tetrahedron / requested size (measured, see module docstring)
GMSH_LONGEST_EDGE = 2.0
#: gmsh cell count = volume factor x regular cells + boundary factor x int h^(1-d) dS, per
#: dimension (measured, see the module docstring)
GMSH_COUNT = {3: (0.501, 1.604), 2: (0.998, 0.428)}

GeometryLimit = Callable[[Mesh, Topology], np.ndarray]


def _corners(mesh: Mesh):
    for b in mesh.blocks:
        yield b, b.cells[:, :b.info.n_corners]


def node_min(mesh: Mesh, topo: Topology, cell_values: np.ndarray) -> np.ndarray:
    """(n_points,) smallest value of the cells around each corner node; mid-nodes of
    quadratic cells get the mean of their edge's ends; nodes of no cell get nan."""
    return _node_mins(mesh, [cell_values])[0]


#: cells whose fields :func:`_node_mins` makes at a time (compiled path)
_NODE_MIN_CHUNK = 1 << 16


def _node_mins(mesh: Mesh, fields: list) -> list[np.ndarray]:
    """:func:`node_min` of several (n_cells,) fields (compiled: one pass over the cells
    per two fields); a field may also be a function (lo, hi) -> its values of cells
    lo..hi-1, made a chunk at a time on the compiled path."""
    n = mesh.n_cells
    compiled = kernels.use_compiled(n)

    def field(v):  # compiled: as given (functions made per chunk); numpy: whole float64
        if compiled:
            return v if callable(v) else np.asarray(v)
        return np.asarray(v(0, n) if callable(v) else v, dtype=float)

    vs = [field(v) for v in fields]
    outs = np.full((len(vs), mesh.n_points), np.inf)
    if compiled and vs:
        from .kernels import sizefield as _ks
        for b, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
            for s in range(0, len(b), _NODE_MIN_CHUNK):
                e = min(s + _NODE_MIN_CHUNK, len(b))
                # contiguous float64 (one kernel signature; float32 fields and broadcasts
                # made so a chunk at a time, exactly)
                vals = [np.ascontiguousarray(v(off + s, off + e) if callable(v) else
                                             v[off + s:off + e], dtype=np.float64) for v in vs]
                for i in range(0, len(vals), 2):  # in pairs (an odd last one twice)
                    j = min(i + 1, len(vals) - 1)
                    _ks.node_min_pair(outs[i], outs[j], b.cells[s:e], b.info.n_corners,
                                      vals[i], vals[j])
    else:
        for out, v in zip(outs, vs):
            for (b, c), off in zip(_corners(mesh), mesh.block_offsets[:-1]):
                vals = np.repeat(v[off:off + len(b)], c.shape[1])
                np.minimum.at(out, c.ravel(), vals)
    used = np.isfinite(outs)
    mid = _mid_means(mesh, outs)
    if mid is not None:
        used |= mid
    outs[~used] = np.nan
    return list(outs)


def _mid_means(mesh: Mesh, outs: np.ndarray) -> np.ndarray | None:
    """Mid-nodes of quadratic cells set, in place, to the mean of their edge's end nodes
    in every row of ``outs`` (r, n_points); the (n_points,) mask of the mid-nodes, or
    None when the mesh has no quadratic cells (compiled: one pass over the cells, no
    (cells x edges) index arrays)."""
    quad = [b for b in mesh.blocks if b.info.quadratic]
    if not quad:
        return None
    mid = np.zeros(mesh.n_points, bool)
    compiled = kernels.use_compiled(mesh.n_cells)
    if compiled:
        from .kernels import sizefield as _ks
    for b in quad:  # each block from the values before its own mid-nodes are set
        e = b.info.edges
        if compiled:
            e = np.ascontiguousarray(e)
            # read from the values before this block's mid-nodes are set: the array
            # itself when they are no corner of any cell (one block, checked), else a copy
            alone = len(mesh.blocks) == 1 and not _ks.mids_are_corners(
                b.cells, e, b.info.n_corners, mesh.n_points)
            _ks.mid_mean_block(outs, outs if alone else outs.copy(), mid, b.cells, e)
        else:
            m = b.cells[:, e[:, 2]].ravel()
            outs[:, m] = 0.5 * (outs[:, b.cells[:, e[:, 0]].ravel()]
                                + outs[:, b.cells[:, e[:, 1]].ravel()])
            mid[m] = True
    return mid


def cell_target_size(advice, order: int, mesh: Mesh, topo: Topology) -> np.ndarray:
    """(n_cells,) largest edge length meeting the target at ``advice.fmax`` with ``order``, m
    (with the advice's 3D correction: the model's size over the cell's factor a).

    mesh, topo : needed for the correction at an order other than the allowed one."""
    from .advice import cell_factors
    from .dispersion import usable_kh

    s = advice.settings
    if order == s.allowed_order:
        return advice.target_size  # float32; the callers take slices
    if not 1 <= order <= 16:
        raise SettingsError(f"order {order} of the size field must be between 1 and 16")
    table = usable_kh(s.target, max(order, advice.pmax))
    k = 2.0 * np.pi * advice.fmax / advice.cell_speed
    if advice.edge_flow_factor is not None:  # as in advise: the upstream wavenumber
        k = k * topo.edges.per_cell(advice.edge_flow_factor, np.maximum)
    a = cell_factors(mesh, topo, order, s)
    return np.asarray(table.max_size(order, k, advice.cell_distance), dtype=float) / a


def limit_gradation(mesh: Mesh, topo: Topology, size: np.ndarray, gradation: float) -> np.ndarray:
    """Smallest field <= ``size`` with |grad h| <= ``gradation`` along mesh edges.

    size : (n_points,) m (nan / inf where not set); returns (n_points,) m (nan where
    no finite value reaches a node).
    """
    if not gradation > 0:
        raise SettingsError(f"size gradation {gradation} must be positive (e.g. 0.3)")
    n = mesh.n_points
    h = np.asarray(size, dtype=float)
    w = np.asarray(topo.edges.length, dtype=float)
    if kernels.use_compiled(mesh.n_cells):
        from .kernels import sizefield as _ks
        dist = _ks.gradation_distances(n, topo.edges.nodes, w, h, float(gradation))
    else:
        a, b = topo.edges.nodes[:, 0], topo.edges.nodes[:, 1]
        src = np.flatnonzero(np.isfinite(h))
        ok = np.isfinite(w) & (w > 0)
        rows = np.concatenate([a[ok], b[ok], np.full(len(src), n)])
        cols = np.concatenate([b[ok], a[ok], src])
        vals = np.concatenate([w[ok], w[ok], h[src] / gradation])
        # zero-length source edges are dropped by csgraph; keep them tiny instead
        vals = np.maximum(vals, 1e-300)
        from scipy import sparse
        from scipy.sparse.csgraph import dijkstra
        g = sparse.csr_matrix((vals, (rows, cols)), shape=(n + 1, n + 1))
        dist = dijkstra(g, directed=True, indices=n)[:n]
    out = np.multiply(dist, gradation, out=dist)  # in place: no second (n_points,) array
    out[~np.isfinite(out)] = np.nan
    _mid_means(mesh, out[None])  # mid-nodes (no corner of any edge): their edge ends' mean
    return out


@dataclass(frozen=True)
class SizeField:
    """Per-node target sizes at the upper frequency for one order.

    order : element order the sizes are meant for; fmax : Hz; gradation : beta.
    target : (n_points,) dispersion target (longest edge), m, nan at unused nodes.
    geometry : (n_points,) geometry limit, m (inf = none; a read-only broadcast inf
        when no limit was given).
    size : (n_points,) final target (longest edge) after the limits, m.
    mesher_size : (n_points,) size to ask gmsh for = size / edge_factor, m.
    current : (n_points,) shortest longest-edge of the cells around each node, m.
    cells_estimate : tetrahedra gmsh would make from ``mesher_size`` (worked out when first
        asked for, by ``estimate``: 0.1 s at 4.77M tets, which only the cost quote needs).
    """

    order: int
    fmax: float
    gradation: float
    edge_factor: float
    target: np.ndarray
    geometry: np.ndarray
    size: np.ndarray
    mesher_size: np.ndarray
    current: np.ndarray
    estimate: Callable[[], float] = dataclass_field(repr=False, compare=False)

    @cached_property
    def cells_estimate(self) -> float:
        return float(self.estimate())

    @property
    def ratio(self) -> np.ndarray:
        """(n_points,) size / current (above 1: the mesh could be coarser there)."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return self.size / self.current


def _cell_density(mesh: Mesh, topo: Topology, mesher_size: np.ndarray) -> np.ndarray:
    """(n_cells,) regular cells per unit volume (area) at the corner mean of h^-d."""
    powers = _node_powers(mesh, mesher_size)
    dens = [_block_density(b.cells, b.info.n_corners, mesher_size, powers, mesh.dim)
            for b in mesh.blocks]
    out = dens[0] if len(dens) == 1 else np.concatenate(dens) if dens else np.zeros(0)
    out *= _unit_density(mesh)  # a new array either way: scaled in place
    return out


def _unit_density(mesh: Mesh) -> float:
    """Regular cells of unit size per unit volume (3D) or area (2D)."""
    return REGULAR_TET if mesh.dim == 3 else 4.0 / math.sqrt(3.0)


def _node_powers(mesh: Mesh, mesher_size: np.ndarray) -> np.ndarray | None:
    """(n_points,) h^-d for the compiled corner means, or None on the numpy path."""
    if not kernels.use_compiled(mesh.n_cells):
        return None
    with np.errstate(divide="ignore", invalid="ignore"):  # the same powers, per node
        return np.ascontiguousarray(np.asarray(mesher_size, dtype=float) ** -_dims(mesh.dim))


def _dims(dim: int) -> float:
    """The exponent d of the density h^-d: 3 for volume meshes, 2 for plane ones."""
    return 3.0 if dim == 3 else 2.0


def _block_density(cells: np.ndarray, n_corners: int, mesher_size: np.ndarray,
                   powers: np.ndarray | None, dim: int) -> np.ndarray:
    """(m,) corner mean of h^-d over the cells' corners, ignoring NaN (unscaled)."""
    if powers is not None:
        from .kernels import sizefield as _ks
        return _ks.corner_nanmean(cells, n_corners, powers)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.nanmean(mesher_size[cells[:, :n_corners]] ** -_dims(dim), axis=1)


#: cells whose densities :func:`estimate_cells` holds at a time
_DENSITY_CHUNK = 1 << 18


#: boundary faces :func:`_boundary_integral` holds at a time (about 150 bytes each)
_FACE_CHUNK = 1 << 15


def _boundary_integral(mesh: Mesh, topo: Topology, mesher_size: np.ndarray) -> float:
    """int h^(1-d) over the boundary (faces with one cell in 3D, edges in 2D)."""
    P = mesh.points
    if mesh.dim == 3:  # the boundary faces a chunk at a time (bounded scratch)
        ids = np.flatnonzero(topo.faces.boundary)
        return float(sum(_face_integral(P, topo.faces.nodes_of(ids[s:s + _FACE_CHUNK]),
                                        mesher_size) for s in range(0, len(ids), _FACE_CHUNK)))
    cnt = np.diff(np.append(topo.edges.incidence_starts, len(topo.edges.incidence)))
    e = topo.edges.nodes[cnt == 1]
    a = topo.edges.length[cnt == 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = 0.5 * (mesher_size[e[:, 0]] ** -1.0 + mesher_size[e[:, 1]] ** -1.0)
    ok = np.isfinite(w) & np.isfinite(a)
    return float(np.sum(a[ok] * w[ok]))


def _face_integral(P: np.ndarray, f: np.ndarray, mesher_size: np.ndarray) -> float:
    """Sum of area x mean h^-2 over boundary faces of corners f ((k, 4), -1 padded)."""
    tri = f[:, 3] < 0
    a = np.linalg.norm(np.cross(P[f[:, 1]] - P[f[:, 0]], P[f[:, 2]] - P[f[:, 0]]), axis=1) / 2
    q = ~tri
    if q.any():
        fq = f[q]
        a[q] = 0.5 * np.linalg.norm(np.cross(P[fq[:, 2]] - P[fq[:, 0]],
                                             P[fq[:, 3]] - P[fq[:, 1]]), axis=1)
    h = mesher_size[np.maximum(f, 0)]
    with np.errstate(divide="ignore", invalid="ignore"):
        w = np.where(f >= 0, h ** -2.0, 0.0).sum(axis=1) / np.where(tri, 3, 4)
    ok = np.isfinite(w) & np.isfinite(a)
    return float(np.sum(a[ok] * w[ok]))


def estimate_cells(mesh: Mesh, topo: Topology, mesher_size: np.ndarray,
                   factors: tuple[float, float] | None = None) -> float:
    """Cells gmsh makes from a node size field (:data:`GMSH_COUNT`).

    mesher_size : (n_points,) m.  factors : (volume, boundary) factors (default:
    gmsh's, for the mesh's dimension).
    """
    a, b = factors if factors is not None else GMSH_COUNT[3 if mesh.dim == 3 else 2]
    # sum of |volume| x density over the cells of finite density, a chunk at a time
    powers = _node_powers(mesh, mesher_size)
    unit = _unit_density(mesh)
    vol_sum = 0.0
    for blk, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
        for lo in range(0, len(blk), _DENSITY_CHUNK):
            hi = min(lo + _DENSITY_CHUNK, len(blk))
            d = _block_density(blk.cells[lo:hi], blk.info.n_corners, mesher_size, powers,
                               mesh.dim)
            ok = np.isfinite(d)
            d *= unit
            np.multiply(d, topo.cell_volume[off + lo:off + hi], out=d)
            np.abs(d, out=d)
            vol_sum += float(np.sum(d) if ok.all() else np.sum(d[ok]))
    return float(a * vol_sum + b * _boundary_integral(mesh, topo, mesher_size))


def size_field(mesh: Mesh, topo: Topology, advice, order: int | None = None,
               gradation: float = 0.3, geometry_limit: GeometryLimit | None = None,
               edge_factor: float = GMSH_LONGEST_EDGE, h_max: float | None = None) -> SizeField:
    """Per-node target size at ``advice.fmax`` for ``order`` (default: the allowed order).

    geometry_limit : hook ``(mesh, topo) -> (n_points,)`` largest size the geometry
        allows, m (inf = none), applied before the gradation.
    h_max : cap, m (default: the extent of the fluid part of each node's cells).
    """
    p = advice.settings.allowed_order if order is None else int(order)
    cell_t = cell_target_size(advice, p, mesh, topo)
    cap = topo.cell_extent() if h_max is None else \
        np.broadcast_to(float(h_max), (mesh.n_cells,))
    def capped(lo, hi):  # the targets, the cap where there is none (made per chunk)
        t = cell_t[lo:hi]
        return np.where(np.isfinite(t), t, cap[lo:hi])

    if cap.strides == (0,) and len(cap):  # one cap (one part, or h_max): the same at
        # every node of a cell (mid-nodes: the mean of two equal values), as the minimum
        # over the cells gives it, without that pass (a node of no cell has no target:
        # nan, which the minimum below keeps)
        target, current = _node_mins(mesh, [capped, advice.cell_size])
        cap_node = np.full(mesh.n_points, cap[0] if np.isfinite(cap[0]) else np.nan)
    else:
        target, cap_node, current = _node_mins(mesh, [capped, cap, advice.cell_size])
    raw = np.minimum(target, cap_node, out=cap_node)  # the cap's buffer reused
    geo = np.broadcast_to(np.inf, (mesh.n_points,))  # no limit: one read-only inf
    if geometry_limit is not None:
        geo = np.asarray(geometry_limit(mesh, topo), dtype=float)
        if geo.shape != (mesh.n_points,):
            raise SettingsError("the geometry limit must give one size per node")
        raw = np.minimum(raw, np.where(np.isnan(geo), np.inf, geo))
    size = limit_gradation(mesh, topo, raw, gradation)
    mesher = size / float(edge_factor)

    def estimate() -> float:
        return estimate_cells(mesh, topo, mesher) if mesh.dim in (2, 3) else float("nan")

    return SizeField(p, float(advice.fmax), float(gradation), float(edge_factor), target, geo,
                     size, mesher, current, estimate)


# ---------------------------------------------------------------------------
# gmsh view


_POS_KIND = {"tetra": "SS", "hexahedron": "SH", "wedge": "SI", "pyramid": "SY",
             "triangle": "ST", "quad": "SQ"}


def _fixed_width(strings: list[str]) -> np.ndarray:
    """(n, w) uint8 ASCII codes of ``strings``, padded with zero bytes."""
    arr = np.array(strings, dtype=bytes)
    return arr.view(np.uint8).reshape(len(arr), arr.dtype.itemsize)


def write_pos(path: str | Path, mesh: Mesh, values: np.ndarray, name: str = "target_size",
              scale: float = 1.0, chunk: int = 200_000) -> Path:
    """Write node values as a gmsh post-processing view (ASCII .pos, one scalar list
    element per linear cell: SS tetrahedra, SH hexahedra, SI prisms, SY pyramids, ST/SQ
    in 2D).  Coordinates and values are divided by ``scale`` (metres per file unit),
    so the view is in the mesh's own unit.  gmsh reads it with ``-bgm file.pos`` or
    ``gmsh.merge`` and a "PostView" background field.

    Each point's coordinates and value are formatted once (``%.8g``, ``%.5g``); the
    cells' lines are then assembled as byte rows by gathering those fixed-width fields
    and dropping the padding, so the cost grows with the points, not with 4-8
    formatted numbers per cell corner.
    """
    path = Path(path)
    v = np.asarray(values, dtype=float) / scale
    used = np.zeros(mesh.n_points, bool)
    for _, c in _corners(mesh):
        used[c.ravel()] = True
    idx = np.flatnonzero(used)
    P = (mesh.points[idx] / scale).tolist()
    pts = np.zeros((mesh.n_points, 1), np.uint8)
    vals = np.zeros((mesh.n_points, 1), np.uint8)
    plen = np.zeros(mesh.n_points, np.int64)
    vlen = np.zeros(mesh.n_points, np.int64)
    if len(idx):
        ps = ["%.8g,%.8g,%.8g" % tuple(x) for x in P]
        vs = ["%.5g" % x for x in v[idx].tolist()]
        pw, vw = _fixed_width(ps), _fixed_width(vs)
        pts = np.zeros((mesh.n_points, pw.shape[1]), np.uint8)
        vals = np.zeros((mesh.n_points, vw.shape[1]), np.uint8)
        pts[idx], vals[idx] = pw, vw
        plen[idx] = np.fromiter(map(len, ps), np.int64, len(ps))
        vlen[idx] = np.fromiter(map(len, vs), np.int64, len(vs))
        del ps, vs
    finite = np.isfinite(v)
    compiled = kernels.use_compiled(mesh.n_cells)

    def lit(text: str) -> np.ndarray:  # (writable: the compiled kernel's argument type)
        return np.frombuffer(text.encode(), np.uint8).copy()

    # the file's size at most (padded fields): large ones go past the page cache
    bound = sum(len(c) * (8 + c.shape[1] * (pts.shape[1] + vals.shape[1] + 2))
                for _, c in _corners(mesh))
    with BulkFile(path, bound) as fh:
        fh.write(f'View "{name}" {{\n'.encode())
        for b, c in _corners(mesh):
            nc = c.shape[1]
            head, comma = lit(_POS_KIND[b.info.linear] + "("), lit(",")
            mid, tail = lit("){"), lit("};\n")
            if compiled:  # one pass per chunk writing the lines straight into a buffer
                from .kernels import sizefield as _ks
                line = len(head) + nc * (pts.shape[1] + vals.shape[1] + 2) + 3  # at most
                buf = np.empty(min(chunk, len(c)) * line, np.uint8)
                ok = finite.view(np.uint8)
                for s in range(0, len(c), chunk):
                    n = _ks.pos_lines(np.ascontiguousarray(b.cells[s:s + chunk]), nc, pts, plen,
                                      vals, vlen, ok, head, buf)
                    fh.write(buf[:n])
                continue
            for s in range(0, len(c), chunk):
                cc = c[s:s + chunk]
                cc = cc[np.all(finite[cc], axis=1)]
                if not len(cc):
                    continue
                parts = [np.broadcast_to(head, (len(cc), len(head)))]
                for k in range(nc):
                    parts += [pts[cc[:, k]], np.broadcast_to(comma if k < nc - 1 else mid,
                                                             (len(cc), 1 if k < nc - 1 else 2))]
                for k in range(nc):
                    parts.append(vals[cc[:, k]])
                    if k < nc - 1:
                        parts.append(np.broadcast_to(comma, (len(cc), 1)))
                parts.append(np.broadcast_to(tail, (len(cc), len(tail))))
                rows = np.hstack(parts).ravel()
                fh.write(rows[rows != 0])
        fh.write(b"};\n")
    return path


# ---------------------------------------------------------------------------
# cost on the coarsened mesh


@dataclass(frozen=True)
class TetRatios:
    """Entities per cell and summed star counts per cell of a tetrahedral mesh.

    vertices, edges, faces : entities per cell; chi_vertex, chi_edge, chi_face :
    sum of chi over the entities of that kind per cell (interior limit -v, e, -f).
    source : where the ratios come from.
    """

    vertices: float
    edges: float
    faces: float
    chi_vertex: float
    chi_edge: float
    chi_face: float
    source: str

    def ndof(self, q) -> np.ndarray:
        """Condensed unknowns per cell at uniform order q."""
        q = np.asarray(q, dtype=float)
        return self.vertices + self.edges * (q - 1) + self.faces * (q - 1) * (q - 2) / 2

    def nnz(self, q) -> np.ndarray:
        """Non-zeros per cell of the condensed system at uniform order q."""
        q = np.asarray(q, dtype=float)
        te = q + 1
        tf = (q + 1) * (q + 2) / 2
        tc = 4 + 6 * (q - 1) + 4 * (q - 1) * (q - 2) / 2
        return self.chi_vertex + self.chi_edge * te * te + self.chi_face * tf * tf + tc * tc

    def n_loc(self, q) -> np.ndarray:
        """Unknowns of one tetrahedron of order q before condensation."""
        q = np.asarray(q, dtype=float)
        return (q + 1) * (q + 2) * (q + 3) / 6


#: a gmsh Delaunay tetrahedral mesh of the box 1 x 0.8 x 0.6 m at size 0.05 m (18,293
#: tetrahedra), measured with gmsh 4.15.2 and :func:`tet_ratios` (at 0.03 m, 83,689
#: tetrahedra: 0.191, 1.252, 2.061, -0.131, 1.070, -1.939: the boundary share shrinks)
GMSH_TET_RATIOS = TetRatios(0.2123, 1.3103, 2.0981, -0.1141, 1.0161, -1.9019,
                            "gmsh 4.15 Delaunay box, 18k tetrahedra")


def tet_ratios(mesh: Mesh, topo: Topology, adjacency=None) -> TetRatios:
    """Entity and star-count ratios of a mesh (meaningful for tetrahedral meshes);
    ``adjacency``: :func:`meshcheck.cost.build_adjacency` of the mesh, if already built."""
    from .cost import build_adjacency

    adj = adjacency if adjacency is not None else build_adjacency(mesh, topo)
    n = max(mesh.n_cells, 1)
    return TetRatios(len(adj.vertices) / n, len(topo.edges) / n, len(topo.faces) / n,
                     adj.chi_vertex.sum() / n, adj.chi_edge.sum() / n, adj.chi_face.sum() / n,
                     mesh.source or "supplied mesh")


def scenario_systems(mesh: Mesh, topo: Topology, advice, field: SizeField,
                     frequencies: np.ndarray, max_order: int, fixed_order: int | None = None,
                     ratios: TetRatios | None = None,
                     adjacency=None) -> tuple[list, float]:
    """Estimated systems of a tetrahedral mesh built to ``field``, per frequency.

    Every new cell takes the lowest order (up to ``max_order``) whose limit at its
    size (longest edge = ``field.size``) reaches the frequency, or ``fixed_order``;
    with the advice's 3D correction the limit is that of unstructured tetrahedra
    (:func:`meshcheck.advice.kind_factors`, alignment 0).
    Returns (list of :class:`~meshcheck.cost.SystemSize` (estimates), cell count).
    """
    from .advice import kind_factors
    from .cost import SystemSize
    from .dispersion import usable_kh

    if ratios is None:
        pure_tet = all(b.info.linear == "tetra" for b in mesh.blocks) and mesh.n_cells >= 1000
        ratios = tet_ratios(mesh, topo, adjacency) if pure_tet else GMSH_TET_RATIOS
    vol = np.abs(topo.cell_volume)
    # new cells per old cell (the boundary share spread in proportion), and their size
    h_cell = []
    size = np.ascontiguousarray(field.size, dtype=np.float64)
    compiled = kernels.use_compiled(mesh.n_cells)
    for b, c in _corners(mesh):
        if compiled:  # the same means, no (cells, corners) gather
            from .kernels import sizefield as _ks
            h_cell.append(_ks.corner_nanmean(b.cells, b.info.n_corners, size))
            continue
        with np.errstate(divide="ignore", invalid="ignore"):
            h_cell.append(np.nanmean(size[c], axis=1))
    h = np.concatenate(h_cell)
    n_new = vol * _cell_density(mesh, topo, field.mesher_size)
    total = estimate_cells(mesh, topo, field.mesher_size)
    n_new = n_new * (total / np.nansum(n_new)) if np.nansum(n_new) > 0 else n_new
    ok = np.isfinite(h) & np.isfinite(n_new)
    h, n_new = h[ok], n_new[ok]
    f = np.asarray(frequencies, dtype=float)
    if fixed_order is not None:
        q = np.array([fixed_order])
        sums = [np.full(len(f), n_new.sum() * g(q)[0]) for g in _scenario_terms(ratios)]
    else:
        table = usable_kh(advice.settings.target, max_order)
        c, L = advice.cell_speed[ok], advice.cell_distance[ok]
        if advice.edge_flow_factor is not None:  # mean flow: as in advise, c / phi
            c = c / topo.edges.per_cell(advice.edge_flow_factor, np.maximum)[ok]
        # the new cells are unstructured gmsh tetrahedra: the free tetrahedron factors
        a = (kind_factors("tetra", max_order, advice.settings.target) if
             advice.settings.correction_3d else np.ones(max_order))
        # the limits f_p = c t_max(p, L / (a_p h)) / (2 pi a_p h) of the orders below the
        # highest (the steps), made and binned among the frequencies a chunk of cells at
        # a time (no (cells, orders) table; ln(L / h) and c / (2 pi h) once per chunk)
        steps = max_order - 1
        fs = np.sort(f)
        hist = np.zeros((steps, len(f) + 1))
        buf = np.empty((max(steps, 1), min(_LIMIT_CHUNK, len(h))))
        for s in range(0, len(h), _LIMIT_CHUNK):
            e = min(s + _LIMIT_CHUNK, len(h))
            ratio = L[s:e] / h[s:e]
            if not np.all(ratio > 0):  # also False for NaN (as table.max_kh)
                raise SettingsError("L/h ratios must be > 0")
            log_r = np.log(ratio)
            per_h = c[s:e] / (2 * np.pi * h[s:e])
            rows = buf[:steps, :e - s]
            for p in range(1, steps + 1):
                kh = table.max_kh_log(p, log_r - math.log(a[p - 1]))
                np.multiply(kh, per_h / a[p - 1], out=rows[p - 1])
            np.maximum.accumulate(rows, axis=0, out=rows)
            hist += _below_hist(rows.T, n_new[s:e], fs)
        sums = _sums_of_hist(hist, f, float(n_new.sum()), _scenario_terms(ratios))
    nd, nz, a2, a3 = sums
    out = [SystemSize(int(round(nd[i])), int(round(nz[i])), 0, fixed_order is None,
                      int(round(a2[i])), int(round(a3[i]))) for i in range(len(f))]
    return out, float(n_new.sum())


#: cells whose order limits :func:`scenario_systems` computes at a time (scratch in cache)
_LIMIT_CHUNK = 1 << 16


def _scenario_terms(ratios: TetRatios):
    """Per-cell quantities summed by :func:`scenario_systems`, as functions of the order."""
    return (ratios.ndof, ratios.nnz, lambda q: ratios.n_loc(q) ** 2,
            lambda q: ratios.n_loc(q) ** 3)


def _step_sums(thresholds: np.ndarray, weights: np.ndarray, frequencies: np.ndarray,
               terms) -> list[np.ndarray]:
    """sum_i weights_i g(q_i(f)) for every g in ``terms`` and every frequency, where
    q_i(f) = 1 + #{j : thresholds[i, j] < f} (rows non-decreasing).

    The sum telescopes over the order steps, g(q) = g(1) + sum_j [t_ij < f] (g(j+2) -
    g(j+1)), so a search of each threshold among the sorted frequencies replaces a pass
    over the cells per frequency: O(P n log m) for n cells, m frequencies.
    """
    f = np.asarray(frequencies, dtype=float)
    hist = _below_hist(thresholds, weights, np.sort(f))
    return _sums_of_hist(hist, f, float(np.sum(weights)), terms)


def _below_hist(thresholds: np.ndarray, weights: np.ndarray, fs: np.ndarray) -> np.ndarray:
    """(n_steps, len(fs) + 1): per step j, the weights of the cells binned at the first
    of the sorted frequencies ``fs`` above t_ij (NaN: past the last); summable over
    chunks of cells."""
    out = np.empty((thresholds.shape[1], len(fs) + 1))
    for j in range(thresholds.shape[1]):
        out[j] = np.bincount(np.searchsorted(fs, thresholds[:, j], side="right"), weights,
                             minlength=len(fs) + 1)
    return out


def _sums_of_hist(hist: np.ndarray, frequencies: np.ndarray, total: float,
                  terms) -> list[np.ndarray]:
    """:func:`_step_sums` from :func:`_below_hist` (of the frequencies sorted) and the
    total weight."""
    n_steps = hist.shape[0]
    f = np.asarray(frequencies, dtype=float)
    qs = np.arange(1, n_steps + 2, dtype=float)
    gq = [np.asarray(g(qs), dtype=float) for g in terms]
    out = [np.full(len(f), total * v[0]) for v in gq]
    by_f = np.argsort(f, kind="stable")
    below = np.empty(len(f))
    for j in range(n_steps):
        below[by_f] = np.cumsum(hist[j, :len(f)])  # weights of cells below each frequency
        for acc, v in zip(out, gq):
            acc += below * (v[j + 1] - v[j])
    return out


# ---------------------------------------------------------------------------
# remeshing with gmsh (stretch goal)


def remesh(mesh: Mesh, topo: Topology, field: SizeField, path: str | Path,
           algorithm: int = 1, threads: int = 1, angle: float = 40.0) -> Path:
    """Remesh the domain of ``mesh`` with gmsh to ``field.mesher_size``; write ``path``.

    The boundary faces become a discrete surface, reclassified into patches at
    ``angle`` degrees (``classifySurfaces``) and re-parametrised
    (``createGeometry``); the volume is then meshed with tetrahedra with the size
    field as a background view (its mesh is the supplied one).  Coordinates are
    in the mesh's unit (metres divided by ``scale``).  Raises SettingsError when
    gmsh fails.
    """
    import gmsh

    from .units import UNIT_FACTORS

    if mesh.dim != 3:
        raise SettingsError("remeshing is implemented for volume meshes only")
    scale = UNIT_FACTORS.get(mesh.unit, 1.0)
    path = Path(path)
    faces = topo.faces
    bnd = faces.nodes_of(faces.boundary)
    tri = bnd[bnd[:, 3] < 0][:, :3]
    quad = bnd[bnd[:, 3] >= 0]
    tri = np.vstack([tri, quad[:, [0, 1, 2]], quad[:, [0, 2, 3]]]) if len(quad) else tri
    used = np.unique(tri)
    pos_path = path.with_suffix(".size.pos")
    write_pos(pos_path, mesh, field.mesher_size, "mesher_size", scale)
    gmsh.initialize(interruptible=False)
    try:
        opt = gmsh.option.setNumber
        opt("General.Terminal", 0)
        opt("General.NumThreads", threads)
        opt("Mesh.Algorithm3D", algorithm)
        opt("Mesh.MeshSizeFromPoints", 0)
        opt("Mesh.MeshSizeFromCurvature", 0)
        opt("Mesh.MeshSizeExtendFromBoundary", 0)
        gmsh.model.add("coarsened")
        s = gmsh.model.addDiscreteEntity(2)
        gmsh.model.mesh.addNodes(2, s, (used + 1).tolist(),
                                 (mesh.points[used] / scale).ravel().tolist())
        gmsh.model.mesh.addElementsByType(s, 2, [], (tri + 1).ravel().tolist())
        gmsh.model.mesh.classifySurfaces(angle * math.pi / 180.0, True, False, math.pi)
        gmsh.model.mesh.createGeometry()
        surfs = [t for _, t in gmsh.model.getEntities(2)]
        loop = gmsh.model.geo.addSurfaceLoop(surfs)
        gmsh.model.geo.addVolume([loop])
        gmsh.model.geo.synchronize()
        gmsh.merge(str(pos_path))
        views = gmsh.view.getTags()
        fld = gmsh.model.mesh.field.add("PostView")
        gmsh.model.mesh.field.setNumber(fld, "ViewTag", views[-1])
        gmsh.model.mesh.field.setAsBackgroundMesh(fld)
        gmsh.model.mesh.generate(3)
        gmsh.model.addPhysicalGroup(3, [t for _, t in gmsh.model.getEntities(3)], 1,
                                    name="fluid")
        opt("Mesh.SaveAll", 0)
        gmsh.write(str(path))
    except Exception as exc:  # gmsh raises plain Exception
        raise SettingsError(f"gmsh could not remesh {mesh.source or 'the mesh'}: {exc}") from None
    finally:
        gmsh.finalize()
    return path


# ---------------------------------------------------------------------------
# outputs of an audit


_FIELDS: dict = {}
_FIELDS_LOCK = threading.Lock()  # one computation per result when threads ask together


def audit_size_field(res) -> SizeField:
    """The size field of an audit: the allowed order at the upper frequency, gradation 0.3
    (the field of the cost quote's coarsening scenario); cached per result, so the VTU and
    the gmsh view share one computation and neither needs the quote (thread-safe: the
    CLI computes it beside the JSON report)."""
    import weakref

    key = id(res)
    with _FIELDS_LOCK:
        hit = _FIELDS.get(key)
        if hit is not None and hit[0]() is res:
            return hit[1]
        fld = size_field(res.mesh, res.topology, res.advice, None, 0.3, None)
        _FIELDS[key] = (weakref.ref(res, lambda _, k=key: _FIELDS.pop(k, None)), fld)
        return fld


def size_point_data(res, scale: float = 1.0) -> dict[str, np.ndarray]:
    """VTU point data of an audit's size field (mesh units): target_size (longest edge
    for the allowed order), mesher_size (what to ask gmsh for) and size_ratio (target /
    current)."""
    f = audit_size_field(res)
    f32 = np.float32
    return {"target_size": (f.size / scale).astype(f32),
            "mesher_size": (f.mesher_size / scale).astype(f32),
            "size_ratio": f.ratio.astype(f32)}


def write_size_view(res, path: str | Path) -> Path:
    """Write the audit's mesher size field as a gmsh view (.pos, mesh units)."""
    from .units import UNIT_FACTORS

    return write_pos(path, res.mesh, audit_size_field(res).mesher_size, "mesher_size",
                     UNIT_FACTORS.get(res.mesh.unit, 1.0))


def remesh_and_audit(mesh: Mesh, topo: Topology, field: SizeField, settings, path: str | Path,
                     attempts: int = 3):
    """Remesh with :func:`remesh` and audit the new mesh with ``settings``
    (:class:`~meshcheck.pipeline.AuditSettings`); while it misses the upper frequency,
    shrink the mesher size by (signed-off / upper frequency)^1.1 (the limit of an edge
    grows about like 1/h) and remesh again, at most ``attempts`` times.

    Returns (path, AuditResult of the new mesh, factor applied to the mesher size).
    """
    from dataclasses import replace

    from .pipeline import audit
    from .reading import read_mesh

    factor = 1.0
    res = None
    for _ in range(max(1, attempts)):
        fld = field if factor == 1.0 else replace(field, mesher_size=field.mesher_size * factor)
        out = remesh(mesh, topo, fld, path)
        res = audit(read_mesh(out, mesh.unit), settings)
        if res.ready or res.blocking or res.advice.signed_off <= 0:
            break
        factor *= min(0.97, (res.advice.signed_off / settings.fmax) ** 1.1)
    return Path(path), res, factor
