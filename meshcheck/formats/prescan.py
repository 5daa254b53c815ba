"""Light pre-scans: counts taken from the raw text or header, independently of the readers.

After every read, :mod:`meshcheck.reading` compares these counts with what the
reader produced; a difference means a card, line or block was lost or
misgrouped, and the read is refused instead of giving a wrong mesh.
"""
from __future__ import annotations

import re

__all__ = ["nastran_counts", "abaqus_counts", "unv_counts", "gmsh_counts", "vtk_counts",
           "vtu_counts"]


def nastran_counts(heads, prefixes: list[str], lower: bool = True) -> dict[str, int]:
    """Lines of the bulk section that start with each card name (raw bytes, no layout logic).

    heads : (n,) uint64, the first 8 bytes of every line of the bulk section as
    stored (little-endian, padded with spaces); upper-case names always,
    lower-case ones too when ``lower``.
    """
    import numpy as np

    out = {}
    for p in prefixes:
        k = len(p)
        h = heads & np.uint64((1 << (8 * k)) - 1)
        hit = h == np.uint64(int.from_bytes(p.encode(), "little"))
        if lower:
            hit |= h == np.uint64(int.from_bytes(p.lower().encode(), "little"))
        out[p] = int(np.count_nonzero(hit))
    return out


def _line_table(text: bytes):
    """(uint8 array, line starts, line ends) of a text, vectorised."""
    import numpy as np

    a = np.frombuffer(text, dtype=np.uint8)
    nl = np.flatnonzero(a == 10)
    starts = np.concatenate(([0], nl + 1))
    ends = np.concatenate((nl, [len(a)]))
    keep = starts < len(a)
    return a, starts[keep], ends[keep]


def abaqus_counts(text: bytes) -> dict[str, int]:
    """Data lines of *NODE and *ELEMENT blocks, counted from the raw lines.

    A data line is a line that is not blank, not a comment (``**``) and not a
    keyword; in *ELEMENT blocks a line ending with a comma continues on the
    next one (a logical line is counted once).  Vectorised over lines; only
    keyword lines and lines ending in blanks are looked at one by one.
    """
    import numpy as np

    counts = {"nodes": 0, "elements": 0}
    if not text:
        return counts
    a, st, en = _line_table(text)
    ln = en - st
    pad = np.concatenate([a, np.full(2, 32, np.uint8)])
    c0 = np.where(ln > 0, pad[st], 32)
    c1 = np.where(ln > 1, pad[st + 1], 32)
    last = np.where(ln > 0, pad[np.maximum(en - 1, 0)], 32)
    blank = ln == 0
    # lines that start or end with white space: decide with strip (few in most files)
    odd = np.flatnonzero((c0 == 32) | (c0 == 9) | (last == 32) | (last == 9))
    firstc = c0.copy()
    lastc = last.copy()
    for i in odd:
        t = text[st[i]:en[i]].strip()
        if not t:
            blank[i] = True
        else:
            firstc[i], lastc[i] = t[0], t[-1]
            if t[:2] == b"**":
                c1[i] = 42
    comment = (firstc == 42) & (np.where(ln > 1, c1, 32) == 42)
    keyword = (firstc == 42) & ~comment & ~blank
    data = ~blank & ~comment & ~keyword
    kw_idx = np.flatnonzero(keyword)
    block = np.zeros(len(st), dtype=np.int8)      # 1 nodes, 2 elements, 0 other
    for k, i in enumerate(kw_idx):
        name = text[st[i] + 1:en[i]].split(b",")[0].upper().replace(b" ", b"").replace(b"\t", b"")
        code = {b"NODE": 1, b"ELEMENT": 2}.get(name, 0)
        stop = kw_idx[k + 1] if k + 1 < len(kw_idx) else len(st)
        block[i + 1:stop] = code
    counts["nodes"] = int(np.count_nonzero(data & (block == 1)))
    el = np.flatnonzero(data & (block == 2))
    if el.size:
        cont = lastc[el] == 44
        # a line continues the previous data line of the same block if that one ended in ','
        same_block = np.concatenate(([False], (np.diff(el) >= 1) &
                                     (np.cumsum(keyword)[el[1:]] == np.cumsum(keyword)[el[:-1]])))
        follows = np.concatenate(([False], cont[:-1])) & same_block
        counts["elements"] = int(np.count_nonzero(~follows))
    return counts


def gmsh_counts(head_and_sections: dict[str, bytes]) -> dict[str, int]:
    """Declared node and element totals of an MSH file.

    head_and_sections : the first line after ``$Nodes`` and after ``$Elements``,
    and the version line of ``$MeshFormat``.
    """
    out = {}
    version = head_and_sections.get("version", b"").split()
    v = version[0].decode("ascii", "replace") if version else ""
    for key, name in (("nodes", "$Nodes"), ("elements", "$Elements")):
        line = head_and_sections.get(key)
        if line is None:
            continue
        parts = line.split()
        try:
            out[key] = int(parts[1] if v.startswith("4") else parts[0])
        except (IndexError, ValueError):
            pass
    return out


def vtk_counts(head: bytes) -> dict[str, int]:
    """Declared POINTS and CELL_TYPES counts of a legacy VTK file (any version)."""
    out = {}
    m = re.search(rb"^POINTS\s+(\d+)", head, re.M | re.I)
    if m:
        out["points"] = int(m.group(1))
    m = re.search(rb"^CELL_TYPES\s+(\d+)", head, re.M | re.I)
    if m:
        out["cells"] = int(m.group(1))
    return out


def vtu_counts(head: bytes) -> dict[str, int]:
    """NumberOfPoints and NumberOfCells of the pieces of a VTK XML file."""
    pts = [int(x) for x in re.findall(rb'NumberOfPoints\s*=\s*"(\d+)"', head)]
    cells = [int(x) for x in re.findall(rb'NumberOfCells\s*=\s*"(\d+)"', head)]
    out = {}
    if pts:
        out["points"] = sum(pts)
    if cells:
        out["cells"] = sum(cells)
    return out


def unv_counts(text: bytes) -> dict[str, int]:
    """Non-blank lines of the 2411 (nodes) and 2412 (elements) datasets of a universal file.

    Counted with ``bytes.count`` between the delimiter lines, independently of
    the record walk of the reader: every node takes 2 lines, every element
    1 + (1 for beams) + ceil(nodes / 8) lines.
    """
    out = {"2411 lines": 0, "2412 lines": 0}
    k = 0 if text.startswith(b"    -1") else text.find(b"\n    -1")
    delims = []
    while k >= 0:
        p = k if (k == 0 and text.startswith(b"    -1")) else k + 1
        eol = text.find(b"\n", p)
        eol = len(text) if eol < 0 else eol
        if text[p + 6:eol].strip() == b"":
            delims.append((p, eol))
        k = text.find(b"\n    -1", p + 1)
    for i in range(0, len(delims) - 1, 2):
        (_, e0), (s1, _) = delims[i], delims[i + 1]
        head_end = text.find(b"\n", e0 + 1)
        if head_end < 0 or head_end > s1:
            continue
        num = text[e0 + 1:head_end].split()[:1]
        key = {b"2411": "2411 lines", b"2412": "2412 lines"}.get(num[0] if num else b"")
        if key:
            body = text[head_end + 1:s1]
            out[key] += body.count(b"\n") - _blank_lines(body)
    return out


def _blank_lines(body: bytes) -> int:
    """Empty lines (nothing between two line ends) of a text block."""
    n = body.count(b"\n\n") + (1 if body.startswith(b"\n") else 0)
    if b"\n\n\n" in body:               # runs of empty lines: count them exactly
        import numpy as np
        nl = np.flatnonzero(np.frombuffer(body, dtype=np.uint8) == 10)
        n = int(np.count_nonzero(np.diff(nl) == 1)) + (1 if body.startswith(b"\n") else 0)
    return n
