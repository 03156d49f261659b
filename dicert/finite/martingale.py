r"""Martingale (Azuma-Hoeffding) certification with a pre-declared CHSH threshold.

Side information: classical only. Devices may have memory and need not be i.i.d.

The statement implemented (corrected form)
-------------------------------------------
Protocol: n rounds (n fixed before the run). Each round is a test round with probability
gamma (settings x, y uniform and independent) and otherwise a generation round with fixed
settings (x0, y0); all settings are drawn independently of the devices and of the adversary's
classical information lambda. The martingale estimator

    I_hat = (1/n) sum_i Z_i,  Z_i = 1[t_i = 1] (4/gamma) (-1)^(x_i y_i) (-1)^(a_i XOR b_i),

uses the KNOWN settings probabilities, so E[Z_i | past, lambda] = S_i, the CHSH value of the
round-i behaviour given the past (Pironio et al. 2010, SI). Z_i lies in an interval of width
c = 8/gamma. The protocol accepts iff I_hat >= S_th, with S_th fixed in the protocol.

Claim. Let mu = c sqrt(ln(1/eps_est) / (2n)) and k = n f(S_th - mu), with f the per-round
min-entropy bound (convex, increasing, 0 for S <= 2). For every device with classical side
information lambda, the sub-normalised state of (R, settings, lambda) restricted to acceptance
splits into a part of weight <= eps_est and a part whose guessing probability is <= 2^-k.
Hence, after hashing R to m bits with a two-universal family (leftover hash lemma),

    P(accept) * d(output | accept, uniform) <= eps_est + eps_ext    if m <= k - 2 log2(1/eps_ext).

Proof sketch.
1. Per-round guessing bound. For each lambda and history, the round-i box is quantum with
   CHSH value S_i, and max_a P(a | x, past, lambda) <= 2^-f(S_i) for EITHER input x
   (Pironio et al. 2010, eq. (3) and SI; the single-party bound does not depend on x by the
   symmetry of CHSH). Since P(ab|xy) <= P(a|x) it bounds the pair too. The "npa-AB" bound
   (dual-certified NPA level 1+AB bound on the pair at inputs (0, 0), convex and
   non-decreasing in S) holds for every input pair by the relabelling symmetry of CHSH
   (relabelling inputs and outputs maps any input pair to (0, 0) and keeps S).
2. Product. For a fixed candidate string r (and fixed settings s, lambda),
   P(R = r | s, lambda) = prod_i P(r_i | s, r_<i, lambda) <= prod_i 2^-f(S_i), each S_i evaluated
   on the history r_<i. Outcomes not harvested (Bob's in "A" mode) are summed out last to
   first: their conditional probabilities sum to 1 and the bound on the harvested factors is
   uniform over them.
3. Jensen. f is convex, so sum_i f(S_i) >= n f(mean S_i); f is increasing, so on the event
   G = {mean S_i >= S_th - mu} we get P(R = r, G | s, lambda) <= 2^-n f(S_th - mu).
4. Azuma-Hoeffding. Z_i - S_i are martingale differences with range c, so
   P(accept and not G) <= P(I_hat - mean S_i > mu) <= eps_est.
5. Restriction to acceptance. max_r P(r, accept | s, lambda) <= max_r P(r, accept, not G)
   + max_r P(r, G); averaging over (s, lambda) gives P_guess(R and accept) <= eps_est + 2^-k,
   i.e. the split above. The leftover hash lemma on the good part and the trivial bound on
   the bad part give the soundness error eps_est + eps_ext in "P(accept) x distance" form.
Harvest "generation" (spot-checking). Drop the test-round outcomes r_T from r: for each s,
P(r_gen, G | s) <= 2^(k_b n_T(s)) max_r P(r, G | s) with k_b bits per round, and averaging
over the binomial number of test rounds gives E[2^(k_b n_T)] = (1 - gamma + gamma 2^k_b)^n,
so the certified min-entropy is n f(S_th - mu) - n log2(1 - gamma + gamma 2^k_b).

Difference from the statement in the Nature paper (reproduced by
:func:`nature_2010_min_entropy`): there the threshold was the OBSERVED estimate,
H_min >= n f(I_hat - mu) "with probability 1 - delta". An observed-data threshold gives no
bound on the state conditioned on what happened; Pironio & Massar (2013) and Fehr, Gelles &
Schaffner (2013) restate it with a threshold fixed in advance and a bound on the acceptance
event. Here the certified amount never depends on I_hat beyond the accept/abort decision,
and the error is stated in "P(accept) x distance" form, so no log2(1/P(accept)) term appears;
someone wanting the min-entropy of the normalised state given acceptance must subtract
log2(1/P(accept)) and can only bound it when P(accept) is known to exceed eps_est.
The margin uses the estimator's true range 8/gamma (methods README), tighter than the
(1/q + 2 sqrt 2) sqrt(2 ln(1/delta)/n) of the paper.

References
----------
.. [1] S. Pironio et al., "Random numbers certified by Bell's theorem", Nature 464,
   1021-1024 (2010), eq. (3) and Supplementary Information.
.. [2] S. Pironio, S. Massar, "Security of practical private randomness generation",
   Phys. Rev. A 87, 012336 (2013).
.. [3] S. Fehr, R. Gelles, C. Schaffner, "Security and composability of randomness
   expansion from Bell inequalities", Phys. Rev. A 87, 012335 (2013).
.. [4] K. Azuma, "Weighted sums of certain dependent random variables", Tohoku Math. J. 19,
   357-367 (1967); W. Hoeffding, J. Amer. Stat. Assoc. 58, 13-30 (1963).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from dicert.entropy.analytic import TSIRELSON, min_entropy_single
from dicert.errors import ParameterError
from dicert.finite.params import MartingaleParams
from dicert.finite.result import FiniteSizeResult

REFERENCES = (
    "S. Pironio et al., Nature 464, 1021-1024 (2010), eq. (3) and SI",
    "S. Pironio, S. Massar, Phys. Rev. A 87, 012336 (2013)",
    "S. Fehr, R. Gelles, C. Schaffner, Phys. Rev. A 87, 012335 (2013)",
    "K. Azuma, Tohoku Math. J. 19, 357 (1967); W. Hoeffding, JASA 58, 13 (1963)",
)


# --------------------------------------------------------------------------- counts


def check_counts(counts: Any, design: Any = None) -> tuple[np.ndarray, float, tuple[int, int]]:
    """Validate counts [t, x, y, a, b] against the settings design; return (counts, gamma, gen).

    Raises :class:`ParameterError` if the counts are malformed, if generation rounds appear
    with gamma = 1, if a generation round used other settings than the declared ones, or if a
    spot-checking design meets a log with no generation round at all (a log without a t column
    read under gamma < 1) where that is implausible (probability gamma^n < 1e-9).
    """
    c = np.asarray(counts)
    if c.shape != (2, 2, 2, 2, 2):
        raise ParameterError(f"counts must have shape (2,2,2,2,2) indexed [t,x,y,a,b], "
                             f"got {c.shape}")
    if not np.issubdtype(c.dtype, np.integer):
        if not np.all(np.isfinite(c)) or not np.all(c == np.round(c)):
            raise ParameterError("counts must be integers")
    c = c.astype(np.int64)
    if (c < 0).any():
        raise ParameterError("counts must be non-negative")
    gamma = float(getattr(design, "gamma", 1.0)) if design is not None else 1.0
    gen = tuple(int(v) for v in getattr(design, "generation", (0, 0))) if design is not None \
        else (0, 0)
    if not (0.0 < gamma <= 1.0):
        raise ParameterError(f"gamma must be in (0, 1], got {gamma!r}")
    n = int(c.sum())
    gen_rounds = c[0]
    if gamma >= 1.0 and gen_rounds.sum() > 0:
        raise ParameterError(f"{int(gen_rounds.sum())} generation rounds (t = 0) in the log, "
                             "but the protocol has gamma = 1 (every round a test round)")
    if gamma < 1.0:
        per_setting = gen_rounds.sum(axis=(2, 3))
        other = int(per_setting.sum() - per_setting[gen[0], gen[1]])
        if other:
            raise ParameterError(f"{other} generation rounds (t = 0) used settings other than "
                                 f"the declared generation settings {gen}")
        if n > 0 and gen_rounds.sum() == 0 and n * math.log10(gamma) < -9:
            raise ParameterError(f"no generation round among {n} trials although gamma = "
                                 f"{gamma:g}; does the log lack its test-round (t) column?")
    return c, gamma, gen


def game_counts(counts: np.ndarray) -> tuple[int, int, int]:
    """(n, test rounds, CHSH-game wins among test rounds) from counts [t, x, y, a, b]."""
    c = np.asarray(counts, dtype=np.int64)
    t = c[1]
    x = np.arange(2).reshape(2, 1, 1, 1)
    y = np.arange(2).reshape(1, 2, 1, 1)
    a = np.arange(2).reshape(1, 1, 2, 1)
    b = np.arange(2).reshape(1, 1, 1, 2)
    win = ((a ^ b) == (x & y))
    return int(c.sum()), int(t.sum()), int(t[np.broadcast_to(win, t.shape)].sum())


# --------------------------------------------------------------------------- bounds


def azuma_chsh_margin(n: int, gamma: float, eps: float) -> float:
    """Margin mu = (8/gamma) sqrt(ln(1/eps) / (2n)) of the martingale CHSH estimator.

    References: Azuma (1967); Hoeffding (1963), with the estimator range 8/gamma.
    """
    if n <= 0:
        return math.inf
    if not (0.0 < eps < 1.0):
        raise ParameterError(f"eps_est must be in (0, 1), got {eps!r}")
    return (8.0 / gamma) * math.sqrt(math.log(1.0 / eps) / (2.0 * n))


def per_round_min_entropy(chsh: float, single_round: str = "analytic-A") -> tuple[float, dict]:
    """Per-round bound f(S) in bits used by the martingale method, and provenance details.

    "analytic-A": f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) (Pironio et al. 2010, eq. (3)).
    "npa-AB": the entropy stage's certified lower bound on H_min(AB|E) per round
    (:func:`dicert.entropy.pair_min_entropy_bound`, NPA level 1+AB with dual certificates),
    convex and non-decreasing in S as Jensen's step needs.
    """
    s = float(chsh)
    if single_round == "analytic-A":
        return float(min_entropy_single(s)), {"single_round": "analytic-A"}
    if single_round == "npa-AB":
        if s <= 2.0:
            return 0.0, {"single_round": "npa-AB"}
        try:
            from dicert.entropy import pair_min_entropy_bound
        except ImportError:  # pragma: no cover - shipped with the package
            raise ParameterError("single_round = 'npa-AB' needs the NPA bound of "
                                 "dicert.entropy, which is not available") from None
        f = float(pair_min_entropy_bound(min(s, TSIRELSON)))
        if not (math.isfinite(f) and f >= 0.0):
            raise ParameterError(f"NPA pair bound returned {f!r} at S = {s:g}")
        return f, {"single_round": "npa-AB", "npa_level": "1+AB"}
    raise ParameterError(f"unknown single_round bound {single_round!r}")


def generation_harvest_penalty_bits(n: int, gamma: float, bits_per_round: int) -> float:
    """n log2(1 - gamma + gamma 2^k): entropy lost by dropping the test-round outcomes.

    E[2^(k N_T)] for N_T ~ Binomial(n, gamma) (see the module docstring).
    """
    if gamma >= 1.0:
        return 0.0
    return float(n * math.log2(1.0 + gamma * (2.0 ** bits_per_round - 1.0)))


def martingale_min_entropy(n: int, params: MartingaleParams, *, gamma: float = 1.0,
                           harvest_parties: str = "AB", harvest_rounds: str = "all",
                           ) -> tuple[float, dict]:
    """Certified min-entropy on acceptance, n f(S_th - mu) (minus the harvest penalty).

    Depends only on quantities fixed before the run; returns (bits, details).
    """
    mu = azuma_chsh_margin(n, gamma, params.eps_est)
    s_cert = params.chsh_threshold - mu
    f, info = per_round_min_entropy(s_cert, params.single_round)
    bits = n * f
    penalty = 0.0
    if harvest_rounds == "generation":
        penalty = generation_harvest_penalty_bits(n, gamma, len(harvest_parties))
    bits = max(0.0, bits - penalty)
    details = {"azuma_margin": mu if math.isfinite(mu) else None,
               "chsh_certified": s_cert if math.isfinite(s_cert) else None,
               "entropy_per_round_bits": f, "generation_harvest_penalty_bits": penalty,
               **info}
    return float(bits), details


def certify_martingale(counts: Any, params: MartingaleParams, design: Any = None, *,
                       harvest: Any = None) -> FiniteSizeResult:
    """Certify a run by the martingale method with the protocol's pre-declared threshold.

    Parameters
    ----------
    counts : array of int, shape (2, 2, 2, 2, 2)
        Trial counts indexed [t, x, y, a, b].
    params : MartingaleParams
        Threshold S_th, eps_est and the single-round bound.
    design : SettingsDesign, optional
        gamma and generation settings (default: gamma = 1, uniform settings every round).
    harvest : object with ``parties`` ("A" | "AB") and ``select`` ("all" | "generation")
        Which outcomes form the raw string (default AB of all rounds).

    Returns
    -------
    FiniteSizeResult
        side_information "classical"; certified_min_entropy_bits = n f(S_th - mu) on acceptance (see
        the module docstring for the statement and its proof); entropy_error = eps_est.

    References
    ----------
    See the module docstring: Pironio et al. (2010); Pironio & Massar (2013); Fehr, Gelles &
    Schaffner (2013); Azuma (1967).
    """
    if not isinstance(params, MartingaleParams):
        raise ParameterError("certify_martingale needs MartingaleParams")
    c, gamma, gen = check_counts(counts, design)
    parties = getattr(harvest, "parties", "AB") if harvest is not None else "AB"
    rounds = harvest.select if harvest is not None else "all"
    if parties not in ("A", "AB") or rounds not in ("all", "generation"):
        raise ParameterError(f"harvest must be parties 'A'|'AB', select 'all'|'generation'; "
                             f"got {parties!r}, {rounds!r}")
    if rounds == "generation" and gamma >= 1.0:
        raise ParameterError("harvest select 'generation' needs gamma < 1")
    if params.single_round == "npa-AB" and parties != "AB":
        raise ParameterError("single_round 'npa-AB' bounds the pair of outcomes; "
                             "harvest parties must be 'AB'")
    n, n_test, wins = game_counts(c)
    if n == 0:
        raise ParameterError("no trials in the counts")
    losses = n_test - wins
    chsh_hat = 4.0 * (wins - losses) / (gamma * n)
    accepted = chsh_hat >= params.chsh_threshold
    bound_bits, bd = martingale_min_entropy(n, params, gamma=gamma, harvest_parties=parties,
                                            harvest_rounds=rounds)
    raw_bits = len(parties) * (n if rounds == "all" else int(c[0].sum()))
    details: dict[str, Any] = {
        "trials": n, "test_rounds": n_test, "wins": wins, "losses": losses, "gamma": gamma,
        "generation_settings": list(gen), "chsh_estimate": chsh_hat,
        "chsh_threshold": params.chsh_threshold, "estimator_width": 8.0 / gamma,
        "harvest_parties": parties, "harvest_select": rounds, "raw_bits": raw_bits,
        "min_entropy_if_accepted_bits": bound_bits, **bd,
    }
    if not accepted:
        details["abort_reason"] = (f"martingale CHSH estimate {chsh_hat:.6g} is below the "
                                   f"pre-declared threshold {params.chsh_threshold:g}")
    bits = min(bound_bits, float(raw_bits)) if accepted else 0.0
    assumptions = (
        "devices are quantum: each round's behaviour is a quantum box (Born rule)",
        "no communication between the two stations during a round",
        "settings drawn independently of the devices and of any adversary, with the known "
        f"probabilities (test rounds with probability gamma = {gamma:g}, uniform test settings"
        f"{'' if gamma >= 1 else f', generation settings {gen}'})",
        "the round type (test or generation) and the settings of each round stay unknown to "
        "the devices until that round",
        "adversary holds classical side information only (not entangled with the devices)",
        "devices may have memory; rounds need not be independent or identically distributed",
        "number of trials n and the threshold S_th fixed before the run",
        "trusted classical post-processing and trial recording",
    )
    return FiniteSizeResult(
        method="martingale-azuma", side_information="classical", accepted=bool(accepted),
        certified_min_entropy_bits=bits, eps={"eps_est": params.eps_est}, smoothing_eps=0.0,
        entropy_error=params.eps_est, assumptions=assumptions, references=REFERENCES,
        details=details)


def nature_2010_min_entropy(n: int, chsh_observed: float, delta: float,
                            q: float = 0.25) -> float:
    """The ORIGINAL (uncorrected) finite-size statement of Pironio et al. (2010).

    H_min >= n f(I_hat - mu) with mu = (1/q + 2 sqrt 2) sqrt(2 ln(1/delta) / n), q the
    smallest settings probability and I_hat the OBSERVED estimate. Provided only to
    reproduce the published number (42 bits at 99% confidence from n = 3016, I_hat = 2.414);
    it is not used for certification because the threshold depends on the data (see the
    module docstring for the corrected statement of :func:`certify_martingale`).

    References
    ----------
    .. [1] S. Pironio et al., Nature 464, 1021-1024 (2010), main text and SI.
    """
    if n <= 0 or not (0 < delta < 1) or not (0 < q <= 1):
        raise ParameterError("need n > 0, 0 < delta < 1, 0 < q <= 1")
    mu = (1.0 / q + 2.0 * math.sqrt(2.0)) * math.sqrt(2.0 * math.log(1.0 / delta) / n)
    return float(n * min_entropy_single(chsh_observed - mu))


__all__ = [
    "azuma_chsh_margin",
    "certify_martingale",
    "check_counts",
    "game_counts",
    "generation_harvest_penalty_bits",
    "martingale_min_entropy",
    "nature_2010_min_entropy",
    "per_round_min_entropy",
]
