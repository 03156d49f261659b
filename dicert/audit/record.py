"""Sealed audit records: an RFC 8785 body, its SHA-256 digest and an Ed25519 signature.

Layout (format ``dicert-record/4``; ``/1``, ``/2`` and ``/3`` records are still read)
-----------------------------------------------------------------------------------
A record is one JSON object. Two members are reserved for the seal; every other member is the
*body*:

* ``record_sha256``: hex SHA-256 of the canonical body, i.e. of
  ``canonicalize({all members except record_sha256 and signature})`` (RFC 8785);
* ``signature``: ``null`` for an unsigned record, or an object
  ``{"algorithm": "Ed25519", "public_key": <64 hex, raw key>, "key_fingerprint": <hex SHA-256 of
  the raw key>, "value": <128 hex>}`` where ``value`` signs the same canonical body bytes.

The body must carry ``"format": "dicert-record/4"`` (or ``/1``, ``/2``, ``/3`` for records
written before; ``/3`` renamed members to one name per quantity, ``/4`` gave
``estimate.chsh_estimate`` its glossary meaning (the weighted estimate), and
:mod:`dicert.stages.record_compat` maps older names for every reader). Chains add ``pulse_index`` and
``previous_record_sha256`` to the body (see :mod:`dicert.audit.chain`); a volatile section
(``volatile``: timestamps, timings) is part of the body and so is sealed too, but it is the only
part allowed to differ between two runs on the same inputs (:func:`stable_view`).

File form
---------
:func:`write_record` writes the canonical bytes of the whole record followed by one LF. The
strict reader (the default) accepts exactly that, with or without the final LF, so a change to
any byte of the file is detected even where it would not change the parsed JSON.

Reader policy (keeps old records readable)
------------------------------------------
* ``format`` is ``"dicert-record/<major>"``. A reader accepts every major it lists in
  :data:`SUPPORTED_FORMATS` and refuses any other with an error telling the user to upgrade.
* Within a major version, writers only *add* members; they never remove one or change its
  meaning, unit or type. Any such change takes a new major. Readers therefore ignore members
  they do not know -- but the digest and signature always cover every member, known or not.
* Seal rules (reserved names, digest, signature encoding) are fixed for all majors; a later
  format keeps them so that any release can at least check integrity.

References
----------
.. [1] A. Rundgren, B. Jordan, S. Erdtman, "JSON Canonicalization Scheme (JCS)", RFC 8785, 2020.
.. [2] S. Josefsson, I. Liusvaara, "Edwards-Curve Digital Signature Algorithm (EdDSA)",
   RFC 8032, 2017.
.. [3] NIST FIPS 180-4, Secure Hash Standard, 2015 (SHA-256).
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from dicert._io import atomic_write_bytes
from dicert.audit.canonical import canonicalize, parse_json
from dicert.errors import DicertError, ParameterError, VerificationError

__all__ = [
    "DIGEST_FIELD",
    "RECORD_FORMAT",
    "SIGNATURE_FIELD",
    "SUPPORTED_FORMATS",
    "VOLATILE_FIELD",
    "RecordCheck",
    "check_record",
    "read_record",
    "record_body",
    "record_bytes",
    "record_digest",
    "seal_record",
    "stable_view",
    "write_record",
]

#: Format written by this version.
RECORD_FORMAT = "dicert-record/4"
#: Formats this version reads. /2 added the ``design`` section (conformance checks), per-file
#: digests in ``log.files``, the ``inputs`` section and ``output_screens``; /3 renamed members
#: (one name per quantity); /4 names the weighted CHSH estimate ``estimate.chsh_estimate`` and
#: the ratio estimate ``estimate.chsh_ratio_estimate`` (/3 wrote ``chsh_estimate`` for the ratio
#: estimate and ``chsh_martingale`` for the weighted one).
SUPPORTED_FORMATS = ("dicert-record/1", "dicert-record/2", "dicert-record/3", "dicert-record/4")
#: Reserved member holding the body digest.
DIGEST_FIELD = "record_sha256"
#: Reserved member holding the signature block (or null).
SIGNATURE_FIELD = "signature"
#: Body member holding everything allowed to differ between runs (timestamps, timings).
VOLATILE_FIELD = "volatile"

_SEAL_FIELDS = (DIGEST_FIELD, SIGNATURE_FIELD)
_FORMAT_RE = re.compile(r"dicert-record/([1-9][0-9]*)")
_HEX = re.compile(r"[0-9a-f]*")
_MAX_RECORD_BYTES = 64 << 20


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class RecordCheck:
    """What :func:`check_record` established about a record.

    Attributes
    ----------
    format : str
        The record's format version.
    record_sha256 : str
        The verified digest of the canonical body (hex).
    signed : bool
        Whether the record carries a signature (which then verified).
    key_fingerprint : str or None
        Fingerprint of the signing key, if signed.
    signer_trusted : bool
        True only when the signature verified under a public key supplied by the caller; a
        signature checked only against the key embedded in the record proves integrity, not
        who signed.
    notes : tuple of str
        Plain-language statements of what was and was not checked.
    """

    format: str
    record_sha256: str
    signed: bool
    key_fingerprint: str | None
    signer_trusted: bool
    notes: tuple[str, ...]


def _shown(value: Any) -> str:
    """A stored digest for a message: in full when it is hex of digest length (never cut),
    else its repr, shortened only when it is not a digest at all."""
    text = str(value)
    if re.fullmatch(r"[0-9a-f]{64}", text):
        return text
    r = repr(value)
    return r if len(r) <= 80 else r[:77] + "..."


def record_body(record: Mapping[str, Any]) -> dict[str, Any]:
    """The body of a record: every member except ``record_sha256`` and ``signature``."""
    if not isinstance(record, Mapping):
        raise VerificationError("a record is a JSON object", "record")
    return {k: v for k, v in record.items() if k not in _SEAL_FIELDS}


def _body_bytes(record: Mapping[str, Any]) -> bytes:
    try:
        return canonicalize(record_body(record))
    except ParameterError as exc:
        raise VerificationError(f"body has no canonical form ({exc})", "record") from None


def record_digest(record: Mapping[str, Any]) -> str:
    """Hex SHA-256 of the canonical body, recomputed (the stored value is not trusted).

    This is the value a chain's next record puts in ``previous_record_sha256``.
    """
    return hashlib.sha256(_body_bytes(record)).hexdigest()


def record_bytes(record: Mapping[str, Any]) -> bytes:
    """The file form of a record: its canonical bytes followed by one LF."""
    return canonicalize(record) + b"\n"


def seal_record(body: Mapping[str, Any], private_key: Any = None) -> dict[str, Any]:
    """Add the digest and (optionally) an Ed25519 signature to a record body.

    Parameters
    ----------
    body : mapping
        The record body, JSON values only. ``format`` defaults to :data:`RECORD_FORMAT` and
        must equal it if given; ``record_sha256`` and ``signature`` are reserved.
    private_key : Ed25519 private key or KeyPair, optional
        Signs the canonical body bytes. Without it the record is sealed unsigned
        (``"signature": null``); its digest then guards against accidents, not forgery.

    Returns
    -------
    dict
        A new record: the body exactly as it reads back from its canonical form (tuples become
        lists, member order sorted), plus ``record_sha256`` and ``signature``.

    Raises
    ------
    ParameterError
        If the body has reserved members, a wrong ``format``, or a value without a canonical
        JSON form (the message names its path).
    """
    if not isinstance(body, Mapping):
        raise ParameterError("a record body is a mapping of JSON values")
    for name in _SEAL_FIELDS:
        if name in body:
            raise ParameterError(f"record body: '{name}' is reserved for the seal")
    fmt = body.get("format", RECORD_FORMAT)
    if fmt not in SUPPORTED_FORMATS:
        raise ParameterError(f"record body: format must be one of {SUPPORTED_FORMATS!r}, "
                             f"got {fmt!r}")
    canonical = canonicalize({**body, "format": fmt})
    record: dict[str, Any] = parse_json(canonical)
    record[DIGEST_FIELD] = hashlib.sha256(canonical).hexdigest()
    if private_key is None:
        record[SIGNATURE_FIELD] = None
    else:
        from dicert.audit import signing

        value = signing.sign(private_key, canonical)
        raw = signing.public_key_bytes(
            private_key.public_key if isinstance(private_key, signing.KeyPair) else private_key
        )
        record[SIGNATURE_FIELD] = {
            "algorithm": signing.ALGORITHM,
            "public_key": raw.hex(),
            "key_fingerprint": hashlib.sha256(raw).hexdigest(),
            "value": value.hex(),
        }
    return record


def _check_format(record: Mapping[str, Any]) -> str:
    fmt = record.get("format")
    if fmt is None:
        raise VerificationError("missing; not a dicert audit record", "format")
    if not isinstance(fmt, str) or not _FORMAT_RE.fullmatch(fmt):
        raise VerificationError(f"{fmt!r} is not a dicert record format", "format")
    if fmt not in SUPPORTED_FORMATS:
        raise VerificationError(
            f"record format {fmt!r} is newer than this dicert reads "
            f"({', '.join(SUPPORTED_FORMATS)}); upgrade dicert to check it",
            "format",
        )
    return fmt


def _hex_field(block: Mapping[str, Any], name: str, length: int) -> str:
    value = block.get(name)
    if not isinstance(value, str) or len(value) != length or not _HEX.fullmatch(value):
        raise VerificationError(
            f"expected {length} lower-case hex digits", f"{SIGNATURE_FIELD}.{name}"
        )
    return value


# long: its numpydoc docstring is about 25 lines; the body is one fixed sequence of checks
# that raises on the first disagreement, in the order the docstring lists them
def check_record(
    record: Mapping[str, Any], public_key: Any = None, *, require_signature: bool = False
) -> RecordCheck:
    """Check a record's format, digest and signature; raise on the first disagreement.

    Parameters
    ----------
    record : mapping
        A sealed record (e.g. from :func:`read_record`).
    public_key : Ed25519 public key, raw bytes or hex, optional
        The key the record must be signed with. When given, an unsigned record or one signed by
        another key fails. When omitted, a signature is checked against the key embedded in the
        record (integrity only) and an unsigned record passes with a note saying so.
    require_signature : bool
        Fail on unsigned records even without ``public_key``.

    Returns
    -------
    RecordCheck

    Raises
    ------
    VerificationError
        ``field`` names the first field that disagrees: ``format``, ``record_sha256``,
        ``signature``, ``signature.algorithm``, ``signature.public_key``,
        ``signature.key_fingerprint`` or ``signature.value``.
    """
    if not isinstance(record, Mapping):
        raise VerificationError("a record is a JSON object", "record")
    fmt = _check_format(record)
    body = _body_bytes(record)
    digest = hashlib.sha256(body).hexdigest()
    stored = record.get(DIGEST_FIELD)
    if stored is None:
        raise VerificationError("missing; the record is not sealed", DIGEST_FIELD)
    if stored != digest:
        raise VerificationError(
            f"stored {_shown(stored)} but the body hashes to {digest}; "
            "the record was altered after sealing",
            DIGEST_FIELD,
        )
    if SIGNATURE_FIELD not in record:
        raise VerificationError("missing (an unsigned record has \"signature\": null)",
                                SIGNATURE_FIELD)
    block = record[SIGNATURE_FIELD]
    notes = [f"format {fmt}", "record_sha256 matches the canonical body (RFC 8785, SHA-256)"]
    if block is None:
        if public_key is not None:
            raise VerificationError("the record is unsigned but a public key was given",
                                    SIGNATURE_FIELD)
        if require_signature:
            raise VerificationError("the record is unsigned", SIGNATURE_FIELD)
        notes.append("record is UNSIGNED: the digest detects accidental change, not forgery")
        return RecordCheck(format=fmt, record_sha256=digest, signed=False,
                           key_fingerprint=None, signer_trusted=False, notes=tuple(notes))
    if not isinstance(block, Mapping):
        raise VerificationError("expected an object or null", SIGNATURE_FIELD)
    from dicert.audit import signing

    if block.get("algorithm") != signing.ALGORITHM:
        raise VerificationError(f"unsupported algorithm {block.get('algorithm')!r} "
                                f"(expected {signing.ALGORITHM!r})", "signature.algorithm")
    raw_hex = _hex_field(block, "public_key", 64)
    raw = bytes.fromhex(raw_hex)
    if block.get("key_fingerprint") != hashlib.sha256(raw).hexdigest():
        raise VerificationError("does not match signature.public_key", "signature.key_fingerprint")
    value = bytes.fromhex(_hex_field(block, "value", 128))
    trusted = False
    if public_key is not None:
        expected = signing.public_key_bytes(public_key)
        if expected != raw:
            raise VerificationError(
                f"signed by key {hashlib.sha256(raw).hexdigest()}, expected key "
                f"{hashlib.sha256(expected).hexdigest()}",
                "signature.public_key",
            )
        trusted = True
    try:
        embedded = signing.public_key_from_bytes(raw)
    except ParameterError as exc:
        raise VerificationError(str(exc), "signature.public_key") from None
    try:
        signing.verify_signature(embedded, body, value)
    except VerificationError:
        raise VerificationError("Ed25519 signature over the canonical body does not verify",
                                "signature.value") from None
    fp = hashlib.sha256(raw).hexdigest()
    if trusted:
        notes.append(f"Ed25519 signature verifies under the given key {fp}")
    else:
        notes.append(f"Ed25519 signature verifies under the key embedded in the record ({fp}); "
                     "give the signer's public key to check who signed")
    return RecordCheck(format=fmt, record_sha256=digest, signed=True, key_fingerprint=fp,
                       signer_trusted=trusted, notes=tuple(notes))


def stable_view(record: Mapping[str, Any]) -> dict[str, Any]:
    """The body without the ``volatile`` section: equal for two runs on the same inputs."""
    return {k: v for k, v in record_body(record).items() if k != VOLATILE_FIELD}


def write_record(path: str | os.PathLike[str], record: Mapping[str, Any]) -> Path:
    """Write a sealed record atomically in its file form (canonical bytes + LF).

    The record's digest is re-checked first, so an inconsistent record is never written.
    Signatures are not re-verified here (the sealer just made them).
    """
    if not isinstance(record, Mapping) or DIGEST_FIELD not in record:
        raise ParameterError("write_record takes a sealed record (see seal_record)")
    if record[DIGEST_FIELD] != record_digest(record):
        raise ParameterError("record_sha256 does not match the body; re-seal the record")
    target = Path(path)
    atomic_write_bytes(target, record_bytes(record))
    return target


def read_record(path: str | os.PathLike[str], *, strict: bool = True) -> dict[str, Any]:
    """Read a record file.

    Parameters
    ----------
    path : path-like
        The record file.
    strict : bool
        Require the file form written by :func:`write_record`: the canonical bytes of the
        record, optionally followed by one LF. With ``strict=False`` any strict I-JSON text is
        accepted (e.g. a pretty-printed copy); the digest and signature still decide.

    Returns
    -------
    dict
        The parsed record (not yet checked: call :func:`check_record`).

    Raises
    ------
    VerificationError
        If the file is not a JSON object, is malformed, or (strict) is not in canonical form;
        the message names the file and the offset.
    """
    p = Path(path)
    if p.is_dir():
        raise ParameterError(f"{p}: is a directory, not a record file")
    size = p.stat().st_size  # FileNotFoundError is mapped to a one-line error by the CLI
    if size > _MAX_RECORD_BYTES:
        raise VerificationError(f"{p}: {size} bytes is too large for a record file", "record")
    data = p.read_bytes()
    try:
        record = parse_json(data, source=str(p))
    except VerificationError as exc:
        raise VerificationError(str(exc), "record") from None
    if not isinstance(record, dict):
        raise VerificationError(f"{p}: a record file holds one JSON object", "record")
    if strict:
        try:
            canonical = canonicalize(record)
        except DicertError as exc:
            raise VerificationError(f"{p}: {exc}", "record") from None
        if data not in (canonical, canonical + b"\n"):
            at = next(
                (i for i, (u, v) in enumerate(zip(data, canonical, strict=False)) if u != v),
                min(len(data), len(canonical)),
            )
            raise VerificationError(
                f"{p}: byte {at}: file is not in the canonical form it was written in "
                "(altered, or reformatted: read with strict=False to check the content only)",
                "record",
            )
    return record
