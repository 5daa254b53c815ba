"""Predicted against measured cost of real factorisations on meshes not used in the fit.

Usage::

    python benchmarks/bench_cost.py [--machine FILE] [--out results.json] [--quick]

For every case the Helmholtz system (NGSolve assembly, interiors condensed)
is factorised by the calibrated solver (SuperLU, one BLAS thread, child
process) and the measured factorisation memory (peak resident set rise),
factorisation + solve CPU time and assembly CPU time are compared with the
predictions of the machine constants (default: the active ones, see
``meshcheck.calibration.load_machine``).  Meshes: the three sample meshes
(enclosure: tets; silencer: quadratic tets, corners used; plenum: hexahedra and
wedges), a gmsh box-minus-cylinder (benchmarks/make_reference_meshes.py) and
a distorted hexahedral grid, with uniform orders and the orders an audit
advises (variable order).  None of them is used by ``meshcheck calibrate``
(which uses sub-meshes of a gmsh box).  Target: every ratio within 2x.
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "benchmarks"))

from meshcheck.advice import AdviceSettings, advise  # noqa: E402
from meshcheck.calibration import load_machine, measure, submesh  # noqa: E402
from meshcheck.cost import cell_orders_at  # noqa: E402
from meshcheck.mesh import CellBlock, Mesh  # noqa: E402
from meshcheck.reading import read_mesh  # noqa: E402
from meshcheck.topology import build_topology  # noqa: E402


def _cylinder_box(n_cells: float) -> Mesh:
    import make_reference_meshes as ref

    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "cyl.msh"
        ref.make_tets(path, n_cells, threads=1)
        return read_mesh(path, "m")


def _hex_grid(n_cells: float) -> Mesh:
    import make_reference_meshes as ref

    pts, cells = ref.hex_grid(n_cells)
    return Mesh(pts, (CellBlock("hexahedron", cells, np.ones(len(cells))),), {1: "air"}, 3,
                "distorted hex grid", "m")


def _advised_orders(mesh: Mesh, fmax: float, max_order: int) -> np.ndarray:
    topo = build_topology(mesh)
    adv = advise(mesh, topo, np.full(mesh.n_cells, 343.0), fmax,
                 AdviceSettings(target=0.01, max_order=max_order))
    return cell_orders_at(adv.cell_limit, fmax, max_order)


def cases(quick: bool):
    """(label, mesh, orders) triples."""
    enc = read_mesh(ROOT / "sample_meshes" / "enclosure.msh", "m")
    sil = read_mesh(ROOT / "sample_meshes" / "silencer_mm.msh", "mm")
    ple = read_mesh(ROOT / "sample_meshes" / "plenum_hex.msh", "m")
    t_enc, t_sil = build_topology(enc), build_topology(sil)
    out = [("enclosure p=1", enc, 1),
           ("enclosure 4000 cells p=3", submesh(enc, t_enc, 4000), 3),
           ("enclosure variable p<=4 at 1.6 kHz", enc, _advised_orders(enc, 1600.0, 4)),
           ("silencer corners p=1", sil, 1),
           ("silencer 2500 cells p=2", submesh(sil, t_sil, 2500), 2),
           ("plenum hex+wedge p=2", ple, 2),
           ("plenum hex+wedge p=3", ple, 3),
           ("hex grid 3000 p=2", _hex_grid(3000), 2)]
    if not quick:
        cyl = _cylinder_box(60000)
        t_cyl = build_topology(cyl)
        out += [("cylinder box 60k p=1", cyl, 1),
                ("cylinder box 9000 cells p=2", submesh(cyl, t_cyl, 9000), 2),
                ("cylinder box 2000 cells p=4", submesh(cyl, t_cyl, 2000), 4),
                ("silencer variable p<=5 at 3 kHz", sil, _advised_orders(sil, 3000.0, 5)),
                ("hex grid 1200 p=4", _hex_grid(1200), 4)]
    return out


def run(machine, quick: bool = False, say=print) -> list[dict]:
    rows = []
    for label, mesh, orders in cases(quick):
        t0 = time.perf_counter()
        s = measure(mesh, orders)
        pr = machine.predict(mesh.dim, [s.ndof], [s.nnz], [s.cells], [s.entries], [s.cubes])
        row = {"case": label, "cells": s.cells, "ndof": s.ndof, "nnz": s.nnz,
               "fill": s.fill, "fill_pred": float(pr.fill[0]),
               "memory": s.factor_bytes, "memory_pred": float(pr.factor_bytes[0]),
               "time": s.factor_s + s.solve_s,
               "time_pred": float(pr.factor_s[0] + pr.solve_s[0]),
               "assembly": s.assembly_s, "assembly_pred": float(pr.assembly_s[0]),
               "wall_s": time.perf_counter() - t0}
        rows.append(row)
        say(f"{label}: N={s.ndof:,} nnz={s.nnz:,} memory {s.factor_bytes / 1e6:.1f} MB "
            f"(pred {row['memory_pred'] / 1e6:.1f}), time {row['time']:.2f} s "
            f"(pred {row['time_pred']:.2f}), assembly {s.assembly_s:.3f} s "
            f"(pred {row['assembly_pred']:.3f})")
    return rows


def table(rows: list[dict]) -> str:
    head = ("| case | cells | unknowns | non-zeros | factor memory MB measured / predicted "
            "| ratio | factor+solve s measured / predicted | ratio | assembly s measured / "
            "predicted | ratio |")
    lines = [head, "|" + "---|" * 10]
    for r in rows:
        lines.append(
            f"| {r['case']} | {r['cells']:,} | {r['ndof']:,} | {r['nnz']:,} | "
            f"{r['memory'] / 1e6:.1f} / {r['memory_pred'] / 1e6:.1f} | "
            f"{r['memory'] / r['memory_pred']:.2f} | {r['time']:.2f} / {r['time_pred']:.2f} | "
            f"{r['time'] / r['time_pred']:.2f} | {r['assembly']:.3f} / "
            f"{r['assembly_pred']:.3f} | {r['assembly'] / r['assembly_pred']:.2f} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--machine", default=None, help="machine constants (JSON)")
    ap.add_argument("--out", default=None, help="write the rows as JSON")
    ap.add_argument("--quick", action="store_true", help="only the sample meshes")
    args = ap.parse_args(argv)
    machine = load_machine(args.machine)
    print(f"machine constants: {machine.source}")
    rows = run(machine, args.quick)
    print(table(rows))
    ratios = np.array([[r["memory"] / r["memory_pred"], r["time"] / r["time_pred"],
                        r["assembly"] / r["assembly_pred"]] for r in rows])
    within = np.abs(np.log(ratios)) <= np.log(2.0)
    print(f"within 2x: memory {within[:, 0].sum()}/{len(rows)}, time {within[:, 1].sum()}/"
          f"{len(rows)}, assembly {within[:, 2].sum()}/{len(rows)}")
    if args.out:
        Path(args.out).write_text(json.dumps(rows, indent=1))
    return 0 if within.all() else 1


if __name__ == "__main__":
    sys.exit(main())
