"""Compiled topology kernels (meshcheck.kernels.topology) against the numpy reference.

Every field of build_topology is computed twice, MESHCHECK_KERNELS=numpy and =numba,
on meshes generated here: each cell kind, mixed blocks, random connectivity (shared
and non-manifold faces, hub nodes), duplicate nodes and cells, cracks, several
components, unused nodes, degenerate cells.  Integer arrays must be equal with the
same dtype, floats equal to 1e-12 relative.
"""
import numpy as np
import pytest

pytest.importorskip("numba")

from meshcheck import topology as T  # noqa: E402
from meshcheck.cells import CELL_TYPES  # noqa: E402
from meshcheck.mesh import CellBlock, Mesh  # noqa: E402
from meshes import grid_hexes, grid_points, hex_box, tet_box  # noqa: E402

RTOL = 1e-12

# --------------------------------------------------------------------------- meshes

# hexahedron -> 2 wedges (prisms along z) and -> 6 pyramids about an added centre node
_HEX_TO_WEDGES = np.array([[0, 1, 2, 4, 5, 6], [0, 2, 3, 4, 6, 7]])
_HEX_FACES = [(0, 3, 2, 1), (4, 5, 6, 7), (0, 1, 5, 4), (1, 2, 6, 5), (2, 3, 7, 6), (3, 0, 4, 7)]


def _linear_cells(kind: str, n=(3, 2, 2), size=(1.0, 0.8, 0.6), origin=(0.0, 0.0, 0.0), jitter=0.0,
                  seed=0):
    """(points, cells) of a structured box of linear cells of ``kind`` (3D)."""
    pts = grid_points(n, size, origin)
    if jitter:
        h = min(s / k for s, k in zip(size, n))
        pts = pts + np.random.default_rng(seed).uniform(-jitter * h, jitter * h, pts.shape)
    hexes = grid_hexes(n)
    if kind == "hexahedron":
        return pts, hexes
    if kind == "tetra":
        from meshes import KUHN
        return pts, hexes[:, KUHN].reshape(-1, 4)
    if kind == "wedge":
        return pts, hexes[:, _HEX_TO_WEDGES].reshape(-1, 6)
    if kind == "pyramid":
        centres = pts[hexes].mean(axis=1)
        cid = len(pts) + np.arange(len(hexes))
        cells = [np.column_stack([hexes[:, list(f[::-1])], cid]) for f in _HEX_FACES]
        return np.vstack([pts, centres]), np.stack(cells, axis=1).reshape(-1, 5)
    raise ValueError(kind)


def _plane_cells(kind: str, n=(4, 3), jitter=0.1, seed=0):
    """(points, cells) of a plane grid (z = 0) of triangles or quads."""
    nx, ny = n
    x, y = np.meshgrid(np.linspace(0, 1, nx + 1), np.linspace(0, 0.7, ny + 1), indexing="ij")
    pts = np.column_stack([x.ravel(), y.ravel(), np.zeros(x.size)])
    pts[:, :2] += np.random.default_rng(seed).uniform(-0.2 / nx, 0.2 / nx, (len(pts), 2)) * jitter
    idx = np.arange(len(pts)).reshape(nx + 1, ny + 1)
    q = np.column_stack([idx[:-1, :-1].ravel(), idx[1:, :-1].ravel(), idx[1:, 1:].ravel(),
                         idx[:-1, 1:].ravel()])
    if kind == "quad":
        return pts, q
    return pts, q[:, [[0, 1, 2], [0, 2, 3]]].reshape(-1, 3)


def _add_high_order(pts: np.ndarray, cells: np.ndarray, kind: str, bow=0.05, seed=1):
    """Quadratic cells of ``kind`` on linear cells: one shared (bowed) mid-node per
    unique edge, then one node per cell for every further node (face and volume
    centres, at the corner mean, so neighbours' coincide: duplicate nodes)."""
    info = CELL_TYPES[kind]
    e = info.edges
    a, b = cells[:, e[:, 0]], cells[:, e[:, 1]]
    key = np.minimum(a, b) * len(pts) + np.maximum(a, b)
    uniq, inv = np.unique(key.ravel(), return_inverse=True)
    ua, ub = uniq // len(pts), uniq % len(pts)
    rng = np.random.default_rng(seed)
    mids = 0.5 * (pts[ua] + pts[ub]) + rng.uniform(-bow, bow, (len(uniq), 3)) * \
        np.linalg.norm(pts[ub] - pts[ua], axis=1)[:, None]
    if info.dim == 2:
        mids[:, 2] = 0.0
    out = [cells, len(pts) + inv.reshape(a.shape)]
    new = [pts, mids]
    extra = info.n_nodes - info.n_corners - len(e)
    if extra:
        centre = pts[cells].mean(axis=1)
        start = len(pts) + len(mids)
        for k in range(extra):
            out.append((start + k * len(cells) + np.arange(len(cells)))[:, None])
            new.append(centre)
    return np.vstack(new), np.hstack(out)


def _kind_mesh(kind: str, **kw) -> Mesh:
    info = CELL_TYPES[kind]
    if info.dim == 2:
        pts, cells = _plane_cells(info.linear)
    else:
        pts, cells = _linear_cells(info.linear, jitter=0.15, **kw)
    if info.quadratic:
        pts, cells = _add_high_order(pts, cells, kind)
    return Mesh(pts, (CellBlock(kind, cells, np.ones(len(cells), np.int64)),), dim=info.dim)


def _random_mesh(seed: int, n_nodes: int = 40) -> Mesh:
    """Cells of the four 3D kinds on a small node pool: shared, non-manifold and
    repeated faces, nodes in hundreds of cells (buckets sorted by argsort)."""
    rng = np.random.default_rng(seed)
    pts = rng.random((n_nodes + 3, 3))
    blocks = []
    for kind, k, m in (("tetra", 4, 120), ("pyramid", 5, 25), ("wedge", 6, 25),
                       ("hexahedron", 8, 15)):
        cells = np.array([rng.choice(n_nodes, k, replace=False) for _ in range(m)])
        cells = np.vstack([cells, cells[: m // 3][:, ::-1]])
        blocks.append(CellBlock(kind, cells, np.ones(len(cells), np.int64)))
    return Mesh(pts, tuple(blocks))  # the last 3 nodes unused


def _mixed_mesh() -> Mesh:
    """Hexes, wedges, pyramids and tets side by side (boxes sharing no nodes, so
    unmerged interfaces), a repeated hex, a tetra10 box apart: several components."""
    pts, blocks = [], []
    n0 = 0
    for i, kind in enumerate(["hexahedron", "wedge", "pyramid", "tetra"]):
        p, c = _linear_cells(kind, n=(2, 2, 2), size=(1.0, 1.0, 1.0), origin=(float(i), 0, 0))
        if kind == "hexahedron":
            c = np.vstack([c, c[:1]])
        pts.append(p)
        blocks.append(CellBlock(kind, c + n0, np.full(len(c), i + 1)))
        n0 += len(p)
    p, c = _linear_cells("tetra", n=(2, 1, 1), origin=(0.0, 5.0, 0.0))
    p, c = _add_high_order(p, c, "tetra10")
    pts.append(p)
    blocks.append(CellBlock("tetra10", c + n0, np.full(len(c), 9)))
    return Mesh(np.vstack(pts), tuple(blocks))


def _defect_mesh(seed: int) -> Mesh:
    """Two hex boxes with an unmerged interface whose copies are moved by about the
    duplicate tolerance (some pairs in, some out), a duplicated cell, a degenerate
    (collapsed) hex, an unused node and a separate third box."""
    rng = np.random.default_rng(seed)
    a = hex_box((3, 2, 2))
    b = hex_box((3, 2, 2), origin=(1.0, 0.0, 0.0))
    c = hex_box((1, 1, 1), origin=(4.0, 0.0, 0.0))
    pb = b.points.copy()
    on = np.flatnonzero(np.isclose(pb[:, 0], 1.0))  # 3 x 3 interface nodes
    h = 1.0 / 3.0
    pb[on[:3], 1] += rng.uniform(0, 2e-6 * h, 3)  # moved about the tolerance
    pb[on[3:6], 1] += rng.uniform(0, 0.9e-6 * h, 3)  # moved within it
    pts = np.vstack([a.points, pb, c.points, [[9.0, 9.0, 9.0]]])
    cells = np.vstack([a.blocks[0].cells, b.blocks[0].cells + len(a.points),
                       c.blocks[0].cells + len(a.points) + len(b.points)])
    cells = np.vstack([cells, cells[3:4], cells[:1]])
    cells[-1, 4:] = cells[-1, :4]  # collapsed: top face on the bottom one
    return Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells), np.int64)),))


def _hub_mesh(k: int = 120) -> Mesh:
    """Tetrahedra fanned about the edge 0-1 and about node 0 (a hub): buckets of more
    than a hundred rows and of more than a hundred distinct neighbours (the sorting
    branches for long buckets)."""
    t = np.linspace(0, 2 * np.pi, k, endpoint=False)
    ring = np.column_stack([np.cos(t), np.sin(t), 0.3 * np.sin(3 * t)])
    pts = np.vstack([[0, 0, -1.0], [0, 0, 1.0], ring, ring * 2 + [0, 0, 0.5]])
    i = np.arange(k)
    around_edge = np.column_stack([np.zeros(k, int), np.ones(k, int), 2 + i, 2 + (i + 1) % k])
    around_node = np.column_stack([np.zeros(k, int), 2 + i, 2 + k + i, 2 + k + (i + 1) % k])
    cells = np.vstack([around_edge, around_node])
    return Mesh(pts, (CellBlock("tetra", cells, np.ones(len(cells), np.int64)),))


MESHES = {
    "hub": _hub_mesh,
    **{kind: (lambda kind=kind: _kind_mesh(kind)) for kind in CELL_TYPES},
    "random-0": lambda: _random_mesh(0),
    "random-1": lambda: _random_mesh(1),
    "random-2": lambda: _random_mesh(2, n_nodes=12),
    "mixed": _mixed_mesh,
    "defects-0": lambda: _defect_mesh(0),
    "defects-1": lambda: _defect_mesh(1),
    "tet-box-7": lambda: tet_box((7, 5, 4)),
}


# --------------------------------------------------------------------------- comparison


def _both(fn, mesh, monkeypatch, *args):
    """fn(mesh) on the numpy path, then on the compiled one (with the numpy sorts,
    k-d tree and graph labelling disabled, so the kernels are what runs)."""
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = fn(mesh, *args)
    with monkeypatch.context() as m:
        m.setenv("MESHCHECK_KERNELS", "numba")

        def boom(*a, **k):
            raise AssertionError("numpy reference called on the compiled path")
        for name in ("_sorted_groups", "_group_faces", "_block_volumes", "_components",
                     "_per_label_bbox", "_duplicate_nodes"):
            m.setattr(T, name, boom)
        import scipy.spatial  # the numpy path imports its k-d tree from there, lazily

        m.setattr(scipy.spatial, "cKDTree", boom)
        got = fn(mesh, *args)
    return ref, got


def _same_int(ref, got, what):
    assert got.dtype == ref.dtype, what
    assert got.shape == ref.shape, what
    assert np.array_equal(got, ref), what


def _same_float(ref, got, what):
    assert got.dtype == ref.dtype, what
    np.testing.assert_allclose(got, ref, rtol=RTOL, atol=0, equal_nan=True, err_msg=what)


def _same_edges(ref, got):
    for f in ("nodes", "mid", "incidence", "incidence_starts"):
        _same_int(getattr(ref, f), getattr(got, f), f"edges.{f}")
    _same_float(ref.length, got.length, "edges.length")
    assert len(ref.cell_edges) == len(got.cell_edges)
    for r, g in zip(ref.cell_edges, got.cell_edges):
        _same_int(r, g, "edges.cell_edges")


def _same_faces(ref, got):
    for f in ("local", "cells", "count", "nodes", "is_tri"):  # kept, then made from them
        _same_int(getattr(ref, f), getattr(got, f), f"faces.{f}")


def _same_topology(ref, got):
    _same_edges(ref.edges, got.edges)
    _same_faces(ref.faces, got.faces)
    assert ref.n_components == got.n_components
    for f in ("component", "unused_nodes", "duplicate_nodes", "duplicate_cells",
              "crack_faces", "nonmanifold_faces"):
        _same_int(getattr(ref, f), getattr(got, f), f)
    for f in ("component_volume", "component_extent", "cell_volume"):
        _same_float(getattr(ref, f), getattr(got, f), f)


# --------------------------------------------------------------------------- tests


@pytest.mark.parametrize("name", list(MESHES))
def test_compiled_topology_equals_numpy(name, monkeypatch):
    mesh = MESHES[name]()
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)
    assert len(ref.edges) > 0 and len(ref.faces) == (0 if mesh.dim == 2 else len(ref.faces))


def test_fixtures_cover_the_defects_and_paths(monkeypatch):
    # the comparisons above are only as good as the meshes: make sure they hold what
    # they are meant to (each defect present, and buckets long enough for the argsort
    # branch of the kernels as well as short ones for insertion)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    d = T.build_topology(MESHES["defects-0"]())
    assert 6 <= len(d.duplicate_nodes) < 9 and len(d.crack_faces) > 0
    assert len(d.duplicate_cells) == 1 and d.n_components == 3 and len(d.unused_nodes) == 1
    r = T.build_topology(MESHES["random-0"]())
    assert len(r.nonmanifold_faces) > 0 and len(r.duplicate_cells) > 0
    # local edges per smaller node, local triangles per smallest node: bucket sizes
    per_edge = np.diff(np.r_[r.edges.incidence_starts, len(r.edges.incidence)])
    assert np.bincount(r.edges.nodes[:, 0], weights=per_edge).max() > 32
    tri = r.faces.is_tri
    assert np.bincount(r.faces.nodes[tri, :3].min(axis=1), weights=r.faces.count[tri]).max() > 32
    assert np.bincount(r.edges.nodes[:, 0], weights=per_edge).min() <= 32
    # the hub: more than 48 rows in the bucket of one edge (triangles) and more than
    # 48 distinct larger neighbours of one node (edges)
    hub = T.build_topology(MESHES["hub"]())
    tri = hub.faces.is_tri
    s = np.sort(hub.faces.nodes_of(tri)[:, :3], axis=1)
    _, per_edge_tris = np.unique(s[:, :2], axis=0, return_counts=True)
    assert per_edge_tris.max() > 48 and np.bincount(hub.edges.nodes[:, 0]).max() > 48
    m = T.build_topology(MESHES["mixed"]())
    assert m.n_components == 5 and len(m.duplicate_nodes) > 0 and len(m.crack_faces) > 0
    assert T.build_topology(MESHES["hexahedron27"]()).duplicate_nodes.shape[0] > 0


@pytest.mark.parametrize("name", ["tetra", "wedge15", "pyramid", "quad9", "random-1", "mixed",
                                  "hub"])
def test_public_builders_dispatch_and_agree(name, monkeypatch):
    mesh = MESHES[name]()
    ref, got = _both(T.build_edges, mesh, monkeypatch)
    _same_edges(ref, got)
    ref, got = _both(T.build_faces, mesh, monkeypatch)
    _same_faces(ref, got)
    ref, got = _both(T.cell_volumes, mesh, monkeypatch)
    _same_float(ref, got, "cell_volumes")


def test_nan_coordinates_and_wide_int_scratch(monkeypatch):
    # a used node with a NaN coordinate (volumes, extents, duplicates skip it the same
    # way), on two components; scratch arrays forced to int64 (the > 2**31 branch)
    from meshcheck.kernels import topology as kt

    monkeypatch.setattr(kt, "index_dtype", lambda n: np.int64)
    a = hex_box((2, 2, 1))
    b = hex_box((2, 2, 1), origin=(3.0, 0.0, 0.0))
    pts = np.vstack([a.points, b.points])
    pts[5, 2] = np.nan
    cells = np.vstack([a.blocks[0].cells, b.blocks[0].cells + len(a.points)])
    mesh = Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells), np.int64)),))
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)
    assert ref.n_components == 2 and np.isnan(ref.cell_volume).any()


def test_duplicate_nodes_of_a_structured_grid_with_close_copies(monkeypatch):
    # a structured grid (many nodes on every plane x = const: the slab sweep must not
    # rely on distinct coordinates) with a quarter of its nodes copied at distances
    # spread about the tolerance, the copies used by a second, shifted cell set
    rng = np.random.default_rng(3)
    base = hex_box((6, 5, 4))
    pts = base.points
    pick = rng.choice(len(pts), len(pts) // 4, replace=False)
    h = 1.0 / 6.0
    direction = rng.normal(size=(len(pick), 3))
    direction /= np.linalg.norm(direction, axis=1)[:, None]
    copies = pts[pick] + direction * rng.uniform(0.0, 2e-6 * h, len(pick))[:, None]
    remap = np.arange(len(pts))
    remap[pick] = len(pts) + np.arange(len(pick))
    cells = base.blocks[0].cells
    mesh = Mesh(np.vstack([pts, copies]),
                (CellBlock("hexahedron", np.vstack([cells, remap[cells]]),
                           np.ones(2 * len(cells), np.int64)),))
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)
    assert 0 < len(ref.duplicate_nodes) < len(pick)  # some pairs in, some out


def test_node_index_out_of_range_raises(monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    m = tet_box((1, 1, 1))
    cells = m.blocks[0].cells.copy()
    cells[2, 1] = len(m.points)
    bad = Mesh(m.points, (CellBlock("tetra", cells, np.ones(len(cells), np.int64)),))
    for fn in (T.build_topology, T.build_edges, T.build_faces, T.cell_volumes):
        with pytest.raises(IndexError):
            fn(bad)


def test_empty_mesh(monkeypatch):
    mesh = Mesh(np.zeros((3, 3)), ())
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    for e in (ref.edges, got.edges):  # empty index arrays of the index type
        assert e.incidence.dtype == e.incidence_starts.dtype == np.int32
        assert len(e.incidence) == len(e.incidence_starts) == 0
    assert got.n_components == ref.n_components == 0
    _same_faces(ref.faces, got.faces)
    _same_int(ref.unused_nodes, got.unused_nodes, "unused")


@pytest.mark.parametrize("name", ["tetra10", "random-0", "mixed", "defects-1", "hub"])
def test_unpacked_buckets_equal_numpy(name, monkeypatch):
    # (node, row) pairs too wide for one int64 take separate key and row arrays: force it
    monkeypatch.setattr(T, "_PACK_BITS", 0)
    mesh = MESHES[name]()
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)


@pytest.mark.parametrize("fanout", [1, 3])
@pytest.mark.parametrize("name", ["tetra", "tetra10", "random-0", "mixed", "defects-1", "hub",
                                  "pyramid", "quad9"])
def test_two_level_bucket_fills_equal_numpy(name, fanout, monkeypatch):
    # large meshes drop rows into coarse buckets first (edges, triangles), then sort
    # every coarse bucket into its fine ones in place: force those branches on small
    # meshes, with 2 and 8 coarse buckets, and check they ran
    from meshcheck.kernels import topology as kt

    monkeypatch.setattr(T, "_FANOUT_BITS", fanout)
    monkeypatch.setattr(T, "_MIN_COARSE_BITS", 1)
    calls = {"coarse_refine": [], "edge_emit_rows_range": []}
    for fn in calls:
        real = getattr(kt, fn)

        def spy(*a, _real=real, _fn=fn):
            calls[_fn].append(a)
            return _real(*a)
        monkeypatch.setattr(kt, fn, spy)
    mesh = MESHES[name]()
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)
    has_tri = any(len(f) == 3 for b in mesh.blocks if b.info.dim == 3 for f in b.info.faces)
    assert len(calls["coarse_refine"]) == 1 + has_tri
    assert len(calls["edge_emit_rows_range"]) == 1


def _count_calls(monkeypatch, module, *names) -> dict:
    """{name: number of calls} of the module's functions ``names``, counted from now."""
    calls = dict.fromkeys(names, 0)
    for fn in names:
        real = getattr(module, fn)

        def spy(*a, _real=real, _fn=fn):
            calls[_fn] += 1
            return _real(*a)
        monkeypatch.setattr(module, fn, spy)
    return calls


@pytest.mark.parametrize("name", ["tetra", "mixed"])
@pytest.mark.parametrize("one_level", [True, False])
def test_renumbered_mesh_fills_its_edges_in_one_level(one_level, name, monkeypatch):
    # a renumbered mesh (cells in the order of their lowest node) fills the edges' buckets
    # in one level even where the size would take two (ONE_LEVEL_WHEN_RENUMBERED); its
    # triangles still take two: the same topology as numpy's either way
    from meshcheck.kernels import topology as kt
    from meshcheck.ordering import renumbered

    monkeypatch.setattr(T, "_FANOUT_BITS", 3)
    monkeypatch.setattr(T, "_MIN_COARSE_BITS", 1)
    monkeypatch.setattr(T, "ONE_LEVEL_WHEN_RENUMBERED", one_level)
    calls = _count_calls(monkeypatch, kt, "edge_count", "edge_coarse_count",
                         "tri_coarse_count")
    mesh = renumbered(MESHES[name]())
    assert mesh.file_cell_ids is not None
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)
    assert (calls["edge_count"] > 0, calls["edge_coarse_count"] > 0) == (one_level,
                                                                         not one_level)
    assert calls["tri_coarse_count"] > 0


def _reuse_calls(monkeypatch):
    """Force the two-level passes on small meshes; record every call of reuse_or_empty as
    (spare arrays offered, array returned, spare arrays left)."""
    monkeypatch.setattr(T, "_FANOUT_BITS", 1)
    monkeypatch.setattr(T, "_MIN_COARSE_BITS", 1)
    calls = []
    real = T.reuse_or_empty

    def spy(spare, n, dtype):
        before = list(spare)
        out = real(spare, n, dtype)
        calls.append((before, out, list(spare)))
        return out
    monkeypatch.setattr(T, "reuse_or_empty", spy)
    return calls


def test_faces_reuse_the_edge_passs_scratch(monkeypatch):
    # the triangles' pass takes the edge pass's int64 scratch (pages already written, so
    # the kernel clears no new ones) instead of a new array: check it did, and that the
    # topology is still numpy's
    calls = _reuse_calls(monkeypatch)
    ref, got = _both(T.build_topology, MESHES["tetra"](), monkeypatch)
    _same_topology(ref, got)
    assert len(calls) == 1
    offered, out, left = calls[0]
    assert len(offered) == 1 and offered[0].dtype == np.int64
    assert np.shares_memory(out, offered[0]) and not left
    # the cell edges were written straight into an array of their own, of the index type
    ce = got.edges.cell_edges[0]
    assert ce.dtype == np.int32 and not np.shares_memory(ce, offered[0])


def test_without_giving_pages_back_the_scratch_is_not_reused(monkeypatch):
    # where madvise is missing (not Linux) a reused scratch array would keep its unused
    # tail resident: the edge pass offers none and the faces get a new one
    import meshcheck.threads as th

    monkeypatch.setattr(th, "_madvise", lambda: None)
    monkeypatch.setattr(T, "can_release", lambda: False)
    calls = _reuse_calls(monkeypatch)
    ref, got = _both(T.build_topology, MESHES["tetra"](), monkeypatch)
    _same_topology(ref, got)
    assert len(calls) == 1 and calls[0][0] == []


@pytest.mark.parametrize("two_level", [False, True])
@pytest.mark.parametrize("name", ["tetra", "tetra10", "random-0", "mixed", "defects-1", "hub",
                                  "pyramid", "quad9"])
def test_bucket_passes_split_over_threads_equal_numpy(name, two_level, monkeypatch):
    # large meshes split the bucket fills, refines and read-offs over two threads
    # (ranges of cells, buckets and rows): force it on small meshes, check it ran
    from meshcheck.kernels import topology as kt

    monkeypatch.setattr(T, "_SPLIT_ROWS", 0)
    if two_level:
        monkeypatch.setattr(T, "_FANOUT_BITS", 2)
        monkeypatch.setattr(T, "_MIN_COARSE_BITS", 1)
    calls = _count_calls(monkeypatch, kt, "edge_emit_rows_range", "coarse_refine_range")
    mesh = MESHES[name]()
    ref, got = _both(T.build_topology, mesh, monkeypatch)
    _same_topology(ref, got)
    assert calls["edge_emit_rows_range"] == 2
    assert calls["coarse_refine_range"] >= (2 if two_level else 0)


def test_cell_parts_cover_the_rows_once():
    for lengths, widths in (([10], [6]), ([3, 0, 7, 5], [6, 4, 12, 1]), ([1], [6]), ([], [])):
        for parts in (1, 2, 3):
            pieces = T._cell_parts(lengths, widths, parts)
            assert len(pieces) == parts
            seen = [(i, c) for piece in pieces for i, r0, r1 in piece for c in range(r0, r1)]
            assert seen == [(i, c) for i, m in enumerate(lengths) for c in range(m)]


def test_coarse_bits_and_in_place_refine():
    # coarse_refine sorts every coarse bucket into its fine buckets in place: the result
    # is numpy's stable argsort of the fine bucket, values in row order within each
    from meshcheck.kernels import topology as kt

    assert T._coarse_bits(10) == 0 and T._coarse_bits(810_000) == 10
    assert T._coarse_bits(28_600_000) == 15
    rng = np.random.default_rng(3)
    for n_b, k, n in ((64, 3, 1000), (37, 2, 500), (8, 3, 7), (5, 4, 0), (1024, 4, 5000)):
        fine = np.sort(rng.integers(0, n_b, n))  # the coarse buckets are filled in order
        fine = np.concatenate([rng.permutation(fine[(fine >> k) == c]) for c in
                               range(((n_b - 1) >> k) + 1)]) if n else fine
        val = rng.integers(0, 1 << 40, n)
        a = (val << k) | (fine & ((1 << k) - 1))
        cptr = np.searchsorted(fine >> k, np.arange(((n_b - 1) >> k) + 2)).astype(np.int64)
        ptr = np.full(n_b + 1, -1, np.int64)
        kt.coarse_refine(cptr, a, k, ptr)
        order = np.argsort(fine, kind="stable")
        np.testing.assert_array_equal(a, val[order])
        np.testing.assert_array_equal(ptr, np.searchsorted(fine[order], np.arange(n_b + 1)))


def test_small_meshes_do_not_load_numba():
    # auto mode: below MIN_CELLS the numpy path runs and numba is never imported
    import subprocess
    import sys
    from pathlib import Path

    code = ("import sys; from meshes import tet_box; from meshcheck.topology import "
            "build_topology; build_topology(tet_box((3, 3, 3))); "
            "assert 'numba' not in sys.modules, 'numba loaded'")
    env = {k: v for k, v in __import__("os").environ.items() if k != "MESHCHECK_KERNELS"}
    subprocess.run([sys.executable, "-c", code], check=True, env=env,
                   cwd=Path(__file__).parent)


def test_compiled_topology_of_a_valid_mesh_does_not_import_scipy_sparse():
    # scipy.sparse takes 0.1-0.2 s to import; the compiled path needs it only to join
    # the cells of faces shared by more than two cells (broken meshes)
    import subprocess
    import sys
    from pathlib import Path

    code = ("import sys; from meshes import tet_box; from meshcheck.topology import "
            "build_topology; t = build_topology(tet_box((3, 3, 3))); "
            "assert t.n_components == 1; "
            "assert 'scipy.sparse' not in sys.modules, 'scipy.sparse imported'")
    env = {**__import__("os").environ, "MESHCHECK_KERNELS": "numba"}
    subprocess.run([sys.executable, "-c", code], check=True, env=env,
                   cwd=Path(__file__).parent)


def test_warm_up_loads_numba_only_for_large_files():
    # the CLI starts loading numba on a thread for input files of WARM_UP_BYTES or more;
    # never for smaller files or in numpy mode (run in fresh processes: numba unloaded)
    import os
    import subprocess
    import sys

    code = ("import sys; from meshcheck import kernels as k; "
            "t = k.warm_up_async(int(sys.argv[1])); "
            "t is None or t.join(); "
            "print(t is not None, 'numba' in sys.modules)")
    env = {k: v for k, v in os.environ.items() if k != "MESHCHECK_KERNELS"}
    from meshcheck.kernels import WARM_UP_BYTES as big
    for size, extra, want in ((big, {}, "True True"), (big - 1, {}, "False False"),
                              (big, {"MESHCHECK_KERNELS": "numpy"}, "False False")):
        out = subprocess.run([sys.executable, "-c", code, str(size)], check=True,
                             env={**env, **extra}, capture_output=True, text=True)
        assert out.stdout.split() == want.split(), (size, extra, out.stdout)


def test_warm_up_leaves_little_of_llvm_resident():
    # numba's set-up leaves about 67 MiB of llvmlite's LLVM library resident; the warm-up
    # gives those pages back (meshcheck.threads.release_library_pages): the kernel's own
    # count of the library's resident pages (/proc/self/smaps) must stay well below that
    # after the warm-up and a second kernel's load from numba's cache
    import platform
    import subprocess
    import sys

    if platform.system() != "Linux":
        pytest.skip("/proc/self/smaps and madvise are Linux's")
    code = ("import numpy as np; from meshcheck import kernels as k; k._warm_up(); "
            "from meshcheck.kernels import topology as kt; "
            "kt.mark_used(np.zeros((2, 2), np.int64), np.zeros(1, bool)); "
            "rss, on = 0, False\n"
            "for line in open('/proc/self/smaps'):\n"
            "    h = line.split(maxsplit=5)\n"
            "    if len(h) >= 5 and '-' in h[0] and ':' not in h[0]:\n"
            "        on = len(h) == 6 and 'libllvmlite' in h[5]\n"
            "    elif on and line.startswith('Rss:'):\n"
            "        rss += int(line.split()[1])\n"
            "print(rss)")
    # the first run may compile the two specialisations (an empty numba cache: LLVM's
    # optimiser and code generator run, and touch their pages again); the second loads them
    for _ in range(2):
        out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                             text=True)
    assert 0 < int(out.stdout) < 24 * 1024, out.stdout  # KiB; about 69 MiB without the drop


def test_kernels_load_without_scipy_linalg_and_numba_blas_still_works():
    # numba's array functions would import scipy.linalg (26 MiB, 0.15 s) to look for BLAS:
    # hidden while our kernels load; afterwards a jitted np.dot (BLAS, through numba's
    # ensure_blas) still compiles and equals numpy, and scipy.linalg imports as usual
    import subprocess
    import sys

    code = ("import sys, numpy as np; from meshcheck import kernels as k; "
            "k._warm_up(); "
            "print('scipy.linalg' in sys.modules, k._BLAS_MODULE in sys.modules); "
            "import numba; f = numba.njit(lambda a, b: np.dot(a, b)); "
            "a = np.arange(12.0).reshape(3, 4); b = np.ones((4, 2)); "
            "print(np.array_equal(f(a, b), a @ b), 'scipy.linalg' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True,
                         text=True)
    assert out.stdout.split() == ["False", "False", "True", "True"], out.stdout + out.stderr


def test_compiled_edges_count_their_incidence_only_when_asked(monkeypatch):
    # the compiled builder keeps no incidence (3D audits do not read it); the one counted
    # from the cell edges on first use is the numpy builder's, every cell kind
    mesh = MESHES["mixed"]()
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = T.build_edges(mesh)
    assert ref._incidence is not None
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    got = T.build_edges(mesh)
    assert got._incidence is None
    _same_int(ref.incidence, got.incidence, "incidence")
    _same_int(ref.incidence_starts, got.incidence_starts, "incidence_starts")
    assert got._incidence is not None  # counted once, then kept
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")  # the numpy count: the same arrays
    again = T._count_incidence(got.cell_edges, len(got))
    _same_int(ref.incidence, again[0], "incidence (numpy count)")
    _same_int(ref.incidence_starts, again[1], "starts (numpy count)")


@pytest.mark.parametrize("k", [4, 5, 8])
@pytest.mark.parametrize("dtype", [np.int32, np.int64])
def test_corner_hash_is_the_numpy_paths_hash_of_the_sorted_corners(k, dtype):
    # the numpy path's hash (topology._duplicate_cells): sum of sorted corner * mult,
    # then h ^= h >> 29; four corners go through the sorting network, more by insertion
    from meshcheck.kernels import topology as kt
    from meshcheck.topology import _HASH_MULT

    rng = np.random.default_rng(k)
    cells = rng.integers(0, 50, (20_000, k)).astype(dtype)  # many ties within a cell
    cells[:50] = rng.permuted(cells[50:100], axis=1)  # the same corners, another order
    mult = _HASH_MULT[:k].copy()
    got = np.empty(len(cells), np.uint64)
    kt.corner_hash(cells, k, mult, got)
    s = np.sort(cells, axis=1).astype(np.uint64)
    with np.errstate(over="ignore"):
        want = (s * mult).sum(axis=1, dtype=np.uint64)
        want ^= want >> np.uint64(29)
    np.testing.assert_array_equal(got, want)
    np.testing.assert_array_equal(got[:50], got[50:100])


@pytest.mark.parametrize("k", [4, 8])
def test_duplicate_cells_of_cells_ordered_by_lowest_corner_skip_the_sort(k, monkeypatch):
    # cells with the same corners share their lowest corner, so in a mesh ordered by it
    # (a renumbered one) they sit in one run: distinct_in_runs proves there are none
    # without a sort, and any doubt (a repeat, corners out of order, a run longer than
    # RUN_MAX) leaves it to the sort of all hashes; the pairs are the numpy path's
    from meshcheck.kernels import topology as kt
    from meshcheck.topology import _HASH_MULT, _duplicate_cells, _duplicate_cells_compiled

    rng = np.random.default_rng(k)
    n_pts = 4000
    cells = np.array([rng.choice(n_pts, k, replace=False) for _ in range(6000)])
    cells = np.unique(np.sort(cells, axis=1), axis=0)  # distinct corner sets
    cells = rng.permuted(cells, axis=1)  # corners in any order within a cell
    cells = cells[np.argsort(cells.min(axis=1), kind="stable")].astype(np.int32)
    mult = _HASH_MULT[:k].copy()
    pts = rng.uniform(size=(n_pts, 3))
    kind = "tetra" if k == 4 else "hexahedron"

    def pairs(c, path):  # (a renumbered mesh: it has the file's cell ids)
        mesh = Mesh(pts, (CellBlock(kind, c, np.ones(len(c))),),
                    file_cell_ids=np.arange(len(c)))
        return (_duplicate_cells_compiled if path == "numba" else _duplicate_cells)(mesh)

    assert kt.distinct_in_runs(cells, k, mult)
    assert len(pairs(cells, "numba")) == 0 == len(pairs(cells, "numpy"))
    # the one pass settles it: no hash sorted (np.ndarray.sort cannot be patched; the
    # hashes are then never computed)
    calls = []
    monkeypatch.setattr(kt, "corner_hash", lambda *a: calls.append(1))
    assert len(pairs(cells, "numba")) == 0 and not calls
    monkeypatch.undo()
    # a repeat (corners in another order) inserted next to its original: caught
    i = 1234
    dup = np.insert(cells, i + 1, cells[i][::-1], axis=0)
    assert not kt.distinct_in_runs(dup, k, mult)
    np.testing.assert_array_equal(pairs(dup, "numba"), [[i, i + 1]])
    np.testing.assert_array_equal(pairs(dup, "numpy"), [[i, i + 1]])
    # out of order: the sort decides (and finds none)
    shuffled = cells[rng.permutation(len(cells))]
    assert not kt.distinct_in_runs(shuffled, k, mult)
    assert len(pairs(shuffled, "numba")) == 0
    # a run longer than RUN_MAX cells sharing a lowest corner: the sort decides
    fan = np.column_stack([np.zeros(kt.RUN_MAX + 1, np.int32),
                           1 + np.arange((kt.RUN_MAX + 1) * (k - 1)).reshape(-1, k - 1)])
    assert kt.distinct_in_runs(fan[:kt.RUN_MAX], k, mult)
    assert not kt.distinct_in_runs(fan.astype(np.int32), k, mult)
    assert len(pairs(fan.astype(np.int32), "numba")) == 0


def test_component_volumes_are_numpys_bincount_bit_for_bit():
    # the compiled sums add in index order, as np.bincount does: the same bits
    pytest.importorskip("numba")
    from meshcheck.kernels import topology as kt

    rng = np.random.default_rng(5)
    vol = rng.normal(size=10_001) * np.exp(rng.uniform(-30, 5, size=10_001))
    for n_label in (1, 7):
        label = rng.integers(0, n_label, size=len(vol)).astype(np.int32)
        got = np.zeros(n_label)
        kt.label_abs_sums(label, vol, got)
        assert np.array_equal(got, np.bincount(label, weights=np.abs(vol), minlength=n_label))
