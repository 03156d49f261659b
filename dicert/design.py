"""Design conformance: refuse data that plainly contradict the protocol's declared design.

A device-independent certificate rests on assumptions about how the experiment was run: the
settings of every round are drawn independently of everything else with the declared
distribution (test rounds with probability ``gamma``, uniform or declared test settings,
fixed generation settings), the round type and settings stay unknown to the devices until the
round, and the number of trials n is fixed in advance. The software cannot prove these; it
can, and must, refuse logs whose counts contradict them. :func:`check_design` is the one
stage that does that. It is pure (counts in, a frozen report out) and every path runs it
before any finite-size method: :func:`dicert.certification.certify` (a failed check ABORTS the run:
a record is written, 0 bits), :func:`dicert.verification.verify` (re-derives every check),
``dicert inspect`` and ``dicert entropy --from-log`` (show the checks).

Checks (each at the protocol's significance ``alpha``, key ``[design] significance``,
default :data:`DEFAULT_SIGNIFICANCE`):

* ``test_fraction``: number of test rounds against Binomial(n, gamma), two-sided exact
  binomial test (reference implementation: ``scipy.stats.binomtest``).
* ``test_settings_x`` / ``test_settings_y`` / ``test_settings_xor``: among test rounds, the
  counts of x = 0, y = 0 and x XOR y = 0 against the declared test-settings distribution
  (uniform, or ``p_x0``/``p_y0`` with bias bounds: the p-value is then the largest over the
  declared interval). The three binomial tests together test the joint distribution of
  (x, y), i.e. both marginals and their independence.
* ``generation_settings``: generation rounds (t = 0) must use the declared generation
  settings (deterministic: any other setting fails).
* ``*_per_block``: the same binomial tests in every block of ``block_trials`` trials, with a
  Bonferroni correction (threshold alpha / number of tests in the family; common practice).
* ``serial_independence``: counts of consecutive settings pairs (symbol s = (t, x, y)) against
  independence, likelihood-ratio (G) test of a zero-order against a first-order Markov chain
  (Anderson & Goodman 1957), chi-square with (k - 1)^2 degrees of freedom; symbols with few
  occurrences are pooled so that every expected cell holds at least :data:`MIN_EXPECTED`
  pairs (pooling a function of an i.i.d. sequence keeps it i.i.d., so the test stays valid).
  It catches predictable sequences with perfect marginals (e.g. settings cycling 00, 01, 10,
  11), the same job as the serial test of NIST SP 800-22 rev. 1a section 2.11 on bit streams.
* ``chsh_physical_range``: the importance-weighted CHSH estimate must not exceed 4 (the
  no-signalling maximum) and its lower confidence bound must not exceed the maximum of the
  method's device model (2 sqrt 2 for quantum devices, 4 for no-signalling ones). A value
  beyond them means the declared gamma or settings distribution is not the one the data came
  from.
* ``trial_count``: with a pre-declared n (``[design] trials``), the log must hold at least n
  trials (a longer log is analysed up to n, see :mod:`dicert.certification`).

False alarms: with k checks at level alpha each the probability that an honest run is
refused is at most k * alpha by the union bound (k <= 12, so <= 1.2e-8 at the default); the
test suite measures it on honest simulated runs (``tests/test_design.py``).

References
----------
.. [1] T. W. Anderson, L. A. Goodman, "Statistical inference about Markov chains", Ann. Math.
   Statist. 28, 89-110 (1957) (test of independence against a first-order chain).
.. [2] A. Rukhin et al., NIST SP 800-22 rev. 1a (2010), section 2.11 (serial test).
.. [3] C. J. Clopper, E. S. Pearson, Biometrika 26, 404 (1934); scipy.stats.binomtest (exact
   two-sided binomial test, "minlike" p-value).
.. [4] K. Azuma, Tohoku Math. J. 19, 357 (1967) (martingale bound of the CHSH estimate).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from dicert.errors import ParameterError, ProtocolError

# re-exported: every name that lived here keeps its import path
from dicert._design_stats import (  # noqa: F401
    MIN_EXPECTED,
    _binom_two_sided_point,
    _lpmf,
    binomial_two_sided,
    chi2_sf,
    serial_g_test,
    settings_symbol_counts,
)

#: Reference of the trial-count check (recorded): the number of rounds is fixed in advance.
TRIAL_COUNT_REFERENCE = ("pre-declared run length: n fixed before the run (Dupuis, Fawzi & "
                         "Renner, Commun. Math. Phys. 379:867, 2020; Arnon-Friedman et al., "
                         "Nat. Commun. 9:459, 2018)")
#: Text recorded before (still accepted by verify: a citation, not a number).
LEGACY_TRIAL_COUNT_REFERENCE = "pre-declared run length (methods notes: n fixed before the run)"

#: Default significance of every design-conformance test (a protocol key overrides it).
DEFAULT_SIGNIFICANCE = 1e-9
#: Default block size of the per-block tests.
DEFAULT_BLOCK_TRIALS = 1 << 20

TSIRELSON = 2.0 * math.sqrt(2.0)
NO_SIGNALLING_MAX = 4.0

#: What the stage checks, in words (recorded).
CHECKED = (
    "the number of test rounds is consistent with the declared test-round probability gamma",
    "the settings of test rounds are consistent with the declared distribution (each party's "
    "marginal and their independence), in the whole log and in every block",
    "generation rounds use the declared generation settings",
    "consecutive settings (round type and x, y) show no serial dependence",
    "the CHSH estimate and its lower bound lie in the physical range of the device model",
    "with a declared number of trials n, the log holds at least n trials",
)
#: What no test on the data can establish: only assumed (recorded).
ASSUMED = (
    "the settings and the round type of each round are drawn independently of the devices "
    "and of any adversary, and stay unknown to the devices until that round (a statistical "
    "test can only catch gross departures, never prove this)",
    "the two stations do not communicate during a round (no signalling)",
    "the number of trials n and every threshold were fixed before the data were taken",
    "the log records every trial, in order, faithfully (no trial dropped or selected after "
    "the fact)",
)


# --------------------------------------------------------------------------- protocol keys


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class DesignSpec:
    """The protocol's ``[design]`` table: what the conformance stage is told in advance.

    Attributes
    ----------
    significance : float
        Significance level of every conformance test (default 1e-9).
    trials : int or None
        Pre-declared number of trials n. None: n is taken from the log (the record says so).
    block_trials : int
        Block size of the per-block tests.
    """

    significance: float = DEFAULT_SIGNIFICANCE
    trials: int | None = None
    block_trials: int = DEFAULT_BLOCK_TRIALS

    def __post_init__(self) -> None:
        if not (isinstance(self.significance, float) and 0.0 < self.significance < 0.5):
            raise ParameterError(f"design significance must lie in (0, 0.5), got "
                                 f"{self.significance!r}")
        if self.trials is not None and (isinstance(self.trials, bool)
                                        or not isinstance(self.trials, int) or self.trials < 1):
            raise ParameterError(f"declared trials must be a positive integer, got {self.trials!r}")
        if isinstance(self.block_trials, bool) or not isinstance(self.block_trials, int) \
                or self.block_trials < 1:
            raise ParameterError(f"block_trials must be a positive integer, got "
                                 f"{self.block_trials!r}")

    @classmethod
    def from_mapping(cls, d: Mapping[str, Any], source: str = "<protocol>") -> DesignSpec:
        """Validate the ``[design]`` table; errors name the file and the key."""
        def fail(key: str, problem: str) -> ProtocolError:
            return ProtocolError(f"{source}: key 'design.{key}': {problem}")

        if not isinstance(d, Mapping):
            raise ProtocolError(f"{source}: key 'design': expected a table [design]")
        for k in d:
            if k not in ("significance", "trials", "block_trials"):
                raise fail(str(k), "unknown key; allowed here: significance, trials, block_trials")
        sig = d.get("significance", DEFAULT_SIGNIFICANCE)
        if isinstance(sig, bool) or not isinstance(sig, (int, float)) or not math.isfinite(sig) \
                or not 0.0 < float(sig) < 0.5:
            raise fail("significance", f"expected a number in (0, 0.5), got {sig!r}")
        out = {"significance": float(sig)}
        for key in ("trials", "block_trials"):
            if key in d:
                v = d[key]
                if isinstance(v, bool) or not isinstance(v, int) or v < 1:
                    raise fail(key, f"expected a positive integer, got {v!r}")
                out[key] = int(v)
        return cls(**out)


def declared_trials(protocol: Any) -> int | None:
    """The pre-declared number of trials of a protocol (``[design] trials``; for a library
    caller's entropy-accumulation parameters also ``EatParams.rounds``), or None."""
    spec = getattr(protocol, "conformance", None)
    n = getattr(spec, "trials", None)
    if n is None:
        n = getattr(getattr(protocol, "analysis", None), "rounds", None)
        if isinstance(n, str):  # the harvest selector, not a count
            n = None
    return int(n) if n is not None else None


def spec_of(protocol: Any) -> DesignSpec:
    spec = getattr(protocol, "conformance", None)
    return spec if isinstance(spec, DesignSpec) else DesignSpec()


# --------------------------------------------------------------------------- report


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class DesignCheck:
    """One conformance check.

    ``p_value`` and ``threshold`` are None for deterministic checks; ``applicable`` is False
    when the data hold too little for the test (it then passes and says why).
    """

    name: str
    statistic: float
    p_value: float | None
    threshold: float | None
    passed: bool
    applicable: bool
    meaning: str
    detail: str
    reference: str

    def to_dict(self) -> dict:
        return {"name": self.name, "statistic": _num(self.statistic),
                "p_value": _num(self.p_value), "threshold": _num(self.threshold),
                "passed": bool(self.passed), "applicable": bool(self.applicable),
                "meaning": self.meaning, "detail": self.detail, "reference": self.reference}


def _fp(p: float) -> str:
    """A p-value for messages: "= 0.0123", or "< 1e-300" for an underflow to 0."""
    return "< 1e-300" if p <= 0 else f"= {p:.3g}"


def _num(v: Any) -> Any:
    if v is None:
        return None
    v = float(v)
    if math.isnan(v):
        return None
    if math.isinf(v):
        return 1e308 if v > 0 else -1e308
    return v


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class DesignReport:
    """Every conformance check of one log against one protocol."""

    significance: float
    block_trials: int
    trials: int
    trials_in_log: int
    declared_trials: int | None
    checks: tuple[DesignCheck, ...]
    checked: tuple[str, ...] = CHECKED
    assumed: tuple[str, ...] = ASSUMED

    @property
    def passed(self) -> bool:
        return all(c.passed for c in self.checks)

    @property
    def failed(self) -> tuple[DesignCheck, ...]:
        return tuple(c for c in self.checks if not c.passed)

    @property
    def trial_count_source(self) -> str:
        return "declared" if self.declared_trials is not None else "log"

    @property
    def abort_reason(self) -> str | None:
        bad = self.failed
        if not bad:
            return None
        first = bad[0]
        more = f" (and {len(bad) - 1} more failed check(s): " + ", ".join(
            c.name for c in bad[1:]) + ")" if len(bad) > 1 else ""
        return (f"the log contradicts the protocol's declared design: check {first.name!r} "
                f"failed: {first.detail}{more}")

    def get(self, name: str) -> DesignCheck:
        for c in self.checks:
            if c.name == name:
                return c
        raise KeyError(name)

    def to_dict(self) -> dict:
        return {
            "significance": float(self.significance),
            "block_trials": int(self.block_trials),
            "trials": {"analysed": int(self.trials), "in_log": int(self.trials_in_log),
                       "declared": self.declared_trials,
                       "source": self.trial_count_source,
                       "note": ("n was pre-declared in the protocol" if self.declared_trials
                                is not None else "n was not pre-declared: it was taken from "
                                "the log")},
            "passed": bool(self.passed),
            "checks": [c.to_dict() for c in self.checks],
            "checked": list(self.checked),
            "assumed": list(self.assumed),
            "false_alarm_bound": float(min(1.0, len(self.checks) * self.significance)),
        }


def _test_settings_model(protocol: Any) -> tuple[float, float, float, float]:
    an = getattr(protocol, "analysis", None)
    return (float(getattr(an, "p_x0", 0.5)), float(getattr(an, "p_y0", 0.5)),
            float(getattr(an, "bias_x", 0.0)), float(getattr(an, "bias_y", 0.0)))


def _xor_range(px: tuple[float, float], py: tuple[float, float]) -> tuple[float, float]:
    # P(x XOR y = 0) = px py + (1 - px)(1 - py) is bilinear: extremes at the corners.
    vals = [a * b + (1 - a) * (1 - b) for a in px for b in py]
    return min(vals), max(vals)


def _device_max(protocol: Any) -> tuple[float, str]:
    method = getattr(protocol, "method", None)
    model = getattr(getattr(protocol, "analysis", None), "model", None)
    if method == "pef" and model == "ns":
        return NO_SIGNALLING_MAX, "no-signalling devices (maximum 4)"
    return TSIRELSON, ("quantum devices: a larger value lies outside the quantum set "
                       "(Tsirelson bound 2 sqrt 2)")


def weighted_chsh(counts: np.ndarray, gamma: float, px0: float, py0: float,
                  eps: float) -> tuple[float, float]:
    """Importance-weighted CHSH estimate with the declared settings probabilities, and its
    Azuma-Hoeffding lower bound at error eps (valid for devices with memory)."""
    c = np.asarray(counts, dtype=np.int64)
    n = int(c.sum())
    if n == 0:
        return math.nan, math.nan
    px = (px0, 1 - px0)
    py = (py0, 1 - py0)
    total = 0.0
    pmin = 1.0
    for x in (0, 1):
        for y in (0, 1):
            p = gamma * px[x] * py[y]
            if p <= 0:
                continue
            pmin = min(pmin, p)
            same = int(c[1, x, y, 0, 0] + c[1, x, y, 1, 1])
            diff = int(c[1, x, y, 0, 1] + c[1, x, y, 1, 0])
            sign = -1 if (x and y) else 1
            total += sign * (same - diff) / p
    est = total / n
    width = 2.0 / pmin
    margin = width * math.sqrt(math.log(1.0 / eps) / (2.0 * n))
    return est, est - margin


# --------------------------------------------------------------------------- the stage


def check_design(counts: np.ndarray, protocol: Any, *, block_counts: np.ndarray | None = None,
                 pair_counts: np.ndarray | None = None, trials_in_log: int | None = None,
                 decided_early: bool = False, eps: float | None = None) -> DesignReport:
    """Run every design-conformance check of a log against a protocol.

    Parameters
    ----------
    counts : ndarray (2, 2, 2, 2, 2)
        ``counts[t, x, y, a, b]`` of the analysed trials.
    protocol : Protocol
        Supplies the settings design, the test-settings model (``p_x0``/``p_y0``, bias
        bounds of method pef), the device model and the ``[design]`` keys.
    block_counts : ndarray (B, 2, 2, 2, 2, 2) or (B, 8), optional
        Per-block counts (or settings-symbol counts s = 4t + 2x + y) for the per-block tests.
    pair_counts : ndarray (8, 8), optional
        Counts of consecutive settings symbols (previous, current) for the serial test.
    trials_in_log : int, optional
        Trials present in the log (may exceed the analysed trials when n was declared).
    decided_early : bool
        Method pef stopped reading at its decision (a declared n is then not required).
    eps : float, optional
        Error of the lower bound on CHSH (default: the protocol's estimation error, 1e-6).

    Returns
    -------
    DesignReport
    """
    spec = spec_of(protocol)
    alpha = spec.significance
    c = np.asarray(counts, dtype=np.int64)
    if c.shape != (2, 2, 2, 2, 2):
        raise ParameterError(f"counts must have shape (2,2,2,2,2), got {c.shape}")
    n = int(c.sum())
    in_log = int(trials_in_log) if trials_in_log is not None else n
    design = protocol.design
    gamma = float(design.gamma)
    gen = tuple(int(v) for v in design.generation)
    px0, py0, bx, by = _test_settings_model(protocol)
    declared = declared_trials(protocol)
    checks: list[DesignCheck] = []
    checks += _count_checks(c, n, in_log, declared, decided_early, gamma, gen, alpha)
    pxr = (max(px0 - bx, 0.0), min(px0 + bx, 1.0))
    pyr = (max(py0 - by, 0.0), min(py0 + by, 1.0))
    ranges = (pxr, pyr, _xor_range(pxr, pyr))
    checks += _settings_checks(c[1].sum(axis=(2, 3)), ranges, alpha)
    if block_counts is not None:
        checks += _block_checks(block_counts, ranges, gamma, alpha, spec.block_trials)
    if pair_counts is not None:
        checks.append(_serial_check(pair_counts, alpha))
    if eps is None:
        eps = _estimate_eps(protocol)
    n_test = int(c[1].sum())
    if n > 0 and n_test > 0:
        checks.append(_range_check(c, gamma, px0, py0, eps, protocol))
    return DesignReport(significance=alpha, block_trials=spec.block_trials, trials=n,
                        trials_in_log=in_log, declared_trials=declared, checks=tuple(checks))


_REF_BINOM = ("exact two-sided binomial test (minlike p-value, as scipy.stats.binomtest; "
              "Clopper & Pearson 1934)")
_SETTING_EVENTS = {"x": "P(x = 0)", "y": "P(y = 0)", "xor": "P(x XOR y = 0)"}


def _count_checks(c: np.ndarray, n: int, in_log: int, declared: int | None, decided_early: bool,
                  gamma: float, gen: tuple, alpha: float) -> list[DesignCheck]:
    """Trial count, test-round fraction and generation settings."""
    checks: list[DesignCheck] = []
    # -- trial count
    if declared is not None:
        ok = in_log >= declared or decided_early
        checks.append(DesignCheck(
            name="trial_count", statistic=float(in_log), p_value=None, threshold=None,
            passed=bool(ok), applicable=True,
            meaning="the log holds at least the pre-declared number of trials n",
            detail=(f"the protocol declares n = {declared} trials; the log holds {in_log}"
                    + ("" if ok else " (too few: a run shorter than declared is not the run the "
                       "protocol describes)")
                    + (f"; the first {declared} are analysed" if in_log > declared else "")),
            reference=TRIAL_COUNT_REFERENCE))

    # -- test-round fraction
    n_test = int(c[1].sum())
    if gamma < 1.0:
        p = binomial_two_sided(n_test, n, gamma)
        checks.append(DesignCheck(
            name="test_fraction", statistic=float(n_test), p_value=p, threshold=alpha,
            passed=p >= alpha, applicable=n > 0,
            meaning="test rounds occur with the declared probability gamma",
            detail=(f"{n_test} test rounds in {n} trials ({n_test / max(n, 1):.6g}); "
                    f"declared gamma = {gamma:g} (expected {gamma * n:.6g}); two-sided "
                    f"p {_fp(p)}, significance {alpha:g}"),
            reference=_REF_BINOM))
        wrong_gen = int(c[0].sum() - c[0, gen[0], gen[1]].sum())
        checks.append(DesignCheck(
            name="generation_settings", statistic=float(wrong_gen), p_value=None,
            threshold=None, passed=wrong_gen == 0, applicable=True,
            meaning="generation rounds use the declared generation settings",
            detail=(f"{wrong_gen} generation rounds (t = 0) with settings other than the "
                    f"declared {list(gen)}"),
            reference="protocol definition (deterministic check)"))
    return checks


def _settings_tests(tcxy: np.ndarray, ranges: tuple
                    ) -> list[tuple[str, int, int, tuple[float, float], float]]:
    """The three binomial tests of test-round settings counts ``tcxy[x, y]``."""
    pxr, pyr, xr = ranges
    m = int(tcxy.sum())
    kx = int(tcxy[0].sum())
    ky = int(tcxy[:, 0].sum())
    kxor = int(tcxy[0, 0] + tcxy[1, 1])
    return [("x", kx, m, pxr, binomial_two_sided(kx, m, *pxr)),
            ("y", ky, m, pyr, binomial_two_sided(ky, m, *pyr)),
            ("xor", kxor, m, xr, binomial_two_sided(kxor, m, *xr))]


def _settings_checks(tc: np.ndarray, ranges: tuple, alpha: float) -> list[DesignCheck]:
    """The test settings of the whole log."""
    checks: list[DesignCheck] = []
    descr = _SETTING_EVENTS
    for which, k, m, rng_, p in _settings_tests(tc, ranges):
        want = f"{rng_[0]:g}" if rng_[0] == rng_[1] else f"[{rng_[0]:g}, {rng_[1]:g}]"
        checks.append(DesignCheck(
            name=f"test_settings_{which}", statistic=float(k), p_value=p, threshold=alpha,
            passed=p >= alpha, applicable=m > 0,
            meaning=("the test-round settings follow the declared distribution"
                     + (" (independence of x and y)" if which == "xor" else "")),
            detail=(f"{k} of {m} test rounds with {descr[which].split('(')[1][:-1]} "
                    f"({k / max(m, 1):.6g}); declared {descr[which]} = {want}; two-sided "
                    f"p {_fp(p)}, significance {alpha:g}"),
            reference=_REF_BINOM))
    return checks


def _block_checks(block_counts: np.ndarray, ranges: tuple, gamma: float, alpha: float,
                  block_trials: int) -> list[DesignCheck]:
    """Per block (Bonferroni): test-round fraction and test settings."""
    checks: list[DesignCheck] = []
    sym = settings_symbol_counts(block_counts)
    sym = sym[sym.sum(axis=1) > 0]
    nb = int(sym.shape[0])
    if nb > 1:
        if gamma < 1.0:
            thr = alpha / nb
            worst, at, stat = 1.0, -1, 0.0
            for i, s in enumerate(sym):
                nt, nn = int(s[4:].sum()), int(s.sum())
                p = binomial_two_sided(nt, nn, gamma)
                if p < worst:
                    worst, at, stat = p, i, float(nt)
            checks.append(DesignCheck(
                name="test_fraction_per_block", statistic=stat, p_value=worst, threshold=thr,
                passed=worst >= thr, applicable=True,
                meaning="test rounds occur with probability gamma in every block",
                detail=(f"smallest p-value {_fp(worst)} in block {at} of {nb} "
                        f"({block_trials} trials per block); Bonferroni threshold "
                        f"{alpha:g}/{nb} = {thr:.3g}"),
                reference=_REF_BINOM + "; Bonferroni correction (common practice)"))
        thr = alpha / (3 * nb)
        worst, at, stat, what = 1.0, -1, 0.0, "x"
        for i, s in enumerate(sym):
            tcxy = s[4:].reshape(2, 2)
            if tcxy.sum() == 0:
                continue
            for which, k, _m, _r, p in _settings_tests(tcxy, ranges):
                if p < worst:
                    worst, at, stat, what = p, i, float(k), which
        checks.append(DesignCheck(
            name="test_settings_per_block", statistic=stat, p_value=worst, threshold=thr,
            passed=worst >= thr, applicable=True,
            meaning="the test-round settings follow the declared distribution in every block",
            detail=(f"smallest p-value {_fp(worst)} ({_SETTING_EVENTS[what]}, block {at} of "
                    f"{nb}); Bonferroni threshold {alpha:g}/(3 x {nb}) = {thr:.3g}"),
            reference=_REF_BINOM + "; Bonferroni correction (common practice)"))
    return checks


def _serial_check(pair_counts: np.ndarray, alpha: float) -> DesignCheck:
    """Serial independence of consecutive settings symbols."""
    g, dof, p, note = serial_g_test(pair_counts)
    return DesignCheck(
        name="serial_independence", statistic=g, p_value=p if dof else None,
        threshold=alpha if dof else None, passed=(p >= alpha) if dof else True,
        applicable=dof > 0,
        meaning=("consecutive rounds' settings and round types are independent (a "
                 "predictable settings sequence fails even with exact marginals)"),
        detail=(f"G = {g:.6g} on consecutive settings pairs, {note}; p {_fp(p)}, "
                f"significance {alpha:g}" if dof else f"not applicable: {note}"),
        reference=("likelihood-ratio test of independence against a first-order Markov "
                   "chain (Anderson & Goodman 1957); cf. NIST SP 800-22 rev. 1a section "
                   "2.11 serial test"))


def _range_check(c: np.ndarray, gamma: float, px0: float, py0: float, eps: float,
                 protocol: Any) -> DesignCheck:
    """Physical range of the weighted CHSH estimate."""
    est, lower = weighted_chsh(c, gamma, px0, py0, eps)
    smax, model = _device_max(protocol)
    ok = est <= NO_SIGNALLING_MAX and lower <= smax
    return DesignCheck(
        name="chsh_physical_range", statistic=float(est), p_value=None, threshold=smax,
        passed=bool(ok), applicable=True,
        meaning="the CHSH estimate is physically possible for the method's device model",
        detail=(f"weighted CHSH estimate {est:.6g}, lower bound {lower:.6g} at eps = "
                f"{eps:g}; limits: estimate <= 4, lower bound <= {smax:.6g} ({model})"
                + ("" if ok else "; the data cannot come from the declared design: most "
                   "likely a wrong gamma or settings distribution in the protocol, or a "
                   "log that is not from this experiment")),
        reference="CHSH 1969 (no-signalling maximum 4); Cirel'son 1980 (2 sqrt 2)")


def _estimate_eps(protocol: Any) -> float:
    for name in ("eps_est", "eps_ea", "eps_pe"):
        v = getattr(getattr(protocol, "analysis", None), name, None)
        if isinstance(v, (int, float)) and 0 < v < 1:
            return float(v)
    return 1e-6


__all__ = [
    "ASSUMED",
    "CHECKED",
    "DEFAULT_BLOCK_TRIALS",
    "DEFAULT_SIGNIFICANCE",
    "DesignCheck",
    "DesignReport",
    "DesignSpec",
    "binomial_two_sided",
    "check_design",
    "chi2_sf",
    "declared_trials",
    "serial_g_test",
    "settings_symbol_counts",
    "spec_of",
    "weighted_chsh",
]


# --------------------------------------------------------------------------- output screens

#: Screens run on at most this many output bits (the first ones).
SCREEN_MAX_BITS = 1 << 24
#: Below this many output bits a constant output is not called a failure (2^-63 for fair bits).
CONSTANT_MIN_BITS = 64


def longest_symbol_run(raw: Any, raw_bits: int, bits_per_symbol: int,
                       chunk_bytes: int = 1 << 19) -> tuple[int, int]:
    """(longest run of identical symbols, number of symbols) of packed raw bits.

    ``raw`` holds the bits packed big-endian (bytes, or a path to a file of them); a symbol is
    ``bits_per_symbol`` consecutive bits (one trial's harvested outcomes). Streams in chunks
    with the run carried across chunk boundaries; chunks are small and symbols uint8 so the
    peak stays a few tens of MB whatever the input size.
    """
    from pathlib import Path as _P

    k = int(bits_per_symbol)
    n_sym = int(raw_bits) // k
    if n_sym == 0:
        return 0, 0
    longest, run, last = 0, 0, -1
    done = 0
    fh = open(raw, "rb") if isinstance(raw, (str, _P)) else None
    try:
        pos = 0
        while done < n_sym:
            if fh is not None:
                data = fh.read(chunk_bytes)
            else:
                data = bytes(raw[pos:pos + chunk_bytes])
                pos += chunk_bytes
            if not data:
                break
            bits = np.unpackbits(np.frombuffer(data, dtype=np.uint8))
            take = min(bits.size // k, n_sym - done)
            bits = bits[:take * k].reshape(take, k)
            sym = bits[:, 0] if k == 1 else (bits[:, 0] << 1) | bits[:, 1]  # uint8
            done += take
            if sym.size == 0:
                continue
            cuts = np.flatnonzero(sym[1:] != sym[:-1]) + 1
            lens = np.diff(np.concatenate([[0], cuts, [sym.size]]))
            if int(sym[0]) == last:
                lens[0] += run
            longest = max(longest, int(lens.max()))
            run = int(lens[-1])
            last = int(sym[-1])
    finally:
        if fh is not None:
            fh.close()
    return longest, done


def repetition_count_screen(raw: Any, raw_bits: int, bits_per_symbol: int,
                            certified_min_entropy_bits: float) -> dict:
    """NIST SP 800-90B section 4.4.1 repetition count test on the harvested outcome symbols.

    Cutoff C = 1 + ceil(-log2(alpha) / H) with H = the certified min-entropy per symbol
    (k / number of symbols, at most the symbol's bit count) and alpha = 2^-40 / N for N
    symbols, so that the whole stream, not each sample, has false-alarm probability at most
    about 2^-40 for outcomes with that min-entropy. A longer run of identical outcomes means a
    stuck detector or a broken pipeline.
    """
    longest, n_sym = longest_symbol_run(raw, raw_bits, bits_per_symbol)
    out: dict[str, Any] = {"name": "repetition count (raw outcomes)",
                           "section": "NIST SP 800-90B 4.4.1", "symbols": n_sym,
                           "bits_per_symbol": int(bits_per_symbol), "longest_run": longest}
    h = float(certified_min_entropy_bits) / n_sym if n_sym else 0.0
    if h <= 0 or n_sym < 2:
        out.update(applicable=False, cutoff=None, min_entropy_per_symbol=h, passed=True)
        return out
    neg_log2_alpha = 40.0 + math.log2(n_sym)
    cutoff = 1 + math.ceil(neg_log2_alpha / min(h, float(bits_per_symbol)))
    out.update(applicable=True, cutoff=int(cutoff), min_entropy_per_symbol=h,
               passed=longest < cutoff)
    return out


def output_screens(output: bytes, m_bits: int, significance: float = DEFAULT_SIGNIFICANCE,
                   *, raw: Any = None, raw_bits: int = 0, bits_per_symbol: int = 2,
                   certified_min_entropy_bits: float = 0.0) -> dict:
    """Gross-failure screens on extractor output bits, as a record section.

    The NIST SP 800-22 rev. 1a frequency, block-frequency, runs and longest-run tests and the
    SP 800-90B section 6.3.1 most-common-value estimate (:func:`dicert.health.run_health_checks`)
    at the significance ``significance`` (far below the standard's 0.01: this screen only
    withholds grossly failing output), plus a constant-output check. ``passed`` is False on a
    gross failure; certify then withholds the bits (status "withheld", exit 5). Passing proves
    nothing about unpredictability. With ``raw`` (the packed harvested bits) the SP 800-90B
    repetition count test also runs on the raw outcome symbols
    (:func:`repetition_count_screen`), to catch a stuck detector.
    """
    n = int(min(m_bits, SCREEN_MAX_BITS))
    out: dict[str, Any] = {"significance": float(significance), "bits_screened": n,
                           "output_bits": int(m_bits)}
    if n < 2:
        out.update(passed=True, applicable=False, tests=[], constant=False,
                   failure=None, note="fewer than 2 output bits: nothing to screen")
        return out
    from dicert.health import STATEMENT, as_bits, run_health_checks

    bits = as_bits(bytes(output), n)
    constant = bool(n >= CONSTANT_MIN_BITS and (bits.min() == bits.max()))
    rep = run_health_checks(bits, alpha=significance)
    tests = [{"name": t.name, "section": t.section, "statistic": _num(t.statistic),
              "p_value": _num(t.p_value), "applicable": bool(t.applicable),
              "passed": t.passed} for t in rep.tests]
    rct = None
    if raw is not None:
        rct = repetition_count_screen(raw, raw_bits, bits_per_symbol, certified_min_entropy_bits)
    failure = None
    if rct is not None and not rct["passed"]:
        failure = (f"stuck outcomes: {rct['longest_run']} identical raw outcome symbols in a "
                   f"row (repetition count cutoff {rct['cutoff']})")
    elif constant:
        failure = f"the output is constant ({n} bits all {int(bits[0])})"
    else:
        bad = [t for t in rep.tests if t.applicable and t.passed is False]
        if bad:
            failure = "; ".join(f"{t.name} P = {t.p_value:.3g} < {significance:g}" for t in bad)
    if rct is not None:
        out["raw_repetition_count"] = rct
    out.update(passed=failure is None, applicable=True, tests=tests, constant=constant,
               mcv_min_entropy_per_bit=_num(rep.mcv_per_bit.min_entropy_per_sample),
               failure=failure, statement=STATEMENT,
               references=["NIST SP 800-22 rev. 1a (2010), sections 2.1-2.4",
                           "NIST SP 800-90B (2018), section 6.3.1",
                           "NIST SP 800-90B (2018), section 4.4.1 (raw outcomes)"])
    return out


# --------------------------------------------------------------------------- seed sanity


def seed_problems(seed: Any, *, log_digests: tuple[str, ...] = (),
                  used_digests: tuple[str, ...] = ()) -> tuple[list[str], list[str]]:
    """(fatal, overridable) problems of an extractor seed.

    Fatal: the seed is constant (every byte equal) or its first MiB repeats with a period of
    at most 64 bytes: it cannot be uniformly random. Overridable (an explicit flag allows
    them, and the record says so): its SHA-256 equals the digest of the log or of one of its
    files (the log given as its own seed), or a seed with this digest was already used by an
    earlier record of the beacon chain.

    ``seed`` is bytes or a :class:`dicert._seed.SeedInput` (a file, read in chunks, never
    held whole).
    """
    from dicert._seed import open_seed

    src = open_seed(seed)
    fatal: list[str] = []
    soft: list[str] = []
    if src.size:
        lo, hi = 255, 0
        for block in src.chunks():
            arr = np.frombuffer(block, dtype=np.uint8)
            lo, hi = min(lo, int(arr.min())), max(hi, int(arr.max()))
            if lo != hi:
                break
        if lo == hi:
            fatal.append(f"the seed is constant (all {src.size} bytes are 0x{lo:02x})")
        else:
            head = src.head(1 << 20)
            for p in range(1, min(65, len(head))):
                if head[p:] == head[:-p]:
                    fatal.append(f"the seed repeats with a period of {p} bytes")
                    break
    digest = src.sha256
    if digest in log_digests:
        soft.append("the seed has the same SHA-256 as the log (the log itself was given as "
                    "the seed?)")
    if digest in used_digests:
        soft.append("a seed with this SHA-256 was already used by an earlier record of the "
                    "chain")
    return fatal, soft


__all__ += ["longest_symbol_run", "output_screens", "repetition_count_screen", "seed_problems"]
