"""Tests of dicert.audit.record: sealing, checking, tamper detection, file form, format policy."""

from __future__ import annotations

import copy
import hashlib
from pathlib import Path

import pytest

from dicert.audit import signing
from dicert.audit.canonical import canonicalize
from dicert.audit.record import (
    RECORD_FORMAT,
    check_record,
    read_record,
    record_body,
    record_bytes,
    record_digest,
    seal_record,
    stable_view,
    write_record,
)
from dicert.errors import ParameterError, VerificationError

# RFC 8032 section 7.1 TEST 1 secret key: a published, fixed key makes sealed records
# byte-reproducible (Ed25519 signatures are deterministic, RFC 8032 section 5.1.6).
RFC8032_TEST1_SECRET = bytes.fromhex(
    "9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60"
)
RFC8032_TEST1_PUBLIC = bytes.fromhex(
    "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"
)


@pytest.fixture(scope="module")
def key():
    return signing.private_key_from_bytes(RFC8032_TEST1_SECRET)


def _body(**extra):
    # An invented, small record body (numbers chosen to exercise exponents and escapes).
    body = {
        "format": RECORD_FORMAT,
        "tool": {"name": "dicert", "version": "0.1.0"},
        "log": {"sha256": "ab" * 32, "size_bytes": 1234, "trials": 1000, "files": ["a.dbl"]},
        "estimate": {"chsh": 2.5, "chsh_lower": 2.4123456789, "p_value_local": 1.5e-12},
        "eps": {"eps_est": 1e-9, "eps_ext": 1e-10},
        "extractor": {"seed_sha256": "cd" * 32, "seed_bits_used": 4095, "output_bits": 100},
        "note": "tabs\tquotes\" and unicode \u00e9\u20ac",
        "status": "certified",
        "volatile": {"timestamps": {"started": "2024-01-01T00:00:00Z"}, "timings_s": {"all": 0.5}},
    }
    body.update(extra)
    return body


def test_seal_layout_and_digest(key):
    record = seal_record(_body(), key)
    body = record_body(record)
    # record_sha256 = SHA-256 (FIPS 180-4, via hashlib) of the RFC 8785 canonical body.
    assert record["record_sha256"] == hashlib.sha256(canonicalize(body)).hexdigest()
    assert record_digest(record) == record["record_sha256"]
    sig = record["signature"]
    assert sig["algorithm"] == "Ed25519"
    assert sig["public_key"] == RFC8032_TEST1_PUBLIC.hex()
    assert sig["key_fingerprint"] == hashlib.sha256(RFC8032_TEST1_PUBLIC).hexdigest()
    # The signature is over the canonical body bytes: check with the cryptography package
    # directly (reference library), not through our wrapper.
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

    Ed25519PublicKey.from_public_bytes(RFC8032_TEST1_PUBLIC).verify(
        bytes.fromhex(sig["value"]), canonicalize(body)
    )
    result = check_record(record, RFC8032_TEST1_PUBLIC)
    assert result.signed and result.signer_trusted
    assert result.record_sha256 == record["record_sha256"]


def test_sealing_is_deterministic(key):
    a = record_bytes(seal_record(_body(), key))
    b = record_bytes(seal_record(dict(reversed(list(_body().items()))), key))
    assert a == b
    # Only the volatile section may differ between runs; stable_view drops it.
    other = seal_record(_body(volatile={"timestamps": {"started": "2030-01-01T00:00:00Z"}}), key)
    assert stable_view(other) == stable_view(seal_record(_body(), key))
    assert other["record_sha256"] != seal_record(_body(), key)["record_sha256"]


def test_unsigned_records(key):
    record = seal_record(_body())
    assert record["signature"] is None
    result = check_record(record)
    assert not result.signed and any("UNSIGNED" in n for n in result.notes)
    with pytest.raises(VerificationError, match="^signature: .*unsigned"):
        check_record(record, RFC8032_TEST1_PUBLIC)
    with pytest.raises(VerificationError, match="^signature: "):
        check_record(record, require_signature=True)


def test_wrong_key_named(key):
    record = seal_record(_body(), key)
    other = signing.generate_keypair()
    with pytest.raises(VerificationError, match="^signature.public_key: signed by key"):
        check_record(record, other.public_key)
    check_record(record)  # integrity against the embedded key still holds
    assert not check_record(record).signer_trusted


@pytest.mark.parametrize(
    ("mutate", "field"),
    [
        (lambda r: r["estimate"].__setitem__("chsh", 2.5000000000000004), "record_sha256"),
        (lambda r: r.__setitem__("extra", 1), "record_sha256"),
        (lambda r: r["volatile"]["timings_s"].__setitem__("all", 0.6), "record_sha256"),
        (lambda r: r.__setitem__("record_sha256", "00" * 32), "record_sha256"),
        (lambda r: r.pop("record_sha256"), "record_sha256"),
        (lambda r: r.pop("signature"), "signature"),
        (lambda r: r.__setitem__("format", "dicert-record/5"), "format"),
        (lambda r: r.__setitem__("format", "something-else"), "format"),
        (lambda r: r.pop("format"), "format"),
        (lambda r: r["signature"].__setitem__("algorithm", "RSA"), "signature.algorithm"),
        (lambda r: r["signature"].__setitem__("key_fingerprint", "0" * 64),
         "signature.key_fingerprint"),
        (lambda r: r["signature"].__setitem__("value", "00" * 64), "signature.value"),
        (lambda r: r["signature"].__setitem__("value", "zz"), "signature.value"),
        (lambda r: r["signature"].__setitem__("public_key", "11" * 32), "signature.key_fingerprint"),
    ],
)
def test_check_names_first_disagreeing_field(key, mutate, field):
    record = seal_record(_body(), key)
    bad = copy.deepcopy(record)
    mutate(bad)
    with pytest.raises(VerificationError) as info:
        check_record(bad)
    assert info.value.field == field


def test_resealed_body_with_other_key_is_caught_only_with_trusted_key(key):
    # A forger can re-seal altered content with their own key: the embedded-key check passes,
    # the check against the operator's key fails (why signer_trusted exists).
    record = seal_record(_body(), key)
    body = record_body(record)
    body["estimate"]["chsh"] = 2.8
    forged = seal_record(body, signing.generate_keypair())
    check_record(forged)
    with pytest.raises(VerificationError, match="signature.public_key"):
        check_record(forged, RFC8032_TEST1_PUBLIC)


def test_forward_format_refused_with_upgrade_hint(key):
    # Reader policy: an unknown major version is refused with a message naming it.
    record = seal_record(_body(), key)
    body = record_body(record)
    body["format"] = "dicert-record/5"
    import hashlib as h

    record2 = {**body, "record_sha256": h.sha256(canonicalize(body)).hexdigest(),
               "signature": None}
    with pytest.raises(VerificationError, match="upgrade dicert"):
        check_record(record2)


def test_unknown_members_are_covered_by_the_seal(key):
    # Reader policy: members a reader does not know are ignored for meaning but sealed.
    record = seal_record(_body(future_member={"x": [1, 2]}), key)
    check_record(record, RFC8032_TEST1_PUBLIC)


def test_seal_refuses_bad_bodies(key):
    with pytest.raises(ParameterError, match="reserved"):
        seal_record(_body(record_sha256="x"), key)
    with pytest.raises(ParameterError, match="format"):
        seal_record(_body(format="dicert-record/9"), key)
    with pytest.raises(ParameterError, match=r"\$\.estimate\.chsh"):
        seal_record(_body(estimate={"chsh": float("nan")}), key)
    body = _body()
    del body["format"]
    assert seal_record(body)["format"] == RECORD_FORMAT


def test_file_round_trip_and_every_byte_tamper_detected(tmp_path, key):
    record = seal_record(_body(), key)
    path = write_record(tmp_path / "record.json", record)
    data = path.read_bytes()
    assert data == canonicalize(record) + b"\n"
    assert read_record(path) == record
    check_record(read_record(path), RFC8032_TEST1_PUBLIC)
    # Tamper with every byte position three ways (flip the low bit, flip the ASCII case bit,
    # overwrite with a space): every altered file must fail read_record or check_record.
    bad = tmp_path / "bad.json"
    positions = range(len(data))
    for pos in positions:
        for kind in ("x01", "x20", "space"):
            mutated = bytearray(data)
            if kind == "x01":
                mutated[pos] ^= 0x01
            elif kind == "x20":
                mutated[pos] ^= 0x20
            else:
                if mutated[pos] == 0x20:
                    continue
                mutated[pos] = 0x20
            bad.write_bytes(bytes(mutated))
            with pytest.raises(VerificationError):
                check_record(read_record(bad), RFC8032_TEST1_PUBLIC)
    # Truncation and appended bytes are caught too.
    for mutated in (data[:-2], data + b"\n", data + b" ", data[:-1]):
        bad.write_bytes(mutated)
        if mutated == data[:-1]:  # without the final LF: still the canonical form
            check_record(read_record(bad), RFC8032_TEST1_PUBLIC)
            continue
        with pytest.raises(VerificationError):
            check_record(read_record(bad), RFC8032_TEST1_PUBLIC)


def test_non_strict_reader_accepts_reformatted_files(tmp_path, key):
    import json

    record = seal_record(_body(), key)
    pretty = tmp_path / "pretty.json"
    pretty.write_text(json.dumps(record, indent=2, ensure_ascii=True))
    with pytest.raises(VerificationError, match="not in the canonical form"):
        read_record(pretty)
    check_record(read_record(pretty, strict=False), RFC8032_TEST1_PUBLIC)


def test_read_record_errors(tmp_path):
    p = tmp_path / "r.json"
    p.write_text("[1, 2]")
    with pytest.raises(VerificationError, match="one JSON object"):
        read_record(p)
    p.write_text('{"a": 1,')
    with pytest.raises(VerificationError, match=r"r\.json: line 1"):
        read_record(p)
    with pytest.raises(FileNotFoundError):
        read_record(tmp_path / "missing.json")
    with pytest.raises(ParameterError, match="directory"):
        read_record(tmp_path)


def test_write_record_refuses_inconsistent_records(tmp_path, key):
    record = seal_record(_body(), key)
    record["status"] = "aborted"
    with pytest.raises(ParameterError, match="re-seal"):
        write_record(tmp_path / "x.json", record)
    assert not Path(tmp_path / "x.json").exists()
    with pytest.raises(ParameterError, match="sealed record"):
        write_record(tmp_path / "x.json", _body())
