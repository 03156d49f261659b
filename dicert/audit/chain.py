"""Beacon chains: a directory of sealed records, each carrying the digest of the one before.

Layout
------
A chain is a directory holding ``pulse-NNNNNN.json`` files (index zero-padded to at least
six digits, e.g. ``pulse-000001.json``, ``pulse-1000000.json``), each a sealed record
(:mod:`dicert.audit.record`) whose body carries

* ``pulse_index``: the integer in the file name, starting at 1 and increasing by one;
* ``previous_record_sha256``: ``null`` for pulse 1, otherwise the ``record_sha256`` of the
  previous pulse (:func:`dicert.audit.record.record_digest`);
* optionally ``protocol_change``: ``{"previous_protocol_sha256", "reason"}``, the signed
  declaration of a deliberate protocol change at this pulse (``certify --protocol-change``).

Besides pulses a chain folder may hold ``.lock`` (the appenders' lock file),
``.commit.json`` (the journal of a commit in progress) and ``.*.part`` temporary files of an
interrupted append; readers ignore these (the next ``certify --chain`` removes stale ones).

Appending never overwrites: a pulse file is created with a no-clobber hard link of a fully
written temporary file (mode 0644). :func:`verify_chain` reads the pulses one at a time in
index order (linear time, keeping a few digests per pulse) and checks every record (digest,
signature, and with trusted keys that each pulse is signed by a key trusted for its index) and
the structure: links, gaps, reordering, forks, reuse of an extractor seed or of a log across
pulses, key changes not allowed by the trusted keys, protocol changes without a signed
declaration, and (given a published head digest) truncation of the newest pulses. All of
these are errors.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import re
import secrets
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from dicert.audit.record import check_record, read_record, record_bytes, record_digest
from dicert.errors import ParameterError, VerificationError

__all__ = [
    "FIRST_PULSE_INDEX",
    "ChainFinding",
    "ChainReport",
    "ChainState",
    "ChainVerificationError",
    "append_to_chain",
    "chain_head",
    "chain_state",
    "inspect_chain",
    "next_link",
    "pulse_file_name",
    "verify_chain",
]

#: Index of the first pulse of every chain.
FIRST_PULSE_INDEX = 1

_PULSE_RE = re.compile(r"pulse-([0-9]{6,})\.json")
_HEX64 = re.compile(r"[0-9a-f]{64}")
#: Hidden entries of a chain folder that belong to the appenders (ignored by readers).
_HOUSEKEEPING = (".lock", ".commit.json")


def pulse_file_name(index: int) -> str:
    """File name of pulse ``index`` (``pulse-000001.json``)."""
    return f"pulse-{index:06d}.json"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChainFinding:
    """One finding about a chain.

    ``kind`` is one of: ``unexpected-file``, ``unreadable``, ``record`` (digest/signature/format),
    ``untrusted-key``, ``unsigned``, ``key-change``, ``index-mismatch``, ``gap``, ``fork``,
    ``link``, ``reorder``, ``seed-reuse``, ``log-reuse``, ``protocol-change``, ``truncated``,
    ``consistency`` (a record's numbers), and the informational ``temporary-file``,
    ``key-rotation``, ``protocol-change`` (declared), ``head``. ``severity`` is ``error`` or
    ``info``.
    """

    kind: str
    severity: str
    file: str | None
    field: str | None
    message: str
    pulses: tuple[int, ...] = ()


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChainReport:
    """Result of checking a chain directory.

    Attributes
    ----------
    chain_dir : str
    pulses : int
        Number of pulse files.
    first_index, last_index : int or None
        Lowest and highest pulse index present.
    head_sha256 : str or None
        Digest of the highest-index pulse that checked out.
    signed_pulses : int
        Pulses carrying a verified signature.
    key_fingerprints : tuple of str
        Distinct signing keys seen.
    signer_trusted : bool
        Signatures were checked against keys the caller trusts.
    strict : bool
        Kept for compatibility: every problem is an error.
    findings : tuple of ChainFinding
    authenticated : bool
        Trusted keys were given, every pulse is signed by a key trusted for it, no errors.
    head_given : str or None
        The published head digest the caller gave (``--head``).
    head_pulse : int or None
        The pulse whose digest equals ``head_given``.
    result : str
        ``VERIFIED`` (authenticated, no errors), ``INTEGRITY-ONLY`` (no errors, no trusted
        key or unsigned pulses), or ``FAILED``.
    """

    chain_dir: str
    pulses: int
    first_index: int | None
    last_index: int | None
    head_sha256: str | None
    signed_pulses: int
    key_fingerprints: tuple[str, ...]
    signer_trusted: bool
    strict: bool
    findings: tuple[ChainFinding, ...]
    authenticated: bool = False
    head_given: str | None = None
    head_pulse: int | None = None
    result: str = "FAILED"

    @property
    def errors(self) -> tuple[ChainFinding, ...]:
        return tuple(f for f in self.findings if f.severity == "error")

    @property
    def warnings(self) -> tuple[ChainFinding, ...]:
        return tuple(f for f in self.findings if f.severity == "warning")

    @property
    def infos(self) -> tuple[ChainFinding, ...]:
        return tuple(f for f in self.findings if f.severity == "info")

    @property
    def ok(self) -> bool:
        return not self.errors


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChainState:
    """What an appender needs from a verified chain: its head and the digests already used."""

    head_index: int | None
    head_sha256: str | None
    protocol_sha256: str | None
    seeds_used: Mapping[str, int]  # seed digest -> first pulse that names it (used or not)
    logs_used: Mapping[str, int]  # log digest -> pulse it fed
    report: ChainReport

    def next_link(self) -> dict[str, Any]:
        if self.head_index is None:
            return {"pulse_index": FIRST_PULSE_INDEX, "previous_record_sha256": None}
        return {"pulse_index": self.head_index + 1, "previous_record_sha256": self.head_sha256}


class ChainVerificationError(VerificationError):
    """A chain failed verification; ``report`` holds every finding."""

    def __init__(self, message: str, field: str | None, report: ChainReport) -> None:
        self.report = report
        super().__init__(message, field)


def _scan_dir(chain_dir: Path) -> tuple[list[tuple[int, Path]], list[Path], list[Path]]:
    """(pulses in index order, unexpected entries, temporary files)."""
    pulses: list[tuple[int, Path]] = []
    unexpected: list[Path] = []
    temporary: list[Path] = []
    for entry in sorted(os.scandir(chain_dir), key=lambda e: e.name):
        m = _PULSE_RE.fullmatch(entry.name)
        if m and entry.is_file() and entry.name == pulse_file_name(int(m.group(1))):
            pulses.append((int(m.group(1)), Path(entry.path)))
        elif entry.name in _HOUSEKEEPING and entry.is_file():
            continue
        elif entry.name.startswith(".") and entry.name.endswith(".part"):
            temporary.append(Path(entry.path))
        else:
            unexpected.append(Path(entry.path))
    pulses.sort()
    return pulses, unexpected, temporary


def _require_dir(chain_dir: str | os.PathLike[str]) -> Path:
    p = Path(chain_dir)
    if not p.exists():
        raise ParameterError(f"{p}: chain directory does not exist")
    if not p.is_dir():
        raise ParameterError(f"{p}: not a directory")
    return p


def _unexpected_message(path: Path) -> str:
    return f"{path.name}: unexpected entry in a chain directory (only pulse-NNNNNN.json belong)"


def chain_head(chain_dir: str | os.PathLike[str]) -> tuple[int, str] | None:
    """Index and digest of the last pulse, or None for a missing or empty chain directory.

    The head record is read strictly and its digest and signature are checked (against its
    embedded key: use :func:`chain_state` to check the whole chain against trusted keys).

    Raises
    ------
    VerificationError
        If the directory holds unexpected files, or the head record is damaged or its
        ``pulse_index`` disagrees with its file name.
    """
    p = Path(chain_dir)
    if not p.exists():
        return None
    p = _require_dir(p)
    pulses, unexpected, _tmp = _scan_dir(p)
    if unexpected:
        raise VerificationError(_unexpected_message(unexpected[0]), "chain")
    if not pulses:
        return None
    index, path = pulses[-1]
    record = read_record(path)
    try:
        check_record(record)
    except VerificationError as exc:
        raise VerificationError(str(exc), f"{path.name}") from None
    if record.get("pulse_index") != index:
        raise VerificationError(
            f"body says pulse_index {record.get('pulse_index')!r}, file name says {index}",
            f"{path.name}:pulse_index",
        )
    return index, record_digest(record)


def next_link(chain_dir: str | os.PathLike[str]) -> dict[str, Any]:
    """The ``pulse_index`` and ``previous_record_sha256`` a new record body needs."""
    head = chain_head(chain_dir)
    if head is None:
        return {"pulse_index": FIRST_PULSE_INDEX, "previous_record_sha256": None}
    return {"pulse_index": head[0] + 1, "previous_record_sha256": head[1]}


def append_to_chain(chain_dir: str | os.PathLike[str], record: Mapping[str, Any]) -> Path:
    """Append a sealed record to a chain directory (created if missing); never overwrites.

    The record must be the next pulse: ``pulse_index`` one past the head (1 for a new chain)
    and ``previous_record_sha256`` equal to the head's digest (null for a new chain) -- use
    :func:`next_link` when building the body. The pulse file gets mode 0644. Callers that
    check the chain first (``certify --chain``) hold the chain's lock across check and append.

    Returns
    -------
    Path
        The new pulse file.

    Raises
    ------
    ParameterError
        If the record does not continue the chain, or the pulse file already exists.
    VerificationError
        If the record is not validly sealed or the chain head is damaged.
    """
    from dicert._outputs import PUBLIC_DIR_MODE, fault_point, fsync_dir, write_public_file

    check_record(record)
    directory = Path(chain_dir)
    if directory.exists() and not directory.is_dir():
        raise ParameterError(f"{directory}: not a directory")
    expected = next_link(directory)
    index = record.get("pulse_index")
    if type(index) is not int or index < FIRST_PULSE_INDEX:
        raise ParameterError(f"pulse_index: expected an integer >= {FIRST_PULSE_INDEX}, "
                             f"got {index!r}")
    if index != expected["pulse_index"]:
        raise ParameterError(
            f"pulse_index: record is pulse {index} but {directory} expects pulse "
            f"{expected['pulse_index']} next; build the body with next_link()"
        )
    if record.get("previous_record_sha256") != expected["previous_record_sha256"]:
        raise ParameterError(
            f"previous_record_sha256: does not match the head of {directory} "
            f"({expected['previous_record_sha256']}); build the body with next_link()"
        )
    if not directory.is_dir():
        directory.mkdir(parents=True, exist_ok=True)
        os.chmod(directory, PUBLIC_DIR_MODE)
    target = directory / pulse_file_name(index)
    tmp = directory / f".{target.name}.{secrets.token_hex(6)}.part"
    try:
        write_public_file(tmp, record_bytes(record))
        fault_point("during-chain-append")
        try:
            os.link(tmp, target)  # atomic and no-clobber
        except FileExistsError:
            raise ParameterError(f"{target}: already exists; refusing to overwrite") from None
        fsync_dir(directory)
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
    return target


def _plain(exc: VerificationError) -> str:
    text = str(exc)
    prefix = f"{exc.field}: " if exc.field else ""
    return text[len(prefix):] if prefix and text.startswith(prefix) else text


def _seed_used(extractor: Mapping[str, Any]) -> bool:
    for name in ("seed_bits", "seed_bits_used", "output_bits"):  # /3 name, then /1-/2
        value = extractor.get(name)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return value > 0
    return True


def used_seed(record: Mapping[str, Any]) -> str | None:
    """The extractor-seed digest a record consumed (None if it extracted nothing)."""
    extractor = record.get("extractor")
    if isinstance(extractor, Mapping):
        seed = extractor.get("seed_sha256")
        if isinstance(seed, str) and _seed_used(extractor):
            return seed
    return None


def log_digest(record: Mapping[str, Any]) -> str | None:
    log = record.get("log")
    d = log.get("sha256") if isinstance(log, Mapping) else None
    return d if isinstance(d, str) else None


def protocol_digest(record: Mapping[str, Any]) -> str | None:
    proto = record.get("protocol")
    d = proto.get("sha256") if isinstance(proto, Mapping) else None
    return d if isinstance(d, str) else None


def protocol_change_of(record: Mapping[str, Any]) -> dict | None:
    """The declared protocol change of a record, or None; malformed -> VerificationError."""
    pc = record.get("protocol_change")
    if pc is None:
        return None
    if not (isinstance(pc, Mapping) and set(pc) == {"previous_protocol_sha256", "reason"}
            and isinstance(pc["previous_protocol_sha256"], str)
            and _HEX64.fullmatch(pc["previous_protocol_sha256"])
            and isinstance(pc["reason"], str) and pc["reason"].strip()):
        raise VerificationError("expected {previous_protocol_sha256: 64 hex, reason: text}",
                                "protocol_change")
    return dict(pc)


def _ranges(indices: list[int]) -> str:
    parts: list[str] = []
    start = prev = indices[0]
    for i in indices[1:] + [None]:  # type: ignore[list-item]
        if i is not None and i == prev + 1:
            prev = i
            continue
        parts.append(str(start) if start == prev else f"{start}-{prev}")
        if i is not None:
            start = prev = i
    return ", ".join(parts)


def _trust_of(public_key: Any, trusted: Any) -> Any:
    from dicert.audit.trust import trust_from

    return trust_from(public_key, trusted)


OnRecord = Callable[[str, int, Mapping[str, Any]], None]


class _Walk:
    """The running state of one pass over a chain (internal to :func:`_walk`): what has been
    seen so far (digests, claimed indices, seeds, logs, keys, protocol) and the findings."""

    def __init__(self, trust: Any) -> None:
        self.trust = trust
        self.findings: list[ChainFinding] = []
        self.digest_at: dict[str, int] = {}  # digest -> file index
        self.body_index_at: dict[Any, str] = {}  # claimed pulse_index -> file name
        self.prev_claimed: dict[str, str] = {}  # previous digest -> file name
        self.seeds: dict[str, int] = {}
        self.seeds_named: dict[str, int] = {}  # every seed digest, used or not (appenders refuse any)
        self.logs: dict[str, int] = {}
        self.fingerprints: list[str] = []
        self.unsigned: list[tuple[int, str]] = []
        self.signed = 0
        self.prev_fp: str | None = None
        self.proto_sha: str | None = None

    def add(self, kind: str, severity: str, file: str | None, field: str | None, message: str,
            idx: tuple[int, ...] = ()) -> None:
        self.findings.append(ChainFinding(kind=kind, severity=severity, file=file, field=field,
                                          message=message, pulses=idx))

    def signer(self, record: Mapping[str, Any], result: Any, name: str, index: int) -> None:
        """Who signed it."""
        from dicert.audit.trust import record_time

        add, trust, prev_fp = self.add, self.trust, self.prev_fp
        if result.signed:
            self.signed += 1
            fp = result.key_fingerprint
            if fp not in self.fingerprints:
                self.fingerprints.append(fp)
            if trust is not None:
                try:
                    tk = trust.authorise(fp, record.get("pulse_index"), record_time(record))
                except VerificationError as exc:
                    kind = "key-change" if prev_fp is not None and prev_fp != fp else \
                        "untrusted-key"
                    add(kind, "error", name, exc.field, _plain(exc), (index,))
                else:
                    if prev_fp is not None and prev_fp != fp:
                        add("key-rotation", "info", name, "signature.key_fingerprint",
                            f"signing key changes to '{tk.label}' ({fp}), allowed by "
                            "the trusted keys", (index,))
            elif prev_fp is not None and prev_fp != fp:
                add("key-change", "error", name, "signature.key_fingerprint",
                    f"signed by key {fp}, the previous pulse by {prev_fp}; "
                    "give a trusted-keys file that allows the rotation", (index,))
            self.prev_fp = fp
        else:
            self.unsigned.append((index, name))
            if trust is not None:
                add("unsigned", "error", name, "signature", "pulse record is unsigned",
                    (index,))

    def structure(self, record: Mapping[str, Any], name: str, index: int,
                  this_prev_digest: str | None) -> None:
        """The pulse's claimed index and its link to the previous pulse."""
        add, body_index_at, prev_claimed, digest_at = \
            self.add, self.body_index_at, self.prev_claimed, self.digest_at
        body_index = record.get("pulse_index")
        if body_index != index or type(body_index) is not int:
            add("index-mismatch", "error", name, "pulse_index",
                f"body says pulse_index {body_index!r} but the file name says {index} "
                "(files renamed or reordered)", (index,))
        if body_index in body_index_at:
            add("fork", "error", name, "pulse_index",
                f"{body_index_at[body_index]}, {name} all claim pulse_index {body_index!r}",
                (index,))
        else:
            body_index_at[body_index] = name
        prev = record.get("previous_record_sha256")
        if prev is not None and not (isinstance(prev, str) and _HEX64.fullmatch(prev)):
            add("link", "error", name, "previous_record_sha256",
                "expected null or 64 lower-case hex digits", (index,))
        elif index == FIRST_PULSE_INDEX:
            if prev is not None:
                add("link", "error", name, "previous_record_sha256",
                    "the first pulse must have previous_record_sha256 null", (index,))
        elif prev is None:
            add("link", "error", name, "previous_record_sha256",
                f"null, but pulse {index} must link to pulse {index - 1}", (index,))
        else:
            if prev in prev_claimed:
                add("fork", "error", name, "previous_record_sha256",
                    f"{prev_claimed[prev]}, {name} all claim the same predecessor "
                    f"{prev}", (index,))
            else:
                prev_claimed[prev] = name
            if prev in digest_at and digest_at[prev] != index - 1:
                add("reorder", "error", name, "previous_record_sha256",
                    f"links to pulse {digest_at[prev]}, expected pulse {index - 1}", (index,))
            elif this_prev_digest is not None and this_prev_digest != prev:
                add("link", "error", name, "previous_record_sha256",
                    f"does not match the digest of pulse {index - 1} "
                    f"({this_prev_digest})", (index,))

    def reuse(self, record: Mapping[str, Any], name: str, index: int) -> None:
        """Reuse of inputs: the extractor seed and the log."""
        add, seeds, logs = self.add, self.seeds, self.logs
        ext = record.get("extractor")
        named = ext.get("seed_sha256") if isinstance(ext, Mapping) else None
        if isinstance(named, str):
            self.seeds_named.setdefault(named, index)
        seed = used_seed(record)
        if seed is not None:
            if seed in seeds:
                add("seed-reuse", "error", name, "extractor.seed_sha256",
                    f"the same extractor seed ({seed}) was used by pulses "
                    f"{seeds[seed]} and {index}; use a fresh seed for every pulse",
                    (seeds[seed], index))
            else:
                seeds[seed] = index
        log = log_digest(record)
        if log is not None:
            if log in logs:
                add("log-reuse", "error", name, "log.sha256",
                    f"the same log ({log}) feeds pulses {logs[log]} and {index}; "
                    "every pulse needs fresh trials", (logs[log], index))
            else:
                logs[log] = index

    def protocol(self, record: Mapping[str, Any], name: str, index: int) -> None:
        """Protocol continuity: a change needs a signed declaration."""
        add, proto_sha = self.add, self.proto_sha
        psha = protocol_digest(record)
        try:
            change = protocol_change_of(record)
        except VerificationError as exc:
            add("protocol-change", "error", name, exc.field, _plain(exc), (index,))
            change = None
        if psha is not None:
            if proto_sha is not None and psha != proto_sha:
                if change is not None and change["previous_protocol_sha256"] == proto_sha:
                    add("protocol-change", "info", name, "protocol_change",
                        f"declared protocol change {proto_sha} -> {psha}: "
                        f"{change['reason']}", (index,))
                else:
                    add("protocol-change", "error", name, "protocol.sha256",
                        f"the protocol changes ({proto_sha} -> {psha}) without "
                        "a signed declaration (certify --protocol-change)", (index,))
            elif change is not None:
                add("protocol-change", "error", name, "protocol_change",
                    "declares a protocol change but the protocol "
                    + ("is the same" if proto_sha is not None else "has no predecessor"),
                    (index,))
            self.proto_sha = psha


def _walk(chain_dir: str | os.PathLike[str], public_key: Any = None, *, trusted: Any = None,
          head: str | None = None, on_record: OnRecord | None = None,
          strict: bool = False) -> tuple[ChainReport, ChainState]:
    """One pass over the pulses in index order; keeps only a few digests per pulse."""
    directory = _require_dir(chain_dir)
    trust = _trust_of(public_key, trusted)
    pulses, unexpected, temporary = _scan_dir(directory)
    w = _Walk(trust)
    add = w.add

    for path in unexpected:
        add("unexpected-file", "error", path.name, None, _unexpected_message(path))
    for path in temporary:
        add("temporary-file", "info", path.name, None,
            f"{path.name}: temporary file of an interrupted write, ignored (the next "
            "certify --chain removes it)")

    prev_index: int | None = None
    prev_digest: str | None = None  # digest of the pulse with file index prev_index
    head_index = head_digest = None
    head_pulse = None
    expected_next = FIRST_PULSE_INDEX

    for index, path in pulses:
        name = path.name
        if index > expected_next:
            missing = list(range(expected_next, index))
            add("gap", "error", None, "pulse_index", f"missing pulse(s) {_ranges(missing)}",
                tuple(missing))
        expected_next = index + 1
        follows = prev_index == index - 1
        this_prev_digest, prev_index = (prev_digest if follows else None), index
        prev_digest = None
        try:
            record = read_record(path)
        except VerificationError as exc:
            add("unreadable", "error", name, exc.field, _plain(exc), (index,))
            continue
        try:
            result = check_record(record)
        except VerificationError as exc:
            add("record", "error", name, exc.field, _plain(exc), (index,))
            continue
        digest = result.record_sha256
        prev_digest = digest
        if head is not None and digest == head:
            head_pulse = index
        w.signer(record, result, name, index)
        w.structure(record, name, index, this_prev_digest)
        w.digest_at[digest] = index
        w.reuse(record, name, index)
        w.protocol(record, name, index)
        if on_record is not None:
            try:
                on_record(name, index, record)
            except VerificationError as exc:
                add("consistency", "error", name, exc.field, _plain(exc), (index,))
        head_index, head_digest = index, digest

    return _walk_result(w, directory, pulses, head, head_pulse, head_index, head_digest, strict)


def _walk_result(w: _Walk, directory: Path, pulses: list, head: str | None,
                 head_pulse: int | None, head_index: int | None, head_digest: str | None,
                 strict: bool) -> tuple[ChainReport, ChainState]:
    """The last findings of a pass (unsigned among signed, the published head) and its report."""
    add, findings, trust, unsigned = w.add, w.findings, w.trust, w.unsigned
    if trust is None and unsigned and w.signed:
        for index, name in unsigned:
            add("unsigned", "error", name, "signature",
                "pulse record is unsigned while other pulses are signed", (index,))
    if head is not None:
        top = pulses[-1][0] if pulses else None
        if head_pulse is None:
            add("truncated", "error", None, "head",
                f"the published head {head} is not a pulse of this chain (newest "
                "pulses removed, or another chain)", ())
        elif head_pulse != top:
            add("head", "info", None, "head",
                f"the published head is pulse {head_pulse}; the chain has grown to pulse "
                f"{top} since", (head_pulse,))
    present = [i for i, _ in pulses]
    order = {path.name: i for i, (_, path) in enumerate(pulses)}
    findings.sort(key=lambda f: (f.severity != "error", order.get(f.file or "", -1)))
    errors = any(f.severity == "error" for f in findings)
    authenticated = (trust is not None and not errors and not unsigned)
    result = "FAILED" if errors else ("VERIFIED" if authenticated else "INTEGRITY-ONLY")
    report = ChainReport(
        chain_dir=str(directory),
        pulses=len(pulses),
        first_index=present[0] if present else None,
        last_index=present[-1] if present else None,
        head_sha256=head_digest,
        signed_pulses=w.signed,
        key_fingerprints=tuple(w.fingerprints),
        signer_trusted=trust is not None,
        strict=strict,
        findings=tuple(findings),
        authenticated=authenticated,
        head_given=head,
        head_pulse=head_pulse,
        result=result,
    )
    state = ChainState(head_index=head_index, head_sha256=head_digest,
                       protocol_sha256=w.proto_sha, seeds_used=w.seeds_named,
                       logs_used=w.logs, report=report)
    return report, state


def inspect_chain(
    chain_dir: str | os.PathLike[str], public_key: Any = None, *, strict: bool = False,
    trusted: Any = None, head: str | None = None, on_record: OnRecord | None = None,
) -> ChainReport:
    """Check a chain and return every finding without raising on them (see verify_chain)."""
    return _walk(chain_dir, public_key, trusted=trusted, head=head, on_record=on_record,
                 strict=strict)[0]


def _raise_first(report: ChainReport) -> None:
    errors = report.errors
    if errors:
        first = errors[0]
        more = f" (and {len(errors) - 1} more problem(s))" if len(errors) > 1 else ""
        where = ":".join(x for x in (first.file, first.field) if x) or "chain"
        raise ChainVerificationError(f"{first.kind}: {first.message}{more}", where, report)


def verify_chain(
    chain_dir: str | os.PathLike[str], public_key: Any = None, *, strict: bool = False,
    trusted: Any = None, head: str | None = None, on_record: OnRecord | None = None,
) -> ChainReport:
    """Verify a beacon chain; raise on the first error, return the report otherwise.

    Parameters
    ----------
    chain_dir : path-like
        The chain directory.
    public_key : Ed25519 public key, raw bytes, hex or path, optional
        The operator's key: every pulse must be signed with it.
    trusted : TrustSet or path, optional
        A trusted-keys file (:mod:`dicert.audit.trust`): every pulse must be signed by a key
        trusted for its pulse index (key rotation).
    head : str, optional
        A published head digest: a chain that does not contain it was truncated or replaced.
    on_record : callable(name, index, record), optional
        Extra per-record check; a VerificationError it raises becomes a ``consistency`` error.
    strict : bool
        Kept for compatibility (every problem is an error).

    Returns
    -------
    ChainReport
        ``result`` is ``VERIFIED`` with trusted keys, else ``INTEGRITY-ONLY``.

    Raises
    ------
    ChainVerificationError
        A :class:`~dicert.errors.VerificationError` whose ``field`` names the first pulse file
        and field that disagree; ``report`` carries every finding.
    ParameterError
        If ``chain_dir`` is missing or not a directory.
    """
    report = inspect_chain(chain_dir, public_key, strict=strict, trusted=trusted, head=head,
                           on_record=on_record)
    _raise_first(report)
    return report


def chain_state(chain_dir: str | os.PathLike[str], trusted: Any) -> ChainState:
    """Verify a chain an operator is about to extend and return its head and used digests.

    Every pulse must be signed by a key in ``trusted`` (a TrustSet) valid for it; any
    finding that :func:`verify_chain` reports as an error raises. A missing or empty folder
    is an empty chain.
    """
    p = Path(chain_dir)
    if not p.exists():
        empty = ChainReport(chain_dir=str(p), pulses=0, first_index=None, last_index=None,
                            head_sha256=None, signed_pulses=0, key_fingerprints=(),
                            signer_trusted=True, strict=True, findings=(),
                            authenticated=True, result="VERIFIED")
        return ChainState(head_index=None, head_sha256=None, protocol_sha256=None,
                          seeds_used={}, logs_used={}, report=empty)
    report, state = _walk(p, trusted=trusted, strict=True)
    _raise_first(report)
    return state
