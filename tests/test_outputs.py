"""Outputs committed as one unit: fault injection at every stage boundary of certify, disk
full, concurrent appenders, --force, file modes, private spill files, and the chain checks
certify makes before extending a chain.

Each fault test asserts the exit code, the one-line message, and the exact state of the
output folders and the chain afterwards; then a later certify --chain and verify --chain
must succeed (a crash never blocks the beacon).

The design relies on facts of the platform: rename(2) of a directory onto a missing or empty
one is atomic (POSIX.1-2017, rename()); link(2) never replaces an existing name (POSIX.1-2017,
link()); renameat2(RENAME_EXCHANGE) swaps two names atomically (Linux man-pages, rename(2));
flock(2) locks are released when the holder dies (Linux man-pages, flock(2)).
"""

from __future__ import annotations

import errno
import json
import os
import shutil
import stat
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import sim_trials
from typer.testing import CliRunner

from dicert.audit.signing import write_keypair
from dicert.certify import BITS_NAME, RECORD_NAME, certify
from dicert.cli.app import app
from dicert.errors import DicertError, ParameterError, SeedError, VerificationError
from dicert.logs import write_log
from dicert.verify import verify, verify_chain

ROOT = Path(__file__).resolve().parents[1]
UNIFORM = str(ROOT / "protocols" / "chsh-uniform.toml")
STAGES = ["after-scan", "after-extract", "after-stage-write", "during-chain-append",
          "after-chain-append"]
#: Stages after which the new pulse is committed (it is in the chain).
COMMITTED = {"after-chain-append"}


def _proto():
    from dicert.protocol import load_protocol

    return load_protocol(UNIFORM)


def _runner() -> CliRunner:
    try:
        return CliRunner(mix_stderr=False)
    except TypeError:
        return CliRunner()


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Four invented runs (simulated logs) with fresh seeds, and an operator key pair."""
    d = tmp_path_factory.mktemp("inputs")
    for i in range(4):
        write_log(d / f"log{i}.btl", sim_trials(4_000, seed=70 + i))
        (d / f"seed{i}.bin").write_bytes(np.random.default_rng(80 + i).bytes(1_200))
    keys = write_keypair(d / "op.key")
    return d, keys


def _tree(path: Path) -> dict[str, bytes]:
    """Every file under ``path`` (relative name -> bytes), hidden ones included."""
    return {str(p.relative_to(path)): p.read_bytes() for p in sorted(path.rglob("*"))
            if p.is_file()}


def _first_pulse(base: Path, inputs) -> dict[str, Path]:
    d, keys = inputs
    chain, out1 = base / "chain", base / "out1"
    certify(d / "log0.btl", _proto(), d / "seed0.bin", out1, chain=chain,
            key=keys.private_key_file)
    return {"chain": chain, "out1": out1}


def _cli(args: list[str], fault: str | None) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    env.pop("DICERT_TEST_FAULT", None)
    if fault:
        env["DICERT_TEST_FAULT"] = fault
    return subprocess.run([sys.executable, "-m", "dicert.cli.app", *args], env=env,
                          capture_output=True, text=True, timeout=120)


def _certify_args(d: Path, keys, i: int, out: Path, chain: Path) -> list[str]:
    return ["certify", str(d / f"log{i}.btl"), "--protocol", UNIFORM, "--seed",
            str(d / f"seed{i}.bin"), "--out", str(out), "--chain", str(chain), "--key",
            keys.private_key_file, "--json"]


def _assert_clean(base: Path, chain: Path) -> None:
    """No staging, spill or temporary entries anywhere (lock files only)."""
    hidden = sorted(p.name for p in base.iterdir() if p.name.startswith("."))
    assert all(n.endswith(".lock") for n in hidden), hidden
    assert sorted(p.name for p in chain.iterdir() if p.name.startswith(".")) == [".lock"]


def _after_fault_everything_recovers(base: Path, inputs, st: dict, stage: str,
                                     before_out1: dict, before_chain: dict) -> None:
    d, keys = inputs
    chain, out2 = st["chain"], base / "out2"
    assert _tree(st["out1"]) == before_out1  # the earlier run is untouched
    pulses = sorted(p.name for p in chain.glob("pulse-*.json"))
    if stage in COMMITTED:
        assert pulses == ["pulse-000001.json", "pulse-000002.json"]
        assert not out2.exists()  # not yet visible: completed by the next run on the chain
    else:
        assert pulses == ["pulse-000001.json"]
        assert {k: v for k, v in _tree(chain).items() if k.startswith("pulse-")} == \
            {k: v for k, v in before_chain.items() if k.startswith("pulse-")}
        assert not out2.exists()
    # A later run on the chain is not blocked, and cleans up (or completes) the crashed one.
    res = certify(d / "log2.btl", _proto(), d / "seed2.bin", base / "out3",
                  chain=chain, key=keys.private_key_file)
    assert res.status == "certified"
    _assert_clean(base, chain)
    if stage in COMMITTED:
        assert res.record["pulse_index"] == 3
        rep = verify(out2 / RECORD_NAME, public_key=keys.public_key_file)
        assert rep.result == "VERIFIED-PARTIAL" and "bits" not in rep.not_checked
    else:
        assert res.record["pulse_index"] == 2 and not out2.exists()
    rep = verify_chain(chain, public_key=keys.public_key_file)
    assert rep.result == "VERIFIED"
    assert rep.pulses == (3 if stage in COMMITTED else 2)


@pytest.mark.parametrize("stage", STAGES)
def test_kill_at_each_stage_boundary(tmp_path, inputs, stage):
    # A real crash (SIGKILL): no finally clauses run.
    d, keys = inputs
    st = _first_pulse(tmp_path, inputs)
    before_out1, before_chain = _tree(st["out1"]), _tree(st["chain"])
    r = _cli(_certify_args(d, keys, 1, tmp_path / "out2", st["chain"]), f"{stage}:kill")
    assert r.returncode == -9, r.stderr
    _after_fault_everything_recovers(tmp_path, inputs, st, stage, before_out1, before_chain)


@pytest.mark.parametrize("stage", STAGES)
def test_error_at_each_stage_boundary(tmp_path, inputs, stage, monkeypatch):
    d, keys = inputs
    st = _first_pulse(tmp_path, inputs)
    before_out1, before_chain = _tree(st["out1"]), _tree(st["chain"])
    monkeypatch.setenv("DICERT_TEST_FAULT", stage)
    r = _runner().invoke(app, _certify_args(d, keys, 1, tmp_path / "out2", st["chain"]))
    monkeypatch.delenv("DICERT_TEST_FAULT")
    assert r.exit_code == 2, r.output
    err = r.stderr.strip()
    assert err.splitlines() == [err] and err.startswith("dicert: error: injected fault at "
                                                        f"stage {stage}")
    if stage not in COMMITTED:  # a failed run leaves nothing behind at all
        _assert_clean(tmp_path, st["chain"])
    _after_fault_everything_recovers(tmp_path, inputs, st, stage, before_out1, before_chain)


@pytest.mark.parametrize("target", ["bits", "pulse"])
def test_disk_full_one_line_and_nothing_changed(tmp_path, inputs, monkeypatch, target):
    import dicert._outputs as outputs

    d, keys = inputs
    st = _first_pulse(tmp_path, inputs)
    before_out1, before_chain = _tree(st["out1"]), _tree(st["chain"])
    real = outputs.write_public_file

    def full(path, data, mode=outputs.PUBLIC_FILE_MODE):
        hit = path.name == BITS_NAME if target == "bits" else path.name.startswith(".pulse-")
        if hit:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        return real(path, data, mode)

    monkeypatch.setattr(outputs, "write_public_file", full)
    r = _runner().invoke(app, _certify_args(d, keys, 1, tmp_path / "out2", st["chain"]))
    monkeypatch.setattr(outputs, "write_public_file", real)
    assert r.exit_code == 2, r.output
    err = r.stderr.strip()
    assert err.splitlines() == [err] and "No space left on device" in err
    assert "Traceback" not in r.output
    assert _tree(st["out1"]) == before_out1 and _tree(st["chain"]) == before_chain
    assert not (tmp_path / "out2").exists()
    _assert_clean(tmp_path, st["chain"])
    # The same run succeeds once there is space again.
    r = _runner().invoke(app, _certify_args(d, keys, 1, tmp_path / "out2", st["chain"]))
    assert r.exit_code == 0, r.output


def test_two_concurrent_appenders(tmp_path, inputs):
    d, keys = inputs
    chain = tmp_path / "chain"
    env = {k: v for k, v in os.environ.items() if k != "DICERT_TEST_FAULT"}
    procs = [subprocess.Popen([sys.executable, "-m", "dicert.cli.app",
                               *_certify_args(d, keys, i, tmp_path / f"o{i}", chain)],
                              env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for i in (1, 2)]
    results = [(p.wait(timeout=120), p.stdout.read(), p.stderr.read()) for p in procs]
    for p in procs:
        p.stdout.close()
        p.stderr.close()
    assert [rc for rc, _, _ in results] == [0, 0], results
    indices = sorted(json.loads(out)["chain_file"] for _, out, _ in results)
    assert [Path(x).name for x in indices] == ["pulse-000001.json", "pulse-000002.json"]
    rep = verify_chain(chain, public_key=keys.public_key_file)
    assert rep.result == "VERIFIED" and rep.pulses == 2
    _assert_clean(tmp_path, chain)


def test_two_concurrent_appenders_with_one_log(tmp_path, inputs):
    # The lock serialises them: the second sees the first's pulse and refuses the reused log.
    d, keys = inputs
    chain = tmp_path / "chain"
    env = {k: v for k, v in os.environ.items() if k != "DICERT_TEST_FAULT"}
    args = [[*_certify_args(d, keys, 1, tmp_path / f"o{i}", chain)] for i in (1, 2)]
    args[1][args[1].index("--seed") + 1] = str(d / "seed3.bin")
    procs = [subprocess.Popen([sys.executable, "-m", "dicert.cli.app", *a], env=env,
                              stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for a in args]
    results = sorted((p.wait(timeout=120), p.stderr.read()) for p in procs)
    for p in procs:
        p.stdout.close()
        p.stderr.close()
    assert [rc for rc, _ in results] == [0, 2], results
    assert "already fed pulse 1" in results[1][1] and len(results[1][1].strip().splitlines()) == 1
    assert len(list(chain.glob("pulse-*.json"))) == 1
    verify_chain(chain, public_key=keys.public_key_file)


def test_force_replaces_only_after_the_new_set_is_complete(tmp_path, inputs, monkeypatch):
    import dicert._outputs as outputs

    d, _keys = inputs
    out = tmp_path / "out"
    certify(d / "log0.btl", _proto(), d / "seed0.bin", out)
    before = _tree(out)
    # Refused without --force (exit 2, one line), and nothing changes.
    r = _runner().invoke(app, ["certify", str(d / "log1.btl"), "--protocol", UNIFORM, "--seed",
                               str(d / "seed1.bin"), "--out", str(out)])
    assert r.exit_code == 2 and "not empty" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    assert _tree(out) == before
    # A failure before the new set is complete, and a failure in the middle of the
    # two-rename replacement (where renameat2 is missing), leave the earlier run in place.
    for stage, exchange in (("after-stage-write", True), ("after-exchange", False)):
        if not exchange:
            monkeypatch.setattr(outputs, "_exchange", lambda a, b: False)
        monkeypatch.setenv("DICERT_TEST_FAULT", stage)
        with pytest.raises(DicertError, match="injected fault"):
            certify(d / "log1.btl", _proto(), d / "seed1.bin", out, force=True)
        monkeypatch.delenv("DICERT_TEST_FAULT")
        assert _tree(out) == before, stage
        assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == [".out.lock"]
    # A crash between the two renames (earlier folder moved aside, new one not yet in place)
    # is undone by the next run, which then refuses the non-empty folder as usual.
    aside = tmp_path / ".out.old-0123456789ab"  # the name a run gives it
    out.rename(aside)
    with pytest.raises(ParameterError, match="not empty"):
        certify(d / "log1.btl", _proto(), d / "seed1.bin", out)
    assert _tree(out) == before and not aside.exists()
    # --force never replaces a folder holding files certify did not write.
    (out / "notes.txt").write_text("mine")
    with pytest.raises(ParameterError, match="notes.txt"):
        certify(d / "log1.btl", _proto(), d / "seed1.bin", out, force=True)
    (out / "notes.txt").unlink()
    res = certify(d / "log1.btl", _proto(), d / "seed1.bin", out, force=True)
    assert res.status == "certified" and _tree(out) != before
    assert sorted(_tree(out)) == [BITS_NAME, RECORD_NAME]


def test_published_modes_ignore_the_umask(tmp_path, inputs):
    # One documented mode: published files 0644, folders 0755; private key 0600.
    d, keys = inputs
    old = os.umask(0o077)
    try:
        k = write_keypair(tmp_path / "k.pem")
        res = certify(d / "log0.btl", _proto(), d / "seed0.bin", tmp_path / "out",
                      chain=tmp_path / "chain", key=k.private_key_file)
    finally:
        os.umask(old)

    def mode(p) -> int:
        return stat.S_IMODE(os.stat(p).st_mode)

    assert mode(res.bits_file) == mode(res.record_file) == mode(res.chain_file) == 0o644
    assert mode(k.public_key_file) == 0o644 and mode(k.private_key_file) == 0o600
    assert mode(tmp_path / "out") == mode(tmp_path / "chain") == 0o755


def test_raw_bit_spill_is_private_and_removed(tmp_path, inputs, monkeypatch):
    import dicert.stages.scan as certify_mod
    import dicert.extract as extract_mod

    d, _keys = inputs
    seen = []
    real = extract_mod.extract_toeplitz

    def spy(raw, *a, **k):
        assert isinstance(raw, Path)  # spilled to a file
        seen.append((raw, stat.S_IMODE(raw.stat().st_mode),
                     stat.S_IMODE(raw.parent.stat().st_mode)))
        return real(raw, *a, **k)

    monkeypatch.setattr(certify_mod, "_SPILL_BYTES", 16)
    monkeypatch.setattr(extract_mod, "extract_toeplitz", spy)
    out = tmp_path / "out"
    certify(d / "log0.btl", _proto(), d / "seed0.bin", out)
    (raw, fmode, dmode), = seen
    assert fmode == 0o600 and dmode == 0o700
    assert not raw.is_relative_to(out) and not raw.exists() and not raw.parent.exists()
    # A spill folder left by a crash is removed by the next run that holds the lock.
    stale = tmp_path / ".out2.raw-deadbeef0000"
    stale.mkdir(mode=0o700)
    (stale / ".raw.x.part").write_bytes(b"secret raw bits")
    certify(d / "log0.btl", _proto(), d / "seed0.bin", tmp_path / "out2")
    assert not stale.exists()


# --------------------------------------------------------------------------- chain checks


@pytest.fixture
def two_pulses(tmp_path, inputs):
    d, keys = inputs
    chain = tmp_path / "chain"
    for i in range(2):
        certify(d / f"log{i}.btl", _proto(), d / f"seed{i}.bin", tmp_path / f"p{i}",
                chain=chain, key=keys.private_key_file)
    return chain


def _extend(tmp_path, inputs, chain, **kw):
    d, keys = inputs
    return certify(d / "log2.btl", _proto(), d / "seed2.bin", tmp_path / "next",
                   chain=chain, key=kw.pop("key", keys.private_key_file), **kw)


def _reseal(path: Path, key=None, edit=lambda b: None) -> None:
    from dicert.audit.record import read_record, record_bytes, seal_record

    body = {k: v for k, v in read_record(path).items() if k not in ("record_sha256", "signature")}
    edit(body)
    path.write_bytes(record_bytes(seal_record(body, key)))


@pytest.mark.parametrize("damage", ["foreign", "unsigned", "gap", "swap"])
def test_certify_refuses_to_extend_a_bad_chain(tmp_path, inputs, two_pulses, damage):
    from dicert.audit.signing import generate_keypair

    chain = two_pulses
    p1, p2 = chain / "pulse-000001.json", chain / "pulse-000002.json"
    if damage == "foreign":  # the last pulse re-signed by someone else
        _reseal(p2, generate_keypair())
    elif damage == "unsigned":
        _reseal(p2, None)
    elif damage == "gap":
        p1.unlink()
    else:
        a, b = p1.read_bytes(), p2.read_bytes()
        p1.write_bytes(b)
        p2.write_bytes(a)
    before = _tree(chain)
    with pytest.raises(VerificationError, match="refusing to extend"):
        _extend(tmp_path, inputs, chain)
    assert _tree(chain) == before and not (tmp_path / "next").exists()


def test_key_rotation_with_a_trusted_keys_file(tmp_path, inputs, two_pulses):
    d, keys = inputs
    chain = two_pulses
    new = write_keypair(tmp_path / "new.key")
    # The new key alone does not vouch for the pulses signed by the old one.
    with pytest.raises(VerificationError, match="refusing to extend"):
        _extend(tmp_path, inputs, chain, key=new.private_key_file)
    tk = tmp_path / "trusted.toml"
    tk.write_text('format = "dicert-trusted-keys/1"\n'
                  f'[[key]]\nlabel = "2026"\npublic_key_file = "{keys.public_key_file}"\n'
                  'last_pulse = 2\n'
                  f'[[key]]\nlabel = "2027"\npublic_key_file = "{new.public_key_file}"\n'
                  'first_pulse = 3\n')
    res = _extend(tmp_path, inputs, chain, key=new.private_key_file, trusted_keys=tk)
    assert res.record["pulse_index"] == 3
    rep = verify_chain(chain, trusted_keys=tk)
    assert rep.result == "VERIFIED"
    assert [f.kind for f in rep.infos] == ["key-rotation"]
    # The old key is not trusted after pulse 2; the operator's new key alone is not enough.
    with pytest.raises(VerificationError, match="untrusted-key"):
        verify_chain(chain, public_key=new.public_key_file)
    r = _runner().invoke(app, ["verify", "--chain", str(chain), "--trusted-keys", str(tk),
                               "--head", rep.head_sha256, "--json"])
    assert r.exit_code == 0 and json.loads(r.stdout)["result"] == "VERIFIED"
    # An old key signing past its range is a key change the file does not allow.
    tk.write_text(tk.read_text().replace("last_pulse = 2", "last_pulse = 1"))
    r = _runner().invoke(app, ["verify", "--chain", str(chain), "--trusted-keys", str(tk)])
    assert r.exit_code == 1 and "up to pulse 1" in r.stderr


def test_protocol_change_needs_a_signed_declaration(tmp_path, inputs, two_pulses):
    chain = two_pulses
    d, keys = inputs
    from dicert.protocol import load_protocol

    low = tmp_path / "lowered.toml"  # same name, threshold lowered from 2.6 to 2.55
    low.write_text(Path(UNIFORM).read_text().replace("chsh_threshold = 2.6",
                                                     "chsh_threshold = 2.55"))
    lowered = load_protocol(low)
    assert lowered.name == _proto().name and lowered.sha256 != _proto().sha256
    with pytest.raises(ParameterError, match="--protocol-change"):
        certify(d / "log2.btl", lowered, d / "seed2.bin", tmp_path / "next", chain=chain,
                key=keys.private_key_file)
    with pytest.raises(ParameterError, match="nothing to declare"):
        _extend(tmp_path, inputs, chain, protocol_change="no change at all")
    res = certify(d / "log2.btl", lowered, d / "seed2.bin", tmp_path / "next", chain=chain,
                  key=keys.private_key_file, protocol_change="threshold re-planned (invented)")
    pc = res.record["protocol_change"]
    assert pc["reason"] == "threshold re-planned (invented)"
    assert pc["previous_protocol_sha256"] == _proto().sha256
    rep = verify(res.record_file, public_key=keys.public_key_file)
    assert any("declares a protocol change" in n for n in rep.notes)
    rep = verify_chain(chain, public_key=keys.public_key_file)
    assert rep.result == "VERIFIED"
    assert [(f.kind, f.severity) for f in rep.infos] == [("protocol-change", "info")]
    r = _runner().invoke(app, ["verify", "--chain", str(chain), "--pubkey",
                               keys.public_key_file], terminal_width=200)
    assert r.exit_code == 0 and "declared protocol change" in r.stdout
    # The same change without the declaration (re-signed by the operator's own key) fails.
    _reseal(chain / "pulse-000003.json", _load_private(keys.private_key_file),
            lambda b: b.pop("protocol_change"))
    with pytest.raises(VerificationError, match="protocol-change"):
        verify_chain(chain, public_key=keys.public_key_file)


def _load_private(path):
    from dicert.audit.signing import load_private_key

    return load_private_key(path)


def test_seed_reuse_refused_before_reading_the_log(tmp_path, inputs, two_pulses):
    d, keys = inputs
    with pytest.raises(SeedError, match="already used by pulse 1"):
        certify(d / "log2.btl", _proto(), d / "seed0.bin", tmp_path / "next",
                chain=two_pulses, key=keys.private_key_file)
    shutil.rmtree(tmp_path / "next", ignore_errors=True)


def test_disk_full_while_spilling_raw_bits(tmp_path, inputs, monkeypatch):
    import dicert.stages.scan as certify_mod

    d, _keys = inputs

    def full(*a, **k):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(certify_mod, "_SPILL_BYTES", 16)
    monkeypatch.setattr(certify_mod.tempfile, "mkstemp", full)
    r = _runner().invoke(app, ["certify", str(d / "log0.btl"), "--protocol", UNIFORM, "--seed",
                               str(d / "seed0.bin"), "--out", str(tmp_path / "out")])
    assert r.exit_code == 2, r.output
    err = r.stderr.strip()
    assert err.splitlines() == [err] and "spill" in err and "No space left" in err
    assert sorted(p.name for p in tmp_path.iterdir()) == [".out.lock"]


def test_an_aborted_pulses_seed_is_not_reused_either(tmp_path, inputs):
    d, keys = inputs
    chain = tmp_path / "chain"
    classical = tmp_path / "classical.btl"
    write_log(classical, sim_trials(4_000, seed=9, model="classical"))
    res = certify(classical, _proto(), d / "seed0.bin", tmp_path / "a", chain=chain,
                  key=keys.private_key_file)
    assert res.status == "aborted"
    with pytest.raises(SeedError, match="already used by pulse 1"):
        certify(d / "log1.btl", _proto(), d / "seed0.bin", tmp_path / "b", chain=chain,
                key=keys.private_key_file)


def test_seeds_used_by_current_records_are_found(inputs, two_pulses):
    # The chain's used-seed list reads today's record name (extractor.seed_bits); it read only
    # the /1-/2 name (seed_bits_used) before, so it found nothing in a /3 or /4 chain.
    import hashlib

    from dicert.stages.analysis import _chain_seed_digests

    d, _keys = inputs
    assert hashlib.sha256((d / "seed0.bin").read_bytes()).hexdigest() in \
        _chain_seed_digests(two_pulses)


def test_leftovers_of_an_active_run_are_not_swept(tmp_path, inputs):
    import fcntl

    d, _keys = inputs
    busy = tmp_path / ".busy.new-0123456789ab"
    busy.mkdir()
    lock = tmp_path / ".busy.lock"
    fd = os.open(lock, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)  # a run on "busy" is active
        certify(d / "log0.btl", _proto(), d / "seed0.bin", tmp_path / "out")
        assert busy.exists()
    finally:
        os.close(fd)
    certify(d / "log1.btl", _proto(), d / "seed1.bin", tmp_path / "out2")
    assert not busy.exists()  # its lock is free now: a crashed run's folder
    # Entries that only look similar are never touched.
    other = tmp_path / ".busy.new-notours"
    other.mkdir()
    certify(d / "log2.btl", _proto(), d / "seed2.bin", tmp_path / "out3")
    assert other.exists()


def test_out_and_chain_must_be_separate(tmp_path, inputs):
    d, keys = inputs
    for out, chain in ((tmp_path / "c" / "o", tmp_path / "c"), (tmp_path / "x", tmp_path / "x")):
        with pytest.raises(ParameterError, match="separate folders"):
            certify(d / "log0.btl", _proto(), d / "seed0.bin", out, chain=chain,
                    key=keys.private_key_file)
    assert list(tmp_path.iterdir()) == []
