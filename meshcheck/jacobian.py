"""Signed Jacobians of the isoparametric map, vectorised over cells.

Every cell maps the VTK reference cell (parametric coordinates ``(r, s, t)``,
the ``ref_coords`` of :mod:`meshcheck.cells`) to physical space with its
Lagrange shape functions ``N_i``::

    x(r, s, t) = sum_i N_i(r, s, t) x_i,      J = dx / d(r, s, t)

and ``det J`` must stay positive over the whole cell for the finite-element
map to be valid.  The reference cells (VTK conventions, checked against
``vtkCell.GetParametricCoords`` / ``InterpolateFunctions`` /
``InterpolateDerivs`` in the tests)::

    tetra     (0,0,0) (1,0,0) (0,1,0) (0,0,1)          barycentric L = (1-r-s-t, r, s, t)
    hexahedron  [0,1]^3, bottom 0-1-2-3 (t=0), top 4-5-6-7 (t=1)
    wedge     triangle (r,s) x segment t in [0,1]
    pyramid   [0,1]^3 collapsed at t=1 onto the apex (VTK's map:
              N_base = bilinear(r,s) * (1-t), N_apex = t)
    triangle, quad: the r-s faces of the above (2D, z = 0)

Quadratic shape functions: tetra10/triangle6 ``L_i(2L_i-1)`` and ``4 L_a L_b``;
hexahedron27/quad9 tensor products of the 1D quadratic Lagrange basis on
{0, 1/2, 1}; hexahedron20/quad8 and wedge15 the serendipity functions (e.g.
Zienkiewicz, Taylor & Zhu, "The Finite Element Method: Its Basis and
Fundamentals", 6th ed., 2005, sec. 6.5 and 6.8).

Units: ``det J`` is in m^3 (3D) or m^2 (2D, taken in the xy plane) per unit
reference measure; the scaled Jacobian is dimensionless.

The pyramid apex.  With VTK's collapsed-hex map ``J = [(1-t) A(s), (1-t) B(r),
C(r, s)]``, so ``det J = (1-t)^2 D(r, s)``: it vanishes at the apex for every
pyramid and its sign (and the scaled Jacobian, which is invariant to the
column factors) does not depend on t.  The apex is therefore never sampled:
the four base corners already carry the limits of ``det J / (1-t)^2`` at the
apex in the directions of the four base edges, and the quadrature points sample
the interior.
"""
from __future__ import annotations

import math
import weakref
from functools import lru_cache

import numpy as np

from . import kernels
from .cells import CELL_TYPES

__all__ = [
    "shape_functions",
    "shape_gradients",
    "sample_points",
    "quadrature_rule",
    "jacobian_matrices",
    "jacobian_determinants",
    "scaled_jacobian_min",
    "quadratic_summary",
]

SAMPLE_KINDS = ("corners", "nodes", "quadrature")


# ---------------------------------------------------------------- helpers
def _info(cell_type: str):
    try:
        return CELL_TYPES[cell_type]
    except KeyError:
        raise ValueError(f"unsupported cell type {cell_type!r}; known: {sorted(CELL_TYPES)}") from None


def _as_ref(ref_points) -> np.ndarray:
    p = np.atleast_2d(np.asarray(ref_points, dtype=np.float64))
    if p.shape[1] == 2:
        p = np.column_stack([p, np.zeros(len(p))])
    if p.ndim != 2 or p.shape[1] != 3:
        raise ValueError("reference points must have shape (q, 3)")
    return p


def _barycentric(p: np.ndarray, dim: int):
    """Barycentric coordinates (q, dim+1) and their constant gradients (dim+1, 3)."""
    if dim == 3:
        lam = np.column_stack([1.0 - p[:, 0] - p[:, 1] - p[:, 2], p[:, 0], p[:, 1], p[:, 2]])
        dlam = np.array([[-1.0, -1, -1], [1, 0, 0], [0, 1, 0], [0, 0, 1]])
    else:
        lam = np.column_stack([1.0 - p[:, 0] - p[:, 1], p[:, 0], p[:, 1]])
        dlam = np.array([[-1.0, -1, 0], [1, 0, 0], [0, 1, 0]])
    return lam, dlam


def _simplex(info, p):
    """Linear or quadratic simplex (tetra, tetra10, triangle, triangle6)."""
    lam, dlam = _barycentric(p, info.dim)
    q, nc = len(p), info.n_corners
    N = np.zeros((q, info.n_nodes))
    dN = np.zeros((q, info.n_nodes, 3))
    if not info.quadratic:
        N[:] = lam
        dN[:] = dlam[None]
        return N, dN
    N[:, :nc] = lam * (2.0 * lam - 1.0)
    dN[:, :nc] = (4.0 * lam - 1.0)[:, :, None] * dlam[None]
    for a, b, m in info.edges:
        N[:, m] = 4.0 * lam[:, a] * lam[:, b]
        dN[:, m] = 4.0 * (lam[:, b, None] * dlam[a] + lam[:, a, None] * dlam[b])
    return N, dN


def _lagrange_1d(x: np.ndarray, node: float, quadratic: bool):
    """1D Lagrange basis on {0, 1} or {0, 1/2, 1} for the node at ``node``."""
    if not quadratic:
        return (x, np.ones_like(x)) if node == 1.0 else (1.0 - x, -np.ones_like(x))
    if node == 0.0:
        return 2.0 * (x - 0.5) * (x - 1.0), 4.0 * x - 3.0
    if node == 0.5:
        return -4.0 * x * (x - 1.0), -8.0 * x + 4.0
    return 2.0 * x * (x - 0.5), 4.0 * x - 1.0


def _tensor(info, p):
    """Tensor-product Lagrange cells: quad, quad9, hexahedron, hexahedron27."""
    dim = info.dim
    quadratic = info.quadratic
    q = len(p)
    N = np.ones((q, info.n_nodes))
    dN = np.zeros((q, info.n_nodes, 3))
    for i, node in enumerate(info.ref_coords):
        vals = [_lagrange_1d(p[:, d], float(node[d]), quadratic) for d in range(dim)]
        for d in range(dim):
            N[:, i] *= vals[d][0]
            g = vals[d][1].copy()
            for e in range(dim):
                if e != d:
                    g = g * vals[e][0]
            dN[:, i, d] = g
    return N, dN


def _serendipity(info, p):
    """Serendipity quad8 and hexahedron20, written in xi = 2r - 1 on [-1, 1]."""
    dim = info.dim
    xi = 2.0 * p[:, :dim] - 1.0                                  # (q, dim)
    nodes = 2.0 * info.ref_coords[:, :dim] - 1.0                 # (n, dim)
    q = len(p)
    N = np.zeros((q, info.n_nodes))
    dN = np.zeros((q, info.n_nodes, 3))
    for i, xn in enumerate(nodes):
        if i < info.n_corners:
            f = 1.0 + xi * xn                                    # (q, dim)
            lin = np.prod(f, axis=1)
            s = (xi * xn).sum(axis=1) - (dim - 1.0)
            c = 0.5 ** dim
            N[:, i] = c * lin * s
            for d in range(dim):
                rest = np.prod(np.delete(f, d, axis=1), axis=1)
                dN[:, i, d] = c * (xn[d] * rest * s + lin * xn[d])
        else:
            zero = int(np.flatnonzero(xn == 0.0)[0])             # direction of the edge
            c = 0.5 ** (dim - 1)
            bub = 1.0 - xi[:, zero] ** 2
            f = 1.0 + xi * xn
            f[:, zero] = bub
            N[:, i] = c * np.prod(f, axis=1)
            for d in range(dim):
                rest = np.prod(np.delete(f, d, axis=1), axis=1)
                df = -2.0 * xi[:, zero] if d == zero else xn[d]
                dN[:, i, d] = c * df * rest
    dN *= 2.0                                                    # d/dr = 2 d/dxi
    return N, dN


def _wedge(info, p):
    """Wedge (triangle x segment) and serendipity wedge15 (zeta = 2t - 1)."""
    lam, dlam = _barycentric(p, 2)
    t = p[:, 2]
    q = len(p)
    N = np.zeros((q, info.n_nodes))
    dN = np.zeros((q, info.n_nodes, 3))
    ez = np.array([0.0, 0.0, 1.0])
    if not info.quadratic:
        for i in range(3):
            N[:, i], N[:, i + 3] = lam[:, i] * (1.0 - t), lam[:, i] * t
            dN[:, i] = (1.0 - t)[:, None] * dlam[i] - lam[:, i, None] * ez
            dN[:, i + 3] = t[:, None] * dlam[i] + lam[:, i, None] * ez
        return N, dN
    z = 2.0 * t - 1.0
    bub = 1.0 - z * z
    dbub = -4.0 * z                                              # d(1-z^2)/dt
    for i in range(3):
        li = lam[:, i]
        quad = li * (2.0 * li - 1.0)
        dquad = (4.0 * li - 1.0)[:, None] * dlam[i]
        for k, side in ((i, -1.0), (i + 3, 1.0)):
            h = 1.0 + side * z                                   # 1 -/+ zeta
            N[:, k] = 0.5 * quad * h - 0.5 * li * bub
            dN[:, k] = (0.5 * h[:, None] * dquad - 0.5 * bub[:, None] * dlam[i]
                        + (0.5 * quad * 2.0 * side - 0.5 * li * dbub)[:, None] * ez)
    for a, b, m in info.edges:
        if a < 3 and b >= 3:                                     # vertical edge
            la = lam[:, a]
            N[:, m] = la * bub
            dN[:, m] = bub[:, None] * dlam[a] + (la * dbub)[:, None] * ez
            continue
        top = a >= 3
        ia, ib = a % 3, b % 3
        h = 1.0 + (z if top else -z)
        prod = lam[:, ia] * lam[:, ib]
        N[:, m] = 2.0 * prod * h
        dprod = lam[:, ib, None] * dlam[ia] + lam[:, ia, None] * dlam[ib]
        dN[:, m] = 2.0 * h[:, None] * dprod + (2.0 * prod * (2.0 if top else -2.0))[:, None] * ez
    return N, dN


def _pyramid(info, p):
    """VTK's linear pyramid: bilinear base times (1 - t), apex t."""
    r, s, t = p[:, 0], p[:, 1], p[:, 2]
    q = len(p)
    N = np.zeros((q, 5))
    dN = np.zeros((q, 5, 3))
    fr = [(1.0 - r, -1.0), (r, 1.0)]
    fs = [(1.0 - s, -1.0), (s, 1.0)]
    for i, node in enumerate(info.ref_coords[:4]):
        (ar, dar), (as_, das) = fr[int(node[0])], fs[int(node[1])]
        N[:, i] = ar * as_ * (1.0 - t)
        dN[:, i, 0] = dar * as_ * (1.0 - t)
        dN[:, i, 1] = ar * das * (1.0 - t)
        dN[:, i, 2] = -ar * as_
    N[:, 4] = t
    dN[:, 4, 2] = 1.0
    return N, dN


_FAMILY = {
    "tetra": _simplex, "tetra10": _simplex, "triangle": _simplex, "triangle6": _simplex,
    "hexahedron": _tensor, "hexahedron27": _tensor, "quad": _tensor, "quad9": _tensor,
    "hexahedron20": _serendipity, "quad8": _serendipity,
    "wedge": _wedge, "wedge15": _wedge,
    "pyramid": _pyramid,
}


def _evaluate(cell_type: str, ref_points) -> tuple[np.ndarray, np.ndarray]:
    info = _info(cell_type)
    p = _as_ref(ref_points)
    return _FAMILY[cell_type](info, p)


# ------------------------------------------------------------- public API
def shape_functions(cell_type: str, ref_points: np.ndarray) -> np.ndarray:
    """Lagrange shape functions at reference points.

    cell_type : a key of ``cells.CELL_TYPES``.
    ref_points : (q, 3) float VTK parametric coordinates (a (q, 2) array is
        accepted for 2D types).
    Returns (q, n_nodes) float64 values ``N_i(p_q)``, node order of ``cells``.
    """
    return _evaluate(cell_type, ref_points)[0]


def shape_gradients(cell_type: str, ref_points: np.ndarray) -> np.ndarray:
    """Derivatives of the shape functions w.r.t. the VTK parametric coordinates.

    Returns (q, n_nodes, 3) float64 ``dN_i/d(r, s, t)`` at each point; for 2D
    types the third component is 0.
    """
    return _evaluate(cell_type, ref_points)[1]


@lru_cache(maxsize=None)
def _gauss_01(n: int, alpha: float = 0.0):
    """Gauss-Jacobi rule on [0, 1] for the weight (1 - x)^alpha, n points.

    The Golub-Welsch algorithm (Golub & Welsch 1969, "Calculation of Gauss quadrature
    rules", Math. Comp. 23: nodes the eigenvalues of the Jacobi matrix of the monic
    recurrence, weights mu_0 times the squared first components of its eigenvectors)
    for the Jacobi weight (1 - x)^alpha (1 + x)^beta on [-1, 1], beta = 0, in numpy:
    scipy.special's import (0.12 s, holding the GIL) stalled the audit of quadratic
    cells on the quality metrics' thread."""
    a, b = float(alpha), 0.0
    k = np.arange(n, dtype=float)
    s = 2.0 * k + a + b
    diag = np.empty(n)
    diag[0] = (b - a) / (a + b + 2.0)
    diag[1:] = (b * b - a * a) / (s[1:] * (s[1:] + 2.0))
    k1, s1 = k[1:], s[1:]
    off = np.sqrt(4.0 * k1 * (k1 + a) * (k1 + b) * (k1 + a + b)
                  / (s1 * s1 * (s1 + 1.0) * (s1 - 1.0)))
    x, v = np.linalg.eigh(np.diag(diag) + np.diag(off, 1) + np.diag(off, -1))
    mu0 = 2.0 ** (a + b + 1.0) * math.gamma(a + 1.0) * math.gamma(b + 1.0) / math.gamma(a + b + 2.0)
    w = mu0 * v[0] ** 2
    return 0.5 * (x + 1.0), w * 0.5 ** (alpha + 1.0)


@lru_cache(maxsize=None)
def _rule(cell_type: str) -> tuple[np.ndarray, np.ndarray]:
    info = _info(cell_type)
    base = info.linear
    n = 3 if info.quadratic else 2
    g, gw = _gauss_01(n)
    if base in ("hexahedron", "quad", "pyramid"):
        # the pyramid's parametric domain is VTK's collapsed cube: the (1-t)^2
        # factor is part of det J itself, so a plain tensor rule is used.
        dim = 3 if base == "pyramid" else info.dim
        grids = np.meshgrid(*([g] * dim), indexing="ij")
        wgrids = np.meshgrid(*([gw] * dim), indexing="ij")
        pts = np.column_stack([a.ravel() for a in grids])
        w = np.prod(np.column_stack([a.ravel() for a in wgrids]), axis=1)
    elif base == "triangle":
        v, vw = _gauss_01(n, 1.0)                                 # collapsed (Duffy) rule
        U, V = np.meshgrid(g, v, indexing="ij")
        WU, WV = np.meshgrid(gw, vw, indexing="ij")
        pts = np.column_stack([(U * (1 - V)).ravel(), V.ravel()])
        w = (WU * WV).ravel()
    elif base == "tetra":
        v, vw = _gauss_01(n, 1.0)
        z, zw = _gauss_01(n, 2.0)
        U, V, Z = np.meshgrid(g, v, z, indexing="ij")
        WU, WV, WZ = np.meshgrid(gw, vw, zw, indexing="ij")
        pts = np.column_stack([(U * (1 - V) * (1 - Z)).ravel(), (V * (1 - Z)).ravel(), Z.ravel()])
        w = (WU * WV * WZ).ravel()
    elif base == "wedge":
        tri, tw = _rule("triangle6" if info.quadratic else "triangle")
        pts = np.array([[a[0], a[1], c] for a in tri for c in g])
        w = np.array([wa * wc for wa in tw for wc in gw])
    else:
        raise ValueError(f"no quadrature rule for {cell_type!r}")
    pts = _as_ref(pts)
    pts.setflags(write=False)
    w.setflags(write=False)
    return pts, w


def quadrature_rule(cell_type: str) -> tuple[np.ndarray, np.ndarray]:
    """Gauss rule on the VTK reference cell.

    Tensor Gauss-Legendre on quads, hexes and on the pyramid's parametric
    cube; collapsed (conical-product) Gauss-Jacobi rules on triangles and
    tetrahedra (Stroud, "Approximate Calculation of Multiple Integrals",
    1971); triangle x Gauss on wedges.  2 points per direction for linear cells, 3 for quadratic ones,
    so ``det J`` of every quadratic geometry is integrated exactly (degree <= 5
    per direction) and the volume is exact.

    Returns points (q, 3) float64 and weights (q,) float64 summing to the
    measure of the parametric domain (1/6, 1, 1/2, 1, 1/2, 1 for tetra,
    hexahedron, wedge, pyramid (collapsed cube), triangle, quad), so that
    ``sum_q w_q det J(p_q)`` is the cell volume (area in 2D).  Read-only.
    """
    return _rule(cell_type)


def sample_points(cell_type: str, where: str = "corners") -> np.ndarray:
    """Reference points at which Jacobians are evaluated.

    where : ``"corners"`` (the corner nodes; for the pyramid the four base
        corners only, see the module docstring), ``"nodes"`` (every node,
        pyramid apex excluded) or ``"quadrature"`` (:func:`quadrature_rule`).
    Returns (q, 3) float64 VTK parametric coordinates.
    """
    info = _info(cell_type)
    if where == "quadrature":
        return quadrature_rule(cell_type)[0].copy()
    if where == "corners":
        pts = info.ref_coords[: info.n_corners]
    elif where == "nodes":
        pts = info.ref_coords
    else:
        raise ValueError(f"where must be one of {SAMPLE_KINDS}, not {where!r}")
    if info.linear == "pyramid":
        pts = pts[[i for i in range(len(pts)) if i != 4]]
    return np.array(pts, dtype=np.float64)


def _sample(cell_type, where):
    return sample_points(cell_type, where) if isinstance(where, str) else _as_ref(where)


def _gathered(points, cells, d):
    """(n_nodes, d, m) float64 nodal coordinates, component-major (one gather)."""
    pts_t = np.ascontiguousarray(np.asarray(points, dtype=np.float64)[:, :d].T)   # (d, n)
    idx = np.ascontiguousarray(np.asarray(cells).T)                               # (n_nodes, m)
    X = np.empty((idx.shape[0], d, idx.shape[1]))
    for c in range(d):
        X[:, c, :] = pts_t[c][idx]
    return X


def _per_point(points, cells, cell_type, where):
    """Yield the Jacobians ``J[i, j, m] = dx_i/dr_j`` at one sample point after the
    other: (d, d, m), memory m * d * d per step.  Plain einsum (no BLAS threads)."""
    info = _info(cell_type)
    d = info.dim
    X = _gathered(points, cells, d)
    dN = shape_gradients(cell_type, _sample(cell_type, where))[:, :, :d]   # (q, n, d)
    for g in dN:
        yield np.einsum("nim,nj->ijm", X, g)


def jacobian_matrices(points: np.ndarray, cells: np.ndarray, cell_type: str,
                      where="corners") -> np.ndarray:
    """Jacobian matrices ``J[m, q, i, j] = dx_i / dr_j``.

    points : (n, 3) float64 coordinates, metres.  cells : (m, n_nodes) int.
    where : a sample kind (see :func:`sample_points`) or a (q, 3) array of
        parametric points.
    Returns (m, q, d, d) float64 with d = 3 (3D) or 2 (2D types, xy plane).
    Memory is m * q * d * d doubles: chunk large inputs.
    """
    d = _info(cell_type).dim
    Js = [J for J in _per_point(points, cells, cell_type, where)]
    if not Js:
        return np.zeros((len(cells), 0, d, d))
    return np.stack(Js).transpose(3, 0, 1, 2)


def _det(J: np.ndarray) -> np.ndarray:
    """Determinant of (d, d, ...) stacked matrices."""
    if J.shape[0] == 2:
        return J[0, 0] * J[1, 1] - J[0, 1] * J[1, 0]
    return (J[0, 0] * (J[1, 1] * J[2, 2] - J[1, 2] * J[2, 1])
            - J[0, 1] * (J[1, 0] * J[2, 2] - J[1, 2] * J[2, 0])
            + J[0, 2] * (J[1, 0] * J[2, 1] - J[1, 1] * J[2, 0]))


def jacobian_determinants(points: np.ndarray, cells: np.ndarray, cell_type: str,
                          where="corners") -> np.ndarray:
    """Signed ``det J`` at the sample points of every cell.

    Returns (m, q) float64, m^3 (3D) or m^2 (2D) per unit reference measure.
    Positive for a cell ordered like its VTK reference cell; negative where
    the map folds over (inverted).
    """
    cols = [_det(J) for J in _per_point(points, cells, cell_type, where)]
    m = len(cells)
    return np.stack(cols, axis=1) if cols else np.zeros((m, 0))


def scaled_jacobian_min(points: np.ndarray, cells: np.ndarray, cell_type: str,
                        where="corners") -> np.ndarray:
    """Minimum over the sample points of ``det J / prod_j |J[:, j]|``.

    Dimensionless, in [-1, 1]; 1 where the parametric directions are
    orthogonal, negative where the cell is inverted at some sample point.
    A sample point with a zero-length column gives 0 (degenerate).
    Returns (m,) float64.
    """
    if kernels.use_compiled(len(cells)):
        table = (_gradient_table(cell_type, where) if isinstance(where, str)
                 else _unique_rows(shape_gradients(cell_type, _as_ref(where))
                                   [:, :, :_info(cell_type).dim]))
        return compiled_extremes(points, cells, table, None)[0]
    out = np.full(len(cells), np.inf)
    for J in _per_point(points, cells, cell_type, where):
        det = _det(J)
        norms = np.sqrt(np.prod(np.einsum("ijm,ijm->jm", J, J), axis=0))   # product of column norms
        with np.errstate(divide="ignore", invalid="ignore"):
            sj = np.where(norms > 0.0, det / np.where(norms > 0.0, norms, 1.0), 0.0)
        np.minimum(out, sj, out=out)
    return out


# ------------------------------------------------------- compiled kernels
def _unique_rows(G: np.ndarray) -> np.ndarray:
    """(q', n, d) float64 read-only: G without repeated sample points (same Jacobian,
    same minimum; a linear simplex has one), first occurrences in order."""
    if len(G):
        _, first = np.unique(G.reshape(len(G), -1), axis=0, return_index=True)
        G = G[np.sort(first)]
    out = np.ascontiguousarray(G, dtype=np.float64)
    out.setflags(write=False)
    return out


@lru_cache(maxsize=None)
def _gradient_table(cell_type: str, *where: str) -> np.ndarray:
    """(q, n_nodes, d) float64 read-only shape-function gradients at the sample points
    of the kinds ``where`` in order, each kind without repeated points."""
    d = _info(cell_type).dim
    parts = [_unique_rows(shape_gradients(cell_type, sample_points(cell_type, w))[:, :, :d])
             for w in where]
    out = np.ascontiguousarray(np.concatenate(parts))
    out.setflags(write=False)
    return out


_NO_EDGES = np.zeros((0, 3), np.int64)


def compiled_extremes(points: np.ndarray, cells: np.ndarray, table: np.ndarray,
                      ratio_from: int | None, mid_edges: np.ndarray | None = None):
    """Scaled Jacobian minimum, det J ratio and mid-node deviation by the compiled
    kernel, in one pass over the cells.

    table : (q, n_nodes, d) shape-function gradients at the sample points (see
        :func:`_gradient_table`).  ratio_from : first row of ``table`` whose det J
        enters the ratio, or None for no ratio.  mid_edges : (n_edges, 3) int64
        corner a, corner b, mid-node of the cell type's edges, or None.
    Returns sj (m,) float64, the minimum of :func:`scaled_jacobian_min` over all q
    points; ratio (m,) float64 min det J / max det J over the rows from
    ``ratio_from`` (-1 where the maximum is not positive) and dev (m,) float64 the
    largest |x_m - (x_a + x_b)/2| / |x_b - x_a| over the edges, both as
    :func:`meshcheck.curvature.quadratic_geometry`, or None when not asked for.
    """
    from .kernels import cells as _kc

    pts = np.ascontiguousarray(points, dtype=np.float64)
    c = np.ascontiguousarray(cells)  # int32 or int64 node indices, as the mesh keeps them
    m = len(c)
    q, n, j = np.nonzero(table)                       # in (point, node, column) order
    ptr = np.searchsorted(q, np.arange(len(table) + 1)).astype(np.int64)
    sparse = (ptr, n.astype(np.int64), j.astype(np.int64), np.ascontiguousarray(table[q, n, j]))
    edges = _NO_EDGES if mid_edges is None else np.ascontiguousarray(mid_edges, dtype=np.int64)
    sj, dev = np.empty(m), np.empty(m if mid_edges is not None else 0)
    lo, hi = (np.empty(0), np.empty(0)) if ratio_from is None else (np.empty(m), np.empty(m))
    first = len(table) if ratio_from is None else int(ratio_from)
    _kc.jacobian_extremes(pts, c, table, *sparse, first, edges, sj, lo, hi, dev)
    ratio = None
    if ratio_from is not None:
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(hi > 0, lo / np.where(hi > 0, hi, 1.0), -1.0)
    return sj, ratio, (dev if mid_edges is not None else None)


# what the validity pass computed for quadratic_geometry:
# (id(points), id(cells)) -> (weakref to points, weakref to cells, (ratio, dev))
_QUADRATIC_MEMO: dict = {}


def remember_quadratic(points: np.ndarray, cells: np.ndarray, ratio: np.ndarray,
                       dev: np.ndarray) -> None:
    """Keep the det J ratio and mid-node deviation of ``cells`` for
    :func:`quadratic_summary` while ``cells`` lives (read-only points only, i.e. a
    :class:`~meshcheck.mesh.Mesh`'s, which cannot change)."""
    if points.flags.writeable:
        return
    key = (id(points), id(cells))
    try:
        refs = (weakref.ref(points), weakref.ref(cells))
    except TypeError:
        return
    if key not in _QUADRATIC_MEMO:
        weakref.finalize(cells, _QUADRATIC_MEMO.pop, key, None)
    _QUADRATIC_MEMO[key] = refs + ((ratio, dev),)


def quadratic_summary(points: np.ndarray, cells: np.ndarray,
                      cell_type: str) -> tuple[np.ndarray, np.ndarray]:
    """(ratio, dev), each (m,) float64, of :func:`compiled_extremes` over the
    quadrature points and the edges of quadratic cells: the values kept by
    :func:`remember_quadratic` for these very arrays, or computed now."""
    hit = _QUADRATIC_MEMO.get((id(points), id(cells)))
    if hit is not None and hit[0]() is points and hit[1]() is cells:
        return hit[2]
    _, ratio, dev = compiled_extremes(points, cells, _gradient_table(cell_type, "quadrature"), 0,
                                      _info(cell_type).edges)
    return ratio, dev
