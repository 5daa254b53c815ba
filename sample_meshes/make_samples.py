"""Regenerate the sample meshes bundled with meshcheck (gmsh Python API).

Run from anywhere::

    python sample_meshes/make_samples.py            # write all samples, then check them
    python sample_meshes/make_samples.py --check    # only check the files already there

Every sample is an invented scenario (see README.md in this folder). The
generation is deterministic: one thread, fixed random seed, fixed algorithms
and all sizes set explicitly, so rerunning rewrites byte-identical files with
the same gmsh version (4.15 was used).

Files written next to this script:

* ``enclosure.msh``   compressor cabinet air cavity with a motor block and a
  cooling slot; strongly graded linear tets; metres.
* ``silencer_mm.msh`` expansion-chamber silencer; quadratic tets (tetra10);
  MILLIMETRES.
* ``plenum_hex.msh``  supply-air plenum; extruded hexahedra and wedges with
  stretched layers; metres.

All three are gmsh MSH 4.1 ASCII, physical groups only (Mesh.SaveAll 0).
The check step reads each file with meshio and prints counts, physical names,
bounding box, corner-to-corner edge lengths and the smallest signed corner
Jacobian (tets: (p1-p0) x (p2-p0) . (p3-p0) in meshio/VTK node order).
"""
from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent


# --------------------------------------------------------------------------- gmsh
def _common_options(gmsh) -> None:
    """Options shared by every sample (determinism and file format)."""
    opt = gmsh.option.setNumber
    opt("General.Terminal", 0)
    opt("General.Verbosity", 2)
    opt("General.NumThreads", 1)
    opt("Mesh.MaxNumThreads1D", 1)
    opt("Mesh.MaxNumThreads2D", 1)
    opt("Mesh.MaxNumThreads3D", 1)
    opt("Mesh.RandomSeed", 1)
    opt("Mesh.RandomFactor", 1e-9)
    opt("Mesh.Algorithm", 6)       # 2D: Frontal-Delaunay
    opt("Mesh.Algorithm3D", 1)     # 3D: Delaunay
    opt("Mesh.Optimize", 1)
    opt("Mesh.OptimizeNetgen", 0)
    opt("Mesh.Smoothing", 1)
    opt("Mesh.MshFileVersion", 4.1)
    opt("Mesh.Binary", 0)
    opt("Mesh.SaveAll", 0)
    opt("Mesh.SaveParametric", 0)


def _gmsh_quality(gmsh) -> dict:
    """Smallest gmsh 'minSJ' and 'minSICN' over all 3D elements (gmsh's own
    signed measures; minSJ is 1 for every straight-sided simplex)."""
    out = {}
    for q in ("minSJ", "minSICN"):
        vals = []
        for etype in gmsh.model.mesh.getElementTypes(3):
            tags, _ = gmsh.model.mesh.getElementsByType(etype)
            vals.append(np.asarray(gmsh.model.mesh.getElementQualities(tags, q)))
        out[q] = float(np.min(np.concatenate(vals)))
    return out


def _surfaces_in_box(gmsh, xmin, ymin, zmin, xmax, ymax, zmax, eps=1e-6):
    """Tags of OCC surfaces entirely inside the given box (tolerance eps)."""
    got = gmsh.model.getEntitiesInBoundingBox(xmin - eps, ymin - eps, zmin - eps,
                                              xmax + eps, ymax + eps, zmax + eps, 2)
    return [t for _, t in got]


def make_enclosure(path: Path) -> dict:
    """Compressor cabinet: air cavity minus a motor block, plus a cooling slot.

    Cabinet inside 1.2 x 0.8 x 0.9 m (x, y, z), floor at z = 0. A motor block
    0.45 x 0.35 x 0.40 m stands on the floor. A cooling slot (160 mm wide in y,
    24 mm high in z, 60 mm deep) leaves the right wall x = 1.2 at z = 0.70 m;
    it is a second volume "vent_air" that shares the conforming face
    "vent_mouth" with "cavity_air". Size 8 mm at the slot, 100 mm far away
    (Distance + Threshold field).
    """
    import gmsh

    gmsh.initialize(interruptible=False)
    try:
        _common_options(gmsh)
        gmsh.model.add("enclosure")
        occ = gmsh.model.occ
        L, W, H = 1.2, 0.8, 0.9
        cabinet = occ.addBox(0, 0, 0, L, W, H)
        motor = occ.addBox(0.25, 0.22, 0.0, 0.45, 0.35, 0.40)
        sw, sh, sd, zc, yc = 0.160, 0.024, 0.060, 0.70, 0.40
        slot = occ.addBox(L, yc - sw / 2, zc - sh / 2, sd, sw, sh)
        air, _ = occ.cut([(3, cabinet)], [(3, motor)])
        out, _ = occ.fragment(air, [(3, slot)])
        occ.synchronize()

        vols = [t for _, t in out]
        def xc(t):
            return gmsh.model.occ.getCenterOfMass(3, t)[0]
        cavity = [t for t in vols if xc(t) < L]
        vent = [t for t in vols if xc(t) > L]
        assert len(cavity) == 1 and len(vent) == 1, vols

        s_mouth = _surfaces_in_box(gmsh, L, yc - sw / 2, zc - sh / 2, L, yc + sw / 2, zc + sh / 2)
        s_open = _surfaces_in_box(gmsh, L + sd, yc - sw / 2, zc - sh / 2,
                                  L + sd, yc + sw / 2, zc + sh / 2)
        vent_bnd = [t for _, t in gmsh.model.getBoundary([(3, vent[0])], oriented=False)]
        s_vent_walls = sorted(set(vent_bnd) - set(s_mouth) - set(s_open))
        cav_bnd = [t for _, t in gmsh.model.getBoundary([(3, cavity[0])], oriented=False)]
        s_motor = [t for t in _surfaces_in_box(gmsh, 0.25, 0.22, 0.0, 0.70, 0.57, 0.40)
                   if t in cav_bnd]
        s_walls = sorted(set(cav_bnd) - set(s_mouth) - set(s_motor))
        assert len(s_mouth) == 1 and len(s_open) == 1 and len(s_vent_walls) == 4
        assert len(s_motor) == 5, s_motor

        gmsh.model.addPhysicalGroup(3, cavity, 1, name="cavity_air")
        gmsh.model.addPhysicalGroup(3, vent, 2, name="vent_air")
        gmsh.model.addPhysicalGroup(2, s_walls, 11, name="walls")
        gmsh.model.addPhysicalGroup(2, s_motor, 12, name="motor")
        gmsh.model.addPhysicalGroup(2, s_vent_walls, 13, name="vent_walls")
        gmsh.model.addPhysicalGroup(2, s_open, 14, name="vent_opening")
        gmsh.model.addPhysicalGroup(2, s_mouth, 15, name="vent_mouth")

        # Size field: 8 mm within 15 mm of the slot, growing to 100 mm at 0.45 m.
        f = gmsh.model.mesh.field
        dist = f.add("Distance")
        f.setNumbers(dist, "SurfacesList", s_mouth + s_open + s_vent_walls)
        f.setNumber(dist, "Sampling", 40)
        thr = f.add("Threshold")
        f.setNumber(thr, "InField", dist)
        f.setNumber(thr, "SizeMin", 0.008)
        f.setNumber(thr, "SizeMax", 0.100)
        f.setNumber(thr, "DistMin", 0.015)
        f.setNumber(thr, "DistMax", 0.45)
        f.setAsBackgroundMesh(thr)
        gmsh.option.setNumber("Mesh.MeshSizeFromPoints", 0)
        gmsh.option.setNumber("Mesh.MeshSizeFromCurvature", 0)
        gmsh.option.setNumber("Mesh.MeshSizeExtendFromBoundary", 0)
        gmsh.option.setNumber("Mesh.ElementOrder", 1)

        gmsh.model.mesh.generate(3)
        info = _gmsh_quality(gmsh)
        gmsh.write(str(path))
        return info
    finally:
        gmsh.finalize()


def make_silencer(path: Path) -> dict:
    """Expansion-chamber silencer in MILLIMETRES, quadratic tets.

    Axis along x. Inlet pipe d = 100 mm, 250 mm long; chamber d = 300 mm,
    500 mm long; outlet pipe d = 100 mm, 250 mm long (x = 0 ... 1000 mm).
    Mid-edge nodes are placed on the curved geometry (Mesh.SecondOrderLinear 0).
    """
    import gmsh

    gmsh.initialize(interruptible=False)
    try:
        _common_options(gmsh)
        gmsh.model.add("silencer_mm")
        occ = gmsh.model.occ
        r_pipe, r_ch, l_pipe, l_ch = 50.0, 150.0, 250.0, 500.0
        inlet = occ.addCylinder(0, 0, 0, l_pipe, 0, 0, r_pipe)
        chamber = occ.addCylinder(l_pipe, 0, 0, l_ch, 0, 0, r_ch)
        outlet = occ.addCylinder(l_pipe + l_ch, 0, 0, l_pipe, 0, 0, r_pipe)
        out, _ = occ.fuse([(3, inlet)], [(3, chamber), (3, outlet)])
        occ.synchronize()
        assert len(out) == 1, out
        vol = out[0][1]
        x_end = 2 * l_pipe + l_ch
        bnd = [t for _, t in gmsh.model.getBoundary(out, oriented=False)]
        s_in = [t for t in _surfaces_in_box(gmsh, 0, -r_pipe, -r_pipe, 0, r_pipe, r_pipe, 1e-3)
                if t in bnd]
        s_out = [t for t in _surfaces_in_box(gmsh, x_end, -r_pipe, -r_pipe, x_end, r_pipe,
                                             r_pipe, 1e-3) if t in bnd]
        s_walls = sorted(set(bnd) - set(s_in) - set(s_out))
        assert len(s_in) == 1 and len(s_out) == 1, (s_in, s_out)

        gmsh.model.addPhysicalGroup(3, [vol], 1, name="air")
        gmsh.model.addPhysicalGroup(2, s_in, 11, name="inlet")
        gmsh.model.addPhysicalGroup(2, s_out, 12, name="outlet")
        gmsh.model.addPhysicalGroup(2, s_walls, 13, name="walls")

        gmsh.option.setNumber("Mesh.MeshSizeFromPoints", 0)
        gmsh.option.setNumber("Mesh.MeshSizeFromCurvature", 0)
        gmsh.option.setNumber("Mesh.MeshSizeExtendFromBoundary", 0)
        gmsh.option.setNumber("Mesh.MeshSizeMin", 24.0)
        gmsh.option.setNumber("Mesh.MeshSizeMax", 24.0)
        gmsh.option.setNumber("Mesh.ElementOrder", 2)
        gmsh.option.setNumber("Mesh.SecondOrderLinear", 0)
        gmsh.option.setNumber("Mesh.SecondOrderIncomplete", 0)
        gmsh.option.setNumber("Mesh.HighOrderOptimize", 0)

        gmsh.model.mesh.generate(3)
        info = _gmsh_quality(gmsh)
        gmsh.write(str(path))
        return info
    finally:
        gmsh.finalize()


def make_plenum(path: Path) -> dict:
    """Supply-air plenum 0.6 x 0.4 x 0.25 m, extruded hexahedra and wedges.

    The floor z = 0 is split at x = 0.4: the part x < 0.4 is a transfinite,
    recombined quad grid (cells shrink towards x = 0.4, progression 0.9); the
    part x > 0.4 is an unstructured triangle mesh. Extruding the floor in 12
    layers whose heights grow from 6 mm (floor) to about 40 mm gives hexahedra
    and wedges with aspect ratios up to about 8. Inlet face x = 0, outlet x = 0.6.
    """
    import gmsh

    gmsh.initialize(interruptible=False)
    try:
        _common_options(gmsh)
        gmsh.model.add("plenum_hex")
        geo = gmsh.model.geo
        Lx, xs, Ly, Lz = 0.6, 0.4, 0.4, 0.25
        p = [geo.addPoint(x, y, 0) for x, y in
             [(0, 0), (xs, 0), (Lx, 0), (Lx, Ly), (xs, Ly), (0, Ly)]]
        l_b1 = geo.addLine(p[0], p[1])
        l_b2 = geo.addLine(p[1], p[2])
        l_r = geo.addLine(p[2], p[3])
        l_t2 = geo.addLine(p[3], p[4])
        l_t1 = geo.addLine(p[4], p[5])
        l_l = geo.addLine(p[5], p[0])
        l_m = geo.addLine(p[1], p[4])
        s1 = geo.addPlaneSurface([geo.addCurveLoop([l_b1, l_m, l_t1, l_l])])
        s2 = geo.addPlaneSurface([geo.addCurveLoop([l_b2, l_r, l_t2, -l_m])])

        ny = 9
        geo.mesh.setTransfiniteCurve(l_b1, 13, "Progression", 0.9)
        geo.mesh.setTransfiniteCurve(l_t1, 13, "Progression", 1 / 0.9)
        for c in (l_m, l_l):
            geo.mesh.setTransfiniteCurve(c, ny)
        geo.mesh.setTransfiniteSurface(s1)
        geo.mesh.setRecombine(2, s1)
        geo.mesh.setSize([(0, p[2]), (0, p[3])], 0.04)

        # 12 layers, geometric growth 1.2 from the floor: first ~6 mm, last ~40 mm.
        n_lay, q = 12, 1.2
        dz = q ** np.arange(n_lay)
        heights = np.cumsum(dz) / dz.sum()
        ext = geo.extrude([(2, s1), (2, s2)], 0, 0, Lz, numElements=[1] * n_lay,
                          heights=heights.tolist(), recombine=True)
        geo.synchronize()
        vols = [t for d, t in ext if d == 3]
        assert len(vols) == 2, ext

        bnd = [t for _, t in gmsh.model.getBoundary([(3, v) for v in vols],
                                                    combined=True, oriented=False)]
        s_in = [t for t in _surfaces_in_box(gmsh, 0, 0, 0, 0, Ly, Lz) if t in bnd]
        s_out = [t for t in _surfaces_in_box(gmsh, Lx, 0, 0, Lx, Ly, Lz) if t in bnd]
        s_walls = sorted(set(bnd) - set(s_in) - set(s_out))
        assert len(s_in) == 1 and len(s_out) == 1 and len(s_walls) == 8, (s_in, s_out, s_walls)

        gmsh.model.addPhysicalGroup(3, vols, 1, name="plenum_air")
        gmsh.model.addPhysicalGroup(2, s_in, 11, name="inlet")
        gmsh.model.addPhysicalGroup(2, s_out, 12, name="outlet")
        gmsh.model.addPhysicalGroup(2, s_walls, 13, name="walls")

        gmsh.option.setNumber("Mesh.MeshSizeFromPoints", 1)
        gmsh.option.setNumber("Mesh.MeshSizeMax", 0.04)
        gmsh.option.setNumber("Mesh.ElementOrder", 1)
        gmsh.model.mesh.generate(3)
        info = _gmsh_quality(gmsh)
        gmsh.write(str(path))
        return info
    finally:
        gmsh.finalize()


# --------------------------------------------------------------------------- check
# Corner-to-corner edges and corner Jacobian frames in meshio/VTK node order.
_EDGES = {
    "tetra": [(0, 1), (1, 2), (2, 0), (0, 3), (1, 3), (2, 3)],
    "hexahedron": [(0, 1), (1, 2), (2, 3), (3, 0), (4, 5), (5, 6), (6, 7), (7, 4),
                   (0, 4), (1, 5), (2, 6), (3, 7)],
    "wedge": [(0, 1), (1, 2), (2, 0), (3, 4), (4, 5), (5, 3), (0, 3), (1, 4), (2, 5)],
}
_EDGES["tetra10"] = _EDGES["tetra"]
# For each corner: (lo, hi) node pairs whose difference is d/dr, d/ds, d/dt
# of the linear map at that corner (VTK parametric coordinates).
_HEX_REF = [(0, 0, 0), (1, 0, 0), (1, 1, 0), (0, 1, 0), (0, 0, 1), (1, 0, 1), (1, 1, 1), (0, 1, 1)]


def _hex_frames():
    frames = []
    for c in _HEX_REF:
        fr = []
        for ax in range(3):
            lo = list(c); hi = list(c)
            lo[ax], hi[ax] = 0, 1
            fr.append((_HEX_REF.index(tuple(lo)), _HEX_REF.index(tuple(hi))))
        frames.append(fr)
    return frames


_FRAMES = {
    "tetra": [[(0, 1), (0, 2), (0, 3)]],
    "hexahedron": _hex_frames(),
    "wedge": [[(b, b + 1), (b, b + 2), (i, i + 3)] for b in (0, 3) for i in range(3)],
}


def _corner_jacobians(pts: np.ndarray, cells: np.ndarray, ctype: str) -> np.ndarray:
    """(m, n_frames) determinants of the linear map's Jacobian at the corners."""
    dets = []
    for fr in _FRAMES[ctype]:
        cols = [pts[cells[:, hi]] - pts[cells[:, lo]] for lo, hi in fr]
        dets.append(np.einsum("ij,ij->i", np.cross(cols[0], cols[1]), cols[2]))
    return np.stack(dets, axis=1)


def _tet10_jacobians(pts: np.ndarray, cells: np.ndarray) -> np.ndarray:
    """(m, 11) det J of quadratic tets at the 10 nodes and the centroid, divided by
    det J of the straight-sided tet with the same corners (1 for straight edges)."""
    ref = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1], [.5, 0, 0], [.5, .5, 0],
                    [0, .5, 0], [0, 0, .5], [.5, 0, .5], [0, .5, .5], [.25, .25, .25]])
    mids = [(0, 1), (1, 2), (2, 0), (0, 3), (1, 3), (2, 3)]   # VTK tetra10 nodes 4..9
    dL = np.array([[-1, -1, -1], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)  # dL_i/d(r,s,t)
    x = pts[cells]                                        # (m, 10, 3)
    lin = _corner_jacobians(pts, cells[:, :4], "tetra")[:, 0]
    out = []
    for r, s, t in ref:
        L = np.array([1 - r - s - t, r, s, t])
        dN = [(4 * L[i] - 1) * dL[i] for i in range(4)]
        dN += [4 * (L[a] * dL[b] + L[b] * dL[a]) for a, b in mids]
        dN = np.array(dN)                                 # (10, 3)
        J = np.einsum("mkx,kr->mxr", x, dN)               # (m, 3, 3)
        out.append(np.linalg.det(J) / lin)
    return np.stack(out, axis=1)


def check(path: Path) -> dict:
    """Read one sample with meshio and summarise it (prints nothing)."""
    import meshio

    m = meshio.read(path)
    pts = m.points
    res = {
        "file": path.name,
        "size_MB": path.stat().st_size / 1e6,
        "points": len(pts),
        "cells": {},
        "physical": {name: (int(v[0]), int(v[1])) for name, v in m.field_data.items()},
        "bbox": (pts.min(axis=0).tolist(), pts.max(axis=0).tolist()),
    }
    for blk in m.cells:
        res["cells"][blk.type] = res["cells"].get(blk.type, 0) + len(blk.data)
    emin, emax, jmin, qmin, amax = math.inf, 0.0, math.inf, math.inf, 0.0
    for blk in m.cells:
        if blk.type not in _EDGES:
            continue
        c = blk.data
        e = np.stack([np.linalg.norm(pts[c[:, a]] - pts[c[:, b]], axis=1)
                      for a, b in _EDGES[blk.type]], axis=1)
        emin, emax = min(emin, e.min()), max(emax, e.max())
        amax = max(amax, float((e.max(axis=1) / e.min(axis=1)).max()))
        lin = "tetra" if blk.type == "tetra10" else blk.type
        jmin = min(jmin, float(_corner_jacobians(pts, c, lin).min()))
        if blk.type == "tetra10":
            qmin = min(qmin, float(_tet10_jacobians(pts, c).min()))
    res.update(edge_min=emin, edge_max=emax, edge_ratio_max=amax, min_corner_jacobian=jmin)
    if qmin < math.inf:
        res["min_tet10_detJ_ratio"] = qmin
    return res


def _print(res: dict, info: dict | None) -> None:
    print(f"{res['file']}: {res['size_MB']:.2f} MB, {res['points']} points")
    print("  cells:", ", ".join(f"{k} {v}" for k, v in res["cells"].items()))
    print("  physical (name: tag, dim):",
          ", ".join(f"{k}: {v[0]},{v[1]}" for k, v in sorted(res["physical"].items(),
                                                           key=lambda kv: kv[1][0])))
    lo, hi = res["bbox"]
    print("  bbox min", np.round(lo, 6).tolist(), "max", np.round(hi, 6).tolist())
    print(f"  corner-to-corner edge length min {res['edge_min']:.6g} max {res['edge_max']:.6g}"
          f" (ratio {res['edge_max'] / res['edge_min']:.1f}); worst per-cell edge ratio"
          f" {res['edge_ratio_max']:.2f}")
    print(f"  smallest signed corner Jacobian {res['min_corner_jacobian']:.3e}"
          f" ({'all positive' if res['min_corner_jacobian'] > 0 else 'INVERTED CELLS'})")
    if "min_tet10_detJ_ratio" in res:
        print(f"  tetra10: min detJ / detJ_straight at nodes+centroid "
              f"{res['min_tet10_detJ_ratio']:.3f}")
    if info:
        print(f"  gmsh over volume elements: min minSJ {info['minSJ']:.3f},"
              f" min minSICN {info['minSICN']:.3f}")


SAMPLES = {"enclosure.msh": make_enclosure, "silencer_mm.msh": make_silencer,
           "plenum_hex.msh": make_plenum}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--check", action="store_true", help="only check the existing files")
    args = ap.parse_args(argv)
    ok = True
    for name, make in SAMPLES.items():
        path = HERE / name
        info = None if args.check else make(path)
        res = check(path)
        _print(res, info)
        ok &= res["min_corner_jacobian"] > 0 and res.get("min_tet10_detJ_ratio", 1) > 0
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
