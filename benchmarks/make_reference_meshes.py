"""Generate reference meshes for meshcheck's benchmarks.

Usage::

    python benchmarks/make_reference_meshes.py [OUTDIR] --cells 1e6 [--order 2] [--hex]

OUTDIR defaults to /tmp/meshcheck-bench. Geometry (metres): the box
[0, 1.0] x [0, 0.6] x [0, 0.5] minus a cylinder of radius 0.1 along z through
(0.5, 0.3), volume V = 0.3 - 0.005 pi = 0.2843 m^3.

* default: linear tets (gmsh, HXT 3D algorithm, 2 threads), binary MSH 4.1,
  physical volume "fluid", surfaces "walls" and "cylinder".
* ``--order 2``: the same tets made quadratic (tetra10, mid-nodes on the
  cylinder).
* ``--hex``: no gmsh; a structured hexahedral grid of the plain box built with
  numpy, every interior node moved by a random vector of length <= 0.2 h
  (fixed seed), written with meshio as binary MSH 4.1. A shift of at most 0.2 h
  per node changes each edge vector by at most 0.4 h, so the corner Jacobian
  matrices stay within Frobenius distance 0.4 sqrt(3) h < h of h*I and remain
  positive: the grid is distorted but valid.

Tet size: a regular tet of edge h has volume h^3 / (6 sqrt(2)), so N tets fill V
when h0 = (6 sqrt(2) V / N)^(1/3). Delaunay meshes of a target size h hold more
tets than that (their tets are not regular and edges scatter around h), so h0
is multiplied by ``TET_SIZE_FACTOR``, measured with this script and gmsh 4.15
(HXT): see the module constant. If a mesh still misses the request by more than
25 % (small N, where the boundary dominates), h is rescaled by the cube root of
the miss and the mesh regenerated (at most twice). Prints the cell count and the
time taken. With 2 threads HXT is not bit-reproducible: counts vary by ~0.1 %
between runs.
"""
from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np

BOX = (1.0, 0.6, 0.5)
CYL_CENTER, CYL_RADIUS = (0.5, 0.3), 0.1
VOLUME = BOX[0] * BOX[1] * BOX[2] - math.pi * CYL_RADIUS ** 2 * BOX[2]
# Measured with gmsh 4.15.2 (HXT, uniform size h): with h = h0 the mesh holds
# about 0.48 N tets (5.6e3, 4.9e4, 1.4e5 for N = 1e4, 1e5, 3e5), so h0 is scaled
# by 0.48^(1/3) = 0.78. With 0.78: 1.10e4, 1.002e5, 9.66e5 tets for N = 1e4, 1e5,
# 1e6 (within +10 % / -4 %).
TET_SIZE_FACTOR = 0.78


def tet_size(n_cells: float, factor: float = TET_SIZE_FACTOR) -> float:
    """Target edge length (m) for about n_cells linear tets in the reference volume."""
    return factor * (6.0 * math.sqrt(2.0) * VOLUME / n_cells) ** (1.0 / 3.0)


def make_tets(path: Path, n_cells: float, order: int = 1, threads: int = 2,
              factor: float = TET_SIZE_FACTOR) -> int:
    """Mesh box-minus-cylinder with gmsh and write binary MSH 4.1; return the tet count."""
    import gmsh

    h = tet_size(n_cells, factor)
    gmsh.initialize(interruptible=False)
    try:
        opt = gmsh.option.setNumber
        opt("General.Terminal", 0)
        opt("General.Verbosity", 2)
        opt("General.NumThreads", threads)
        opt("Mesh.RandomSeed", 1)
        opt("Mesh.Algorithm", 6)
        opt("Mesh.Algorithm3D", 10)            # HXT
        opt("Mesh.MeshSizeFromPoints", 0)
        opt("Mesh.MeshSizeFromCurvature", 0)
        opt("Mesh.MeshSizeExtendFromBoundary", 0)
        opt("Mesh.MeshSizeMin", h)
        opt("Mesh.MeshSizeMax", h)
        opt("Mesh.ElementOrder", order)
        opt("Mesh.SecondOrderLinear", 0)
        opt("Mesh.HighOrderOptimize", 0)
        opt("Mesh.MshFileVersion", 4.1)
        opt("Mesh.Binary", 1)
        opt("Mesh.SaveAll", 0)
        gmsh.model.add("box_minus_cylinder")
        occ = gmsh.model.occ
        box = occ.addBox(0, 0, 0, *BOX)
        cyl = occ.addCylinder(CYL_CENTER[0], CYL_CENTER[1], 0, 0, 0, BOX[2], CYL_RADIUS)
        out, _ = occ.cut([(3, box)], [(3, cyl)])
        occ.synchronize()
        vol = [t for _, t in out]
        bnd = [t for _, t in gmsh.model.getBoundary(out, oriented=False)]
        eps = 1e-6
        cx, cy = CYL_CENTER
        r = CYL_RADIUS
        s_cyl = [t for _, t in gmsh.model.getEntitiesInBoundingBox(
            cx - r - eps, cy - r - eps, -eps, cx + r + eps, cy + r + eps, BOX[2] + eps, 2)]
        s_walls = sorted(set(bnd) - set(s_cyl))
        gmsh.model.addPhysicalGroup(3, vol, 1, name="fluid")
        gmsh.model.addPhysicalGroup(2, s_walls, 11, name="walls")
        gmsh.model.addPhysicalGroup(2, s_cyl, 12, name="cylinder")
        for _attempt in range(3):
            gmsh.model.mesh.generate(3)
            n = 0
            for etype in gmsh.model.mesh.getElementTypes(3):
                n += len(gmsh.model.mesh.getElementsByType(etype)[0])
            if abs(n / n_cells - 1.0) <= 0.25:
                break
            # Small meshes (boundary layer of cut tets dominates): rescale once more.
            h *= (n / n_cells) ** (1.0 / 3.0)
            gmsh.model.mesh.clear()
            opt("Mesh.MeshSizeMin", h)
            opt("Mesh.MeshSizeMax", h)
        gmsh.write(str(path))
        return n
    finally:
        gmsh.finalize()


def hex_grid(n_cells: float, seed: int = 12345, distortion: float = 0.2):
    """Distorted structured hex grid of the box.

    Returns points (n, 3) float64 metres and cells (m, 8) int64 in meshio/VTK
    hexahedron order; m = nx*ny*nz is about n_cells.
    """
    h = (BOX[0] * BOX[1] * BOX[2] / n_cells) ** (1.0 / 3.0)
    nx, ny, nz = (max(1, round(L / h)) for L in BOX)
    x = np.linspace(0, BOX[0], nx + 1)
    y = np.linspace(0, BOX[1], ny + 1)
    z = np.linspace(0, BOX[2], nz + 1)
    X, Y, Z = np.meshgrid(x, y, z, indexing="ij")
    pts = np.stack([X.ravel(), Y.ravel(), Z.ravel()], axis=1)
    # Move interior nodes by a vector uniformly distributed in the ball of
    # radius distortion * h_min (h_min: smallest grid spacing).
    hmin = min(BOX[0] / nx, BOX[1] / ny, BOX[2] / nz)
    interior = ((X > 0) & (X < BOX[0]) & (Y > 0) & (Y < BOX[1])
                & (Z > 0) & (Z < BOX[2])).ravel()
    rng = np.random.default_rng(seed)
    k = int(interior.sum())
    d = rng.normal(size=(k, 3))
    d /= np.linalg.norm(d, axis=1, keepdims=True)
    d *= (distortion * hmin * rng.random(k) ** (1.0 / 3.0))[:, None]
    pts[interior] += d
    idx = np.arange(pts.shape[0]).reshape(nx + 1, ny + 1, nz + 1)
    c = [idx[:-1, :-1, :-1], idx[1:, :-1, :-1], idx[1:, 1:, :-1], idx[:-1, 1:, :-1],
         idx[:-1, :-1, 1:], idx[1:, :-1, 1:], idx[1:, 1:, 1:], idx[:-1, 1:, 1:]]
    cells = np.stack([a.ravel() for a in c], axis=1).astype(np.int64)
    return pts, cells


def make_hex(path: Path, n_cells: float, seed: int = 12345) -> int:
    """Write the distorted hex grid as binary MSH 4.1 with meshio; return the cell count."""
    import meshio

    pts, cells = hex_grid(n_cells, seed)
    m = len(cells)
    mesh = meshio.Mesh(
        pts, [("hexahedron", cells)],
        cell_data={"gmsh:physical": [np.ones(m, dtype=np.int32)],
                   "gmsh:geometrical": [np.ones(m, dtype=np.int32)]},
        field_data={"fluid": np.array([1, 3])},
    )
    meshio.write(path, mesh, file_format="gmsh", binary=True)
    return m


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="Generate meshcheck benchmark meshes.")
    ap.add_argument("outdir", nargs="?", default="/tmp/meshcheck-bench")
    ap.add_argument("--cells", type=float, default=1e6, help="target cell count, e.g. 1e6")
    ap.add_argument("--order", type=int, choices=(1, 2), default=1, help="tet order")
    ap.add_argument("--hex", action="store_true", help="distorted structured hex grid")
    ap.add_argument("--threads", type=int, default=2, help="gmsh threads")
    ap.add_argument("--seed", type=int, default=12345, help="seed of the hex distortion")
    ap.add_argument("--size-factor", type=float, default=TET_SIZE_FACTOR,
                    help="multiplier of the ideal tet size (calibration)")
    args = ap.parse_args(argv)
    if args.hex and args.order != 1:
        ap.error("--hex writes linear hexahedra only")
    out = Path(args.outdir)
    out.mkdir(parents=True, exist_ok=True)
    tag = f"{args.cells:.0e}".replace("+0", "").replace("+", "")
    t0 = time.perf_counter()
    if args.hex:
        path = out / f"hex_distorted_{tag}.msh"
        n = make_hex(path, args.cells, args.seed)
        kind = "hexahedron"
    else:
        path = out / f"box_cylinder_tet{4 if args.order == 1 else 10}_{tag}.msh"
        n = make_tets(path, args.cells, args.order, args.threads, args.size_factor)
        kind = "tetra" if args.order == 1 else "tetra10"
    dt = time.perf_counter() - t0
    print(f"{path}: {n} {kind} cells (target {args.cells:.3g}, "
          f"{100 * (n / args.cells - 1):+.1f} %), {dt:.1f} s, "
          f"{path.stat().st_size / 1e6:.1f} MB")
    return 0


if __name__ == "__main__":
    sys.exit(main())
