"""Bell (CHSH) estimation with finite-statistics bounds valid for devices with memory.

Input is the counts table ``counts[t, x, y, a, b]`` of :func:`dicert.logs.summarize_log`; no file
access happens here.

Two estimators of the CHSH value S = E00 + E01 + E10 - E11 are reported:

* the standard ratio estimator from the per-setting correlators E_xy (descriptive; its standard
  errors assume i.i.d. trials), and
* the martingale estimator with the *known* settings distribution, which is what the
  finite-statistics bound uses:

  ``I_hat = (1/n) sum_i t_i (-1)^(x_i y_i) (-1)^(a_i XOR b_i) / p(x_i, y_i | test)``

  where every round is a test round with probability ``gamma`` and test settings are uniform,
  so p = gamma/4. Each term lies in [-4/gamma, 4/gamma] (width 8/gamma) and its conditional
  mean given the past is that round's CHSH value, so the Azuma-Hoeffding inequality gives a
  lower confidence bound valid without any i.i.d. assumption:

  ``S_lower = I_hat - (8/gamma) sqrt(ln(1/eps) / (2 n))``.

The p-value of the local-realist hypothesis uses the CHSH-game form: with uniform test
settings chosen independently of the devices, every test round of a local model is won with
conditional probability at most 3/4 whatever happened before, so the number of wins is
stochastically dominated by Binomial(n_test, 3/4) and ``P = P[Bin(n_test, 3/4) >= W]`` is a
valid p-value for devices with memory.

References
----------
.. [1] J. F. Clauser, M. A. Horne, A. Shimony, R. A. Holt, PRL 23, 880 (1969).
.. [2] S. Pironio et al., Nature 464, 1021 (2010), SI (martingale estimator with known
   settings probabilities and the Azuma-Hoeffding bound).
.. [3] K. Azuma, Tohoku Math. J. 19, 357 (1967); W. Hoeffding, JASA 58, 13 (1963).
.. [4] R. D. Gill, "Time, finite statistics, and Bell's fifth position", Proc. Foundations of
   Probability and Physics 2 (2003) (binomial bound for the CHSH game with memory).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from dicert._display import displayed
from dicert.errors import ParameterError

#: CHSH sign (-1)^(x y) per setting pair.
CHSH_SIGN = np.array([[1, 1], [1, -1]], dtype=np.int64)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SettingsDesign:
    """The settings distribution a protocol fixes before the run.

    Every round is a test round with probability ``gamma`` (1 = every round; uniform settings),
    test rounds draw x and y uniformly and independently, generation rounds use the fixed
    settings ``generation``.
    """

    gamma: float = 1.0
    generation: tuple[int, int] = (0, 0)

    def __post_init__(self) -> None:
        if not (0.0 < self.gamma <= 1.0) or not math.isfinite(self.gamma):
            raise ParameterError(f"gamma must be in (0, 1], got {self.gamma!r}")
        if tuple(self.generation) not in ((0, 0), (0, 1), (1, 0), (1, 1)):
            raise ParameterError(f"generation settings must be a pair of bits, got {self.generation!r}")

    @property
    def spot_checking(self) -> bool:
        return self.gamma < 1.0

    @property
    def estimator_width(self) -> float:
        """Width of the range of one martingale-estimator term, 8/gamma."""
        return 8.0 / self.gamma

    def settings_probability(self, x: int, y: int) -> float:
        """Unconditional probability of settings (x, y) in a round."""
        p = self.gamma / 4.0
        if self.spot_checking and (x, y) == tuple(self.generation):
            p += 1.0 - self.gamma
        return p


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ChshEstimate:
    """CHSH estimates and finite-statistics bounds from one log.

    ``chsh_estimate`` is the weighted (martingale) estimate with the settings probabilities of
    the design, and ``chsh_lower_bound`` its lower confidence bound at error ``eps_est``; both and
    ``p_value_local`` hold for devices with memory. ``chsh_ratio_estimate`` (the sum of the four
    correlators) and the fields ending in ``_stderr`` assume i.i.d. trials (descriptive only).
    The names of earlier versions (``chsh`` for the ratio estimate, ``chsh_martingale``,
    ``chsh_lower``, ``eps``, ``test_trials``) remain as read-only aliases.
    """

    trials: int
    test_rounds: int
    counts_xyab: np.ndarray
    correlators: np.ndarray  # E[x, y]; NaN where a setting pair was never tested
    correlator_stderr: np.ndarray
    chsh_ratio_estimate: float  # sum of the four correlators (ratio estimator)
    chsh_stderr: float  # i.i.d. standard error of the ratio estimate (descriptive)
    win_probability: float  # among test rounds
    wins: int
    chsh_estimate: float  # weighted (martingale) estimate, known settings probabilities
    chsh_lower_bound: float  # chsh_estimate - margin, valid at error eps_est
    margin: float
    eps_est: float
    gamma: float
    p_value_local: float
    log10_p_value_local: float
    p_value_method: str = "binomial bound on CHSH-game wins (Gill 2003)"
    bound_method: str = "martingale estimator, Azuma-Hoeffding, width 8/gamma"
    gamma_source: str = "declared"  # "declared" | "observed" (t column, no design given) | "default"
    local_win_bound: float = 0.75  # best local win probability at the observed settings frequencies

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("chsh_estimate", self.chsh_estimate), ("chsh_lower_bound", self.chsh_lower_bound),
                ("eps_est", self.eps_est), ("test_rounds", self.test_rounds),
                ("p_value_local", self.p_value_local)]
        if full:
            rows += [("trials", self.trials), ("chsh_ratio_estimate", self.chsh_ratio_estimate),
                     ("chsh_stderr", self.chsh_stderr), ("margin", self.margin),
                     ("gamma", self.gamma), ("win_probability", self.win_probability),
                     ("log10_p_value_local", self.log10_p_value_local)]
        return rows

    # Names of earlier versions (read-only).
    chsh = property(lambda self: self.chsh_ratio_estimate)
    chsh_martingale = property(lambda self: self.chsh_estimate)
    chsh_lower = property(lambda self: self.chsh_lower_bound)
    eps = property(lambda self: self.eps_est)
    test_trials = property(lambda self: self.test_rounds)


def azuma_margin(n: int, width: float, eps: float) -> float:
    """Azuma-Hoeffding margin for the mean of n martingale differences of range ``width``.

    P[mean - mean of conditional means >= margin] <= eps with margin = width sqrt(ln(1/eps)/(2n)).
    """
    if n <= 0:
        return math.inf
    if not (0.0 < eps < 1.0):
        raise ParameterError(f"eps must be in (0, 1), got {eps!r}")
    return width * math.sqrt(math.log(1.0 / eps) / (2.0 * n))


def tested_counts(counts: np.ndarray) -> np.ndarray:
    """Counts N[x, y, a, b] of the test rounds (t = 1)."""
    counts = np.asarray(counts)
    if counts.shape != (2, 2, 2, 2, 2):
        raise ParameterError(f"counts must have shape (2,2,2,2,2) [t,x,y,a,b], got {counts.shape}")
    if (counts < 0).any():
        raise ParameterError("counts must be non-negative")
    return counts[1].astype(np.int64)


def game_statistics(counts: np.ndarray) -> tuple[int, int, int]:
    """(n, n_test, wins): all trials, test trials, CHSH-game wins (a XOR b = x AND y) among tests."""
    counts = np.asarray(counts, dtype=np.int64)
    tc = tested_counts(counts)
    wins = 0
    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    if (a ^ b) == (x & y):
                        wins += int(tc[x, y, a, b])
    return int(counts.sum()), int(tc.sum()), wins


def martingale_chsh(counts: np.ndarray, design: SettingsDesign) -> float:
    """The martingale CHSH estimator I_hat with the known settings probabilities."""
    counts = np.asarray(counts, dtype=np.int64)
    n = int(counts.sum())
    if n == 0:
        raise ParameterError("no trials")
    tc = tested_counts(counts)
    signed = 0
    for x in (0, 1):
        for y in (0, 1):
            same = int(tc[x, y, 0, 0] + tc[x, y, 1, 1])
            diff = int(tc[x, y, 0, 1] + tc[x, y, 1, 0])
            signed += int(CHSH_SIGN[x, y]) * (same - diff)
    return signed / (design.gamma / 4.0) / n


def _log_binom_pmf(j: int, n: int, p: float) -> float:
    return (math.lgamma(n + 1) - math.lgamma(j + 1) - math.lgamma(n - j + 1)
            + j * math.log(p) + (n - j) * math.log1p(-p))


def _log_tail_sum(start: int, n: int, p: float, step: int) -> float:
    """log of sum of Binomial(n, p) pmf from ``start`` moving by ``step`` (+1 up, -1 down) while
    the terms matter, in vectorised log-space chunks (pure numpy; no scipy import)."""
    q = 1.0 - p
    lead = _log_binom_pmf(start, n, p)
    total = 1.0  # sum relative to the leading term
    cur = 0.0  # log of current term relative to the leading term
    j = start
    chunk = 4096
    while True:
        if step > 0:
            js = np.arange(j, min(j + chunk, n), dtype=np.float64)
            if js.size == 0:
                break
            logr = np.log((n - js) / (js + 1.0)) + math.log(p / q)
        else:
            js = np.arange(j, max(j - chunk, 0), -1, dtype=np.float64)
            if js.size == 0:
                break
            logr = np.log(js / (n - js + 1.0)) + math.log(q / p)
        terms = cur + np.cumsum(logr)
        total += float(np.exp(terms).sum())
        cur = float(terms[-1])
        j += step * js.size
        if cur < math.log(total) - 45.0:  # remaining terms below 1e-19 of the sum (ratios shrink)
            break
        chunk = min(chunk * 4, 1 << 20)
    return lead + math.log(total)


def binomial_log10_p_value(wins: int, n_test: int, p_local: float = 0.75) -> float:
    """log10 P[Binomial(n_test, p_local) >= wins] (0 when there are no test rounds).

    Given in log form because strong violations give p-values far below the smallest double.
    Computed by summing the tail in log space (exact up to rounding); kept free of scipy so
    that ``dicert inspect`` starts fast. Tests compare it with ``scipy.stats.binom``.
    """
    if n_test == 0 or wins <= 0 or p_local >= 1.0:
        return 0.0
    if wins > n_test:
        return -math.inf
    mean = n_test * p_local
    if wins > mean:
        lp = _log_tail_sum(wins, n_test, p_local, +1)
    else:
        # Upper tail >= about 1/2 here: one minus the lower tail below wins.
        lower = math.exp(_log_tail_sum(wins - 1, n_test, p_local, -1))
        lp = math.log1p(-min(lower, 1.0)) if lower < 1.0 else 0.0
    return float(min(0.0, lp / math.log(10.0)))


def binomial_p_value(wins: int, n_test: int, p_local: float = 0.75) -> float:
    """P[Binomial(n_test, p_local) >= wins]; 1.0 when there are no test rounds."""
    return 10.0 ** binomial_log10_p_value(wins, n_test, p_local)


def local_win_bound(settings_counts: np.ndarray) -> float:
    """Largest CHSH-game win probability of a local model at the given settings frequencies.

    The maximum over the 16 deterministic local strategies (a0, a1, b0, b1) of
    sum_xy q(x, y) [a_x XOR b_y = x AND y], with q the normalised ``settings_counts[x, y]``
    (local models are mixtures of deterministic strategies, so their win probability is at
    most this; Fine 1982). It is 3/4 for uniform settings and at least 3/4 for any q.
    """
    q = np.asarray(settings_counts, dtype=np.float64).reshape(2, 2)
    tot = q.sum()
    if tot <= 0:
        return 0.75
    q = q / tot
    best = 0.0
    for k in range(16):
        a = ((k >> 3) & 1, (k >> 2) & 1)
        b = ((k >> 1) & 1, k & 1)
        w = sum(q[x, y] for x in (0, 1) for y in (0, 1) if (a[x] ^ b[y]) == (x & y))
        best = max(best, float(w))
    return max(best, 0.75)


def observed_design(counts: np.ndarray) -> SettingsDesign:
    """The settings design a log's counts suggest: gamma = observed fraction of test rounds,
    generation settings = the most frequent settings of generation rounds (informational only;
    a certificate needs the design fixed in advance)."""
    c = np.asarray(counts, dtype=np.int64)
    n = int(c.sum())
    n_test = int(c[1].sum())
    if n == 0 or n_test == n or n_test == 0:
        return SettingsDesign()
    gen = np.unravel_index(int(np.argmax(c[0].sum(axis=(2, 3)))), (2, 2))
    return SettingsDesign(gamma=n_test / n, generation=(int(gen[0]), int(gen[1])))


def estimate_chsh(counts: np.ndarray, design: SettingsDesign | None = None, eps: float = 1e-6) -> ChshEstimate:
    """Estimate the CHSH value and its lower confidence bound at error ``eps``.

    Parameters
    ----------
    counts : ndarray, shape (2, 2, 2, 2, 2)
        ``counts[t, x, y, a, b]``.
    design : SettingsDesign
        The settings distribution fixed before the run. Default: every round a test round
        (gamma = 1) when the counts hold no generation round; otherwise the OBSERVED design
        (gamma = fraction of test rounds, ``gamma_source = "observed"``), never silently 1,
        which would shrink the estimate by the factor gamma. A bound computed with an observed
        gamma is indicative only.
    eps : float
        Error probability of the lower bound.

    Notes
    -----
    The p-value of local realism uses the best local win probability at the OBSERVED test
    settings frequencies (:func:`local_win_bound`; 3/4 when they are uniform), so that
    biased settings cannot make a local device look non-local.

    Returns
    -------
    ChshEstimate

    References
    ----------
    See the module docstring.
    """
    counts = np.asarray(counts, dtype=np.int64)
    source = "declared"
    if design is None:
        if counts.shape == (2, 2, 2, 2, 2) and int(counts[0].sum()) > 0:
            design, source = observed_design(counts), "observed"
        else:
            design, source = SettingsDesign(), "default"
    tc = tested_counts(counts)
    n, n_test, wins = game_statistics(counts)
    if n == 0:
        raise ParameterError("the log holds no trials")
    corr = np.full((2, 2), np.nan)
    se = np.full((2, 2), np.inf)
    for x in (0, 1):
        for y in (0, 1):
            nxy = int(tc[x, y].sum())
            if nxy:
                e = (int(tc[x, y, 0, 0] + tc[x, y, 1, 1]) - int(tc[x, y, 0, 1] + tc[x, y, 1, 0])) / nxy
                corr[x, y] = e
                se[x, y] = math.sqrt(max(1.0 - e * e, 0.0) / nxy) if nxy > 1 else math.inf
    chsh = float(corr[0, 0] + corr[0, 1] + corr[1, 0] - corr[1, 1])
    chsh_se = float(math.sqrt(float((se**2).sum())))
    i_hat = martingale_chsh(counts, design)
    margin = azuma_margin(n, design.estimator_width, eps)
    return ChshEstimate(
        trials=n,
        test_rounds=n_test,
        counts_xyab=tc,
        correlators=corr,
        correlator_stderr=se,
        chsh_ratio_estimate=chsh,
        chsh_stderr=chsh_se,
        win_probability=wins / n_test if n_test else math.nan,
        wins=wins,
        chsh_estimate=i_hat,
        chsh_lower_bound=i_hat - margin,
        margin=margin,
        eps_est=eps,
        gamma=design.gamma,
        p_value_local=10.0 ** (lp := binomial_log10_p_value(wins, n_test, p_loc := local_win_bound(tc.sum(axis=(2, 3))))),
        log10_p_value_local=lp,
        p_value_method=("binomial bound on CHSH-game wins (Gill 2003) at the best local win "
                        f"probability {p_loc:.6g} for the observed test settings frequencies"),
        gamma_source=source,
        local_win_bound=p_loc,
    )


def clopper_pearson(k: int, n: int, alpha: float) -> tuple[float, float]:
    """Exact two-sided (1 - alpha) Clopper-Pearson interval for a binomial proportion (i.i.d.).

    References
    ----------
    .. [1] C. J. Clopper, E. S. Pearson, Biometrika 26, 404 (1934).
    """
    from scipy.stats import beta

    if n <= 0:
        return 0.0, 1.0
    lo = 0.0 if k == 0 else float(beta.ppf(alpha / 2, k, n - k + 1))
    hi = 1.0 if k == n else float(beta.ppf(1 - alpha / 2, k + 1, n - k))
    return lo, hi


def correlator_intervals(counts: np.ndarray, alpha: float) -> np.ndarray:
    """Per-setting Clopper-Pearson intervals on E_xy = 2 P(a=b|xy) - 1 (i.i.d. assumption).

    Returns an array of shape (2, 2, 2): [x, y, (low, high)].
    """
    tc = tested_counts(np.asarray(counts))
    out = np.zeros((2, 2, 2))
    for x in (0, 1):
        for y in (0, 1):
            k = int(tc[x, y, 0, 0] + tc[x, y, 1, 1])
            lo, hi = clopper_pearson(k, int(tc[x, y].sum()), alpha)
            out[x, y] = (2 * lo - 1, 2 * hi - 1)
    return out


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class BlockEstimate:
    """The CHSH estimate of one block of trials, with a two-sided Azuma interval at eps."""

    index: int
    first_trial: int
    trials: int
    chsh_estimate: float  # weighted (martingale) estimate of the block
    chsh_lower_bound: float
    chsh_upper_bound: float

    # Names of earlier versions (read-only).
    chsh = property(lambda self: self.chsh_estimate)
    chsh_lower = property(lambda self: self.chsh_lower_bound)
    chsh_upper = property(lambda self: self.chsh_upper_bound)


def block_estimates(
    block_counts: np.ndarray, block_trials: int, design: SettingsDesign | None = None, eps: float = 1e-3
) -> list[BlockEstimate]:
    """Per-block martingale CHSH values with intervals (each valid at error eps per side)."""
    design = design or SettingsDesign()
    out = []
    for k, c in enumerate(np.asarray(block_counts, dtype=np.int64)):
        n = int(c.sum())
        if n == 0:
            continue
        i_hat = martingale_chsh(c, design)
        m = azuma_margin(n, design.estimator_width, eps)
        out.append(
            BlockEstimate(
                index=k, first_trial=k * block_trials, trials=n, chsh_estimate=i_hat,
                chsh_lower_bound=i_hat - m, chsh_upper_bound=i_hat + m,
            )
        )
    return out


__all__ = [
    "BlockEstimate",
    "ChshEstimate",
    "SettingsDesign",
    "azuma_margin",
    "binomial_log10_p_value",
    "binomial_p_value",
    "block_estimates",
    "clopper_pearson",
    "correlator_intervals",
    "estimate_chsh",
    "game_statistics",
    "local_win_bound",
    "martingale_chsh",
    "observed_design",
    "tested_counts",
]
