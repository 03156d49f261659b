"""Tests of the entropy-accumulation finite-size method.

Values marked [N] in the methods note "entropy-accumulation" are regression values computed
from the formulas there (not paper values); the sources of the formulas are named beside them.
"""

from __future__ import annotations

import math
import types

import numpy as np
import pytest

from dicert.entropy.analytic import vn_entropy_win
from dicert.errors import ParameterError, ProtocolError
from dicert.finite import EatParams, certify_counts, certify_eat
from dicert.finite.eat import (
    abort_probability,
    chernoff_tolerance,
    df_rate,
    df_variance,
    dfr_rate,
    g_smooth,
    optimise_df,
    optimise_dfr,
    tangent,
    threshold,
)

Design = types.SimpleNamespace
EPS = 1e-8


# ----------------------------------------------------------------- fixed-parameter regression


def test_regression_case_fixed_parameters():
    # Regression values computed from the formulas in the methods note (section 6, [N]):
    # n = 1e10, gamma = 0.01, w_exp = 0.84, delta = 1e-3, eps_s = eps_EA = 1e-8, w_t = 0.835.
    # Formulas: tangent of G (Arnon-Friedman, Renner, Vidick, SIAM J. Comput. 48 (2019));
    # original EAT (Dupuis, Fawzi, Renner, CMP 379 (2020)); improved second-order EAT with the
    # conservative constants (Dupuis, Fawzi, IEEE TIT 65 (2019); Brown, Ragy, Colbeck, IEEE
    # TIT 66 (2020)).
    n, gamma, w_c = 1e10, 0.01, 0.84 - 1e-3
    a, b = tangent(0.835)
    assert float(a) == pytest.approx(12.409928, abs=2e-6)
    assert float(b) == pytest.approx(-9.665515, abs=2e-6)
    assert float(a * w_c + b) == pytest.approx(0.746414, abs=2e-6)
    assert float(dfr_rate(0.835, w_c, n, gamma, EPS, EPS)) == pytest.approx(0.488656, abs=2e-6)
    assert float(df_variance(a, gamma)) == pytest.approx(13033.06, abs=0.01)
    assert float(a) ** 2 / gamma == pytest.approx(15400.63, abs=0.01)
    v = math.log2(33) + math.sqrt(2 + float(df_variance(a, gamma)))
    assert v == pytest.approx(119.21558, abs=2e-5)
    assert float(df_rate(0.835, 1e-6, w_c, n, gamma, EPS, EPS)) == pytest.approx(0.733416,
                                                                                  abs=2e-6)


def test_g_eps_stable_form_against_mpmath():
    # g(eps) = -log2(1 - sqrt(1 - eps^2)) evaluated in 50-digit arithmetic (mpmath, reference
    # library); the methods note gives g(1e-8) = 54.150850 [N] and warns that the naive double
    # precision form collapses to 53.0 (pitfall 6).
    import mpmath

    mpmath.mp.dps = 50
    for eps in (1e-2, 1e-8, 1e-15):
        e = mpmath.mpf(eps)
        ref = float(-mpmath.log(1 - mpmath.sqrt(1 - e * e), 2))
        assert g_smooth(eps) == pytest.approx(ref, rel=1e-13)
    assert g_smooth(1e-8) == pytest.approx(54.150850, abs=1e-6)
    assert -math.log2(1 - math.sqrt(1 - 1e-16)) == pytest.approx(53.0, abs=1e-9)


def test_asymptotic_limits():
    # G(w) = 1 - h2(1/2 + 1/2 sqrt(16 w (w-1) + 3)) (Acin et al., PRL 98, 230501 (2007);
    # Pironio et al., NJP 11, 045021 (2009)); values [N] from the methods note table 2.1.
    assert vn_entropy_win(0.85) == pytest.approx(0.918531, abs=1e-6)
    assert vn_entropy_win(0.84) == pytest.approx(0.761705, abs=1e-6)


# ----------------------------------------------------------------- optimised rate table


# (w_exp, gamma, n, DFR rate, DF rate), optimised over w_t (and alpha), delta from the
# Chernoff formula at eps_comp = 1e-6, eps_s = eps_EA = 1e-8 (methods note section 6, [N]).
TABLE = [
    (0.85, 1.0, 1e6, 0.53529, 0.73721),
    (0.85, 1.0, 1e10, 0.91347, 0.91652),
    (0.85, 0.01, 1e8, -0.64048, 0.72671),
    (0.85, 0.01, 1e10, 0.62542, 0.89564),
    (0.85, 0.001, 1e12, 0.62795, 0.91123),
    (0.84, 0.01, 1e10, 0.51892, 0.74461),
]


@pytest.mark.parametrize("w_exp,gamma,n,r_dfr,r_df", TABLE)
def test_optimised_rate_table(w_exp, gamma, n, r_dfr, r_df):
    # The note's table is rounded to 5 decimals; our optimiser may find a slightly better point
    # (the DFR objective is a step function), never a much worse one.
    delta = chernoff_tolerance(n, gamma, w_exp, 1e-6)
    df = optimise_df(w_exp - delta, n, gamma, EPS, EPS).rate_per_round
    dfr = optimise_dfr(w_exp - delta, n, gamma, EPS, EPS).rate_per_round
    assert r_df - 1e-5 <= df <= r_df + 3e-5
    assert r_dfr - 1e-5 <= dfr <= r_dfr + 1e-4
    assert df >= dfr


def test_rates_increase_with_n_and_approach_g():
    # Asymptotic equipartition: the finite-size rates increase with n towards the von Neumann
    # rate G(w) (Dupuis, Fawzi, Renner 2020; the limits are [N] values of the methods note).
    w_exp, gamma = 0.85, 0.01
    g_lim = vn_entropy_win(w_exp)
    prev_df = prev_dfr = -np.inf
    for n in (1e7, 1e8, 1e9, 1e10, 1e11, 1e13):
        d = chernoff_tolerance(n, gamma, w_exp, 1e-6)
        df = optimise_df(w_exp - d, n, gamma, EPS, EPS).rate_per_round
        dfr = optimise_dfr(w_exp - d, n, gamma, EPS, EPS).rate_per_round
        assert df > prev_df and dfr > prev_dfr
        assert dfr <= df < g_lim
        prev_df, prev_dfr = df, dfr
    assert prev_df > g_lim - 0.01


def test_variance_never_exceeds_generic_bound():
    # DF's generic bound Var(f) <= (Max(g) - Min(g))^2 / gamma = a^2/gamma (Dupuis & Fawzi 2019,
    # infrequent-sampling lemma), for every gamma.
    for gamma in (1.0, 0.5, 0.1, 1e-3):
        a = 7.0
        assert float(df_variance(a, gamma)) <= a * a / gamma


# ----------------------------------------------------------------- completeness


def test_exact_completeness_threshold_against_scipy():
    # Honest i.i.d. devices: L ~ Binomial(n, gamma (1 - w_exp)) (methods note section 1);
    # L_max is the smallest l with P[L > l] <= eps_comp (scipy.stats.binom.sf).
    from scipy.stats import binom

    params = EatParams(expected_win_probability=0.85, eps_comp=1e-6, eps_s=EPS, eps_ea=EPS)
    n, gamma = 10**8, 0.01
    th = threshold(params, n, gamma)
    p = gamma * 0.15
    assert binom.sf(th.count_limit, n, p) <= 1e-6 < binom.sf(th.count_limit - 1, n, p)
    # Methods note section 1 example [N]: exact delta 1.84e-3 against 2.49e-3 from Chernoff.
    assert th.tolerance == pytest.approx(1.84e-3, abs=0.01e-3)
    assert chernoff_tolerance(n, gamma, 0.85, 1e-6) == pytest.approx(2.49e-3, abs=0.01e-3)
    assert abort_probability(th, n, gamma, 0.85) <= 1e-6


def test_win_form_completeness_against_scipy():
    from scipy.stats import binom

    params = EatParams(variant="dfr", expected_win_probability=0.85, eps_comp=1e-6,
                       eps_s=EPS, eps_ea=EPS)
    n, gamma = 10**7, 0.05
    th = threshold(params, n, gamma)
    p = gamma * 0.85
    # P[W < W_min] = cdf(W_min - 1) <= eps_comp < cdf(W_min) (scipy.stats.binom.cdf).
    assert binom.cdf(th.count_limit - 1, n, p) <= 1e-6 < binom.cdf(th.count_limit, n, p)


def test_chernoff_is_looser_than_exact_tail():
    # Multiplicative Chernoff bound P[L > (1+t) mu] <= exp(-t^2 mu / 3) (Mitzenmacher & Upfal,
    # "Probability and Computing" (2005), Thm 4.4) is an upper bound on the exact tail.
    from scipy.stats import binom

    for n, gamma, w in ((10**6, 1.0, 0.85), (10**8, 0.01, 0.84), (10**9, 0.001, 0.85)):
        d = chernoff_tolerance(n, gamma, w, 1e-6)
        limit = math.floor(n * gamma * (1 - w + d))
        assert binom.sf(limit, n, gamma * (1 - w)) <= 1e-6


# ----------------------------------------------------------------- certification from counts


def _counts(rng, n, gamma, win_probability):
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    n_test = rng.binomial(n, gamma)
    wins = rng.binomial(n_test, win_probability)
    # Place wins/losses on setting pairs uniformly: win cells (a XOR b = x AND y).
    per = rng.multinomial(wins, [0.25] * 4)
    per_l = rng.multinomial(n_test - wins, [0.25] * 4)
    for k, (x, y) in enumerate(((0, 0), (0, 1), (1, 0), (1, 1))):
        c[1, x, y, 0, x & y] = per[k]
        c[1, x, y, 0, 1 - (x & y)] = per_l[k]
    c[0, 0, 0, 0, 0] = n - n_test
    return c


SHIPPED = dict(expected_win_probability=0.84, tolerance=0.012, eps_s=EPS, eps_ea=EPS)


def test_honest_run_certifies_expected_amount():
    rng = np.random.default_rng(5)
    n, gamma = 10**7, 0.05
    params = EatParams(**SHIPPED)
    r = certify_eat(_counts(rng, n, gamma, 0.843), params, Design(gamma=gamma, generation=(0, 0)))
    assert r.accepted and r.certified_min_entropy_bits > 0
    assert r.method == "eat-df-conservative" and r.side_information == "quantum"
    assert r.certified_min_entropy_bits == pytest.approx(n * r.details["rate_per_round_bits"])
    assert r.certified_min_entropy_bits < n * vn_entropy_win(0.84 - 0.012)
    assert r.total_error(1e-8) == pytest.approx(1e-8 + 2e-8 + 1e-8)
    assert "conservative" in r.details["constants"]


def test_threshold_edge_is_inclusive_and_tight():
    rng = np.random.default_rng(6)
    n, gamma = 10**6, 0.05
    params = EatParams(**SHIPPED)
    design = Design(gamma=gamma, generation=(0, 0))
    limit = threshold(params, n, gamma).count_limit
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    n_test = 50_000
    c[1, 0, 0, 0, 1] = limit  # losses at (0,0): a XOR b = 1 != 0
    c[1, 0, 0, 0, 0] = n_test - limit
    c[0, 0, 0, 0, 0] = n - n_test
    assert certify_eat(c, params, design).accepted
    c[1, 0, 0, 0, 1] += 1
    c[1, 0, 0, 0, 0] -= 1
    r = certify_eat(c, params, design)
    assert not r.accepted and r.certified_min_entropy_bits == 0 and "exceed" in r.details["abort_reason"]
    del rng


def test_never_negative():
    # The note's DFR entry at (0.85, 0.01, 1e8) is negative (-0.64048): certify 0 (pitfall 8).
    rng = np.random.default_rng(8)
    n, gamma = 10**8, 0.01
    params = EatParams(variant="dfr", expected_win_probability=0.85,
                       tolerance=chernoff_tolerance(n, gamma, 0.85, 1e-6), eps_s=EPS, eps_ea=EPS)
    r = certify_eat(_counts(rng, n, gamma, 0.853), params, Design(gamma=gamma, generation=(0, 0)))
    assert r.accepted and r.certified_min_entropy_bits == 0.0
    assert r.details["rate_per_round_bits"] < 0


def test_classical_devices_never_certify():
    # Classical devices win the CHSH game with probability at most 3/4 (CHSH 1969); at the
    # shipped threshold (w_exp = 0.84, tolerance 0.012) no run may be accepted with positive
    # bits. 300 runs per setting, counts drawn with numpy binomial/multinomial.
    rng = np.random.default_rng(9)
    for variant in ("df-conservative", "dfr"):
        params = EatParams(variant=variant, **SHIPPED)
        for n, gamma in ((10**4, 0.5), (10**6, 0.05), (10**8, 0.05)):
            design = Design(gamma=gamma, generation=(0, 0))
            for _ in range(300):
                r = certify_eat(_counts(rng, n, gamma, 0.75), params, design)
                assert r.certified_min_entropy_bits == 0.0 and not r.accepted


def test_classical_threshold_at_or_below_local_value_certifies_zero():
    # If the certified win rate is at most 3/4 the single-round bound G is 0 (Acin et al. 2007)
    # and nothing may be certified, whatever the counts.
    rng = np.random.default_rng(10)
    params = EatParams(expected_win_probability=0.76, eps_comp=1e-6, eps_s=EPS, eps_ea=EPS)
    r = certify_eat(_counts(rng, 1000, 1.0, 0.85), params, Design(gamma=1.0, generation=(0, 0)))
    assert r.details["certified_win_rate"] <= 0.75
    assert r.accepted and r.certified_min_entropy_bits == 0.0


def test_dispatch_rounds_and_harvest_checks():
    rng = np.random.default_rng(12)
    c = _counts(rng, 10**5, 0.5, 0.85)
    proto = types.SimpleNamespace(
        method="eat", analysis=EatParams(**SHIPPED, rounds=10**5),
        design=Design(gamma=0.5, generation=(0, 0)),
        harvest=types.SimpleNamespace(parties="AB", select="all"))
    assert certify_counts(c, proto).method == "eat-df-conservative"
    proto.analysis = EatParams(**SHIPPED, rounds=10**5 + 1)
    with pytest.raises(ParameterError, match="rounds"):
        certify_counts(c, proto)
    proto.analysis = EatParams(**SHIPPED)
    proto.harvest = types.SimpleNamespace(parties="A", select="all")
    with pytest.raises(ParameterError, match="harvest"):
        certify_counts(c, proto)


def test_params_validation_names_the_key():
    with pytest.raises(ProtocolError, match="'tolerance'"):
        EatParams.from_mapping({"expected_win_probability": 0.8, "eps_s": 1e-8,
                                "eps_ea": 1e-8}, "p.toml [analysis]")
    with pytest.raises(ProtocolError, match="'tolerance'.*3/4"):
        EatParams.from_mapping({"expected_win_probability": 0.8, "tolerance": 0.06,
                                "eps_s": 1e-8, "eps_ea": 1e-8}, "p.toml")
    with pytest.raises(ProtocolError, match="'variant'"):
        EatParams.from_mapping({"expected_win_probability": 0.8, "tolerance": 0.01,
                                "eps_s": 1e-8, "eps_ea": 1e-8, "variant": "x"}, "p.toml")
    with pytest.raises(ProtocolError, match="'rounds'"):
        EatParams.from_mapping({"expected_win_probability": 0.8, "tolerance": 0.01,
                                "eps_s": 1e-8, "eps_ea": 1e-8, "rounds": 1.5}, "p.toml")
