"""Topology against closed-form counts of structured meshes (Euler's formula)."""
import numpy as np
import pytest
from scipy.integrate import quad

from meshcheck.mesh import CellBlock, Mesh
from meshcheck.topology import build_topology, edge_lengths
from meshes import hex_box, tet10_box, tet_box


@pytest.mark.parametrize("n", [1, 2, 5])
def test_hex_grid_counts(n):
    # closed form for an n^3 structured grid: E = 3n(n+1)^2, F = 3n^2(n+1), boundary 6n^2
    topo = build_topology(hex_box((n, n, n)))
    assert len(topo.edges) == 3 * n * (n + 1) ** 2
    assert len(topo.faces) == 3 * n * n * (n + 1)
    assert topo.faces.boundary.sum() == 6 * n * n
    assert topo.n_components == 1
    # one part: the labels are a read-only broadcast of 0, not an (n_cells,) array
    assert topo.component.shape == (n ** 3,) and topo.component.strides == (0,)
    assert not topo.component.any() and not topo.component.flags.writeable


@pytest.mark.parametrize("n", [1, 3])
def test_kuhn_tet_counts_satisfy_euler(n):
    # Freudenthal split: axis edges + face diagonals + body diagonals; Euler V-E+F-T = 1
    mesh = tet_box((n, n, n))
    topo = build_topology(mesh)
    E = 3 * n * (n + 1) ** 2 + 3 * n * n * (n + 1) + n ** 3
    assert len(topo.edges) == E
    V, T = (n + 1) ** 3, 6 * n ** 3
    assert V - E + len(topo.faces) - T == 1
    assert topo.faces.boundary.sum() == 12 * n * n


def test_volumes_and_extent():
    topo = build_topology(tet_box((3, 2, 2), size=(3.0, 2.0, 1.0)))
    assert topo.cell_volume.min() > 0
    assert topo.component_volume[0] == pytest.approx(6.0, rel=1e-12)
    assert topo.component_extent[0] == pytest.approx(np.sqrt(14.0), rel=1e-12)


def test_two_separate_parts_are_two_components():
    a = hex_box((2, 2, 2))
    b = hex_box((2, 2, 2), origin=(5.0, 0.0, 0.0))
    pts = np.vstack([a.points, b.points])
    cells = np.vstack([a.blocks[0].cells, b.blocks[0].cells + len(a.points)])
    mesh = Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells))),))
    topo = build_topology(mesh)
    assert topo.n_components == 2
    assert np.array_equal(topo.component, np.repeat([0, 1], 8))
    assert np.allclose(topo.component_volume, [1.0, 1.0])
    assert len(topo.crack_faces) == 0 and len(topo.duplicate_nodes) == 0


def test_unmerged_interface_is_a_crack():
    # two boxes touching at x = 1 with their own copies of the interface nodes
    a = hex_box((2, 2, 2))
    b = hex_box((2, 2, 2), origin=(1.0, 0.0, 0.0))
    pts = np.vstack([a.points, b.points])
    cells = np.vstack([a.blocks[0].cells, b.blocks[0].cells + len(a.points)])
    topo = build_topology(Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells))),)))
    assert len(topo.duplicate_nodes) == 9          # 3 x 3 interface nodes, one pair each
    assert len(topo.crack_faces) == 2 * 4          # 2 x 2 faces on each side
    assert topo.n_components == 2


def test_duplicate_and_unused():
    m = hex_box((1, 1, 1))
    pts = np.vstack([m.points, [[9.0, 9.0, 9.0]]])
    cells = np.vstack([m.blocks[0].cells, m.blocks[0].cells[:, ::-1]])
    topo = build_topology(Mesh(pts, (CellBlock("hexahedron", cells, np.ones(2)),)))
    assert topo.unused_nodes.tolist() == [8]
    assert topo.duplicate_cells.tolist() == [[0, 1]]
    assert len(topo.nonmanifold_faces) == 0  # each face shared by exactly the two copies


def test_quadratic_edge_is_arc_length():
    # parabola through (0,0), (1/2, a/4... ) : x(s) = (s, 4 a s (1 - s)); closed-form arc length
    # integral of sqrt(1 + (4a(1-2s))^2) ds = (U sqrt(1+U^2) + asinh U) / (2U), U = 4a
    a = 0.3
    pts = np.array([[0.0, 0, 0], [1.0, 0, 0], [0.5, a, 0]])
    L = edge_lengths(pts, np.array([0]), np.array([1]), np.array([2]))[0]
    u = 4 * a
    exact = (u * np.sqrt(1 + u * u) + np.arcsinh(u)) / (2 * u)
    assert L == pytest.approx(exact, rel=1e-6)
    assert L == pytest.approx(quad(lambda s: np.hypot(1, 4 * a * (1 - 2 * s)), 0, 1)[0], rel=1e-6)


def test_tet10_straight_edges_equal_linear():
    quad_topo = build_topology(tet10_box((2, 2, 2)))
    lin_topo = build_topology(tet_box((2, 2, 2)))
    assert np.allclose(np.sort(quad_topo.edges.length), np.sort(lin_topo.edges.length))
    assert (quad_topo.edges.mid >= 0).all()


def test_edges_from_cells_reduces_over_sharing_cells():
    mesh = hex_box((2, 1, 1))
    topo = build_topology(mesh)
    vals = np.array([1.0, 5.0])
    emax = topo.edges.from_cells(vals, np.maximum)
    shared = np.isin(topo.edges.nodes, np.intersect1d(*mesh.blocks[0].cells)).all(axis=1)
    assert (emax[shared] == 5.0).all() and shared.sum() == 4


# ---------------------------------------------------------------------------
# the sorted, packed fast paths against plain Python sets on random connectivity


def _random_mesh(seed: int, n_nodes: int = 40) -> Mesh:
    """Cells of all four kinds on a small node pool: many shared and non-manifold
    edges and faces (the check is combinatorial, geometry does not matter)."""
    rng = np.random.default_rng(seed)
    pts = rng.random((n_nodes, 3))
    blocks = []
    for kind, k, m in (("tetra", 4, 60), ("pyramid", 5, 15), ("wedge", 6, 15),
                       ("hexahedron", 8, 10)):
        cells = np.array([rng.choice(n_nodes, k, replace=False) for _ in range(m)])
        # repeat a third of the cells: faces shared by two identical cells
        cells = np.vstack([cells, cells[: m // 3]])
        blocks.append(CellBlock(kind, cells, np.ones(len(cells), np.int64)))
    return Mesh(pts, tuple(blocks))


def _reference_edges(mesh: Mesh):
    cells_of = {}
    for b, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
        for i, cell in enumerate(b.cells):
            for a, c, _ in b.info.edges:
                cells_of.setdefault(tuple(sorted((int(cell[a]), int(cell[c])))), []).append(off + i)
    return cells_of


def _reference_faces(mesh: Mesh):
    seen = {}
    for b, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
        for i, cell in enumerate(b.cells):
            for f in b.info.faces:
                corners = tuple(int(cell[j]) for j in f)
                seen.setdefault(tuple(sorted(corners)), []).append((off + i, corners))
    return seen


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_edges_equal_a_set_of_node_pairs(seed):
    mesh = _random_mesh(seed)
    edges = build_topology(mesh).edges
    ref = _reference_edges(mesh)
    got = {tuple(map(int, e)) for e in edges.nodes}
    assert got == set(ref)
    for e in range(len(edges)):  # incidence: the cells of each edge, each local copy once
        cells = edges.incidence[edges.incidence_starts[e]:(edges.incidence_starts[e + 1]
                                if e + 1 < len(edges) else len(edges.incidence))]
        assert sorted(cells.tolist()) == sorted(ref[tuple(map(int, edges.nodes[e]))])
    for b, ce in zip(mesh.blocks, edges.cell_edges):  # each local edge maps to its pair
        loc = b.info.edges
        pairs = np.sort(np.stack([b.cells[:, loc[:, 0]], b.cells[:, loc[:, 1]]], -1), -1)
        assert (edges.nodes[ce] == pairs).all()
    assert edges.length == pytest.approx(np.linalg.norm(
        mesh.points[edges.nodes[:, 0]] - mesh.points[edges.nodes[:, 1]], axis=1), rel=1e-15)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("path", ["edge_keys", "node_keys", "lexsort"])
def test_faces_equal_a_dictionary_of_node_sets(seed, path, monkeypatch):
    from meshcheck import topology as T

    mesh = _random_mesh(seed)
    edges = T.build_edges(mesh)
    if path == "lexsort":
        monkeypatch.setattr(T, "_tri_keys", lambda *a: (None, None))
    faces = T.build_faces(mesh, edges if path == "edge_keys" else None)
    ref = _reference_faces(mesh)
    assert len(faces) == len(ref)
    for corners, cells, count in zip(faces.nodes, faces.cells, faces.count):
        c = tuple(int(x) for x in corners if x >= 0)
        occ = ref[tuple(sorted(c))]
        assert count == len(occ)
        assert (cells[0], c) == occ[0]  # first occurrence, its own outward corners
        assert cells[1] == (occ[1][0] if len(occ) > 1 else -1)


@pytest.mark.parametrize("seed", [0, 1])
def test_face_corners_of_a_subset_are_those_rows_and_only_local_numbers_are_kept(seed,
                                                                              monkeypatch):
    from meshcheck import topology as T

    mesh = _random_mesh(seed)
    faces = T.build_faces(mesh, T.build_edges(mesh))
    assert faces.local.dtype == np.uint8
    assert set(vars(faces)) == {"local", "cells", "count", "mesh"}  # no corners kept
    every = faces.nodes
    rng = np.random.default_rng(seed)
    ids = rng.choice(len(faces), 25, replace=False)
    mask = rng.random(len(faces)) < 0.3
    assert np.array_equal(faces.nodes_of(ids), every[ids])
    assert np.array_equal(faces.nodes_of(mask), every[mask])
    assert np.array_equal(faces.is_tri, every[:, 3] < 0)
    monkeypatch.setattr(T, "_NODES_CHUNK", 7)  # gathered a few faces at a time: the same
    assert np.array_equal(faces.nodes, every)


def test_cell_volumes_in_chunks_equal_one_pass():
    # chunking only bounds memory: volumes of mixed cells equal one pass to the last bit,
    # and a box of hexes and Kuhn tets fills its volume (closed form)
    from meshcheck.topology import cell_volumes

    hexes, tets = hex_box((3, 2, 2), size=(0.6, 0.4, 0.4)), tet_box((2, 2, 2), origin=(1, 0, 0))
    mesh = Mesh(np.vstack([hexes.points, tets.points]),
                (CellBlock("hexahedron", hexes.blocks[0].cells, np.ones(12, np.int64)),
                 CellBlock("tetra", tets.blocks[0].cells + len(hexes.points),
                           np.ones(tets.n_cells, np.int64))))
    one = cell_volumes(mesh, chunk_size=10**6)
    assert np.array_equal(cell_volumes(mesh, chunk_size=5), one)
    assert one[:12].sum() == pytest.approx(0.6 * 0.4 * 0.4, rel=1e-12)
    assert one[12:].sum() == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize("n, key_bits", [(1000, 40), (1000, 62), (5000, 60), (140_000, 62)],
                         ids=["packed", "buckets-9", "buckets-10", "argsort"])
def test_packed_sort_equals_a_stable_argsort(n, key_bits):
    # one packed int64 when key and row bits fit in 63, else buckets by the top key bits,
    # else (more than 16 bucket bits) np.argsort: always numpy's stable argsort
    from meshcheck.topology import _packed_sort

    rng = np.random.default_rng(key_bits)
    key = rng.integers(0, 2 ** key_bits, n // 4, dtype=np.int64)
    key = rng.choice(np.concatenate([key, [0, 2 ** key_bits - 1]]), n)  # many repeats
    order, skey = _packed_sort(key, 2 ** key_bits - 1)
    ref = np.argsort(key, kind="stable")
    assert np.array_equal(order, ref)
    assert np.array_equal(skey, key[ref])


def test_warped_hex_volume_equals_the_four_triangle_split():
    # the divergence theorem over faces split into four triangles about their mean point
    # (the definition used), computed triangle by triangle, on hexes with warped faces
    from meshcheck.topology import cell_volumes

    m = hex_box((3, 3, 2))
    rng = np.random.default_rng(4)
    pts = m.points + rng.uniform(-0.08, 0.08, m.points.shape)
    cells = m.blocks[0].cells
    mesh = Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells), np.int64)),))
    ref = np.zeros(len(cells))
    for f in mesh.blocks[0].info.faces:
        q = pts[cells[:, list(f)]]
        c = q.mean(axis=1)
        for i in range(4):
            a, b = q[:, i] - c, q[:, (i + 1) % 4] - c
            ref += np.einsum("ij,ij->i", c, np.cross(a + c, b + c))
    np.testing.assert_allclose(cell_volumes(mesh), ref / 6.0, rtol=1e-12)
    assert cell_volumes(mesh).sum() == pytest.approx(np.abs(ref / 6.0).sum(), rel=1e-12)


def test_index_type_is_int32_while_indices_fit():
    from meshcheck.topology import index_type

    assert index_type(0) == index_type(2**31 - 1) == np.int32
    assert index_type(2**31) == np.int64


@pytest.mark.parametrize("path", ["numpy", "numba"])
def test_face_counts_saturate_at_255(path, monkeypatch):
    # 300 copies of one tetrahedron: each of its faces has 300 cells, counted as 255 (a
    # one-byte count), still non-manifold; two copies: 2
    monkeypatch.setenv("MESHCHECK_KERNELS", path)
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    for copies, expected in ((300, 255), (2, 2)):
        cells = np.tile(np.arange(4), (copies, 1))
        topo = build_topology(Mesh(pts, (CellBlock("tetra", cells, np.ones(copies)),)))
        assert topo.faces.count.tolist() == [expected] * 4
        assert len(topo.nonmanifold_faces) == (4 if copies > 2 else 0)


@pytest.mark.parametrize("path", ["numpy", "numba"])
def test_index_arrays_are_int32(path, monkeypatch):
    # int32 index arrays halve the memory of the largest arrays of an audit
    monkeypatch.setenv("MESHCHECK_KERNELS", path)
    mesh = tet10_box((2, 2, 1))
    topo = build_topology(mesh)
    e, f = topo.edges, topo.faces
    for a in (e.nodes, e.mid, e.incidence, e.incidence_starts, *e.cell_edges, f.nodes,
              f.cells, topo.component):
        assert a.dtype == np.int32
    assert f.count.dtype == np.uint8  # one byte, saturating (see the next test)
    # the same edges as a Python set of node pairs built from the int64 cells
    cells = mesh.blocks[0].cells
    pairs = {tuple(sorted((int(c[a]), int(c[b])))) for c in cells
             for a, b, _ in mesh.blocks[0].info.edges}
    assert {tuple(map(int, r)) for r in e.nodes} == pairs


@pytest.mark.parametrize("path", ["numpy", "numba"])
@pytest.mark.parametrize("first", [True, False])
def test_a_duplicated_cell_joins_its_neighbours_in_any_numbering(path, first, monkeypatch):
    # an interior tetrahedron listed twice: its four faces each have three cells (the
    # two copies and a neighbour), of which the face arrays keep two. Numbered first, the
    # copies were joined to each other only and made a component of their own; the
    # components are those of the cells sharing faces, whatever the numbering
    monkeypatch.setenv("MESHCHECK_KERNELS", path)
    box = tet_box((3, 3, 3))
    cells = box.blocks[0].cells
    topo = build_topology(box)
    inner = int(np.flatnonzero(~np.isin(np.arange(len(cells)),
                                        topo.faces.cells[topo.faces.boundary, 0]))[0])
    rest = np.delete(np.arange(len(cells)), inner)
    order = np.r_[inner, inner, rest] if first else np.r_[rest, inner, inner]
    mesh = Mesh(box.points, (CellBlock("tetra", cells[order], np.ones(len(order))),))
    topo = build_topology(mesh)
    assert len(topo.nonmanifold_faces) == 4
    assert topo.duplicate_cells.tolist() == ([[0, 1]] if first else [[len(order) - 2,
                                                                       len(order) - 1]])
    assert topo.n_components == 1
    assert not topo.component.any()
    assert topo.component_volume[0] == pytest.approx(1.0 + abs(topo.cell_volume[0 if first
                                                                               else -1]))


@pytest.mark.parametrize("path", ["numpy", "numba"])
def test_a_mesh_listed_twice_is_one_component(path, monkeypatch):
    # every interior face has four cells and every boundary face two (the copies): one
    # part of twice the volume, every cell a duplicate
    monkeypatch.setenv("MESHCHECK_KERNELS", path)
    box = tet_box((4, 3, 3))
    cells = box.blocks[0].cells
    twice = np.vstack([cells, cells[:, ::-1]])
    topo = build_topology(Mesh(box.points, (CellBlock("tetra", twice, np.ones(len(twice))),)))
    assert len(topo.nonmanifold_faces) > 0 and len(topo.duplicate_cells) == len(cells)
    assert topo.n_components == 1
    assert topo.component_volume[0] == pytest.approx(2.0)
