"""CLI contract of ``dicert extract`` and ``dicert health``."""

from __future__ import annotations

import hashlib
import json

import numpy as np
import pytest
import scipy.linalg
from typer.testing import CliRunner

from dicert.cli.app import app

runner = CliRunner()


def dense(x: bytes, s: bytes, n: int, m: int) -> bytes:
    # Oracle: dense Toeplitz product over GF(2) from scipy.linalg.toeplitz (common practice).
    xv = np.unpackbits(np.frombuffer(x, np.uint8))[:n].astype(np.int64)
    sv = np.unpackbits(np.frombuffer(s, np.uint8))[: n + m - 1].astype(np.int64)
    T = scipy.linalg.toeplitz(sv[n - 1: n + m - 1], sv[n - 1:: -1])
    return np.packbits((T @ xv) & 1).tobytes()


@pytest.fixture
def files(tmp_path, rng):
    raw = rng.integers(0, 256, 300, dtype=np.uint8).tobytes()
    seed = rng.integers(0, 256, 500, dtype=np.uint8).tobytes()
    (tmp_path / "raw.bin").write_bytes(raw)
    (tmp_path / "seed.bin").write_bytes(seed)
    return tmp_path, raw, seed


def run(*args):
    return runner.invoke(app, [str(a) for a in args])


def test_extract_json_and_output(files):
    d, raw, seed = files
    r = run("extract", "--input", d / "raw.bin", "--seed", d / "seed.bin", "--bits", 1001,
            "--out", d / "out.bin", "--input-bits", 2397, "--json")
    assert r.exit_code == 0, r.output
    info = json.loads(r.stdout)
    out = (d / "out.bin").read_bytes()
    assert out == dense(raw, seed, 2397, 1001)
    assert len(out) == 126 == info["output_bytes"]
    assert info["m_bits"] == 1001 and info["n_bits"] == 2397
    assert info["seed_bits"] == 2397 + 1001 - 1
    assert info["output_sha256"] == hashlib.sha256(out).hexdigest()
    assert info["input_sha256"] == hashlib.sha256(raw).hexdigest()  # ceil(2397/8) = 300 bytes
    assert info["seed_sha256"] == hashlib.sha256(seed).hexdigest()
    assert info["throughput_mbit_s"] > 0 and info["method"] == "fft-cyclic"
    assert info["convention"].startswith("T[i][j] = s[i - j + n - 1]")


def test_extract_table_output(files):
    d, _, _ = files
    r = run("extract", "--input", d / "raw.bin", "--seed", d / "seed.bin", "--bits", 64,
            "--out", d / "o.bin")
    assert r.exit_code == 0, r.output
    assert "T[i][j] = s[i - j + n - 1]" in r.stdout
    assert hashlib.sha256((d / "o.bin").read_bytes()).hexdigest()[:24] in r.stdout


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--bits", 2000], "seed too short: 500 bytes given, 550 bytes needed"),
        (["--bits", 0], "--bits must be a positive integer"),
        (["--bits", 8, "--input-bits", 2401], "--input-bits 2401 exceeds the 2400 bits"),
        (["--bits", 8, "--input-bits", 0], "--input-bits must be a positive integer"),
    ],
)
def test_extract_bad_input_one_line_exit_2(files, args, message):
    d, _, _ = files
    r = run("extract", "--input", d / "raw.bin", "--seed", d / "seed.bin", "--out", d / "o.bin",
            *args)
    assert r.exit_code == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("dicert: error: ") and message in lines[0]
    assert "Traceback" not in r.output
    assert not (d / "o.bin").exists()  # nothing half-written
    assert [p.name for p in d.iterdir()] == sorted(["raw.bin", "seed.bin"]) or \
        sorted(p.name for p in d.iterdir()) == ["raw.bin", "seed.bin"]


def test_extract_missing_files_and_overwrite(files):
    d, raw, _ = files
    r = run("extract", "--input", d / "nope.bin", "--seed", d / "seed.bin", "--bits", 8,
            "--out", d / "o.bin")
    assert r.exit_code == 2 and "nope.bin: no such file (--input)" in r.stderr
    r = run("extract", "--input", d / "raw.bin", "--seed", d / "nope.bin", "--bits", 8,
            "--out", d / "o.bin")
    assert r.exit_code == 2 and "nope.bin: no such file (--seed)" in r.stderr
    r = run("extract", "--input", d / "raw.bin", "--seed", d / "seed.bin", "--bits", 8,
            "--out", d / "raw.bin")
    assert r.exit_code == 2 and "--out must not be" in r.stderr
    assert (d / "raw.bin").read_bytes() == raw


def test_health_pass_fail_and_json(tmp_path):
    # A fixed pseudo-random input that passes (ideal bits fail each test 1% of the time).
    good = tmp_path / "good.bin"
    good.write_bytes(np.random.default_rng(1).integers(0, 256, 4096, dtype=np.uint8).tobytes())
    r = run("health", good)
    assert r.exit_code == 0, r.output
    assert "proves nothing about unpredictability" in " ".join(r.stdout.split())
    r = run("health", good, "--json")
    rep = json.loads(r.stdout)
    assert rep["n_bits"] == 32768 and rep["passed"] is True
    assert rep["tests"][0]["section"] == "SP 800-22 2.1"
    stuck = tmp_path / "stuck.bin"
    stuck.write_bytes(b"\xff" * 512)
    r = run("health", stuck)
    assert r.exit_code == 1 and "FAIL" in r.stdout
    r = run("health", stuck, "--input-bits", 10)  # too short for every test: not a failure
    assert r.exit_code == 0 and "too short" in r.stdout


def test_health_bad_input(tmp_path):
    r = run("health", tmp_path / "none.bin")
    assert r.exit_code == 2 and r.stderr.strip() == f"dicert: error: {tmp_path / 'none.bin'}: file of packed bits not found"
    (tmp_path / "b.bin").write_bytes(b"\x00\x01")
    r = run("health", tmp_path / "b.bin", "--input-bits", 17)
    assert r.exit_code == 2 and "exceeds the 16 bits" in r.stderr
    r = run("health", tmp_path / "b.bin", "--alpha", 2)
    assert r.exit_code == 2 and "--alpha" in r.stderr
