"""Record the kernel specialisations that audits use, for the ahead-of-time build.

Usage::

    python benchmarks/record_kernels.py [MESH ...] [--units m] [--out FILE]

Runs the CLI audit (every report but the HTML one, the cost on) with
``MESHCHECK_KERNELS=numba`` on the bundled sample meshes (linear tetrahedra,
quadratic tetrahedra in mm, hexahedra with wedges; the first also as Nastran bulk
data, for the text readers' parsers) and on the meshes given (e.g.
the reference meshes of ``make_reference_meshes.py``: their sizes take the chunked
code paths), in this one process, then adds the argument types of every kernel call from Python to
``meshcheck/kernels/specialisations.json`` (:func:`meshcheck.kernels.ahead.recording`,
:func:`~meshcheck.kernels.ahead.record`; helper kernels compile into their callers).  A call whose argument types are not
listed still runs, through numba's dispatcher.
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SAMPLES = [("enclosure.msh", "m"), ("silencer_mm.msh", "mm"), ("plenum_hex.msh", "m")]


def bulk_data_samples(folder: Path) -> list[Path]:
    """The tetrahedra of the first sample as Nastran bulk data, so that the text readers'
    parsers are recorded too: by meshio's writer (large field GRID* with continuation
    lines) and in small field, one line per card (as gmsh writes)."""
    import meshio
    import numpy as np

    m = meshio.read(ROOT / "sample_meshes" / SAMPLES[0][0])
    tets = np.concatenate([c.data for c in m.cells if c.type == "tetra"])
    large = folder / "sample_large.bdf"
    meshio.write(large, meshio.Mesh(m.points, [("tetra", tets)]), file_format="nastran")
    small = folder / "sample_small.bdf"
    lines = ["BEGIN BULK"]
    lines += ["GRID    %-8d        %s" % (i + 1, "".join(f"{v:<8.5f}"[:8] for v in p))
              for i, p in enumerate(m.points)]
    lines += ["CTETRA  %-8d%-8d%s" % (k + 1, 1, "".join(f"{v + 1:<8d}" for v in c))
              for k, c in enumerate(tets)]
    small.write_text("\n".join(lines + ["ENDDATA", ""]))
    return [large, small]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("meshes", nargs="*", type=Path)
    ap.add_argument("--units", default="m", help="unit of the meshes given (default m)")
    ap.add_argument("--out", type=Path, default=None, help="list to add to (default: the "
                    "package's specialisations.json)")
    args = ap.parse_args(argv)
    os.environ["MESHCHECK_KERNELS"] = "numba"
    from meshcheck import cli
    from meshcheck.kernels import ahead

    with tempfile.TemporaryDirectory() as tmp, ahead.recording() as calls:
        runs = [(ROOT / "sample_meshes" / m, u) for m, u in SAMPLES]
        runs += [(p, "m") for p in bulk_data_samples(Path(tmp))]
        runs += [(m, args.units) for m in args.meshes]
        for mesh, unit in runs:
            for extra in ([], ["--order", "2"]):
                argv = ["audit", str(mesh), "--units", unit, "--fmin", "50", "--fmax",
                        "2000", "--step", "9.798995", "--quiet", "--out", tmp,
                        "--reports", "json,md,vtu,pos", *extra]
                try:
                    cli.app(argv, standalone_mode=False)
                except SystemExit:
                    pass
                print(f"audited {mesh.name} {' '.join(extra)}", flush=True)
    known = ahead.record(calls, args.out)
    print(f"{len(known)} specialisations in {args.out or ahead.SPECIALISATIONS}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
