"""Benchmarks of the single-round entropy stage: certified NPA solves, curves and table lookups.

Baselines measured in the same run: the smallest certified SDP (CHSH maximum at NPA level 1,
one 5x5 block), and the uncertified dual solve of the same pair problem (so the cost of the
exact certificate check is visible as a ratio).
"""

from __future__ import annotations

import time

import numpy as np

from dicert.benchmarks import BenchResult, best_time

SUITE = "entropy"


def run(quick: bool = False) -> list[BenchResult]:
    from dicert.entropy import npa
    from dicert.entropy.analytic import TSIRELSON
    from dicert.entropy.table import load_table

    out: list[BenchResult] = []
    npa.max_bell_value(npa.chsh_coefficients(), level="1")  # import and compile outside timing

    t_base = best_time(lambda: npa.max_bell_value(npa.chsh_coefficients(), level="1"))
    t_pair = best_time(lambda: npa.guessing_probability(parties="AB", chsh=2.7, level="1+AB"))
    out.append(BenchResult(suite=SUITE, name="pair guessing SDP, level 1+AB, certified", value=t_pair,
                           unit="s", target=1.0, higher_is_better=False,
                           note=f"{t_pair / t_base:.1f}x the level-1 CHSH maximum"))
    out.append(BenchResult(suite=SUITE, name="baseline: CHSH maximum, level 1, certified", value=t_base,
                           unit="s", higher_is_better=False))

    # certification overhead: exact check vs the raw dual solve of the same problem
    struct = npa.moment_structure("1+AB")
    objs = [
        {npa.IDENTITY: 1, ((0,), ()): sa, ((), (0,)): sb, ((0,), (0,)): sa * sb}
        for sa in (1, -1) for sb in (1, -1)
    ]
    from fractions import Fraction

    objs = [{w: Fraction(v, 4) for w, v in o.items()} for o in objs]
    cons = npa._box_constraints(bell=(npa.chsh_coefficients(), 2.7), correlators=None, tolerance=0.0)
    t_raw = best_time(lambda: npa._solve_dual(struct, objs, cons, "CLARABEL"))
    out.append(BenchResult(suite=SUITE, name="pair SDP: raw dual solve (no certificate)", value=t_raw,
                           unit="s", higher_is_better=False,
                           note=f"certificate check adds {max(0.0, t_pair / t_raw - 1) * 100:.0f}%"))

    points = 10 if quick else 50
    grid = np.linspace(2.0, TSIRELSON, points)
    t0 = time.perf_counter()
    for s in grid:
        npa.guessing_probability(parties="AB", chsh=float(s), level="1+AB")
    t_curve = time.perf_counter() - t0
    out.append(BenchResult(suite=SUITE, name=f"pair curve, {points} certified points, level 1+AB",
                           value=t_curve * 50 / points, unit="s per 50 points", target=20.0,
                           higher_is_better=False,
                           note="extrapolated from 10 points" if quick else ""))

    tab = load_table()
    tab.lookup(2.5)
    k = 2000 if quick else 20000
    vals = np.linspace(2.0, 2.83, k)
    t0 = time.perf_counter()
    for s in vals:
        tab.lookup(float(s))
    t_lookup = (time.perf_counter() - t0) / k
    out.append(BenchResult(suite=SUITE, name="table lookup (certified, exact rounding)",
                           value=1.0 / t_lookup, unit="lookups/s",
                           note=f"{t_pair / t_lookup:.0f}x faster than an exact solve"))
    return out
