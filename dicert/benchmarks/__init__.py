"""Benchmarks run by ``dicert bench``.

Each module here exposes ``run(quick: bool) -> list[BenchResult]``. Results are reported as
ratios against a baseline measured in the same run (machines are noisy), plus absolute
throughputs for reference. Benchmarks are never part of the unit tests' pass/fail.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from collections.abc import Callable, Iterator

# Benchmark modules in the order ``dicert bench`` runs them.
SUITES = ("logs", "join", "simulate", "entropy", "extract", "finite", "pef", "certify")


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


def checked_at(result: BenchResult, quick: bool) -> bool | None:
    """Verdict of ``result`` for a run at full (``quick`` False) or quick size.

    Performance targets (time, throughput, memory, ratios) are stated for the full sizes; at
    the quick sizes the interpreter's fixed start-up time and memory dominate, so they are not
    checked (None). Correctness checks (unit "bool": identical outputs) are checked at any size.
    """
    if quick and result.unit != "bool":
        return None
    return result.meets


QUICK_NOTE = ("--quick: sizes about 10x smaller; performance targets are stated for the full "
              "sizes and are NOT checked here (only correctness checks are)")


def best_time(fn: Callable[[], object], repeat: int = 3) -> float:
    """Smallest wall-clock time of ``repeat`` calls (seconds)."""
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def peak_rss_mb_of(cmd: list[str]) -> tuple[float, float]:
    """Run a Python command in a child process; return (wall seconds, its peak memory in MB).

    ``cmd`` is ``[python, "-m", module, *args]`` or ``[python, "-c", code, *args]``; the child
    reports the high-water mark of its own address space (VmHWM), which ``ru_maxrss`` does not
    give reliably for children of a large parent.
    """
    import os
    import subprocess
    import tempfile

    if len(cmd) < 3 or cmd[1] not in ("-m", "-c"):
        raise ValueError("peak_rss_mb_of needs [python, '-m' | '-c', target, ...]")
    fd, out = tempfile.mkstemp(prefix="dicert-peak-")
    os.close(fd)
    try:
        wrapped = [cmd[0], "-m", "dicert.benchmarks._peak", out, *cmd[1:]]
        t0 = time.perf_counter()
        proc = subprocess.run(wrapped, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            err = proc.stderr.decode(errors="replace")
            raise RuntimeError(f"benchmark command failed ({proc.returncode}): {' '.join(cmd)}\n{err}")
        with open(out) as fh:
            kb = int(fh.read().strip() or 0)
    finally:
        os.unlink(out)
    return wall, kb / 1024.0


@contextlib.contextmanager
def bench_scheduler() -> Iterator[tuple[str, bool]]:
    """(scheduler address, whether a local cluster was started): ``DICERT_BENCH_SCHEDULER`` if
    set, else a 2-worker ``distributed.LocalCluster`` on this machine, closed afterwards."""
    import distributed

    address = os.environ.get("DICERT_BENCH_SCHEDULER")
    if address is not None:
        yield address, False
        return
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None, memory_limit="2GiB") as cluster:
        yield cluster.scheduler_address, True
