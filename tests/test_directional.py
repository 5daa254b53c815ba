"""Directional orders: DOF counts against a brute-force count over mesh entities and the
closed form of a structured grid; the saving on a stretched mesh."""
import itertools

import numpy as np
import pytest

from meshcheck.advice import AdviceSettings
from meshcheck.cells import CELL_TYPES
from meshcheck.cost import condensed_dofs, lagrange_dofs
from meshcheck.directional import (cell_direction_orders, count_dofs, direction_groups,
                                   directional_orders)
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.topology import build_topology
from meshes import grid_hexes, grid_points, tet_box

# hexahedron split into two prisms (VTK wedge order, bottom triangle then top)
HEX_TO_WEDGES = np.array([[0, 1, 2, 4, 5, 6], [0, 2, 3, 4, 6, 7]])


def _brute_force(mesh, orders):
    """Unknowns by enumerating every cell's vertices, edges, faces and interior in Python.

    Per-direction orders: an edge takes the cell's order of its direction; a quadrilateral
    face is identified with its two pairs of opposite sides and takes, per pair, the order
    of that direction; shared entities keep the maximum (dicts keyed by node sets).
    """
    verts, edges, tri_faces, quad_faces = set(), {}, {}, {}
    interior = 0
    gid = 0
    for b in mesh.blocks:
        info = CELL_TYPES[b.type]
        groups = direction_groups(b.type)
        col = {}
        for j, g in enumerate(groups):
            for e in g:
                col.setdefault(e, j)
        for cell in b.cells:
            o = orders[gid]
            gid += 1
            c = [int(x) for x in cell[:info.n_corners]]
            verts.update(c)
            for k, (a, bb, _) in enumerate(info.edges):
                key = frozenset((c[a], c[bb]))
                edges[key] = max(edges.get(key, 1), int(o[col[k]]))
            side_col = {frozenset((int(a), int(bb))): col[k] for k, (a, bb, _) in
                        enumerate(info.edges)}
            if info.dim == 3:
                for f in info.faces:
                    key = frozenset(c[i] for i in f)
                    if len(f) == 3:
                        p = int(o[side_col[frozenset((f[0], f[1]))]])
                        tri_faces[key] = max(tri_faces.get(key, 1), p)
                    else:
                        for s in (0, 1):   # sides s and s + 2 are opposite
                            pair = frozenset([frozenset((c[f[s]], c[f[s + 1]])),
                                              frozenset((c[f[s + 2]], c[f[(s + 3) % 4]]))])
                            p = int(o[side_col[frozenset((f[s], f[s + 1]))]])
                            quad_faces[(key, pair)] = max(quad_faces.get((key, pair), 1), p)
            q = [int(x) - 1 for x in o]
            lin = info.linear
            interior += {"hexahedron": q[0] * q[1] * q[2],
                         "wedge": q[0] * (q[0] - 1) // 2 * q[2],
                         "quad": q[0] * q[1],
                         "tetra": q[0] * (q[0] - 1) * (q[0] - 2) // 6,
                         "triangle": q[0] * (q[0] - 1) // 2,
                         "pyramid": q[0] * (q[0] - 1) * (2 * q[0] - 1) // 6}[lin]
    n = len(verts) + sum(p - 1 for p in edges.values())
    n += sum((p - 1) * (p - 2) // 2 for p in tri_faces.values())
    by_face = {}
    for (key, pair), p in quad_faces.items():
        by_face.setdefault(key, []).append(p - 1)
    n += sum(int(np.prod(v)) for v in by_face.values())
    return n, n + interior


def _hex_mesh(n=(3, 2, 2), size=(3.0, 1.0, 1.0)):
    pts = grid_points(n, size)
    h = grid_hexes(n)
    return Mesh(pts, (CellBlock("hexahedron", h, np.ones(len(h))),))


def _hex_wedge_mesh():
    n = (4, 2, 2)
    pts = grid_points(n, (2.0, 1.0, 1.0))
    h = grid_hexes(n)
    left = pts[h].mean(1)[:, 0] < 1.0
    wedges = h[~left][:, HEX_TO_WEDGES].reshape(-1, 6)
    return Mesh(pts, (CellBlock("hexahedron", h[left], np.ones(left.sum())),
                      CellBlock("wedge", wedges, np.full(len(wedges), 2))))


def _quad_mesh(nx=4, ny=3):
    x, y = np.meshgrid(np.linspace(0, 2, nx + 1), np.linspace(0, 1, ny + 1), indexing="ij")
    pts = np.column_stack([x.ravel(), y.ravel(), np.zeros(x.size)])
    idx = np.arange(x.size).reshape(x.shape)
    i, j = np.meshgrid(np.arange(nx), np.arange(ny), indexing="ij")
    i, j = i.ravel(), j.ravel()
    q = np.column_stack([idx[i, j], idx[i + 1, j], idx[i + 1, j + 1], idx[i, j + 1]])
    return Mesh(pts, (CellBlock("quad", q, np.ones(len(q))),), dim=2)


def _random_orders(mesh, seed):
    rng = np.random.default_rng(seed)
    o = rng.integers(1, 7, size=(mesh.n_cells, 3))
    start = 0
    for b in mesh.blocks:
        blk = o[start:start + len(b)]
        if b.info.linear == "wedge":
            blk[:, 1] = blk[:, 0]
        if b.info.linear in ("tetra", "pyramid", "triangle"):
            blk[:, 1:] = blk[:, :1]
        if b.info.dim == 2:
            blk[:, 2] = 0
            if b.info.linear == "triangle":
                blk[:, 1] = blk[:, 0]
        start += len(b)
    return o


MESHES = {"hex": _hex_mesh, "hex_wedge": _hex_wedge_mesh, "quad2d": _quad_mesh,
          "tet": lambda: tet_box((2, 2, 1))}


@pytest.mark.parametrize("name,seed", list(itertools.product(MESHES, [0, 1, 2])),
                         ids=[f"{m}-{s}" for m, s in itertools.product(MESHES, [0, 1, 2])])
@pytest.mark.parametrize("kernels", ["numpy", "numba"])
def test_count_matches_brute_force(name, seed, kernels, monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", kernels)
    mesh = MESHES[name]()
    orders = _random_orders(mesh, seed)
    assert count_dofs(mesh, build_topology(mesh), orders) == _brute_force(mesh, orders)


def _perturbed_mixed_mesh(seed):
    """Hexahedra and prisms on a jittered grid with the cells shuffled and the nodes
    renumbered at random (so edge and node numbers carry no grid order)."""
    rng = np.random.default_rng(seed)
    n = (5, 4, 3)
    pts = grid_points(n, (2.0, 1.0, 1.0)) + rng.normal(0, 0.02, ((6 * 5 * 4), 3))
    h = grid_hexes(n)
    left = rng.random(len(h)) < 0.5
    wedges = h[~left][:, HEX_TO_WEDGES].reshape(-1, 6)
    perm = rng.permutation(len(pts))
    inv = np.argsort(perm)
    hexes = inv[h[left]][rng.permutation(int(left.sum()))]
    wedges = inv[wedges][rng.permutation(len(wedges))]
    return Mesh(pts[perm], (CellBlock("hexahedron", hexes, np.ones(len(hexes))),
                            CellBlock("wedge", wedges, np.full(len(wedges), 2))))


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_compiled_counts_equal_the_numpy_reference(seed, monkeypatch):
    mesh = _perturbed_mixed_mesh(seed)
    topo = build_topology(mesh)
    orders = _random_orders(mesh, seed)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = count_dofs(mesh, topo, orders)
    ref_dir = directional_orders(mesh, topo, np.random.default_rng(seed).integers(
        1, 9, len(topo.edges)), 8)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    assert count_dofs(mesh, topo, orders) == ref == _brute_force(mesh, orders)
    got = directional_orders(mesh, topo, np.random.default_rng(seed).integers(
        1, 9, len(topo.edges)), 8)
    np.testing.assert_array_equal(got.orders, ref_dir.orders)
    assert (got.dofs_directional, got.dofs_isotropic, got.total_directional,
            got.total_isotropic) == (ref_dir.dofs_directional, ref_dir.dofs_isotropic,
                                     ref_dir.total_directional, ref_dir.total_isotropic)


@pytest.mark.parametrize("p", [(1, 1, 1), (3, 1, 2), (2, 5, 4), (6, 6, 6)],
                         ids=["111", "312", "254", "666"])
def test_uniform_directional_orders_on_a_grid_closed_form(p):
    # V + sum_i (p_i - 1) E_i + sum_{i<j} (p_i - 1)(p_j - 1) F_ij + prod (p_i - 1) N
    n = np.array([3, 2, 4])
    mesh = _hex_mesh(tuple(n), (1.0, 1.0, 1.0))
    q = np.array(p) - 1
    V = np.prod(n + 1)
    E = [n[i] * np.prod(np.delete(n + 1, i)) for i in range(3)]     # edges along direction i
    F = {(i, j): n[i] * n[j] * (n[3 - i - j] + 1) for i, j in ((0, 1), (0, 2), (1, 2))}
    cond = V + sum(q[i] * E[i] for i in range(3)) + sum(q[i] * q[j] * F[i, j] for i, j in F)
    total = cond + np.prod(q) * np.prod(n)
    got = count_dofs(mesh, build_topology(mesh), np.tile(p, (mesh.n_cells, 1)))
    assert got == (cond, total)


@pytest.mark.parametrize("p", [1, 2, 3, 5])
def test_isotropic_counts_agree_with_cost_module(p):
    mesh = _hex_wedge_mesh()
    topo = build_topology(mesh)
    o = np.full((mesh.n_cells, 3), p)
    expected = (condensed_dofs(mesh, topo, p), lagrange_dofs(mesh, topo, p))
    assert count_dofs(mesh, topo, o) == expected


def test_groups_follow_parametric_directions():
    # the edges of each group of a reference hexahedron run along r, s, t
    ref = CELL_TYPES["hexahedron"].ref_coords
    e = CELL_TYPES["hexahedron"].edges
    for axis, g in enumerate(direction_groups("hexahedron")):
        d = ref[e[list(g), 1]] - ref[e[list(g), 0]]
        assert np.all(np.abs(d[:, axis]) == 1) and np.all(np.delete(d, axis, axis=1) == 0)


def test_stretched_mesh_orders_and_saving():
    # cells 8x longer along x: the x-edges need a higher order than the y and z edges
    n = (4, 8, 8)
    pts = grid_points(n, (2.0, 0.5, 0.5))
    h = grid_hexes(n)
    mesh = Mesh(pts, (CellBlock("hexahedron", h, np.ones(len(h))),))
    res = audit(mesh, AuditSettings((1500.0,), AdviceSettings(max_order=8), speed=343.0))
    d = res.directional
    topo = res.topology
    o = cell_direction_orders(mesh, topo, res.advice.edge_order, 8)
    assert np.all(o[:, 0] > o[:, 1]) and np.all(o[:, 1] == o[:, 2])
    assert d.anisotropic_cells == mesh.n_cells
    assert d.dofs_directional < d.dofs_isotropic and 0 < d.saving < 1
    assert (d.dofs_directional, d.total_directional) == _brute_force(mesh, o)
    iso = np.tile(o.max(axis=1)[:, None], (1, 3))
    assert (d.dofs_isotropic, d.total_isotropic) == _brute_force(mesh, iso)


def test_directional_orders_result_on_a_cube_grid_has_no_saving():
    mesh = _hex_mesh((3, 3, 3), (1.0, 1.0, 1.0))
    topo = build_topology(mesh)
    eo = np.full(len(topo.edges), 4)
    d = directional_orders(mesh, topo, eo, 8)
    assert d.saving == 0.0 and d.anisotropic_cells == 0


@pytest.mark.parametrize("seed", [0, 1])
def test_compiled_count_reads_the_topology_faces(seed, monkeypatch):
    # faces of at most two cells: the compiled count takes the topology's faces (no
    # table of its own) and still equals the brute-force count
    import meshcheck.directional as D

    def no_table(*a):
        raise AssertionError("own face table built")

    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    monkeypatch.setattr(D, "_edge_pair_rows", no_table)
    mesh = _perturbed_mixed_mesh(seed)
    orders = _random_orders(mesh, seed)
    assert count_dofs(mesh, build_topology(mesh), orders) == _brute_force(mesh, orders)


def test_face_of_three_cells_counts_as_the_numpy_reference(monkeypatch):
    # a hexahedron duplicated on top of another: their shared faces have three or two
    # cells; the topology keeps two, so the compiled count builds its own face table
    import meshcheck.directional as D

    mesh0 = _hex_mesh((2, 1, 1), (2.0, 1.0, 1.0))
    b = mesh0.blocks[0]
    mesh = Mesh(mesh0.points, (CellBlock("hexahedron", np.vstack([b.cells, b.cells[1:]]),
                                         np.ones(len(b.cells) + 1)),))
    topo = build_topology(mesh)
    assert topo.faces.count.max() == 3
    orders = _random_orders(mesh, 4)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = count_dofs(mesh, topo, orders)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    assert D._face_sides(mesh, topo) is None
    assert count_dofs(mesh, topo, orders) == ref == _brute_force(mesh, orders)
