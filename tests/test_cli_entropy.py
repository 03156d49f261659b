"""The `dicert entropy` command (CLI contract of issue 3)."""

import json
import math

import numpy as np
import pytest
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.entropy import analytic as an

SQRT2 = math.sqrt(2.0)
PAIR_MAX_BITS = 3.0 - math.log2(2.0 + SQRT2)  # Pironio et al., Nature 464, 1021 (2010)

runner = CliRunner()


def _run(*args):
    return runner.invoke(app, ["entropy", *args])


def test_chsh_min_one_party_json():
    r = _run("--chsh", "2.5", "--parties", "A", "--measure", "min", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    # f(2.5) = 0.267568 (Pironio et al. 2010 formula; regression value of methods note A2)
    assert doc["single_round_bound_bits"] == pytest.approx(0.267568, abs=1e-6)
    assert doc["method"] == "analytic"
    assert doc["measure"] == "min" and doc["units"] == "bits per trial"
    # one name per quantity (README glossary): the retired keys are gone
    assert not {"h_min", "h_vn", "h_min_bits", "h_vn_bits", "entropy_bits", "chsh"} & set(doc)


def test_chsh_pair_npa_certificate_details():
    r = _run("--chsh", "3.0", "--parties", "AB", "--level", "1+AB", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    # clamped to Tsirelson; pair at maximal violation 1.228447 bits (Pironio et al. 2010)
    assert PAIR_MAX_BITS - 1e-3 <= doc["single_round_bound_bits"] <= PAIR_MAX_BITS
    cert = doc["certificate"]
    assert cert["solver"] in ("CLARABEL", "SCS")
    assert cert["upper_bound"] >= cert["solver_value"] - 1e-9
    assert doc["level"] == "1+AB" and doc["method"] == "npa-dual-certified"


def test_vn_key_and_value():
    r = _run("--chsh", "2.7", "--measure", "vn", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    # Acin et al. PRL 2007 / Pironio et al. NJP 2009 formula
    p = 0.5 + 0.5 * math.sqrt(2.7**2 / 4 - 1)
    ref = 1 + p * math.log2(p) + (1 - p) * math.log2(1 - p)
    assert doc["single_round_bound_bits"] == pytest.approx(ref, abs=1e-12)


def test_zero_below_local_bound_and_table_output():
    r = _run("--chsh", "1.8", "--parties", "AB", "--method", "table", "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["single_round_bound_bits"] == 0.0  # S <= 2 certifies nothing (common practice)
    r = _run("--chsh", "2.6", "--parties", "AB", "--method", "table")
    assert r.exit_code == 0 and "single-round bound" in r.stdout and "table" in r.stdout


@pytest.mark.parametrize(
    "args",
    [
        ["--chsh", "2.5", "--parties", "B"],
        ["--chsh", "2.5", "--measure", "shannon"],
        ["--chsh", "2.5", "--level", "3"],
        ["--chsh", "2.5", "--method", "guess"],
        [],
        ["--chsh", "2.5", "--from-log", "x.csv"],
        ["--from-log", "/nonexistent/log.csv"],
    ],
)
def test_bad_input_exit_2_one_line(args):
    r = _run(*args)
    assert r.exit_code == 2
    assert "Traceback" not in r.output
    assert len(r.stderr.strip().splitlines()) == 1


def _box_log(tmp_path, e, name="box.csv"):
    """A log whose test-round counts reproduce correlators E_xy exactly (zero marginals)."""
    from dicert.logs import TrialArrays, write_log

    xs, ys, as_, bs = [], [], [], []
    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    k = int(round(1000 * (1 + (1 - 2 * a) * (1 - 2 * b) * e[x][y]) / 4))
                    xs += [x] * k
                    ys += [y] * k
                    as_ += [a] * k
                    bs += [b] * k
    # Rows in a fixed random order: a sorted log has predictable settings and is refused by
    # the serial-independence design check (dicert.design).
    perm = np.random.default_rng(0).permutation(len(xs))
    arr = lambda v: np.array(v, dtype=np.uint8)[perm]  # noqa: E731
    path = tmp_path / name
    write_log(path, TrialArrays(x=arr(xs), y=arr(ys), a=arr(as_), b=arr(bs)))
    return path


def test_from_log_uses_correlators(tmp_path):
    pytest.importorskip("dicert.logs")
    v = 0.9 / SQRT2  # visibility 0.9 of the optimal box: S = 0.9 * 2 sqrt 2 = 2.5456
    path = _box_log(tmp_path, [[v, v], [v, -v]])
    r = _run("--from-log", str(path), "--parties", "A", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    s = doc["chsh_input"]
    assert s == pytest.approx(0.9 * 2 * SQRT2, abs=5e-3)
    # full statistics certify at least what the CHSH value alone does (Nieto-Silleras, Pironio,
    # Silman, NJP 16, 013035 (2014)): the extra constraints can only lower the guessing bound.
    assert doc["single_round_bound_bits"] >= an.min_entropy_single(s) - 1e-6
    assert 3990 <= doc["log"]["trials"] <= 4010  # 1000 per setting pair, up to rounding


def test_from_log_outside_quantum_set(tmp_path):
    pytest.importorskip("dicert.logs")
    path = _box_log(tmp_path, [[1.0, 1.0], [1.0, -1.0]], name="pr.csv")  # PR box, S = 4
    r = _run("--from-log", str(path))
    assert r.exit_code == 2
    assert "quantum set" in r.stderr and len(r.stderr.strip().splitlines()) == 1
