"""Tests of meshcheck.dispersion against sources outside the project.

Sources (cited again beside each check):
[IB95] Ihlenburg & Babuska, "Finite element solution of the Helmholtz equation
      with high wave number, Part I", Comput. Math. Appl. 30 (1995); Part II,
      SIAM J. Numer. Anal. 34 (1997); Ihlenburg, "Finite Element Analysis of
      Acoustic Scattering", Springer 1998 (p = 1, 2 closed forms).
[A04] Ainsworth, "Discrete dispersion relation for hp-version finite element
      approximation at high wave number", SIAM J. Numer. Anal. 42(2) (2004)
      553-575 (asymptotic phase error, any p).
[TP94] Thompson & Pinsky, Comput. Mech. 13 (1994) (stop bands).
[DLMF] NIST DLMF 10.60.7 / Abramowitz & Stegun 10.1.47 (plane-wave expansion).
Reference library: scikit-fem's ElementLinePp (an independent assembly).
Closed forms and exact rational arithmetic (fractions) are built in this file,
independently of the module.
"""
from __future__ import annotations

import logging
import math
from fractions import Fraction
from functools import lru_cache
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
from numpy.polynomial import chebyshev, legendre
from scipy.integrate import quad
from scipy.optimize import brentq

from meshcheck import dispersion as d
from meshcheck.errors import SettingsError

DOCS = Path(__file__).resolve().parents[1] / "docs" / "model.md"


def ainsworth_c(p: int) -> float:
    """[A04]: k_h h - kh ~ -ainsworth_c(p) (kh)^(2p+1), c = (1/2)[p!/(2p)!]^2/(2p+1)."""
    return 0.5 * (math.factorial(p) / math.factorial(2 * p)) ** 2 / (2 * p + 1)


# --------------------------------------------------------------- closed forms
def r_p1(t):
    """[IB95] p = 1: cos(k_h h) = (1 - t^2/3) / (1 + t^2/6)."""
    return (1 - t**2 / 3) / (1 + t**2 / 6)


def r_p2(t):
    """[IB95] p = 2: (3t^4 - 104t^2 + 240) / (t^4 + 16t^2 + 240)."""
    return (3 * t**4 - 104 * t**2 + 240) / (t**4 + 16 * t**2 + 240)


@pytest.mark.parametrize("p,closed", [(1, r_p1), (2, r_p2)], ids=["p1", "p2"])
def test_closed_form(p, closed):
    # [IB95]; includes the bubble resonance t = sqrt(10) of p = 2 and the band edges
    t = np.concatenate([np.linspace(0.0, 12.0, 2401), np.sqrt([10.0, 12.0, 60.0])])
    ref = closed(t)
    assert np.all(np.abs(d.cos_kh(t, p) - ref) <= 1e-12 * np.maximum(1.0, np.abs(ref)))


# ------------------------------------------------- independent Lagrange basis
def gll_nodes(p: int) -> np.ndarray:
    """Gauss-Lobatto-Legendre nodes on [0, 1]: ends and roots of P_p'."""
    inner = legendre.Legendre.basis(p).deriv().roots() if p > 1 else np.zeros(0)
    return 0.5 * (np.concatenate([[-1.0], np.sort(inner.real), [1.0]]) + 1.0)


def lagrange_matrices(p: int):
    """K, M of the GLL Lagrange basis on [0, 1]; dofs in node order (vertices 0 and p)."""
    nodes = 2.0 * gll_nodes(p) - 1.0
    x, w = legendre.leggauss(p + 2)
    C = np.linalg.inv(legendre.legvander(nodes, p))  # column i: Legendre coefficients of L_i
    phi = legendre.legvander(x, p) @ C
    dphi = np.column_stack([legendre.legval(x, legendre.legder(C[:, i])) for i in range(p + 1)])
    M = (phi.T * (0.5 * w)) @ phi
    K = (dphi.T * (2.0 * w)) @ dphi  # d/dxi = 2 d/dx, dxi = dx / 2
    return K, M


def cos_lagrange(t: np.ndarray, p: int) -> np.ndarray:
    """Static condensation by stacked solves (an independent route), R = -S00/S0p."""
    K, M = lagrange_matrices(p)
    D = K[None] - (t**2)[:, None, None] * M[None]
    v, b = [0, p], list(range(1, p))
    Dvv = D[:, v][:, :, v]
    if p > 1:
        Dvb, Dbb = D[:, v][:, :, b], D[:, b][:, :, b]
        S = Dvv - Dvb @ np.linalg.solve(Dbb, np.swapaxes(Dvb, 1, 2))
    else:
        S = Dvv
    return -S[:, 0, 0] / S[:, 0, 1]


@pytest.mark.parametrize("p", [*range(1, 17), 20, 24, 32])
def test_basis_independence(p):
    # [IB95]/[A04]: the relation does not depend on the basis.  Points closer than
    # 1e-3 to an interior resonance are left out of the stacked-solve route.
    K, M = lagrange_matrices(p)
    mu = scipy.linalg.eigvalsh(K[1:-1, 1:-1], M[1:-1, 1:-1]) if p > 1 else np.zeros(0)
    t = np.linspace(0.05, 2.5 * p + 4.0, 1500)
    if mu.size:
        t = t[np.min(np.abs(t[:, None] - np.sqrt(mu)[None, :]), axis=1) > 1e-3]
    ref = cos_lagrange(t, p)
    tol = 1e-11 * (1 + p) ** 2
    assert np.all(np.abs(d.cos_kh(t, p) - ref) <= tol * np.maximum(1.0, np.abs(ref)))


@pytest.mark.parametrize("p", range(2, 9))
def test_interior_resonance_is_removable(p):
    # At t^2 = an eigenvalue of the clamped element the bubble block is singular;
    # R has a removable singularity there (value +-1).  Compare with the limit of
    # the independent Lagrange route from both sides.
    K, M = lagrange_matrices(p)
    mu = scipy.linalg.eigvalsh(K[1:-1, 1:-1], M[1:-1, 1:-1])
    t0 = np.sqrt(mu)
    value = d.cos_kh(t0, p)
    side = 0.5 * (cos_lagrange(t0 * (1 - 1e-7), p) + cos_lagrange(t0 * (1 + 1e-7), p))
    assert np.all(np.isfinite(value))
    assert np.allclose(value, side, rtol=0, atol=1e-6)
    assert np.allclose(np.abs(value), 1.0, atol=1e-6)


# ------------------------------------------------- exact rational arithmetic
def _polymul(a, b):
    out = [Fraction(0)] * (len(a) + len(b) - 1)
    for i, x in enumerate(a):
        for j, y in enumerate(b):
            out[i + j] += x * y
    return out


def _integ01(a):
    return sum(c / (k + 1) for k, c in enumerate(a))


@lru_cache(maxsize=None)
def exact_matrices(p: int):
    """Equispaced Lagrange basis on [0, 1] in exact rationals: K, M."""
    x = [Fraction(i, p) for i in range(p + 1)]
    basis = []
    for i in range(p + 1):
        c = [Fraction(1)]
        for j in range(p + 1):
            if j != i:
                c = _polymul(c, [-x[j] / (x[i] - x[j]), 1 / (x[i] - x[j])])
        basis.append(c)
    der = [[k * b[k] for k in range(1, len(b))] for b in basis]
    K = [[_integ01(_polymul(der[i], der[j])) for j in range(p + 1)] for i in range(p + 1)]
    M = [[_integ01(_polymul(basis[i], basis[j])) for j in range(p + 1)] for i in range(p + 1)]
    return K, M


def cos_exact(p: int, t: Fraction) -> Fraction:
    """R = -S00/S0p by exact Gauss-Jordan elimination of the bubbles."""
    K, M = exact_matrices(p)
    s = t * t
    D = [[K[i][j] - s * M[i][j] for j in range(p + 1)] for i in range(p + 1)]
    b = list(range(1, p))
    A = [[D[i][j] for j in b] + [D[i][0], D[i][p]] for i in b]
    n = len(b)
    for c in range(n):
        piv = next(r for r in range(c, n) if A[r][c] != 0)
        A[c], A[piv] = A[piv], A[c]
        for r in range(n):
            if r != c and A[r][c] != 0:
                f = A[r][c] / A[c][c]
                A[r] = [x - f * y for x, y in zip(A[r], A[c])]
    X = [[A[r][n + k] / A[r][r] for k in range(2)] for r in range(n)]
    S00 = D[0][0] - sum(D[0][b[r]] * X[r][0] for r in range(n))
    S0p = D[0][p] - sum(D[0][b[r]] * X[r][1] for r in range(n))
    return -S00 / S0p


def cos_sin_exact(t: Fraction, terms: int = 60):
    """Taylor sums of cos t and sin t (remainder far below what is used here)."""
    c = s = Fraction(0)
    term = Fraction(1)
    for n in range(2 * terms):
        c, s = [(c + term, s), (c, s + term), (c - term, s), (c, s - term)][n % 4]
        term = term * t / (n + 1)
    return c, s


@pytest.mark.parametrize("p", range(1, 11))
def test_ainsworth_asymptotic_exact(p):
    # [A04] eq. for the leading term: k_h h - kh = -(1/2)[p!/(2p)!]^2 (kh)^(2p+1)/(2p+1).
    # Exact R at t = 1/16, 1/32, 1/64; delta from cos(t + delta) = R to first order
    # (the neglected delta^2 term is ~1e-30 relative).
    ts = [Fraction(1, 16), Fraction(1, 32), Fraction(1, 64)]
    delta = []
    for t in ts:
        c, s = cos_sin_exact(t)
        delta.append((c - cos_exact(p, t)) / s)
    assert all(x < 0 for x in delta)  # k_h < k
    logt = np.log([float(t) for t in ts])
    logd = np.log([-float(x) for x in delta])
    slope = np.polyfit(logt, logd, 1)[0]
    assert abs(slope - (2 * p + 1)) < 1e-3
    ratio = float(delta[-1] / (-ainsworth_c(p) * ts[-1] ** (2 * p + 1)))
    assert abs(ratio - 1) < 1e-4  # next term is O(t^2)


@pytest.mark.parametrize("p", [1, 2, 3, 5, 8, 12])
def test_module_matches_exact(p):
    # float64 module against the exact rational relation of another basis,
    # in pass and stop bands (dyadic t are exact in binary).
    t = [Fraction(k, 4) for k in (1, 3, 7, 13, 21, 34)]
    ref = np.array([float(cos_exact(p, x)) for x in t])
    got = d.cos_kh(np.array([float(x) for x in t]), p)
    assert np.all(np.abs(got - ref) <= 1e-13 * (1 + p) * np.maximum(1.0, np.abs(ref)))


@pytest.mark.parametrize("p", range(1, 11))
def test_ainsworth_asymptotic_float(p):
    # [A04] on the float64 module: fit ln|k_h h - kh| = ln c + s ln t + a t^2 + b t^4
    # over t where the leading term is 1e-11..1e-6 relative (above round-off),
    # leaving out t within 0.1 of a multiple of pi (arccos is ill-conditioned there).
    # For p >= 8 that range is no longer deep in the asymptotic regime, hence the
    # wider tolerance; the exact test above pins the constant for every p.
    c = ainsworth_c(p)
    ta = (1e-11 / c) ** (1 / (2 * p))
    tb = min((1e-6 / c) ** (1 / (2 * p)), 0.4 * (2 * p + 1))
    t = np.geomspace(ta, tb, 60)
    off = np.abs(t - np.pi * np.round(t / np.pi))
    t = t[(off > 0.1) | (t < 1.0)]
    delta = d.discrete_kh(t, p).real - t
    assert np.all(delta < 0)  # k_h < k
    A = np.column_stack([np.ones_like(t), np.log(t), t**2, t**4])
    coef = np.linalg.lstsq(A, np.log(-delta), rcond=None)[0]
    tol = 2e-3 if p <= 7 else 3e-2
    assert abs(coef[1] - (2 * p + 1)) < tol * (2 * p + 1) / 3
    assert abs(np.exp(coef[0]) / c - 1) < tol


# ------------------------------------------------------------------ stop bands
@pytest.mark.parametrize(
    "p,lo,hi,edge,offset",
    [(1, 3.0, 4.0, np.sqrt(12.0), 1.0), (2, 3.0, 3.3, np.sqrt(10.0), 1.0),
     (2, 3.3, 3.6, np.sqrt(12.0), 1.0), (2, 7.0, 8.0, np.sqrt(60.0), -1.0)],
    ids=["p1-sqrt12", "p2-sqrt10", "p2-sqrt12", "p2-sqrt60"],
)
def test_stop_band_edges(p, lo, hi, edge, offset):
    # [TP94]: p = 1 stop band kh >= sqrt(12); p = 2: [sqrt(10), sqrt(12)] and kh >= sqrt(60).
    # offset = +1 where R = -1 at the edge, -1 where R = +1.
    found = brentq(lambda x: float(d.cos_kh(x, p)) + offset, lo, hi, xtol=1e-14)
    assert abs(found - edge) < 1e-10


@pytest.mark.parametrize(
    "p,a,b", [(1, np.sqrt(12.0), 30.0), (2, np.sqrt(10.0), np.sqrt(12.0)), (2, np.sqrt(60.0), 30.0)],
    ids=["p1", "p2-first", "p2-second"])
def test_stop_band_is_attenuating(p, a, b):
    # [TP94]: |R| > 1 inside the band, and the discrete wave decays (Im k_h h > 0)
    t = np.linspace(a, b, 400)[1:-1]
    assert np.all(np.abs(d.cos_kh(t, p)) > 1)
    k = d.discrete_kh(t, p)
    assert np.all(k.imag > 0)
    assert np.allclose(np.cos(k.real), np.sign(d.cos_kh(t, p)))  # real part a multiple of pi
    assert np.all(np.abs(k.real - t) <= np.pi + 1e-12)  # nearest multiple of the right parity


@pytest.mark.parametrize(
    "p,expected",
    [(1, [[np.sqrt(12.0), np.inf]]), (2, [[np.sqrt(10.0), np.sqrt(12.0)], [np.sqrt(60.0), np.inf]])],
    ids=["p1", "p2"])
def test_stop_bands_closed_form(p, expected):
    # [TP94] band list from the periodic/antiperiodic cell eigenvalues
    assert np.allclose(d.stop_bands(p), expected, rtol=1e-13)


@pytest.mark.parametrize("p", [3, 5, 8, 12])
def test_stop_bands_match_relation(p):
    # the band list (cell eigenvalues) agrees with the relation itself (cos_kh, checked
    # above against independent routes): |R| > 1 inside every band, <= 1 just before it
    for a, b in d.stop_bands(p):
        b = 2 * a + 10 if np.isinf(b) else b
        w = b - a
        inner = np.linspace(a + 0.01 * w, b - 0.01 * w, 50)
        assert np.all(np.abs(d.cos_kh(inner, p)) > 1)
        assert abs(float(d.cos_kh(a - 0.01 * w, p))) <= 1  # bands are separated by pass bands


@pytest.mark.parametrize("p", [3, 4, 5])
def test_thin_gap_near_pi(p):
    # [TP94] (REFERENCES.md): for p >= 3, thin gaps appear just above multiples of pi.
    t = np.linspace(np.pi - 0.05, np.pi + 0.05, 200001)
    stop = np.abs(d.cos_kh(t, p)) > 1
    assert stop.any()
    band = t[stop]
    assert abs(band[0] - np.pi) < 0.01 and band[-1] - band[0] < 0.05


def test_pass_band_branch():
    # physical branch for p = 4 through the thin gap at pi (~1e-3 wide): k_h h stays
    # next to kh and increases.  Within 1e-2 of pi the nearest branch may be the mirror
    # image 2 pi - arccos R (same |k_h h - kh| to within the lag, ~1e-4 here).
    t = np.linspace(2.0, 6.0, 5001)
    k = d.discrete_kh(t, 4)
    assert np.max(np.abs(k - t) / t) < 2e-2
    far = np.abs(t - np.pi) > 1e-2
    assert np.all(np.diff(k.real[far]) > 0)
    near = ~far
    assert np.max(np.abs(k[near] - t[near])) < 1e-3


# ---------------------------------------------------- scikit-fem 1D Helmholtz
@pytest.mark.parametrize("p", [1, 2, 3, 5, 8])
@pytest.mark.parametrize("t", [0.5, 1.5, 2.5, 3.3, 3.6])
def test_skfem_helmholtz_chain(p, t):
    # Solve -u'' - k^2 u = 0 on 12 elements with scikit-fem (u(0) = 1, impedance
    # u' = i k u at the far end).  Any discrete solution satisfies the vertex chain
    # u_{j-1} + u_{j+1} = 2 R u_j, so the nodal values give R = cos(k_h h).
    skfem = pytest.importorskip("skfem")
    from skfem.helpers import dot, grad

    logging.getLogger("skfem").setLevel(logging.ERROR)  # "use ElementLineP1" hint
    n, h = 12, 0.37
    k = t / h
    mesh = skfem.MeshLine(np.linspace(0.0, n * h, n + 1))
    basis = skfem.Basis(mesh, skfem.ElementLinePp(p), intorder=2 * p + 2)
    stiff = skfem.BilinearForm(lambda u, v, w: dot(grad(u), grad(v)))
    mass = skfem.BilinearForm(lambda u, v, w: u * v)
    A = (skfem.asm(stiff, basis) - k**2 * skfem.asm(mass, basis)).astype(complex).tolil()
    vd = basis.nodal_dofs[0]
    A[vd[-1], vd[-1]] += -1j * k
    x = np.zeros(basis.N, complex)
    x[vd[0]] = 1.0
    u = skfem.solve(*skfem.condense(A.tocsr(), np.zeros(basis.N, complex), x=x, D=np.array([vd[0]])))
    uv = u[vd]
    assert np.min(np.abs(uv)) > 1e-3
    R = (uv[:-2] + uv[2:]) / (2 * uv[1:-1])
    assert np.max(np.abs(R - d.cos_kh(t, p))) < 1e-9
    assert np.max(np.abs(R.imag)) < 1e-9


# ---------------------------------------------------------- best approximation
def projection_error(t: float, p: int, nq: int = 80) -> float:
    """Relative L2 error of the L2 projection of exp(i t x) on [0, 1] onto degree p.

    Independent route: weighted least squares in a Chebyshev basis at nq
    Gauss points (exact discrete L2 projection for this analytic function).
    """
    x, w = legendre.leggauss(nq)
    f = np.exp(1j * t * 0.5 * (x + 1.0))
    sw = np.sqrt(w)
    A = chebyshev.chebvander(x, p) * sw[:, None]
    c = np.linalg.lstsq(A.astype(complex), f * sw, rcond=None)[0]
    res = (f - chebyshev.chebvander(x, p) @ c) * sw
    return float(np.sqrt(np.sum(np.abs(res) ** 2) / np.sum(w)))


@pytest.mark.parametrize(
    "p,t", [(1, 0.1), (1, 1.0), (1, 3.0), (2, 0.5), (2, 2.0), (3, 1.0), (4, 3.0),
            (6, 4.0), (8, 8.0), (12, 15.0), (16, 30.0), (3, 12.0)])
def test_best_approximation_vs_projection(p, t):
    # [DLMF] 10.60.7 closed form against a direct numerical L2 projection
    ref = projection_error(t, p)
    assert ref > 1e-9
    assert abs(float(d.best_approximation_error(t, p)) - ref) < 1e-6 * ref


@pytest.mark.parametrize("p", range(1, 7))
def test_best_approximation_order(p):
    # best approximation by degree p: error ~ C t^(p+1)
    t = np.geomspace(0.02, 0.1, 8) * (p + 1)
    e = d.best_approximation_error(t, p)
    assert abs(np.polyfit(np.log(t), np.log(e), 1)[0] - (p + 1)) < 0.02


# --------------------------------------------------------------- phase term
@pytest.mark.parametrize(
    "t,p,kL", [(0.5, 1, 10.0), (0.05, 1, 1e3), (1.0, 2, 100.0), (2.0, 3, 1e4), (3.6, 1, 20.0),
               (3.3, 2, 50.0), (0.3, 4, 1e6), (1e-3, 1, 1.0)],
    ids=["p1", "p1-small-z", "p2", "p3-wrapped", "p1-stop-band", "p2-stop-band", "p4-long", "tiny"])
def test_phase_rms_vs_quadrature(t, p, kL):
    # closed-form mean against direct numerical averaging of |1 - exp(i (k_h - k) x)|^2 over [0, L]
    dk = complex(d.discrete_kh(t, p)) - t
    z = dk * kL / t  # (k_h - k) L
    re = quad(lambda u: abs(1 - np.exp(1j * z * u)) ** 2, 0, 1, limit=2000, epsabs=0, epsrel=1e-12)[0]
    got = float(d.phase_rms_error(t, p, kL))
    assert abs(got - np.sqrt(re)) <= 1e-8 * np.sqrt(re)


@pytest.mark.parametrize("p", [1, 2, 3, 4])
def test_pollution_structure(p):
    # [IB95] (pollution, Part II) / [A04]: for small accumulated phase the phase term is
    # kL * c_p (kh)^(2p) / sqrt(3): linear in kL, power 2p in kh.
    t = 0.05 * p
    kL = 10.0 ** np.arange(0, 4)  # accumulated phase <= 0.1 rad
    ratio = d.phase_rms_error(t, p, kL) / (ainsworth_c(p) * t ** (2 * p) * kL / np.sqrt(3))
    assert np.allclose(ratio, 1.0, atol=1e-2)


# ------------------------------------------------------------ usable-kh table
TARGETS = [1e-4, 1e-3, 1e-2, 1e-1]


@pytest.mark.parametrize("i", [0, 133, 266, 399], ids=lambda i: f"r{i}")
@pytest.mark.parametrize("p", [1, 2, 4, 8, 12])
@pytest.mark.parametrize("target", TARGETS)
def test_usable_kh_first_crossing(target, p, i):
    # t_max is the first crossing: below it the error never exceeds the target,
    # within 1e-6 above it the error does
    U = d.usable_kh(target, 12)
    r = float(np.exp(U.log_r[i]))
    tm = U.t_max[p - 1, i]
    t = np.geomspace(tm * 1e-3, tm, 3000)
    assert np.max(d.predicted_error(t, p, t * r)) <= target
    above = tm * (1 + np.linspace(1e-9, 1e-6, 400))  # a thin stop band can make a narrow spike
    assert np.max(d.predicted_error(above, p, above * r)) > target


@pytest.mark.parametrize("target", TARGETS + [0.3])
def test_usable_kh_monotone(target):
    U = d.usable_kh(target, 16)
    assert np.all(np.diff(U.t_max, axis=1) <= 0)  # longer propagation, smaller kh
    assert np.all(np.diff(U.t_max, axis=0) > 0)  # higher order, larger kh


@pytest.mark.parametrize("target", [1e-4, 1e-3, 1e-2, 3e-2])
def test_u_increasing_without_thin_gaps(target):
    # u(r) = r t_max(r) increases for p = 1, 2 (no thin stop bands) at these targets
    U = d.usable_kh(target, 12)
    assert np.all(np.diff(U.log_r[None, :] + np.log(U.t_max[:2]), axis=1) > 0)


@pytest.mark.parametrize("target", [1e-3, 1e-2, 1e-1])
@pytest.mark.parametrize("p", [3, 4, 6, 8, 12])
def test_t_max_drops_only_into_stop_bands(target, p):
    # where u(r) = r t_max(r) decreases, t_max has jumped down to a thin stop band
    # (or just past one, where the nearest branch still lags): [TP94]
    U = d.usable_kh(target, 12)
    u = U.log_r + np.log(U.t_max[p - 1])
    drop = np.nonzero(np.diff(u) <= 0)[0] + 1
    bands = d.stop_bands(p)
    for tm in U.t_max[p - 1, drop]:
        a, b = bands[:, 0], bands[:, 1]
        assert np.any((tm >= a * (1 - 1e-9)) & (tm <= b + 8 * (b - a)))


@pytest.mark.parametrize("p", [1, 2, 3])
def test_usable_kh_pollution_limit(p):
    # far in the pollution regime (L/h = 1e7) the phase term alone sets the limit:
    # c_p t^(2p+1) r / sqrt(3) = tau  [A04 constant, RMS of a linear phase drift]
    tau = 1e-3
    U = d.usable_kh(tau, 12)
    expect = (np.sqrt(3) * tau / (ainsworth_c(p) * 1e7)) ** (1 / (2 * p + 1))
    assert abs(U.t_max[p - 1, -1] / expect - 1) < 1e-2


@pytest.mark.parametrize("p", range(1, 7))
def test_max_kh_is_interp(p):
    # max_kh is linear interpolation in ln r, clipped to [1, 1e7]: same as np.interp,
    # except on the segments where the row jumps down (there: the segment's lower end)
    U = d.usable_kh(1e-2, 6)
    _, step = d._segments(U.t_max[p - 1])
    at_grid = U.max_kh(p, np.exp(U.log_r))
    assert np.allclose(at_grid[step != 0], U.t_max[p - 1][step != 0], rtol=1e-12, atol=0)
    assert np.all(at_grid <= U.t_max[p - 1] * (1 + 1e-12))
    x = np.geomspace(0.1, 1e9, 5000)
    ref = np.interp(np.log(np.clip(x, 1.0, 1e7)), U.log_r, U.t_max[p - 1])
    seg = np.clip(np.searchsorted(U.log_r, np.log(np.clip(x, 1.0, 1e7)), "right") - 1, 0,
                  len(step) - 1)
    smooth = step[seg] != 0
    assert np.allclose(U.max_kh(p, x)[smooth], ref[smooth], rtol=1e-13, atol=0)
    assert np.all(U.max_kh(p, x) <= ref * (1 + 1e-13))


def test_segments_jumps_as_a_median_of_seven_gives_them():
    # the jump test takes the median of 7 drops as the 4th smallest (no np.median):
    # the same segments as np.median's, on the tables' rows and on rows with NaN
    def reference(row):
        drop = np.append(row[:-1] - row[1:], 0.0)
        window = np.lib.stride_tricks.sliding_window_view(np.pad(drop, 3, mode="edge"), 7)
        jump = drop > 2.0 * np.median(window, axis=1) + 1e-12 * row
        base, step = row.copy(), -drop
        base[jump] = row[np.flatnonzero(jump) + 1]
        step[jump] = 0.0
        return base, step

    U = d.usable_kh(1e-2, 12)
    rng = np.random.default_rng(5)
    rows = list(U.t_max) + [np.sort(rng.uniform(0, 3, 40))[::-1].copy() for _ in range(5)]
    holed = rows[-1].copy()
    holed[[4, 17]] = np.nan
    rows.append(holed)
    for row in rows:
        got, want = d._segments(row), reference(row)
        for g, w in zip(got, want):
            assert np.array_equal(g, w, equal_nan=True)
    assert any((reference(r)[1] == 0).any() for r in U.t_max)  # jumps are exercised


def _first_crossing(p: int, tau: float, r: float) -> float:
    """The largest kh whose predicted error stays <= tau below it, found directly: a dense
    scan of kh (1e-3 relative steps, plus points across every stop band) and brentq."""
    t = np.union1d(np.geomspace(1e-3, 40.0, 14000), d._gap_samples(p, 1e-3, 40.0))
    over = d.predicted_error(t, p, t * r) > tau
    i = int(np.argmax(over))
    return brentq(lambda x: float(d.predicted_error(x, p, x * r)) - tau, t[i - 1], t[i],
                  xtol=1e-12)


@pytest.mark.parametrize("p", [4, 6, 8, 10, 12])
def test_max_kh_never_above_the_first_crossing_across_jumps(p):
    # where the usable kh jumps down between grid points (a stop band meets the target),
    # a straight line between the grid values would be optimistic just past the jump;
    # the table must stay at or below the directly computed limit everywhere
    tau = 1e-2
    U = d.usable_kh(tau, 12)
    _, step = d._segments(U.t_max[p - 1])
    jumps = np.flatnonzero(step[:-1] == 0)
    assert len(jumps), "this order has a jump at 1 % (seen for p = 4..12)"
    u = np.linspace(0.05, 0.95, 7)
    for i in jumps[:3]:
        r = np.exp(U.log_r[i] + u * (U.log_r[i + 1] - U.log_r[i]))
        exact = np.array([_first_crossing(p, tau, x) for x in r])
        got = U.max_kh(p, r)
        assert np.all(got <= exact * (1 + 1e-6)), (p, i)
        assert np.all(got >= exact * (1 - 0.1))  # conservative by at most the jump


def test_max_kh_clipping_and_shape():
    U = d.usable_kh(1e-2, 6)
    assert np.isclose(U.max_kh(2, 0.5), U.t_max[1, 0], rtol=1e-14)  # ratios < 1 count as 1
    assert np.isclose(U.max_kh(2, 1e9), U.t_max[1, -1], rtol=1e-14)  # ratios > r_max count as r_max
    assert U.max_kh(3, np.ones((2, 3))).shape == (2, 3)


@pytest.mark.parametrize("i", [10, 150, 300], ids=lambda i: f"r{i}")
@pytest.mark.parametrize("p", [1, 3, 6])
def test_max_kh_between_grid_points(p, i):
    # interpolated values stay within 1e-4 of the first crossing computed directly
    tau = 1e-2
    U = d.usable_kh(tau, 6)
    r = float(np.exp(0.5 * (U.log_r[i] + U.log_r[i + 1])))
    lo, hi = U.t_max[p - 1, i + 1] * 0.999, U.t_max[p - 1, i] * 1.001  # t_max is non-increasing
    exact = brentq(lambda t: float(d.predicted_error(t, p, t * r)) - tau, lo, hi)
    assert abs(float(U.max_kh(p, r)) / exact - 1) < 1e-4


@pytest.mark.parametrize("p", [1, 2, 4, 8])
def test_max_size_consistent(p):
    tau = 1e-2
    U = d.usable_kh(tau, 8)
    k = 2 * np.pi * np.array([50.0, 200.0, 1000.0, 4000.0]) / 343.0  # 50 Hz..4 kHz in air
    L = np.array([0.5, 3.0, 20.0])[:, None]
    h = U.max_size(p, k, L)
    assert h.shape == (3, 4)
    assert np.all(h <= L)
    kh = U.max_kh(p, L / h)
    assert np.all(np.isclose(k * h, kh, rtol=1e-4) | np.isclose(h, L))
    assert np.all(d.predicted_error(k * h, p, k * L) <= tau * (1 + 1e-3))
    assert np.all(np.diff(h, axis=1) <= 0)  # higher frequency, smaller elements


def test_max_size_one_element():
    U = d.usable_kh(1e-2, 4)
    assert float(U.max_size(3, 1e-3, 1.0)) == 1.0  # kL below t_max(1): one element spans L


@pytest.mark.parametrize("p", [1, 2])
def test_max_size_beyond_grid(p):
    # kL ten times u(r_max): extrapolated in log-log, and still meets the target
    U = d.usable_kh(1e-2, 4)
    kL = 10.0 * np.exp(U.log_r[-1]) * U.t_max[p - 1, -1]
    h = float(U.max_size(p, kL, 1.0))
    assert 1.0 / h > 1e7
    assert abs(float(d.predicted_error(kL * h, p, kL)) / 1e-2 - 1) < 0.02


def test_u_jumps_at_large_target():
    # the case test_max_size_jump exercises does occur
    U = d.usable_kh(0.3, 4)
    assert np.any(np.diff(U.log_r[None, :] + np.log(U.t_max), axis=1) <= 0)


@pytest.mark.parametrize("p", range(1, 5))
def test_max_size_jump(p):
    # where u(r) is not monotone, max_size returns the smallest r whose kh meets the target
    U = d.usable_kh(0.3, 4)
    r = np.exp(U.log_r)
    u = r * U.t_max[p - 1]
    kL = np.geomspace(u[0] * 1.01, u[-1] * 0.99, 50)
    h = U.max_size(p, kL, 1.0)
    assert np.all(d.predicted_error(kL * h, p, kL) <= 0.3 * (1 + 1e-3))
    for x, hx in zip(kL, h):  # no coarser grid ratio already reaches kL
        assert np.all(u[r < 0.99 / hx] < x)


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan])
def test_max_kh_rejects_bad_ratio(bad):
    with pytest.raises(SettingsError):
        d.usable_kh(1e-2, 4).max_kh(1, np.array([1.0, bad]))


@pytest.mark.parametrize(
    "call",
    [lambda: d.usable_kh(1e-2, 4).max_kh(5, 1.0), lambda: d.usable_kh(0.9), lambda: d.usable_kh(1e-5),
     lambda: d.usable_kh(1e-2, 17), lambda: d.cos_kh(-1.0, 2), lambda: d.cos_kh(1.0, 0),
     lambda: d.cos_kh(1.0, d.P_MAX + 1), lambda: d.cos_kh(1.0, 1.5), lambda: d.cos_kh(1.0, True),
     lambda: d.usable_kh(1e-2, 4).max_size(1, 0.0, 1.0), lambda: d.phase_rms_error(1.0, 1, -1.0)],
    ids=["order-above-pmax", "target-high", "target-low", "pmax-17", "negative-kh", "p0", "p-too-high",
         "p-float", "p-bool", "k-zero", "kL-negative"])
def test_invalid_arguments(call):
    with pytest.raises(SettingsError):
        call()


def test_elements_per_wavelength():
    assert np.allclose(d.elements_per_wavelength(np.array([2 * np.pi / 10, np.pi])), [10.0, 2.0])


# -------------------------------------------------------------- rules of thumb
@pytest.mark.parametrize(
    "p,epw,closed", [(1, 6, r_p1), (1, 10, r_p1), (2, 5, r_p2)], ids=["p1-6epw", "p1-10epw", "p2-lambda5"])
def test_rule_of_thumb(p, epw, closed):
    # Rules of thumb (common practice, no source): "6 / 10 linear elements per
    # wavelength", "lambda/5 quadratic".  What they give, against the closed forms [IB95]
    # and the leading term c_p t^(2p) [A04]; the figures are those of docs/model.md.
    t = 2 * np.pi / epw
    exact = abs(np.arccos(closed(t)) - t) / t
    got = float(d.phase_error(t, p))
    assert abs(got - exact) < 1e-12
    assert abs(got / (ainsworth_c(p) * t ** (2 * p)) - 1) < 0.15  # ~ t^2/24 for p = 1


def _doc_rows():
    """Rows of the rule-of-thumb table in docs/model.md, keyed by (p, EPW).

    Columns: p | EPW | kh | phase error | best approx. | predicted L = 1, 10, 100 wavelengths.
    """
    rows = {}
    for line in DOCS.read_text().splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 8 and cells[0].isdigit() and cells[1].isdigit():
            rows[(int(cells[0]), int(cells[1]))] = cells[3:]
    return rows


@pytest.mark.parametrize("p,epw", [(1, 6), (1, 10), (2, 5), (2, 6), (3, 4)])
def test_doc_table(p, epw):
    # docs/model.md cannot rot: its table is recomputed here
    t = 2 * np.pi / epw
    values = [d.phase_error(t, p), d.best_approximation_error(t, p)]
    values += [d.predicted_error(t, p, 2 * np.pi * n) for n in (1, 10, 100)]
    assert [f"{100 * float(v):.2f} %" for v in values] == _doc_rows()[(p, epw)]


@pytest.mark.parametrize("target,n", [(0.01, 1), (0.01, 10), (0.01, 100), (0.1, 1), (0.1, 10), (0.1, 100)])
def test_doc_epw_table(target, n):
    # second table of docs/model.md: elements per wavelength from max_size
    U = d.usable_kh(target, 6)
    got = [f"{2 * np.pi / float(U.max_size(p, 1.0, 2 * np.pi * n)):.1f}" for p in range(1, 7)]
    want = None
    for line in DOCS.read_text().splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 8 and cells[0] == f"{100 * target:g} %" and cells[1] == str(n):
            want = cells[2:]
    assert got == want


def test_usable_kh_disk_cache_returns_the_computed_table(tmp_path, monkeypatch):
    # the cached table is the computed one bit for bit; a damaged file is recomputed
    monkeypatch.setenv("MESHCHECK_CACHE_DIR", str(tmp_path))
    d._build_usable.cache_clear()
    try:
        fresh = d._compute_usable(0.02, 4)
        first = d.usable_kh(0.02, 4)            # computed and stored
        files = list(tmp_path.glob("usable_kh_*_p4_*.npy"))
        assert len(files) == 1
        d._build_usable.cache_clear()
        again = d.usable_kh(0.02, 4)            # read back from the file
        for tab in (first, again):
            np.testing.assert_array_equal(tab.t_max, fresh.t_max)
            np.testing.assert_array_equal(tab.log_r, fresh.log_r)
        files[0].write_bytes(b"not a table")
        d._build_usable.cache_clear()
        np.testing.assert_array_equal(d.usable_kh(0.02, 4).t_max, fresh.t_max)
        monkeypatch.setenv("MESHCHECK_CACHE_DIR", "off")
        d._build_usable.cache_clear()
        assert d._cache_file(0.02, 4) is None
        np.testing.assert_array_equal(d.usable_kh(0.02, 4).t_max, fresh.t_max)
    finally:
        d._build_usable.cache_clear()
