"""Benchmarks of the extraction stage: whole-process ``dicert extract`` against a naive script.

The baseline, measured in the same run on the same files, is a short script that does what one
would write first: unpack both files to float64 and take ONE full-length linear convolution
(``scipy.signal.fftconvolve``, length 2n + m - 2) before rounding the middle m values mod 2.
Both run as child processes (wall time and peak resident memory of the child), alternately,
best of ``repeat``; their outputs must be byte-identical.

The scaling series runs ``dicert extract`` for n = 2^20 ... 2^28 (quick: 2^20 ... 2^22) at
m = n / 2 and fits the growth exponent of the time (least squares of log t on log n over
n >= 2^22, where start-up no longer dominates). n = 2^30 runs when ``DICERT_BENCH_HUGE=1``
(it writes about 26 GB of work files). (Whole-process ``certify`` from 1e7 to 2e8 trials is
in the "certify" suite.) With
``DICERT_BENCH_SCHEDULER=ADDRESS`` (or the optional extra ``dicert[cluster]`` installed, on a
2-worker LocalCluster started here) the n = 2^24 run is repeated on the cluster.

The machine may be shared with other jobs: compare the ratios to the in-run baseline rather
than absolute times.
"""

from __future__ import annotations

import math
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

from dicert.benchmarks import BenchResult, bench_scheduler, peak_rss_mb_of

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


def _files(tmp: Path, n: int, m: int, tag: str) -> tuple[Path, Path]:
    rng = np.random.default_rng(2)
    raw, seed = tmp / f"raw{tag}.bin", tmp / f"seed{tag}.bin"
    with open(raw, "wb") as fh:
        for pos in range(0, n // 8, 1 << 24):
            fh.write(rng.integers(0, 256, min(1 << 24, n // 8 - pos), dtype=np.uint8).tobytes())
    with open(seed, "wb") as fh:
        for pos in range(0, -(-(n + m) // 8), 1 << 24):
            k = min(1 << 24, -(-(n + m) // 8) - pos)
            fh.write(rng.integers(0, 256, k, dtype=np.uint8).tobytes())
    return raw, seed


def _ours(raw: Path, seed: Path, m: int, out: Path, *extra: str) -> list[str]:
    return [sys.executable, "-m", "dicert.cli.app", "extract", "--input", str(raw), "--seed",
            str(seed), "--bits", str(m), "--out", str(out), "--json", *extra]


def _pow(n: int) -> str:
    return f"2^{n.bit_length() - 1}" if n & (n - 1) == 0 else f"{n:.2g}"


def run(quick: bool = False) -> list[BenchResult]:
    out: list[BenchResult] = []
    work = os.environ.get("DICERT_BENCH_WORK_DIR")
    with tempfile.TemporaryDirectory(prefix="dicert-bench-", dir=work) as tmp:
        tmp = Path(tmp)
        out += _versus_naive(tmp, quick)
        out += _scaling(tmp, quick)
        if not quick:
            out += _cluster(tmp)
    return out


def _versus_naive(tmp: Path, quick: bool) -> list[BenchResult]:
    n, m = (1 << 20, 1 << 19) if quick else (1 << 24, 1 << 23)
    repeat = 1 if quick else 2
    raw, seed = _files(tmp, n, m, "naive")
    ours_out, naive_out = tmp / "ours.bin", tmp / "naive.bin"
    naive_cmd = [sys.executable, "-c", NAIVE_SCRIPT, str(raw), str(seed), str(m), str(naive_out)]
    t_ours = t_naive = float("inf")
    rss_ours = rss_naive = 0.0
    for _ in range(repeat):
        w, r = peak_rss_mb_of(naive_cmd)
        t_naive, rss_naive = min(t_naive, w), max(rss_naive, r)
        w, r = peak_rss_mb_of(_ours(raw, seed, m, ours_out))
        t_ours, rss_ours = min(t_ours, w), max(rss_ours, r)
    same = ours_out.read_bytes() == naive_out.read_bytes()
    size = f"n = {_pow(n)}, m = {_pow(m)}"
    res = [
        BenchResult(suite=SUITE,
                    name=f"whole-process extract / naive full-length FFT script ({size})",
                    value=t_ours / t_naive, unit="x", target=0.5, higher_is_better=False,
                    note=f"{t_ours:.2f} s vs {t_naive:.2f} s, best of {repeat}"),
        BenchResult(suite=SUITE, name="identical output to the naive script", value=float(same),
                    unit="bool", target=1.0),
        BenchResult(suite=SUITE, name=f"extract throughput, whole process ({size})",
                    value=n / t_ours / 1e6, unit="Mbit/s",
                    note=f"naive script: {n / t_naive / 1e6:.2f} Mbit/s"),
        BenchResult(suite=SUITE, name=f"peak memory of extract per input bit ({size})",
                    value=rss_ours * 2**20 / n, unit="bytes/bit", target=40.0,
                    higher_is_better=False,
                    note=f"{rss_ours:.0f} MB vs {rss_naive:.0f} MB for the naive script"),
    ]
    for p in (raw, seed, ours_out, naive_out):
        p.unlink()
    return res


def _scaling(tmp: Path, quick: bool) -> list[BenchResult]:
    ks = [20, 21, 22] if quick else [20, 22, 24, 26, 28]
    if not quick and os.environ.get("DICERT_BENCH_HUGE") == "1":
        ks.append(30)
    targets = {28: (40.0, 1024.0), 30: (240.0, 2048.0)}
    res: list[BenchResult] = []
    points: list[tuple[int, float]] = []
    for k in ks:
        n, m = 1 << k, 1 << (k - 1)
        raw, seed = _files(tmp, n, m, str(k))
        dest = tmp / f"out{k}.bin"
        extra = ("--memory-mib", "2048") if k >= 30 else ()
        wall, rss = peak_rss_mb_of(_ours(raw, seed, m, dest, *extra))
        points.append((n, wall))
        t_target, m_target = targets.get(k, (None, None))
        budget = "2 GiB budget" if extra else "default budget"
        res.append(BenchResult(suite=SUITE, name=f"extract time, n = 2^{k}, m = 2^{k - 1}",
                               value=wall, unit="s", target=t_target, higher_is_better=False,
                               note=f"{n / wall / 1e6:.1f} Mbit/s, {budget}"))
        res.append(BenchResult(suite=SUITE, name=f"extract peak memory, n = 2^{k}, m = 2^{k - 1}",
                               value=rss, unit="MB", target=m_target, higher_is_better=False))
        for p in (raw, seed, dest):
            p.unlink()
    fit = [(math.log(n), math.log(t)) for n, t in points if n >= 1 << 22]
    if len(fit) >= 2:
        xs, ys = np.array(fit).T
        slope = float(np.polyfit(xs, ys, 1)[0])
        res.append(BenchResult(
            suite=SUITE, name=f"fitted growth exponent of extract time (n = 2^22 ... 2^{ks[-1]})",
            value=slope, unit="", target=1.2, higher_is_better=False,
            note="t ~ n^exponent at m = n/2; n log n over this range gives about 1.05-1.1"))
    return res


def _cluster(tmp: Path) -> list[BenchResult]:
    """The n = 2^24 extraction on a dask cluster (in-process, so wall time only)."""
    import time

    try:
        import distributed  # noqa: F401  (the optional extra is installed)
    except ImportError:
        return []
    from dicert.extract import extract_toeplitz

    n, m = 1 << 24, 1 << 23
    raw, seed = _files(tmp, n, m, "cl")
    t0 = time.perf_counter()
    local = extract_toeplitz(raw, seed, m, workers=1)
    t_local = time.perf_counter() - t0
    with bench_scheduler() as (address, _started):
        t0 = time.perf_counter()
        remote = extract_toeplitz(raw, seed, m, scheduler=address, temp_dir=tmp)
        t_remote = time.perf_counter() - t0
        counting = _cluster_counting(tmp, address)
    return counting + [
        BenchResult(suite=SUITE, name="cluster extract n = 2^24: speedup over one process",
                    value=t_local / t_remote, unit="x",
                    note=f"{t_remote:.2f} s on the cluster vs {t_local:.2f} s in one thread"),
        BenchResult(suite=SUITE, name="cluster extract: identical bits", unit="bool",
                    value=float(remote.output == local.output), target=1.0),
    ]


def _cluster_counting(tmp: Path, address: str) -> list[BenchResult]:
    """Counting and hashing a 16-file binary log (invented random trials) locally and on the
    cluster (one task per file)."""
    import time

    from dicert import cluster
    from dicert.logs import TrialArrays, summarize_log, write_log

    rng = np.random.default_rng(3)
    d = tmp / "log16"
    d.mkdir()
    per_file = 2 * 10**6
    for i in range(16):
        x, y, a, b = rng.integers(0, 2, (4, per_file), dtype=np.uint8)
        write_log(d / f"part{i:02d}.btl", TrialArrays(x=x, y=y, a=a, b=b))
    summarize_log(d, digest=True)  # warm the page cache
    t0 = time.perf_counter()
    here = summarize_log(d, digest=True)
    t_here = time.perf_counter() - t0
    t0 = time.perf_counter()
    there = cluster.summarize_log(d, scheduler=address)
    t_there = time.perf_counter() - t0
    trials = 16 * per_file
    same = bool(np.array_equal(here.counts, there.counts)
                and [f.sha256 for f in here.files] == [f.sha256 for f in there.files])
    return [
        BenchResult(suite=SUITE, name="16-file log counted and hashed, one process",
                    value=trials / t_here / 1e6, unit="Mtrials/s", note=f"{t_here:.2f} s"),
        BenchResult(suite=SUITE, name="16-file log counted and hashed on the cluster",
                    value=trials / t_there / 1e6, unit="Mtrials/s",
                    note=f"{t_there:.2f} s; speedup {t_here / t_there:.2f}x"),
        BenchResult(suite=SUITE, name="16-file log: identical counts and digests on the cluster",
                    value=float(same), unit="bool", target=1.0),
    ]
