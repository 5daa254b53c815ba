"""Uniform mean flow: the wavenumber an edge must carry, edge by edge.

In a uniform mean flow of velocity U (Mach vector m = U/c, |m| < 1) the
convected wave equation (e.g. Rienstra & Hirschberg, "An Introduction to
Acoustics", ch. on moving media; Pierce, "Acoustics") admits plane waves
exp(i(omega t - kappa d.x)) with wave-normal direction d (unit) and

    (omega - U.kappa d)^2 = c^2 kappa^2   =>   kappa(d) = k / (1 + m.d),   k = omega / c.

An edge of direction e (unit) sees the trace of that wave along itself, the
projected wavenumber kappa(d) |d.e|.  The worst case over all directions is

    phi(m, e) = max_{|d|=1} |d.e| / (1 + m.d)
              = (|mu| + sqrt(mu^2 + 1 - M^2)) / (1 - M^2)
              = 1 / (sqrt(1 - M^2 + mu^2) - |mu|),      mu = m.e,  M = |m|.

Derivation (linear-fractional maximisation): lambda = max_d (d.e)/(1 + m.d)
is the value for which max_d [d.e - lambda (1 + m.d)] = 0; the maximum of
d.(e - lambda m) over unit d is |e - lambda m|, so |e - lambda m| = lambda,
i.e. (1 - M^2) lambda^2 + 2 mu lambda - 1 = 0, whose positive root is
(-mu + sqrt(mu^2 + 1 - M^2)) / (1 - M^2) (unique: |e - lambda m| - lambda
decreases in lambda because |m| < 1).  Taking e and -e gives |mu| in front.
The maximising direction is d* = (e - lambda m) / lambda, in the plane of e
and m, so the same factor holds for a 2D model.  Special cases: an edge along
the flow phi = 1/(1 - M) (the upstream wave), an edge across it
phi = 1/sqrt(1 - M^2).

The advisor multiplies the edge wavenumber by phi, i.e. it uses the speed
c/phi on that edge: the usable frequency falls by (1 - M) along the flow and
by sqrt(1 - M^2) across it.  Assumptions: uniform flow over each region,
plane waves, no refraction by shear layers.
"""
from __future__ import annotations

import numpy as np

from .errors import SettingsError
from .topology import Edges

__all__ = ["projection_factor", "worst_direction", "edge_directions", "edge_flow_factor",
           "mach_vectors"]


def _split(mach, direction):
    m = np.asarray(mach, dtype=np.float64)
    e = np.asarray(direction, dtype=np.float64)
    m, e = np.broadcast_arrays(m, e)
    if m.shape[-1] != 3:
        raise ValueError("Mach and direction vectors must have 3 components")
    n = np.linalg.norm(e, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        e = e / n[..., None]
    M2 = np.einsum("...i,...i->...", m, m)
    if np.any(M2 >= 1.0):
        raise SettingsError(f"Mach number {float(np.sqrt(M2.max())):.3g} >= 1: only subsonic "
                            "mean flow is supported")
    mu = np.einsum("...i,...i->...", m, e)
    return m, e, M2, mu


def projection_factor(mach, direction) -> np.ndarray:
    """Worst-case factor on the wavenumber along ``direction`` in a uniform flow.

    mach : (..., 3) float Mach vector U/c (|m| < 1).  direction : (..., 3) float,
    need not be unit (zero vectors give NaN).  Broadcast together.
    Returns (...) float64 phi = max over unit d of |d.e| / (1 + m.d) >= 1
    (dimensionless; 1 without flow).
    """
    _, _, M2, mu = _split(mach, direction)
    a = np.abs(mu)
    return (a + np.sqrt(mu * mu + 1.0 - M2)) / (1.0 - M2)


def worst_direction(mach, direction) -> np.ndarray:
    """Unit wave-normal direction d* that attains :func:`projection_factor`.

    Returns (..., 3) float64; the wave travels against the flow component
    along the edge (the sign of d*.e is that of -m.e, + when m.e = 0).
    """
    m, e, M2, mu = _split(mach, direction)
    s = np.where(mu > 0, -1.0, 1.0)[..., None]
    e = s * e
    mu = s[..., 0] * mu
    lam = (-mu + np.sqrt(mu * mu + 1.0 - M2)) / (1.0 - M2)
    return (e - lam[..., None] * m) / lam[..., None]


def edge_directions(points: np.ndarray, edges: Edges) -> np.ndarray:
    """(n_e, 3) float64 unit chord direction of every edge (NaN for zero length)."""
    d = points[edges.nodes[:, 1]] - points[edges.nodes[:, 0]]
    n = np.linalg.norm(d, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        return d / n[:, None]


def edge_flow_factor(points: np.ndarray, edges: Edges, cell_mach: np.ndarray) -> np.ndarray:
    """Per edge, the largest :func:`projection_factor` over the cells sharing it.

    points : (n, 3) metres.  cell_mach : (n_cells, 3) float Mach vector of every cell.
    Returns (n_e,) float64 >= 1 (1 for edges of cells without flow; NaN-free:
    zero-length edges get the isotropic worst case 1/(1 - |M|)).
    Vectorised over edges; loops only over the distinct Mach vectors (one per
    region in practice).
    """
    cell_mach = np.asarray(cell_mach, dtype=np.float64)
    out = np.ones(len(edges))
    if not len(edges) or not np.any(cell_mach):
        return out
    e = edge_directions(points, edges)
    bad = ~np.isfinite(e).all(axis=1)
    uniq, inv = np.unique(cell_mach, axis=0, return_inverse=True)
    inv = inv.reshape(-1)
    for j, m in enumerate(uniq):
        if not np.any(m):
            continue
        touched = edges.from_cells((inv == j).astype(np.int8), np.maximum) > 0
        phi = np.empty(int(touched.sum()))
        ok = ~bad[touched]
        phi[ok] = projection_factor(m, e[touched][ok])
        phi[~ok] = 1.0 / (1.0 - np.linalg.norm(m))
        out[touched] = np.maximum(out[touched], phi)
    return out


def mach_vectors(velocity: np.ndarray, speed: np.ndarray) -> np.ndarray:
    """(n, 3) Mach vectors U / c from velocities (n, 3) m/s and speeds (n,) m/s."""
    v = np.asarray(velocity, dtype=np.float64)
    c = np.asarray(speed, dtype=np.float64)
    return v / c[:, None]
