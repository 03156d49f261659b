r"""Entropy accumulation on the spot-checking CHSH protocol (quantum side information).

Protocol (spot-checking CHSH as in Arnon-Friedman, Renner & Vidick, SIAM J. Comput. 48, 181
(2019) and Brown, Ragy & Colbeck, IEEE Trans. Inf. Theory 66, 2964 (2020)): n rounds fixed in advance; each
round is a test round with probability gamma (uniform, independent test settings) or a
generation round with fixed settings; the score of a test round is a CHSH-game win
(a XOR b = x AND y) or a loss. The acceptance test, fixed before the run, is

- "df-conservative" (loss form): accept iff L <= L_max, L_max = floor(n gamma (1 - w_exp + delta));
- "dfr" (win form):              accept iff W >= W_min, W_min = ceil(n gamma (w_exp - delta)).

The bound is stated at the integer threshold actually applied: with the certified win rate
w_c = 1 - L_max/(n gamma) (loss form) or W_min/(n gamma) (win form), the min-tradeoff value on
the acceptance event is h = a w_c + b for the tangent g(w) = a w + b of the single-round
von Neumann bound G(w) = 1 - h2(1/2 + 1/2 sqrt(16 w (w - 1) + 3)) at a point w_t
(Acin et al. 2007; Pironio et al. 2009). G bounds H(A_i | X_i = x, E) for either input x, so
it bounds H(A_i B_i | X_i Y_i T_i E) on every round without a (1 - gamma) factor.

Original EAT (Dupuis-Fawzi-Renner 2020, instantiated by Arnon-Friedman-Renner-Vidick 2019),
ARV form f(q) = b + (a/gamma) q(1) with ||grad f||_inf = a/gamma, d_O = 4:

    H_min^{eps_s} > n h - 2 (log2 9 + ceil(a/gamma)) sqrt(1 - 2 log2(eps_s eps_EA)) sqrt(n).

Improved second-order EAT (Dupuis-Fawzi 2019, as used by Brown-Ragy-Colbeck 2020), DF form
f(q) = a + b - (a/gamma) q(0), alpha in (1, 3/2), beta = (alpha-1)/(2-alpha):

    H_min^{eps_s} > n h - n beta (ln2/2) V^2 - (g(eps_s) + alpha log2(1/eps_EA))/(alpha-1)
                    - n beta^2 K_alpha,

with V = log2(2 d_O^2 + 1) + sqrt(2 + Var(f)), Var(f) the maximum over achievable
distributions, K_alpha = (2-alpha)^3 / (6 (3-2alpha)^3 ln2) 2^(beta R) ln^3(2^R + e^2),
R = 2 log2 d_O + Max(f) - Min_Sigma(f) = 4 + a w*, and g(eps) = log2((1 + sqrt(1-eps^2))/eps^2).
The note flags log2(2 d^2 + 1) vs log2(1 + 2 d) and the prefactor of K_alpha as uncertain;
this module uses the CONSERVATIVE choice it names (log2(2 d^2 + 1) = log2 33 and the full
K_alpha) and labels the method "eat-df-conservative".

Pair of outcomes (``single_round = "radau-vn-AB"``): instead of tangents of G, the min-tradeoff
function is built from one of the shipped certified lines g(w) = a w + b (a >= 0) that bound
H(A_i B_i | X_i Y_i T_i E) for every quantum strategy (Gauss-Radau quadrature with exactly checked
SDP duals, Brown, Fawzi & Fawzi, Quantum 8, 1445 (2024); :mod:`dicert.entropy.vnquad`). The DF
and ARV forms, Var(f), R and ||grad f|| depend on g only through (a, b), so both engines apply
unchanged; the line is chosen after the data like the tangent point (:func:`quadrature_lines`
explains why no (1 - gamma) factor is needed).

Both are statements about the state conditioned on acceptance: either P(accept) < eps_EA or
the bound holds; extraction by two-universal hashing with m <= H - 2 log2(1/eps_ext) then
gives soundness eps_EA + 2 eps_s + eps_ext in "P(accept) x distance" form (Tomamichel et al.
2011). Any tangent point w_t and any alpha give a valid bound for the fixed acceptance event,
so they are optimised after the data; thresholds are not. A non-positive bound certifies 0.

References
----------
.. [1] F. Dupuis, O. Fawzi, R. Renner, "Entropy accumulation", Commun. Math. Phys. 379,
   867-913 (2020).
.. [2] R. Arnon-Friedman, R. Renner, T. Vidick, "Simple and tight device-independent security
   proofs", SIAM J. Comput. 48, 181-225 (2019).
.. [3] F. Dupuis, O. Fawzi, "Entropy accumulation with improved second-order term", IEEE
   Trans. Inf. Theory 65, 7596-7612 (2019).
.. [4] P. J. Brown, S. Ragy, R. Colbeck, "A framework for quantum-secure device-independent
   randomness expansion", IEEE Trans. Inf. Theory 66, 2964-2987 (2020).
.. [5] A. Acin et al., PRL 98, 230501 (2007); S. Pironio et al., New J. Phys. 11, 045021
   (2009) (single-round von Neumann bound).
.. [6] M. Tomamichel, C. Schaffner, A. Smith, R. Renner, "Leftover hashing against quantum
   side information", IEEE Trans. Inf. Theory 57, 5524-5535 (2011).
"""

from __future__ import annotations

import dataclasses
import functools
import math
from typing import Any

import numpy as np

from dicert.entropy.analytic import W_QUANTUM, vn_entropy_win, vn_entropy_win_derivative
from dicert.errors import ParameterError
from dicert.finite.params import EatParams
from dicert.finite.result import FiniteSizeResult

#: Alphabet size of the accumulated register (A_i, B_i).
D_OUT = 4
LN2 = math.log(2.0)
_LOG2_33 = math.log2(2 * D_OUT**2 + 1)
_LOG2_9 = math.log2(1 + 2 * D_OUT)
_W_LO = 0.75
#: How the df-conservative variant reads the second-order constants (recorded in details).
CONSERVATIVE_CONSTANTS = (
    "conservative: log2(2 d^2 + 1) in V and the full K_alpha term of the second-order "
    "bound (Dupuis & Fawzi, IEEE Trans. Inf. Theory 65:7596, 2019), taking the larger reading "
    "wherever a constant admits two")
#: Text recorded before (still accepted by verify: a citation, not a number).
LEGACY_CONSERVATIVE_CONSTANTS = ("conservative: log2(2 d^2 + 1) in V and the full K_alpha "
                                 "term (constants flagged uncertain in the methods note)")

#: Smallest and largest alpha - 1 searched (the Renyi order of the entropy accumulation bound,
#: Dupuis & Fawzi, IEEE Trans. Inf. Theory 65, 7596 (2019); the range is our choice).
ALPHA_M1_MIN, ALPHA_M1_MAX = 1e-12, 0.49

REFERENCES_DF = (
    "F. Dupuis, O. Fawzi, IEEE Trans. Inf. Theory 65, 7596 (2019) (improved second-order EAT)",
    "P. J. Brown, S. Ragy, R. Colbeck, IEEE Trans. Inf. Theory 66, 2964 (2020)",
    "A. Acin et al., PRL 98, 230501 (2007); S. Pironio et al., New J. Phys. 11, 045021 (2009)",
    "M. Tomamichel, C. Schaffner, A. Smith, R. Renner, IEEE Trans. Inf. Theory 57, 5524 (2011)",
)
REFERENCES_DFR = (
    "F. Dupuis, O. Fawzi, R. Renner, Commun. Math. Phys. 379, 867 (2020) (entropy accumulation)",
    "R. Arnon-Friedman, R. Renner, T. Vidick, SIAM J. Comput. 48, 181 (2019)",
    "A. Acin et al., PRL 98, 230501 (2007); S. Pironio et al., New J. Phys. 11, 045021 (2009)",
    "M. Tomamichel, C. Schaffner, A. Smith, R. Renner, IEEE Trans. Inf. Theory 57, 5524 (2011)",
)


# --------------------------------------------------------------------------- formulas


def g_smooth(eps: float) -> float:
    """g(eps) = -log2(1 - sqrt(1 - eps^2)) in the stable form log2((1 + sqrt(1 - eps^2))/eps^2).

    The naive form loses all precision for eps below ~1e-8 (common practice: compute with log1p/expm1).
    """
    if not (0.0 < eps < 1.0):
        raise ParameterError(f"eps_s must be in (0, 1), got {eps!r}")
    return math.log2((1.0 + math.sqrt(1.0 - eps * eps)) / (eps * eps))


def tangent(w_t):
    """Tangent g(w) = a w + b of G at w_t in (3/4, w*): returns (a, b)."""
    w_t = np.asarray(w_t, dtype=float)
    a = np.asarray(vn_entropy_win_derivative(w_t), dtype=float)
    b = np.asarray(vn_entropy_win(w_t), dtype=float) - a * w_t
    return a, b


def df_variance(a, gamma: float):
    """Var(f) of the DF form maximised over achievable distributions: (a^2/gamma) u (1 - gamma u).

    u* = clip(1/(2 gamma), 1 - w*, w*): the concave quadratic u (1 - gamma u) peaks at
    u = 1/(2 gamma), clipped to the achievable losses [1 - w*, w*] (our derivation; the variance
    term of Dupuis & Fawzi, IEEE Trans. Inf. Theory 65, 7596 (2019)).
    """
    u = min(max(1.0 / (2.0 * gamma), 1.0 - W_QUANTUM), W_QUANTUM)
    return np.asarray(a, dtype=float) ** 2 / gamma * u * (1.0 - gamma * u)


def dfr_rate(w_t, w_c: float, n: float, gamma: float, eps_s: float, eps_ea: float):
    """Per-round rate of the original EAT with the ARV form at tangent point(s) w_t."""
    a, b = tangent(w_t)
    h = a * w_c + b
    root = math.sqrt(1.0 - 2.0 * math.log2(eps_s * eps_ea))
    return h - 2.0 * (_LOG2_9 + np.ceil(a / gamma)) * root / math.sqrt(n)


def df_rate(w_t, alpha_m1, w_c: float, n: float, gamma: float, eps_s: float, eps_ea: float):
    """Per-round rate of the improved second-order EAT (conservative constants).

    ``alpha_m1`` = alpha - 1 (broadcast against ``w_t``). K_alpha is evaluated in log space.
    """
    a, b = tangent(w_t)
    return df_rate_ab(a, b, alpha_m1, w_c, n, gamma, eps_s, eps_ea)


def df_rate_ab(a, b, alpha_m1, w_c: float, n: float, gamma: float, eps_s: float,
               eps_ea: float):
    """:func:`df_rate` for a given affine single-round bound g(w) = a w + b (a >= 0)."""
    a = np.asarray(a, dtype=float)
    b = np.asarray(b, dtype=float)
    am1 = np.asarray(alpha_m1, dtype=float)
    alpha = 1.0 + am1
    beta = am1 / (1.0 - am1)
    h = a * w_c + b
    v = _LOG2_33 + np.sqrt(2.0 + df_variance(a, gamma))
    r = 2.0 * math.log2(D_OUT) + a * W_QUANTUM
    ln_term = np.logaddexp(r * LN2, 2.0)  # ln(2^R + e^2)
    log2_k = (-math.log2(6.0 * LN2) - 3.0 * np.log2(1.0 - beta) + beta * r
              + 3.0 * np.log2(ln_term))
    with np.errstate(over="ignore"):
        k_alpha = np.exp2(log2_k)
    second = beta * (LN2 / 2.0) * v * v
    third = (g_smooth(eps_s) + alpha * math.log2(1.0 / eps_ea)) / (n * am1)
    return h - second - third - beta * beta * k_alpha


def dfr_rate_ab(a, b, w_c: float, n: float, gamma: float, eps_s: float, eps_ea: float):
    """:func:`dfr_rate` for a given affine single-round bound g(w) = a w + b (a >= 0)."""
    a = np.asarray(a, dtype=float)
    h = a * w_c + np.asarray(b, dtype=float)
    root = math.sqrt(1.0 - 2.0 * math.log2(eps_s * eps_ea))
    return h - 2.0 * (_LOG2_9 + np.ceil(a / gamma)) * root / math.sqrt(n)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class EatRate:
    """An optimised per-round rate and the free parameters that achieve it."""

    variant: str
    rate_per_round: float
    w_tangent: float
    alpha: float | None
    a: float
    b: float
    h: float


def _wt_grid(w_c: float, k: int) -> np.ndarray:
    hi = W_QUANTUM - 1e-9
    lo = _W_LO + 1e-9
    # Denser near the certified win rate, where the optimum sits.
    base = np.linspace(lo, hi, k)
    near = np.clip(w_c - np.geomspace(1e-7, 0.1, k // 2), lo, hi)
    return np.unique(np.concatenate([base, near, [min(max(w_c, lo), hi)]]))


def optimise_dfr(w_c: float, n: float, gamma: float, eps_s: float, eps_ea: float,
                 grid: int = 2000) -> EatRate:
    """Maximise the DFR rate over the tangent point (dense grid, then a local refinement)."""
    if w_c <= _W_LO:
        return EatRate(variant="dfr", rate_per_round=0.0, w_tangent=float("nan"), alpha=None,
                       a=0.0, b=0.0, h=0.0)
    wt = _wt_grid(w_c, grid)
    r = dfr_rate(wt, w_c, n, gamma, eps_s, eps_ea)
    i = int(np.argmax(r))
    lo, hi = wt[max(i - 1, 0)], wt[min(i + 1, len(wt) - 1)]
    fine = np.linspace(lo, hi, 400)
    rf = dfr_rate(fine, w_c, n, gamma, eps_s, eps_ea)
    j = int(np.argmax(rf))
    best_w, best_r = (fine[j], rf[j]) if rf[j] >= r[i] else (wt[i], r[i])
    a, b = tangent(best_w)
    return EatRate(variant="dfr", rate_per_round=float(best_r), w_tangent=float(best_w),
                   alpha=None, a=float(a), b=float(b), h=float(a * w_c + b))


def _df_rate_scalar(w_t: float, alpha_m1: float, w_c: float, n: float, gamma: float,
                    g_eps: float, log_inv_ea: float, var_u: float) -> float:
    # Scalar twin of df_rate (math module only: fast inside the local optimiser).
    s = math.sqrt(max(16.0 * w_t * (w_t - 1.0) + 3.0, 0.0))
    x = 0.5 * (1.0 + s)
    if s <= 0.0 or x >= 1.0:
        return -math.inf
    h2 = -(x * math.log2(x) + (1.0 - x) * math.log2(1.0 - x))
    a = 0.5 * math.log2(x / (1.0 - x)) * (16.0 * w_t - 8.0) / s
    b = (1.0 - h2) - a * w_t
    beta = alpha_m1 / (1.0 - alpha_m1)
    v = _LOG2_33 + math.sqrt(2.0 + a * a / gamma * var_u)
    r = 4.0 + a * W_QUANTUM
    ln_term = r * LN2 + math.log1p(math.exp(2.0 - r * LN2))
    log2_k = (-math.log2(6.0 * LN2) - 3.0 * math.log2(1.0 - beta) + beta * r
              + 3.0 * math.log2(ln_term))
    k_alpha = 2.0 ** log2_k if log2_k < 1000 else math.inf
    return (a * w_c + b - beta * (LN2 / 2.0) * v * v
            - (g_eps + (1.0 + alpha_m1) * log_inv_ea) / (n * alpha_m1) - beta * beta * k_alpha)


def optimise_df(w_c: float, n: float, gamma: float, eps_s: float, eps_ea: float,
                grid: int = 40) -> EatRate:
    """Maximise the DF rate over (w_t, log(alpha - 1)): a coarse grid, then Nelder-Mead.

    Every evaluated point is a valid bound (any tangent point and any alpha in (1, 3/2) give
    one), so the optimiser only affects tightness; the reported rate is re-evaluated with
    :func:`df_rate` at the reported point.
    """
    from scipy.optimize import minimize

    if w_c <= _W_LO:
        return EatRate(variant="df-conservative", rate_per_round=0.0, w_tangent=float("nan"),
                       alpha=None, a=0.0, b=0.0, h=0.0)
    lo_l, hi_l = math.log(ALPHA_M1_MIN), math.log(ALPHA_M1_MAX)
    wt = _wt_grid(w_c, grid)
    la = np.linspace(lo_l, hi_l, grid)
    with np.errstate(over="ignore", invalid="ignore"):
        r = df_rate(wt[:, None], np.exp(la)[None, :], w_c, n, gamma, eps_s, eps_ea)
    r = np.where(np.isfinite(r), r, -np.inf)
    i, j = np.unravel_index(int(np.argmax(r)), r.shape)
    w_lo, w_hi = _W_LO + 1e-9, W_QUANTUM - 1e-9
    g_eps = g_smooth(eps_s)
    log_inv_ea = math.log2(1.0 / eps_ea)
    u = min(max(1.0 / (2.0 * gamma), 1.0 - W_QUANTUM), W_QUANTUM)
    var_u = u * (1.0 - gamma * u)

    def neg(p):
        w, log_am1 = p  # tangent point and ln(alpha - 1)
        if not (w_lo < w < w_hi and lo_l <= log_am1 <= hi_l):
            return 1e6
        v = _df_rate_scalar(w, math.exp(log_am1), w_c, n, gamma, g_eps, log_inv_ea, var_u)
        return -v if math.isfinite(v) else 1e6

    best = (float(wt[i]), float(la[j]), float(r[i, j]))
    res = minimize(neg, x0=[wt[i], la[j]], method="Nelder-Mead",
                   options={"xatol": 1e-10, "fatol": 1e-13, "maxiter": 600,
                            "initial_simplex": [[wt[i], la[j]],
                                                [min(wt[i] + 2e-3, w_hi - 1e-9), la[j]],
                                                [wt[i], min(la[j] + 0.5, hi_l)]]})
    if math.isfinite(res.fun) and -float(res.fun) > best[2]:
        best = (float(res.x[0]), float(res.x[1]), -float(res.fun))
    w_best, l_best, _ = best
    # Re-evaluate at the reported point so the rate is exactly the formula's value there.
    rate = float(df_rate(w_best, math.exp(l_best), w_c, n, gamma, eps_s, eps_ea))
    a, b = tangent(w_best)
    return EatRate(variant="df-conservative", rate_per_round=rate, w_tangent=float(w_best),
                   alpha=1.0 + math.exp(l_best), a=float(a), b=float(b),
                   h=float(a * w_c + b))


def quadrature_lines() -> tuple[tuple[float, float, float], ...]:
    """The shipped certified lines (w0, offset b, slope a) bounding H(AB|X=x,Y=y,E).

    Each line g(w) = a w + b lower-bounds H(A_i B_i | X_i = 0, Y_i = 0, E) for every quantum
    strategy with CHSH win probability w (:mod:`dicert.entropy.vnquad`, Brown-Fawzi-Fawzi
    2024). By the symmetry of the CHSH game it bounds every input pair [D]: a strategy that
    feeds inputs (x xor x0, y xor y0) to the devices and outputs (a xor x y0 xor x0 y0,
    b xor x0 y) wins with the same probability, and its (0, 0) outcome pair is a fixed
    relabelling of the original (x0, y0) pair. So g(w) bounds H(A_i B_i | X_i Y_i T_i E) on
    every round, with no (1 - gamma) factor, exactly as G does for the one-party bound.
    """
    from dicert.entropy.vnquad import load_vn_table

    return tuple(ln for ln in load_vn_table().lines["AB"] if ln[2] > 0.0)


def optimise_lines(variant: str, lines, w_c: float, n: float, gamma: float, eps_s: float,
                   eps_ea: float) -> EatRate:
    """Best rate over a finite set of certified affine bounds (w0, b, a) (and alpha for DF).

    Every line is a valid single-round bound for all w, so choosing the line after the data
    is allowed exactly like choosing the tangent point (Dupuis, Fawzi & Renner, Commun. Math.
    Phys. 379, 867 (2020): any min-tradeoff function fixed before the data is valid; ours are
    all valid simultaneously).
    """
    from scipy.optimize import minimize_scalar

    name = "df-conservative" if variant == "df-conservative" else "dfr"
    if w_c <= _W_LO or not lines:
        return EatRate(variant=name, rate_per_round=0.0, w_tangent=float("nan"), alpha=None,
                       a=0.0, b=0.0, h=0.0)
    w0 = np.array([ln[0] for ln in lines])
    b = np.array([ln[1] for ln in lines])
    a = np.array([ln[2] for ln in lines])
    if variant == "dfr":
        r = dfr_rate_ab(a, b, w_c, n, gamma, eps_s, eps_ea)
        k = int(np.argmax(r))
        return EatRate(variant="dfr", rate_per_round=float(r[k]), w_tangent=float(w0[k]),
                       alpha=None, a=float(a[k]), b=float(b[k]), h=float(a[k] * w_c + b[k]))
    if variant != "df-conservative":
        raise ParameterError(f"unknown EAT variant {variant!r}")
    la = np.linspace(math.log(ALPHA_M1_MIN), math.log(ALPHA_M1_MAX), 80)
    with np.errstate(over="ignore", invalid="ignore"):
        r = df_rate_ab(a[:, None], b[:, None], np.exp(la)[None, :], w_c, n, gamma, eps_s,
                       eps_ea)
    r = np.where(np.isfinite(r), r, -np.inf)
    best = (-np.inf, 0, 0.0)
    coarse = r.max(axis=1)
    for k in np.argsort(-coarse)[:4]:  # refine alpha on the four best lines
        k = int(k)
        j = int(np.argmax(r[k]))
        lo, hi = la[max(j - 1, 0)], la[min(j + 1, len(la) - 1)]

        def neg(x, k=k):
            with np.errstate(over="ignore", invalid="ignore"):
                v = float(df_rate_ab(a[k], b[k], math.exp(x), w_c, n, gamma, eps_s, eps_ea))
            return -v if math.isfinite(v) else 1e6

        res = minimize_scalar(neg, bounds=(lo, hi), method="bounded",
                              options={"xatol": 1e-6})
        cand = (-float(res.fun), k, float(res.x)) if -float(res.fun) > r[k, j] else \
            (float(r[k, j]), k, float(la[j]))
        if cand[0] > best[0]:
            best = cand
    _, k, lam1 = best
    rate = float(df_rate_ab(a[k], b[k], math.exp(lam1), w_c, n, gamma, eps_s, eps_ea))
    return EatRate(variant="df-conservative", rate_per_round=rate, w_tangent=float(w0[k]),
                   alpha=1.0 + math.exp(lam1), a=float(a[k]), b=float(b[k]),
                   h=float(a[k] * w_c + b[k]))


def optimise_rate(variant: str, w_c: float, n: float, gamma: float, eps_s: float,
                  eps_ea: float, single_round: str = "analytic-vn-A") -> EatRate:
    """Optimised per-round rate for ``variant`` ("df-conservative" | "dfr").

    ``single_round`` "analytic-vn-A" (tangents of G) or "radau-vn-AB" (the shipped certified
    quadrature lines, :func:`quadrature_lines`).
    """
    if single_round == "radau-vn-AB":
        return optimise_lines(variant, quadrature_lines(), w_c, n, gamma, eps_s, eps_ea)
    if single_round != "analytic-vn-A":
        raise ParameterError(f"unknown single-round bound {single_round!r}")
    if variant == "df-conservative":
        return optimise_df(w_c, n, gamma, eps_s, eps_ea)
    if variant == "dfr":
        return optimise_dfr(w_c, n, gamma, eps_s, eps_ea)
    raise ParameterError(f"unknown EAT variant {variant!r}")


# --------------------------------------------------------------------------- thresholds


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class EatThreshold:
    """The integer acceptance threshold and the win rate certified at it."""

    acceptance: str  # "losses" | "wins"
    count_limit: int  # L_max (accept iff L <= L_max) or W_min (accept iff W >= W_min)
    tolerance: float  # delta as declared or derived
    certified_win_rate: float  # w_c
    derived: bool


def _binomial_limit(acceptance: str, eps: float, n: int, p: float) -> int:
    """L_max = min{l : P[Bin(n, p) > l] <= eps} ("losses") or W_min = max{w : P[Bin(n, p) < w]
    <= eps} ("wins"), by integer bisection on scipy.stats.binom.sf / cdf.

    At most ceil(log2(n + 2)) + 1 steps of closed-form tail evaluations (regularised incomplete
    beta), so it ends for every n; scipy's own quantile search (binom.isf / ppf) can run for
    minutes or return NaN for n near 2**53 and tiny eps. A NaN tail counts as "above eps",
    which can only loosen the threshold and so lower the certified win rate (never optimistic).
    """
    from scipy.stats import binom

    if acceptance == "losses":
        lo, hi = -1, n  # sf(-1) = 1 > eps, sf(n) = 0 <= eps
        while hi - lo > 1:
            mid = (lo + hi) // 2
            if float(binom.sf(mid, n, p)) <= eps:
                hi = mid
            else:
                lo = mid
        return hi
    lo, hi = 0, n + 1  # P[W < 0] = 0 <= eps, P[W < n + 1] = 1 > eps
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if float(binom.cdf(mid - 1, n, p)) <= eps:
            lo = mid
        else:
            hi = mid
    return lo


def threshold(params: EatParams, n: int, gamma: float) -> EatThreshold:
    """Integer acceptance threshold from the pre-declared parameters and the number of rounds.

    With ``tolerance`` None, delta is derived from ``eps_comp`` by the exact binomial tail
    (scipy.stats.binom): L_max is the smallest l with P[Bin(n, gamma (1 - w_exp)) > l] <=
    eps_comp; W_min the largest w with P[Bin(n, gamma w_exp) < w] <= eps_comp.
    """
    w = params.expected_win_probability
    ng = n * gamma
    if params.tolerance is not None:
        delta = params.tolerance
        if params.acceptance == "losses":
            limit = math.floor(ng * (1.0 - w + delta))
        else:
            limit = math.ceil(ng * (w - delta))
        derived = False
    else:
        limit = _binomial_limit(params.acceptance, params.eps_comp, n,
                                gamma * (1.0 - w) if params.acceptance == "losses" else gamma * w)
        delta = (limit / ng - (1.0 - w)) if params.acceptance == "losses" else (w - limit / ng)
        derived = True
    limit = max(int(limit), 0)
    w_c = 1.0 - limit / ng if params.acceptance == "losses" else limit / ng
    return EatThreshold(acceptance=params.acceptance, count_limit=limit, tolerance=float(delta),
                        certified_win_rate=float(min(w_c, W_QUANTUM)), derived=derived)


def abort_probability(params_or_threshold: Any, n: int, gamma: float, win_probability: float,
                      params: EatParams | None = None) -> float:
    """Probability that honest i.i.d. devices with ``win_probability`` abort (exact binomial)."""
    from scipy.stats import binom

    th = params_or_threshold
    if th.acceptance == "losses":
        return float(binom.sf(th.count_limit, n, gamma * (1.0 - win_probability)))
    return float(binom.cdf(th.count_limit - 1, n, gamma * win_probability))


def chernoff_tolerance(n: float, gamma: float, w_exp: float, eps_comp: float) -> float:
    """delta = sqrt(3 (1 - w_exp) ln(1/eps_comp) / (n gamma)) (multiplicative Chernoff bound).

    A Chernoff-type approximation used for rate tables; the exact binomial tail is tighter.
    """
    return math.sqrt(3.0 * (1.0 - w_exp) * math.log(1.0 / eps_comp) / (n * gamma))


# --------------------------------------------------------------------------- certification


def eat_min_entropy(params: EatParams, n: int, gamma: float) -> tuple[float, EatThreshold,
                                                                        EatRate]:
    """Certified smooth min-entropy on acceptance (bits, >= 0), the threshold and the rate.

    Depends only on quantities fixed before the run (cached: repeated certifications under
    one protocol and one n reuse the optimisation).
    """
    return _eat_min_entropy_cached(params, int(n), float(gamma))


@functools.lru_cache(maxsize=256)
def _eat_min_entropy_cached(params: EatParams, n: int, gamma: float):
    th = threshold(params, n, gamma)
    rate = optimise_rate(params.variant, th.certified_win_rate, n, gamma, params.eps_s,
                         params.eps_ea, getattr(params, "single_round", "analytic-vn-A"))
    bits = max(0.0, n * rate.rate_per_round) if math.isfinite(rate.rate_per_round) else 0.0
    return float(bits), th, rate


def _single_round_details(params: Any) -> dict[str, Any]:
    """The record's description of the single-round bound behind the rate."""
    if getattr(params, "single_round", "analytic-vn-A") == "radau-vn-AB":
        from dicert.entropy.vnquad import REFERENCE as _RADAU_REF
        from dicert.entropy.vnquad import load_vn_table

        tab = load_vn_table()
        return {
            "method": "radau-vn-AB",
            "bound": "H(A_i B_i | X_i Y_i T_i E) >= tangent_offset_b + tangent_slope_a * w "
                     "for every quantum strategy (certified affine line; tangent_point is the "
                     "win probability at which its duals were optimised)",
            "reference": _RADAU_REF,
            "quadrature_nodes": tab.nodes, "relaxation": tab.level,
            "table_sha256": tab.sha256,
        }
    return {"method": "analytic-vn-A", "reference": REFERENCES_DF[2]}


def _eat_assumptions(gamma: float, gen: Any) -> tuple[str, ...]:
    """The assumptions an entropy-accumulation certificate rests on."""
    return (
        "devices are quantum and the adversary may hold quantum side information",
        "no communication between the two stations during a round; the devices' rounds are "
        "sequential (entropy accumulation channel structure)",
        "settings drawn independently of the devices and of any adversary, with the known "
        f"probabilities (gamma = {gamma:g}, uniform test settings, generation settings {gen})",
        "the round type (test or generation) and the settings of each round stay unknown to "
        "the devices until that round",
        "number of rounds n, gamma and the acceptance threshold fixed before the run; only "
        "the tangent point and alpha are optimised after the data",
        "trusted classical post-processing and trial recording",
    )


# long: about 30 of its lines are the numpydoc docstring
def certify_eat(counts: Any, params: EatParams, design: Any = None, *,
                harvest: Any = None) -> FiniteSizeResult:
    """Certify a run by entropy accumulation (quantum side information).

    Parameters
    ----------
    counts : array of int, shape (2, 2, 2, 2, 2)
        Trial counts indexed [t, x, y, a, b].
    params : EatParams
        Variant, expected win probability, tolerance (or eps_comp), eps_s, eps_ea.
    design : SettingsDesign, optional
        gamma and generation settings (default gamma = 1).
    harvest : object with ``parties`` and ``rounds``, optional
        Must be parties "AB", rounds "all": the bound is on A^n B^n.

    Returns
    -------
    FiniteSizeResult
        method "eat-df-conservative" or "eat-dfr"; smoothing_eps = eps_s; entropy_error =
        eps_ea; total_error(eps_ext) = eps_ea + 2 eps_s + eps_ext.

    References
    ----------
    Dupuis, Fawzi & Renner (2020); Arnon-Friedman, Renner & Vidick (2019); Dupuis & Fawzi
    (2019); Brown, Ragy & Colbeck (2020). See the module docstring.
    """
    from dicert.finite.martingale import check_counts, game_counts

    if not isinstance(params, EatParams):
        raise ParameterError("certify_eat needs EatParams")
    c, gamma, gen = check_counts(counts, design)
    if harvest is not None and (getattr(harvest, "parties", "AB") != "AB"
                                or harvest.select != "all"):
        raise ParameterError("entropy accumulation bounds the pair of outcomes of every round; "
                             "harvest must be parties 'AB', select 'all'")
    n, n_test, wins = game_counts(c)
    if n == 0:
        raise ParameterError("no trials in the counts")
    if params.rounds is not None and n != params.rounds:
        raise ParameterError(f"the protocol declares rounds = {params.rounds}, but the log "
                             f"has {n} trials")
    losses = n_test - wins
    bits, th, rate = eat_min_entropy(params, n, gamma)
    if th.acceptance == "losses":
        accepted = losses <= th.count_limit
        why = f"{losses} test-round losses exceed the pre-declared limit {th.count_limit}"
    else:
        accepted = wins >= th.count_limit
        why = f"{wins} test-round wins fall short of the pre-declared minimum {th.count_limit}"
    details: dict[str, Any] = {
        "trials": n, "test_rounds": n_test, "wins": wins, "losses": losses, "gamma": gamma,
        "generation_settings": list(gen), "acceptance": th.acceptance,
        "count_limit": th.count_limit, "expected_win_probability":
            params.expected_win_probability, "tolerance": th.tolerance,
        "tolerance_derived_from_eps_comp": th.derived, "certified_win_rate":
            th.certified_win_rate, "tangent_point": rate.w_tangent, "tangent_slope_a": rate.a,
        "tangent_offset_b": rate.b, "min_tradeoff_h": rate.h, "alpha": rate.alpha,
        "rate_per_round_bits": rate.rate_per_round, "output_alphabet_d": D_OUT,
        "raw_bits": 2 * n, "min_entropy_if_accepted_bits": bits,
    }
    if params.variant == "df-conservative":
        details["constants"] = CONSERVATIVE_CONSTANTS
        details["g_eps_s"] = g_smooth(params.eps_s)
        details["variance_f"] = float(df_variance(rate.a, gamma))
    details["single_round"] = _single_round_details(params)
    if not math.isfinite(float(rate.w_tangent)):
        details["tangent_point"] = None
    if not accepted:
        details["abort_reason"] = why
    elif bits <= 0:
        details["note"] = "accepted, but the finite-size bound is not positive: 0 bits certified"
    assumptions = _eat_assumptions(gamma, gen)
    refs = REFERENCES_DF if params.variant == "df-conservative" else REFERENCES_DFR
    if getattr(params, "single_round", "analytic-vn-A") == "radau-vn-AB":
        from dicert.entropy.vnquad import REFERENCE as _RADAU_REF

        refs = tuple(r for r in refs if not r.startswith("A. Acin")) + (_RADAU_REF,)
    return FiniteSizeResult(
        method=params.method_name, side_information="quantum", accepted=bool(accepted),
        certified_min_entropy_bits=bits if accepted else 0.0,
        eps={"eps_s": params.eps_s, "eps_ea": params.eps_ea},
        smoothing_eps=params.eps_s, entropy_error=params.eps_ea, assumptions=assumptions,
        references=refs, details=details)


__all__ = [
    "EatRate",
    "EatThreshold",
    "abort_probability",
    "certify_eat",
    "chernoff_tolerance",
    "df_rate",
    "df_rate_ab",
    "dfr_rate_ab",
    "optimise_lines",
    "quadrature_lines",
    "df_variance",
    "dfr_rate",
    "eat_min_entropy",
    "g_smooth",
    "optimise_df",
    "optimise_dfr",
    "optimise_rate",
    "tangent",
    "threshold",
]
