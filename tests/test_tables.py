"""Complete, untruncated, machine-readable tables: `certify`, `verify`, `inspect`, `plan`.

For each command: every number its table shows equals the number its `--json` object carries
(within the rounding direction of its kind, dicert/_format.py) and the record's value; every
64-hex digest and key fingerprint appears whole at COLUMNS=80 on a non-terminal; no "..." or
ellipsis anywhere. The names are the README glossary's (a project rule, README "Glossary").
"""

from __future__ import annotations

import json
import math
import os
import re
import subprocess
import sys
from decimal import Decimal
from pathlib import Path

import pytest
from helpers import sim_trials
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from dicert._format import DIRECTION, consistent, fmt
from dicert.cli._rows import Row, get_path, record_rows, weighted_estimate_path
from dicert.cli.app import app
from dicert.logs import write_log

ROOT = Path(__file__).resolve().parents[1]
UNIFORM = str(ROOT / "protocols" / "chsh-uniform.toml")
FIXTURE = ROOT / "tests" / "fixtures" / "records" / "v3" / "martingale"
HEX64 = re.compile(r"\b[0-9a-f]{64}\b")
NUMERIC = {k for k in DIRECTION}


def _runner() -> CliRunner:
    try:
        return CliRunner(mix_stderr=False)
    except TypeError:  # newer click keeps stderr apart already
        return CliRunner()


def _run(args: list[str], columns: int = 250):
    r = _runner().invoke(app, args, env={"COLUMNS": str(columns)})
    return r


# --------------------------------------------------------------------------- table parsing


def parse_table(text: str) -> dict[str, list[str]]:
    """Label -> value-cell lines of every two-column table in ``text`` (rich box drawing).

    A row starts at a line with a non-empty label cell; lines with an empty label continue
    the row above (a folded value)."""
    rows: dict[str, list[str]] = {}
    last = None
    for line in text.splitlines():
        if not line.startswith("\u2502"):
            last = None if not line.startswith(("\u251c", "\u2502")) else last
            continue
        cells = line.split("\u2502")
        if len(cells) != 4:  # not a two-column table (e.g. the correlators)
            continue
        label, value = cells[1].strip(), cells[2].strip()
        if label:
            last = label
            rows.setdefault(label, []).append(value)
        elif last is not None:
            rows[last][-1] += "\n" + value
    return rows


def shown_number(cell: str) -> str:
    """The number a value cell shows (before its note in parentheses)."""
    return cell.split("\n")[0].split(" (")[0].strip()


def assert_rows_match(rows: list[Row], table: dict[str, list[str]], doc: dict,
                      record: dict | None = None, table_record: dict | None = None) -> int:
    """Every keyed row: table text == JSON value written in its kind (rounding direction of
    the kind), JSON value == the record's value. Returns the number of numbers checked.

    ``table_record``: the record of the run that printed the table, when the JSON came from
    a second run (its digests then come from that record: the record digest covers the
    run's timestamps)."""
    seen: dict[str, int] = {}
    checked = 0
    for r in rows:
        label = r.label.strip()  # an indented label ("  output bits there") is stripped
        assert label in table, f"row {label!r} missing from the table"
        i = seen.get(label, 0)
        seen[label] = i + 1
        cell = table[label][i]
        if r.key is None:
            continue
        js = get_path(doc, r.key)
        if r.kind in NUMERIC:
            text = shown_number(cell)
            assert consistent(text, js, r.kind), (r.label, text, js, r.kind)
            checked += 1
        elif r.kind == "digest":
            want = js if table_record is None or r.record is None \
                else get_path(table_record, r.record)
            assert want is None or want in "".join(cell.split()), (r.label, cell, want)
        elif r.kind == "flag":
            assert shown_number(cell) == ("yes" if js else "no"), (r.label, cell, js)
        if record is not None and r.record is not None:
            assert js == get_path(record, r.record), (r.label, js, r.record)
    return checked


def assert_digests_whole(text: str, digests: list[str]) -> None:
    """At 80 columns: nothing cut ("..." or the ellipsis character) and each digest whole in
    its row's value cell (folded pieces joined)."""
    assert "..." not in text and "\u2026" not in text
    cells = [line.split("\u2502")[2] for line in text.splitlines()
             if line.startswith("\u2502") and len(line.split("\u2502")) == 4]
    joined = "".join("".join(c.split()) for c in cells)  # folded pieces, in order
    for d in digests:
        assert d in joined, f"digest {d} not shown whole"
    for line in text.splitlines():
        assert len(line) <= 80, line


# --------------------------------------------------------------------------- formats


def test_rounding_worked_examples():
    # Errors and p-values round UP, entropy and bits DOWN, so a printed number is never
    # more favourable than the computed one (common practice for conservative reporting).
    assert fmt(1.0099999999999999e-06, "error") == "1.01e-06"
    assert fmt(1e-6, "error") == "1e-06"
    assert fmt(0.1041, "error") == "0.105"
    assert fmt(3.1070969456385477e-273, "error") == "3.11e-273"
    assert fmt(0.9999999, "bits") == "0.999999"
    assert fmt(4595.823141215902, "bits") == "4,595.82"
    assert fmt(176348.74259840508, "bits") == "176,348"
    assert fmt(2.6977231124460066, "lower") == "2.6977"
    assert fmt(2.6977231124460066, "upper") == "2.6978"
    # Tsirelson bound 2 sqrt 2 = 2.828427... (Cirel'son, Lett. Math. Phys. 4, 93 (1980)),
    # 4 decimals to nearest.
    assert fmt(2 * math.sqrt(2), "chsh") == "2.8284"
    # Thousands separators "," (PEP 378, format specifier for thousands separator).
    assert fmt(1234567, "count") == "1,234,567"
    assert fmt(None, "count") == "-"
    h = "ab" * 32
    assert fmt(h, "digest") == h


_finite = st.floats(min_value=1e-300, max_value=1e15, allow_nan=False, allow_infinity=False)


@settings(max_examples=300, deadline=None)
@given(_finite)
def test_rounding_direction_errors_up_bits_down(v):
    # Directed rounding as IEEE 754-2008 section 4.3.2 (roundTowardPositive /
    # roundTowardNegative), compared exactly with decimal arithmetic.
    exact = Decimal(repr(v))
    up = Decimal(fmt(v, "error").replace(",", ""))
    down = Decimal(fmt(v, "bits").replace(",", ""))
    assert up >= exact and down <= exact
    assert consistent(fmt(v, "error"), v, "error") and consistent(fmt(v, "bits"), v, "bits")
    # ... and by at most one unit in the last written digit
    assert up - exact < exact * Decimal("0.01") + Decimal("1e-320")
    assert exact - down < exact * Decimal("0.00001") + Decimal("1e-320")


@settings(max_examples=300, deadline=None)
@given(st.floats(min_value=-4.0, max_value=4.0, allow_nan=False))
def test_rounding_direction_bounds(v):
    exact = Decimal(repr(v))
    assert Decimal(fmt(v, "lower")) <= exact <= Decimal(fmt(v, "upper"))
    assert abs(Decimal(fmt(v, "chsh")) - exact) <= Decimal("0.00005")


def test_a_wrong_direction_is_caught():
    # The consistency check used below rejects a number rounded the favourable way.
    assert not consistent("1e-06", 1.0099999999999999e-06, "error")
    assert not consistent("4,595.83", 4595.823141215902, "bits")
    assert not consistent("2.6978", 2.6977231124460066, "lower")


# --------------------------------------------------------------------------- certify / verify


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """A certified and an aborted run (table and --json each), signed."""
    from dicert.audit.signing import write_keypair

    d = tmp_path_factory.mktemp("tables")
    keys = write_keypair(d / "op.pem")
    classical = d / "classical.btl"
    write_log(classical, sim_trials(20_000, seed=5, model="classical"))
    # Settings far from the declared uniform design: aborted by a design check, before the
    # acceptance test.
    import numpy as np

    from dicert.simulate import device_model, simulate_trials

    biased = d / "biased.btl"
    write_log(biased, simulate_trials(20_000, device_model("quantum"), settings_bias=(0.1, 0.1),
                                      rng=np.random.default_rng(1)))
    out = {}
    for name, log in (("certified", FIXTURE / "log.btl"), ("aborted", classical),
                      ("design", biased)):
        base = ["certify", str(log), "--protocol", UNIFORM, "--seed", str(FIXTURE / "seed.bin"),
                "--key", str(keys.private_key_file)]
        t = _run([*base, "--out", str(d / f"{name}-t")])
        t80 = _run([*base, "--out", str(d / f"{name}-80")], columns=80)
        j = _run([*base, "--out", str(d / f"{name}-j"), "--json"])
        assert t.exit_code == t80.exit_code == j.exit_code == (0 if name == "certified" else 3), \
            (t.output, j.output)
        out[name] = {"table": t.stdout, "table80": t80.stdout, "json": json.loads(j.stdout),
                     "record_t": json.loads((d / f"{name}-t" / "record.json").read_text()),
                     "record_j": json.loads((d / f"{name}-j" / "record.json").read_text()),
                     "record_80": json.loads((d / f"{name}-80" / "record.json").read_text()),
                     "dir": d / f"{name}-t", "log": log}
    out["keys"] = keys
    return out


@pytest.mark.parametrize("name", ["certified", "aborted", "design"])
def test_certify_table_json_and_record_agree(runs, name):
    run = runs[name]
    rows = record_rows(run["record_j"])
    # The table run and the --json run: same inputs, so the same numbers (determinism; only
    # the timestamps, and with them the record digest, differ).
    n = assert_rows_match(rows, parse_table(run["table"]), run["json"], run["record_j"],
                          table_record=run["record_t"])
    assert n >= 15
    js, rec = run["json"], run["record_j"]
    # What a paper needs, under the glossary's keys.
    for key in ("trials", "test_rounds", "chsh_estimate", "chsh_lower_bound", "eps_est",
                "p_value_local", "acceptance_statistic", "acceptance_limit", "accepted",
                "single_round_bound_bits", "certified_min_entropy_bits",
                "certified_rate_bits_per_trial", "raw_bits", "output_bits", "seed_bits",
                "error_budget", "soundness_error", "status", "log_sha256", "record_sha256",
                "output_sha256", "seed_sha256", "key_fingerprint"):
        assert key in js, key
    # chsh_estimate is the weighted (martingale) estimate (README glossary).
    assert js["chsh_estimate"] == get_path(rec, weighted_estimate_path(rec))
    rate = rec["certified_min_entropy_bits"] / rec["log"]["trials"]
    assert js["certified_rate_bits_per_trial"] == rate
    # The error budget's terms sum to the soundness error (README glossary: error budget).
    assert math.isclose(sum(t["value"] for t in js["error_budget"]["terms"]),
                        js["soundness_error"], rel_tol=1e-12)
    if name == "design":  # the acceptance test was not reached; the run is not accepted
        assert js["acceptance_statistic"] is None and js["accepted"] is False
        assert js["output_bits"] == 0 and js["certified_min_entropy_bits"] == 0
        return
    # Acceptance: the martingale test accepts when the estimate reaches the declared
    # threshold (protocols/chsh-uniform.toml [analysis] chsh_threshold).
    assert js["acceptance_limit"] == 2.6
    assert js["accepted"] is (js["acceptance_statistic"] >= js["acceptance_limit"])
    assert js["accepted"] is (name == "certified")
    # Toeplitz hashing of n raw bits to m output bits uses n + m - 1 seed bits (a Toeplitz
    # matrix is fixed by its first row and column; common practice).
    if js["output_bits"]:
        assert js["seed_bits"] == js["raw_bits"] + js["output_bits"] - 1


@pytest.mark.parametrize("name", ["certified", "aborted", "design"])
def test_certify_digests_whole_at_80_columns(runs, name):
    rec = runs[name]["record_80"]
    digests = [rec["log"]["sha256"], rec["record_sha256"], rec["extractor"]["seed_sha256"],
               rec["protocol"]["sha256"], rec["signature"]["key_fingerprint"]]
    if rec["extractor"].get("output_sha256"):
        digests.append(rec["extractor"]["output_sha256"])
    assert_digests_whole(runs[name]["table80"], digests)


def test_verify_table_json_and_record_agree(runs):
    from dicert.stages.record_compat import upgrade_body

    run = runs["certified"]
    rec_file = run["dir"] / "record.json"
    base = ["verify", str(rec_file), "--log", str(run["log"]), "--seed",
            str(FIXTURE / "seed.bin"), "--pubkey", str(runs["keys"].public_key_file)]
    t = _run(base)
    j = _run([*base, "--json"])
    assert t.exit_code == j.exit_code == 0, t.output
    doc = json.loads(j.stdout)
    assert doc["result"] == "VERIFIED" and doc["authenticated"] is True
    rec = upgrade_body(json.loads(rec_file.read_text()))
    rows = [r for r in record_rows(rec) if r.key != "key_fingerprint"]
    assert assert_rows_match(rows, parse_table(t.stdout), doc, rec) >= 15
    assert doc["key_fingerprint"] == rec["signature"]["key_fingerprint"]
    # Piped (not a terminal), 80 columns: every digest whole.
    env = {**os.environ, "COLUMNS": "80", "PYTHONPATH": str(ROOT)}
    p = subprocess.run([sys.executable, "-c", "from dicert.cli.app import main; main()", *base],
                       capture_output=True, text=True, env=env, check=False)
    assert p.returncode == 0, p.stderr
    assert_digests_whole(p.stdout, [rec["record_sha256"], rec["log"]["sha256"],
                                    rec["extractor"]["seed_sha256"],
                                    rec["extractor"]["output_sha256"],
                                    rec["signature"]["key_fingerprint"]])


@pytest.mark.parametrize("case", ["v3/martingale", "v3/eat", "v3/pef", "v3/aborted",
                                  "v2/martingale", "v2/pef", "v1/martingale"])
def test_verify_reads_older_record_formats(case):
    # Stored dicert-record/3 and /2 fixtures (martingale, entropy accumulation, probability
    # estimation, aborted): the same rows, read through record_compat.
    rec_file = ROOT / "tests" / "fixtures" / "records" / case / "record.json"
    if not rec_file.is_file():
        pytest.skip(f"no fixture {case}")
    t = _run(["verify", str(rec_file)])
    j = _run(["verify", str(rec_file), "--json"])
    assert t.exit_code == j.exit_code == 4, t.output  # no trusted key given: integrity only
    from dicert.stages.record_compat import upgrade_body

    rec = upgrade_body(json.loads(rec_file.read_text()))
    rows = [r for r in record_rows(rec) if r.key != "key_fingerprint"]
    doc = json.loads(j.stdout)
    assert_rows_match(rows, parse_table(t.stdout), doc, rec)
    # Every method states its acceptance test: statistic, pre-declared limit, outcome.
    assert doc["accepted"] is (rec["status"] != "aborted")
    assert isinstance(doc["acceptance_statistic"], (int, float))


# --------------------------------------------------------------------------- inspect


def test_inspect_table_json_and_record_agree(runs):
    from dicert.cli.inspect import _rows  # noqa: F401  (the rows both outputs are made of)

    run = runs["certified"]
    args = ["inspect", str(run["log"]), "--protocol", UNIFORM, "--block-trials", "5000"]
    t = _run(args)
    j = _run([*args, "--json"])
    t80 = _run(args, columns=80)
    assert t.exit_code == j.exit_code == t80.exit_code == 0, t.output
    doc = json.loads(j.stdout)
    table = parse_table(t.stdout)
    kinds = {"trials": "count", "test_rounds": "count", "chsh_estimate": "chsh",
             "chsh_ratio_estimate": "chsh", "chsh_lower_bound": "lower", "eps_est": "error",
             "p_value_local": "error", "log10_p_value_local": "upper", "gamma": "number",
             "win_probability": "number", "block_count": "count",
             "block_chsh_estimate_min": "chsh", "block_chsh_estimate_max": "chsh",
             "block_chsh_lower_bound_min": "lower"}
    labels = {"trials": "trials", "test_rounds": "test rounds", "chsh_estimate": "CHSH estimate",
              "chsh_ratio_estimate": "CHSH ratio estimate",
              "chsh_lower_bound": "CHSH lower bound", "eps_est": "eps_est",
              "p_value_local": "p-value (local devices)",
              "log10_p_value_local": "log10 p-value (local devices)", "gamma": "gamma",
              "win_probability": "CHSH-game win probability", "block_count": "blocks",
              "block_chsh_estimate_min": "block CHSH estimate, lowest",
              "block_chsh_estimate_max": "block CHSH estimate, highest",
              "block_chsh_lower_bound_min": "block CHSH lower bound, lowest"}
    for key, kind in kinds.items():
        assert consistent(shown_number(table[labels[key]][0]), doc[key], kind), key
    # The same log and protocol as the certified record: the same estimate numbers.
    rec = run["record_j"]
    assert doc["trials"] == rec["log"]["trials"]
    assert doc["test_rounds"] == rec["estimate"]["test_rounds"]
    assert doc["chsh_estimate"] == get_path(rec, weighted_estimate_path(rec))
    assert doc["chsh_lower_bound"] == rec["estimate"]["chsh_lower_bound"]
    assert doc["eps_est"] == rec["estimate"]["eps_est"]
    assert doc["p_value_local"] == rec["estimate"]["p_value_local"]
    # Per block: blocks of 5,000 trials of a 20,000-trial log.
    assert doc["block_count"] == 4 == len(doc["blocks"])
    assert doc["block_chsh_estimate_min"] == min(b["chsh_estimate"] for b in doc["blocks"])
    # An estimate with a smaller error is a lower lower bound (Azuma-Hoeffding margin grows
    # with log(1/eps); Azuma 1967), and --error stays a (hidden) alias of --eps-est.
    a = json.loads(_run([*args, "--json", "--eps-est", "1e-9"]).stdout)
    b = json.loads(_run([*args, "--json", "--error", "1e-9"]).stdout)
    assert a["chsh_lower_bound"] == b["chsh_lower_bound"] < doc["chsh_lower_bound"]
    assert "--error" not in _run(["inspect", "--help"]).stdout
    assert "..." not in t80.stdout and "\u2026" not in t80.stdout


# --------------------------------------------------------------------------- plan


def test_plan_table_and_json_agree():
    from dicert.cli.plan import plan_rows
    from dicert.plan_cache import cached_plan
    from dicert.protocol import load_protocol

    args = ["plan", "--protocol", UNIFORM, "--trials", "2e5", "--gammas", "0"]
    t = _run(args)
    j = _run([*args, "--json"])
    assert t.exit_code == j.exit_code == 0, t.output
    doc = json.loads(j.stdout)
    result = cached_plan(load_protocol(UNIFORM), trials=200_000)
    groups = plan_rows(result)
    # Each method's table separately (labels repeat across methods).
    chunks = re.split(r"\n(?=\S.*\n\u250c)", t.stdout)
    assert len(chunks) == len(groups)
    for (title, rows), chunk in zip(groups, chunks):
        assert chunk.startswith(title[:40])
        assert_rows_match(rows, parse_table(chunk), doc)
    for m, md in zip(result.methods, doc["methods"]):
        # glossary: seed = the extractor seed, raw_bits + output_bits - 1 (Toeplitz, n + m - 1)
        assert md["seed_bits"] == m.seed_bits
        if md["output_bits"] > 0:
            assert md["seed_bits"] == md["raw_bits"] + md["output_bits"] - 1
        assert md["settings_randomness_bits"] == m.settings_randomness_bits
        assert md["output_bits"] == m.output_bits
        assert md["certified_min_entropy_bits"] == m.certified_min_entropy_bits
    # CHSH game: w = 1/2 + S/8 (Clauser, Horne, Shimony & Holt 1969; common practice).
    assert doc["honest_win_probability"] == pytest.approx(0.5 + doc["honest_chsh"] / 8)
    # Retired names are gone from plan --json (README glossary, "formerly" column).
    for md in doc["methods"]:
        for old in ("certified_bits", "min_entropy_bits", "rate_per_trial",
                    "extractor_seed_bits"):
            assert old not in md
    assert "chsh" not in doc and "win_probability" not in doc


# --------------------------------------------------------------------------- demo


def test_demo_table_and_json_agree(tmp_path):
    from dicert.cli.demo import demo_rows

    t = _run(["demo", "--out", str(tmp_path / "t")])
    t80 = _run(["demo", "--out", str(tmp_path / "t80")], columns=80)
    j = _run(["demo", "--out", str(tmp_path / "j"), "--json"])
    assert t.exit_code == t80.exit_code == j.exit_code == 0, t.output
    doc = json.loads(j.stdout)
    # Same invented scenario, same numbers (each run makes its own key, hence its own
    # digests: those are checked at 80 columns against the run's own records).
    rows = [r for r in demo_rows(doc) if r.kind != "digest"]
    assert assert_rows_match(rows, parse_table(t.stdout), doc) >= 10
    for p in doc["pulses"]:
        assert p["chsh_estimate"] == get_path(
            json.loads(Path(p["record_file"]).read_text()),
            weighted_estimate_path(json.loads(Path(p["record_file"]).read_text())))
    records = sorted((tmp_path / "t80").glob("pulse-*/certified/record.json"))
    digests = [json.loads(r.read_text())["record_sha256"] for r in records]
    digests.append(json.loads(records[0].read_text())["signature"]["key_fingerprint"])
    table_part = t80.stdout[t80.stdout.index("dicert demo:"):t80.stdout.index("Open the beacon")]
    assert_digests_whole(table_part, digests)


# --------------------------------------------------------------------------- reprs, messages


def test_reprs_show_digests_whole():
    # README glossary: a SHA-256 (64 hex digits) or key fingerprint is never cut.
    from dicert.extract import extract_toeplitz

    res = extract_toeplitz(bytes(range(8)), bytes(range(16)), 8)
    assert HEX64.search(repr(res)).group(0) == res.output_sha256
    from dicert.logs import summarize_log

    s = summarize_log(FIXTURE / "log.btl")
    assert s.sha256 in repr(s) and "..." not in repr(s)


def test_error_messages_show_digests_whole(runs, tmp_path):
    rec_file = runs["certified"]["dir"] / "record.json"
    doc = json.loads(rec_file.read_text())
    stored = doc["record_sha256"]
    bad = tmp_path / "record.json"
    bad.write_text(rec_file.read_text().replace(stored, "0" * 64))  # a wrong stored digest
    r = _run(["verify", str(bad)])
    assert r.exit_code == 1
    line = r.stderr.strip()
    assert "\n" not in line and "..." not in line
    assert "0" * 64 in line and len(HEX64.findall(line)) == 2  # stored and recomputed, whole


# --------------------------------------------------------------------------- vocabulary


def _retired_keys() -> set[str]:
    """The former names of the README glossary ("formerly" column) that are plain keys."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    gloss = text[text.index("## Glossary"):]
    gloss = gloss[:gloss.index("\n## ", 5)]
    names = set()
    for line in gloss.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if line.startswith("|") and not line.startswith("|---") and len(cells) >= 4:
            names.update(re.findall(r"`([A-Za-z_]+)`", cells[-1]))
    # members of the former error dict that the error budget keeps (terms, total)
    return names - {"terms", "total", "form"}


def _keys(obj, path=""):
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield f"{path}.{k}".lstrip("."), k
            yield from _keys(v, f"{path}.{k}")
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from _keys(v, f"{path}.{i}")


def test_json_of_the_tables_uses_no_retired_name(runs):
    retired = _retired_keys()
    assert {"chsh", "chsh_lower", "test_trials", "min_entropy_bits", "error"} <= retired
    docs = {"certify": runs["certified"]["json"], "certify aborted": runs["aborted"]["json"]}
    log = str(FIXTURE / "log.btl")
    docs["inspect"] = json.loads(_run(["inspect", log, "--protocol", UNIFORM, "--json"]).stdout)
    docs["verify"] = json.loads(_run(["verify", str(runs["certified"]["dir"] / "record.json"),
                                      "--json"]).stdout)
    docs["plan"] = json.loads(_run(["plan", "--protocol", UNIFORM, "--trials", "2e5",
                                    "--json"]).stdout)
    for name, doc in docs.items():
        bad = [p for p, k in _keys(doc) if k in retired]
        assert not bad, f"{name} --json uses retired names: {bad}"


# --------------------------------------------------------------------------- join charge

from test_logspec_charge import run as charge_run  # noqa: E402,F401  (module fixture)


def test_inspect_join_charge_rows_match_json(charge_run):
    from dicert.cli.inspect import _charge_rows  # noqa: F401  (the rows both outputs share)

    args = ["inspect", "--log-spec", str(charge_run["spec"])]
    t = _run(args)
    j = _run([*args, "--json"])
    assert t.exit_code == j.exit_code == 0, t.output
    doc, table = json.loads(j.stdout), parse_table(t.stdout)
    kinds = {"charged CHSH estimate": ("charged_chsh_estimate", "chsh"),
             "charged CHSH lower bound": ("charged_chsh_lower_bound", "lower"),
             "charged p-value (local devices)": ("charged_p_value_local", "error"),
             "dropped trials": ("dropped_trials", "count"),
             "raw bits certify subtracts": ("raw_bits_subtracted", "count"),
             "drop-pattern bits certify subtracts": ("pattern_bits", "upper")}
    for label, (key, kind) in kinds.items():
        assert consistent(shown_number(table[label][0]), doc["join_charge"][key], kind), label
    # Counting a dropped trial as a lost test round can only lower the bound.
    assert doc["join_charge"]["charged_chsh_lower_bound"] <= doc["chsh_lower_bound"]


def test_certify_join_charge_rows_match_json_and_record(charge_run, tmp_path):
    base = ["certify", "--log-spec", str(charge_run["spec"]), "--protocol", UNIFORM, "--seed",
            str(FIXTURE / "seed.bin")]
    t = _run([*base, "--out", str(tmp_path / "t")])
    j = _run([*base, "--out", str(tmp_path / "j"), "--json"])
    assert t.exit_code == j.exit_code, t.output
    doc = json.loads(j.stdout)
    rec_t = json.loads((tmp_path / "t" / "record.json").read_text())
    rec = json.loads((tmp_path / "j" / "record.json").read_text())
    rows = record_rows(rec)
    assert {r.key for r in rows} >= {"join_charge.dropped_trials",
                                     "join_charge.raw_bits_subtracted",
                                     "join_charge.pattern_bits"}
    assert assert_rows_match(rows, parse_table(t.stdout), doc, rec, table_record=rec_t) >= 15
    assert doc["join_charge"]["dropped_trials"] == 5  # the fixture drops 5 trials at B
