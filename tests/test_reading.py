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
    (b"$MeshFormat\n2.2 0 8\n$EndMeshFormat\n$Nodes\n3\n1 0 0", "no \\$EndNodes; the file is truncated"),
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
    with pytest.raises(MeshReadError, match="STL surface, not a volume mesh"):
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


# ---- units guard --------------------------------------------------------------------
from meshcheck.units import REFERENCE_SPEED, decide_unit, guess_unit, speed_unit  # noqa: E402


@pytest.mark.parametrize("diagonal, unit", [(1.7, "m"), (150.0, None), (1700.0, "mm"),
                                            (36.0, None), (0.001, None), (1e7, None)])
def test_bounding_box_classes(diagonal, unit):
    """Plausible domain diagonal 0.02 m .. 200 m (common practice, no source)."""
    assert guess_unit(diagonal).unit == unit


@pytest.mark.parametrize("speed, unit", [(343.0, "m"), (1481.0, "m"), (343000.0, "mm"),
                                         (1.0, None), (34300.0, None)])
def test_speed_of_sound_classes(speed, unit):
    assert speed_unit(speed) == unit


def test_ambiguous_message_spells_both_readings():
    """h = 10 file units at 2 kHz in air (343.2 m/s): wavelength 0.1716 m, so 0.01716
    elements per wavelength if metres and 17.16 if millimetres."""
    assert REFERENCE_SPEED == pytest.approx(331.3 * (1 + 20 / 273.15) ** 0.5, abs=0.05)
    with pytest.raises(UnitsError, match=r"elements per wavelength at 2 kHz in air: 0\.017 if "
                                          r"metres, 17\.2 if millimetres\); pass --units"):
        decide_unit(36.0, 10.0, "x.bdf", fmax_hint=2000.0)


@pytest.mark.parametrize("diagonal, speeds, unit", [
    (36.0, (("MAT10 1", 343.0),), "m"),
    (36.0, (("MAT10 1", 343000.0),), "mm"),
    (1.7, (("MAT10 1", 343.0),), "m"),
    (1700.0, (), "mm"),
])
def test_material_speed_decides(diagonal, speeds, unit):
    assert decide_unit(diagonal, 1.0, speeds=speeds).unit == unit


@pytest.mark.parametrize("diagonal, speeds, match", [
    (1.7, (("MAT10 1", 343000.0),), "the file is inconsistent"),
    (36.0, (("MAT10 1", 343.0), ("MAT10 2", 343000.0)), "material cards disagree"),
])
def test_material_speed_conflicts(diagonal, speeds, match):
    with pytest.raises(UnitsError, match=match):
        decide_unit(diagonal, 1.0, speeds=speeds)


# ---- cross-checks on in-memory meshes ------------------------------------------------
from meshcheck.formats.raw import RawBlock, RawMesh  # noqa: E402
from meshcheck.reading import mesh_from_meshio, mesh_from_raw  # noqa: E402


def _raw(**kw):
    m = tet_box((1, 1, 1))
    base = dict(points=m.points, blocks=(RawBlock("tetra", m.blocks[0].cells,
                                                  np.zeros(m.n_cells, np.int64)),))
    base.update(kw)
    return RawMesh(**base)


@pytest.mark.parametrize("kw, match", [
    ({"counts": (("CTETRA cards", 7, 6),)}, r"CTETRA cards: 7 expected from the pre-scan or "
                                           r"the file's own counts, 6 found"),
    ({"blocks": (RawBlock("tetra", np.zeros((2, 3), np.int64), np.zeros(2, np.int64)),)},
     r"tetra cells with 3 nodes \(expected 4\)"),
    ({"blocks": (RawBlock("tetra", np.zeros((2, 4), np.int64), np.zeros(3, np.int64)),)},
     r"3 region tags for 2 tetra cells"),
    ({"blocks": (RawBlock("tetra", np.full((1, 4), 99), np.zeros(1, np.int64)),)},
     r"refer to nodes that do not exist \(index 99 of 8 nodes\)"),
    ({"blocks": ()}, r"no volume cells \(found: none\)"),
    ({"points": np.zeros((0, 3)), "blocks": ()}, r"holds no nodes"),
    ({"blocks": (RawBlock("polyhedron", np.zeros((1, 4), np.int64), np.zeros(1, np.int64)),)},
     r"cell type\(s\) polyhedron are not supported"),
])
def test_cross_checks(kw, match):
    with pytest.raises(MeshReadError, match=match):
        mesh_from_raw(_raw(**kw), "x", units="m")


def test_mesh_from_meshio_keeps_working():
    m = tet_box((1, 1, 1))
    out = mesh_from_meshio(meshio.Mesh(m.points, [("tetra", m.blocks[0].cells)],
                                       cell_sets={"air": [np.arange(m.n_cells)]}), "mem", "m")
    assert out.n_cells == m.n_cells and out.region_names == {1: "air"}


def test_unv_unit_is_honoured_end_to_end(tmp_path):
    from hostile.texts import CUBE, unv
    from meshes import KUHN
    p = tmp_path / "mm.unv"
    p.write_text(unv(CUBE * 500.0, [(111, KUHN)], units=(5, "MM", 1000.0)))
    m = read_mesh(p)
    assert m.unit == "mm" and m.bounding_box[1].tolist() == pytest.approx([0.5, 0.5, 0.5])


# ---- the command line ------------------------------------------------------------------
def test_cli_ambiguous_units_message_uses_fmax(tmp_path, capsys):
    from hostile.texts import CUBE, nastran
    from meshcheck.cli import main
    from meshes import KUHN
    p = tmp_path / "amb.bdf"
    p.write_text(nastran(CUBE * 40.0, [("CTETRA", KUHN)]))
    assert main(["audit", str(p), "--fmax", "2000", "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "elements per wavelength at 2 kHz in air: 0.0036 if metres, 3.6 if millimetres" in err
    assert "Traceback" not in err


def test_cli_allow_outside(tmp_path, capsys):
    from hostile.texts import CUBE, nas_small, nastran
    from meshcheck.cli import main
    from meshes import KUHN
    (tmp_path / "grids.bdf").write_text(nastran(CUBE, [], begin=False, end=False))
    sub = tmp_path / "model"
    sub.mkdir()
    elems = "\n".join(nas_small("CTETRA", [k + 1, 1, *(c + 1)]) for k, c in enumerate(KUHN))
    (sub / "m.bdf").write_text("BEGIN BULK\nINCLUDE '../grids.bdf'\n" + elems + "\nENDDATA\n")
    args = ["audit", str(sub / "m.bdf"), "--units", "m", "--fmax", "100", "--quiet",
            "--out", str(tmp_path / "out")]
    assert main(args) == 2
    assert "--allow-outside" in capsys.readouterr().err
    assert main(args + ["--allow-outside"]) in (0, 1)


def test_points_in_metres_are_the_readers_array_and_other_units_are_scaled():
    # a file in metres keeps the reader's coordinates as they are (no copy of the
    # points); another unit gives a scaled copy and leaves the reader's array alone
    from meshcheck.formats.raw import RawBlock, RawMesh
    from meshcheck.reading import mesh_from_raw

    box = tet_box((2, 2, 2))
    raw = RawMesh(points=box.points.copy(),
                  blocks=(RawBlock("tetra", box.blocks[0].cells, np.ones(box.n_cells, np.int64)),))
    before = raw.points.copy()
    m = mesh_from_raw(raw, units="m")
    assert m.points is raw.points
    mm = mesh_from_raw(raw, units="mm")
    np.testing.assert_array_equal(mm.points, before * 1e-3)
    np.testing.assert_array_equal(raw.points, before)


def test_cell_indices_are_checked_once(tmp_path):
    # the MSH 4.1 reader maps every node tag to a row and refuses tags it does not know
    # (tests/test_gmsh_reader.py), so it marks its blocks in range and the cross-checks
    # skip their pass over the cells; blocks not so marked are still checked
    import dataclasses

    from meshcheck.formats.raw import RawBlock, RawMesh
    from meshcheck.reading import mesh_from_raw, read_raw

    box = tet_box((2, 2, 2))
    path = tmp_path / "box.msh"
    meshio.write(path, meshio.Mesh(box.points, [("tetra", box.blocks[0].cells)]),
                 file_format="gmsh", binary=True)
    raw = read_raw(path)
    assert raw.format.startswith("gmsh") or "MSH" in raw.format
    assert all(b.in_range for b in raw.blocks)
    for b in raw.blocks:
        assert 0 <= b.cells.min() and b.cells.max() < len(raw.points)
    bad = box.blocks[0].cells.copy()
    bad[3, 2] = len(box.points)
    unchecked = RawMesh(points=box.points, blocks=(RawBlock("tetra", bad,
                                                            np.ones(len(bad), np.int64)),))
    with pytest.raises(MeshReadError, match="refer to nodes that do not exist"):
        mesh_from_raw(unchecked, units="m")
    assert not dataclasses.replace(unchecked.blocks[0]).in_range


def test_joined_regions_equal_their_concatenation():
    # blocks of one type read separately (e.g. one per gmsh entity): one tag held as
    # broadcasts stays one broadcast; otherwise the tags concatenated
    from types import SimpleNamespace

    from meshcheck.reading import _joined_regions

    def blk(r):
        return SimpleNamespace(region=r)

    one = lambda t, m: np.broadcast_to(np.int64(t), (m,))  # noqa: E731
    cases = [[one(3, 4), one(3, 5)], [one(3, 4), one(2, 5)], [one(3, 4), np.full(2, 3)],
             [np.array([1, 2]), one(1, 3)], [one(3, 0), one(3, 2)], [one(7, 6)]]
    for bs in cases:
        got = _joined_regions([blk(r) for r in bs])
        assert np.array_equal(got, np.concatenate(bs)), bs
    assert _joined_regions([blk(one(3, 4)), blk(one(3, 5))]).strides == (0,)
    assert _joined_regions([blk(one(3, 4)), blk(one(2, 5))]).strides != (0,)
