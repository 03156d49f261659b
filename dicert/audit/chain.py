"""Beacon chains: a directory of sealed records, each carrying the digest of the one before.

Layout
------
A chain is a directory holding only ``pulse-NNNNNN.json`` files (index zero-padded to at least
six digits, e.g. ``pulse-000001.json``, ``pulse-1000000.json``), each a sealed record
(:mod:`dicert.audit.record`) whose body carries

* ``pulse_index``: the integer in the file name, starting at 1 and increasing by one;
* ``previous_record_sha256``: ``null`` for pulse 1, otherwise the ``record_sha256`` of the
  previous pulse (:func:`dicert.audit.record.record_digest`).

Appending never overwrites: a pulse file is created with a no-clobber hard link of a fully
written temporary file. :func:`verify_chain` checks every record (digest, signature, optionally
against the operator's public key) and the structure: links, gaps, reordering, forks, and reuse
of an extractor seed (``extractor.seed_sha256``) across pulses, which is flagged -- a warning by
default, an error with ``strict=True``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import re
import tempfile
from collections import defaultdict
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from dicert.audit.record import check_record, read_record, record_bytes, record_digest
from dicert.errors import ParameterError, VerificationError

__all__ = [
    "FIRST_PULSE_INDEX",
    "ChainFinding",
    "ChainReport",
    "ChainVerificationError",
    "append_to_chain",
    "chain_head",
    "inspect_chain",
    "next_link",
    "pulse_file_name",
    "verify_chain",
]

#: Index of the first pulse of every chain.
FIRST_PULSE_INDEX = 1

_PULSE_RE = re.compile(r"pulse-([0-9]{6,})\.json")
_HEX64 = re.compile(r"[0-9a-f]{64}")


def pulse_file_name(index: int) -> str:
    """File name of pulse ``index`` (``pulse-000001.json``)."""
    return f"pulse-{index:06d}.json"


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChainFinding:
    """One problem found in a chain.

    ``kind`` is one of: ``unexpected-file``, ``unreadable``, ``record`` (digest/signature/format),
    ``index-mismatch``, ``gap``, ``fork``, ``link``, ``reorder``, ``seed-reuse``, ``key-change``,
    ``unsigned``. ``severity`` is ``error`` or ``warning``.
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
        Signatures were checked against a public key the caller supplied.
    strict : bool
        Whether warnings count as errors.
    findings : tuple of ChainFinding
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

    @property
    def errors(self) -> tuple[ChainFinding, ...]:
        return tuple(f for f in self.findings if f.severity == "error")

    @property
    def warnings(self) -> tuple[ChainFinding, ...]:
        return tuple(f for f in self.findings if f.severity == "warning")

    @property
    def ok(self) -> bool:
        return not self.errors


class ChainVerificationError(VerificationError):
    """A chain failed verification; ``report`` holds every finding."""

    def __init__(self, message: str, field: str | None, report: ChainReport) -> None:
        self.report = report
        super().__init__(message, field)


def _scan_dir(chain_dir: Path) -> tuple[list[tuple[int, Path]], list[Path]]:
    pulses: list[tuple[int, Path]] = []
    unexpected: list[Path] = []
    for entry in sorted(os.scandir(chain_dir), key=lambda e: e.name):
        m = _PULSE_RE.fullmatch(entry.name)
        if m and entry.is_file() and entry.name == pulse_file_name(int(m.group(1))):
            pulses.append((int(m.group(1)), Path(entry.path)))
        else:
            unexpected.append(Path(entry.path))
    pulses.sort()
    return pulses, unexpected


def _require_dir(chain_dir: str | os.PathLike[str]) -> Path:
    p = Path(chain_dir)
    if not p.exists():
        raise ParameterError(f"{p}: chain directory does not exist")
    if not p.is_dir():
        raise ParameterError(f"{p}: not a directory")
    return p


def _unexpected_message(path: Path) -> str:
    if path.name.startswith(".") and path.name.endswith(".part"):
        return (f"{path.name}: leftover temporary file of an interrupted write; "
                "check no append is running, then delete it")
    return f"{path.name}: unexpected entry in a chain directory (only pulse-NNNNNN.json belong)"


def chain_head(chain_dir: str | os.PathLike[str]) -> tuple[int, str] | None:
    """Index and digest of the last pulse, or None for a missing or empty chain directory.

    The head record is read strictly and its digest and signature are checked.

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
    pulses, unexpected = _scan_dir(p)
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
    :func:`next_link` when building the body.

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
    directory.mkdir(parents=True, exist_ok=True)
    target = directory / pulse_file_name(index)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=directory)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(record_bytes(record))
            fh.flush()
            os.fsync(fh.fileno())
        try:
            os.link(tmp, target)  # atomic and no-clobber
        except FileExistsError:
            raise ParameterError(f"{target}: already exists; refusing to overwrite") from None
    finally:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
    return target


def _plain(exc: VerificationError) -> str:
    text = str(exc)
    prefix = f"{exc.field}: " if exc.field else ""
    return text[len(prefix):] if prefix and text.startswith(prefix) else text


def _seed_used(extractor: Mapping[str, Any]) -> bool:
    for name in ("seed_bits_used", "output_bits"):
        value = extractor.get(name)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return value > 0
    return True


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


def inspect_chain(
    chain_dir: str | os.PathLike[str], public_key: Any = None, *, strict: bool = False
) -> ChainReport:
    """Check a chain and return every finding without raising on them (see verify_chain)."""
    directory = _require_dir(chain_dir)
    pulses, unexpected = _scan_dir(directory)
    findings: list[ChainFinding] = []
    soft = "error" if strict else "warning"

    def add(kind: str, severity: str, file: str | None, field: str | None, message: str,
            idx: tuple[int, ...] = ()) -> None:
        findings.append(ChainFinding(kind=kind, severity=severity, file=file, field=field,
                                     message=message, pulses=idx))

    for path in unexpected:
        add("unexpected-file", "error", path.name, None, _unexpected_message(path))

    good: dict[str, tuple[int, dict[str, Any], str]] = {}  # file name -> (index, record, digest)
    fingerprints: list[str] = []
    signed = 0
    for index, path in pulses:
        try:
            record = read_record(path)
        except VerificationError as exc:
            add("unreadable", "error", path.name, exc.field, _plain(exc), (index,))
            continue
        try:
            result = check_record(record, public_key)
        except VerificationError as exc:
            add("record", "error", path.name, exc.field, _plain(exc), (index,))
            continue
        if result.signed:
            signed += 1
            if result.key_fingerprint not in fingerprints:
                fingerprints.append(result.key_fingerprint)
        elif public_key is None:
            add("unsigned", soft, path.name, "signature", "pulse record is unsigned", (index,))
        body_index = record.get("pulse_index")
        if body_index != index or type(body_index) is not int:
            add("index-mismatch", "error", path.name, "pulse_index",
                f"body says pulse_index {body_index!r} but the file name says {index} "
                "(files renamed or reordered)", (index,))
        prev = record.get("previous_record_sha256")
        if prev is not None and not (isinstance(prev, str) and _HEX64.fullmatch(prev)):
            add("link", "error", path.name, "previous_record_sha256",
                "expected null or 64 lower-case hex digits", (index,))
            continue
        good[path.name] = (index, record, result.record_sha256)

    # Forks: two pulses with the same index in their bodies, or the same predecessor.
    by_body_index: dict[Any, list[str]] = defaultdict(list)
    by_prev: dict[str, list[str]] = defaultdict(list)
    for name, (_, record, _) in good.items():
        by_body_index[record.get("pulse_index")].append(name)
        if record.get("previous_record_sha256") is not None:
            by_prev[record["previous_record_sha256"]].append(name)
    for claimed, names in by_body_index.items():
        if len(names) > 1:
            add("fork", "error", names[1], "pulse_index",
                f"{', '.join(names)} all claim pulse_index {claimed!r}",
                tuple(good[n][0] for n in names))
    for prev, names in by_prev.items():
        if len(names) > 1:
            add("fork", "error", names[1], "previous_record_sha256",
                f"{', '.join(names)} all claim the same predecessor {prev[:16]}...",
                tuple(good[n][0] for n in names))

    # Links, in file-index order.
    digest_to_index = {digest: index for index, _, digest in good.values()}
    index_to_digest = {index: digest for index, _, digest in good.values()}
    for name, (index, record, _) in sorted(good.items(), key=lambda kv: kv[1][0]):
        prev = record.get("previous_record_sha256")
        if index == FIRST_PULSE_INDEX:
            if prev is not None:
                add("link", "error", name, "previous_record_sha256",
                    "the first pulse must have previous_record_sha256 null", (index,))
            continue
        if prev is None:
            add("link", "error", name, "previous_record_sha256",
                f"null, but pulse {index} must link to pulse {index - 1}", (index,))
        elif prev in digest_to_index and digest_to_index[prev] != index - 1:
            add("reorder", "error", name, "previous_record_sha256",
                f"links to pulse {digest_to_index[prev]}, expected pulse {index - 1}", (index,))
        elif index - 1 in index_to_digest and index_to_digest[index - 1] != prev:
            add("link", "error", name, "previous_record_sha256",
                f"does not match the digest of pulse {index - 1} "
                f"({index_to_digest[index - 1][:16]}...)", (index,))

    # Gaps in the file indices.
    present = [i for i, _ in pulses]
    if present:
        wanted = set(range(FIRST_PULSE_INDEX, present[-1] + 1))
        missing = sorted(wanted.difference(present))
        if missing:
            add("gap", "error", None, "pulse_index", f"missing pulse(s) {_ranges(missing)}",
                tuple(missing))

    # Extractor seed reuse across pulses.
    by_seed: dict[str, list[str]] = defaultdict(list)
    for name, (_, record, _) in sorted(good.items(), key=lambda kv: kv[1][0]):
        extractor = record.get("extractor")
        if isinstance(extractor, Mapping):
            seed = extractor.get("seed_sha256")
            if isinstance(seed, str) and _seed_used(extractor):
                by_seed[seed].append(name)
    for seed, names in by_seed.items():
        if len(names) > 1:
            add("seed-reuse", soft, names[1], "extractor.seed_sha256",
                f"the same extractor seed ({seed[:16]}...) was used by {', '.join(names)}; "
                "use a fresh seed for every pulse", tuple(good[n][0] for n in names))

    if public_key is None and len(fingerprints) > 1:
        add("key-change", soft, None, "signature.key_fingerprint",
            f"pulses are signed by {len(fingerprints)} different keys; "
            "give the operator's public key to check who signed", ())

    head = None
    if good:
        top = max(good.values(), key=lambda v: v[0])
        head = top[2]
    order = {name: i for i, (_, path) in enumerate(pulses) for name in [path.name]}
    findings.sort(key=lambda f: (f.severity != "error", order.get(f.file or "", -1)))
    return ChainReport(
        chain_dir=str(directory),
        pulses=len(pulses),
        first_index=present[0] if present else None,
        last_index=present[-1] if present else None,
        head_sha256=head,
        signed_pulses=signed,
        key_fingerprints=tuple(fingerprints),
        signer_trusted=public_key is not None,
        strict=strict,
        findings=tuple(findings),
    )


def verify_chain(
    chain_dir: str | os.PathLike[str], public_key: Any = None, *, strict: bool = False
) -> ChainReport:
    """Verify a beacon chain; raise on the first error, return the report otherwise.

    Parameters
    ----------
    chain_dir : path-like
        The chain directory.
    public_key : Ed25519 public key, raw bytes or hex, optional
        The operator's key: every pulse must be signed with it. Without it, signatures are
        checked against each record's embedded key, unsigned pulses and key changes are
        flagged.
    strict : bool
        Treat warnings (seed reuse, unsigned pulses, key changes) as errors.

    Returns
    -------
    ChainReport
        With any warnings in ``findings``.

    Raises
    ------
    ChainVerificationError
        A :class:`~dicert.errors.VerificationError` whose ``field`` names the first pulse file
        and field that disagree; ``report`` carries every finding.
    ParameterError
        If ``chain_dir`` is missing or not a directory.
    """
    report = inspect_chain(chain_dir, public_key, strict=strict)
    errors = report.errors
    if errors:
        first = errors[0]
        more = f" (and {len(errors) - 1} more problem(s))" if len(errors) > 1 else ""
        where = ":".join(x for x in (first.file, first.field) if x) or "chain"
        raise ChainVerificationError(f"{first.kind}: {first.message}{more}", where, report)
    return report
