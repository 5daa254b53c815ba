"""Reproducible gmsh meshes as meshcheck Meshes (reference meshes for calibration,
the validation study and tests).

gmsh is an optional dependency: import this module only where gmsh is wanted.
"""
from __future__ import annotations

from typing import Callable

import numpy as np

from .mesh import CellBlock, Mesh

__all__ = ["DETERMINISTIC", "generate"]

#: options that make gmsh's Delaunay meshes repeatable: one thread, a fixed seed,
#: Frontal-Delaunay in 2D, Delaunay in 3D, no terminal output
DETERMINISTIC = {"General.Terminal": 0, "General.NumThreads": 1, "Mesh.RandomSeed": 1,
                 "Mesh.Algorithm": 6, "Mesh.Algorithm3D": 1}

#: gmsh element type -> (meshcheck cell type, corners), linear cells only
_TYPES = {3: ((4, "tetra", 4), (6, "wedge", 6), (5, "hexahedron", 8), (7, "pyramid", 5)),
          2: ((2, "triangle", 3), (3, "quad", 4))}


def generate(build: Callable, dim: int = 3, options: dict | None = None,
             name: str = "gmsh", region_name: str = "air") -> Mesh:
    """Mesh the model that ``build(gmsh)`` creates (after gmsh is initialised with
    :data:`DETERMINISTIC` updated by ``options``) in dimension ``dim``.

    Returns the linear cells of that dimension as one region (tag 1, ``region_name``),
    coordinates as gmsh gives them (taken as metres), nodes used by no cell dropped;
    tetrahedra and triangles with a negative volume (area) are turned round.
    """
    import gmsh

    gmsh.initialize(interruptible=False)
    try:
        for key, value in {**DETERMINISTIC, **(options or {})}.items():
            gmsh.option.setNumber(key, value)
        build(gmsh)
        gmsh.model.mesh.generate(dim)
        tags, xyz, _ = gmsh.model.mesh.getNodes()
        found = []
        for etype, kind, n in _TYPES[dim]:
            _, nodes = gmsh.model.mesh.getElementsByType(etype)
            if len(nodes):
                found.append((kind, np.asarray(nodes, np.int64).reshape(-1, n)))
    finally:
        gmsh.finalize()
    index = np.full(int(tags.max()) + 1, -1, np.int64)
    index[tags.astype(np.int64)] = np.arange(len(tags))
    pts = np.asarray(xyz, float).reshape(-1, 3)
    used = np.zeros(len(pts), bool)
    for _, nodes in found:
        used[index[nodes]] = True
    new = np.cumsum(used) - 1
    blocks = []
    for kind, nodes in found:
        cells = new[index[nodes]]
        if kind in ("tetra", "triangle"):
            a, b, c = (pts[used][cells[:, i]] for i in range(3))
            if kind == "tetra":
                sign = np.einsum("ij,ij->i", b - a, np.cross(c - a, pts[used][cells[:, 3]] - a))
            else:
                sign = np.cross(b - a, c - a)[:, 2]
            neg = sign < 0
            cells[neg, 1], cells[neg, 2] = cells[neg, 2].copy(), cells[neg, 1].copy()
        blocks.append(CellBlock(kind, cells, np.ones(len(cells), np.int64)))
    return Mesh(pts[used], tuple(blocks), {1: region_name}, dim, name, "m")
