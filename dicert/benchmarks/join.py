"""Benchmark of the two-station join (:mod:`dicert.logspec`): throughput and peak memory.

Two Parquet station files (trial key int64, setting and outcome int8, coded 1/2 and +1/-1,
row groups of 2^20 rows) are joined through a log spec by a whole ``dicert inspect`` process.
The baseline is a whole numpy process making one pass over the same bytes (``np.fromfile``
of both files and one reduction), measured in the same run; informational lower bounds are
whole processes that only decode the same Parquet files with pyarrow, one thread per file as
``inspect`` reads them: all three columns, and the int64 key columns alone (decoding the
snappy-compressed keys alone costs several numpy passes over the file bytes). A CSV run of the
same trials (one tenth of the size) is timed too, informationally, and so is the join with the
files' SHA-256 digests (as certify and verify read a log).
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import numpy as np

from dicert.benchmarks import BenchResult, peak_rss_mb_of

SUITE = "join"
_SPEC = """format = "dicert-logspec/1"
[join]
max_missing = {missing}
[stations.A]
files = "{a}"
key = "pulse"
setting = "basis"
outcome = "result"
values.setting = {{ "1" = 0, "2" = 1 }}
values.outcome = {{ "+1" = 0, "-1" = 1 }}
[stations.B]
files = "{b}"
key = "pulse"
setting = "basis"
outcome = "result"
values.setting = {{ "1" = 0, "2" = 1 }}
values.outcome = {{ "+1" = 0, "-1" = 1 }}
"""


def _write_parquet(path: Path, n: int, rng, drop_every: int = 0) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    step = 1 << 22
    writer = None
    try:
        for lo in range(0, n, step):
            m = min(step, n - lo)
            key = np.arange(lo, lo + m, dtype=np.int64)
            if drop_every:
                key = key[key % drop_every != 0]
            k = key.size
            tab = pa.table({"pulse": key,
                            "basis": rng.integers(1, 3, k, dtype=np.int8),
                            "result": (rng.integers(0, 2, k, dtype=np.int8) * 2 - 1)})
            if writer is None:
                writer = pq.ParquetWriter(str(path), tab.schema)
            writer.write_table(tab, row_group_size=1 << 20)
    finally:
        if writer is not None:
            writer.close()


def _write_csv(path: Path, n: int, rng) -> None:
    step = 1 << 20
    sign = np.array([b"+1", b"-1"])
    with open(path, "wb") as fh:
        fh.write(b"pulse,basis,result\n")
        for lo in range(0, n, step):
            m = min(step, n - lo)
            key = np.arange(lo, lo + m).astype("S")
            s = rng.integers(1, 3, m).astype("S")
            o = sign[rng.integers(0, 2, m)]
            fh.write(b"\n".join(b",".join(r) for r in zip(key, s, o)) + b"\n")


def _cpu_of(cmd: list[str]) -> float:
    """CPU seconds (user + system) of a child process running ``cmd``."""
    import resource
    import subprocess

    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    subprocess.run(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=True)
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    return (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)


def run(quick: bool = False) -> list[BenchResult]:
    import importlib.util

    if importlib.util.find_spec("pyarrow") is None:
        return [BenchResult(suite=SUITE, name="two-station join", value=float("nan"), unit="",
                            note="skipped: needs the optional extra dicert[formats]")]
    n = 10**7 if quick else 10**8
    n_csv = n // 10
    rng = np.random.default_rng(7)
    py = sys.executable
    out: list[BenchResult] = []
    with tempfile.TemporaryDirectory(prefix="dicert-bench-join-") as tmp:
        tmp = Path(tmp)
        a, b = tmp / "a.parquet", tmp / "b.parquet"
        _write_parquet(a, n, rng)
        _write_parquet(b, n, rng, drop_every=1_000_003)
        missing = n // 1_000_003 + 1
        spec = tmp / "run.toml"
        spec.write_text(_SPEC.format(missing=missing, a=a.name, b=b.name))
        size = a.stat().st_size + b.stat().st_size
        base_cmd = [py, "-c", "import numpy as np, sys; "
                    "[np.fromfile(p, dtype=np.uint8).max() for p in sys.argv[1:]]", str(a), str(b)]
        join_cmd = [py, "-m", "dicert.cli.app", "inspect", "--log-spec", str(spec), "--json"]
        peak_rss_mb_of(base_cmd)  # warm the page cache
        t_base = min(peak_rss_mb_of(base_cmd)[0] for _ in range(2))
        runs = [peak_rss_mb_of(join_cmd) for _ in range(1 if not quick else 2)]
        t_join = min(r[0] for r in runs)
        rss = max(r[1] for r in runs)
        out.append(BenchResult(suite=SUITE, name=f"two-station join, Parquet ({n:.0e} trials): "
                               "whole-process inspect / numpy pass", value=t_join / t_base,
                               unit="x", target=5.0, higher_is_better=False,
                               note=f"{t_join:.2f} s vs {t_base:.2f} s over {size / 1e6:.0f} MB; "
                               f"{n / t_join / 1e6:.1f} M trials/s"))
        out.append(BenchResult(suite=SUITE, name=f"peak memory of the join ({n:.0e} trials)",
                               value=rss, unit="MB", target=300.0, higher_is_better=False))
        c_base, c_join = min(_cpu_of(base_cmd) for _ in range(2)), _cpu_of(join_cmd)
        out.append(BenchResult(suite=SUITE, name=f"two-station join, Parquet ({n:.0e} trials): "
                               "CPU time of the inspect process / of the numpy pass",
                               value=c_join / c_base, unit="x", higher_is_better=False,
                               note=f"{c_join:.2f} s vs {c_base:.2f} s of CPU (user + system); "
                               "informational: CPU time depends less on the other load of a "
                               "shared machine than wall time"))
        dig_cmd = [py, "-c", "import sys; from dicert.logs import summarize_log; "
                   "summarize_log(sys.argv[1], digest=True)", str(spec)]
        t_dig = min(peak_rss_mb_of(dig_cmd)[0] for _ in range(1 if not quick else 2))
        out.append(BenchResult(suite=SUITE, name=f"two-station join with file digests, as "
                               f"certify reads it ({n:.0e} trials) / numpy pass",
                               value=t_dig / t_base, unit="x", higher_is_better=False,
                               note=f"{t_dig:.2f} s (SHA-256 of each file computed in a worker "
                               "thread while it is decoded; informational)"))
        out += _decode_bounds(py, a, b, n, t_base, t_join)
        a.unlink()
        b.unlink()
        ca, cb = tmp / "a.csv", tmp / "b.csv"
        _write_csv(ca, n_csv, rng)
        _write_csv(cb, n_csv, rng)
        spec.write_text(_SPEC.format(missing=0, a=ca.name, b=cb.name))
        size = ca.stat().st_size + cb.stat().st_size
        base_cmd[3:] = [str(ca), str(cb)]
        peak_rss_mb_of(base_cmd)
        t_base = min(peak_rss_mb_of(base_cmd)[0] for _ in range(2))
        t_join, rss = peak_rss_mb_of(join_cmd)
        out.append(BenchResult(suite=SUITE, name=f"two-station join, CSV ({n_csv:.0e} trials): "
                               "whole-process inspect / numpy pass", value=t_join / t_base,
                               unit="x", higher_is_better=False,
                               note=f"{t_join:.2f} s vs {t_base:.2f} s over {size / 1e6:.0f} MB; "
                               f"{n_csv / t_join / 1e6:.1f} M trials/s; peak {rss:.0f} MB "
                               "(informational)"))
    return out


def _decode_bounds(py: str, a: Path, b: Path, n: int, t_base: float,
                   t_join: float) -> list[BenchResult]:
    res: list[BenchResult] = []
    # Lower bounds: pyarrow decoding alone, one thread per station as inspect reads them
    # (all three columns; the key columns only). No join of these files can be faster
    # than its decoding, whatever the join does.
    dec_code = ("import sys, threading, pyarrow.parquet as pq\n"
                "cols = sys.argv[1].split(',')\n"
                "def go(p):\n"
                "    f = pq.ParquetFile(p, buffer_size=1 << 20, pre_buffer=False)\n"
                "    for bt in f.iter_batches(batch_size=1 << 19, use_threads=False,"
                " columns=cols):\n"
                "        [bt.column(c).to_numpy(zero_copy_only=False) for c in cols]\n"
                "ts = [threading.Thread(target=go, args=(p,)) for p in sys.argv[2:]]\n"
                "[t.start() for t in ts]; [t.join() for t in ts]\n")
    for cols, what in (("pulse,basis,result", "all three columns"),
                       ("pulse", "the int64 key columns only")):
        dec_cmd = [py, "-c", dec_code, cols, str(a), str(b)]
        t_dec = min(peak_rss_mb_of(dec_cmd)[0] for _ in range(2))
        res.append(BenchResult(
            suite=SUITE, name=f"pyarrow decoding alone of {what}, two threads "
                              f"({n:.0e} trials) / numpy pass",
            value=t_dec / t_base, unit="x", higher_is_better=False,
            note=f"{t_dec:.2f} s (informational: a lower bound for any join of these "
                 f"files; the whole join is {t_join / t_dec:.2f}x of it)"))
    return res
