"""What trials dropped by the station join cost: the charge (estimate and entropy).

Part of :mod:`dicert.logspec` (import the names from there).

A log spec's ``[join] max_missing = N`` lets up to N trials present at only one station be
dropped. Nothing about *why* a trial went missing can be checked on the data, and an
adversary who chooses which trials go missing (dropping the losing ones) makes local devices
pass a Bell test. So dropped trials are charged, never assumed harmless:

1. **Estimate.** Every dropped trial is counted as a test round (t = 1) that was LOST in the
   CHSH game (a XOR b != x AND y). Its martingale-estimator term is -4/gamma, the smallest
   value a term can take, so the charged statistic never exceeds the statistic of the run
   whatever the dropped trials' settings and outcomes were; for the win/loss counts of entropy
   accumulation a lost test round is likewise the worst case (one more loss, no more wins).
   Why this is sound: complete each dropped trial by giving the missing station a fixed
   outcome (a local assignment, so the completed run is a run of legitimate two-outcome
   devices, of n + d trials). Its statistic is at least the charged one, so the event "the
   charged test accepts" lies inside "the completed run's test accepts", and the finite-size
   guarantees (stated for the event of acceptance, or for any event implying it) carry over;
   the kept raw bits are a part of the completed run's raw bits (point 2).
   The charged rounds are put on the four test settings pairs in turn, (0,0), (0,1), (1,0),
   (1,1), (0,0), ... with the losing outcomes (0,1) for x y = 0 and (0,0) for x = y = 1
   (:func:`charged_counts`); the finite-size method then runs on the charged counts.
2. **Entropy, dropped raw bits.** The raw string of the kept trials is the whole string with
   the dropped trials' bits removed; removing a register of b bits lowers the smooth
   min-entropy by at most b bits: H_min^eps(X_kept|E) >= H_min^eps(X_all|E) - |X_dropped|.
3. **Entropy, the drop pattern.** The adversary may choose which trials go missing, and at
   which station, so the pattern P is side information it may hold; conditioning on a
   classical register costs at most log2 of the number of values it can take:
   H_min^eps(X|E P) >= H_min^eps(X|E) - log2 |P|. With n matched trials and at most N
   dropped, the charged analysis runs on T = n + d trials (d <= N dropped); a pattern is a
   set of j <= N of the T trials with, for each, the station that lost it:
   |P| <= sum_{j<=N} C(T, j) 2^j <= sum_{j<=N} C(n + N, j) 2^j (:func:`pattern_count`). The
   last sum also covers a run whose trial count is not fixed (j trials dropped around the n
   matched ones: C(n + j, j) <= C(n + N, j)) and exceeds the count for T = n + d, or for n
   matched, by less than one bit (its largest terms are the same). It is charged whenever
   N > 0, also when nothing was dropped (the empty pattern is one the adversary chose). It is
   computed exactly with integers and rounded UP to a float (:func:`pattern_bits`); for N
   above :data:`EXACT_PATTERN_LIMIT` the bound log2(N + 1) + max_j log2(C(n + N, j) 2^j) is
   evaluated with lgamma and a safety margin, again rounded up.

4. **Trials missing at both stations.** Without a declaration such a trial leaves no row and
   is invisible: that every trial is logged is only assumed. With ``[join] keys =
   "consecutive"`` (optionally ``first_key``, ``last_key``) a key inside the range that no
   station recorded is a gap: it counts against ``max_missing`` like a one-sided drop and is
   charged exactly like one (a lost test round, its raw bits subtracted: the completed run
   gives both stations a fixed outcome, still a local assignment). The pattern now has
   three values per dropped trial (missing at A, at B, or at both), so with n matched trials
   and at most N missing: |P| <= sum_{j<=N} C(n + N, j) 3^j (the same argument as in 3,
   with 3 choices in place of 2; checked by enumeration for tiny n in the tests).

A probability-estimation (``pef``) analysis multiplies trial-wise factors in log order and
has no worst-case stand-in for a trial that is not there: it refuses a join that dropped
trials (:func:`join_charge` with ``method = "pef"``).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from dicert.errors import ParameterError

#: Up to this max_missing the pattern count is summed exactly with integers.
EXACT_PATTERN_LIMIT = 20000

#: The losing outcome (a, b) used for a charged round at settings (x, y) (a XOR b != x AND y).
LOSING_OUTCOME = {(0, 0): (0, 1), (0, 1): (0, 1), (1, 0): (0, 1), (1, 1): (0, 0)}
#: The order in which charged rounds are put on the test settings pairs.
CHARGE_SETTINGS = ((0, 0), (0, 1), (1, 0), (1, 1))

CHARGE_METHOD = (
    "each dropped trial is counted as a lost test round (t = 1, a XOR b != x AND y; settings "
    "pairs (0,0), (0,1), (1,0), (1,1) in turn): the smallest martingale-estimator term and one "
    "more CHSH-game loss, so the acceptance test and the CHSH lower bound can only get worse "
    "(they are at most those of the run completed by a fixed outcome at the missing station, "
    "a local assignment); the finite-size method runs on these charged counts. From its certified min-entropy are "
    "subtracted the raw bits of the dropped trials (bits per trial x dropped trials; "
    "H_min^eps(X_kept|E) >= H_min^eps(X_all|E) - |X_dropped|) and the drop pattern, side "
    "information the adversary may choose: log2 sum_{j<=N} C(n+N, j) 2^j bits for n matched "
    "trials and N = max_missing (which trials, and at which station, among at most n + N; "
    "H_min^eps(X|E P) >= "
    "H_min^eps(X|E) - log2|P| for a classical P), rounded up")

CHARGE_METHOD_GAPS = (
    "the join keys are declared consecutive integers (join.keys), so each key inside the "
    "range that no station recorded is a trial missing at both stations: counted in "
    "missing_at_both and dropped_trials, charged as a lost test round with its raw bits, and "
    "the drop pattern has three values per dropped trial (missing at A, at B, at both): "
    "log2 sum_{j<=N} C(n+N, j) 3^j bits, rounded up")

CHARGE_REFERENCES = (
    "A. Vitanov, F. Dupuis, M. Tomamichel, R. Renner, IEEE Trans. Inf. Theory 59, 2603 (2013) "
    "(chain rules for smooth min-entropy; the section is from memory)",
    "M. Tomamichel, Quantum Information Processing with Finite Resources, Springer (2016) "
    "(smooth min-entropy: removing a register of b bits, and conditioning on a classical "
    "register of |P| values, cost at most b and log2|P| bits; chapter 6, from memory)",
    "F. Dupuis, O. Fawzi, R. Renner, Commun. Math. Phys. 379, 867 (2020) (entropy "
    "accumulation holds for any event that implies the acceptance condition, so a stricter, "
    "charged acceptance test keeps the bound; from memory)",
    "S. Pironio et al., Nature 464, 1021 (2010), SI (martingale estimator, each term in "
    "[-4/gamma, 4/gamma])",
)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JoinCharge:
    """The charge for the trials a station join dropped (see the module docstring)."""

    dropped_trials: int
    missing_at_a: int
    missing_at_b: int
    max_missing: int
    matched_trials: int
    lost_test_rounds_charged: int
    bits_per_trial: int
    raw_bits_subtracted: int
    pattern_bits: float
    total_bits: float
    pattern_count_method: str
    #: with ``[join] keys = "consecutive"``: the declaration and the trials missing at both
    #: stations (already in ``dropped_trials``); both left out of :meth:`to_dict` without it
    keys: str | None = None
    missing_at_both: int = 0

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        if self.keys is None:
            del d["keys"], d["missing_at_both"]
        else:
            d["method_gaps"] = CHARGE_METHOD_GAPS
        d["method"] = CHARGE_METHOD
        d["references"] = list(CHARGE_REFERENCES)
        return d


def pattern_count(n: int, max_missing: int, choices: int = 2) -> int:
    """|P| bound sum_{j=0}^{N} C(n + N, j) c^j, exactly (n matched trials, N = max_missing,
    c = ``choices`` per dropped trial: 2 (missing at A or at B), 3 with consecutive keys
    declared (or at both))."""
    n, big_n = _nonneg(n, "matched trials"), _nonneg(max_missing, "max_missing")
    c = _choices(choices)
    m = n + big_n
    total = term = 1  # j = 0
    for j in range(big_n):
        term = term * c * (m - j) // (j + 1)  # C(m, j+1) c^(j+1), exact
        total += term
    return total


def pattern_bits(n: int, max_missing: int, choices: int = 2) -> tuple[float, str]:
    """log2 of :func:`pattern_count`, rounded UP, and how it was computed."""
    n, big_n = _nonneg(n, "matched trials"), _nonneg(max_missing, "max_missing")
    c = _choices(choices)
    if big_n == 0:
        return 0.0, "exact: no trial may be dropped (one pattern)"
    if big_n <= EXACT_PATTERN_LIMIT:
        return log2_up(pattern_count(n, big_n, c)), "exact integer sum, log2 rounded up"
    # at most N + 1 terms, each at most the largest; log C(m, j) c^j is unimodal in j with its
    # peak at j = floor((c m - 1) / (c + 1)) + 1 (the ratio of successive terms is
    # c (m - j) / (j + 1))
    m = n + big_n
    peak = min(big_n, (c * m - 1) // (c + 1) + 1)
    best = -math.inf
    for j in {max(0, peak - 1), peak, min(big_n, peak + 1)}:
        nats = math.lgamma(m + 1) - math.lgamma(j + 1) - math.lgamma(m - j + 1)
        scale = math.lgamma(m + 1) + math.lgamma(j + 1) + math.lgamma(m - j + 1)
        nats += 1e-12 * scale + 1e-9  # lgamma's rounding, taken up
        best = max(best, nats / math.log(2) * (1 + 1e-15) + j * math.log2(c) * (1 + 1e-15))
    bits = best + math.log2(big_n + 1) * (1 + 1e-15) + 1e-12
    bits = min(bits, m * math.log2(c + 1) * (1 + 1e-15) + 1e-12)  # the sum is < (c + 1)^m
    return _up(bits), (f"upper bound min(log2(N + 1) + max_j log2(C(n+N, j) {c}^j), (n+N) "
                       f"log2 {c + 1}) (lgamma with a margin), rounded up")


def _choices(c: Any) -> int:
    if isinstance(c, bool) or c not in (2, 3):
        raise ParameterError(f"station join: choices per dropped trial must be 2 or 3, got {c!r}")
    return int(c)


def log2_up(value: int) -> float:
    """A float >= log2(value) for a positive integer (exceeding it by less than 1e-13 relative)."""
    if value <= 0:
        raise ParameterError("log2 of a non-positive count")
    b = value.bit_length()
    shift = max(0, b - 60)
    m = value >> shift  # value < (m + 1) 2^shift
    exact = (m << shift) == value
    if value & (value - 1) == 0:  # a power of two: log2 is exact
        return float(b - 1)
    v = shift + math.log2(m if exact else m + 1)
    return _up(v * (1 + 1e-15) + 1e-15)


def _sum_up(a: int, b: float) -> float:
    """The smallest float >= a + b (exact rational comparison)."""
    from fractions import Fraction

    t = float(a) + b
    while Fraction(t) < Fraction(a) + Fraction(b):
        t = math.nextafter(t, math.inf)
    return t


def _up(v: float) -> float:
    for _ in range(4):
        v = math.nextafter(v, math.inf)
    return v


def _nonneg(v: Any, what: str) -> int:
    if isinstance(v, bool) or not isinstance(v, (int, np.integer)) or v < 0:
        raise ParameterError(f"station join: {what} must be a non-negative integer, got {v!r}")
    return int(v)


def charged_counts(counts: Any, lost: int) -> np.ndarray:
    """The counts [t, x, y, a, b] with ``lost`` lost test rounds added (module docstring)."""
    c = np.array(counts, dtype=np.int64, copy=True)
    lost = _nonneg(lost, "lost test rounds")
    for i, (x, y) in enumerate(CHARGE_SETTINGS):
        k = lost // 4 + (1 if i < lost % 4 else 0)
        if k:
            a, b = LOSING_OUTCOME[(x, y)]
            c[1, x, y, a, b] += k
    return c


def join_charge(join: Any, bits_per_trial: int, *, method: str | None = None,
                source: Any = "log spec") -> JoinCharge | None:
    """The charge for a join report (the record's ``log.spec.join``; None if there is none).

    ``method`` "pef" refuses a join that dropped trials (ParameterError, one line)."""
    if join is None:
        return None
    if not isinstance(join, Mapping):
        raise ParameterError(f"{source}: the station-join report is not an object")
    vals = {}
    for k in ("matched", "missing_at_a", "missing_at_b", "max_missing"):
        vals[k] = _nonneg(join.get(k), f"join.{k}")
    keys = join.get("keys")
    if keys is not None and keys != "consecutive":
        raise ParameterError(f"{source}: join.keys must be \"consecutive\" or absent, got "
                             f"{keys!r}")
    both = _nonneg(join.get("missing_at_both"), "join.missing_at_both") if keys else 0
    if not keys and "missing_at_both" in join:
        raise ParameterError(f"{source}: join.missing_at_both without join.keys = "
                             "\"consecutive\"")
    dropped = vals["missing_at_a"] + vals["missing_at_b"] + both
    if dropped > vals["max_missing"]:
        raise ParameterError(f"{source}: the station join dropped {dropped} trials, more than "
                             f"its join.max_missing = {vals['max_missing']}")
    if dropped and method == "pef":
        raise ParameterError(
            f"{source}: the station join dropped {dropped} trials; method 'pef' (probability "
            "estimation) multiplies trial-wise factors in log order and cannot charge a trial "
            "that is not there: supply a complete join (join.max_missing = 0) or use method "
            "'martingale' or 'eat', which charge each dropped trial as a lost test round")
    bpt = _nonneg(bits_per_trial, "bits per trial")
    pbits, how = pattern_bits(vals["matched"], vals["max_missing"], 3 if keys else 2)
    raw = dropped * bpt
    return JoinCharge(keys=keys, missing_at_both=both,
                      dropped_trials=dropped, missing_at_a=vals["missing_at_a"],
                      missing_at_b=vals["missing_at_b"], max_missing=vals["max_missing"],
                      matched_trials=vals["matched"], lost_test_rounds_charged=dropped,
                      bits_per_trial=bpt, raw_bits_subtracted=raw, pattern_bits=pbits,
                      total_bits=_sum_up(raw, pbits),
                      pattern_count_method=how)


def charge_of(join: Any, bits_per_trial: int, *, method: str | None = None,
              source: Any = "log spec") -> JoinCharge | None:
    """The :class:`JoinCharge` of a join report, or None when there is nothing to charge (no
    station join, or one that tolerates no missing trial and dropped none)."""
    charge = join_charge(join, bits_per_trial, method=method, source=source)
    if charge is None or (charge.max_missing == 0 and charge.dropped_trials == 0):
        return None
    return charge


def charge_for_log(log_spec: Any, counts: Any, bits_per_trial: int, *,
                   method: str | None = None, source: Any = "log spec") -> tuple[Any, Any]:
    """(charge, counts to analyse) for a log read through a log spec: (None, counts) unchanged
    when :func:`charge_of` finds nothing to charge; else the :class:`JoinCharge` and the
    counts with the dropped trials as lost test rounds."""
    charge = charge_of(join_of(log_spec), bits_per_trial, method=method, source=source)
    if charge is None:
        return None, counts
    return charge, charged_counts(counts, charge.lost_test_rounds_charged)


def join_of(log_spec: Any) -> Mapping | None:
    """The join report of a record's / scan's ``log.spec`` (None without a station join)."""
    if not isinstance(log_spec, Mapping):
        return None
    j = log_spec.get("join")
    return j if j is not None else None


__all__ = ["CHARGE_METHOD", "CHARGE_METHOD_GAPS", "CHARGE_REFERENCES", "EXACT_PATTERN_LIMIT", "JoinCharge",
           "charge_for_log", "charge_of", "charged_counts", "join_charge", "join_of", "log2_up", "pattern_bits",
           "pattern_count"]
