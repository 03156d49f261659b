"""CLI contract of ``dicert simulate``: files written through the log writers, JSON summary,
reproducibility with --rng-stream, and one-line errors with exit code 2."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.logs import read_trials, summarize_log

runner = CliRunner()


def run(*args: str):
    return runner.invoke(app, ["simulate", *args])


@pytest.mark.parametrize("fmt,name", [("binary", "s.btl"), ("csv", "s.csv"), ("csv.gz", "s.csv.gz"), ("npz", "s.npz")])
def test_simulate_json_and_file(tmp_path, fmt, name):
    out = tmp_path / name
    res = run("--trials", "20000", "--visibility", "0.9", "--gamma", "0.5", "--format", fmt,
              "--out", str(out), "--rng-stream", "7", "--json")
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    assert js["trials"] == 20000 and js["format"] == fmt and js["rng_stream"] == 7
    assert js["model"] == "quantum" and js["has_test_flag"] is True
    # Theory of the simulated box: S = 2 sqrt(2) v, win = 1/2 + S/8 (common practice).
    assert js["chsh"] == pytest.approx(0.9 * 2 * math.sqrt(2), abs=1e-12)
    assert js["win_probability"] == pytest.approx(0.5 + js["chsh"] / 8, abs=1e-12)
    summ = summarize_log(out)
    assert summ.trials == 20000 and summ.sha256 == js["sha256"]
    assert np.array_equal(np.array(js["counts"]), summ.counts)
    assert js["test_rounds"] == int(read_trials(out).t.sum())


def test_simulate_readable_table(tmp_path):
    res = run("-n", "1e4", "-o", str(tmp_path / "s.btl"), "--model", "classical", "--rng-stream", "1")
    assert res.exit_code == 0, res.output
    assert "simulated log" in res.stdout and "invented" in res.stdout


def test_same_seed_same_bytes_and_inspect_agrees(tmp_path):
    a, b = tmp_path / "a.btl", tmp_path / "b.btl"
    for p in (a, b):
        res = run("--trials", "200000", "--out", str(p), "--rng-stream", "11", "--model", "classical")
        assert res.exit_code == 0, res.output
    assert a.read_bytes() == b.read_bytes()
    res = runner.invoke(app, ["inspect", str(a), "--json"])
    assert res.exit_code == 0, res.output
    # The best deterministic strategy gives S = 2 exactly (CHSH 1969; common practice).
    assert json.loads(res.stdout)["chsh_ratio_estimate"] == pytest.approx(2.0, abs=1e-12)


def test_photonic_model_json(tmp_path):
    res = run("--trials", "50000", "--model", "photonic", "--out", str(tmp_path / "p.npz"),
              "--rng-stream", "2", "--json")
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    # S = 2 + 4J (Clauser-Horne 1974; methods note D) and J = 0.0084 (regression value
    # computed in the methods note, section 4).
    assert js["chsh"] == pytest.approx(2 + 4 * js["ch_eberhard_j"], abs=1e-12)
    assert js["ch_eberhard_j"] == pytest.approx(0.0084, abs=5e-5)
    assert js["parameters"]["efficiency"] == 0.76 and js["parameters"]["r"] == 2.918


def test_generation_and_bias_options(tmp_path):
    out = tmp_path / "g.csv"
    res = run("-n", "5000", "-o", str(out), "--gamma", "0.2", "--generation", "1,1",
              "--bias-x", "0.25", "--rng-stream", "4", "--json")
    assert res.exit_code == 0, res.output
    js = json.loads(res.stdout)
    assert js["generation"] == [1, 1] and js["settings_bias"] == [0.25, 0.5]
    tr = read_trials(out)
    assert np.all(tr.x[tr.t == 0] == 1) and np.all(tr.y[tr.t == 0] == 1)


@pytest.mark.parametrize(
    "args,needle",
    [
        (["--trials", "100", "--visibility", "1.5"], "visibility"),
        (["--trials", "abc"], "--trials"),
        (["--trials", "0"], "--trials"),
        (["--trials", "100", "--gamma", "0"], "gamma"),
        (["--trials", "100", "--model", "magic"], "unknown model"),
        (["--trials", "100", "--format", "xls"], "format"),
        (["--trials", "100", "--generation", "2,0"], "--generation"),
        (["--trials", "100", "--model", "classical", "--efficiency", "0.5"], "efficiency"),
        (["--trials", "100", "--model", "photonic", "--state-ratio", "-2"], "r must"),
        (["--trials", "100", "--rng-stream", "-3"], "--rng-stream"),
        (["--trials", "100", "--rng-stream", "3", "--rng-seed", "3"], "former name"),
    ],
)
def test_bad_input_one_line_exit_2(tmp_path, args, needle):
    out = tmp_path / "bad.btl"
    res = run(*args, "--out", str(out))
    assert res.exit_code == 2, res.output
    err = res.stderr.strip()
    assert err.count("\n") == 0 and "Traceback" not in err and needle in err, err
    assert not out.exists() and list(tmp_path.iterdir()) == []  # nothing half-written


def test_unknown_extension_is_one_line_error(tmp_path):
    res = run("--trials", "10", "--out", str(tmp_path / "log.dat"))
    assert res.exit_code == 2 and "extension" in res.stderr and res.stderr.strip().count("\n") == 0


def test_former_rng_option_still_replays_the_same_stream(tmp_path):
    # --rng-seed is the hidden former name of --rng-stream ("seed" now means only the extractor
    # seed, README glossary): the same number gives the same bytes, with a note on stderr.
    a, b = tmp_path / "a.btl", tmp_path / "b.btl"
    assert run("-n", "5000", "-o", str(a), "--rng-stream", "9").exit_code == 0
    res = run("-n", "5000", "-o", str(b), "--rng-seed", "9")
    assert res.exit_code == 0, res.output
    assert "now called --rng-stream" in res.stderr
    assert a.read_bytes() == b.read_bytes()
    assert "--rng-seed" not in run("--help").stdout
