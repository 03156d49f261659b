"""Entropy accumulation with the pair's von Neumann bound (single_round = "radau-vn-AB").

Sources: Dupuis & Fawzi, IEEE TIT 65, 7596 (2019) (improved second-order EAT); Dupuis, Fawzi &
Renner, CMP 379, 867 (2020); Brown, Fawzi & Fawzi, Quantum 8, 1445 (2024) [BFF] (the single-round
bound); methods note "entropy-accumulation" (regression value 0.8956 bits/trial at w = 0.85,
n = 1e10, gamma = 0.01) and "pair-von-neumann" (goal >= 1.10).
"""

from __future__ import annotations

import math
import types
from pathlib import Path

import numpy as np
import pytest

from dicert.entropy.analytic import vn_entropy_win
from dicert.entropy.vnquad import load_vn_table
from dicert.errors import ProtocolError
from dicert.estimate import SettingsDesign
from dicert.finite import EatParams, certify_eat
from dicert.finite.eat import eat_min_entropy, optimise_df, optimise_lines, quadrature_lines
from dicert.plan import plan

ROOT = Path(__file__).resolve().parents[1]
NS = types.SimpleNamespace
EPS = 1e-8  # eps_s = eps_ea = eps_ext as in protocols/chsh-spotcheck.toml


def _protocol(**kw):
    analysis = EatParams(**{"expected_win_probability": 0.85, "eps_comp": 1e-6, "eps_s": EPS,
                            "eps_ea": EPS, **kw})
    return NS(name="test-eat-pair", method="eat", analysis=analysis,
              design=NS(gamma=0.01, generation=(0, 0)),
              harvest=NS(parties="AB", select="all"), extractor=NS(eps_ext=EPS))


def test_plan_goal_rate_at_w085():
    # Issue goal: at w = 0.85, n = 1e10, gamma = 0.01 the best quantum-side-information rate
    # rises from the one-party value (0.8956 bits/trial, methods note table, Chernoff
    # tolerance; the planner's exact binomial tolerance is a little smaller) to >= 1.10.
    res = plan(_protocol(), trials=10**10, n_points=3, gamma_points=3)
    rows = {m.name: m for m in res.methods}
    old = rows["eat-df-conservative"]
    new = rows["eat-df-conservative+radau-vn-AB"]
    assert 0.8956 - 1e-4 <= old.output_bits_per_trial <= 0.8956 + 2e-3
    assert new.output_bits_per_trial >= 1.10
    assert new.side_information == "quantum" and new.parameters["single_round"] == "radau-vn-AB"
    best_q = max(m.output_bits_per_trial for m in res.methods if m.side_information == "quantum")
    assert best_q == new.output_bits_per_trial
    # DFR row with the pair bound exists too and never beats DF (methods note 3(c))
    assert rows["eat-dfr+radau-vn-AB"].output_bits_per_trial <= new.output_bits_per_trial


def test_rate_never_exceeds_the_single_round_bound():
    # Finite-size rates stay below the asymptotic single-round value g_AB(w_c) (the table's
    # maximum over lines at the certified win rate), and DF's rate with the pair lines beats
    # the one-party tangents at large n.
    tab = load_vn_table()
    for w_c, n in ((0.84, 1e8), (0.85, 1e10), (0.8535, 1e12)):
        r = optimise_lines("df-conservative", quadrature_lines(), w_c, n, 0.01, EPS, EPS)
        assert r.rate_per_round < tab.bound(w_c, "AB")[0]
        assert r.h <= tab.bound(w_c, "AB")[0] + 1e-12
        assert r.rate_per_round > optimise_df(w_c, n, 0.01, EPS, EPS).rate_per_round


def _counts(rng, n, gamma, win_probability):
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    n_test = rng.binomial(n, gamma)
    wins = rng.binomial(n_test, win_probability)
    per = rng.multinomial(wins, [0.25] * 4)
    per_l = rng.multinomial(n_test - wins, [0.25] * 4)
    for k, (x, y) in enumerate(((0, 0), (0, 1), (1, 0), (1, 1))):
        c[1, x, y, 0, x & y] = per[k]
        c[1, x, y, 0, 1 - (x & y)] = per_l[k]
    c[0, 0, 0, 0, 0] = n - n_test
    return c


def test_honest_counts_certify_the_planned_amount():
    rng = np.random.default_rng(11)
    n, gamma = 10**7, 0.05
    params = EatParams(expected_win_probability=0.84, tolerance=0.012, eps_s=EPS, eps_ea=EPS,
                       single_round="radau-vn-AB")
    r = certify_eat(_counts(rng, n, gamma, 0.843), params,
                    SettingsDesign(gamma=gamma, generation=(0, 0)))
    assert r.accepted and r.method == "eat-df-conservative+radau-vn-AB"
    planned, _, rate = eat_min_entropy(params, n, gamma)
    assert r.certified_min_entropy_bits == planned == pytest.approx(n * rate.rate_per_round)
    old = certify_eat(_counts(np.random.default_rng(11), n, gamma, 0.843),
                      EatParams(expected_win_probability=0.84, tolerance=0.012, eps_s=EPS,
                                eps_ea=EPS), SettingsDesign(gamma=gamma, generation=(0, 0)))
    assert r.certified_min_entropy_bits > old.certified_min_entropy_bits
    sr = r.details["single_round"]
    assert sr["method"] == "radau-vn-AB" and "Brown" in sr["reference"]
    assert any("Brown" in ref for ref in r.references)


def test_classical_devices_never_certify_with_pair_bound():
    rng = np.random.default_rng(3)
    params = EatParams(expected_win_probability=0.84, tolerance=0.012, eps_s=EPS, eps_ea=EPS,
                       single_round="radau-vn-AB")
    r = certify_eat(_counts(rng, 10**6, 0.05, 0.75), params,
                    SettingsDesign(gamma=0.05, generation=(0, 0)))
    assert not r.accepted and r.certified_min_entropy_bits == 0.0


def test_params_key_validation():
    with pytest.raises(ProtocolError, match="single_round"):
        EatParams.from_mapping({"expected_win_probability": 0.84, "tolerance": 0.01,
                                "eps_s": EPS, "eps_ea": EPS, "single_round": "nope"}, "analysis")


@pytest.mark.slow
def test_shipped_pair_protocol_certifies_simulated_run_as_planned(tmp_path):
    # End to end: the example protocol on a simulated honest run (visibility 0.97, CHSH about
    # 2.74) certifies exactly the amount the planner predicts for its declared thresholds.
    from dicert.certify import certify
    from dicert.protocol import load_protocol
    from dicert.simulate import device_model, simulate_to_file

    proto = load_protocol(ROOT / "protocols" / "chsh-spotcheck-pair.toml")
    n = 1_000_000
    simulate_to_file(tmp_path / "q.btl", n, device_model("quantum", visibility=0.97),
                     gamma=0.05, rng_stream=41)
    (tmp_path / "seed.bin").write_bytes(np.random.default_rng(6).bytes(300_000))
    res = certify(tmp_path / "q.btl", proto, tmp_path / "seed.bin", tmp_path / "out")
    assert res.status == "certified" and res.output_bits > 0
    pl = plan(proto, trials=n, n_points=2, gamma_points=2)
    row = {m.name: m for m in pl.methods}["eat-df-conservative+radau-vn-AB"]
    assert row.thresholds == "declared"
    assert res.certified_min_entropy_bits == pytest.approx(row.certified_min_entropy_bits, rel=1e-12)
    assert res.output_bits == row.output_bits
    fs = res.record["entropy"]["finite_size"]
    assert "radau" in fs["method"]
    assert math.isfinite(res.certified_min_entropy_bits)
