"""Tests of the planner and the ``dicert plan`` command. Sources named beside each check."""

from __future__ import annotations

import json
import math
import types
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.errors import ParameterError
from dicert.estimate import SettingsDesign
from dicert.finite import EatParams, MartingaleParams
from dicert.finite.eat import chernoff_tolerance, optimise_df, optimise_dfr
from dicert.finite.pef import PefParams
from dicert.plan import (
    chernoff_reachable_threshold,
    chernoff_shortfall_bound,
    honest_quality,
    martingale_abort_bound,
    plan,
    seed_bits_consumed,
)
from dicert.protocol import load_protocol, shipped_protocol_path

NS = types.SimpleNamespace


def _eat_protocol(**kw):
    analysis = EatParams(**{"expected_win_probability": 0.85, "eps_comp": 1e-6, "eps_s": 1e-8,
                            "eps_ea": 1e-8, **kw})
    return NS(name="test-eat", method="eat", analysis=analysis,
              design=NS(gamma=0.01, generation=(0, 0)),
              harvest=NS(parties="AB", select="all"), extractor=NS(eps_ext=1e-8))


def test_seed_cost_table():
    # h2(gamma) + 2 gamma per round (methods note section 6 table, [N]); h2 checked against
    # scipy.stats.entropy with base 2 (reference library).
    from scipy.stats import entropy

    for gamma, per_round in ((0.1, 0.66900), (0.01, 0.10079), (0.001, 0.013408)):
        assert seed_bits_consumed(1.0, gamma) == pytest.approx(per_round, abs=6e-6)
        assert seed_bits_consumed(1.0, gamma) == pytest.approx(
            entropy([gamma, 1 - gamma], base=2) + 2 * gamma, rel=1e-12)
    assert seed_bits_consumed(1000, 1.0) == 2000  # two uniform setting bits per round


def test_quality_conversions():
    # w = 1/2 + S/8 (CHSH game, common practice); visibility v gives S = 2 sqrt2 v for the
    # optimal singlet strategy with white noise (common practice).
    assert honest_quality(chsh=2.0) == pytest.approx(0.75)
    assert honest_quality(visibility=1.0) == pytest.approx((2 + math.sqrt(2)) / 4)
    assert honest_quality(win_probability=0.8) == 0.8
    with pytest.raises(ParameterError):
        honest_quality(chsh=2.5, visibility=0.9)
    with pytest.raises(ParameterError, match="--visibility"):
        honest_quality(visibility=1.5)
    with pytest.raises(ParameterError, match="no expected device quality"):
        honest_quality()


def test_martingale_abort_bound_dominates_exact_probability():
    # Chernoff (Ann. Math. Stat. 23, 493 (1952)) gives an UPPER bound; check against the exact
    # distribution of D = W - L (trinomial increments), computed by convolution with numpy.
    n, gamma, win, s_th = 300, 0.5, 0.83, 2.3
    step = np.array([gamma * (1 - win), 1 - gamma, gamma * win])  # D increments -1, 0, +1
    dist = np.array([1.0])
    for _ in range(n):
        dist = np.convolve(dist, step)
    d_values = np.arange(-n, n + 1)
    exact = dist[d_values < gamma * n * s_th / 4].sum()
    bound = martingale_abort_bound(n, gamma, win, s_th)
    assert exact <= bound <= 1.0
    assert bound < 50 * exact  # and not vacuous


def test_min_trials_net_positive_regression():
    # Methods note section 6, smallest n with net expansion > 0 [N] (regression values computed
    # from the formulas; delta from the Chernoff formula, eps = 1e-8, net = r - 2 log2(1/eps)/n
    # - (h2(gamma) + 2 gamma)). Table rounded to 2 significant digits.
    def net(n, gamma, variant):
        d = chernoff_tolerance(n, gamma, 0.85, 1e-6)
        opt = optimise_df if variant == "df" else optimise_dfr
        r = opt(0.85 - d, n, gamma, 1e-8, 1e-8).rate_per_round
        return r - 2 * math.log2(1e8) / n - seed_bits_consumed(1.0, gamma)

    def smallest(gamma, variant):
        lo, hi = math.log(1e5), math.log(1e12)
        while hi - lo > 0.002:
            mid = (lo + hi) / 2
            lo, hi = (lo, mid) if net(math.exp(mid), gamma, variant) > 0 else (mid, hi)
        return math.exp(hi)

    assert smallest(0.01, "df") == pytest.approx(2.4e6, rel=0.03)
    assert smallest(0.03, "df") == pytest.approx(1.6e6, rel=0.04)
    assert smallest(0.01, "dfr") == pytest.approx(6.4e8, rel=0.01)


def test_plan_eat_protocol_entries():
    res = plan(_eat_protocol(), trials=10**8, n_points=6, gamma_points=6)
    names = [m.name for m in res.methods]
    # The pair von Neumann rows (Gauss-Radau quadrature bound, issue 15) follow the one-party
    # EAT rows.
    assert names == ["martingale-azuma", "eat-df-conservative", "eat-dfr",
                     "eat-df-conservative+radau-vn-AB", "eat-dfr+radau-vn-AB", "pef-ns"]
    df = res.methods[1]
    assert df.thresholds == "declared" and df.side_information == "quantum"
    # Consistent arithmetic: output = floor(k - 2 log2(1/eps_ext)) (leftover hash lemma,
    # Tomamichel et al., IEEE TIT 57, 5524 (2011)); net = output - seed.
    assert df.output_bits == math.floor(df.certified_min_entropy_bits - 2 * math.log2(1e8))
    assert df.net_bits == pytest.approx(df.output_bits - df.settings_randomness_bits)
    assert df.abort_probability <= 1e-6  # tolerance derived from eps_comp by the exact tail
    # DF beats DFR (methods note 3(c)); the planner's smallest n are ordered.
    assert df.output_bits >= res.methods[2].output_bits
    assert df.min_trials_positive <= df.min_trials_net_positive
    # Exact completeness gives a smaller tolerance than Chernoff, hence at most the note's
    # Chernoff-based smallest n (2.4e6 at gamma = 0.01, w = 0.85).
    assert df.min_trials_net_positive <= 2.5e6
    assert res.min_trials_positive["eat-df-conservative"] == df.min_trials_positive
    assert set(res.best_gamma) == set(names)


def test_plan_shipped_martingale_protocol_and_determinism():
    proto = load_protocol(shipped_protocol_path("chsh-uniform"))
    a = plan(proto, n_points=5, gamma_points=5)
    b = plan(proto, n_points=5, gamma_points=5)
    assert a == b
    mart = a.methods[0]
    assert mart.name == "martingale-azuma" and mart.thresholds == "declared"
    assert mart.settings_randomness_bits == 2 * a.trials  # uniform settings every round
    assert a.win_probability == pytest.approx(0.5 + 2.74 / 8)


def test_plan_rejects_bad_gamma():
    with pytest.raises(ParameterError, match="gamma"):
        plan(_eat_protocol(), gamma=0.0, n_points=3, gamma_points=3)


# ----------------------------------------------------------------- CLI

runner = CliRunner()


def test_cli_json_keys_and_plot(tmp_path):
    proto = shipped_protocol_path("chsh-spotcheck")
    png = tmp_path / "plan.png"
    r = runner.invoke(app, ["plan", "--protocol", str(proto), "--trials", "1e7",
                            "--win-probability", "0.845", "--json", "--plot", str(png)])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    for key in ("methods", "min_trials_positive", "best_gamma"):
        assert key in doc
    for m in doc["methods"]:
        for key in ("name", "side_information", "output_bits", "output_bits_per_trial",
                    "settings_randomness_bits", "seed_bits", "net_bits", "abort_probability"):
            assert key in m
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)


@pytest.mark.parametrize("args,needle", [
    (["--chsh", "3.1"], "--chsh"),
    (["--trials", "-5"], "--trials"),
    (["--chsh", "2.5", "--visibility", "0.9"], "at most one"),
])
def test_cli_bad_input_one_line_exit_2(args, needle):
    proto = shipped_protocol_path("chsh-uniform")
    r = runner.invoke(app, ["plan", "--protocol", str(proto), *args])
    assert r.exit_code == 2
    err = r.stderr.strip().splitlines()
    assert len(err) == 1 and needle in err[0] and "Traceback" not in r.output


def test_cli_missing_protocol(tmp_path):
    r = runner.invoke(app, ["plan", "--protocol", str(tmp_path / "none.toml")])
    assert r.exit_code == 2 and len(r.stderr.strip().splitlines()) == 1


def test_params_objects_accepted_directly():
    proto = NS(name="direct", method="martingale",
               analysis=MartingaleParams(chsh_threshold=2.5, eps_est=1e-6),
               design=NS(gamma=1.0, generation=(0, 0)), harvest=NS(parties="A", select="all"),
               extractor=NS(eps_ext=1e-8))
    res = plan(proto, chsh=2.7, trials=10**6, n_points=4, gamma_points=4)
    assert res.methods[0].output_bits > 0


# ----------------------------------------------------------------- probability estimation (PEF)

PHOTONIC_PROTOCOL = Path(__file__).resolve().parents[1] / "protocols" / "ch-photonic.toml"


def _pef_protocol(**cal):
    """A PEF protocol for the methods note's 512-bit plans (sigma 512 bits, eps_PE = 2^-64)."""
    analysis = PefParams(beta=0.1, eps_pe=2.0 ** -64, sigma_target_bits=512, n_max=10**6,
                         lam=0.0, **cal)
    return NS(name="pef-512", method="pef", analysis=analysis, design=SettingsDesign(),
              harvest=NS(parties="AB", select="all"), extractor=NS(eps_ext=1e-8))


def _pef_row(result):
    rows = [m for m in result.methods if m.pef is not None]
    assert len(rows) == 1
    return rows[0]


@pytest.fixture(scope="module")
def tsirelson_plan():
    proto = _pef_protocol(calibration="isotropic", calibration_chsh=2 * math.sqrt(2))
    return plan(proto, n_points=6, gamma_points=2)


@pytest.fixture(scope="module")
def photonic_plan():
    return plan(_pef_protocol(calibration="prefix", calibration_trials=1000), n_points=6,
                gamma_points=2)


def test_pef_plan_tsirelson_box_512_bits(tsirelson_plan):
    # Regression values computed from the formulas in the methods note (probability-estimation,
    # section 4, [N]): 512 bits at eps_PE = 2^-64 need n ~ 3.2e3 at beta ~ 0.14; latency floor
    # 64 / D_LR = 1383 trials with D_LR = 0.0462738 (van Dam, Gill & Grunwald, IEEE TIT 51,
    # 2812 (2005), from memory); h_inf = sqrt2 - 1 (section 3, [D]).
    res = tsirelson_plan
    assert "anticipated box" in res.device
    assert res.chsh == pytest.approx(2 * math.sqrt(2), abs=1e-9)
    row = _pef_row(res)
    d = row.pef
    assert row.name == "pef-ns" and row.thresholds == "declared"
    assert row.side_information == "classical"
    assert d.model == "ns" and d.target_bits == 512 and d.target_source == "declared"
    assert 0.10 < d.beta_chosen < 0.18
    assert d.expected_trials_at_beta_chosen == pytest.approx(3.2e3, rel=0.05)
    assert d.latency_floor_trials == pytest.approx(1383, abs=2)
    assert d.asymptotic_rate_bits == pytest.approx(math.sqrt(2) - 1, abs=1e-6)
    # Declared beta = 0.1: r(0.1) = 0.341247 bits/trial (note section 4, [N]); the expected
    # trials are the threshold over E[log2 F] (note section 3), and the planner's beta needs
    # at most as many.
    assert d.rate_bits_per_trial == pytest.approx(0.341247, rel=1e-4)
    assert d.expected_trials == pytest.approx((0.1 * 512 + 64) / d.expected_log2_factor)
    assert d.expected_trials_at_beta_chosen <= d.expected_trials
    assert d.latency_floor_trials < d.expected_trials < d.trials_for_completeness
    # Output on success: floor(k - 2 log2(1/eps_ext)) with k = sigma_target - 1 (leftover hash
    # lemma, Tomamichel et al., IEEE TIT 57, 5524 (2011); the -1 from note section 2 (ii)).
    assert row.output_bits == math.floor(511 - 2 * math.log2(1e8))
    assert row.settings_randomness_bits == pytest.approx(2 * d.expected_trials)  # uniform settings, 2 bits/trial
    assert row.net_bits == pytest.approx(row.output_bits - row.settings_randomness_bits)
    assert row.abort_probability < 1e-6  # cap 1e6 trials is ~300x the expected 3.4e3


def test_pef_plan_photonic_model_512_bits(photonic_plan):
    # Regression values computed from the formulas in the methods note (section 4, [N]),
    # photonic Eberhard-type model, 512 bits at eps_PE = 2^-64: expected n = 3.0e5, n for 99%
    # completeness (normal approximation) = 4.2e5, beta* ~ 0.023 (flat optimum).
    res = photonic_plan
    assert res.device.startswith("photonic model")
    assert res.chsh == pytest.approx(2.0336, abs=1e-4)  # note: CHSH 2.0336
    d = _pef_row(res).pef
    assert 0.015 < d.beta_chosen < 0.035
    assert d.expected_trials_at_beta_chosen == pytest.approx(3.0e5, rel=0.05)
    assert d.trials_for_completeness_at_beta_chosen == pytest.approx(4.2e5, rel=0.05)
    assert d.statistical_strength_bits == pytest.approx(2.7528e-4, rel=1e-3)  # D_LR, [N]
    assert d.calibration_trials == 1000
    # Honest abort within the cap 1e6: normal approximation gives ~1e-9; the Chernoff bound
    # (an upper bound) must lie above it and below one.
    from scipy.stats import norm

    normal = norm.sf((1e6 * d.expected_log2_factor - d.threshold_log2)
                     / (d.sd_log2_factor * math.sqrt(1e6)))
    assert normal < _pef_row(res).abort_probability < 1e-2


def test_chernoff_bounds_dominate_exact_binomial_tail():
    # Chernoff (Ann. Math. Stat. 23, 493 (1952)): an upper bound on the lower tail of a sum of
    # i.i.d. variables. Two-valued log2 F: S_n = n l0 + K (l1 - l0), K ~ Binomial(n, p), exact
    # tail from scipy.stats.binom (reference library).
    from scipy.stats import binom

    from dicert.plan import _log_mgf

    l0, l1, p, n = -0.05, 0.04, 0.6, 4000
    lmgf = _log_mgf(np.array([l0, l1]), np.array([1 - p, p]))
    for thr in (10.0, 20.0, 35.0):
        k_max = math.ceil((thr - n * l0) / (l1 - l0)) - 1  # S_n < thr  <=>  K <= k_max
        exact = binom.cdf(k_max, n, p)
        bound = chernoff_shortfall_bound(n, thr, lmgf)
        assert exact <= bound <= 1.0
        assert bound < 20 * exact + 1e-300  # and not vacuous
    # The reachable threshold is the inverse: its bound is eps (to the theta-grid resolution).
    t = chernoff_reachable_threshold(n, lmgf, 1e-6)
    assert chernoff_shortfall_bound(n, t, lmgf) <= 1e-6 * (1 + 1e-9)
    assert chernoff_shortfall_bound(n, t + 1.0, lmgf) > 1e-6
    assert binom.cdf(math.ceil((t - n * l0) / (l1 - l0)) - 1, n, p) <= 1e-6


def test_pef_classical_device_certifies_nothing():
    # S = 2 is the local bound (Clauser, Horne, Shimony & Holt, PRL 23, 880 (1969)); the
    # isotropic box at S = 2 is local, and for local boxes every PEF has E[F] <= 1 (methods note
    # section 1, fact (d); Knill, Zhang & Bierhorst 2020), so no target is ever expected.
    res = plan(load_protocol(PHOTONIC_PROTOCOL), chsh=2.0, n_points=5, gamma_points=2)
    row = _pef_row(res)
    assert row.output_bits == 0 and row.net_bits < 0 and row.output_bits_per_trial == 0
    assert row.abort_probability == 1.0
    assert row.min_trials_positive is None and row.best_gamma is None
    assert max(row.curve_output_bits) == 0
    assert row.pef.expected_trials == math.inf and row.pef.latency_floor_trials == math.inf
    assert row.pef.expected_log2_factor <= 0


def test_pef_derived_row_for_chsh_protocols():
    # A CHSH protocol gets a derived PEF row (classical side information, NS model) whose
    # target is reachable with honest abort <= eps_comp; its output per trial stays below
    # h_inf = (S - 2)/2 for isotropic boxes (methods note section 3, [D]: r(beta) <= h_inf).
    res = plan(load_protocol(shipped_protocol_path("chsh-uniform")), trials=10**6, n_points=5,
               gamma_points=2)
    assert [m.name for m in res.methods][-1] == "pef-ns"
    row = _pef_row(res)
    d = row.pef
    assert row.thresholds == "derived" and d.target_source == "derived"
    assert d.model == "ns" and d.eps_pe == 1e-6  # the protocol's eps_est
    assert 0 < row.abort_probability <= res.eps_comp * (1 + 1e-9)
    assert 0 < row.output_bits < d.target_bits < 1e6 * (2.74 - 2) / 2
    assert d.expected_trials < 1e6 <= d.trials_cap


def test_cli_photonic_protocol_json_and_table(tmp_path):
    png = tmp_path / "photonic.png"
    r = runner.invoke(app, ["plan", "--protocol", str(PHOTONIC_PROTOCOL), "--json",
                            "--plot", str(png)])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["trials"] == 100_000_000 and doc["trials_source"] == "protocol"  # n_max
    assert doc["device"].startswith("photonic model")
    for m in doc["methods"]:
        for key in ("name", "side_information", "output_bits", "output_bits_per_trial",
                    "settings_randomness_bits", "seed_bits", "net_bits", "abort_probability",
                    "pef"):
            assert key in m
    pef = [m for m in doc["methods"] if m["name"] == "pef-ns"]
    assert len(pef) == 1 and pef[0]["thresholds"] == "declared"
    d = pef[0]["pef"]
    for key in ("beta", "beta_chosen", "model", "target_bits", "expected_trials",
                "trials_for_completeness", "latency_floor_trials", "calibration_trials"):
        assert key in d
    assert d["target_bits"] == 1024 and d["beta"] == 0.024 and d["model"] == "ns"
    # Consistent with the shipped file's comment (~2.5e5 analysis trials on average, 3.6e5 for
    # 99% success): regression values computed from the formulas in the methods note.
    assert d["expected_trials"] == pytest.approx(2.5e5, rel=0.05)
    assert d["trials_for_completeness"] == pytest.approx(3.6e5, rel=0.05)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    r = runner.invoke(app, ["plan", "--protocol", str(PHOTONIC_PROTOCOL), "--trials", "1e6"])
    assert r.exit_code == 0, r.output
    assert "pef-ns" in r.stdout and "beta used" in r.stdout and "photonic model" in r.stdout


def test_pef_adaptive_trivial_first_block_is_counted_as_consumed():
    # An adaptive run that starts from the trivial PEF (F = 1) earns nothing in its first block,
    # exactly like a calibration prefix of that length (methods note section 3, "Training
    # versus analysis"): the planner must charge it the same trials.
    common = dict(beta=0.1, eps_pe=2.0 ** -64, sigma_target_bits=512, n_max=10**6, lam=1e-3)
    mk = lambda **cal: NS(name="pef", method="pef", analysis=PefParams(**common, **cal),  # noqa: E731
                          design=SettingsDesign(), harvest=NS(parties="AB", select="all"),
                          extractor=NS(eps_ext=1e-8))
    adaptive = _pef_row(plan(mk(calibration="adaptive", block_trials=5000, initial="trivial"),
                             chsh=2.7, n_points=4, gamma_points=2))
    prefix = _pef_row(plan(mk(calibration="prefix", calibration_trials=5000),
                           chsh=2.7, n_points=4, gamma_points=2))
    assert adaptive.pef.calibration_trials == prefix.pef.calibration_trials == 5000
    assert adaptive.pef.trials_consumed == pytest.approx(prefix.pef.trials_consumed)
