"""Tests of the planner and the ``dicert plan`` command. Sources named beside each check."""

from __future__ import annotations

import json
import math
import types

import numpy as np
import pytest
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.errors import ParameterError
from dicert.finite import EatParams, MartingaleParams
from dicert.finite.eat import chernoff_tolerance, optimise_df, optimise_dfr
from dicert.plan import honest_quality, martingale_abort_bound, plan, seed_bits_consumed
from dicert.protocol import load_protocol, shipped_protocol_path

NS = types.SimpleNamespace


def _eat_protocol(**kw):
    analysis = EatParams(**{"expected_win_probability": 0.85, "eps_comp": 1e-6, "eps_s": 1e-8,
                            "eps_ea": 1e-8, **kw})
    return NS(name="test-eat", method="eat", analysis=analysis,
              design=NS(gamma=0.01, generation=(0, 0)),
              harvest=NS(parties="AB", rounds="all"), extractor=NS(eps_ext=1e-8))


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
    assert names == ["martingale-azuma", "eat-df-conservative", "eat-dfr"]
    df = res.methods[1]
    assert df.thresholds == "declared" and df.side_information == "quantum"
    # Consistent arithmetic: output = floor(k - 2 log2(1/eps_ext)) (leftover hash lemma,
    # Tomamichel et al., IEEE TIT 57, 5524 (2011)); net = output - seed.
    assert df.certified_bits == math.floor(df.min_entropy_bits - 2 * math.log2(1e8))
    assert df.net_bits == pytest.approx(df.certified_bits - df.seed_bits)
    assert df.abort_probability <= 1e-6  # tolerance derived from eps_comp by the exact tail
    # DF beats DFR (methods note 3(c)); the planner's smallest n are ordered.
    assert df.certified_bits >= res.methods[2].certified_bits
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
    assert mart.seed_bits == 2 * a.trials  # uniform settings every round
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
        for key in ("name", "side_information", "certified_bits", "rate_per_trial",
                    "seed_bits", "net_bits", "abort_probability"):
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
               design=NS(gamma=1.0, generation=(0, 0)), harvest=NS(parties="A", rounds="all"),
               extractor=NS(eps_ext=1e-8))
    res = plan(proto, chsh=2.7, trials=10**6, n_points=4, gamma_points=4)
    assert res.methods[0].certified_bits > 0
