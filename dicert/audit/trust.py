"""Trusted keys: which Ed25519 keys a verifier accepts as the operator's, and for which pulses.

A signature checked against the key embedded in a record proves only that the record was not
changed after someone sealed it; it says nothing about *who* sealed it. A record is
*authenticated* only when its signing key is one the verifier trusts: a public key given on
the command line (``--pubkey``), or a trusted-keys file (``--trusted-keys``).

Trusted-keys file (TOML, ``format = "dicert-trusted-keys/1"``)
--------------------------------------------------------------
::

    format = "dicert-trusted-keys/1"

    [[key]]
    label = "operator key 2026"            # optional, shown in reports
    public_key = "<64 hex digits>"          # raw Ed25519 public key, or instead:
    # public_key_file = "operator.key.pub"  # PEM or hex file, relative to this file
    first_pulse = 1                         # optional, inclusive
    last_pulse = 500                        # optional, inclusive
    not_before = 2026-01-01T00:00:00Z       # optional TOML date-time with offset
    not_after = 2026-12-31T23:59:59Z        # optional

A key with no range is valid for every record. Pulse ranges apply to chain records (their
``pulse_index``); a record outside any chain matches only keys without a pulse range. Time
ranges compare with the record's ``volatile.timestamps.finished``, a time the signer states
itself: pulse ranges are the stronger rule for key rotation in a chain (an old key cannot
sign a pulse after its ``last_pulse``).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from dicert.errors import ParameterError, VerificationError

#: Format string of trusted-keys files.
TRUSTED_KEYS_FORMAT = "dicert-trusted-keys/1"
_MAX_FILE_BYTES = 1 << 20
_HEX64 = re.compile(r"[0-9a-fA-F]{64}")
_KEY_FIELDS = {"label", "public_key", "public_key_file", "first_pulse", "last_pulse",
               "not_before", "not_after"}

__all__ = ["TRUSTED_KEYS_FORMAT", "TrustSet", "TrustedKey", "load_trusted_keys", "trust_from"]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TrustedKey:
    """One trusted Ed25519 public key and the records it may sign."""

    fingerprint: str
    public_key_hex: str
    label: str
    first_pulse: int | None = None
    last_pulse: int | None = None
    not_before: str | None = None  # ISO 8601, UTC
    not_after: str | None = None

    @property
    def has_range(self) -> bool:
        return any(v is not None for v in (self.first_pulse, self.last_pulse, self.not_before,
                                            self.not_after))

    def refusal(self, pulse_index: Any, when: Any) -> str | None:
        """None if this key may sign a record with this pulse index and time, else why not."""
        if self.first_pulse is not None or self.last_pulse is not None:
            if not isinstance(pulse_index, int) or isinstance(pulse_index, bool):
                return f"key '{self.label}' is trusted only for chain pulses"
            if self.first_pulse is not None and pulse_index < self.first_pulse:
                return f"key '{self.label}' is trusted from pulse {self.first_pulse}"
            if self.last_pulse is not None and pulse_index > self.last_pulse:
                return f"key '{self.label}' is trusted up to pulse {self.last_pulse}"
        if self.not_before is not None or self.not_after is not None:
            t = _parse_time(when)
            if t is None:
                return f"key '{self.label}' has a validity period but the record states no time"
            if self.not_before is not None and t < _parse_time(self.not_before):
                return f"key '{self.label}' is trusted from {self.not_before}"
            if self.not_after is not None and t > _parse_time(self.not_after):
                return f"key '{self.label}' is trusted until {self.not_after}"
        return None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TrustSet:
    """The keys a verifier trusts (from ``--pubkey`` or a trusted-keys file)."""

    keys: tuple[TrustedKey, ...]
    source: str

    def authorise(self, fingerprint: str | None, pulse_index: Any = None,
                  when: Any = None) -> TrustedKey:
        """The trusted key that covers a signature, or raise VerificationError saying why not."""
        if fingerprint is None:
            raise VerificationError("the record is unsigned", "signature")
        why: list[str] = []
        for k in self.keys:
            if k.fingerprint == fingerprint:
                reason = k.refusal(pulse_index, when)
                if reason is None:
                    return k
                why.append(reason)
        where = f" for pulse {pulse_index}" if isinstance(pulse_index, int) else ""
        if why:
            raise VerificationError(f"signed by key {fingerprint}, not trusted{where}: "
                                    + "; ".join(why), "signature.public_key")
        raise VerificationError(f"signed by key {fingerprint}, which is not among the "
                                f"trusted keys ({self.source})", "signature.public_key")


def _parse_time(value: Any) -> _dt.datetime | None:
    if isinstance(value, _dt.datetime):
        t = value
    elif isinstance(value, str):
        try:
            t = _dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
        except ValueError:
            return None
    else:
        return None
    if t.tzinfo is None:
        return None
    return t.astimezone(_dt.UTC)


def record_time(record: Mapping[str, Any]) -> str | None:
    """The time a record states for itself (``volatile.timestamps.finished``), if any."""
    vol = record.get("volatile")
    ts = vol.get("timestamps") if isinstance(vol, Mapping) else None
    t = ts.get("finished") if isinstance(ts, Mapping) else None
    return t if isinstance(t, str) else None


def _key_from_public(key: Any, label: str) -> TrustedKey:
    from dicert.audit.signing import public_key_bytes

    raw = public_key_bytes(key)
    return TrustedKey(fingerprint=hashlib.sha256(raw).hexdigest(), public_key_hex=raw.hex(),
                      label=label)


def trust_from(public_key: Any = None, trusted_keys: Any = None) -> TrustSet | None:
    """A TrustSet from ``--pubkey`` (key object, raw key or path) and/or a trusted-keys file.

    Returns None when neither is given (nothing is trusted: integrity only).
    """
    keys: list[TrustedKey] = []
    sources: list[str] = []
    if trusted_keys is not None:
        if isinstance(trusted_keys, TrustSet):
            keys.extend(trusted_keys.keys)
            sources.append(trusted_keys.source)
        else:
            ts = load_trusted_keys(trusted_keys)
            keys.extend(ts.keys)
            sources.append(ts.source)
    if public_key is not None:
        if isinstance(public_key, (str, os.PathLike)) and not (
                isinstance(public_key, str) and _HEX64.fullmatch(public_key)):
            from dicert.audit.signing import load_public_key

            public_key = load_public_key(public_key)
        keys.append(_key_from_public(public_key, "the given public key"))
        sources.append("--pubkey")
    if not keys:
        return None
    return TrustSet(keys=tuple(keys), source=" and ".join(sources))


def _opt_int(v: Any, where: str) -> int | None:
    if v is None:
        return None
    if not isinstance(v, int) or isinstance(v, bool) or v < 1:
        raise ParameterError(f"{where}: expected a pulse index (integer >= 1), got {v!r}")
    return v


def _opt_time(v: Any, where: str) -> str | None:
    if v is None:
        return None
    if not isinstance(v, _dt.datetime) or v.tzinfo is None:
        raise ParameterError(f"{where}: expected a TOML date-time with a UTC offset "
                             f"(e.g. 2026-01-01T00:00:00Z), got {v!r}")
    return v.astimezone(_dt.UTC).isoformat().replace("+00:00", "Z")


def load_trusted_keys(path: str | os.PathLike[str]) -> TrustSet:
    """Read a trusted-keys file; problems are one-line ParameterErrors naming file and key."""
    import tomllib

    from dicert._io import read_user_file

    p = Path(path)
    data = read_user_file(p, "trusted-keys file", ParameterError)
    if len(data) > _MAX_FILE_BYTES:
        raise ParameterError(f"{p}: too large for a trusted-keys file ({len(data)} bytes)")
    try:
        doc = tomllib.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise ParameterError(f"{p}: not a valid TOML trusted-keys file ({exc})") from None
    if doc.get("format") != TRUSTED_KEYS_FORMAT:
        raise ParameterError(f"{p}: format: expected {TRUSTED_KEYS_FORMAT!r}, got "
                             f"{doc.get('format')!r}")
    extra = set(doc) - {"format", "key"}
    if extra:
        raise ParameterError(f"{p}: {sorted(extra)[0]}: unknown key (expected format, [[key]])")
    entries = doc.get("key")
    if not isinstance(entries, list) or not entries:
        raise ParameterError(f"{p}: key: expected at least one [[key]] table")
    keys: list[TrustedKey] = []
    for i, e in enumerate(entries, start=1):
        where = f"{p}: key[{i}]"
        if not isinstance(e, dict):
            raise ParameterError(f"{where}: expected a table")
        unknown = set(e) - _KEY_FIELDS
        if unknown:
            raise ParameterError(f"{where}.{sorted(unknown)[0]}: unknown key")
        if ("public_key" in e) == ("public_key_file" in e):
            raise ParameterError(f"{where}: give exactly one of public_key, public_key_file")
        try:
            if "public_key" in e:
                from dicert.audit.signing import public_key_from_bytes

                hx = e["public_key"]
                if not isinstance(hx, str) or len(hx) != 64:
                    raise ParameterError("expected 64 hex digits")
                key = public_key_from_bytes(bytes.fromhex(hx))
            else:
                from dicert.audit.signing import load_public_key

                f = e["public_key_file"]
                if not isinstance(f, str):
                    raise ParameterError("expected a file name")
                key = load_public_key(p.parent / f)
        except (ParameterError, ValueError) as exc:
            field = "public_key" if "public_key" in e else "public_key_file"
            raise ParameterError(f"{where}.{field}: {exc}") from None
        label = e.get("label", f"key[{i}]")
        if not isinstance(label, str):
            raise ParameterError(f"{where}.label: expected a string")
        base = _key_from_public(key, label)
        tk = dataclasses.replace(
            base,
            first_pulse=_opt_int(e.get("first_pulse"), f"{where}.first_pulse"),
            last_pulse=_opt_int(e.get("last_pulse"), f"{where}.last_pulse"),
            not_before=_opt_time(e.get("not_before"), f"{where}.not_before"),
            not_after=_opt_time(e.get("not_after"), f"{where}.not_after"))
        if (tk.first_pulse is not None and tk.last_pulse is not None
                and tk.first_pulse > tk.last_pulse):
            raise ParameterError(f"{where}.last_pulse: before first_pulse")
        keys.append(tk)
    return TrustSet(keys=tuple(keys), source=str(p))
