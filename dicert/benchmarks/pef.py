"""Benchmarks of the PEF stage: constructing a PEF and scoring trials.

- Construction: one validated PEF (exponential-cone solve + float64 rescaling + 40-digit
  re-check) for the NS model (24 vertices) and the Tsirelson-polytope model (80 vertices) with
  bias-bounded settings (4 settings vertices); target <= 2 s each.
- Scoring: the streaming accumulator over 10^8 (10^7 quick) trial codes with a target that is
  never reached (the whole pass is scored), and a run that stops at the exact crossing trial.
  Target >= 100 M trials/s. Baseline in the same run: one numpy pass over the same codes
  (``codes.max()``), so the ratio is machine-independent.
- Adaptive calibration: the same pass with calibration = "adaptive", i.e. one re-fit
  (maximum-likelihood box + validated PEF) per block, amortised over the block; at the default
  block length (10^7 trials, target >= 100 M trials/s) and, for information, at 10^6 trials
  per block. Also the cost of one re-fit.
"""

from __future__ import annotations

import time

import numpy as np

from dicert.benchmarks import BenchResult, best_time

SUITE = "pef"


def _sample(box: np.ndarray, n: int, rng) -> np.ndarray:
    out = np.empty(n, dtype=np.uint8)
    step = 1 << 22
    cdf = np.cumsum(box, axis=1)
    for lo in range(0, n, step):
        m = min(step, n - lo)
        z = rng.integers(0, 4, m)
        c = np.minimum((rng.random(m)[:, None] > cdf[z]).sum(axis=1), 3)
        out[lo:lo + m] = (1 << 4) | (4 * z + c)
    return out


# long: one timed section per measurement in a fixed order, sharing the warmed-up models.
def run(quick: bool = False) -> list[BenchResult]:
    from dicert.finite import pef as P

    out: list[BenchResult] = []
    rho = P.isotropic_box(0.9)
    # Warm imports (cvxpy, mpmath) and the Tsirelson-polytope enumeration outside the timings.
    t0 = time.perf_counter()
    P.build_pef(rho, P.uniform_settings(), 0.05)
    P.box_model("tsirelson")
    t_first = time.perf_counter() - t0
    t_ns = best_time(lambda: P.build_pef(rho, P.uniform_settings(), 0.01, lam=1e-3))
    out.append(BenchResult(suite=SUITE, name="construct PEF (NS, uniform settings)", value=t_ns,
                           unit="s", target=2.0, higher_is_better=False))
    biased = P.spot_settings(0.1, (0, 0), bias_x=0.02, bias_y=0.02)
    t_ts = best_time(lambda: P.build_pef(rho, biased, 0.01, model="tsirelson", lam=1e-3))
    out.append(BenchResult(suite=SUITE, name="construct PEF (Tsirelson polytope, spot-checking "
                           "with bias bounds, 320 rows)", value=t_ts, unit="s", target=2.0,
                           higher_is_better=False))
    out.append(BenchResult(suite=SUITE, name="first construction incl. imports and vertex "
                           "enumeration", value=t_first, unit="s", higher_is_better=False,
                           note="one-off per process"))

    n = 10**7 if quick else 10**8
    rng = np.random.default_rng(2)
    codes = _sample(rho, n, rng)
    pef = P.build_pef(rho, P.uniform_settings(), 0.05, lam=1e-3)
    never = P.PefParams(beta=0.05, eps_pe=1e-9, sigma_target_bits=1e12, n_max=10**15,
                        calibration="isotropic", calibration_chsh=2.5, lam=1e-3)

    def score_all():
        acc = P.PefAccumulator(never, pef=pef)
        acc.update(codes)
        return acc

    score_all()
    t_score = best_time(score_all)
    t_base = best_time(lambda: codes.max())
    out.append(BenchResult(suite=SUITE, name="score trials (streaming accumulator)",
                           value=n / t_score / 1e6, unit="M trials/s", target=100.0,
                           note=f"{n:.0e} trials in {t_score:.3f} s"))
    out.append(BenchResult(suite=SUITE, name="baseline: one numpy pass (codes.max())",
                           value=n / t_base / 1e6, unit="M trials/s"))
    out.append(BenchResult(suite=SUITE, name="scoring time / numpy pass", value=t_score / t_base,
                           unit="x", higher_is_better=False))
    # Early stop: a target reached after about half of the trials (exact crossing search).
    mu = pef.expected_log2
    sigma = (mu * n / 2 - np.log2(1e9)) / 0.05
    half = P.PefParams(beta=0.05, eps_pe=1e-9, sigma_target_bits=float(sigma), n_max=10**15,
                       calibration="isotropic", calibration_chsh=2.5, lam=1e-3)

    def score_stop():
        acc = P.PefAccumulator(half, pef=pef)
        acc.update(codes)
        return acc

    acc = score_stop()
    t_stop = best_time(score_stop)
    out.append(BenchResult(suite=SUITE, name="score until the exact success trial",
                           value=acc.trials_seen / t_stop / 1e6, unit="M trials/s", target=100.0,
                           note=f"stopped at trial {acc.success_index} of {n:.0e}"))
    # Adaptive calibration: one re-fit per block (fit_box + build_pef), amortised.
    fit_counts = P.counts_by_setting(np.bincount(codes[:10**6], minlength=32))
    t_refit = best_time(lambda: P.build_pef(P.fit_box(fit_counts), P.uniform_settings(), 0.05,
                                            lam=1e-3))
    out.append(BenchResult(suite=SUITE, name="adaptive: one block re-fit (ML box + PEF)",
                           value=t_refit, unit="s", higher_is_better=False))
    for block, target in ((P.DEFAULT_BLOCK_TRIALS, 100.0), (10**6, None)):
        default = " (default)" if block == P.DEFAULT_BLOCK_TRIALS else ""
        if n < 4 * block:
            # Too few trials for several blocks (quick mode): amortise the measured costs.
            rate = block / (block * t_score / n + t_refit) / 1e6
            out.append(BenchResult(suite=SUITE, name=f"score trials, adaptive calibration, "
                                   f"{block:.0e} trials per block{default}", value=rate,
                                   unit="M trials/s", target=target,
                                   note="estimated: block / (block x scoring time per trial "
                                        "+ one re-fit), both measured above"))
            continue
        adaptive = P.PefParams(beta=0.05, eps_pe=1e-9, sigma_target_bits=1e12, n_max=10**15,
                               calibration="adaptive", initial="isotropic",
                               calibration_chsh=2.5, lam=1e-3, block_trials=block)

        def score_adaptive(params=adaptive):
            acc = P.PefAccumulator(params, pef=pef)
            acc.update(codes)
            return acc

        blocks = score_adaptive().result().details["blocks_total"]
        t_ad = best_time(score_adaptive)
        out.append(BenchResult(suite=SUITE, name=f"score trials, adaptive calibration, "
                               f"{block:.0e} trials per block{default}",
                               value=n / t_ad / 1e6, unit="M trials/s", target=target,
                               note=f"{n:.0e} trials, {blocks} blocks, {t_ad:.3f} s"))
    return out
