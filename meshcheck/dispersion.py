"""1D Helmholtz discrete dispersion and the error model behind the advice.

Everything is a function of the dimensionless wavenumber ``t = k*h`` (k the
wavenumber in rad/m, h the element size in m) and the polynomial order p.

Discrete dispersion
-------------------
On a uniform 1D mesh of elements of order p, assemble the element matrices of
``-u'' - k^2 u`` on the reference element [0, 1] (h = 1),
``D(t) = K - t^2 M``, eliminate the p - 1 interior (bubble) unknowns
(static condensation) to a 2x2 matrix S, and put the Bloch wave
``u_j = exp(i k_h j h)`` through the assembled chain
``S01 u_{j-1} + 2 S00 u_j + S01 u_{j+1} = 0``::

    cos(k_h h) = R(t) = -S00 / S01

(Ihlenburg & Babuska, Comput. Math. Appl. 30 (1995); SIAM J. Numer. Anal. 34
(1997); Ainsworth, SIAM J. Numer. Anal. 42(2) (2004) 553-575).  R does not
depend on the basis.

Reference element and basis (hierarchical, integrated Legendre / Lobatto)::

    xi in [0, 1],   x = 2 xi - 1 in [-1, 1]
    N0 = 1 - xi,  N1 = xi                        (vertex functions)
    phi_n = (P_n(x) - P_{n-2}(x)) / sqrt(2(2n-1)),   n = 2..p   (bubbles)

Since ``phi_n' = sqrt((2n-1)/2) P_{n-1}(x)``, Legendre orthogonality gives the
stiffness matrix exactly: ``K_vv = [[1, -1], [-1, 1]]``, ``K_vb = 0``,
``K_bb = 2 I``.  The consistent mass M is integrated with p + 1 Gauss-Legendre
points (exact for degree 2p).

Evaluation.  The bubble block ``D_bb(t)`` is singular where t^2 equals an
eigenvalue mu_i of the element clamped at both ends; R has a removable
singularity there (R = +-1).  R is evaluated from the modal form of the
condensation, ``S = D_vv - t^4 sum_i (M_vb v_i)(M_vb v_i)^T / (mu_i - t^2)``
(V the M-orthonormal eigenvectors), with S00 and S01 multiplied by
``(mu_j - t^2)`` of the nearest eigenvalue, so it is finite and correct at
and near every resonance: no NaN there.  ``R = +-inf`` only where S01 = 0 (a
genuine pole of R, deep in a stop band); NaN only for NaN input.  1 - R is
formed without cancellation, so k_h h keeps ~1e-16 relative accuracy as
t -> 0.  Next to the band edges at kh > 1 (R -> +-1, where arccos is
ill-conditioned) the equivalent factored form is used: with A = S00 - S01,
B = S00 + S01, ``A / B = det(K_a - t^2 M_a) / det(K_p - t^2 M_p)`` for the
antiperiodic (u1 = -u0) and periodic (u1 = u0) one-element cells, whose
eigenvalues are the band edges; 1 +- R is then a product over those
eigenvalues and keeps its relative accuracy up to the edge.

Physical branch
---------------
``k_h h`` is taken on the branch closest to t: ``2 pi m +- arccos(R)`` in
pass bands; in stop bands (|R| > 1, Thompson & Pinsky, Comput. Mech. 13
(1994)) ``m pi + i acosh|R|`` with m even for R > 1, odd for R < -1, nearest
to t / pi.  The imaginary part (attenuation per element) counts as error.
This nearest branch is the most favourable reading; it differs from the
energy-carrying (extended-zone) branch only just past a multiple of pi
before a stop band opens (p = 1 on (pi, sqrt 12), p = 2 on (pi, sqrt 10),
< 1e-3 wide for p >= 4), and there by at most twice the lag.

Error model
-----------
* Best approximation of ``exp(i k x)`` on one element by degree-p polynomials,
  relative L2: with a = t / 2, the plane-wave (Rayleigh) expansion
  ``exp(i a x) = sum_n (2n+1) i^n j_n(a) P_n(x)`` (Abramowitz & Stegun 10.1.47;
  DLMF 10.60.7) and Legendre orthogonality give
  ``e_best = sqrt(sum_{n>p} (2n+1) j_n(a)^2)``.
* Phase error carried over a propagation distance L: RMS over x in [0, L] of
  ``|1 - exp(i (k_h - k) x)|`` with complex k_h (closed form below).
* ``predicted_error = e_best + e_phase``: the structure
  ``C1 (kh/2p)^p + C2 kL (kh/2p)^(2p)`` of the pollution estimate
  (Ihlenburg & Babuska 1997).  Assumptions: a single plane wave along a row
  of equal elements, no boundary reflections, the error of the two parts
  adds, direction effects in 2D/3D are not included.

Units: t, k_h h and kL are dimensionless (radians); errors are relative.
"""
from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path

import numpy as np
from numpy.polynomial import legendre as _leg

from .errors import MeshcheckError, SettingsError
from .cache import cache_dir

__all__ = [
    "P_MAX",
    "cos_kh",
    "discrete_kh",
    "phase_error",
    "best_approximation_error",
    "phase_rms_error",
    "predicted_error",
    "elements_per_wavelength",
    "element_matrices",
    "stop_bands",
    "UsableKh",
    "usable_kh",
]

P_MAX = 32
"""Highest polynomial order supported."""

_CHUNK = 1 << 15  # t values per block in the batched evaluations
_TAIL_TERMS = 40  # terms of the Legendre tail in best_approximation_error
_TWO_PI = 2.0 * np.pi


# ---------------------------------------------------------------- validation
def _order(p) -> int:
    if isinstance(p, bool) or not isinstance(p, (int, np.integer)):
        raise SettingsError(f"polynomial order must be an integer, got {p!r}")
    p = int(p)
    if not 1 <= p <= P_MAX:
        raise SettingsError(f"polynomial order {p} is outside 1..{P_MAX}")
    return p


def _kh(t) -> np.ndarray:
    t = np.asarray(t, dtype=np.float64)
    if np.any(t < 0) or np.any(np.isinf(t)):
        raise SettingsError("kh must be finite and >= 0")
    return t


# ---------------------------------------------------------- element matrices
@lru_cache(maxsize=None)
def element_matrices(p: int) -> tuple[np.ndarray, np.ndarray]:
    """Stiffness K and consistent mass M of order p on [0, 1] (h = 1).

    Hierarchical basis, dof order [N0, N1, phi_2, ..., phi_p] (see the module
    docstring).  Returns two read-only (p+1, p+1) float64 arrays.
    """
    p = _order(p)
    x, w = _leg.leggauss(p + 1)  # exact for degree 2p + 1 on [-1, 1]
    xi = 0.5 * (x + 1.0)
    phi = np.empty((p + 1, x.size))
    phi[0], phi[1] = 1.0 - xi, xi
    for n in range(2, p + 1):
        c = np.zeros(n + 1)
        c[n], c[n - 2] = 1.0, -1.0
        phi[n] = _leg.legval(x, c) / np.sqrt(2.0 * (2 * n - 1))
    M = (phi * (0.5 * w)) @ phi.T  # d xi = dx / 2
    M = 0.5 * (M + M.T)
    K = np.zeros((p + 1, p + 1))
    K[:2, :2] = [[1.0, -1.0], [-1.0, 1.0]]
    K[2:, 2:] = 2.0 * np.eye(p - 1)
    K.setflags(write=False)
    M.setflags(write=False)
    return K, M


@lru_cache(maxsize=None)
def _cell_spectra(p: int) -> tuple[float, np.ndarray, np.ndarray]:
    """Eigenvalues of the periodic and antiperiodic one-element cells.

    Returns (c, sa, sp): ``c = det M_a / det M_p``; sa (p,) the eigenvalues
    t^2 of the antiperiodic cell (u1 = -u0, where R = -1); sp (p,) those of
    the periodic cell (u1 = u0, where R = +1), sp[0] = 0 exactly (constant
    mode).  All ascending, float64, read-only.
    """
    K, M = element_matrices(p)
    out = []
    for sign in (-1.0, 1.0):  # antiperiodic, periodic: vertex function N0 + sign N1
        P = np.zeros((p + 1, p))
        P[0, 0], P[1, 0] = 1.0, sign
        P[2:, 1:] = np.eye(p - 1)
        Kc, Mc = P.T @ K @ P, P.T @ M @ P
        if sign > 0:  # Kc = diag(0, 2I): drop the exact zero via the mass Schur complement
            Kd = np.diag(Kc)[1:]
            Ms = Mc[1:, 1:] - np.outer(Mc[1:, 0], Mc[0, 1:]) / Mc[0, 0]
        else:  # Kc = diag(4, 2I)
            Kd, Ms = np.diag(Kc), Mc
        # K diagonal: the eigenvalues 1/s of Kd^-1/2 M Kd^-1/2 have small relative
        # error for the low (largest 1/s) edges, those next to multiples of pi
        scale = 1.0 / np.sqrt(Kd)
        inv = np.linalg.eigvalsh(Ms * scale[:, None] * scale[None, :]) if Kd.size else np.zeros(0)
        lam = np.sort(1.0 / inv)
        if sign > 0:
            lam = np.concatenate([[0.0], lam])
        out.append((np.linalg.slogdet(Mc)[1], lam))
    (ld_a, sa), (ld_p, sp) = out
    sa.setflags(write=False)
    sp.setflags(write=False)
    return float(np.exp(ld_a - ld_p)), sa, sp


@lru_cache(maxsize=None)
def _condensed(p: int):
    """Modal data of the static condensation.

    Returns (m00, m01, mu, b0, b1): vertex masses M00, M01; the (p-1,)
    eigenvalues mu of ``K_bb v = mu M_bb v`` (element clamped at both ends);
    the couplings ``b0 = M_0b V``, ``b1 = M_1b V`` with V M-orthonormal.
    """
    K, M = element_matrices(p)
    if p == 1:
        z = np.zeros(0)
        return M[0, 0], M[0, 1], z, z, z
    import scipy.linalg  # imported where used: scipy's submodules add ~0.3 s to start-up

    mu, V = scipy.linalg.eigh(K[2:, 2:], M[2:, 2:])
    return M[0, 0], M[0, 1], mu, M[0, 2:] @ V, M[1, 2:] @ V


def _modal_parts(s: np.ndarray, p: int):
    """(R, 1 - R, 1 + R) at s = t^2 (1D) by modal static condensation.

    ``S = D_vv - s^2 sum_i (M_vb v_i)(M_vb v_i)^T / (mu_i - s)`` (K_vb = 0);
    S00 and S01 are multiplied by (mu_j - s) of the nearest mu_j, which
    removes the pole, and 1 - R = (S00 + S01)/S01 is formed without
    cancellation (K00 + K01 = 0): accurate as t -> 0.
    """
    m00, m01, mu, b0, b1 = _condensed(p)
    if mu.size:
        B = np.stack([b0 * b0, b0 * b1, b0 * (b0 + b1), b0 * (b1 - b0)], axis=1)  # (p-1, 4)
        dist = mu[None, :] - s[:, None]
        rows = np.arange(s.size)
        j = np.argmin(np.abs(dist), axis=1)
        dj = dist[rows, j]
        wts = dj[:, None] / dist
        wts[rows, j] = 1.0
        sums = (wts @ B) * (s * s)[:, None]
    else:
        dj = np.ones_like(s)
        sums = np.zeros((s.size, 4))
    num = dj * (1.0 - s * m00) - sums[:, 0]  # S00 (K00 = 1)
    den = dj * (-1.0 - s * m01) - sums[:, 1]  # S01 (K01 = -1)
    plus = -dj * s * (m00 + m01) - sums[:, 2]  # S00 + S01
    minus = dj * (-2.0 - s * (m01 - m00)) - sums[:, 3]  # S01 - S00
    return -num / den, plus / den, minus / den


def _cell_parts(s: np.ndarray, p: int):
    """(R, 1 - R, 1 + R) at s = t^2 (1D) from the cell spectra.

    With A = S00 - S01 and B = S00 + S01 (antiperiodic and periodic condensed
    stiffness), the Schur-determinant identity gives
    ``A / B = det(K_a - s M_a) / det(K_p - s M_p) = c prod(sa - s) / prod(sp - s)``
    (the bubble determinant cancels) and ``R = -(A + B)/(B - A)``,
    ``1 + R = -2A/(B - A)``, ``1 - R = 2B/(B - A)``: each of 1 +- R keeps full
    relative accuracy next to its band edges.  Factors are scaled by
    1/(sa_k + s) (the same for A and B) against overflow.
    """
    c, sa, sp = _cell_spectra(p)
    w = sa + s[:, None]
    A = c * np.prod((sa - s[:, None]) / w, axis=1)
    B = np.prod((sp - s[:, None]) / w, axis=1)
    den = B - A
    return -(A + B) / den, 2.0 * B / den, -2.0 * A / den


_EDGE_ZONE = 2e-3  # |1 -+ R| below which, for kh > 1, the cell-spectrum form is used


def _parts(t: np.ndarray, p: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(R, 1 - R, 1 + R) for float64 t >= 0 of any shape.

    Modal condensation everywhere (best as t -> 0) except next to the band
    edges at kh > 1 (|1 -+ R| < 2e-3), where the cell-spectrum form is used:
    there arccos is ill-conditioned and only the factored form keeps the
    distance to the edge.  The two agree to ~1e-13 relative.
    """
    flat = t.reshape(-1)
    R = np.empty_like(flat)
    q = np.empty_like(flat)
    g = np.empty_like(flat)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for i in range(0, flat.size, _CHUNK):
            tt = flat[i:i + _CHUNK]
            s = tt * tt
            r, a, b = _modal_parts(s, p)
            near = (tt > 1.0) & ~((a >= _EDGE_ZONE) & (b >= _EDGE_ZONE))
            if np.any(near):
                r[near], a[near], b[near] = _cell_parts(s[near], p)
            R[i:i + _CHUNK], q[i:i + _CHUNK], g[i:i + _CHUNK] = r, a, b
    return R.reshape(t.shape), q.reshape(t.shape), g.reshape(t.shape)


def stop_bands(p: int) -> np.ndarray:
    """Stop bands of order p: (n, 2) float64 intervals of kh where |R| > 1.

    Band edges are the square roots of the periodic and antiperiodic cell
    eigenvalues; an interval between consecutive edges is a stop band when
    |R| > 1 at its middle.  The last band is open: its end is inf.
    """
    p = _order(p)
    return _stop_bands(p)


@lru_cache(maxsize=None)
def _stop_bands(p: int) -> np.ndarray:
    _, sa, sp = _cell_spectra(p)
    edges = np.sqrt(np.sort(np.concatenate([sa, sp])))
    hi = np.append(edges[1:], np.inf)
    mid = np.where(np.isinf(hi), 2.0 * edges + 1.0, 0.5 * (edges + hi))
    with np.errstate(divide="ignore", invalid="ignore"):
        stop = np.abs(_cell_parts(mid * mid, p)[0]) > 1.0
    out = np.column_stack([edges[stop], hi[stop]])
    out.setflags(write=False)
    return out


# ------------------------------------------------------------------- public
def cos_kh(t, p: int) -> np.ndarray:
    """Discrete dispersion relation ``cos(k_h h)`` of order-p elements.

    t : array_like, kh >= 0 (dimensionless).  p : order, 1..P_MAX.
    Returns float64 array of t's shape.  Finite at interior resonances
    (removable singularity, see module docstring); +-inf only at a pole of
    R (S01 = 0), NaN only for NaN input.
    """
    return _parts(_kh(t), _order(p))[0]


def discrete_kh(t, p: int) -> np.ndarray:
    """Discrete wavenumber ``k_h h`` on the physical branch, complex128.

    Pass band: the value of ``2 pi m +- arccos(R)`` closest to t.  Stop band
    (|R| > 1): ``m pi + i acosh|R|``, m of the parity of sign(R), nearest to
    t / pi; the imaginary part (>= 0) is the attenuation per element.
    """
    t = _kh(t)
    R, q, g = _parts(t, _order(p))
    out = np.full(t.shape, np.nan + 0j)
    with np.errstate(invalid="ignore", over="ignore"):
        pas = (q >= 0) & (g >= 0)
        # arccos(R) without cancellation near R = +-1
        theta = np.where(R >= 0, 2.0 * np.arcsin(np.sqrt(np.clip(q, 0, 2) / 2)),
                         np.pi - 2.0 * np.arcsin(np.sqrt(np.clip(g, 0, 2) / 2)))
        best = None
        for c in (theta, -theta):
            cand = _TWO_PI * np.round((t - c) / _TWO_PI) + c
            best = cand if best is None else np.where(np.abs(cand - t) < np.abs(best - t), cand, best)
        out[pas] = best[pas]
        hi = q < 0  # R > 1
        lo = g < 0  # R < -1
        x = -np.where(hi, q, g)
        att = np.log1p(x + np.sqrt(x * x + 2.0 * x))  # acosh(1 + x)
        m_even = 2.0 * np.round(t / _TWO_PI)
        m_odd = 2.0 * np.round((t / np.pi - 1.0) / 2.0) + 1.0
        re = np.pi * np.where(hi, m_even, m_odd)
        stop = hi | lo
        out.real[stop] = re[stop]
        out.imag[stop] = att[stop]
    return out


def phase_error(t, p: int) -> np.ndarray:
    """Relative phase error ``|k_h - k| / k = |k_h h - t| / t``, float64.

    Attenuation (Im k_h h) counts as error.  0 at t = 0 (the limit).
    """
    t = _kh(t)
    d = np.abs(discrete_kh(t, p) - t)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(t > 0, d / np.where(t > 0, t, 1.0), 0.0)


def best_approximation_error(t, p: int) -> np.ndarray:
    """Relative L2 error of the best degree-p approximation of exp(i k x) on one element.

    ``sqrt(sum_{n>p} (2n+1) j_n(t/2)^2)`` (plane-wave expansion, A&S 10.1.47 /
    DLMF 10.60.7).  The tail is summed directly (up to 40 terms, fewer when
    they decay fast); where it exceeds 1e-3 it is taken as ``1 - head``
    instead (no cancellation there; ``sum_n (2n+1) j_n^2 = 1``, DLMF section 10.60).
    float64 array of t's shape.
    """
    from scipy.special import spherical_jn

    t = _kh(t)
    p = _order(p)
    a = 0.5 * t.reshape(-1)
    out = np.empty_like(a)
    for s in range(0, a.size, _CHUNK):
        x = a[s:s + _CHUNK]
        n = np.arange(p + 1 + _tail_terms(p, float(x.max(initial=0.0))))
        terms = (2 * n + 1) * spherical_jn(n, x[:, None]) ** 2
        rest = 1.0 - terms[:, :p + 1].sum(axis=1)
        tail = terms[:, p + 1:].sum(axis=1)
        out[s:s + _CHUNK] = np.sqrt(np.clip(np.where(rest > 1e-3, rest, tail), 0.0, 1.0))
    return out.reshape(t.shape)


def _tail_terms(p: int, a_max: float) -> int:
    """Terms of the tail sum so that the neglected part is < 1e-17 of it.

    For n > a the ratio of successive terms is below (a / (2n+3))^2.
    """
    rho = a_max / (2 * p + 5)
    if rho >= 0.5:
        return _TAIL_TERMS
    if rho <= 0.0:
        return 1
    return int(min(_TAIL_TERMS, np.ceil(-17.0 / (2.0 * np.log10(rho))) + 2))


def _mean_abs2(z: np.ndarray) -> np.ndarray:
    """``int_0^1 |1 - exp(i z u)|^2 du`` for complex z with Im z >= 0.

    Closed form ``1 - 2 Re E(iz) + E(-2 Im z)`` with ``E(v) = (e^v - 1)/v``;
    for |z| < 0.5 the series ``sum_{n>=2} [(-2b)^n - 2 Re (iz)^n] / (n+1)!``
    (b = Im z), which has no cancellation.  Infinite Im z gives 1.
    """
    z = np.asarray(z, dtype=np.complex128)
    out = np.empty(z.shape)
    b = z.imag
    small = np.abs(z) < 0.5
    inf = np.isinf(b)
    big = ~small & ~inf
    # series
    zs, bs = z[small], b[small]
    iz = 1j * zs
    pw_b = -2.0 * bs
    term_b = pw_b * pw_b
    term_z = iz * iz
    acc = np.zeros(zs.shape)
    fact = 6.0  # (n + 1)! for n = 2
    for n in range(2, 20):  # |z| < 0.5: next term < 1e-17 of the sum
        acc += (term_b - 2.0 * term_z.real) / fact
        term_b = term_b * pw_b
        term_z = term_z * iz
        fact *= n + 2
    out[small] = acc
    # closed form
    zb, bb = z[big], b[big]
    e_iz = np.expm1(1j * zb) / (1j * zb)
    with np.errstate(divide="ignore", invalid="ignore"):
        e_b = np.where(bb > 0, -np.expm1(-2.0 * bb) / np.where(bb > 0, 2.0 * bb, 1.0), 1.0)
    out[big] = 1.0 - 2.0 * e_iz.real + e_b
    out[inf] = 1.0
    out[np.isnan(z.real) | np.isnan(b)] = np.nan
    return np.clip(out, 0.0, None)


def phase_rms_error(t, p: int, kL) -> np.ndarray:
    """RMS over x in [0, L] of ``|1 - exp(i (k_h - k) x)|`` (relative), float64.

    t = kh, kL = k*L (broadcast together).  With z = (k_h h - kh) L / h and
    b = Im z: ``mean = 1 - 2 Re[(e^{iz} - 1)/(iz)] + (1 - e^{-2b})/(2b)``.
    """
    t = _kh(t)
    kL = np.asarray(kL, dtype=np.float64)
    if np.any(kL < 0):
        raise SettingsError("kL must be >= 0")
    t, kL = np.broadcast_arrays(t, kL)
    dk = discrete_kh(t, p) - t
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(t > 0, kL / np.where(t > 0, t, 1.0), 0.0)  # L / h
        z = np.where(ratio > 0, dk * ratio, 0.0)
        z = np.where(np.isinf(dk.imag) & (ratio > 0), complex(0, np.inf), z)
    return np.sqrt(_mean_abs2(z))


def predicted_error(t, p: int, kL) -> np.ndarray:
    """Predicted relative L2 error of a plane wave over a distance L, float64.

    ``best_approximation_error(t, p) + phase_rms_error(t, p, kL)``; t = kh,
    kL = k*L, broadcast together.  See the module docstring for the model.
    """
    t = _kh(t)
    return best_approximation_error(t, p) + phase_rms_error(t, p, kL)


def elements_per_wavelength(t) -> np.ndarray:
    """Elements per wavelength ``2 pi / (kh)`` (float64, inf at t = 0)."""
    t = _kh(t)
    with np.errstate(divide="ignore"):
        return _TWO_PI / t


# ----------------------------------------------------------- usable-kh table
_R_MAX = 1.0e7
_PMAX_TABLE = 16
_N_R = 400
_SCAN_STEP = 0.01  # relative step of the first-crossing scan in t
_WINDOW = 8  # scan columns checked exactly at a time
_BISECT_REL = 1e-7  # final bracket width, relative


@dataclass(frozen=True)
class UsableKh:
    """Largest usable kh per order and L/h ratio for one accuracy target.

    target : relative L2 error target tau (float, 1e-4..0.5).
    pmax : highest order in the table.
    log_r : (n_r,) float64, ln(L/h) on a uniform grid from 0 (r = 1) to ln 1e7.
    t_max : (pmax, n_r) float64; ``t_max[p-1, i]`` is the largest t with
        ``predicted_error(t', p, t' * r_i) <= tau`` for all t' <= t
        (first crossing, from below to 1e-7 relative).  Non-increasing in r;
        it can jump down where a stop band meets the target.
    """

    target: float
    pmax: int
    log_r: np.ndarray = field(repr=False)
    t_max: np.ndarray = field(repr=False)

    def _row(self, p) -> np.ndarray:
        p = _order(p)
        if p > self.pmax:
            raise SettingsError(f"order {p} is above the table's pmax {self.pmax}")
        return self.t_max[p - 1]

    def max_kh(self, p: int, ratio) -> np.ndarray:
        """Largest usable kh for order p at ratio = L/h (array_like, > 0).

        Linear interpolation of t_max in ln r on the uniform grid (identical
        to ``np.interp(np.log(ratio), log_r, t_max[p-1])``, done by direct
        indexing: ~20 ms per million ratios), except on the grid segments where
        t_max jumps down (a stop band meets the target somewhere inside): there
        the segment's lower end value is used, since a straight line would be
        optimistic past the jump (see :func:`_segments`).  Ratios below 1 are treated as
        1 (conservative: at least one element's phase error is counted);
        ratios above r_max = 1e7 as r_max (optimistic by at most a factor
        (r / r_max)^(1/(2p+1)); no 3D mesh has 1e7 elements along a line).
        float64 array of ratio's shape.  Raises SettingsError for a ratio
        that is <= 0 or NaN.
        """
        u = np.array(ratio, dtype=np.float64)  # a copy, worked in place
        if not np.all(u > 0):  # also False for NaN
            raise SettingsError("L/h ratios must be > 0")
        np.log(u, out=u)
        return self._max_kh_of_log(p, u)

    def max_kh_log(self, p: int, log_ratio) -> np.ndarray:
        """:meth:`max_kh` of ratio = exp(log_ratio) (array_like, finite), from its
        natural logarithm (e.g. ln(L / h) - ln a for a size factor a, one logarithm per
        edge for every order)."""
        return self._max_kh_of_log(p, np.array(log_ratio, dtype=np.float64))

    def _max_kh_of_log(self, p: int, u: np.ndarray) -> np.ndarray:
        """max_kh from u = ln(ratio) (float64, overwritten)."""
        row = self._row(p)
        n = self.log_r.size
        u *= (n - 1) / self.log_r[-1]
        np.clip(u, 0.0, n - 1, out=u)
        i = u.astype(np.intp)
        u -= i
        base, step = _segments(row)
        return base[i] + u * step[i]

    def max_size(self, p: int, k, L) -> np.ndarray:
        """Largest element size h (m) meeting the target for order p.

        k : wavenumber (rad/m), L : propagation distance (m); array_like > 0,
        broadcast together.  The condition ``k h <= t_max(L/h)`` reads
        ``k L <= u(r) = r t_max(r)`` with r = L/h; the smallest grid r where
        u first reaches kL is found (u increases with r except at the
        downward jumps of t_max) and ln r is interpolated linearly in ln u on
        the segment where u crosses kL; h = L / r.  When kL <= t_max(1) one
        element suffices and h = L; beyond r_max the last grid segment is
        extrapolated in log-log.  float64.
        """
        row = self._row(p)
        k, L = np.broadcast_arrays(np.asarray(k, np.float64), np.asarray(L, np.float64))
        if not (np.all(k > 0) and np.all(L > 0)):
            raise SettingsError("k and L must be > 0")
        log_u = self.log_r + np.log(row)
        run = np.maximum.accumulate(log_u)
        x = np.log(k * L)
        n = log_u.size
        b = np.clip(np.searchsorted(run, x, side="left"), 1, n - 1)
        u0, u1 = log_u[b - 1], log_u[b]
        frac = (x - u0) / (u1 - u0)  # in (0, 1] except below r = 1 and past r_max
        log_r = self.log_r[b - 1] + frac * (self.log_r[b] - self.log_r[b - 1])
        log_r = np.maximum(log_r, 0.0)  # kL <= t_max(1): h = L
        h = L * np.exp(-log_r)
        # on a jump segment max_kh holds the lower value: shrink h until k h <= max_kh(L/h)
        for _ in range(60):
            allowed = self.max_kh(p, L / h) / k
            over = h > allowed * (1.0 + 1e-12)
            if not over.any():
                break
            h = np.where(over, allowed, h)
        return h


@lru_cache(maxsize=64)
def _segments_cached(key: bytes, n: int) -> tuple[np.ndarray, np.ndarray]:
    row = np.frombuffer(key, dtype=np.float64, count=n)
    drop = np.append(row[:-1] - row[1:], 0.0)
    # a jump: a drop well above the smooth drops around it (median of 7 segments)
    pad = np.pad(drop, 3, mode="edge")
    window = np.lib.stride_tricks.sliding_window_view(pad, 7)
    # the median of 7 is the 4th smallest (np.median, whose first call in a process
    # imports numpy.ma, 7 ms on the advice's serial path; NaN as np.median gives it)
    med = np.partition(window, 3, axis=1)[:, 3]
    med[np.isnan(window).any(axis=1)] = np.nan
    jump = drop > 2.0 * med + 1e-12 * row
    base = row.copy()
    step = -drop
    base[jump] = row[np.flatnonzero(jump) + 1]
    step[jump] = 0.0
    base.setflags(write=False)
    step.setflags(write=False)
    return base, step


def _segments(row: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(base, step) of the interpolation of a usable-kh row on its grid segments.

    t_max(r) is smooth and non-increasing in ln r except where it jumps down
    (the error curve touches the target near a stop band, so the first crossing
    moves to a lower kh).  On a smooth segment the value is base + u step with
    base = row[i], step = row[i+1] - row[i], u in [0, 1) the position in it; on a
    segment whose drop is more than twice the median drop of the 7 segments
    around it, the jump lies somewhere inside and base = row[i+1], step = 0: the
    conservative value (t_max is non-increasing, so t_max(r) >= row[i+1] there).
    """
    return _segments_cached(np.ascontiguousarray(row, np.float64).tobytes(), row.size)


def usable_kh(target: float, pmax: int = 12) -> UsableKh:
    """Build (cached) the usable-kh table for a relative L2 error target.

    target : 1e-4 <= target <= 0.5 (relative L2 error).  pmax : 1..16.
    Limits: k_h h carries float64 noise up to ~1e-13 (orders >= 12); below
    1e-4 (or above order 16) that noise can approach the phase error allowed
    over 1e7 elements and fake a crossing.  Raises SettingsError.
    """
    target = float(target)
    if not 1e-4 <= target <= 0.5:
        raise SettingsError(f"error target must be in [1e-4, 0.5], got {target}")
    pmax = _order(pmax)
    if pmax > _PMAX_TABLE:
        raise SettingsError(f"usable-kh tables go up to order {_PMAX_TABLE}, got {pmax}")
    return _build_usable(target, pmax)


def _t_best(tau: float, p: int) -> float:
    """A t, at most 1e-3 above the first, with best_approximation_error(t, p) >= tau.

    The end of the first-crossing scan (the total error is above tau there).
    """
    t = np.geomspace(1e-6, 8.0 * (p + 2), 64)
    while True:
        above = best_approximation_error(t, p) >= tau
        i = int(np.argmax(above))
        if not above[i]:
            raise MeshcheckError(f"internal: best-approximation error of order {p} never reaches {tau}")
        if i == 0 or t[i] - t[i - 1] <= 1e-3 * t[i]:
            return float(t[i])
        t = np.linspace(t[i - 1], t[i], 64)


def _gap_samples(p: int, lo: float, hi: float) -> np.ndarray:
    """Extra scan points across each stop band [a, b] in [lo, hi] and after it.

    A thin stop band (near multiples of pi for p >= 3) raises the error over
    its width and a few widths beyond (nearest branch); the 1 % scan grid would
    step over it.  24 points in [a, b], 24 in [b, b + 8 (b - a)].
    """
    bands = _stop_bands(p)
    bands = bands[np.isfinite(bands[:, 1]) & (bands[:, 1] > lo) & (bands[:, 0] < hi)]
    if not bands.size:
        return np.zeros(0)
    a, b = bands[:, :1], bands[:, 1:]
    u = np.linspace(0.0, 1.0, 24)[None, :]
    pts = np.concatenate([(a + u * (b - a)).ravel(), (b + 8.0 * u * (b - a)).ravel()])
    return pts[(pts > lo) & (pts < hi)]


def _pollution_kh(tau: float, p: int, r: float) -> float:
    """Asymptotic kh where the phase term alone reaches tau at L/h = r.

    Ainsworth (2004): k_h h - kh ~ -(1/2)[p!/(2p)!]^2 (kh)^(2p+1)/(2p+1), and
    the RMS of |1 - exp(i z u)| over u in [0, 1] is ~ |z| / sqrt(3).
    """
    c = 0.5 * np.exp(2.0 * (math.lgamma(p + 1) - math.lgamma(2 * p + 1))) / (2 * p + 1)
    return float((np.sqrt(3.0) * tau / (c * r)) ** (1.0 / (2 * p + 1)))


def _first_over(best, dk, r, tau, cols):
    """Exact test ``predicted_error > tau`` at grid columns cols (n_r, w)."""
    z = dk[cols] * r[:, None]
    return best[cols] + np.sqrt(_mean_abs2(z)) > tau


def _crossing(p: int, tau: float, r: np.ndarray, lo, hi, e_lo, e_hi, best) -> np.ndarray:
    """Refine e(t) = best(t) + phase_rms_error(t, p, t r) = tau inside [lo, hi] per r.

    best : callable, the best-approximation error (a spline, see _build_usable).
    Illinois (modified regula falsi) on ln e against ln t, keeping a bracket
    with e(lo) <= tau < e(hi); returns lo once hi / lo - 1 < _BISECT_REL.
    """
    x0, x1 = np.log(lo), np.log(hi)
    f0, f1 = np.log(e_lo / tau), np.log(e_hi / tau)
    side = np.zeros(r.size, np.int8)
    tol = np.log1p(_BISECT_REL)
    for it in range(100):
        act = np.nonzero(x1 - x0 > tol)[0]
        if act.size == 0:
            return np.exp(x0)
        a0, a1, g0, g1 = x0[act], x1[act], f0[act], f1[act]
        with np.errstate(divide="ignore", invalid="ignore"):
            x = a1 - g1 * (a1 - a0) / (g1 - g0)
        if it % 8 == 7:  # a plain bisection step now and then guarantees progress
            x = 0.5 * (a0 + a1)
        x = np.where(np.isfinite(x), x, 0.5 * (a0 + a1))
        x = np.clip(x, a0 + 0.4 * tol, a1 - 0.4 * tol)  # step at least tol/2.5 (as in Brent)
        tx = np.exp(x)
        f = np.log((best(tx) + phase_rms_error(tx, p, tx * r[act])) / tau)
        ok = f <= 0
        s = side[act]
        # Illinois: halve the value kept on the side that did not move twice in a row
        f1[act] = np.where(ok & (s == -1), 0.5 * g1, np.where(ok, g1, f))
        f0[act] = np.where(~ok & (s == 1), 0.5 * g0, np.where(ok, f, g0))
        x0[act] = np.where(ok, x, a0)
        x1[act] = np.where(ok, a1, x)
        side[act] = np.where(ok, -1, 1)
    raise MeshcheckError(f"internal: usable-kh refinement for p={p} did not converge")


@lru_cache(maxsize=1)
def _code_tag() -> str:
    """Hash of this module's source: a cached table is used only by the code that built it."""
    return hashlib.sha256(Path(__file__).read_bytes()).hexdigest()[:16]


def _cache_file(tau: float, pmax: int) -> Path | None:
    folder = cache_dir()
    if folder is None:
        return None
    return folder / f"usable_kh_{tau.hex()}_p{pmax}_{_code_tag()}.npy"


@lru_cache(maxsize=16)
def _build_usable(tau: float, pmax: int) -> UsableKh:
    """The usable-kh table, from the on-disk cache when this very code built it before
    (about 0.3 s saved per process), else computed and stored (best effort: an
    unwritable or damaged cache only costs the computation)."""
    path = _cache_file(tau, pmax)
    if path is not None and path.is_file():
        try:
            t_max = np.load(path, allow_pickle=False)
        except (OSError, ValueError):
            t_max = None
        if (t_max is not None and t_max.shape == (pmax, _N_R) and t_max.dtype == np.float64
                and np.all(np.isfinite(t_max)) and np.all(t_max > 0)):
            log_r = np.linspace(0.0, np.log(_R_MAX), _N_R)
            log_r.setflags(write=False)
            t_max.setflags(write=False)
            return UsableKh(target=tau, pmax=pmax, log_r=log_r, t_max=t_max)
    table = _compute_usable(tau, pmax)
    if path is not None:
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
            tmp = path.with_name(f"{path.stem}.{os.getpid()}.tmp.npy")
            np.save(tmp, table.t_max, allow_pickle=False)
            os.replace(tmp, path)
        except OSError:
            pass
    return table


def _compute_usable(tau: float, pmax: int) -> UsableKh:
    from scipy.interpolate import CubicSpline

    log_r = np.linspace(0.0, np.log(_R_MAX), _N_R)
    r = np.exp(log_r)
    t_max = np.empty((pmax, _N_R))
    for p in range(1, pmax + 1):
        t_hi = _t_best(tau, p)  # best-approximation error alone reaches tau
        t_lo = min(0.25 * _pollution_kh(tau, p, r[-1]), 0.1 * t_hi)
        for _ in range(8):  # the scan must start below the target for every r
            n_t = int(np.ceil(np.log(t_hi / t_lo) / np.log1p(_SCAN_STEP))) + 1
            t = np.union1d(np.geomspace(t_lo, t_hi, n_t), _gap_samples(p, t_lo, t_hi))
            n_t = t.size
            best = best_approximation_error(t, p)
            dk = discrete_kh(t, p) - t
            # rigorous upper bound sqrt(mean) <= |z| / sqrt(3): no crossing before it exceeds tau
            bound = best[None, :] + np.abs(dk)[None, :] * r[:, None] / np.sqrt(3.0) > tau
            start = np.argmax(bound, axis=1)  # the last column is always above
            first = np.full(_N_R, -1)
            while np.any(first < 0):
                todo = np.nonzero(first < 0)[0]
                cols = np.minimum(start[todo, None] + np.arange(_WINDOW), n_t - 1)
                over = _first_over(best, dk, r[todo], tau, cols)
                hit = over.any(axis=1)
                first[todo[hit]] = cols[hit, np.argmax(over[hit], axis=1)]
                start[todo] += _WINDOW
            if np.all(first > 0):
                break
            t_lo *= 0.01
        else:
            raise MeshcheckError(f"internal: usable-kh scan for p={p}, target {tau} starts above the target")
        lo, hi = t[first - 1], t[first]
        e = best[np.stack([first - 1, first])] + np.sqrt(
            _mean_abs2(dk[np.stack([first - 1, first])] * r[None, :]))
        # the best-approximation error (costly: spherical Bessel functions) is smooth
        # in ln-ln; a cubic spline through the scan grid (1e-8 relative) serves the
        # refinement, and the result is checked with the exact error below
        spline = CubicSpline(np.log(t), np.log(np.maximum(best, 1e-300)))
        tm = _crossing(p, tau, r, lo, hi, e[0], e[1], lambda x: np.exp(spline(np.log(x))))
        for _ in range(50):
            bad = np.nonzero(predicted_error(tm, p, tm * r) > tau)[0]
            if bad.size == 0:
                break
            tm[bad] *= 1.0 - _BISECT_REL
        else:
            raise MeshcheckError(f"internal: usable-kh check for p={p} failed")
        t_max[p - 1] = tm
    log_r.setflags(write=False)
    t_max.setflags(write=False)
    return UsableKh(target=tau, pmax=pmax, log_r=log_r, t_max=t_max)
