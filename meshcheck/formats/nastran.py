"""Nastran bulk data (``.bdf``, ``.nas``, ``.dat``, ``.fem``): a vectorised reader.

Card layout (the Nastran "bulk data entry" conventions, as documented in the
MSC and NX Nastran Quick Reference Guides):

* small field: 10 fields of 8 columns; field 1 the card name, 2-9 data,
  10 the continuation marker (ignored here);
* large field: name with ``*``; 4 data fields of 16 columns per line;
  a continuation line starting with ``*`` is large field too;
* free field: fields separated by commas (8 data fields per line, 4 after a
  ``NAME*`` name); a field may be empty;
* a line whose column 1 is blank, ``+``, ``*`` or ``,`` continues the card
  above it; ``$`` starts a comment; names are case-insensitive; tabs jump
  to the next 8-column stop; text after ENDDATA and before BEGIN BULK
  (executive and case control) is not bulk data.

The hot path never loops over cards in Python: the text is held once as
bytes, line starts come from one ``np.flatnonzero``, card names are read as
one uint64 per line, cards are grouped by name and line layout, and the
fields of a whole group are converted at once (:mod:`.textscan`).

Geometry: GRID points given in a CORD2R/CORD2C/CORD2S system (field CP, or
the GRDSET default) are transformed to the basic system; CORD1* and other
systems are refused when a GRID uses them.  Elements: CTETRA (4/10),
CHEXA (8/20), CPENTA (6/15), CPYRAM (5), CTRIA3/CTRIA6/CQUAD4/CQUAD8; the
property number (PID) is the region tag; PSOLID -> MAT10 gives a speed of
sound per region (C, or sqrt(BULK/RHO)).  Mid-side node orders are permuted
to the meshio/VTK order.  The non-standard names meshio's writer uses
(CTETRA_, CHEXA_, CPENTA_ for quadratic cells, CPYRA) are read as the
standard cards.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import MeshReadError
from ..threads import thread_map
from .includes import Source, load_text
from .raw import RawBlock, RawMesh, SpeedHint, clean_name
from .ids import distinct, first_duplicate, index_of
from .textscan import (CHUNK, CHUNK_COMPILED, ByteText, FieldError, compiled_rows, int_rows,
                       real_rows)

__all__ = ["read_nastran", "load_nastran", "parse_nastran", "ELEMENT_CARDS", "find_includes"]

FORMAT = "Nastran bulk data"


def _code(name: str) -> int:
    return int.from_bytes(name.encode().ljust(8), "little")


def _decode(code: int) -> str:
    return int(code).to_bytes(8, "little").decode("latin-1").strip()


@dataclass(frozen=True)
class _Element:
    """One element card: allowed node counts -> (meshio type, Nastran-to-VTK permutation)."""

    shapes: dict
    max_nodes: int


def _perm(n):
    return np.arange(n)


#: Nastran node order = VTK order except the mid-side nodes of CHEXA20 (vertical
#: edges G13-G16 come before the top edges G17-G20) and CPENTA15 (G10-G12 vertical).
ELEMENT_CARDS: dict[str, _Element] = {
    "CTETRA": _Element({4: ("tetra", _perm(4)), 10: ("tetra10", _perm(10))}, 10),
    "CHEXA": _Element({8: ("hexahedron", _perm(8)),
                       20: ("hexahedron20", np.r_[0:8, 8:12, 16:20, 12:16])}, 20),
    "CPENTA": _Element({6: ("wedge", _perm(6)),
                        15: ("wedge15", np.r_[0:6, 6:9, 12:15, 9:12])}, 15),
    "CPYRAM": _Element({5: ("pyramid", _perm(5))}, 13),
    "CTRIA3": _Element({3: ("triangle", _perm(3))}, 3),
    "CTRIA6": _Element({6: ("triangle6", _perm(6))}, 6),
    "CQUAD4": _Element({4: ("quad", _perm(4))}, 4),
    "CQUAD8": _Element({8: ("quad8", _perm(8))}, 8),
}
#: names meshio's Nastran writer uses instead of the standard cards (same node orders)
ALIASES = {"CTETRA_": "CTETRA", "CHEXA_": "CHEXA", "CPENTA_": "CPENTA", "CPYRA": "CPYRAM"}
#: element cards that would be volumes of the model but are not supported
_UNSUPPORTED_VOLUME = {"CHACAB", "CHACBR", "CIFHEX", "CIFPENT", "CTETRAFD", "CHEXAFD",
                       "CPENTAFD", "CHEXA1", "CHEXA2", "CFLUID2", "CFLUID3", "CFLUID4",
                       "CAXIF2", "CAXIF3", "CAXIF4", "CSLOT3", "CSLOT4", "CTRIAX6", "CTRIAX",
                       "CQUADX"}
_CORD2 = {"CORD2R": "R", "CORD2C": "C", "CORD2S": "S"}
_CORD_OTHER = {"CORD1R", "CORD1C", "CORD1S", "CORD3G", "CORD3R", "CORD2RX", "CORD1RX"}


# ---- include statements ---------------------------------------------------
def find_includes(text: bytes) -> list[tuple[int, int, str, int]]:
    """Byte spans of INCLUDE statements (any of INCLUDE/include/Include at a line start)."""
    out = []
    for pat in (b"NCLUDE", b"nclude"):
        k = text.find(pat)
        while k >= 0:
            if k >= 1 and text[k - 1] in b"Ii" and (k == 1 or text[k - 2] == 10):
                out.append(k - 1)
            k = text.find(pat, k + 1)
    res = []
    for k in sorted(out):
        eol = text.find(b"\n", k)
        eol = len(text) if eol < 0 else eol
        rest = text[k + 7:eol].split(b"$")[0].strip()
        end = eol + 1
        if rest.startswith((b"'", b'"')):
            q = rest[:1]
            body = rest[1:]
            parts = []
            while q not in body:
                parts.append(body.strip())
                if end >= len(text):
                    body = b""
                    break
                nxt = text.find(b"\n", end)
                nxt = len(text) if nxt < 0 else nxt
                body = text[end:nxt]
                end = nxt + 1
            parts.append(body.split(q)[0].strip())
            name = b"".join(parts)
        else:
            name = rest
        line = text.count(b"\n", 0, k) + 1
        res.append((k, min(end, len(text)), name.decode("utf-8", errors="replace"), line))
    return res


def load_nastran(path: Path, allow_outside: bool = False) -> Source:
    """The bulk data text of ``path`` with its INCLUDE files spliced in."""
    return load_text(path, find_includes, allow_outside, expand_tabs=True, what="INCLUDE")


def read_nastran(path: Path, allow_outside: bool = False) -> RawMesh:
    """Read a Nastran bulk data file (points in the file's unit).

    The file is first taken as it is; only when it holds tabs, CR line ends,
    a byte-order mark or INCLUDE statements is it normalised and merged
    (:func:`load_nastran`), which costs extra passes over the text.
    """
    data = path.read_bytes()
    if not data.startswith((b"\xef\xbb\xbf", b"\xff\xfe", b"\xfe\xff")):
        cards = _Cards(Source(data, ((0, path, 1),), (path,)))
        if not (cards.needs_normalising or cards.has_include):
            return _parse(cards)
    return parse_nastran(load_nastran(path, allow_outside))


# ---- the line table ---------------------------------------------------------
def _positions(data: bytes, a: np.ndarray, ch: bytes) -> np.ndarray:
    """Sorted positions of one byte: memchr (``bytes.find``) while it is rare, numpy after."""
    out, k = [], data.find(ch)
    while k >= 0 and len(out) < 1000:
        out.append(k)
        k = data.find(ch, k + 1)
    if k < 0:
        return np.array(out, dtype=np.int64)
    rest = np.flatnonzero(a[k:] == ch[0]) + k
    return np.concatenate([np.array(out, dtype=np.int64), rest])


def _stride(s: np.ndarray) -> int:
    """The constant distance between line starts ``s`` (0 if they are not evenly spaced)."""
    if len(s) < 2:
        return 0
    d = int(s[1] - s[0])
    if d <= 0 or int(s[-1] - s[0]) != d * (len(s) - 1):
        return 0
    return d if (np.diff(s) == d).all() else 0


def _line_table(text: ByteText):
    """(starts, ends) of the lines (ends at the newlines): the compiled scan
    (:func:`meshcheck.kernels.text.lines`).  Its arrays are views of buffers sized for
    lines of 24 bytes on average (pages never written cost no memory), or for the
    exact count when the lines are shorter."""
    from ..kernels import text as kx

    cap = text.n // 24 + 16
    for _ in range(2):
        starts, ends = np.empty(cap, np.int64), np.empty(cap, np.int64)
        m = kx.lines(text.u8, starts, ends)
        if m >= 0:
            return starts[:m], ends[:m]
        cap = text.data.count(b"\n") + 1
    raise AssertionError("line table: more lines than newlines")


class _Lines:
    """Per-line arrays of the merged text (all (n_lines,) int64 unless noted; a line's
    length is ends - starts).

    One pass finds every byte that matters for the layout: line ends (and
    tab, CR, which call for normalising the text first), ``$`` and ``,``.
    """

    def __init__(self, text: ByteText):
        a = text.u8[:text.n]
        if text.compiled:  # the scan (which releases the GIL) beside the byte searches
            def searches():
                return (text.data.find(b"\t") >= 0, text.data.find(b"\r") >= 0,
                        _positions(text.data, a, b"$"), _positions(text.data, a, b","))

            (starts, ends), (self.has_tab, self.has_cr, dol, com) = thread_map(
                lambda f: f(), [lambda: _line_table(text), searches])
        else:
            nl = np.flatnonzero(a == 10)
            starts = np.concatenate(([0], nl + 1)).astype(np.int64)
            ends = np.concatenate((nl, [text.n])).astype(np.int64)
            if starts[-1] >= text.n:
                starts, ends = starts[:-1], ends[:-1]
            self.has_tab = text.data.find(b"\t") >= 0
            self.has_cr = text.data.find(b"\r") >= 0
            dol = _positions(text.data, a, b"$")
            com = _positions(text.data, a, b",")
        if dol.size:
            li = np.searchsorted(starts, dol, side="right") - 1
            np.minimum.at(ends, li, dol)
        if com.size:
            cl = np.searchsorted(starts, com, side="right") - 1
            keep = com < ends[cl]
            com, cl = com[keep], cl[keep]
            ccount = np.bincount(cl, minlength=len(starts)).astype(np.int64)
        else:  # no free fields: zeros that take no memory
            ccount = np.broadcast_to(np.int64(0), starts.shape)
        self.starts, self.ends, self.commas, self.ccount = starts, ends, com, ccount
        self.data = text.data
        self.cstart = (np.concatenate(([0], np.cumsum(ccount)[:-1])).astype(np.int64)
                       if com.size else ccount)
        self.free = ccount > 0 if com.size else np.broadcast_to(False, starts.shape)


def _names(text: ByteText, L: _Lines, length: np.ndarray):
    """Per line: uint64 upper-case name padded with spaces, large-field flag, mixed-case
    flag, first byte; ``L.head`` the raw first bytes (length: ends - starts)."""
    if len(L.commas):
        first_comma = np.where(L.free, L.commas[np.minimum(L.cstart, len(L.commas) - 1)], L.ends)
    else:
        first_comma = L.ends
    width = np.minimum(np.minimum(length, first_comma - L.starts), 8)
    if text.compiled:
        from ..kernels import text as kx

        n = len(width)
        L.head, x = np.empty(n, np.uint64), np.empty(n, np.uint64)
        large, mixed, first = np.empty(n, bool), np.empty(n, bool), np.empty(n, np.uint8)
        kx.heads(text.u8, L.starts, width, L.head, x, large, mixed, first)
        return x, large, mixed, first
    x = text.load(L.starts, width)
    L.head = x                                        # raw first bytes, for the pre-scan
    first = (x & np.uint64(0xFF)).astype(np.uint8)     # first byte (space on empty lines)
    # SWAR byte classes: lower-case letters become upper case, '*' (large field) a space
    u = np.uint64
    lw = x & u(0x7F7F7F7F7F7F7F7F)
    hi = x & u(0x8080808080808080)
    lower = ((lw + u(0x1F1F1F1F1F1F1F1F)) & ~(lw + u(0x0505050505050505)) & ~hi
             & u(0x8080808080808080))
    if lower.any():
        upper = ((lw + u(0x3F3F3F3F3F3F3F3F)) & ~(lw + u(0x2525252525252525)) & ~hi
                 & u(0x8080808080808080))
        mixed = (lower != 0) & (upper != 0)
        x = x - (lower >> u(2))
    else:
        mixed = np.zeros(len(x), bool)
    sx = x ^ u(0x2A2A2A2A2A2A2A2A)
    star = ~(((sx & u(0x7F7F7F7F7F7F7F7F)) + u(0x7F7F7F7F7F7F7F7F)) | sx) & u(0x8080808080808080)
    large = star != 0
    if large.any():
        x = x ^ ((star >> u(7)) * u(0x0A))
    return x, large, mixed, first


_CONT = np.zeros(256, dtype=bool)
_CONT[[ord(" "), ord("+"), ord("*"), ord(",")]] = True


# ---- fields of a group of cards with one layout ----------------------------
def _slots(L: _Lines, lines: np.ndarray, kinds: list[int], src: Source, n_fields: int,
           words: bool = True):
    """Byte position and width of the first data fields of cards laid out alike.

    lines : (nc, n_lines_per_card) line indices; kinds : per line 0 small,
    1 large, 2 free small, 3 free large.  Returns a list of (pos, width)
    pairs of (nc,) int64 arrays, one per field, at most ``n_fields``; trailing
    fields that no card reaches are left out (they are blank).  With ``words``,
    small fields of evenly spaced lines come as (pos, width, words), the fields'
    8 bytes loaded by one strided copy (for the numpy parsers).
    """
    out = []
    for j, kind in enumerate(kinds):
        need = n_fields - len(out)
        if need <= 0:
            break
        ln = lines[:, j]
        s, e = L.starts[ln], L.ends[ln]
        large = kind & 1
        nf, fw = (4, 16) if large else (8, 8)
        fields = []
        if kind < 2:
            lim = np.minimum(e, s + 72)
            reach = min(need, nf, max(0, -(-(int((lim - s).max(initial=0)) - 8) // fw)))
            room = int((lim - s).min()) if len(s) else 0
            stride = _stride(s) if words and fw == 8 and reach and room >= 8 + fw * reach else 0
            for k in range(reach):
                pos = s + (8 + fw * k)
                if stride:                              # lines evenly spaced: strided view
                    pre = np.ndarray((len(s),), dtype="<u8", buffer=L.data, offset=int(pos[0]),
                                     strides=(stride,)).copy()
                    fields.append((pos, fw, pre))
                elif room >= 8 + fw * (k + 1):
                    fields.append((pos, fw))            # every field complete: one width
                else:
                    fields.append((pos, np.clip(lim - pos, 0, fw)))
        else:
            c = L.ccount[ln]
            cmax = int(c.max(initial=0))
            if cmax > nf + 1:
                r = int(np.argmax(c))
                raise MeshReadError(f"{src.where(int(s[r]))}: free-field line with {int(c[r]) + 1} "
                                    f"fields (at most {nf + 2}: name, {nf} data, continuation); "
                                    "split it with continuation lines")
            cs = L.cstart[ln]
            last = max(len(L.commas) - 1, 0)
            for k in range(min(need, nf, cmax)):
                exists = c >= k + 1
                pos = np.where(exists, L.commas[np.minimum(cs + k, last)] + 1, 0)
                nxt = np.where(c >= k + 2, L.commas[np.minimum(cs + k + 1, last)], e)
                fields.append((pos, np.where(exists, nxt - pos, 0)))
        blank = (np.zeros(len(ln), np.int64), np.zeros(len(ln), np.int64))
        fields += [blank] * (min(need, nf) - len(fields))
        out.extend(fields)
    # drop trailing fields that are blank everywhere
    while out and not np.any(out[-1][1]):
        out.pop()
    return out


class _Fixed:
    """Data fields ``first`` .. ``first + count - 1`` of single-line small field (fw 8)
    or large field (fw 16) cards, the lines ``lines`` of the line table L, as
    :func:`_slots` lays them out (from column 9, fw wide, cut at the line's end and at
    column 72), for the compiled parsers, which locate the fields themselves (no
    position arrays).  Sliced, padded with blank fields (``+``) and iterated (as
    (pos, width) pairs) like the list :func:`_slots` returns."""

    def __init__(self, L: _Lines, lines: np.ndarray, fw: int, first: int, count: int):
        self.L, self.lines, self.fw, self.first, self.count = L, lines, fw, first, count

    def __len__(self):
        return self.count

    def __getitem__(self, sl: slice):
        start, stop, step = sl.indices(self.count)
        assert step == 1
        return _Fixed(self.L, self.lines, self.fw, self.first + start, max(stop - start, 0))

    def __add__(self, blanks: list):
        # fields past a line's end read as blank: padding is more fields
        return _Fixed(self.L, self.lines, self.fw, self.first, self.count + len(blanks))

    def _where(self, k: int, rows):
        ln = self.lines[rows]
        s = self.L.starts[ln]
        pos = s + (8 + self.fw * (self.first + k))
        return pos, np.clip(np.minimum(self.L.ends[ln], s + 72) - pos, 0, self.fw)

    def __iter__(self):
        return iter([self._where(k, slice(None)) for k in range(self.count)])

    def rows(self, text: ByteText, kind: str):
        """(count, n) values and blank flags (kind "uints" or "reals"), see
        :func:`.textscan.compiled_rows`."""
        from ..kernels import text as kx

        L, ln, fw, f0 = self.L, self.lines, self.fw, self.first

        def run(real, ival, fval, status, lo, hi):
            return kx.fixed_fields(text.u8, L.starts, L.ends, ln, fw, f0, real, kx.P10, ival,
                                   fval, status, lo, hi)

        return compiled_rows(text, (self.count, len(ln)), kind, run, self._where)


class _Cards:
    """Cards of the bulk section grouped by name and layout."""

    def __init__(self, src: Source):
        self.src = src
        self.text = text = ByteText(src.data)
        L = self.L = _Lines(text)
        length = L.ends - L.starts
        names, large, mixed, first_byte = _names(text, L, length)
        self.needs_normalising = L.has_tab or L.has_cr
        first = first_byte
        initial = first & np.uint8(0xDF)             # first letters in upper case

        def named(word: str, n_chars: int) -> np.ndarray:
            """Lines whose name starts with the first n_chars of ``word`` (the candidates
            by their first letter: no pass over all the names)."""
            cand = np.flatnonzero(initial == ord(word[0]))
            mask = np.uint64((1 << (8 * n_chars)) - 1)
            return cand[(names[cand] & mask) == (np.uint64(_code(word)) & mask)]

        self.has_include = bool(named("INCLUDE", 7).size)
        cont = _CONT[first]
        blank = length == 0
        cand = np.flatnonzero(~blank & (first == 32))
        if cand.size:
            ln = np.minimum(length[cand], 80)
            words = text.load_wide(L.starts[cand], ln, 10)
            blank[cand] = (words == np.uint64(0x2020202020202020)).all(axis=1)
        begin = named("BEGIN", 5)                   # (blank lines start with a space)
        lo = 0
        if begin.size:
            lo = int(begin[0]) + 1
            if begin.size > 1:
                raise MeshReadError(f"{src.where(int(L.starts[begin[1]]))}: a second BEGIN "
                                    "(part superelements) is not supported; export the "
                                    "assembled model as one bulk data section")
        else:
            cend = named("CEND    ", 8)
            if cend.size:
                raise MeshReadError(f"{src.where(int(L.starts[cend[0]]))}: case control (CEND) "
                                    "but no BEGIN BULK line; add BEGIN BULK before the bulk data")
        end = named("ENDDATA ", 8)
        end = end[end >= lo]
        hi = int(end[0]) if end.size else len(names)
        self.bulk_span = (int(L.starts[lo]) if lo < len(names) else text.n,
                          int(L.starts[hi]) if hi < len(names) else text.n)
        if not blank[lo:hi].any():                # common: no blank line, use slices
            li = np.arange(lo, hi)
            sub = slice(lo, hi)
        else:
            active = ~blank
            active[:lo] = False
            active[hi:] = False
            li = np.flatnonzero(active)
            sub = li
        is_start = ~cont[sub]
        if li.size and not is_start[0]:
            raise MeshReadError(f"{src.where(int(L.starts[li[0]]))}: continuation line without "
                                "a card before it; check the first bulk data lines")
        kind = np.where(is_start, large[sub], first[sub] == 42).astype(np.int64)
        if L.free.any():
            kind += 2 * L.free[sub]
        if is_start.all():                          # common: no continuation lines
            self.line = li
            first_idx = None                          # card k starts at li[k]
            key = (kind << 4) + 1
            per_card = sub                            # a card's first line: li itself
        else:
            self.line = li[is_start]                  # first line of each card
            card_of = np.cumsum(is_start) - 1
            first_idx = np.flatnonzero(is_start)
            n_lines = np.diff(np.append(first_idx, len(li)))
            rel = np.arange(len(li)) - first_idx[card_of]
            contrib = kind << (4 + 2 * np.minimum(rel, 27))
            key = np.add.reduceat(contrib, first_idx) if li.size else np.zeros(0, np.int64)
            key = key + np.minimum(n_lines, 15)
            key[n_lines > 28] = -1
            per_card = self.line
        self.key = key
        self.li = li
        self.first_idx = first_idx
        self.name = names[per_card]
        # distinct names from runs (cards of one kind usually come together)
        if len(self.name):
            change = np.flatnonzero(self.name[1:] != self.name[:-1]) + 1
            runs = self.name[np.concatenate(([0], change))]
            self.distinct = sorted(set(runs.tolist()))
        else:
            self.distinct = []
        self._distinct_set = set(self.distinct)
        self._selected: dict = {}
        self.mixed = mixed[per_card]                        # name in mixed case
        fl = first[per_card]
        self.has_lower = bool(((fl >= 97) & (fl <= 122)).any())
        self.bulk_lines = (lo, hi)
        # the pre-scan's counts of the cards read below, from the raw first bytes, which
        # are then let go (independent of the grouping above: reading.py compares them)
        from .prescan import nastran_counts
        read = [k for k in ("GRID", *ELEMENT_CARDS, *ALIASES) if _code(k) in self._distinct_set]
        self.prescan = nastran_counts(L.head[lo:hi], read, self.has_lower)
        L.head = None

    def _first(self, cards: np.ndarray) -> np.ndarray:
        """Index in ``li`` of the first line of each card."""
        return cards if self.first_idx is None else self.first_idx[cards]

    def select(self, name: str) -> np.ndarray:
        """Indices of the cards named ``name`` (read-only; found once per name)."""
        code = _code(name)
        if code not in self._distinct_set:
            return np.zeros(0, np.int64)
        got = self._selected.get(code)
        if got is None:
            got = self._selected[code] = np.flatnonzero(self.name == np.uint64(code))
            got.flags.writeable = False
        return got

    def where(self, card: int) -> str:
        return self.src.where(int(self.L.starts[self.line[card]]))

    def fields(self, cards: np.ndarray, n_fields: int):
        """Yield (cards subset, [(pos, width), ...] per field) grouped by layout, in chunks.

        At most ``n_fields`` fields; fields that are missing are blank.
        """
        keys = self.key[cards]
        if (keys < 0).any():
            bad = cards[np.flatnonzero(keys < 0)[0]]
            raise MeshReadError(f"{self.where(bad)}: card with more than 28 continuation "
                                "lines; this reader does not take it")
        uk = np.unique(keys) if len(keys) and keys.min() != keys.max() else keys[:1]
        for k in uk:
            sub = cards[keys == k] if len(uk) > 1 else cards
            nlines = int(k & 15)
            kinds = [int((k >> (4 + 2 * j)) & 3) for j in range(nlines)]
            step = CHUNK_COMPILED if self.text.compiled else CHUNK
            if self.text.compiled and nlines == 1 and kinds[0] < 2:
                # single-line small or large field cards: the compiled parsers locate
                # the fields themselves
                fw, nf = (16, 4) if kinds[0] else (8, 8)
                for c0 in range(0, len(sub), step):
                    part = sub[c0:c0 + step]
                    ln = self.li[self._first(part)]
                    longest = min(int((self.L.ends[ln] - self.L.starts[ln]).max(initial=0)), 72)
                    yield part, _Fixed(self.L, ln, fw, 0,
                                       min(n_fields, nf, max(0, -(-(longest - 8) // fw))))
                continue
            for c0 in range(0, len(sub), step):
                part = sub[c0:c0 + step]
                first = self._first(part)
                lines = self.li[first[:, None] + np.arange(nlines)[None, :]] if nlines > 1 \
                    else self.li[first][:, None]
                yield part, _slots(self.L, lines, kinds, self.src, n_fields,
                                   words=not self.text.compiled)

    def ints(self, cols, cards, label, first_field: int = 0):
        """(F, n) values and blank flags of integer fields ``cols`` [(pos, width), ...]."""
        return self._values("uints", cols, cards, label, first_field)

    def floats(self, cols, cards, label, first_field: int = 0):
        """(F, n) values and blank flags of real fields ``cols`` [(pos, width), ...]."""
        return self._values("reals", cols, cards, label, first_field)

    def _values(self, kind, cols, cards, label, first_field):
        try:
            if isinstance(cols, _Fixed):
                return cols.rows(self.text, kind)
            return (int_rows if kind == "uints" else real_rows)(self.text, cols)
        except FieldError as exc:
            what = "an integer" if kind == "uints" else "a real number"
            raise MeshReadError(f"{self.where(cards[exc.index])}: {label} field "
                                f"{first_field + exc.row + 2} is '{exc.text[:24]}', not "
                                f"{what}; fix the card") from None

    def small_table(self, name: str, n_fields: int):
        """Rows of a rare card as Python lists of stripped strings (slow path)."""
        out = []
        cards = self.select(name)
        for part, cols in self.fields(cards, n_fields):
            for r, c in enumerate(part):
                row = [self.text.text(int(p[r]), int(np.broadcast_to(w, p.shape)[r])).strip()
                       for p, w, *_ in cols]
                out.append((int(c), row + [""] * (n_fields - len(row))))
        out.sort()
        return out


def _cat(parts: list) -> np.ndarray:
    """np.concatenate(parts), without a copy when there is one part."""
    return parts[0] if len(parts) == 1 else np.concatenate(parts)


def _fname(base: str):
    return lambda k: f"{k + 2} ({base})" if base else f"{k + 2}"


def _num(s: str, kind, where: str, what: str):
    from .textscan import _py_int, nastran_real
    try:
        v = _py_int(s) if kind is int else nastran_real(s)
    except ValueError:
        raise MeshReadError(f"{where}: {what} is '{s[:24]}', not a number; fix the card") from None
    return v


# ---- coordinate systems -----------------------------------------------------
def _frames(C: _Cards):
    """cid -> (kind 'R'/'C'/'S', origin (3,), rotation (3, 3) columns = axes, where)."""
    defs = {}
    for name, kind in _CORD2.items():
        for card, f in C.small_table(name, 11):
            where = C.where(card)
            cid = _num(f[0], int, where, f"{name} CID")
            rid = _num(f[1], int, where, f"{name} RID") or 0
            vals = [_num(x, float, where, f"{name} A/B/C") or 0.0 for x in f[2:11]]
            if cid is None or cid <= 0:
                raise MeshReadError(f"{where}: {name} with coordinate system id {cid}; "
                                    "the id must be a positive integer")
            if cid in defs:
                raise MeshReadError(f"{where}: coordinate system {cid} defined twice; "
                                    "keep one definition")
            defs[cid] = (kind, rid, np.array(vals, dtype=float).reshape(3, 3), where, name)
    others = {}
    for name in _CORD_OTHER:
        for card, f in C.small_table(name, 1):
            try:
                others[int(f[0])] = (name, C.where(card))
            except ValueError:
                pass
    resolved: dict[int, tuple] = {0: ("R", np.zeros(3), np.eye(3), "basic")}

    def resolve(cid, chain=()):
        if cid in resolved:
            return resolved[cid]
        if cid in chain:
            loop = " -> ".join(map(str, chain))
            raise MeshReadError(f"{defs[cid][3]}: coordinate systems {loop} "
                                f"-> {cid} refer to each other in a cycle; fix the RID fields")
        if cid not in defs:
            return None
        kind, rid, abc, where, name = defs[cid]
        ref = resolve(rid, (*chain, cid))
        if ref is None:
            what = (f"a {others[rid][0]} card" if rid in others else "no card")
            raise MeshReadError(f"{where}: {name} {cid} refers to coordinate system {rid}, "
                                f"defined by {what}; define it with CORD2R/C/S")
        pts = to_basic(ref, abc)
        a, b, c = pts
        ez = b - a
        if np.linalg.norm(ez) == 0:
            raise MeshReadError(f"{where}: {name} {cid} has A = B; the z axis is undefined")
        ez = ez / np.linalg.norm(ez)
        ey = np.cross(ez, c - a)
        if np.linalg.norm(ey) < 1e-12 * max(np.linalg.norm(c - a), 1e-300):
            raise MeshReadError(f"{where}: {name} {cid} has C on the z axis; the x-z plane "
                                "is undefined")
        ey = ey / np.linalg.norm(ey)
        ex = np.cross(ey, ez)
        resolved[cid] = (kind, a, np.column_stack([ex, ey, ez]), where)
        return resolved[cid]

    return resolve, others


def to_basic(frame, local: np.ndarray) -> np.ndarray:
    """(n, 3) basic coordinates of points given in ``frame`` (angles in degrees)."""
    kind, origin, rot = frame[0], frame[1], frame[2]
    x = np.asarray(local, dtype=float)
    if kind == "C":
        r, t = x[:, 0], np.radians(x[:, 1])
        x = np.column_stack([r * np.cos(t), r * np.sin(t), x[:, 2]])
    elif kind == "S":
        r, t, p = x[:, 0], np.radians(x[:, 1]), np.radians(x[:, 2])
        x = np.column_stack([r * np.sin(t) * np.cos(p), r * np.sin(t) * np.sin(p),
                             r * np.cos(t)])
    return origin + x @ rot.T


# ---- the reader ---------------------------------------------------------------
def _is_identity(perm: np.ndarray) -> bool:
    return bool((perm == np.arange(len(perm))).all())


def _missing(C: "_Cards", card: int, look) -> str:
    """Words naming the undefined GRID numbers of one element card (error path)."""
    for _, cols in C.fields(np.array([card]), 2 + 20):
        vals = [C.text.text(int(p[0]), int(np.broadcast_to(w, p.shape)[0])).strip()
                for p, w, *_ in cols[2:]]
        bad = [x for x in vals if x and look(np.array([int(x)]))[0] < 0]
        return "GRID " + ", ".join(bad[:4])
    return "?"


def parse_nastran(src: Source) -> RawMesh:
    """Turn merged bulk data text into a :class:`RawMesh` (points in file units)."""
    C = _Cards(src)
    if C.needs_normalising:
        raise MeshReadError(f"{src.where(0)}: text with tabs or CR line ends must be normalised "
                            "first (use load_nastran)")
    return _parse(C)


def _parse(C: "_Cards") -> RawMesh:
    names = {_decode(c): c for c in C.distinct}
    for nm in names:
        if nm.startswith("INCLUDE"):
            card = C.select(nm)[0]
            raise MeshReadError(f"{C.where(card)}: INCLUDE statement not understood; write it "
                                "as INCLUDE 'file.bdf' at the start of a line")
        if nm in _UNSUPPORTED_VOLUME:
            card = C.select(nm)[0]
            raise MeshReadError(f"{C.where(card)}: element card {nm} is not supported; export "
                                "the fluid volume with CTETRA, CHEXA, CPENTA or CPYRAM elements")
        if not (nm.replace("_", "").isalnum() and nm.isascii() and nm[:1].isalpha()):
            card = C.select(nm)[0]
            raise MeshReadError(f"{C.where(card)}: '{clean_name(nm)}' is not a card name (stray "
                                "characters at the start of the line?); fix or remove the line")
        near = [k for k in (*ELEMENT_CARDS, "GRID") if nm.startswith(k) and nm != k
                and nm not in ALIASES]
        if near:
            card = C.select(nm)[0]
            raise MeshReadError(f"{C.where(card)}: card {clean_name(nm)} is neither {near[0]} nor "
                                f"any card this reader knows (a damaged {near[0]} card?); fix "
                                "the card name")
    counts = {}

    # GRDSET default CP
    default_cp = 0
    grdset = C.small_table("GRDSET", 8)
    if grdset:
        card, f = grdset[0]
        default_cp = _num(f[1], int, C.where(card), "GRDSET CP") or 0

    # GRID points
    gcards = C.select("GRID")
    counts["GRID"] = len(gcards)
    ids_l, cp_l, xyz_l, card_l = [], [], [], []
    for part, cols in C.fields(gcards, 5):
        cols = cols + [(np.zeros(len(part), np.int64), np.zeros(len(part), np.int64))] * \
            (5 - len(cols))
        iv, ib = C.ints(cols[:2], part, "GRID")
        xv, _ = C.floats(cols[2:5], part, "GRID", first_field=2)
        if ib[0].any() or (iv[0] <= 0).any():
            bad = part[np.flatnonzero(ib[0] | (iv[0] <= 0))[0]]
            raise MeshReadError(f"{C.where(bad)}: GRID without a positive point number; "
                                "fix the card")
        cp = np.where(ib[1], default_cp, iv[1])
        ids_l.append(iv[0])
        cp_l.append(cp)
        xyz_l.append(xv.T)
        card_l.append(part)
    if ids_l:
        gcard = _cat(card_l)
        gids = _cat(ids_l)
        cps = _cat(cp_l)
        points = _cat(xyz_l)
        if len(gcard) > 1 and not (np.diff(gcard) > 0).all():   # layouts interleaved
            order = np.argsort(gcard, kind="stable")
            gids, cps, points, gcard = gids[order], cps[order], points[order], gcard[order]
    else:
        gids = np.zeros(0, np.int64)
        cps = np.zeros(0, np.int64)
        points = np.zeros((0, 3))
        gcard = np.zeros(0, np.int64)
    dup = first_duplicate(gids)
    if dup is not None:
        raise MeshReadError(f"{C.where(gcard[dup[1]])}: GRID {int(gids[dup[1]])} is defined "
                            f"twice (first at {C.where(gcard[dup[0]])}); renumber the points")
    if cps.size and (cps != 0).any():
        resolve, others = _frames(C)
        points = points.copy()
        for cid in np.unique(cps[cps != 0]).tolist():
            rows = np.flatnonzero(cps == cid)
            frame = resolve(int(cid)) if cid > 0 else None
            if frame is None:
                what = (f"is a {others[cid][0]} system, which this reader does not transform"
                        if cid in others else "is not defined by any CORD2R/CORD2C/CORD2S card")
                raise MeshReadError(f"{C.where(gcard[rows[0]])}: GRID {int(gids[rows[0]])} has "
                                    f"CP = {cid}, which {what}; export the points in the "
                                    "basic system or define the system with CORD2R/C/S")
            points[rows] = to_basic(frame, points[rows])
    look = index_of(gids)

    # elements
    blocks, eids_all, ecards_all = [], [], []
    for nm, spec in [*ELEMENT_CARDS.items(), *((a, ELEMENT_CARDS[t]) for a, t in ALIASES.items())]:
        cards = C.select(nm)
        counts[nm] = len(cards)
        if not cards.size:
            continue
        nf = 2 + spec.max_nodes
        per_type: dict[str, list] = {}
        for part, cols in C.fields(cards, nf):
            if len(cols) < 2:
                cols = cols + [(np.zeros(len(part), np.int64),) * 2] * (2 - len(cols))
            v, b = C.ints(cols, part, nm)
            if b[0].any() or (v[0] <= 0).any():
                bad = part[np.flatnonzero(b[0] | (v[0] <= 0))[0]]
                raise MeshReadError(f"{C.where(bad)}: {nm} without a positive element number; "
                                    "fix the card")
            npres = b.shape[0] - 2
            if npres in spec.shapes and not b[2:].any():
                # every card of the chunk lists exactly npres nodes (the common case)
                ctype, perm = spec.shapes[npres]
                nodes = v[2:2 + npres] if _is_identity(perm) else v[2:2 + npres][perm]
                # the rows copied, not viewed: the chunk's (F, n) values can go
                per_type.setdefault(ctype, []).append((look(nodes.T), v[1].copy(),
                                                       v[0].copy(), part))
                continue
            present = ~b[2:]
            cnt = present.sum(axis=0)
            matched = np.zeros(len(part), dtype=bool)
            for nn, (ctype, perm) in spec.shapes.items():
                if nn > present.shape[0]:
                    continue
                m = cnt == nn
                if not m.any():
                    continue
                for j in range(nn):
                    m &= present[j]
                matched |= m
                rows = np.flatnonzero(m)
                nodes = v[2:2 + nn][perm][:, rows].T
                idx = look(nodes)
                per_type.setdefault(ctype, []).append((idx, v[1, rows], v[0, rows], part[rows]))
            if not matched.all():
                r = np.flatnonzero(~matched)[0]
                got = int(cnt[r])
                allowed = " or ".join(str(k) for k in spec.shapes)
                raise MeshReadError(f"{C.where(part[r])}: {nm} {int(v[0, r])} has {got} node "
                                    f"numbers where {allowed} are expected (missing or partial "
                                    "mid-side nodes?); export complete elements")
        for ctype, items in per_type.items():
            idx = _cat([i[0] for i in items])
            pid = _cat([i[1] for i in items])
            eid = _cat([i[2] for i in items])
            ecard = _cat([i[3] for i in items])
            if idx.min(initial=0) < 0:
                r = int(np.argwhere(idx < 0)[0, 0])
                raise MeshReadError(f"{C.where(ecard[r])}: {nm} {int(eid[r])} refers to a GRID "
                                    f"that is not defined ({_missing(C, ecard[r], look)}); "
                                    "export the mesh with all its points")
            blocks.append(RawBlock(ctype, idx, pid, eid))
            eids_all.append(eid)
            ecards_all.append(ecard)
    if eids_all:
        eids = _cat(eids_all)
        dup = first_duplicate(eids)
        if dup is not None:
            ecards = _cat(ecards_all)
            raise MeshReadError(f"{C.where(ecards[dup[1]])}: element number {int(eids[dup[1]])} "
                                f"is used twice (first at {C.where(ecards[dup[0]])}); "
                                "renumber the elements")

    # properties and materials (speed of sound), region names
    pids = sorted({int(t) for b in blocks for t in distinct(b.region)})
    region_names = {p: f"PID {p}" for p in pids if p != 0}
    psolid = {}
    for card, f in C.small_table("PSOLID", 7):
        where = C.where(card)
        pid = _num(f[0], int, where, "PSOLID PID")
        mid = _num(f[1], int, where, "PSOLID MID")
        if pid is not None and mid is not None:
            psolid[pid] = mid
            if f[6].upper().startswith("PFLUID") and pid in region_names:
                region_names[pid] = f"PID {pid} (fluid)"
    speeds = []
    for card, f in C.small_table("MAT10", 4):
        where = C.where(card)
        mid = _num(f[0], int, where, "MAT10 MID")
        bulk = _num(f[1], float, where, "MAT10 BULK")
        rho = _num(f[2], float, where, "MAT10 RHO")
        c = _num(f[3], float, where, "MAT10 C")
        if c is None and bulk is not None and rho:
            c = math.sqrt(bulk / rho) if bulk / rho > 0 else None
        if c is not None and c > 0 and math.isfinite(c):
            regs = tuple(sorted(p for p, m in psolid.items() if m == mid and p in region_names))
            speeds.append(SpeedHint(f"MAT10 {mid}", float(c), regs))

    ignored = {}
    known = set(ELEMENT_CARDS) | set(ALIASES) | {"GRID", "GRDSET", "PSOLID", "MAT10", *_CORD2}
    for nm, code in names.items():
        if nm not in known:
            ignored[nm] = len(C.select(nm))
    expected = {k: C.prescan[k] for k, v in counts.items() if v}
    checks = tuple((f"{k} cards", expected.get(k, 0), _read_count(C, names, k)) for k in expected)
    return RawMesh(points=np.ascontiguousarray(points, dtype=np.float64), blocks=tuple(blocks),
                   region_names=region_names, format=FORMAT, point_ids=gids,
                   speeds=tuple(speeds), counts=checks, ignored=ignored)


def _read_count(C: _Cards, names: dict, prefix: str) -> int:
    """Cards the reader grouped under names starting with ``prefix`` (mixed-case names,
    which the pre-scan does not see, left out)."""
    n = 0
    for nm in names:
        if nm.startswith(prefix):
            sel = C.select(nm)
            n += int(len(sel) - C.mixed[sel].sum())
    return n
