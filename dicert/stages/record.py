"""Stage 5, sealing: the record body (:func:`build_body`, re-built by verify to compare),
the assumptions and caution every record carries, and the timestamp helper.

Part of the certify and verify recipes (:mod:`dicert.certification`,
:mod:`dicert.verification`).
"""

from __future__ import annotations

import datetime as _dt
import math
from collections.abc import Mapping
from typing import TYPE_CHECKING, Any

import numpy as np

from dicert import __version__
from dicert._plain import plain
from dicert.stages.analysis import Analysis, _estimate_eps
from dicert.stages import record_compat as _compat
from dicert.stages.scan import Clock, LogScan

if TYPE_CHECKING:
    from dicert.protocol import Protocol

ASSUMPTIONS = (
    ("No communication between the two stations during a trial (locality / no signalling "
    "between the measurement devices within each round)."),
    ("Measurement settings are chosen independently of the devices and of any adversary, "
    "with the distribution declared in the protocol, and the round type and settings of each "
    "round stay unknown to the devices until that round (the design section of the record "
    "lists what was checked on the data; the rest is assumed)."),
    ("The classical processing (logging, this software, the machine running it) is trusted "
    "and the log faithfully records the settings and outcomes of every trial in order."),
    "The extractor seed is uniformly random and independent of the devices and the raw bits.",
    ("The acceptance threshold and every error parameter were fixed in the protocol before "
    "the data were taken."),
)

CAUTION = (
    "Certificates hold only under the stated assumptions, including the side-information "
    "model of the method. For production use, defer to applicable standards and accredited "
    "review."
)

HARVEST_ORDER = _compat.HARVEST_ORDER

# --------------------------------------------------------------------------- record body


def _single_round(estimate: Any) -> dict:
    from dicert.entropy.analytic import min_entropy_single, vn_entropy_single

    out: dict[str, Any] = {
        "note": _compat.SINGLE_ROUND_NOTE,
        "bound_min_entropy": "f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) (Pironio et al. 2010)",
        "bound_von_neumann": "1 - h(1/2 + 1/2 sqrt(S^2/4 - 1)) (Pironio et al. 2009)",
    }
    for attr, label in (("chsh_estimate", "chsh_estimate"),
                        ("chsh_ratio_estimate", "chsh_ratio_estimate"),
                        ("chsh_lower_bound", "chsh_lower_bound")):
        s = getattr(estimate, attr, None)
        if s is None or not math.isfinite(float(s)):
            continue
        out[f"single_round_bound_bits_at_{label}"] = float(min_entropy_single(float(s)))
        out[f"von_neumann_bound_bits_at_{label}"] = float(vn_entropy_single(float(s)))
    return out


def _estimate_section(estimate: Any) -> dict:
    """The CHSH estimate; its field names are the record's (the README glossary's)."""
    return plain(estimate)


def _split_timing(details: Any) -> tuple[Any, float | None]:
    """Move the PEF solver's wall-clock time out of the details (it belongs in ``volatile``)."""
    if not isinstance(details, dict):
        return details, None
    pef = details.get("pef")
    if isinstance(pef, dict) and isinstance(pef.get("solver"), dict) and "seconds" in pef["solver"]:
        solver = {k: v for k, v in pef["solver"].items() if k != "seconds"}
        return {**details, "pef": {**pef, "solver": solver}}, pef["solver"]["seconds"]
    return details, None


def build_body(*, protocol: Protocol, scan: LogScan, analysis: Analysis, seed_sha256: str,
               seed_bytes: int, extraction: Any | None, chain_info: tuple[int, str | None] | None,
               volatile: dict, inputs: dict | None = None, screens: dict | None = None) -> dict:
    """The record body (everything the audit layer then digests and signs)."""
    from dicert.audit.record import RECORD_FORMAT

    fin = analysis.finite
    details, solver_seconds = _split_timing(plain(fin.details))
    if solver_seconds is not None and isinstance(volatile, dict):
        volatile = {**volatile, "timings_s": {**volatile.get("timings_s", {}),
                                              "pef_solver": solver_seconds}}
    published = analysis.status == "certified"
    body: dict[str, Any] = {
        "format": RECORD_FORMAT,
        "kind": "certification",
        "tool": {"name": "dicert", "version": __version__},
        "protocol": {
            "name": protocol.name,
            "sha256": protocol.sha256,
            "content": protocol.text,
            "method": protocol.method,
        },
        "log": _log_section(scan),
        "counts": {
            "layout": "counts[t][x][y][a][b]; logs without a t column count every trial as t = 1",
            "values": scan.counts.astype(np.int64).tolist(),
        },
        "estimate": _estimate_section(analysis.estimate),
        "entropy": {
            "single_round": _single_round(analysis.estimate),
            "finite_size": _finite_section(fin, details),
        },
        "harvest": {
            "parties": protocol.harvest.parties,
            "select": protocol.harvest.select,
            "order": HARVEST_ORDER,
            "raw_bits": int(scan.raw_bits),
            "raw_sha256": scan.raw_sha256,
        },
        "error_budget": _error_budget(protocol, analysis),
        "extractor": _extractor_section(protocol, scan, analysis, seed_sha256, seed_bytes,
                                        extraction),
        "status": analysis.status,
        "abort_reason": analysis.abort_reason,
        "certified_min_entropy_bits": analysis.certified_min_entropy_bits if published else 0.0,
        "soundness_error": analysis.total_error,
        "assumptions": _assumptions(fin, scan, analysis),
        "caution": CAUTION,
        "references": [str(r) for r in fin.references],
        "pulse_index": chain_info[0] if chain_info else None,
        "previous_record_sha256": chain_info[1] if chain_info else None,
        "volatile": volatile,
    }
    if analysis.design is not None:
        body["design"] = _design_section(analysis, scan)
    body["inputs"] = inputs if inputs is not None else {
        "allow_mixed_inputs": False, "input_problems": [],
        "allow_seed_reuse": False, "seed_problems": []}
    if screens is not None:
        body["output_screens"] = screens
    if scan.log_spec is not None:  # a log read through a log spec (dicert.logspec)
        body["log"]["spec"] = _spec_section(scan.log_spec, analysis, scan.counts)
    if scan.block_series is not None:
        section = _blocks_section(scan.block_series, protocol)
        if section is not None:
            body["estimate_blocks"] = section
    return plain(body)


def _log_section(scan: LogScan) -> dict:
    """Which bytes of which files the record certifies (see *Log scope* in certification)."""
    return {
        "sha256": scan.sha256,
        "size_bytes": int(scan.size_bytes),
        "trials": int(scan.trials),
        "files": ([dict(e) for e in scan.file_entries] if scan.file_entries
                  else list(scan.files)),
        "trials_in_log": int(scan.trials_in_log if scan.trials_in_log is not None
                             else scan.trials),
        "has_test_flag": bool(scan.has_test_flag),
        "coverage": scan.scope,
        "bytes_read": int(scan.bytes_read if scan.bytes_read is not None
                          else scan.size_bytes),
        "trials_read": int(scan.trials_read if scan.trials_read is not None
                           else scan.trials),
        "stopped_early": bool(scan.stopped_early),
        "stop_trial_index": scan.stop_trial_index,
        "ended_by": scan.ended_by,
        "follow": scan.follow,
    }


def _finite_section(fin: Any, details: Any) -> dict:
    """The finite-size result as recorded."""
    return {
        "method": str(fin.method),
        "side_information": str(fin.side_information),
        "accepted": bool(fin.accepted),
        "certified_min_entropy_bits": float(fin.certified_min_entropy_bits),
        "smoothing_eps": float(fin.smoothing_eps),
        "entropy_error": float(fin.entropy_error),
        "error_parameters": {str(k): float(v) for k, v in dict(fin.eps).items()},
        "assumptions": [str(a) for a in fin.assumptions],
        "references": [str(r) for r in fin.references],
        "details": details,
    }


def _error_budget(protocol: Protocol, analysis: Analysis) -> dict:
    """Every term of the soundness error, named by its protocol key; they sum to the total."""
    fin = analysis.finite
    return _compat.error_budget({str(k): float(v) for k, v in dict(fin.eps).items()},
                                float(fin.smoothing_eps), float(protocol.extractor.eps_ext),
                                analysis.total_error)


def _extractor_section(protocol: Protocol, scan: LogScan, analysis: Analysis,
                       seed_sha256: str, seed_bytes: int, extraction: Any | None) -> dict:
    """The extractor, its seed and input and output digests."""
    return {
        "kind": protocol.extractor.kind,
        "output_rule": protocol.extractor.output_rule,
        "eps_ext": float(protocol.extractor.eps_ext),
        "seed_sha256": seed_sha256,
        "seed_bytes": int(seed_bytes),
        "seed_bits": int(extraction.seed_bits) if extraction is not None else 0,
        "raw_sha256": scan.raw_sha256,
        "raw_bits": int(scan.raw_bits),
        "output_bits": int(analysis.output_bits),
        "output_sha256": extraction.output_sha256 if extraction is not None else None,
        "method": getattr(extraction, "method", None) if extraction is not None else None,
        "convention": _extractor_convention(),
    }


def _spec_section(log_spec: Mapping, analysis: Analysis, counts: Any = None) -> dict:
    """The record's ``log.spec``: the spec, its digest and the join report, which carries the
    charge for dropped trials (``join.charge``, always re-derived from the report's counts)."""
    spec = dict(log_spec)
    join = spec.get("join")
    if isinstance(join, Mapping):
        join = {k: v for k, v in join.items() if k != "charge"}
        if analysis.charge is not None:
            join["charge"] = _charge_section(analysis, counts)
        spec["join"] = join
    return spec


def _charge_section(analysis: Analysis, counts: Any = None) -> dict:
    """``log.spec.join.charge``: what the dropped trials cost, with the uncharged and the
    charged estimate (the record's ``estimate`` is the charged one)."""
    sec = analysis.charge.to_dict()
    if analysis.uncharged_estimate is not None:
        sec["uncharged_estimate"] = _estimate_section(analysis.uncharged_estimate)
    if counts is not None:
        from dicert.logspec._charge import charged_counts

        sec["note"] = ("the record's estimate, entropy and certified_min_entropy_bits come from "
                       "charged_counts (counts.values plus the lost test rounds charged), less "
                       "total_bits; counts.values and uncharged_estimate are the trials the join "
                       "kept")
        sec["charged_counts"] = charged_counts(
            counts, analysis.charge.lost_test_rounds_charged).tolist()
    return sec


def _assumptions(fin: Any, scan: LogScan, analysis: Analysis | None = None) -> list[str]:
    """The general assumptions, the method's side-information model, the method's own, and
    what a station join that may drop trials adds (charged, not assumed)."""
    assumptions = list(ASSUMPTIONS)
    assumptions.append(f"Side-information model of the method ({fin.method}): "
                       f"{fin.side_information} side information held by the adversary.")
    for a in fin.assumptions:
        if a not in assumptions:
            assumptions.append(str(a))
    charge = analysis.charge if analysis is not None else None
    join = _join(scan)
    dropped = int(join.get("missing_at_a") or 0) + int(join.get("missing_at_b") or 0)
    if charge is not None:
        assumptions.append(
            f"Trials dropped by the station join ({charge.dropped_trials}, at most "
            f"{charge.max_missing} tolerated by the log spec's join.max_missing): checked / "
            "charged, not assumed independent of the settings and outcomes: each counted as "
            f"a lost test round ({charge.lost_test_rounds_charged} charged) in the estimate "
            f"and the acceptance test, and {charge.raw_bits_subtracted} raw bits of dropped "
            f"trials plus {charge.pattern_bits:.6g} bits for the drop pattern (which trials, "
            f"at which station{' or at both' if charge.keys else ''}: chosen by the "
            "adversary) subtracted from the certified "
            "min-entropy (log.spec.join.charge). " + _both_sentence(charge.keys,
                                                                   charge.missing_at_both,
                                                                   join.get("key_range")))
    elif join.get("keys"):
        assumptions.append(_both_sentence(join["keys"], int(join.get("missing_at_both") or 0),
                                          join.get("key_range")))
    elif dropped:  # a record from before the join charge (format /3 or older)
        assumptions.append(LEGACY_DROP_ASSUMPTION.format(dropped=dropped))
    return assumptions


#: What a record from before the station-join charge (dicert-record/3) assumed instead.
LEGACY_DROP_ASSUMPTION = (
    "Trials dropped by the station join ({dropped}, tolerated by the log spec's "
    "join.max_missing) went missing independently of the settings and outcomes: "
    "NOT checked, and nothing is charged for them; if the devices or the stations' "
    "electronics can cause a trial to go missing, the certificate does not hold.")


def _both_sentence(keys: Any, both: int, key_range: Any = None) -> str:
    """What the record says about trials missing at both stations."""
    if keys == "consecutive":
        first, last = (list(key_range) + [None, None])[:2] if isinstance(
            key_range, (list, tuple)) else (None, None)
        ends = []
        if first is None:
            ends.append("before the first key recorded")
        if last is None:
            ends.append("after the last key recorded")
        rest = (" Trials " + " or ".join(ends) + " (no join.first_key / join.last_key "
                "declared) would leave no gap: that none is missing there stays assumed."
                if ends else "")
        return ("Trials missing at both stations: checked, the log spec declares the join keys "
                "consecutive integers (join.keys), so every key missing inside the range "
                f"({'first key recorded' if first is None else first} to "
                f"{'last key recorded' if last is None else last}) is a visible gap "
                f"({both} found, log.spec.join.missing_at_both), counted against "
                "join.max_missing and charged like a trial missing at one station." + rest)
    return ("A trial missing at both stations leaves no row for the join to see (the log spec "
            "declares no consecutive keys, join.keys): that every trial is logged stays "
            "assumed (above), not checked.")


def _join(scan: LogScan) -> Mapping:
    """The scan's station-join report (empty without one)."""
    from dicert.logspec._charge import join_of

    join = join_of(scan.log_spec)
    return join if isinstance(join, Mapping) else {}


def _blocks_section(block_series: Any, protocol: Protocol) -> dict | None:
    """The record's per-block CHSH series (informational, drawn by reports and beacon pages)."""
    from dicert.estimate import azuma_margin, martingale_chsh

    firsts, counts = block_series
    if not len(firsts):
        return None
    eps = _estimate_eps(protocol)
    design = protocol.design
    blocks = []
    for first, row in zip(firsts, np.asarray(counts, dtype=np.int64)):
        n = int(row.sum())
        if n == 0:
            continue
        value = martingale_chsh(row.reshape(2, 2, 2, 2, 2), design)
        margin = azuma_margin(n, design.estimator_width, eps)
        blocks.append({"first_trial": int(first), "trials": n, "counts": row.tolist(),
                       "chsh_estimate": value, "chsh_lower_bound": value - margin,
                       "chsh_upper_bound": value + margin})
    return {"note": "martingale CHSH estimate per group of consecutive trials with its "
                    "two-sided Azuma-Hoeffding interval at eps_per_side (each group on its "
                    "own; informational: drift shows here, certification uses the whole log)",
            "eps_per_side": eps, "counts_order": "[t, x, y, a, b] flattened",
            "blocks": blocks}


def _design_section(analysis: Analysis, scan: LogScan) -> dict:
    """The design checks and the settings statistics they were run on."""
    sec = analysis.design.to_dict()
    sec["inputs"] = {
        "symbol": "settings symbol s = 4 t + 2 x + y (t = 0 for every trial of a log "
                  "without a t column in pair_counts)",
        "pair_counts": (np.asarray(scan.pair_counts, dtype=np.int64).tolist()
                        if scan.pair_counts is not None else None),
        "block_settings_counts": (np.asarray(scan.block_settings, dtype=np.int64).tolist()
                                  if scan.block_settings is not None else None),
    }
    return sec


def _now(clock: Clock | None) -> str:
    t = clock() if clock is not None else _dt.datetime.now(_dt.UTC)
    if isinstance(t, str):
        return t
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.UTC)
    return t.astimezone(_dt.UTC).isoformat().replace("+00:00", "Z")


def _extractor_convention() -> str:
    from dicert.extract import CONVENTION

    return CONVENTION
