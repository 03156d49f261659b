"""Protocol values the formulas cannot handle are refused at load time, naming the key; plan
and the entropy-accumulation threshold never hang and never produce NaN."""

from __future__ import annotations

import math
import time
import tomllib
from pathlib import Path

import pytest

from dicert.errors import ParameterError, ProtocolError
from dicert.protocol import MAX_INTEGER, load_protocol, protocol_from_dict

ROOT = Path(__file__).resolve().parents[1]
BIG = 2**60


def _shipped(name: str) -> dict:
    return tomllib.loads((ROOT / "protocols" / f"{name}.toml").read_text())


def _replace_line(name: str, start: str, new: str) -> str:
    lines = (ROOT / "protocols" / f"{name}.toml").read_text().splitlines()
    idx = [i for i, ln in enumerate(lines) if ln.startswith(start)]
    assert len(idx) == 1, start
    lines[idx[0]] = new
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize(("name", "start", "line", "key"), [
    # eps_s = 1e-200: eps_s**2 underflows to 0 in g(eps_s) (ZeroDivisionError before).
    ("chsh-spotcheck", "eps_s =", "eps_s = 1e-200", "analysis.eps_s"),
    ("chsh-spotcheck", "eps_ea =", "eps_ea = 5e-324", "analysis.eps_ea"),
    ("chsh-uniform", "eps_est =", "eps_est = 1e-300", "analysis.eps_est"),
    ("chsh-uniform", "eps_ext =", "eps_ext = 1e-160", "extractor.eps_ext"),
    ("ch-photonic", "eps_pe =", "eps_pe = 1e-300", "analysis.eps_pe"),
    # gamma = 5e-324: gamma/4 underflows to 0 in the martingale estimator.
    ("chsh-spotcheck", "gamma =", "gamma = 5e-324", "settings.gamma"),
    # Integers beyond 2**53 - 1 used to fail only when the record was canonicalised, after
    # the whole certification (RFC 7493 section 2.2: I-JSON integers within +-(2**53 - 1)).
    ("ch-photonic", "n_max =", f"n_max = {BIG}", "analysis.n_max"),
    ("ch-photonic", "calibration_trials =", f"calibration_trials = {BIG}",
     "analysis.calibration_trials"),
    ("chsh-spotcheck", "# trials =", f"trials = {2**53}", "design.trials"),
])
def test_out_of_range_values_are_refused_at_load_naming_the_key(tmp_path, name, start, line, key):
    p = tmp_path / "p.toml"
    p.write_text(_replace_line(name, start, line))
    with pytest.raises(ProtocolError) as info:
        load_protocol(p)
    msg = str(info.value)
    assert f"key '{key}'" in msg and str(p) in msg
    assert "\n" not in msg


def test_integer_limit_is_the_ijson_safe_range():
    # RFC 7493 section 2.2: 2**53 - 1 is the largest safe integer; it must be accepted.
    d = _shipped("ch-photonic")
    d["analysis"]["n_max"] = MAX_INTEGER
    assert protocol_from_dict(d, "x").analysis.n_max == 2**53 - 1
    d["analysis"]["n_max"] = MAX_INTEGER + 1
    with pytest.raises(ProtocolError, match="n_max"):
        protocol_from_dict(d, "x")


@pytest.mark.parametrize(("text", "expect"), [
    ("[analysis]\nmethod = \"eat\"\neps_s = 1e-8\neps_s = 1e-9\n", "key 'analysis.eps_s'"),
    ("name = \"a\"\nname = \"b\"\n", "key 'name'"),
    ("[bell]\nkind = \"chsh\"\n[settings]\ngamma = 1.0\n[bell]\n", "table [bell]"),
])
def test_duplicated_toml_key_is_named(tmp_path, text, expect):
    p = tmp_path / "dup.toml"
    p.write_text(text)
    with pytest.raises(ProtocolError) as info:
        load_protocol(p)
    assert expect in str(info.value) and "twice" in str(info.value)


def test_values_at_the_floors_keep_every_formula_finite(tmp_path):
    # The smallest accepted values still give finite, non-negative bounds (no division by 0).
    from dicert.finite.eat import eat_min_entropy

    d = _shipped("chsh-spotcheck")
    d["analysis"].update(eps_s=1e-100, eps_ea=1e-100)
    d["settings"]["gamma"] = 1e-100
    p = protocol_from_dict(d, "x")
    bits, th, rate = eat_min_entropy(p.analysis, 10**6, p.gamma)
    assert math.isfinite(bits) and bits >= 0
    d = _shipped("chsh-spotcheck")
    d["analysis"].update(eps_s=1e-100, eps_ea=1e-100)
    p = protocol_from_dict(d, "x")
    bits, _, _ = eat_min_entropy(p.analysis, 10**7, p.gamma)
    assert math.isfinite(bits)


def test_binomial_threshold_matches_scipy_and_ends_for_huge_n():
    # Against scipy.stats.binom.sf / cdf (reference library): L_max is the smallest l with
    # P[Bin > l] <= eps, W_min the largest w with P[Bin < w] <= eps.
    from scipy.stats import binom

    from dicert.finite.eat import _binomial_limit

    for n, p, eps in ((1000, 0.008, 1e-6), (10**6, 0.042, 1e-9), (37, 0.5, 0.01)):
        lim = _binomial_limit("losses", eps, n, p)
        assert binom.sf(lim, n, p) <= eps < binom.sf(lim - 1, n, p)
        w = _binomial_limit("wins", eps, n, p)
        assert binom.cdf(w - 1, n, p) <= eps < binom.cdf(w, n, p)
    # n = 2**53 - 1 and eps = 1e-100: scipy's binom.ppf returns NaN here, isf searched for
    # minutes; the bisection takes at most 55 tail evaluations.
    t0 = time.perf_counter()
    for acc in ("losses", "wins"):
        lim = _binomial_limit(acc, 1e-100, MAX_INTEGER, 0.5)
        assert 0 <= lim <= MAX_INTEGER
    assert time.perf_counter() - t0 < 30  # a hang guard, not a performance test


def test_plan_refuses_trials_beyond_2_53_and_ends_at_the_limit():
    from dicert.plan import plan

    prot = load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml")
    with pytest.raises(ParameterError, match="2\\*\\*53"):
        plan(prot, trials=BIG, n_points=3, gamma_points=2)
    with pytest.raises(ParameterError, match="gamma"):
        plan(prot, gamma=5e-324, n_points=3, gamma_points=2)
    d = _shipped("chsh-spotcheck")
    d["analysis"].pop("tolerance")
    d["analysis"]["eps_comp"] = 1e-100  # derived threshold from the exact binomial tail
    res = plan(protocol_from_dict(d, "x"), trials=MAX_INTEGER, n_points=3, gamma_points=2)
    for m in res.methods:
        assert math.isfinite(m.certified_min_entropy_bits) and m.output_bits >= 0
        assert 0.0 <= m.abort_probability <= 1.0


@pytest.mark.parametrize("args", [
    ["plan", "--protocol", "{big}"],
    ["certify", "{log}", "--protocol", "{big}", "--seed", "{seed}", "--out", "{out}"],
])
def test_cli_reports_out_of_range_protocol_before_any_work(tmp_path, args):
    from typer.testing import CliRunner

    from dicert.cli.app import app

    big = tmp_path / "big.toml"
    big.write_text(_replace_line("ch-photonic", "n_max =", f"n_max = {BIG}"))
    log = tmp_path / "log.csv"
    log.write_text("x,y,a,b\n0,0,0,0\n")
    seed = tmp_path / "seed.bin"
    seed.write_bytes(bytes(64))
    out = tmp_path / "out"
    argv = [a.format(big=big, log=log, seed=seed, out=out) for a in args]
    res = CliRunner().invoke(app, argv)
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "analysis.n_max" in lines[0] and "Traceback" not in res.output
    assert not out.exists()  # nothing written, not even an empty folder


def test_endless_protocol_file_is_refused():
    # /dev/zero never ends: the loader stops after 1 MiB instead of exhausting memory.
    import os

    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero on this system")
    with pytest.raises(ProtocolError, match="larger than 1048576 bytes"):
        load_protocol("/dev/zero")


def test_cli_plan_trials_beyond_2_53_is_one_line():
    from typer.testing import CliRunner

    from dicert.cli.app import app

    res = CliRunner().invoke(app, ["plan", "--protocol", str(ROOT / "protocols" / "chsh-spotcheck.toml"),
                                   "--trials", str(2**60)])
    assert res.exit_code == 2
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and "--trials" in lines[0] and "Traceback" not in res.output
