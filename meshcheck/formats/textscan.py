"""Vectorised scanning of fixed-width and comma-separated text fields.

The readers of text formats (Nastran bulk data above all) locate every field
as a byte position and width, then convert all fields of one kind at once:

* integers with a SWAR ("SIMD within a register") parse of 8 characters held
  in one uint64 (the digit-combining constants are the well-known
  ``parse_eight_digits`` ones: pairs, then quads, then the 8-digit value);
* small-field reals of the plain form ``[-]digits.digits`` by the same SWAR parse
  with the point taken out, then one exact division by a power of ten;
* other reals by numpy's own string-to-float conversion after a vectorised
  clean-up of Nastran's short exponent forms (``1.5-3`` is 1.5e-3, ``2.D+1``).

Fields that do not fit the fast path (signs, more than 8 digits, odd
spacing) fall back to a per-field Python parse, which also produces the
error message.  Nothing here knows about any particular format.
"""
from __future__ import annotations

import numpy as np

from ..threads import ranges, thread_map, workers
from .raw import clean_name

__all__ = ["ByteText", "parse_ints", "parse_floats", "int_rows", "real_rows", "compiled_rows",
           "FieldError"]

_U = np.uint64
_ONES = _U(0x0101010101010101)
_HIGH = _U(0x8080808080808080)
_LOW7 = _U(0x7F7F7F7F7F7F7F7F)
_SPACES = _U(0x2020202020202020)
_ZEROS = _U(0x3030303030303030)
#: _MASKS[w] keeps the first w bytes (characters) of a little-endian word
_MASKS = np.array([(1 << (8 * w)) - 1 for w in range(8)] + [(1 << 64) - 1], dtype=np.uint64)
_PAD = 160
#: _FILL[w] is spaces in the bytes that _MASKS[w] clears
_FILL = _SPACES & ~_MASKS
#: fields converted per step (temporaries of a step stay in the CPU cache)
CHUNK = 32768
#: records per step of the compiled parsers (no temporaries; one step for a million
#: cards, so that no step's results are copied into the whole's, shared among threads)
CHUNK_COMPILED = 1 << 20
#: fields from which the compiled parsers split the work among threads
PARALLEL_FIELDS = 65536
#: the compiled parsers' output of the kind not asked for (never written)
_NO_INTS, _NO_REALS = np.empty((0, 0), np.int64), np.empty((0, 0), np.float64)


class FieldError(ValueError):
    """A field that is not a number; ``index`` is its position in the input arrays
    (``row`` its row, for :func:`int_rows` / :func:`real_rows`)."""

    def __init__(self, index: int, text: str, kind: str, row: int = 0):
        text = clean_name(text, 40)             # file content: shown as data only
        super().__init__(f"'{text}' is not {kind}")
        self.index, self.text, self.kind, self.row = int(index), text, kind, int(row)


class ByteText:
    """Immutable bytes with vectorised unaligned 8-byte loads (no copy of the text).

    data : the text; ``load(p, w)`` gives the uint64 holding bytes p..p+7
    (little-endian, so character p is the lowest byte), bytes past the end
    of the text read as spaces.  compiled : whether the field parsers take the
    compiled kernels (default: :func:`meshcheck.kernels.use_built` of the text's size).
    """

    def __init__(self, data: bytes, compiled: bool | None = None):
        self.data = data
        self.n = n = len(data)
        if compiled is None:
            from ..kernels import use_built

            compiled = use_built(n)
        #: whether parse_ints / parse_floats take the compiled parsers (meshcheck.kernels.text)
        self.compiled = bool(compiled)
        self.u8 = np.frombuffer(data, dtype=np.uint8) if n else np.zeros(0, np.uint8)
        if self.u8.flags.writeable:  # one compiled signature for bytes and bytearray
            self.u8 = self.u8.view()
            self.u8.flags.writeable = False
        body = max(n - 7, 0)
        self.words = (np.ndarray((body,), dtype="<u8", buffer=data, offset=0, strides=(1,))
                      if body else np.zeros(0, np.uint64))
        self.lim = body - 1                     # last position served by ``words``
        self.tail_start = max(n - 8, 0)
        tail = bytes(data[self.tail_start:]) + b" " * _PAD
        self.tail = np.ndarray((len(tail) - 7,), dtype="<u8", buffer=tail, offset=0,
                               strides=(1,))

    def load(self, pos: np.ndarray, width: np.ndarray | int) -> np.ndarray:
        """(N,) uint64: the first ``width`` (0..8) bytes at ``pos``, the rest spaces."""
        pos = np.asarray(pos, dtype=np.int64)
        if pos.size and int(pos.max()) > self.lim:
            over = pos > self.lim
            v = np.empty(pos.shape, dtype=np.uint64)
            v[~over] = self.words[pos[~over]]
            v[over] = self.tail[np.minimum(pos[over] - self.tail_start, len(self.tail) - 1)]
        else:
            v = self.words[pos]
        if np.ndim(width) == 0 and int(width) >= 8:
            return v
        return (v & _MASKS[width]) | _FILL[width]

    def load_wide(self, pos: np.ndarray, width: np.ndarray, n_words: int) -> np.ndarray:
        """(N, n_words) uint64 of the fields, padded with spaces to 8 * n_words bytes."""
        pos = np.asarray(pos, dtype=np.int64)
        width = np.asarray(width, dtype=np.int64)
        out = np.empty((len(pos), n_words), dtype=np.uint64)
        for k in range(n_words):
            out[:, k] = self.load(pos + 8 * k, np.clip(width - 8 * k, 0, 8))
        return out

    def text(self, pos: int, width: int) -> str:
        return self.data[pos:pos + max(width, 0)].decode("latin-1")


_F0 = _U(0xF0F0F0F0F0F0F0F0)
_SIXES = _U(0x0606060606060606)
_THREES = _U(0x3333333333333333)
_FF = _U(0xFF)
_B64 = np.uint8(64)


def _swar_uint8(x: np.ndarray, info: bool = False):
    """Parse 8-character words holding an unsigned integer padded with spaces.

    Returns (value int64, ok bool, blank bool); ok is False unless the word is
    spaces, one run of digits, spaces.  Spaces become '0' digits; the run is
    then shifted so that its last digit is the last byte, and the 8 digits
    are combined pairwise (x10, x100, x10000).  With ``info`` also returns
    (number of digits, run starts at the first byte, run ends at the last byte).
    """
    s = x ^ _SPACES
    spc = ~(((s & _LOW7) + _LOW7) | s) & _HIGH           # 0x80 in every space byte
    y = x | (spc >> _U(3))                                # spaces -> '0'
    okdig = ((y & _F0) | (((y + _SIXES) & _F0) >> _U(4))) == _THREES
    sm = (spc >> _U(7)) * _FF
    dm = ~sm                                              # 0xFF in every digit byte
    top = dm + (dm & (sm + _U(1)))                        # carry just above the digit run
    blank = dm == 0
    ok = okdig & ((top & dm) == 0) & ~blank
    sh = _B64 - np.bitwise_count(top - _U(1))
    v = (y ^ _ZEROS) << sh
    v = ((v & _U(0x0F0F0F0F0F0F0F0F)) * _U(2561)) >> _U(8)
    v = ((v & _U(0x00FF00FF00FF00FF)) * _U(6553601)) >> _U(16)
    v = ((v & _U(0x0000FFFF0000FFFF)) * _U(42949672960001)) >> _U(32)
    if not info:
        return v.view(np.int64), ok, blank
    nd = np.bitwise_count(dm).astype(np.int64) >> 3
    return v.view(np.int64), ok, blank, nd, (dm & _FF) != 0, sh == 0


_POW10 = 10 ** np.arange(9, dtype=np.int64)


def _py_int(s: str) -> int | None:
    t = s.strip()
    if not t:
        return None
    if t[0] in "+-":
        body = t[1:]
    else:
        body = t
    if not body.isdigit() or not body.isascii():
        raise ValueError(s)
    return int(t)


def parse_ints(text: ByteText, pos: np.ndarray, width: np.ndarray | int, pre=None):
    """Parse integer fields.

    pos : (N,) int64 byte position of each field; width : (N,) int64 width of
    each field (0 = blank), or one int for all; pre : the fields' words already
    loaded (optional, with a scalar width <= 8).
    Returns (values (N,) int64, blank (N,) bool); blank fields give 0.
    Raises FieldError for the first field that is neither blank nor an integer.
    Works in chunks of ``CHUNK`` fields so that temporaries stay in cache.
    """
    pos = np.ascontiguousarray(pos, dtype=np.int64).ravel()
    if text.compiled:
        v, b = _rows_compiled(text, [(pos, np.ravel(width) if np.ndim(width) else width)],
                              "uints")
        return v[0], b[0]
    return _ints_numpy(text, pos, width, pre)


def int_rows(text: ByteText, cols: list) -> tuple[np.ndarray, np.ndarray]:
    """Integer fields of n records, F per record: cols is [(pos, width[, words]), ...]
    as :func:`parse_ints` takes them, one per field.  Returns (values (F, n) int64,
    blank (F, n) bool); raises FieldError (``row`` the field) for the first bad field of
    the first row that has one."""
    if text.compiled:
        return _rows_compiled(text, cols, "uints")
    return _rows_numpy(text, cols, "uints")


def real_rows(text: ByteText, cols: list, max_width: int = 40):
    """Real fields of n records, F per record (see :func:`int_rows`, :func:`parse_floats`)."""
    wmax = max((int(np.max(c[1], initial=0)) for c in cols), default=0)
    if text.compiled and wmax <= max_width:
        return _rows_compiled(text, cols, "reals", max_width)
    return _rows_numpy(text, cols, "reals", max_width)


def _rows_numpy(text, cols, kind, max_width=40):
    n = len(cols[0][0]) if cols else 0
    val = np.zeros((len(cols), n), np.int64 if kind == "uints" else np.float64)
    blank = np.ones((len(cols), n), bool)
    for j, (pos, wid, *pre) in enumerate(cols):
        try:
            if kind == "uints":
                val[j], blank[j] = parse_ints(text, pos, wid, pre[0] if pre else None)
            else:
                val[j], blank[j] = parse_floats(text, pos, wid, max_width)
        except FieldError as exc:
            raise FieldError(exc.index, exc.text, exc.kind, row=j) from None
    return val, blank


def _rows_compiled(text, cols, kind, max_width=40):
    """int_rows / real_rows by the compiled kernels of :mod:`meshcheck.kernels.text`."""
    from ..kernels import text as kx

    n_rows = len(cols)
    n = len(cols[0][0]) if cols else 0
    pos = np.empty((n_rows, n), np.int64)
    scalar = all(np.ndim(c[1]) == 0 for c in cols)
    width = np.empty((n_rows, 1 if scalar else n), np.int64)
    for j, (p, w, *_) in enumerate(cols):
        pos[j] = p
        width[j] = w
    def run(real, ival, fval, status, lo, hi):
        return kx.fields(text.u8, pos, width, real, kx.P10, ival, fval, status, lo, hi)

    return compiled_rows(text, (n_rows, n), kind, run,
                         lambda j, idx: (pos[j, idx], width[j, 0] if scalar else width[j, idx]),
                         max_width)


def compiled_rows(text: ByteText, shape: tuple, kind: str, run, where, max_width: int = 40):
    """(F, n) values and blank flags of F fields of n records by a compiled kernel,
    ``run(real, ival, fval, status, lo, hi)`` (:func:`meshcheck.kernels.text.fields`:
    records lo..hi-1, into ival or fval; returns the fields it left), shared
    among threads when there are at least :data:`PARALLEL_FIELDS` fields; the fields
    left (rare forms, errors) go to the numpy parsers row by row, located by
    ``where(row, records) -> (pos, width)``.  kind: "uints" or "reals".  Raises
    FieldError (``row`` set) for the first bad field of the first row that has one."""
    from ..kernels import text as kx

    n_rows, n = shape
    status = np.empty(shape, np.uint8)
    real = kind == "reals"
    val = np.empty(shape, np.float64 if real else np.int64)
    ival, fval = (_NO_INTS, val) if real else (val, _NO_REALS)
    parts = ranges(n, workers() if n_rows * n >= PARALLEL_FIELDS else 1)
    left = sum(thread_map(lambda r: run(real, ival, fval, status, r[0], r[1]), parts,
                          parallel=len(parts) > 1))
    for j in range(n_rows) if left else ():
        idx = np.flatnonzero(status[j] == kx.OTHER)
        if not idx.size:
            continue
        p, w = where(j, idx)
        try:
            if kind == "uints":
                v, b = _ints_numpy(text, p, int(w) if np.ndim(w) == 0 else w)
            else:
                v, b = _floats_numpy(text, p, w, max_width)
        except FieldError as exc:
            raise FieldError(int(idx[exc.index]), exc.text, exc.kind, row=j) from None
        val[j, idx] = v
        status[j, idx] = np.where(b, kx.BLANK, kx.NUMBER)
    return val, status.view(bool)  # only 0 (NUMBER) and 1 (BLANK) are left


def _ints_numpy(text, pos, width, pre=None):
    scalar = np.ndim(width) == 0
    if not scalar:
        width = np.asarray(width, dtype=np.int64).ravel()
    n = len(pos)
    val = np.empty(n, dtype=np.int64)
    blank = np.empty(n, dtype=bool)
    for c0 in range(0, n, CHUNK):
        sl = slice(c0, c0 + CHUNK)
        v, b = _ints_chunk(text, pos[sl], int(width) if scalar else width[sl], c0,
                           None if pre is None else pre[sl])
        val[sl] = v
        blank[sl] = b
    return val, blank


def _ints_chunk(text, pos, width, offset, pre=None):
    scalar = np.ndim(width) == 0
    if scalar and 8 < width <= 16 and pre is None:
        # right-justified wide fields (I10 and the like): when the leading bytes are blank
        # everywhere, the number sits in the last 8 bytes - one word per field
        lead = width - 8
        if (text.load(pos, lead) == _SPACES).all():
            val, blank = _ints_chunk(text, pos + lead, 8, offset)
            return val, blank
    if pre is not None:
        lo = pre
    else:
        lo = text.load(pos, min(width, 8) if scalar else np.minimum(width, 8))
    if scalar and width <= 8 and len(lo) > 1 and lo[0] == lo[-1] and (lo == lo[0]).all():
        # the same text in every field (a constant property number, say): parse it once
        v1, ok1, b1 = _swar_uint8(lo[:1])
        val, ok, blank = (np.full(len(lo), v1[0]), np.full(len(lo), ok1[0]),
                          np.full(len(lo), b1[0]))
    else:
        val, ok, blank = _swar_uint8(lo)
    wide = (np.arange(len(pos)) if width > 8 else np.zeros(0, np.int64)) if scalar \
        else np.flatnonzero(width > 8)
    if wide.size:
        # two words: value = lo * 10**digits(hi) + hi when the digits run across the
        # boundary; else one word is blank and the other holds the number
        lv, lok, lblank, _, _, lend = _swar_uint8(lo[wide], info=True)
        hw = min(width - 8, 8) if scalar else np.minimum(width[wide] - 8, 8)
        hi = text.load(pos[wide] + 8, hw)
        hv, hok, hblank, hnd, hstart, _ = _swar_uint8(hi, info=True)
        across = lok & hok & lend & hstart
        val[wide] = np.where(lblank, hv, np.where(hblank, lv, lv * _POW10[hnd] + hv))
        ok[wide] = np.where(lblank, hok, np.where(hblank, lok, across))
        blank[wide] = lblank & hblank
        long = np.asarray(width > 16)
        if long.any():  # more than two words (free fields padded with spaces): the
            ok &= ~long  # general parser below
            blank &= ~long
    bad = np.flatnonzero(~ok & ~blank) if not ok.all() else ()
    for i in bad:
        s = text.text(int(pos[i]), int(width if scalar else width[i]))
        try:
            v = _py_int(s)
        except ValueError:
            raise FieldError(int(i) + offset, s.strip(), "an integer") from None
        if v is None:
            blank[i] = True
        elif abs(v) >= 2 ** 62:
            raise FieldError(int(i) + offset, s.strip(), "an integer of a usable size")
        else:
            val[i] = v
    if blank.any():
        val[blank] = 0
    return val, blank


# ---- reals ---------------------------------------------------------------
_FLOAT_OK = np.zeros(256, dtype=bool)
_FLOAT_OK[[ord(c) for c in "0123456789.+-eEdD "]] = True
_DIGITDOT = np.zeros(256, dtype=bool)
_DIGITDOT[[ord(c) for c in "0123456789."]] = True


def nastran_real(s: str) -> float | None:
    """One real in Nastran notation (``1.5-3``, ``2.D+1``, ``.5``); None if blank."""
    t = s.strip().upper().replace("D", "E")
    if not t:
        return None
    if any(c not in "0123456789.+-E" for c in t):
        raise ValueError(s)
    # implicit exponent: a sign after the mantissa without E
    for k in range(1, len(t)):
        if t[k] in "+-" and t[k - 1] in "0123456789.":
            t = t[:k] + "E" + t[k:]
            break
    return float(t)


_P10 = 10.0 ** np.arange(23)
_TWO53 = 2 ** 53


def _fast_reals(b: np.ndarray):
    """Exact fast path for plain reals (Clinger 1990, "How to read floating point
    numbers accurately", PLDI): a decimal mantissa m < 2**53 scaled by 10**e with
    |e| <= 22 is one correctly rounded IEEE multiplication or division, so the
    result equals strtod's.

    b : (n, w) uint8 characters (digits . + - E and spaces only).
    Returns (ok (n,) bool, values (n,) float64); rows not ok (other syntax,
    too many digits, large exponents, blanks) are left to the general parser.
    """
    n, w = b.shape
    bt = np.ascontiguousarray(b.T)             # one contiguous row per character column
    m = np.zeros(n, np.int64)
    ex = np.zeros(n, np.int64)
    frac = np.zeros(n, np.int64)
    nd = np.zeros(n, np.int64)
    ned = np.zeros(n, np.int64)
    neg = np.zeros(n, bool)
    eneg = np.zeros(n, bool)
    in_e = np.zeros(n, bool)
    dot = np.zeros(n, bool)
    bad = np.zeros(n, bool)
    started = np.zeros(n, bool)
    ended = np.zeros(n, bool)
    prev = np.full(n, 32, np.uint8)
    for j in range(w):
        c = bt[j]
        sp = c == 32
        bad |= ended & ~sp
        ended |= started & sp
        d8 = c - np.uint8(48)
        isd = d8 < 10
        d = d8.astype(np.int64)
        dm = isd & ~in_e
        m = np.where(dm, m * 10 + d, m)
        nd += dm
        frac += dm & dot
        de = isd & in_e
        ex = np.where(de, ex * 10 + d, ex)
        ned += de
        isdot = c == 46
        bad |= isdot & (dot | in_e)
        dot |= isdot
        ise = c == 69
        bad |= ise & (in_e | (nd == 0))
        sign = (c == 45) | (c == 43)
        bad |= sign & ~((~started) | (prev == 69))
        neg |= (c == 45) & ~started
        eneg |= (c == 45) & in_e
        in_e |= ise
        started |= ~sp
        prev = np.where(sp, prev, c)
    e10 = np.where(eneg, -ex, ex) - frac
    ok = (~bad & (nd > 0) & (~in_e | (ned > 0)) & (nd <= 18) & (m < _TWO53)
          & (np.abs(e10) <= 22) & (ned <= 3))
    e10c = np.clip(e10, -22, 22)
    mf = m.astype(np.float64)
    val = np.where(e10c >= 0, mf * _P10[np.maximum(e10c, 0)], mf / _P10[np.maximum(-e10c, 0)])
    val = np.where(neg, -val, val)
    return ok, val


#: fields of a chunk looked at before the small-field reals' SWAR pass is tried on all
_PROBE = 64
_MINUS = _U(0x2D2D2D2D2D2D2D2D)
_DOTS = _U(0x2E2E2E2E2E2E2E2E)
_TOP_SPACE = _U(0x20) << _U(56)


def _byte_is(x: np.ndarray, pattern: np.uint64) -> np.ndarray:
    """0x80 in every byte of ``x`` equal to the byte of ``pattern`` (exact, no carries
    between bytes: the classic has-zero-byte test on 7 bits, then the 8th)."""
    s = x ^ pattern
    return ~(((s & _LOW7) + _LOW7) | s) & _HIGH


def _swar_real8(x: np.ndarray):
    """Parse 8-character words holding ``[-]digits.digits`` padded with spaces, the form
    of nearly every small-field real (``0.599470``, ``-12.5``, ``.5``, ``3.``).

    The point is taken out (the bytes above it moved down one byte), the digits parsed
    as one integer by :func:`_swar_uint8` and divided by 10**(digits after the point):
    a mantissa below 10**8 and a power of ten up to 10**7, both exact in binary, make
    one correctly rounded IEEE division, i.e. strtod's value (Clinger 1990, "How to read
    floating point numbers accurately", PLDI: the exact fast path).
    Returns (ok (N,) bool, values (N,) float64); other forms (exponents, a plus sign,
    no point, blanks) are not ok and left to the general parser.
    """
    minus = _byte_is(x, _MINUS)
    dot = _byte_is(x, _DOTS)
    spc = _byte_is(x, _SPACES)
    # the characters one run (no space beside the point), a minus sign first
    nonspace = ~spc & _HIGH
    run = (nonspace >> _U(7)) * _FF
    one_run = ((run + (run & (~run + _U(1)))) & run) == 0
    sign_ok = (minus == 0) | ((np.bitwise_count(minus) == 1) & (((minus - _U(1)) & nonspace) == 0)
                              & (((minus << _U(8)) & spc) == 0))
    x = x ^ (minus >> _U(7)) * _U(0x0D)                  # '-' (0x2D) -> ' ' (0x20)
    sh = np.bitwise_count(dot - _U(1)).astype(np.uint64) - _U(7)  # 8 * (point's byte)
    low = x & ((_U(1) << sh) - _U(1))
    y = low | (((x >> sh) >> _U(8)) << sh) | _TOP_SPACE
    v, ok, _ = _swar_uint8(y)
    above = ~((dot << _U(1)) - _U(1))                    # bits above the point's byte
    frac = np.bitwise_count(nonspace & above)
    ok &= sign_ok & one_run & (np.bitwise_count(dot) == 1)
    val = v / _P10[frac]
    np.negative(val, out=val, where=minus != 0)
    return ok, val


def parse_floats(text: ByteText, pos: np.ndarray, width: np.ndarray, max_width: int = 40):
    """Parse real fields (Nastran, Fortran and C notations).

    Returns (values (N,) float64, blank (N,) bool); blank fields give 0.0.
    Raises FieldError naming the first field that is not a real.
    """
    pos = np.ascontiguousarray(pos, dtype=np.int64).ravel()
    if text.compiled and int(np.max(width, initial=0)) <= max_width:
        v, b = _rows_compiled(text, [(pos, np.ravel(width) if np.ndim(width) else width)],
                              "reals", max_width)
        return v[0], b[0]
    return _floats_numpy(text, pos, width, max_width)


def _floats_numpy(text, pos, width, max_width):
    width = np.broadcast_to(np.ravel(np.asarray(width, dtype=np.int64)), pos.shape)
    n = len(pos)
    val = np.zeros(n, dtype=np.float64)
    blank = np.zeros(n, dtype=bool)
    for c0 in range(0, n, CHUNK):
        sl = slice(c0, c0 + CHUNK)
        try:
            val[sl], blank[sl] = _floats_chunk(text, pos[sl], width[sl], max_width)
        except FieldError as exc:
            raise FieldError(exc.index + c0, exc.text, exc.kind) from None
    return val, blank


def _floats_chunk(text, pos, width, max_width):
    n = len(pos)
    out = np.zeros(n, dtype=np.float64)
    wmax = int(width.max(initial=0))
    if wmax > max_width:
        i = int(np.argmax(width))
        raise FieldError(i, text.text(int(pos[i]), int(width[i])).strip()[:40],
                         "a real of normal length")
    nw = max(1, -(-wmax // 8))
    words = text.load_wide(pos, width, nw)
    # small fields: the common form by one SWAR pass, the others below; a chunk whose first
    # fields hold none of that form (e.g. every real with an exponent) skips the pass
    if nw == 1 and _swar_real8(words[:_PROBE, 0])[0].any():
        fast, val = _swar_real8(words[:, 0])
        rest = np.flatnonzero(~fast)
        if not rest.size:
            return val, np.zeros(n, dtype=bool)
        if rest.size < n:
            try:
                val[rest], blank = _floats_chunk(text, pos[rest], width[rest], max_width)
            except FieldError as exc:   # fast fields never fail: the first bad is this
                raise FieldError(int(rest[exc.index]), exc.text, exc.kind) from None
            out_blank = np.zeros(n, dtype=bool)
            out_blank[rest] = blank
            return val, out_blank
    b = words.view(np.uint8).reshape(n, 8 * nw)
    blank = (words == _SPACES).all(axis=1) if nw > 1 else (words[:, 0] == _SPACES)
    okc = _FLOAT_OK[b].view("<u8").reshape(n, nw)
    good = (okc == _ONES).all(axis=1) if nw > 1 else (okc[:, 0] == _ONES)
    # D/d/e exponent -> E, and Nastran's implicit exponent "1.5-3" (a sign right
    # after a digit or point); both are rare, so look before touching the bytes
    dexp = (b == 68) | (b == 100) | (b == 101)
    if dexp.any():
        b = b.copy()
        b[dexp] = 69
    sign = (b[:, 1:] == 43) | (b[:, 1:] == 45)
    rows = np.flatnonzero(sign.any(axis=1))
    if rows.size:
        implicit = sign[rows] & _DIGITDOT[b[rows, :-1]]
        keep = implicit.any(axis=1)
        rows, implicit = rows[keep], implicit[keep]
    if rows.size:
        col = np.argmax(implicit, axis=1) + 1          # index of the sign
        width_b = b.shape[1]
        wide = np.full((n, width_b + 1), 32, dtype=np.uint8)
        wide[:, :width_b] = b
        j = np.arange(width_b + 1)[None, :]
        src = np.where(j < col[:, None], j, j - 1)
        shifted = np.take_along_axis(b[rows], src, axis=1)
        wide[rows] = np.where(j == col[:, None], 69, shifted)
        b = wide
    bad = np.flatnonzero(~good & ~blank)
    if bad.size:
        i = int(bad[0])
        if i:  # a field before it may fail the conversion: that one is named
            _floats_chunk(text, pos[:i], width[:i], max_width)
        raise FieldError(i, text.text(int(pos[i]), int(width[i])).strip(), "a real number")
    fast, val = _fast_reals(b)
    out[fast] = val[fast]
    sel = np.flatnonzero(~blank & ~fast)
    if not sel.size:
        return out, blank
    strings = np.ascontiguousarray(b[sel]).view(f"S{b.shape[1]}").ravel()
    try:
        out[sel] = strings.astype(np.float64)
    except ValueError:
        for k, i in enumerate(sel):           # locate the offender (error path only)
            try:
                out[i] = float(strings[k])
            except ValueError:
                s = text.text(int(pos[i]), int(width[i]))
                try:
                    out[i] = nastran_real(s)
                except (ValueError, TypeError):
                    raise FieldError(int(i), s.strip(), "a real number") from None
    return out, blank
