"""I-DEAS universal files (``.unv``): meshcheck's own reader.

A universal file is a sequence of datasets, each between two delimiter
lines ``    -1`` (I6), the first line inside giving the dataset number.
Read here (layouts as in the I-DEAS universal file documentation, from
memory, and as written by gmsh's UNV writer):

* 164 units: record 1 unit code, description, temperature mode; record 2
  the length, force and temperature factors, with
  ``SI value = file value / factor``;
* 2411 nodes: per node a record ``label, export system, displacement system,
  colour`` (4I10) and the coordinates (3D25.16, Fortran ``D`` exponents);
* 2412 elements: ``label, FE descriptor, physical property, material,
  colour, number of nodes`` (6I10), for beams one more record (orientation
  node, end sections), then the node labels, 8 per line (8I10);
* 2467 / 2477 / 2435 / 2452 groups: ``group number, 6 active set numbers,
  number of entities`` (8I10), the group name, then entities
  ``type, tag, leaf, component`` two per line (entity type 8 = element).

Parabolic elements list their nodes around the edges (corner, mid, corner,
...); they are permuted to the meshio/VTK order with the correspondences
used by gmsh's UNV reader (``GModelIO_UNV.cpp``).  Regions: element groups
(the smaller group wins where groups overlap), else none.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import MeshReadError
from .ids import first_duplicate, index_of
from .includes import Source, normalise_text
from .raw import RawBlock, RawMesh, clean_name
from .textscan import ByteText, FieldError, parse_floats, parse_ints

__all__ = ["read_unv", "parse_unv", "UNV_TYPES"]

FORMAT = "I-DEAS universal"


def _p(*idx):
    return np.array(idx, dtype=np.int64)


#: FE descriptor -> (meshio type, permutation UNV -> VTK order); None = auxiliary (1D/0D)
UNV_TYPES: dict[int, tuple | None] = {}
for _d in (41, 51, 61, 74, 91):
    UNV_TYPES[_d] = ("triangle", _p(0, 1, 2))
for _d in (42, 52, 62, 72, 92):
    UNV_TYPES[_d] = ("triangle6", _p(0, 2, 4, 1, 3, 5))
for _d in (44, 54, 64, 71, 94):
    UNV_TYPES[_d] = ("quad", _p(0, 1, 2, 3))
for _d in (45, 55, 65, 75, 95):
    UNV_TYPES[_d] = ("quad8", _p(0, 2, 4, 6, 1, 3, 5, 7))
UNV_TYPES[111] = ("tetra", _p(0, 1, 2, 3))
UNV_TYPES[118] = ("tetra10", _p(0, 2, 4, 9, 1, 3, 5, 6, 7, 8))
for _d in (104, 115):
    UNV_TYPES[_d] = ("hexahedron", np.arange(8))
for _d in (105, 116):
    UNV_TYPES[_d] = ("hexahedron20", _p(0, 2, 4, 6, 12, 14, 16, 18, 1, 3, 5, 7,
                                        13, 15, 17, 19, 8, 9, 10, 11))
for _d in (101, 112):
    UNV_TYPES[_d] = ("wedge", np.arange(6))
for _d in (102, 113):
    UNV_TYPES[_d] = ("wedge15", _p(0, 2, 4, 9, 11, 13, 1, 3, 5, 10, 12, 14, 6, 7, 8))
_BEAMS = {11, 21, 22, 23, 24, 31, 32}
for _d in (*_BEAMS, 121, 122, 136, 137, 138, 139, 141, 161):
    UNV_TYPES[_d] = None
_AXI = {81, 82, 84, 85}
#: unit code -> unit name (I-DEAS unit systems 1-10), used when the factors are unreadable
_UNIT_CODES = {1: "m", 2: "ft", 3: "m", 4: "ft", 5: "mm", 6: "cm", 7: "in", 8: "mm", 10: "mm"}
_UNIT_BY_FACTOR = {"m": 1.0, "cm": 100.0, "mm": 1000.0, "in": 1 / 0.0254, "ft": 1 / 0.3048}
_GROUPS = {2467, 2477, 2435, 2452}


def read_unv(path: Path) -> RawMesh:
    """Read an I-DEAS universal file (points in the file's unit, unit from dataset 164)."""
    data = normalise_text(path.read_bytes(), path, expand_tabs=True)
    return parse_unv(Source(data, ((0, path, 1),), (path,)))


def _datasets(src: Source):
    """Yield (dataset number, body start, body end, where) of every dataset."""
    data = src.data
    delims = []
    k = 0 if data.startswith(b"    -1") else data.find(b"\n    -1")
    while k >= 0:
        p = k if (k == 0 and data.startswith(b"    -1")) else k + 1
        eol = data.find(b"\n", p)
        eol = len(data) if eol < 0 else eol
        if data[p + 6:eol].strip() == b"":
            delims.append((p, eol))
        k = data.find(b"\n    -1", p + 1)
    if len(delims) % 2:
        raise MeshReadError(f"{src.where(delims[-1][0])}: dataset not closed by a '    -1' "
                            "line; the file is truncated, export it again")
    for i in range(0, len(delims), 2):
        (_, e0), (s1, _) = delims[i], delims[i + 1]
        head_end = data.find(b"\n", e0 + 1)
        head_end = s1 if head_end < 0 or head_end > s1 else head_end
        head = data[e0 + 1:head_end].strip()
        where = src.where(e0 + 1)
        tok = head.split()
        try:
            num = int(tok[0]) if tok else -1
        except ValueError:
            if tok and tok[0][:-1].isdigit() and tok[0][-1:] in b"bB":
                raise MeshReadError(f"{where}: binary dataset {tok[0].decode()}; export the "
                                    "universal file as ASCII") from None
            raise MeshReadError(f"{where}: '{clean_name(head[:20])}' is not a dataset number; "
                                "the file is not a valid universal file") from None
        if len(tok) > 1 and tok[1][:1] in b"bB":
            raise MeshReadError(f"{where}: binary dataset {num}; export the universal file as "
                                "ASCII")
        yield num, min(head_end + 1, s1), s1, where


def _lines(text: ByteText, start: int, end: int):
    """(starts, ends) int64 of the lines in text[start:end] (blank lines dropped)."""
    a = text.u8[start:end]
    nl = np.flatnonzero(a == 10) + start
    st = np.concatenate(([start], nl + 1))
    en = np.concatenate((nl, [end]))
    keep = en > st
    return st[keep], en[keep]


def _fixed_ints(text, src, st, en, width, nfields, what):
    """(n_lines, nfields) ints of fixed-width fields, and their blank mask."""
    k = np.arange(nfields)[None, :]
    pos = st[:, None] + width * k
    wid = np.clip(en[:, None] - pos, 0, width)
    v = np.zeros(pos.shape, np.int64)
    b = np.ones(pos.shape, bool)
    full = wid == width
    part = (wid > 0) & ~full
    try:
        if not part.any():           # every field complete or absent: one width for all
            sel = np.flatnonzero(full.ravel())
            vv, bb = parse_ints(text, pos.ravel()[sel], width)
            v.ravel()[sel], b.ravel()[sel] = vv, bb
        else:
            vv, bb = parse_ints(text, pos, wid)
            v, b = vv.reshape(pos.shape), bb.reshape(pos.shape)
    except FieldError as exc:
        idx = sel[exc.index] if not part.any() else exc.index
        r = idx // nfields
        raise MeshReadError(f"{src.where(int(st[r]))}: {what}: '{exc.text[:20]}' is not an "
                            "integer; the dataset is damaged") from None
    return v, b


def parse_unv(src: Source) -> RawMesh:
    text = ByteText(src.data)
    label = str(src.files[0])
    unit, unit_src = None, ""
    node_parts, elem_parts, groups = [], [], []
    seen = set()
    for num, b0, b1, where in _datasets(src):
        if num == 164:
            unit, unit_src = _units(src, b0, b1, where)
        elif num == 2411:
            node_parts.append(_nodes(text, src, b0, b1, where))
        elif num == 2412:
            elem_parts.append(_elements(text, src, b0, b1, where))
        elif num in _GROUPS:
            groups.extend(_groups(text, src, b0, b1, where))
        elif num in (2420,):
            pass            # coordinate systems: only the global one is accepted (see _nodes)
        seen.add(num)
    if 2411 not in seen:
        raise MeshReadError(f"{label}: no node dataset (2411) in the universal file; export "
                            "the mesh with its nodes")
    ids = np.concatenate([n[0] for n in node_parts])
    xyz = np.concatenate([n[1] for n in node_parts])
    dup = first_duplicate(ids)
    if dup is not None:
        raise MeshReadError(f"{label}: node {int(ids[dup[1]])} is defined twice in dataset "
                            "2411; renumber the nodes")
    look = index_of(ids)
    by_type: dict[str, list] = {}
    ignored: dict[str, int] = {}
    n_lines = 0
    for recs in elem_parts:
        for ctype, eids, conn, where, nrec in recs:
            n_lines += nrec
            if ctype.startswith("#"):
                ignored[ctype[1:]] = ignored.get(ctype[1:], 0) + len(eids)
                continue
            idx = look(conn)
            if (idx < 0).any():
                r, c = np.argwhere(idx < 0)[0]
                raise MeshReadError(f"{where}: element {int(eids[r])} refers to node "
                                    f"{int(conn[r, c])}, which dataset 2411 does not define; "
                                    "export the mesh with all its nodes")
            by_type.setdefault(ctype, []).append((idx, eids))
    blocks_raw = {t: (np.concatenate([x[0] for x in v]), np.concatenate([x[1] for x in v]))
                  for t, v in by_type.items()}
    all_eids = np.concatenate([v[1] for v in blocks_raw.values()]) if blocks_raw else \
        np.zeros(0, np.int64)
    dup = first_duplicate(all_eids)
    if dup is not None:
        raise MeshReadError(f"{label}: element {int(all_eids[dup[1]])} is defined twice in "
                            "dataset 2412; renumber the elements")
    # regions from element groups: bigger groups first, so that smaller ones win
    tags = {t: np.zeros(len(v[1]), np.int64) for t, v in blocks_raw.items()}
    names = {}
    usable = []
    for gnum, gname, members, gwhere in groups:
        hits = {t: np.flatnonzero(np.isin(v[1], members)) for t, v in blocks_raw.items()}
        size = sum(len(h) for h in hits.values())
        if size:
            usable.append((size, gnum, gname, hits))
    for k, (_, gnum, gname, _) in enumerate(usable):
        names[k + 1] = clean_name(gname) or f"group {gnum}"
    for k in sorted(range(len(usable)), key=lambda i: -usable[i][0]):
        for t, h in usable[k][3].items():
            tags[t][h] = k + 1
    blocks = tuple(RawBlock(t, v[0], tags[t], v[1]) for t, v in blocks_raw.items())
    from .prescan import unv_counts
    expected = unv_counts(src.data)
    checks = (("lines of dataset 2411", expected["2411 lines"], 2 * len(ids)),
              ("lines of dataset 2412", expected["2412 lines"], n_lines))
    return RawMesh(points=xyz, blocks=blocks, region_names=names, format=FORMAT,
                   point_ids=ids, unit=unit, unit_source=unit_src, counts=checks,
                   ignored=ignored)


def _units(src, b0, b1, where):
    lines = [ln for ln in src.data[b0:b1].split(b"\n") if ln.strip()]
    code = None
    try:
        code = int(lines[0][:10])
    except (IndexError, ValueError):
        pass
    try:
        factor = float(lines[1].replace(b"D", b"E").replace(b"d", b"E").split()[0])
    except (IndexError, ValueError):
        factor = None
    desc = clean_name(lines[0][10:30]) if lines else ""
    if factor and factor > 0:
        for name, f in _UNIT_BY_FACTOR.items():
            if abs(factor / f - 1) < 1e-6:
                return name, f"dataset 164 ({desc or 'units'}: length factor {factor:g})"
        raise MeshReadError(f"{where}: dataset 164 gives a length factor {factor:g}, which is "
                            "none of m, cm, mm, in, ft; give the unit with --units")
    if code in _UNIT_CODES:
        return _UNIT_CODES[code], f"dataset 164 (unit code {code}, {desc})"
    raise MeshReadError(f"{where}: dataset 164 holds no usable length unit; give the unit "
                        "with --units")


def _nodes(text, src, b0, b1, where):
    st, en = _lines(text, b0, b1)
    if len(st) % 2:
        raise MeshReadError(f"{where}: dataset 2411 has an odd number of lines; every node "
                            "needs two records - the file is truncated or damaged")
    h_st, h_en = st[0::2], en[0::2]
    c_st, c_en = st[1::2], en[1::2]
    hv, hb = _fixed_ints(text, src, h_st, h_en, 10, 4, "dataset 2411 node record")
    if hb[:, 0].any():
        r = int(np.flatnonzero(hb[:, 0])[0])
        raise MeshReadError(f"{src.where(int(h_st[r]))}: node record without a label; the "
                            "dataset is damaged")
    csys = hv[:, 1]
    bad = np.flatnonzero(~hb[:, 1] & (csys != 0) & (csys != 1))
    if bad.size:
        r = int(bad[0])
        raise MeshReadError(f"{src.where(int(h_st[r]))}: node {int(hv[r, 0])} is given in "
                            f"coordinate system {int(csys[r])}; export the nodes in the "
                            "global system")
    k = np.arange(3)[None, :]
    pos = c_st[:, None] + 25 * k
    wid = np.clip(c_en[:, None] - pos, 0, 25)
    try:
        xyz, blank = parse_floats(text, pos, wid)
    except FieldError as exc:
        r = exc.index // 3
        raise MeshReadError(f"{src.where(int(c_st[r]))}: node {int(hv[r, 0])} coordinate "
                            f"'{exc.text[:25]}' is not a number; the dataset is damaged") from None
    xyz = xyz.reshape(-1, 3)
    if blank.reshape(-1, 3).any():
        r = int(np.flatnonzero(blank.reshape(-1, 3).any(axis=1))[0])
        raise MeshReadError(f"{src.where(int(c_st[r]))}: node {int(hv[r, 0])} has fewer than 3 "
                            "coordinates (3D25.16 fields); the dataset is damaged")
    return hv[:, 0].copy(), xyz


def _elements(text, src, b0, b1, where):
    """[(type or '#FE', labels, node labels (m, k), where, lines used)] of one 2412 dataset."""
    st, en = _lines(text, b0, b1)
    if not len(st):
        return []
    v, b = _fixed_ints(text, src, st, en, 10, 8, "dataset 2412")
    out = []
    i = 0
    n = len(st)
    while i < n:
        if b[i, :6].any():
            raise MeshReadError(f"{src.where(int(st[i]))}: element record with fewer than 6 "
                                "numbers (label, FE descriptor, properties, colour, node count); "
                                "the dataset is damaged")
        fe, nn = int(v[i, 1]), int(v[i, 5])
        beam = 1 if fe in _BEAMS else 0
        period = 1 + beam + -(-nn // 8) if nn > 0 else 0
        if nn <= 0 or nn > 64:
            raise MeshReadError(f"{src.where(int(st[i]))}: element {int(v[i, 0])} claims {nn} "
                                "nodes; the dataset is damaged")
        # a run of records with the same descriptor and node count has a fixed period
        rows = np.arange(i, n - period + 1, period)
        same = (v[rows, 1] == fe) & (v[rows, 5] == nn) & ~b[rows, :6].any(axis=1)
        stop = int(np.argmin(same)) if not same.all() else len(rows)
        rows = rows[:stop]
        spec = UNV_TYPES.get(fe, "unknown")
        if spec == "unknown" or fe in _AXI:
            what = ("axisymmetric elements describe a body of revolution, which this audit "
                    "does not model" if fe in _AXI else f"FE descriptor {fe} is not supported")
            raise MeshReadError(f"{src.where(int(st[i]))}: element {int(v[i, 0])}: {what}; "
                                "export tetrahedra, hexahedra or wedges")
        labels = v[rows, 0]
        node_lines = rows[:, None] + 1 + beam + np.arange(period - 1 - beam)[None, :]
        nodes = v[node_lines].reshape(len(rows), -1)
        nblank = b[node_lines].reshape(len(rows), -1)
        if nblank[:, :nn].any() or (~nblank[:, nn:]).any():
            r = int(np.flatnonzero(nblank[:, :nn].any(axis=1) | (~nblank[:, nn:]).any(axis=1))[0])
            raise MeshReadError(f"{src.where(int(st[rows[r]]))}: element {int(labels[r])} does "
                                f"not list {nn} node labels; the dataset is damaged")
        nodes = nodes[:, :nn]
        if spec is None:
            out.append((f"#FE {fe}", labels, nodes, where, len(rows) * period))
        else:
            ctype, perm = spec
            if len(perm) != nn:
                raise MeshReadError(f"{src.where(int(st[i]))}: element {int(v[i, 0])} "
                                    f"(FE descriptor {fe}) has {nn} nodes, expected "
                                    f"{len(perm)}; the dataset is damaged")
            out.append((ctype, labels, nodes[:, perm], src.where(int(st[i])),
                        len(rows) * period))
        if not len(rows):
            raise MeshReadError(f"{src.where(int(st[i]))}: element {int(v[i, 0])} is cut off; "
                                "the file is truncated")
        i = int(rows[-1]) + period
    return out


def _groups(text, src, b0, b1, where):
    lines = src.data[b0:b1].split(b"\n")
    out = []
    i = 0
    pos = b0
    offs = []
    for ln in lines:
        offs.append(pos)
        pos += len(ln) + 1
    while i < len(lines):
        if not lines[i].strip():
            i += 1
            continue
        head = lines[i].split()
        try:
            gnum, count = int(head[0]), int(head[-1])
        except (IndexError, ValueError):
            raise MeshReadError(f"{src.where(offs[i])}: group record is not a list of numbers; "
                                "the dataset is damaged") from None
        if count < 0 or count > 2 * (len(lines) - i):
            raise MeshReadError(f"{src.where(offs[i])}: group {gnum} claims {count} entities, "
                                "more than the dataset holds; the file is damaged")
        name = lines[i + 1].decode("utf-8", "replace").strip() if i + 1 < len(lines) else ""
        nl = -(-count // 2)
        body = b" ".join(lines[i + 2:i + 2 + nl])
        try:
            vals = np.fromstring(body, dtype=np.int64, sep=" ") if body.strip() else \
                np.zeros(0, np.int64)
        except ValueError:
            raise MeshReadError(f"{src.where(offs[min(i + 2, len(offs) - 1)])}: entities of group "
                                f"'{clean_name(name)}' are not numbers; the dataset is "
                                "damaged") from None
        if len(vals) != 4 * count:
            raise MeshReadError(f"{src.where(offs[i])}: group '{clean_name(name)}' lists "
                                f"{len(vals) // 4} of its {count} entities; the file is damaged")
        ent = vals.reshape(-1, 4)
        out.append((gnum, name, ent[ent[:, 0] == 8, 1], src.where(offs[i])))
        i += 2 + nl
    return out
