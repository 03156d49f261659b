"""CLI contract of `dicert certify`, `dicert verify` and `dicert demo` (exit codes, JSON keys,
one-line errors)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from helpers import sim_trials
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.logs import write_log

ROOT = Path(__file__).resolve().parents[1]
UNIFORM = str(ROOT / "protocols" / "chsh-uniform.toml")


def _runner() -> CliRunner:
    try:
        return CliRunner(mix_stderr=False)
    except TypeError:  # newer click keeps stderr apart already
        return CliRunner()



@pytest.fixture(scope="module")
def files(tmp_path_factory):
    d = tmp_path_factory.mktemp("cli")
    write_log(d / "q.btl", sim_trials(4_000, seed=31))
    write_log(d / "c.csv", sim_trials(4_000, seed=32, model="classical"))
    (d / "seed.bin").write_bytes(np.random.default_rng(3).bytes(1_500))
    from dicert.audit.signing import write_keypair

    write_keypair(d / "op.key")
    return d


def test_certify_json_and_exit_0(files, tmp_path):
    r = _runner().invoke(app, ["certify", str(files / "q.btl"), "--protocol", UNIFORM, "--seed",
                               str(files / "seed.bin"), "--out", str(tmp_path / "o"), "--json",
                               "--key", str(files / "op.key")])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    for key in ("status", "output_bits", "bits_file", "record_file", "certified_min_entropy_bits",
                "soundness_error"):
        assert key in d
    assert d["status"] == "certified" and d["output_bits"] > 0
    assert Path(d["bits_file"]).stat().st_size == (d["output_bits"] + 7) // 8
    r2 = _runner().invoke(app, ["verify", d["record_file"], "--log", str(files / "q.btl"),
                                "--seed", str(files / "seed.bin"), "--bits", d["bits_file"],
                                "--pubkey", str(files / "op.key.pub"), "--json"])
    assert r2.exit_code == 0, r2.output
    v = json.loads(r2.stdout)
    assert v["verified"] is True and v["scope"] == "full" and v["result"] == "VERIFIED"
    # Without a trusted key: integrity only, exit 4, the same word in JSON and in the table.
    args = ["verify", d["record_file"], "--log", str(files / "q.btl"), "--seed",
            str(files / "seed.bin")]
    r3 = _runner().invoke(app, [*args, "--json"])
    assert r3.exit_code == 4, r3.output
    v = json.loads(r3.stdout)
    assert v["result"] == "INTEGRITY-ONLY" and v["verified"] is False and v["exit_code"] == 4
    r4 = _runner().invoke(app, args, terminal_width=200)
    assert r4.exit_code == 4 and "INTEGRITY-ONLY" in r4.stdout and "VERIFIED" not in r4.stdout
    r5 = _runner().invoke(app, [*args, "--strict"])
    assert r5.exit_code == 1 and r5.stderr.strip().startswith("dicert: error: strict:")


def test_abort_exit_3_with_record(files, tmp_path):
    r = _runner().invoke(app, ["certify", str(files / "c.csv"), "--protocol", UNIFORM, "--seed",
                               str(files / "seed.bin"), "--out", str(tmp_path / "o"), "--json"])
    assert r.exit_code == 3, r.output
    d = json.loads(r.stdout)
    assert d["status"] == "aborted" and d["output_bits"] == 0 and d["bits_file"] is None
    assert Path(d["record_file"]).exists()


def test_bad_protocol_one_line_exit_2(files, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text(Path(UNIFORM).read_text().replace("eps_ext = 1e-8", "eps_ext = 2"))
    r = _runner().invoke(app, ["certify", str(files / "q.btl"), "--protocol", str(bad), "--seed",
                               str(files / "seed.bin"), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2
    err = r.stderr.strip()
    assert len(err.splitlines()) == 1 and "'extractor.eps_ext'" in err and str(bad) in err
    assert "Traceback" not in r.output
    assert not (tmp_path / "o").exists()


def test_short_seed_exit_2_names_bytes(files, tmp_path):
    short = tmp_path / "short.bin"
    short.write_bytes(b"\x00" * 10)
    r = _runner().invoke(app, ["certify", str(files / "q.btl"), "--protocol", UNIFORM, "--seed",
                               str(short), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2
    assert "bytes needed" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_missing_log_exit_2(files, tmp_path):
    r = _runner().invoke(app, ["certify", str(tmp_path / "nope.btl"), "--protocol", UNIFORM,
                               "--seed", str(files / "seed.bin"), "--out", str(tmp_path / "o")])
    assert r.exit_code == 2 and "nope.btl" in r.stderr


def test_verify_tampered_exit_1_names_field(files, tmp_path):
    out = tmp_path / "o"
    r = _runner().invoke(app, ["certify", str(files / "q.btl"), "--protocol", UNIFORM, "--seed",
                               str(files / "seed.bin"), "--out", str(out)])
    assert r.exit_code == 0
    bits = out / "random.bits"
    data = bytearray(bits.read_bytes())
    data[0] ^= 0x80
    bits.write_bytes(bytes(data))
    r = _runner().invoke(app, ["verify", str(out / "record.json"), "--bits", str(bits)])
    assert r.exit_code == 1
    assert r.stderr.strip().startswith("dicert: error: bits:")
    r = _runner().invoke(app, ["verify", str(out / "record.json"), "--bits", str(bits), "--json"])
    assert r.exit_code == 1 and json.loads(r.stdout)["field"] == "bits"


def test_verify_record_only_says_so(files, tmp_path):
    out = tmp_path / "o"
    _runner().invoke(app, ["certify", str(files / "q.btl"), "--protocol", UNIFORM, "--seed",
                           str(files / "seed.bin"), "--out", str(out)])
    r = _runner().invoke(app, ["verify", str(out / "record.json")])
    assert r.exit_code == 4  # unsigned: integrity only
    text = " ".join(r.stdout.split())
    assert "Only the signature and the internal consistency" in text
    assert "authenticity NOT established" in text


def test_verify_argument_errors(tmp_path):
    r = _runner().invoke(app, ["verify"])
    assert r.exit_code == 2
    r = _runner().invoke(app, ["verify", "--chain", str(tmp_path), "--log", "x"])
    assert r.exit_code == 2


def test_certify_help_carries_assumptions_and_caution():
    r = _runner().invoke(app, ["certify", "--help"], terminal_width=200)
    assert r.exit_code == 0
    text = " ".join(r.stdout.split())
    for phrase in ("no communication between the stations", "independent of the devices",
                   "trusted classical processing", "side-information model",
                   "accredited review", "3 aborted"):
        assert phrase in text


def test_demo_end_to_end(tmp_path):
    r = _runner().invoke(app, ["demo", "--out", str(tmp_path / "demo"), "--json"])
    assert r.exit_code == 0, r.output
    d = json.loads(r.stdout)
    assert d["ok"] and d["invented"]
    statuses = [p["status"] for p in d["pulses"]]
    assert statuses[:2] == ["certified", "certified"] and statuses[2] == "aborted"
    assert len(d["tamper_checks"]) >= 4
    assert all(c["verification"] == "failed as expected" for c in d["tamper_checks"])
    # Verified against the operator's public key; without it only integrity is established.
    assert all(p["result"] == "VERIFIED" for p in d["pulses"])
    assert d["chain"]["result"] == "VERIFIED" and d["without_key"] == "INTEGRITY-ONLY"
    kinds = {c["tampered"].split(" (")[0] for c in d["tamper_checks"]}
    assert {"log", "seed", "bits", "record", "chain"} <= kinds
    # Everything written stays inside --out.
    for p in d["pulses"]:
        assert Path(p["record_file"]).resolve().is_relative_to((tmp_path / "demo").resolve())
    r2 = _runner().invoke(app, ["demo", "--out", str(tmp_path / "demo")])
    assert r2.exit_code == 2  # refuses a non-empty directory


# --------------------------------------------------------------------------- --follow


def _fast_pef_toml(tmp_path: Path) -> Path:
    """ch-photonic.toml with a fixed (isotropic) calibration and a small target (decided
    within about a thousand trials of the simulated Tsirelson box)."""
    import re

    text = (ROOT / "protocols" / "ch-photonic.toml").read_text()
    for key, value in (("beta", "0.1"), ("eps_pe", "1e-6"), ("sigma_target_bits", "64"),
                       ("n_max", "1_000_000"), ("eps_ext", "1e-6"),
                       ("calibration", '"isotropic"\ncalibration_chsh = 2.7')):
        text, n = re.subn(rf"(?m)^{key}\s*=\s*[^#\n]*", f"{key} = {value}", text)
        assert n == 1, key
    text = re.sub(r"(?m)^calibration_trials\s*=.*$", "", text)
    path = tmp_path / "pef-fast.toml"
    path.write_text(text)
    return path


def test_follow_stops_at_the_target_while_the_log_grows(files, tmp_path):
    import threading
    import time

    from dicert.logs import BinaryLogWriter

    proto = _fast_pef_toml(tmp_path)
    codes = sim_trials(200_000, seed=3).codes()
    log = tmp_path / "live.btl"
    w = BinaryLogWriter(log, has_test_flag=False, streamed=True)
    stop = threading.Event()

    def acquire():  # the "experiment": 100 trials every 5 ms until told to stop
        for i in range(0, codes.size, 100):
            if stop.is_set():
                return
            w.append(codes[i:i + 100])
            time.sleep(0.005)

    th = threading.Thread(target=acquire)
    th.start()
    try:
        r = _runner().invoke(app, ["certify", str(log), "--protocol", str(proto), "--seed",
                                   str(files / "seed.bin"), "--out", str(tmp_path / "o"),
                                   "--follow", "--poll", "0.01", "--idle-timeout", "10",
                                   "--json"])
        still_acquiring = th.is_alive()  # it decided while the log was still growing
    finally:
        stop.set()
        th.join()
        w.close()
    assert r.exit_code == 0, r.output
    assert still_acquiring
    d = json.loads(r.stdout)
    assert d["status"] == "certified" and d["stopped_early"] is True
    assert d["log_coverage"] == "prefix" and d["ended_by"] == "decision"
    k = d["stop_trial_index"]
    assert k == d["success_trial_index"] and d["trials"] == k + 1
    assert d["bytes_read"] == 24 + k + 1 < log.stat().st_size
    # Same stopping trial as reading the finished file without --follow (the PEF run's
    # success trial does not depend on how the bytes arrived; methods note section 2).
    r2 = _runner().invoke(app, ["certify", str(log), "--protocol", str(proto), "--seed",
                                str(files / "seed.bin"), "--out", str(tmp_path / "o2"),
                                "--json"])
    assert r2.exit_code == 0 and json.loads(r2.stdout)["stop_trial_index"] == k
    r3 = _runner().invoke(app, ["verify", d["record_file"], "--log", str(log), "--seed",
                                str(files / "seed.bin"), "--bits", d["bits_file"]])
    assert r3.exit_code == 4, r3.output  # every number re-derived; unsigned: integrity only


def test_follow_idle_timeout_and_trailer_abort_with_a_record(files, tmp_path):
    from dicert.logs import BinaryLogWriter

    proto = _fast_pef_toml(tmp_path)
    log = tmp_path / "stalled.btl"
    w = BinaryLogWriter(log, has_test_flag=False, streamed=True)
    w.append(sim_trials(200, seed=3).codes())  # far too few trials, and then nothing more
    args = ["certify", str(log), "--protocol", str(proto), "--seed", str(files / "seed.bin"),
            "--follow", "--poll", "0.01", "--json"]
    r = _runner().invoke(app, [*args, "--out", str(tmp_path / "o"), "--idle-timeout", "0.3"])
    assert r.exit_code == 3, r.output
    d = json.loads(r.stdout)
    assert d["status"] == "aborted" and "idle timeout" in d["abort_reason"]
    assert d["ended_by"] == "idle-timeout" and d["log_coverage"] == "prefix" and d["trials"] == 200
    assert Path(d["record_file"]).exists()
    r1 = _runner().invoke(app, ["verify", d["record_file"], "--log", str(log)])
    assert r1.exit_code == 4, r1.output  # consistent; unsigned: integrity only
    # Once the trailer is written the run decides with what there is: the whole log.
    w.close()
    r = _runner().invoke(app, [*args, "--out", str(tmp_path / "o2"), "--idle-timeout", "5"])
    assert r.exit_code == 3, r.output
    d = json.loads(r.stdout)
    assert d["ended_by"] == "end-of-log" and d["log_coverage"] == "whole"
    assert "log ended before the target was reached" in d["abort_reason"]


def test_follow_bad_uses_exit_2_one_line(files, tmp_path):
    proto = _fast_pef_toml(tmp_path)
    seed = str(files / "seed.bin")
    cases = [
        # a method that needs the whole log
        ["certify", str(files / "q.btl"), "--protocol", UNIFORM, "--follow"],
        # a text log (nothing appends to it in the binary format)
        ["certify", str(files / "c.csv"), "--protocol", str(proto), "--follow"],
        # follow options without --follow
        ["certify", str(files / "q.btl"), "--protocol", str(proto), "--poll", "1"],
        ["certify", str(files / "q.btl"), "--protocol", str(proto), "--follow", "--poll", "0"],
    ]
    for i, argv in enumerate(cases):
        r = _runner().invoke(app, [*argv, "--seed", seed, "--out", str(tmp_path / f"o{i}")])
        assert r.exit_code == 2, (argv, r.output)
        err = r.stderr.strip()
        assert len(err.splitlines()) == 1 and err.startswith("dicert: error:"), err
        assert "Traceback" not in r.output
        assert not (tmp_path / f"o{i}").exists()
