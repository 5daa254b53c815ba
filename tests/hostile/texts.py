"""Tiny mesh files written as text by the tests, in each format's own conventions.

Geometry: the unit cube (VTK hexahedron corner order) split into the 6 Kuhn
tetrahedra, one hexahedron, two wedges (the cube cut along a diagonal plane)
or a pyramid; quadratic cells get their mid-side nodes at the edge midpoints
and are written in the node order of the target format, so that a reader
that permutes them wrongly puts mid-side nodes away from the midpoints.
"""
from __future__ import annotations

import numpy as np

from meshcheck.cells import CELL_TYPES
from meshes import KUHN

CUBE = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0],
                 [0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]], dtype=float)
#: two wedges filling the cube (triangle 0-1-2 / 4-5-6 and 0-2-3 / 4-6-7)
WEDGES = np.array([[0, 1, 2, 4, 5, 6], [0, 2, 3, 4, 6, 7]])
#: the pyramid on the cube's bottom face with apex at the top centre
PYR_POINTS = np.vstack([CUBE[:4], [[0.5, 0.5, 1.0]]])


def quadratic(points: np.ndarray, cells: np.ndarray, ctype: str):
    """Add edge midpoints: (points, cells in meshio/VTK order of the quadratic type)."""
    info = CELL_TYPES[ctype]
    pts = [p for p in points]
    out = []
    index = {}
    for c in cells:
        row = list(c[:info.n_corners])
        for a, b, _m in info.edges:
            key = tuple(sorted((int(c[a]), int(c[b]))))
            if key not in index:
                index[key] = len(pts)
                pts.append(0.5 * (points[key[0]] + points[key[1]]))
            row.append(index[key])
        out.append(row)
    return np.array(pts), np.array(out)


# ---- Nastran ---------------------------------------------------------------
def nas_small(name: str, fields: list, cont: str = "+") -> str:
    """A small-field card (8 columns per field), continued every 8 data fields."""
    f = [str(x) for x in fields]
    lines = []
    first = True
    while f or first:
        chunk, f = f[:8], f[8:]
        head = name.ljust(8) if first else cont.ljust(8)
        lines.append(head + "".join(x.rjust(8)[:8] if len(x) <= 8 else x[:8] for x in chunk))
        first = False
    return "\n".join(lines)


def nas_large(name: str, fields: list) -> str:
    """A large-field card (``NAME*``, 16 columns, continued with ``*``)."""
    f = [str(x) for x in fields]
    lines = []
    first = True
    while f or first:
        chunk, f = f[:4], f[4:]
        head = (name + "*").ljust(8) if first else "*".ljust(8)
        lines.append(head + "".join(x.ljust(16)[:16] for x in chunk))
        first = False
    return "\n".join(lines)


def nas_free(name: str, fields: list) -> str:
    """A free-field card, continued with ``+,`` lines every 8 data fields."""
    f = [str(x) for x in fields]
    lines = []
    first = True
    while f or first:
        chunk, f = f[:8], f[8:]
        lines.append(",".join([name if first else "+"] + chunk))
        first = False
    return "\n".join(lines)


def _real(x) -> str:
    return repr(float(x))


def nastran(points, elements, style="small", begin=True, end=True, extra=(), pid=1,
            head="", grid_cp=None) -> str:
    """Bulk data text: GRID points (1-based ids) and elements [(card, [node lists])]."""
    card = {"small": nas_small, "large": nas_large, "free": nas_free}[style]
    out = [head] if head else []
    out.append("$ written by the meshcheck tests")
    if begin:
        out.append("BEGIN BULK")
    for i, p in enumerate(points):
        cp = "" if grid_cp is None else str(grid_cp)
        out.append(card("GRID", [i + 1, cp] + [_real(x) for x in p]))
    eid = 1
    for name, cells in elements:
        for c in cells:
            out.append(card(name, [eid, pid] + [int(n) + 1 for n in c]))
            eid += 1
    out.extend(extra)
    if end:
        out.append("ENDDATA")
    return "\n".join(out) + "\n"


#: Nastran node order -> VTK order is identity except these (VTK position -> Nastran position)
NAS_FROM_VTK = {"hexahedron20": np.r_[0:8, 8:12, 16:20, 12:16],
                "wedge15": np.r_[0:6, 6:9, 12:15, 9:12]}


def to_nastran_order(ctype: str, cells: np.ndarray) -> np.ndarray:
    perm = NAS_FROM_VTK.get(ctype)
    if perm is None:
        return cells
    out = np.empty_like(cells)
    out[:, perm] = cells          # VTK position k holds Nastran node perm[k]
    return out


# ---- Abaqus ------------------------------------------------------------------
def abaqus(points, elements, head="*HEADING\ntests\n", extra="", node_kw="*NODE",
           elset=None) -> str:
    out = [head.rstrip("\n"), node_kw]
    out += [f"{i + 1}, {float(p[0])!r}, {float(p[1])!r}, {float(p[2])!r}"
            for i, p in enumerate(points)]
    eid = 1
    for etype, cells in elements:
        out.append(f"*ELEMENT, TYPE={etype}" + (f", ELSET={elset}" if elset else ""))
        for c in cells:
            out.append(", ".join(str(x) for x in [eid] + [int(n) + 1 for n in c]))
            eid += 1
    if extra:
        out.append(extra.rstrip("\n"))
    return "\n".join(out) + "\n"


# ---- I-DEAS universal ----------------------------------------------------------
def unv(points, elements, groups=(), units=None, csys=1) -> str:
    """points (n, 3); elements [(FE descriptor, cells in UNV order)]; groups [(name, element labels)];
    units: (code, description, length factor) for dataset 164."""
    out = []
    if units is not None:
        code, desc, factor = units
        out += ["    -1", "   164", f"{code:10d}{desc:<20s}{2:10d}",
                f"{factor:25.16E}{1.0:25.16E}{1.0:25.16E}".replace("E", "D"),
                f"{273.15:25.16E}".replace("E", "D"), "    -1"]
    out += ["    -1", "  2411"]
    for i, p in enumerate(points):
        out.append(f"{i + 1:10d}{csys:10d}{csys:10d}{11:10d}")
        out.append("".join(f"{float(x):25.16E}".replace("E", "D") for x in p))
    out += ["    -1", "    -1", "  2412"]
    eid = 1
    for fe, cells in elements:
        for c in cells:
            out.append(f"{eid:10d}{fe:10d}{1:10d}{1:10d}{7:10d}{len(c):10d}")
            if fe in (11, 21, 22, 23, 24, 31, 32):
                out.append(f"{0:10d}{1:10d}{1:10d}")
            nodes = [int(n) + 1 for n in c]
            for k in range(0, len(nodes), 8):
                out.append("".join(f"{n:10d}" for n in nodes[k:k + 8]))
            eid += 1
    out.append("    -1")
    for gnum, (name, labels) in enumerate(groups, start=1):
        out += ["    -1", "  2467", f"{gnum:10d}{0:10d}{0:10d}{0:10d}{0:10d}{0:10d}{0:10d}"
                f"{len(labels):10d}", name]
        ents = [f"{8:10d}{lab:10d}{0:10d}{0:10d}" for lab in labels]
        for k in range(0, len(ents), 2):
            out.append("".join(ents[k:k + 2]))
        out.append("    -1")
    return "\n".join(out) + "\n"


#: UNV order of parabolic cells: positions in the UNV record of VTK's nodes (see unv.py)
UNV_FROM_VTK = {"tetra10": [0, 2, 4, 9, 1, 3, 5, 6, 7, 8],
                "hexahedron20": [0, 2, 4, 6, 12, 14, 16, 18, 1, 3, 5, 7, 13, 15, 17, 19,
                                 8, 9, 10, 11],
                "wedge15": [0, 2, 4, 9, 11, 13, 1, 3, 5, 10, 12, 14, 6, 7, 8]}


def to_unv_order(ctype: str, cells: np.ndarray) -> np.ndarray:
    perm = UNV_FROM_VTK.get(ctype)
    if perm is None:
        return cells
    out = np.empty_like(cells)
    out[:, perm] = cells
    return out


# ---- gmsh MSH 2.2 ASCII -------------------------------------------------------------
GMSH_TYPES = {"tetra": 4, "hexahedron": 5, "wedge": 6, "pyramid": 7, "triangle": 2, "quad": 3}


def msh22(points, elements, physical=1, names=None) -> str:
    out = ["$MeshFormat", "2.2 0 8", "$EndMeshFormat"]
    if names:
        out += ["$PhysicalNames", str(len(names))]
        out += [f'{d} {t} "{n}"' for (d, t), n in names.items()]
        out += ["$EndPhysicalNames"]
    out += ["$Nodes", str(len(points))]
    out += [f"{i + 1} {float(p[0])!r} {float(p[1])!r} {float(p[2])!r}"
            for i, p in enumerate(points)]
    out += ["$EndNodes", "$Elements"]
    rows = []
    for ctype, cells, *tag in elements:
        ph = tag[0] if tag else physical
        for c in cells:
            rows.append((GMSH_TYPES[ctype], ph, [int(n) + 1 for n in c]))
    out.append(str(len(rows)))
    for k, (t, ph, nodes) in enumerate(rows):
        out.append(" ".join(str(x) for x in [k + 1, t, 2, ph, 1] + nodes))
    out.append("$EndElements")
    return "\n".join(out) + "\n"


def cube_tets():
    return CUBE.copy(), KUHN.copy()
