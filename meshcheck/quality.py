"""Shape-quality metrics per cell (Verdict definitions), vectorised over cells.

Definitions follow C. J. Stimpson, C. D. Ernst, P. Knupp, P. P. Pebay and
D. Thompson, "The Verdict Library Reference Manual", Sandia report
SAND2007-2853P (2007) -- "the manual" below -- which VTK's ``vtkMeshQuality``
implements; the tests compare every value with VTK 9.7.  Triangle and quad
measures go back to P. P. Pebay and T. J. Baker, Math. Comp. 72 (2003) and
P. P. Pebay, "Planar quadrangle quality measures", Eng. Comput. 20 (2004).

Notation: ``L`` edge lengths, ``V`` volume, ``A`` area, ``r`` / ``R`` in- and
circumradius, ``J`` the signed corner Jacobian (triple product of the three
edge vectors leaving a corner, right-handed for a cell ordered like its VTK
reference cell).

=================  ==========================================================
metric             definition (dimensionless unless stated)
=================  ==========================================================
edge_ratio         L_max / L_min over the edges (all cell types)
aspect_ratio       tet: L_max / (2 sqrt(6) r); triangle: L_max / (2 sqrt(3) r);
                   quad: L_max (L_0+L_1+L_2+L_3) / (sum of corner areas)
radius_ratio       tet: R / (3 r); triangle: R / (2 r); quad:
                   sqrt(sum L_k^2) h_max / (2 sqrt(2) min_k |L_{k-1} x L_k|),
                   h_max the longest edge or diagonal
scaled_jacobian    tet: sqrt(2) J / max over corners of the product of the
                   three edge lengths there; hex: min over the 8 corners and
                   the centre (principal axes) of J / (|a||b||c|); wedge:
                   2/sqrt(3) min over the 6 corners of J / (|a||b||c|);
                   pyramid: sqrt(2) times the minimum tet scaled Jacobian of
                   the tets (0,1,2,4) (0,2,3,4) (0,1,3,4) (1,2,3,4), reflected
                   as 2 - x above 1; triangle: 2/sqrt(3) * 2A / max(L_i L_j);
                   quad: min over corners of (L_{k-1} x L_k).n / (L_{k-1} L_k)
min_dihedral,      tets only, degrees: all six interior dihedral angles,
max_dihedral       theta_e = atan2(6V L_e, -N_1.N_2), N_1, N_2 the outward
                   face normals (|N| = 2 * face area) of the two faces at e
skew               hex: max |X_i.X_j| over pairs of unit principal axes;
                   quad: |X_1.X_2| of the unit principal axes
min_angle          triangles and quads, degrees: smallest interior corner
                   angle (the angle between the two edges at a corner)
=================  ==========================================================

A metric that is not defined for a cell type is NaN.  Quadratic cells are
measured on their corner nodes with the linear definitions (the curvature of
quadratic cells is checked by :mod:`meshcheck.jacobian` at quadrature points).

Sign conventions.  Only ``scaled_jacobian`` is signed: negative means inverted
(a corner, or for hexes the centre, with a left-handed frame).  For 2D cells
(which lie in the plane z = 0) the sign is taken against +z, so a clockwise
triangle or quad is negative; VTK orients triangles and quads by their own
normal and reports |value| there.  For pyramids VTK returns 0 instead of a
negative value; meshcheck keeps the sign.  Edge, aspect and radius ratios,
angles and skew are unsigned and blind to inversion.

Differences from VTK 9.7's ``vtkMeshQuality`` found while testing (VTK is
followed everywhere else):

* hex edge ratio: VTK takes the maximum over the first six edges only
  (0-1, 1-2, 2-3, 3-0, 4-5, 5-6) and the minimum over all twelve; meshcheck
  uses all twelve edges for both.
* tet minimum angle: VTK measures the angle between unoriented face normals,
  which gives 180 deg minus the dihedral angle at edges 0-2 and 1-3; meshcheck
  computes the six true dihedral angles (reported as ``min_dihedral``).

Degenerate cells (a zero edge, face or volume) give ``inf`` for the ratios and
0 for the scaled Jacobian contributions that cannot be normalised.
"""
from __future__ import annotations

import math
from collections.abc import Mapping
from functools import lru_cache
from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np

from . import kernels
from .cells import CELL_TYPES
from .errors import SettingsError
from .mesh import Mesh

__all__ = [
    "METRICS",
    "MIN_SJ_TYPES",
    "FAMILIES",
    "family_of",
    "block_quality",
    "CellQuality",
    "mesh_quality",
    "QualityLimits",
    "out_of_range",
    "CellFlags",
    "METRIC_BAD",
    "metric_stats",
    "summarise",
]

METRICS: tuple[str, ...] = ("edge_ratio", "aspect_ratio", "radius_ratio", "scaled_jacobian",
                            "min_dihedral", "max_dihedral", "skew", "min_angle")
#: direction in which a quality metric gets worse
METRIC_BAD = {"edge_ratio": "high", "aspect_ratio": "high", "radius_ratio": "high",
              "scaled_jacobian": "low", "min_dihedral": "low", "max_dihedral": "high",
              "skew": "high", "min_angle": "low"}
FAMILIES: tuple[str, ...] = ("tet", "hex", "wedge", "pyramid", "tri", "quad")
_FAMILY = {"tetra": "tet", "hexahedron": "hex", "wedge": "wedge", "pyramid": "pyramid",
           "triangle": "tri", "quad": "quad"}

_SQRT2 = math.sqrt(2.0)
_SQRT3 = math.sqrt(3.0)
_SQRT6 = math.sqrt(6.0)


def family_of(cell_type: str) -> str:
    """Cell family ("tet", "hex", "wedge", "pyramid", "tri", "quad") of a meshio type."""
    try:
        return _FAMILY[CELL_TYPES[cell_type].linear]
    except KeyError:
        raise ValueError(f"unsupported cell type {cell_type!r}") from None


# --------------------------------------------------------- small vector ops
# Vectors are (d, m) arrays: one row per component, one column per cell.
def _dot(a, b):
    return np.einsum("im,im->m", a, b)


def _norm(a):
    return np.sqrt(_dot(a, a))


def _cross(a, b):
    out = np.empty(a.shape)
    for i, j, k in ((0, 1, 2), (1, 2, 0), (2, 0, 1)):
        np.multiply(a[j], b[k], out=out[i])
        out[i] -= a[k] * b[j]
    return out


def _cross_z(a, b):
    return a[0] * b[1] - a[1] * b[0]


def _triple(a, b, c):
    return (a[0] * (b[1] * c[2] - b[2] * c[1]) + a[1] * (b[2] * c[0] - b[0] * c[2])
            + a[2] * (b[0] * c[1] - b[1] * c[0]))


def _ratio(num, den):
    """num / den with num / 0 = inf (num > 0) and 0 / 0 = inf (degenerate)."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = num / den
    return np.where(den == 0.0, np.inf, out)


def _safe_div(num, den):
    """num / den, 0 where den == 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        out = num / np.where(den == 0.0, 1.0, den)
    return np.where(den == 0.0, 0.0, out)


def _angle_deg(cross_norm, dot):
    return np.degrees(np.arctan2(cross_norm, dot))


def _corner_table(linear: str) -> np.ndarray:
    """(n_corners, 4) int: corner k and its three edge neighbours a, b, c
    ordered so that (x_a - x_k, x_b - x_k, x_c - x_k) is right-handed on the
    VTK reference cell."""
    info = CELL_TYPES[linear]
    ref = info.ref_coords
    rows = []
    for k in range(info.n_corners):
        nb = [int(b if a == k else a) for a, b, _ in info.edges if k in (a, b)]
        if len(nb) != 3:
            raise ValueError(f"corner {k} of {linear} does not have three edges")
        if np.linalg.det(ref[nb] - ref[k]) < 0:
            nb[0], nb[1] = nb[1], nb[0]
        rows.append([k] + nb)
    return np.array(rows, dtype=np.int64)


_TET_CORNERS = _corner_table("tetra")
_HEX_CORNERS = _corner_table("hexahedron")
_WEDGE_CORNERS = _corner_table("wedge")
_PYRAMID_TETS = ((0, 1, 2, 4), (0, 2, 3, 4), (0, 1, 3, 4), (1, 2, 3, 4))
# the two tet faces sharing each tet edge
_TET_EDGE_FACES = np.array([[j for j, f in enumerate(CELL_TYPES["tetra"].faces) if a in f and b in f]
                            for a, b, _ in CELL_TYPES["tetra"].edges], dtype=np.int64)


def _edge_lengths(X, edges):
    """(n_edges, m) lengths of the listed corner pairs."""
    return np.stack([_norm(X[b] - X[a]) for a, b in edges])


def _nan(m):
    return np.full(m, np.nan)


# ------------------------------------------------------------- per family
def _tet(X):
    """X: (4, 3, m).  Returns metrics of linear tetrahedra."""
    info = CELL_TYPES["tetra"]
    edges = info.edges[:, :2]
    ev = [X[b] - X[a] for a, b in edges]
    L2 = np.stack([_dot(e, e) for e in ev])
    L = np.sqrt(L2)
    lmax, lmin = L.max(axis=0), L.min(axis=0)
    # outward face normals, |N_f| = 2 * area_f; with a, b, c = X1-X0, X2-X0, X3-X0
    # the faces (0,2,1), (0,1,3), (0,3,2) give N = -(a x b), -(c x a), -(b x c)
    N = [_cross(X[f[1]] - X[f[0]], X[f[2]] - X[f[0]]) for f in info.faces]
    nN = np.stack([_norm(n) for n in N])
    a = X[1] - X[0]
    det = -_dot(a, N[3])                         # a . (b x c) = 6 V, signed
    adet = np.abs(det)
    s2 = nN.sum(axis=0)                          # 2 * total surface area
    out = {}
    out["edge_ratio"] = _ratio(lmax, lmin)
    # inradius r = 3V / S = |det| / s2
    out["aspect_ratio"] = _ratio(lmax * s2, 2.0 * _SQRT6 * adet)
    # circumradius R = |La^2 (b x c) + Lb^2 (c x a) + Lc^2 (a x b)| / (2 |det|),
    # La = |X1-X0| (edge 0), Lb = |X2-X0| (edge 2), Lc = |X3-X0| (edge 3)
    num = L2[0] * N[3] + L2[2] * N[1] + L2[3] * N[0]
    out["radius_ratio"] = _ratio(_norm(num) * s2, 6.0 * adet * adet)
    # scaled Jacobian: corner products of the three incident edge lengths
    eid = {frozenset((int(p), int(q))): i for i, (p, q) in enumerate(edges)}
    lam = np.stack([L[eid[frozenset((k, i))]] * L[eid[frozenset((k, j))]] * L[eid[frozenset((k, l))]]
                    for k, i, j, l in _TET_CORNERS])
    lam_max = np.maximum(lam.max(axis=0), det)
    out["scaled_jacobian"] = _safe_div(_SQRT2 * det, lam_max)
    # dihedral angle at edge e between faces f1, f2:
    #   theta_e = atan2(6V L_e, -N_f1 . N_f2)   (sin theta = 3 V L_e / (2 A_1 A_2))
    # select the extreme edges by the cosine, then evaluate atan2 on those only
    dots = np.stack([-_dot(N[f1], N[f2]) for f1, f2 in _TET_EDGE_FACES])
    with np.errstate(divide="ignore", invalid="ignore"):
        cos = dots / (nN[_TET_EDGE_FACES[:, 0]] * nN[_TET_EDGE_FACES[:, 1]])
    cos = np.where(np.isnan(cos), 1.0, cos)
    for name, pick in (("min_dihedral", np.argmax(cos, axis=0)), ("max_dihedral", np.argmin(cos, axis=0))):
        le = np.take_along_axis(L, pick[None], axis=0)[0]
        dd = np.take_along_axis(dots, pick[None], axis=0)[0]
        out[name] = _angle_deg(adet * le, dd)
    return out


def _hex_axes(X):
    x1 = (X[1] - X[0]) + (X[2] - X[3]) + (X[5] - X[4]) + (X[6] - X[7])
    x2 = (X[3] - X[0]) + (X[2] - X[1]) + (X[7] - X[4]) + (X[6] - X[5])
    x3 = (X[4] - X[0]) + (X[5] - X[1]) + (X[6] - X[2]) + (X[7] - X[3])
    return x1, x2, x3


def _corner_sj(X, table):
    """(n_corners, m) normalised corner Jacobians J / (|a||b||c|)."""
    vals = []
    for k, i, j, l in table:
        a, b, c = X[i] - X[k], X[j] - X[k], X[l] - X[k]
        vals.append(_safe_div(_triple(a, b, c), _norm(a) * _norm(b) * _norm(c)))
    return np.stack(vals)


def _hex(X):
    info = CELL_TYPES["hexahedron"]
    L = _edge_lengths(X, info.edges[:, :2])
    out = {"edge_ratio": _ratio(L.max(axis=0), L.min(axis=0))}
    x1, x2, x3 = _hex_axes(X)
    n1, n2, n3 = _norm(x1), _norm(x2), _norm(x3)
    centre = _safe_div(_triple(x1, x2, x3), n1 * n2 * n3)
    out["scaled_jacobian"] = np.minimum(_corner_sj(X, _HEX_CORNERS).min(axis=0), centre)
    with np.errstate(divide="ignore", invalid="ignore"):
        skew = np.maximum.reduce([np.abs(_dot(x1, x2)) / (n1 * n2),
                                  np.abs(_dot(x1, x3)) / (n1 * n3),
                                  np.abs(_dot(x2, x3)) / (n2 * n3)])
    out["skew"] = np.where((n1 > 0) & (n2 > 0) & (n3 > 0), skew, np.inf)
    return out


def _wedge(X):
    info = CELL_TYPES["wedge"]
    L = _edge_lengths(X, info.edges[:, :2])
    return {"edge_ratio": _ratio(L.max(axis=0), L.min(axis=0)),
            "scaled_jacobian": (2.0 / _SQRT3) * _corner_sj(X, _WEDGE_CORNERS).min(axis=0)}


def _pyramid(X):
    info = CELL_TYPES["pyramid"]
    L = _edge_lengths(X, info.edges[:, :2])
    tets = [_tet(X[list(t)])["scaled_jacobian"] for t in _PYRAMID_TETS]
    sj = _SQRT2 * np.minimum.reduce(tets)
    sj = np.where(sj > 1.0, 2.0 - sj, sj)
    return {"edge_ratio": _ratio(L.max(axis=0), L.min(axis=0)), "scaled_jacobian": sj}


def _tri(X):
    """X: (3, 2, m), xy coordinates of the corners."""
    e = [X[1] - X[0], X[2] - X[1], X[0] - X[2]]
    L = np.stack([_norm(v) for v in e])
    lmax, lmin = L.max(axis=0), L.min(axis=0)
    per = L.sum(axis=0)
    a2 = _cross_z(e[0], X[2] - X[0])             # 2 * signed area (+z)
    aa2 = np.abs(a2)
    out = {"edge_ratio": _ratio(lmax, lmin)}
    # r = |a2| / per, R = L0 L1 L2 / (2 |a2|)
    out["aspect_ratio"] = _ratio(lmax * per, 2.0 * _SQRT3 * aa2)
    out["radius_ratio"] = _ratio(L[0] * L[1] * L[2] * per, 4.0 * aa2 * aa2)
    pmax = np.maximum.reduce([L[0] * L[1], L[1] * L[2], L[2] * L[0]])
    out["scaled_jacobian"] = _safe_div((2.0 / _SQRT3) * a2, pmax)
    # corner k lies between edges e[k-1] (incoming) and e[k] (outgoing)
    ang = np.stack([_angle_deg(np.abs(_cross_z(e[k - 1], e[k])), -_dot(e[k - 1], e[k]))
                    for k in range(3)])
    out["min_angle"] = ang.min(axis=0)
    return out


def _quad(X):
    """X: (4, 2, m), xy coordinates of the corners."""
    e = [X[1] - X[0], X[2] - X[1], X[3] - X[2], X[0] - X[3]]
    L = np.stack([_norm(v) for v in e])
    lmax, lmin = L.max(axis=0), L.min(axis=0)
    # corner k: incoming edge e[k-1], outgoing e[k]; signed area against +z
    alpha = np.stack([_cross_z(e[k - 1], e[k]) for k in range(4)])
    out = {"edge_ratio": _ratio(lmax, lmin)}
    out["aspect_ratio"] = _ratio(lmax * L.sum(axis=0), np.abs(alpha.sum(axis=0)))
    d0, d1 = X[2] - X[0], X[3] - X[1]
    h2 = np.maximum(lmax * lmax, np.maximum(_dot(d0, d0), _dot(d1, d1)))
    out["radius_ratio"] = _ratio(np.sqrt((L * L).sum(axis=0) * h2),
                                 2.0 * _SQRT2 * np.abs(alpha).min(axis=0))
    sj = np.stack([_safe_div(alpha[k], L[k - 1] * L[k]) for k in range(4)])
    out["scaled_jacobian"] = sj.min(axis=0)
    x1, x2 = e[0] - e[2], e[1] - e[3]
    n1, n2 = _norm(x1), _norm(x2)
    out["skew"] = _safe_div(np.abs(_dot(x1, x2)), n1 * n2)
    ang = np.stack([_angle_deg(np.abs(alpha[k]), -_dot(e[k - 1], e[k])) for k in range(4)])
    out["min_angle"] = ang.min(axis=0)
    return out


_COMPUTE = {"tet": _tet, "hex": _hex, "wedge": _wedge, "pyramid": _pyramid,
            "tri": _tri, "quad": _quad}


# ------------------------------------------------------------- public API
def block_quality(points: np.ndarray, cells: np.ndarray, cell_type: str) -> dict[str, np.ndarray]:
    """Every metric of :data:`METRICS` for one block of cells.

    points : (n, 3) float64 coordinates, metres (z = 0 for 2D cells).
    cells : (m, n_nodes) int node indices, meshio/VTK order.
    cell_type : a key of ``cells.CELL_TYPES``; quadratic cells are measured on
        their corners.
    Returns {metric: (m,) float64}, NaN where a metric is undefined for the
    type.  The corner coordinates are gathered once and shared by all metrics.
    """
    return _block_quality(_points_t(points), cells, cell_type)


def _points_t(points) -> np.ndarray:
    """(3, n) float64 component-major copy of the points."""
    return np.ascontiguousarray(np.asarray(points, dtype=np.float64).T)


def _block_quality(pts_t: np.ndarray, cells: np.ndarray, cell_type: str) -> dict[str, np.ndarray]:
    fam = family_of(cell_type)                   # ValueError if unsupported
    if kernels.use_compiled(len(cells)):
        out = np.full((len(METRICS), len(cells)), np.nan)
        _compiled_quality(np.ascontiguousarray(pts_t.T), cells, cell_type, out, 0)
        return dict(zip(METRICS, out))
    info = CELL_TYPES[cell_type]
    cells = np.asarray(cells)
    m = cells.shape[0]
    d = info.dim
    idx = np.ascontiguousarray(cells[:, : info.n_corners].T)                      # (nc, m)
    X = np.empty((info.n_corners, d, m))                                          # the one gather
    for c in range(d):
        X[:, c, :] = pts_t[c][idx]
    got = _COMPUTE[fam](X) if m else {}
    return {k: np.ascontiguousarray(got[k], dtype=np.float64) if k in got else _nan(m)
            for k in METRICS}


def _kernel_edges() -> dict:
    """Corner pairs of the edges, (n_edges, 2) int64, for the compiled kernels."""
    return {t: np.ascontiguousarray(CELL_TYPES[t].edges[:, :2])
            for t in ("hexahedron", "wedge", "pyramid")}


_KERNEL_EDGES = _kernel_edges()


def _compiled_quality(points: np.ndarray, cells: np.ndarray, cell_type: str, out: np.ndarray,
                      off: int) -> None:
    """Fill columns off..off+m of out (len(METRICS), n) float64 with the metrics of the
    m ``cells`` by the compiled kernels (:mod:`meshcheck.kernels.cells`: the same
    operations as the numpy functions above, one pass per cell); rows of metrics not
    defined for the type are left as they are.  Quadratic cells: corners only."""
    from .kernels import cells as _kc

    fam = family_of(cell_type)
    edges = _KERNEL_EDGES
    pts = np.ascontiguousarray(points, dtype=np.float64)
    c = np.ascontiguousarray(cells)  # int32 or int64; the kernels read the corner columns only
    if fam == "tet":
        _kc.tet_quality(pts, c, out, off)
    elif fam == "hex":
        _kc.hex_quality(pts, c, edges["hexahedron"], _HEX_CORNERS, out, off)
    elif fam == "wedge":
        _kc.wedge_quality(pts, c, edges["wedge"], _WEDGE_CORNERS, out, off)
    elif fam == "pyramid":
        _kc.pyramid_quality(pts, c, edges["pyramid"], out, off)
    elif fam == "tri":
        _kc.tri_quality(pts, c, out, off)
    else:
        _kc.quad_quality(pts, c, out, off)


@dataclass(frozen=True)
class CellQuality:
    """Quality metrics of every cell of a mesh.

    metrics : {name: (n_cells,) float64}, global cell order (blocks
        concatenated as in :class:`~meshcheck.mesh.Mesh`), NaN where the metric
        is not defined for the cell's type.  Angles in degrees, the rest
        dimensionless.
    """

    metrics: dict[str, np.ndarray]

    @property
    def n_cells(self) -> int:
        return len(next(iter(self.metrics.values()))) if self.metrics else 0

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(self.metrics)

    def __getitem__(self, name: str) -> np.ndarray:
        return self.metrics[name]

    def defined(self, name: str) -> np.ndarray:
        """(n_cells,) bool: cells for which ``name`` is defined (not NaN)."""
        return ~np.isnan(self.metrics[name])

    def extremes(self, name: str) -> tuple[float, float]:
        """(min, max) of ``name`` over the cells where it is defined, NaN if none."""
        v = self.metrics[name]
        v = v[~np.isnan(v)]
        return (float(v.min()), float(v.max())) if v.size else (math.nan, math.nan)

    def take(self, cell_ids) -> "CellQuality":
        """A new CellQuality restricted to the given global cell ids (in that order)."""
        ids = np.asarray(cell_ids, dtype=np.int64)
        return CellQuality({k: v[ids] for k, v in self.metrics.items()})

    def narrowed(self, dtype=np.float32) -> "CellQuality":
        """The same metrics in ``dtype`` (one (k, n_cells) array for the k metrics with
        values; a metric that is one broadcast value stays one)."""
        full = [k for k, v in self.metrics.items() if v.ndim != 1 or v.strides[0] != 0]
        rows = np.empty((len(full), self.n_cells), dtype)
        for r, k in zip(rows, full):
            r[...] = self.metrics[k]
        rows.setflags(write=False)
        row = dict(zip(full, rows))
        return CellQuality({k: row[k] if k in row else
                            np.broadcast_to(v[:1].astype(dtype), v.shape)
                            for k, v in self.metrics.items()})


@lru_cache(maxsize=None)
def defined_metrics(family: str) -> frozenset[str]:
    """The metrics of :data:`METRICS` a cell family defines (those its numpy routine
    computes, found on its reference cell)."""
    info = CELL_TYPES[{v: k for k, v in _FAMILY.items()}[family]]
    X = np.ascontiguousarray(info.ref_coords[:info.n_corners, :info.dim])[:, :, None]
    return frozenset(_COMPUTE[family](X))


def mesh_quality(mesh: Mesh, chunk_size: int = 200_000) -> CellQuality:
    """Metrics of every cell of ``mesh``, block by block in chunks of ``chunk_size`` cells.

    Memory is proportional to ``chunk_size`` plus the (n_cells,) outputs.
    """
    if chunk_size < 1:
        raise SettingsError(f"chunk_size must be positive, not {chunk_size}")
    n = mesh.n_cells
    offsets = mesh.block_offsets
    if kernels.use_compiled(n):
        # one pass per cell over whole blocks (memory: the outputs only); the rows of
        # metrics no cell type of the mesh defines are never written, so their pages are
        # never touched, and they are handed out as one broadcast NaN
        used = set().union(*(defined_metrics(family_of(b.type)) for b in mesh.blocks))
        rows = np.empty((len(METRICS), n))
        for k, name in enumerate(METRICS):
            if name in used:
                rows[k].fill(np.nan)
        for blk, lo in zip(mesh.blocks, offsets[:-1]):
            _compiled_quality(mesh.points, blk.cells, blk.type, rows, int(lo))
        rows.setflags(write=False)
        nan = np.broadcast_to(np.nan, (n,))
        return CellQuality({name: rows[k] if name in used else nan
                            for k, name in enumerate(METRICS)})
    out = {k: np.full(n, np.nan) for k in METRICS}
    pts_t = _points_t(mesh.points)
    for blk, off in zip(mesh.blocks, offsets[:-1]):
        for start in range(0, len(blk), chunk_size):
            stop = min(start + chunk_size, len(blk))
            q = _block_quality(pts_t, blk.cells[start:stop], blk.type)
            for k in METRICS:
                out[k][off + start: off + stop] = q[k]
    for v in out.values():
        v.setflags(write=False)
    return CellQuality(out)


# ------------------------------------------------------------------ limits
_INF = math.inf
_BOUND_TOL = 1e-9
_TET_MAX_ANGLE = math.degrees(math.acos(1.0 / 3.0))   # 70.53 deg, regular tet

# Acceptable ranges, (low, high), inclusive.  Source: the "acceptable range"
# column of the Verdict manual (SAND2007-2853P).  Checked against the manual's
# LaTeX source (sandialabs/verdict, docs/VerdictUserManual2007): tet scaled
# Jacobian [0.5, 1], quad skew [0, 0.5].  Checked against the table pyvista
# (cell_quality_info) transcribes from the manual: tet aspect and radius
# ratio [1, 3], tet minimum (dihedral) angle [40, 70.53] deg, triangle aspect
# ratio [1, 1.3], radius ratio [1, 3], scaled Jacobian [0.5, 2/sqrt(3)],
# minimum angle [30, 60] deg, quad aspect and radius ratio [1, 1.3], scaled
# Jacobian [0.3, 1], minimum angle [45, 90] deg, hex scaled Jacobian [0.5, 1],
# hex skew [0, 0.5].  (pyvista lists quad skew [0, 0.7]; the manual's source
# says [0, 0.5], used here.)
# From memory, not checked against a source: tet edge ratio [1, 3], triangle
# and quad edge ratio [1, 1.3].
# The manual gives no acceptable range for the hex edge ratio, for wedges and
# pyramids (its wedge/pyramid metrics came later; Verdict's own source says
# "Acceptable range: --" for the wedge edge ratio) nor for a maximum dihedral
# angle; the values below marked "common practice, no source" are rules of thumb.
_DEFAULT_LIMITS = {
    "tet": {
        "edge_ratio": (1.0, 3.0),              # memory
        "aspect_ratio": (1.0, 3.0),
        "radius_ratio": (1.0, 3.0),
        "scaled_jacobian": (0.5, 1.0),
        "min_dihedral": (40.0, _TET_MAX_ANGLE),
        "max_dihedral": (0.0, 160.0),          # common practice, no source
    },
    "hex": {
        "edge_ratio": (1.0, _INF),             # manual: none
        "scaled_jacobian": (0.5, 1.0),
        "skew": (0.0, 0.5),
    },
    "wedge": {
        "edge_ratio": (1.0, _INF),             # manual: none
        "scaled_jacobian": (0.3, _INF),        # common practice, no source
    },
    "pyramid": {
        "edge_ratio": (1.0, _INF),             # manual: none
        "scaled_jacobian": (0.3, 1.0),         # common practice, no source
    },
    "tri": {
        "edge_ratio": (1.0, 1.3),              # memory
        "aspect_ratio": (1.0, 1.3),
        "radius_ratio": (1.0, 3.0),
        "scaled_jacobian": (0.5, 2.0 / _SQRT3),
        "min_angle": (30.0, 60.0),
    },
    "quad": {
        "edge_ratio": (1.0, 1.3),              # memory
        "aspect_ratio": (1.0, 1.3),
        "radius_ratio": (1.0, 1.3),
        "scaled_jacobian": (0.3, 1.0),
        "skew": (0.0, 0.5),
        "min_angle": (45.0, 90.0),
    },
}


def _freeze_family(name: str, ranges) -> Mapping[str, tuple[float, float]]:
    if not isinstance(ranges, Mapping):
        raise SettingsError(f"limits for {name!r} must map metric names to (low, high)")
    out = {}
    for metric, rng in ranges.items():
        if metric not in METRICS:
            raise SettingsError(f"unknown quality metric {metric!r} for {name!r}; known: {', '.join(METRICS)}")
        try:
            lo, hi = (float(-_INF if rng[0] is None else rng[0]),
                      float(_INF if rng[1] is None else rng[1]))
        except (TypeError, ValueError, IndexError):
            raise SettingsError(f"limit {name}.{metric} must be a (low, high) pair, not {rng!r}") from None
        if math.isnan(lo) or math.isnan(hi) or lo > hi:
            raise SettingsError(f"limit {name}.{metric} = ({lo}, {hi}) is not a range")
        out[metric] = (lo, hi)
    return MappingProxyType(out)


@dataclass(frozen=True)
class QualityLimits:
    """Acceptable range ``(low, high)`` (inclusive) per metric per cell family.

    One field per family (tet, hex, wedge, pyramid, tri, quad), each a mapping
    metric -> (low, high); a metric absent from a family is not checked.
    ``None`` in a pair means unbounded on that side.  Defaults: the Verdict
    manual's acceptable ranges (see the comment above ``_DEFAULT_LIMITS`` for
    which values were checked and which are rules of thumb).  Change with
    ``dataclasses.replace(limits, tet={...})`` (replaces a whole family) or
    :meth:`with_overrides` (merges single metrics).
    """

    tet: Mapping[str, tuple[float, float]] = field(default_factory=lambda: _DEFAULT_LIMITS["tet"])
    hex: Mapping[str, tuple[float, float]] = field(default_factory=lambda: _DEFAULT_LIMITS["hex"])
    wedge: Mapping[str, tuple[float, float]] = field(default_factory=lambda: _DEFAULT_LIMITS["wedge"])
    pyramid: Mapping[str, tuple[float, float]] = field(default_factory=lambda: _DEFAULT_LIMITS["pyramid"])
    tri: Mapping[str, tuple[float, float]] = field(default_factory=lambda: _DEFAULT_LIMITS["tri"])
    quad: Mapping[str, tuple[float, float]] = field(default_factory=lambda: _DEFAULT_LIMITS["quad"])

    def __post_init__(self):
        for fam in FAMILIES:
            object.__setattr__(self, fam, _freeze_family(fam, getattr(self, fam)))

    def bounds(self, family: str, metric: str) -> tuple[float, float]:
        """(low, high) for a family (or a meshio cell type); (-inf, inf) if unchecked."""
        fam = family if family in FAMILIES else family_of(family)
        return getattr(self, fam).get(metric, (-_INF, _INF))

    def describe(self, metric: str) -> dict[str, list]:
        """{family: [low, high]} for the families that check ``metric``, JSON-ready
        (an unbounded side is None)."""
        out = {}
        for fam in FAMILIES:
            rng = getattr(self, fam).get(metric)
            if rng is not None:
                out[fam] = [None if math.isinf(x) else x for x in rng]
        return out

    def with_overrides(self, overrides: Mapping[str, Mapping[str, tuple]]) -> "QualityLimits":
        """A copy with ``{family: {metric: (low, high) or None}}`` merged in.

        ``None`` as the whole value removes the check for that metric.
        Raises :class:`~meshcheck.errors.SettingsError` on unknown names or
        bad ranges.
        """
        new = {}
        for fam, ranges in overrides.items():
            if fam not in FAMILIES:
                raise SettingsError(f"unknown cell family {fam!r}; known: {', '.join(FAMILIES)}")
            if not isinstance(ranges, Mapping):
                raise SettingsError(f"overrides for {fam!r} must map metric names to (low, high)")
            merged = dict(new.get(fam, getattr(self, fam)))
            for metric, rng in ranges.items():
                if rng is None:
                    merged.pop(metric, None)
                else:
                    merged[metric] = rng
            new[fam] = merged
        return QualityLimits(**{f: new.get(f, getattr(self, f)) for f in FAMILIES})


#: cells :meth:`CellFlags.counts` counts at a time
COUNT_PIECE = 1 << 16


class CellFlags(Mapping):
    """{metric: (n_cells,) bool} of the cells outside their acceptable range, stored as
    one bit per metric in a single (n_cells,) unsigned array (an eighth of the memory
    of one bool array per metric); ``flags[name]`` unpacks one metric's array."""

    def __init__(self, names: tuple[str, ...], bits: np.ndarray):
        if len(names) > 8 * bits.dtype.itemsize:
            raise ValueError(f"{len(names)} metrics do not fit in {bits.dtype} bits")
        self.names, self.bits = tuple(names), bits

    @classmethod
    def empty(cls, names: tuple[str, ...], n_cells: int) -> "CellFlags":
        kind = next(t for t in (np.uint8, np.uint16, np.uint32, np.uint64)
                    if 8 * np.dtype(t).itemsize >= len(names))
        return cls(names, np.zeros(n_cells, kind))

    def _bit(self, name: str):
        try:
            return self.bits.dtype.type(1 << self.names.index(name))
        except ValueError:
            raise KeyError(name) from None

    def set(self, name: str, lo: int, mask: np.ndarray) -> None:
        """Flag the cells ``lo + i`` where ``mask[i]`` (filling while the audit runs)."""
        part = self.bits[lo:lo + len(mask)]
        np.bitwise_or(part, self._bit(name), out=part, where=mask)

    def __getitem__(self, name: str) -> np.ndarray:
        return (self.bits & self._bit(name)) != 0

    def count(self, name: str) -> int:
        """Number of flagged cells of one metric."""
        return self.counts((name,))[name]

    def counts(self, names=None) -> dict[str, int]:
        """{metric: number of flagged cells} of ``names`` (default: all), counted a piece
        of the cells at a time (no (n_cells,) temporary)."""
        names = self.names if names is None else tuple(names)
        bits = [self._bit(k) for k in names]
        out = dict.fromkeys(names, 0)
        for lo in range(0, len(self.bits), COUNT_PIECE):
            part = self.bits[lo:lo + COUNT_PIECE]
            for k, b in zip(names, bits):
                out[k] += int(np.count_nonzero(part & b))
        return out

    def __iter__(self):
        return iter(self.names)

    def __contains__(self, name) -> bool:  # (Mapping's would unpack the bits)
        return name in self.names

    def __len__(self) -> int:
        return len(self.names)

    def __repr__(self) -> str:
        return f"CellFlags({', '.join(f'{k}: {self.count(k)}' for k in self.names)})"


def _widened(bounds: tuple[float, float]) -> tuple[float, float]:
    """A metric's (low, high) range widened by the tolerance of :func:`out_of_range`."""
    lo, hi = bounds
    return lo - _BOUND_TOL * abs(lo), hi + _BOUND_TOL * abs(hi)


def _flag_rows(flags: CellFlags, rows, names, fam: str, limits: QualityLimits, lo_off: int):
    """Flag the cells lo_off + i whose metric ``rows[k][i]`` (name ``names[k]``) lies
    outside the family's range (see :func:`out_of_range`)."""
    for k, name in enumerate(names):
        lo, hi = limits.bounds(fam, name)
        if lo == -_INF and hi == _INF:
            continue
        lo, hi = _widened((lo, hi))
        v = rows[k]
        flags.set(name, int(lo_off), (v < lo) | (v > hi))


def out_of_range(quality: CellQuality, mesh: Mesh, limits: QualityLimits) -> CellFlags:
    """Cells whose metric lies outside the acceptable range of their family.

    Returns {metric: (n_cells,) bool} for every metric of ``quality`` (a
    :class:`CellFlags`, one bit per metric); undefined (NaN) values are never
    flagged, infinite ones (degenerate cells) always are when the range is bounded
    on that side.  A value within 1e-9 (relative) of a bound counts as inside, so
    that rounding does not flag ideal cells (a regular tet's radius ratio evaluates
    to 1 - 1e-16).
    """
    if quality.n_cells != mesh.n_cells:
        raise ValueError(f"quality has {quality.n_cells} cells, mesh has {mesh.n_cells}")
    out = CellFlags.empty(quality.names, mesh.n_cells)
    offsets = mesh.block_offsets
    for blk, lo_off, hi_off in zip(mesh.blocks, offsets[:-1], offsets[1:]):
        _flag_rows(out, [quality[k][lo_off:hi_off] for k in quality.names], quality.names,
                   family_of(blk.type), limits, int(lo_off))
    return out


def metric_stats(values: np.ndarray, bad: str, n_worst: int) -> dict | None:
    """Cells, min, 5th percentile, median, 95th percentile and max of the finite values
    of one quality metric ((n_cells,) float64), and the ids of the ``n_worst`` worst cells
    (``bad`` "low" or "high"); None when no value is finite.  One partition gives the
    three quantiles (the same values as ``np.percentile`` and ``np.median``).  Large
    meshes take the radix selection of :func:`meshcheck.kernels.stats.metric_summary`
    (the same dict, no copy of the values; tested against this code)."""
    if kernels.use_compiled(len(values)) and values.dtype == np.float64 and values.ndim == 1:
        from .kernels.stats import metric_summary
        return metric_summary(values, bad, n_worst)
    ok = np.isfinite(values)
    n_ok = int(np.count_nonzero(ok))
    if not n_ok:
        return None
    every = n_ok == len(values)
    v = values.copy() if every else values[ok]
    pos = _smallest(v, n_worst) if bad == "low" else _largest(v, n_worst)
    worst = pos if every else np.flatnonzero(ok)[pos]
    lo, hi = float(v.min()), float(v.max())
    # np.percentile partitions v in place at the neighbours of the three quantiles, among
    # them np.median's middle elements (n // 2 - 1 and n // 2, or n // 2)
    p05, _, p95 = np.percentile(v, [5, 50, 95], overwrite_input=True)
    mid = n_ok // 2
    median = np.mean(v[mid - 1:mid + 1] if n_ok % 2 == 0 else v[mid:mid + 1])
    return {"cells": n_ok, "min": lo, "p05": float(p05), "median": float(median),
            "p95": float(p95), "max": hi, "worst": worst}


def _smallest(v: np.ndarray, k: int) -> np.ndarray:
    """Indices of the k smallest values of v, ascending, ties by index (a partition, then
    a sort of the few candidates, instead of a sort of the whole array)."""
    if len(v) <= k:
        return np.lexsort((np.arange(len(v)), v))
    cut = np.partition(v, k - 1)[k - 1]
    cand = np.flatnonzero(v <= cut)
    return cand[np.lexsort((cand, v[cand]))][:k]


def _largest(v: np.ndarray, k: int) -> np.ndarray:
    """``_smallest(-v, k)`` without the negated copy: indices of the k largest values of
    v, descending, ties by index."""
    if len(v) <= k:
        return np.lexsort((np.arange(len(v)), -v))
    cut = np.partition(v, len(v) - k)[len(v) - k]
    cand = np.flatnonzero(v >= cut)
    return cand[np.lexsort((cand, -v[cand]))][:k]

def summarise(quality: CellQuality, n_worst: int = 10,
              parallel: bool = True) -> dict[str, dict | None]:
    """Metric name -> :func:`metric_stats` of its values (None when none is finite), with
    ``worst_values`` (the values of the ``worst`` cells, float); the metrics on the cores
    when ``parallel`` (partitions and reductions release the GIL)."""
    from .threads import thread_map

    names = list(quality.metrics)

    def one(name):
        values = quality.metrics[name]
        st = metric_stats(values, METRIC_BAD.get(name, "high"), n_worst)
        if st is not None:
            st["worst_values"] = [float(values[i]) for i in st["worst"]]
        return st

    return dict(zip(names, thread_map(one, names, parallel=parallel)))


#: cells whose float64 metrics :func:`checked_quality` holds at a time (4 MiB)
CHECK_CHUNK = 1 << 16

#: the cell types whose minimum scaled Jacobian :func:`checked_quality` writes into its
#: ``min_sj`` (for :func:`meshcheck.validity.min_scaled_jacobian`'s ``known``)
MIN_SJ_TYPES = ("tetra",)


def checked_quality(mesh: Mesh, limits: QualityLimits, n_worst: int = 10,
                    chunk: int = CHECK_CHUNK, min_sj: np.ndarray | None = None):
    """The audit's cell checks: (metrics kept in float32, :class:`CellFlags` of the cells
    out of range, :func:`summarise` statistics), the flags and statistics those of the
    float64 metrics.

    min_sj : optional (n_cells,) float64 array; the cells of the blocks of
        :data:`MIN_SJ_TYPES` get their :func:`meshcheck.validity.min_scaled_jacobian`
        there (the same values; the compiled path computes them from the corners it
        gathers for the metrics: a second pass over the cells' coordinates saved,
        0.08 s at 4.77M tetrahedra), the other cells are left as they are.

    The numpy path computes the float64 metrics whole, flags and summarises them, then
    narrows them.  The compiled path never holds them: it computes them ``chunk`` cells at
    a time, flags the chunk and keeps its float32 values (218 -> 109 MiB for the six
    metrics of 4.8M tetrahedra, and no float64 set beside the topology), then takes the
    statistics from the float32 values exactly (:func:`meshcheck.kernels.stats.
    summary_of_rounded`: the few cells tied at the needed ranks recomputed in float64).
    Where too many cells tie (e.g. identical cells), the float64 values of the metrics
    left are computed in one more pass instead."""
    if not kernels.use_compiled(mesh.n_cells):
        if min_sj is not None:
            from .jacobian import scaled_jacobian_min

            for blk, lo in zip(mesh.blocks, mesh.block_offsets):
                if blk.type in MIN_SJ_TYPES:
                    min_sj[lo:lo + len(blk)] = scaled_jacobian_min(mesh.points, blk.cells,
                                                                   blk.type, "corners")
        q = mesh_quality(mesh)
        flags = out_of_range(q, mesh, limits)
        summary = summarise(q, n_worst, parallel=False)
        return q.narrowed(np.float32), flags, summary
    n = mesh.n_cells
    used = set().union(*(defined_metrics(family_of(b.type)) for b in mesh.blocks))
    names = [k for k in METRICS if k in used]
    pos = [METRICS.index(k) for k in names]
    kept = np.empty((len(names), n), np.float32)
    flags = CellFlags.empty(METRICS, n)
    from .kernels.cells import flag_and_keep

    keep_row = np.full(len(METRICS), -1, np.int64)
    keep_row[pos] = np.arange(len(pos))
    bit = np.array([flags._bit(k) for k in METRICS], flags.bits.dtype)
    ranges: dict = {}  # family -> (low, high) of every metric, widened
    for fam, lo, hi, rows in _chunk_metrics(mesh, chunk, min_sj):
        if fam not in ranges:
            ranges[fam] = tuple(np.array(b, float) for b in zip(*(
                _widened(limits.bounds(fam, k)) for k in METRICS)))
        # flagged and kept in float32 in one compiled pass (as _flag_rows and a cast)
        flag_and_keep(rows, *ranges[fam], bit, keep_row, kept, flags.bits, lo)
    kept.setflags(write=False)
    nan = np.broadcast_to(np.float32(np.nan), (n,))
    row = dict(zip(names, kept))
    q = CellQuality({k: row[k] if k in row else nan for k in METRICS})
    return q, flags, _summary_of_kept(mesh, q, names, n_worst, chunk)


def _chunk_metrics(mesh: Mesh, chunk: int, min_sj: np.ndarray | None = None):
    """(family, lo, hi, rows) for the cells lo..hi-1 of each block, ``chunk`` at a time:
    rows (len(METRICS), hi - lo) float64 their metrics by the compiled kernels (NaN where
    undefined), valid until the next chunk; ``min_sj`` (n_cells,) given: the minimum
    scaled Jacobians of the blocks of :data:`MIN_SJ_TYPES` written there.

    One buffer serves every chunk (a new 4 MiB array per chunk was mapped afresh by
    glibc and faulted in page by page, 73 times at 4.77M tets, while the mmap threshold,
    threads.MMAP_THRESHOLD, was 4 MiB)."""
    buf = np.empty(len(METRICS) * min(chunk, max(mesh.n_cells, 1)))
    for blk, off in zip(mesh.blocks, mesh.block_offsets[:-1]):
        fam = family_of(blk.type)
        for s in range(0, len(blk), chunk):
            e = min(s + chunk, len(blk))
            rows = buf[:len(METRICS) * (e - s)].reshape(len(METRICS), e - s)  # C order
            rows.fill(np.nan)
            if min_sj is not None and blk.type in MIN_SJ_TYPES:
                _tet_quality_sj(mesh.points, blk.cells[s:e], rows, min_sj[off + s:off + e])
            else:
                _compiled_quality(mesh.points, blk.cells[s:e], blk.type, rows, 0)
            yield fam, int(off + s), int(off + e), rows


def _tet_quality_sj(points: np.ndarray, cells: np.ndarray, out: np.ndarray,
                    sj: np.ndarray) -> None:
    """:func:`_compiled_quality` of linear tetrahedra into out (columns 0..) and their
    minimum scaled Jacobians into sj (m,) float64 (one pass over the corners)."""
    from .jacobian import _gradient_table
    from .kernels import cells as _kc

    _kc.tet_quality_sj(np.ascontiguousarray(points, dtype=np.float64),
                       np.ascontiguousarray(cells), out, 0,
                       _gradient_table("tetra", "corners"), sj)


def _metrics_of(mesh: Mesh, ids: np.ndarray) -> np.ndarray:
    """(len(METRICS), m) float64 metrics of the cells ``ids`` (global ids, any order;
    NaN where undefined), by the compiled kernels."""
    ids = np.asarray(ids, np.int64)
    order = np.argsort(ids, kind="stable")
    ids = ids[order]
    out = np.full((len(METRICS), len(ids)), np.nan)
    offs = mesh.block_offsets
    for blk, lo, hi in zip(mesh.blocks, offs[:-1], offs[1:]):
        a, b = np.searchsorted(ids, [lo, hi])
        if a == b:
            continue
        part = np.full((len(METRICS), b - a), np.nan)
        _compiled_quality(mesh.points, blk.cells[ids[a:b] - lo], blk.type, part, 0)
        out[:, order[a:b]] = part
    return out


def _summary_of_kept(mesh: Mesh, q: CellQuality, names: list[str], n_worst: int,
                     chunk: int) -> dict:
    """:func:`summarise` of the float64 metrics, from their float32 values ``q``."""
    from .kernels.stats import TooManyTies, summary_of_rounded

    out: dict = {k: None for k in METRICS}  # metrics no cell defines: no finite value
    for j, name in enumerate(names):
        k = METRICS.index(name)
        w = q[name]  # float32, read in place (widened value by value)
        big = np.flatnonzero(np.isinf(w))  # beyond float32's range: their exact values
        if len(big):
            xb = _metrics_of(mesh, big)[k]
            if not np.isinf(xb).all():  # finite float64 values: widen and insert them
                w = w.astype(np.float64)
                w[big] = xb
        exact = lambda ids, k=k: _metrics_of(mesh, ids)[k]  # noqa: E731
        try:
            st = summary_of_rounded(w, exact, METRIC_BAD.get(name, "high"), n_worst)
        except TooManyTies:  # the metrics left in float64, one more pass over the cells
            del w
            out.update(_summarise_whole(mesh, names[j:], n_worst, chunk))
            return out
        if st is not None:
            st["worst_values"] = [float(v) for v in exact(st["worst"])]
        out[name] = st
    return out


def _summarise_whole(mesh: Mesh, names: list[str], n_worst: int, chunk: int) -> dict:
    """:func:`summarise` of ``names`` from their float64 values over all cells."""
    pos = [METRICS.index(k) for k in names]
    full = np.empty((len(names), mesh.n_cells))
    for _, lo, hi, rows in _chunk_metrics(mesh, chunk):
        full[:, lo:hi] = rows[pos]
    return summarise(CellQuality(dict(zip(names, full))), n_worst, parallel=False)
