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
"""
from __future__ import annotations

import numpy as np

from .mesh import Mesh
from .topology import Topology

__all__ = ["face_dofs", "interior_dofs", "lagrange_dofs", "condensed_dofs",
           "variable_order_dofs"]


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


def _used_vertices(mesh: Mesh) -> int:
    used = np.zeros(mesh.n_points, bool)
    for b in mesh.blocks:
        used[b.cells[:, :b.info.n_corners]] = True
    return int(used.sum())


def _face_kinds(topo: Topology) -> tuple[int, int]:
    tri = int(np.count_nonzero(topo.faces.nodes[:, 3] < 0))
    return tri, len(topo.faces) - tri


def condensed_dofs(mesh: Mesh, topo: Topology, p: int) -> int:
    """Global unknowns at uniform order p with cell interiors condensed."""
    n_tri, n_quad = _face_kinds(topo)
    return int(_used_vertices(mesh) + (p - 1) * len(topo.edges)
               + n_tri * face_dofs(3, p) + n_quad * face_dofs(4, p))


def lagrange_dofs(mesh: Mesh, topo: Topology, p: int) -> int:
    """Global unknowns of the order-p Lagrange space (interiors included)."""
    inner = sum(len(b) * interior_dofs(b.info.linear, p) for b in mesh.blocks)
    if mesh.dim == 2:  # the cells are the faces
        return int(_used_vertices(mesh) + (p - 1) * len(topo.edges) + inner)
    return condensed_dofs(mesh, topo, p) + int(inner)


def variable_order_dofs(mesh: Mesh, topo: Topology, cell_limits: np.ndarray,
                        frequencies: np.ndarray, max_order: int) -> np.ndarray:
    """Condensed hierarchical unknowns per frequency for variable order.

    cell_limits : (n_cells, pmax) highest usable frequency of each cell per order
        (non-decreasing along the order axis), Hz.
    frequencies : (n_f,) Hz.  A cell takes the lowest order whose limit reaches
    the frequency, capped at ``max_order``; edges and faces take the highest
    order of their cells (maximum rule).  Cost O((n_entities) log n) per order,
    independent of the number of frequencies.
    Returns (n_f,) int64.
    """
    f = np.asarray(frequencies, dtype=float)
    total = np.full(f.shape, _used_vertices(mesh), dtype=np.int64)
    faces = topo.faces
    is_tri = faces.nodes[:, 3] < 0 if len(faces) else np.zeros(0, bool)
    inner = faces.count >= 1
    for q in range(1, max_order):
        col = np.ascontiguousarray(cell_limits[:, q - 1])
        # an edge has order > q where one of its cells has (limit at q below f)
        g_edge = np.sort(topo.edges.from_cells(col, np.minimum))
        total += np.searchsorted(g_edge, f, side="left")
        if mesh.dim == 3 and len(faces):
            c0, c1 = faces.cells[:, 0], faces.cells[:, 1]
            g_face = np.where(c1 >= 0, np.minimum(col[c0], col[np.maximum(c1, 0)]), col[c0])
            for kind, inc in ((is_tri & inner, q - 1), (~is_tri & inner, 2 * q - 1)):
                if inc > 0 and kind.any():
                    total += inc * np.searchsorted(np.sort(g_face[kind]), f, side="left")
    return total
