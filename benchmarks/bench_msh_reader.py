"""gmsh MSH 4.1 reading: meshcheck's own reader vs meshio (and gmsh), time and peak memory.

Usage::

    python benchmarks/bench_msh_reader.py [FILE.msh ...] [--repeat 3] [--skip gmsh,...]

Default files: /tmp/mcbench/box_cylinder_tet4_1e6.msh and ..._5e6.msh (binary
MSH 4.1, made by ``make_reference_meshes.py``).  Every measurement runs in a
fresh Python process (``--child``), which imports what it needs, notes its
peak resident size (``ru_maxrss``), reads the file once and reports the read
time, the peak after the read and a digest of what it read:

* ``ours``: :func:`meshcheck.formats.gmsh.read_msh41` (the RawMesh);
* ``via_meshio``: :func:`meshcheck.formats.via_meshio.read_via_meshio`, the
  path meshcheck took before (meshio plus its guards);
* ``meshio``: ``meshio.read`` alone;
* ``read_mesh``: :func:`meshcheck.reading.read_mesh` as it is now (sniff, our
  reader, cross-checks, Mesh in metres) and ``read_mesh_before``: the same
  through ``via_meshio``;
* ``gmsh``: ``gmsh.open`` through its Python API (the arrays are fetched for
  the digest after the timing).

The digests must agree: coordinates bit for bit and the cells of every volume
type (node indices in file order for the meshio-based readers; node tags for
gmsh, whose node order is its own).  Prints best and median times, the peak
memory and the increase over the process before reading.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

DEFAULT = ["/tmp/mcbench/box_cylinder_tet4_1e6.msh", "/tmp/mcbench/box_cylinder_tet4_5e6.msh"]
READERS = ["ours", "via_meshio", "meshio", "read_mesh", "read_mesh_before", "gmsh"]
VOLUME = ("tetra", "tetra10", "hexahedron", "hexahedron20", "hexahedron27", "wedge", "pyramid")


def _mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _digest(points: np.ndarray, cells: dict) -> str:
    h = hashlib.sha256(np.ascontiguousarray(points, np.float64).tobytes())
    for t in sorted(cells):
        h.update(t.encode())
        h.update(np.ascontiguousarray(cells[t], np.int64).tobytes())
    return h.hexdigest()[:16]


def _by_type(pairs) -> dict:
    out: dict[str, list] = {}
    for t, c in pairs:
        if t in VOLUME:
            out.setdefault(t, []).append(np.asarray(c))
    return {t: np.concatenate(v) if len(v) > 1 else v[0] for t, v in out.items()}


def _detail(path: Path) -> str:
    """"MSH 4.1 binary" or "MSH 4.1 ASCII", as meshcheck's sniffer words it."""
    with open(path, "rb") as fh:
        fh.readline()
        return f"MSH 4.1 {'binary' if fh.readline().split()[1] == b'1' else 'ASCII'}"


def child(reader: str, path: Path) -> dict:
    """Read ``path`` once with ``reader`` in this (fresh) process."""
    if reader in ("ours", "read_mesh", "read_mesh_before", "via_meshio"):
        from meshcheck.formats.gmsh import read_msh41
        from meshcheck.reading import mesh_from_raw, read_mesh
        if reader != "ours":
            import meshio  # noqa: F401  (imported before the baseline, as a program would)
            from meshcheck.formats.via_meshio import read_via_meshio
    elif reader == "meshio":
        import meshio
    else:
        import gmsh
    base = _mib()
    t0 = time.perf_counter()
    by_tag = None
    if reader == "ours":
        raw = read_msh41(path)
        dt, peak = time.perf_counter() - t0, _mib()
        pts, cells = raw.points, _by_type((b.type, b.cells) for b in raw.blocks)
        by_tag = _digest(pts[np.argsort(raw.point_ids)],
                         {t: raw.point_ids[c] for t, c in cells.items()})
    elif reader == "via_meshio":
        raw = read_via_meshio(path, "gmsh", _detail(path))
        dt, peak = time.perf_counter() - t0, _mib()
        pts, cells = raw.points, _by_type((b.type, b.cells) for b in raw.blocks)
    elif reader in ("read_mesh", "read_mesh_before"):
        if reader == "read_mesh":
            m = read_mesh(path, units="m")
        else:
            m = mesh_from_raw(read_via_meshio(path, "gmsh", _detail(path)), str(path),
                              units="m")
        dt, peak = time.perf_counter() - t0, _mib()
        pts, cells = m.points, _by_type((b.type, b.cells) for b in m.blocks)
    elif reader == "meshio":
        m = meshio.read(path)
        dt, peak = time.perf_counter() - t0, _mib()
        pts, cells = m.points, _by_type((c.type, c.data) for c in m.cells)
    else:
        from meshcheck.formats.gmsh import GMSH_TO_VTK, GMSH_TYPES
        gmsh.initialize(interruptible=False)
        try:
            gmsh.option.setNumber("General.Terminal", 0)
            gmsh.open(str(path))
            dt = time.perf_counter() - t0
            peak = _mib()
            tags, xyz, _ = gmsh.model.mesh.getNodes()
            cells = {}
            for et in gmsh.model.mesh.getElementTypes(3):
                name, k = GMSH_TYPES[int(et)]
                _, nodes = gmsh.model.mesh.getElementsByType(et)
                c = np.asarray(nodes, np.int64).reshape(-1, k)
                cells[name] = c[:, GMSH_TO_VTK[name]] if name in GMSH_TO_VTK else c
        finally:
            gmsh.finalize()
        order = np.argsort(tags)
        return {"time": dt, "base": base, "peak": peak, "n_points": len(tags),
                "n_cells": sum(len(c) for c in cells.values()), "digest": None,
                "by_tag": _digest(np.asarray(xyz).reshape(-1, 3)[order], cells)}
    return {"time": dt, "base": base, "peak": peak, "n_points": len(pts),
            "n_cells": sum(len(c) for c in cells.values()), "digest": _digest(pts, cells),
            "by_tag": by_tag}


def run(reader: str, path: Path) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", reader, str(path)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("files", nargs="*", default=DEFAULT)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--skip", default="", help="comma-separated readers to leave out")
    ap.add_argument("--child", nargs=2, metavar=("READER", "FILE"), help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.child:
        print(json.dumps(child(args.child[0], Path(args.child[1]))))
        return 0
    readers = [r for r in READERS if r not in args.skip.split(",")]
    ok = True
    for f in map(Path, args.files):
        print(f"{f.name}: {f.stat().st_size / 2**20:.1f} MiB")
        res = {r: [run(r, f) for _ in range(args.repeat)] for r in readers}
        for r, rs in res.items():
            t = [x["time"] for x in rs]
            x = rs[-1]
            print(f"  {r:17s} best {min(t):6.3f} s  median {np.median(t):6.3f} s  "
                  f"peak {x['peak']:6.0f} MiB (+{x['peak'] - x['base']:4.0f} over "
                  f"{x['base']:4.0f})  {x['n_points']:,} points, {x['n_cells']:,} volume "
                  "cells")
        digests = {r: rs[-1]["digest"] for r, rs in res.items() if rs[-1]["digest"]}
        tags = {r: rs[-1]["by_tag"] for r, rs in res.items() if rs[-1]["by_tag"]}
        same = len(set(digests.values())) == 1 and len(set(tags.values())) <= 1
        ok &= same
        print(f"  same coordinates and cells: {same} (file order {digests}; by tag {tags})")
        if "ours" in res and "meshio" in res:
            b = min(x["time"] for x in res["ours"])
            print(f"  speed-up vs meshio.read: {min(x['time'] for x in res['meshio']) / b:.1f}x;"
                  f" read increase {res['ours'][-1]['peak'] - res['ours'][-1]['base']:.0f} MiB "
                  f"vs {res['meshio'][-1]['peak'] - res['meshio'][-1]['base']:.0f} MiB")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
