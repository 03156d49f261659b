"""Re-derivation for verify: what a record's body must be, given its own counts or a re-read
log (:func:`expected_body`), the field-by-field comparison that names the first difference,
and the record's signature and trust (:func:`authenticate`).

Part of the verify recipe (:mod:`dicert.verification`).
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from dicert.errors import DicertError, ParameterError, VerificationError

if TYPE_CHECKING:
    from dicert.protocol import Protocol

#: Record members outside the body (added by sealing).
_SEAL_KEYS = ("record_sha256", "signature")
_REL_TOL = 1e-9
_ABS_TOL = 1e-15


@dataclasses.dataclass(frozen=True, slots=True)
class _ExtractionStandIn:
    seed_bits: int
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
    if expected != actual and _legacy_text().get(actual) != expected:
        return path, f"recorded {_short(actual)}, recomputed {_short(expected)}"
    return None


@functools.cache
def _legacy_text() -> dict[str, str]:
    """Citation texts that earlier versions recorded, mapped to today's (no number changes)."""
    from dicert.design import LEGACY_TRIAL_COUNT_REFERENCE, TRIAL_COUNT_REFERENCE
    from dicert.finite.eat import CONSERVATIVE_CONSTANTS, LEGACY_CONSERVATIVE_CONSTANTS

    from dicert.stages.record_compat import LEGACY_TEXT

    return {LEGACY_TRIAL_COUNT_REFERENCE: TRIAL_COUNT_REFERENCE,
            LEGACY_CONSERVATIVE_CONSTANTS: CONSERVATIVE_CONSTANTS, **LEGACY_TEXT}


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
        from dicert.stages.record_compat import CURRENT_FORMAT

        return protocol_from_bytes(data, "protocol.content",
                                   legacy_keys=body.get("format") != CURRENT_FORMAT)
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


def expected_body(body: Mapping[str, Any], protocol: Protocol, scan: Any, *, seed_sha256: str,
                  seed_bytes: int, output_sha256: str | None) -> dict:
    """Recompute a record body from a protocol, a log scan and seed/output digests."""
    from dicert.stages.analysis import analyse_counts, log_end_note, withhold
    from dicert.stages.record import build_body
    from dicert.extract import seed_bits_required
    from dicert.stages.record_compat import drop_added_members

    legacy = body.get("format") == "dicert-record/1"
    analysis = analyse_counts(scan.counts, protocol, scan.raw_bits, finite=scan.finite,
                              log_end=log_end_note(scan), design=_design_for(body, protocol, scan),
                              join=_charged_join(body, scan, protocol), source="log.spec.join")
    screens = body.get("output_screens") if isinstance(body.get("output_screens"), Mapping) \
        else None
    analysis = withhold(analysis, screens)
    extraction = None
    if analysis.status in ("certified", "withheld"):
        extraction = _ExtractionStandIn(
            seed_bits=int(seed_bits_required(scan.raw_bits, analysis.output_bits)),
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
    drop_added_members(exp, body.get("format"))  # what older formats never wrote
    # A record written by another version is compared on its numbers, not its version string;
    # the volatile section (timestamps, timings) is the one part allowed to differ.
    exp["tool"] = body.get("tool", exp["tool"])
    exp["format"] = body.get("format")  # checked against the supported formats on reading
    exp["volatile"] = body.get("volatile")
    if "bits_file" in body:  # the record names its bits file (older records do not)
        from dicert.certification import BITS_NAME

        exp["bits_file"] = BITS_NAME if exp.get("status") == "certified" else None
    if "protocol_change" in body:  # a signed declaration, checked along the chain
        from dicert.audit.chain import protocol_change_of

        exp["protocol_change"] = protocol_change_of(body)
    log_rec = body.get("log")
    if isinstance(log_rec, Mapping) and "coverage" not in log_rec \
            and isinstance(exp.get("log"), dict):
        # A record from before log scopes: it always covered the whole log.
        for k in _SCOPE_KEYS:
            exp["log"].pop(k, None)
    return exp


def _design_for(body: Mapping[str, Any], protocol: Protocol, scan: Any) -> Any:
    """The design report to re-derive with: a /1 record predates the design stage, so its
    numbers are re-derived without it."""
    from dicert.stages.analysis import design_report

    if body.get("format") != "dicert-record/1":
        return design_report(scan, protocol)
    from dicert.design import DesignReport, spec_of

    spec = spec_of(protocol)
    return DesignReport(significance=spec.significance, block_trials=spec.block_trials,
                        trials=scan.trials, trials_in_log=scan.trials, declared_trials=None,
                        checks=())


def _charged_join(body: Mapping[str, Any], scan: Any, protocol: Protocol) -> Any:
    """The station-join report to charge; records from before the join charge re-derive as
    written, uncharged (verify notes it)."""
    from dicert.logspec._charge import join_charge
    from dicert.stages.analysis import join_report_of

    join = None if body.get("format") in UNCHARGED_FORMATS else join_report_of(scan)
    if join is not None:  # an inconsistent report is a verification failure, not bad input
        _require(join.get("max_missing") == _spec_max_missing(scan.log_spec),
                 "log.spec.join.max_missing", "differs from the recorded spec's "
                 "[join] max_missing")
        keys, first, last = _spec_key_declaration(scan.log_spec)
        _require(join.get("keys") == keys, "log.spec.join.keys",
                 "differs from the recorded spec's [join] keys")
        if keys is not None:
            _require(join.get("key_range") == [first, last], "log.spec.join.key_range",
                     "differs from the recorded spec's [join] first_key / last_key")
        try:
            join_charge(join, 2, method=protocol.method, source="the recorded join report")
        except ParameterError as exc:
            _require(False, "log.spec.join", str(exc))
    return join


def _spec_max_missing(log_spec: Any) -> Any:
    """``[join] max_missing`` of a recorded spec's content (0 when absent; None if unreadable)."""
    import tomllib

    try:
        doc = tomllib.loads(str(log_spec.get("content")))
    except (tomllib.TOMLDecodeError, AttributeError):
        return None
    join = doc.get("join", {})
    return join.get("max_missing", 0) if isinstance(join, dict) else None


def _spec_key_declaration(log_spec: Any) -> tuple[Any, Any, Any]:
    """``[join] keys, first_key, last_key`` of a recorded spec's content (None when absent)."""
    import tomllib

    try:
        doc = tomllib.loads(str(log_spec.get("content")))
    except (tomllib.TOMLDecodeError, AttributeError):
        return None, None, None
    join = doc.get("join", {})
    if not isinstance(join, dict):
        return None, None, None
    return join.get("keys"), join.get("first_key"), join.get("last_key")


#: Record formats from before trials dropped by a station join were charged
#: (dicert.logspec._charge): they assumed such trials went missing independently.
UNCHARGED_FORMATS = ("dicert-record/1", "dicert-record/2", "dicert-record/3")

#: Top-level record members introduced by dicert-record/2.
_V2_MEMBERS = ("design", "inputs", "output_screens", "estimate_blocks")
#: What a dicert-record/1 record lacks (said in verify's notes).
LEGACY_LACKS = ("design-conformance checks (test-round fraction, settings distribution, "
                "serial independence, physical range, declared trial count)",
                "per-file digests of the log", "input identity and seed checks",
                "output screens")

#: Members of the record's ``log`` section that describe what part of the log was read.
_SCOPE_KEYS = ("coverage", "bytes_read", "trials_read", "stopped_early", "stop_trial_index",
               "ended_by", "follow")
_ENDINGS = ("end-of-log", "decision", "idle-timeout", "declared-trials")


def _scope_of(body: Mapping[str, Any], trials: int, size_bytes: Any) -> dict:
    """The log-scope members of a record, checked for consistency (legacy records: whole)."""
    log = _get(body, "log")
    if "coverage" not in log:
        return {"scope": "whole", "bytes_read": size_bytes, "trials_read": trials}
    vals = {k: _get(body, f"log.{k}") for k in _SCOPE_KEYS}
    vals["scope"] = vals.pop("coverage")  # the LogScan field
    scope, ended = vals["scope"], vals["ended_by"]
    _require(scope in ("whole", "prefix"), "log.coverage", f"unknown coverage {scope!r}")
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


def _scan_from_record(body: Mapping[str, Any], protocol: Protocol):
    from dicert.stages.scan import LogScan, expected_raw_bits

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
        raw_bits = expected_raw_bits(counts, protocol.harvest.parties, protocol.harvest.select)
    files = _get(body, "log.files")
    size_bytes = _get(body, "log.size_bytes")
    scope = _scope_of(body, trials, size_bytes)
    if scope["scope"] == "prefix":
        _require(protocol.method == "pef" or scope.get("ended_by") == "declared-trials",
                 "log.coverage", "only method pef stops reading a log early")
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


def _legacy_design_note(scan: Any, protocol: Protocol) -> str:
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
            accepted=fs["accepted"], certified_min_entropy_bits=fs["certified_min_entropy_bits"],
            eps=dict(fs["error_parameters"]), smoothing_eps=fs["smoothing_eps"],
            entropy_error=fs["entropy_error"], assumptions=tuple(fs["assumptions"]),
            references=tuple(fs["references"]), details=fs["details"])
    except (KeyError, TypeError, ValueError) as exc:
        raise VerificationError(f"not a valid finite-size result ({exc})",
                                "entropy.finite_size") from None
