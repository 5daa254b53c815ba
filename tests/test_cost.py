"""Unknown counts against closed forms and a brute-force count."""
import itertools

import numpy as np
import pytest

from meshcheck.cost import condensed_dofs, face_dofs, interior_dofs, lagrange_dofs, \
    variable_order_dofs
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology
from meshes import hex_box, tet_box


@pytest.mark.parametrize("p", [1, 2, 3, 5])
@pytest.mark.parametrize("make", [hex_box, tet_box], ids=["hex", "kuhn-tet"])
def test_lagrange_dofs_structured_cube(make, p):
    # the order-p Lagrange nodes of an n^3 grid (hexes, or its Kuhn tets) are the points of
    # the p-times finer lattice: (p n + 1)^3 (closed form)
    n = 3
    mesh = make((n, n, n))
    assert lagrange_dofs(mesh, build_topology(mesh), p) == (p * n + 1) ** 3


def _lattice_count(mesh: Mesh, p: int) -> int:
    """Brute force: distinct points of all order-p Lagrange lattices of the cells."""
    pts = set()
    for b in mesh.blocks:
        X = mesh.points[b.cells[:, :b.info.n_corners]]
        if b.info.linear == "tetra":
            for i, j, k in itertools.product(range(p + 1), repeat=3):
                if i + j + k <= p:
                    lam = np.array([p - i - j - k, i, j, k]) / p
                    for q in np.einsum("k,ckd->cd", lam, X):
                        pts.add(tuple(np.round(q, 9)))
    return len(pts)


@pytest.mark.parametrize("p", [2, 3, 4])
def test_lagrange_dofs_brute_force_tets(p):
    mesh = tet_box((2, 1, 1), size=(2.0, 1.0, 1.0))
    assert lagrange_dofs(mesh, build_topology(mesh), p) == _lattice_count(mesh, p)


@pytest.mark.parametrize("p", [1, 2, 4, 7])
def test_interior_counts_are_dimension_of_bubbles(p):
    # dim P_p(tet) = (p+1)(p+2)(p+3)/6 = 4 + 6(p-1) + 4 (p-1)(p-2)/2 + interior
    assert 4 + 6 * (p - 1) + 4 * face_dofs(3, p) + interior_dofs("tetra", p) == \
        (p + 1) * (p + 2) * (p + 3) // 6
    # dim Q_p(hex) = (p+1)^3
    assert 8 + 12 * (p - 1) + 6 * face_dofs(4, p) + interior_dofs("hexahedron", p) == (p + 1) ** 3
    # wedge: P_p(triangle) x P_p(line) = (p+1)(p+2)/2 (p+1)
    assert (6 + 9 * (p - 1) + 2 * face_dofs(3, p) + 3 * face_dofs(4, p)
            + interior_dofs("wedge", p)) == (p + 1) ** 2 * (p + 2) // 2


def _brute_variable(mesh, topo, orders):
    """Maximum rule, entity by entity, with Python loops (reference)."""
    edge_order = {}
    for c, edges in enumerate(np.concatenate([ce for ce in topo.edges.cell_edges])):
        for e in edges:
            edge_order[e] = max(edge_order.get(e, 1), orders[c])
    total = len(np.unique(np.concatenate([b.cells.ravel() for b in mesh.blocks])))
    total += sum(q - 1 for q in edge_order.values())
    fn = topo.faces.nodes
    for f in range(len(topo.faces)):
        c0, c1 = topo.faces.cells[f]
        q = max(orders[c0], orders[c1] if c1 >= 0 else 1)
        total += face_dofs(3 if fn[f, 3] < 0 else 4, q)
    return total


def test_variable_order_dofs_match_brute_force():
    rng = np.random.default_rng(3)
    mesh = tet_box((3, 2, 2))
    topo = build_topology(mesh)
    pmax = 6
    need = rng.integers(1, pmax + 1, mesh.n_cells)
    # limits that make cell c need order need[c] at 100 Hz
    limits = np.where(np.arange(1, pmax + 1)[None, :] >= need[:, None], 1000.0, 10.0)
    got = variable_order_dofs(mesh, topo, limits, np.array([100.0]), pmax)[0]
    assert got == _brute_variable(mesh, topo, need)


@pytest.mark.parametrize("p", [1, 3, 5])
def test_variable_order_uniform_equals_condensed(p):
    mesh = hex_box((3, 3, 2))
    topo = build_topology(mesh)
    limits = np.where(np.arange(1, 9)[None, :] >= p, 1e9, 0.0) * np.ones((mesh.n_cells, 1))
    assert variable_order_dofs(mesh, topo, limits, np.array([10.0]), 8)[0] == \
        condensed_dofs(mesh, topo, p)


# ---------------------------------------------------------------------------
# exact non-zeros: against NGSolve's matrix graph and a brute-force pair count

from meshcheck.cost import cell_orders_at, fixed_order_system, system_size, \
    variable_order_systems
from meshcheck.cells import CELL_TYPES
from meshes import grid_hexes, grid_points


def wedge_box(n=(2, 2, 1)) -> Mesh:
    """Every hex of a grid split into two wedges (triangles 0-1-2 / 0-2-3 at the bottom)."""
    h = grid_hexes(n)
    w = np.vstack([h[:, [0, 1, 2, 4, 5, 6]], h[:, [0, 2, 3, 4, 6, 7]]])
    return Mesh(grid_points(n), (CellBlock("wedge", w, np.ones(len(w))),), {1: "air"}, 3, "w", "m")


def pyramid_box(n=(2, 1, 1)) -> Mesh:
    """Every hex of a grid split into six pyramids on its faces with the apex at its centre."""
    pts = grid_points(n)
    h = grid_hexes(n)
    centres = pts[h].mean(axis=1)
    apex = len(pts) + np.arange(len(h))
    faces = CELL_TYPES["hexahedron"].faces
    pyr = np.vstack([np.column_stack([h[:, list(f[::-1])], apex]) for f in faces])
    return Mesh(np.vstack([pts, centres]), (CellBlock("pyramid", pyr, np.ones(len(pyr))),),
                {1: "air"}, 3, "p", "m")


def mixed_hex_wedge(n=(2, 2, 2)) -> Mesh:
    """Hexes for x < 1/2, wedges (two per hex, triangles on the z faces) for x > 1/2: the
    hex-wedge interfaces are quadrilaterals on both sides (conforming)."""
    h = grid_hexes(n)
    x = grid_points(n)[h].mean(axis=1)[:, 0]
    lo, hi = h[x < 0.5], h[x >= 0.5]
    w = np.vstack([hi[:, [0, 1, 2, 4, 5, 6]], hi[:, [0, 2, 3, 4, 6, 7]]])
    return Mesh(grid_points(n), (CellBlock("hexahedron", lo, np.ones(len(lo))),
                                 CellBlock("wedge", w, np.ones(len(w)))), {1: "air"}, 3, "hw", "m")


def tri_square(n=(3, 2)) -> Mesh:
    pts = grid_points((n[0], n[1], 0), size=(1.0, 1.0, 0.0))
    idx = np.arange(len(pts)).reshape(n[0] + 1, n[1] + 1)
    a, b = idx[:-1, :-1].ravel(), idx[1:, :-1].ravel()
    c, d = idx[1:, 1:].ravel(), idx[:-1, 1:].ravel()
    tri = np.vstack([np.column_stack([a, b, c]), np.column_stack([a, c, d])])
    return Mesh(pts, (CellBlock("triangle", tri, np.ones(len(tri))),), {1: "air"}, 2, "t", "m")


def quad_square(n=(3, 2)) -> Mesh:
    pts = grid_points((n[0], n[1], 0), size=(1.0, 1.0, 0.0))
    idx = np.arange(len(pts)).reshape(n[0] + 1, n[1] + 1)
    q = np.column_stack([idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(),
                         idx[:-1, 1:].ravel()])
    return Mesh(pts, (CellBlock("quad", q, np.ones(len(q))),), {1: "air"}, 2, "q", "m")


def _brute_system(mesh: Mesh, orders: np.ndarray, condensed: bool) -> tuple[int, int]:
    """Reference: entities named by their sorted vertex sets, orders by the maximum rule,
    unknowns per entity from the closed forms, non-zeros = sum over pairs of entities that
    share a cell of the product of their unknowns (Python loops)."""
    cell_entities = []
    order = {}
    for b in mesh.blocks:
        info = b.info
        for row in b.cells:
            v = row[:info.n_corners]
            ents = [("v", (int(x),)) for x in v]
            ents += [("e", tuple(sorted((int(v[a]), int(v[c]))))) for a, c, _ in info.edges]
            if mesh.dim == 3:
                ents += [("f%d" % len(f), tuple(sorted(int(v[i]) for i in f))) for f in info.faces]
            ents.append(("c:" + info.linear,
                         tuple(sorted(int(x) for x in v)) + (len(cell_entities),)))
            cell_entities.append(ents)
    for c, ents in enumerate(cell_entities):
        for e in ents:
            order[e] = max(order.get(e, 1), int(orders[c]))

    def dofs(e):
        kind, q = e[0], order[e]
        if kind == "v":
            return 1
        if kind == "e":
            return q - 1
        if kind in ("f3", "f4"):
            return face_dofs(int(kind[1]), q)
        return 0 if condensed else interior_dofs(kind[2:], q)

    pairs = set()
    for ents in cell_entities:
        for a in ents:
            for b in ents:
                pairs.add((a, b))
    ndof = sum(dofs(e) for e in order)
    nnz = sum(dofs(a) * dofs(b) for a, b in pairs)
    return ndof, nnz


MESHES = {"tet": lambda: tet_box((3, 2, 2)), "hex": lambda: hex_box((3, 2, 2)),
          "wedge": lambda: wedge_box((2, 2, 2)), "pyramid": lambda: pyramid_box((2, 1, 1)),
          "hex+wedge": lambda: mixed_hex_wedge(), "triangle": lambda: tri_square(),
          "quad": lambda: quad_square()}


@pytest.mark.parametrize("condensed", [True, False], ids=["condensed", "full"])
@pytest.mark.parametrize("name", list(MESHES))
def test_nonzeros_match_brute_force_pair_count(name, condensed):
    mesh = MESHES[name]()
    topo = build_topology(mesh)
    orders = np.random.default_rng(7).integers(1, 6, mesh.n_cells)
    got = system_size(mesh, topo, orders, condensed)
    assert (got.ndof, got.nnz) == _brute_system(mesh, orders, condensed)


@pytest.mark.parametrize("make", [tet_box, tri_square], ids=["tet", "triangle"])
def test_linear_simplex_nonzeros_closed_form(make):
    # p = 1 on simplices: one unknown per vertex, coupled along edges: nnz = n_v + 2 n_e
    mesh = make((3, 3, 2)) if make is tet_box else make((4, 3))
    topo = build_topology(mesh)
    s = system_size(mesh, topo, 1)
    assert s.nnz == mesh.n_points + 2 * len(topo.edges)


def _ngsolve_graph(mesh: Mesh, orders: np.ndarray, condensed: bool) -> tuple[int, int]:
    """Unknowns and stored entries of NGSolve's H1 matrix for the same entity orders."""
    ngs = pytest.importorskip("ngsolve")
    from meshcheck.calibration import _set_orders, to_ngsolve

    M = to_ngsolve(mesh)
    fes = ngs.H1(M, order=int(orders.max()))
    _set_orders(fes, M, orders)
    u, v = fes.TnT()
    a = ngs.BilinearForm(fes, condense=condensed)
    a += u * v * ngs.dx
    a.Assemble()
    free = np.array(list(fes.FreeDofs(coupling=condensed)), bool)
    r, c, _ = a.mat.COO()
    r, c = np.asarray(r), np.asarray(c)
    return int(free.sum()), int(np.count_nonzero(free[r] & free[c]))


@pytest.mark.parametrize("condensed", [True, False], ids=["condensed", "full"])
@pytest.mark.parametrize("name", ["tet", "hex", "wedge", "hex+wedge", "triangle", "quad"])
def test_counts_match_ngsolve_variable_order(name, condensed):
    # NGSolve's hierarchical H1 space with per-node orders set by the maximum rule
    mesh = MESHES[name]()
    topo = build_topology(mesh)
    orders = np.random.default_rng(11).integers(1, 6, mesh.n_cells)
    got = system_size(mesh, topo, orders, condensed)
    assert (got.ndof, got.nnz) == _ngsolve_graph(mesh, orders, condensed)


@pytest.mark.parametrize("p", [1, 2, 3, 4])
def test_uniform_counts_match_ngsolve(p):
    mesh = tet_box((3, 3, 2))
    topo = build_topology(mesh)
    got = system_size(mesh, topo, p, True)
    assert (got.ndof, got.nnz) == _ngsolve_graph(mesh, np.full(mesh.n_cells, p), True)


def test_variable_order_systems_follow_the_limits():
    mesh = tet_box((3, 2, 2))
    topo = build_topology(mesh)
    pmax = 6
    need = np.random.default_rng(5).integers(1, pmax + 1, mesh.n_cells)
    limits = np.where(np.arange(1, pmax + 1)[None, :] >= need[:, None], 1000.0, 10.0)
    f = np.array([5.0, 100.0, 2000.0])
    systems = variable_order_systems(mesh, topo, limits, f, pmax)
    assert np.array_equal(cell_orders_at(limits, 100.0, pmax), need)
    assert systems[1] == system_size(mesh, topo, need, True)
    assert systems[0] == system_size(mesh, topo, 1, True)
    assert systems[2] == system_size(mesh, topo, pmax, True)
    # the unknown counts agree with the existing counter
    assert [s.ndof for s in systems] == variable_order_dofs(mesh, topo, limits, f, pmax).tolist()


@pytest.mark.parametrize("p", [1, 2, 3])
def test_fixed_order_system_is_lagrange(p):
    mesh = hex_box((3, 2, 2))
    topo = build_topology(mesh)
    assert fixed_order_system(mesh, topo, p).ndof == lagrange_dofs(mesh, topo, p)


def test_variable_order_dofs_on_threads_equal_the_exact_count():
    # above 50k cells the orders are counted on a thread pool: same unknowns as the
    # exact count of the system with the orders each frequency needs
    mesh = tet_box((20, 20, 22))
    assert mesh.n_cells > 50_000
    topo = build_topology(mesh)
    pmax = 5
    rng = np.random.default_rng(11)
    limits = np.sort(rng.uniform(100.0, 3000.0, (mesh.n_cells, pmax)), axis=1)
    f = np.array([50.0, 400.0, 900.0, 1600.0, 2500.0, 4000.0])
    got = variable_order_dofs(mesh, topo, limits, f, pmax)
    want = [system_size(mesh, topo, cell_orders_at(limits, x, pmax), True).ndof for x in f]
    assert got.tolist() == want


def test_float32_limits_are_compared_with_frequencies_in_float64():
    # the advice stores its limits in float32; a frequency just above a stored limit (but
    # equal to it once rounded to float32) is above it: the cell needs the next order
    from meshcheck.advice import LIMIT_DTYPE
    from meshcheck.cost import cell_orders_at

    lim = np.array([[1000.0, 5000.0]], LIMIT_DTYPE)
    f = 1000.00001
    assert np.float32(f) == lim[0, 0]  # the float32 comparison would call it carried
    assert cell_orders_at(lim, f, 3).tolist() == [2]
    assert cell_orders_at(lim, 1000.0, 3).tolist() == [1]


@pytest.mark.parametrize("quadratic", [False, True])
def test_used_vertices_count_the_corners_of_the_grid(quadratic):
    # a structured (nx, ny, nz) grid has (nx + 1)(ny + 1)(nz + 1) corner nodes; a node no
    # cell uses and (quadratic cells) the mid-edge nodes are not vertices
    from meshcheck.cost import _used_vertices
    from meshes import tet10_box

    n = (2, 3, 1)
    box = tet10_box(n) if quadratic else tet_box(n)
    mesh = Mesh(np.vstack([box.points, [[5.0, 5.0, 5.0]]]), box.blocks, box.region_names)
    topo = build_topology(mesh)
    assert len(topo.unused_nodes) == 1
    assert _used_vertices(mesh, topo) == 3 * 4 * 2


@pytest.mark.parametrize("spread", [0, 3, 70], ids=["uniform", "few-orders", "many-orders"])
def test_edge_orders_equal_the_edge_to_cell_reduction(spread):
    # the orders scattered one at a time (or, above 64 distinct, the edge-to-cell table's
    # reduction) equal the maximum over each edge's cells read from the incidence table
    from meshcheck.cost import entity_orders
    mesh = mixed_hex_wedge((3, 2, 2))
    topo = build_topology(mesh)
    q = 1 + np.random.default_rng(spread).integers(0, spread + 1, mesh.n_cells)
    q_edge, q_face = entity_orders(mesh, topo, q)
    inc, st = topo.edges.incidence, topo.edges.incidence_starts
    ref = np.array([q[inc[a:b]].max() for a, b in zip(st, np.append(st[1:], len(inc)))])
    assert np.array_equal(q_edge, ref)
    fc = topo.faces.cells
    assert np.array_equal(q_face, [q[c[c >= 0]].max() for c in fc])


def test_face_edges_are_the_sides_of_each_face():
    # each face's edge ids name exactly the node pairs of its sides (searched by nodes)
    from meshcheck.cost import build_adjacency
    mesh = mixed_hex_wedge((3, 2, 2))
    topo = build_topology(mesh)
    adj = build_adjacency(mesh, topo)
    pairs = {tuple(sorted(map(int, e))): i for i, e in enumerate(topo.edges.nodes)}
    for f, fe in zip(topo.faces.nodes, adj.face_edges):
        f = [int(v) for v in f if v >= 0]
        sides = sorted(pairs[tuple(sorted((f[i], f[(i + 1) % len(f)])))] for i in range(len(f)))
        assert sorted(int(e) for e in fe if e >= 0) == sides


def _listed_twice(mesh: Mesh) -> Mesh:
    """The mesh with its first cell listed again (faces of three cells: crowded)."""
    b = mesh.blocks[0]
    return Mesh(mesh.points, (CellBlock(b.type, np.vstack([b.cells, b.cells[:1]]),
                                        np.append(b.region, b.region[:1])),) + mesh.blocks[1:])


@pytest.mark.parametrize("condensed", [True, False], ids=["condensed", "full"])
@pytest.mark.parametrize("name", [*MESHES, "tet listed twice"])
def test_uniform_order_sums_equal_the_entity_by_entity_count(name, condensed):
    # the closed sums at one order for every cell against the count entity by entity
    # (which the brute-force pair count above checks), also where faces have 3 cells
    from meshcheck.cost import _system_size, _uniform_system, build_adjacency
    mesh = _listed_twice(MESHES["tet"]()) if name == "tet listed twice" else MESHES[name]()
    topo = build_topology(mesh)
    adj = build_adjacency(mesh, topo)
    for p in range(1, 6):
        q = np.full(mesh.n_cells, p, np.int64)
        assert _uniform_system(mesh, topo, adj, p, condensed) == \
            _system_size(mesh, topo, q, condensed, adj), p


@pytest.mark.parametrize("name", ["tet", "hex", "wedge", "pyramid", "hex+wedge",
                                  "tet listed twice", "collapsed tet"])
def test_vertex_star_counts_equal_a_count_over_face_nodes(name):
    # chi(v) = 1 - edges + faces - cells at v, the faces at v counted over the faces'
    # node lists (the adjacency halves the faces of the edges at v instead)
    from meshcheck.cost import build_adjacency
    if name == "tet listed twice":
        mesh = _listed_twice(MESHES["tet"]())
    elif name == "collapsed tet":  # one tetrahedron with a repeated node
        m = MESHES["tet"]()
        cells = m.blocks[0].cells.copy()
        cells[0, 3] = cells[0, 2]
        mesh = Mesh(m.points, (CellBlock("tetra", cells, m.blocks[0].region),))
    else:
        mesh = MESHES[name]()
    topo = build_topology(mesh)
    adj = build_adjacency(mesh, topo)
    n = mesh.n_points
    fn = topo.faces.nodes
    faces_at = np.bincount(fn[fn >= 0], minlength=n)
    edges_at = np.bincount(topo.edges.nodes.ravel(), minlength=n)
    cells_at = sum(np.bincount(b.cells[:, :b.info.n_corners].ravel(), minlength=n)
                   for b in mesh.blocks)
    ref = 1 - edges_at + faces_at - cells_at
    assert np.array_equal(adj.chi_vertex, ref[adj.vertices])
