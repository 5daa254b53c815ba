"""Reading: meshio files written here read back identical; bad input gets our error."""
import hashlib
import zipfile

import meshio
import numpy as np
import pytest

from meshcheck.errors import MeshReadError, UnitsError
from meshcheck.reading import read_mesh
from meshes import hex_box, tet_box


def _write(tmp_path, name, mesh, **kw):
    path = tmp_path / name
    cells = [(b.type, b.cells) for b in mesh.blocks]
    meshio.write(path, meshio.Mesh(mesh.points, cells, **kw))
    return path


@pytest.mark.parametrize("name", ["box.vtu", "box.msh", "box.vtk"])
def test_round_trip(tmp_path, name):
    mesh = tet_box((2, 2, 2))
    kw = {"file_format": "gmsh22", "binary": False} if name.endswith(".msh") else {}
    path = tmp_path / name
    meshio.write(path, meshio.Mesh(mesh.points, [("tetra", mesh.blocks[0].cells)],
                                   cell_data={"gmsh:physical": [np.full(mesh.n_cells, 7)],
                                              "gmsh:geometrical": [np.ones(mesh.n_cells, int)]}
                                   if name.endswith(".msh") else {}), **kw)
    before = hashlib.sha256(path.read_bytes()).hexdigest()
    back = read_mesh(path, units="m")
    assert np.array_equal(back.points, mesh.points)
    assert np.array_equal(back.blocks[0].cells, mesh.blocks[0].cells)
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before
    if name.endswith(".msh"):
        assert set(back.region.tolist()) == {7}


def test_units_scale_to_metres(tmp_path):
    path = _write(tmp_path, "box_mm.vtu", hex_box((1, 1, 1), size=(500.0, 400.0, 300.0)))
    m = read_mesh(path, units="mm")
    assert m.bounding_box[1].tolist() == pytest.approx([0.5, 0.4, 0.3])
    assert m.unit == "mm"


def test_unit_read_off_a_clear_size(tmp_path):
    assert read_mesh(_write(tmp_path, "m.vtu", hex_box((1, 1, 1), size=(1.2, 0.8, 0.9)))).unit == "m"
    assert read_mesh(_write(tmp_path, "mm.vtu", hex_box((1, 1, 1), size=(1200, 800, 900)))).unit == "mm"


def test_ambiguous_unit_refused_with_both_readings(tmp_path):
    path = _write(tmp_path, "amb.vtu", hex_box((1, 1, 1), size=(30.0, 20.0, 10.0)))
    with pytest.raises(UnitsError, match=r"if metres.*if millimetres.*--units"):
        read_mesh(path)


def test_surface_only_gmsh_refused(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1.0]])
    tri = np.array([[0, 2, 1], [0, 1, 3], [1, 2, 3], [0, 3, 2]])
    path = tmp_path / "skin.msh"
    meshio.write(path, meshio.Mesh(pts, [("triangle", tri)]), file_format="gmsh22", binary=False)
    with pytest.raises(MeshReadError, match="volume mesh"):
        read_mesh(path, units="m")


def test_planar_triangles_are_a_2d_model(tmp_path):
    pts = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0.0]])
    path = tmp_path / "plane.vtu"
    meshio.write(path, meshio.Mesh(pts, [("triangle", np.array([[0, 1, 2], [0, 2, 3]]))]))
    m = read_mesh(path, units="m")
    assert m.dim == 2 and m.n_cells == 2


@pytest.mark.parametrize("content, match", [
    (b"", "empty"),
    (b"   \n\t\n", "empty"),
    (b"$MeshFormat\n2.2 0 8\n$EndMeshFormat\n$Nodes\n3\n1 0 0", "cannot be read|gave up"),
    (b"hello world", "must start with \\$MeshFormat"),
])
def test_bad_msh_files(tmp_path, content, match):
    path = tmp_path / "bad.msh"
    path.write_bytes(content)
    with pytest.raises(MeshReadError, match=match):
        read_mesh(path, units="m")


def test_zip_renamed_refused(tmp_path):
    path = tmp_path / "mesh.vtu"
    with zipfile.ZipFile(path, "w") as z:
        z.writestr("a.txt", "x")
    with pytest.raises(MeshReadError, match="zip archive"):
        read_mesh(path, units="m")


def test_stl_refused(tmp_path):
    path = tmp_path / "part.stl"
    path.write_text("solid part\nendsolid part\n")
    with pytest.raises(MeshReadError, match="surface file, not a volume mesh"):
        read_mesh(path)


def test_missing_and_unknown(tmp_path):
    with pytest.raises(MeshReadError, match="no such file"):
        read_mesh(tmp_path / "nope.msh")
    (tmp_path / "x.abc").write_text("1")
    with pytest.raises(MeshReadError, match="unknown mesh format"):
        read_mesh(tmp_path / "x.abc")


def test_reader_system_exit_is_caught(tmp_path):
    # meshio's read() calls sys.exit on failure; we call the reader and catch everything
    path = tmp_path / "broken.vtu"
    path.write_text("<?xml version='1.0'?><VTKFile type='UnstructuredGrid'><Unstr")
    with pytest.raises(MeshReadError, match="broken.vtu"):
        read_mesh(path, units="m")
