"""Benchmarks of the log stage: counting kernel, whole-process ``inspect``, CSV parsing, memory.

Ratios are taken against a baseline measured in the same run: one numpy pass over the same
bytes (``np.fromfile`` followed by one reduction), in process and as a whole child process.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

from dicert.benchmarks import BenchResult, best_time, peak_rss_mb_of

SUITE = "logs"


def _write_binary(path: Path, n: int, rng) -> None:
    from dicert.logs import BinaryLogWriter

    step = 1 << 24
    with BinaryLogWriter(path, has_test_flag=True) as w:
        for lo in range(0, n, step):
            w.append(rng.integers(0, 32, min(step, n - lo), dtype=np.uint8))


def run(quick: bool = False) -> list[BenchResult]:
    from dicert._kernels import count_blocks, kernel_name
    from dicert.estimate import estimate_chsh
    from dicert.logs import TrialArrays, summarize_log, write_log

    n = 10**7 if quick else 10**8
    n_csv = 10**6 if quick else 10**7
    rng = np.random.default_rng(1)
    out: list[BenchResult] = []
    with tempfile.TemporaryDirectory(prefix="dicert-bench-") as tmp:
        tmp = Path(tmp)
        binp = tmp / "bench.btl"
        _write_binary(binp, n, rng)
        codes = np.fromfile(binp, dtype=np.uint8, offset=24)
        count_blocks(codes[:1000], 100)  # warm-up
        t_kernel = best_time(lambda: count_blocks(codes, 1 << 20))
        t_np = best_time(lambda: np.fromfile(binp, dtype=np.uint8).max())
        out.append(BenchResult(suite=SUITE, name=f"counting kernel ({kernel_name()})", value=n / t_kernel / 1e6,
                               unit="M trials/s", target=500.0))
        out.append(BenchResult(suite=SUITE, name="baseline: one numpy pass (fromfile + max)",
                               value=n / t_np / 1e6, unit="M trials/s"))
        codes = None  # free before the whole-process runs
        t_inproc = best_time(lambda: estimate_chsh(summarize_log(binp, digest=False).counts))
        out.append(BenchResult(suite=SUITE, name="in-process summarize+estimate / numpy pass",
                               value=t_inproc / t_np, unit="x", higher_is_better=False,
                               note=f"{t_inproc:.3f} s vs {t_np:.3f} s (informational; the target is whole-process)"))
        t_dig = best_time(lambda: summarize_log(binp, digest=True), repeat=2)
        out.append(BenchResult(suite=SUITE, name="in-process summarize with SHA-256 / numpy pass",
                               value=t_dig / t_np, unit="x", higher_is_better=False,
                               note=f"{t_dig:.3f} s (hashing overlapped with counting)"))
        # Whole processes: `dicert inspect --json` against a numpy one-liner over the same bytes.
        py = sys.executable
        base_cmd = [py, "-c", f"import numpy as np; np.fromfile({str(binp)!r}, dtype=np.uint8).max()"]
        insp_cmd = [py, "-m", "dicert.cli.app", "inspect", str(binp), "--json"]
        peak_rss_mb_of(insp_cmd)  # warm the page cache
        t_base = min(peak_rss_mb_of(base_cmd)[0] for _ in range(2))
        runs = [peak_rss_mb_of(insp_cmd) for _ in range(2)]
        t_insp = min(r[0] for r in runs)
        rss = max(r[1] for r in runs)
        out.append(BenchResult(suite=SUITE, name="whole-process inspect / numpy one-liner process",
                               value=t_insp / t_base, unit="x", target=3.0, higher_is_better=False,
                               note=f"{t_insp:.3f} s vs {t_base:.3f} s for {n:.0e} trials"))
        out.append(BenchResult(suite=SUITE, name=f"peak memory of inspect ({n:.0e} trials)", value=rss,
                               unit="MB", target=300.0, higher_is_better=False))
        small = tmp / "small.btl"
        _write_binary(small, n // 10, rng)
        rss_small = peak_rss_mb_of([py, "-m", "dicert.cli.app", "inspect", str(small), "--json"])[1]
        out.append(BenchResult(suite=SUITE, name=f"peak memory of inspect ({n // 10:.0e} trials)",
                               value=rss_small, unit="MB", target=300.0, higher_is_better=False,
                               note="flat memory: compare with the larger log"))
        binp.unlink()
        # CSV parsing throughput.
        csvp = tmp / "bench.csv"
        cc = rng.integers(0, 32, n_csv, dtype=np.uint8)
        write_log(csvp, TrialArrays.from_codes(cc, True))
        t_csv = best_time(lambda: summarize_log(csvp, digest=False), repeat=2)
        out.append(BenchResult(suite=SUITE, name="CSV reading (x,y,a,b,t)", value=n_csv / t_csv / 1e6,
                               unit="M trials/s", target=10.0))
    return out
