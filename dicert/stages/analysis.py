"""Stages 2 and 3, design checks and analysis: the design-conformance checks, input identity
and seed sanity (:func:`checked_analysis`), the finite-size decision from the counts
(:func:`analyse_counts`, re-derived by verify) and the output screens (:func:`screened`).

Part of the certify and verify recipes (:mod:`dicert.certification`,
:mod:`dicert.verification`).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from dicert.errors import DicertError, LogFormatError, ParameterError, SeedError
from dicert.stages.scan import LogScan

if TYPE_CHECKING:
    from dicert.design import DesignReport
    from dicert.estimate import ChshEstimate
    from dicert.finite.result import FiniteSizeResult
    from dicert.protocol import Protocol


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Analysis:
    """Decisions derived from the counts and the protocol alone (re-derivable by verify)."""

    estimate: ChshEstimate
    finite: FiniteSizeResult
    status: str
    abort_reason: str | None
    certified_min_entropy_bits: float
    output_bits: int
    seed_bits_needed: int
    total_error: float
    design: DesignReport | None = None
    # A station join that may drop trials (log spec join.max_missing > 0): what is charged
    # (dicert.logspec.JoinCharge) and the estimate of the kept trials before the charge
    # (``estimate`` is then that of the charged counts).
    charge: Any = None
    uncharged_estimate: ChshEstimate | None = None


# --------------------------------------------------------------------------- analysis


def log_end_note(scan: LogScan) -> str | None:
    """Why reading stopped, when that is part of an abort reason (idle timeout), else None."""
    if scan.ended_by != "idle-timeout":
        return None
    t = (scan.follow or {}).get("idle_timeout_s")
    wait = f"{float(t):g} s" if isinstance(t, (int, float)) else "the idle timeout"
    return (f"no new trials for {wait} while following the log (idle timeout); the record "
            f"covers the {scan.trials} trials read")


def design_report(scan: LogScan, protocol: Protocol) -> Any:
    """The design-conformance report of a scan (:func:`dicert.design.check_design`)."""
    from dicert.design import check_design

    return check_design(scan.counts, protocol, block_counts=scan.block_settings,
                        pair_counts=scan.pair_counts, trials_in_log=scan.trials_in_log,
                        decided_early=scan.ended_by == "decision", eps=_estimate_eps(protocol))


def checked_analysis(scan: LogScan, proto: Protocol, *, log: Any, seed_bytes: bytes,
                     seed_label: str, chain_dir: Path | None, allow_mixed_inputs: bool,
                     allow_seed_reuse: bool) -> tuple[Analysis, dict]:
    """Certify's stages between the scan and the extraction, with the record's ``inputs``.

    Input identity of a multi-file log (bad input unless allowed), the design-conformance
    stage and the analysis (:func:`analyse_counts`), then, when the seed will be used, its
    length and sanity (:func:`dicert.design.seed_problems`; bad input unless allowed).
    """
    input_problems = input_problems_of(scan)
    if input_problems and not allow_mixed_inputs:
        raise LogFormatError(log, "", f"{input_problems[0]}; refusing a log that may hold "
                             "the same data twice or mix sources (pass --allow-mixed-inputs "
                             "if this is intended; it is then recorded)")
    analysis = analyse_counts(scan.counts, proto, scan.raw_bits, finite=scan.finite,
                              log_end=log_end_note(scan), design=design_report(scan, proto),
                              join=join_report_of(scan), source=log)
    seed_issues: list[str] = []
    if analysis.status == "certified":
        from dicert.design import seed_problems

        check_seed_length(seed_bytes, seed_label, scan.raw_bits, analysis.output_bits)
        used = _chain_seed_digests(chain_dir) if chain_dir is not None else ()
        digests = (scan.sha256,) + tuple(str(e.get("sha256")) for e in scan.file_entries)
        fatal, seed_issues = seed_problems(seed_bytes, log_digests=digests, used_digests=used)
        if fatal:
            raise SeedError(f"{seed_label}: {fatal[0]}; an extractor seed must be "
                            "uniformly random")
        if seed_issues and not allow_seed_reuse:
            raise SeedError(f"{seed_label}: {seed_issues[0]}; use a fresh uniformly random "
                            "seed (or pass --allow-seed-reuse; it is then recorded)")
    inputs = {"allow_mixed_inputs": bool(allow_mixed_inputs),
              "input_problems": list(input_problems),
              "allow_seed_reuse": bool(allow_seed_reuse),
              "seed_problems": list(seed_issues)}
    return analysis, inputs


def screened(extraction: Any, analysis: Analysis, proto: Protocol, scan: LogScan,
             raw: Any) -> tuple[Analysis, dict | None]:
    """Output screens after extraction (:func:`dicert.design.output_screens`); a gross
    failure turns the analysis into status "withheld"."""
    if extraction is None:
        return analysis, None
    from dicert.design import output_screens, spec_of

    screens = output_screens(extraction.output, analysis.output_bits,
                             spec_of(proto).significance, raw=raw, raw_bits=scan.raw_bits,
                             bits_per_symbol=proto.harvest.bits_per_trial,
                             certified_min_entropy_bits=analysis.certified_min_entropy_bits)
    return withhold(analysis, screens), screens


def input_problems_of(scan: LogScan) -> list[str]:
    """Input identity problems of a multi-file log (:func:`dicert.logs.input_identity_problems`)."""
    from dicert.logs import input_identity_problems

    if len(scan.file_entries) < 2:
        return []
    return input_identity_problems([Path(str(e["name"])) for e in scan.file_entries],
                                   scan.formats if len(scan.formats) > 1 else None,
                                   [e.get("sha256") for e in scan.file_entries])


def _chain_seed_digests(chain_dir: Path) -> tuple[str, ...]:
    """Seed digests already used (seed bits consumed) by the records of a beacon chain."""
    import json

    out = []
    if not chain_dir.is_dir():
        return ()
    for p in sorted(chain_dir.glob("*.json")):
        try:
            rec = json.loads(p.read_bytes())
        except (OSError, ValueError):
            continue  # verify --chain reports unreadable pulses
        ex = rec.get("extractor") if isinstance(rec, dict) else None
        if isinstance(ex, dict) and isinstance(ex.get("seed_sha256"), str) \
                and (ex.get("seed_bits", ex.get("seed_bits_used")) or 0) > 0:  # /3-/4, /1-/2
            out.append(ex["seed_sha256"])
    return tuple(out)


def withhold(analysis: Analysis, screens: Mapping[str, Any] | None) -> Analysis:
    """The analysis with status "withheld" when the output screens failed grossly."""
    if screens is None or screens.get("passed", True) or analysis.status != "certified":
        return analysis
    return dataclasses.replace(
        analysis, status="withheld",
        abort_reason=f"output withheld: the output screens failed grossly "
                     f"({screens.get('failure')})")


def _not_run(protocol: Protocol, reason: str) -> Any:
    """A finite-size result standing for a method that was not run (design check failed)."""
    from dicert.finite.result import FiniteSizeResult

    name = getattr(protocol.analysis, "method_name", None) or str(protocol.method)
    return FiniteSizeResult(method=str(name),
                            side_information="quantum" if protocol.method == "eat"
                            else "classical", accepted=False, certified_min_entropy_bits=0.0, eps={},
                            details={"not_run": reason})


def join_report_of(scan: LogScan) -> Any:
    """The station-join report of a scan read through a log spec (None without a join)."""
    from dicert.logspec._charge import join_of

    return join_of(scan.log_spec)


def join_charge_for(join: Any, protocol: Protocol, source: Any = "log spec") -> Any:
    """The :class:`dicert.logspec.JoinCharge` of a join report under a protocol: None without
    a join or when the spec tolerates no missing trial (nothing can have been dropped)."""
    from dicert.logspec._charge import charge_of

    return charge_of(join, protocol.harvest.bits_per_trial, method=protocol.method,
                     source=source)


def charged_for(join: Any, counts: np.ndarray, protocol: Protocol, eps_est: float,
                source: Any) -> tuple[Any, np.ndarray, Any]:
    """(charge, counts to analyse, uncharged estimate) for a station-join report.

    When the log spec tolerates missing trials they are charged (:mod:`dicert.logspec._charge`):
    the estimate and the finite-size method run on the counts with every dropped trial counted
    as a lost test round, and :func:`analyse_counts` subtracts the dropped raw bits and the
    drop-pattern bits from the certified min-entropy; method pef refuses a join that dropped
    trials. The design checks stay on the trials read. Without a charge: (None, counts, None).
    """
    charge = join_charge_for(join, protocol, source)
    if charge is None:
        return None, counts, None
    from dicert.estimate import estimate_chsh
    from dicert.logspec._charge import charged_counts

    uncharged = estimate_chsh(counts, design=protocol.design, eps=eps_est)
    return charge, charged_counts(counts, charge.lost_test_rounds_charged), uncharged


def analyse_counts(counts: np.ndarray, protocol: Protocol, raw_bits: int, *,
                   finite: Any = None, log_end: str | None = None,
                   design: Any = None, join: Any = None, source: Any = "log spec") -> Analysis:
    """Design checks, estimate, finite-size bound, accept/abort and output length.

    Deterministic in its inputs, so :func:`dicert.verification.verify` re-derives it from a record.
    ``finite`` supplies the result of a streaming method (pef), which depends on the trial
    order and not only on the counts. ``log_end`` (see :func:`log_end_note`) is appended to the
    abort reason. ``design`` is the :class:`dicert.design.DesignReport` of the log (default:
    the checks the counts alone allow); when a check fails the run aborts with that reason and
    no finite-size method is run (a streaming pef result is kept, but not used). ``join``, the
    station-join report (``log.spec.join``), is charged as :func:`charged_for` says.
    """
    from dicert.design import check_design
    from dicert.estimate import estimate_chsh
    from dicert.extract import lhl_output_length, seed_bits_required

    counts = np.asarray(counts, dtype=np.int64)
    eps_est = _estimate_eps(protocol)
    if design is None:
        design = check_design(counts, protocol, eps=eps_est)
    charge, counts, uncharged = charged_for(join, counts, protocol, eps_est, source)
    estimate = estimate_chsh(counts, design=protocol.design, eps=eps_est)
    if not design.passed:
        if finite is None:
            finite = _not_run(protocol, "the finite-size method was not run: " +
                              str(design.abort_reason))
        reason = str(design.abort_reason)
        det = finite.details if isinstance(finite.details, Mapping) else {}
        if not finite.accepted and "not_run" not in det:
            why = det.get("abort_reason") or det.get("outcome")
            if why:  # a streaming method (pef) aborted too: give its reason first
                reason = f"the acceptance test of the protocol failed: {why}; also {reason}"
        if log_end:
            reason = f"{reason} ({log_end})"
        return Analysis(estimate=estimate, finite=finite, status="aborted",
                        abort_reason=reason, certified_min_entropy_bits=0.0, output_bits=0,
                        seed_bits_needed=0,
                        total_error=float(finite.total_error(protocol.extractor.eps_ext)),
                        design=design, charge=charge, uncharged_estimate=uncharged)
    if finite is None:
        finite = _certify_counts(counts, protocol)
    eps_ext = protocol.extractor.eps_ext
    k = float(finite.certified_min_entropy_bits) if finite.accepted else 0.0
    if not math.isfinite(k) or k < 0:
        k = 0.0
    if charge is not None:  # the dropped raw bits and the drop pattern (never below 0)
        k = max(0.0, k - charge.total_bits)
    total_error = float(finite.total_error(eps_ext))
    m = int(lhl_output_length(k, eps_ext)) if finite.accepted else 0
    m = max(0, min(m, raw_bits))
    if not finite.accepted:
        status, reason = "aborted", "the acceptance test of the protocol failed"
        det = finite.details if isinstance(finite.details, Mapping) else {}
        why = det.get("abort_reason") or det.get("outcome")
        if why:
            reason = f"{reason}: {why}"
    elif m <= 0:
        status = "aborted"
        after = "" if charge is None else (
            f" after the station-join charge of {charge.total_bits:.6g} bits for "
            f"{charge.dropped_trials} dropped trials and the drop pattern")
        reason = (f"accepted, but the certified min-entropy ({k:.6g} bits{after}) leaves no "
                  f"output at eps_ext = {eps_ext:g}")
    else:
        status, reason = "certified", None
    if reason is not None and log_end:
        reason = f"{reason} ({log_end})"
    need = int(seed_bits_required(raw_bits, m)) if m > 0 else 0
    return Analysis(estimate=estimate, finite=finite, status=status, abort_reason=reason,
                    certified_min_entropy_bits=k, output_bits=m if status == "certified" else 0,
                    seed_bits_needed=need if status == "certified" else 0,
                    total_error=total_error, design=design, charge=charge,
                    uncharged_estimate=uncharged)


def _certify_counts(counts: np.ndarray, protocol: Protocol) -> Any:
    """The finite-size method of the protocol (dicert.finite's dispatcher)."""
    from dicert import finite

    try:
        return finite.certify_counts(counts, protocol)
    except (ValueError, TypeError) as exc:
        if isinstance(exc, DicertError):
            raise
        raise ParameterError(f"finite-size analysis: {' '.join(str(exc).split())}") from None


def _estimate_eps(protocol: Protocol) -> float:
    for name in ("eps_est", "eps_EA", "eps_ea", "eps_PE", "eps_pe"):
        v = getattr(protocol.analysis, name, None)
        if isinstance(v, (int, float)) and 0 < v < 1:
            return float(v)
    return 1e-6


def check_seed_length(seed: bytes, label: str, raw_bits: int, output_bits: int) -> int:
    """Raise SeedError unless ``seed`` holds the n + m - 1 bits the Toeplitz extractor needs."""
    from dicert.extract import seed_bits_required

    need_bits = int(seed_bits_required(raw_bits, output_bits))
    need_bytes = (need_bits + 7) // 8
    if len(seed) < need_bytes:
        raise SeedError(
            f"{label}: seed too short: {len(seed)} bytes given, {need_bytes} bytes needed "
            f"({need_bits} bits = {raw_bits} raw bits + {output_bits} output bits - 1)"
        )
    return need_bits
