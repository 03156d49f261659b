"""Benchmark of the whole job: ``dicert certify`` on a binary log, as a child process.

Target (issue 6): a 1e7-trial binary log certified end to end in <= 30 s with <= 1 GB peak
memory. Reported with ratios against baselines measured in the same run: a child process
that only reads and hashes the same log bytes (the least any certification must do), and
``dicert inspect`` (one streaming pass without harvest, bound or extraction). The per-stage
timings come from the record's ``volatile.timings_s`` section.
"""

from __future__ import annotations

import json
import sys
import tempfile
from pathlib import Path

import numpy as np

from dicert.benchmarks import BenchResult, peak_rss_mb_of

SUITE = "certify"


def _make_inputs(tmp: Path, n: int) -> tuple[Path, Path]:
    from dicert.simulate import device_model, simulate_to_file

    log = tmp / "bench.btl"
    simulate_to_file(log, n, device_model("quantum", visibility=0.97), rng_stream=2026)
    seed = tmp / "seed.bin"
    seed.write_bytes(np.random.default_rng(7).bytes((4 * n) // 8 + 8))
    return log, seed


def run(quick: bool = False) -> list[BenchResult]:
    from dicert.protocol import shipped_protocol_path

    n = 10**6 if quick else 10**7
    py = sys.executable
    out: list[BenchResult] = []
    with tempfile.TemporaryDirectory(prefix="dicert-bench-certify-") as tmp:
        tmp = Path(tmp)
        log, seed = _make_inputs(tmp, n)
        proto = shipped_protocol_path("chsh-uniform")
        base_cmd = [py, "-c", ("import hashlib,sys; h=hashlib.sha256(); f=open(sys.argv[1],'rb')\n"
                    "while b:=f.read(1<<22): h.update(b)"), str(log)]
        insp_cmd = [py, "-m", "dicert.cli.app", "inspect", str(log), "--json"]

        def cert_cmd(i: int) -> list[str]:
            return [py, "-m", "dicert.cli.app", "certify", str(log), "--protocol", str(proto),
                    "--seed", str(seed), "--out", str(tmp / f"out{i}"), "--json"]

        peak_rss_mb_of(base_cmd)  # warm the page cache
        t_base = min(peak_rss_mb_of(base_cmd)[0] for _ in range(2))
        t_insp = min(peak_rss_mb_of(insp_cmd)[0] for _ in range(2))
        runs = [peak_rss_mb_of(cert_cmd(i)) for i in range(2)]
        t_cert = min(r[0] for r in runs)
        rss = max(r[1] for r in runs)
        rec = json.loads((tmp / "out1" / "record.json").read_text())
        stages = rec["volatile"]["timings_s"]
        out.append(BenchResult(suite=SUITE, name=f"whole-process certify ({n:.0e} trials)",
                               value=t_cert, unit="s", target=30.0 if n == 10**7 else None,
                               higher_is_better=False,
                               note=f"status {rec['status']}, {rec['extractor']['output_bits']} "
                                    f"output bits from {rec['extractor']['raw_bits']} raw bits"))
        out.append(BenchResult(suite=SUITE, name=f"peak memory of certify ({n:.0e} trials)",
                               value=rss, unit="MB", target=1024.0 if n == 10**7 else None,
                               higher_is_better=False))
        out.append(BenchResult(suite=SUITE, name="certify / read-and-hash process (baseline)",
                               value=t_cert / t_base, unit="x", higher_is_better=False,
                               note=f"{t_cert:.2f} s vs {t_base:.2f} s"))
        out.append(BenchResult(suite=SUITE, name="certify / inspect process",
                               value=t_cert / t_insp, unit="x", higher_is_better=False,
                               note=f"{t_cert:.2f} s vs {t_insp:.2f} s (one streaming pass only)"))
        for stage, sec in stages.items():
            out.append(BenchResult(suite=SUITE, name=f"stage {stage} (from the record)",
                                   value=float(sec), unit="s", higher_is_better=False))
    return out
