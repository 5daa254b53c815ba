"""Property-based fuzzing of every text reader (hypothesis).

A valid tiny file is mutated at random (bytes replaced, inserted or deleted,
lines duplicated or dropped, the file cut short).  Property: reading never
raises anything but MeshReadError / UnitsError, and when it succeeds the
number of cells equals an independent count of the element records in the
mutated text (so nothing is silently lost, doubled or misgrouped).
"""
import re

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from hostile.texts import CUBE, abaqus, msh22, nastran, unv
from meshcheck.errors import MeshReadError, UnitsError
from meshcheck.reading import read_mesh
from meshes import KUHN

BASE = {
    "bdf": nastran(CUBE, [("CTETRA", KUHN)]),
    "inp": abaqus(CUBE, [("C3D4", KUHN)]),
    "unv": unv(CUBE, [(111, KUHN)]),
    "msh": msh22(CUBE, [("tetra", KUHN)]),
}


def _count_bdf(text: str) -> int:
    lines = text.split("\n")
    up = [ln.upper() for ln in lines]
    lo = next((i + 1 for i, ln in enumerate(up) if ln.startswith("BEGIN")), 0)
    hi = next((i for i, ln in enumerate(up) if ln.startswith("ENDDATA") and i >= lo), len(up))
    return sum(1 for ln in up[lo:hi] if ln.startswith("CTETRA"))


def _count_inp(text: str) -> int:
    n, inside, pending = 0, False, False
    for ln in text.split("\n"):
        s = ln.strip()
        if not s or s.startswith("**"):
            continue
        if s.startswith("*"):
            inside = re.sub(r"\s", "", s[1:].split(",")[0]).upper() == "ELEMENT"
            pending = False
            continue
        if inside:
            n += 0 if pending else 1
            pending = s.endswith(",")
    return n


def _count_unv(text: str) -> int:
    """Element records: lines of six integers whose second is the descriptor 111."""
    n = 0
    for ln in text.split("\n"):
        tok = ln.split()
        if len(tok) == 6 and all(t.lstrip("+-").isdigit() for t in tok) and int(tok[1]) == 111:
            n += 1
    return n


def _count_msh(text: str) -> int:
    body = text.split("$Elements")[-1].split("$EndElements")[0].strip().split("\n")[1:]
    return sum(1 for ln in body if len(ln.split()) > 1 and ln.split()[1].isdigit()
               and int(ln.split()[1]) == 4)


COUNT = {"bdf": _count_bdf, "inp": _count_inp, "unv": _count_unv, "msh": _count_msh}
PRINTABLE = st.sampled_from(list("0123456789 .,-+*$Ee\n\tabcXYZ/'\"") + ["\x00", "\r", "\ufeff"])


@st.composite
def mutated(draw, ext):
    text = BASE[ext]
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(["replace", "insert", "delete", "dup_line", "drop_line",
                                   "truncate"]))
        if not text:
            break
        k = draw(st.integers(0, len(text) - 1))
        if op == "replace":
            text = text[:k] + draw(PRINTABLE) + text[k + 1:]
        elif op == "insert":
            text = text[:k] + draw(PRINTABLE) + text[k:]
        elif op == "delete":
            text = text[:k] + text[k + 1:]
        elif op == "truncate":
            text = text[:k]
        else:
            lines = text.split("\n")
            j = draw(st.integers(0, len(lines) - 1))
            if op == "dup_line":
                lines.insert(j, lines[j])
            else:
                del lines[j]
            text = "\n".join(lines)
    return text


def _check(tmp_path, ext, text):
    p = tmp_path / f"fuzz.{ext}"
    p.write_bytes(text.encode("utf-8"))
    try:
        mesh = read_mesh(p, units="m")
    except (MeshReadError, UnitsError) as exc:
        assert str(exc) and "\n" not in str(exc)
        return
    # the readers take CRLF and a lone CR (old Mac text) as line ends
    plain = text.replace("\r\n", "\n").replace("\r", "\n").replace("\ufeff", "")
    assert mesh.n_cells == COUNT[ext](plain)


FUZZ = settings(max_examples=150, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


@pytest.mark.parametrize("ext", sorted(BASE))
def test_unmutated_base_reads(tmp_path, ext):
    assert read_mesh_count(tmp_path, ext, BASE[ext]) == 6


def read_mesh_count(tmp_path, ext, text):
    p = tmp_path / f"base.{ext}"
    p.write_text(text)
    return read_mesh(p, units="m").n_cells


@FUZZ
@given(text=mutated("bdf"))
def test_fuzz_nastran(tmp_path, text):
    _check(tmp_path, "bdf", text)


def _outcome(path):
    """A reading's result: the error message, or the mesh's points, cells and regions."""
    try:
        m = read_mesh(path, units="m")
    except (MeshReadError, UnitsError) as exc:
        return str(exc)
    return (m.points.tobytes(), [(b.type, b.cells.tobytes()) for b in m.blocks],
            m.region.tobytes(), m.region_names)


@pytest.mark.skipif(not __import__("meshcheck.kernels").kernels.available(),
                    reason="numba not installed")
@FUZZ
@given(text=mutated("bdf"))
def test_fuzz_nastran_compiled_reads_as_numpy(tmp_path, text, monkeypatch):
    """The Nastran reader's compiled parsers (line table, fields; MESHCHECK_KERNELS=numba)
    give the numpy reader's mesh bit for bit, or its error message word for word."""
    p = tmp_path / "fuzz.bdf"
    p.write_bytes(text.encode("utf-8"))
    got = {}
    for mode in ("numpy", "numba"):
        monkeypatch.setenv("MESHCHECK_KERNELS", mode)
        got[mode] = _outcome(p)
    assert got["numba"] == got["numpy"]


@FUZZ
@given(text=mutated("inp"))
def test_fuzz_abaqus(tmp_path, text):
    _check(tmp_path, "inp", text)


@FUZZ
@given(text=mutated("unv"))
def test_fuzz_unv(tmp_path, text):
    _check(tmp_path, "unv", text)


@FUZZ
@given(text=mutated("msh"))
def test_fuzz_gmsh(tmp_path, text):
    _check(tmp_path, "msh", text)
