"""CHSH estimation and finite-statistics bounds.

External checks: CHSH (Clauser, Horne, Shimony, Holt, PRL 23, 880 (1969)); Tsirelson bound
2 sqrt 2 (Cirel'son, Lett. Math. Phys. 4, 93 (1980)); singlet/Bell-state correlators
E = cos(2(alpha - beta)) for polariser angles (common practice); CHSH game P_win = 1/2 + S/8
(common practice); scipy.stats.binom and scipy.stats.binomtest as reference libraries.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from dicert.errors import ParameterError
from dicert.estimate import (
    SettingsDesign,
    azuma_margin,
    binomial_log10_p_value,
    binomial_p_value,
    block_estimates,
    clopper_pearson,
    correlator_intervals,
    estimate_chsh,
    game_statistics,
    martingale_chsh,
)

ALPHA = (0.0, math.pi / 4)  # polariser angles giving S = 2 sqrt 2 for |Phi+> (common practice)
BETA = (math.pi / 8, -math.pi / 8)


def box_phi_plus(v: float = 1.0) -> np.ndarray:
    """p[x, y, a, b] of |Phi+> at the CHSH-optimal angles with visibility v."""
    p = np.zeros((2, 2, 2, 2))
    for x in (0, 1):
        for y in (0, 1):
            e = v * math.cos(2 * (ALPHA[x] - BETA[y]))
            for a in (0, 1):
                for b in (0, 1):
                    p[x, y, a, b] = (1 + (e if a == b else -e)) / 4
    return p


def expected_counts(p_xyab: np.ndarray, n: int, gamma: float = 1.0, gen=(0, 0)) -> np.ndarray:
    """Exact expected counts (as floats) for a spot-checking design."""
    c = np.zeros((2, 2, 2, 2, 2))
    c[1] = n * gamma / 4 * p_xyab
    c[0, gen[0], gen[1]] = n * (1 - gamma) * p_xyab[gen[0], gen[1]]
    return c


def test_tsirelson_box_exact_counts():
    # Tsirelson (1980): S = 2 sqrt 2; correlators cos(2(alpha - beta)) (common practice).
    c = np.rint(expected_counts(box_phi_plus(), 800_000_000)).astype(np.int64)
    est = estimate_chsh(c)
    assert est.chsh == pytest.approx(2 * math.sqrt(2), abs=1e-6)
    assert est.correlators[1, 1] == pytest.approx(-1 / math.sqrt(2), abs=1e-6)
    # CHSH game: P_win = 1/2 + S/8 = cos^2(pi/8) = 0.853553 (common practice).
    assert est.win_probability == pytest.approx(math.cos(math.pi / 8) ** 2, abs=1e-6)
    assert est.chsh_martingale == pytest.approx(2 * math.sqrt(2), abs=1e-6)


def test_spot_checking_martingale_estimator_is_unbiased_on_expected_counts():
    for gamma in (1.0, 0.5, 0.1):
        c = np.rint(expected_counts(box_phi_plus(0.9), 4_000_000_000, gamma)).astype(np.int64)
        i_hat = martingale_chsh(c, SettingsDesign(gamma=gamma))
        assert i_hat == pytest.approx(0.9 * 2 * math.sqrt(2), abs=1e-7)


def test_azuma_margin_formula():
    # Methods README: margin = (8/gamma) sqrt(ln(1/eps)/(2n)); hand value for n=1e6, eps=1e-6:
    # 8 * sqrt(13.815511/2e6) = 0.0210261 (worked by hand from the formula).
    assert azuma_margin(10**6, 8.0, 1e-6) == pytest.approx(0.0210261, rel=1e-5)
    est = estimate_chsh(np.rint(expected_counts(box_phi_plus(), 10**6, 0.25)).astype(np.int64),
                        SettingsDesign(gamma=0.25), eps=1e-6)
    assert est.margin == pytest.approx(32 * math.sqrt(math.log(1e6) / 2e6))


def test_p_value_matches_scipy_binomial_tail():
    # scipy.stats.binom.sf as reference library; local bound 3/4 for the CHSH game (common practice).
    assert binomial_p_value(790, 1000) == pytest.approx(stats.binom.sf(789, 1000, 0.75), rel=1e-10)
    assert binomial_p_value(0, 0) == 1.0
    c = np.zeros((2, 2, 2, 2, 2), np.int64)
    c[1, :, :, 0, 0] = 100
    c[1, 1, 1, 0, 1] = 100
    c[1, 1, 1, 0, 0] = 0
    n, nt, w = game_statistics(c)
    assert (n, nt, w) == (400, 400, 400)
    est = estimate_chsh(c)
    assert est.log10_p_value_local == pytest.approx(400 * math.log10(0.75), rel=1e-9)


@pytest.mark.parametrize("k,n", [(790, 1000), (751, 1000), (700, 1000), (10, 10), (1, 10),
                                 (7600, 10_000), (8500, 10_000), (75_010_000, 100_000_000)])
def test_log_p_value_matches_scipy(k, n):
    # Reference library: scipy.stats.binom.logsf (our own tail sum keeps inspect free of scipy).
    ref = stats.binom.logsf(k - 1, n, 0.75) / math.log(10)
    assert binomial_log10_p_value(k, n) == pytest.approx(ref, rel=1e-6, abs=1e-10)


def test_log_p_value_beyond_double_range():
    # 1e6 wins in 1e6 rounds: exactly 1e6 * log10(0.75) (closed form, common practice).
    assert binomial_log10_p_value(10**6, 10**6) == pytest.approx(10**6 * math.log10(0.75), rel=1e-9)


def test_clopper_pearson_against_scipy_binomtest():
    # scipy.stats.binomtest(...).proportion_ci(method="exact") is the reference (Clopper-Pearson 1934).
    for k, n in [(0, 10), (3, 10), (10, 10), (517, 1000)]:
        ref = stats.binomtest(k, n).proportion_ci(confidence_level=0.99, method="exact")
        lo, hi = clopper_pearson(k, n, 0.01)
        assert lo == pytest.approx(ref.low, abs=1e-12)
        assert hi == pytest.approx(ref.high, abs=1e-12)
    c = np.rint(expected_counts(box_phi_plus(), 40_000)).astype(np.int64)
    ci = correlator_intervals(c, 0.01)
    assert (ci[..., 0] <= estimate_chsh(c).correlators).all()
    assert (estimate_chsh(c).correlators <= ci[..., 1]).all()


def _simulate_counts(rng, p_xyab, n, gamma=1.0):
    t = rng.random(n) < gamma
    x = np.where(t, rng.integers(0, 2, n), 0)
    y = np.where(t, rng.integers(0, 2, n), 0)
    flat = p_xyab.reshape(4, 4)
    u = rng.random(n)
    cdf = np.cumsum(flat[2 * x + y], axis=1)
    ab = (u[:, None] > cdf).sum(axis=1)
    codes = (t.astype(np.int64) << 4) | (x << 3) | (y << 2) | ab
    return np.bincount(codes, minlength=32).reshape(2, 2, 2, 2, 2)


@pytest.mark.parametrize("gamma", [1.0, 0.3])
def test_coverage_of_lower_bound(rng, gamma):
    """The lower bound exceeds the true S in at most about eps of runs (here eps = 0.1)."""
    eps, runs, n = 0.1, 300, 2000
    p = box_phi_plus(0.8)
    s_true = 0.8 * 2 * math.sqrt(2)
    design = SettingsDesign(gamma=gamma)
    fails = sum(estimate_chsh(_simulate_counts(rng, p, n, gamma), design, eps).chsh_lower > s_true
                for _ in range(runs))
    # Binomial(runs, eps) 99.9% quantile (scipy.stats.binom.ppf) bounds the failures of a valid bound.
    assert fails <= stats.binom.ppf(0.999, runs, eps)


def test_coverage_with_memory_device(rng):
    """A device with memory alternating between a strong and a local box: the bound refers to the
    average of the rounds' CHSH values and stays valid."""
    eps, runs, n = 0.1, 200, 2000
    strong, local = box_phi_plus(1.0), np.full((2, 2, 2, 2), 0.25)
    fails = 0
    for _ in range(runs):
        half = _simulate_counts(rng, strong, n // 2) + _simulate_counts(rng, local, n // 2)
        s_avg = (2 * math.sqrt(2) + 0.0) / 2
        fails += estimate_chsh(half, eps=eps).chsh_lower > s_avg
    assert fails <= stats.binom.ppf(0.999, runs, eps)


def test_zero_counts_and_edge_cases():
    c = np.zeros((2, 2, 2, 2, 2), np.int64)
    with pytest.raises(ParameterError):
        estimate_chsh(c)
    c[1, 0, 0, 0, 0] = 5  # only one setting pair ever tested
    est = estimate_chsh(c)
    assert math.isnan(est.chsh) and math.isnan(est.correlators[1, 1])
    assert est.chsh_lower < est.chsh_martingale
    with pytest.raises(ParameterError):
        SettingsDesign(gamma=0.0)
    with pytest.raises(ParameterError):
        estimate_chsh(np.zeros((2, 2, 2, 2)))


def test_block_estimates():
    c = np.rint(expected_counts(box_phi_plus(), 4000)).astype(np.int64)
    blocks = block_estimates(np.stack([c, c, np.zeros_like(c)]), 4000, eps=0.01)
    assert len(blocks) == 2 and blocks[1].first_trial == 4000
    for b in blocks:
        assert b.chsh_lower < b.chsh < b.chsh_upper
