"""Our VTU writer read back by meshio and by VTK's own XML reader."""
import meshio
import numpy as np
import pytest

from meshcheck.vtkxml import write_vtu
from meshes import hex_box, tet10_box, tet_box


def _read_back_by_both(path, points, cells, cd, pd):
    """meshio and VTK's XML reader read the file back: the points, the first block's
    cells (meshio), and every cell and point array under its name."""
    back = meshio.read(path)
    assert np.array_equal(back.points, points) and np.array_equal(back.cells[0].data, cells)
    for k, v in cd.items():
        assert np.array_equal(back.cell_data[k][0], v), k
    for k, v in pd.items():
        assert np.array_equal(back.point_data[k], v), k
    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    g = r.GetOutput()
    assert np.array_equal(vtk_to_numpy(g.GetPoints().GetData()), points)
    for k, v in cd.items():
        assert np.array_equal(vtk_to_numpy(g.GetCellData().GetArray(k)), v), k
    for k, v in pd.items():
        assert np.array_equal(vtk_to_numpy(g.GetPointData().GetArray(k)), v), k


@pytest.mark.parametrize("make", [tet_box, hex_box, tet10_box], ids=["tet", "hex", "tet10"])
def test_round_trip_meshio(tmp_path, make):
    mesh = make((2, 2, 2))
    b = mesh.blocks[0]
    rng = np.random.default_rng(0)
    data = {"f32": rng.random(len(b)).astype(np.float32), "i8": np.arange(len(b)) % 7,
            "flag": (np.arange(len(b)) % 2).astype(np.int8), "vec": rng.random((len(b), 3))}
    path = write_vtu(tmp_path / "x.vtu", mesh.points, [(b.type, b.cells)], cell_data=data,
                     point_data={"p": np.arange(mesh.n_points, dtype=np.float64)})
    back = meshio.read(path)
    assert np.array_equal(back.points, mesh.points)
    assert back.cells[0].type == b.type and np.array_equal(back.cells[0].data, b.cells)
    for k, v in data.items():
        assert np.array_equal(back.cell_data[k][0], v)
    assert np.array_equal(back.point_data["p"], np.arange(mesh.n_points))


def test_vtk_reader_reads_it(tmp_path):
    vtk = pytest.importorskip("vtk")
    mesh = tet_box((3, 3, 3))
    b = mesh.blocks[0]
    big = np.arange(len(b), dtype=np.float64)
    path = write_vtu(tmp_path / "x.vtu", mesh.points, [(b.type, b.cells)],
                     cell_data={"id": big, "name with <&>": big})
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    grid = r.GetOutput()
    assert grid.GetNumberOfCells() == len(b) and grid.GetNumberOfPoints() == mesh.n_points
    from vtk.util.numpy_support import vtk_to_numpy
    assert np.array_equal(vtk_to_numpy(grid.GetCellData().GetArray("id")), big)
    assert grid.GetCellData().GetArray("name with <&>") is not None
    assert grid.GetCellType(0) == 10


@pytest.mark.parametrize("level", [0, 1])
def test_point_data_written_last_read_by_meshio_and_vtk(tmp_path, level):
    # the appended data hold the arrays in the reverse of their tags' order: the cells'
    # arrays first, then the points, the cell data, and the point data last (made late:
    # e.g. a size field computed meanwhile); readers follow the offsets
    import re

    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy

    from meshcheck.vtkxml import Deferred
    mesh = tet_box((3, 3, 3))
    b = mesh.blocks[0]
    cid = np.arange(len(b), dtype=np.float32)
    pid = np.arange(mesh.n_points, dtype=np.float32) * 0.5
    path = write_vtu(tmp_path / "order.vtu", mesh.points, [(b.type, b.cells)],
                     cell_data={"cid": cid},
                     point_data={"pid": Deferred(lambda: pid, np.float32)}, level=level)
    text = path.read_bytes()
    head = text[:text.index(b"<AppendedData")].decode()
    found = re.findall(r'Name="(\w+)"[^>]*offset="(\d+)"', head)
    offsets = {m[0]: int(m[1]) for m in found}
    assert offsets["types"] == 0 and offsets["pid"] == max(offsets.values())
    assert [int(m[1]) for m in found] == sorted((int(m[1]) for m in found), reverse=True)
    m = meshio.read(path)
    assert np.array_equal(m.point_data["pid"], pid) and np.array_equal(m.cell_data["cid"][0], cid)
    assert np.array_equal(m.points, mesh.points)
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    grid = r.GetOutput()
    assert np.array_equal(vtk_to_numpy(grid.GetPointData().GetArray("pid")), pid)
    assert np.array_equal(vtk_to_numpy(grid.GetCellData().GetArray("cid")), cid)


def test_multi_block_compression(tmp_path):
    # arrays larger than one compressed block (2 MiB; blocks compressed in parallel)
    n = 700_000
    pts = np.random.default_rng(1).random((n, 3))
    cells = np.arange(n - n % 4).reshape(-1, 4)
    path = write_vtu(tmp_path / "big.vtu", pts, [("tetra", cells)],
                     cell_data={"v": np.arange(len(cells), dtype=np.float64)})
    back = meshio.read(path)
    assert np.array_equal(back.points, pts)
    assert np.array_equal(back.cells[0].data, cells)


@pytest.mark.parametrize("level", [1, 0], ids=["zlib", "uncompressed"])
def test_vtk_reader_reads_multi_block_arrays_and_mixed_cells(tmp_path, level):
    # arrays over several compressed blocks (level 1) or several base64 pieces (level 0,
    # 3 MiB each), two cell types, point and cell data, all read back by VTK's own XML
    # reader and by meshio (offsets filled in after writing)
    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy
    rng = np.random.default_rng(3)
    n = 300_000
    pts = rng.random((n, 3))
    tets = rng.integers(0, n, (200_000, 4))
    hexes = rng.integers(0, n, (100_000, 8))
    cd = {"a": rng.random(300_000), "b": np.arange(300_000, dtype=np.int32),
          "vec": rng.random((300_000, 3)).astype(np.float32)}
    path = write_vtu(tmp_path / "mixed.vtu", pts, [("tetra", tets), ("hexahedron", hexes)],
                     cell_data=cd, point_data={"p": rng.random(n)}, level=level)
    assert (b"vtkZLibDataCompressor" in path.read_bytes()[:400]) == (level > 0)
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    g = r.GetOutput()
    assert g.GetNumberOfCells() == 300_000 and g.GetNumberOfPoints() == n
    assert np.array_equal(vtk_to_numpy(g.GetPoints().GetData()), pts)
    conn = vtk_to_numpy(g.GetCells().GetConnectivityArray())
    assert np.array_equal(conn, np.concatenate([tets.ravel(), hexes.ravel()]))
    assert g.GetCellType(0) == 10 and g.GetCellType(299_999) == 12
    offs = vtk_to_numpy(g.GetCells().GetOffsetsArray())
    assert np.array_equal(offs, np.concatenate([[0], 4 * np.arange(1, 200_001),
                                                800_000 + 8 * np.arange(1, 100_001)]))
    for k, v in cd.items():
        assert np.array_equal(vtk_to_numpy(g.GetCellData().GetArray(k)), v)
    back = meshio.read(path)
    assert np.array_equal(back.cells[1].data, hexes)
    assert np.array_equal(back.point_data["p"], vtk_to_numpy(g.GetPointData().GetArray("p")))


def test_many_small_arrays_keep_their_names(tmp_path):
    # offsets of many short arrays: each read back (meshio and VTK) under its own name
    mesh = tet_box((2, 2, 2))
    b = mesh.blocks[0]
    cd = {f"c{k}": np.full(len(b), k, np.float32) for k in range(30)}
    pd = {f"p{k}": np.full(mesh.n_points, -k, np.float64) for k in range(12)}
    path = write_vtu(tmp_path / "many.vtu", mesh.points, [(b.type, b.cells)], cell_data=cd,
                     point_data=pd)
    _read_back_by_both(path, mesh.points, b.cells, cd, pd)


def test_stored_blocks_read_back_by_meshio_and_vtk(tmp_path):
    # level 0 (the report's choice above half a million cells): same layout, no compression
    mesh = hex_box((3, 3, 3))
    b = mesh.blocks[0]
    v = np.linspace(0, 1, len(b))
    small = write_vtu(tmp_path / "z.vtu", mesh.points, [(b.type, b.cells)], cell_data={"v": v})
    stored = write_vtu(tmp_path / "s.vtu", mesh.points, [(b.type, b.cells)], cell_data={"v": v},
                       level=0)
    assert stored.stat().st_size > small.stat().st_size
    back = meshio.read(stored)
    assert np.array_equal(back.cells[0].data, b.cells) and np.array_equal(back.cell_data["v"][0], v)
    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(stored))
    r.Update()
    assert np.array_equal(vtk_to_numpy(r.GetOutput().GetCellData().GetArray("v")), v)


@pytest.mark.parametrize("m", [1, 2, 3, 4])
def test_uncompressed_arrays_of_small_lengths(tmp_path, m):
    # level 0: each array is its UInt64 byte count and its bytes, arrays of one to four
    # cells of every type; read by both readers
    rng = np.random.default_rng(m)
    pts = rng.random((m + 3, 3))
    cells = np.array([np.arange(k, k + 4) for k in range(m)])
    cd = {"i8": np.arange(m, dtype=np.int8) - 3, "f32": rng.random(m).astype(np.float32),
          "i8b": (np.arange(m) % 2).astype(np.int8), "vec": rng.random((m, 3))}
    pd = {"u8": np.arange(m + 3, dtype=np.uint8), "p": rng.random(m + 3)}
    path = write_vtu(tmp_path / "u.vtu", pts, [("tetra", cells)], cell_data=cd,
                     point_data=pd, level=0)
    _read_back_by_both(path, pts, cells, cd, pd)


@pytest.mark.parametrize("level", [1, 0])
def test_empty_grid(tmp_path, level):
    # empty arrays (8-byte header only; meshio 5.3 cannot read a grid without cells)
    vtk = pytest.importorskip("vtk")
    path = write_vtu(tmp_path / "e.vtu", np.zeros((0, 3)), [], level=level)
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    assert r.GetOutput().GetNumberOfPoints() == 0 and r.GetOutput().GetNumberOfCells() == 0


# ---------------------------------------------------------------------------
# raw appended data: pieces, order, errors


def _level0_case(make):
    mesh = make((3, 2, 2))
    b = mesh.blocks[0]
    rng = np.random.default_rng(7)
    m = len(b)
    cd = {"f64": rng.random(m), "f32": rng.random(m).astype(np.float32),
          "i32": rng.integers(-9, 9, m).astype(np.int32), "i8": (np.arange(m) % 5).astype(np.int8),
          "vec": rng.random((m, 3))}
    pd = {"p": rng.random(mesh.n_points), "u8": np.arange(mesh.n_points, dtype=np.uint8)}
    return mesh, b, cd, pd


@pytest.mark.parametrize("make", [tet_box, hex_box, tet10_box], ids=["tet", "hex", "tet10"])
@pytest.mark.parametrize("level", [0, 1])
def test_piece_size_does_not_change_the_file(tmp_path, monkeypatch, make, level):
    # pieces of 111 bytes (arrays over many pieces, their ends at every residue) give the
    # file of whole arrays, read back by meshio and VTK
    from meshcheck import vtkxml
    mesh, b, cd, pd = _level0_case(make)
    whole = write_vtu(tmp_path / "whole.vtu", mesh.points, [(b.type, b.cells)],
                      cell_data=cd, point_data=pd, level=level)
    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 37)
    small = write_vtu(tmp_path / "small.vtu", mesh.points, [(b.type, b.cells)],
                      cell_data=cd, point_data=pd, level=level)
    assert small.read_bytes() == whole.read_bytes()
    _read_back_by_both(small, mesh.points, b.cells, cd, pd)


def _meshio_misreads_in_file_order(sizes: list[int]) -> bool:
    """Whether meshio 5.3's conversion of raw appended data (tags renumbered one after
    another in file order, each found by its offset text, first in document order) would
    take a renumbered tag for a later array when the arrays of ``sizes`` bytes were
    appended in the order of their tags."""
    raw, b64, at, total = [], [], 0, 0
    for n in sizes:
        raw.append(at)
        b64.append(total)
        at += 8 + n
        total += 4 * -(-(8 + n) // 3)
    return any(b64[j] == raw[m] for m in range(len(sizes)) for j in range(m))


def test_meshio_reads_arrays_whose_file_order_offsets_collide(tmp_path):
    # cell arrays sized so that, appended in their tags' order, a renumbered offset would
    # equal a later array's: meshio would read the wrong array (or fail); in reverse order
    # it reads each one under its name (VTK follows the offsets either way)
    rng = np.random.default_rng(3)
    mesh = tet_box((2, 2, 2))
    b = mesh.blocks[0]
    m = len(b)
    # tag order: cell data a0..a(k-1), Points, connectivity, offsets, types
    fixed = [mesh.points.nbytes, b.cells.size * 4, m * 4, m]
    for _ in range(2000):
        comps = rng.integers(1, 40, 6)
        if _meshio_misreads_in_file_order([m * 8 * int(c) for c in comps] + fixed):
            break
    else:
        raise AssertionError("no colliding layout found")
    cd = {f"a{i}": rng.random((m, int(c))) for i, c in enumerate(comps)}
    path = write_vtu(tmp_path / "c.vtu", mesh.points, [(b.type, b.cells)], cell_data=cd,
                     level=0)
    _read_back_by_both(path, mesh.points, b.cells,
                       {k: (v if v.shape[1] > 1 else v[:, 0]) for k, v in cd.items()}, {})


def test_writer_errors_reach_the_caller(tmp_path, monkeypatch):
    # an array that fails while being made, and a write that fails on the writer thread:
    # both raised to the caller, nothing hangs
    from meshcheck import vtkxml
    from meshcheck.vtkxml import Deferred
    mesh = tet_box((3, 3, 3))
    cells = [("tetra", mesh.blocks[0].cells)]

    def broken():
        raise RuntimeError("array broke")
    with pytest.raises(RuntimeError, match="array broke"):
        write_vtu(tmp_path / "a.vtu", mesh.points, cells,
                  cell_data={"x": Deferred(broken, np.float32)}, level=0)
    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 11)

    class Full(vtkxml.BulkFile):
        n = 0

        def write(self, data):
            Full.n += 1
            if Full.n == 5:
                raise OSError("disk full")
            return super().write(data)

    monkeypatch.setattr(vtkxml, "BulkFile", Full)
    with pytest.raises(OSError, match="disk full"):
        write_vtu(tmp_path / "b.vtu", mesh.points, cells,
                  cell_data={"v": np.zeros(len(cells[0][1]))}, level=0)


def test_small_level0_write_does_not_load_numba(tmp_path):
    # the writer needs no compiled kernel: numba is never imported
    import os
    import subprocess
    import sys
    from pathlib import Path

    code = ("import sys; from meshes import tet_box; from meshcheck.vtkxml import write_vtu; "
            f"m = tet_box((3, 3, 3)); write_vtu({str(tmp_path / 'a.vtu')!r}, m.points, "
            "[('tetra', m.blocks[0].cells)], level=0); "
            "assert 'numba' not in sys.modules, 'numba loaded'")
    env = {k: v for k, v in os.environ.items() if k != "MESHCHECK_KERNELS"}
    subprocess.run([sys.executable, "-c", code], check=True, env=env, cwd=Path(__file__).parent)


@pytest.mark.parametrize("level", [0, 1])
def test_deferred_arrays_write_the_same_file(tmp_path, level):
    # arrays made only when written (the report's way to hold one array at a time)
    from meshcheck.vtkxml import Deferred

    m = tet_box((3, 2, 2))
    cells = [(b.type, b.cells) for b in m.blocks]
    rng = np.random.default_rng(5)
    data = {"a": rng.random(m.n_cells).astype(np.float32),
            "b": rng.integers(0, 9, m.n_cells).astype(np.int8),
            "v": rng.random((m.n_cells, 3))}
    made = []

    def later(name):
        return Deferred(lambda: made.append(name) or data[name], data[name].dtype,
                        1 if data[name].ndim == 1 else data[name].shape[1])

    eager = write_vtu(tmp_path / "eager.vtu", m.points, cells, cell_data=data, level=level)
    lazy = write_vtu(tmp_path / "lazy.vtu", m.points, cells,
                     cell_data={k: later(k) for k in data}, level=level)
    assert eager.read_bytes() == lazy.read_bytes()
    assert made == ["v", "b", "a"]  # each made once, in the file's order
    back = meshio.read(lazy)
    np.testing.assert_array_equal(back.cell_data["v"][0], data["v"])


@pytest.mark.parametrize("bad", ["dtype", "rows", "components"])
def test_deferred_array_not_as_declared_is_an_error(tmp_path, bad):
    from meshcheck.vtkxml import Deferred

    m = tet_box((2, 2, 2))
    n = m.n_cells
    arr = {"dtype": np.zeros(n, np.float64), "rows": np.zeros(n + 1, np.float32),
           "components": np.zeros((n, 2), np.float32)}[bad]
    with pytest.raises(ValueError, match="declared"):
        write_vtu(tmp_path / "x.vtu", m.points, [(b.type, b.cells) for b in m.blocks],
                  cell_data={"x": Deferred(lambda: arr, np.float32)})


def test_attribute_quoting_equals_the_standard_library():
    from xml.sax.saxutils import quoteattr as reference

    from meshcheck.vtkxml import quoteattr
    for text in ["plain", "a&b", "<tag>", 'say "hi"', "it's", "both ' and \"", "tab\there",
                 "new\nline\r", "&amp;", "", "ünïcödé \u2264 p", "'\"&<>\t\n\r"]:
        assert quoteattr(text) == reference(text), text


def test_chunked_bytes_equal_the_whole_array():
    # any byte span of a Chunked source equals that span of the array it stands for
    from meshcheck.vtkxml import Chunked

    whole = np.random.default_rng(2).integers(-2**31, 2**31, 101).astype(np.int32)
    made = []
    src = Chunked(lambda lo, hi: made.append((lo, hi)) or whole[lo:hi], np.int32, len(whole))
    raw = whole.view(np.uint8)
    assert len(src) == raw.size
    for i, j in [(0, 1), (1, 112), (3, 5), (111, 404), (400, 404), (0, 404), (7, 7)]:
        assert np.array_equal(src[i:j], raw[i:j])
    assert max(hi - lo for lo, hi in made) <= 101


def test_level0_connectivity_in_pieces_across_blocks(tmp_path, monkeypatch):
    # the connectivity is made a piece at a time: pieces of 111 bytes straddle its Int32
    # items and the border of the two blocks; the offsets are made 5 cells at a time;
    # meshio reads the cells back (it splits the connectivity at the offsets)
    from meshcheck import vtkxml
    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 37)
    monkeypatch.setattr(vtkxml, "_OFFSETS_CHUNK", 5)
    rng = np.random.default_rng(9)
    pts = rng.random((50, 3))
    tets, hexes = rng.integers(0, 50, (31, 4)), rng.integers(0, 50, (17, 8))
    path = write_vtu(tmp_path / "x.vtu", pts, [("tetra", tets), ("hexahedron", hexes)],
                     level=0)
    back = meshio.read(path)
    assert np.array_equal(back.cells[0].data, tets) and np.array_equal(back.cells[1].data, hexes)


@pytest.mark.parametrize("level", [0, 1])
def test_direct_writes_give_the_same_file(tmp_path, monkeypatch, level):
    # a file written past the page cache (meshcheck.bulkfile, tiny buffers so that the
    # arrays cross many of them) has the bytes of the ordinary one, read back by both
    from meshcheck import bulkfile
    mesh, b, cd, pd = _level0_case(tet10_box)
    plain = write_vtu(tmp_path / "plain.vtu", mesh.points, [(b.type, b.cells)],
                      cell_data=cd, point_data=pd, level=level)
    monkeypatch.setattr(bulkfile, "DIRECT_MIN_BYTES", 0)
    monkeypatch.setattr(bulkfile, "BUFFER_BYTES", 8192)
    monkeypatch.setattr(bulkfile, "PROBE_BYTES", 1 << 40)
    used = []
    real = bulkfile._direct_write
    monkeypatch.setattr(bulkfile, "_direct_write", lambda fd, mv: used.append(1) or real(fd, mv))
    direct = write_vtu(tmp_path / "direct.vtu", mesh.points, [(b.type, b.cells)],
                       cell_data=cd, point_data=pd, level=level)
    assert direct.read_bytes() == plain.read_bytes()
    if level == 0 and bulkfile.supports_direct(tmp_path):
        assert len(used) >= plain.stat().st_size // 8192 - 1  # written directly
    elif level == 1:
        assert not used  # a compressed file's size is unknown: the ordinary way
    _read_back_by_both(direct, mesh.points, b.cells, cd, pd)
