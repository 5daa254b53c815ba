"""Absorbing layers (PML and similar): thickness, cells across, conformity.

A region with role "pml" or "absorbing_layer" should wrap the fluid region it
absorbs for (``surrounds``, or every non-layer region it shares faces with).
Its boundary splits into

* the interface: faces shared with the surrounded region;
* the outer (truncation) boundary: the layer's own boundary faces that face
  away from the interface (outward normal within 60 deg of the direction from
  the nearest interface point);
* lateral faces (the rest: walls continuing through the layer).

Measured: the thickness at every interface node (distance to the outer
boundary, exact point-to-triangle distance, Ericson, "Real-Time Collision
Detection", 2005, sec. 5.1.5) in metres and in wavelengths at the lowest
frequency; the cells across (edge hops from each interface node to the outer
boundary through the layer); and the conformity of the interface (layer
boundary faces lying on the surrounded region's boundary without being shared
with it are a non-conforming interface that no wave crosses).

Usual ranges (common practice, no source): a layer at least a quarter of the
longest wavelength thick, at least four cells across, a constant thickness,
and a conforming interface; layers thicker than about two wavelengths only
cost unknowns.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .mesh import Mesh
from .topology import Topology

__all__ = ["LayerCheck", "closest_point_on_triangles", "nearest_on_surface", "check_layer",
           "face_triangles"]


def closest_point_on_triangles(p: np.ndarray, a: np.ndarray, b: np.ndarray,
                               c: np.ndarray) -> np.ndarray:
    """Closest point of triangle (a, b, c) to p, row by row (Ericson 2005, 5.1.5).

    All (k, 3) float64; returns (k, 3).  Degenerate triangles fall back to their
    nearest vertex or edge region.
    """
    ab, ac, ap = b - a, c - a, p - a
    d1, d2 = np.einsum("ij,ij->i", ab, ap), np.einsum("ij,ij->i", ac, ap)
    bp = p - b
    d3, d4 = np.einsum("ij,ij->i", ab, bp), np.einsum("ij,ij->i", ac, bp)
    cp = p - c
    d5, d6 = np.einsum("ij,ij->i", ab, cp), np.einsum("ij,ij->i", ac, cp)
    vc = d1 * d4 - d3 * d2
    vb = d5 * d2 - d1 * d6
    va = d3 * d6 - d5 * d4
    out = np.empty_like(p)
    done = np.zeros(len(p), bool)

    def put(mask, value):
        m = mask & ~done
        out[m] = value[m] if value.ndim == 2 else value
        done[m] = True

    with np.errstate(divide="ignore", invalid="ignore"):
        put((d1 <= 0) & (d2 <= 0), a)
        put((d3 >= 0) & (d4 <= d3), b)
        put((d6 >= 0) & (d5 <= d6), c)
        v = d1 / (d1 - d3)
        put((vc <= 0) & (d1 >= 0) & (d3 <= 0), a + v[:, None] * ab)
        w = d2 / (d2 - d6)
        put((vb <= 0) & (d2 >= 0) & (d6 <= 0), a + w[:, None] * ac)
        w = (d4 - d3) / ((d4 - d3) + (d5 - d6))
        put((va <= 0) & ((d4 - d3) >= 0) & ((d5 - d6) >= 0), b + w[:, None] * (c - b))
        den = va + vb + vc
        v, w = vb / den, vc / den
        inside = a + v[:, None] * ab + w[:, None] * ac
    bad = ~np.isfinite(inside).all(axis=1)
    inside[bad] = a[bad]
    put(np.ones(len(p), bool), inside)
    return out


def nearest_on_surface(points: np.ndarray, tri_xyz: np.ndarray,
                       chunk: int = 200_000) -> tuple[np.ndarray, np.ndarray]:
    """Nearest point of a triangle soup to each query point (exact).

    points : (q, 3); tri_xyz : (t, 3, 3) metres.  The nearest triangle centroid is
    on the surface, so its distance d_c bounds the answer; a triangle can only hold
    a closer point if its centroid lies within d_c + r (r: largest centroid-to-corner
    distance of any triangle).  Those candidates are gathered with k-nearest queries
    (k doubled where the k-th centroid is still inside) and tested exactly.
    Returns distances (q,) and nearest points (q, 3).
    """
    q = len(points)
    if not len(tri_xyz) or not q:
        return np.full(q, np.inf), np.full((q, 3), np.nan)
    if q > 20_000:   # bound the candidate lists: query points in slices
        parts = [nearest_on_surface(points[s:s + 20_000], tri_xyz, chunk)
                 for s in range(0, q, 20_000)]
        return np.concatenate([p[0] for p in parts]), np.concatenate([p[1] for p in parts])
    cen = tri_xyz.mean(axis=1)
    r = float(np.max(np.linalg.norm(tri_xyz - cen[:, None, :], axis=2)))
    from scipy.spatial import cKDTree  # imported here: scipy.spatial takes 0.2 s to load

    tree = cKDTree(cen)
    dc, _ = tree.query(points)
    radius = dc * (1 + 1e-12) + r * (1 + 1e-12)
    qs, ts = [], []
    todo = np.arange(q)
    k = min(16, len(cen))
    while len(todo):
        dist, idx = tree.query(points[todo], k=k)
        dist, idx = dist.reshape(len(todo), -1), idx.reshape(len(todo), -1)
        inside = dist <= radius[todo, None]
        full = inside[:, -1] & (k < len(cen))
        done = ~full
        rows, cols = np.nonzero(inside[done])
        qs.append(todo[done][rows])
        ts.append(idx[done][rows, cols])
        todo = todo[full]
        k = min(2 * k, len(cen))
    qi, ti = np.concatenate(qs), np.concatenate(ts)
    best = np.full(q, np.inf)
    best_pt = np.full((q, 3), np.nan)
    for s in range(0, len(qi), chunk):
        a, t = qi[s:s + chunk], ti[s:s + chunk]
        X = tri_xyz[t]
        cp = closest_point_on_triangles(points[a], X[:, 0], X[:, 1], X[:, 2])
        d = np.linalg.norm(cp - points[a], axis=1)
        order = np.lexsort((d, a))
        a_s, first = a[order], np.ones(len(order), bool)
        first[1:] = a_s[1:] != a_s[:-1]
        sel = order[first]
        upd = d[sel] < best[a[sel]]
        best[a[sel][upd]] = d[sel][upd]
        best_pt[a[sel][upd]] = cp[sel][upd]
    return best, best_pt


def face_triangles(mesh: Mesh, topo: Topology, fids: np.ndarray) -> np.ndarray:
    """(t, 3, 3) triangles of faces (quads split 0-2), metres."""
    nodes = topo.faces.nodes_of(fids)
    quad = nodes[:, 3] >= 0
    tri = np.concatenate([nodes[:, [0, 1, 2]], nodes[quad][:, [0, 2, 3]]])
    return mesh.points[tri]


def _face_normals_centres(mesh: Mesh, topo: Topology, fids: np.ndarray):
    nodes = topo.faces.nodes_of(fids)
    P = mesh.points
    quad = nodes[:, 3] >= 0
    last = np.where(quad, nodes[:, 3], nodes[:, 0])
    n = np.cross(P[nodes[:, 1]] - P[nodes[:, 0]], P[nodes[:, 2]] - P[nodes[:, 0]])
    n[quad] = np.cross(P[nodes[quad, 2]] - P[nodes[quad, 0]], P[last[quad]] - P[nodes[quad, 1]])
    with np.errstate(divide="ignore", invalid="ignore"):
        n /= np.linalg.norm(n, axis=1)[:, None]
    cnt = np.where(quad, 4, 3)
    c = (P[nodes[:, 0]] + P[nodes[:, 1]] + P[nodes[:, 2]] + np.where(quad[:, None], P[last], 0.0))
    return n, c / cnt[:, None]


def _face_size(mesh: Mesh, topo: Topology, fids: np.ndarray) -> np.ndarray:
    """(k,) longest side of each face, metres."""
    nodes = topo.faces.nodes_of(fids)
    quad = nodes[:, 3] >= 0
    nxt = np.column_stack([nodes[:, 1], nodes[:, 2], np.where(quad, nodes[:, 3], nodes[:, 0]),
                           nodes[:, 0]])
    out = np.zeros(len(fids))
    for j in range(4):
        ok = (nodes[:, j] >= 0) & ((j < 3) | quad)
        out[ok] = np.maximum(out[ok], np.linalg.norm(
            mesh.points[nxt[ok, j]] - mesh.points[nodes[ok, j]], axis=1))
    return out


@dataclass(frozen=True)
class LayerCheck:
    """One absorbing layer.

    tag, name : the layer region.  surrounds : tags of the regions it wraps.
    wavelength : at the lowest frequency in the layer's medium, m.
    interface_faces : faces shared with the surrounded regions.
    nonconforming_faces : layer boundary faces lying on (within a tenth of their
        size of) the surrounded regions' boundary without being shared.
    outer_faces, lateral_faces : counts of the layer's other boundary faces.
    thickness : (min, median, max) distance from the interface nodes to the
        outer boundary, m (NaN when there is no interface or no outer boundary).
    cells_across : (min, median) edge hops from the interface to the outer boundary.
    conforming : interface exists and no non-conforming face.
    messages : (severity, code, text) of what is outside the usual ranges.
    location : (3,) a point of the layer (centroid of its first cell), m.
    """

    tag: int
    name: str
    surrounds: tuple[int, ...]
    wavelength: float
    interface_faces: int
    nonconforming_faces: int
    outer_faces: int
    lateral_faces: int
    thickness: tuple[float, float, float]
    cells_across: tuple[float, float]
    conforming: bool
    messages: tuple[tuple[str, str, str], ...]
    location: np.ndarray

    @property
    def thickness_wavelengths(self) -> tuple[float, float, float]:
        return tuple(t / self.wavelength for t in self.thickness)


def check_layer(mesh: Mesh, topo: Topology, tag: int, speed: float, fmin: float,
                surrounds: int | None = None, layer_tags: set[int] | None = None,
                min_wavelengths: float = 0.25, max_wavelengths: float = 2.0,
                min_cells: int = 4) -> LayerCheck:
    """Measure one layer region (3D meshes).

    speed : effective sound speed in the layer, m/s; fmin : lowest frequency, Hz.
    surrounds : tag of the wrapped region (None: every non-layer neighbour).
    layer_tags : tags of all layer regions (excluded from the default neighbours).
    """
    layer_tags = set(layer_tags or ()) | {tag}
    region = mesh.region
    f = topo.faces
    in_layer = region == tag
    c0, c1 = f.cells[:, 0], f.cells[:, 1]
    r0 = region[c0]
    r1 = np.where(c1 >= 0, region[np.maximum(c1, 0)], -(2 ** 62))
    shared = f.count == 2
    touch = shared & ((r0 == tag) ^ (r1 == tag))
    other = np.where(r0 == tag, r1, r0)
    if surrounds is not None:
        inner_tags = (int(surrounds),)
    else:
        cand = np.unique(other[touch])
        inner_tags = tuple(int(t) for t in cand if int(t) not in layer_tags)
    inner = np.isin(region, inner_tags)
    interface = np.flatnonzero(touch & np.isin(other, inner_tags))
    own_bnd = np.flatnonzero((f.count == 1) & in_layer[c0])
    inner_bnd = np.flatnonzero((f.count == 1) & inner[c0])
    lam = speed / fmin
    msgs: list[tuple[str, str, str]] = []
    name = mesh.region_name(tag)
    loc = mesh.centroids_of(np.flatnonzero(in_layer)[:1])[0] if in_layer.any() else np.zeros(3)
    # conformity: own boundary faces lying on the inner regions' boundary
    nonconf = 0
    if len(own_bnd) and len(inner_bnd):
        _, c_own = _face_normals_centres(mesh, topo, own_bnd)
        d, _ = nearest_on_surface(c_own, face_triangles(mesh, topo, inner_bnd))
        on_inner = d <= 0.1 * _face_size(mesh, topo, own_bnd)
        nonconf = int(on_inner.sum())
        own_bnd = own_bnd[~on_inner]
    thickness = (np.nan, np.nan, np.nan)
    across = (np.nan, np.nan)
    n_outer = n_lat = 0
    if len(interface) and len(own_bnd):
        itri = face_triangles(mesh, topo, interface)
        n_b, c_b = _face_normals_centres(mesh, topo, own_bnd)
        d_i, p_i = nearest_on_surface(c_b, itri)
        with np.errstate(divide="ignore", invalid="ignore"):
            away = np.einsum("ij,ij->i", n_b, c_b - p_i) / d_i
        outer = own_bnd[np.nan_to_num(away, nan=0.0) >= 0.5]
        n_outer = len(outer)
        n_lat = len(own_bnd) - n_outer
        fn = topo.faces.nodes_of(interface)
        inodes = np.unique(fn[fn >= 0])
        if n_outer:
            d_t, _ = nearest_on_surface(mesh.points[inodes], face_triangles(mesh, topo, outer))
            thickness = (float(d_t.min()), float(np.median(d_t)), float(d_t.max()))
            fn = topo.faces.nodes_of(outer)
            onodes = np.unique(fn[fn >= 0])
            hops = _hops(mesh, topo, in_layer, onodes, inodes)
            fin = hops[np.isfinite(hops)]
            if len(fin):
                across = (float(fin.min()), float(np.median(fin)))
    if not len(interface):
        what = "the region it surrounds" if surrounds is not None else "any fluid region"
        msgs.append(("warning", "layer_no_interface",
                     f"absorbing layer {name} shares no face with {what}"))
    if nonconf:
        msgs.append(("warning", "layer_nonconforming",
                     f"absorbing layer {name}: {nonconf} boundary faces lie on the fluid region's "
                     "boundary without being shared (non-conforming interface: no wave passes)"))
    if len(interface) and not n_outer:
        msgs.append(("warning", "layer_no_outer_boundary",
                     f"absorbing layer {name} has no outer boundary facing away from the fluid"))
    if np.isfinite(thickness[0]):
        t_min = thickness[0] / lam
        if t_min < min_wavelengths:
            msgs.append(("warning", "layer_thin",
                         f"absorbing layer {name} is {t_min:.3g} wavelengths thick at its thinnest "
                         f"at {fmin:g} Hz (usual: at least {min_wavelengths:g}; common practice)"))
        if thickness[1] / lam > max_wavelengths:
            msgs.append(("note", "layer_thick",
                         f"absorbing layer {name} is {thickness[1] / lam:.3g} wavelengths thick at "
                         f"{fmin:g} Hz (more than {max_wavelengths:g} mostly adds unknowns)"))
        if thickness[2] > 1.5 * thickness[0]:
            msgs.append(("note", "layer_uneven",
                         f"absorbing layer {name} thickness varies from {thickness[0]:.4g} to "
                         f"{thickness[2]:.4g} m"))
    if np.isfinite(across[0]) and across[0] < min_cells:
        msgs.append(("warning", "layer_few_cells",
                     f"absorbing layer {name} has {across[0]:.0f} cells across at its thinnest "
                     f"(usual: at least {min_cells}; common practice)"))
    conforming = bool(len(interface)) and nonconf == 0
    return LayerCheck(int(tag), name, tuple(int(t) for t in inner_tags), float(lam),
                      int(len(interface)), nonconf, n_outer, n_lat, thickness, across,
                      conforming, tuple(msgs), loc)


def _hops(mesh: Mesh, topo: Topology, in_layer: np.ndarray, sources: np.ndarray,
          targets: np.ndarray) -> np.ndarray:
    """Edge hops through the layer's edges from the nearest source node to each target."""
    e = topo.edges
    layer_edge = e.from_cells(in_layer.astype(np.int8), np.maximum) > 0
    a, b = e.nodes[layer_edge, 0], e.nodes[layer_edge, 1]
    n = mesh.n_points
    src = np.full(len(sources), n)
    rows = np.concatenate([a, b, src])
    cols = np.concatenate([b, a, sources])
    from scipy import sparse
    from scipy.sparse.csgraph import dijkstra
    g = sparse.coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n + 1, n + 1)).tocsr()
    dist = dijkstra(g, directed=True, indices=n, unweighted=True)
    return dist[targets] - 1.0
