"""Compiled kernels of :mod:`meshcheck.cost` (same results as its numpy code).

* :func:`face_pass`: in one pass over the faces of a mesh with one volume block, each
  face's edges (its first cell's local edges of the face's sides), the faces of each
  edge, the sides' ends at each node and the faces of each cell by kind (the numpy
  code's chunked gathers and bincounts).
"""
from __future__ import annotations

from . import njit

__all__ = ["face_pass"]


@njit
def face_pass(face_cells, local, tri, cell_edges, off, table, edge_nodes, face_edges,
              faces_per_edge, side_ends, cell_faces):
    """For every face f: face_edges[f, j] = cell_edges[face_cells[f, 0] - off,
    table[local[f], j]] (-1 where the table has -1); for each of those edges e,
    faces_per_edge[e] += 1 and side_ends[n] += 1 at both its nodes n; and
    cell_faces[c, tri[f]] += 1 for each of its (one or two) cells c.

    face_cells : (n_f, 2) int (-1: no second cell); local, tri : (n_f,) uint8;
    cell_edges : (m, k) int of the block whose first cell is ``off``; table : (faces of
    the cell type, 4) int64 local edges of each face's sides; edge_nodes : (n_e, 2) int;
    face_edges : (n_f, 4) int out; faces_per_edge : (n_e,) int32, side_ends :
    (n_points,) int64, cell_faces : (n_cells, 2) uint8, all zeroed."""
    for f in range(face_cells.shape[0]):
        c = face_cells[f, 0]
        r = local[f]
        for j in range(4):
            le = table[r, j]
            if le >= 0:
                e = cell_edges[c - off, le]
                face_edges[f, j] = e
                faces_per_edge[e] += 1
                side_ends[edge_nodes[e, 0]] += 1
                side_ends[edge_nodes[e, 1]] += 1
            else:
                face_edges[f, j] = -1
        t = tri[f]
        cell_faces[c, t] += 1
        c1 = face_cells[f, 1]
        if c1 >= 0:
            cell_faces[c1, t] += 1
