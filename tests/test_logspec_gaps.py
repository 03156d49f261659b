"""Trials missing at BOTH stations: with ``[join] keys = "consecutive"`` they are visible gaps.

External facts the checks rest on:
- Binomial coefficients and the count of strings over an alphabet: brute-force enumeration
  (itertools.product) and scipy.special.comb (exact=True), the SciPy reference implementation.
- Multinomial/binomial identity sum_{j<=m} C(m, j) c^j = (c + 1)^m (the binomial theorem;
  common practice).
- The CHSH game: a round is won iff a XOR b = x AND y (common practice; Clauser, Horne,
  Shimony, Holt, PRL 23, 880 (1969) in the game form).
- Smooth min-entropy: conditioning on a classical register of |P| values lowers it by at most
  log2|P| bits (Tomamichel, Quantum Information Processing with Finite Resources, Springer
  (2016), ch. 6; section from memory).
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest

from dicert.errors import LogFormatError
from dicert.logspec import join_charge, load_spec, open_spec_log, pattern_bits, pattern_count
from tests.helpers import (ROOT, certify_spec_unsigned, cli, edit_join, seed_file, sim_trials,
                           station_spec, uniform_protocol, write_station_csv)

CLOCK = "2026-01-01T00:00:00Z"


_write_station = write_station_csv


def _spec(path: Path, max_missing: int, keys: str | None = "consecutive", first=None,
          last=None) -> Path:
    return station_spec(path, max_missing, keys, first, last)


def _tiny(d: Path, keys_a, keys_b) -> None:
    """Two station files with the given keys (setting 1, outcome +1 everywhere)."""
    for name, keys in (("a.csv", keys_a), ("b.csv", keys_b)):
        _write_station(d / name, keys, [0] * len(keys), [0] * len(keys))


def _join(spec: Path, chunk: int = 1 << 16):
    log = open_spec_log(spec)
    n = sum(int(c.codes.size) for c in log.iter_chunks(chunk))
    return n, log.join_report.to_dict()


_cli = cli


# ------------------------------------------------------------------ spec keys


def test_spec_declaration_parsed_and_validated(tmp_path):
    _tiny(tmp_path, [1, 2], [1, 2])
    s = load_spec(_spec(tmp_path / "s.toml", 0, first=1, last=9))
    assert (s.keys, s.first_key, s.last_key) == ("consecutive", 1, 9)
    assert load_spec(_spec(tmp_path / "n.toml", 0, keys=None)).keys is None
    for kw, key in (({"keys": "sorted"}, "join.keys"),
                    ({"keys": None, "first": 3}, "join.first_key"),
                    ({"first": -1}, "join.first_key"),
                    ({"first": 5, "last": 4}, "join.last_key")):
        with pytest.raises(LogFormatError) as ei:
            load_spec(_spec(tmp_path / "bad.toml", 0, **kw))
        assert f"key '{key}'" in str(ei.value) and "bad.toml" in str(ei.value)


# ------------------------------------------------------------------ detection


@pytest.mark.parametrize("chunk", [1, 3, 1 << 16])
def test_gap_detection_start_middle_end(tmp_path, chunk):
    """Keys 10..19 declared; 10 (start), 14 (middle) and 19 (end) recorded by neither
    station, 16 missing at B only. Every chunking gives the same counts."""
    full = list(range(10, 20))
    a = [k for k in full if k not in (10, 14, 19)]
    b = [k for k in full if k not in (10, 14, 16, 19)]
    _tiny(tmp_path, a, b)
    n, rep = _join(_spec(tmp_path / "s.toml", 4, first=10, last=19), chunk)
    assert n == rep["matched"] == 6
    assert (rep["missing_at_a"], rep["missing_at_b"], rep["missing_at_both"]) == (0, 1, 3)
    assert rep["keys"] == "consecutive" and rep["key_range"] == [10, 19]
    assert (rep["first_key"], rep["last_key"]) == (11, 18)
    # without a declared range only the middle gap is visible
    n, rep = _join(_spec(tmp_path / "r.toml", 4), chunk)
    assert rep["missing_at_both"] == 1 and rep["key_range"] == [None, None]
    # without the declaration no gap is seen, and the report is as before
    n, rep = _join(_spec(tmp_path / "u.toml", 4, keys=None), chunk)
    assert "missing_at_both" not in rep and "keys" not in rep and rep["missing_at_b"] == 1


@pytest.mark.parametrize("where,missing,key", [("start", [10], 10), ("middle", [14, 15], 14),
                                               ("end", [19], 19)])
def test_gap_refused_by_default(tmp_path, where, missing, key):
    """max_missing 0 (the default): a gap is an error naming the file and the key, exit 2."""
    keys = [k for k in range(10, 20) if k not in missing]
    _tiny(tmp_path, keys, keys)
    spec = _spec(tmp_path / "s.toml", 0, first=10, last=19)
    with pytest.raises(LogFormatError) as ei:
        _join(spec)
    msg = str(ei.value)
    assert f"key {key}" in msg and "missing at both stations" in msg and "a.csv" in msg
    assert "\n" not in msg
    r = _cli("inspect", "--log-spec", spec)
    assert r.exit_code == 2 and f"key {key}" in r.output and "Traceback" not in r.output


def test_tolerance_counts_all_missing_trials(tmp_path):
    """max_missing covers one-sided drops and gaps together; the error names the first key
    beyond it in key order."""
    full = list(range(100, 130))
    a = [k for k in full if k not in (103, 110, 111)]  # 103 one-sided, 110-111 gaps
    b = [k for k in full if k not in (110, 111, 120)]  # 120 one-sided
    _tiny(tmp_path, a, b)
    n, rep = _join(_spec(tmp_path / "ok.toml", 4))
    assert (rep["missing_at_a"], rep["missing_at_b"], rep["missing_at_both"]) == (1, 1, 2)
    for chunk in (1, 4, 1 << 16):
        with pytest.raises(LogFormatError) as ei:
            _join(_spec(tmp_path / "three.toml", 3), chunk)
        assert "key 120" in str(ei.value) and "missing at station B" in str(ei.value)
        with pytest.raises(LogFormatError) as ei:
            _join(_spec(tmp_path / "two.toml", 2), chunk)
        assert "key 111" in str(ei.value) and "both stations" in str(ei.value)


def test_keys_outside_the_declared_range(tmp_path):
    _tiny(tmp_path, [5, 6, 7], [5, 6, 7])
    with pytest.raises(LogFormatError) as ei:
        _join(_spec(tmp_path / "s.toml", 9, first=6))
    assert "key 5" in str(ei.value) and "first_key" in str(ei.value)
    _tiny(tmp_path, [5, 6], [5, 6, 7])
    with pytest.raises(LogFormatError) as ei:
        _join(_spec(tmp_path / "s.toml", 9, last=6))
    assert "key 7" in str(ei.value) and "last_key" in str(ei.value) and "b.csv" in str(ei.value)


def test_non_integer_keys_error(tmp_path):
    """A non-integer key with consecutive keys declared: one line naming file and line, exit 2."""
    (tmp_path / "a.csv").write_text("pulse,basis,result\n1,1,+1\n2.5,1,+1\n3,1,+1\n")
    (tmp_path / "b.csv").write_text("pulse,basis,result\n1,1,+1\n2,1,+1\n3,1,+1\n")
    spec = _spec(tmp_path / "s.toml", 1)
    with pytest.raises(LogFormatError) as ei:
        _join(spec)
    assert "a.csv" in str(ei.value) and "line 3" in str(ei.value)
    r = _cli("inspect", "--log-spec", spec)
    assert r.exit_code == 2, r.output
    assert "a.csv" in r.output and "line 3" in r.output and "'2.5'" in r.output
    assert "Traceback" not in r.output and len(r.output.strip().splitlines()) == 1


def test_non_integer_parquet_keys_error(tmp_path):
    """A float key column in Parquet with consecutive keys declared: one line naming the file
    and the row, exit 2."""
    pa = pytest.importorskip("pyarrow")
    pq = pytest.importorskip("pyarrow.parquet")
    for name, keys in (("a.parquet", [1.0, 2.0, 3.0]), ("b.parquet", [1, 2, 3])):
        pq.write_table(pa.table({"pulse": keys, "basis": ["1"] * 3, "result": ["+1"] * 3}),
                       tmp_path / name)
    text = _spec(tmp_path / "s.toml", 1).read_text().replace(".csv", ".parquet")
    spec = tmp_path / "s.toml"
    spec.write_text(text)
    r = _cli("inspect", "--log-spec", spec)
    assert r.exit_code == 2, r.output
    assert "a.parquet, row 0" in r.output and "expected integers" in r.output
    assert "Traceback" not in r.output and len(r.output.strip().splitlines()) == 1


# ------------------------------------------------------------------ the pattern count


def _strings(length: int, max_missing: int, alphabet: str) -> int:
    """Strings over {kept} + missing symbols of the given length with at most max_missing
    missing symbols, one by one."""
    return sum(1 for s in itertools.product(alphabet, repeat=length)
               if len(s) - s.count("k") <= max_missing)


@pytest.mark.parametrize("n,big_n", [(0, 0), (0, 3), (1, 1), (2, 2), (3, 1), (3, 3), (4, 2)])
def test_pattern_count_three_choices_brute_force(n, big_n):
    """With gaps visible a dropped trial is missing at A, at B or at both: the count is that of
    strings over {kept, A, B, both} of length n + N with at most N missing symbols, and bounds
    every run of n + d trials (d <= N)."""
    count = pattern_count(n, big_n, 3)
    assert count == _strings(n + big_n, big_n, "kABX")
    for d in range(big_n + 1):
        assert count >= _strings(n + d, big_n, "kABX")
    assert count >= pattern_count(n, big_n, 2)
    # binomial theorem: with N = n + N (everything may be missing) the sum is 4^(n+N)
    if n == 0:
        assert count == 4 ** big_n


@pytest.mark.parametrize("n,big_n", [(10, 1), (3997, 3), (10**6, 50), (12, 40)])
def test_pattern_bits_three_choices_against_scipy(n, big_n):
    from scipy.special import comb

    want = sum(int(comb(n + big_n, j, exact=True)) * 3**j for j in range(big_n + 1))
    assert pattern_count(n, big_n, 3) == want
    bits, how = pattern_bits(n, big_n, 3)
    assert how.startswith("exact") and bits >= math.log2(want)
    assert bits - math.log2(want) < 1e-9 * max(1.0, math.log2(want))


def test_pattern_bits_three_choices_large_bound(monkeypatch):
    """Above the exact limit the lgamma bound stays above the exact value (rounded up)."""
    from dicert.logspec import _charge

    exact = {(n, big_n): pattern_bits(n, big_n, 3)[0] for n, big_n in
             ((1000, 300), (50, 200), (10**5, 10))}
    monkeypatch.setattr(_charge, "EXACT_PATTERN_LIMIT", 5)
    for (n, big_n), want in exact.items():
        bits, how = pattern_bits(n, big_n, 3)
        assert how.startswith("upper bound") and bits >= want
        assert bits <= want + math.log2(big_n + 1) + 1e-6


def test_join_charge_counts_gaps():
    rep = {"matched": 100, "missing_at_a": 1, "missing_at_b": 2, "missing_at_both": 3,
           "max_missing": 6, "keys": "consecutive"}
    ch = join_charge(rep, 2)
    assert (ch.dropped_trials, ch.lost_test_rounds_charged, ch.raw_bits_subtracted) == (6, 6, 12)
    assert ch.pattern_bits == pattern_bits(100, 6, 3)[0]
    d = ch.to_dict()
    assert d["missing_at_both"] == 3 and d["keys"] == "consecutive" and "method_gaps" in d
    with pytest.raises(Exception, match="more than"):
        join_charge(dict(rep, max_missing=5), 2)
    with pytest.raises(Exception, match="missing_at_both"):
        join_charge({k: v for k, v in rep.items() if k != "keys"}, 2)
    undeclared = join_charge({k: v for k, v in rep.items()
                              if k not in ("keys", "missing_at_both")}, 2)
    assert "missing_at_both" not in undeclared.to_dict()


# ------------------------------------------------------------------ certify and verify


_seed = seed_file


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    """An honest simulated run of 6000 trials with consecutive keys 1000..6999: station B
    lost 2 trials, and 3 trials (one at the start, one in the middle, one at the end) were
    recorded by neither station; max_missing 8."""
    d = tmp_path_factory.mktemp("gaps")
    arr = sim_trials(6000, seed=31)
    keys = np.arange(len(arr), dtype=np.int64) + 1000
    gap_idx, drop_idx = (0, 2500, 5999), (99, 3000)
    gaps = {int(keys[i]) for i in gap_idx}
    drop = {int(keys[i]) for i in drop_idx}
    _write_station(d / "a.csv", keys, arr.x, arr.a, drop=gaps)
    _write_station(d / "b.csv", keys, arr.y, arr.b, drop=gaps | drop)
    _spec(d / "run.toml", 8, first=1000, last=6999)
    _spec(d / "undeclared.toml", 8, keys=None)
    return {"dir": d, "arr": arr, "keys": keys, "spec": d / "run.toml",
            "undeclared": d / "undeclared.toml"}


def _certify(log, tmp, name):
    from dicert.certify import certify

    return certify(log, uniform_protocol(), _seed(tmp), tmp / name, clock=lambda: CLOCK)


def test_gaps_tolerated_and_charged(run, tmp_path):
    """The gaps are charged like one-sided drops: five lost test rounds, 10 raw bits, and the
    pattern with three choices; never more certified than the same log without the gaps."""
    rec = _certify(run["spec"], tmp_path, "declared").record
    join = rec["log"]["spec"]["join"]
    assert (join["missing_at_b"], join["missing_at_both"], join["matched"]) == (2, 3, 5995)
    ch = join["charge"]
    assert (ch["dropped_trials"], ch["missing_at_both"], ch["lost_test_rounds_charged"],
            ch["raw_bits_subtracted"]) == (5, 3, 5, 10)
    assert ch["pattern_bits"] == pattern_bits(5995, 8, 3)[0]
    assert ch["pattern_bits"] >= math.log2(sum(math.comb(6003, j) * 3**j for j in range(9)))
    assert any("Trials missing at both stations: checked" in a and "(3 found" in a
               for a in rec["assumptions"])
    # the same log without the declaration: gaps invisible, only assumed
    plain = _certify(run["undeclared"], tmp_path, "undeclared").record
    assert plain["log"]["spec"]["join"]["charge"]["dropped_trials"] == 2
    assert any("stays assumed" in a and "not checked" in a for a in plain["assumptions"])
    # the same run without the gaps (those three trials recorded at both stations)
    d = tmp_path / "nogap-data"
    d.mkdir()
    arr, keys = run["arr"], run["keys"]
    drop = {int(keys[99]), int(keys[3000])}
    _write_station(d / "a.csv", keys, arr.x, arr.a)
    _write_station(d / "b.csv", keys, arr.y, arr.b, drop=drop)
    full = _certify(_spec(d / "run.toml", 8, first=1000, last=6999), tmp_path, "nogap").record
    assert full["log"]["spec"]["join"]["missing_at_both"] == 0
    k = rec["certified_min_entropy_bits"]
    assert k < full["certified_min_entropy_bits"]
    assert k <= plain["certified_min_entropy_bits"]
    assert rec["estimate"]["chsh_lower_bound"] <= full["estimate"]["chsh_lower_bound"]


def test_gap_beyond_tolerance_refused(run, tmp_path):
    """max_missing 1: the one-sided drop at key 1099 is tolerated, the gap at 3500 is not."""
    spec = _spec(run["dir"] / "strict.toml", 1)
    r = _cli("inspect", "--log-spec", spec)
    assert r.exit_code == 2 and "Traceback" not in r.output
    assert "key 3500" in r.output and "missing at both stations" in r.output


def test_verify_rederives_gaps_and_refuses_tampering(run, tmp_path):
    seed, rec, body = certify_spec_unsigned(run["spec"], tmp_path)
    for path, value in ((("missing_at_both",), 0), (("missing_at_both",), 1),
                        (("keys",), None), (("key_range",), [1000, None]),
                        (("charge", "missing_at_both"), 0),
                        (("charge", "pattern_bits"), pattern_bits(5995, 8, 2)[0])):
        edited = edit_join(body, path, value, tmp_path)
        bad = _cli("verify", edited)
        assert bad.exit_code == 1, (path, bad.output)
        assert "log.spec.join" in bad.output or "log.trials" in bad.output, bad.output
        bad = _cli("verify", edited, "--log-spec", run["spec"])
        assert bad.exit_code == 1, (path, bad.output)


@pytest.mark.parametrize("seed", range(12))
def test_join_against_a_set_model(tmp_path, seed):
    """Random tiny runs, random chunking: the streaming counts and the refused key equal those
    of a plain set computation over the declared range (the definition of a gap)."""
    rng = np.random.default_rng(seed)
    universe = np.arange(20, 60)
    at_a = universe[rng.random(universe.size) < 0.8]
    at_b = universe[rng.random(universe.size) < 0.8]
    both = np.intersect1d(at_a, at_b)
    if both.size == 0:
        return
    seen = np.union1d(at_a, at_b)
    first = int(rng.choice([seen[0], 20])) if seed % 2 else None
    last = int(seen[-1]) + int(rng.integers(0, 3)) if seed % 3 == 0 else None
    lo = first if first is not None else int(seen[0])
    hi = last if last is not None else int(seen[-1])
    missing = []
    for k in range(lo, hi + 1):
        ina, inb = k in set(at_a.tolist()), k in set(at_b.tolist())
        if not (ina and inb):
            missing.append((k, "both" if not (ina or inb) else ("A" if not ina else "B")))
    _tiny(tmp_path, at_a, at_b)
    for max_missing in (0, len(missing) // 2, len(missing)):
        spec = _spec(tmp_path / f"s{max_missing}.toml", max_missing, first=first, last=last)
        for chunk in (1, 7, 1 << 16):
            if len(missing) > max_missing:
                with pytest.raises(LogFormatError) as ei:
                    _join(spec, chunk)
                k, where = missing[max_missing]
                msg = str(ei.value)
                assert f"key {k}:" in msg, (msg, missing, max_missing, chunk)
                assert ("both stations" in msg) == (where == "both"), msg
                continue
            n, rep = _join(spec, chunk)
            assert n == rep["matched"] == both.size
            assert rep["missing_at_a"] == sum(w == "A" for _, w in missing)
            assert rep["missing_at_b"] == sum(w == "B" for _, w in missing)
            assert rep["missing_at_both"] == sum(w == "both" for _, w in missing)


def test_assumption_sentence_says_what_is_checked():
    from dicert.stages.record import _both_sentence

    s = _both_sentence("consecutive", 2, [10, 99])
    assert "checked" in s and "(10 to 99)" in s and "(2 found" in s and "stays assumed" not in s
    s = _both_sentence("consecutive", 0, [None, None])
    assert "before the first key recorded or after the last key recorded" in s
    assert "stays assumed" in s
    s = _both_sentence(None, 0)
    assert "stays assumed" in s and "not checked" in s
