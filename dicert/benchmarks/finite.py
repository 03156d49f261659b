"""Benchmarks of the finite-size stage: one certification from counts, and a full plan.

Targets (issue 5): a full plan (both method families plus probability estimation, 30-point
gamma sweep x 30-point n sweep) <= 20 s; a single certification from counts <= 1 s. The full
plans run with cold PEF caches, and include the PEF protocol for the photonic regime when the
source tree's ``protocols/ch-photonic.toml`` is present. The baseline measured in the same run is
a naive dense-grid optimisation of the improved second-order EAT rate (400 x 400 points over
tangent point and log(alpha - 1)), against which the shipped optimiser's time and rate are
compared.
"""

from __future__ import annotations

import math
import time

import numpy as np

from dicert.benchmarks import BenchResult, best_time

SUITE = "finite"


def _honest_counts(n: int, gamma: float, win: float, rng: np.random.Generator) -> np.ndarray:
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    n_test = int(rng.binomial(n, gamma))
    wins = int(rng.binomial(n_test, win))
    per_w = rng.multinomial(wins, [0.25] * 4)
    per_l = rng.multinomial(n_test - wins, [0.25] * 4)
    for k, (x, y) in enumerate(((0, 0), (0, 1), (1, 0), (1, 1))):
        c[1, x, y, 0, x & y] = per_w[k]
        c[1, x, y, 0, 1 - (x & y)] = per_l[k]
    c[0, 0, 0, 0, 0] = n - n_test
    return c


def run(quick: bool) -> list[BenchResult]:
    from dicert.finite import certify_counts
    from dicert.finite.eat import _eat_min_entropy_cached, df_rate, optimise_df
    from dicert.planning import plan
    from dicert.protocol import load_protocol, shipped_protocol_path

    out: list[BenchResult] = []
    rng = np.random.default_rng(20261201)

    # Baseline: naive dense grid for the DF rate at one operating point.
    w_c, n, gamma = 0.828, 1e8, 0.05
    wt = np.linspace(0.75 + 1e-9, (2 + math.sqrt(2)) / 4 - 1e-9, 400)
    la = np.linspace(math.log(1e-12), math.log(0.49), 400)

    def naive():
        with np.errstate(over="ignore", invalid="ignore"):
            r = df_rate(wt[:, None], np.exp(la)[None, :], w_c, n, gamma, 1e-8, 1e-8)
        return float(np.nanmax(np.where(np.isfinite(r), r, -np.inf)))

    t_naive = best_time(naive, repeat=2)
    r_naive = naive()
    optimise_df(w_c, n, gamma, 1e-8, 1e-8)  # warm scipy imports
    t_opt = best_time(lambda: optimise_df(w_c, n, gamma, 1e-8, 1e-8), repeat=3)
    r_opt = optimise_df(w_c, n, gamma, 1e-8, 1e-8).rate_per_round
    out.append(BenchResult(suite=SUITE, name="DF rate optimiser / naive 400x400 grid (time)",
                           value=t_opt / t_naive, unit="x", higher_is_better=False,
                           note=f"{t_opt * 1e3:.1f} ms vs {t_naive * 1e3:.1f} ms; rate "
                                f"{r_opt:.6f} vs grid {r_naive:.6f}"))

    for name, win in (("chsh-spotcheck", 0.843), ("chsh-uniform", 0.84)):
        proto = load_protocol(shipped_protocol_path(name))
        counts = _honest_counts(10**8, proto.gamma, win, rng)
        _eat_min_entropy_cached.cache_clear()
        t0 = time.perf_counter()
        res = certify_counts(counts, proto)
        t_cert = time.perf_counter() - t0
        out.append(BenchResult(suite=SUITE, name=f"certify from counts ({name}, {res.method})",
                               value=t_cert, unit="s", target=1.0, higher_is_better=False,
                               note=f"cold cache; {res.certified_min_entropy_bits:.4g} bits at n = 1e8; "
                                    f"{t_cert / t_naive:.2f}x the naive grid"))

    import dicert.planning as planmod

    photonic = shipped_protocol_path("ch-photonic")
    protos: list[tuple[str, object, int | None]] = [
        ("chsh-spotcheck", shipped_protocol_path("chsh-spotcheck"), 10**8)]
    if not quick:
        protos.append(("chsh-uniform", shipped_protocol_path("chsh-uniform"), 10**8))
    if photonic.exists():
        protos.append(("ch-photonic", photonic, None))  # trials = the protocol's n_max
    for name, path, trials in protos:
        proto = load_protocol(path)
        _eat_min_entropy_cached.cache_clear()
        planmod._pef_stats.cache_clear()
        planmod._plan_pef_cached.cache_clear()
        t0 = time.perf_counter()
        res = plan(proto, trials=trials, n_points=30, gamma_points=30)
        t_plan = time.perf_counter() - t0
        names = ", ".join(m.name for m in res.methods)
        out.append(BenchResult(suite=SUITE, name=f"full plan ({name}: {len(res.methods)} "
                                                 "methods, 30 n x 30 gamma)",
                               value=t_plan, unit="s", target=20.0, higher_is_better=False,
                               note=f"{t_plan / t_naive:.1f}x the naive grid; n = "
                                    f"{res.trials:.3g}; {names}"))
    out += _plan_cli()
    return out


def _plan_cli() -> list[BenchResult]:
    """Whole `dicert plan` processes for the shipped protocols (answered from the shipped
    cache of precomputed plans while it is current; see dicert.plan_cache)."""
    import os
    import subprocess
    import sys

    from dicert.plan_cache import SHIPPED_CASES, shipped_keys_current

    current = shipped_keys_current()
    env = {**os.environ, "DICERT_CACHE_DIR": "off"}  # the user's cache does not count
    worst, which = 0.0, ""
    for name, opts in SHIPPED_CASES:
        cmd = [sys.executable, "-m", "dicert.cli.app", "plan", "--protocol", name, "--json"]
        if "win_probability" in opts:
            cmd += ["--win-probability", str(opts["win_probability"])]
        t0 = time.perf_counter()
        subprocess.run(cmd, check=True, capture_output=True, env=env)
        wall = time.perf_counter() - t0
        if wall > worst:
            worst, which = wall, " ".join(cmd[4:6] + cmd[7:])
    return [BenchResult(suite=SUITE, name=f"dicert plan, whole process, slowest of the "
                                          f"{len(SHIPPED_CASES)} shipped cases",
                        value=worst, unit="s", target=2.0, higher_is_better=False,
                        note=f"{which}; shipped plan cache "
                             + ("current" if current else "STALE: run python -m dicert.plan_cache"))]
