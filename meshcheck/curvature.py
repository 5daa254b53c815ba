"""Curved boundaries: does the mesh's boundary follow the surface closely enough?

Boundary surface.  The boundary faces of the volume mesh (faces with one cell),
corner nodes only, quadrilaterals split along their 0-2 diagonal, taken as
given (as a :class:`trimesh.Trimesh` with ``process=False``: nothing merged,
dropped or re-oriented; its face normals, areas, adjacency and angles are
computed here with trimesh's own numpy operations, which equal trimesh's to the
bit in the tests, so that the check does not pay trimesh's import, about 0.5 s).
Normals point out of the fluid.

Curvature.  Faces meeting at a dihedral angle above ``feature_angle`` are
sharp features, not curvature: they split the surface into smooth patches.
Each vertex gets one normal per patch it touches (face normals weighted by
the corner angle).  Per triangle the shape operator S (2x2, in the triangle's
plane) is the least-squares solution of S e = dn over its three edges e, with
dn the difference of the patch normals at the edge's ends (Rusinkiewicz,
"Estimating curvatures and their derivatives on triangle meshes", 3DPVT
2004); its eigenvalues are the principal curvatures k1 >= k2 (1/m, positive
where the fluid domain is convex).  Exact on a sphere (k1 = k2 = 1/R) and a
cylinder (1/R, 0) up to the discretisation (tested against gmsh meshes).

Chord height.  A flat triangle whose corners lie on a surface of curvature
kappa = max(|k1|, |k2|) departs from it by at most

    s = R - sqrt(R^2 - rho^2),   R = 1/kappa,   rho = radius of the smallest circle
                                                  enclosing the triangle

(exact on a sphere: the plane cuts it in the circumcircle; for an edge of
length h, rho = h/2 and s ~ h^2 / (8R), the sagitta).  Quadratic geometry (a
mid-node on the surface) leaves the interpolation error of a parabola through
the arc's ends and midpoint, max |x^4 - (h/2)^2 x^2| / (8 R^3) = h^4 / (512 R^3)
= kappa^3 rho^4 / 32 (derived from the series of the circle, x^4 term).

Accuracy.  A rigid boundary moved normal to itself by s changes the phase of
a normally reflected plane wave by 2 k s, so a relative error tau allows
s <= tau / (2k) (closed form for the plane wave; using it as the criterion is
common practice, no source).  A straight-sided face with s above that
misrepresents the surface; if kappa^3 rho^4 / 32 is within it quadratic
(curved) geometry would do, otherwise the faces must also be smaller.

Quadratic cells.  The mid-node deviation |x_m - (x_a + x_b)/2| / |x_b - x_a|
of every edge and the Jacobian variation min det J / max det J over the
quadrature points (1 for straight-sided cells, 0 or below where the map
degenerates or folds) are reported.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import kernels
from .jacobian import jacobian_determinants, quadratic_summary
from .mesh import Mesh
from .topology import Topology, _packed_sort

__all__ = ["BoundarySurface", "SurfaceCurvature", "CurvedBoundary", "QuadraticGeometry",
           "boundary_surface", "surface_curvature", "enclosing_radius", "chord_height",
           "quadratic_chord_height", "check_curvature", "quadratic_geometry"]


@dataclass(frozen=True)
class BoundarySurface:
    """Triangulated boundary of a volume mesh, as given.

    vertex_ids : (n_v,) int64 mesh node of every surface vertex.
    points : (n_v, 3) float64 metres.
    triangles : (n_t, 3) int64 indices into ``points``, normals out of the fluid.
    face : (n_t,) int64 index of the boundary face (into ``topo.faces``) of each triangle.
    cell : (n_t,) int64 global id of the cell owning that face.
    """

    vertex_ids: np.ndarray
    points: np.ndarray
    triangles: np.ndarray
    face: np.ndarray
    cell: np.ndarray

    def trimesh(self):
        """The surface as a trimesh.Trimesh, unprocessed (no merging, no repair)."""
        import trimesh

        return trimesh.Trimesh(vertices=self.points, faces=self.triangles, process=False,
                               validate=False)


def boundary_surface(mesh: Mesh, topo: Topology,
                     faces: np.ndarray | None = None) -> BoundarySurface:
    """Boundary faces (count 1) of a 3D mesh as triangles (quads split 0-2).

    faces : optional subset of face ids (default: every boundary face).
    """
    fids = np.flatnonzero(topo.faces.count == 1) if faces is None else np.asarray(faces, np.int64)
    return _surface_of(mesh, topo, fids, topo.faces.nodes_of(fids))


def _surface_of(mesh: Mesh, topo: Topology, fids: np.ndarray, nodes: np.ndarray
                ) -> BoundarySurface:
    """:func:`boundary_surface` of the faces ``fids`` whose corners ``nodes`` (k, 4)
    (``Faces.nodes_of``) are known."""
    quad = nodes[:, 3] >= 0
    tri = np.concatenate([nodes[:, [0, 1, 2]], nodes[quad][:, [0, 2, 3]]])
    face = np.concatenate([fids, fids[quad]])
    vid, inv = _compact_ids(tri.ravel(), mesh.n_points)
    return BoundarySurface(vid, mesh.points[vid], inv.reshape(-1, 3), face,
                           topo.faces.cells[face, 0])


def _compact_ids(ids: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """``np.unique(ids, return_inverse=True)`` for ids in [0, n), as int64, by a mark
    per id instead of a sort (190k boundary triangles: 32 -> 3 ms)."""
    mark = np.zeros(n, bool)
    mark[ids] = True
    vid = np.flatnonzero(mark)
    del mark
    rank = np.empty(n, np.int64)
    rank[vid] = np.arange(len(vid))
    return vid, rank[ids]


def _vertex_patch_rows(tri: np.ndarray, patch: np.ndarray, n_v: int, n_patch: int
                       ) -> tuple[np.ndarray, int]:
    """((3 n_t,) int64 row of every triangle corner, number of rows): one row per
    distinct (vertex, patch of the triangle) pair, numbered in no particular order.
    A vertex's row is its own number for the patch one of its triangles is in, and
    rows from ``n_v`` on number its other patches (only vertices on feature edges have
    any): no sort of every corner's key."""
    flat = tri.ravel()
    pc = np.repeat(patch, 3)
    first = np.empty(n_v, patch.dtype)
    first[flat] = pc  # the patch of any one of the vertex's triangles
    other = first[flat] != pc
    del first
    rows = flat.astype(np.int64)
    if not other.any():
        return rows, n_v
    _, extra = np.unique(flat[other].astype(np.int64) * np.int64(n_patch) + pc[other],
                         return_inverse=True)
    rows[other] = n_v + extra.reshape(-1)
    return rows, n_v + int(extra.max()) + 1


@dataclass(frozen=True)
class SurfaceCurvature:
    """Per-triangle principal curvatures of a boundary surface.

    k1, k2 : (n_t,) float64 principal curvatures, 1/m, k1 >= k2 (NaN on degenerate
        triangles).  kmax : (n_t,) max(|k1|, |k2|).
    patch : (n_t,) int64 smooth patch of every triangle.  n_patches : their number.
    feature_edges : number of edges sharper than the feature angle.
    area : (n_t,) float64 triangle areas, m^2.
    """

    k1: np.ndarray
    k2: np.ndarray
    patch: np.ndarray
    n_patches: int
    feature_edges: int
    area: np.ndarray

    @property
    def kmax(self) -> np.ndarray:
        return np.maximum(np.abs(self.k1), np.abs(self.k2))


# trimesh's zero tolerances (trimesh.util.TOL_ZERO and trimesh.constants.tol.merge, 5.x)
_TOL_ZERO = 1e-13
_TOL_MERGE = 1e-8


def _unitize(v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """trimesh.util.unitize of (n, 3) rows, the same numpy calls: rows of norm above
    1e-13 divided by it (times the reciprocal), the others multiplied by it; and
    the (n,) bool mask of the former."""
    norm = np.sqrt(np.dot(v * v, [1.0] * v.shape[1]))
    valid = norm > _TOL_ZERO
    norm[valid] **= -1
    return v * norm.reshape((-1, 1)), valid


def _surface_geometry(points: np.ndarray, triangles: np.ndarray, compiled: bool = False):
    """What :func:`surface_curvature` reads of a ``trimesh.Trimesh(process=False)``,
    computed with the same numpy calls as trimesh 5.x but without importing it
    (about 0.5 s): face normals (n_t, 3) (zero for degenerate faces), face areas
    (n_t,) m^2, adjacent face pairs (n_a, 2) int64 (faces sharing an edge used by
    exactly two faces; any order), the angles between their normals (n_a,) rad and
    the corner angles (n_t, 3) rad (zero for degenerate faces).  Tested against
    trimesh (:func:`_trimesh_geometry`).  ``compiled``: the triangles' values and the
    angles by :mod:`meshcheck.kernels.geometry` (the same operations a triangle at a
    time: equal to rounding, numpy's arccos and sums of three terms against libm's and
    the kernels')."""
    n_t = len(triangles)
    fn, area, corner = np.empty((n_t, 3)), np.empty(n_t), np.empty((n_t, 3))
    if compiled:
        from .kernels import geometry as kg
        kg.triangle_geometry(points, np.ascontiguousarray(triangles), fn, area, corner)
    else:
        # per triangle a chunk at a time (the same elementwise operations), so that the
        # (n_t, 3, 3) corners and their differences are never held whole
        for s in range(0, n_t, _FIT_CHUNK):
            t = slice(s, min(s + _FIT_CHUNK, n_t))
            fn[t], area[t], corner[t] = _triangle_geometry(points[triangles[t]])
    # faces sharing an edge that exactly two faces use
    a, b = triangles, triangles[:, [1, 2, 0]]  # the sides (0 1), (1 2), (2 0), sorted
    n1 = np.int64(len(points) + 1)
    key = (np.minimum(a, b) * n1 + np.maximum(a, b)).ravel()
    del b
    # np.argsort(key, kind="stable") by the packed sort (190k triangles: 30 -> 10 ms)
    order, key = _packed_sort(key, int(n1 * n1))
    start = np.flatnonzero(np.r_[True, key[1:] != key[:-1]])
    two = np.diff(np.r_[start, len(key)]) == 2
    del key
    adj = (order[np.column_stack([start[two], start[two] + 1])] // 3).astype(np.int64)
    del order, start, two
    pairs = adj[adj[:, 0] != adj[:, 1]]
    # each pair in order (np.sort along axis 1) by elementwise minimum and maximum: a
    # sort of rows of two took 6-10 ms for 284k pairs, these 0.4 ms
    adj = np.empty_like(pairs)
    np.minimum(pairs[:, 0], pairs[:, 1], out=adj[:, 0])
    np.maximum(pairs[:, 0], pairs[:, 1], out=adj[:, 1])
    del pairs
    # the angles a chunk of pairs at a time (no (n_a, 2, 3) array of their normals)
    ang = np.empty(len(adj))
    if compiled:
        kg.normal_angles(fn, adj, ang)
        return fn, area, adj, ang, corner
    for s in range(0, len(adj), _FIT_CHUNK):
        pairs = fn[adj[s:s + _FIT_CHUNK]]
        ang[s:s + len(pairs)] = np.abs(np.arccos(np.clip(
            np.dot(pairs[:, 0] * pairs[:, 1], [1.0] * 3), -1.0, 1.0)))
    return fn, area, adj, ang, corner


def _triangle_geometry(T: np.ndarray):
    """Unit normals (zero for degenerate faces), areas and corner angles (zero for
    degenerate faces) of the triangles of corners T (n, 3, 3), as trimesh 5.x computes
    them (its numpy calls; see :func:`_surface_geometry`)."""
    vec = T[:, 1:, :] - T[:, :2, :]
    crosses = np.cross(vec[:, 0], vec[:, 1])
    del vec
    unit, valid = _unitize(crosses)
    fn = unit if valid.all() else np.where(valid[:, None], unit, 0.0)
    area = np.sqrt((crosses ** 2).sum(axis=1)) / 2.0
    # corner angles (trimesh.triangles.angles)
    u = _unitize(T[:, 1] - T[:, 0])[0]
    v = _unitize(T[:, 2] - T[:, 0])[0]
    w = _unitize(T[:, 2] - T[:, 1])[0]
    corner = np.zeros((len(T), 3))
    corner[:, 0] = np.arccos(np.clip(np.dot(u * v, [1.0] * 3), -1, 1))
    corner[:, 1] = np.arccos(np.clip(np.dot(-u * w, [1.0] * 3), -1, 1))
    corner[:, 2] = np.pi - corner[:, 0] - corner[:, 1]
    corner[(corner < _TOL_MERGE).any(axis=1), :] = 0.0
    return fn, area, corner


def _trimesh_geometry(surface: BoundarySurface):
    """The same five arrays as :func:`_surface_geometry`, read from trimesh itself
    (the reference the tests compare with)."""
    tm = surface.trimesh()
    return (np.asarray(tm.face_normals, dtype=np.float64),
            np.asarray(tm.area_faces, dtype=np.float64),
            np.asarray(tm.face_adjacency, dtype=np.int64).reshape(-1, 2),
            np.asarray(tm.face_adjacency_angles, dtype=np.float64),
            np.asarray(tm.face_angles, dtype=np.float64))


def surface_curvature(surface: BoundarySurface, feature_angle: float = 50.0,
                      compiled: bool = False) -> SurfaceCurvature:
    """Principal curvatures per triangle (Rusinkiewicz 2004 per-face fit), feature-aware.

    feature_angle : deg; adjacent faces whose normals differ by more are not smooth.
    compiled : smooth patches by the union-find kernel (large meshes, numba loaded)
        instead of scipy's connected_components (the same labels), the triangles'
        geometry, the normals' sums and the fits by :mod:`meshcheck.kernels.geometry`
        (the same to rounding).
    """
    n_t = len(surface.triangles)
    if n_t == 0:
        z = np.zeros(0)
        return SurfaceCurvature(z, z, np.zeros(0, np.int64), 0, 0, z)
    fn, area, adj, ang, corner_w = _surface_geometry(surface.points, surface.triangles,
                                                     compiled)
    smooth = ang <= np.radians(feature_angle)
    n_patch, patch = _patches(n_t, adj[smooth], compiled)
    n_feature = int(np.count_nonzero(~smooth))
    del adj, ang, smooth  # (dropped as soon as used: less scratch at the fits)
    # one normal per (vertex, patch): corner-angle-weighted face normals
    tri = surface.triangles
    inv, n_rows = _vertex_patch_rows(tri, patch, len(surface.points), n_patch)
    acc = np.zeros((n_rows, 3))
    if compiled:  # the same sums in the same order
        from .kernels import geometry as kg
        kg.corner_normal_sums(inv, corner_w, fn, acc)
    else:
        for s in range(0, n_t, _FIT_CHUNK):  # in triangle order: the same sums, less scratch
            t = slice(s, min(s + _FIT_CHUNK, n_t))
            np.add.at(acc, inv[3 * t.start:3 * t.stop],
                      (corner_w[t, :, None] * fn[t, None, :]).reshape(-1, 3))
    del corner_w
    norm = np.linalg.norm(acc, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        acc /= norm[:, None]
    k1, k2 = np.empty(n_t), np.empty(n_t)
    if compiled:  # one pass, corners and normals read in place
        kg.fit_curvatures(surface.points, tri, acc, inv.reshape(n_t, 3), fn, k1, k2)
        return SurfaceCurvature(k1, k2, patch, int(n_patch), n_feature, area)
    for s in range(0, n_t, _FIT_CHUNK):  # the per-triangle fits a chunk at a time
        t = slice(s, min(s + _FIT_CHUNK, n_t))
        N = acc[inv.reshape(n_t, 3)[t]]                              # corner normals
        k1[t], k2[t] = _fit_curvatures(surface.points[tri[t]], N, fn[t])
    return SurfaceCurvature(k1, k2, patch, int(n_patch), n_feature, area)


#: triangles whose curvature fit :func:`surface_curvature` makes at a time (its scratch
#: is about 0.6 kB per triangle)
_FIT_CHUNK = 1 << 14


def _fit_curvatures(X: np.ndarray, N: np.ndarray, fn: np.ndarray):
    """Principal curvatures (k1 >= k2) of triangles by the least-squares fit of the
    second fundamental form to the changes of the corner normals along the sides.

    X, N : (n, 3, 3) corners and corner normals; fn : (n, 3) unit face normals."""
    u = X[:, 1] - X[:, 0]
    with np.errstate(divide="ignore", invalid="ignore"):
        u /= np.linalg.norm(u, axis=1)[:, None]
    v = np.cross(fn, u)
    n_t = len(X)
    A = np.zeros((n_t, 6, 3))
    y = np.zeros((n_t, 6))
    for k, (i, j) in enumerate(((1, 2), (2, 0), (0, 1))):
        e = X[:, j] - X[:, i]
        dn = N[:, j] - N[:, i]
        eu, ev = np.einsum("ij,ij->i", e, u), np.einsum("ij,ij->i", e, v)
        A[:, 2 * k, 0], A[:, 2 * k, 1] = eu, ev
        A[:, 2 * k + 1, 1], A[:, 2 * k + 1, 2] = eu, ev
        y[:, 2 * k] = np.einsum("ij,ij->i", dn, u)
        y[:, 2 * k + 1] = np.einsum("ij,ij->i", dn, v)
    M = np.einsum("tki,tkj->tij", A, A)
    r = np.einsum("tki,tk->ti", A, y)
    ok = np.isfinite(M).all(axis=(1, 2)) & np.isfinite(r).all(axis=1)
    ok &= np.abs(np.linalg.det(np.where(ok[:, None, None], M, np.eye(3)))) > 1e-300
    abc = np.full((n_t, 3), np.nan)
    if ok.any():
        abc[ok] = np.linalg.solve(M[ok], r[ok][:, :, None])[:, :, 0]
    a, b, c = abc[:, 0], abc[:, 1], abc[:, 2]
    mean = 0.5 * (a + c)
    dev = np.sqrt(0.25 * (a - c) ** 2 + b * b)
    return mean + dev, mean - dev


def enclosing_radius(X: np.ndarray) -> np.ndarray:
    """Radius of the smallest circle enclosing each triangle, metres.

    X : (n, 3, 3) corner coordinates.  Circumradius for acute and right triangles,
    half the longest edge for obtuse ones.  Returns (n,) float64.
    """
    a = np.linalg.norm(X[:, 2] - X[:, 1], axis=1)
    b = np.linalg.norm(X[:, 0] - X[:, 2], axis=1)
    c = np.linalg.norm(X[:, 1] - X[:, 0], axis=1)
    L = np.sort(np.column_stack([a, b, c]), axis=1)
    obtuse = L[:, 2] ** 2 > L[:, 0] ** 2 + L[:, 1] ** 2
    area2 = np.linalg.norm(np.cross(X[:, 1] - X[:, 0], X[:, 2] - X[:, 0]), axis=1)  # 2 * area
    with np.errstate(divide="ignore", invalid="ignore"):
        rc = a * b * c / (2.0 * area2)
    return np.where(obtuse | ~np.isfinite(rc), 0.5 * L[:, 2], rc)


def chord_height(rho, kappa) -> np.ndarray:
    """Largest gap between a flat face of enclosing radius rho (m) and a surface of
    curvature kappa (1/m): R - sqrt(R^2 - rho^2) with R = 1/kappa (R when rho > R)."""
    rho, kappa = np.broadcast_arrays(np.asarray(rho, float), np.abs(np.asarray(kappa, float)))
    x = np.minimum(rho * kappa, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        # R (1 - sqrt(1 - x^2)) written without cancellation
        s = np.where(kappa > 0, rho * x / (1.0 + np.sqrt(1.0 - x * x)), 0.0)
    return s


def quadratic_chord_height(rho, kappa) -> np.ndarray:
    """Gap left by quadratic geometry through the ends and midpoint: kappa^3 rho^4 / 32 (m)."""
    k = np.abs(np.asarray(kappa, float))
    return k ** 3 * np.asarray(rho, float) ** 4 / 32.0


@dataclass(frozen=True)
class CurvedBoundary:
    """How well the boundary faces follow the surface at the upper frequency.

    n_faces : boundary faces checked.  n_patches, feature_edges : see
    :class:`SurfaceCurvature`.  min_radius : smallest radius of curvature on the
    boundary, m (inf when flat).  face_ids : (n_faces,) boundary face ids.
    kappa, rho, chord_height, tolerance : (n_faces,) per face (1/m, m, m, m):
    curvature, enclosing radius, gap of the geometry as meshed (quadratic gap for
    curved quadratic faces) and allowed gap tau / (2k).  curved : (n_faces,) bool,
    faces whose mid-nodes follow the surface.
    misfit : straight-sided faces whose gap exceeds the tolerance.
    needs_quadratic : of those, faces that quadratic geometry would fix.
    needs_refinement : faces that even quadratic geometry leaves above the tolerance.
    listed : worst faces (ids into topo.faces), their cells, locations (m),
        gap / tolerance, largest straight and quadratic face size allowed (m).
    midnode_on_surface : median over curved-surface quadratic faces of mid-node
        deviation / expected chord height (1 = mid-nodes on the surface, 0 =
        straight), or None.
    """

    n_faces: int
    n_patches: int
    feature_edges: int
    min_radius: float
    face_ids: np.ndarray
    kappa: np.ndarray
    rho: np.ndarray
    chord_height: np.ndarray
    tolerance: np.ndarray
    curved: np.ndarray
    misfit: np.ndarray
    needs_quadratic: np.ndarray
    needs_refinement: np.ndarray
    listed: np.ndarray
    listed_cells: np.ndarray
    listed_locations: np.ndarray
    listed_ratio: np.ndarray
    listed_straight_size: np.ndarray
    listed_quadratic_size: np.ndarray
    midnode_on_surface: float | None


def _face_midnode_deviation(mesh: Mesh, topo: Topology, fids: np.ndarray,
                            nodes: np.ndarray | None = None):
    """Per face: max mid-node deviation (m) over its sides, whether all sides have a
    mid-node, and the longest side (m).  nodes : ``topo.faces.nodes_of(fids)`` if known."""
    edges = topo.edges
    n = np.int64(mesh.n_points + 1)
    if nodes is None:
        nodes = topo.faces.nodes_of(fids)
    dev = np.zeros(len(fids))
    longest = np.zeros(len(fids))
    has = np.ones(len(fids), bool)
    P = mesh.points
    quad = nodes[:, 3] >= 0
    sides = ((nodes[:, 0], nodes[:, 1], np.ones(len(fids), bool)),
             (nodes[:, 1], nodes[:, 2], np.ones(len(fids), bool)),
             (nodes[:, 2], np.where(quad, nodes[:, 3], nodes[:, 0]), np.ones(len(fids), bool)),
             (nodes[:, 3], nodes[:, 0], quad))
    any_mid = edges.has_mids
    # the edges' keys (int64 per edge, 43 MiB for 4.8M tets) only where mid-nodes exist
    ekey = edges.nodes[:, 0] * n + edges.nodes[:, 1] if any_mid else None
    for a, b, valid in sides:
        longest[valid] = np.maximum(longest[valid],
                                    np.linalg.norm(P[b[valid]] - P[a[valid]], axis=1))
        if not any_mid:             # no edge has a mid-node (linear mesh): nothing to look up
            has &= ~valid
            continue
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        pos = np.clip(np.searchsorted(ekey, lo * n + hi), 0, max(len(ekey) - 1, 0))
        found = valid & (len(ekey) > 0) & (ekey[pos] == lo * n + hi)
        mid = np.where(found, edges.mid[pos], -1)
        has &= ~valid | (mid >= 0)
        m = found & (mid >= 0)
        if m.any():
            d = np.linalg.norm(P[mid[m]] - 0.5 * (P[a[m]] + P[b[m]]), axis=1)
            dev[m] = np.maximum(dev[m], d)
    return dev, has, longest


def _patches(n: int, pairs: np.ndarray, compiled: bool) -> tuple[int, np.ndarray]:
    """(count, (n,) int64 labels) of the components of items 0..n-1 joined by the rows
    of ``pairs`` (k, 2), numbered by their smallest item (scipy's numbering)."""
    if compiled:
        from .kernels import topology as kt
        parent = np.arange(n, dtype=np.int64)  # int64 labels, as documented
        return kt.components_pairs(parent, np.ascontiguousarray(pairs))
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components
    g = sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    count, label = connected_components(g, directed=False)
    return count, label.astype(np.int64)


def check_curvature(mesh: Mesh, topo: Topology, cell_speed: np.ndarray, fmax: float,
                    target: float, feature_angle: float = 50.0,
                    max_listed: int = 20) -> CurvedBoundary | None:
    """Chord height of every boundary face against the accuracy target at ``fmax``.

    cell_speed : (n_cells,) m/s (the speed of the cell owning each face sets k).
    Returns None for 2D meshes or meshes without boundary faces.
    """
    if mesh.dim != 3:
        return None
    bnd = np.flatnonzero(topo.faces.count == 1)
    nodes = topo.faces.nodes_of(bnd)
    surf = _surface_of(mesh, topo, bnd, nodes)
    if not len(surf.triangles):
        return None
    one_each = bool((np.diff(surf.face) > 0).all())
    if one_each:
        # one triangle per face in ascending order (no quadrilaterals): the unique faces
        # are the triangles' and np.maximum.at on zeros is an elementwise maximum
        fids, inv = surf.face, None
    else:
        fids, inv = np.unique(surf.face, return_inverse=True)

    compiled = kernels.use_compiled(mesh.n_cells)
    curv = surface_curvature(surf, feature_angle, compiled)
    tri = surf.triangles
    if compiled:
        from .kernels import geometry as kg
        rho_t = np.empty(len(tri))
        kg.enclosing_radii(surf.points, tri, rho_t)
    else:  # the corners gathered a chunk at a time
        rho_t = np.concatenate([enclosing_radius(surf.points[tri[s:s + _FIT_CHUNK]])
                                for s in range(0, len(tri), _FIT_CHUNK)])
    kap_t = np.where(np.isfinite(curv.kmax), curv.kmax, 0.0)
    if one_each:
        kappa = np.maximum(np.zeros(len(fids)), kap_t)
        rho = np.maximum(np.zeros(len(fids)), rho_t)
    else:
        kappa = np.zeros(len(fids))
        rho = np.zeros(len(fids))
        np.maximum.at(kappa, inv, kap_t)
        np.maximum.at(rho, inv, rho_t)
    s_lin = chord_height(rho, kappa)
    s_quad = np.minimum(quadratic_chord_height(rho, kappa), s_lin)
    if topo.edges.has_mids:
        # (fids are the boundary faces in ascending order, as ``bnd``: corners known)
        dev, has_mid, longest = _face_midnode_deviation(mesh, topo, fids, nodes)
        expected_edge = chord_height(0.5 * longest, kappa)  # sagitta of the longest side
        curved = has_mid & (dev > 0.1 * expected_edge) & (expected_edge > 0)
        mids = has_mid & (expected_edge > 0)
        on_surface = float(np.median(dev[mids] / expected_edge[mids])) if mids.any() \
            else None
    else:  # straight-sided geometry: no face has mid-nodes to follow the surface with
        curved, on_surface = np.zeros(len(fids), bool), None
    cells = topo.faces.cells[fids, 0]
    k = 2.0 * np.pi * fmax / cell_speed[cells]
    tol = target / (2.0 * k)
    gap = np.where(curved, s_quad, s_lin)
    misfit = ~curved & (s_lin > tol)
    needs_quad = misfit & (s_quad <= tol)
    needs_ref = s_quad > tol
    ratio = gap / tol
    bad = np.flatnonzero(ratio > 1)
    worst = bad[np.argsort(-ratio[bad], kind="stable")][:max_listed]
    with np.errstate(divide="ignore", invalid="ignore"):
        R = np.where(kappa[worst] > 0, 1.0 / kappa[worst], np.inf)
        h_lin = 2.0 * np.sqrt(2.0 * R * tol[worst])               # chord with sagitta tol
        h_quad = (512.0 * R ** 3 * tol[worst]) ** 0.25          # h^4 / (512 R^3) = tol
    centre = np.zeros((len(worst), 3))
    fn = topo.faces.nodes_of(fids[worst])
    cnt = (fn >= 0).sum(axis=1)
    for j in range(4):
        ok = fn[:, j] >= 0
        centre[ok] += mesh.points[fn[ok, j]]
    centre /= np.maximum(cnt, 1)[:, None]
    pos = kappa[np.isfinite(kappa) & (kappa > 0)]
    return CurvedBoundary(len(fids), curv.n_patches, curv.feature_edges,
                          float(1.0 / pos.max()) if len(pos) else np.inf, fids, kappa, rho,
                          gap, tol, curved, misfit, needs_quad, needs_ref, fids[worst],
                          cells[worst], centre, ratio[worst], h_lin, h_quad, on_surface)


@dataclass(frozen=True)
class QuadraticGeometry:
    """Mid-node placement and Jacobian variation of the quadratic cells.

    n_cells : quadratic cells.  midnode_deviation : (n_cells,) max over the cell's
    edges of |x_m - (x_a + x_b)/2| / |x_b - x_a| (0 = straight).
    jacobian_ratio : (n_cells,) min det J / max det J over the quadrature points
    (1 = affine-like, <= 0 degenerate or folded).  cell_ids : (n_cells,) global ids.
    low : cells below the threshold (count); listed : worst ids and centroids (m).
    """

    n_cells: int
    cell_ids: np.ndarray
    midnode_deviation: np.ndarray
    jacobian_ratio: np.ndarray
    threshold: float
    low: int
    listed: np.ndarray
    listed_locations: np.ndarray


def quadratic_geometry(mesh: Mesh, threshold: float = 0.3, chunk: int = 100_000,
                       max_listed: int = 20) -> QuadraticGeometry | None:
    """Mid-node deviation and det J variation of quadratic cells (None if there are none).

    Large meshes take the compiled kernel; the values are then the ones kept by
    :func:`meshcheck.validity.min_scaled_jacobian` when it ran first on the same mesh.
    """
    ids, devs, ratios = [], [], []
    P = mesh.points
    compiled = kernels.use_compiled(mesh.n_cells)
    for bi, b in enumerate(mesh.blocks):
        if not b.info.quadratic:
            continue
        if compiled:
            ratio, dev = quadratic_summary(P, b.cells, b.type)
            devs.append(dev)
            ratios.append(ratio)
            ids.append(np.arange(len(b)) + mesh.block_offsets[bi])
            continue
        e = b.info.edges
        for s in range(0, len(b), chunk):
            c = b.cells[s:s + chunk]
            xa, xb, xm = P[c[:, e[:, 0]]], P[c[:, e[:, 1]]], P[c[:, e[:, 2]]]
            L = np.linalg.norm(xb - xa, axis=2)
            with np.errstate(divide="ignore", invalid="ignore"):
                d = np.linalg.norm(xm - 0.5 * (xa + xb), axis=2) / L
            devs.append(np.nanmax(np.where(np.isfinite(d), d, np.inf), axis=1))
            det = jacobian_determinants(P, c, b.type, "quadrature")
            hi = det.max(axis=1)
            with np.errstate(divide="ignore", invalid="ignore"):
                ratios.append(np.where(hi > 0, det.min(axis=1) / np.where(hi > 0, hi, 1.0), -1.0))
            ids.append(np.arange(s, s + len(c)) + mesh.block_offsets[bi])
    if not ids:
        return None
    ids, dev, ratio = np.concatenate(ids), np.concatenate(devs), np.concatenate(ratios)
    low = np.flatnonzero(ratio < threshold)
    worst = low[np.argsort(ratio[low], kind="stable")][:max_listed]
    return QuadraticGeometry(len(ids), ids, dev, ratio, float(threshold), int(len(low)),
                             ids[worst], mesh.centroids_of(ids[worst]))
