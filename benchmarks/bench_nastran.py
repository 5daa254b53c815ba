"""Nastran bulk data reading speed: meshcheck vs meshio vs gmsh on a 1M-tet file.

Usage::

    python benchmarks/bench_nastran.py [OUTDIR] [--cells 1e6] [--repeat 3]

Builds the reference tet mesh of ``make_reference_meshes.py`` (box minus
cylinder, gmsh HXT) unless it is already in OUTDIR, writes it as Nastran bulk
data with gmsh (small-field GRID/CTETRA/CTRIA3 cards, gmsh's default BDF
export; a BEGIN BULK line is added, which meshio requires), then times on the same file

* meshcheck: ``read_mesh(path, units="m")`` (pre-scan, read, cross-checks,
  Mesh in metres),
* meshio 5.3.5: ``meshio.read(path, file_format="nastran")``,
* gmsh: ``gmsh.open(path)`` through its Python API,

``--numpy`` reads ours on the numpy path (``MESHCHECK_KERNELS=numpy``, as when the
kernels' module is not built), here and in the fresh processes.

``--repeat`` runs each, ours and gmsh alternating (meshio once, it is slow), then
``--fresh`` first reads of each in new processes (what a single audit meets: the
reader's new memory is touched for the first time there), and checks that the
three readings agree exactly: the same GRID coordinates (bit for bit) and the
same tetrahedra (node numbers, element by element).  Prints the times and the
speed-up ratios.  Run it on an idle machine: the ratios are what matter.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))


def make_bdf(outdir: Path, n_cells: float) -> Path:
    """The reference mesh as gmsh-written Nastran bulk data (reused when present)."""
    import gmsh

    from make_reference_meshes import make_tets

    tag = f"{n_cells:.0e}".replace("+0", "").replace("+", "")
    msh = outdir / f"box_cylinder_tet4_{tag}.msh"
    bdf = outdir / f"box_cylinder_tet4_{tag}.bdf"
    tmp = outdir / f"box_cylinder_tet4_{tag}.gmsh.bdf"
    if not msh.exists():
        make_tets(msh, n_cells)
    if not bdf.exists():
        gmsh.initialize(interruptible=False)
        try:
            gmsh.option.setNumber("General.Terminal", 0)
            gmsh.open(str(msh))
            gmsh.option.setNumber("Mesh.BdfFieldFormat", 1)      # small fixed fields
            gmsh.option.setNumber("Mesh.SaveAll", 0)
            gmsh.write(str(tmp))
        finally:
            gmsh.finalize()
        # meshio needs a BEGIN BULK line, which gmsh does not write (gmsh skips it)
        text = tmp.read_bytes()
        first, _, rest = text.partition(b"\n")
        bdf.write_bytes(first + b"\nBEGIN BULK\n" + rest)
        tmp.unlink()
    return bdf


def best_of(fn, repeat: int):
    times, out = [], None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def read_gmsh(path: Path):
    """gmsh.open the file; return (time, node tags, coords, tet tags, tet node tags)."""
    import gmsh

    gmsh.initialize(interruptible=False)
    try:
        gmsh.option.setNumber("General.Terminal", 0)
        t0 = time.perf_counter()
        gmsh.open(str(path))
        dt = time.perf_counter() - t0
        tags, xyz, _ = gmsh.model.mesh.getNodes()
        etags, enodes = gmsh.model.mesh.getElementsByType(4)
    finally:
        gmsh.finalize()
    return dt, np.asarray(tags, np.int64), np.asarray(xyz).reshape(-1, 3), \
        np.asarray(etags, np.int64), np.asarray(enodes, np.int64).reshape(-1, 4)


#: the first read in a new process (imports before the clock), printing its time
FRESH_OURS = """
import sys, time
from pathlib import Path
from meshcheck.reading import read_mesh
t0 = time.perf_counter(); read_mesh(Path(sys.argv[1]), units="m")
print(time.perf_counter() - t0)
"""
FRESH_GMSH = """
import sys, time, gmsh
gmsh.initialize(interruptible=False); gmsh.option.setNumber("General.Terminal", 0)
t0 = time.perf_counter(); gmsh.open(sys.argv[1])
print(time.perf_counter() - t0)
"""


def fresh(code: str, path: Path) -> float:
    """Seconds of one first read in a fresh Python process."""
    import subprocess

    out = subprocess.run([sys.executable, "-c", code, str(path)], capture_output=True,
                         text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("outdir", nargs="?", default="/tmp/meshcheck-bench")
    ap.add_argument("--cells", type=float, default=1e6)
    ap.add_argument("--repeat", type=int, default=5)
    ap.add_argument("--skip-meshio", action="store_true")
    ap.add_argument("--fresh", type=int, default=3, help="also time the first read in this "
                    "many fresh processes each, ours and gmsh alternating (0: not)")
    ap.add_argument("--numpy", action="store_true", help="read ours on the numpy path "
                    "(MESHCHECK_KERNELS=numpy: no kernels' module, no numba)")
    args = ap.parse_args(argv)
    if args.numpy:
        os.environ["MESHCHECK_KERNELS"] = "numpy"  # (inherited by the fresh processes)
    outdir = Path(args.outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    bdf = make_bdf(outdir, args.cells)
    print(f"{bdf}: {bdf.stat().st_size / 1e6:.1f} MB"
          + (" (ours on the numpy path)" if args.numpy else ""))

    from meshcheck.formats.nastran import read_nastran
    from meshcheck.reading import read_mesh

    # ours and gmsh alternate, so that both meet the same machine load
    ours, gm = [], []
    for _ in range(args.repeat):
        t0 = time.perf_counter()
        mesh = read_mesh(bdf, units="m")
        ours.append(time.perf_counter() - t0)
        g = read_gmsh(bdf)
        gm.append(g[0])
    raw = read_nastran(bdf)
    tet = next(b for b in raw.blocks if b.type == "tetra")
    t_ours, t_gmsh = min(ours), min(gm)
    print(f"meshcheck: best {t_ours:6.2f} s, median {np.median(ours):6.2f} s  "
          f"({mesh.n_points:,} points, {mesh.n_cells:,} tets)")
    print(f"gmsh:      best {t_gmsh:6.2f} s, median {np.median(gm):6.2f} s")
    _, gtags, gxyz, getags, genodes = g
    # agreement with gmsh: coordinates by node number, tets by element number
    order = np.argsort(gtags)
    ours_by_id = raw.points[np.argsort(raw.point_ids)]
    same_xyz = np.array_equal(ours_by_id, gxyz[order]) and \
        np.array_equal(np.sort(raw.point_ids), gtags[order])
    eo = np.argsort(tet.ids)
    go = np.argsort(getags)
    same_tets = np.array_equal(tet.ids[eo], getags[go]) and \
        np.array_equal(raw.point_ids[tet.cells[eo]], genodes[go])
    print(f"  identical to gmsh: coordinates {same_xyz}, tetrahedra {same_tets}")

    t_meshio = None
    if not args.skip_meshio:
        import meshio

        t_meshio, m = best_of(lambda: meshio.read(bdf, file_format="nastran"), 1)
        print(f"meshio:    {t_meshio:7.2f} s")
        mt = m.cells_dict["tetra"]
        same_m = np.array_equal(m.points, raw.points) and np.array_equal(mt, tet.cells)
        print(f"  identical to meshio: coordinates and tetrahedra {same_m}")
    print(f"speed-up vs gmsh: {t_gmsh / t_ours:.1f}x best/best, "
          f"{np.median(gm) / np.median(ours):.1f}x median/median (target >= 5)")
    if args.fresh:
        f_ours, f_gmsh = [], []
        for _ in range(args.fresh):
            f_ours.append(fresh(FRESH_OURS, bdf))
            f_gmsh.append(fresh(FRESH_GMSH, bdf))
        print(f"first read in a fresh process (best / median of {args.fresh}): meshcheck "
              f"{min(f_ours):.2f} / {np.median(f_ours):.2f} s, gmsh {min(f_gmsh):.2f} / "
              f"{np.median(f_gmsh):.2f} s: {min(f_gmsh) / min(f_ours):.1f}x best/best, "
              f"{np.median(f_gmsh) / np.median(f_ours):.1f}x median/median")
    if t_meshio is not None:
        print(f"speed-up vs meshio: {t_meshio / t_ours:.1f}x (target >= 20)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
