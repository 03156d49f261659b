"""Trials dropped by the station join are charged, not assumed harmless (dicert.logspec._charge).

External facts the checks rest on:
- Binomial coefficients: brute-force enumeration and scipy.special.comb (exact=True), the
  SciPy reference implementation.
- The CHSH game: a round is won iff a XOR b = x AND y; a local model wins each round with
  probability at most 3/4 (common practice; e.g. Clauser, Horne, Shimony, Holt, PRL 23, 880
  (1969) in the game form), so dropping the losing rounds lifts a local device's win rate.
- Smooth min-entropy: removing b classical bits, or conditioning on a classical register of
  |P| values, lowers it by at most b, resp. log2|P| bits (Vitanov, Dupuis, Tomamichel, Renner,
  IEEE TIT 59, 2603 (2013); Tomamichel, Quantum Information Processing with Finite Resources,
  Springer (2016), ch. 6; section numbers from memory).
"""

from __future__ import annotations

import itertools
import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from dicert.errors import ParameterError
from dicert.logspec import (charged_counts, join_charge, pattern_bits, pattern_count)
from dicert.logspec import _charge
from tests.helpers import (ROOT, certify_spec_unsigned, cli, edit_join, seed_file, sim_trials,
                           station_spec, uniform_protocol, write_station_csv)

CLOCK = "2026-01-01T00:00:00Z"


# ------------------------------------------------------------------ the pattern count


def _strings(length: int, max_missing: int, kept: int | None = None) -> int:
    """Strings over {kept, missing at A, missing at B} of the given length with at most
    max_missing missing symbols (and exactly ``kept`` kept ones, if given), one by one."""
    total = 0
    for s in itertools.product("kAB", repeat=length):
        if len(s) - s.count("k") <= max_missing and (kept is None or s.count("k") == kept):
            total += 1
    return total


@pytest.mark.parametrize("n,big_n", [(0, 0), (0, 3), (1, 1), (2, 2), (3, 1), (3, 3), (4, 2),
                                     (5, 3)])
def test_pattern_count_brute_force(n, big_n):
    """The count is that of drop patterns over n + N trials, and bounds the patterns of a run
    of T = n + d trials (d <= N dropped) and of j <= N trials dropped around n matched ones."""
    count = pattern_count(n, big_n)
    assert count == _strings(n + big_n, big_n)
    for d in range(big_n + 1):
        assert count >= _strings(n + d, big_n)
    around = sum(_strings(n + j, big_n, kept=n) for j in range(big_n + 1))
    assert count >= around
    # less than one bit looser than either (same largest terms)
    assert count < 2 * around or big_n == 0


@pytest.mark.parametrize("n,big_n", [(10, 1), (3997, 3), (10**6, 50), (10**8, 7), (12, 40)])
def test_pattern_count_and_bits_against_scipy_comb(n, big_n):
    from scipy.special import comb

    want = sum(int(comb(n + big_n, j, exact=True)) * 2**j for j in range(big_n + 1))
    assert pattern_count(n, big_n) == want
    bits, how = pattern_bits(n, big_n)
    assert how.startswith("exact")
    # rounded UP, and tight: 2**bits >= count, bits - log2(count) tiny
    exact_log2 = math.log2(want) if want < 2**1000 else (
        want.bit_length() - 1 + math.log2(want / 2 ** (want.bit_length() - 1)))
    assert bits >= exact_log2
    assert bits - exact_log2 < 1e-9 * max(1.0, exact_log2)
    # exact check of the rounding up: 2**bits >= count, in 60-digit arithmetic
    mpmath = pytest.importorskip("mpmath")
    with mpmath.workdps(60):
        assert mpmath.power(2, mpmath.mpf(bits)) >= want


def test_pattern_bits_small_exact_values():
    # sum_{j<=1} C(4, j) 2^j = 1 + 4*2 = 9 (brute force above); log2 9 = 3.1699250014...
    bits, _ = pattern_bits(3, 1)
    assert 3.169925001442312 <= bits < 3.169925001442313 + 1e-12
    # sum_{j<=2} C(5, j) 2^j = 1 + 10 + 40 = 51
    assert math.log2(51) <= pattern_bits(3, 2)[0] < math.log2(51) + 1e-12
    assert pattern_bits(5, 0) == (0.0, "exact: no trial may be dropped (one pattern)")
    # n = 0, N = 1: the empty run, or one trial missing at A or at B: 3 patterns
    assert math.log2(3) <= pattern_bits(0, 1)[0] < math.log2(3) + 1e-12


def test_pattern_bits_large_bound_is_above_the_exact_value(monkeypatch):
    """Beyond the exact limit an lgamma bound is used: it must lie above the exact log2
    (computed here with integers) and within log2(N + 1) + a little of it."""
    monkeypatch.setattr(_charge, "EXACT_PATTERN_LIMIT", 10)
    for n, big_n in ((10**7, 300), (5, 400), (0, 50), (1000, 1000)):
        exact = math.log2(pattern_count(n, big_n)) if big_n < 1000 else _charge.log2_up(
            pattern_count(n, big_n))
        bound, how = pattern_bits(n, big_n)
        assert how.startswith("upper bound")
        assert exact <= bound <= exact + math.log2(big_n + 1) + 1e-3, (n, big_n)  # margin


def test_log2_up_powers_and_neighbours():
    assert _charge.log2_up(1) == 0.0 and _charge.log2_up(2**200) == 200.0
    v = _charge.log2_up(2**200 + 1)
    assert v > 200.0 and v - 200.0 < 1e-12


# ------------------------------------------------------------------ charged counts


def test_charged_counts_are_lost_test_rounds():
    from dicert.estimate import game_statistics

    c = np.zeros((2,) * 5, np.int64)
    c[1, 0, 0, 0, 0] = 10
    out = charged_counts(c, 6)
    n0, t0, w0 = game_statistics(c)
    n1, t1, w1 = game_statistics(out)
    assert (n1, t1, w1) == (n0 + 6, t0 + 6, w0)  # six more test rounds, no more wins
    # settings pairs in turn (0,0),(0,1),(1,0),(1,1),(0,0),(0,1); losing outcomes
    assert out[1, 0, 0, 0, 1] == 2 and out[1, 0, 1, 0, 1] == 2
    assert out[1, 1, 0, 0, 1] == 1 and out[1, 1, 1, 0, 0] == 1
    for (x, y), (a, b) in _charge.LOSING_OUTCOME.items():
        assert (a ^ b) != (x & y)  # CHSH game lost
    assert (c[1, 0, 0, 0, 0] == 10) and int(c.sum()) == 10  # input untouched


def test_join_charge_values_and_malformed_report():
    ch = join_charge({"matched": 3997, "missing_at_a": 1, "missing_at_b": 2, "max_missing": 3},
                     2)
    assert (ch.dropped_trials, ch.lost_test_rounds_charged, ch.raw_bits_subtracted) == (3, 3, 6)
    assert ch.pattern_bits == pattern_bits(3997, 3)[0]
    assert ch.total_bits >= 6 + ch.pattern_bits
    d = ch.to_dict()
    for k in ("dropped_trials", "lost_test_rounds_charged", "raw_bits_subtracted",
              "pattern_bits", "total_bits", "method", "references"):
        assert k in d
    with pytest.raises(ParameterError, match="join.missing_at_b must be a non-negative"):
        join_charge({"matched": 1, "missing_at_a": 0, "missing_at_b": -1, "max_missing": 3}, 2)
    with pytest.raises(ParameterError, match="more than its join.max_missing = 1"):
        join_charge({"matched": 1, "missing_at_a": 1, "missing_at_b": 1, "max_missing": 1}, 2)


# ------------------------------------------------------------------ end to end


_write_station = write_station_csv


def _spec(path: Path, max_missing: int) -> Path:
    return station_spec(path, max_missing)


def _clean_csv(path: Path, x, y, a, b):
    rows = [f"{int(x[i])},{int(y[i])},{int(a[i])},{int(b[i])}" for i in range(len(x))]
    path.write_text("x,y,a,b\n" + "\n".join(rows) + "\n")
    return path


_seed = seed_file


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """An honest simulated run of 6000 trials; station B lost 5 trials (max_missing 8)."""
    d = tmp_path_factory.mktemp("charge")
    arr = sim_trials(6000, seed=31)
    keys = np.arange(len(arr), dtype=np.int64) + 1000
    drop_idx = (7, 99, 1234, 3000, 5999)
    drop = {int(keys[i]) for i in drop_idx}
    _write_station(d / "a.csv", keys, arr.x, arr.a)
    _write_station(d / "b.csv", keys, arr.y, arr.b, drop=drop)
    _spec(d / "run.toml", 8)
    return {"dir": d, "arr": arr, "keys": keys, "drop_idx": drop_idx, "spec": d / "run.toml"}


def _certify(log, tmp, name, proto=None):
    from dicert.certify import certify

    return certify(log, proto or uniform_protocol(), _seed(tmp), tmp / name,
                   clock=lambda: CLOCK)


def test_charged_estimate_equals_clean_log_with_lost_rounds(run, tmp_path):
    """The record's (charged) estimate and finite-size result are those of a clean log holding
    the kept trials plus one lost test round per dropped trial (settings pairs in turn)."""
    arr, drop_idx = run["arr"], run["drop_idx"]
    keep = np.setdiff1d(np.arange(len(arr)), drop_idx)
    x, y, a, b = (np.asarray(v)[keep] for v in (arr.x, arr.y, arr.a, arr.b))
    lost = [((0, 0), (0, 1)), ((0, 1), (0, 1)), ((1, 0), (0, 1)), ((1, 1), (0, 0)),
            ((0, 0), (0, 1))]  # five dropped: (0,0),(0,1),(1,0),(1,1),(0,0), each lost
    lx, ly, la, lb = (np.array(v) for v in zip(*[(s[0], s[1], o[0], o[1]) for s, o in lost]))
    clean = _clean_csv(tmp_path / "clean.csv", np.r_[x, lx], np.r_[y, ly], np.r_[a, la],
                       np.r_[b, lb])
    joined = _certify(run["spec"], tmp_path, "joined").record
    ref = _certify(clean, tmp_path, "clean").record
    assert joined["estimate"] == ref["estimate"]
    assert joined["entropy"]["finite_size"] == ref["entropy"]["finite_size"]
    charge = joined["log"]["spec"]["join"]["charge"]
    assert charge["charged_counts"] == ref["counts"]["values"]
    assert (charge["dropped_trials"], charge["raw_bits_subtracted"]) == (5, 10)
    assert charge["pattern_bits"] == pattern_bits(5995, 8)[0]
    assert charge["pattern_bits"] >= math.log2(sum(math.comb(6003, j) * 2**j for j in range(9)))
    # the certified min-entropy is the clean log's minus the charge (never more)
    k_ref = ref["certified_min_entropy_bits"]
    assert joined["certified_min_entropy_bits"] == pytest.approx(
        max(0.0, k_ref - charge["total_bits"]), rel=0, abs=1e-9)
    assert joined["certified_min_entropy_bits"] <= k_ref - charge["total_bits"] + 1e-9
    # the uncharged estimate of the kept trials is also in the record
    kept = _certify(_clean_csv(tmp_path / "kept.csv", x, y, a, b), tmp_path, "kept").record
    assert charge["uncharged_estimate"] == kept["estimate"]
    assert joined["estimate"]["chsh_lower_bound"] < kept["estimate"]["chsh_lower_bound"]
    assert any("checked / charged" in s for s in joined["assumptions"])


def test_certify_with_drops_never_yields_more_bits_than_without(run, tmp_path):
    """The same run with no trial missing (complete join) and the kept trials as a clean log
    both give at least as many certified bits as the run whose join dropped trials."""
    d = tmp_path / "full"
    d.mkdir()
    arr, keys = run["arr"], run["keys"]
    _write_station(d / "a.csv", keys, arr.x, arr.a)
    _write_station(d / "b.csv", keys, arr.y, arr.b)
    full = _certify(_spec(d / "run.toml", 0), tmp_path, "out-full")
    dropped = _certify(run["spec"], tmp_path, "dropped")
    keep = np.setdiff1d(np.arange(len(arr)), run["drop_idx"])
    kept = _certify(_clean_csv(tmp_path / "kept.csv", *(np.asarray(v)[keep] for v in (
        arr.x, arr.y, arr.a, arr.b))), tmp_path, "kept")
    assert full.status == kept.status == "certified"
    assert "charge" not in full.record["log"]["spec"]["join"]  # max_missing 0: nothing charged
    k = dropped.record["certified_min_entropy_bits"]
    assert k < full.record["certified_min_entropy_bits"]
    assert k < kept.record["certified_min_entropy_bits"]
    assert dropped.output_bits <= min(full.output_bits, kept.output_bits)


def test_tolerance_without_drops_still_charges_the_pattern(run, tmp_path):
    """max_missing > 0 and nothing dropped: no lost round, but the drop pattern is charged
    (the adversary chose the empty pattern among sum_j C(n+N, j) 2^j)."""
    d = tmp_path / "nodrop"
    d.mkdir()
    arr, keys = run["arr"], run["keys"]
    _write_station(d / "a.csv", keys, arr.x, arr.a)
    _write_station(d / "b.csv", keys, arr.y, arr.b)
    rec0 = _certify(_spec(d / "zero.toml", 0), tmp_path, "zero").record
    rec = _certify(_spec(d / "run.toml", 8), tmp_path, "eight").record
    ch = rec["log"]["spec"]["join"]["charge"]
    assert (ch["dropped_trials"], ch["raw_bits_subtracted"]) == (0, 0)
    assert ch["pattern_bits"] == ch["total_bits"] == pattern_bits(6000, 8)[0]
    assert rec["estimate"] == rec0["estimate"]
    assert rec["certified_min_entropy_bits"] == pytest.approx(
        rec0["certified_min_entropy_bits"] - ch["total_bits"], abs=1e-9)


def test_dropping_losing_rounds_no_longer_certifies_a_local_device(tmp_path):
    """A classical (local) device wins the CHSH game at most 3/4 of the rounds; an adversary
    who makes the losing rounds go missing at station B lifts the kept trials to a win rate of
    1. Uncharged, the kept trials certify; charged, the run aborts."""
    from dicert.estimate import game_statistics
    from dicert.stages.analysis import analyse_counts

    arr = sim_trials(8000, seed=17, model="classical-random")
    x, y = np.asarray(arr.x), np.asarray(arr.y)
    win = (np.asarray(arr.a) ^ np.asarray(arr.b)) == (x & y)
    assert 0.70 < win.mean() <= 0.80  # the local bound (common practice), with noise
    keys = np.arange(len(arr), dtype=np.int64) + 1
    # in each settings pair, drop the first losing rounds until the kept trials win 85 % (near
    # the quantum maximum cos^2(pi/8) = 0.8536, so the physical-range check cannot catch it;
    # the same share in every pair, so the settings checks cannot either)
    drop: set[int] = set()
    for sx in (0, 1):
        for sy in (0, 1):
            here = (x == sx) & (y == sy)
            wins, lost = keys[here & win], keys[here & ~win]
            keep_losses = int(len(wins) * 0.15 / 0.85)
            drop |= {int(k) for k in lost[: len(lost) - keep_losses]}
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a)
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, drop=drop)
    spec = _spec(tmp_path / "run.toml", len(drop))
    res = _certify(spec, tmp_path, "out")
    assert res.status == "aborted" and res.output_bits == 0
    rec = res.record
    assert rec["log"]["spec"]["join"]["charge"]["dropped_trials"] == len(drop)
    n, nt, w = game_statistics(np.array(rec["counts"]["values"]))
    assert abs(w / n - 0.85) < 0.002 and n == nt
    # what the old, uncharged analysis would have done with the same kept counts:
    proto = uniform_protocol()
    old = analyse_counts(np.array(rec["counts"]["values"]), proto, 2 * n)
    assert old.status == "certified" and old.output_bits > 0, old.abort_reason
    assert "below the pre-declared threshold" in rec["abort_reason"]


def test_eat_protocol_charges_losses(tmp_path):
    """Entropy accumulation counts losses among test rounds: a dropped trial is one more."""
    from dicert.protocol import load_protocol
    from dicert.stages.analysis import analyse_counts

    proto = load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml")
    arr = sim_trials(200_000, seed=3, gamma=proto.design.gamma)
    c = np.zeros((2,) * 5, np.int64)
    np.add.at(c, (np.asarray(arr.t), np.asarray(arr.x), np.asarray(arr.y), np.asarray(arr.a),
                  np.asarray(arr.b)), 1)
    join = {"matched": int(c.sum()), "missing_at_a": 4, "missing_at_b": 0, "max_missing": 4}
    charged = analyse_counts(c, proto, 2 * int(c.sum()), join=join)
    ref = analyse_counts(charged_counts(c, 4), proto, 2 * int(c.sum()))
    assert charged.finite.details["losses"] == ref.finite.details["losses"]
    assert charged.finite.details["losses"] == analyse_counts(
        c, proto, 2 * int(c.sum())).finite.details["losses"] + 4
    assert charged.certified_min_entropy_bits <= max(0.0, ref.certified_min_entropy_bits
                                           - charged.charge.total_bits) + 1e-9


# ------------------------------------------------------------------ pef, verify, CLI


_cli = cli


def test_pef_refuses_a_join_with_drops(run, tmp_path):
    from dicert.protocol import load_protocol
    from dicert.stages.analysis import analyse_counts

    proto = load_protocol(ROOT / "protocols" / "ch-photonic.toml")
    join = {"matched": 100, "missing_at_a": 0, "missing_at_b": 1, "max_missing": 2}
    with pytest.raises(ParameterError, match="method 'pef' .* cannot charge a trial that is "
                       "not there"):
        analyse_counts(np.ones((2,) * 5, np.int64), proto, 64, join=join, source="s.toml")
    out = tmp_path / "out"
    r = _cli("certify", "--log-spec", run["spec"], "--protocol",
             ROOT / "protocols" / "ch-photonic.toml", "--seed", _seed(tmp_path), "--out", out)
    assert r.exit_code == 2, r.output
    lines = [ln for ln in r.output.strip().splitlines() if ln.strip()]
    assert "Traceback" not in r.output
    assert any("the station join dropped 5 trials; method 'pef'" in ln for ln in lines)
    assert not out.exists() or not any(out.iterdir())


def test_verify_round_trip_and_tampered_charge(run, tmp_path):
    seed, rec, body = certify_spec_unsigned(run["spec"], tmp_path)
    assert _cli("verify", rec).exit_code == 4
    for path, value in ((("charge", "pattern_bits"), 0.0),
                        (("charge", "raw_bits_subtracted"), 0),
                        (("charge", "lost_test_rounds_charged"), 0),
                        (("missing_at_b",), 0), (("missing_at_b",), 9),
                        (("missing_at_b",), "x"), (("max_missing",), 4)):
        bad = _cli("verify", edit_join(body, path, value, tmp_path))
        assert bad.exit_code == 1, (path, bad.output)
        assert "log.spec.join" in bad.output or "log.trials" in bad.output, bad.output
    # the charge removed: it is re-derived, so the record is refused
    bad = _cli("verify", edit_join(body, ("charge",), None, tmp_path))
    assert bad.exit_code == 1 and "log.spec.join" in bad.output, bad.output


def test_inspect_and_entropy_show_the_charge(run):
    r = _cli("inspect", "--log-spec", run["spec"], "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    ch = doc["join_charge"]
    uncharged = doc["chsh_lower_bound"] if "chsh_lower_bound" in doc else doc["chsh_lower"]
    assert ch["dropped_trials"] == 5 and ch["charged_chsh_lower_bound"] < uncharged
    assert ch["pattern_bits"] == pattern_bits(5995, 8)[0]
    r = _cli("inspect", "--log-spec", run["spec"])
    assert r.exit_code == 0 and "charged" in r.output
    r = _cli("entropy", "--log-spec", run["spec"], "--method", "analytic", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    assert doc["log"]["join_charge"]["lost_test_rounds_charged"] == 5


def test_record_from_before_the_charge_verifies_with_a_note(run, tmp_path, monkeypatch):
    """A dicert-record/3 record (before the join charge) with dropped trials re-derives as
    written, uncharged, and verify says its drops were not charged."""
    from dicert.audit.record import seal_record, write_record
    from dicert.stages import analysis as stage
    from dicert.stages.record import LEGACY_DROP_ASSUMPTION

    with monkeypatch.context() as m:  # certify as before the charge
        m.setattr(stage, "join_charge_for", lambda *a, **k: None)
        body = _certify(run["spec"], tmp_path, "old").record
    body = {k: v for k, v in body.items() if k not in ("signature", "record_sha256")}
    assert "charge" not in body["log"]["spec"]["join"]
    assert LEGACY_DROP_ASSUMPTION.format(dropped=5) in body["assumptions"]
    # written as dicert-record/3: the /4 members out, the estimate names of /3
    sr = body["entropy"]["single_round"]
    for k in ("single_round_bound_bits_at_chsh_estimate",
              "von_neumann_bound_bits_at_chsh_estimate"):
        sr.pop(k)
    for k in ("single_round_bound_bits", "von_neumann_bound_bits"):
        sr[f"{k}_at_chsh_estimate"] = sr.pop(f"{k}_at_chsh_ratio_estimate")
    est = body["estimate"]
    est["chsh_martingale"] = est.pop("chsh_estimate")
    est["chsh_estimate"] = est.pop("chsh_ratio_estimate")
    body["format"] = "dicert-record/3"
    write_record(tmp_path / "v3.json", seal_record(body))
    r = _cli("verify", tmp_path / "v3.json", "--json")
    assert r.exit_code == 4, r.output
    notes = json.loads(r.output)["notes"]
    assert any("predates the station-join charge: its 5 trials dropped by the join were NOT "
               "charged" in n for n in notes), notes
    r = _cli("verify", tmp_path / "v3.json", "--log-spec", run["spec"], "--seed",
             _seed(tmp_path))
    assert r.exit_code == 4, r.output
    # the same body claimed as today's format must carry the charge: refused
    body["format"] = "dicert-record/4"
    write_record(tmp_path / "v4.json", seal_record(body))
    assert _cli("verify", tmp_path / "v4.json").exit_code == 1


def test_pef_without_drops_is_charged_the_pattern():
    """A pef run whose join tolerated drops but dropped none: only the pattern bits come off
    its certified min-entropy (the pef result itself is taken as given here)."""
    from types import SimpleNamespace

    from dicert.finite.result import FiniteSizeResult
    from dicert.protocol import load_protocol
    from dicert.stages.analysis import analyse_counts

    proto = load_protocol(ROOT / "protocols" / "ch-photonic.toml")
    fin = FiniteSizeResult(method="pef", side_information="quantum", accepted=True,
                           certified_min_entropy_bits=5000.0, eps={"eps_pe": 1e-6})
    c = np.zeros((2,) * 5, np.int64)
    c[1, 0, 0, 0, 0] = 10**5
    join = {"matched": 10**5, "missing_at_a": 0, "missing_at_b": 0, "max_missing": 4}
    ok = SimpleNamespace(passed=True, abort_reason=None)
    res = analyse_counts(c, proto, 2 * 10**5, finite=fin, design=ok, join=join)
    pb = pattern_bits(10**5, 4)[0]
    assert res.charge.total_bits == pb and res.certified_min_entropy_bits == 5000.0 - pb
    assert analyse_counts(c, proto, 2 * 10**5, finite=fin, design=ok).certified_min_entropy_bits == 5000.0


def test_report_shows_the_charge(run, tmp_path):
    """The report's entropy section lists the charge, each number tagged with its record key
    and rounded in the safe direction (bits charged up, the CHSH bound down)."""
    from dicert.reporting.content import _sections

    rec = _certify(run["spec"], tmp_path, "rep").record
    facts = {x.key: x for _, items in _sections(rec) for x in items}
    ch = rec["log"]["spec"]["join"]["charge"]
    key = "log.spec.join.charge"
    assert facts[f"{key}.dropped_trials"].text == "5"
    assert facts[f"{key}.raw_bits_subtracted"].text == "10"
    for k in ("pattern_bits", "total_bits"):
        assert float(facts[f"{key}.{k}"].text) >= ch[k] > float(facts[f"{key}.{k}"].text) - 1e-3
    low = facts[f"{key}.uncharged_estimate.chsh_lower_bound"]
    assert float(low.text) <= ch["uncharged_estimate"]["chsh_lower_bound"]
    again = _certify(run["spec"], tmp_path, "rep2").record
    assert again["log"]["spec"]["join"]["charge"] == ch  # deterministic
