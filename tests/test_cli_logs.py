"""CLI contract of ``inspect`` and ``convert``: JSON keys, one-line errors with exit code 2."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.logs import TrialArrays, read_trials, write_log

runner = CliRunner()


@pytest.fixture
def good_log(tmp_path, rng):
    n = 40_000
    x = rng.integers(0, 2, n, dtype=np.uint8)
    y = rng.integers(0, 2, n, dtype=np.uint8)
    a = rng.integers(0, 2, n, dtype=np.uint8)
    # Best classical strategy a XOR b = 0 wins 3/4 of CHSH games (common practice).
    b = a.copy()
    p = tmp_path / "log.csv"
    write_log(p, TrialArrays(x=x, y=y, a=a, b=b))
    return p


def test_inspect_json_keys(good_log):
    res = runner.invoke(app, ["inspect", str(good_log), "--json", "--eps-est", "0.01"])
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    for key in ("trials", "counts", "chsh_ratio_estimate", "chsh_lower_bound", "win_probability",
                "p_value_local"):
        assert key in out
    assert out["trials"] == 40_000
    assert sum(out["counts"].values()) == 40_000
    assert out["chsh_ratio_estimate"] == pytest.approx(2.0)  # deterministic local strategy: S = 2 exactly
    assert out["win_probability"] == pytest.approx(0.75, abs=0.01)
    assert out["chsh_lower_bound"] < 2.0
    assert out["p_value_local"] > 0.01


def test_inspect_table_and_plot(good_log, tmp_path):
    png = tmp_path / "blocks.png"
    res = runner.invoke(app, ["inspect", str(good_log), "--block-trials", "10000", "--plot", str(png)])
    assert res.exit_code == 0, res.output
    import re

    # the table's block summary: 40,000 trials in blocks of 10,000
    assert "CHSH" in res.stdout and re.search(r"│ blocks\s+│ 4\s", res.stdout)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_convert_round_trip(good_log, tmp_path):
    out = tmp_path / "log.btl"
    res = runner.invoke(app, ["convert", str(good_log), str(out), "--json"])
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)["trials"] == 40_000
    np.testing.assert_array_equal(read_trials(out).codes(), read_trials(good_log).codes())


@pytest.mark.parametrize(
    "content,expect",
    [
        (b"x,y,a,b\n0,0,0,0\n0,0,3,0\n", "line 3"),
        (b"x,y,b\n0,0,0\n", "line 1"),
        (b"", "empty file"),
    ],
)
def test_bad_input_one_line_exit_2(tmp_path, content, expect):
    p = tmp_path / "bad.csv"
    p.write_bytes(content)
    for cmd in (["inspect", str(p)], ["convert", str(p), str(tmp_path / "o.btl")]):
        res = runner.invoke(app, cmd)
        assert res.exit_code == 2
        lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
        assert len(lines) == 1 and str(p) in lines[0] and expect in lines[0]
        assert "Traceback" not in res.output
    assert not (tmp_path / "o.btl").exists()


def test_missing_file_exit_2(tmp_path):
    res = runner.invoke(app, ["inspect", str(tmp_path / "absent.btl")])
    assert res.exit_code == 2 and "no such file" in res.stderr


def test_help_is_fast_and_lazy():
    """`dicert --help` must not import the heavy libraries (checked in a fresh interpreter)."""
    import subprocess
    import sys

    code = (
        "import sys; from dicert.cli.app import app; "
        "heavy = [m for m in ('scipy', 'cvxpy', 'matplotlib', 'cryptography', 'numba') if m in sys.modules]; "
        "print(','.join(heavy))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == ""
    assert not math.isnan(0.0)
