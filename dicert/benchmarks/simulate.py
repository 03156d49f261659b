"""Benchmark of the simulator: trials per second against one pass of the raw generator."""

from __future__ import annotations

import numpy as np

from dicert.benchmarks import BenchResult, best_time

SUITE = "simulate"


def run(quick: bool = False) -> list[BenchResult]:
    from dicert.simulate import device_model, iter_trial_chunks, sampler_name

    n = 4 * 10**6 if quick else 4 * 10**7
    out: list[BenchResult] = []

    def raw_pass() -> None:
        rng = np.random.default_rng(1)
        for lo in range(0, n, 1 << 21):
            rng.bit_generator.random_raw(min(1 << 21, n - lo))

    t_raw = best_time(raw_pass, repeat=2)
    out.append(BenchResult(suite=SUITE, name="baseline: one random_raw pass (1 word per trial)",
                           value=n / t_raw / 1e6, unit="M trials/s"))
    cases = [
        ("quantum, uniform settings", device_model("quantum", visibility=0.97), 1.0),
        ("quantum, spot-checking gamma=0.05", device_model("quantum", visibility=0.97), 0.05),
        ("classical-random, uniform", device_model("classical-random", visibility=1.0), 1.0),
    ]
    for label, model, gamma in cases:
        def go(model=model, gamma=gamma) -> None:
            for _ in iter_trial_chunks(n, model, gamma=gamma, rng=np.random.default_rng(2)):
                pass

        go()  # warm-up (compilation, caches)
        t = best_time(go, repeat=2)
        out.append(BenchResult(suite=SUITE, name=f"{label} ({sampler_name()} sampler)", value=n / t / 1e6,
                               unit="M trials/s", note=f"{t / t_raw:.2f}x the raw-generator pass"))
    return out
