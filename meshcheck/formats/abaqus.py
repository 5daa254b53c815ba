"""Abaqus input files (``.inp``): meshcheck's own reader.

Conventions followed (Abaqus Keywords Reference, as remembered; no copy at hand):

* a keyword line starts with ``*`` in column 1, ``**`` starts a comment line
  (also inside data blocks); keywords and parameter names are
  case-insensitive and blanks in them are ignored; a keyword line ending
  with a comma continues on the next line;
* ``*NODE`` data: number, x, y, z; several ``*NODE`` blocks add up;
* ``*ELEMENT, TYPE=..., ELSET=...`` data: number and node numbers; a data
  line ending with a comma continues on the next line;
* ``*PART`` ... ``*END PART`` define meshes; ``*ASSEMBLY`` holds
  ``*INSTANCE, NAME=, PART=`` blocks whose first data line is a translation
  and whose second is a rotation (point a, point b on the axis, angle in
  degrees); the translation is applied first, then the rotation (from
  memory of the manual).  Every instance becomes a copy of its part's nodes
  and elements, renumbered;
* ``*INCLUDE, INPUT=file`` is spliced in (relative to the including file);
* regions: the element sets of ``*SOLID SECTION``, else the named ``*ELSET``
  blocks, else the ``ELSET=`` of ``*ELEMENT``; where sets overlap the smaller wins;
* a speed of sound comes from ``*ACOUSTIC MEDIUM`` (bulk modulus) and
  ``*DENSITY`` of the section's material: c = sqrt(K / rho).

Element names: C3D*, AC3D* (acoustic) and DC3D* (heat transfer) with any
suffix letters (R reduced, H hybrid, I, M, T, P, ...) map to their shapes by
node count; CPS*/CPE*/AC2D*/DC2D* to planar cells.  Node orders of these
families are the meshio/VTK orders.  Shells, beams, connectors, rigid,
surface and infinite elements are boundary or auxiliary and are not cells of
the fluid; any other name is refused.
"""
from __future__ import annotations

import io
import math
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import MeshReadError
from .ids import first_duplicate, index_of
from .includes import Source, load_text
from .raw import RawBlock, RawMesh, SpeedHint, clean_name

__all__ = ["read_abaqus", "load_abaqus", "parse_abaqus", "abaqus_cell_type"]

FORMAT = "Abaqus input"

_SOLID = {4: "tetra", 10: "tetra10", 8: "hexahedron", 20: "hexahedron20", 6: "wedge",
          15: "wedge15", 5: "pyramid"}
_PLANAR = {3: "triangle", 4: "quad", 6: "triangle6", 8: "quad8"}
_SOLID_RE = re.compile(r"(?:C3D|AC3D|DC3D)(\d+)([A-Z]*)")
_PLANAR_RE = re.compile(r"(?:CPS|CPE|CPEG|AC2D|DC2D)(\d+)([A-Z]*)")
_SUFFIX = set("RHIMTPSEW")
#: families that are not cells of the fluid volume (boundary, structure, auxiliary)
_AUXILIARY = re.compile(r"(S\d|STRI|SC\d|M3D|SFM|R3D|R2D|RB|B\d|PIPE|T\dD|SPRING|DASHPOT|MASS|"
                        r"ROTARYI|CONN|ASI|ACIN|COH|GAP|ITS|JOINT|F3D|SFMGK|MGAX|SAX|DS|DCOUP|"
                        r"ELBOW|FRAME|HEATCAP|DRAG|DCC|CAXA|CGAX|CAX|ACAX|DCAX)")
_AXI = re.compile(r"(CAX|ACAX|DCAX|CGAX|CAXA)")


def abaqus_cell_type(name: str) -> str | None:
    """meshio type of an Abaqus element name, None for auxiliary elements.

    Raises ValueError for names that could be fluid cells but are not supported.
    """
    u = name.strip().upper()
    for rx, table in ((_SOLID_RE, _SOLID), (_PLANAR_RE, _PLANAR)):
        m = rx.fullmatch(u)
        if m and set(m.group(2)) <= _SUFFIX:
            n = int(m.group(1))
            if n in table:
                return table[n]
            raise ValueError(f"{n}-node {u} elements are not supported")
    if _AXI.match(u):
        raise ValueError(f"axisymmetric elements ({u}) describe a 3D body of revolution, "
                         "which this audit does not model")
    if _AUXILIARY.match(u):
        return None
    raise ValueError(f"element type {u} is unknown")


def _keyword_name(line: bytes) -> str:
    return line[1:].split(b",")[0].decode("latin-1").upper().replace(" ", "").replace("\t", "")


def _params(text: str) -> dict[str, str]:
    out = {}
    for part in text.split(",")[1:]:
        if not part.strip():
            continue
        k, _, v = part.partition("=")
        v = v.strip()
        if len(v) >= 2 and v[0] == v[-1] and v[0] in "'\"":
            v = v[1:-1]
        out[k.strip().upper().replace(" ", "")] = v
    return out


def find_includes(text: bytes) -> list[tuple[int, int, str, int]]:
    """Byte spans of ``*INCLUDE, INPUT=...`` lines."""
    res = []
    for pat in (b"*INCLUDE", b"*include", b"*Include"):
        k = text.find(pat)
        while k >= 0:
            if k == 0 or text[k - 1] == 10:
                eol = text.find(b"\n", k)
                eol = len(text) if eol < 0 else eol
                line = text[k:eol].decode("latin-1")
                name = _params(line).get("INPUT", "")
                res.append((k, min(eol + 1, len(text)), name, text.count(b"\n", 0, k) + 1))
            k = text.find(pat, k + 1)
    return sorted(res)


def load_abaqus(path: Path, allow_outside: bool = False) -> Source:
    return load_text(path, find_includes, allow_outside, expand_tabs=True, what="*INCLUDE")


def read_abaqus(path: Path, allow_outside: bool = False) -> RawMesh:
    """Read an Abaqus input file (points in the file's unit)."""
    return parse_abaqus(load_abaqus(path, allow_outside))


# ---- data blocks -------------------------------------------------------------
_D_EXP = re.compile(rb"(?<=[0-9.])[dD](?=[+-]?[0-9])")


def _table(src: Source, start: int, end: int, join: bool, what: str) -> np.ndarray:
    """(rows, cols) float64 of the comma-separated data lines in src.data[start:end].

    Comment lines (``**``) and blank lines are skipped.  With ``join`` a line
    ending with a comma continues on the next; else a trailing comma is dropped.
    """
    block = src.data[start:end]
    if not block.strip():
        return np.zeros((0, 0))
    if b"\n**" in block or block.startswith(b"**"):
        block = b"\n".join(b"" if ln.lstrip().startswith(b"**") else ln
                           for ln in block.split(b"\n"))
    if b" \n" in block:
        block = re.sub(rb"[ ]+\n", b"\n", block)
    if join and b",\n" in block:
        block = re.sub(rb",\n(?:\n)*", b",", block) if b",\n\n" in block else \
            block.replace(b",\n", b",")
    if b",\n" in block or block.rstrip().endswith(b","):
        block = block.replace(b", \n", b",\n").replace(b",\n", b"\n").rstrip()
        if block.endswith(b","):
            block = block[:-1]
    if b"d" in block or b"D" in block:
        block = _D_EXP.sub(b"E", block)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            arr = np.loadtxt(io.StringIO(block.decode("latin-1")), delimiter=",",
                             dtype=np.float64, ndmin=2, comments=None)
        return arr
    except ValueError:
        pass
    # locate the offending line for the message (error path only)
    rows = []
    for k, ln in enumerate(src.data[start:end].split(b"\n")):
        s = ln.strip()
        if not s or s.startswith(b"**"):
            continue
        s = s.rstrip(b",")
        try:
            vals = [float(_D_EXP.sub(b"E", x.strip())) for x in s.split(b",")]
        except ValueError:
            bad = s.decode("latin-1")[:40]
            raise MeshReadError(f"{src.where(start + _offset_of_line(src.data, start, k))}: "
                                f"{what} data line '{clean_name(bad)}' is not a list of numbers; "
                                "fix or remove the line") from None
        rows.append(vals)
    widths = {len(r) for r in rows}
    if len(widths) > 1 and not join:
        width = max(widths)
        return np.array([r + [0.0] * (width - len(r)) for r in rows])
    raise MeshReadError(f"{src.where(start)}: {what} data lines have different numbers of "
                        f"values ({', '.join(str(w) for w in sorted(widths))}); check the block")


def _offset_of_line(data: bytes, start: int, k: int) -> int:
    p = start
    for _ in range(k):
        q = data.find(b"\n", p)
        if q < 0:
            break
        p = q + 1
    return p - start


# ---- model ---------------------------------------------------------------------
@dataclass
class _Scope:
    """Nodes, elements and sets of one part (or of the model when there are no parts)."""

    name: str
    nodes: list = field(default_factory=list)        # (ids, xyz, where)
    elements: list = field(default_factory=list)     # (ctype, ids, conn, elset, where)
    elsets: dict = field(default_factory=dict)       # NAME -> list of id arrays / set names
    set_names: dict = field(default_factory=dict)    # NAME -> name as written
    sections: list = field(default_factory=list)     # (elset, material, where)
    ignored: dict = field(default_factory=dict)


@dataclass
class _Instance:
    name: str
    part: str
    where: str
    translation: np.ndarray = field(default_factory=lambda: np.zeros(3))
    rotation: tuple | None = None
    inline: _Scope | None = None


def _rotate(x: np.ndarray, a: np.ndarray, b: np.ndarray, angle_deg: float) -> np.ndarray:
    """Rotate points about the axis a -> b by angle (right-hand rule), Rodrigues' formula."""
    k = b - a
    k = k / np.linalg.norm(k)
    t = math.radians(angle_deg)
    p = x - a
    return (a + p * math.cos(t) + np.cross(k, p) * math.sin(t)
            + np.outer(p @ k, k) * (1 - math.cos(t)))


def parse_abaqus(src: Source) -> RawMesh:
    """Turn merged input text into a :class:`RawMesh` (points in file units)."""
    data = src.data
    a = np.frombuffer(data + b"\n ", dtype=np.uint8)
    nl = np.flatnonzero(a[:len(data)] == 10)
    starts = np.concatenate(([0], nl + 1))
    starts = starts[starts < len(data)]
    kw = starts[(a[starts] == 42) & (a[starts + 1] != 42)]
    kw_list = kw.tolist() + [len(data)]

    top = _Scope("")
    parts: dict[str, _Scope] = {}
    instances: list[_Instance] = []
    materials: dict[str, dict] = {}
    scope = top
    in_assembly = False
    inst: _Instance | None = None
    material: str | None = None
    rows = {"nodes": 0, "elements": 0}
    k = 0
    while k < len(kw_list) - 1:
        p0 = kw_list[k]
        eol = data.find(b"\n", p0)
        eol = len(data) if eol < 0 else eol
        line = data[p0:eol]
        # keyword line continued by a trailing comma
        while line.rstrip().endswith(b",") and eol < len(data):
            nxt = data.find(b"\n", eol + 1)
            nxt = len(data) if nxt < 0 else nxt
            line += data[eol + 1:nxt]
            eol = nxt
        body0, body1 = min(eol + 1, len(data)), kw_list[k + 1]
        while body1 < eol:                      # continuation swallowed keyword-like lines
            k += 1
            body1 = kw_list[k + 1]
        where = src.where(p0)
        text = line.decode("latin-1")
        name = _keyword_name(line)
        prm = _params(text)
        k += 1
        if name == "PART":
            pname = prm.get("NAME", "")
            if not pname:
                raise MeshReadError(f"{where}: *PART without NAME=; name the part")
            if pname.upper() in parts:
                raise MeshReadError(f"{where}: part '{clean_name(pname)}' defined twice; "
                                    "rename one")
            scope = parts[pname.upper()] = _Scope(pname)
        elif name == "ENDPART":
            scope = top
        elif name == "ASSEMBLY":
            in_assembly = True
        elif name == "ENDASSEMBLY":
            in_assembly = False
            scope = top
        elif name == "INSTANCE":
            if not in_assembly:
                raise MeshReadError(f"{where}: *INSTANCE outside *ASSEMBLY; check the file")
            inst = _Instance(prm.get("NAME", f"instance-{len(instances) + 1}"),
                             prm.get("PART", ""), where)
            vals = _table(src, body0, body1, False, "*INSTANCE")
            if vals.size:
                if vals.shape[1] < 3:
                    raise MeshReadError(f"{where}: *INSTANCE translation needs 3 values")
                inst.translation = vals[0, :3].copy()
                if vals.shape[0] > 1:
                    if vals.shape[1] < 7:
                        raise MeshReadError(f"{where}: *INSTANCE rotation needs 7 values "
                                            "(point a, point b, angle in degrees)")
                    ra, rb, ang = vals[1, :3], vals[1, 3:6], float(vals[1, 6])
                    if np.linalg.norm(rb - ra) == 0 and ang != 0:
                        raise MeshReadError(f"{where}: *INSTANCE rotation axis has a = b; "
                                            "fix the second data line")
                    if ang != 0:
                        inst.rotation = (ra, rb, ang)
            instances.append(inst)
            if not inst.part:
                inst.inline = scope = _Scope(inst.name)
        elif name == "ENDINSTANCE":
            inst = None
            scope = top
        elif name == "NODE":
            system = prm.get("SYSTEM", "R").upper()
            if system != "R":
                raise MeshReadError(f"{where}: *NODE with SYSTEM={system} (cylindrical or "
                                    "spherical coordinates) is not supported; export the nodes "
                                    "in rectangular coordinates")
            if "INPUT" in prm:
                raise MeshReadError(f"{where}: *NODE, INPUT= is not supported; use *INCLUDE "
                                    "or put the nodes in the file")
            if in_assembly and inst is None:
                scope_n = top        # reference nodes of the assembly: not mesh nodes
            else:
                scope_n = scope
            vals = _table(src, body0, body1, False, "*NODE")
            rows["nodes"] += len(vals)
            if vals.size:
                if vals.shape[1] < 3:
                    raise MeshReadError(f"{where}: *NODE data need a number and at least two "
                                        "coordinates per line")
                ids = vals[:, 0]
                if (ids != np.round(ids)).any() or (ids <= 0).any():
                    raise MeshReadError(f"{where}: *NODE numbers must be positive integers; "
                                        "fix the node numbers")
                xyz = np.zeros((len(vals), 3))
                xyz[:, :min(3, vals.shape[1] - 1)] = vals[:, 1:4]
                scope_n.nodes.append((ids.astype(np.int64), xyz, where))
        elif name == "ELEMENT":
            etype = clean_name(prm.get("TYPE", ""), 24)
            if "INPUT" in prm:
                raise MeshReadError(f"{where}: *ELEMENT, INPUT= is not supported; use *INCLUDE "
                                    "or put the elements in the file")
            try:
                ctype = abaqus_cell_type(etype)
            except ValueError as exc:
                raise MeshReadError(f"{where}: {clean_name(str(exc), 160)}; export the fluid as "
                                    "C3D*/AC3D* tetra, "
                                    "hexa, wedge or pyramid elements") from None
            vals = _table(src, body0, body1, True, f"*ELEMENT TYPE={etype}")
            rows["elements"] += len(vals)
            if ctype is None:
                scope.ignored[etype.upper()] = scope.ignored.get(etype.upper(), 0) + len(vals)
                continue
            from ..cells import CELL_TYPES
            nn = CELL_TYPES[ctype].n_nodes
            if vals.size and vals.shape[1] != nn + 1:
                raise MeshReadError(f"{where}: {etype} elements need {nn} node numbers but the "
                                    f"data lines hold {vals.shape[1] - 1}; check the block")
            if vals.size:
                if (vals != np.round(vals)).any():
                    raise MeshReadError(f"{where}: *ELEMENT data must be integers; fix the block")
                iv = vals.astype(np.int64)
                scope.elements.append((ctype, iv[:, 0], iv[:, 1:], prm.get("ELSET"), where))
                if prm.get("ELSET"):
                    scope.elsets.setdefault(prm["ELSET"].upper(), []).append(("ids", iv[:, 0]))
                    scope.set_names.setdefault(prm["ELSET"].upper(), prm["ELSET"])
        elif name == "ELSET":
            sname = prm.get("ELSET", "")
            target = scope
            entry = _elset_entry(src, body0, body1, prm, where)
            if not (in_assembly and inst is None):     # assembly-level sets are not regions
                target.elsets.setdefault(sname.upper(), []).append(entry)
                target.set_names.setdefault(sname.upper(), sname)
        elif name == "SOLIDSECTION":
            scope.sections.append((prm.get("ELSET", ""), prm.get("MATERIAL", ""), where))
        elif name == "MATERIAL":
            material = prm.get("NAME", "").upper()
            materials[material] = {"name": prm.get("NAME", ""), "where": where}
        elif name in ("ACOUSTICMEDIUM", "DENSITY") and material is not None:
            if name == "ACOUSTICMEDIUM" and any(key in prm for key in ("VOLUMETRICDRAG",
                                                                        "COMPLEX")):
                continue
            vals = _table(src, body0, body1, False, f"*{name}")
            if vals.size:
                materials[material]["bulk" if name == "ACOUSTICMEDIUM" else "density"] = \
                    float(vals[0, 0])
        elif name in ("SYSTEM", "NGEN", "NFILL", "NCOPY", "NMAP", "ELGEN", "ELCOPY", "NSET "
                      "GENERATE"):
            raise MeshReadError(f"{where}: *{name} (node or element generation / local system) "
                                "is not supported; export the mesh with explicit *NODE and "
                                "*ELEMENT data")
        elif name in ("STEP",):
            material = None
    return _flatten(src, top, parts, instances, materials, rows)


def _elset_entry(src, b0, b1, prm, where):
    raw = src.data[b0:b1]
    if "GENERATE" not in prm and not re.search(rb"[A-Za-z_*]", raw):
        # plain element numbers (the common, large case): parse them at C speed
        body = raw.replace(b"\r", b"").replace(b", \n", b",\n").replace(b",\n", b",")
        body = body.replace(b"\n", b",").strip(b", \t")
        try:
            nums = np.fromstring(body, dtype=np.int64, sep=",") if body else np.zeros(0, np.int64)
            return ("mixed", nums, [])
        except ValueError:
            pass
    text = raw.decode("latin-1")
    items = []
    for ln in text.split("\n"):
        s = ln.strip()
        if not s or s.startswith("**"):
            continue
        items.extend(x.strip() for x in s.split(",") if x.strip())
    if "GENERATE" in prm:
        try:
            nums = [int(float(x)) for x in items]
        except ValueError:
            raise MeshReadError(f"{where}: *ELSET, GENERATE needs start, end, step numbers")
        ids = []
        for i in range(0, len(nums) - len(nums) % 3, 3):
            s0, s1, st = nums[i], nums[i + 1], nums[i + 2] or 1
            if st <= 0 or s1 < s0 or (s1 - s0) // st > len(src.data):
                raise MeshReadError(f"{where}: *ELSET, GENERATE range {s0}, {s1}, {st} is not "
                                    "usable (empty, or longer than the file could define); fix it")
            ids.append(np.arange(s0, s1 + 1, st, dtype=np.int64))
        return ("ids", np.concatenate(ids) if ids else np.zeros(0, np.int64))
    nums, names = [], []
    for x in items:
        try:
            nums.append(int(x))
        except ValueError:
            names.append(x.upper())
    return ("mixed", np.array(nums, dtype=np.int64), names)


def _set_ids(scope: _Scope, name: str, seen=()) -> np.ndarray:
    parts = []
    for entry in scope.elsets.get(name.upper(), []):
        parts.append(entry[1])
        if entry[0] == "mixed":
            for sub in entry[2]:
                if sub not in seen and sub != name.upper():
                    parts.append(_set_ids(scope, sub, (*seen, name.upper())))
    return np.concatenate(parts) if parts else np.zeros(0, np.int64)


def _flatten(src, top, parts, instances, materials, nrows) -> RawMesh:
    label = str(src.files[0]) if src.files else "<text>"
    if parts and (top.elements or any(len(n[0]) for n in top.nodes if top.elements)):
        raise MeshReadError(f"{label}: elements both inside and outside *PART blocks; "
                            "export either a flat mesh or parts with instances")
    if parts and not instances:
        raise MeshReadError(f"{label}: parts are defined but no *INSTANCE uses them, so the "
                            "model holds no mesh; add an *ASSEMBLY with instances or export "
                            "a flat mesh")
    if instances:
        insts = []
        for ins in instances:
            if ins.inline is not None:
                insts.append((ins, ins.inline))
                continue
            part = parts.get(ins.part.upper())
            if part is None:
                raise MeshReadError(f"{ins.where}: instance '{clean_name(ins.name)}' uses part "
                                    f"'{clean_name(ins.part)}', which is not defined; check "
                                    "the part name")
            insts.append((ins, part))
        prefix = len(insts) > 1
    else:
        insts = [(None, top)]
        prefix = False

    points, point_ids, blocks_by_type, region_sets = [], [], {}, []
    offset = 0
    ignored: dict[str, int] = {}
    for ins, sc in insts:
        for key, v in sc.ignored.items():
            ignored[key] = ignored.get(key, 0) + v
        if sc.nodes:
            ids = np.concatenate([n[0] for n in sc.nodes])
            xyz = np.concatenate([n[1] for n in sc.nodes])
        else:
            ids, xyz = np.zeros(0, np.int64), np.zeros((0, 3))
        dup = first_duplicate(ids)
        if dup is not None:
            raise MeshReadError(f"{sc.nodes[0][2]}: node {int(ids[dup[1]])} is defined twice"
                                f"{' in part ' + clean_name(sc.name) if sc.name else ''}; "
                                "renumber the nodes")
        if ins is not None:
            xyz = xyz + ins.translation
            if ins.rotation is not None:
                xyz = _rotate(xyz, *ins.rotation)
        look = index_of(ids)
        elem_index = {}
        e_ids_all = []
        for ctype, eids, conn, elset, where in sc.elements:
            idx = look(conn)
            if (idx < 0).any():
                r, c = np.argwhere(idx < 0)[0]
                raise MeshReadError(f"{where}: element {int(eids[r])} refers to node "
                                    f"{int(conn[r, c])}, which is not defined; export the mesh "
                                    "with all its nodes")
            lst = blocks_by_type.setdefault(ctype, [])
            base = sum(len(b[0]) for b in lst)
            lst.append((idx + offset, eids))
            elem_index.setdefault(ctype, []).append((eids, base))
            e_ids_all.append(eids)
        if e_ids_all:
            allids = np.concatenate(e_ids_all)
            dup = first_duplicate(allids)
            if dup is not None:
                raise MeshReadError(f"{label}: element number {int(allids[dup[1]])} is used "
                                    "twice; renumber the elements")
        # regions of this scope
        tag_prefix = f"{ins.name}." if (ins is not None and prefix) else ""
        cand = [(s[0], s[1]) for s in sc.sections if s[0]]
        if not cand:           # named *ELSET blocks (not CAE's internal "_..." sets)
            from_elements = {e[3].upper() for e in sc.elements if e[3]}
            cand = [(nm, None) for nm in sc.elsets
                    if nm not in from_elements and not nm.startswith("_")]
        if not cand:
            cand = [(e[3], None) for e in sc.elements if e[3]]
        seen = set()
        for setname, mat in cand:
            if setname.upper() in seen:
                continue
            seen.add(setname.upper())
            ids_set = _set_ids(sc, setname)
            members = []
            for ctype, lst in elem_index.items():
                for eids, base in lst:
                    hit = np.flatnonzero(np.isin(eids, ids_set))
                    if hit.size:
                        members.append((ctype, base + hit))
            if members:
                shown = sc.set_names.get(setname.upper(), setname)
                region_sets.append((tag_prefix + shown, members, mat))
        points.append(xyz)
        point_ids.append(ids)
        offset += len(ids)
    pts = np.concatenate(points) if points else np.zeros((0, 3))
    blocks, tag_of = [], {}
    region_names = {}
    # bigger sets first so that smaller (more specific) sets win where they overlap
    order = sorted(range(len(region_sets)),
                   key=lambda i: -sum(len(m[1]) for m in region_sets[i][1]))
    tags = {t: np.zeros(sum(len(b[0]) for b in lst), np.int64) for t, lst in blocks_by_type.items()}
    for rank, i in enumerate(sorted(range(len(region_sets)))):
        tag_of[i] = rank + 1
        region_names[rank + 1] = clean_name(region_sets[i][0])
    for i in order:
        for ctype, rows in region_sets[i][1]:
            tags[ctype][rows] = tag_of[i]
    for ctype, lst in blocks_by_type.items():
        cells = np.concatenate([b[0] for b in lst])
        eids = np.concatenate([b[1] for b in lst])
        blocks.append(RawBlock(ctype, cells, tags[ctype], eids))
    speeds = []
    for i, (setname, members, mat) in enumerate(region_sets):
        if mat is None:
            continue
        m = materials.get(mat.upper())
        if m and m.get("bulk") and m.get("density") and m["bulk"] / m["density"] > 0:
            speeds.append(SpeedHint(f"*ACOUSTIC MEDIUM of material {clean_name(m['name'])}",
                                    math.sqrt(m["bulk"] / m["density"]), (tag_of[i],)))
    from .prescan import abaqus_counts
    expected = abaqus_counts(src.data)
    checks = (("*ELEMENT data lines", expected["elements"], nrows["elements"]),
              ("*NODE data lines", expected["nodes"], nrows["nodes"]))
    pid = np.concatenate(point_ids) if point_ids else np.zeros(0, np.int64)
    return RawMesh(points=pts, blocks=tuple(blocks), region_names=region_names, format=FORMAT,
                   point_ids=pid, speeds=tuple(speeds), counts=checks, ignored=ignored)
