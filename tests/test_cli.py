"""The command line: exit codes, one-line errors, reports written, input untouched."""
import hashlib
import json
import math

import meshio
import numpy as np
import pytest

from meshcheck.cli import main
from meshes import hex_box, tet_box


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


def test_reports_and_no_cost_write_only_what_was_asked(box_file, tmp_path):
    out = tmp_path / "lean"
    code = main(["audit", str(box_file), "-u", "m", "--fmax", "200", "--out", str(out),
                 "--reports", "json,vtu", "--no-cost", "--quiet"])
    assert code == 0
    assert sorted(p.name for p in out.iterdir()) == ["box.audit.json", "box.audit.vtu"]
    data = json.loads((out / "box.audit.json").read_text())
    assert data["cost"] is None and data["assumptions"]["cost_quote"] == "not asked for"
    full = tmp_path / "full"
    assert main(["audit", str(box_file), "-u", "m", "--fmax", "200", "--out", str(full),
                 "--quiet"]) == 0
    assert {p.suffix for p in full.iterdir()} == {".json", ".md", ".vtu", ".html", ".pos"}
    ref = json.loads((full / "box.audit.json").read_text())
    assert ref["assumptions"]["cost_quote"] == "computed" and ref["cost"]["strategies"]
    # the size field in the VTU does not depend on the quote being computed
    lean_v, full_v = meshio.read(out / "box.audit.vtu"), meshio.read(full / "box.audit.vtu")
    for name in ("target_size", "mesher_size", "size_ratio"):
        np.testing.assert_array_equal(lean_v.point_data[name], full_v.point_data[name])
    for key in ("verdict", "limits_hz", "sweep", "quality", "findings"):
        assert data[key] == ref[key]


def test_unknown_report_kind_is_a_one_line_error(box_file, tmp_path, capsys):
    code = main(["audit", str(box_file), "-u", "m", "--fmax", "200", "--out",
                 str(tmp_path / "o"), "--reports", "json,pdf"])
    err = capsys.readouterr().err
    assert code == 2 and "pdf" in err and "json, md, vtu, html, pos" in err
    assert "Traceback" not in err and not (tmp_path / "o").exists()


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


# ---------------------------------------------------------- --no-3d-correction
# Speed of sound in dry air at 20 deg C, the CLI's default: c = 331.3 sqrt(1 + T/273.15) m/s
# (Kinsler, Frey, Coppens & Sanders, "Fundamentals of Acoustics", 4th ed. 2000, eq. 5.6.8).
C_AIR_20 = 331.3 * math.sqrt(1.0 + 20.0 / 273.15)
HEX_SIZE = (1.2, 0.6, 0.6)  # 6 x 3 x 3 cubes: every edge 0.2 m


@pytest.fixture(scope="module")
def hex_audits(tmp_path_factory):
    """flag given -> (JSON report, exit code) of `meshcheck audit` on a uniform hex grid."""
    folder = tmp_path_factory.mktemp("correction")
    m = hex_box((6, 3, 3), size=HEX_SIZE)
    path = folder / "hexes.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("hexahedron", m.blocks[0].cells)]))
    out = {}
    for flag in (False, True):
        o = folder / ("plain" if flag else "default")
        code = main(["audit", str(path), "-u", "m", "--fmax", "100", "--out", str(o), "--quiet"]
                    + (["--no-3d-correction"] if flag else []))
        out[flag] = json.loads((o / "hexes.audit.json").read_text()), code
    return out


@pytest.mark.parametrize("p", [1, 2])
@pytest.mark.parametrize("flag", [False, True], ids=["default", "no-3d-correction"])
def test_no_3d_correction_flag_gives_the_plain_1d_model(hex_audits, flag, p):
    # f = c (kh)_max(p, L/(a h)) / (2 pi a h) (docs/validation.md), the 1D model's first
    # crossing by root finding; a = 1 with the flag, the hexahedron row by default
    from meshcheck.advice import SIZE_FACTOR_TABLE
    from test_advice import _first_crossing

    data, code = hex_audits[flag]
    assert code == 0
    assert data["assumptions"]["correction_3d"] is (not flag)
    a = 1.0 if flag else SIZE_FACTOR_TABLE["hexahedron"][1][0.01][0][p - 1]
    h, L = 0.2, float(np.linalg.norm(HEX_SIZE))
    expected = C_AIR_20 * _first_crossing(p, L / (a * h), 0.01) / (2 * np.pi * a * h)
    assert data["limits_hz"]["mesh"][str(p)] == pytest.approx(expected, rel=2e-3)


@pytest.mark.parametrize("flag", [False, True], ids=["default", "no-3d-correction"])
def test_verify_no_3d_correction_flag_reaches_the_advice(tmp_path, flag):
    # hexahedra at p = 1 are seen a = 0.68 times their size (5 %): between the plain and the
    # corrected limit of order 1 the default advises order 1, the plain model order 2
    from meshcheck import verify as V
    from meshcheck.advice import SIZE_FACTOR_TABLE
    from test_advice import _first_crossing

    if not V.ngsolve_available():
        pytest.skip('NGSolve not installed: pip install "meshcheck[verify]"')
    size = (0.6, 0.4, 0.4)
    m = hex_box((3, 2, 2), size)
    path = tmp_path / "box.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("hexahedron", m.blocks[0].cells)]))
    a, h, L = SIZE_FACTOR_TABLE["hexahedron"][1][0.05][0][0], 0.2, float(np.linalg.norm(size))
    plain = C_AIR_20 * _first_crossing(1, L / h, 0.05) / (2 * np.pi * h)
    corrected = C_AIR_20 * _first_crossing(1, L / (a * h), 0.05) / (2 * np.pi * a * h)
    assert corrected > 1.2 * plain
    f = math.sqrt(plain * corrected)
    code = main(["verify", str(path), "-u", "m", "-f", f"{f:.6g}", "--target", "0.05",
                 "--no-compare", "--no-point-source", "--out", str(tmp_path / "o"), "--quiet"]
                + (["--no-3d-correction"] if flag else []))
    assert code == 0
    doc = json.loads((tmp_path / "o" / "box.verify.json").read_text())
    assert ("without" in doc["model"]) is flag
    (solve,) = doc["frequencies"][0]["solves"]
    assert (solve["order_min"], solve["order_max"]) == ((2, 2) if flag else (1, 1))
    assert solve["max_error"] <= 0.05


@pytest.mark.parametrize("flag", [False, True], ids=["default", "no-3d-correction"])
def test_terminal_summary_states_the_3d_correction(tmp_path, flag, capsys, monkeypatch):
    monkeypatch.setenv("COLUMNS", "250")  # one line per panel row
    m = hex_box((3, 2, 2), size=(0.6, 0.4, 0.4))
    path = tmp_path / "hexes.vtu"
    meshio.write(path, meshio.Mesh(m.points, [("hexahedron", m.blocks[0].cells)]))
    main(["audit", str(path), "-u", "m", "--fmax", "100", "--out", str(tmp_path / "o")]
         + (["--no-3d-correction"] if flag else []))
    text = " ".join(capsys.readouterr().out.split())
    assert ("3D correction off (plain 1D model)" if flag else "3D correction on") in text


# ------------------------------------------------ every cell kind, end to end
def _kind_meshes():
    """meshio cell type -> (points, cells) of a small valid mesh (0.5 m cube or square)."""
    from hostile.texts import CUBE, PYR_POINTS, WEDGES, quadratic
    from meshes import KUHN

    out = {"tetra": (CUBE, KUHN), "hexahedron": (CUBE, np.arange(8)[None]),
           "wedge": (CUBE, WEDGES), "pyramid": (PYR_POINTS, np.arange(5)[None])}
    out["tetra10"] = quadratic(CUBE, KUHN, "tetra10")
    out["hexahedron20"] = quadratic(CUBE, np.arange(8)[None], "hexahedron20")
    out["wedge15"] = quadratic(CUBE, WEDGES, "wedge15")
    sq = CUBE[:4]
    out["quad"] = (sq, np.arange(4)[None])
    out["triangle"] = (sq, np.array([[0, 1, 2], [0, 2, 3]]))
    out["triangle6"] = quadratic(sq, np.array([[0, 1, 2], [0, 2, 3]]), "triangle6")
    out["quad8"] = quadratic(sq, np.arange(4)[None], "quad8")
    return {k: (0.5 * np.asarray(p, float), np.asarray(c)) for k, (p, c) in out.items()}


KINDS = ["tetra", "tetra10", "hexahedron", "hexahedron20", "wedge", "wedge15", "pyramid",
         "triangle", "triangle6", "quad", "quad8"]
MODES = {"variable": [], "fixed p=2": ["--order", "2"], "plain 1D": ["--no-3d-correction"]}


@pytest.mark.parametrize("mode", list(MODES))
@pytest.mark.parametrize("kind", KINDS)
def test_every_cell_kind_audits_end_to_end(tmp_path, capsys, kind, mode):
    # a mesh of each kind the readers accept gets a verdict and every report, in each
    # solver mode: exit 0 or 1, no error output, the JSON states the right cell count
    pts, cells = _kind_meshes()[kind]
    from hostile.texts import nastran, to_nastran_order
    from meshcheck.vtkxml import write_vtu

    if kind == "wedge15":  # meshio (which reads .vtu for us) does not know wedge15
        path = tmp_path / f"{kind}.bdf"
        path.write_text(nastran(pts, [("CPENTA", to_nastran_order(kind, cells))]))
    else:
        path = write_vtu(tmp_path / f"{kind}.vtu", pts, [(kind, cells)])
    out = tmp_path / "o"
    code = main(["audit", str(path), "-u", "m", "--fmin", "100", "--fmax", "400",
                 "--step", "100", "--out", str(out), "--quiet"] + MODES[mode])
    assert code in (0, 1), capsys.readouterr().err
    assert capsys.readouterr().err == ""
    data = json.loads((out / f"{kind}.audit.json").read_text())
    assert data["input"]["cells"] == {kind: len(cells)}
    assert data["verdict"]["state"] in ("ready", "limited")
    assert {p.suffix for p in out.iterdir()} >= {".json", ".md", ".vtu", ".html"}


@pytest.mark.parametrize("reports", ["json,vtu,pos", "json,pos"])
def test_size_field_beside_the_json_gives_the_same_files(box_file, tmp_path, monkeypatch,
                                                         reports):
    # large meshes write the VTU and the gmsh view on threads while the JSON is built
    # (the size field computed once, by whichever comes first), the largest ones the VTU
    # during the audit: the files must be the same as when they are written one after
    # another
    from meshcheck import pipeline, report, sizefield

    calls = []
    real = sizefield.size_field
    monkeypatch.setattr(sizefield, "size_field",
                        lambda *a, **k: calls.append(1) or real(*a, **k))
    args = ["audit", str(box_file), "-u", "m", "--fmax", "200", "--reports", reports,
            "--no-cost", "--quiet", "--out"]
    assert main(args + [str(tmp_path / "serial")]) == 0
    monkeypatch.setattr(pipeline, "OVERLAP_CELLS", 0)
    assert main(args + [str(tmp_path / "aside")]) == 0
    monkeypatch.setattr(report, "EARLY_VTU_CELLS", 0)
    assert main(args + [str(tmp_path / "early")]) == 0
    assert len(calls) == 3  # once per audit, shared by the VTU and the view
    for name in ("box.audit.vtu", "box.size.pos")[1 if "vtu" not in reports else 0:]:
        for d in ("aside", "early"):
            assert (tmp_path / "serial" / name).read_bytes() == \
                (tmp_path / d / name).read_bytes(), (d, name)
    # the VTU written on a thread beside the JSON: the JSON is the same (but its time)
    serial, aside = (json.loads((tmp_path / d / "box.audit.json").read_text())
                     for d in ("serial", "aside"))
    for d in (serial, aside):
        d.pop("created"), d.pop("timings_s", None)
    assert serial == aside


def test_audit_failing_after_the_vtu_started_leaves_no_report(box_file, tmp_path, monkeypatch):
    # large meshes start the VTU when the cells are checked; an audit that then fails
    # (a region the mesh has not) exits with the one-line error and leaves neither the
    # VTU, its temporary file nor the folder made for it
    from meshcheck import pipeline, report

    monkeypatch.setattr(pipeline, "OVERLAP_CELLS", 0)
    monkeypatch.setattr(report, "EARLY_VTU_CELLS", 0)
    out = tmp_path / "reports"
    rc = main(["audit", str(box_file), "-u", "m", "--fmax", "200", "--region-speed",
               "nowhere=300", "--reports", "json,vtu", "--quiet", "--out", str(out)])
    assert rc == 2 and not out.exists()


def test_report_written_aside_hands_back_its_value_or_its_error():
    from meshcheck.cli import _aside

    assert _aside(lambda a, b: a + b, 2, 3).result(timeout=10) == 5

    def fail():
        raise OSError("disk full")
    with pytest.raises(OSError, match="disk full"):
        _aside(fail).result(timeout=10)


def test_size_field_is_computed_once_when_threads_ask_together(monkeypatch):
    from concurrent.futures import ThreadPoolExecutor

    from meshcheck import sizefield
    from meshcheck.pipeline import AuditSettings, audit

    res = audit(tet_box((6, 5, 4)), AuditSettings((300.0,)))
    calls = []
    real = sizefield.size_field
    monkeypatch.setattr(sizefield, "size_field",
                        lambda *a, **k: calls.append(1) or real(*a, **k))
    with ThreadPoolExecutor(4) as pool:
        got = list(pool.map(lambda _: sizefield.audit_size_field(res), range(4)))
    assert len(calls) == 1 and all(g is got[0] for g in got)


@pytest.mark.parametrize("given", [None, "3"])
def test_command_runs_blas_on_one_thread_unless_told(given):
    # the command's process asks OpenBLAS for one thread before numpy loads it (set
    # before any numpy import: `import meshcheck` loads none); a user's setting stands
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    if given:
        env["OPENBLAS_NUM_THREADS"] = given
    code = ("import sys, os, meshcheck; assert 'numpy' not in sys.modules; "
            "import meshcheck.cli; print(os.environ['OPENBLAS_NUM_THREADS'])")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                         text=True, check=True)
    assert out.stdout.strip() == (given or "1")


def test_parsing_the_command_line_imports_no_pydantic():
    # typer 0.29 converts every option through pydantic (0.07 s of imports before the
    # audit starts, 14.5 MiB resident; pyproject.toml caps typer below it): the whole
    # audit command line is parsed and handed to the audit without pydantic loaded
    import subprocess
    import sys

    code = ("import sys, meshcheck.cli as c\n"
            "got = []\n"
            "c._run = lambda *a, **k: got.append(a) or 0\n"
            "rc = c._main(['audit', 'cabin.msh', '--units', 'mm', '--fmin', '50', "
            "'--fmax', '2000', '--step', '10', '--order', '2', '--quiet', "
            "'--reports', 'json,vtu', '--no-cost', '--out', 'out'])\n"
            "assert rc == 0 and len(got) == 1, (rc, got)\n"
            "assert got[0][3] == 2000.0 and got[0][1].value == 'mm', got\n"
            "print('pydantic' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "False"


@pytest.mark.parametrize("fast", [True, False])
def test_a_large_audit_ends_its_process_at_once_with_everything_written(box_file, tmp_path,
                                                                        fast):
    # from FAST_EXIT_CELLS cells (lowered here to 1) the audit's process skips the
    # interpreter's teardown (an object's __del__ at module level is not called) but
    # still waits for its threads, runs the atexit handlers and flushes its output: the
    # same exit code, terminal summary and reports as a normal exit
    import os
    import subprocess
    import sys

    script = tmp_path / "run.py"
    script.write_text(
        "import atexit, sys\n"
        "import meshcheck.cli as c\n"
        f"c.FAST_EXIT_CELLS = {1 if fast else 10**12}\n"
        "class Probe:\n"
        "    def __del__(self):\n"
        "        sys.stdout.write('teardown\\n')\n"
        "probe = Probe()\n"
        "atexit.register(lambda: sys.stdout.write('atexit handler\\n'))\n"
        "sys.exit(c.main())\n")
    out = tmp_path / f"out{fast}"
    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}  # (buffered)
    run = subprocess.run([sys.executable, str(script), "audit", str(box_file), "--units", "m",
                          "--fmax", "200", "--out", str(out)], capture_output=True, text=True,
                         env=env)
    assert run.returncode == 0, run.stderr
    assert "READY" in run.stdout and "atexit handler" in run.stdout
    assert ("teardown" in run.stdout) is not fast
    assert json.loads((out / "box.audit.json").read_text())["verdict"]["state"] == "ready"
    assert meshio.read(out / "box.audit.vtu").cell_data["order_needed"][0].shape == (6 * 36,)
