"""Tests of dicert.audit.chain: appending, and one test per kind of chain failure."""

from __future__ import annotations

import hashlib
import os

import pytest

from dicert.audit import signing
from dicert.audit.chain import (
    ChainVerificationError,
    append_to_chain,
    chain_head,
    inspect_chain,
    next_link,
    pulse_file_name,
    verify_chain,
)
from dicert.audit.record import read_record, record_bytes, record_digest, seal_record
from dicert.errors import ParameterError, VerificationError

# RFC 8032 section 7.1 TEST 1 secret key: a published fixed key keeps the chain reproducible.
SECRET = bytes.fromhex("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60")


@pytest.fixture(scope="module")
def key():
    return signing.private_key_from_bytes(SECRET)


@pytest.fixture(scope="module")
def public(key):
    return signing.public_key_bytes(key)


def _pulse_body(link, seed_label):
    # Invented beacon pulse bodies; seed digests are SHA-256 of a label (distinct per pulse).
    return {
        "format": "dicert-record/1",
        "status": "certified",
        "extractor": {
            "seed_sha256": hashlib.sha256(seed_label.encode()).hexdigest(),
            "seed_bits_used": 2047,
            "output_bits": 64,
        },
        **link,
    }


def _grow(chain, key, n, seeds=None):
    paths = []
    for i in range(n):
        label = seeds[i] if seeds else f"seed-{i}-{chain.name}"
        record = seal_record(_pulse_body(next_link(chain), label), key)
        paths.append(append_to_chain(chain, record))
    return paths


def _error_kinds(chain, public=None, strict=False):
    return [f.kind for f in inspect_chain(chain, public, strict=strict).errors]


def test_append_and_verify(tmp_path, key, public):
    chain = tmp_path / "beacon"
    assert chain_head(chain) is None
    assert next_link(chain) == {"pulse_index": 1, "previous_record_sha256": None}
    paths = _grow(chain, key, 4)
    assert [p.name for p in paths] == [pulse_file_name(i) for i in range(1, 5)]
    assert paths[0].name == "pulse-000001.json"
    records = [read_record(p) for p in paths]
    for prev, rec in zip(records, records[1:]):
        assert rec["previous_record_sha256"] == record_digest(prev)
    assert chain_head(chain) == (4, record_digest(records[-1]))
    report = verify_chain(chain, public, strict=True)
    assert report.ok and report.pulses == 4 and report.signed_pulses == 4
    assert report.signer_trusted and report.head_sha256 == record_digest(records[-1])
    assert report.findings == ()
    assert not list(chain.glob(".*"))  # no leftover temporary files


def test_append_refuses_overwrite_and_wrong_links(tmp_path, key):
    chain = tmp_path / "c"
    _grow(chain, key, 2)
    stale = seal_record(_pulse_body({"pulse_index": 2, "previous_record_sha256":
                                     read_record(chain / pulse_file_name(2))[
                                         "previous_record_sha256"]}, "x"), key)
    with pytest.raises(ParameterError, match="pulse_index: record is pulse 2"):
        append_to_chain(chain, stale)
    wrong_prev = seal_record(_pulse_body({"pulse_index": 3, "previous_record_sha256": "0" * 64},
                                         "y"), key)
    with pytest.raises(ParameterError, match="previous_record_sha256"):
        append_to_chain(chain, wrong_prev)
    # Simulate a racing writer that created pulse 3 first: no-clobber refuses.
    good = seal_record(_pulse_body(next_link(chain), "z"), key)
    (chain / pulse_file_name(3)).write_bytes(b"placeholder")
    before = (chain / pulse_file_name(3)).read_bytes()
    # chain_head now sees a damaged head and refuses as well.
    with pytest.raises(VerificationError):
        append_to_chain(chain, good)
    assert (chain / pulse_file_name(3)).read_bytes() == before
    os.unlink(chain / pulse_file_name(3))
    tampered = dict(good)
    tampered["status"] = "aborted"
    with pytest.raises(VerificationError, match="record_sha256"):
        append_to_chain(tmp_path / "other", tampered)


def test_append_is_no_clobber_under_a_race(tmp_path, key, monkeypatch):
    # Two writers computed the same next link; the second must not overwrite the first.
    chain = tmp_path / "c"
    _grow(chain, key, 2)
    link = next_link(chain)
    first = seal_record(_pulse_body(link, "first"), key)
    second = seal_record(_pulse_body(link, "second"), key)
    path = append_to_chain(chain, first)
    before = path.read_bytes()
    import dicert.audit.chain as chain_mod

    monkeypatch.setattr(chain_mod, "next_link", lambda _dir: link)
    with pytest.raises(ParameterError, match="already exists; refusing to overwrite"):
        append_to_chain(chain, second)
    assert path.read_bytes() == before
    assert not list(chain.glob(".*"))


def test_gap_detected(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 4)
    os.unlink(paths[1])
    report = inspect_chain(chain, public)
    gap = [f for f in report.errors if f.kind == "gap"]
    assert gap and gap[0].pulses == (2,) and "missing pulse(s) 2" in gap[0].message
    with pytest.raises(ChainVerificationError) as info:
        verify_chain(chain, public)
    assert info.value.report.errors


def test_reordering_detected(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 3)
    # Swap the files of pulses 2 and 3.
    a, b = paths[1].read_bytes(), paths[2].read_bytes()
    paths[1].write_bytes(b)
    paths[2].write_bytes(a)
    kinds = _error_kinds(chain, public)
    assert "index-mismatch" in kinds and "reorder" in kinds
    with pytest.raises(ChainVerificationError, match="pulse-000002.json:pulse_index"):
        verify_chain(chain, public)


def test_reorder_by_resealed_links(tmp_path, key, public):
    # Records re-sealed (with the operator's key) to link pulse 3 straight to pulse 1.
    chain = tmp_path / "c"
    paths = _grow(chain, key, 3)
    rec1 = read_record(paths[0])
    body = {k: v for k, v in read_record(paths[2]).items()
            if k not in ("record_sha256", "signature")}
    body["previous_record_sha256"] = record_digest(rec1)
    paths[2].write_bytes(record_bytes(seal_record(body, key)))
    kinds = _error_kinds(chain, public)
    assert "reorder" in kinds and "fork" in kinds  # pulses 2 and 3 now share a predecessor


def test_fork_same_index(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 2)
    # A second pulse 2 body (different content) stored under the name of pulse 3.
    body = {k: v for k, v in read_record(paths[1]).items()
            if k not in ("record_sha256", "signature")}
    body["status"] = "aborted"
    (chain / pulse_file_name(3)).write_bytes(record_bytes(seal_record(body, key)))
    report = inspect_chain(chain, public)
    forks = [f for f in report.errors if f.kind == "fork"]
    assert {f.field for f in forks} == {"pulse_index", "previous_record_sha256"}


def test_broken_link_and_first_link(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 3)
    body = {k: v for k, v in read_record(paths[1]).items()
            if k not in ("record_sha256", "signature")}
    body["previous_record_sha256"] = "ab" * 32
    paths[1].write_bytes(record_bytes(seal_record(body, key)))
    report = inspect_chain(chain, public)
    # Pulse 2 no longer links to pulse 1, and pulse 3 no longer links to the new pulse 2.
    assert [(f.kind, f.file) for f in report.errors] == [
        ("link", "pulse-000002.json"), ("link", "pulse-000003.json")]
    body1 = {k: v for k, v in read_record(paths[0]).items()
             if k not in ("record_sha256", "signature")}
    body1["previous_record_sha256"] = "cd" * 32
    paths[0].write_bytes(record_bytes(seal_record(body1, key)))
    assert ("link", "pulse-000001.json") in [(f.kind, f.file) for f in
                                             inspect_chain(chain, public).errors]


def test_tampered_pulse_and_wrong_key(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 3)
    data = bytearray(paths[1].read_bytes())
    data[data.index(b'"certified"') + 1] ^= 0x20  # "certified" -> "Certified"
    paths[1].write_bytes(bytes(data))
    with pytest.raises(ChainVerificationError, match="pulse-000002.json:record_sha256"):
        verify_chain(chain, public)
    other = signing.generate_keypair()
    kinds = _error_kinds(chain, other.public_key)
    # Pulse 2 fails its digest; pulses 1 and 3 verify but not under a trusted key.
    assert kinds.count("record") == 1 and kinds.count("untrusted-key") == 2


def test_seed_reuse_is_an_error(tmp_path, key, public):
    chain = tmp_path / "c"
    _grow(chain, key, 3, seeds=["s1", "s2", "s1"])
    report = inspect_chain(chain, public)
    reuse = [f for f in report.errors if f.kind == "seed-reuse"]
    assert reuse and reuse[0].pulses == (1, 3)
    with pytest.raises(ChainVerificationError, match="seed"):
        verify_chain(chain, public)


def test_unused_seed_is_not_reuse(tmp_path, key, public):
    # An aborted pulse that extracted nothing has not consumed its seed.
    chain = tmp_path / "c"
    record = seal_record({**_pulse_body(next_link(chain), "s"), "status": "aborted",
                          "extractor": {"seed_sha256": hashlib.sha256(b"s").hexdigest(),
                                        "seed_bits_used": 0, "output_bits": 0}}, key)
    append_to_chain(chain, record)
    append_to_chain(chain, seal_record(_pulse_body(next_link(chain), "s"), key))
    verify_chain(chain, public, strict=True)


def test_unsigned_and_key_change_are_errors(tmp_path, key):
    chain = tmp_path / "c"
    append_to_chain(chain, seal_record(_pulse_body(next_link(chain), "a"), key))
    append_to_chain(chain, seal_record(_pulse_body(next_link(chain), "b"),
                                       signing.generate_keypair()))
    append_to_chain(chain, seal_record(_pulse_body(next_link(chain), "c")))
    report = inspect_chain(chain)
    assert {f.kind for f in report.errors} == {"unsigned", "key-change"}
    assert report.result == "FAILED"
    with pytest.raises(ChainVerificationError):
        verify_chain(chain)


def test_unexpected_files_and_missing_dir(tmp_path, key, public):
    chain = tmp_path / "c"
    _grow(chain, key, 1)
    (chain / "notes.txt").write_text("hello")
    (chain / "pulse-2.json").write_text("{}")  # not zero-padded
    (chain / ".pulse-000002.json.abc.part").write_text("")
    report = inspect_chain(chain, public)
    kinds = report.errors
    assert [f.kind for f in kinds].count("unexpected-file") == 2
    # A temporary file of an interrupted append never blocks readers: it is reported, ignored.
    assert [f.kind for f in report.infos] == ["temporary-file"]
    with pytest.raises(VerificationError, match="unexpected entry|leftover"):
        chain_head(chain)
    with pytest.raises(ParameterError, match="does not exist"):
        verify_chain(tmp_path / "nope")


def test_unreadable_pulse(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 2)
    paths[0].write_bytes(b"{not json")
    report = inspect_chain(chain, public)
    assert [f.kind for f in report.errors] == ["unreadable"]


def _body_with(link, seed_label, log_label, protocol_label="p1", change=None):
    body = _pulse_body(link, seed_label)
    body["log"] = {"sha256": hashlib.sha256(log_label.encode()).hexdigest()}
    body["protocol"] = {"sha256": hashlib.sha256(protocol_label.encode()).hexdigest()}
    if change is not None:
        body["protocol_change"] = change
    return body


def test_log_reuse_is_an_error(tmp_path, key, public):
    chain = tmp_path / "c"
    for seed, log in (("s1", "L1"), ("s2", "L2"), ("s3", "L1")):
        append_to_chain(chain, seal_record(_body_with(next_link(chain), seed, log), key))
    reuse = [f for f in inspect_chain(chain, public).errors if f.kind == "log-reuse"]
    assert len(reuse) == 1 and reuse[0].pulses == (1, 3)


def test_protocol_change_declared_or_not(tmp_path, key, public):
    chain = tmp_path / "c"
    p1 = hashlib.sha256(b"p1").hexdigest()
    append_to_chain(chain, seal_record(_body_with(next_link(chain), "a", "A"), key))
    append_to_chain(chain, seal_record(_body_with(next_link(chain), "b", "B", "p2"), key))
    report = inspect_chain(chain, public)
    assert [(f.kind, f.file) for f in report.errors] == [("protocol-change", "pulse-000002.json")]
    # Declared (signed, naming the previous protocol's digest): allowed and shown.
    chain2 = tmp_path / "c2"
    append_to_chain(chain2, seal_record(_body_with(next_link(chain2), "a", "A"), key))
    change = {"previous_protocol_sha256": p1, "reason": "invented re-plan"}
    append_to_chain(chain2, seal_record(_body_with(next_link(chain2), "b", "B", "p2", change),
                                        key))
    report = verify_chain(chain2, public)
    assert [(f.kind, f.severity) for f in report.findings] == [("protocol-change", "info")]
    assert "invented re-plan" in report.findings[0].message
    # A declaration naming another predecessor, or on an unchanged protocol, fails.
    change_bad = {"previous_protocol_sha256": "0" * 64, "reason": "x"}
    append_to_chain(chain2, seal_record(_body_with(next_link(chain2), "c", "C", "p3",
                                                   change_bad), key))
    append_to_chain(chain2, seal_record(_body_with(next_link(chain2), "d", "D", "p3", {
        "previous_protocol_sha256": hashlib.sha256(b"p3").hexdigest(), "reason": "y"}), key))
    errs = [(f.kind, f.file) for f in inspect_chain(chain2, public).errors]
    assert errs == [("protocol-change", "pulse-000003.json"),
                    ("protocol-change", "pulse-000004.json")]


def test_published_head_detects_truncation_not_growth(tmp_path, key, public):
    chain = tmp_path / "c"
    paths = _grow(chain, key, 3)
    head2 = record_digest(read_record(paths[1]))
    report = verify_chain(chain, public, head=head2)  # the chain grew since: fine, shown
    assert report.head_pulse == 2 and [f.kind for f in report.infos] == ["head"]
    head3 = record_digest(read_record(paths[2]))
    os.unlink(paths[2])
    with pytest.raises(ChainVerificationError, match="truncated"):
        verify_chain(chain, public, head=head3)


def test_trusted_key_ranges_allow_rotation_only_where_listed(tmp_path, key, public):
    from dicert.audit.trust import TrustSet, TrustedKey

    other = signing.generate_keypair()
    chain = tmp_path / "c"
    for i, k in enumerate((key, key, other.private_key)):
        append_to_chain(chain, seal_record(_pulse_body(next_link(chain), f"s{i}"), k))
    fp_old = hashlib.sha256(public).hexdigest()
    fp_new = other.fingerprint

    def trust(last_old, first_new):
        return TrustSet(source="test", keys=(
            TrustedKey(fingerprint=fp_old, public_key_hex=public.hex(), label="old",
                       last_pulse=last_old),
            TrustedKey(fingerprint=fp_new, public_key_hex="", label="new",
                       first_pulse=first_new)))

    report = verify_chain(chain, trusted=trust(2, 3))
    assert report.result == "VERIFIED" and [f.kind for f in report.infos] == ["key-rotation"]
    kinds = [(f.kind, f.file) for f in inspect_chain(chain, trusted=trust(2, 4)).errors]
    assert kinds == [("key-change", "pulse-000003.json")]
    kinds = [(f.kind, f.file) for f in inspect_chain(chain, trusted=trust(1, 3)).errors]
    assert kinds == [("untrusted-key", "pulse-000002.json")]
    # Without trusted keys a change of key is a failure too.
    assert [f.kind for f in inspect_chain(chain).errors] == ["key-change"]
