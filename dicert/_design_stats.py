"""Statistics for the design-conformance checks: exact binomial tails, chi-square tail, the serial
G-test on settings symbols, the weighted CHSH estimate.

Part of :mod:`dicert.design` (import the names from there).
"""

from __future__ import annotations

import math

import numpy as np

from dicert.errors import ParameterError


#: Smallest expected count of a cell of the serial-independence table after pooling.
MIN_EXPECTED = 50.0


# --------------------------------------------------------------------------- statistics


def _lpmf(j: int, n: int, p: float) -> float:
    from dicert.estimate import _log_binom_pmf

    return _log_binom_pmf(j, n, p)


def _binom_two_sided_point(k: int, n: int, p: float) -> float:
    """Exact two-sided ("minlike") binomial p-value, free of scipy (``dicert inspect`` stays
    fast); the same definition as ``scipy.stats.binomtest`` (tests compare the two)."""
    from dicert.estimate import _log_tail_sum

    if p <= 0.0:
        return 1.0 if k == 0 else 0.0
    if p >= 1.0:
        return 1.0 if k == n else 0.0
    if k == p * n:
        return 1.0
    target = _lpmf(k, n, p) + math.log1p(1e-7)  # scipy's relative tolerance
    if k < p * n:
        lo, hi = int(math.ceil(p * n)), n
        if _lpmf(hi, n, p) > target:
            other = -math.inf
        else:
            while lo < hi:  # smallest j in [ceil(np), n] with pmf(j) <= pmf(k)
                mid = (lo + hi) // 2
                if _lpmf(mid, n, p) <= target:
                    hi = mid
                else:
                    lo = mid + 1
            other = _log_tail_sum(lo, n, p, +1)
        near = _log_tail_sum(k, n, p, -1)
    else:
        lo, hi = 0, int(math.floor(p * n))
        if _lpmf(lo, n, p) > target:
            other = -math.inf
        else:
            while lo < hi:  # largest j in [0, floor(np)] with pmf(j) <= pmf(k)
                mid = (lo + hi + 1) // 2
                if _lpmf(mid, n, p) <= target:
                    lo = mid
                else:
                    hi = mid - 1
            other = _log_tail_sum(lo, n, p, -1)
        near = _log_tail_sum(k, n, p, +1)
    total = math.exp(near) + (math.exp(other) if other > -math.inf else 0.0)
    return min(1.0, total)


def binomial_two_sided(k: int, n: int, lo: float, hi: float | None = None) -> float:
    """Two-sided exact binomial p-value of k successes in n under p in [lo, hi].

    The "minlike" two-sided p-value of ``scipy.stats.binomtest`` (the total probability of
    the outcomes no more likely than k), computed without scipy. For an interval (a
    composite null) the largest p-value over the interval is taken, evaluated at the point of
    the interval nearest k/n and at both ends.
    """
    hi = lo if hi is None else hi
    if n <= 0:
        return 1.0
    best = 0.0
    for p in {min(max(k / n, lo), hi), lo, hi}:
        best = max(best, _binom_two_sided_point(int(k), int(n), float(p)))
    return min(1.0, best)


def chi2_sf(x: float, dof: int) -> float:
    """Survival function of the chi-square distribution with an integer number of degrees of
    freedom (closed forms of the regularised upper incomplete gamma function Q(dof/2, x/2);
    scipy-free, compared with ``scipy.stats.chi2.sf`` in the tests)."""
    if x <= 0:
        return 1.0
    h = x / 2.0
    if dof % 2 == 0:
        terms = [-h + i * math.log(h) - math.lgamma(i + 1) for i in range(dof // 2)]
        base = 0.0
    else:
        terms = [-h + (i + 0.5) * math.log(h) - math.lgamma(i + 1.5)
                 for i in range((dof - 1) // 2)]
        base = math.erfc(math.sqrt(h))
    return float(min(1.0, base + sum(math.exp(t) for t in terms)))


def serial_g_test(pair_counts: np.ndarray, min_expected: float = MIN_EXPECTED
                  ) -> tuple[float, int, float, str]:
    """G-test of independence of consecutive symbols from their transition counts.

    ``pair_counts[s, s']`` counts the overlapping pairs (symbol i, symbol i+1). Symbols are
    pooled until every expected cell holds at least ``min_expected`` pairs. Returns
    ``(G, dof, p_value, note)``; dof 0 (fewer than two groups) means not applicable (p = 1).
    """
    pc = np.asarray(pair_counts, dtype=np.float64)
    n = float(pc.sum())
    if n <= 0:
        return 0.0, 0, 1.0, "no consecutive pairs"
    occ = pc.sum(axis=1) + pc.sum(axis=0)  # occurrences (each symbol counted as prev and cur)
    need = math.sqrt(min_expected * n) * 2.0
    order = np.argsort(occ)[::-1]
    keep = [int(s) for s in order if occ[s] >= need]
    rest = [int(s) for s in order if 0 < occ[s] < need]
    groups = [[s] for s in keep]
    if rest:
        if sum(occ[s] for s in rest) >= need or not groups:
            groups.append(rest)
        else:
            groups[-1] = groups[-1] + rest  # too few to stand alone: join the smallest kept
    k = len(groups)
    if k < 2:
        return 0.0, 0, 1.0, "fewer than two distinct settings symbols with enough occurrences"
    tab = np.array([[pc[np.ix_(g, h)].sum() for h in groups] for g in groups])
    rows = tab.sum(axis=1, keepdims=True)
    cols = tab.sum(axis=0, keepdims=True)
    exp = rows * cols / n
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(tab > 0, tab * np.log(tab / exp), 0.0)
    g = float(2.0 * terms.sum())
    dof = (k - 1) ** 2
    p = chi2_sf(g, dof)
    note = f"{k} symbol groups ({dof} degrees of freedom)"
    return g, dof, p, note


def settings_symbol_counts(counts: np.ndarray) -> np.ndarray:
    """Counts of the settings symbol s = 4 t + 2 x + y from a [t, x, y, a, b] table (or a
    stack of them), shape (..., 8)."""
    c = np.asarray(counts, dtype=np.int64)
    if c.shape[-5:] == (2, 2, 2, 2, 2):
        c = c.sum(axis=(-1, -2))
        return c.reshape(c.shape[:-3] + (8,))
    if c.shape[-1] == 8:
        return c
    raise ParameterError(f"expected counts [t,x,y,a,b] or settings-symbol counts, got shape "
                         f"{c.shape}")
