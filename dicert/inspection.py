"""Inspecting a log from Python: one streaming pass, the CHSH estimate, the design checks.

:func:`inspect_log` is the library form of ``dicert inspect``: it reads the log once
(:func:`dicert.logs.summarize_log`), settles the settings design the same way (the protocol's,
else ``gamma``, else the observed fraction of test rounds, labelled), refuses the same
inconsistent inputs with the same messages, and returns a :class:`LogInspection`.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable, Iterable
from typing import Any

from dicert._display import displayed


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LogInspection:
    """What :func:`inspect_log` found.

    Attributes
    ----------
    log : LogSummary
        Counts (also per block and per consecutive settings pair), digest, files.
    estimate : ChshEstimate
        CHSH value, its lower confidence bound valid with memory, p-value of local realism.
    design : SettingsDesign
        The design the bound assumes; ``design_source`` says where it came from.
    design_report : DesignReport
        Every design-conformance check of the log against that design.
    charge : JoinCharge or None
        For a station join whose spec tolerates missing trials (``join.max_missing`` > 0):
        what certify charges for them (:mod:`dicert.logspec._charge`; raw bits per dropped
        trial from the protocol's harvest, else 2, the most a trial holds).
    charged_estimate : ChshEstimate or None
        With ``charge``: the estimate with every dropped trial counted as a lost test round
        (what certify uses); ``estimate`` is that of the trials read (uncharged).
    """

    log: Any
    estimate: Any
    design: Any
    design_source: str
    design_report: Any
    charge: Any = None
    charged_estimate: Any = None

    @property
    def trials(self) -> int:
        return int(self.log.trials)

    @property
    def chsh_estimate(self) -> float:
        """The weighted (martingale) CHSH estimate."""
        return float(self.estimate.chsh_estimate)

    @property
    def chsh_lower_bound(self) -> float:
        """Its lower confidence bound at error ``eps_est``."""
        return float(self.estimate.chsh_lower_bound)

    # Names of earlier versions (read-only): ``chsh`` was the ratio estimate.
    chsh = property(lambda self: float(self.estimate.chsh_ratio_estimate))
    chsh_lower = property(lambda self: self.chsh_lower_bound)

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("trials", self.trials), ("chsh_estimate", self.chsh_estimate),
                ("chsh_lower_bound", self.chsh_lower_bound),
                ("eps_est", self.estimate.eps_est), ("design_passed", self.design_report.passed)]
        if full:
            rows += [("test_rounds", self.estimate.test_rounds),
                     ("chsh_ratio_estimate", self.estimate.chsh_ratio_estimate),
                     ("gamma", self.design.gamma),
                     ("gamma_source", self.design_source),
                     ("p_value_local", self.estimate.p_value_local),
                     ("sha256", self.log.sha256)]
            rows += [(f"check: {c.name}", "pass" if c.passed else "FAIL")
                     for c in self.design_report.checks]
        return rows


def inspect_log(log: str | os.PathLike[str] | Iterable[Any], *, protocol: Any = None,
                gamma: float | None = None, eps: float = 1e-6, block_trials: int = 1 << 20,
                format: str | None = None,
                progress: Callable[[int, int], object] | None = None) -> LogInspection:
    """Read a trial log (streaming) and estimate the CHSH value and its lower bound.

    Parameters
    ----------
    log : path, directory, glob pattern or list of files
        The trial log.
    protocol : Protocol, path or mapping, optional
        Use its declared design and run its design-conformance checks.
    gamma : float, optional
        Test-round probability of the design when no protocol is given. Default: the
        observed fraction of test rounds of a log with a t column (labelled as observed: the
        bound is then indicative only), else 1.
    eps : float
        Error probability of the lower bound on S.
    block_trials : int
        Trials per block of the per-block counts (drift diagnostics).
    format : str, optional
        Force the input format (csv, binary, npz).

    Raises
    ------
    ParameterError
        ``gamma`` disagrees with the protocol, or the design contradicts the log's t column.
    LogFormatError, ProtocolError
        Unreadable log or protocol (the message names the file and line or key).
    """
    from dicert.logs import summarize_log

    proto = _protocol_for(protocol, gamma)
    summary = summarize_log(log, block_trials=block_trials, format=format, progress=progress)
    return inspect_summary(summary, protocol=proto, gamma=gamma, eps=eps, source=log)


def _protocol_for(protocol: Any, gamma: float | None) -> Any:
    """The protocol (loaded), refusing a ``gamma`` that disagrees with it."""
    if protocol is None:
        return None
    from dicert.errors import ParameterError
    from dicert.protocol import load_protocol

    proto = load_protocol(protocol)
    if gamma is not None and gamma != proto.gamma:
        raise ParameterError(f"--gamma {gamma:g} disagrees with the protocol's settings.gamma "
                             f"= {proto.gamma:g}; give one of them")
    return proto


def inspect_summary(summary: Any, *, protocol: Any = None, gamma: float | None = None,
                    eps: float = 1e-6, source: Any = "log") -> LogInspection:
    """The analysis half of :func:`inspect_log`, on a :class:`~dicert.logs.LogSummary`
    already read (``dicert inspect`` reads it with a progress bar or on a cluster).
    ``source`` names the log in error messages."""
    from types import SimpleNamespace

    from dicert.design import check_design
    from dicert.errors import ParameterError
    from dicert.estimate import SettingsDesign, estimate_chsh, observed_design

    proto = _protocol_for(protocol, gamma)
    if proto is not None:
        design, how = proto.design, "declared in the protocol"
    elif gamma is not None:
        design, how = SettingsDesign(gamma=gamma), "given with --gamma"
    elif summary.has_test_flag:
        design, how = observed_design(summary.counts), (
            "OBSERVED fraction of test rounds (not pre-declared: the bound is indicative only)")
    else:
        design, how = SettingsDesign(), "every round a test round (the log has no t column)"
    if design.gamma < 1.0 and not summary.has_test_flag:
        raise ParameterError(f"{source}: gamma = {design.gamma:g} < 1 needs a log with a t "
                             "column marking test rounds; this log has none (every trial is a "
                             "test round)")
    if design.gamma >= 1.0 and int(summary.counts[0].sum()):
        raise ParameterError(f"{source}: gamma = 1 declares every round a test round, but the "
                             f"log marks {int(summary.counts[0].sum())} trials as generation "
                             "rounds")
    like = proto if proto is not None else SimpleNamespace(
        design=design, analysis=None, method=None, conformance=None)
    report = check_design(summary.counts, like, block_counts=summary.block_counts,
                          pair_counts=summary.pair_counts, eps=eps)
    est = estimate_chsh(summary.counts, design, eps=eps)
    charge, charged = _join_charge(summary, proto, design, eps, source)
    return LogInspection(log=summary, estimate=est, design=design, design_source=how,
                         design_report=report, charge=charge, charged_estimate=charged)


def _join_charge(summary: Any, proto: Any, design: Any, eps: float,
                 source: Any) -> tuple[Any, Any]:
    """The station-join charge of a log read through a log spec and the charged estimate
    (None, None without a join that may drop trials)."""
    from dicert.logspec._charge import charge_for_log

    bits = proto.harvest.bits_per_trial if proto is not None else 2
    # descriptive: method pef is not refused here (certify refuses it)
    charge, counts = charge_for_log(getattr(summary, "log_spec", None), summary.counts, bits,
                                    source=source)
    if charge is None:
        return None, None
    from dicert.estimate import estimate_chsh

    return charge, estimate_chsh(counts, design, eps=eps)


__all__ = ["LogInspection", "inspect_log", "inspect_summary"]
