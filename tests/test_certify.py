"""End-to-end certification: numbers against published formulas, harvest order against a naive
oracle, aborts, determinism, seed length, atomicity, chains."""

from __future__ import annotations

import hashlib
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
from helpers import sim_trials, uniform_protocol

from dicert.certify import (
    BITS_NAME,
    EXIT_ABORTED,
    RECORD_NAME,
    certify,
    harvest_bits,
)
from dicert.errors import LogFormatError, SeedError
from dicert.logs import TrialArrays, read_trials, write_log
from dicert.protocol import protocol_from_dict

ROOT = Path(__file__).resolve().parents[1]




@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("run")
    log = d / "log.btl"
    write_log(log, sim_trials(20_000, seed=11))
    seed = d / "seed.bin"
    seed.write_bytes(np.random.default_rng(5).bytes(20_000))
    return d, log, seed


def _f(s: float) -> float:
    # Pironio et al., Nature 464, 1021 (2010), eq. (3): f(S) = 1 - log2(1 + sqrt(2 - S^2/4)).
    return 1.0 - math.log2(1.0 + math.sqrt(2.0 - s * s / 4.0))


def test_certified_numbers_follow_the_published_formulas(small_run, tmp_path):
    _d, log, seed = small_run
    proto = uniform_protocol()
    res = certify(log, proto, seed, tmp_path / "out")
    assert res.status == "certified" and res.exit_code == 0
    n = 20_000
    eps_est = proto.analysis.eps_est
    # Azuma-Hoeffding margin with estimator width 8/gamma (methods README; Azuma 1967).
    mu = 8.0 * math.sqrt(math.log(1.0 / eps_est) / (2.0 * n))
    k = n * _f(proto.analysis.chsh_threshold - mu)
    assert res.certified_min_entropy_bits == pytest.approx(k, rel=1e-12)
    # Conservative leftover-hash sizing m = floor(k - 2 log2(1/eps_ext)) (Impagliazzo, Levin,
    # Luby 1989; methods note B3).
    m = math.floor(k - 2.0 * math.log2(1.0 / proto.extractor.eps_ext))
    assert res.output_bits == m
    # Soundness error eps_est + eps_ext ("P(accept) x distance" form, methods note A3/B3).
    assert res.soundness_error == pytest.approx(eps_est + proto.extractor.eps_ext, rel=1e-12)
    data = res.bits_file.read_bytes()
    assert len(data) == (m + 7) // 8
    rec = res.record
    assert rec["extractor"]["output_sha256"] == hashlib.sha256(data).hexdigest()
    # Toeplitz seed length n + m - 1 (Mansour, Nisan, Tiwari 1990; methods note B1).
    assert rec["extractor"]["seed_bits"] == 2 * n + m - 1
    assert rec["log"]["sha256"] == hashlib.sha256(log.read_bytes()).hexdigest()
    assert rec["log"]["trials"] == n and int(np.sum(rec["counts"]["values"])) == n
    for key in ("assumptions", "caution", "references", "volatile", "protocol", "error_budget",
                "soundness_error"):
        assert rec[key]
    assert rec["protocol"]["content"] == proto.text
    assert rec["entropy"]["finite_size"]["side_information"] == "classical"
    assert any("communication" in a for a in rec["assumptions"])
    assert set(rec["volatile"]) == {"timestamps", "timings_s"}


def test_output_equals_naive_toeplitz_product_of_naively_harvested_bits(tmp_path):
    # Naive oracle: per-trial loop for the harvest, dense GF(2) product with the matrix built by
    # scipy.linalg.toeplitz in the convention T[i][j] = s[i - j + n - 1] (methods note B1).
    from scipy.linalg import toeplitz

    log = tmp_path / "log.csv"
    write_log(log, sim_trials(2_000, seed=3))
    seed = tmp_path / "seed.bin"
    seed.write_bytes(np.random.default_rng(9).bytes(1_000))
    res = certify(log, uniform_protocol(), seed, tmp_path / "out")
    assert res.status == "certified"
    tr = read_trials(log)
    raw = []
    for i in range(len(tr)):
        raw += [int(tr.a[i]), int(tr.b[i])]
    n, m = len(raw), res.output_bits
    assert res.record["harvest"]["raw_sha256"] == hashlib.sha256(
        np.packbits(np.array(raw, dtype=np.uint8)).tobytes()).hexdigest()
    s = np.unpackbits(np.frombuffer(seed.read_bytes(), dtype=np.uint8))[: n + m - 1].astype(np.int64)
    t = toeplitz(s[n - 1: n - 1 + m], s[n - 1::-1][:n])
    z = (t @ np.array(raw, dtype=np.int64)) % 2
    assert res.bits_file.read_bytes() == np.packbits(z.astype(np.uint8)).tobytes()


def test_harvest_order_and_generation_rounds():
    # Codes (t<<4)|(x<<3)|(y<<2)|(a<<1)|b (project data model); naive per-trial expectation.
    codes = np.array([0b10010, 0b00001, 0b11111, 0b00011, 0b00000], dtype=np.uint8)
    assert harvest_bits(codes, "AB", "all", True).tolist() == [1, 0, 0, 1, 1, 1, 1, 1, 0, 0]
    assert harvest_bits(codes, "A", "all", True).tolist() == [1, 0, 1, 1, 0]
    assert harvest_bits(codes, "AB", "generation", True).tolist() == [0, 1, 1, 1, 0, 0]


def test_classical_devices_abort_with_a_record(tmp_path):
    log = tmp_path / "classical.btl"
    write_log(log, sim_trials(20_000, model="classical", seed=4))
    seed = tmp_path / "seed.bin"
    seed.write_bytes(b"\x00" * 16)  # an abort never reads the seed beyond its digest
    out = tmp_path / "out"
    res = certify(log, uniform_protocol(), seed, out)
    assert res.status == "aborted" and res.output_bits == 0
    assert res.exit_code == EXIT_ABORTED == 3
    assert res.bits_file is None and not (out / BITS_NAME).exists()
    assert (out / RECORD_NAME).exists()
    rec = res.record
    assert rec["status"] == "aborted" and rec["extractor"]["output_bits"] == 0
    # The best classical strategy wins the CHSH game with probability 3/4, S = 2 (Clauser,
    # Horne, Shimony, Holt 1969), far below the threshold.
    assert rec["estimate"]["chsh_estimate"] == pytest.approx(2.0, abs=0.1)
    assert "threshold" in rec["abort_reason"]


def test_abort_removes_a_stale_bits_file(small_run, tmp_path):
    from dicert.errors import ParameterError

    _d, log, seed = small_run
    out = tmp_path / "out"
    assert certify(log, uniform_protocol(), seed, out).status == "certified"
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    classical = tmp_path / "c.btl"
    write_log(classical, sim_trials(5_000, model="classical", seed=8))
    # A non-empty --out is refused without force, and the earlier outputs stay as they were.
    with pytest.raises(ParameterError, match="not empty"):
        certify(classical, uniform_protocol(), seed, out)
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before
    res = certify(classical, uniform_protocol(), seed, out, force=True)
    assert res.status == "aborted" and not (out / BITS_NAME).exists()
    assert sorted(p.name for p in out.iterdir()) == [RECORD_NAME]


def test_two_runs_identical_except_volatile(small_run, tmp_path):
    from dicert.audit.record import stable_view

    _d, log, seed = small_run
    clocks = iter(["2001-01-01T00:00:00Z", "2001-01-01T00:00:01Z",
                   "2030-05-05T12:00:00Z", "2030-05-05T12:00:09Z"])
    r1 = certify(log, uniform_protocol(), seed, tmp_path / "a", clock=lambda: next(clocks))
    r2 = certify(log, uniform_protocol(), seed, tmp_path / "b", clock=lambda: next(clocks))
    assert r1.bits_file.read_bytes() == r2.bits_file.read_bytes()
    assert stable_view(r1.record) == stable_view(r2.record)
    assert r1.record["volatile"]["timestamps"]["started"] == "2001-01-01T00:00:00Z"
    assert r2.record["volatile"]["timestamps"]["finished"] == "2030-05-05T12:00:09Z"
    assert r1.record_sha256 != r2.record_sha256  # the timestamps are sealed too


def test_seed_too_short_says_how_many_bytes(small_run, tmp_path):
    _d, log, _ = small_run
    short = tmp_path / "short.bin"
    short.write_bytes(b"\x01" * 100)
    out = tmp_path / "out"
    with pytest.raises(SeedError) as info:
        certify(log, uniform_protocol(), short, out)
    msg = str(info.value)
    assert "bytes needed" in msg and "100 bytes given" in msg
    need = int(msg.split(" bytes needed")[0].rsplit(" ", 1)[-1])
    # n + m - 1 seed bits (methods note B1), rounded up to bytes.
    assert need == (40_000 + _expected_m() - 1 + 7) // 8
    assert not out.exists() or not any(out.iterdir())


def _expected_m() -> int:
    n = 20_000
    mu = 8.0 * math.sqrt(math.log(1e6) / (2.0 * n))
    return math.floor(n * _f(2.6 - mu) - 2.0 * math.log2(1e8))


@pytest.mark.parametrize("stage", ["extract", "record"])
def test_nothing_half_written_when_a_late_stage_fails(small_run, tmp_path, monkeypatch, stage):
    import dicert.audit.record as record_mod
    import dicert.extract as extract_mod

    _d, log, seed = small_run

    def boom(*a, **k):
        raise RuntimeError("injected failure")

    if stage == "extract":
        monkeypatch.setattr(extract_mod, "extract_toeplitz", boom)
    else:
        monkeypatch.setattr(record_mod, "record_bytes", boom)
    out = tmp_path / "out"
    with pytest.raises(RuntimeError, match="injected"):
        certify(log, uniform_protocol(), seed, out)
    assert not out.exists() or list(out.iterdir()) == []


def test_spilled_raw_bits_give_the_same_result(small_run, tmp_path, monkeypatch):
    import dicert.stages.scan as certify_mod

    _d, log, seed = small_run
    r1 = certify(log, uniform_protocol(), seed, tmp_path / "mem")
    monkeypatch.setattr(certify_mod, "_SPILL_BYTES", 100)
    r2 = certify(log, uniform_protocol(), seed, tmp_path / "spill")
    assert r1.bits_file.read_bytes() == r2.bits_file.read_bytes()
    assert r1.record["harvest"] == r2.record["harvest"]
    # The spill file is removed: only the two outputs remain.
    assert sorted(p.name for p in (tmp_path / "spill").iterdir()) == sorted([BITS_NAME, RECORD_NAME])


def test_chain_links_pulses(small_run, tmp_path):
    from dicert.audit.chain import verify_chain
    from dicert.audit.record import record_digest
    from dicert.audit.signing import write_keypair
    from dicert.errors import ParameterError

    d, log, seed = small_run
    keys = write_keypair(tmp_path / "k.pem")
    log2 = tmp_path / "log2.btl"
    write_log(log2, sim_trials(20_000, seed=12))
    seed2 = tmp_path / "seed2.bin"
    seed2.write_bytes(np.random.default_rng(6).bytes(20_000))
    chain = tmp_path / "chain"
    k = keys.private_key_file
    r1 = certify(log, uniform_protocol(), seed, tmp_path / "p1", chain=chain, key=k)
    r2 = certify(log2, uniform_protocol(), seed2, tmp_path / "p2", chain=chain, key=k)
    assert r1.record["pulse_index"] == 1 and r1.record["previous_record_sha256"] is None
    assert r2.record["pulse_index"] == 2
    assert r2.record["previous_record_sha256"] == record_digest(r1.record)
    rep = verify_chain(chain, keys.public_key_file)
    assert rep.pulses == 2 and rep.result == "VERIFIED"
    # The same seed, or the same log, in a later pulse is refused before anything is written.
    with pytest.raises(SeedError, match="already used by pulse 1"):
        certify(log2, uniform_protocol(), seed, tmp_path / "p3", chain=chain, key=k)
    seed3 = tmp_path / "seed3.bin"
    seed3.write_bytes(np.random.default_rng(7).bytes(20_000))
    with pytest.raises(ParameterError, match="already fed pulse 2"):
        certify(log2, uniform_protocol(), seed3, tmp_path / "p3", chain=chain, key=k)
    assert not (tmp_path / "p3").exists()
    assert sorted(p.name for p in chain.iterdir()) == [".lock", "pulse-000001.json",
                                                        "pulse-000002.json"]


def test_uniform_protocol_rejects_generation_rounds(tmp_path):
    log = tmp_path / "spot.btl"
    write_log(log, sim_trials(5_000, gamma=0.5, seed=2))
    seed = tmp_path / "seed.bin"
    seed.write_bytes(b"\x00" * 8)
    with pytest.raises(LogFormatError, match="generation rounds"):
        certify(log, uniform_protocol(), seed, tmp_path / "out")


def test_spotcheck_protocol_needs_a_test_column(tmp_path):
    from dicert.protocol import load_protocol

    log = tmp_path / "uniform.btl"
    write_log(log, sim_trials(1_000, seed=2))
    seed = tmp_path / "seed.bin"
    seed.write_bytes(b"\x00" * 8)
    with pytest.raises(LogFormatError, match="no t column"):
        certify(log, load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml"), seed,
                tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_signed_record(small_run, tmp_path):
    from dicert.audit.record import check_record
    from dicert.audit.signing import write_keypair

    _d, log, seed = small_run
    keys = write_keypair(tmp_path / "k.pem")
    res = certify(log, uniform_protocol(), seed, tmp_path / "out", key=keys.private_key_file)
    chk = check_record(res.record, _pub(keys.public_key_file))
    assert chk.signed and chk.signer_trusted


def _pub(path):
    from dicert.audit.signing import load_public_key

    return load_public_key(path)


@pytest.fixture(scope="module")
def spot_logs(tmp_path_factory):
    d = tmp_path_factory.mktemp("spot")
    from dicert.simulate import device_model, simulate_to_file

    simulate_to_file(d / "q.btl", 1_000_000, device_model("quantum", visibility=0.97),
                     gamma=0.05, rng_stream=41)
    simulate_to_file(d / "c.btl", 1_000_000, device_model("classical"), gamma=0.05, rng_stream=42)
    (d / "seed.bin").write_bytes(np.random.default_rng(6).bytes(300_000))
    return d


def test_spotcheck_protocol_certifies_honest_devices(spot_logs, tmp_path):
    from dicert.finite import certify_eat
    from dicert.protocol import load_protocol

    proto = load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml")
    res = certify(spot_logs / "q.btl", proto, spot_logs / "seed.bin", tmp_path / "out")
    assert res.status == "certified" and res.output_bits > 0
    rec = res.record
    assert rec["entropy"]["finite_size"]["side_information"] == "quantum"
    # The record carries exactly what the finite-size engine gives for the recorded counts.
    direct = certify_eat(np.array(rec["counts"]["values"]), proto.analysis, proto.design,
                         harvest=proto.harvest)
    assert res.certified_min_entropy_bits == pytest.approx(direct.certified_min_entropy_bits, rel=1e-12)
    # Raw output A^n B^n of every round (entropy-accumulation methods note, section 1).
    assert res.raw_bits == 2 * 1_000_000
    # Error budget eps_EA + 2 eps_s + eps_ext (methods note, section 5; TSSR 2011 for 2 eps_s).
    a = proto.analysis
    assert res.soundness_error == pytest.approx(a.eps_ea + 2 * a.eps_s + proto.extractor.eps_ext, rel=1e-12)


def test_spotcheck_protocol_aborts_classical_devices(spot_logs, tmp_path):
    from dicert.protocol import load_protocol

    proto = load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml")
    res = certify(spot_logs / "c.btl", proto, spot_logs / "seed.bin", tmp_path / "out")
    assert res.status == "aborted" and res.output_bits == 0 and res.exit_code == 3


def _pef_protocol():
    d = tomllib.loads((ROOT / "protocols" / "ch-photonic.toml").read_text())
    d["analysis"].update(calibration_trials=200_000, sigma_target_bits=128, n_max=2_000_000)
    d["extractor"]["eps_ext"] = 1e-6
    return protocol_from_dict(d, "pef-test")


@pytest.mark.skipif(not (ROOT / "protocols" / "ch-photonic.toml").exists(),
                    reason="PEF protocol not present")
def test_pef_streaming_harvests_analysed_trials_up_to_success(tmp_path):
    from dicert.simulate import device_model, simulate_to_file
    from dicert.verify import verify

    log = tmp_path / "ph.btl"
    simulate_to_file(log, 800_000, device_model("photonic"), rng_stream=5)
    seed = tmp_path / "s.bin"
    seed.write_bytes(np.random.default_rng(1).bytes(200_000))
    proto = _pef_protocol()
    res = certify(log, proto, seed, tmp_path / "out")
    assert res.status == "certified", res.abort_reason
    det = res.record["entropy"]["finite_size"]["details"]
    first, last = det["harvest_first_trial"], det["success_trial_index"]
    assert first == 200_000 and last is not None and last < 800_000
    # Raw bits = (a, b) of the analysed trials first..last, in order (naive slice of the log).
    tr = read_trials(log)
    raw = np.empty(2 * (last - first + 1), dtype=np.uint8)
    raw[0::2], raw[1::2] = tr.a[first:last + 1], tr.b[first:last + 1]
    assert res.record["harvest"]["raw_sha256"] == hashlib.sha256(np.packbits(raw).tobytes()).hexdigest()
    # Extractor min-entropy sigma_target - 1 (the PEF module's documented rule).
    assert res.certified_min_entropy_bits == pytest.approx(128 - 1)
    # Reading stopped at the success trial: the record covers header + trials 0..last only.
    lg = res.record["log"]
    assert lg["coverage"] == "prefix" and lg["stopped_early"] is True
    assert lg["stop_trial_index"] == last and lg["trials"] == lg["trials_read"] == last + 1
    assert lg["bytes_read"] == 24 + last + 1 < log.stat().st_size
    assert lg["sha256"] == hashlib.sha256(log.read_bytes()[:24 + last + 1]).hexdigest()
    assert "pef_solver" in res.record["volatile"]["timings_s"]
    rep = verify(res.record_file, log=log, seed=seed, bits=res.bits_file)
    assert rep.scope == "full"
    assert any("trial order" in n for n in verify(res.record_file).notes)


# --------------------------------------------------------------------------- early stopping


def _fast_pef_protocol(**analysis):
    """ch-photonic.toml with a fixed (isotropic) calibration and a small target: decided within
    about a thousand trials of the simulated Tsirelson box."""
    d = tomllib.loads((ROOT / "protocols" / "ch-photonic.toml").read_text())
    a = d["analysis"]
    del a["calibration_trials"]
    a.update(calibration="isotropic", calibration_chsh=2.7, beta=0.1, sigma_target_bits=64,
             eps_pe=1e-6, n_max=1_000_000)
    a.update(analysis)
    d["extractor"]["eps_ext"] = 1e-6
    return protocol_from_dict(d, "pef-fast")


def _oracle_success_index(codes: np.ndarray, factors, threshold: float, first: int = 0) -> int:
    """Naive per-trial oracle: the first trial k >= first at which
    sum_{first <= i <= k} log2 F(c_i, z_i), summed with math.fsum, reaches the threshold
    beta * sigma_target + log2(1/eps_PE) (Knill, Zhang & Bierhorst, PRR 2, 033465 (2020);
    methods note probability-estimation.md section 2). -1 if never."""
    terms: list[float] = []
    for k in range(first, codes.size):
        c = int(codes[k])
        terms.append(math.log2(factors[(c >> 2) & 3][c & 3]))  # F[z][c], z = 2x+y, c = 2a+b
        if math.fsum(terms) >= threshold:
            return k
    return -1


@pytest.fixture(scope="module")
def fast_pef_log(tmp_path_factory):
    from dicert.simulate import device_model, simulate_trials

    d = tmp_path_factory.mktemp("pefstop")
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(3)))
    tr = simulate_trials(60_000, device_model("quantum", visibility=1.0), gamma=1.0, rng=rng)
    log = d / "run.btl"
    write_log(log, tr)
    seed = d / "seed.bin"
    seed.write_bytes(np.random.default_rng(2).bytes(4_000))
    return log, seed, tr.codes()


def test_pef_early_stop_reads_a_prefix_and_reports_the_oracle_index(fast_pef_log, tmp_path):
    log, seed, codes = fast_pef_log
    # A byte that no reader accepts, far after the decision: the file reads as invalid as a
    # whole, so certifying it shows that reading stopped before it.
    data = bytearray(log.read_bytes())
    data[24 + 50_000] = 0x40
    bad_tail = tmp_path / "tail.btl"
    bad_tail.write_bytes(bytes(data))
    proto = _fast_pef_protocol()
    res = certify(bad_tail, proto, seed, tmp_path / "out")
    assert res.status == "certified", res.abort_reason
    det = res.record["entropy"]["finite_size"]["details"]
    p = proto.analysis
    thr = p.beta * p.sigma_target_bits + math.log2(1.0 / p.eps_pe)
    factors = det["pef"]["factors"]
    k = _oracle_success_index(codes, factors, thr)
    # No near-tie (the engine rounds log2 F down by 2 ulps and subtracts a rounding allowance).
    assert k == _oracle_success_index(codes, factors, thr + 1e-9) and k >= 0
    assert res.success_trial_index == res.stop_trial_index == det["success_trial_index"] == k
    lg = res.record["log"]
    assert (lg["coverage"], lg["stopped_early"], lg["ended_by"]) == ("prefix", True, "decision")
    assert lg["trials_read"] == lg["trials"] == k + 1
    assert lg["bytes_read"] == lg["size_bytes"] == 24 + k + 1 < bad_tail.stat().st_size
    # The digest covers exactly the header and trials 0..k; counts are of those trials only.
    assert lg["sha256"] == hashlib.sha256(bytes(data[:24 + k + 1])).hexdigest()
    assert int(np.sum(res.record["counts"]["values"])) == k + 1
    # The whole file does not read (the invalid byte is reported with its offset).
    with pytest.raises(LogFormatError, match=f"byte offset {24 + 50_000}"):
        read_trials(bad_tail)


def test_pef_stops_at_the_first_trial_outside_the_settings_model(tmp_path):
    """With spot-checking and generation settings (0, 0), a generation trial with other
    settings has factor 0: the run can never succeed and stops exactly at that trial, however
    the bytes are split (PEF condition: F = 0 outside the model, methods note section 1)."""
    from dicert.certify import _BitSink, _PefFeed
    from dicert.simulate import device_model, simulate_trials

    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(9)))
    tr = simulate_trials(6_000, device_model("quantum", visibility=1.0), gamma=0.5, rng=rng)
    codes = tr.codes().copy()
    gen = np.flatnonzero((codes & 0x10) == 0)
    k = int(gen[gen > 300][0])
    codes[k] = (codes[k] & 0x13) | 0x0C  # generation round with settings (1, 1)
    # Knill-Zhang-Bierhorst settings model: spot-checking with gamma, as in the protocol.
    d = tomllib.loads((ROOT / "protocols" / "ch-photonic.toml").read_text())
    a = d["analysis"]
    del a["calibration_trials"]
    a.update(calibration="isotropic", calibration_chsh=2.7, beta=0.1, sigma_target_bits=4096,
             eps_pe=1e-6, n_max=1_000_000)
    d["settings"]["gamma"] = 0.5
    d["extractor"]["eps_ext"] = 1e-6
    proto = protocol_from_dict(d, "pef-spot")
    fed = set()
    for split in (1, 97, 4096, 6_000):
        feed = _PefFeed(proto, _BitSink(None), has_test_flag=True)
        for i in range(0, codes.size, split):
            feed.push(codes[i:i + split])
        assert feed.done and not feed.acc.succeeded
        fed.add(feed.fed)
    assert fed == {k + 1}
    log = tmp_path / "dead.btl"
    write_log(log, TrialArrays.from_codes(codes, True))
    res = certify(log, proto, np.random.default_rng(0).bytes(64), tmp_path / "out")
    assert res.status == "aborted" and "outside the settings model" in res.abort_reason
    assert res.stop_trial_index == k and res.record["log"]["bytes_read"] == 24 + k + 1
