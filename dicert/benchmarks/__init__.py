"""Benchmarks run by ``dicert bench``.

Each module here exposes ``run(quick: bool) -> list[BenchResult]``. Results are reported as
ratios against a baseline measured in the same run (machines are noisy), plus absolute
throughputs for reference. Benchmarks are never part of the unit tests' pass/fail.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable

# Benchmark modules in the order ``dicert bench`` runs them.
SUITES = ("logs", "simulate", "entropy", "extract", "finite", "pef", "certify")


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class BenchResult:
    """One measured quantity.

    ``value`` is in ``unit``; ``target`` (same unit) and ``meets`` say whether the project's
    stated goal is met, where one exists (``higher_is_better`` decides the direction).
    """

    suite: str
    name: str
    value: float
    unit: str
    target: float | None = None
    higher_is_better: bool = True
    note: str = ""

    @property
    def meets(self) -> bool | None:
        if self.target is None:
            return None
        return self.value >= self.target if self.higher_is_better else self.value <= self.target


def best_time(fn: Callable[[], object], repeat: int = 3) -> float:
    """Smallest wall-clock time of ``repeat`` calls (seconds)."""
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def peak_rss_mb_of(cmd: list[str]) -> tuple[float, float]:
    """Run ``cmd`` in a child process; return (wall seconds, its peak resident memory in MB)."""
    import os
    import subprocess

    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(proc.pid, 0)
    wall = time.perf_counter() - t0
    code = os.waitstatus_to_exitcode(status)
    if code != 0:
        err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
        raise RuntimeError(f"benchmark command failed ({code}): {' '.join(cmd)}\n{err}")
    return wall, usage.ru_maxrss / 1024.0
