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
(dotted path into the record, e.g. ``entropy.finite_size.min_entropy_bits``). A failure can
therefore never be ignored by forgetting to look at a return value.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from dicert import __version__
from dicert.errors import DicertError, VerificationError

#: Record members outside the body (added by sealing).
_SEAL_KEYS = ("record_sha256", "signature")
_REL_TOL = 1e-9
#: Exit code of ``dicert verify`` when integrity was checked but authenticity was not.
EXIT_NOT_AUTHENTICATED = 4
#: Result words.
RESULT_VERIFIED = "VERIFIED"
RESULT_PARTIAL = "VERIFIED-PARTIAL"
RESULT_INTEGRITY_ONLY = "INTEGRITY-ONLY"
_ABS_TOL = 1e-15


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

    @property
    def exit_code(self) -> int:
        return 0 if self.authenticated else EXIT_NOT_AUTHENTICATED


@dataclasses.dataclass(frozen=True, slots=True)
class _ExtractionStandIn:
    seed_bits_used: int
    output_sha256: str | None
    method: str | None


# --------------------------------------------------------------------------- comparison


def _first_difference(expected: Any, actual: Any, path: str) -> tuple[str, str] | None:
    """(field, description) of the first place where two JSON values differ."""
    if isinstance(expected, Mapping):
        if not isinstance(actual, Mapping):
            return path, "expected an object"
        for k in expected:
            sub = f"{path}.{k}" if path else str(k)
            if k not in actual:
                return sub, "missing from the record"
            d = _first_difference(expected[k], actual[k], sub)
            if d is not None:
                return d
        for k in actual:
            if k not in expected:
                sub = f"{path}.{k}" if path else str(k)
                return sub, "unexpected member in the record"
        return None
    if isinstance(expected, list):
        if not isinstance(actual, list) or len(actual) != len(expected):
            return path, "list differs in length or type"
        for i, (e, a) in enumerate(zip(expected, actual)):
            d = _first_difference(e, a, f"{path}[{i}]")
            if d is not None:
                return d
        return None
    if isinstance(expected, bool) or isinstance(actual, bool):
        if type(expected) is not type(actual) or expected != actual:
            return path, f"recorded {actual!r}, recomputed {expected!r}"
        return None
    if isinstance(expected, (int, float)) and isinstance(actual, (int, float)):
        if isinstance(expected, int) and isinstance(actual, int):
            ok = expected == actual
        else:
            ok = math.isclose(float(expected), float(actual), rel_tol=_REL_TOL, abs_tol=_ABS_TOL)
        return None if ok else (path, f"recorded {actual!r}, recomputed {expected!r}")
    if expected != actual:
        return path, f"recorded {_short(actual)}, recomputed {_short(expected)}"
    return None


def _short(v: Any) -> str:
    r = repr(v)
    return r if len(r) <= 80 else r[:77] + "..."


def _require(cond: bool, field: str, message: str) -> None:
    if not cond:
        raise VerificationError(message, field)


def _compare(expected: Mapping[str, Any], actual: Mapping[str, Any]) -> None:
    d = _first_difference(expected, actual, "")
    if d is not None:
        field, what = d
        raise VerificationError(f"does not match the recomputation ({what})", field)


# --------------------------------------------------------------------------- helpers


def _body_of(record: Mapping[str, Any]) -> dict:
    return {k: v for k, v in record.items() if k not in _SEAL_KEYS}


def _get(d: Mapping[str, Any], dotted: str) -> Any:
    cur: Any = d
    for part in dotted.split("."):
        if not isinstance(cur, Mapping) or part not in cur:
            raise VerificationError("missing from the record", dotted)
        cur = cur[part]
    return cur


def _recorded_counts(body: Mapping[str, Any]) -> np.ndarray:
    values = _get(body, "counts.values")
    try:
        arr = np.array(values, dtype=object)
        ok = arr.shape == (2, 2, 2, 2, 2) and all(
            isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in arr.ravel())
    except (ValueError, TypeError):
        ok = False
    _require(ok, "counts.values", "expected a 2x2x2x2x2 table of non-negative integers")
    return np.array(values, dtype=np.int64)


def _protocol_of(body: Mapping[str, Any]):
    from dicert.errors import ProtocolError
    from dicert.protocol import protocol_from_bytes

    content = _get(body, "protocol.content")
    _require(isinstance(content, str), "protocol.content", "expected the protocol file text")
    data = content.encode("utf-8")
    _require(hashlib.sha256(data).hexdigest() == _get(body, "protocol.sha256"), "protocol.sha256",
             "is not the SHA-256 of protocol.content")
    try:
        return protocol_from_bytes(data, "protocol.content")
    except ProtocolError as exc:
        raise VerificationError(f"the recorded protocol does not validate: {exc}",
                                "protocol.content") from None


def _load_public_key(public_key: Any) -> Any:
    if public_key is None or not isinstance(public_key, (str, os.PathLike)):
        return public_key
    from dicert.audit.signing import load_public_key

    return load_public_key(public_key)


def check_signature(record: Mapping[str, Any], public_key: Any = None) -> tuple[str, str | None]:
    """Check format, digest and signature; returns (description, key fingerprint)."""
    from dicert.audit.record import check_record

    key = _load_public_key(public_key)
    check_record(record, key)
    sig = record.get("signature")
    if not sig:
        return "none (the record is unsigned; only its digest was checked)", None
    fp = sig.get("key_fingerprint") if isinstance(sig, Mapping) else None
    if key is not None:
        return f"valid, made by the given public key (fingerprint {fp})", fp
    return (f"valid for the key embedded in the record (fingerprint {fp}); pass --pubkey to "
            "check that it is the operator's key"), fp


def authenticate(record: Mapping[str, Any], trust: Any) -> tuple[str, str | None, bool]:
    """Check format, digest and signature, then whether a trusted key signed it.

    Returns (description, key fingerprint, authenticated). A signature by a key that is not
    trusted (or not for this pulse) raises VerificationError.
    """
    from dicert.audit.record import check_record
    from dicert.audit.trust import record_time

    chk = check_record(record)
    if not chk.signed:
        return ("none: the record is UNSIGNED; its digest detects accidental change, not "
                "forgery; authenticity NOT established"), None, False
    fp = chk.key_fingerprint
    if trust is None:
        return (f"valid for the key embedded in the record (fingerprint {fp}); authenticity "
                "NOT established: pass --pubkey or --trusted-keys"), fp, False
    key = trust.authorise(fp, record.get("pulse_index"), record_time(record))
    if key.label == "the given public key":
        return f"valid, made by the given public key (fingerprint {fp})", fp, True
    return f"valid, made by trusted key '{key.label}' (fingerprint {fp})", fp, True


def expected_body(body: Mapping[str, Any], protocol: Any, scan: Any, *, seed_sha256: str,
                  seed_bytes: int, output_sha256: str | None) -> dict:
    """Recompute a record body from a protocol, a log scan and seed/output digests."""
    from dicert.certify import analyse_counts, build_body, design_report, log_end_note, withhold
    from dicert.extract import seed_bits_required

    legacy = body.get("format") == "dicert-record/1"
    if legacy:
        from dicert.design import DesignReport, spec_of

        # A /1 record predates the design stage: its numbers are re-derived without it.
        spec = spec_of(protocol)
        design = DesignReport(significance=spec.significance, block_trials=spec.block_trials,
                              trials=scan.trials, trials_in_log=scan.trials,
                              declared_trials=None, checks=())
    else:
        design = design_report(scan, protocol)
    analysis = analyse_counts(scan.counts, protocol, scan.raw_bits, finite=scan.finite,
                              log_end=log_end_note(scan), design=design)
    screens = body.get("output_screens") if isinstance(body.get("output_screens"), Mapping) \
        else None
    analysis = withhold(analysis, screens)
    extraction = None
    if analysis.status in ("certified", "withheld"):
        extraction = _ExtractionStandIn(
            seed_bits_used=int(seed_bits_required(scan.raw_bits, analysis.output_bits)),
            output_sha256=output_sha256,
            method=body.get("extractor", {}).get("method") if isinstance(
                body.get("extractor"), Mapping) else None,
        )
    chain_info = None
    if body.get("pulse_index") is not None or body.get("previous_record_sha256") is not None:
        chain_info = (body.get("pulse_index"), body.get("previous_record_sha256"))
    inputs = body.get("inputs") if isinstance(body.get("inputs"), Mapping) else None
    exp = build_body(protocol=protocol, scan=scan, analysis=analysis, seed_sha256=seed_sha256,
                     seed_bytes=seed_bytes, extraction=extraction, chain_info=chain_info,
                     volatile=body.get("volatile"), inputs=dict(inputs) if inputs else None,
                     screens=screens)
    if legacy:
        # Members added by dicert-record/2 are absent from a /1 record (see verify's notes).
        exp["format"] = body.get("format")
        for k in _V2_MEMBERS:
            exp.pop(k, None)
        if isinstance(exp.get("log"), dict):
            exp["log"].pop("trials_in_log", None)
            exp["log"]["files"] = [e["name"] if isinstance(e, Mapping) else e
                                   for e in exp["log"]["files"]]
        est, rest = exp.get("estimate"), body.get("estimate")
        if isinstance(est, dict) and isinstance(rest, Mapping):
            # /2 added these members and bases the local-realism p-value on the observed
            # settings frequencies; a /1 record keeps its own (informational) p-value.
            for k in ("gamma_source", "local_win_bound"):
                if k not in rest:
                    est.pop(k, None)
            for k in ("p_value_local", "log10_p_value_local", "p_value_method"):
                if k in rest:
                    est[k] = rest[k]
    # A record written by another version is compared on its numbers, not its version string;
    # the volatile section (timestamps, timings) is the one part allowed to differ.
    exp["tool"] = body.get("tool", exp["tool"])
    exp["volatile"] = body.get("volatile")
    if "bits_file" in body:  # the record names its bits file (older records do not)
        from dicert.certify import BITS_NAME

        exp["bits_file"] = BITS_NAME if exp.get("status") == "certified" else None
    if "protocol_change" in body:  # a signed declaration, checked along the chain
        from dicert.audit.chain import protocol_change_of

        exp["protocol_change"] = protocol_change_of(body)
    log_rec = body.get("log")
    if isinstance(log_rec, Mapping) and "scope" not in log_rec and isinstance(exp.get("log"), dict):
        # A record from before log scopes: it always covered the whole log.
        for k in _SCOPE_KEYS:
            exp["log"].pop(k, None)
    return exp


#: Top-level record members introduced by dicert-record/2.
_V2_MEMBERS = ("design", "inputs", "output_screens", "estimate_blocks")
#: What a dicert-record/1 record lacks (said in verify's notes).
LEGACY_LACKS = ("design-conformance checks (test-round fraction, settings distribution, "
                "serial independence, physical range, declared trial count)",
                "per-file digests of the log", "input identity and seed checks",
                "output screens")

#: Members of the record's ``log`` section that describe what part of the log was read.
_SCOPE_KEYS = ("scope", "bytes_read", "trials_read", "stopped_early", "stop_trial_index",
               "ended_by", "follow")
_ENDINGS = ("end-of-log", "decision", "idle-timeout", "declared-trials")


def _scope_of(body: Mapping[str, Any], trials: int, size_bytes: Any) -> dict:
    """The log-scope members of a record, checked for consistency (legacy records: whole)."""
    log = _get(body, "log")
    if "scope" not in log:
        return {"scope": "whole", "bytes_read": size_bytes, "trials_read": trials}
    vals = {k: _get(body, f"log.{k}") for k in _SCOPE_KEYS}
    scope, ended = vals["scope"], vals["ended_by"]
    _require(scope in ("whole", "prefix"), "log.scope", f"unknown scope {scope!r}")
    _require(ended in _ENDINGS, "log.ended_by", f"unknown value {ended!r}")
    _require(vals["trials_read"] == trials, "log.trials_read",
             f"recorded {vals['trials_read']!r}, log.trials is {trials!r}")
    _require(vals["bytes_read"] == size_bytes, "log.bytes_read",
             f"recorded {vals['bytes_read']!r}, log.size_bytes is {size_bytes!r}")
    _require(isinstance(vals["stopped_early"], bool)
             and vals["stopped_early"] == (ended == "decision"), "log.stopped_early",
             "must be true exactly when log.ended_by is \"decision\"")
    want_stop = trials - 1 if vals["stopped_early"] else None
    _require(vals["stop_trial_index"] == want_stop, "log.stop_trial_index",
             f"recorded {vals['stop_trial_index']!r}, expected {want_stop!r}")
    if scope == "whole":
        _require(ended == "end-of-log", "log.ended_by", "a whole-log record must end at the "
                 "end of the log")
    else:
        _require(ended != "end-of-log", "log.ended_by", "a prefix record ends at a decision "
                 "or an idle timeout")
    fol = vals["follow"]
    _require(fol is None or (isinstance(fol, Mapping) and set(fol) == {"poll_s",
                                                                      "idle_timeout_s"}),
             "log.follow", "expected null or {poll_s, idle_timeout_s}")
    _require(ended != "idle-timeout" or fol is not None, "log.ended_by",
             "an idle timeout needs follow mode")
    return vals


def _scan_from_record(body: Mapping[str, Any], protocol: Any):
    from dicert.certify import LogScan, expected_raw_bits

    counts = _recorded_counts(body)
    trials = _get(body, "log.trials")
    _require(isinstance(trials, int) and trials == int(counts.sum()), "log.trials",
             f"recorded {trials!r} but the counts table sums to {int(counts.sum())}")
    has_t = _get(body, "log.has_test_flag")
    if not has_t:
        _require(int(counts[0].sum()) == 0, "counts.values",
                 "a log without a t column must have every trial under t = 1")
    finite = None
    if protocol.method == "pef":
        # The PEF result depends on the trial order (calibration prefix, stopping trial), not
        # on the counts alone: without the log it is taken from the record and only the
        # numbers derived from it are recomputed.
        finite = _finite_from_record(body)
        raw_bits = _get(body, "harvest.raw_bits")
        if finite.accepted:
            want = finite.details.get("harvest_bits") if isinstance(finite.details, Mapping) else None
            _require(raw_bits == want, "harvest.raw_bits",
                     f"recorded {raw_bits!r}, the analysed trials give {want!r}")
    else:
        raw_bits = expected_raw_bits(counts, protocol.harvest.parties, protocol.harvest.rounds)
    files = _get(body, "log.files")
    size_bytes = _get(body, "log.size_bytes")
    scope = _scope_of(body, trials, size_bytes)
    if scope["scope"] == "prefix":
        _require(protocol.method == "pef" or scope.get("ended_by") == "declared-trials",
                 "log.scope", "only method pef stops reading a log early")
    if scope.get("ended_by") == "declared-trials":
        from dicert.design import declared_trials

        _require(declared_trials(protocol) == trials, "log.trials_read",
                 "a prefix of declared trials must hold exactly the protocol's declared n")
    extra: dict[str, Any] = {}
    design = body.get("design")
    if isinstance(design, Mapping):
        inputs = design.get("inputs") if isinstance(design.get("inputs"), Mapping) else {}
        extra["pair_counts"] = _int_table(inputs.get("pair_counts"), (8, 8),
                                          "design.inputs.pair_counts")
        blocks = inputs.get("block_settings_counts")
        extra["block_settings"] = None if blocks is None else _int_table(
            blocks, (-1, 8), "design.inputs.block_settings_counts")
        in_log = _get(body, "log.trials_in_log")
        _require(isinstance(in_log, int) and in_log >= trials, "log.trials_in_log",
                 f"expected an integer >= log.trials, got {in_log!r}")
        extra["trials_in_log"] = in_log
    spec = _get(body, "log").get("spec") if isinstance(_get(body, "log"), Mapping) else None
    if spec is not None:  # a log read through a log spec: its digest must match its content
        from dicert.logspec import spec_entry_problem

        problem = spec_entry_problem(spec)
        _require(problem is None, "log.spec", str(problem))
        extra["log_spec"] = dict(spec)
    series = body.get("estimate_blocks")
    if isinstance(series, Mapping):
        extra["block_series"] = _recorded_block_series(series, counts)
    if isinstance(files, list) and files and all(isinstance(f, Mapping) for f in files):
        extra["file_entries"] = tuple(dict(f) for f in files)
        files = [f.get("name") for f in files]
    return LogScan(counts=counts, trials=trials, sha256=_get(body, "log.sha256"),
                   size_bytes=size_bytes,
                   files=tuple(files) if isinstance(files, list) else files,
                   has_test_flag=has_t, raw_bits=raw_bits,
                   raw_sha256=_get(body, "harvest.raw_sha256"), finite=finite, **scope,
                   **extra)


def _recorded_block_series(series: Mapping[str, Any], counts: Any) -> tuple:
    """The per-block counts a record states, checked against its counts table."""
    import numpy as np

    blocks = series.get("blocks")
    _require(isinstance(blocks, list) and blocks and all(isinstance(b, Mapping) for b in blocks),
             "estimate_blocks.blocks", "expected a non-empty list of blocks")
    firsts = tuple(b.get("first_trial") for b in blocks)
    _require(all(isinstance(f, int) and f >= 0 for f in firsts), "estimate_blocks.blocks",
             "first_trial must be a non-negative integer")
    table = _int_table([b.get("counts") for b in blocks], (-1, 32),
                       "estimate_blocks.blocks.counts")
    _require(bool((np.asarray(table).sum(axis=0).reshape(2, 2, 2, 2, 2)
                   == np.asarray(counts)).all()),
             "estimate_blocks.blocks.counts", "the blocks' counts do not add up to the "
             "record's counts table")
    return firsts, table


def _concatenated_digest(files: list[Path]) -> str:
    """SHA-256 of the concatenated bytes of a log's files (the dicert-record/1 definition)."""
    h = hashlib.sha256()
    for f in files:
        with open(f, "rb") as fh:
            while block := fh.read(1 << 22):
                h.update(block)
    return h.hexdigest()


def _legacy_design_note(scan: Any, protocol: Any) -> str:
    """What the design checks the counts allow say about a /1 record (informational)."""
    from dicert.design import check_design

    try:
        rep = check_design(scan.counts, protocol)
    except DicertError:
        return ""
    if rep.passed:
        return "; the checks its counts allow pass today"
    return ("; WARNING: re-run on its counts, these checks FAIL today: "
            + ", ".join(c.name for c in rep.failed))


def _int_table(values: Any, shape: tuple[int, int], field: str) -> np.ndarray | None:
    if values is None:
        return None
    try:
        arr = np.array(values, dtype=object)
        ok = arr.ndim == 2 and (shape[0] < 0 or arr.shape[0] == shape[0]) \
            and arr.shape[1] == shape[1] and all(
                isinstance(v, int) and not isinstance(v, bool) and v >= 0 for v in arr.ravel())
    except (ValueError, TypeError):
        ok = False
    if not ok and np.array(values, dtype=object).size == 0 and shape[0] < 0:
        return np.zeros((0, shape[1]), dtype=np.int64)
    _require(ok, field, f"expected a table of non-negative integers with {shape[1]} columns")
    return np.array(values, dtype=np.int64).reshape(-1, shape[1])


def _finite_from_record(body: Mapping[str, Any]):
    from dicert.finite.result import FiniteSizeResult

    fs = _get(body, "entropy.finite_size")
    try:
        return FiniteSizeResult(
            method=fs["method"], side_information=fs["side_information"],
            accepted=fs["accepted"], min_entropy_bits=fs["min_entropy_bits"],
            eps=dict(fs["eps"]), smoothing_eps=fs["smoothing_eps"],
            entropy_error=fs["entropy_error"], assumptions=tuple(fs["assumptions"]),
            references=tuple(fs["references"]), details=fs["details"])
    except (KeyError, TypeError, ValueError) as exc:
        raise VerificationError(f"not a valid finite-size result ({exc})",
                                "entropy.finite_size") from None


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
        The record (JSON) written by :func:`dicert.certify.certify`.
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
    from dicert.audit.record import read_record, record_digest

    path = Path(record_path)
    record = read_record(path)
    if not isinstance(record, Mapping):
        raise VerificationError("expected a JSON object", "record")
    from dicert.audit.trust import trust_from

    trust = trust_from(_load_public_key(public_key), trusted_keys)
    signature, fp, authenticated = authenticate(record, trust)
    body = _body_of(record)
    checked = ["format", "record digest", "signature" if fp else "digest (unsigned record)"]
    if authenticated:
        checked.append("signer is a trusted key")
    notes: list[str] = []
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
    used = _get(body, "extractor.seed_bits_used")
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
        des = _get(body, "design")
        failed = [c.get("name") for c in des.get("checks", []) if isinstance(c, Mapping)
                  and not c.get("passed")]
        n_checks = len(des.get("checks", []))
        checked.append(f"design conformance re-run ({n_checks} checks"
                       + (f"; failed: {', '.join(map(str, failed))})" if failed
                          else ", all passed)"))
        inp = body.get("inputs") if isinstance(body.get("inputs"), Mapping) else {}
        if inp.get("allow_mixed_inputs") and inp.get("input_problems"):
            notes.append("the operator allowed a log with input identity problems: "
                         + "; ".join(map(str, inp["input_problems"])))
        if inp.get("allow_seed_reuse") and inp.get("seed_problems"):
            notes.append("the operator allowed a seed problem: "
                         + "; ".join(map(str, inp["seed_problems"])))
        if status == "withheld":
            notes.append("the output was withheld: its screens failed grossly ("
                         + str((body.get("output_screens") or {}).get("failure")) + ")")
    checked.append("internal consistency (protocol digest, counts, estimate, finite-size "
                   "bound, acceptance, eps terms, output length, seed bits)")
    if protocol.method == "pef" and log is None:
        notes.append("method pef: the probability-estimation result depends on the trial order "
                     "and is re-derived only with --log")
    if rec_scan.scope == "prefix":
        how = (f"the outcome was decided at trial {rec_scan.stop_trial_index}"
               if rec_scan.stopped_early else f"reading ended by {rec_scan.ended_by}")
        notes.append(f"the record covers only the first {rec_scan.bytes_read} bytes of the log "
                     f"(header and trials 0..{rec_scan.trials - 1}; {how}); bytes after them "
                     "are not certified and not checked")
    output_bits = int(_get(body, "extractor.output_bits"))
    not_checked: list[str] = []
    if body.get("protocol_change") is not None:
        pc = body["protocol_change"]
        notes.append(f"the record declares a protocol change (previous protocol "
                     f"{pc['previous_protocol_sha256'][:16]}...): {pc['reason']}; check it "
                     "along the chain with verify --chain")

    seed_data = None
    if seed is not None:
        from dicert.certify import read_seed

        seed_data, _label = read_seed(seed)
        _require(hashlib.sha256(seed_data).hexdigest() == seed_sha, "extractor.seed_sha256",
                 "the given seed is not the one recorded")
        _require(len(seed_data) == seed_bytes_n, "extractor.seed_bytes",
                 f"the given seed has {len(seed_data)} bytes")
        checked.append("seed digest")
    else:
        not_checked.append("seed")

    recomputed_output: bytes | None = None
    if log is not None:
        import tempfile

        from dicert.certify import _scan_whole, _single_binary, scan_log
        from dicert.errors import LogFormatError
        from dicert.logs import resolve_sources

        resolve_sources(log)  # a missing log is bad input (exit 2), not a mismatch
        parties, rounds = protocol.harvest.parties, protocol.harvest.rounds
        spill = Path(tempfile.gettempdir())
        try:
            if rec_scan.scope == "prefix" and rec_scan.ended_by != "declared-trials":
                # Only the recorded prefix is read: the file may have grown since, or still
                # lack its trailer; nothing after the prefix is looked at.
                _require(_single_binary(log) is not None, "log.scope",
                         "a prefix record needs the single binary (.btl) log file it covers")
                scan, sink = scan_log(log, parties, rounds, spill_dir=spill,
                                      protocol=protocol, prefix_trials=rec_scan.trials_read)
            elif "scope" not in body["log"]:
                scan, sink = _scan_whole(log, parties, rounds, spill_dir=spill, progress=None,
                                         protocol=protocol)
            else:
                scan, sink = scan_log(log, parties, rounds, spill_dir=spill, protocol=protocol)
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
        elif isinstance(body.get("inputs"), Mapping):
            from dicert.certify import input_problems_of

            _require(input_problems_of(scan) == list(body["inputs"].get("input_problems", [])),
                     "inputs.input_problems", "the input identity problems of the given log "
                     "differ from the recorded ones")
        try:
            exp = expected_body(body, protocol, scan, seed_sha256=seed_sha,
                                seed_bytes=seed_bytes_n, output_sha256=output_sha)
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
            checked.append("log digest, size, trial count, counts and harvested raw bits")
            if isinstance(body["log"].get("spec"), Mapping):
                checked.append("log spec digest and station join re-run (same trials)")
            if seed_data is not None and status in ("certified", "withheld"):
                from dicert.extract import extract_toeplitz

                res = extract_toeplitz(sink.data(), seed_data, output_bits, n_bits=scan.raw_bits,
                                       scheduler=scheduler)
                _require(res.output_sha256 == output_sha, "extractor.output_sha256",
                         "re-running the extractor on the log and seed gives other bits")
                recomputed_output = bytes(res.output)
                checked.append("extraction re-run from log and seed")
                if "output_screens" in body:
                    from dicert.design import output_screens, spec_of

                    scr = output_screens(
                        recomputed_output, output_bits, spec_of(protocol).significance,
                        raw=sink.data(), raw_bits=scan.raw_bits,
                        bits_per_symbol=protocol.harvest.bits_per_trial,
                        min_entropy_bits=float(_get(body, "certified_min_entropy_bits"))
                        if status == "certified" else float(
                            _get(body, "entropy.finite_size.min_entropy_bits")))
                    _compare({"output_screens": scr}, {"output_screens": body["output_screens"]})
                    checked.append("output screens re-run on the recomputed output")
        finally:
            sink.discard()
    else:
        not_checked.append("log")

    if bits is None and find_bits:
        bits = _named_bits(body, path, status, notes)
    if bits is not None:
        bpath = Path(bits)
        try:
            data = bpath.read_bytes()
        except FileNotFoundError:
            raise VerificationError(f"{bpath}: no such file", "bits") from None
        if status != "certified":
            _require(len(data) == 0, "bits", "the record is an abort but the bits file is not empty")
        else:
            _require(len(data) == (output_bits + 7) // 8, "bits",
                     f"{bpath}: {len(data)} bytes, the record claims {output_bits} bits "
                     f"({(output_bits + 7) // 8} bytes)")
            _require(hashlib.sha256(data).hexdigest() == output_sha, "bits",
                     f"{bpath}: SHA-256 does not match extractor.output_sha256")
            if recomputed_output is not None:
                _require(data == recomputed_output, "bits", "differs from the recomputed output")
        checked.append("bits file length and digest")
    elif status == "certified":
        not_checked.append("bits")

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
                        status=status, output_bits=output_bits, signature=signature,
                        key_fingerprint=fp, scope=scope, checked=tuple(checked),
                        not_checked=tuple(not_checked), notes=tuple(notes), message=message,
                        result=result, authenticated=authenticated,
                        bits_file=str(bits) if bits is not None else None)


def _named_bits(body: Mapping[str, Any], record_path: Path, status: str,
                notes: list[str]) -> Path | None:
    """The bits file the record names, next to it, if present (None otherwise)."""
    from dicert.certify import BITS_NAME

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
