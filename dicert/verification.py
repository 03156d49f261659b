"""Independent re-checking of audit records, and of beacon chains.

:func:`verify` checks, in order:

1. the record's format, digest and Ed25519 signature (:func:`dicert.audit.record.check_record`);
   the record is *authenticated* only when it is signed by a key the caller trusts
   (``public_key``, or ``trusted_keys``: a trusted-keys file, :mod:`dicert.audit.trust`); a
   record signed by another key fails; without a trusted key, or for an unsigned record, the
   result is ``INTEGRITY-ONLY`` (exit code 4 in the CLI), never ``VERIFIED``;
2. internal consistency: the protocol content matches its SHA-256 and re-validates; the counts
   table is well formed and sums to the trial count; every derived number (estimate, finite-size
   bound, accept/abort, eps terms, output length, seed bits used, raw-bit count) is recomputed
   from the recorded counts and protocol and compared;
3. with ``log``: the log is read again and its digest, size, counts and harvested raw bits are
   compared; with ``seed``: its digest, and (with the log too) the extraction is re-run and the
   output digest compared; the bits file (``bits``, or by default the file the record names
   in ``bits_file``, next to the record) has its length and digest compared.

The result word is ``VERIFIED`` (authenticated, and log, seed and bits all checked),
``VERIFIED-PARTIAL`` (authenticated, something not checked: listed in ``not_checked``) or
``INTEGRITY-ONLY`` (not authenticated). With ``strict`` anything not established raises.

The first disagreement raises :class:`~dicert.errors.VerificationError` naming the field
(dotted path into the record, e.g. ``entropy.finite_size.certified_min_entropy_bits``). A failure can
therefore never be ignored by forgetting to look at a return value.
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import stat
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from dicert import __version__
from dicert._display import displayed
from dicert.errors import VerificationError
from dicert.stages.rederive import (  # noqa: F401 (also the old import path)
    LEGACY_LACKS,
    _ABS_TOL,
    _ENDINGS,
    _ExtractionStandIn,
    _REL_TOL,
    _SCOPE_KEYS,
    _SEAL_KEYS,
    _V2_MEMBERS,
    _body_of,
    _compare,
    _concatenated_digest,
    _finite_from_record,
    _first_difference,
    _get,
    _int_table,
    _legacy_design_note,
    _load_public_key,
    _protocol_of,
    _recorded_block_series,
    _recorded_counts,
    _require,
    _scan_from_record,
    _scope_of,
    _short,
    authenticate,
    check_signature,
    expected_body,
)

if TYPE_CHECKING:
    from dicert.protocol import Protocol

#: Exit code of ``dicert verify`` when integrity was checked but authenticity was not.
EXIT_NOT_AUTHENTICATED = 4
#: Result words.
RESULT_VERIFIED = "VERIFIED"
RESULT_PARTIAL = "VERIFIED-PARTIAL"
RESULT_INTEGRITY_ONLY = "INTEGRITY-ONLY"


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class VerifyReport:
    """What :func:`verify` established (it raises instead of reporting a failure).

    ``scope`` is "full" (log, seed and bits all re-checked), "partial" (some of them) or
    "record-only" (signature and internal consistency only; said plainly in ``message``).
    """

    record_file: str
    record_sha256: str
    status: str
    output_bits: int
    signature: str
    key_fingerprint: str | None
    scope: str
    checked: tuple[str, ...]
    not_checked: tuple[str, ...]
    notes: tuple[str, ...]
    message: str
    result: str = RESULT_INTEGRITY_ONLY
    authenticated: bool = False
    bits_file: str | None = None

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("result", self.result), ("authenticated", self.authenticated),
                ("scope", self.scope), ("status", self.status), ("output_bits", self.output_bits)]
        if full:
            rows += [("signature", self.signature), ("key_fingerprint", self.key_fingerprint),
                     ("checked", ", ".join(self.checked)),
                     ("not_checked", ", ".join(self.not_checked) or "-"),
                     ("record_file", self.record_file), ("message", self.message)]
        return rows

    @property
    def exit_code(self) -> int:
        return 0 if self.authenticated else EXIT_NOT_AUTHENTICATED


# --------------------------------------------------------------------------- recipe


def verify(record_path: str | os.PathLike[str], *, log: Any = None,
           seed: bytes | str | os.PathLike[str] | None = None,
           bits: str | os.PathLike[str] | None = None, public_key: Any = None,
           trusted_keys: Any = None, strict: bool = False,
           find_bits: bool = True, scheduler: Any = None) -> VerifyReport:
    """Re-check an audit record; with the log and seed, re-derive every number.

    Parameters
    ----------
    record_path : path
        The record (JSON) written by :func:`dicert.certification.certify`.
    log : path, directory or glob, optional
        The trial log the record claims; read again and compared.
    seed : bytes or path, optional
        The extractor seed; its digest is compared, and with ``log`` the extraction re-run.
    bits : path, optional
        The output bits file; its length and digest are compared.
    public_key : key object or path, optional
        The operator's Ed25519 public key (trusted for every record).
    trusted_keys : path or TrustSet, optional
        A trusted-keys file (keys with optional pulse/time ranges, :mod:`dicert.audit.trust`).
        Without a trusted key the record is checked for integrity only (``INTEGRITY-ONLY``).
    strict : bool
        Raise unless the record is authenticated and log, seed and bits were all checked.
    find_bits : bool
        Without ``bits``, check the bits file the record names (next to the record) if present.
    scheduler : str or dask.distributed.Client, optional
        Re-run the extraction's pieces on a dask cluster (:mod:`dicert.cluster`).

    Returns
    -------
    VerifyReport

    Raises
    ------
    VerificationError
        Naming the first field that disagrees.
    """
    path = Path(record_path)
    record, found = read_and_authenticate(path, public_key, trusted_keys)
    from dicert.stages.record_compat import upgrade_body

    # Digest and signature were checked on the record as written; its numbers are compared
    # under today's names (records /1 and /2 are mapped in one place, record_compat).
    facts = recheck_record(upgrade_body(_body_of(record)), found, log_given=log is not None)
    seed_data = recheck_seed(seed, facts, found)
    recomputed_output = None
    if log is not None:
        recomputed_output = recheck_log(log, facts, found, seed_data, scheduler=scheduler)
    else:
        found.not_checked.append("log")
    if bits is None and find_bits:
        bits = _named_bits(facts.body, path, facts.status, found.notes)
    recheck_bits(bits, facts, found, recomputed_output)
    return conclude(path, record, facts, found, bits=bits, strict=strict)


# --------------------------------------------------------------------------- stages of verify


@dataclasses.dataclass(slots=True, kw_only=True)
class Findings:
    """What verify has established so far (appended to by each stage)."""

    signature: str
    key_fingerprint: str | None
    authenticated: bool
    checked: list[str] = dataclasses.field(default_factory=list)
    not_checked: list[str] = dataclasses.field(default_factory=list)
    notes: list[str] = dataclasses.field(default_factory=list)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class RecordFacts:
    """The recorded numbers every later stage compares against."""

    body: Mapping[str, Any]
    protocol: Protocol
    scan: Any  # LogScan rebuilt from the record
    seed_sha256: str
    seed_bytes: int
    output_sha256: str | None
    status: str
    output_bits: int


def read_and_authenticate(path: Path, public_key: Any,
                          trusted_keys: Any) -> tuple[Mapping[str, Any], Findings]:
    """Read the record and check its format, digest, signature and the signer's trust."""
    from dicert.audit.record import read_record
    from dicert.audit.trust import trust_from

    record = read_record(path)
    if not isinstance(record, Mapping):
        raise VerificationError("expected a JSON object", "record")
    trust = trust_from(_load_public_key(public_key), trusted_keys)
    signature, fp, authenticated = authenticate(record, trust)
    found = Findings(signature=signature, key_fingerprint=fp, authenticated=authenticated)
    found.checked += ["format", "record digest",
                      "signature" if fp else "digest (unsigned record)"]
    if authenticated:
        found.checked.append("signer is a trusted key")
    return record, found


def _uncharged_drops(body: Mapping[str, Any]) -> int:
    """Trials a station join dropped in a record from before the join charge (else 0)."""
    from dicert.stages.rederive import UNCHARGED_FORMATS

    from dicert.logspec._charge import join_of

    if body.get("format") not in UNCHARGED_FORMATS:
        return 0
    log = body.get("log")
    join = join_of(log.get("spec") if isinstance(log, Mapping) else None)
    if not isinstance(join, Mapping):
        return 0
    n = [join.get(k) for k in ("missing_at_a", "missing_at_b")]
    return sum(v for v in n if isinstance(v, int) and not isinstance(v, bool))


def recheck_record(body: Mapping[str, Any], found: Findings, *, log_given: bool) -> RecordFacts:
    """Re-derive the analysis from the recorded counts and compare (analysis and design
    stages again, without the log)."""
    notes, checked = found.notes, found.checked
    if body.get("tool", {}).get("version") != __version__:
        notes.append(f"record written by dicert {body.get('tool', {}).get('version')}, "
                     f"re-checked with {__version__}")
    protocol = _protocol_of(body)
    _require(body.get("protocol", {}).get("name") == protocol.name, "protocol.name",
             "does not match the name in protocol.content")
    rec_scan = _scan_from_record(body, protocol)
    seed_sha = _get(body, "extractor.seed_sha256")
    seed_bytes_n = _get(body, "extractor.seed_bytes")
    output_sha = _get(body, "extractor.output_sha256")
    status = _get(body, "status")
    _require(status in ("certified", "aborted", "withheld"), "status",
             f"unknown status {status!r}")
    exp = expected_body(body, protocol, rec_scan, seed_sha256=seed_sha, seed_bytes=seed_bytes_n,
                        output_sha256=output_sha)
    _compare(exp, body)
    used = _get(body, "extractor.seed_bits")
    _require(isinstance(seed_bytes_n, int) and seed_bytes_n * 8 >= used, "extractor.seed_bytes",
             f"{seed_bytes_n!r} bytes cannot supply {used} seed bits")
    if status in ("certified", "withheld"):
        _require(isinstance(output_sha, str) and len(output_sha) == 64, "extractor.output_sha256",
                 "a certified record must carry the output digest")
    if body.get("format") == "dicert-record/1":
        notes.append("record format dicert-record/1: it lacks " + "; ".join(LEGACY_LACKS)
                     + " (not checked when it was written)" + _legacy_design_note(rec_scan,
                                                                                   protocol))
    else:
        _design_findings(body, status, found)
    checked.append("internal consistency (protocol digest, counts, estimate, finite-size "
                   "bound, acceptance, eps terms, output length, seed bits)")
    dropped = _uncharged_drops(body)
    if dropped:
        notes.append(f"record format {body.get('format')} predates the station-join charge: "
                     f"its {dropped} trials dropped by the join were NOT charged (it assumed "
                     "they went missing independently of the settings and outcomes); "
                     "certified today they count as lost test rounds and cost bits")
    if protocol.method == "pef" and not log_given:
        notes.append("method pef: the probability-estimation result depends on the trial order "
                     "and is re-derived only with --log")
    if rec_scan.scope == "prefix":
        how = (f"the outcome was decided at trial {rec_scan.stop_trial_index}"
               if rec_scan.stopped_early else f"reading ended by {rec_scan.ended_by}")
        notes.append(f"the record covers only the first {rec_scan.bytes_read} bytes of the log "
                     f"(header and trials 0..{rec_scan.trials - 1}; {how}); bytes after them "
                     "are not certified and not checked")
    output_bits = int(_get(body, "extractor.output_bits"))
    if body.get("protocol_change") is not None:
        pc = body["protocol_change"]
        notes.append(f"the record declares a protocol change (previous protocol "
                     f"{pc['previous_protocol_sha256']}): {pc['reason']}; check it "
                     "along the chain with verify --chain")
    return RecordFacts(body=body, protocol=protocol, scan=rec_scan, seed_sha256=seed_sha,
                       seed_bytes=seed_bytes_n, output_sha256=output_sha, status=status,
                       output_bits=output_bits)


def _design_findings(body: Mapping[str, Any], status: str, found: Findings) -> None:
    """Notes on the re-run design checks and on what the operator allowed (records /2)."""
    des = _get(body, "design")
    failed = [c.get("name") for c in des.get("checks", []) if isinstance(c, Mapping)
              and not c.get("passed")]
    n_checks = len(des.get("checks", []))
    found.checked.append(f"design conformance re-run ({n_checks} checks"
                         + (f"; failed: {', '.join(map(str, failed))})" if failed
                            else ", all passed)"))
    inp = body.get("inputs") if isinstance(body.get("inputs"), Mapping) else {}
    if inp.get("allow_mixed_inputs") and inp.get("input_problems"):
        found.notes.append("the operator allowed a log with input identity problems: "
                           + "; ".join(map(str, inp["input_problems"])))
    if inp.get("allow_seed_reuse") and inp.get("seed_problems"):
        found.notes.append("the operator allowed a seed problem: "
                           + "; ".join(map(str, inp["seed_problems"])))
    if status == "withheld":
        found.notes.append("the output was withheld: its screens failed grossly ("
                           + str((body.get("output_screens") or {}).get("failure")) + ")")


def recheck_seed(seed: bytes | str | os.PathLike[str] | None, facts: RecordFacts,
                 found: Findings) -> Any:
    """Compare the given seed's digest and length with the record's. Returns the seed as a
    :class:`dicert._seed.SeedInput` (a file is streamed, never held whole) or None."""
    if seed is None:
        found.not_checked.append("seed")
        return None
    from dicert._seed import open_seed

    seed_in = open_seed(seed)
    _require(seed_in.sha256 == facts.seed_sha256,
             "extractor.seed_sha256", "the given seed is not the one recorded")
    _require(len(seed_in) == facts.seed_bytes, "extractor.seed_bytes",
             f"the given seed has {len(seed_in)} bytes")
    found.checked.append("seed digest")
    return seed_in


def rescan_log(log: Any, facts: RecordFacts, *, scheduler: Any = None) -> tuple[Any, Any]:
    """The read-and-scan stage again, over exactly what the record covers (a multi-file log
    on the cluster's workers with ``scheduler``, see :func:`dicert.stages.scan.scan_log`)."""
    import tempfile

    from dicert.errors import LogFormatError
    from dicert.logs import resolve_sources
    from dicert.stages.scan import _scan_whole, _single_binary, scan_log

    body, protocol, rec_scan = facts.body, facts.protocol, facts.scan
    resolve_sources(log)  # a missing log is bad input (exit 2), not a mismatch
    parties, rounds = protocol.harvest.parties, protocol.harvest.select
    spill = Path(tempfile.gettempdir())
    try:
        if rec_scan.scope == "prefix" and rec_scan.ended_by != "declared-trials":
            # Only the recorded prefix is read: the file may have grown since, or still
            # lack its trailer; nothing after the prefix is looked at.
            _require(_single_binary(log) is not None, "log.coverage",
                     "a prefix record needs the single binary (.btl) log file it covers")
            scan, sink = scan_log(log, parties, rounds, spill_dir=spill,
                                  protocol=protocol, prefix_trials=rec_scan.trials_read)
        elif "coverage" not in body["log"]:
            scan, sink = _scan_whole(log, parties, rounds, spill_dir=spill, progress=None,
                                     protocol=protocol)
        else:
            scan, sink = scan_log(log, parties, rounds, spill_dir=spill, protocol=protocol,
                                  scheduler=scheduler)
    except LogFormatError as exc:
        # A log that no longer reads is not the log that was certified.
        raise VerificationError(f"the given log does not read as a trial log ({exc})",
                                "log.sha256") from None
    # Follow-mode settings are facts of the run, not of the log; an idle timeout is
    # confirmed by re-reading exactly the recorded trials without reaching a decision.
    ended = scan.ended_by
    if ended == "limit" and rec_scan.ended_by == "idle-timeout":
        ended = "idle-timeout"
    scan = dataclasses.replace(scan, follow=rec_scan.follow, ended_by=ended)
    if body.get("format") == "dicert-record/1" and len(scan.file_entries) > 1:
        # A /1 record digested the concatenation of the files' bytes.
        scan = dataclasses.replace(scan, sha256=_concatenated_digest(resolve_sources(log)))
    return scan, sink


def recheck_log(log: Any, facts: RecordFacts, found: Findings, seed_data: Any, *,
                scheduler: Any = None) -> bytes | None:
    """Re-read the log, re-derive the body from it, and with the seed re-run the extraction
    and the output screens. Returns the recomputed output (or None)."""
    body, protocol = facts.body, facts.protocol
    from dicert.cluster import scheduler_from_env

    scan, sink = rescan_log(log, facts, scheduler=scheduler_from_env(scheduler))
    try:
        if not (body.get("format") == "dicert-record/1" and len(scan.file_entries) > 1) \
                and isinstance(body.get("inputs"), Mapping):
            from dicert.stages.analysis import input_problems_of

            _require(input_problems_of(scan) == list(body["inputs"].get("input_problems", [])),
                     "inputs.input_problems", "the input identity problems of the given log "
                     "differ from the recorded ones")
        exp = expected_body(body, protocol, scan, seed_sha256=facts.seed_sha256,
                            seed_bytes=facts.seed_bytes, output_sha256=facts.output_sha256)
        # The log may have been moved or renamed; its bytes are what is certified (a
        # multi-file digest covers the names, so only a single file may be renamed).
        rf, ef = body["log"]["files"], exp["log"]["files"]
        if isinstance(rf, list) and len(rf) == len(ef):
            exp["log"]["files"] = [
                {**e, "name": r["name"]} if isinstance(e, Mapping) and isinstance(r, Mapping)
                and "name" in r else (r if not isinstance(e, Mapping) else e)
                for e, r in zip(ef, rf)]
        es, rs = exp["log"].get("spec"), body["log"].get("spec")
        if isinstance(es, dict) and isinstance(rs, Mapping) and "name" in rs:
            es["name"] = rs["name"]  # the spec file may be renamed; its content counts
        _compare(exp, body)
        found.checked.append("log digest, size, trial count, counts and harvested raw bits")
        if isinstance(body["log"].get("spec"), Mapping):
            found.checked.append("log spec digest and station join re-run (same trials)")
        if seed_data is None or facts.status not in ("certified", "withheld"):
            return None
        return _rerun_extraction(scan, sink, facts, found, seed_data, scheduler=scheduler)
    finally:
        sink.discard()


def _rerun_extraction(scan: Any, sink: Any, facts: RecordFacts, found: Findings,
                      seed_data: Any, *, scheduler: Any) -> bytes:
    """The extraction stage again, and the output screens on its result."""
    from dicert.extract import extract_toeplitz

    body, protocol, status = facts.body, facts.protocol, facts.status
    from dicert._seed import open_seed

    seed_in = open_seed(seed_data)
    res = extract_toeplitz(sink.data(), seed_in.for_extractor(), facts.output_bits,
                           n_bits=scan.raw_bits, scheduler=scheduler)
    seed_in.check_unchanged(res)
    _require(res.output_sha256 == facts.output_sha256, "extractor.output_sha256",
             "re-running the extractor on the log and seed gives other bits")
    recomputed_output = bytes(res.output)
    found.checked.append("extraction re-run from log and seed")
    if "output_screens" in body:
        from dicert.design import output_screens, spec_of

        scr = output_screens(
            recomputed_output, facts.output_bits, spec_of(protocol).significance,
            raw=sink.data(), raw_bits=scan.raw_bits,
            bits_per_symbol=protocol.harvest.bits_per_trial,
            certified_min_entropy_bits=float(_get(body, "certified_min_entropy_bits"))
            if status == "certified" else float(
                _get(body, "entropy.finite_size.certified_min_entropy_bits")))
        _compare({"output_screens": scr}, {"output_screens": body["output_screens"]})
        found.checked.append("output screens re-run on the recomputed output")
    return recomputed_output


def recheck_bits(bits: str | os.PathLike[str] | None, facts: RecordFacts, found: Findings,
                 recomputed_output: bytes | None) -> None:
    """Compare the bits file's length and digest (and bytes, if recomputed) with the record."""
    status, output_bits = facts.status, facts.output_bits
    if bits is None:
        if status == "certified":
            found.not_checked.append("bits")
        return
    bpath = Path(bits)
    want = (output_bits + 7) // 8 if status == "certified" else 0
    try:
        with open(bpath, "rb") as fh:
            # The size is checked before anything is read: a device (/dev/zero) or a file of
            # the wrong length is refused at once, and the bytes are then hashed in chunks.
            st = os.fstat(fh.fileno())
            _require(stat.S_ISREG(st.st_mode), "bits", f"{bpath}: not a regular file")
            if status != "certified":
                _require(st.st_size == 0, "bits",
                         "the record is an abort but the bits file is not empty")
            _require(st.st_size == want, "bits",
                     f"{bpath}: {st.st_size} bytes, the record claims {output_bits} bits "
                     f"({want} bytes)")
            h, same, pos = hashlib.sha256(), True, 0
            while block := fh.read(1 << 22):
                h.update(block)
                if recomputed_output is not None:
                    same = same and block == recomputed_output[pos:pos + len(block)]
                pos += len(block)
    except FileNotFoundError:
        raise VerificationError(f"{bpath}: no such file", "bits") from None
    except IsADirectoryError:
        raise VerificationError(f"{bpath}: is a directory, expected the bits file", "bits") from None
    except OSError as exc:
        raise VerificationError(f"{bpath}: cannot read ({exc.strerror})", "bits") from None
    _require(pos == want, "bits", f"{bpath}: changed while being read ({pos} bytes read)")
    if status == "certified":
        _require(h.hexdigest() == facts.output_sha256, "bits",
                 f"{bpath}: SHA-256 does not match extractor.output_sha256")
        if recomputed_output is not None:
            _require(same and len(recomputed_output) == want, "bits",
                     "differs from the recomputed output")
    found.checked.append("bits file length and digest")


def conclude(path: Path, record: Mapping[str, Any], facts: RecordFacts, found: Findings, *,
             bits: Any, strict: bool) -> VerifyReport:
    """The scope of what was checked, the message, and the strict refusal."""
    from dicert.audit.record import record_digest

    not_checked, authenticated, fp = found.not_checked, found.authenticated, found.key_fingerprint
    status = facts.status
    if not not_checked:
        scope = "full"
    elif "log" in not_checked and "seed" in not_checked:
        scope = "record-only"
    else:
        scope = "partial"
    if scope == "record-only":
        message = ("Only the signature and the internal consistency of the record were "
                   "checked" + (" (and the bits file)" if "bits" not in not_checked
                                 and status == "certified" else "")
                   + "; pass --log and --seed to re-derive the bits.")
    elif scope == "partial":
        message = f"Checked what was given; not checked: {', '.join(not_checked)}."
    else:
        message = "Every number was re-derived from the log and the seed, and the bits match."
    if not authenticated:
        message = ("Integrity checked, authenticity NOT established ("
                   + ("unsigned record" if fp is None else "no trusted key given")
                   + "). " + message)
    if strict:
        missing = ([] if authenticated else ["authenticity"]) + not_checked
        if missing:
            raise VerificationError(f"not established: {', '.join(missing)}",
                                    "strict")
    result = (RESULT_INTEGRITY_ONLY if not authenticated
              else RESULT_VERIFIED if scope == "full" else RESULT_PARTIAL)
    return VerifyReport(record_file=str(path), record_sha256=record_digest(record),
                        status=status, output_bits=facts.output_bits,
                        signature=found.signature, key_fingerprint=fp, scope=scope,
                        checked=tuple(found.checked), not_checked=tuple(not_checked),
                        notes=tuple(found.notes), message=message, result=result,
                        authenticated=authenticated,
                        bits_file=str(bits) if bits is not None else None)


def _named_bits(body: Mapping[str, Any], record_path: Path, status: str,
                notes: list[str]) -> Path | None:
    """The bits file the record names, next to it, if present (None otherwise)."""
    from dicert.certification import BITS_NAME

    if "bits_file" in body:
        name = body["bits_file"]
        if name is None:
            # An abort has no output: a bits file next to it is not covered by the record.
            stray = record_path.parent / BITS_NAME
            return stray if status != "certified" and stray.is_file() else None
        _require(isinstance(name, str) and name not in ("", ".", "..") and "/" not in name
                 and "\\" not in name and "\x00" not in name, "bits_file",
                 "expected a plain file name next to the record")
    elif status == "certified":
        name = BITS_NAME  # records from before bits_file: certify always used this name
    else:
        return None
    candidate = record_path.parent / name
    if candidate.is_file():
        return candidate
    notes.append(f"the bits file the record names ({name}) is not next to the record; "
                 "pass --bits to check it")
    return None


def verify_chain(chain_dir: str | os.PathLike[str], *, public_key: Any = None,
                 trusted_keys: Any = None, head: str | None = None, strict: bool = False,
                 records: bool = True) -> Any:
    """Check a beacon chain in one streaming pass.

    Signatures against the trusted keys (``public_key`` and/or ``trusted_keys``), links,
    gaps, order, forks, seed and log reuse, key changes and undeclared protocol changes are
    all failures; ``head`` (a published head digest) detects truncation. With ``records``
    every pulse's record is also re-checked for internal consistency (as :func:`verify`
    without inputs). Returns the chain report (``result`` ``VERIFIED`` or
    ``INTEGRITY-ONLY``); raises VerificationError on the first problem, and with ``strict``
    also when the chain is not authenticated.
    """
    from dicert.audit.chain import verify_chain as _verify_chain

    key = _load_public_key(public_key)
    chain = Path(chain_dir)

    def consistent(name: str, index: int, record: Mapping[str, Any]) -> None:
        verify(chain / name, find_bits=False)

    report = _verify_chain(chain_dir, public_key=key, trusted=trusted_keys, head=head,
                           on_record=consistent if records else None)
    if strict and not report.authenticated:
        raise VerificationError("authenticity not established (give --pubkey or "
                                "--trusted-keys)", "strict")
    return report


__all__ = ["EXIT_NOT_AUTHENTICATED", "VerifyReport", "authenticate", "check_signature",
           "expected_body", "verify", "verify_chain"]
