"""Lookup tables per cell type, in one place.

Node orders follow meshio, which uses the VTK conventions for every type
meshcheck accepts (meshio permutes gmsh's quadratic orders on reading).
Reference (parametric) coordinates are VTK's ``GetParametricCoords``:

* tetra: (0,0,0) (1,0,0) (0,1,0) (0,0,1)
* hexahedron: bottom 0-1-2-3 counter-clockwise seen from +z, top 4-5-6-7
* wedge: triangle 0-1-2 at z=0 (counter-clockwise seen from +z), 3-4-5 at z=1
* pyramid: base 0-1-2-3 counter-clockwise seen from the apex 4

Every reference cell has a positive Jacobian in this orientation (tested).
Local edges are given as (corner a, corner b, mid-node or -1); local faces as
tuples of corner indices ordered so that their right-hand normal points out
of the cell.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CellType", "CELL_TYPES", "VOLUME_TYPES", "SURFACE_TYPES", "cell_type"]


@dataclass(frozen=True)
class CellType:
    """Static description of one cell type.

    Attributes
    ----------
    name : meshio name, e.g. ``"tetra10"``.
    dim : topological dimension (2 or 3).
    n_nodes : number of nodes per cell.
    n_corners : number of corner (vertex) nodes; corners come first.
    linear : meshio name of the linear cell with the same corners.
    edges : (n_edges, 3) int, columns corner a, corner b, mid-node (-1 if none).
    faces : tuple of corner-index tuples (3 or 4 corners), outward normals.
        For 2D cells this is the single face (the cell itself).
    ref_coords : (n_nodes, 3) float, VTK parametric coordinates.
    """

    name: str
    dim: int
    n_nodes: int
    n_corners: int
    linear: str
    edges: np.ndarray
    faces: tuple[tuple[int, ...], ...]
    ref_coords: np.ndarray

    @property
    def quadratic(self) -> bool:
        return self.n_nodes > self.n_corners

    @property
    def n_edges(self) -> int:
        return len(self.edges)


def _e(pairs, mids=None):
    mids = [-1] * len(pairs) if mids is None else mids
    return np.array([(a, b, m) for (a, b), m in zip(pairs, mids)], dtype=np.int64)


_TET_EDGES = [(0, 1), (1, 2), (2, 0), (0, 3), (1, 3), (2, 3)]
_TET_FACES = ((0, 2, 1), (0, 1, 3), (1, 2, 3), (0, 3, 2))
_TET_REF = [[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]]
_TET10_MID = [[.5, 0, 0], [.5, .5, 0], [0, .5, 0], [0, 0, .5], [.5, 0, .5], [0, .5, .5]]

_HEX_EDGES = [(0, 1), (1, 2), (2, 3), (3, 0), (4, 5), (5, 6), (6, 7), (7, 4),
              (0, 4), (1, 5), (2, 6), (3, 7)]
_HEX_FACES = ((0, 3, 2, 1), (4, 5, 6, 7), (0, 1, 5, 4), (1, 2, 6, 5),
              (2, 3, 7, 6), (3, 0, 4, 7))
_HEX_REF = [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0],
            [0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]]
_HEX20_MID = [[.5, 0, 0], [1, .5, 0], [.5, 1, 0], [0, .5, 0],
              [.5, 0, 1], [1, .5, 1], [.5, 1, 1], [0, .5, 1],
              [0, 0, .5], [1, 0, .5], [1, 1, .5], [0, 1, .5]]
_HEX27_EXTRA = [[0, .5, .5], [1, .5, .5], [.5, 0, .5], [.5, 1, .5],
                [.5, .5, 0], [.5, .5, 1], [.5, .5, .5]]

_WEDGE_EDGES = [(0, 1), (1, 2), (2, 0), (3, 4), (4, 5), (5, 3), (0, 3), (1, 4), (2, 5)]
_WEDGE_FACES = ((0, 2, 1), (3, 4, 5), (0, 1, 4, 3), (1, 2, 5, 4), (2, 0, 3, 5))
_WEDGE_REF = [[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [1, 0, 1], [0, 1, 1]]
_WEDGE15_MID = [[.5, 0, 0], [.5, .5, 0], [0, .5, 0], [.5, 0, 1], [.5, .5, 1],
                [0, .5, 1], [0, 0, .5], [1, 0, .5], [0, 1, .5]]

_PYR_EDGES = [(0, 1), (1, 2), (2, 3), (3, 0), (0, 4), (1, 4), (2, 4), (3, 4)]
_PYR_FACES = ((0, 3, 2, 1), (0, 1, 4), (1, 2, 4), (2, 3, 4), (3, 0, 4))
_PYR_REF = [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0], [0, 0, 1]]

_TRI_EDGES = [(0, 1), (1, 2), (2, 0)]
_TRI_REF = [[0, 0, 0], [1, 0, 0], [0, 1, 0]]
_TRI6_MID = [[.5, 0, 0], [.5, .5, 0], [0, .5, 0]]
_QUAD_EDGES = [(0, 1), (1, 2), (2, 3), (3, 0)]
_QUAD_REF = [[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0]]
_QUAD8_MID = [[.5, 0, 0], [1, .5, 0], [.5, 1, 0], [0, .5, 0]]


def _make(name, dim, n_corners, linear, pairs, faces, ref, extra=(), n_mid=0):
    ref = np.array(list(ref) + list(extra), dtype=float)
    mids = list(range(n_corners, n_corners + len(pairs))) if n_mid else None
    return CellType(name, dim, len(ref), n_corners, linear, _e(pairs, mids),
                    tuple(faces), ref)


CELL_TYPES: dict[str, CellType] = {c.name: c for c in [
    _make("tetra", 3, 4, "tetra", _TET_EDGES, _TET_FACES, _TET_REF),
    _make("tetra10", 3, 4, "tetra", _TET_EDGES, _TET_FACES, _TET_REF, _TET10_MID, 1),
    _make("hexahedron", 3, 8, "hexahedron", _HEX_EDGES, _HEX_FACES, _HEX_REF),
    _make("hexahedron20", 3, 8, "hexahedron", _HEX_EDGES, _HEX_FACES, _HEX_REF,
          _HEX20_MID, 1),
    _make("hexahedron27", 3, 8, "hexahedron", _HEX_EDGES, _HEX_FACES, _HEX_REF,
          _HEX20_MID + _HEX27_EXTRA, 1),
    _make("wedge", 3, 6, "wedge", _WEDGE_EDGES, _WEDGE_FACES, _WEDGE_REF),
    _make("wedge15", 3, 6, "wedge", _WEDGE_EDGES, _WEDGE_FACES, _WEDGE_REF,
          _WEDGE15_MID, 1),
    _make("pyramid", 3, 5, "pyramid", _PYR_EDGES, _PYR_FACES, _PYR_REF),
    _make("triangle", 2, 3, "triangle", _TRI_EDGES, [(0, 1, 2)], _TRI_REF),
    _make("triangle6", 2, 3, "triangle", _TRI_EDGES, [(0, 1, 2)], _TRI_REF,
          _TRI6_MID, 1),
    _make("quad", 2, 4, "quad", _QUAD_EDGES, [(0, 1, 2, 3)], _QUAD_REF),
    _make("quad8", 2, 4, "quad", _QUAD_EDGES, [(0, 1, 2, 3)], _QUAD_REF, _QUAD8_MID, 1),
    _make("quad9", 2, 4, "quad", _QUAD_EDGES, [(0, 1, 2, 3)], _QUAD_REF,
          _QUAD8_MID + [[.5, .5, 0]], 1),
]}

VOLUME_TYPES = frozenset(n for n, c in CELL_TYPES.items() if c.dim == 3)
SURFACE_TYPES = frozenset(n for n, c in CELL_TYPES.items() if c.dim == 2)


def cell_type(name: str) -> CellType:
    """Return the table for a meshio cell type name (KeyError if unsupported)."""
    return CELL_TYPES[name]
