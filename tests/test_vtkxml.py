"""Our VTU writer read back by meshio and by VTK's own XML reader."""
import base64

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
    # the appended data hold the cell data, then points and cells, then the point data
    # (made late: e.g. a size field computed meanwhile); readers follow the offsets
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
    offsets = {m[0]: int(m[1]) for m in re.findall(r'Name="(\w+)"[^>]*offset="(\d+)"', head)}
    assert offsets["cid"] == 0 and offsets["pid"] == max(offsets.values())
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
def test_uncompressed_arrays_of_every_length_mod_3(tmp_path, m):
    # level 0: each array is base64(UInt64 count + bytes) in one stream, with or without
    # padding at its end (8 + bytes = 0, 1, 2 mod 3), empty arrays too; read by both readers
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
# level 0 on the compiled path: meshcheck.kernels.b64 against Python's base64 (RFC 4648)

LENGTHS = list(range(72)) + [3 * 4099, 3 * 4099 + 1, 3 * 4099 + 2, (3 << 20) + 1]


@pytest.mark.parametrize("n", LENGTHS)
def test_b64_encoder_equals_base64_module(n):
    # byte for byte base64.b64encode (standard alphabet, "=" padding), from arrays, bytes and
    # an unaligned slice, into a fresh buffer and into a longer one (nothing past the text)
    from meshcheck.kernels import b64
    rng = np.random.default_rng(n)
    raw = rng.integers(0, 256, n + 1, dtype=np.uint8)
    src = raw[1:]  # starts one byte into its buffer
    want = base64.b64encode(src.tobytes())
    assert len(want) == b64.encoded_length(n)
    assert b64.encode(src).tobytes() == want
    assert b64.encode(src.tobytes()).tobytes() == want
    out = np.full(len(want) + 7, 255, np.uint8)
    assert b64.encode_into(src, out, b64.PAIRS, b64.ALPHABET) == len(want)
    assert out[:len(want)].tobytes() == want and (out[len(want):] == 255).all()


def test_b64_encoder_every_byte_value_and_short_buffer():
    # all 256 byte values in every position of a 3-byte group; a short buffer is refused
    from meshcheck.kernels import b64
    for shift in range(3):
        src = np.roll(np.arange(256 * 3, dtype=np.uint8), shift)
        assert b64.encode(src).tobytes() == base64.b64encode(src.tobytes())
    with pytest.raises(ValueError):
        b64.encode_into(np.zeros(4, np.uint8), np.zeros(7, np.uint8), b64.PAIRS, b64.ALPHABET)


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
@pytest.mark.parametrize("chunk", [3 << 20, 3 * 37], ids=["one-piece", "many-pieces"])
def test_level0_compiled_file_identical_to_binascii(tmp_path, monkeypatch, make, chunk):
    # the same bytes from both paths; with small pieces (more pieces than buffers, ends of
    # arrays at every residue) and read back by meshio and VTK
    from meshcheck import vtkxml
    from meshcheck.kernels import b64
    monkeypatch.setattr(vtkxml, "_CHUNK", chunk)
    monkeypatch.setattr(vtkxml, "_BUFFERS", 2)
    calls = []
    encode = b64.encode
    monkeypatch.setattr(b64, "encode", lambda src, out: calls.append(len(src)) or encode(src, out))
    mesh, b, cd, pd = _level0_case(make)
    files = {}
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        n_calls = len(calls)
        files[mode] = write_vtu(tmp_path / f"{mode}.vtu", mesh.points, [(b.type, b.cells)],
                                cell_data=cd, point_data=pd, level=0)
        assert (len(calls) > n_calls) == (mode == "numba")  # the kernel ran on that path only
    assert files["numba"].read_bytes() == files["numpy"].read_bytes()
    _read_back_by_both(files["numba"], mesh.points, b.cells, cd, pd)


def test_level0_compiled_multi_piece_large_arrays(tmp_path, monkeypatch):
    # real 3 MiB pieces: arrays over several pieces, mixed cells, identical to binascii
    rng = np.random.default_rng(5)
    n = 400_000
    pts = rng.random((n, 3))
    tets, hexes = rng.integers(0, n, (250_000, 4)), rng.integers(0, n, (150_000, 8))
    cd = {"a": rng.random(400_000), "vec": rng.random((400_000, 3)).astype(np.float32)}
    out = {}
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        out[mode] = write_vtu(tmp_path / f"{mode}.vtu", pts,
                              [("tetra", tets), ("hexahedron", hexes)], cell_data=cd,
                              level=0).read_bytes()
    assert out["numba"] == out["numpy"]
    back = meshio.read(tmp_path / "numba.vtu")
    assert np.array_equal(back.points, pts) and np.array_equal(back.cells[1].data, hexes)
    assert np.array_equal(np.concatenate(back.cell_data["vec"]), cd["vec"])  # split by block


def test_level0_compiled_encoder_error_is_raised(tmp_path, monkeypatch):
    # an error while encoding a piece (on the pool) reaches the caller; nothing hangs
    from meshcheck import vtkxml
    from meshcheck.kernels import b64
    monkeypatch.setenv("MESHCHECK_KERNELS", "numba")
    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 11)
    calls = []
    encode = b64.encode

    def broken(src, out):
        calls.append(1)
        if len(calls) == 5:
            raise RuntimeError("encoder broke")
        return encode(src, out)

    monkeypatch.setattr(b64, "encode", broken)
    mesh = tet_box((3, 3, 3))
    with pytest.raises(RuntimeError, match="encoder broke"):
        write_vtu(tmp_path / "x.vtu", mesh.points, [("tetra", mesh.blocks[0].cells)], level=0)


def test_small_level0_write_does_not_load_numba(tmp_path):
    # auto mode below MIN_CELLS: binascii, and numba is never imported
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
    assert made == ["a", "b", "v"]  # each made once, in the file's order
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


@pytest.mark.parametrize("mode", ["numpy", "numba"])
def test_level0_connectivity_in_pieces_across_blocks(tmp_path, monkeypatch, mode):
    # the connectivity is made a piece at a time: pieces of 111 bytes straddle its Int32
    # items and the border of the two blocks; the offsets are made 5 cells at a time;
    # meshio reads the cells back (it splits the connectivity at the offsets)
    from meshcheck import vtkxml
    monkeypatch.setattr(vtkxml, "_CHUNK", 3 * 37)
    monkeypatch.setattr(vtkxml, "_OFFSETS_CHUNK", 5)
    monkeypatch.setenv("MESHCHECK_KERNELS", mode)
    rng = np.random.default_rng(9)
    pts = rng.random((50, 3))
    tets, hexes = rng.integers(0, 50, (31, 4)), rng.integers(0, 50, (17, 8))
    path = write_vtu(tmp_path / "x.vtu", pts, [("tetra", tets), ("hexahedron", hexes)],
                     level=0)
    back = meshio.read(path)
    assert np.array_equal(back.cells[0].data, tets) and np.array_equal(back.cells[1].data, hexes)
