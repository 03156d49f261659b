"""Tests of the martingale (Azuma-Hoeffding) finite-size method.

Sources are named beside each check.
"""

from __future__ import annotations

import math
import types

import numpy as np
import pytest

from dicert.errors import ParameterError, ProtocolError
from dicert.finite import MartingaleParams, certify_counts, certify_martingale
from dicert.finite.martingale import (
    azuma_chsh_margin,
    check_counts,
    game_counts,
    generation_harvest_penalty_bits,
    martingale_min_entropy,
    nature_2010_min_entropy,
)

Design = types.SimpleNamespace
Harvest = types.SimpleNamespace


def counts_from_probs(p_abxy, n_per_setting):
    """Expected counts [t=1, x, y, a, b] for a behaviour p[x, y, a, b] (rounded)."""
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    c[1] = np.rint(np.asarray(p_abxy) * n_per_setting).astype(np.int64)
    return c


def singlet_behaviour(visibility=1.0):
    # Maximally entangled state at the optimal CHSH angles: E_xy = (-1)^(xy) v / sqrt 2,
    # so P(a XOR b = xy) = (1 + v/sqrt 2)/2 (Clauser, Horne, Shimony, Holt, PRL 23, 880 (1969);
    # Cirel'son, Lett. Math. Phys. 4, 93 (1980)).
    p = np.zeros((2, 2, 2, 2))
    win = 0.5 * (1 + visibility / math.sqrt(2))
    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    p[x, y, a, b] = (win if (a ^ b) == (x & y) else 1 - win) / 2
    return p


# ----------------------------------------------------------------- published reproduction


@pytest.mark.parametrize("chsh_hat", [2.414, 2.4145, 2.4151])
def test_pironio_2010_reproduction(chsh_hat):
    # S. Pironio et al., "Random numbers certified by Bell's theorem", Nature 464, 1021 (2010):
    # 42 new random bits at 99% confidence (abstract); n = 3016 events and I_hat = 2.414 are
    # recalled from the paper (medium confidence; methods note A4). The uncorrected statement
    # n f(I_hat - mu), mu = (1/q + 2 sqrt2) sqrt(2 ln(1/delta)/n), q = 1/4, delta = 0.01 must
    # land within rounding of the published 42 bits.
    bits = nature_2010_min_entropy(3016, chsh_hat, 0.01, q=0.25)
    assert 40.5 <= bits <= 42.5


def test_pironio_2010_margin_value():
    # Same source: the quoted uncertainty 2.414 +/- 0.058 and the margin mu = 0.37735 at
    # delta = 0.01, q = 1/4 (regression value computed from the formula in the methods note A4).
    mu = (4 + 2 * math.sqrt(2)) * math.sqrt(2 * math.log(100) / 3016)
    assert mu == pytest.approx(0.37735, abs=5e-5)
    assert nature_2010_min_entropy(3016, 2.414, 0.01) == pytest.approx(3016 * 0.013529, rel=2e-3)


def test_corrected_statement_does_not_depend_on_observed_value():
    # Corrected form (Pironio & Massar, PRA 87, 012336 (2013); Fehr, Gelles & Schaffner,
    # PRA 87, 012335 (2013)): the certified amount is fixed by the pre-declared threshold;
    # a higher observed estimate must not raise it.
    params = MartingaleParams(chsh_threshold=2.5, eps_est=1e-6)
    n_set = 25_000
    lo = certify_martingale(counts_from_probs(singlet_behaviour(0.90), n_set), params)
    hi = certify_martingale(counts_from_probs(singlet_behaviour(0.99), n_set), params)
    assert lo.accepted and hi.accepted
    assert lo.certified_min_entropy_bits == hi.certified_min_entropy_bits > 0


# ----------------------------------------------------------------- margin and estimator


@pytest.mark.parametrize("n,gamma,eps", [(1000, 1.0, 1e-6), (10**6, 0.1, 1e-9), (50, 0.5, 0.3)])
def test_azuma_margin_inverts_hoeffding(n, gamma, eps):
    # Azuma-Hoeffding: P[mean of differences >= mu] <= exp(-2 n mu^2 / c^2) for increments of
    # range c (W. Hoeffding, JASA 58, 13 (1963), Thm 2; K. Azuma, Tohoku Math. J. 19 (1967)).
    mu = azuma_chsh_margin(n, gamma, eps)
    c = 8.0 / gamma
    assert math.exp(-2 * n * mu**2 / c**2) == pytest.approx(eps, rel=1e-12)


def test_estimator_reaches_tsirelson_on_ideal_singlet_counts():
    # Ideal singlet statistics give S = 2 sqrt 2 (Cirel'son 1980); the importance-weighted
    # estimator with gamma = 1 equals the CHSH value of the counts (Pironio et al. 2010, SI).
    c = counts_from_probs(singlet_behaviour(1.0), 4 * 10**8)
    r = certify_martingale(c, MartingaleParams(chsh_threshold=2.8, eps_est=1e-6))
    assert r.details["chsh_estimate"] == pytest.approx(2 * math.sqrt(2), abs=1e-8)


def test_spot_checking_estimator_is_unbiased():
    # Unbiasedness of importance weighting with known probabilities (common practice):
    # E[(4/gamma) 1[t=1] (-1)^(xy + a + b)] = S. Simulated with numpy multinomial draws.
    rng = np.random.default_rng(20261201)
    gamma, n = 0.2, 400_000
    p = singlet_behaviour(0.95)
    s_true = 2 * math.sqrt(2) * 0.95
    est = []
    for _ in range(20):
        c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
        n_test = rng.binomial(n, gamma)
        c[1] = rng.multinomial(n_test, (p / 4).ravel()).reshape(2, 2, 2, 2)
        gen = rng.multinomial(n - n_test, p[0, 0].ravel()).reshape(2, 2)
        c[0, 0, 0] = gen
        r = certify_martingale(c, MartingaleParams(chsh_threshold=2.5, eps_est=1e-6),
                               Design(gamma=gamma, generation=(0, 0)))
        est.append(r.details["chsh_estimate"])
    # Standard error of the mean of 20 runs: sd(Z)/sqrt(20 n) <= (4/gamma)/sqrt(20 n).
    assert abs(np.mean(est) - s_true) < 4 * (4 / gamma) / math.sqrt(20 * n)


def test_generation_penalty_is_the_binomial_moment_generating_function():
    # E[2^(k N)] for N ~ Binomial(n, gamma) = (1 - gamma + gamma 2^k)^n (textbook MGF), checked
    # against a direct sum with scipy.stats.binom.pmf.
    from scipy.stats import binom

    n, gamma, k = 200, 0.07, 2
    direct = math.log2(sum(binom.pmf(j, n, gamma) * 2.0 ** (k * j) for j in range(n + 1)))
    assert generation_harvest_penalty_bits(n, gamma, k) == pytest.approx(direct, rel=1e-10)


def test_min_entropy_formula():
    # n f(S_th - mu) with f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) (Pironio et al. 2010, eq. (3)).
    n, s_th, eps = 10**6, 2.6, 1e-6
    mu = 8 * math.sqrt(math.log(1 / eps) / (2 * n))
    s = s_th - mu
    f = 1 - math.log2(1 + math.sqrt(2 - s * s / 4))
    bits, _ = martingale_min_entropy(n, MartingaleParams(chsh_threshold=s_th, eps_est=eps))
    assert bits == pytest.approx(n * f, rel=1e-12)
    # The shipped-style comment value: margin 0.021 at n = 1e6, eps = 1e-6 (computed from the
    # formula; regression value).
    assert mu == pytest.approx(0.021, abs=5e-4)


# ----------------------------------------------------------------- soundness by simulation


def _classical_counts(rng, n, gamma, runs):
    """Counts of the optimal deterministic local strategy a = b = 0 (wins unless x = y = 1,
    i.e. win probability 3/4 on uniform test inputs: the classical CHSH-game value, CHSH 1969)."""
    out = []
    for _ in range(runs):
        c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
        n_test = rng.binomial(n, gamma)
        c[1, :, :, 0, 0] = rng.multinomial(n_test, [0.25] * 4).reshape(2, 2)
        c[0, 0, 0, 0, 0] = n - n_test
        out.append(c)
    return out


def test_classical_devices_never_certify_at_shipped_threshold():
    # Local models satisfy S <= 2 (CHSH 1969); the shipped threshold 2.6 with eps_est = 1e-6
    # must never certify a positive amount.
    rng = np.random.default_rng(7)
    params = MartingaleParams(chsh_threshold=2.6, eps_est=1e-6)
    for n in (100, 1000, 10**5):
        for c in _classical_counts(rng, n, 1.0, 300):
            r = certify_martingale(c, params)
            assert r.certified_min_entropy_bits == 0.0


def test_classical_devices_tight_threshold_respects_eps():
    # Adversarially tight threshold: S_th - mu just above 2, eps_est = 0.05. By Azuma-Hoeffding
    # the classical device is accepted with positive bits with probability <= eps_est; with
    # 2000 runs the observed fraction must stay below eps + 4 binomial standard deviations.
    rng = np.random.default_rng(11)
    n, eps, gamma = 2000, 0.05, 0.5
    mu = azuma_chsh_margin(n, gamma, eps)
    params = MartingaleParams(chsh_threshold=2.0 + mu + 1e-3, eps_est=eps)
    design = Design(gamma=gamma, generation=(0, 0))
    positives = 0
    runs = 2000
    for c in _classical_counts(rng, n, gamma, runs):
        positives += certify_martingale(c, params, design).certified_min_entropy_bits > 0
    assert positives / runs <= eps + 4 * math.sqrt(eps * (1 - eps) / runs)


# ----------------------------------------------------------------- interface and edge cases


def test_abort_gives_zero_and_reason():
    c = counts_from_probs(singlet_behaviour(0.75), 10_000)  # S = 2.12 < 2.6
    r = certify_martingale(c, MartingaleParams(chsh_threshold=2.6, eps_est=1e-6))
    assert not r.accepted and r.certified_min_entropy_bits == 0.0
    assert "below the pre-declared threshold" in r.details["abort_reason"]
    assert r.side_information == "classical"
    assert r.total_error(1e-8) == pytest.approx(1e-6 + 1e-8)


def test_tiny_n_is_conservative():
    c = counts_from_probs(singlet_behaviour(1.0), 8)
    assert c.sum() < 40
    r = certify_martingale(c, MartingaleParams(chsh_threshold=2.8, eps_est=1e-6))
    assert r.certified_min_entropy_bits == 0.0  # margin far larger than the room above 2


def test_dispatch_and_generation_harvest():
    p = singlet_behaviour(0.97)
    rng = np.random.default_rng(3)
    n, gamma = 10**8, 0.02
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    n_test = rng.binomial(n, gamma)
    c[1] = rng.multinomial(n_test, (p / 4).ravel()).reshape(2, 2, 2, 2)
    c[0, 0, 0] = rng.multinomial(n - n_test, p[0, 0].ravel()).reshape(2, 2)
    proto = types.SimpleNamespace(method="martingale",
                                  analysis=MartingaleParams(chsh_threshold=2.6, eps_est=1e-6),
                                  design=Design(gamma=gamma, generation=(0, 0)),
                                  harvest=Harvest(parties="AB", select="all"))
    r_all = certify_counts(c, proto)
    proto.harvest = Harvest(parties="AB", select="generation")
    r_gen = certify_counts(c, proto)
    assert r_all.accepted and r_gen.accepted and r_gen.certified_min_entropy_bits > 0
    assert r_gen.certified_min_entropy_bits == pytest.approx(
        r_all.certified_min_entropy_bits - n * math.log2(1 + 3 * gamma))


def test_bad_counts_and_designs_are_rejected():
    with pytest.raises(ParameterError, match="shape"):
        check_counts(np.zeros((2, 2, 2, 2)))
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    c[0, 0, 0, 0, 0] = 5
    with pytest.raises(ParameterError, match="gamma = 1"):
        check_counts(c, Design(gamma=1.0, generation=(0, 0)))
    c[0, 1, 0, 0, 0] = 1
    with pytest.raises(ParameterError, match="generation settings"):
        check_counts(c, Design(gamma=0.5, generation=(0, 0)))
    only_tests = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    only_tests[1] = 1000
    with pytest.raises(ParameterError, match="t\\) column"):
        check_counts(only_tests, Design(gamma=0.5, generation=(0, 0)))
    with pytest.raises(ParameterError, match="non-negative"):
        check_counts(-only_tests)


def test_params_validation_names_the_key():
    with pytest.raises(ProtocolError, match="'chsh_threshold'"):
        MartingaleParams.from_mapping({"chsh_threshold": 3.0, "eps_est": 1e-6}, "p.toml")
    with pytest.raises(ProtocolError, match="'eps_est'.*required"):
        MartingaleParams.from_mapping({"chsh_threshold": 2.5}, "p.toml")
    with pytest.raises(ProtocolError, match="'single_round'"):
        MartingaleParams.from_mapping({"chsh_threshold": 2.5, "eps_est": 1e-6,
                                       "single_round": "x"}, "p.toml")
    with pytest.raises(ProtocolError, match="'extra'"):
        MartingaleParams.from_mapping({"chsh_threshold": 2.5, "eps_est": 1e-6, "extra": 1}, "")


def test_game_counts():
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    c[1, 1, 1, 0, 1] = 3  # x = y = 1, a XOR b = 1: a win (CHSH game rule, CHSH 1969)
    c[1, 1, 1, 0, 0] = 2  # a loss
    c[1, 0, 1, 1, 1] = 4  # win
    assert game_counts(c) == (9, 9, 7)


def test_npa_pair_bound_route():
    # The pair of outcomes carries more min-entropy than one party: at the Tsirelson bound the
    # self-tested singlet gives H_min(AB|X=0,Y=0) = -log2((2 + sqrt2)/8) = 1.228447 bits
    # (Pironio et al. 2010, Fig. 1 / methods note A2, exact) against 1 bit for one party.
    from dicert.finite.martingale import per_round_min_entropy

    top, _ = per_round_min_entropy(2 * math.sqrt(2), "npa-AB")
    assert top <= -math.log2((2 + math.sqrt(2)) / 8) + 1e-9  # a lower bound, never above
    assert top >= 1.2  # and close to it (certified table, NPA level 1+AB)
    for s in (2.2, 2.5, 2.7):
        assert per_round_min_entropy(s, "npa-AB")[0] >= per_round_min_entropy(s)[0]
    c = counts_from_probs(singlet_behaviour(0.97), 250_000)
    pa = MartingaleParams(chsh_threshold=2.6, eps_est=1e-6)
    pn = MartingaleParams(chsh_threshold=2.6, eps_est=1e-6, single_round="npa-AB")
    ra, rn = certify_martingale(c, pa), certify_martingale(c, pn)
    assert rn.accepted and rn.certified_min_entropy_bits > ra.certified_min_entropy_bits > 0
    with pytest.raises(ParameterError, match="npa-AB"):
        certify_martingale(c, pn, harvest=Harvest(parties="A", select="all"))
