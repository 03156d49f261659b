"""Parameters of the finite-size methods, fixed BEFORE any data is seen.

Each dataclass is what the ``[analysis]`` table of a protocol file declares for one method
(the settings distribution, including the test-round probability ``gamma``, lives in the
protocol's ``[settings]`` table, i.e. in :class:`dicert.estimate.SettingsDesign`).
``from_mapping`` validates a plain mapping (the parsed TOML table) and raises
:class:`~dicert.errors.ProtocolError` naming the offending key.

Only the free parameters the theory allows (tangent point, Renyi order alpha, which
single-round bound) are chosen after the data; thresholds and error parameters are here.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

from dicert.errors import ProtocolError

#: Single-round bounds available to the martingale method.
SINGLE_ROUND_BOUNDS = ("analytic-A", "npa-AB")
#: Variants of entropy accumulation: improved second-order (conservative constants) and original.
EAT_VARIANTS = ("df-conservative", "dfr")
#: Single-round von Neumann bounds available to entropy accumulation: the analytic one-party
#: bound (Acin et al. 2007; Pironio et al. 2009) or the dual-certified Gauss-Radau quadrature
#: bound on the pair of outcomes (Brown, Fawzi & Fawzi 2024), from the shipped table.
EAT_SINGLE_ROUND = ("analytic-vn-A", "radau-vn-AB")

_TSIRELSON = 2.0 * math.sqrt(2.0)
_W_QUANTUM = (2.0 + math.sqrt(2.0)) / 4.0


def _fail(where: str, key: str, problem: str) -> ProtocolError:
    loc = f"{where}: " if where else ""
    return ProtocolError(f"{loc}key {key!r}: {problem}")


def _number(d: Mapping[str, Any], where: str, key: str, *, lo: float, hi: float,
            lo_open: bool = True, hi_open: bool = True, required: bool = True,
            default: float | None = None) -> float | None:
    if key not in d:
        if required:
            raise _fail(where, key, "is required")
        return default
    val = d[key]
    if isinstance(val, bool) or not isinstance(val, (int, float)) or not math.isfinite(val):
        raise _fail(where, key, f"expected a finite number, got {val!r}")
    val = float(val)
    bad_lo = val <= lo if lo_open else val < lo
    bad_hi = val >= hi if hi_open else val > hi
    if bad_lo or bad_hi:
        lb = "(" if lo_open else "["
        rb = ")" if hi_open else "]"
        raise _fail(where, key, f"must lie in {lb}{lo:g}, {hi:g}{rb}, got {val!r}")
    return val


def _choice(d: Mapping[str, Any], where: str, key: str, options: tuple[str, ...],
            default: str) -> str:
    val = d.get(key, default)
    if not isinstance(val, str) or val not in options:
        raise _fail(where, key, f"expected one of {', '.join(map(repr, options))}, got {val!r}")
    return val


def _no_extra(d: Mapping[str, Any], where: str, allowed: tuple[str, ...]) -> None:
    for key in d:
        if key not in allowed:
            raise _fail(where, str(key), f"unknown key (allowed: {', '.join(allowed)})")


def _build(cls, **values: Any):
    # Fill a validated instance without re-entering __post_init__ (which validates via us).
    obj = object.__new__(cls)
    for name, val in values.items():
        object.__setattr__(obj, name, val)
    return obj


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class MartingaleParams:
    """Martingale (Azuma-Hoeffding) method, classical side information.

    Attributes
    ----------
    chsh_threshold : float
        Pre-declared CHSH threshold S_th in (2, 2*sqrt 2]: the run is accepted iff the
        importance-weighted martingale estimate of S is at least S_th.
    eps_est : float
        Error of the Azuma-Hoeffding estimation step (a term of the soundness error).
    single_round : str
        "analytic-A" (closed-form single-party bound, Pironio et al. 2010) or "npa-AB"
        (dual-certified NPA bound on the pair of outcomes).
    expected_chsh : float or None
        Honest devices' expected CHSH value; used only by the planner (completeness), never
        by certification.
    """

    chsh_threshold: float
    eps_est: float
    single_round: str = "analytic-A"
    expected_chsh: float | None = None

    def __post_init__(self) -> None:
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
             if getattr(self, f.name) is not None}
        type(self).from_mapping(d, "MartingaleParams")

    @property
    def method_name(self) -> str:
        return "martingale-azuma"

    @classmethod
    def from_mapping(cls, d: Mapping[str, Any], where: str = "") -> MartingaleParams:
        """Validate the ``[analysis]`` table of a martingale protocol (without ``method``)."""
        keys = ("chsh_threshold", "eps_est", "single_round", "expected_chsh")
        _no_extra(d, where, keys)
        s_th = _number(d, where, "chsh_threshold", lo=2.0, hi=_TSIRELSON, hi_open=False)
        eps = _number(d, where, "eps_est", lo=0.0, hi=1.0)
        single = _choice(d, where, "single_round", SINGLE_ROUND_BOUNDS, "analytic-A")
        exp_s = _number(d, where, "expected_chsh", lo=2.0, hi=_TSIRELSON, hi_open=False,
                        required=False)
        return _build(cls, chsh_threshold=s_th, eps_est=eps, single_round=single,
                      expected_chsh=exp_s)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class EatParams:
    """Entropy accumulation on the spot-checking CHSH protocol, quantum side information.

    Attributes
    ----------
    variant : str
        "df-conservative": improved second-order EAT (Dupuis-Fawzi 2019) with the
        conservative constants (log2(2 d^2 + 1) in V, the full K_alpha term); accepts iff the
        number of test-round LOSSES is at most n*gamma*(1 - omega_exp + delta).
        "dfr": original EAT (Dupuis-Fawzi-Renner 2020 as instantiated by Arnon-Friedman,
        Renner, Vidick 2019); accepts iff the number of test-round WINS is at least
        n*gamma*(omega_exp - delta).
    expected_win_probability : float
        omega_exp, the CHSH-game win probability of honest devices (uniform test inputs).
    tolerance : float or None
        delta, in win-probability units per test round. If None it is derived, before the
        run, from ``eps_comp`` and the number of rounds by the exact binomial tail.
    eps_comp : float or None
        Completeness target (honest abort probability); required when ``tolerance`` is None.
    rounds : int or None
        Pre-declared number of rounds n. If given, a log with another number of trials is
        rejected; if None, the log's trial count is taken as the pre-declared n.
    eps_s : float
        Smoothing parameter (purified distance).
    eps_ea : float
        Floor on the acceptance probability (entropy-accumulation error).
    single_round : str
        Single-round bound turned into the min-tradeoff function: "analytic-vn-A" (default;
        the one-party bound G(w), tangent lines) or "radau-vn-AB" (dual-certified affine
        bounds on H(AB|X,Y,E) from the Gauss-Radau quadrature table, Brown-Fawzi-Fawzi 2024;
        see :mod:`dicert.entropy.vnquad`). The method name gains the suffix "+radau-vn-AB".
    """

    expected_win_probability: float
    eps_s: float
    eps_ea: float
    variant: str = "df-conservative"
    tolerance: float | None = None
    eps_comp: float | None = None
    rounds: int | None = None
    single_round: str = "analytic-vn-A"

    def __post_init__(self) -> None:
        d = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
             if getattr(self, f.name) is not None}
        type(self).from_mapping(d, "EatParams")

    @property
    def method_name(self) -> str:
        suffix = "" if self.single_round == "analytic-vn-A" else f"+{self.single_round}"
        return f"eat-{self.variant}{suffix}"

    @property
    def acceptance(self) -> str:
        """Which count the acceptance test uses: "losses" (DF form) or "wins" (ARV form)."""
        return "losses" if self.variant == "df-conservative" else "wins"

    @classmethod
    def from_mapping(cls, d: Mapping[str, Any], where: str = "") -> EatParams:
        """Validate the ``[analysis]`` table of an entropy-accumulation protocol."""
        keys = ("variant", "expected_win_probability", "tolerance", "eps_comp", "rounds",
                "eps_s", "eps_ea", "single_round")
        _no_extra(d, where, keys)
        variant = _choice(d, where, "variant", EAT_VARIANTS, "df-conservative")
        w = _number(d, where, "expected_win_probability", lo=0.75, hi=_W_QUANTUM, hi_open=False)
        tol = _number(d, where, "tolerance", lo=0.0, hi=0.25, required=False)
        eps_comp = _number(d, where, "eps_comp", lo=0.0, hi=1.0, required=False)
        if tol is None and eps_comp is None:
            raise _fail(where, "tolerance", "give either 'tolerance' or 'eps_comp' "
                        "(from which the tolerance is derived before the run)")
        if tol is not None and w - tol <= 0.75:
            raise _fail(where, "tolerance", f"expected_win_probability - tolerance = "
                        f"{w - tol:.6g} must exceed 3/4 (the classical value)")
        rounds = d.get("rounds")
        if rounds is not None and (isinstance(rounds, bool) or not isinstance(rounds, int)
                                   or rounds < 1):
            raise _fail(where, "rounds", f"expected a positive integer, got {rounds!r}")
        eps_s = _number(d, where, "eps_s", lo=0.0, hi=1.0)
        eps_ea = _number(d, where, "eps_ea", lo=0.0, hi=1.0)
        single = _choice(d, where, "single_round", EAT_SINGLE_ROUND, "analytic-vn-A")
        return _build(cls, variant=variant, expected_win_probability=w, tolerance=tol,
                      eps_comp=eps_comp, rounds=rounds, eps_s=eps_s, eps_ea=eps_ea,
                      single_round=single)


__all__ = ["EAT_SINGLE_ROUND", "EAT_VARIANTS", "SINGLE_ROUND_BOUNDS", "EatParams", "MartingaleParams"]
