"""Verification: a genuine record passes; tampering with any byte of the log, seed, bits or
record fails with the first disagreeing field named."""

from __future__ import annotations

import hashlib
import json
import re
import tomllib
from pathlib import Path

import numpy as np
import pytest
from helpers import sim_trials, uniform_protocol

from dicert.certify import certify
from dicert.errors import VerificationError
from dicert.logs import write_log
from dicert.protocol import protocol_from_dict
from dicert.verify import verify, verify_chain

ROOT = Path(__file__).resolve().parents[1]




@pytest.fixture(scope="module")
def run(tmp_path_factory):
    from dicert.audit.signing import write_keypair

    d = tmp_path_factory.mktemp("verify")
    log = d / "log.btl"
    write_log(log, sim_trials(4_000, seed=21))
    seed = d / "seed.bin"
    seed.write_bytes(np.random.default_rng(8).bytes(1_200))
    keys = write_keypair(d / "key.pem")
    res = certify(log, uniform_protocol(), seed, d / "out", key=keys.private_key_file)
    assert res.status == "certified" and res.output_bits > 0
    return {"dir": d, "log": log, "seed": seed, "bits": res.bits_file, "record": res.record_file,
            "pub": keys.public_key_file, "res": res}


def _flip(src: Path, dst: Path, pos: int) -> Path:
    data = bytearray(src.read_bytes())
    data[pos] ^= 0x01
    dst.write_bytes(bytes(data))
    return dst


def _positions(size: int, count: int = 12) -> list[int]:
    return sorted({0, 1, size // 2, size - 1, *np.linspace(0, size - 1, count).astype(int).tolist()})


def test_genuine_record_verifies_fully(run):
    rep = verify(run["record"], log=run["log"], seed=run["seed"], bits=run["bits"],
                 public_key=run["pub"])
    assert rep.scope == "full" and rep.not_checked == ()
    assert rep.output_bits == run["res"].output_bits
    assert "given public key" in rep.signature
    assert rep.result == "VERIFIED" and rep.authenticated and rep.exit_code == 0


def test_without_inputs_says_only_signature_and_consistency(run):
    rep = verify(run["record"], public_key=run["pub"])
    assert rep.scope == "record-only"
    assert "Only the signature and the internal consistency" in rep.message
    # The bits file the record names, next to it, is checked by default.
    assert set(rep.not_checked) == {"log", "seed"}
    assert "bits file length and digest" in rep.checked
    assert rep.bits_file == str(run["bits"])
    assert rep.result == "VERIFIED-PARTIAL" and rep.exit_code == 0


def test_without_a_trusted_key_integrity_only(run):
    # A signature checked only against the key embedded in the record says nothing about who
    # signed it: never VERIFIED, exit code 4.
    rep = verify(run["record"], log=run["log"], seed=run["seed"])
    assert rep.scope == "full" and not rep.authenticated
    assert rep.result == "INTEGRITY-ONLY" and rep.exit_code == 4
    assert "authenticity NOT established" in rep.message
    with pytest.raises(VerificationError, match="strict: not established: authenticity"):
        verify(run["record"], log=run["log"], seed=run["seed"], strict=True)
    # --strict with a trusted key: anything unchecked is a failure.
    with pytest.raises(VerificationError, match="strict: not established: seed, log"):
        verify(run["record"], public_key=run["pub"], strict=True)
    verify(run["record"], log=run["log"], seed=run["seed"], public_key=run["pub"], strict=True)


def test_bits_next_to_the_record_are_checked_by_default(run, tmp_path):
    import shutil

    d = tmp_path / "copy"
    d.mkdir()
    shutil.copy(run["record"], d / "record.json")
    bits = bytearray(run["bits"].read_bytes())
    bits[-1] ^= 0x01
    (d / "random.bits").write_bytes(bytes(bits))
    with pytest.raises(VerificationError) as info:
        verify(d / "record.json", public_key=run["pub"])
    assert info.value.field == "bits"
    (d / "random.bits").unlink()  # missing: listed as not checked, not the full word
    rep = verify(d / "record.json", log=run["log"], seed=run["seed"], public_key=run["pub"])
    assert rep.not_checked == ("bits",) and rep.result == "VERIFIED-PARTIAL"
    assert any("not next to the record" in n for n in rep.notes)
    with pytest.raises(VerificationError, match="strict"):
        verify(d / "record.json", log=run["log"], seed=run["seed"], public_key=run["pub"],
               strict=True)


def test_trusted_keys_file_with_rotation_ranges(run, tmp_path):
    from dicert.audit.signing import generate_keypair, public_key_bytes
    from dicert.audit.trust import load_trusted_keys
    from dicert.errors import ParameterError

    pub_hex = Path(run["pub"]).read_text()
    other = public_key_bytes(generate_keypair().public_key).hex()
    tk = tmp_path / "trusted.toml"
    tk.write_text('format = "dicert-trusted-keys/1"\n'
                  f'[[key]]\nlabel = "old"\npublic_key = "{other}"\n'
                  f'[[key]]\nlabel = "operator"\npublic_key_file = "{run["pub"]}"\n')
    rep = verify(run["record"], log=run["log"], seed=run["seed"], trusted_keys=tk)
    assert rep.result == "VERIFIED" and "trusted key 'operator'" in rep.signature
    # The record is not a chain pulse: a key trusted only for a pulse range does not cover it.
    tk.write_text('format = "dicert-trusted-keys/1"\n'
                  f'[[key]]\npublic_key_file = "{run["pub"]}"\nfirst_pulse = 3\n')
    with pytest.raises(VerificationError, match="only for chain pulses"):
        verify(run["record"], trusted_keys=tk)
    # Only a listed key authenticates.
    tk.write_text(f'format = "dicert-trusted-keys/1"\n[[key]]\npublic_key = "{other}"\n')
    with pytest.raises(VerificationError, match="not among the trusted keys"):
        verify(run["record"], trusted_keys=tk)
    assert "PUBLIC KEY" in pub_hex
    for bad, where in (('format = "x"\n', "format"),
                       ('format = "dicert-trusted-keys/1"\n[[key]]\nlabel = "a"\n',
                        "key[1]: give exactly one"),
                       (f'format = "dicert-trusted-keys/1"\n[[key]]\npublic_key = "{other}"\n'
                        'first_pulse = 0\n', "key[1].first_pulse")):
        tk.write_text(bad)
        with pytest.raises(ParameterError, match=re.escape(where)):
            load_trusted_keys(tk)


def test_tampered_log_fails_at_every_position(run, tmp_path):
    size = run["log"].stat().st_size
    for pos in _positions(size):
        bad = _flip(run["log"], tmp_path / "bad.btl", pos)
        with pytest.raises(VerificationError) as info:
            verify(run["record"], log=bad, seed=run["seed"], public_key=run["pub"])
        assert info.value.field == "log.sha256", pos


def test_tampered_seed_fails_at_every_position(run, tmp_path):
    size = run["seed"].stat().st_size
    for pos in _positions(size):
        bad = _flip(run["seed"], tmp_path / "bad.bin", pos)
        with pytest.raises(VerificationError) as info:
            verify(run["record"], seed=bad)
        assert info.value.field == "extractor.seed_sha256"


def test_tampered_bits_fail_at_every_byte(run, tmp_path):
    data = run["bits"].read_bytes()
    for pos in range(len(data)):
        bad = _flip(run["bits"], tmp_path / "bad.bits", pos)
        with pytest.raises(VerificationError) as info:
            verify(run["record"], bits=bad)
        assert info.value.field == "bits"
    (tmp_path / "short.bits").write_bytes(data[:-1])
    with pytest.raises(VerificationError, match="bytes"):
        verify(run["record"], bits=tmp_path / "short.bits")


def test_bits_that_are_not_a_regular_file_are_refused_before_reading(run, tmp_path):
    # Hostile input: an endless device must not be read (its size is checked first), and a
    # folder or a file of the wrong size is refused with one line naming it.
    import os

    if os.path.exists("/dev/zero"):
        with pytest.raises(VerificationError, match="not a regular file") as info:
            verify(run["record"], bits="/dev/zero")
        assert info.value.field == "bits"
    with pytest.raises(VerificationError, match="directory"):
        verify(run["record"], bits=tmp_path)
    big = tmp_path / "big.bits"
    with open(big, "wb") as fh:  # sparse: the size is refused before any byte is read
        fh.truncate(1 << 34)
    with pytest.raises(VerificationError, match=f"{1 << 34} bytes"):
        verify(run["record"], bits=big)


def test_tampered_record_fails_at_every_byte(run, tmp_path):
    # Every byte of the file: the canonical file form (RFC 8785) plus the SHA-256 digest and
    # Ed25519 signature (RFC 8032) leave no byte whose change goes unnoticed.
    from dicert.audit.record import check_record, read_record

    data = run["record"].read_bytes()
    bad = tmp_path / "bad.json"
    step = max(1, len(data) // 500)  # about 500 positions spread over the whole file
    for pos in range(0, len(data), step):
        buf = bytearray(data)
        buf[pos] ^= 0x01
        bad.write_bytes(bytes(buf))
        with pytest.raises(VerificationError):
            check_record(read_record(bad))
    # and through verify() itself at a few positions
    for pos in _positions(len(data)):
        _flip(run["record"], bad, pos)
        with pytest.raises(VerificationError):
            verify(bad)


def _reseal(record_path: Path, edit, key=None) -> dict:
    from dicert.audit.record import read_record, seal_record

    rec = read_record(record_path)
    body = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    edit(body)
    return seal_record(body, key)


@pytest.mark.parametrize(
    ("edit", "field"),
    [
        (lambda b: b["extractor"].__setitem__("output_bits", b["extractor"]["output_bits"] + 1),
         "extractor.output_bits"),
        (lambda b: b["entropy"]["finite_size"].__setitem__("certified_min_entropy_bits", 1e9),
         "entropy.finite_size.certified_min_entropy_bits"),
        (lambda b: b.__setitem__("soundness_error", 1e-30), "soundness_error"),
        (lambda b: b["error_budget"].__setitem__("total", 1e-30), "error_budget.total"),
        (lambda b: b["error_budget"]["terms"][0].__setitem__("value", 1e-30),
         "error_budget.terms[0].value"),
        (lambda b: b["counts"]["values"][1][0][0][0].__setitem__(0, 10**6), "log.trials"),
        (lambda b: b["protocol"].__setitem__("content", b["protocol"]["content"] + "# x\n"),
         "protocol.sha256"),
        (lambda b: b.__setitem__("status", "certified") or b["extractor"].__setitem__(
            "seed_bits", 10**9), "extractor.seed_bits"),
    ],
)
def test_resealed_forgeries_fail_internal_consistency(run, tmp_path, edit, field):
    # A forger without the key can re-seal an unsigned record; the recomputation still catches
    # every derived number.
    from dicert.audit.record import write_record

    forged = _reseal(run["record"], edit)
    path = write_record(tmp_path / "forged.json", forged)
    with pytest.raises(VerificationError) as info:
        verify(path)
    assert info.value.field == field
    with pytest.raises(VerificationError):  # and the operator's key is not on it
        verify(path, public_key=run["pub"])


def test_other_key_is_rejected(run, tmp_path):
    from dicert.audit.record import write_record
    from dicert.audit.signing import generate_keypair

    other = generate_keypair()
    forged = _reseal(run["record"], lambda b: None, other.private_key)
    path = write_record(tmp_path / "other.json", forged)
    verify(path)  # self-consistent under its embedded key ...
    with pytest.raises(VerificationError) as info:  # ... but not the operator's
        verify(path, public_key=run["pub"])
    assert info.value.field.startswith("signature")


def test_renamed_log_still_verifies(run, tmp_path):
    moved = tmp_path / "renamed.btl"
    moved.write_bytes(run["log"].read_bytes())
    verify(run["record"], log=moved, seed=run["seed"], bits=run["bits"])


def test_aborted_record_verifies_and_bits_not_required(tmp_path):
    log = tmp_path / "c.btl"
    write_log(log, sim_trials(4_000, seed=5, model="classical"))
    seed = tmp_path / "s.bin"
    seed.write_bytes(b"\x07" * 32)
    res = certify(log, uniform_protocol(), seed, tmp_path / "out")
    assert res.status == "aborted"
    rep = verify(res.record_file, log=log, seed=seed)
    assert rep.scope == "full" and rep.status == "aborted"
    # The abort cannot be turned into a certificate by editing the status.
    forged = _reseal(res.record_file, lambda b: b.__setitem__("status", "certified"))
    from dicert.audit.record import write_record

    with pytest.raises(VerificationError) as info:
        verify(write_record(tmp_path / "f.json", forged))
    assert info.value.field in ("status", "entropy.finite_size.accepted", "abort_reason")
    # Bits next to an abort are not covered by it: checking the folder fails.
    (tmp_path / "out" / "random.bits").write_bytes(b"\x5a" * 16)
    with pytest.raises(VerificationError, match="abort") as info:
        verify(res.record_file, log=log, seed=seed)
    assert info.value.field == "bits"


def test_chain_verification(run, tmp_path):
    from dicert.audit.signing import write_keypair

    keys = write_keypair(tmp_path / "op.pem")
    chain = tmp_path / "chain"
    for i in range(3):
        seed = tmp_path / f"seed{i}.bin"
        seed.write_bytes(np.random.default_rng(100 + i).bytes(1_200))
        log = tmp_path / f"log{i}.btl"
        write_log(log, sim_trials(4_000, seed=60 + i))
        certify(log, uniform_protocol(), seed, tmp_path / f"p{i}", chain=chain,
                key=keys.private_key_file)
    rep = verify_chain(chain, public_key=keys.public_key_file)
    assert rep.pulses == 3 and rep.ok and rep.result == "VERIFIED"
    assert verify_chain(chain).result == "INTEGRITY-ONLY"  # no trusted key
    # A published head detects truncation of the newest pulses.
    head = rep.head_sha256
    verify_chain(chain, public_key=keys.public_key_file, head=head)
    (chain / "pulse-000003.json").unlink()
    with pytest.raises(VerificationError, match="truncated"):
        verify_chain(chain, public_key=keys.public_key_file, head=head)
    # Remove the middle pulse: the gap is reported.
    (chain / "pulse-000002.json").unlink()
    (tmp_path / "p2" / "record.json").rename(chain / "pulse-000003.json")
    with pytest.raises(VerificationError, match="gap"):
        verify_chain(chain, public_key=keys.public_key_file)


def test_record_file_is_rfc8785_canonical(run):
    # The file form is the RFC 8785 canonical serialisation plus one LF, checked with the
    # independent reference library `rfc8785` (general-purpose implementation of the standard).
    import rfc8785

    data = run["record"].read_bytes()
    assert data == rfc8785.dumps(json.loads(data)) + b"\n"
    rec = json.loads(data)
    body = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    # record_sha256 = SHA-256 (FIPS 180-4) of the canonical body.
    assert rec["record_sha256"] == hashlib.sha256(rfc8785.dumps(body)).hexdigest()


# --------------------------------------------------------------------------- prefix records


def _fast_pef_protocol():
    """ch-photonic.toml with a fixed (isotropic) calibration and a small target (decided
    within about a thousand trials of the simulated Tsirelson box)."""
    d = tomllib.loads((ROOT / "protocols" / "ch-photonic.toml").read_text())
    a = d["analysis"]
    del a["calibration_trials"]
    a.update(calibration="isotropic", calibration_chsh=2.7, beta=0.1, sigma_target_bits=64,
             eps_pe=1e-6, n_max=1_000_000)
    d["extractor"]["eps_ext"] = 1e-6
    return protocol_from_dict(d, "pef-fast")


def test_prefix_record_verifies_as_the_log_grows_and_catches_tampering_in_the_prefix(tmp_path):
    from dicert.logs import BinaryLogWriter

    codes = sim_trials(8_000, seed=3).codes()
    log = tmp_path / "grow.btl"
    w = BinaryLogWriter(log, has_test_flag=False, streamed=True)
    w.append(codes[:5_000])  # still being written: no trailer yet
    seed = tmp_path / "seed.bin"
    seed.write_bytes(np.random.default_rng(4).bytes(4_000))
    res = certify(log, _fast_pef_protocol(), seed, tmp_path / "out")
    assert res.status == "certified" and res.log_coverage == "prefix"
    n_pre = res.record["log"]["bytes_read"]
    assert n_pre < log.stat().st_size
    rep = verify(res.record_file, log=log, seed=seed, bits=res.bits_file)
    assert rep.scope == "full" and any(f"first {n_pre} bytes" in n for n in rep.notes)
    # More trials and the trailer arrive afterwards: the prefix is unchanged, so it verifies.
    w.append(codes[5_000:])
    w.close()
    assert verify(res.record_file, log=log, seed=seed, bits=res.bits_file).scope == "full"
    # Any change inside the prefix (header or trials) fails; changes after it do not matter.
    size = log.stat().st_size
    for pos in _positions(n_pre, 8):
        bad = _flip(log, tmp_path / "bad.btl", pos)
        with pytest.raises(VerificationError) as info:
            verify(res.record_file, log=bad, seed=seed)
        assert info.value.field.startswith("log."), (pos, info.value.field)
    for pos in (n_pre, n_pre + 1, size - 20):
        later = _flip(log, tmp_path / "later.btl", pos)
        verify(res.record_file, log=later, seed=seed, bits=res.bits_file)
    # A log cut inside the prefix is not the certified one either.
    short = tmp_path / "short.btl"
    short.write_bytes(log.read_bytes()[: n_pre - 1])
    with pytest.raises(VerificationError):
        verify(res.record_file, log=short, seed=seed)


def test_record_without_log_scope_members_still_verifies(run, tmp_path):
    """Records written before log scopes existed covered the whole log; they stay readable
    (house style: records carry a format version so old records remain checkable)."""
    from dicert.audit.record import read_record, record_bytes, seal_record

    rec = read_record(run["record"])
    body = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    body["log"] = {k: v for k, v in body["log"].items()
                   if k not in ("coverage", "bytes_read", "trials_read", "stopped_early",
                                "stop_trial_index", "ended_by", "follow")}
    old = tmp_path / "old.json"
    old.write_bytes(record_bytes(seal_record(body, None)))
    rep = verify(old, log=run["log"], seed=run["seed"], bits=run["bits"])
    assert rep.scope == "full"
