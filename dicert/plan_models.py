"""The per-method models the planner evaluates: expected min-entropy, output and abort
probability at (n, gamma) for the martingale and entropy-accumulation rows, and the PEF rows
(Chernoff bounds on log2 T, cached PEF statistics).

Part of :mod:`dicert.planning` (see its docstring for the methods and references).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from typing import Any

import numpy as np

from dicert.entropy.analytic import TSIRELSON, W_QUANTUM, binary_entropy
from dicert.errors import ParameterError
from dicert.finite.params import EatParams, MartingaleParams

#: Trial numbers the planner's curves and minimum-trial searches span.
N_SWEEP = (1e3, 1e14)
#: PEF powers on which the derived target (largest target reachable at a given number of trials)
#: is optimised; any beta gives a valid PEF, so a coarse grid only costs a little output.
PEF_BETAS = tuple(float(b) for b in np.logspace(-4.0, 0.0, 9))
#: Chernoff parameters theta (per bit of log2 T) over which tail bounds are optimised; any
#: theta > 0 gives a valid bound, the grid step (6%) only costs tightness.
PEF_THETAS = np.logspace(-8.0, 5.0, 521)
#: Success probability for ``trials_for_completeness`` (normal approximation).
PEF_COMPLETENESS = 0.99
#: Number of gamma values swept for a PEF row (each needs its own PEFs).
PEF_GAMMA_POINTS = 7
#: Weight of the trivial PEF in derived PEF rows (as the protocol default).
PEF_DERIVED_LAM = 1e-3
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PefPlanDetails:
    """PEF specifics of a plan row. Trial numbers count analysis trials unless named otherwise.

    Attributes
    ----------
    model : str
        Box model, "ns" (no-signalling) or "tsirelson" (adds: the devices are quantum).
    settings : str
        Settings distribution ("uniform", "product", "spot-checking").
    target_bits : float
        sigma_target: min-entropy certified on success (declared, or derived for ``trials``).
    target_source : str
        "declared" (the protocol's) or "derived" (largest target with honest abort <= eps_comp).
    eps_pe, lam : float
        Error of the probability estimate; weight of the trivial PEF mixed in.
    beta : float
        The power this row's numbers use (the protocol's, or the derived one).
    expected_log2_factor, sd_log2_factor : float
        Mean and standard deviation of log2 F per trial for the honest devices (bits).
    rate_bits_per_trial : float
        Log-prob rate E[log2 F]/beta (bits of min-entropy per analysis trial).
    threshold_log2 : float
        Success threshold beta sigma_target + log2(1/eps_pe) on log2 T.
    expected_trials : float
        Expected analysis trials to success at ``beta`` (inf if E[log2 F] <= 0).
    trials_for_completeness : float
        Analysis trials for success probability ``completeness`` at ``beta`` (normal approx.).
    beta_chosen : float
        The beta minimising the expected trials for ``target_bits`` (grid search).
    expected_trials_at_beta_chosen, trials_for_completeness_at_beta_chosen : float
        The same two numbers at ``beta_chosen``.
    latency_floor_trials : float
        log2(1/eps_pe) / D_LR: no PEF certifies anything before this many trials.
    statistical_strength_bits : float
        D_LR, the statistical strength of the devices' nonlocality (bits per trial).
    asymptotic_rate_bits : float
        h_inf, the limit of the log-prob rate as beta -> 0 (bits per trial).
    calibration_trials : int
        Trials of a calibration prefix (consumed, not analysed, not harvested).
    trials_cap : int
        Cap on analysis trials (the plan's ``trials``).
    trials_consumed : float
        Calibration prefix + min(expected_trials, trials_cap).
    anticipated_box : tuple
        rho[z][c] = rho(ab|xy) with z = 2x + y, c = 2a + b, the box planned for.
    """

    model: str
    settings: str
    target_bits: float
    target_source: str
    eps_pe: float
    lam: float
    beta: float
    expected_log2_factor: float
    sd_log2_factor: float
    rate_bits_per_trial: float
    threshold_log2: float
    expected_trials: float
    trials_for_completeness: float
    completeness: float
    beta_chosen: float
    expected_trials_at_beta_chosen: float
    trials_for_completeness_at_beta_chosen: float
    latency_floor_trials: float
    statistical_strength_bits: float
    asymptotic_rate_bits: float
    calibration_trials: int
    trials_cap: int
    trials_consumed: float
    anticipated_box: tuple[tuple[float, ...], ...]


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
            rounds = self.harvest.select
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
                      "eps_s": p.eps_s, "eps_ea": p.eps_ea, "single_round": p.single_round,
                      "tangent_point": rate.w_tangent
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
    return math.ceil(math.exp(hi))


# --------------------------------------------------------------------------- PEF


def _log_mgf(lv: np.ndarray, p: np.ndarray) -> np.ndarray:
    """ln E[exp(-theta L)] on PEF_THETAS for L = lv (bits) with probabilities p (sum 1)."""
    if not np.all(np.isfinite(lv)):
        return np.full(PEF_THETAS.shape, np.inf)  # a factor 0 can occur: no tail bound
    a = -PEF_THETAS[:, None] * lv[None, :]
    out = np.empty(PEF_THETAS.shape)
    # log1p/expm1 keep the small-theta values accurate (they are divided by theta later).
    small = np.max(np.abs(a), axis=1) <= 0.5
    out[small] = np.log1p(np.expm1(a[small]) @ p)
    if not small.all():
        from scipy.special import logsumexp

        out[~small] = logsumexp(a[~small] + np.log(p)[None, :], axis=1)
    return out


def chernoff_reachable_threshold(n: float, log_mgf: np.ndarray, eps: float) -> float:
    """Largest t with the Chernoff bound on P(sum of n i.i.d. log2 F < t) at most ``eps``.

    P(S_n <= t) <= exp(theta t + n ln E[e^(-theta L)]) for every theta > 0 (Chernoff 1952), so
    t = max_theta (ln eps - n ln E[e^(-theta L)]) / theta; ``log_mgf`` is that log moment
    generating function on :data:`PEF_THETAS`.
    """
    with np.errstate(invalid="ignore", over="ignore"):
        vals = (math.log(eps) - n * log_mgf) / PEF_THETAS
    vals = vals[np.isfinite(vals)]
    return float(np.max(vals)) if vals.size else -math.inf


def chernoff_shortfall_bound(n: float, threshold: float, log_mgf: np.ndarray) -> float:
    """Chernoff upper bound on P(sum of n i.i.d. log2 F < threshold) (honest abort)."""
    with np.errstate(invalid="ignore", over="ignore"):
        vals = PEF_THETAS * threshold + n * log_mgf
    vals = vals[np.isfinite(vals)]
    if not vals.size:
        return 1.0
    return float(min(1.0, math.exp(min(0.0, float(np.min(vals))))))


def _settings(spot: tuple) -> Any:
    from dicert.finite.pef import spot_settings

    q, gen, px, py, bx, by = spot
    return spot_settings(q, gen, p_x0=px, p_y0=py, bias_x=bx, bias_y=by)


@functools.lru_cache(maxsize=1024)
def _pef_stats(rho_t: tuple, spot: tuple, beta: float, model: str,
               lam: float) -> tuple[float, float, np.ndarray]:
    """(E[log2 F], sd[log2 F], log MGF of -log2 F) of the validated PEF at the anticipated box."""
    from dicert.finite.pef import build_pef

    rho = np.array(rho_t).reshape(4, 4)
    settings = _settings(spot)
    pef = build_pef(rho, settings, beta, model=model, lam=lam)
    joint = (settings.nominal[:, None] * rho).ravel()
    mask = joint > 0
    with np.errstate(divide="ignore"):
        lv = np.log2(pef.factors.ravel()[mask])
    p = joint[mask] / joint[mask].sum()
    lmgf = _log_mgf(lv, p)
    lmgf.setflags(write=False)
    return float(pef.expected_log2), float(pef.sd_log2), lmgf


@functools.lru_cache(maxsize=64)
def _plan_pef_cached(rho_t: tuple, spot: tuple, target: float, eps_pe: float, model: str,
                     lam: float) -> Any:
    from dicert.finite.pef import plan_pef

    return plan_pef(np.array(rho_t).reshape(4, 4), _settings(spot), target, eps_pe,
                    model=model, lam=lam, completeness=PEF_COMPLETENESS)


class _PefModel:
    """Probability estimation at (n, gamma) for an anticipated box.

    ``evaluate`` uses the derived target (largest target reachable within n analysis trials with
    honest abort <= eps_comp, beta optimised on :data:`PEF_BETAS`); ``row`` gives the plan row,
    with the declared beta and target when the protocol is a PEF protocol.
    """

    abort_kind = "Chernoff upper bound"
    side = "classical"

    def __init__(self, box: np.ndarray, eps_ext: float, eps_comp: float, *,
                 declared: Any = None, eps_pe: float = 1e-8,
                 generation: tuple[int, int] = (0, 0)) -> None:
        self.box = np.asarray(box, dtype=float).reshape(4, 4)
        self.rho_t = tuple(float(v) for v in self.box.ravel())
        self.eps_ext, self.eps_comp = eps_ext, eps_comp
        self.declared = declared
        self.generation = (int(generation[0]), int(generation[1]))
        if declared is not None:
            self.model, self.lam, self.eps_pe = declared.model, declared.lam, declared.eps_pe
            self.bias = (declared.p_x0, declared.p_y0, declared.bias_x, declared.bias_y)
            self.calib = _unscored_trials(declared)
            self.thresholds = "declared"
        else:
            self.model, self.lam, self.eps_pe = "ns", PEF_DERIVED_LAM, eps_pe
            self.bias = (0.5, 0.5, 0.0, 0.0)
            self.calib = 0
            self.thresholds = "derived"
        self.name = f"pef-{self.model}"
        self.log2_inv_eps = math.log2(1.0 / self.eps_pe)

    def _spot(self, gamma: float) -> tuple:
        return (float(gamma), self.generation, *self.bias)

    def _stats(self, gamma: float, beta: float):
        return _pef_stats(self.rho_t, self._spot(gamma), float(beta), self.model, self.lam)

    def is_local(self, gamma: float) -> bool:
        """True when no PEF on the grid has positive expected log2 F (a local box)."""
        return all(self._stats(gamma, b)[0] <= 0.0 for b in PEF_BETAS)

    def derived_target(self, n: float, gamma: float) -> tuple[float, float]:
        """(sigma, beta): the largest target reachable within n trials at abort <= eps_comp."""
        best = (-math.inf, PEF_BETAS[0])
        for b in PEF_BETAS:
            mu, _, lmgf = self._stats(gamma, b)
            if not mu > 0:
                continue
            thr = chernoff_reachable_threshold(n, lmgf, self.eps_comp)
            sigma = (thr - self.log2_inv_eps) / b
            if sigma > best[0]:
                best = (sigma, b)
        return best

    def _consumed(self, n: float, expected: float) -> float:
        return self.calib + min(expected, n)

    def _outcome(self, n: float, gamma: float, sigma: float, beta: float) -> tuple[_Eval, float]:
        mu, _, lmgf = self._stats(gamma, beta)
        k = max(0.0, sigma - 1.0)  # extractor min-entropy sigma_target - 1 (Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020))
        m = _output_bits(k, self.eps_ext) if k > 0 else 0
        thr = beta * sigma + self.log2_inv_eps
        expected = thr / mu if mu > 0 else math.inf
        if m <= 0:
            seed = seed_bits_consumed(self._consumed(n, math.inf), gamma)
            return _Eval(k, 0, seed, -seed, 1.0, {}), expected
        seed = seed_bits_consumed(self._consumed(n, expected), gamma)
        abort = chernoff_shortfall_bound(n, thr, lmgf)
        return _Eval(k, m, seed, m - seed, abort, {}), expected

    def evaluate(self, n: float, gamma: float) -> _Eval:
        n = float(max(1, round(n)))
        sigma, beta = self.derived_target(n, gamma)
        if not sigma > 1.0:
            seed = seed_bits_consumed(self._consumed(n, math.inf), gamma)
            return _Eval(0.0, 0, seed, -seed, 1.0, {})
        return self._outcome(n, gamma, sigma, beta)[0]

    def row(self, n: int, gamma: float) -> tuple[_Eval, PefPlanDetails, float]:
        """(evaluation, PEF details, trials consumed) for the plan's own row."""
        from dicert.finite.pef import trials_for_probability

        local = self.is_local(gamma)
        if self.declared is not None:
            sigma, beta = float(self.declared.sigma_target_bits), float(self.declared.beta)
            target_source = "declared"
        else:
            sigma, beta = self.derived_target(float(n), gamma)
            sigma = max(0.0, sigma) if math.isfinite(sigma) else 0.0
            target_source = "derived"
        mu, sd, _ = self._stats(gamma, beta)
        if local or sigma <= 1.0:
            seed = seed_bits_consumed(self._consumed(n, math.inf), gamma)
            ev = _Eval(0.0, 0, seed, -seed, 1.0, {})
            expected = ((beta * sigma + self.log2_inv_eps) / mu if mu > 0 and not local
                        else math.inf)
        else:
            ev, expected = self._outcome(n, gamma, sigma, beta)
        thr = beta * sigma + self.log2_inv_eps
        plan = _plan_pef_cached(self.rho_t, self._spot(gamma), float(max(sigma, 0.0)),
                                self.eps_pe, self.model, self.lam)
        consumed = self._consumed(n, expected)
        details = PefPlanDetails(
            model=self.model, settings=_settings(self._spot(gamma)).kind, target_bits=sigma,
            target_source=target_source, eps_pe=self.eps_pe, lam=self.lam, beta=beta,
            expected_log2_factor=mu, sd_log2_factor=sd,
            rate_bits_per_trial=mu / beta, threshold_log2=thr, expected_trials=expected,
            trials_for_completeness=(math.inf if local else
                                     trials_for_probability(mu, sd, thr, PEF_COMPLETENESS)),
            completeness=PEF_COMPLETENESS, beta_chosen=math.nan if local else plan.beta,
            expected_trials_at_beta_chosen=math.inf if local else plan.expected_trials,
            trials_for_completeness_at_beta_chosen=(math.inf if local
                                                    else plan.trials_for_completeness),
            latency_floor_trials=math.inf if local else plan.latency_floor_trials,
            statistical_strength_bits=plan.statistical_strength_bits,
            asymptotic_rate_bits=plan.asymptotic_rate_bits, calibration_trials=self.calib,
            trials_cap=int(n), trials_consumed=consumed,
            anticipated_box=tuple(tuple(float(v) for v in r) for r in self.box))
        params = {"model": self.model, "beta": beta, "sigma_target_bits": sigma,
                  "eps_pe": self.eps_pe, "lam": self.lam,
                  "calibration": (self.declared.calibration if self.declared is not None
                                  else "anticipated box (fixed in advance)")}
        ev = dataclasses.replace(ev, params=params)
        return ev, details, consumed


def _unscored_trials(analysis: Any) -> int:
    """Trials a PEF protocol consumes before any factor can earn: a calibration prefix, or
    the first block of an adaptive run that starts from the trivial PEF (F = 1)."""
    if analysis.calibration == "prefix":
        return int(analysis.calibration_trials)
    if analysis.calibration == "adaptive" and analysis.anticipated_box() is None:
        return int(analysis.block_trials)
    return 0


def _pef_default_box(analysis: Any) -> tuple[np.ndarray, str]:
    """The box a PEF protocol is planned for when no device quality is given."""
    box = analysis.anticipated_box()
    if box is not None:
        return box, f"the protocol's anticipated box (calibration \"{analysis.calibration}\")"
    from dicert.simulate import device_model

    dm = device_model("photonic")
    p = dm.parameters
    desc = (f"photonic model of dicert.simulate (r = {p['r']:g}, detector efficiency "
            f"{p['efficiency']:g}, outcome 1 = click, one pair per trial)")
    return np.asarray(dm.box, dtype=float).reshape(4, 4), desc
