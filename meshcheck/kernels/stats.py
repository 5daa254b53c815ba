"""Compiled summary of one quality metric (``quality.metric_stats``): number of finite
values, min, 5th percentile, median, 95th percentile, max and the ids of the worst
cells, by radix selection over the values' bits instead of a copy and partitions.

Every finite float64 maps to an order-preserving uint64 key (sign bit set for x >= 0,
all bits flipped for x < 0; -0.0 takes the key of +0.0, so the two zeros are equal as
in numpy's comparisons); NaN and +-inf are skipped (``np.isfinite``).

* pass 1 (:func:`histogram`): the keys' histogram over about ``nb1`` bins, every binade
  (top 12 bits: sign and exponent) getting a power-of-two share of the bins in
  proportion to its count in a strided sample of ``sample`` values (so a bin holds
  about n / nb1 values whatever the spread of the values over binades); the bins of
  the needed ranks (min, the neighbours of the three quantiles, max, the k-th worst)
  follow from the cumulative counts;
* pass 2 (:func:`refine_pass`): the keys of those few bins are gathered and sorted, and
  the cells of the bins holding the worst values gathered with their ids; a bin of more
  than ``gather_max`` values is refined instead by a histogram of its own key range
  (``nb2`` sub-bins, with each sub-bin's smallest and largest key, so that a sub-bin of
  one key value, e.g. many equal values, is resolved at once), which takes one more
  pass per level;
* only when the worst values' bins hold more than ``worst_max`` values (many cells tied
  at the extreme), one more pass (:func:`worst_cut`) collects the cells beyond the cut.

The order statistics are interpolated in numpy with the operations of ``np.percentile``
(method "linear") and ``np.mean``, so the values are bit-identical to the reference (a
zero may come out as 0.0 where numpy gives -0.0).  The passes run compiled without the
GIL; the few steps between them are numpy on arrays of at most ``nb1`` values.
"""
from __future__ import annotations

import numpy as np

from . import njit
from ..arrays import sorted_distinct

__all__ = ["metric_summary", "summary_of_rounded", "TooManyTies", "histogram",
           "refine_pass", "worst_cut"]

_SIGN = np.uint64(0x8000000000000000)
_EXP = np.uint64(0x7FF0000000000000)
_M52 = np.uint64((1 << 52) - 1)
_U0 = np.uint64(0)
_U52 = np.uint64(52)
_UMAX = np.uint64(0xFFFFFFFFFFFFFFFF)

#: default number of first-level bins, of sub-bins of a refined bin, largest bin gathered
#: and sorted without refinement, largest set of extreme values gathered for the worst
#: cells, values sampled (strided) to fit the first-level bins to the binades
NB1 = 1 << 16
NB2 = 1 << 12
GATHER_MAX = 1 << 14
WORST_MAX = 1 << 14
SAMPLE = 1 << 16


@njit
def _key(b):
    """Order-preserving uint64 key of the bits ``b`` of a finite float64 (-0.0 as +0.0)."""
    if b == _SIGN:
        b = _U0
    # all bits flipped for a negative value, the sign bit only otherwise (no branch)
    return b ^ (np.uint64(np.int64(b) >> np.int64(63)) | _SIGN)


@njit
def _finite(b):
    return (b & _EXP) != _EXP


@njit
def _wide32(b):
    """Bits (uint64) of the float64 equal to the float32 with bits ``b`` (uint32): the
    exact widening, subnormals normalised (NaN and inf keep an all-ones exponent)."""
    s = np.uint64(b >> np.uint32(31)) << np.uint64(63)
    e = np.int64((b >> np.uint32(23)) & np.uint32(0xFF))
    m = np.uint64(b & np.uint32(0x7FFFFF))
    if e == 0xFF:
        return s | _EXP | (m << np.uint64(29))
    if e == 0:
        if m == _U0:
            return s
        ex = np.int64(1023 - 126)  # m * 2**-149 = (m / 2**23) * 2**-126
        while (m & np.uint64(0x800000)) == _U0:
            m = m << np.uint64(1)
            ex -= 1
        return s | (np.uint64(ex) << _U52) | ((m & np.uint64(0x7FFFFF)) << np.uint64(29))
    return s | (np.uint64(e + (1023 - 127)) << _U52) | (m << np.uint64(29))


@njit
def _get(bits, i):
    """Bits (uint64) of value i as a float64: ``bits`` is the bits of float64 values
    (uint64) or of float32 values (uint32, widened exactly by :func:`_wide32`)."""
    if bits.itemsize == 8:
        return np.uint64(bits[i])
    return _wide32(np.uint32(bits[i]))


@njit
def _sample(bits, step, ehist):
    """Count of every top-12-bit key prefix (binade) among the finite values
    bits[::step] ((n,) uint64, the float64 values' bits), added to ehist ((4096,) int64);
    returns the number of finite values seen."""
    n = 0
    for i in range(0, bits.size, step):
        b = _get(bits, i)
        if _finite(b):
            ehist[np.int64(_key(b) >> _U52)] += 1
            n += 1
    return n


@njit
def _layout(ehist, n, nb1, tab):
    """First-level bins: binade e gets 2**m bins, 2**m about
    ehist[e] * nb1 / n (at least 1, at most 2**52), the first of them numbered
    tab[e] >> 8; bin of key k = (tab[e] >> 8) + ((k & M52) >> (tab[e] & 255)) with
    e = k >> 52.  Returns the number of bins."""
    tot = 0
    for e in range(4096):
        c = ehist[e]
        m = 0
        if c > 0:
            while m < 52 and n * (np.int64(2) << m) <= c * nb1:
                m += 1
        tab[e] = (tot << 8) | (52 - m)
        tot += np.int64(1) << m
    return tot


@njit
def _bin1(k, tab):
    t = tab[np.int64(k >> _U52)]
    return (t >> 8) + np.int64((k & _M52) >> np.uint64(t & 255))


@njit
def _hist1(bits, tab, hist):
    """First-level histogram of the finite keys of ``bits``; returns their number."""
    n = 0
    for i in range(bits.size):
        b = _get(bits, i)
        if not _finite(b):
            continue
        n += 1
        hist[_bin1(_key(b), tab)] += 1
    return n


@njit
def histogram(bits, nb1, sample, proto):
    """Pass 1 over ``bits`` ((n_all,) uint64, the bits of float64 values, or uint32 of
    float32 values, read as their float64 widening, see :func:`_get`): a layout of
    about ``nb1`` first-level bins fitted to the binades of about ``sample`` values
    (strided), and the histogram of the finite keys over it, of the dtype of ``proto``
    (int32 when n_all < 2**31: half the cache of int64).  Returns (number of finite
    values, tab, hist); see :func:`_layout` for tab."""
    ehist = np.zeros(4096, np.int64)
    ns = _sample(bits, max(1, bits.size // sample), ehist)
    tab = np.empty(4096, np.int64)
    tot = _layout(ehist, max(ns, 1), nb1, tab)
    hist = np.zeros(tot, proto.dtype)
    n = _hist1(bits, tab, hist)
    return n, tab, hist


@njit
def _flush(hist, hmin, hmax, j, s, c, kmin, kmax):
    hist[j, s] += c
    hmin[j, s] = min(hmin[j, s], kmin)
    hmax[j, s] = max(hmax[j, s], kmax)


@njit
def refine_pass(bits, tab, ivb, n_iv, iv_lo, iv_hi, iv_sh, iv_mode, iv_off, fill,
                buf, bufid, hist, hmin, hmax, wmode, wcut, wkeys, widx):
    """Pass 2 and later over ``bits``: the keys of the intervals [iv_lo[j], iv_hi[j]]
    (uint64; ivb (int8, one per first-level bin): the interval in the bin, -1 none, -2
    several) go to ``buf`` from iv_off[j] when iv_mode[j] is 1 (and their ids to
    ``bufid`` unless it is empty), else to row j of the histogram over sub-bins
    (k - iv_lo[j]) >> iv_sh[j] (count, smallest and largest key per sub-bin); with
    wmode 1 (2) the keys <= (>=) wcut go to wkeys with their ids to widx.  Returns the
    number of worst candidates gathered."""
    with_ids = bufid.size > 0
    nw = 0
    # the current run of keys in one sub-bin, kept in registers (many equal values would
    # otherwise chain every update through memory)
    rj = -1
    rs = 0
    rc = 0
    rmin = _UMAX
    rmax = _U0
    for i in range(bits.size):
        b = _get(bits, i)
        if not _finite(b):
            continue
        k = _key(b)
        if wmode == 1:
            if k <= wcut:
                wkeys[nw] = k
                widx[nw] = i
                nw += 1
        elif wmode == 2:
            if k >= wcut:
                wkeys[nw] = k
                widx[nw] = i
                nw += 1
        jv = ivb[_bin1(k, tab)]
        if jv == -1:
            continue
        j = np.int64(jv)
        if jv == -2:  # several intervals in the bin (refined levels): find the one
            j = -1
            for jj in range(n_iv):
                if k >= iv_lo[jj] and k <= iv_hi[jj]:
                    j = jj
                    break
            if j < 0:
                continue
        elif k < iv_lo[j] or k > iv_hi[j]:
            continue
        if iv_mode[j] == 1:
            buf[iv_off[j] + fill[j]] = k
            if with_ids:
                bufid[iv_off[j] + fill[j]] = i
            fill[j] += 1
            continue
        s = np.int64((k - iv_lo[j]) >> iv_sh[j])
        if j == rj and s == rs:
            rc += 1
            rmin = min(rmin, k)
            rmax = max(rmax, k)
        else:
            if rj >= 0:
                _flush(hist, hmin, hmax, rj, rs, rc, rmin, rmax)
            rj, rs, rc, rmin, rmax = j, s, 1, k, k
    if rj >= 0:
        _flush(hist, hmin, hmax, rj, rs, rc, rmin, rmax)
    return nw


@njit
def worst_cut(bits, cut, k, low):
    """Pass over ``bits`` given the key ``cut`` of the k-th worst value: the keys and ids
    of the values strictly worse (below it when ``low``, else above; fewer than k), and
    the first k ids (ascending) of the values equal to it.  Returns (keys (m,) uint64,
    ids (m,) int64, tied ids (<= k,) int64)."""
    sk = np.empty(k, np.uint64)
    si = np.empty(k, np.int64)
    ti = np.empty(k, np.int64)
    ns = 0
    nt = 0
    for i in range(bits.size):
        b = _get(bits, i)
        if not _finite(b):
            continue
        key = _key(b)
        # without branches on the key: fewer than k keys are worse than the cut, so
        # slot ns < k is always free, and ties are kept until k are found
        sk[ns] = key
        si[ns] = i
        ns += (key < cut) if low else (key > cut)
        if nt < k:
            ti[nt] = i
            nt += key == cut
    return sk[:ns], si[:ns], ti[:nt]


def _shift_for(span: int, nb2: int) -> int:
    """Smallest shift s with span >> s < nb2."""
    s = 0
    while (span >> s) >= nb2:
        s += 1
    return s


def _bin1_of(k: int, tab: np.ndarray) -> int:
    """First-level bin of the key k (Python int), as :func:`_bin1`."""
    t = int(tab[k >> 52])
    return (t >> 8) + ((k & ((1 << 52) - 1)) >> (t & 255))


def _order(keys: np.ndarray, ids: np.ndarray, low: bool) -> np.ndarray:
    """ids ordered by key (ascending when ``low``, else descending), ties by id."""
    return ids[np.lexsort((ids, keys if low else ~keys))]


def _select(bits, n, tab, hist1, ranks, k, low, nb2, gather_max, worst_max, info,
            tie_max=None):
    """Keys ((m,) uint64) at the sorted distinct ``ranks`` ((m,) int64, 0 <= rank < n)
    of the ``n`` finite values of ``bits`` (first-level ``tab`` and ``hist1`` from
    :func:`histogram`), the ids ((k,) int64, k <= n) of the k worst values, and, when
    ``tie_max`` is given, the ties at every rank: a list of (number of values below the
    rank's value, ids (ascending) of the values equal to it); :class:`TooManyTies` when a
    rank's value is shared by more than ``tie_max`` values.

    The ties come with the pass that resolves a rank: its interval's keys are gathered
    with their ids; a rank resolved by a sub-bin of one key value takes one more pass
    gathering that key's ids."""
    ties = tie_max is not None
    nt = len(ranks)
    tkey = [0] * nt
    tied: list = [None] * nt
    cum1 = np.cumsum(hist1, dtype=np.int64)
    base = tab >> 8
    tb = np.searchsorted(cum1, ranks, side="right")   # first-level bin of each rank

    def bin_range(b: int) -> tuple[int, int]:
        e = int(np.searchsorted(base, b, side="right")) - 1
        sh = int(tab[e]) & 255
        lo = (e << 52) | ((b - int(base[e])) << sh)
        return lo, lo + (1 << sh) - 1

    # intervals [lo, hi] of keys still to look at: (lo, hi, count, gather?, shift)
    ivs = []
    t_iv = [-1] * nt
    t_r = [0] * nt
    for t in range(nt):
        b = int(tb[t])
        c = int(hist1[b])
        if not ivs or ivs[-1][5] != b:
            lo, hi = bin_range(b)
            ivs.append((lo, hi, c, c <= gather_max, _shift_for(hi - lo, nb2), b))
        t_iv[t] = len(ivs) - 1
        t_r[t] = int(ranks[t]) - (int(cum1[b]) - c)
    ivs = [iv[:5] for iv in ivs]
    # the worst cells: gathered with the first pass when their bins are few values
    wmode, wcut, wcount = 0, 0, 0
    if k:
        wrank = k - 1 if low else n - k
        bw = int(np.searchsorted(cum1, wrank, side="right"))
        lo, hi = bin_range(bw)
        before = int(cum1[bw]) - int(hist1[bw])
        if low and int(cum1[bw]) <= worst_max:
            wmode, wcut, wcount = 1, hi, int(cum1[bw])
        elif not low and n - before <= worst_max:
            wmode, wcut, wcount = 2, lo, n - before
    worst = np.empty(0, np.int64)
    passes = 1
    ivb = np.full(hist1.size, -1, np.int8)       # interval in a first-level bin, -2: several
    while ivs or wmode:
        m = len(ivs)
        ivb[:] = -1
        off = np.zeros(max(m, 1), np.int64)
        g = 0
        for j, (lo, hi, c, gather, _) in enumerate(ivs):
            b1 = _bin1_of(lo, tab)
            ivb[b1] = j if ivb[b1] == -1 else -2
            if gather:
                off[j] = g
                g += c
        iv_lo = np.array([iv[0] for iv in ivs] or [0], np.uint64)
        iv_hi = np.array([iv[1] for iv in ivs] or [0], np.uint64)
        iv_sh = np.array([iv[4] for iv in ivs] or [0], np.uint64)
        iv_mode = np.array([int(iv[3]) for iv in ivs] or [0], np.int64)
        buf = np.empty(g, np.uint64)
        bufid = np.empty(g if ties else 0, np.int64)
        fill = np.zeros(max(m, 1), np.int64)
        rows = sum(1 for iv in ivs if not iv[3])
        hist = np.zeros((max(m, 1), nb2 if rows else 1), np.int64)
        hmin = np.full(hist.shape, _UMAX, np.uint64)
        hmax = np.zeros(hist.shape, np.uint64)
        wkeys = np.empty(wcount, np.uint64)
        widx = np.empty(wcount, np.int64)
        nw = refine_pass(bits, tab, ivb, m, iv_lo, iv_hi, iv_sh, iv_mode, off, fill,
                         buf, bufid, hist, hmin, hmax, wmode, np.uint64(wcut), wkeys, widx)
        passes += 1
        if wmode:
            worst = _order(wkeys[:nw], widx[:nw], low)[:k]
            wmode = 0
        # resolve the ranks of this pass, build the next intervals
        nxt = []
        last = None
        for t in range(nt):
            j = t_iv[t]
            if j < 0:
                continue
            lo, hi, c, gather, _ = ivs[j]
            if gather:
                seg = slice(off[j], off[j] + c)
                if last != ("g", j):
                    if ties:  # keys ascending, ids ascending among equal keys
                        o = np.argsort(buf[seg], kind="stable")
                        buf[seg], bufid[seg] = buf[seg][o], bufid[seg][o]
                    else:
                        buf[seg].sort()
                    last = ("g", j)
                key = buf[off[j] + t_r[t]]
                tkey[t] = int(key)
                if ties:
                    a = int(np.searchsorted(buf[seg], key, side="left"))
                    b = int(np.searchsorted(buf[seg], key, side="right"))
                    tied[t] = (int(ranks[t]) - t_r[t] + a, bufid[seg][a:b].copy())
                t_iv[t] = -1
                continue
            cum = np.cumsum(hist[j])
            s = int(np.searchsorted(cum, t_r[t], side="right"))
            before = int(cum[s]) - int(hist[j, s])
            lo, hi, c = int(hmin[j, s]), int(hmax[j, s]), int(hist[j, s])
            if lo == hi and not ties:             # one key value
                tkey[t] = lo
                t_iv[t] = -1
                continue
            if lo == hi and c > tie_max:
                raise TooManyTies
            if last != ("r", j, s):
                gather = c <= gather_max or lo == hi   # one key: its ids gathered
                nxt.append((lo, hi, c, gather, _shift_for(hi - lo, nb2)))
                last = ("r", j, s)
            t_iv[t] = len(nxt) - 1
            t_r[t] -= before
        ivs = nxt
    if k and not worst.size:                      # many values tied at the worst: cut
        cut = tkey[int(np.searchsorted(ranks, wrank))]
        sk, si, ti = worst_cut(bits, np.uint64(cut), k, low)
        worst = np.concatenate([_order(sk, si, low), ti[:k - len(si)]])
        passes += 1
    if info is not None:
        info["passes"] = passes
    keys = np.array(tkey, np.uint64)
    worst = worst.astype(np.int64, copy=False)
    return (keys, worst, tied) if ties else (keys, worst)


def _values(keys: np.ndarray) -> np.ndarray:
    """float64 values of uint64 keys (the zero key gives +0.0)."""
    keys = np.asarray(keys, np.uint64)
    bits = np.where(keys & _SIGN, keys ^ _SIGN, ~keys)
    return bits.view(np.float64)


def metric_summary(values: np.ndarray, bad: str, n_worst: int, *, nb1: int = NB1,
                   nb2: int = NB2, gather_max: int = GATHER_MAX, worst_max: int = WORST_MAX,
                   sample: int = SAMPLE, info: dict | None = None) -> dict | None:
    """``quality.metric_stats(values, bad, n_worst)`` by radix selection: for
    ``values`` ((n_cells,) float64, NaN / inf allowed) a dict with "cells" (number of
    finite values), "min", "p05", "median", "p95", "max" (floats equal to
    ``np.percentile(v, [5, 50, 95])``, ``np.median`` and min / max of the finite values
    v) and "worst" ((min(n_worst, cells),) int64 ids of the worst cells: ascending
    values for ``bad`` "low", descending otherwise, ties by id); None when no value is
    finite.  The keyword arguments tune the passes (module constants NB1, NB2,
    GATHER_MAX, WORST_MAX, SAMPLE; tests force the rare paths with small values);
    ``info``, when given, receives the number of passes over the values (2 for spread
    values).  Memory: about nb1 + 4096 int32 bins and a few small arrays, no copy of
    ``values`` (unless it is not contiguous)."""
    values = np.asarray(values)
    if values.dtype != np.float64 or values.ndim != 1:
        raise TypeError("metric_summary takes a 1D float64 array")
    if n_worst < 0:
        raise ValueError("n_worst must be >= 0")
    bits = np.ascontiguousarray(values).view(np.uint64)
    proto = np.empty(0, np.int32 if bits.size < 2**31 else np.int64)
    nb1 = min(nb1, max(1 << 10, bits.size // 8))  # no more bins than a few values each
    n, tab, hist1 = histogram(bits, nb1, sample, proto)
    if n == 0:
        return None
    plan = _Plan(n, n_worst, bad)
    keys, worst = _select(bits, n, tab, hist1, plan.ranks, plan.kk, bad == "low", nb2,
                          gather_max, worst_max, info)
    return plan.finish(dict(zip(plan.ranks.tolist(), _values(keys))), worst)


class _Plan:
    """The ranks a summary of n finite values needs (np.percentile's index arithmetic,
    method "linear", for the 5th, 50th and 95th percentiles; np.median's middle; min,
    max; the k-th worst) and the dict made from the values at those ranks."""

    def __init__(self, n: int, n_worst: int, bad: str):
        q = np.true_divide([5, 50, 95], 100)
        virtual = (n - 1) * q
        prev = np.floor(virtual)
        nxt = prev + 1
        above = virtual >= n - 1
        prev[above] = -1
        nxt[above] = -1
        self.prev = prev.astype(np.intp)
        self.nxt = nxt.astype(np.intp)
        self.gamma = np.asanyarray(virtual - self.prev, dtype=virtual.dtype)
        mid = n // 2
        self.med = [mid - 1, mid] if n % 2 == 0 else [mid]
        self.n, self.kk, self.low = n, min(n_worst, n), bad == "low"
        ranks = [0, n - 1] + [int(r) % n for r in (*self.prev, *self.nxt)] + self.med
        if self.kk:
            ranks.append(self.kk_rank)
        self.ranks = sorted_distinct(np.asarray(ranks, np.int64))

    @property
    def kk_rank(self) -> int:
        """Rank of the k-th worst value."""
        return self.kk - 1 if self.low else self.n - self.kk

    def finish(self, at: dict, worst: np.ndarray) -> dict:
        """The summary from ``at`` (rank -> float64 value) and the worst ids."""
        n = self.n
        a = np.array([at[int(r) % n] for r in self.prev])
        b = np.array([at[int(r) % n] for r in self.nxt])
        diff_b_a = b - a
        p = np.add(a, diff_b_a * self.gamma)
        np.subtract(b, diff_b_a * (1 - self.gamma), out=p, where=self.gamma >= 0.5,
                    casting="unsafe", dtype=type(p.dtype))
        median = np.mean(np.array([at[r] for r in self.med]))
        return {"cells": n, "min": float(at[0]), "p05": float(p[0]),
                "median": float(median), "p95": float(p[2]), "max": float(at[n - 1]),
                "worst": worst}


class TooManyTies(Exception):
    """:func:`summary_of_rounded` would recompute more than its ``tie_max`` values."""


#: most cells :func:`summary_of_rounded` recomputes (ties at the needed ranks)
TIE_MAX = 1 << 16


def summary_of_rounded(w: np.ndarray, exact, bad: str, n_worst: int, *,
                       tie_max: int | None = None, nb1: int = NB1, nb2: int = NB2,
                       gather_max: int = GATHER_MAX, worst_max: int = WORST_MAX,
                       sample: int = SAMPLE, info: dict | None = None) -> dict | None:
    """:func:`metric_summary` of values x known only through a rounding w and a way to
    recompute a few of them, without the (n,) array of x.

    w : (n,) float32 or float64 with the same NaN and infinities as x and a monotone
        rounding of x (x_i < x_j => w_i <= w_j), e.g. the float32 values of x (read
        in place, widened value by value), or those widened to float64 with w = x
        where |x| is beyond a float32.
    exact : ids ((m,) int64, ascending) -> (m,) float64 their values of x.

    Rounding keeps the order, so the value of x at rank r is among the cells whose w
    equals w's value at rank r, at the place of r among them: those few cells are
    recomputed (and the candidates for the worst cells), and the dict is the one
    :func:`metric_summary` gives for x (bit for bit).  Raises :class:`TooManyTies` when
    more than ``tie_max`` (default :data:`TIE_MAX`) cells would be recomputed (e.g.
    identical cells).  The tied cells are gathered by the selection's own passes (two
    for spread values, as :func:`metric_summary`); the keyword arguments as there."""
    tie_max = TIE_MAX if tie_max is None else tie_max
    w = np.ascontiguousarray(w)
    if w.dtype not in (np.float32, np.float64) or w.ndim != 1:
        raise TypeError("summary_of_rounded takes a 1D float32 or float64 array")
    bits = w.view(np.uint32 if w.dtype == np.float32 else np.uint64)
    proto = np.empty(0, np.int32 if bits.size < 2**31 else np.int64)
    nb1 = min(nb1, max(1 << 10, bits.size // 8))
    n, tab, hist1 = histogram(bits, nb1, sample, proto)
    if n == 0:
        return None
    plan = _Plan(n, n_worst, bad)
    low = plan.low
    keys, worst_w, tied = _select(bits, n, tab, hist1, plan.ranks, plan.kk, low, nb2,
                                  gather_max, worst_max, info, tie_max)
    at_w = dict(zip(plan.ranks.tolist(), _values(keys)))
    vals = sorted_distinct(np.fromiter(at_w.values(), np.float64))
    # per value of w at a needed rank: the number of values below it, the ids equal to it
    below = np.zeros(len(vals), np.int64)
    equal = [np.zeros(0, np.int64)] * len(vals)
    for v, (nb, ids) in zip(at_w.values(), tied):
        j = int(np.searchsorted(vals, v))
        below[j], equal[j] = nb, ids
    # the worst candidates: the cells strictly worse than the k-th worst value of w
    # (fewer than k, all among w's k worst) and the cells tied with it
    cut = at_w[plan.kk_rank] if plan.kk else None
    worse = (worst_w[w[worst_w] < cut] if low else worst_w[w[worst_w] > cut]) \
        if plan.kk else np.zeros(0, np.int64)
    if sum(len(e) for e in equal) > tie_max - len(worse):
        raise TooManyTies
    ids = sorted_distinct(np.concatenate([np.concatenate(equal), worse]))
    x = np.asarray(exact(ids), np.float64)
    xw = w[ids]
    at = {}
    for r, v in at_w.items():
        j = int(np.searchsorted(vals, v))
        group = np.sort(x[xw == v])
        at[r] = group[r - int(below[j])]
    worst = np.zeros(0, np.int64)
    if plan.kk:
        cand = np.flatnonzero(((xw < cut) if low else (xw > cut)) | (xw == cut))
        xc = x[cand]
        ok = xc - xc == 0.0  # the finite ones (tied with a finite cut: all)
        cand, xc = ids[cand[ok]], xc[ok]
        worst = cand[np.lexsort((cand, xc if low else -xc))][:plan.kk]
    return plan.finish(at, worst.astype(np.int64, copy=False))
