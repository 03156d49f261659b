"""Design conformance (dicert.design): logs that contradict the protocol's declared design are
refused or aborted, honest runs of every shipped protocol still certify, and the false-alarm
rate of the checks on honest simulated runs is measured.

Each refusal case runs through :func:`dicert.certify.certify` and checks that nothing is
certified (status aborted / withheld with no bits file, or bad input with nothing written) and
that the reason names the check.
"""

from __future__ import annotations

import copy
import math
import tomllib

import numpy as np
import pytest
from helpers import ROOT, sim_trials, uniform_protocol

from dicert.certify import certify
from dicert.design import (
    DesignSpec,
    binomial_two_sided,
    check_design,
    seed_problems,
    serial_g_test,
)
from dicert.errors import LogFormatError, ParameterError, SeedError, VerificationError
from dicert.logs import TrialArrays, write_log
from dicert.protocol import load_protocol, protocol_from_dict

PROTOS = ROOT / "protocols"


def _seed(tmp_path, n=400_000, k=0):
    p = tmp_path / f"seed{k}.bin"
    p.write_bytes(np.random.default_rng(100 + k).bytes(n))
    return p


def _aborted(res, check: str, out) -> None:
    """Nothing certified: status aborted, 0 bits, exit 3, no bits file, reason names check."""
    assert res.status == "aborted" and res.output_bits == 0 and res.exit_code == 3
    assert res.bits_file is None and not (out / "random.bits").exists()
    assert check in res.abort_reason, res.abort_reason
    assert res.record["certified_min_entropy_bits"] == 0.0
    names = {c["name"]: c for c in res.record["design"]["checks"]}
    assert names[check]["passed"] is False


def _proto(name: str, **tables):
    d = tomllib.loads((PROTOS / name).read_text())
    for table, keys in tables.items():
        d.setdefault(table, {}).update(keys)
    return protocol_from_dict(d, name)


def _codes_arrays(codes, has_t):
    return TrialArrays.from_codes(np.asarray(codes, dtype=np.uint8), has_t)


# --------------------------------------------------------------------------- statistics


@pytest.mark.parametrize("k,n,p", [(40, 100, 0.5), (3, 100, 0.05), (260, 10_000, 0.025),
                                   (9_000, 10_000, 0.9)])
def test_binomial_p_value_is_the_exact_two_sided_minlike_sum(k, n, p):
    # Definition of the exact two-sided ("minlike") p-value: the total probability of every
    # outcome no more likely than the one observed (common practice); summed directly from
    # scipy.stats.binom.pmf (reference library), independently of binomtest.
    from scipy.stats import binom

    pmf = binom.pmf(np.arange(n + 1), n, p)
    ref = pmf[pmf <= pmf[k] * (1 + 1e-7)].sum()
    assert binomial_two_sided(k, n, p) == pytest.approx(min(ref, 1.0), rel=1e-6)


def test_binomial_composite_null_takes_the_largest_p_value():
    # With a declared interval of probabilities the p-value is the largest over it: inside
    # the interval it is 1 at k/n (a two-sided exact test has p = 1 at its mode).
    assert binomial_two_sided(45, 100, 0.4, 0.6) == pytest.approx(1.0)
    assert binomial_two_sided(20, 100, 0.4, 0.6) == pytest.approx(binomial_two_sided(20, 100, 0.4))


def test_serial_g_test_matches_scipy_contingency_log_likelihood():
    # Reference library: scipy.stats.chi2_contingency with lambda_="log-likelihood" is the
    # G-test of independence (no pooling needed: every cell large).
    from scipy.stats import chi2_contingency

    rng = np.random.default_rng(3)
    pc = np.zeros((8, 8), np.int64)
    pc[:4, :4] = rng.integers(2000, 3000, (4, 4))
    g, dof, p, _ = serial_g_test(pc)
    ref = chi2_contingency(pc[:4, :4], correction=False, lambda_="log-likelihood")
    assert dof == ref.dof == 9
    assert g == pytest.approx(ref.statistic, rel=1e-10)
    assert p == pytest.approx(ref.pvalue, rel=1e-8)


def test_local_win_bound():
    from dicert.estimate import local_win_bound

    # Uniform settings: the classical CHSH-game value 3/4 (CHSH 1969; common practice).
    assert local_win_bound(np.full((2, 2), 5)) == pytest.approx(0.75)
    # Biased settings P(x=1) = P(y=1) = 0.1: the best deterministic strategy loses only on
    # (1, 1), which has probability 0.01, so it wins with probability 0.99 (computed by hand).
    q = np.outer([0.9, 0.1], [0.9, 0.1])
    assert local_win_bound(q) == pytest.approx(0.99)


def test_pair_counts_carry_across_chunks_and_match_a_naive_loop(tmp_path):
    from dicert._kernels import count_pairs, count_pairs_numpy
    from dicert.logs import summarize_log

    codes = np.random.default_rng(1).integers(0, 32, 50_001).astype(np.uint8)
    sym = (codes >> 2) & 7
    naive = np.zeros((8, 8), np.int64)
    for s0, s1 in zip(sym[:-1], sym[1:]):  # naive oracle
        naive[s0, s1] += 1
    a, _ = count_pairs(codes)
    b, _ = count_pairs_numpy(codes)
    np.testing.assert_array_equal(a.reshape(8, 8), naive)
    np.testing.assert_array_equal(b.reshape(8, 8), naive)
    # Across files and chunks of a multi-file log.
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "part-0.btl", _codes_arrays(codes[:20_000], True))
    write_log(d / "part-1.btl", _codes_arrays(codes[20_000:], True))
    s = summarize_log(d, chunk_trials=777)
    np.testing.assert_array_equal(s.pair_counts, naive)


# --------------------------------------------------------------------------- false alarms


def _honest_inputs(n, gamma, seed, block):
    from dicert._kernels import count_pairs

    tr = sim_trials(n, seed=seed, visibility=0.97, gamma=gamma)
    codes = tr.codes()
    counts = np.bincount(codes, minlength=32).reshape(2, 2, 2, 2, 2)
    if not tr.has_test_flag:
        counts = np.stack([np.zeros_like(counts[0]), counts.sum(axis=0)])
    sym = (codes >> 2) & 7
    nb = -(-n // block)
    blocks = np.array([np.bincount(sym[i * block:(i + 1) * block], minlength=8)
                       for i in range(nb)])
    if not tr.has_test_flag:
        blocks = np.concatenate([np.zeros_like(blocks[:, :4]), blocks[:, :4]], axis=1)
    pairs, _ = count_pairs(codes)
    return counts, blocks, pairs.reshape(8, 8)


def test_false_alarm_rate_on_honest_runs():
    """Honest simulated runs (visibility 0.97; uniform and spot-checking designs): at the
    default significance 1e-9 no check ever fires, and at significance 0.01 each check fires
    on about 1% of runs or less (calibration: an exact test is conservative, P(p <= a) <= a).

    Measured here on 120 runs of 20,000 trials (60 per design): with 0.01 the per-check rates
    stay below 0.01 + 3 sigma; with the default 1e-9 the union bound gives a false-alarm rate
    of at most (number of checks) x 1e-9 <= 1.2e-8 per run, and none is seen.
    """
    runs = 60
    rates: dict[str, int] = {}
    total = 0
    for gamma in (1.0, 0.2):
        d = tomllib.loads((PROTOS / "chsh-uniform.toml").read_text())
        d["settings"]["gamma"] = gamma
        base = protocol_from_dict(d, "fa")
        for sig in (1e-9, 0.01):
            proto = protocol_from_dict({**d, "design": {"significance": sig,
                                                        "block_trials": 5_000}}, "fa")
            for r in range(runs):
                counts, blocks, pairs = _honest_inputs(20_000, gamma, 1000 * r + 7, 5_000)
                rep = check_design(counts, proto, block_counts=blocks, pair_counts=pairs)
                if sig == 1e-9:
                    assert rep.passed, (gamma, r, rep.abort_reason)
                else:
                    total += 1
                    for c in rep.checks:
                        if c.p_value is not None and not c.passed:
                            rates[c.name] = rates.get(c.name, 0) + 1
        del base
    sigma = math.sqrt(0.01 * 0.99 / (2 * runs))
    for name, k in rates.items():
        assert k / (2 * runs) <= 0.01 + 3 * sigma + 1e-12, (name, k)
    assert total == 2 * runs


# --------------------------------------------------------------------------- honest runs


@pytest.fixture(scope="module")
def honest(tmp_path_factory):
    from dicert.simulate import device_model, simulate_to_file

    d = tmp_path_factory.mktemp("honest")
    simulate_to_file(d / "u.btl", 200_000, device_model("quantum", visibility=0.97),
                     rng_stream=11)
    simulate_to_file(d / "s.btl", 1_000_000, device_model("quantum", visibility=0.97),
                     gamma=0.05, rng_stream=12)
    simulate_to_file(d / "p.btl", 3_000_000, device_model("photonic"), rng_stream=13)
    (d / "seed.bin").write_bytes(np.random.default_rng(5).bytes(600_000))
    return d


@pytest.mark.parametrize("log,proto", [("u.btl", "chsh-uniform.toml"),
                                       ("s.btl", "chsh-spotcheck.toml"),
                                       ("s.btl", "chsh-spotcheck-pair.toml"),
                                       ("p.btl", "ch-photonic.toml")])
def test_honest_runs_of_every_shipped_protocol_certify(honest, tmp_path, log, proto):
    from dicert.verify import verify

    res = certify(honest / log, PROTOS / proto, honest / "seed.bin", tmp_path / "out")
    assert res.status == "certified", res.abort_reason
    rec = res.record
    assert rec["format"] == "dicert-record/4"
    # The error budget's terms sum to the soundness error, for every method (union bound over
    # the failure events; composable security, Tomamichel, Schaffner, Smith & Renner, IEEE
    # Trans. Inf. Theory 57, 5524 (2011)), and the total is the method's published sum.
    terms = rec["error_budget"]["terms"]
    assert math.fsum(x["value"] for x in terms) == pytest.approx(rec["soundness_error"],
                                                                 rel=1e-15)
    assert rec["error_budget"]["total"] == rec["soundness_error"] == res.soundness_error
    proto_obj = load_protocol(PROTOS / proto)
    a, e_ext = proto_obj.analysis, proto_obj.extractor.eps_ext
    want = {"martingale": lambda: a.eps_est + e_ext,  # Pironio et al., Nature 464 (2010)
            "eat": lambda: a.eps_ea + 2 * a.eps_s + e_ext,  # Arnon-Friedman et al. 2019
            "pef": lambda: a.eps_pe + e_ext}[proto_obj.method]()  # Knill et al., PRR 2 (2020)
    assert rec["soundness_error"] == pytest.approx(want, rel=1e-15)
    assert [x["name"] for x in terms].count("eps_ext") == 1 and all(
        x["meaning"] for x in terms)
    des = rec["design"]
    assert des["passed"] and des["significance"] == 1e-9
    assert des["trials"]["source"] == "log" and "taken from the log" in des["trials"]["note"]
    assert {"test_settings_x", "test_settings_y", "test_settings_xor", "serial_independence",
            "chsh_physical_range"} <= {c["name"] for c in des["checks"]}
    assert rec["output_screens"]["passed"]
    assert rec["log"]["files"][0]["sha256"] == rec["log"]["sha256"]
    rep = verify(res.record_file, log=honest / log, seed=honest / "seed.bin",
                 bits=res.bits_file)
    assert rep.scope == "full"
    assert any(c.startswith("design conformance re-run") for c in rep.checked)


# --------------------------------------------------------------------------- refusal campaign


def test_classical_device_with_too_few_test_rounds_aborts(tmp_path):
    # Issue case: test rounds at 2.5% while chsh-spotcheck declares gamma = 0.05.
    log = tmp_path / "c.btl"
    write_log(log, sim_trials(200_000, seed=3, model="classical", gamma=0.025))
    out = tmp_path / "out"
    res = certify(log, PROTOS / "chsh-spotcheck.toml", _seed(tmp_path), out)
    _aborted(res, "test_fraction", out)


@pytest.mark.parametrize("proto,gamma", [("chsh-uniform.toml", 1.0),
                                         ("chsh-spotcheck.toml", 0.05)])
def test_biased_test_settings_abort(tmp_path, proto, gamma):
    from dicert.simulate import device_model, simulate_trials

    rng = np.random.default_rng(4)
    tr = simulate_trials(200_000, device_model("classical"), gamma=gamma,
                         settings_bias=(0.1, 0.1), rng=rng)
    log = tmp_path / "b.btl"
    write_log(log, tr)
    out = tmp_path / "out"
    res = certify(log, PROTOS / proto, _seed(tmp_path), out)
    _aborted(res, "test_settings_x", out)


def test_constant_rows_abort(tmp_path):
    # 50,000 identical rows 0,0,0,0 under chsh-uniform; 200,000 rows 0,0,0,0,0 (no test
    # round at all) under chsh-spotcheck.
    z = np.zeros(50_000, np.uint8)
    log = tmp_path / "z.csv"
    write_log(log, TrialArrays(x=z, y=z, a=z, b=z))
    out = tmp_path / "o1"
    _aborted(certify(log, PROTOS / "chsh-uniform.toml", _seed(tmp_path), out),
             "test_settings_x", out)
    z = np.zeros(200_000, np.uint8)
    log = tmp_path / "z5.btl"
    write_log(log, TrialArrays(x=z, y=z, a=z, b=z, t=z))
    out = tmp_path / "o2"
    _aborted(certify(log, PROTOS / "chsh-spotcheck.toml", _seed(tmp_path), out),
             "test_fraction", out)


def test_fixed_pattern_then_constant_rows_abort_under_the_photonic_protocol(tmp_path):
    pattern = np.array([0b0000, 0b0101, 0b1010, 0b1111, 0b0011, 0b0110, 0b1001, 0b1100],
                       np.uint8)
    codes = np.concatenate([pattern, np.zeros(300_000, np.uint8)])
    log = tmp_path / "pat.btl"
    write_log(log, _codes_arrays(codes, False))
    out = tmp_path / "out"
    res = certify(log, PROTOS / "ch-photonic.toml", _seed(tmp_path), out)
    assert res.status == "aborted" and res.bits_file is None and res.exit_code == 3
    assert "test_settings" in res.abort_reason


def test_cycling_settings_with_exact_marginals_abort(tmp_path):
    # Settings cycle 00, 01, 10, 11: exactly uniform counts, perfectly predictable.
    tr = sim_trials(100_000, seed=5, visibility=0.97)
    cyc = np.arange(100_000) % 4
    arr = TrialArrays(x=(cyc >> 1).astype(np.uint8), y=(cyc & 1).astype(np.uint8),
                      a=tr.a, b=tr.b)
    log = tmp_path / "cyc.btl"
    write_log(log, arr)
    out = tmp_path / "out"
    res = certify(log, uniform_protocol(), _seed(tmp_path), out)
    _aborted(res, "serial_independence", out)
    names = {c["name"]: c for c in res.record["design"]["checks"]}
    assert names["test_settings_x"]["passed"] and names["test_settings_xor"]["passed"]


def test_wrong_gamma_gives_unphysical_estimate_and_aborts(tmp_path):
    # Issue case: a martingale protocol with gamma = 0.01 on a log with 2% test rounds
    # (the weighted estimate comes out near 2 x 2.74, above the no-signalling maximum 4).
    proto = _proto("chsh-uniform.toml", settings={"gamma": 0.01})
    log = tmp_path / "s.btl"
    write_log(log, sim_trials(300_000, seed=6, visibility=0.97, gamma=0.02))
    out = tmp_path / "out"
    res = certify(log, proto, _seed(tmp_path), out)
    _aborted(res, "test_fraction", out)
    phys = {c["name"]: c for c in res.record["design"]["checks"]}["chsh_physical_range"]
    assert phys["passed"] is False and phys["statistic"] > 4.0
    assert "wrong gamma" in phys["detail"]


def test_super_quantum_data_abort_under_a_quantum_method(tmp_path):
    # A PR box (a XOR b = x AND y always, CHSH = 4) is outside the quantum set (Tsirelson
    # bound 2 sqrt 2; Cirel'son 1980); the martingale method assumes quantum devices.
    rng = np.random.default_rng(7)
    x, y, a = (rng.integers(0, 2, 50_000).astype(np.uint8) for _ in range(3))
    log = tmp_path / "pr.btl"
    write_log(log, TrialArrays(x=x, y=y, a=a, b=a ^ (x & y)))
    out = tmp_path / "out"
    _aborted(certify(log, uniform_protocol(), _seed(tmp_path), out), "chsh_physical_range", out)


def test_inputs_holding_the_same_data_twice_are_refused(tmp_path):
    from dicert.verify import verify

    tr = sim_trials(60_000, seed=8, visibility=0.97)
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "run.csv", tr)
    write_log(d / "run.csv.gz", tr)
    out = tmp_path / "out"
    with pytest.raises(LogFormatError, match="compressed copy"):
        certify(d, uniform_protocol(), _seed(tmp_path), out)
    assert not out.exists()
    # Equal content under two names, and mixed formats.
    d2 = tmp_path / "dup"
    d2.mkdir()
    write_log(d2 / "a.btl", tr)
    write_log(d2 / "b.btl", tr)
    with pytest.raises(LogFormatError, match="same content"):
        certify(d2, uniform_protocol(), _seed(tmp_path), out)
    d3 = tmp_path / "mixed"
    d3.mkdir()
    write_log(d3 / "a.btl", sim_trials(30_000, seed=9, visibility=0.97))
    write_log(d3 / "b.csv", sim_trials(30_000, seed=10, visibility=0.97))
    with pytest.raises(LogFormatError, match="mixes file formats"):
        certify(d3, uniform_protocol(), _seed(tmp_path), out)
    assert not out.exists()
    # Explicitly allowed: certified, recorded, and shown by verify.
    res = certify(d3, uniform_protocol(), _seed(tmp_path), out, allow_mixed_inputs=True)
    rec = res.record
    assert rec["inputs"]["allow_mixed_inputs"] and rec["inputs"]["input_problems"]
    files = rec["log"]["files"]
    assert [f["name"] for f in files] == ["a.btl", "b.csv"]
    import hashlib

    assert files[0]["sha256"] == hashlib.sha256((d3 / "a.btl").read_bytes()).hexdigest()
    assert files[1]["bytes"] == (d3 / "b.csv").stat().st_size
    # Multi-file digest: SHA-256 of the RFC 8785 canonical JSON of the files list.
    from dicert.audit.canonical import canonicalize

    assert rec["log"]["sha256"] == hashlib.sha256(canonicalize(files)).hexdigest()
    rep = verify(res.record_file, log=d3, seed=_seed(tmp_path))
    assert any("input identity" in n for n in rep.notes)


def test_unsafe_seeds_are_refused(tmp_path):
    from dicert.verify import verify

    log = tmp_path / "u.btl"
    write_log(log, sim_trials(100_000, seed=11, visibility=0.97))
    out = tmp_path / "out"
    zero = tmp_path / "zero.bin"
    zero.write_bytes(bytes(200_000))
    with pytest.raises(SeedError, match="constant"):
        certify(log, uniform_protocol(), zero, out)
    periodic = tmp_path / "per.bin"
    periodic.write_bytes(bytes(range(16)) * 20_000)
    with pytest.raises(SeedError, match="period of 16"):
        certify(log, uniform_protocol(), periodic, out)
    # The log given as its own seed.
    with pytest.raises(SeedError, match="same SHA-256 as the log"):
        certify(log, uniform_protocol(), log, out)
    assert not out.exists()
    res = certify(log, uniform_protocol(), log, out, allow_seed_reuse=True)
    assert res.certified and res.record["inputs"]["seed_problems"]
    rep = verify(res.record_file, log=log, seed=log)
    assert any("seed problem" in n for n in rep.notes)
    # A seed already used in the beacon chain (a chain is extended with signed records).
    from dicert.audit.signing import write_keypair

    key = write_keypair(tmp_path / "op.pem").private_key_file
    chain = tmp_path / "chain"
    seed = _seed(tmp_path, k=3)
    log2 = tmp_path / "u2.btl"
    write_log(log2, sim_trials(100_000, seed=23, visibility=0.97))
    certify(log, uniform_protocol(), seed, tmp_path / "p1", chain=chain, key=key)
    with pytest.raises(SeedError, match="already used"):
        certify(log2, uniform_protocol(), seed, tmp_path / "p2", chain=chain, key=key)
    assert not (tmp_path / "p2").exists()


def test_seed_problems_unit():
    fatal, soft = seed_problems(b"\x07" * 10)
    assert fatal and "constant" in fatal[0]
    good = np.random.default_rng(0).bytes(1000)
    assert seed_problems(good) == ([], [])


def test_declared_trial_count(tmp_path):
    from dicert.verify import verify

    log = tmp_path / "u.csv"
    write_log(log, sim_trials(120_000, seed=12, visibility=0.97))
    seed = _seed(tmp_path)
    # Shorter than declared: abort with the reason.
    out = tmp_path / "short"
    res = certify(log, _proto("chsh-uniform.toml", design={"trials": 150_000}), seed, out)
    _aborted(res, "trial_count", out)
    assert "150000" in res.abort_reason
    # Longer: exactly the first n are analysed; the scope says so; verify re-reads that.
    out = tmp_path / "long"
    proto = _proto("chsh-uniform.toml", design={"trials": 100_000})
    res = certify(log, proto, seed, out)
    assert res.certified, res.abort_reason
    lg = res.record["log"]
    assert lg["trials"] == 100_000 and lg["trials_in_log"] == 120_000
    assert lg["coverage"] == "prefix" and lg["ended_by"] == "declared-trials"
    assert res.raw_bits == 2 * 100_000
    assert res.record["design"]["trials"]["source"] == "declared"
    verify(res.record_file, log=log, seed=seed, bits=res.bits_file)
    # The protocol keys are validated with the key named.
    with pytest.raises(Exception, match="design.trials"):
        _proto("chsh-uniform.toml", design={"trials": 0})
    with pytest.raises(Exception, match="design.significance"):
        _proto("chsh-uniform.toml", design={"significance": 2})
    with pytest.raises(Exception, match="design.trials"):
        _proto("chsh-spotcheck.toml", design={"trials": 10}, analysis={"rounds": 20})
    assert DesignSpec().significance == 1e-9


def test_grossly_failing_output_is_withheld(tmp_path):
    from dicert.verify import verify

    log = tmp_path / "u.btl"
    write_log(log, sim_trials(100_000, seed=13, visibility=0.97))
    # A seed that is neither constant nor periodic but almost all zero: the Toeplitz matrix is
    # almost all zero, so the output is nearly all zero bits (a broken seed source).
    sb = bytearray(100_000)
    sb[0] = 0x5A  # only the first output rows see a non-zero seed bit
    seed = tmp_path / "bad.bin"
    seed.write_bytes(bytes(sb))
    out = tmp_path / "out"
    res = certify(log, uniform_protocol(), seed, out)
    assert res.status == "withheld" and res.exit_code == 5
    assert res.bits_file is None and not (out / "random.bits").exists()
    scr = res.record["output_screens"]
    assert scr["passed"] is False and "frequency" in scr["failure"]
    assert res.record["status"] == "withheld" and "withheld" in res.abort_reason
    rep = verify(res.record_file, log=log, seed=seed)
    assert any("withheld" in n for n in rep.notes)
    assert "output screens re-run on the recomputed output" in rep.checked


def test_verify_reruns_design_checks_and_reads_old_records(tmp_path):
    from dicert.audit.record import read_record, record_bytes, seal_record
    from dicert.verify import verify

    log = tmp_path / "u.btl"
    write_log(log, sim_trials(100_000, seed=14, visibility=0.97))
    seed = _seed(tmp_path)
    res = certify(log, uniform_protocol(), seed, tmp_path / "out")
    rec = read_record(res.record_file)
    body = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    # A re-sealed record whose design section lies is caught by the re-derivation.
    bad = copy.deepcopy(body)
    bad["design"]["checks"][0]["p_value"] = 0.5
    p = tmp_path / "bad.json"
    p.write_bytes(record_bytes(seal_record(bad, None)))
    with pytest.raises(VerificationError) as info:
        verify(p)
    assert info.value.field.startswith("design.")
    bad = copy.deepcopy(body)
    bad["design"]["inputs"]["pair_counts"][0][0] += 1
    p.write_bytes(record_bytes(seal_record(bad, None)))
    with pytest.raises(VerificationError):
        verify(p, log=log)
    # A dicert-record/1 record (written before the design stage) still verifies, and verify
    # says what it lacks.
    old = copy.deepcopy(body)
    old["format"] = "dicert-record/1"
    for k in ("design", "inputs", "output_screens", "estimate_blocks"):
        old.pop(k)  # members a /1 record never had
    old["log"].pop("trials_in_log")
    old["log"]["files"] = [f["name"] for f in old["log"]["files"]]
    for k in ("gamma_source", "local_win_bound"):
        old["estimate"].pop(k)
    for k in ("single_round_bound_bits_at_chsh_estimate", "von_neumann_bound_bits_at_chsh_estimate"):
        old["entropy"]["single_round"].pop(k)  # added by dicert-record/4
    p1 = tmp_path / "old.json"
    p1.write_bytes(record_bytes(seal_record(old, None)))
    rep = verify(p1, log=log, seed=seed, bits=res.bits_file)
    assert rep.scope == "full"
    note = " ".join(rep.notes)
    assert "dicert-record/1" in note and "design-conformance checks" in note


def test_writers_reject_values_outside_bits(tmp_path):
    z = np.zeros(10, np.uint8)
    bad = z.copy()
    bad[3] = 2
    with pytest.raises(ParameterError, match=r"column 'a' holds 2 at index 3"):
        TrialArrays(x=z, y=z, a=bad, b=z)
    with pytest.raises(ParameterError, match=r"column 't' holds 0.5"):
        TrialArrays(x=z, y=z, a=z, b=z, t=np.full(10, 0.5))
    arr = TrialArrays(x=z.copy(), y=z, a=z, b=z)
    arr.x[0] = 7  # changed after construction: every writer still refuses
    for name in ("l.csv", "l.csv.gz", "l.btl", "l.npz"):
        with pytest.raises(ParameterError, match=r"column 'x' holds 7"):
            write_log(tmp_path / name, arr)
        assert not (tmp_path / name).exists()


def test_estimate_chsh_never_silently_uses_gamma_one_with_test_rounds():
    from dicert.estimate import estimate_chsh

    tr = sim_trials(200_000, seed=15, visibility=0.97, gamma=0.1)
    codes = tr.codes()
    counts = np.bincount(codes, minlength=32).reshape(2, 2, 2, 2, 2)
    est = estimate_chsh(counts)
    assert est.gamma_source == "observed"
    assert est.gamma == pytest.approx(0.1, abs=0.005)
    # S = 2 sqrt 2 v = 2.744 at v = 0.97 (CHSH 1969 with white noise; common practice).
    assert est.chsh_martingale == pytest.approx(2 * math.sqrt(2) * 0.97, abs=0.1)


def test_inspect_defaults_and_refusals(tmp_path):
    import json

    from typer.testing import CliRunner

    from dicert.cli.app import app

    runner = CliRunner()
    log = tmp_path / "s.btl"
    write_log(log, sim_trials(200_000, seed=16, visibility=0.97, gamma=0.05))
    r = runner.invoke(app, ["inspect", str(log), "--json"])
    assert r.exit_code == 0, r.output
    js = json.loads(r.stdout)
    assert js["gamma"] == pytest.approx(0.05, abs=0.005) and "OBSERVED" in js["gamma_source"]
    assert js["chsh_estimate"] > 2.5  # the weighted estimate, not S x gamma
    # A wrong gamma: the lower bound would exceed 4; it is shown clipped and labelled.
    r = runner.invoke(app, ["inspect", str(log), "--json", "--gamma", "0.01"])
    js = json.loads(r.stdout)
    if js["chsh_lower_bound"] > 4:
        assert js["chsh_lower_bound_shown"] == 4.0 and "CLIPPED" in js["chsh_lower_bound_note"]
    assert not js["design_checks"]["passed"]
    # gamma < 1 on a log without a t column is an error.
    plain = tmp_path / "u.btl"
    write_log(plain, sim_trials(50_000, seed=17))
    r = runner.invoke(app, ["inspect", str(plain), "--gamma", "0.5"])
    assert r.exit_code == 2 and "t column" in r.stderr
    # Biased settings from a local device: the p-value is refused (settings contradict the
    # declared uniform design) instead of a tiny number.
    from dicert.simulate import device_model, simulate_trials

    tr = simulate_trials(100_000, device_model("classical"), settings_bias=(0.1, 0.1),
                         rng=np.random.default_rng(1))
    b = tmp_path / "bias.btl"
    write_log(b, tr)
    r = runner.invoke(app, ["inspect", str(b), "--json", "--protocol",
                            str(PROTOS / "chsh-uniform.toml")])
    js = json.loads(r.stdout)
    assert js["p_value_local"] is None and js["p_value_refused"]
    # Without a protocol the p-value uses the observed frequencies: no false non-locality.
    r = runner.invoke(app, ["inspect", str(b), "--json"])
    js = json.loads(r.stdout)
    assert js["local_win_bound"] > 0.95 and js["p_value_local"] > 1e-3


@pytest.mark.parametrize("k,n,p", [(0, 10, 0.3), (10, 10, 0.3), (3, 10, 0.3), (4, 10, 0.3),
                                   (499_000, 1_000_000, 0.5), (52_000, 1_000_000, 0.05),
                                   (48_000, 1_000_000, 0.05), (26, 1_000, 0.05), (1, 1, 0.5),
                                   (9_999, 200_000, 0.05)])
def test_binomial_p_value_matches_scipy_binomtest(k, n, p):
    # Reference library: scipy.stats.binomtest (two-sided, minlike); ours avoids importing
    # scipy so that `dicert inspect` starts fast.
    from scipy.stats import binomtest

    ref = binomtest(k, n, p).pvalue
    got = binomial_two_sided(k, n, p)
    assert got == pytest.approx(ref, rel=1e-6, abs=1e-300)


@pytest.mark.parametrize("dof", [1, 2, 3, 4, 9, 16, 25, 49])
@pytest.mark.parametrize("x", [0.5, 3.0, 20.0, 80.0, 200.0])
def test_chi2_sf_matches_scipy(dof, x):
    from scipy.stats import chi2

    from dicert.design import chi2_sf

    assert chi2_sf(x, dof) == pytest.approx(chi2.sf(x, dof), rel=1e-9, abs=1e-300)


def test_cli_exit_codes_for_withheld_and_mixed_inputs(tmp_path):
    import json

    from typer.testing import CliRunner

    from dicert.cli.app import app

    try:
        runner = CliRunner(mix_stderr=False)
    except TypeError:
        runner = CliRunner()
    log = tmp_path / "u.btl"
    write_log(log, sim_trials(100_000, seed=18, visibility=0.97))
    sb = bytearray(100_000)
    sb[0] = 0x5A
    seed = tmp_path / "bad.bin"
    seed.write_bytes(bytes(sb))
    proto = str(PROTOS / "chsh-uniform.toml")
    r = runner.invoke(app, ["certify", str(log), "--protocol", proto, "--seed", str(seed),
                            "--out", str(tmp_path / "o"), "--json"])
    assert r.exit_code == 5, r.output  # exit code 5: output withheld (COMMON brief)
    js = json.loads(r.stdout)
    assert js["status"] == "withheld" and js["bits_file"] is None
    assert (tmp_path / "o" / "record.json").exists()
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "run.csv", sim_trials(30_000, seed=19, visibility=0.97))
    write_log(d / "run.csv.gz", sim_trials(30_000, seed=19, visibility=0.97))
    r = runner.invoke(app, ["certify", str(d), "--protocol", proto, "--seed",
                            str(_seed(tmp_path)), "--out", str(tmp_path / "o2")])
    assert r.exit_code == 2 and len(r.stderr.strip().splitlines()) == 1
    assert "--allow-mixed-inputs" in r.stderr and not (tmp_path / "o2").exists()
    r = runner.invoke(app, ["certify", str(d), "--protocol", proto, "--seed",
                            str(_seed(tmp_path)), "--out", str(tmp_path / "o2"),
                            "--allow-mixed-inputs", "--json"])
    assert r.exit_code == 0, r.output


def test_longest_symbol_run_matches_a_naive_loop():
    from dicert.design import longest_symbol_run

    rng = np.random.default_rng(2)
    bits = (rng.random(20_002) < 0.9).astype(np.uint8)  # long runs of (1, 1) symbols
    packed = np.packbits(bits).tobytes()
    sym = bits[0::2] * 2 + bits[1::2]
    best = cur = 1
    for i in range(1, sym.size):  # naive oracle
        cur = cur + 1 if sym[i] == sym[i - 1] else 1
        best = max(best, cur)
    assert longest_symbol_run(packed, bits.size, 2, chunk_bytes=7) == (best, sym.size)
    assert longest_symbol_run(packed, bits.size, 2)[0] == best


def test_stuck_detector_withholds_the_output(tmp_path):
    # A stretch of 5,000 trials with outcomes stuck at (0, 0) inside an otherwise honest run:
    # the SP 800-90B 4.4.1 repetition count test on the raw outcomes fires (NIST SP 800-90B,
    # section 4.4.1: cutoff 1 + ceil(-log2(alpha) / H)).
    tr = sim_trials(200_000, seed=20, visibility=1.0)
    a, b = tr.a.copy(), tr.b.copy()
    a[50_000:55_000] = 0
    b[50_000:55_000] = 0
    log = tmp_path / "stuck.btl"
    write_log(log, TrialArrays(x=tr.x, y=tr.y, a=a, b=b))
    out = tmp_path / "out"
    res = certify(log, uniform_protocol(), _seed(tmp_path, n=800_000), out)
    assert res.status == "withheld" and res.exit_code == 5 and res.bits_file is None
    rct = res.record["output_screens"]["raw_repetition_count"]
    assert rct["longest_run"] >= 5_000 and rct["longest_run"] >= rct["cutoff"]
    assert "stuck outcomes" in res.abort_reason


def test_declared_trial_count_with_streaming_probability_estimation(tmp_path):
    # Method pef on a binary log: reading stops at the declared n at the latest; a run
    # decided earlier does not need n trials; a run that ends undecided before n aborts.
    from dicert.simulate import device_model, simulate_to_file
    from dicert.verify import verify

    log = tmp_path / "ph.btl"
    simulate_to_file(log, 500_000, device_model("photonic"), rng_stream=5)
    seed = _seed(tmp_path)
    d = tomllib.loads((PROTOS / "ch-photonic.toml").read_text())
    d["analysis"].update(calibration_trials=200_000, sigma_target_bits=128, n_max=2_000_000)
    d["extractor"]["eps_ext"] = 1e-6
    d["design"]["trials"] = 260_000  # too few analysis trials to reach the target
    res = certify(log, protocol_from_dict(d, "pef-short"), seed, tmp_path / "a")
    assert res.status == "aborted" and res.trials == 260_000
    assert res.record["log"]["ended_by"] == "declared-trials"
    import hashlib

    # The digest covers exactly the header (24 bytes) and the declared trials (one byte each).
    prefix = log.read_bytes()[:24 + 260_000]
    assert res.record["log"]["sha256"] == hashlib.sha256(prefix).hexdigest()
    verify(res.record_file, log=log, seed=seed)
    d["design"]["trials"] = 2_000_000  # longer than the log: fine only if decided earlier
    res = certify(log, protocol_from_dict(d, "pef-long"), seed, tmp_path / "b")
    if res.record["log"]["ended_by"] == "decision":
        assert res.certified
    else:
        _aborted(res, "trial_count", tmp_path / "b")
    verify(res.record_file, log=log, seed=seed)


def test_old_multi_file_record_keeps_its_concatenated_digest(tmp_path):
    # A dicert-record/1 record of a multi-file log digested the files' concatenated bytes;
    # verify still re-checks it with the log.
    import hashlib

    from dicert.audit.record import read_record, record_bytes, seal_record
    from dicert.verify import verify

    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "a.btl", sim_trials(40_000, seed=21, visibility=0.97))
    write_log(d / "b.btl", sim_trials(40_000, seed=22, visibility=0.97))
    seed = _seed(tmp_path)
    res = certify(d, uniform_protocol(), seed, tmp_path / "out")
    rec = read_record(res.record_file)
    old = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    old["format"] = "dicert-record/1"
    for k in ("design", "inputs", "output_screens", "estimate_blocks"):
        old.pop(k)  # members a /1 record never had
    old["log"].pop("trials_in_log")
    old["log"]["files"] = [f["name"] for f in old["log"]["files"]]
    old["log"]["sha256"] = hashlib.sha256((d / "a.btl").read_bytes()
                                          + (d / "b.btl").read_bytes()).hexdigest()
    for k in ("gamma_source", "local_win_bound"):
        old["estimate"].pop(k)
    for k in ("single_round_bound_bits_at_chsh_estimate", "von_neumann_bound_bits_at_chsh_estimate"):
        old["entropy"]["single_round"].pop(k)  # added by dicert-record/4
    p = tmp_path / "old.json"
    p.write_bytes(record_bytes(seal_record(old, None)))
    assert verify(p, log=d, seed=seed, bits=res.bits_file).scope == "full"
