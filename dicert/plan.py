"""Planning before an experiment: how many trials, which test-round probability, what output.

:func:`plan` takes a protocol (or the same pieces as plain objects) and the expected quality
of honest devices, and reports for each finite-size method that applies: the certified
min-entropy and extractable output on acceptance, the seed the protocol consumes, the net
expansion, the probability that honest devices abort, the smallest number of trials with a
positive output and with a positive net expansion, and the test-round probability gamma that
maximises the net output at the given number of trials.

Conventions
-----------
- The protocol's own method is evaluated with its declared thresholds ("declared"). The other
  methods are evaluated with thresholds DERIVED for the same honest quality and a
  completeness target (the protocol's eps_comp, else 1e-6), labelled "derived": martingale
  S_th = S_honest - (8/gamma) sqrt(ln(1/eps_comp)/(2n)) (Hoeffding); entropy accumulation with
  the tolerance from the exact binomial tail. Error parameters are taken from the protocol.
- Output on acceptance m = floor(k - 2 log2(1/eps_ext)) (leftover hash lemma, conservative).
- Seed consumed by the protocol: n (h2(gamma) + 2 gamma) bits for spot-checking (interval
  algorithm for the test flags, two uniform bits per test round; Han & Hoshi 1997), 2n bits
  when every round is a test round with uniform settings. The strong extractor's seed is
  returned, so it is not counted. Net = m - seed.
- Abort probability of honest i.i.d. devices: exact binomial tail for entropy accumulation
  (scipy.stats.binom); an optimised Chernoff upper bound for the martingale estimator.

References
----------
.. [1] P. J. Brown, S. Ragy, R. Colbeck, IEEE Trans. Inf. Theory 66, 2964 (2020) (seed
   accounting of spot-checking protocols).
.. [2] T. S. Han, M. Hoshi, "Interval algorithm for random number generation", IEEE Trans.
   Inf. Theory 43, 599 (1997).
.. [3] H. Chernoff, Ann. Math. Stat. 23, 493 (1952).
"""

from __future__ import annotations

import dataclasses
import math
import types
from typing import Any

import numpy as np

from dicert.entropy.analytic import TSIRELSON, W_QUANTUM, binary_entropy
from dicert.errors import ParameterError
from dicert.finite.params import EatParams, MartingaleParams

DEFAULT_TRIALS = 10**7
DEFAULT_EPS_COMP = 1e-6
N_SWEEP = (1e3, 1e14)
GAMMA_SWEEP = (1e-4, 1.0)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PlanMethod:
    """One method's plan at the given number of trials and gamma."""

    name: str
    side_information: str
    thresholds: str  # "declared" | "derived"
    parameters: dict[str, Any]
    min_entropy_bits: float
    certified_bits: int  # extractable output on acceptance
    rate_per_trial: float  # certified_bits / trials
    seed_bits: float
    net_bits: float
    abort_probability: float
    abort_probability_kind: str
    min_trials_positive: int | None
    min_trials_net_positive: int | None
    best_gamma: float | None
    best_gamma_net_bits: float | None
    curve_trials: tuple[float, ...]
    curve_certified_bits: tuple[float, ...]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PlanResult:
    """What :func:`plan` reports. JSON keys follow the field names."""

    protocol: str
    trials: int
    trials_source: str
    gamma: float
    win_probability: float
    chsh: float
    eps_ext: float
    eps_comp: float
    methods: tuple[PlanMethod, ...]
    min_trials_positive: dict[str, int | None]
    min_trials_net_positive: dict[str, int | None]
    best_gamma: dict[str, float | None]
    notes: tuple[str, ...]


# --------------------------------------------------------------------------- helpers


def seed_bits_consumed(n: float, gamma: float) -> float:
    """Seed the protocol consumes: n (h2(gamma) + 2 gamma); 2n when gamma = 1."""
    if gamma >= 1.0:
        return 2.0 * n
    return float(n * (float(binary_entropy(gamma)) + 2.0 * gamma))


def _output_bits(k: float, eps_ext: float) -> int:
    try:
        from dicert.extract import lhl_output_length
    except ImportError:  # pragma: no cover - the extract stage ships with the package
        return max(0, math.floor(k - 2.0 * math.log2(1.0 / eps_ext)))
    return int(lhl_output_length(k, eps_ext))


def honest_quality(*, chsh: float | None = None, win_probability: float | None = None,
                   visibility: float | None = None, default_win: float | None = None) -> float:
    """Win probability of honest devices from exactly one of the three quality measures."""
    given = [v is not None for v in (chsh, win_probability, visibility)]
    if sum(given) > 1:
        raise ParameterError("give at most one of --chsh, --win-probability, --visibility")
    if chsh is not None:
        if not (math.isfinite(chsh) and 0.0 <= chsh <= TSIRELSON + 1e-12):
            raise ParameterError(f"--chsh must lie in [0, 2 sqrt 2], got {chsh!r}")
        return 0.5 + min(chsh, TSIRELSON) / 8.0
    if win_probability is not None:
        if not (math.isfinite(win_probability) and 0.5 <= win_probability <= W_QUANTUM + 1e-12):
            raise ParameterError(f"--win-probability must lie in [1/2, {W_QUANTUM:.6f}], "
                                 f"got {win_probability!r}")
        return min(win_probability, W_QUANTUM)
    if visibility is not None:
        if not (math.isfinite(visibility) and 0.0 <= visibility <= 1.0):
            raise ParameterError(f"--visibility must lie in [0, 1], got {visibility!r}")
        # Werner-type noise on the optimal singlet strategy: S = 2 sqrt2 v (common practice).
        return 0.5 + TSIRELSON * visibility / 8.0
    if default_win is None:
        raise ParameterError("the protocol declares no expected device quality; give --chsh, "
                             "--win-probability or --visibility")
    return default_win


def martingale_abort_bound(n: float, gamma: float, win: float, s_th: float) -> float:
    """Chernoff upper bound on P[I_hat < S_th] for honest i.i.d. devices.

    I_hat = 4 (W - L)/(gamma n) with per-round increments +1 (test win, prob gamma w), -1
    (test loss, prob gamma (1-w)), 0 otherwise; P[D < t] <= min_theta e^(theta t) E[e^(-theta Z)]^n
    (Chernoff 1952).
    """
    from scipy.optimize import minimize_scalar

    t = gamma * n * s_th / 4.0
    mean = n * gamma * (2.0 * win - 1.0)
    if t >= mean:
        return 1.0
    pw, pl, p0 = gamma * win, gamma * (1.0 - win), 1.0 - gamma

    def log_bound(theta: float) -> float:
        return theta * t + n * math.log(pw * math.exp(-theta) + pl * math.exp(theta) + p0)

    res = minimize_scalar(log_bound, bounds=(0.0, 30.0), method="bounded",
                          options={"xatol": 1e-12})
    return float(min(1.0, math.exp(min(0.0, res.fun))))


@dataclasses.dataclass(frozen=True, slots=True)
class _Eval:
    k: float
    m: int
    seed: float
    net: float
    abort: float
    params: dict[str, Any]


class _MethodModel:
    """Evaluates one method at (n, gamma) for the honest win probability."""

    def __init__(self, name: str, side: str, thresholds: str, win: float, eps_ext: float,
                 eps_comp: float, *, mart: MartingaleParams | None = None,
                 eat: EatParams | None = None, harvest: Any = None) -> None:
        self.name, self.side, self.thresholds = name, side, thresholds
        self.win, self.eps_ext, self.eps_comp = win, eps_ext, eps_comp
        self.mart, self.eat, self.harvest = mart, eat, harvest
        self.abort_kind = ("exact binomial tail" if eat is not None
                           else "Chernoff upper bound")

    def evaluate(self, n: float, gamma: float) -> _Eval:
        n = float(max(1, round(n)))
        seed = seed_bits_consumed(n, gamma)
        if self.mart is not None:
            from dicert.finite.martingale import martingale_min_entropy

            p = self.mart
            if self.thresholds == "derived":
                s_h = 8.0 * self.win - 4.0
                s_th = s_h - (8.0 / gamma) * math.sqrt(math.log(1.0 / self.eps_comp) / (2 * n))
                if s_th <= 2.0:
                    return _Eval(0.0, 0, seed, -seed, 1.0, {"chsh_threshold": None})
                p = MartingaleParams(chsh_threshold=min(s_th, TSIRELSON), eps_est=p.eps_est,
                                     single_round=p.single_round)
            parties = getattr(self.harvest, "parties", "AB")
            rounds = getattr(self.harvest, "rounds", "all")
            if rounds == "generation" and gamma >= 1.0:
                rounds = "all"
            k, _ = martingale_min_entropy(int(n), p, gamma=gamma, harvest_parties=parties,
                                          harvest_rounds=rounds)
            k = min(k, len(parties) * n)
            abort = martingale_abort_bound(n, gamma, self.win, p.chsh_threshold)
            params = {"chsh_threshold": p.chsh_threshold, "eps_est": p.eps_est,
                      "single_round": p.single_round}
        else:
            from dicert.finite.eat import abort_probability, eat_min_entropy

            p = self.eat
            if self.thresholds == "derived" and self.win <= 0.75:
                return _Eval(0.0, 0, seed, -seed, 1.0, {})
            k, th, rate = eat_min_entropy(p, int(n), gamma)
            k = min(k, 2.0 * n)
            abort = abort_probability(th, int(n), gamma, self.win)
            params = {"variant": p.variant, "acceptance": th.acceptance,
                      "count_limit": th.count_limit, "tolerance": th.tolerance,
                      "expected_win_probability": p.expected_win_probability,
                      "eps_s": p.eps_s, "eps_ea": p.eps_ea, "tangent_point": rate.w_tangent
                      if math.isfinite(rate.w_tangent) else None, "alpha": rate.alpha}
        m = _output_bits(k, self.eps_ext)
        return _Eval(k, m, seed, m - seed, abort, params)


def _min_trials(model: _MethodModel, gamma: float, key: str) -> int | None:
    """Smallest n (to ~1%) with m > 0 (key "m") or net > 0 (key "net"), by sweep + bisection."""
    grid = np.geomspace(*N_SWEEP, 23)
    vals = [getattr(model.evaluate(n, gamma), key) for n in grid]
    idx = next((i for i, v in enumerate(vals) if v > 0), None)
    if idx is None:
        return None
    if idx == 0:
        return int(grid[0])
    lo, hi = math.log(grid[idx - 1]), math.log(grid[idx])
    while hi - lo > 0.01:
        mid = 0.5 * (lo + hi)
        if getattr(model.evaluate(math.exp(mid), gamma), key) > 0:
            hi = mid
        else:
            lo = mid
    return int(math.ceil(math.exp(hi)))


def _models(protocol: Any, win: float, eps_comp: float) -> list[_MethodModel]:
    method = getattr(protocol, "method", None)
    analysis = getattr(protocol, "analysis", None)
    eps_ext = float(protocol.extractor.eps_ext)
    harvest = getattr(protocol, "harvest", None)
    # Error parameters shared with derived methods: the declared method's entropy error.
    if isinstance(analysis, MartingaleParams):
        err = analysis.eps_est
        eps_s = eps_ea = analysis.eps_est
    elif isinstance(analysis, EatParams):
        err = analysis.eps_ea
        eps_s, eps_ea = analysis.eps_s, analysis.eps_ea
    else:
        err = float(getattr(analysis, "eps_pe", None) or getattr(analysis, "eps_PE", None)
                    or 1e-8)
        eps_s = eps_ea = err
    models: list[_MethodModel] = []
    if method == "martingale" and isinstance(analysis, MartingaleParams):
        models.append(_MethodModel("martingale-azuma", "classical", "declared", win, eps_ext,
                                   eps_comp, mart=analysis, harvest=harvest))
    else:
        models.append(_MethodModel("martingale-azuma", "classical", "derived", win, eps_ext,
                                   eps_comp, mart=MartingaleParams(chsh_threshold=2.5,
                                                                   eps_est=err),
                                   harvest=types.SimpleNamespace(parties="AB", rounds="all")))
    for variant in ("df-conservative", "dfr"):
        if method == "eat" and isinstance(analysis, EatParams) and analysis.variant == variant:
            p = dataclasses.replace(analysis, rounds=None)
            models.append(_MethodModel(p.method_name, "quantum", "declared", win, eps_ext,
                                       eps_comp, eat=p))
            continue
        if method == "eat" and isinstance(analysis, EatParams):
            p = dataclasses.replace(analysis, variant=variant, rounds=None)
            models.append(_MethodModel(p.method_name, "quantum", "declared-switched", win,
                                       eps_ext, eps_comp, eat=p))
            continue
        if win <= 0.75:
            continue
        p = EatParams(variant=variant, expected_win_probability=win, eps_comp=eps_comp,
                      eps_s=eps_s, eps_ea=eps_ea)
        models.append(_MethodModel(p.method_name, "quantum", "derived", win, eps_ext,
                                   eps_comp, eat=p))
    return models


def plan(protocol: Any, *, chsh: float | None = None, win_probability: float | None = None,
         visibility: float | None = None, trials: int | None = None,
         gamma: float | None = None, n_points: int = 30, gamma_points: int = 30) -> PlanResult:
    """Plan an experiment under ``protocol`` for honest devices of the given quality.

    Parameters
    ----------
    protocol : Protocol or object with ``name``, ``method``, ``analysis``, ``design``,
        ``harvest``, ``extractor`` (``eps_ext``)
        The protocol to plan for.
    chsh, win_probability, visibility : float, optional
        At most one: the honest devices' quality (default: the protocol's expectation).
    trials : int, optional
        Number of trials (default: the protocol's ``rounds``, else 1e7).
    gamma : float, optional
        Test-round probability (default: the protocol's).
    n_points, gamma_points : int
        Sizes of the trial-number sweep (plotted curve) and of the gamma sweep.

    Returns
    -------
    PlanResult

    References
    ----------
    Brown, Ragy & Colbeck (2020); Han & Hoshi (1997); Chernoff (1952). See the module docstring.
    """
    analysis = getattr(protocol, "analysis", None)
    default_win = None
    if isinstance(analysis, EatParams):
        default_win = analysis.expected_win_probability
    elif isinstance(analysis, MartingaleParams) and analysis.expected_chsh is not None:
        default_win = 0.5 + analysis.expected_chsh / 8.0
    win = honest_quality(chsh=chsh, win_probability=win_probability, visibility=visibility,
                         default_win=default_win)
    design = getattr(protocol, "design", None)
    g = float(gamma if gamma is not None else getattr(design, "gamma", 1.0))
    if not (math.isfinite(g) and 0.0 < g <= 1.0):
        raise ParameterError(f"--gamma must lie in (0, 1], got {gamma!r}")
    source = "given"
    if trials is None:
        declared = getattr(analysis, "rounds", None)
        trials, source = (declared, "protocol") if declared else (DEFAULT_TRIALS, "default")
    if isinstance(trials, bool) or int(trials) != trials or trials < 1:
        raise ParameterError(f"--trials must be a positive integer, got {trials!r}")
    n = int(trials)
    eps_comp = float(getattr(analysis, "eps_comp", None) or DEFAULT_EPS_COMP)
    models = _models(protocol, win, eps_comp)
    gammas = np.geomspace(*GAMMA_SWEEP, gamma_points)
    ns = np.geomspace(*N_SWEEP, n_points)
    out = []
    for mdl in models:
        ev = mdl.evaluate(n, g)
        curve = tuple(float(mdl.evaluate(x, g).m) for x in ns)
        nets = [mdl.evaluate(n, float(gg)).net for gg in gammas]
        j = int(np.argmax(nets))
        best_g = float(gammas[j]) if nets[j] > 0 else None
        out.append(PlanMethod(
            name=mdl.name, side_information=mdl.side, thresholds=mdl.thresholds,
            parameters=ev.params, min_entropy_bits=ev.k, certified_bits=ev.m,
            rate_per_trial=ev.m / n, seed_bits=ev.seed, net_bits=ev.net,
            abort_probability=ev.abort, abort_probability_kind=mdl.abort_kind,
            min_trials_positive=_min_trials(mdl, g, "m"),
            min_trials_net_positive=_min_trials(mdl, g, "net"),
            best_gamma=best_g, best_gamma_net_bits=float(nets[j]) if best_g else None,
            curve_trials=tuple(float(x) for x in ns), curve_certified_bits=curve))
    notes = (
        "certified_bits is the extractable output on acceptance, "
        "floor(k - 2 log2(1/eps_ext)); multiply by 1 - abort_probability for the mean",
        "seed_bits: n (h2(gamma) + 2 gamma) for spot-checking, 2n for uniform settings; the "
        "extractor seed is returned and not counted",
        "'derived' methods use thresholds set for this device quality and eps_comp "
        f"= {eps_comp:g}; 'declared' ones use the protocol's",
        "best_gamma maximises net_bits over a log grid of gamma in [1e-4, 1] at the given trials",
    )
    return PlanResult(
        protocol=str(getattr(protocol, "name", "<protocol>")), trials=n, trials_source=source,
        gamma=g, win_probability=win, chsh=8.0 * win - 4.0,
        eps_ext=float(protocol.extractor.eps_ext), eps_comp=eps_comp, methods=tuple(out),
        min_trials_positive={m.name: m.min_trials_positive for m in out},
        min_trials_net_positive={m.name: m.min_trials_net_positive for m in out},
        best_gamma={m.name: m.best_gamma for m in out}, notes=notes)


def plot_plan(result: PlanResult, path: Any) -> None:
    """Certified output bits vs number of trials for each method (matplotlib, Agg), atomically."""
    import io

    import matplotlib

    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    from dicert._io import atomic_write_bytes

    fig, ax = plt.subplots(figsize=(7, 4.5))
    for m in result.methods:
        xs = np.asarray(m.curve_trials)
        ys = np.asarray(m.curve_certified_bits, dtype=float)
        ok = ys > 0
        if ok.any():
            ax.loglog(xs[ok], ys[ok], marker="o", ms=3,
                      label=f"{m.name} ({m.side_information}, {m.thresholds})")
    ax.axvline(result.trials, color="grey", ls=":", lw=1, label=f"n = {result.trials:.3g}")
    ax.set_xlabel("number of trials n")
    ax.set_ylabel("certified output bits on acceptance")
    ax.set_title(f"{result.protocol}: gamma = {result.gamma:g}, "
                 f"win probability = {result.win_probability:.4f}")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    fmt = str(path).rsplit(".", 1)[-1].lower() if "." in str(path) else "png"
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=120, bbox_inches="tight",
                metadata={"Software": None} if fmt == "png" else None)
    plt.close(fig)
    atomic_write_bytes(path, buf.getvalue())


__all__ = [
    "PlanMethod",
    "PlanResult",
    "honest_quality",
    "martingale_abort_bound",
    "plan",
    "plot_plan",
    "seed_bits_consumed",
]
