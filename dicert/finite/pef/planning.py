"""Planning and diagnostics: :func:`plan_pef` (beta by grid search, expected trials,
completeness), :func:`asymptotic_rate` (h_inf) and :func:`statistical_strength` (D_LR).

Part of :mod:`dicert.finite.pef` (see its docstring for the method and references).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Iterable
from typing import Any

import numpy as np

from dicert.errors import ParameterError
from dicert.finite.pef.models import (
    BLOCK_TABLES_LISTED_MAX,
    BoxModel,
    CALIBRATIONS,
    DEFAULT_BLOCK_TRIALS,
    INITIAL_RULES,
    MODELS,
    SettingsModel,
    _as_box,
    _solve,
    box_from_chsh,
    box_model,
    chsh_functionals,
    counts_by_setting,
    fit_box,
    isotropic_box,
    local_deterministic_boxes,
    pr_boxes,
    product_settings,
    settings_from_design,
    spot_settings,
    tsirelson_box,
    uniform_settings,
)
from dicert.finite.pef.construction import (
    Pef,
    build_pef,
    make_valid,
    optimal_factors,
    pef_rows,
    trivial_pef,
    validate_pef,
)
from dicert.finite.pef.params import PefParams
from dicert.finite.pef.accumulation import (
    PefAccumulator,
    certify_pef,
    certify_pef_counts,
    factors_digest,
    follow_log,
)


# =========================================================================== diagnostics


def _entropy_bits(p: np.ndarray) -> float:
    p = p[p > 0]
    return float(-np.sum(p * np.log2(p)))


def asymptotic_rate(rho: Any, settings: SettingsModel | None = None, *,
                    model: str = "ns") -> float:
    """h_inf(rho): least average H(C|Z) over decompositions of rho into model vertices (bits).

    An LP over vertex weights (scipy.optimize.linprog, HiGHS). It upper-bounds every log-prob
    rate r(beta) (Jensen), and r(beta) -> h_inf as beta -> 0. ``rho`` must lie in the model
    (fit it first with :func:`fit_box` if it comes from data).
    """
    from scipy.optimize import linprog

    settings = uniform_settings() if settings is None else settings
    rho = _as_box(rho)
    verts = box_model(model).vertices
    cost = np.array([sum(settings.nominal[z] * _entropy_bits(v[z]) for z in range(4))
                     for v in verts])
    a_eq = np.vstack([verts.reshape(-1, 16).T, np.ones((1, verts.shape[0]))])
    b_eq = np.concatenate([rho.ravel(), [1.0]])
    res = linprog(cost, A_eq=a_eq, b_eq=b_eq, bounds=(0, None), method="highs")
    if res.status != 0:
        raise ParameterError("rho is not a mixture of the model's vertices (fit it with fit_box)")
    return float(res.fun)


def statistical_strength(rho: Any, settings: SettingsModel | None = None) -> float:
    """D_LR(rho) = min over local boxes nu of sum_z s(z) KL(rho(.|z) || nu(.|z)), in bits.

    The statistical strength of van Dam, Gill and Grunwald (2005); it bounds g(beta) for every
    beta, and log2(1/eps_PE)/D_LR is the least number of trials before any randomness can be
    certified.

    References
    ----------
    .. [1] W. van Dam, R. D. Gill, P. D. Grunwald, IEEE Trans. Inf. Theory 51, 2812 (2005).
    """
    import cvxpy as cp

    settings = uniform_settings() if settings is None else settings
    rho = _as_box(rho)
    joint = (settings.nominal[:, None] * rho).ravel()
    mask = joint > 0
    ld = local_deterministic_boxes().reshape(16, 16)
    w = cp.Variable(16, nonneg=True)
    nu = ld.T @ w
    prob = cp.Problem(cp.Maximize(joint[mask] @ cp.log(nu[mask])), [cp.sum(w) == 1])
    _solve(prob, "statistical strength")
    wv = np.clip(w.value, 0.0, None)
    nuv = ld.T @ (wv / wv.sum())
    # Evaluate the divergence at the (feasible) solver point: an upper estimate of the minimum.
    return float(math.fsum(joint[mask] * np.log2(rho.ravel()[mask] / nuv[mask])))


# =========================================================================== planning


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PefPlan:
    """What a PEF run at an anticipated distribution needs.

    ``expected_trials`` is the n at which the mean of log2 T reaches the threshold;
    ``trials_for_completeness`` the n at which the success probability reaches
    ``completeness`` in the normal approximation; ``latency_floor_trials`` the least n before
    anything can be certified (log2(1/eps_PE)/D_LR).
    """

    beta: float
    target_bits: float
    eps_pe: float
    model: str
    expected_log2_factor: float
    sd_log2_factor: float
    rate_bits_per_trial: float
    expected_trials: float
    completeness: float
    trials_for_completeness: float
    latency_floor_trials: float
    statistical_strength_bits: float
    asymptotic_rate_bits: float
    grid: tuple[tuple[float, float, float, float], ...]


def completeness_probability(n: float, mu: float, sd: float, threshold: float) -> float:
    """P(success) ~ Phi((n mu - threshold) / (sd sqrt n)) for i.i.d. honest trials."""
    from scipy.stats import norm

    if n <= 0:
        return 0.0
    if sd <= 0:
        return 1.0 if n * mu >= threshold else 0.0
    return float(norm.cdf((n * mu - threshold) / (sd * math.sqrt(n))))


def trials_for_probability(mu: float, sd: float, threshold: float, p: float) -> float:
    """Least n with Phi((n mu - thr)/(sd sqrt n)) >= p (normal approximation); inf if mu <= 0."""
    from scipy.stats import norm

    if not mu > 0:
        return math.inf
    zq = float(norm.ppf(p))
    root = (zq * sd + math.sqrt((zq * sd) ** 2 + 4.0 * mu * threshold)) / (2.0 * mu)
    return root * root


def plan_pef(rho: Any, settings: SettingsModel | None = None, target_bits: float = 512.0,
             eps_pe: float = 2.0 ** -64, *, model: str = "ns", lam: float = 0.0,
             completeness: float = 0.99, betas: Iterable[float] | None = None,
             refine: bool = True) -> PefPlan:
    """Choose beta for a target and report expected trials and completeness.

    Grid search over beta (log-spaced 1e-4 .. 1 unless ``betas`` is given), minimising the
    expected number of trials n(beta) = (beta target + log2(1/eps_pe)) / E_rho[log2 F_beta],
    with a finer grid around the best point when ``refine``. Uses validated PEFs.
    """
    settings = uniform_settings() if settings is None else settings
    rho = _as_box(rho)
    thr_fixed = math.log2(1.0 / eps_pe)
    grid = list(betas) if betas is not None else list(np.logspace(-4, 0, 17))

    def evaluate(b: float):
        pef = build_pef(rho, settings, b, model=model, lam=lam)
        mu = pef.expected_log2
        n = (b * target_bits + thr_fixed) / mu if mu > 0 else math.inf
        return (float(b), mu, pef.sd_log2, n)

    rows = [evaluate(b) for b in grid]
    if refine and betas is None:
        k = min(range(len(rows)), key=lambda i: rows[i][3])
        lo = rows[max(k - 1, 0)][0]
        hi = rows[min(k + 1, len(rows) - 1)][0]
        rows += [evaluate(b) for b in np.geomspace(lo, hi, 9)[1:-1]]
    rows.sort()
    best = min(rows, key=lambda r: r[3])
    b, mu, sd, n_exp = best
    thr = b * target_bits + thr_fixed
    d_lr = statistical_strength(rho, settings)
    try:
        h_inf = asymptotic_rate(rho, settings, model=model)
    except ParameterError:
        h_inf = float("nan")
    return PefPlan(beta=b, target_bits=float(target_bits), eps_pe=float(eps_pe), model=model,
                   expected_log2_factor=mu, sd_log2_factor=sd, rate_bits_per_trial=mu / b,
                   expected_trials=n_exp, completeness=float(completeness),
                   trials_for_completeness=trials_for_probability(mu, sd, thr, completeness),
                   latency_floor_trials=thr_fixed / d_lr if d_lr > 0 else math.inf,
                   statistical_strength_bits=d_lr, asymptotic_rate_bits=h_inf,
                   grid=tuple(rows))


__all__ = [
    "BLOCK_TABLES_LISTED_MAX", "CALIBRATIONS", "DEFAULT_BLOCK_TRIALS", "INITIAL_RULES", "MODELS", "BoxModel", "Pef", "PefAccumulator", "PefParams", "PefPlan",
    "SettingsModel", "asymptotic_rate", "box_from_chsh", "box_model", "build_pef",
    "certify_pef", "certify_pef_counts", "chsh_functionals", "completeness_probability",
    "counts_by_setting", "factors_digest", "fit_box", "follow_log", "isotropic_box", "local_deterministic_boxes", "make_valid",
    "optimal_factors", "pef_rows", "plan_pef", "pr_boxes", "product_settings",
    "settings_from_design", "spot_settings", "statistical_strength", "trials_for_probability",
    "trivial_pef", "tsirelson_box", "uniform_settings", "validate_pef",
]
