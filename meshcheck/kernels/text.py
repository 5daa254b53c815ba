"""Compiled field parsers for the text readers (:mod:`meshcheck.formats.textscan`).

Each kernel converts the common forms of integer and real fields, located by byte
position and width in the text, and marks every other field (signs on integers,
more digits or larger exponents than the exact fast path takes, any odd syntax,
errors) as left to the numpy reference (``textscan._ints_numpy`` /
``_floats_numpy``), which then parses those few fields and produces the error
messages.  The values the kernels produce are those of the reference: integers
exactly, reals by Clinger's exact fast path (Clinger 1990, "How to read floating
point numbers accurately", PLDI: a decimal mantissa below 2**53 scaled by 10**e,
|e| <= 22, is one correctly rounded IEEE multiplication or division, equal to
strtod's result).

The fields come as (F, n) arrays, F fields of n cards, and are visited card by card,
so the text of a card is read once for all its fields.  Status codes per field: 0 a
number, 1 blank (only spaces, or width 0), 2 left to the reference parser.  Bytes
past the end of the text read as spaces, as in ``textscan.ByteText``.
"""
from __future__ import annotations

import numpy as np

from . import njit

__all__ = ["NUMBER", "BLANK", "OTHER", "P10", "fields", "fixed_fields", "lines", "heads"]

NUMBER, BLANK, OTHER = 0, 1, 2
#: exact powers of ten 10**0 .. 10**22 (float64)
P10 = 10.0 ** np.arange(23)
_TWO53 = 2 ** 53


@njit(inline="always")
def _digits(u8, k, e, cap):
    """(value of the first ``cap`` digits, number of digits, position after them) of the
    digit run at k (before e)."""
    v = 0
    nd = 0
    while k < e:
        d = np.int64(u8[k]) - 48
        if d < 0 or d > 9:
            break
        if nd < cap:
            v = v * 10 + d
        nd += 1
        k += 1
    return v, nd, k


@njit(inline="always")
def _uint(u8, p, e):
    """(value, status) of the bytes p..e-1: spaces, 1 to 18 digits, spaces."""
    k = p
    while k < e and u8[k] == 32:
        k += 1
    if k >= e:
        return 0, 1
    v, nd, k = _digits(u8, k, e, 18)
    while k < e and u8[k] == 32:
        k += 1
    if k < e or nd == 0 or nd > 18:
        return 0, 2
    return v, 0


@njit(inline="always")
def _real(u8, p, e, p10):
    """(value, status) of the bytes p..e-1 (see :func:`reals`)."""
    k = p
    while k < e and u8[k] == 32:
        k += 1
    if k >= e:
        return 0.0, 1
    neg = False
    c = u8[k]
    if c == 45 or c == 43:
        neg = c == 45
        k += 1
    m = 0
    nd = 0
    frac = 0
    dot = False
    while k < e:
        c = u8[k]
        if c == 46 and not dot:
            dot = True
            k += 1
            continue
        d = np.int64(c) - 48
        if d < 0 or d > 9:
            break
        if nd < 18:
            m = m * 10 + d
        nd += 1
        if dot:
            frac += 1
        k += 1
    bad = nd == 0 or nd > 18
    ex = 0
    if k < e and not bad:
        c = u8[k]
        marked = False
        if c == 69 or c == 101 or c == 68 or c == 100:  # E e D d
            marked = True
            k += 1
            c = u8[k] if k < e else 32
        eneg = False
        if c == 45 or c == 43:  # with no letter before it: Nastran's implicit exponent
            marked = True
            eneg = c == 45
            k += 1
        if marked:
            ex, ned, k = _digits(u8, k, e, 3)
            if ned == 0 or ned > 3:
                bad = True
            if eneg:
                ex = -ex
    while k < e and u8[k] == 32:
        k += 1
    e10 = ex - frac
    if bad or k < e or m >= _TWO53 or e10 > 22 or e10 < -22:
        return 0.0, 2
    x = np.float64(m) * p10[e10] if e10 >= 0 else np.float64(m) / p10[-e10]
    return (-x if neg else x), 0


@njit(inline="always")
def _convert(u8, p, e, real, p10, ival, fval, status, f, i):
    """Field (f, i), bytes p..e-1, into fval (a real) or ival (an integer) and status;
    True when it is left to the reference parser."""
    if real:
        x, s = _real(u8, p, e, p10)
        fval[f, i] = x
    else:
        v, s = _uint(u8, p, e)
        ival[f, i] = v
    status[f, i] = s
    return s == 2


@njit
def fields(u8, pos, width, real, p10, ival, fval, status, lo, hi):
    """Integer or real fields of records lo..hi-1 (threads share the work by ranges).

    Integers: spaces, 1 to 18 digits, spaces.  Reals, in Nastran, Fortran and C
    notations: spaces, optional sign, digits with at most one point, an optional
    exponent (``E``, ``e``, ``D``, ``d`` with an optional sign, or Nastran's implicit
    form, a sign right after the mantissa: ``1.5-3`` is 1.5e-3) of 1 to 3 digits,
    spaces; converted when the mantissa has at most 18 digits, is below 2**53 and the
    decimal exponent is within +-22 (exact, see the module).  Every other field is left
    to the reference parser.

    u8 : (n_bytes,) uint8 text; pos : (F, n) int64 first byte of each field; width :
    (F, n) int64, or (F, 1) for one width per row; real : reals (into fval (F, n)
    float64) or integers (into ival (F, n) int64; the other output is not touched);
    p10 : :data:`P10`; status : (F, n) uint8 (values 0 unless status is 0).  Returns
    the number of fields left to the reference parser."""
    size = u8.shape[0]
    n_rows = pos.shape[0]
    one = width.shape[1] == 1
    left = 0
    for i in range(lo, hi):
        for f in range(n_rows):
            p = pos[f, i]
            left += _convert(u8, p, min(p + width[f, 0 if one else i], size), real, p10,
                             ival, fval, status, f, i)
    return left


@njit
def fixed_fields(u8, starts, ends, lines, fw, f0, real, p10, ival, fval, status, lo, hi):
    """Fields of single-line fixed-format cards (Nastran small field, fw = 8, or large
    field, fw = 16), as :func:`fields`: card i is the line lines[i] (starts, ends: the
    line table); its data field k (from 0) is the fw bytes from column 9 + fw * k, cut
    at the line's end and at column 72 (73-80 hold the continuation marker); a field
    past them is blank.  Rows f of the outputs are the fields f0 + f."""
    size = u8.shape[0]
    n_rows = status.shape[0]
    left = 0
    for i in range(lo, hi):
        s = starts[lines[i]]
        lim = min(ends[lines[i]], s + 72, size)
        for f in range(n_rows):
            p = s + 8 + fw * (f0 + f)
            left += _convert(u8, p, min(p + fw, lim), real, p10, ival, fval, status, f, i)
    return left


@njit
def lines(u8, starts, ends):
    """Line starts and ends (the newline's position, or the text's end) of a text.

    u8 : (n_bytes,) uint8; starts, ends : (cap,) int64 outputs.  A last line without a
    newline counts, an empty one after the last newline does not.  Returns the number
    of lines, or -1 when the outputs have too few entries.  (The newlines are found
    first, the starts then derived: one store per byte's test keeps the scan at about
    a quarter of a nanosecond per byte on the project's machine, where storing both
    in the scan doubled its time.)"""
    n = u8.shape[0]
    cap = ends.shape[0]
    m = 0
    for i in range(n):
        if u8[i] == 10:
            if m >= cap:
                return -1
            ends[m] = i
            m += 1
    if m == 0 or ends[m - 1] < n - 1:
        if m >= cap:
            return -1
        if n == 0:
            return 0
        ends[m] = n
        m += 1
    starts[0] = 0
    for k in range(1, m):
        starts[k] = ends[k - 1] + 1
    return m


@njit
def heads(u8, pos, width, head, name, large, mixed, first):
    """Card names of lines (as ``formats.nastran._names``).

    head[m]: the first width[m] (0..8) bytes at pos[m] as a little-endian uint64, the
    other bytes (and any past the text's end) spaces, as ``textscan.ByteText.load``;
    name[m]: the same with lower-case letters in upper case and ``*`` (large field) a
    space; large[m]: a ``*`` in it; mixed[m]: both lower- and upper-case letters;
    first[m]: its first byte."""
    n = u8.shape[0]
    for m in range(pos.shape[0]):
        s = pos[m]
        w = min(max(width[m], 0), 8)
        x = np.uint64(0)
        if s + 8 <= n:
            for j in range(8):
                x |= np.uint64(u8[s + j]) << np.uint64(8 * j)
        else:
            for j in range(max(n - s, 0)):
                x |= np.uint64(u8[s + j]) << np.uint64(8 * j)
        if w < 8:
            keep = (np.uint64(1) << np.uint64(8 * w)) - np.uint64(1)
            x = (x & keep) | (np.uint64(0x2020202020202020) & ~keep)
        head[m] = x
        first[m] = x & np.uint64(0xFF)
        y = np.uint64(0)
        lower = False
        upper = False
        star = False
        for j in range(8):
            c = (x >> np.uint64(8 * j)) & np.uint64(0xFF)
            if 97 <= c <= 122:
                c -= np.uint64(32)
                lower = True
            elif 65 <= c <= 90:
                upper = True
            elif c == 42:
                c = np.uint64(32)
                star = True
            y |= c << np.uint64(8 * j)
        name[m] = y
        large[m] = star
        mixed[m] = lower and upper
