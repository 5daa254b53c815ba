"""Size gradation: abrupt jumps in element size between neighbouring cells.

The size of a cell is the mean length of its edges (the same for a regular
tetrahedron, hexahedron or prism of edge a, unlike volume-based sizes), so a
conforming change of cell type is not mistaken for a jump.  Two cells are
neighbours when they share a face (3D) or an edge (2D).  A jump is a pair of
neighbours whose sizes differ by more than a ratio (default 2: common
practice, no source; abrupt size changes reflect part of a wave and spoil
the local error balance the advice assumes).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import kernels
from .mesh import Mesh
from .topology import Topology

__all__ = ["SizeJumps", "cell_sizes", "neighbour_pairs", "size_jumps"]


@dataclass(frozen=True)
class SizeJumps:
    """Neighbour pairs whose sizes differ by more than ``ratio``.

    ratio : threshold used.  count : number of such pairs.  max_ratio : largest
    size ratio between any two neighbours in the mesh (1 when none).
    pairs : (k, 2) int64 cell ids (smaller cell first) of the worst k pairs listed.
    ratios : (k,) float64 their size ratios (descending).
    locations : (k, 3) float64 midpoint of the two cell centroids, metres.
    sizes : (k, 2) float64 mean edge lengths of the two cells, metres.
    """

    ratio: float
    count: int
    max_ratio: float
    pairs: np.ndarray
    ratios: np.ndarray
    locations: np.ndarray
    sizes: np.ndarray


def cell_sizes(topo: Topology) -> np.ndarray:
    """(n_cells,) float64 mean edge length of every cell, metres.

    Large meshes (:func:`meshcheck.kernels.use_compiled`) take one compiled loop per
    block (bitwise the same means, no (cells, edges) gather)."""
    ces = topo.edges.cell_edges
    n = sum(len(ce) for ce in ces)
    if ces and kernels.use_compiled(n):
        from .kernels import geometry as kg

        out = np.empty(n)
        pos = 0
        for ce in ces:
            kg.mean_edge_length(ce, topo.edges.length, out[pos:pos + len(ce)])
            pos += len(ce)
        return out
    out = [topo.edges.length[ce].mean(axis=1) for ce in ces]
    return np.concatenate(out) if out else np.zeros(0)


def neighbour_pairs(mesh: Mesh, topo: Topology) -> np.ndarray:
    """(k, 2) int64 pairs of cells sharing a face (3D) or an edge (2D), each once."""
    if mesh.dim == 3:
        inner = topo.faces.count == 2
        return topo.faces.cells[inner]
    inc, st = topo.edges.incidence, topo.edges.incidence_starts
    cnt = np.diff(np.append(st, len(inc)))
    two = cnt == 2
    return np.column_stack([inc[st[two]], inc[st[two] + 1]])


def size_jumps(mesh: Mesh, topo: Topology, ratio: float = 2.0, max_listed: int = 20) -> SizeJumps:
    """Neighbours whose mean edge lengths differ by more than ``ratio`` (> 1).

    Large 3D meshes take the compiled loop over the faces (same result, no per-pair
    arrays); 2D meshes and small ones the numpy code below (the reference)."""
    if mesh.dim == 3 and kernels.use_compiled(mesh.n_cells):
        return _size_jumps_compiled(mesh, topo, ratio, max_listed)
    pairs = neighbour_pairs(mesh, topo)
    size = cell_sizes(topo)
    if not len(pairs):
        return _no_pairs(ratio)
    a, b = size[pairs[:, 0]], size[pairs[:, 1]]
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(lo > 0, hi / np.where(lo > 0, lo, 1.0), np.inf)
    r = np.where(np.isfinite(a) & np.isfinite(b), r, np.nan)
    over = np.flatnonzero(r > ratio)
    order = over[np.argsort(-r[over], kind="stable")][:max_listed]
    finite = r[np.isfinite(r)]
    return _listed(mesh, size, ratio, len(over), float(finite.max()) if len(finite) else 1.0,
                   pairs[order], r[order])


def _no_pairs(ratio: float) -> SizeJumps:
    z = np.zeros((0, 2))
    return SizeJumps(float(ratio), 0, 1.0, z.astype(np.int64), np.zeros(0), np.zeros((0, 3)), z)


def _listed(mesh: Mesh, size: np.ndarray, ratio: float, count: int, max_ratio: float,
            p: np.ndarray, r: np.ndarray) -> SizeJumps:
    """The result from the listed pairs p (k, 2) and their ratios r (k,)."""
    small_first = np.where((size[p[:, 0]] <= size[p[:, 1]])[:, None], p, p[:, ::-1])
    loc = 0.5 * (mesh.centroids_of(small_first[:, 0]) + mesh.centroids_of(small_first[:, 1]))
    return SizeJumps(float(ratio), int(count), max_ratio, small_first, r, loc, size[small_first])


def _size_jumps_compiled(mesh: Mesh, topo: Topology, ratio: float,
                         max_listed: int) -> SizeJumps:
    """:func:`size_jumps` of a 3D mesh by :func:`meshcheck.kernels.geometry.face_jumps`:
    only the pairs over the ratio are kept (face order = pair order, so the stable
    sort lists the same pairs)."""
    from .kernels import geometry as kg

    size = cell_sizes(topo)
    faces = topo.faces
    # (one thread: two threads measured no faster on the loaded 2-core machine)
    n_pairs, best, fid, r = kg.face_jumps(faces.cells, faces.count, size, float(ratio), 0,
                                          len(faces))
    if not n_pairs:
        return _no_pairs(ratio)
    order = np.argsort(-r, kind="stable")[:max_listed]
    return _listed(mesh, size, ratio, len(fid), float(best) if np.isfinite(best) else 1.0,
                   faces.cells[fid[order]], r[order])
