"""The command line: exit codes, one-line errors, reports written, input untouched."""
import hashlib
import json

import meshio
import numpy as np
import pytest

from meshcheck.cli import main
from meshes import tet_box


@pytest.fixture
def box_file(tmp_path):
    m = tet_box((4, 3, 3), size=(1.2, 0.9, 0.9))
    path = tmp_path / "box.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("tetra", m.blocks[0].cells)]))
    return path


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_ready_mesh_exits_0_and_writes_reports(box_file, tmp_path, capsys):
    before = _sha(box_file)
    out = tmp_path / "out"
    code = main(["audit", str(box_file), "--units", "m", "--fmax", "200", "--out", str(out)])
    assert code == 0
    assert _sha(box_file) == before
    data = json.loads((out / "box.audit.json").read_text())
    assert data["verdict"]["state"] == "ready"
    assert data["verdict"]["signed_off_hz"] >= 200
    assert (out / "box.audit.md").read_text().startswith("# Mesh audit")
    back = meshio.read(out / "box.audit.vtu")
    assert back.cell_data["order_needed"][0].shape == (6 * 36,)
    assert "READY" in capsys.readouterr().out


def test_not_ready_exits_1(box_file, tmp_path):
    code = main(["audit", str(box_file), "--units", "m", "--fmax", "5000", "--order", "1",
                 "--out", str(tmp_path / "o"), "--quiet"])
    assert code == 1
    data = json.loads((tmp_path / "o" / "box.audit.json").read_text())
    assert data["verdict"]["state"] == "limited" and data["refine"]


def test_inverted_cell_is_blocking(tmp_path):
    m = tet_box((2, 2, 2))
    cells = m.blocks[0].cells.copy()
    cells[0, [0, 1]] = cells[0, [1, 0]]
    path = tmp_path / "inv.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("tetra", cells)]))
    code = main(["audit", str(path), "-u", "m", "--fmax", "10", "--out", str(tmp_path / "o"),
                 "--quiet"])
    assert code == 1
    data = json.loads((tmp_path / "o" / "inv.audit.json").read_text())
    assert data["verdict"]["state"] == "blocked"
    inv = [f for f in data["findings"] if f["code"] == "inverted_cells"][0]
    assert inv["ids"] == [0] and inv["count"] == 1


@pytest.mark.parametrize("content", [b"", b"$MeshFormat\n garbage", b"\x00\x01\x02" * 50])
def test_bad_file_one_line_exit_2_no_traceback(tmp_path, capsys, content):
    path = tmp_path / "bad.msh"
    path.write_bytes(content)
    before = _sha(path)
    assert main(["audit", str(path), "--units", "m", "--fmax", "100"]) == 2
    err = capsys.readouterr().err.strip()
    assert "Traceback" not in err
    assert len(err.splitlines()) == 1 and "bad.msh" in err
    assert _sha(path) == before


def test_ambiguous_units_exit_2(tmp_path, capsys):
    m = tet_box((2, 2, 2), size=(30.0, 20.0, 10.0))
    path = tmp_path / "amb.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("tetra", m.blocks[0].cells)]))
    assert main(["audit", str(path), "--fmax", "100"]) == 2
    err = capsys.readouterr().err
    assert "--units" in err and "millimetres" in err


@pytest.mark.parametrize("args", [["audit"], ["audit", "x.msh", "--target", "abc"],
                                  ["frobnicate"], ["audit", "x.vtu", "--units", "furlong"]])
def test_usage_errors_exit_2(args, capsys):
    assert main(args) == 2


def test_bad_setting_exit_2(box_file, capsys):
    assert main(["audit", str(box_file), "-u", "m", "--fmax", "100", "--target", "2"]) == 2
    assert "target" in capsys.readouterr().err


def test_demo_runs(tmp_path, capsys):
    code = main(["demo", "--out", str(tmp_path / "demo")])
    out = capsys.readouterr().out
    assert code in (0, 1)
    assert "signed off" in out
    for ext in ("json", "md", "vtu"):
        assert (tmp_path / "demo" / f"enclosure.audit.{ext}").is_file()
