"""Tiny meshes built in code for the tests (no binary fixtures)."""
from __future__ import annotations

import numpy as np

from meshcheck.mesh import CellBlock, Mesh

# Kuhn (Freudenthal) split of the unit cube into 6 tets sharing the diagonal 0-6,
# in VTK hex numbering; every tet positively oriented.
#: relative tolerance of frequency limits read from the advice's limit table, which is
#: stored in float32 (meshcheck.advice.LIMIT_DTYPE): each value is rounded by at most
#: 2^-24 relative, a ratio of two such values by about 2^-23
LIMIT_RTOL = 2.0 ** -22

KUHN = np.array([[0, 1, 2, 6], [0, 2, 3, 6], [0, 3, 7, 6], [0, 7, 4, 6], [0, 4, 5, 6],
                 [0, 5, 1, 6]])


def grid_points(n: tuple[int, int, int], size=(1.0, 1.0, 1.0), origin=(0.0, 0.0, 0.0)):
    axes = [np.linspace(o, o + s, k + 1) for o, s, k in zip(origin, size, n)]
    x, y, z = np.meshgrid(*axes, indexing="ij")
    return np.column_stack([x.ravel(), y.ravel(), z.ravel()])


def grid_hexes(n: tuple[int, int, int]) -> np.ndarray:
    nx, ny, nz = n
    idx = np.arange((nx + 1) * (ny + 1) * (nz + 1)).reshape(nx + 1, ny + 1, nz + 1)
    i, j, k = np.meshgrid(np.arange(nx), np.arange(ny), np.arange(nz), indexing="ij")
    i, j, k = i.ravel(), j.ravel(), k.ravel()
    corners = [(0, 0, 0), (1, 0, 0), (1, 1, 0), (0, 1, 0), (0, 0, 1), (1, 0, 1), (1, 1, 1),
               (0, 1, 1)]
    return np.column_stack([idx[i + a, j + b, k + c] for a, b, c in corners])


def hex_box(n=(4, 4, 4), size=(1.0, 1.0, 1.0), origin=(0.0, 0.0, 0.0), region=1) -> Mesh:
    pts = grid_points(n, size, origin)
    h = grid_hexes(n)
    return Mesh(pts, (CellBlock("hexahedron", h, np.full(len(h), region)),), {region: "air"},
                3, "box", "m")


def tet_box(n=(4, 4, 4), size=(1.0, 1.0, 1.0), origin=(0.0, 0.0, 0.0), region=1) -> Mesh:
    pts = grid_points(n, size, origin)
    t = grid_hexes(n)[:, KUHN].reshape(-1, 4)
    return Mesh(pts, (CellBlock("tetra", t, np.full(len(t), region)),), {region: "air"}, 3,
                "tetbox", "m")


def tet10_box(n=(2, 2, 2), size=(1.0, 1.0, 1.0)) -> Mesh:
    """Quadratic tets with straight edges (mid-nodes at edge midpoints)."""
    lin = tet_box(n, size)
    t = lin.blocks[0].cells
    e = np.array([(0, 1), (1, 2), (2, 0), (0, 3), (1, 3), (2, 3)])
    a, b = t[:, e[:, 0]], t[:, e[:, 1]]
    key = np.minimum(a, b) * len(lin.points) + np.maximum(a, b)
    uniq, inv = np.unique(key.ravel(), return_inverse=True)
    ua, ub = uniq // len(lin.points), uniq % len(lin.points)
    mids = 0.5 * (lin.points[ua] + lin.points[ub])
    pts = np.vstack([lin.points, mids])
    cells = np.column_stack([t, len(lin.points) + inv.reshape(a.shape)])
    return Mesh(pts, (CellBlock("tetra10", cells, np.ones(len(cells))),), {1: "air"}, 3,
                "tet10box", "m")
