"""Benchmarks of the extraction stage: whole-process ``dicert extract`` against a naive script.

The baseline, measured in the same run on the same files, is a short script that does what one
would write first: unpack both files to float64 and take ONE full-length linear convolution
(``scipy.signal.fftconvolve``, length 2n + m - 2) before rounding the middle m values mod 2.
Both run as child processes (wall time and peak resident memory from ``wait4``), alternately,
best of ``repeat``; their outputs must be byte-identical.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

from dicert.benchmarks import BenchResult, peak_rss_mb_of

SUITE = "extract"

#: The naive baseline (argv: raw seed m out).
NAIVE_SCRIPT = r"""
import sys
import numpy as np
from scipy.signal import fftconvolve
raw, seed, m, out = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4]
x = np.unpackbits(np.fromfile(raw, dtype=np.uint8)).astype(np.float64)
n = x.size
s = np.unpackbits(np.fromfile(seed, dtype=np.uint8))[: n + m - 1].astype(np.float64)
c = fftconvolve(s, x)[n - 1: n - 1 + m]
bits = (np.rint(c).astype(np.int64) & 1).astype(np.uint8)
with open(out, "wb") as fh:
    fh.write(np.packbits(bits).tobytes())
"""


def run(quick: bool = False) -> list[BenchResult]:
    n, m = (1 << 20, 1 << 19) if quick else (1 << 24, 1 << 23)
    repeat = 1 if quick else 2
    rng = np.random.default_rng(2)
    out: list[BenchResult] = []
    with tempfile.TemporaryDirectory(prefix="dicert-bench-") as tmp:
        tmp = Path(tmp)
        raw, seed = tmp / "raw.bin", tmp / "seed.bin"
        raw.write_bytes(rng.integers(0, 256, n // 8, dtype=np.uint8).tobytes())
        seed.write_bytes(rng.integers(0, 256, (n + m) // 8, dtype=np.uint8).tobytes())
        ours_out, naive_out = tmp / "ours.bin", tmp / "naive.bin"
        ours_cmd = [sys.executable, "-m", "dicert.cli.app", "extract", "--input", str(raw),
                    "--seed", str(seed), "--bits", str(m), "--out", str(ours_out)]
        naive_cmd = [sys.executable, "-c", NAIVE_SCRIPT, str(raw), str(seed), str(m),
                     str(naive_out)]
        t_ours = t_naive = float("inf")
        rss_ours = rss_naive = 0.0
        for _ in range(repeat):
            w, r = peak_rss_mb_of(naive_cmd)
            t_naive, rss_naive = min(t_naive, w), max(rss_naive, r)
            w, r = peak_rss_mb_of(ours_cmd)
            t_ours, rss_ours = min(t_ours, w), max(rss_ours, r)
        same = ours_out.read_bytes() == naive_out.read_bytes()
        size = f"n = 2^{n.bit_length() - 1}, m = 2^{m.bit_length() - 1}"
        out.append(BenchResult(
            suite=SUITE, name=f"whole-process extract / naive full-length FFT script ({size})",
            value=t_ours / t_naive, unit="x", target=0.5, higher_is_better=False,
            note=f"{t_ours:.2f} s vs {t_naive:.2f} s, best of {repeat}"))
        out.append(BenchResult(
            suite=SUITE, name="identical output to the naive script", value=float(same),
            unit="bool", target=1.0))
        out.append(BenchResult(
            suite=SUITE, name=f"extract throughput, whole process ({size})",
            value=n / t_ours / 1e6, unit="Mbit/s",
            note=f"naive script: {n / t_naive / 1e6:.2f} Mbit/s"))
        out.append(BenchResult(
            suite=SUITE, name=f"peak memory of extract per input bit ({size})",
            value=rss_ours * 2**20 / n, unit="bytes/bit", target=40.0, higher_is_better=False,
            note=f"{rss_ours:.0f} MB vs {rss_naive:.0f} MB for the naive script"))
        if not quick:
            # In-process throughput of the library call alone (no interpreter start-up).
            import time

            from dicert.extract import extract_toeplitz

            t0 = time.perf_counter()
            extract_toeplitz(raw, seed, m)
            dt = time.perf_counter() - t0
            out.append(BenchResult(suite=SUITE, name=f"extract_toeplitz in process ({size})",
                                   value=n / dt / 1e6, unit="Mbit/s", note=f"{dt:.2f} s"))
    return out
