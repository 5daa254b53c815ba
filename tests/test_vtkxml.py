"""Our VTU writer read back by meshio and by VTK's own XML reader."""
import meshio
import numpy as np
import pytest

from meshcheck.vtkxml import write_vtu
from meshes import hex_box, tet10_box, tet_box


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
    back = meshio.read(path)
    for k, v in cd.items():
        assert np.array_equal(back.cell_data[k][0], v), k
    for k, v in pd.items():
        assert np.array_equal(back.point_data[k], v), k
    vtk = pytest.importorskip("vtk")
    from vtk.util.numpy_support import vtk_to_numpy
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    for k, v in cd.items():
        assert np.array_equal(vtk_to_numpy(r.GetOutput().GetCellData().GetArray(k)), v), k


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
    back = meshio.read(path)
    assert np.array_equal(back.points, pts) and np.array_equal(back.cells[0].data, cells)
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
    assert np.array_equal(vtk_to_numpy(g.GetPoints().GetData()), pts)
    for k, v in cd.items():
        assert np.array_equal(vtk_to_numpy(g.GetCellData().GetArray(k)), v), k
    for k, v in pd.items():
        assert np.array_equal(vtk_to_numpy(g.GetPointData().GetArray(k)), v), k


@pytest.mark.parametrize("level", [1, 0])
def test_empty_grid(tmp_path, level):
    # empty arrays (8-byte header only; meshio 5.3 cannot read a grid without cells)
    vtk = pytest.importorskip("vtk")
    path = write_vtu(tmp_path / "e.vtu", np.zeros((0, 3)), [], level=level)
    r = vtk.vtkXMLUnstructuredGridReader()
    r.SetFileName(str(path))
    r.Update()
    assert r.GetOutput().GetNumberOfPoints() == 0 and r.GetOutput().GetNumberOfCells() == 0
