"""Renumbering for memory locality (meshcheck.ordering): the same mesh, the same audit.

The Morton keys are checked against the definition (G. M. Morton, 1966, "A computer
oriented geodetic data base and a new technique in file sequencing": the quantised
coordinates' bits interleaved), bit by bit; the renumbered mesh against the input cell
by cell; the audit of the renumbered mesh against the audit of the input, report by
report, with every id mapped back to the file's numbering.
"""
import json
import pickle

import meshio
import numpy as np
import pytest

from meshcheck import ordering
from meshcheck.advice import AdviceSettings
from meshcheck.cli import main
from meshcheck.mesh import CellBlock, Mesh
from meshcheck.pipeline import AuditSettings, audit
from meshcheck.report import to_dict
from meshcheck.threads import thread_map
from meshes import grid_hexes, grid_points, tet_box

MODES = ["numpy", pytest.param("numba", marks=pytest.mark.skipif(
    not __import__("meshcheck.kernels", fromlist=["available"]).available(),
    reason="numba not installed"))]


def _interleaved(q: np.ndarray) -> int:
    """Morton's key of one point's quantised (x, y, z): bit b of axis d at bit 3b + d."""
    return sum(((int(q[d]) >> b) & 1) << (3 * b + d) for b in range(21) for d in range(3))


@pytest.mark.parametrize("mode", MODES)
def test_morton_keys_interleave_the_quantised_bits(mode, monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    rng = np.random.default_rng(3)
    p = rng.uniform(-2.0, 5.0, (300, 3)) * [1.0, 0.5, 0.25]
    keys = ordering.morton_keys(p)
    lo, span = p.min(axis=0), np.ptp(p, axis=0).max()
    top = 2 ** 21 - 1
    q = np.clip((p - lo) * (top / span), 0, top).astype(np.int64)
    assert keys.dtype == np.uint64
    assert [int(k) for k in keys] == [_interleaved(r) for r in q]
    # the cube's corners: all bits clear, and all 63 set
    assert int(ordering.morton_keys(np.array([[0.0, 0, 0], [1, 1, 1]]))[1]) == 2 ** 63 - 1


@pytest.mark.parametrize("mode", MODES)
def test_morton_keys_put_non_finite_coordinates_at_the_lower_corner(mode, monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    p = np.array([[0.0, 0, 0], [1, 1, 1], [np.nan, 1, 1], [np.inf, -np.inf, 0.5]])
    k = ordering.morton_keys(p)
    assert int(k[2]) == _interleaved([0, 2 ** 21 - 1, 2 ** 21 - 1])
    assert int(k[3]) == _interleaved([0, 0, (2 ** 21 - 1) // 2])


def _shuffled(mesh: Mesh, seed=0) -> Mesh:
    """``mesh`` with its points and each block's cells in random order."""
    rng = np.random.default_rng(seed)
    perm = rng.permutation(mesh.n_points)
    new = np.empty_like(perm)
    new[perm] = np.arange(len(perm))
    blocks = []
    for b in mesh.blocks:
        o = rng.permutation(len(b))
        blocks.append(CellBlock(b.type, new[b.cells[o]], np.asarray(b.region)[o]))
    return Mesh(mesh.points[perm], blocks, mesh.region_names, mesh.dim, mesh.source, mesh.unit)


def _mixed(regions: np.ndarray | None = None) -> Mesh:
    """Hexahedra and tetrahedra side by side (two blocks) with the given hex regions."""
    pts = grid_points((6, 5, 4))
    hexes = grid_hexes((6, 5, 4))
    from meshes import KUHN
    tets = hexes[60:][:, KUHN].reshape(-1, 4)
    regions = np.ones(60, int) if regions is None else regions
    return Mesh(pts, (CellBlock("hexahedron", hexes[:60], regions),
                      CellBlock("tetra", tets, np.full(len(tets), 9))), {1: "a", 9: "b"})


def _same_cells(a: Mesh, b: Mesh):
    """``b`` is ``a`` renumbered: every cell and point of b is the file's one."""
    assert np.array_equal(b.points, a.points[b.file_point_ids])
    assert b.n_cells == a.n_cells
    for blk_b, blk_a, start in zip(b.blocks, a.blocks, a.block_offsets):
        rows = b.file_cell_ids[start:start + len(blk_b)] - start
        assert blk_b.type == blk_a.type
        assert np.array_equal(b.file_point_ids[blk_b.cells], blk_a.cells[rows])
        assert np.array_equal(np.asarray(blk_b.region), np.asarray(blk_a.region)[rows])
    assert sorted(b.file_cell_ids) == list(range(a.n_cells))


@pytest.mark.parametrize("kind", ["random", "ties", "low bits", "morton"])
def test_radix_argsort_is_numpys_stable_argsort(kind):
    # the points' Morton keys sorted by 11-bit digits (digits all keys share skipped):
    # numpy's stable argsort, ties in index order (duplicate points share a key)
    pytest.importorskip("numba")
    from meshcheck.kernels import ordering as ko

    rng = np.random.default_rng(len(kind))
    n = 30_000
    if kind == "random":
        keys = rng.integers(0, 2**63, n, dtype=np.uint64) * np.uint64(2) + np.uint64(1)
    elif kind == "ties":
        keys = rng.integers(0, 50, n).astype(np.uint64) << np.uint64(40)
    elif kind == "low bits":  # only the lowest digit varies: the other passes skipped
        keys = rng.integers(0, 2000, n).astype(np.uint64)
    else:
        pts = rng.uniform(size=(n, 3))
        pts[::7] = pts[3]  # duplicate points: equal keys
        keys = ordering.morton_keys(pts)
    order = np.empty(n, np.int64)
    ko.radix_argsort(keys, order)
    np.testing.assert_array_equal(order, np.argsort(keys, kind="stable"))
    empty = np.empty(0, np.int64)
    ko.radix_argsort(np.zeros(0, np.uint64), empty)


@pytest.mark.parametrize("mode", MODES)
@pytest.mark.parametrize("case", ["tets", "mixed_blocks", "region_runs", "interleaved"])
def test_renumbered_mesh_is_the_same_mesh(case, mode, monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    if case == "tets":
        mesh = _shuffled(tet_box((5, 4, 3)))
    elif case == "mixed_blocks":
        mesh = _shuffled(_mixed())
    elif case == "region_runs":  # three runs: 2, 1, 2 (the hexes), kept in that order
        mesh = _mixed(np.repeat([2, 1, 2], 20))
    else:  # more than 256 runs: grouped by region
        mesh = _mixed(np.arange(60) % 2 + 1)
        mesh = Mesh(mesh.points, (CellBlock("hexahedron", np.tile(mesh.blocks[0].cells, (5, 1)),
                                            np.arange(300) % 2 + 1),), {})
    new = ordering.renumbered(mesh)
    _same_cells(mesh, new)
    reg = np.asarray(new.blocks[0].region)
    if case == "region_runs":
        assert reg.tolist() == [2] * 20 + [1] * 20 + [2] * 20
    if case == "interleaved":
        assert reg.tolist() == [1] * 150 + [2] * 150
    # within a run, cells by lowest renumbered corner, ties in the file's order
    for b, start in zip(new.blocks, new.block_offsets):
        r = np.asarray(b.region)
        low = b.cells[:, :b.info.n_corners].min(axis=1)
        same = r[1:] == r[:-1]
        assert (low[1:][same] >= low[:-1][same]).all()
        tie = same & (low[1:] == low[:-1])
        ids = new.file_cell_ids[start:start + len(b)]
        assert (ids[1:][tie] > ids[:-1][tie]).all()
    # renumbered twice: the file's numbers compose
    again = ordering.renumbered(new)
    _same_cells(mesh, again)


@pytest.mark.skipif(not ordering.kernels.available(), reason="numba not installed")
@pytest.mark.parametrize("case", ["one_region", "region_runs"])
def test_cells_sorted_on_two_threads_equal_one_thread_and_numpy(case, monkeypatch):
    # the compiled counting sort splits the rows in two parts (one per thread) from
    # 2 * MIN_CELLS rows: the parts' offsets must give the one-part (stable) order
    mesh = _shuffled(_mixed(None if case == "one_region" else np.repeat([2, 1, 2], 20)))
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    one = ordering.renumbered(mesh)
    monkeypatch.setattr(ordering.kernels, "MIN_CELLS", 4)
    assert len(ordering._halves(mesh.n_cells)) == 2
    two = ordering.renumbered(mesh)
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")
    ref = ordering.renumbered(mesh)
    for m in (one, two):
        assert np.array_equal(m.file_cell_ids, ref.file_cell_ids)
        assert np.array_equal(m.file_point_ids, ref.file_point_ids)
        for a, b in zip(m.blocks, ref.blocks):
            assert np.array_equal(a.cells, b.cells) and a.cells.dtype == b.cells.dtype
    _same_cells(mesh, two)


def test_renumbering_brings_the_nodes_of_a_cell_together():
    # a shuffled mesh: each cell's node ids span about half of all ids (median);
    # renumbered (node order along a Z curve, which jumps at its block edges), a small
    # fraction of it
    mesh = _shuffled(tet_box((12, 12, 12)), seed=1)
    spread = lambda m: float(np.median(np.ptp(m.blocks[0].cells, axis=1)))  # noqa: E731
    new = ordering.renumbered(mesh)
    assert spread(new) < 0.1 * spread(mesh)
    # and cells sharing a node near each other: the median id distance of consecutive
    # cells around each node, before and after
    def cell_gap(m):
        c = m.blocks[0].cells.ravel()
        cell = np.repeat(np.arange(m.n_cells), 4)
        o = np.argsort(c, kind="stable")
        c, cell = c[o], cell[o]
        same = c[1:] == c[:-1]
        return float(np.median(np.abs(np.diff(cell))[same]))
    assert cell_gap(new) < 0.1 * cell_gap(mesh)


def test_small_meshes_are_audited_in_the_files_order():
    mesh = _shuffled(tet_box((3, 3, 3)))
    assert mesh.n_cells < ordering.RENUMBER_CELLS
    same, t = ordering.renumbered_for_audit(mesh)
    assert same is mesh and t is None


def test_only_meshes_in_an_order_unrelated_to_space_are_renumbered(monkeypatch):
    monkeypatch.setattr(ordering, "RENUMBER_CELLS", 1)
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", 1)
    grid = tet_box((40, 40, 3))  # cells and nodes row by row: already local (a cell
    span, step = ordering.locality(grid)  # spans one x step: 41 * 4 of 41 * 41 * 4 nodes)
    assert span < 0.03 and step < 0.01
    same, t = ordering.renumbered_for_audit(grid)
    assert same is grid and t is None
    shuffled = _shuffled(grid, seed=3)  # median span about 0.6, step about 0.14
    span, step = ordering.locality(shuffled)
    assert span > 0.3 and step > 0.1
    new, t = ordering.renumbered_for_audit(shuffled)
    assert new.file_cell_ids is not None and t > 0
    assert ordering.locality(new)[0] < 0.2 * span and ordering.locality(new)[1] < 0.2 * step
    again, t = ordering.renumbered_for_audit(new)  # renumbered already
    assert again is new and t is None


@pytest.mark.parametrize("built", [False, True])
def test_without_the_built_kernels_only_larger_meshes_are_renumbered(monkeypatch, built):
    # numba's cache serving the kernels: loading the renumbering's own costs more memory
    # than it saves below RENUMBER_CELLS_JIT cells (see its comment)
    from meshcheck.kernels import ahead

    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    monkeypatch.setattr(ahead, "available", lambda: built)
    monkeypatch.setattr(ordering, "RENUMBER_CELLS", 1)
    shuffled = _shuffled(tet_box((12, 10, 3)), seed=4)
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", shuffled.n_cells + 1)
    got, t = ordering.renumbered_for_audit(shuffled)
    assert (got is not shuffled) == built and (t is not None) == built
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", shuffled.n_cells)
    got, t = ordering.renumbered_for_audit(shuffled)
    assert got is not shuffled and t is not None
    monkeypatch.setenv("MESHCHECK_KERNELS", "numpy")  # no kernels to load: renumbered
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", shuffled.n_cells + 1)
    assert ordering.renumbered_for_audit(shuffled)[0] is not shuffled


def test_large_renumbered_meshes_keep_the_files_numbers_in_a_temporary_file(monkeypatch):
    monkeypatch.setattr(ordering, "RENUMBER_CELLS", 1)
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", 1)
    shuffled = _shuffled(tet_box((12, 10, 3)), seed=4)
    kept, _ = ordering.renumbered_for_audit(shuffled)
    assert isinstance(kept.file_cell_ids, np.ndarray)
    monkeypatch.setattr(ordering, "SPILL_CELLS", 1)
    spilled, _ = ordering.renumbered_for_audit(shuffled)
    assert isinstance(spilled.file_cell_ids, ordering.SpilledIds)
    assert isinstance(spilled.file_point_ids, ordering.SpilledIds)
    assert np.array_equal(np.asarray(spilled.file_cell_ids), kept.file_cell_ids)
    assert np.array_equal(np.asarray(spilled.file_point_ids), kept.file_point_ids)
    for n, of in ((shuffled.n_cells, "file_cells"), (shuffled.n_points, "file_points")):
        ids = [0, 7, n - 1]
        assert np.array_equal(getattr(spilled, of)(ids), getattr(kept, of)(ids))

    def no_temporary_file(*a, **k):
        raise OSError("read-only file system")

    monkeypatch.setattr(ordering.tempfile, "TemporaryFile", no_temporary_file)
    fallback, _ = ordering.renumbered_for_audit(shuffled)  # kept in memory instead
    assert isinstance(fallback.file_cell_ids, np.ndarray)
    assert np.array_equal(fallback.file_cell_ids, kept.file_cell_ids)
    monkeypatch.undo()
    monkeypatch.setattr(ordering, "RENUMBER_CELLS", 1)
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", 1)
    monkeypatch.setattr(ordering, "SPILL_CELLS", 1)
    monkeypatch.delattr(ordering.os, "preadv")  # e.g. Windows: kept in memory
    fallback, _ = ordering.renumbered_for_audit(shuffled)
    assert isinstance(fallback.file_cell_ids, np.ndarray)
    assert np.array_equal(fallback.file_cell_ids, kept.file_cell_ids)


def test_spilled_ids_index_as_the_array_they_hold(monkeypatch):
    rng = np.random.default_rng(11)
    a = rng.permutation(100_003).astype(np.int32)
    s = ordering.SpilledIds(a)
    monkeypatch.setattr(ordering.SpilledIds, "CHUNK", 4096)  # many parts per gather
    assert len(s) == len(a) and s.dtype == a.dtype and s.ndim == 1
    assert np.array_equal(np.asarray(s), a) and np.asarray(s, np.int64).dtype == np.int64
    for key in (slice(5, 100), slice(None), slice(-10, None), slice(0, 1000, 7),
                slice(100, 5), slice(None, None, -3)):
        assert np.array_equal(s[key], a[key]), key
    for idx in ([3], [0, -1, 5], rng.integers(0, len(a), 50),
                rng.integers(-len(a), len(a), 5000), rng.permutation(len(a)),
                np.zeros(0, int), np.arange(12).reshape(3, 4), a > 50_000):
        assert np.array_equal(s[idx], a[idx]), idx
    assert s[7] == a[7] and s[-1] == a[-1]
    assert s.astype(np.int64).dtype == np.int64
    assert np.array_equal(pickle.loads(pickle.dumps(s)), a)
    for bad in (len(a), -len(a) - 1, [0, len(a)]):
        with pytest.raises(IndexError):
            s[bad]
    with pytest.raises(ValueError):
        ordering.SpilledIds(np.zeros((2, 2), np.int32))
    parts = [(lo, lo + 30_000) for lo in range(0, 70_000, 1000)]  # threads read at once
    assert all(thread_map(lambda r: np.array_equal(s[r[0]:r[1]], a[r[0]:r[1]]), parts))
    assert s._held is None  # written on its thread, then no longer held in memory
    fresh = ordering.SpilledIds(a)  # threads reading while the writer may still run
    assert all(thread_map(lambda r: np.array_equal(fresh[r[0]:r[1]], a[r[0]:r[1]]), parts))


def test_spilled_ids_stay_in_memory_when_their_write_fails(monkeypatch, tmp_path):
    # the values are written on a thread; a failed write (here a file that cannot be
    # written, as a full disk) leaves them in memory, and the reads are served from there
    (tmp_path / "ro").write_bytes(b"")
    monkeypatch.setattr(ordering.tempfile, "TemporaryFile",
                        lambda **k: open(tmp_path / "ro", "rb"))
    a = np.arange(5000, dtype=np.int32)[::-1].copy()
    s = ordering.SpilledIds(a)
    assert np.array_equal(np.asarray(s), a)
    assert np.array_equal(s[[3, 4999, -1]], a[[3, 4999, -1]]) and s[10] == a[10]
    assert s._held is not None


def _broken(mesh: Mesh) -> Mesh:
    """``mesh`` with one cell inverted and a node no cell uses."""
    c = mesh.blocks[0].cells.copy()
    c[7, [0, 1]] = c[7, [1, 0]]
    pts = np.vstack([mesh.points, [[9.0, 9.0, 9.0]]])
    return Mesh(pts, (CellBlock("tetra", c, np.ones(len(c), int)),), {1: "air"}, 3,
                "broken", "m")


def _graded(n=(10, 6, 5)) -> Mesh:
    """A shuffled box of tets graded towards one corner (fine cells to coarsen, coarse
    ones to refine), jittered: no two cells alike, so that the worst cells are the same
    in any order."""
    box = tet_box(n, size=(1.6, 1.2, 1.0))
    pts = box.points + np.random.default_rng(5).uniform(-0.008, 0.008, box.points.shape)
    pts = np.abs(pts) ** 3 / pts.max(axis=0) ** 2
    return _shuffled(Mesh(pts, box.blocks, box.region_names, source="graded"), seed=2)


def _comparable(d: dict) -> dict:
    """The JSON report without what may differ between two numberings of one mesh: the
    time, the clusters' sample of cell ids and the topology's face numbers."""
    d = json.loads(json.dumps(d))
    d.pop("created"), d.pop("timings_s")
    for c in d["refine"] + d["coarsen"]:
        c.pop("some_cell_ids")
    for w in (d["curvature"] or {}).get("worst", []):
        w.pop("face")
    for sec in [*d["quality"].values(), d["curvature"], d["gradation"], d["quadratic_cells"]]:
        if sec and sec.get("worst"):  # equal values: listed in the order of the cell ids
            sec["worst"].sort(key=lambda e: (
                [e[k] for k in ("value", "gap_over_tolerance", "ratio") if k in e],
                e.get("cell", e.get("cells"))))
    for f in d["findings"]:  # fewer than the listed maximum: the same ids, any order
        o = np.argsort(f["ids"], kind="stable")
        f["ids"] = [f["ids"][i] for i in o]
        f["locations"] = [f["locations"][i] for i in o]
    return d


@pytest.mark.parametrize("mode", MODES)
def test_audit_of_the_renumbered_mesh_reports_the_same_in_the_files_ids(mode, monkeypatch):
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    mesh = _broken(_graded())
    settings = AuditSettings(tuple(np.linspace(50, 300, 6)), advice=AdviceSettings(order=1))
    a, b = audit(mesh, settings), audit(ordering.renumbered(mesh), settings)
    da, db = to_dict(a, cost=False), to_dict(b, cost=False)
    codes = {f["code"] for f in da["findings"]}
    assert {"inverted_cells", "unused_nodes"} <= codes
    assert db["findings"][0]["ids"] != [] and da["refine"] and da["coarsen"]
    _assert_close(_comparable(da), _comparable(db))


def _assert_close(a, b, path=""):
    """Equal reports, floats to 1e-9 relative (sums over cells in another order)."""
    if isinstance(a, dict):
        assert isinstance(b, dict) and a.keys() == b.keys(), path
        for k in a:
            _assert_close(a[k], b[k], f"{path}/{k}")
    elif isinstance(a, list):
        assert isinstance(b, list) and len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            _assert_close(x, y, f"{path}[{i}]")
    elif isinstance(a, float) and isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-300, nan_ok=True), path
    else:
        assert a == b, path


@pytest.mark.parametrize("spill", [False, True])
def test_command_renumbers_large_meshes_and_reports_the_files_ids(tmp_path, monkeypatch,
                                                                 spill):
    if spill:  # the file's numbers in a temporary file (large meshes): the same reports
        monkeypatch.setattr(ordering, "SPILL_CELLS", 1)
    mesh = _graded((6, 5, 4))
    c = mesh.blocks[0].cells.copy()
    c[5, [0, 1]] = c[5, [1, 0]]  # an inverted cell: file id 5
    path = tmp_path / "m.vtu"
    meshio.write(path, meshio.Mesh(mesh.points, [("tetra", c)]))
    args = ["audit", str(path), "-u", "m", "--fmax", "300", "--order", "1", "--reports", "json,vtu",
            "--no-cost", "--quiet", "--out"]
    main(args + [str(tmp_path / "file")])
    monkeypatch.setattr(ordering, "RENUMBER_CELLS", 1)
    monkeypatch.setattr(ordering, "RENUMBER_CELLS_JIT", 1)
    main(args + [str(tmp_path / "renumbered")])
    d = {k: json.loads((tmp_path / k / "m.audit.json").read_text())
         for k in ("file", "renumbered")}
    assert "renumber" in d["renumbered"]["timings_s"]
    inverted = [f for f in d["renumbered"]["findings"] if f["code"] == "inverted_cells"][0]
    assert inverted["ids"] == [5]
    _assert_close(_comparable(d["file"]), _comparable(d["renumbered"]))
    # the VTU: cells in the audit's order, with the file's numbers beside them
    back = meshio.read(tmp_path / "renumbered" / "m.audit.vtu")
    fid = back.cell_data["file_cell_id"][0]
    pid = back.point_data["file_point_id"]
    assert sorted(fid) == list(range(len(c)))
    assert np.array_equal(pid[back.cells[0].data], c[fid])
    assert np.array_equal(back.points, mesh.points[pid])
    plain = meshio.read(tmp_path / "file" / "m.audit.vtu")
    assert "file_cell_id" not in plain.cell_data
    for name in ("order_needed", "quality_aspect_ratio", "min_scaled_jacobian"):
        assert np.array_equal(back.cell_data[name][0], plain.cell_data[name][0][fid]), name
