"""Tests of dicert.health against the NIST worked examples and reference libraries."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.stats

from dicert.errors import ParameterError
from dicert.health import (
    STATEMENT,
    as_bits,
    block_frequency_test,
    frequency_test,
    longest_run_class_probabilities,
    longest_run_test,
    mcv_estimate,
    run_health_checks,
    runs_test,
)

VEC = Path(__file__).parent / "vectors" / "nist"
SP22 = json.loads((VEC / "sp800-22-examples.json").read_text())
SP90B = json.loads((VEC / "sp800-90b-mcv-example.json").read_text())


def bits(spec: str) -> np.ndarray:
    s = SP22.get(spec, spec)
    return np.array([int(c) for c in s], dtype=np.uint8)


# --------------------------------------------------------------------------- SP 800-22 examples


@pytest.mark.parametrize("case", SP22["frequency"], ids=lambda c: c["section"])
def test_frequency_examples(case):
    # NIST SP 800-22 rev. 1a, sections 2.1.4 and 2.1.8 (P printed to 6 decimals).
    r = frequency_test(bits(case["bits"]))
    assert r.parameters["S_n"] == case["S_n"]
    assert r.statistic == pytest.approx(case["s_obs"], abs=1e-9)
    assert r.p_value == pytest.approx(case["p_value"], abs=5e-7)


@pytest.mark.parametrize("case", SP22["block_frequency"], ids=lambda c: c["section"])
def test_block_frequency_examples(case):
    # NIST SP 800-22 rev. 1a, sections 2.2.4 and 2.2.8.
    r = block_frequency_test(bits(case["bits"]), case["M"])
    assert r.parameters["N"] == case["N"]
    assert r.statistic == pytest.approx(case["chi2"], abs=1e-12)
    assert r.p_value == pytest.approx(case["p_value"], abs=5e-7)
    # igamc(N/2, chi2/2) is the chi-square survival function with N degrees of freedom
    # (scipy.stats.chi2.sf; common practice).
    assert r.p_value == pytest.approx(scipy.stats.chi2.sf(case["chi2"], case["N"]), rel=1e-12)


@pytest.mark.parametrize("case", SP22["runs"], ids=lambda c: c["section"])
def test_runs_examples(case):
    # NIST SP 800-22 rev. 1a, sections 2.3.4 and 2.3.8.
    r = runs_test(bits(case["bits"]))
    assert r.parameters["pi"] == pytest.approx(case["pi"], abs=1e-15)
    assert r.parameters["V"] == case["V"]
    assert r.p_value == pytest.approx(case["p_value"], abs=5e-7)


def test_longest_run_example():
    # NIST SP 800-22 rev. 1a, section 2.4.8 (e128, M = 8): nu = (4, 9, 3, 0). dicert uses the
    # exact class probabilities, for which the standard's text prints P = 0.180609 (with its
    # 4-decimal table it prints 0.180598; see the methods note, section C1).
    case = SP22["longest_run"][0]
    r = longest_run_test(bits(case["bits"]))
    assert r.parameters["M"] == 8 and r.parameters["N"] == 16
    assert r.parameters["nu"] == case["nu"]
    assert r.statistic == pytest.approx(case["chi2_exact_probabilities"], abs=5e-7)
    assert r.p_value == pytest.approx(case["p_value_exact_probabilities"], abs=5e-7)
    # Using the table's rounded probabilities instead reproduces the other printed pair.
    pi = np.array([0.2148, 0.3672, 0.2305, 0.1875])
    nu = np.array(case["nu"])
    chi2 = float(np.sum((nu - 16 * pi) ** 2 / (16 * pi)))
    assert chi2 == pytest.approx(case["chi2_table_probabilities"], abs=5e-7)
    assert scipy.stats.chi2.sf(chi2, 3) == pytest.approx(case["p_value_table_probabilities"],
                                                         abs=5e-7)


def test_longest_run_class_probabilities_match_table():
    # M = 8: exact 55/256, 94/256, 59/256, 48/256 (methods note C1, computed) and the table of
    # NIST SP 800-22 rev. 1a section 3.4 (0.2148, 0.3672, 0.2305, 0.1875).
    p8 = longest_run_class_probabilities(8, 1, 4)
    assert p8 == (55 / 256, 94 / 256, 59 / 256, 48 / 256)
    assert np.allclose(p8, [0.2148, 0.3672, 0.2305, 0.1875], atol=5e-5)
    # M = 128: table values of SP 800-22 section 3.4, from memory.
    p128 = longest_run_class_probabilities(128, 4, 9)
    assert np.allclose(p128, [0.1174, 0.2430, 0.2493, 0.1752, 0.1027, 0.1124], atol=1.5e-4)
    # M = 10^4: the printed table (from memory) was computed approximately; agreement to 2e-3.
    p1e4 = longest_run_class_probabilities(10_000, 10, 16)
    assert np.allclose(p1e4, [0.0882, 0.2092, 0.2483, 0.1933, 0.1208, 0.0675, 0.0727], atol=2e-3)
    for p in (p8, p128, p1e4):
        assert math.isclose(sum(p), 1.0, rel_tol=1e-12)


def test_longest_runs_against_per_block_loop(rng):
    # Naive oracle (common practice): scan each block bit by bit.
    e = rng.integers(0, 2, 128 * 300, dtype=np.uint8)
    e[:128] = 1  # one block of all ones (run 128, class >= 9)
    r = longest_run_test(e)
    assert r.parameters["M"] == 128
    nu = [0] * 6
    for blk in e.reshape(-1, 128):
        best = cur = 0
        for v in blk:
            cur = cur + 1 if v else 0
            best = max(best, cur)
        nu[min(max(best, 4), 9) - 4] += 1
    assert r.parameters["nu"] == nu


# --------------------------------------------------------------------------- SP 800-90B


def test_mcv_example():
    # NIST SP 800-90B section 6.3.1 worked example (p_u printed as 0.6895; H = 0.5363).
    r = mcv_estimate(SP90B["samples"])
    assert r.samples == SP90B["L"] and r.most_common == SP90B["most_common"]
    assert r.p_hat == pytest.approx(SP90B["p_hat"], abs=1e-15)
    assert r.p_upper == pytest.approx(SP90B["p_upper"], abs=5e-5)
    assert r.min_entropy_per_sample == pytest.approx(SP90B["min_entropy"], abs=5e-5)


def test_mcv_saturates_for_constant_input():
    r = mcv_estimate(np.zeros(50, dtype=np.uint8))
    assert r.p_upper == 1.0 and r.min_entropy_per_sample == 0.0
    with pytest.raises(ParameterError):
        mcv_estimate([1])


# --------------------------------------------------------------------------- recipe


def test_monobit_p_value_matches_normal_tail(rng):
    # erfc(s/sqrt 2) = 2 * (1 - Phi(s)) (scipy.stats.norm.sf; common practice).
    e = rng.integers(0, 2, 5000, dtype=np.uint8)
    r = frequency_test(e)
    assert r.p_value == pytest.approx(2 * scipy.stats.norm.sf(r.statistic), rel=1e-10)


@pytest.mark.parametrize(
    ("test", "n"),
    [(frequency_test, 1000), (lambda e: block_frequency_test(e, 128), 12800), (runs_test, 1000),
     (longest_run_test, 1024), (longest_run_test, 6400)],
)
def test_p_values_are_uniform_under_fair_bits(test, n):
    # Under the null hypothesis the P-values are uniform on [0, 1] (SP 800-22 rev. 1a section
    # 4.2.2); Kolmogorov-Smirnov test with scipy.stats.kstest at level 1e-3.
    rng = np.random.default_rng(99)
    ps = [test(rng.integers(0, 2, n, dtype=np.uint8)).p_value for _ in range(300)]
    assert scipy.stats.kstest(ps, "uniform").pvalue > 1e-3


def test_report_on_good_and_bad_bits(rng):
    good = rng.integers(0, 256, 1 << 13, dtype=np.uint8).tobytes()  # 65536 bits
    rep = run_health_checks(good)
    assert rep.n_bits == 65536
    assert [t.section for t in rep.tests] == ["SP 800-22 2.1", "SP 800-22 2.2", "SP 800-22 2.3",
                                              "SP 800-22 2.4"]
    assert all(t.applicable for t in rep.tests)
    assert rep.passed, rep.tests
    assert rep.tests[1].parameters["M"] == 656  # max(20, n//100 + 1): M > n/100, N = 99 < 100
    assert rep.tests[3].parameters["M"] == 128  # n >= 6272
    assert rep.mcv_per_bit.min_entropy_per_sample > 0.97
    assert rep.mcv_per_byte is not None and rep.mcv_per_byte.bits_per_sample == 8
    assert "proves nothing about unpredictability" in rep.statement == STATEMENT

    stuck = run_health_checks(b"\x00" * 4096)
    assert not stuck.passed
    assert stuck.mcv_per_bit.min_entropy_per_sample == 0.0
    runs = {t.section: t for t in stuck.tests}["SP 800-22 2.3"]
    assert runs.p_value == 0.0 and "prerequisite" in runs.note

    tiny = runs_test(np.ones(10, dtype=np.uint8))  # n < 17: 2/sqrt(n) > 1/2, all ones
    assert tiny.p_value == 0.0

    alternating = run_health_checks(b"\x55" * 4096)  # balanced but far too many runs
    res = {t.section: t for t in alternating.tests}
    assert res["SP 800-22 2.1"].passed
    assert not res["SP 800-22 2.3"].passed
    assert not alternating.passed


def test_short_sequences_are_flagged_not_failed():
    rep = run_health_checks(np.array([1, 0, 1, 1, 0, 1, 0, 1, 0, 1], dtype=np.uint8))
    assert all(not t.applicable and t.passed is None for t in rep.tests)
    assert not rep.passed  # nothing applicable: no claim of passing
    assert "too short" in rep.tests[0].note


def test_inputs_and_n_bits(tmp_path):
    data = bytes([0b10110000])
    assert as_bits(data).tolist() == [1, 0, 1, 1, 0, 0, 0, 0]
    assert as_bits(data, 3).tolist() == [1, 0, 1]
    (tmp_path / "b.bin").write_bytes(data)
    assert as_bits(tmp_path / "b.bin", 4).tolist() == [1, 0, 1, 1]
    with pytest.raises(ParameterError, match="0/1"):
        as_bits(np.array([0, 2, 1]))
    with pytest.raises(ParameterError, match="exceeds"):
        as_bits(data, 9)
    with pytest.raises(ParameterError, match="missing: file of packed bits not found"):
        as_bits(tmp_path / "missing")
    with pytest.raises(ParameterError, match="at least 2 bits"):
        run_health_checks(np.array([1], dtype=np.uint8))
    with pytest.raises(ParameterError, match="alpha"):
        run_health_checks(data, alpha=0.0)
    with pytest.raises(ParameterError, match="128"):
        longest_run_test(np.ones(100, dtype=np.uint8))


def test_bits_files_are_read_bounded(tmp_path):
    # Hostile input: a device (/dev/zero) or an oversized file is refused with one line, never
    # read whole; --input-bits screens a prefix of any of them.
    import os

    from dicert.health import MAX_SCREEN_BYTES, read_bits_file

    big = tmp_path / "big.bits"
    with open(big, "wb") as fh:
        fh.truncate(MAX_SCREEN_BYTES + 1)
    with pytest.raises(ParameterError, match="--input-bits"):
        as_bits(big)
    assert as_bits(big, 1000).tolist() == [0] * 1000
    assert len(read_bits_file(big, 9)) == 2
    if os.path.exists("/dev/zero"):
        with pytest.raises(ParameterError, match="not a regular file"):
            as_bits("/dev/zero")
        assert as_bits("/dev/zero", 64).sum() == 0
    with pytest.raises(ParameterError, match="directory"):
        as_bits(tmp_path)


def test_agreed_interface_name_in_extract_module():
    # The pipeline imports run_health_checks from dicert.extract (cross-helper interface).
    from dicert import extract, health

    assert extract.run_health_checks is health.run_health_checks
    assert extract.HealthReport is health.HealthReport


def test_cli_refuses_a_device_in_one_line_with_exit_2():
    import os

    from typer.testing import CliRunner

    from dicert.cli.app import app

    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero")
    r = CliRunner().invoke(app, ["health", "/dev/zero"])
    assert r.exit_code == 2
    err = r.stderr.strip()
    assert err.splitlines() == [err] and "/dev/zero" in err and "Traceback" not in r.output
    r = CliRunner().invoke(app, ["health", "/dev/zero", "--input-bits", "4096", "--json"])
    assert r.exit_code == 1  # all zeros: the frequency test fails (SP 800-22 section 2.1)


@pytest.mark.parametrize("n", [2, 7, 8, 9, 50, 51])
def test_chunked_runs_and_mcv_match_their_definitions(monkeypatch, n):
    # The runs count V (SP 800-22 rev. 1a section 2.3.4, step 3: V = 1 + #{k: e_k != e_(k+1)})
    # and the MCV count (SP 800-90B section 6.3.1) are taken chunk by chunk so that a large
    # output needs no temporaries as large as itself; with 7-element chunks every boundary
    # case occurs, and both must equal the direct whole-array computation.
    import dicert.health as H

    monkeypatch.setattr(H, "_CHUNK", 7)
    e = np.random.default_rng(n).integers(0, 2, n).astype(np.uint8)
    v = 1 + int(np.count_nonzero(e[1:] != e[:-1]))
    assert H.runs_test(e).statistic == v  # (reported whether or not the test is run)
    got = H.mcv_estimate(e)
    assert got.p_hat == np.bincount(e).max() / n
    byte_samples = np.random.default_rng(1).integers(0, 256, n).astype(np.uint8)
    assert H.mcv_estimate(byte_samples).p_hat == np.bincount(byte_samples).max() / n
