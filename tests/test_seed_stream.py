"""The extractor seed streamed from its file (never held whole): digest, screens, and a seed
file that changes during the run."""

from __future__ import annotations

import hashlib

import numpy as np
import pytest
from helpers import sim_trials, uniform_protocol

from dicert import _seed
from dicert.design import seed_problems
from dicert.errors import SeedError
from dicert.logs import write_log


def test_streamed_digest_matches_the_standard_vector(tmp_path, monkeypatch):
    # FIPS 180-4 (NIST 2015) / FIPS 180-2 Appendix B.1: SHA-256("abc").
    p = tmp_path / "abc.seed"
    p.write_bytes(b"abc")
    monkeypatch.setattr(_seed, "CHUNK", 1)  # one byte per read: the chunking is exercised
    s = _seed.SeedInput(p)
    assert s.sha256 == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert len(s) == 3 and s.head(2) == b"ab" and s.for_extractor() == p


def test_streamed_screens_equal_the_in_memory_screens(tmp_path, monkeypatch):
    monkeypatch.setattr(_seed, "CHUNK", 4096)
    rng = np.random.default_rng(4)
    cases = {"random": rng.bytes(50_000), "constant": b"\x5a" * 50_000,
             "periodic": bytes(range(16)) * 3_000,
             "late-change": b"\x00" * 40_000 + b"\x01"}  # constant for the first chunks only
    for name, data in cases.items():
        p = tmp_path / f"{name}.seed"
        p.write_bytes(data)
        assert seed_problems(_seed.SeedInput(p), log_digests=(hashlib.sha256(data).hexdigest(),)) \
            == seed_problems(data, log_digests=(hashlib.sha256(data).hexdigest(),)), name


def test_seed_errors_are_one_line(tmp_path):
    with pytest.raises(SeedError, match="not found"):
        _seed.SeedInput(tmp_path / "missing.bin")
    with pytest.raises(SeedError, match="is a directory"):
        _seed.SeedInput(tmp_path)
    (tmp_path / "empty.bin").write_bytes(b"")
    with pytest.raises(SeedError, match="empty"):
        _seed.SeedInput(tmp_path / "empty.bin")


def test_seed_replaced_during_the_run_is_refused(tmp_path, monkeypatch):
    """A seed file changed between its checks and the extraction: refused, nothing written."""
    from dicert import extract
    from dicert.certify import certify

    log = tmp_path / "log.btl"
    write_log(log, sim_trials(100_000, seed=23, visibility=0.97))
    seed = tmp_path / "seed.bin"
    seed.write_bytes(np.random.default_rng(5).bytes(60_000))
    real = extract.extract_toeplitz

    def swapping(data, seed_src, *a, **k):
        seed.write_bytes(np.random.default_rng(6).bytes(60_000))  # same size, other bytes
        return real(data, seed_src, *a, **k)

    monkeypatch.setattr(extract, "extract_toeplitz", swapping)
    out = tmp_path / "out"
    with pytest.raises(SeedError, match="changed while being read"):
        certify(log, uniform_protocol(), seed, out)
    assert not out.exists()
    left = sorted(p.name for p in tmp_path.iterdir() if not p.name.endswith(".lock"))
    assert left == ["log.btl", "seed.bin"]  # no stage, spill or work file is left
