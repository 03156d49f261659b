"""Certification reports (`dicert report`, dicert.reporting): every number against the record.

Records are made by the library from small simulated logs (invented data): a certified and an
aborted martingale pulse, a probability-estimation pulse with per-block scores, a run whose
output was withheld by the output screens, and a /1-style record without a `design` section.
Each value of the report carries the record key it came from (`data-key` in HTML, a column in
Markdown); the tests look every one up in the record with a resolver of their own and compare
it in the direction the report promises (lower bounds and certified bits rounded down, errors
in full or rounded up).
"""

from __future__ import annotations

import base64
import hashlib
import json
import re
import xml.etree.ElementTree as ET
from decimal import Decimal
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from helpers import sim_trials, uniform_protocol
from site_support import build_chain, build_pef_chain
from test_site_browser import browser  # noqa: F401  (the shared browser fixture)

from dicert.cli.app import app

DASH = "\u2014"
NNBSP = "\u202f"


# --------------------------------------------------------------------------- records


@pytest.fixture(scope="module")
def records(tmp_path_factory):
    """name -> (path of the record file, parsed record)."""
    from dicert.certify import certify
    from dicert.logs import write_log

    root = tmp_path_factory.mktemp("records")
    chain = build_chain(root / "mart")
    out = {"certified": chain / "pulse-000001.json", "aborted": chain / "pulse-000003.json"}
    out["pef"] = build_pef_chain(root / "pef") / "pulse-000001.json"
    # Output screens fail grossly on an almost-zero seed (as in tests/test_design.py).
    w = root / "withheld"
    w.mkdir()
    write_log(w / "u.btl", sim_trials(100_000, seed=13, visibility=0.97))
    sb = bytearray(100_000)
    sb[0] = 0x5A
    (w / "bad.bin").write_bytes(bytes(sb))
    res = certify(w / "u.btl", uniform_protocol(), w / "bad.bin", w / "out")
    assert res.status == "withheld"
    out["withheld"] = Path(res.record_file)
    # Entropy accumulation with spot-checking (acceptance: losses against a count limit).
    from dicert.protocol import load_protocol

    from helpers import ROOT

    e = root / "eat"
    e.mkdir()
    proto = load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml")
    write_log(e / "s.btl", sim_trials(200_000, seed=5, gamma=proto.design.gamma))
    (e / "seed.bin").write_bytes(np.random.default_rng(1).bytes(200_000))
    out["eat"] = Path(certify(e / "s.btl", proto, e / "seed.bin", e / "out").record_file)
    # A /1-style record: no design section (reports need not verify; only render).
    v1 = json.loads(out["certified"].read_bytes())
    v1.pop("design")
    v1["format"] = "dicert-record/1"
    out["v1"] = root / "v1.json"
    out["v1"].write_text(json.dumps(v1))
    return {k: (p, json.loads(p.read_bytes())) for k, p in out.items()}


# --------------------------------------------------------------------------- resolver and checks


def resolve(record, key):
    """The record value at a dotted key (list items by index; 'a / b' is a ratio)."""
    if " / " in key:
        a, b = (resolve(record, k) for k in key.split(" / "))
        return a / b
    cur = record
    for part in key.split("."):
        if cur is None:  # e.g. an unsigned record: signature is null, the report shows a dash
            return None
        cur = cur[int(part)] if isinstance(cur, list) else cur[part]
    return cur


def check_value(record, key, kind, decimals, text):
    """One displayed value against the record, in the direction the report promises."""
    text = text.replace(NNBSP, "").strip().strip("`").strip("*")
    value = resolve(record, key)
    if value is None:
        assert text == DASH, (key, text)
        return
    if kind in ("digest", "text"):
        expect = ("yes" if value else "no") if isinstance(value, bool) else str(value)
        assert text == expect, (key, text, value)
    elif kind == "int":
        assert int(text) == value, (key, text, value)
    elif kind == "exact":
        # Python's float repr is the shortest string that round-trips (Python docs, "Floating
        # Point Arithmetic"; Steele & White 1990): in full means float(text) == value exactly.
        assert float(text) == value, (key, text, value)
    elif kind == "down":
        shown, true, unit = Decimal(text), Decimal(value), Decimal(1).scaleb(-decimals)
        assert shown <= true < shown + unit, (key, text, value)  # rounded down, one unit at most
    elif kind == "up":
        shown, true, unit = Decimal(text), Decimal(value), Decimal(1).scaleb(-decimals)
        assert shown - unit < true <= shown, (key, text, value)  # rounded up, one unit at most
    elif kind == "approx":
        assert abs(float(text) - value) <= 5e-6 * abs(value) + 1e-300, (key, text, value)
    else:
        raise AssertionError(f"unknown kind {kind}")


class _Cells(HTMLParser):
    """Collects the text of every element carrying data-key (the report's tagged values)."""

    def __init__(self):
        super().__init__()
        self.cells, self._stack = [], []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "td" and "data-kind" in a:
            self._stack.append([a["data-key"], a["data-kind"], int(a["data-decimals"]), ""])
        elif self._stack:
            self._stack.append(None)

    def handle_endtag(self, tag):
        if self._stack:
            top = self._stack.pop()
            if top is not None:
                self.cells.append(tuple(top))

    def handle_data(self, data):
        for item in reversed(self._stack):
            if item is not None:
                item[3] += data
                break


def html_cells(text):
    p = _Cells()
    p.feed(text)
    return p.cells


MD_ROW = re.compile(r"^\| (?P<label>.+?) \| (?P<value>.+?) \| `(?P<key>[^`]+)` \|$")
MD_EPS = re.compile(r"^\| (?P<label>.+?) \| (?P<value>.+?) \| .+? \| "
                    r"`(?P<key>(?:error_budget\.|soundness_error)[^`]*)` \|$")

#: Values the report must show for a certified record (the brief's list: digests in full,
#: trials, test rounds, bounds, error terms, bits, seed use).
CORE_KEYS = {"record_sha256", "log.sha256", "log.files.0.sha256", "log.trials",
             "estimate.test_rounds", "estimate.chsh_lower_bound", "estimate.log10_p_value_local",
             "certified_min_entropy_bits", "soundness_error", "extractor.output_bits",
             "extractor.output_sha256", "extractor.seed_sha256", "extractor.seed_bits",
             "protocol.sha256", "signature.key_fingerprint"}


def md_cells(text, record):
    """(key, kind, decimals, value) for every Markdown table row tagged with a record key; the
    kind is read off the label (the same wording the report uses)."""
    out = []
    for line in text.splitlines():
        m = MD_EPS.match(line) or MD_ROW.match(line)
        if not m:
            continue
        key, label, value = m["key"], m["label"], m["value"]
        if key.startswith("error_budget.") or key == "soundness_error" or key.endswith(
                (".eps_est", "_eps", "entropy_error", "eps_ext")):
            kind, dec = "exact", 0
        elif "rounded down" in label:
            dec = len(value.split(".")[1]) if "." in value else 0
            kind = "down"
        elif "rounded up" in label:
            dec = len(value.split(".")[1]) if "." in value else 0
            kind = "up"
        elif "SHA-256" in label or "fingerprint" in label or key.endswith("sha256"):
            kind, dec = "digest", 0
        else:
            v = resolve(record, key)
            kind = ("int" if isinstance(v, int) and not isinstance(v, bool) else
                    "text" if not isinstance(v, float) else
                    "approx" if key in ("estimate.chsh_estimate", "estimate.chsh_stderr",
                                        "estimate.win_probability") else "exact")
            dec = 0
        out.append((key, kind, dec, value))
    return out


# --------------------------------------------------------------------------- numbers


@pytest.mark.parametrize("name", ["certified", "aborted", "withheld", "pef", "eat", "v1"])
def test_every_tagged_number_in_html_matches_the_record(records, name):
    from dicert.reporting import render_html

    _, rec = records[name]
    text = render_html(rec, with_plan=False)
    cells = html_cells(text)
    assert len(cells) > 20
    for key, kind, dec, value in cells:
        check_value(rec, key, kind, dec, value)
    keys = {c[0] for c in cells}
    if name == "certified":
        assert CORE_KEYS <= keys, CORE_KEYS - keys
        assert {f"error_budget.terms.{i}.value"
                for i in range(len(rec["error_budget"]["terms"]))} <= keys  # term by term


@pytest.mark.parametrize("name", ["certified", "aborted", "withheld", "pef", "eat", "v1"])
def test_every_tagged_number_in_markdown_matches_the_record(records, name):
    from dicert.reporting import render_markdown

    _, rec = records[name]
    text, _ = render_markdown(rec, with_plan=False)
    cells = md_cells(text, rec)
    assert len(cells) > 20
    for key, kind, dec, value in cells:
        check_value(rec, key, kind, dec, value)
    keys = {c[0] for c in cells}
    if name == "certified":
        assert CORE_KEYS <= keys, CORE_KEYS - keys
        assert {f"error_budget.terms.{i}.value"
                for i in range(len(rec["error_budget"]["terms"]))} <= keys


def test_design_check_rows_match_the_record(records):
    from dicert.reporting import render_markdown

    _, rec = records["certified"]
    text, _ = render_markdown(rec, with_plan=False)
    for c in rec["design"]["checks"]:
        row = next(line for line in text.splitlines() if line.startswith(f"| `{c['name']}` |"))
        cols = [x.strip() for x in row.strip("|").split("|")]
        assert cols[4] == ("passed" if c["passed"] else "FAILED")
        if c["p_value"] is not None:
            assert float(cols[2]) == c["p_value"]  # p-values in full
        assert float(cols[3]) == c["threshold"]


def test_summary_paragraph_numbers_match_the_record(records):
    from dicert.reporting import render_markdown

    _, rec = records["certified"]
    text, _ = render_markdown(rec, with_plan=False)
    summary = text.split("\n\n")[1].replace(NNBSP, "")
    m = re.search(r"\((\d+) files?, (\d+) trials, (\d+) test rounds\)", summary)
    assert m and int(m[2]) == rec["log"]["trials"] and int(m[3]) == rec["estimate"]["test_rounds"]
    lower = Decimal(re.search(r"lower confidence bound of ([\d.]+)", summary)[1])
    assert lower <= Decimal(rec["estimate"]["chsh_lower_bound"]) < lower + Decimal("1e-6")
    bits = Decimal(re.search(r"certified ([\d.]+) bits", summary)[1])
    assert bits <= Decimal(rec["certified_min_entropy_bits"]) < bits + Decimal("0.001")
    assert int(re.search(r"produced (\d+) output bits", summary)[1]) == \
        rec["extractor"]["output_bits"]
    assert float(re.search(r"soundness error ([\deE.+-]+)\.", summary)[1]) == \
        rec["soundness_error"] == rec["error_budget"]["total"]


def test_rounding_is_in_the_safe_direction():
    """Bounds are written rounded down, error-like numbers rounded up: a value just below a
    rounding boundary must not be rounded to it (conservative rounding: common practice)."""
    from dicert.reporting.content import _fact

    rec = {"estimate": {"chsh_lower_bound": 2.9999999999, "log10_p_value_local": -10.004999,
                        "neg": -1e-9}, "bits": 1234.9999999}
    assert _fact(rec, "x", "estimate.chsh_lower_bound", "down", decimals=6).text == "2.999999"
    assert _fact(rec, "x", "bits", "down", decimals=3).text == "1\u202f234.999"
    assert _fact(rec, "x", "estimate.neg", "down", decimals=6).text == "-0.000001"
    # log10 of a p-value rounded up: -10.004999 -> -10.00 (never the smaller -10.01)
    assert _fact(rec, "x", "estimate.log10_p_value_local", "up", decimals=2).text == "-10.00"


def test_error_budget_shows_each_term_and_the_meaning_of_the_total(records):
    from dicert.reporting import render_markdown

    for name in ("certified", "pef"):
        _, rec = records[name]
        text, _ = render_markdown(rec, with_plan=False)
        for term in rec["error_budget"]["terms"]:
            assert re.search(rf"^\| `{term['name']}` \| {re.escape(repr(float(term['value'])))} "
                             rf"\| {re.escape(term['meaning'])} \|", text, re.M)
        assert f"Meaning of the total: {rec['error_budget']['meaning']}." in text


def test_acceptance_test_against_its_declared_limit(records):
    from dicert.reporting import render_markdown

    _, rec = records["certified"]
    d = rec["entropy"]["finite_size"]["details"]
    text, _ = render_markdown(rec, with_plan=False)
    assert "entropy.finite_size.details.chsh_threshold` |" in text
    assert "Result: **passed**" in text and d["chsh_estimate"] >= d["chsh_threshold"]
    _, pef = records["pef"]
    text, _ = render_markdown(pef, with_plan=False)
    pd = pef["entropy"]["finite_size"]["details"]
    assert "entropy.finite_size.details.threshold_log2` |" in text
    assert pd["log2_t"] >= pd["threshold_log2"] and "Result: **passed**" in text
    _, eat = records["eat"]
    text, _ = render_markdown(eat, with_plan=False)
    ed = eat["entropy"]["finite_size"]["details"]
    assert "entropy.finite_size.details.count_limit` |" in text
    assert ("Result: **passed**" in text) == (ed["losses"] <= ed["count_limit"])


def test_assumptions_and_caution_verbatim(records):
    from dicert.reporting import render_html, render_markdown

    for name in ("certified", "aborted", "pef", "withheld"):
        _, rec = records[name]
        text, _ = render_markdown(rec, with_plan=False)
        page = render_html(rec, with_plan=False)
        for a in rec["assumptions"] + rec["entropy"]["finite_size"].get("assumptions", []):
            assert f"- {a}\n" in text
        assert rec["caution"] in text
        import html as _html

        assert _html.escape(rec["caution"]) in page


def test_status_specific_content(records):
    from dicert.reporting import render_markdown

    text, _ = render_markdown(records["aborted"][1], with_plan=False)
    assert "ABORTED" in text and records["aborted"][1]["abort_reason"] in text
    w = records["withheld"][1]
    text, _ = render_markdown(w, with_plan=False)
    assert "Status: withheld" in text and w["abort_reason"] in text
    assert "| output screens passed | no |" in text
    text, _ = render_markdown(records["v1"][1], with_plan=False)
    assert "has no `design` section" in text and "| `test_settings_x` |" not in text
    from dicert.reporting import render_html

    assert 'id="no-design"' in render_html(records["v1"][1], with_plan=False)
    assert 'id="no-design"' not in render_html(records["certified"][1], with_plan=False)


def test_bibtex_entries_from_the_records_references(records):
    """BibTeX @article entries (Patashnik, 'BibTeXing', 1988: author, journal, year, volume,
    pages) built from the record's cited strings; balanced braces; one entry per work."""
    from dicert.reporting import bibtex_entries

    refs = records["certified"][1]["references"]
    entries = bibtex_entries(refs)
    works = sum(r.count("; ") + 1 for r in refs)  # 'Azuma ...; Hoeffding ...' are two works
    assert len(entries) == works
    for cited, entry in entries:
        assert entry.count("{") == entry.count("}")
        assert entry.startswith("@article{")
        fields = dict(re.findall(r"^\s+(\w+) = \{(.*)\},?$", entry, re.M))
        assert {"author", "journal", "volume", "pages", "year"} <= set(fields)
        assert fields["year"] in cited and fields["volume"] in cited
    # the first reference of a martingale record, field by field
    first = dict(re.findall(r"^\s+(\w+) = \{(.*)\},?$", entries[0][1], re.M))
    assert refs[0].startswith("S. Pironio et al., Nature 464, 1021-1024 (2010)")
    assert first == {"author": "Pironio, S. and others", "journal": "Nature", "volume": "464",
                     "pages": "1021-1024", "year": "2010", "note": "eq. (3) and SI"}
    assert bibtex_entries(["an unparsable citation"])[0][1].startswith("@misc{")


# --------------------------------------------------------------------------- figures


def test_figures_per_record_kind(records):
    from dicert.reporting import render_html

    page = render_html(records["certified"][1], with_plan=False)
    assert 'id="fig-blocks"' in page and 'id="fig-acceptance"' in page
    assert "threshold 2.6" in page and "2\u221a2" in page and "local bound 2" in page
    page = render_html(records["pef"][1], with_plan=False)
    assert 'id="fig-scores"' in page and 'id="fig-acceptance"' in page


def test_chsh_intervals_are_clipped_to_the_physical_range():
    """An Azuma interval can run past the no-signalling maximum 4 at small gamma (CHSH 1969:
    |S| <= 4 for any no-signalling box); the figure clips it to [-4, 4]."""
    from dicert.beacon.pages import block_series
    from dicert.reporting.figures import _clip_chsh

    rec = {"estimate_blocks": {"blocks": [
        {"chsh_estimate": 2.8, "chsh_lower_bound": 0.5, "chsh_upper_bound": 5.1,
         "first_trial": 0},
        {"chsh_estimate": -3.0, "chsh_lower_bound": -6.0, "chsh_upper_bound": 1.0,
         "first_trial": 10}]}}
    s = _clip_chsh(block_series(rec)[0])
    assert s.upper == (4.0, 1.0) and s.lower == (0.5, -4.0)


def test_planner_figure_agrees_with_the_run(records):
    """The planner at the run's size expects exactly the run's output for the martingale
    method: both evaluate n f(S_th - mu) at the declared threshold (Pironio et al. 2010 eq.
    (3)) and floor(k - 2 log2(1/eps_ext)) (leftover hash lemma, Impagliazzo, Levin & Luby
    1989)."""
    from dicert.reporting import render_markdown

    _, rec = records["certified"]
    text, files = render_markdown(rec)
    assert "report-plan.svg" in files
    m = re.search(r"the planner expects ([\d\u202f]+) bits", text)
    assert int(m[1].replace(NNBSP, "")) == rec["extractor"]["output_bits"]


def test_markdown_figures_are_standalone_svg(records, tmp_path):
    from dicert.reporting import write_report

    path, rec = records["pef"]
    out = tmp_path / "paper" / "pef-run.md"
    out.parent.mkdir()
    res = write_report(path, out, with_plan=False)
    text = out.read_text()
    assert res.format == "md" and len(res.figures) == 2
    for fig in res.figures:
        p = Path(fig)
        assert p.parent == out.parent and f"]({p.name})" in text  # referenced relatively
        root = ET.fromstring(p.read_bytes())  # well-formed XML (W3C SVG 1.1)
        assert root.tag == "{http://www.w3.org/2000/svg}svg"
        assert root.find("{http://www.w3.org/2000/svg}style") is not None


def test_html_is_self_contained_with_a_matching_csp_hash(records):
    """No external resource of any kind; the one inline style sheet is allowed by its
    SHA-256 hash-source (W3C Content Security Policy Level 2, section 4.2.4)."""
    from dicert.reporting import render_html

    page = render_html(records["certified"][1])
    assert not re.search(r"\b(src|href)\s*=", page)
    assert "<script" not in page and "@import" not in page and "url(" not in page
    urls = set(re.findall(r"https?://[^\s\"'<>]+", page))
    assert urls <= {"http://www.w3.org/2000/svg"}  # SVG namespace name, never fetched
    csp = re.search(r'http-equiv="Content-Security-Policy" content="([^"]+)"', page)[1]
    assert "default-src 'none'" in csp
    css = re.search(r"<style>(.*?)</style>", page, re.S)[1]
    digest = base64.b64encode(hashlib.sha256(css.encode()).digest()).decode()
    assert f"style-src 'sha256-{digest}'" in csp


# --------------------------------------------------------------------------- CLI


def test_cli_json_lists_files_and_headline_numbers(records, tmp_path):
    path, rec = records["certified"]
    out = tmp_path / "r.html"
    r = CliRunner().invoke(app, ["report", str(path), "--out", str(out), "--json",
                                 "--no-plan"])
    assert r.exit_code == 0, r.output
    js = json.loads(r.stdout)
    assert js["files"] == [str(out)] and js["format"] == "html" and out.exists()
    assert js["record_sha256"] == rec["record_sha256"]
    assert js["output_bits"] == rec["extractor"]["output_bits"]
    assert js["certified_min_entropy_bits"] == rec["certified_min_entropy_bits"]
    assert js["soundness_error"] == rec["soundness_error"] and js["trials"] == rec["log"]["trials"]
    r = CliRunner().invoke(app, ["report", str(path), "--out", str(tmp_path / "r.md"),
                                 "--no-plan"])
    assert r.exit_code == 0 and "certification report" in r.stdout


@pytest.mark.parametrize("args,needle", [
    (["--format", "pdf"], "unsupported format 'pdf'"),
    ([], "unsupported extension '.txt'"),
    (["--format", "md"], "unsupported extension '.txt'"),
])
def test_cli_unsupported_format_fails_before_any_work(tmp_path, args, needle):
    # The record does not even exist: the format error must come first (nothing is read).
    out = tmp_path / "r.txt"
    r = CliRunner().invoke(app, ["report", str(tmp_path / "missing.json"), "--out", str(out),
                                 *args])
    assert r.exit_code == 2 and needle in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and not out.exists()


def test_cli_mismatched_extension_is_refused(tmp_path):
    r = CliRunner().invoke(app, ["report", "x.json", "--out", str(tmp_path / "r.md"),
                                 "--format", "html"])
    assert r.exit_code == 2 and "does not match --format html" in r.stderr


@pytest.mark.parametrize("content,needle", [
    (b'{"format": "dicert-record/2",\n "status": ', "line 2 column"),
    (b"[1, 2]", "not a JSON object"),
    (b'{"format": "something-else/1"}', "key 'format'"),
    (b'{"format": "dicert-record/2", "status": "certified", "log": {}}', "key 'eps' missing"),
    (b"\xff\xfe", "not UTF-8"),
])
def test_cli_bad_record_is_one_line_exit_2(tmp_path, content, needle):
    bad = tmp_path / "bad.json"
    bad.write_bytes(content)
    out = tmp_path / "r.html"
    r = CliRunner().invoke(app, ["report", str(bad), "--out", str(out)])
    assert r.exit_code == 2 and needle in r.stderr and str(bad) in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1 and "Traceback" not in r.output
    assert not out.exists() and list(tmp_path.iterdir()) == [bad]  # nothing half-written


def test_report_is_deterministic(records):
    from dicert.reporting import render_html

    rec = records["pef"][1]
    assert render_html(rec) == render_html(rec)


# --------------------------------------------------------------------------- browser


def test_html_report_renders_in_a_headless_browser(browser, records, tmp_path):  # noqa: F811
    """The report opened from file:// in Debian's chromium: the inline style applies (so the
    CSP hash matched), the figures have a size, and a full-page screenshot is saved."""
    from selenium.webdriver.common.by import By

    from dicert.reporting import write_report

    for name in ("certified", "pef"):
        path, rec = records[name]
        out = tmp_path / f"report-{name}.html"
        write_report(path, out)
        browser.get(out.as_uri())
        assert browser.title.startswith("Certification report")
        # th background comes from the inline style sheet: blocked by the CSP it would be
        # transparent (rgba(0, 0, 0, 0)).
        th = browser.find_element(By.CSS_SELECTOR, "th")
        assert th.value_of_css_property("background-color") == "rgba(244, 246, 248, 1)"
        figs = browser.find_elements(By.CSS_SELECTOR, "figure svg.plot")
        assert len(figs) == 3
        assert all(f.size["width"] > 300 and f.size["height"] > 60 for f in figs)
        cell = browser.find_element(By.CSS_SELECTOR, 'td[data-key="log.sha256"]')
        assert cell.text == rec["log"]["sha256"]  # the full digest, nothing cut
        height = browser.execute_script("return document.documentElement.scrollHeight")
        browser.set_window_size(1400, min(int(height) + 50, 16000))
        shot = tmp_path / f"report-{name}.png"
        assert browser.save_screenshot(str(shot)) and shot.stat().st_size > 10_000
        browser.set_window_size(1400, 1000)


class _FullDisk:
    """A file object whose every write fails as on a full disk (as tests/test_outputs_faults.py)."""

    def __init__(self, fh) -> None:
        self._fh = fh

    def write(self, data) -> int:
        import errno
        import os

        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def __getattr__(self, name):
        return getattr(self._fh, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self._fh.close()


@pytest.mark.parametrize("suffix", [".html", ".md"])
def test_disk_full_leaves_earlier_files_and_no_temporary(records, tmp_path, monkeypatch, suffix):
    import os

    path, _ = records["certified"]
    out = tmp_path / "out"
    out.mkdir()
    target = out / f"r{suffix}"
    target.write_bytes(b"earlier report\n")
    (out / "r-acceptance.svg").write_bytes(b"earlier figure\n")
    before = {p.name: p.read_bytes() for p in out.iterdir()}
    real_fdopen = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda *a, **k: _FullDisk(real_fdopen(*a, **k)))
    r = CliRunner().invoke(app, ["report", str(path), "--out", str(target), "--no-plan"])
    assert r.exit_code == 2 and "No space left on device" in r.stderr
    assert len(r.stderr.strip().splitlines()) == 1
    assert {p.name: p.read_bytes() for p in out.iterdir()} == before


def test_output_below_a_regular_file_is_one_line(records, tmp_path):
    path, _ = records["certified"]
    blocker = tmp_path / "blocker"
    blocker.write_bytes(b"x")
    r = CliRunner().invoke(app, ["report", str(path), "--out", str(blocker / "sub" / "r.md"),
                                 "--no-plan"])
    assert r.exit_code == 2 and "ENOTDIR" in r.stderr and len(r.stderr.strip().splitlines()) == 1


def test_public_api_write_report(records, tmp_path):
    import dicert

    path, rec = records["pef"]
    res = dicert.write_report(path, tmp_path / "r.html", with_plan=False)
    assert f"output_bits={rec['extractor']['output_bits']}" in repr(res)
    assert res.to_dict()["record_sha256"] == rec["record_sha256"]


@pytest.mark.parametrize("decimals", [0, 3, 6])
def test_rounding_helpers_never_round_the_wrong_way(decimals):
    """Property (hypothesis): for any finite float, 'down' is at most the value and within one
    unit of the last place, 'up' at least the value and within one unit (exact decimal
    arithmetic, Python's decimal module: IEEE 754 doubles are exact binary fractions)."""
    from hypothesis import given
    from hypothesis import strategies as st

    from dicert.reporting.content import _fact

    unit = Decimal(1).scaleb(-decimals)

    @given(st.floats(min_value=-1e12, max_value=1e12, allow_nan=False))
    def prop(v):
        rec = {"v": v}
        down = Decimal(_fact(rec, "", "v", "down", decimals=decimals).text.replace(NNBSP, ""))
        up = Decimal(_fact(rec, "", "v", "up", decimals=decimals).text.replace(NNBSP, ""))
        assert down <= Decimal(v) < down + unit
        assert up - unit < Decimal(v) <= up

    prop()


def test_record_strings_are_escaped(records):
    from dicert.reporting import render_html, render_markdown

    rec = json.loads(json.dumps(records["certified"][1]))
    rec["protocol"]["name"] = "<script>alert(1)</script> | x"
    rec["assumptions"] = rec["assumptions"] + ["a <b>bold</b> claim"]
    page = render_html(rec, with_plan=False)
    assert "<script" not in page and "<b>bold" not in page
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    text, _ = render_markdown(rec, with_plan=False)
    assert "<script" not in text and "<b>" not in text
    assert "| protocol | &lt;script>alert(1)&lt;/script> \\| x | `protocol.name` |" in text
