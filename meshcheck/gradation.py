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
    """(n_cells,) float64 mean edge length of every cell, metres."""
    out = [topo.edges.length[ce].mean(axis=1) for ce in topo.edges.cell_edges]
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
    """Neighbours whose mean edge lengths differ by more than ``ratio`` (> 1)."""
    pairs = neighbour_pairs(mesh, topo)
    size = cell_sizes(topo)
    if not len(pairs):
        z = np.zeros((0, 2))
        return SizeJumps(float(ratio), 0, 1.0, z.astype(np.int64), np.zeros(0), np.zeros((0, 3)), z)
    a, b = size[pairs[:, 0]], size[pairs[:, 1]]
    lo, hi = np.minimum(a, b), np.maximum(a, b)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(lo > 0, hi / np.where(lo > 0, lo, 1.0), np.inf)
    r = np.where(np.isfinite(a) & np.isfinite(b), r, np.nan)
    over = np.flatnonzero(r > ratio)
    order = over[np.argsort(-r[over], kind="stable")][:max_listed]
    p = pairs[order]
    small_first = np.where((size[p[:, 0]] <= size[p[:, 1]])[:, None], p, p[:, ::-1])
    loc = 0.5 * (mesh.centroids_of(small_first[:, 0]) + mesh.centroids_of(small_first[:, 1]))
    finite = r[np.isfinite(r)]
    return SizeJumps(float(ratio), int(len(over)), float(finite.max()) if len(finite) else 1.0,
                     small_first, r[order], loc, size[small_first])
