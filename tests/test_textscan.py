"""Field parsers of the text readers: numpy reference and compiled kernels.

References: Python's ``int`` and ``float`` (``float`` is correctly rounded, David
Gay's algorithm), applied to each field rewritten in C notation; Nastran's real
forms as documented in the MSC/NX Nastran Quick Reference Guide (bulk data entry
format: an exponent may be written ``E``, ``D`` or by its sign alone, ``1.5-3`` =
1.5e-3).  Both parsers (``ByteText(..., compiled=False/True)``) must give these
values bit for bit, blank fields as blank, and raise on the same first bad field.
"""
import re

import numpy as np
import pytest

from meshcheck.formats.textscan import ByteText, FieldError, parse_floats, parse_ints
from meshcheck.kernels import available

PARSERS = [False, pytest.param(True, marks=pytest.mark.skipif(not available(),
                                                                reason="numba not installed"))]


def _pack(fields, sep=b","):
    """Text with the fields separated by ``sep``; (text, positions, widths)."""
    pos, width, parts, at = [], [], [], 0
    for f in fields:
        pos.append(at)
        width.append(len(f))
        parts.append(f)
        at += len(f) + len(sep)
    return sep.join(parts), np.array(pos, np.int64), np.array(width, np.int64)


def _pad(rng, body: str, width: int | None = None) -> bytes:
    extra = int(rng.integers(0, 4)) if width is None else max(width - len(body), 0)
    left = int(rng.integers(0, extra + 1))
    return (" " * left + body + " " * (extra - left)).encode()


def _ints(rng, n):
    """Integer fields of every form the readers meet, with their values (None: blank)."""
    fields, values = [], []
    for _ in range(n):
        kind = rng.integers(0, 10)
        if kind == 0:
            fields.append(b" " * int(rng.integers(0, 20)))
            values.append(None)
            continue
        nd = int(rng.integers(1, 19))
        v = int(rng.integers(0, 10 ** min(nd, 18)))
        body = str(v)
        if kind == 1:
            body = "-" + body
            v = -v
        elif kind == 2:
            body = "+" + body
        elif kind == 3:
            body = body.rjust(nd, "0")  # leading zeros
        width = None if kind < 8 else int(rng.integers(len(body), 40))
        fields.append(_pad(rng, body, width))
        values.append(v)
    return fields, values


def _reals(rng, n):
    """Real fields in the notations of Nastran, Fortran and C, with their values by
    Python's float of the same number in C notation."""
    fields, values = [], []
    for _ in range(n):
        if rng.random() < 0.05:
            fields.append(b" " * int(rng.integers(0, 12)))
            values.append(None)
            continue
        nd = int(rng.integers(1, 22))          # up to 21 digits: past the exact fast path
        digits = "".join(str(d) for d in rng.integers(0, 10, nd))
        cut = int(rng.integers(0, nd + 1))      # the point's place
        ip, fp = digits[:cut], digits[cut:]
        mant = ip + "." + fp if rng.random() < 0.9 or not fp else ip + fp
        c_mant = (ip or "0") + "." + (fp or "0") if "." in mant else digits
        sign = rng.choice(["", "-", "+"])
        form = int(rng.integers(0, 7))
        e = int(rng.integers(-40, 41)) if rng.random() < 0.3 else int(rng.integers(-9, 10))
        if form == 0:
            body, c = mant, c_mant
        else:
            letter = ["E", "e", "D", "d", "", ""][form - 1]
            es = ("-" if e < 0 else rng.choice(["+", ""]) if letter else "+") + str(abs(e))
            if letter == "" and "." not in mant and rng.random() < 0.5:
                mant = mant + "."               # 5.-3
            body, c = mant + letter + es, c_mant + "e" + str(e)
        body = sign + body
        fields.append(_pad(rng, body))
        values.append(float(sign + c))
    return fields, values


def _check(parse, text_bytes, pos, width, values, compiled, kind):
    got, blank = parse(ByteText(text_bytes, compiled=compiled), pos, width)
    want = np.array([0 if v is None else v for v in values], dtype=kind)
    assert np.array_equal(blank, [v is None for v in values])
    assert got.dtype == kind
    assert np.array_equal(got.view(np.int64), want.view(np.int64))   # bit for bit (-0.0)


@pytest.mark.parametrize("compiled", PARSERS)
@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("gen, parse, kind", [(_ints, parse_ints, np.int64),
                                              (_reals, parse_floats, np.float64)],
                         ids=["integers", "reals"])
def test_fields_against_python(compiled, seed, gen, parse, kind):
    rng = np.random.default_rng(seed)
    fields, values = gen(rng, 3000)
    text, pos, width = _pack(fields)
    _check(parse, text, pos, width, values, compiled, kind)


@pytest.mark.parametrize("compiled", PARSERS)
def test_fixed_width_columns(compiled):
    """Small-field cards: 8-column fields, one width for all; the last field cut by the
    end of the text reads as if padded with spaces."""
    rng = np.random.default_rng(7)
    ints = [int(v) for v in rng.integers(0, 10 ** 8, 500)]
    reals = [float(v) for v in rng.normal(size=500).round(5)]
    text = b"".join(f"{a:<8d}{b:<8.5f}".encode()[:16] for a, b in zip(ints, reals)).rstrip()
    pos = np.arange(500, dtype=np.int64) * 16
    got_i, blank_i = parse_ints(ByteText(text, compiled=compiled), pos, 8)
    got_r, blank_r = parse_floats(ByteText(text, compiled=compiled), pos + 8, np.int64(8))
    assert got_i.tolist() == ints and not blank_i.any()
    assert got_r.tolist() == [float(f"{v:.5f}"[:8]) for v in reals] and not blank_r.any()


@pytest.mark.parametrize("compiled", PARSERS)
@pytest.mark.parametrize("bad, first", [
    ([b"12", b"1 2", b"x"], 1), ([b"12", b"3", b"4.5"], 2), ([b"7", b"--1", b"1-"], 1),
    ([b"99999999999999999999", b"1"], 0),    # above 2**62
])
def test_integer_errors_name_the_first_bad_field(compiled, bad, first):
    text, pos, width = _pack(bad)
    with pytest.raises(FieldError) as exc:
        parse_ints(ByteText(text, compiled=compiled), pos, width)
    assert exc.value.index == first


@pytest.mark.parametrize("compiled", PARSERS)
@pytest.mark.parametrize("bad, first", [
    ([b"1.0", b"1.5E", b"x"], 1), ([b"2.", b"1..5", b"1"], 1), ([b"3", b"4", b"1.5E+3x"], 2),
    ([b"1.0", b"E5"], 1), ([b"1.", b"1. 5"], 1),
])
def test_real_errors_name_the_first_bad_field(compiled, bad, first):
    text, pos, width = _pack(bad)
    with pytest.raises(FieldError) as exc:
        parse_floats(ByteText(text, compiled=compiled), pos, width)
    assert exc.value.index == first


def test_long_free_fields_are_read_whole():
    """Free fields wider than two words (padding, long ids) are read whole by both
    parsers (the numpy one took only the first 16 bytes until 2026-12-04)."""
    fields = [b" " * 18 + b"12", b" 123456789012345678", b"   7 ", b" " * 20]
    text, pos, width = _pack(fields)
    for compiled in (False, True) if available() else (False,):
        v, b = parse_ints(ByteText(text, compiled=compiled), pos, width)
        assert v.tolist() == [12, 123456789012345678, 7, 0]
        assert b.tolist() == [False, False, False, True]


@pytest.mark.skipif(not available(), reason="numba not installed")
def test_kernels_take_the_common_forms():
    """The compiled kernels convert plain fields themselves (status 0 or 1) and leave
    only the rare forms to the numpy parsers (status 2)."""
    from meshcheck.kernels import text as kx

    text, pos, width = _pack([b"  12 ", b"", b"-3", b"1234567890123456789"])
    u8 = np.frombuffer(text, np.uint8)
    val, st, no = np.empty((2, 2), np.int64), np.empty((2, 2), np.uint8), np.empty((0, 0))
    assert kx.fields(u8, pos.reshape(2, 2), width.reshape(2, 2), False, kx.P10, val, no, st,
                     0, 2) == 2
    assert st.tolist() == [[0, 1], [2, 2]] and val[0, 0] == 12
    text, pos, width = _pack([b"1.5-3", b" -.5E+2", b"1.2345678901234567890", b"1e400", b" "])
    u8 = np.frombuffer(text, np.uint8)
    val, st, no = np.empty((1, 5)), np.empty((1, 5), np.uint8), np.empty((0, 0), np.int64)
    assert kx.fields(u8, pos[None], width[None], True, kx.P10, no, val, st, 0, 5) == 2
    assert st.tolist() == [[0, 0, 2, 2, 1]] and val[0, :2].tolist() == [1.5e-3, -50.0]


@pytest.mark.parametrize("compiled", PARSERS)
def test_rows_name_the_field_of_the_first_bad_row(compiled):
    """int_rows / real_rows: fields of records, F per record; the error names the row
    (field) and record of the first bad field of the first row that has one."""
    from meshcheck.formats.textscan import int_rows, real_rows

    text = b"1       2       3       \n4       x       6       \n7       8       y       \n"
    starts = np.array([0, 25, 50])
    cols = [(starts + 8 * k, 8) for k in range(3)]
    t = ByteText(text, compiled=compiled)
    with pytest.raises(FieldError) as exc:
        int_rows(t, cols)
    assert (exc.value.row, exc.value.index) == (1, 1)
    v, b = int_rows(t, cols[:1])
    assert v.tolist() == [[1, 4, 7]] and not b.any()
    v, b = real_rows(t, [(starts, np.array([8, 0, 8]))])
    assert v.tolist() == [[1.0, 0.0, 7.0]] and b.tolist() == [[False, True, False]]


@pytest.mark.skipif(not available(), reason="numba not installed")
def test_compiled_parsers_split_among_threads_give_the_same(monkeypatch):
    """Above PARALLEL_FIELDS the compiled parsers share the records among threads (each a
    range of records); the values and the first error are those of the numpy parsers."""
    from meshcheck.formats import textscan

    monkeypatch.setattr(textscan, "PARALLEL_FIELDS", 10)
    monkeypatch.setattr(textscan, "workers", lambda: 3)
    rng = np.random.default_rng(11)
    for gen, parse in ((_ints, textscan.int_rows), (_reals, textscan.real_rows)):
        fields, _ = gen(rng, 3000)
        text, pos, width = _pack(fields)
        cols = [(pos[k::3], width[k::3]) for k in range(3)]
        want = parse(ByteText(text, compiled=False), cols)
        got = parse(ByteText(text, compiled=True), cols)
        for a, b in zip(want, got):
            assert np.array_equal(a.view(np.uint8), b.view(np.uint8))
    text, pos, width = _pack([b"1"] * 2000 + [b"x"] + [b"2"] * 998 + [b"y"])
    for compiled in (False, True):
        with pytest.raises(FieldError) as exc:
            textscan.int_rows(ByteText(text, compiled=compiled), [(pos, width)])
        assert exc.value.index == 2000


@pytest.mark.skipif(not available(), reason="numba not installed")
@pytest.mark.parametrize("seed", range(6))
def test_compiled_line_table_equals_numpy(seed):
    """The compiled line table and card names of the Nastran reader (kernels.text.lines,
    heads) give the numpy ones' line starts, ends (cut at '$'), commas, first bytes, tab
    / CR flags, names, large-field and mixed-case flags on texts of random lines:
    comments, free-field commas (also after a '$'), blank and short lines, tabs, CR,
    lower and mixed case, with and without a newline at the end (moved here from the
    reader's tests, which run every test under both kernel modes: it compares both
    paths itself)."""
    from meshcheck.formats.nastran import _Lines, _names

    rng = np.random.default_rng(seed)
    pieces = ["GRID", "CTETRA", "1", "2.5", "  ", "        ", ",", "$ note, x", "*", "+",
              "grid*", "\t", "\r", "ENDDATA", "", "12345678901", "$", "cTetra", "Grid*",
              "\xe9", "z{"]
    lines = ["".join(rng.choice(pieces, int(rng.integers(0, 7)))) for _ in range(400)]
    text = "\n".join(lines) + ("\n" if seed % 2 else "")
    if seed == 5:
        text = "\n" * 50 + "a"          # lines shorter than the buffers' guess
    data = text.encode()
    got = {}
    for compiled in (False, True):
        t = ByteText(data, compiled=compiled)
        L = _Lines(t)
        names = _names(t, L, L.ends - L.starts)
        got[compiled] = (L.starts, L.ends, L.commas, L.ccount, L.head, L.has_tab, L.has_cr,
                         *names)
    for a, b in zip(got[False], got[True]):
        assert np.array_equal(a, b)


def _small_reals(rng, n):
    """8-character fields near the plain form ``[-]digits.digits``: signs, points, spaces
    and exponents placed at random, so that both sides of the fast path's test are met."""
    out = []
    for _ in range(n):
        nd0, nd1 = int(rng.integers(0, 5)), int(rng.integers(0, 5))
        digits = "".join(str(d) for d in rng.integers(0, 10, nd0 + nd1))
        body = digits[:nd0] + rng.choice([".", ".", ".", "", ".."]) + digits[nd0:]
        body = rng.choice(["", "", "-", "+", "--", "- "]) + body
        if rng.random() < 0.1:
            body += rng.choice(["E+1", "-2", "e3"])
        if rng.random() < 0.05 and len(body) > 1:
            k = int(rng.integers(1, len(body)))
            body = body[:k] + " " + body[k:]
        body = body[:8]
        left = int(rng.integers(0, 8 - len(body) + 1))
        out.append((" " * left + body).ljust(8).encode())
    return out


def test_small_field_reals_fast_path_against_python():
    """The one-word fast path of small-field reals (:func:`_swar_real8`) takes exactly the
    fields of the form [-]digits.digits and gives Python's float of them bit for bit
    (correct rounding: Clinger 1990, "How to read floating point numbers accurately");
    through parse_floats every field, fast or not, still equals the reference."""
    import re

    from meshcheck.formats.textscan import _swar_real8

    rng = np.random.default_rng(11)
    fields = _small_reals(rng, 20000)
    words = np.frombuffer(b"".join(fields), "<u8")
    ok, val = _swar_real8(words)
    plain = re.compile(r"^ *-?(\d+\.\d*|\.\d+) *$")
    want_ok = np.array([bool(plain.match(f.decode())) for f in fields])
    assert np.array_equal(ok, want_ok) and 0.15 < ok.mean() < 0.9
    want = np.array([float(f) if o else 0.0 for f, o in zip(fields, ok)])
    assert np.array_equal(val[ok].view(np.int64), want[ok].view(np.int64))
    # the whole parser on 8-wide fields: fast rows, rows for the general path, blanks
    reals = [f for f in fields if not f.strip() or _c_real(f) is not None]
    text = b"".join(reals)
    pos = np.arange(len(reals), dtype=np.int64) * 8
    got, blank = parse_floats(ByteText(text, compiled=False), pos, np.int64(8))
    ref = [_c_real(f) for f in reals]
    assert np.array_equal(blank, [r is None for r in ref])
    assert np.array_equal(got.view(np.int64),
                          np.array([0.0 if r is None else r for r in ref]).view(np.int64))


def _c_real(field: bytes):
    """Python's float of a Nastran real field (None: blank or not a real)."""
    s = field.decode().strip()
    if not s:
        return None
    s = re.sub(r"(?<=[0-9.])([+-])", r"e\1", s.replace("E", "e").replace("ee", "e"))
    try:
        return float(s)
    except ValueError:
        return None


@pytest.mark.parametrize("bad, first", [([b"1.5     ", b"2.5     ", b"1 .5    ", b"x       "], 2),
                                        ([b"-1.0    ", b"--1.0   ", b"3.      "], 1)])
def test_small_field_errors_name_the_first_bad_field(bad, first):
    """A bad field among fast ones is named by its own index."""
    text = b"".join(bad)
    pos = np.arange(len(bad), dtype=np.int64) * 8
    with pytest.raises(FieldError) as exc:
        parse_floats(ByteText(text, compiled=False), pos, np.int64(8))
    assert exc.value.index == first
