"""Tests of the beacon site generator (dicert.beacon, `dicert publish`) without a browser.

The browser-side checks are exercised in tests/test_site_browser.py; here the published bytes
are checked against independent implementations: the `rfc8785` reference library (RFC 8785
canonical form), `hashlib` (FIPS 180-4 SHA-256) and `cryptography`'s Ed25519 (RFC 8032).
"""

from __future__ import annotations

import hashlib
import json
import os
import re
import stat
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path
from urllib.parse import urlsplit

import pytest
from typer.testing import CliRunner

from site_support import (
    OTHER_SECRET,
    build_chain,
    build_pef_chain,
    synthetic_chain,
    write_public_key,
)

from dicert.audit.canonical import canonicalize, parse_json
from dicert.beacon import build_site, check_site
from dicert.beacon.pages import BlockSeries, block_series, svg_block_plot
from dicert.cli.app import app
from dicert.errors import ParameterError, VerificationError

CLOCK_A = "2026-02-01T00:00:00Z"
CLOCK_B = "2026-03-01T09:30:00Z"


@pytest.fixture(scope="module")
def beacon(tmp_path_factory):
    root = tmp_path_factory.mktemp("beacon")
    chain = build_chain(root)
    pub = write_public_key(root / "operator.pub")
    return root, chain, pub


@pytest.fixture(scope="module")
def site(beacon, tmp_path_factory):
    _, chain, pub = beacon
    out = tmp_path_factory.mktemp("published") / "site"
    result = build_site(chain, out, public_key=pub, title="Test beacon (invented)",
                        clock=lambda: CLOCK_A)
    return out, result


def _manifest(site_dir: Path) -> dict:
    return json.loads((site_dir / "manifest.json").read_text(encoding="utf-8"))


def test_layout_and_head(site, beacon):
    out, result = site
    _, chain, _ = beacon
    names = sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.is_file())
    assert names == sorted([
        "index.html", "manifest.json", "operator-key.pub",
        "assets/check.js", "assets/icon.svg", "assets/style.css",
        "chain/pulse-000001.json", "chain/pulse-000002.json", "chain/pulse-000003.json",
        "pulses/pulse-000001.html", "pulses/pulse-000002.html", "pulses/pulse-000003.html",
    ])
    assert result.pulses == 3 and result.head_index == 3 and result.files == len(names)
    from dicert.audit.chain import chain_head

    assert chain_head(chain) == (3, result.head_sha256)
    m = _manifest(out)
    assert m["format"] == "dicert-site/2"
    assert m["chain"] == {"pulses": 3, "head_index": 3, "head_sha256": result.head_sha256}
    assert [p["index"] for p in m["pulses"]] == [1, 2, 3]
    assert [p["status"] for p in m["pulses"]] == ["certified", "certified", "aborted"]
    # The manifest is itself RFC 8785 canonical (rfc8785 reference library).
    import rfc8785

    assert (out / "manifest.json").read_bytes() == rfc8785.dumps(m) + b"\n"


def test_published_records_are_the_exact_chain_bytes_and_hash_to_the_chain_digests(site, beacon):
    """SHA-256 (FIPS 180-4) of the RFC 8785 form of each body, computed with the `rfc8785`
    reference library, is the manifest digest and the next pulse's `previous_record_sha256`."""
    import rfc8785

    out, _ = site
    _, chain, _ = beacon
    m = _manifest(out)
    prev = None
    for entry in m["pulses"]:
        data = (out / entry["record_file"]).read_bytes()
        assert data == (chain / Path(entry["record_file"]).name).read_bytes()
        assert hashlib.sha256(data).hexdigest() == entry["file_sha256"]
        assert len(data) == entry["file_bytes"]
        record = json.loads(data)
        body = {k: v for k, v in record.items() if k not in ("record_sha256", "signature")}
        digest = hashlib.sha256(rfc8785.dumps(body)).hexdigest()
        assert digest == entry["record_sha256"] == record["record_sha256"]
        assert record["previous_record_sha256"] == entry["previous_record_sha256"] == prev
        prev = digest
    assert m["chain"]["head_sha256"] == prev


def test_signatures_cover_the_canonical_body_under_the_published_key(site):
    """What the pages verify: Ed25519 (RFC 8032, `cryptography`) over the RFC 8785 body bytes,
    with the key from operator-key.pub (PEM SubjectPublicKeyInfo, RFC 8410)."""
    import rfc8785
    from cryptography.hazmat.primitives import serialization

    out, result = site
    key = serialization.load_pem_public_key((out / "operator-key.pub").read_bytes())
    raw = key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)
    # RFC 8032 section 7.1 TEST 1: the public key of the secret the chain was signed with.
    assert raw.hex() == "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a"
    assert result.key_fingerprint == hashlib.sha256(raw).hexdigest()
    assert _manifest(out)["public_key"] == {
        "algorithm": "Ed25519", "file": "operator-key.pub", "raw_hex": raw.hex(),
        "key_fingerprint": hashlib.sha256(raw).hexdigest()}
    for p in sorted((out / "chain").iterdir()):
        record = json.loads(p.read_bytes())
        body = {k: v for k, v in record.items() if k not in ("record_sha256", "signature")}
        assert record["signature"]["public_key"] == raw.hex()
        key.verify(bytes.fromhex(record["signature"]["value"]), rfc8785.dumps(body))


def test_modes_are_world_readable_whatever_the_umask(beacon, tmp_path):
    _, chain, pub = beacon
    old = os.umask(0o077)
    try:
        build_site(chain, tmp_path / "s", public_key=pub)
    finally:
        os.umask(old)
    out = tmp_path / "s"
    for p in [out, *out.rglob("*")]:
        mode = stat.S_IMODE(p.stat().st_mode)
        assert mode == (0o755 if p.is_dir() else 0o644), p


def test_deterministic_apart_from_the_generation_time(beacon, site, tmp_path):
    _, chain, pub = beacon
    first, _ = site
    second = tmp_path / "again"
    build_site(chain, second, public_key=pub, title="Test beacon (invented)",
               clock=lambda: CLOCK_B)
    files = sorted(p.relative_to(first) for p in first.rglob("*") if p.is_file())
    assert files == sorted(p.relative_to(second) for p in second.rglob("*") if p.is_file())
    differ = [str(f) for f in files if (first / f).read_bytes() != (second / f).read_bytes()]
    assert differ == ["manifest.json"]
    a, b = _manifest(first), _manifest(second)
    assert a["volatile"] == {"generated_at": CLOCK_A} and b["volatile"] == {"generated_at": CLOCK_B}
    assert {k: v for k, v in a.items() if k != "volatile"} == {
        k: v for k, v in b.items() if k != "volatile"}


def test_index_lists_every_pulse_with_full_digests(site):
    out, _ = site
    index = (out / "index.html").read_text(encoding="utf-8")
    m = _manifest(out)
    rows = re.findall(r'<tr id="pulse-(\d+)" data-index="\d+" data-record-sha256="([0-9a-f]{64})"',
                      index)
    assert rows == [(str(p["index"]), p["record_sha256"]) for p in m["pulses"]]
    for p in m["pulses"]:
        record = json.loads((out / p["record_file"]).read_bytes())
        assert f">{p['record_sha256']}</code>" in index  # written in full, not cut
        if record["extractor"].get("output_sha256"):
            assert f">{record['extractor']['output_sha256']}</code>" in index
        assert record["volatile"]["timestamps"]["finished"] in index
    assert f'<code id="head-digest" class="digest">{m["chain"]["head_sha256"]}</code>' in index
    assert "\u2026" not in index and "..." not in index.split("<tbody>")[1]
    assert "certified" in index and "aborted" in index
    assert "4\u202f542" in index  # output bits of the honest pulses, digits grouped


def test_pulse_page_shows_numbers_budget_and_assumptions(site):
    out, _ = site
    record = json.loads((out / "chain/pulse-000001.json").read_bytes())
    page = (out / "pulses/pulse-000001.html").read_text(encoding="utf-8")
    import html

    from dicert.stages.record_compat import upgrade_body

    record = upgrade_body(record)  # the site reads records of every format
    for term in record["error_budget"]["terms"]:
        assert f"<code>{term['name']}</code>" in page
    for text in record["assumptions"]:
        assert html.escape(text) in page
    assert 'data-pulse="1"' in page and 'id="pulse-result"' in page
    assert f"{record['estimate']['chsh_estimate']:.6g}" in page
    # Martingale records carry their per-block CHSH series (estimate_blocks): it is plotted.
    assert "no per-block data" not in page
    assert "CHSH estimate per block" in page and "<svg" in page
    # Bounds are shown rounded down, never above the recorded value; budgets in full.
    lower = re.search(r"CHSH lower bound \(rounded down\)</dt><dd>([0-9.]+)<", page)
    assert 0 <= record["estimate"]["chsh_lower_bound"] - float(lower.group(1)) < 1e-6
    shown = re.search(r"min-entropy \(bits, rounded down\)</dt><dd>([0-9.\u202f]+)<", page)
    value = float(shown.group(1).replace("\u202f", ""))
    assert 0 <= record["certified_min_entropy_bits"] - value < 1e-3
    assert f'<td class="num">{record["soundness_error"]!r}</td>' in page
    assert 'href="pulse-000002.html"' in page and 'href="../index.html"' in page


class _Refs(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.refs: list[str] = []
        self.csp: list[str] = []

    def handle_starttag(self, tag, attrs):
        d = dict(attrs)
        for name in ("src", "href", "action", "data", "poster", "srcset"):
            if name in d:
                self.refs.append(d[name])
        if tag == "meta" and d.get("http-equiv") == "Content-Security-Policy":
            self.csp.append(d["content"])


def test_no_external_resources_and_every_link_resolves_inside_the_site(site):
    out, _ = site
    for page in [out / "index.html", *sorted((out / "pulses").iterdir())]:
        parser = _Refs()
        parser.feed(page.read_text(encoding="utf-8"))
        assert parser.csp and "default-src 'none'" in parser.csp[0]
        assert "connect-src 'self'" in parser.csp[0]
        for ref in parser.refs:
            parts = urlsplit(ref)
            assert not parts.scheme and not parts.netloc, (page, ref)
            target = (page.parent / parts.path).resolve()
            assert target == out.resolve() / "chain" or out.resolve() in target.parents, ref
            assert target.exists(), (page, ref)
    for asset in (out / "assets").iterdir():
        text = asset.read_text(encoding="utf-8")
        # the only URL allowed is the SVG namespace name (an identifier, never fetched)
        urls = set(re.findall(r"https?://[^\s\"')]+", text))
        assert urls <= {"http://www.w3.org/2000/svg"}, (asset, urls)


def test_refuses_a_chain_that_does_not_verify_and_writes_nothing(beacon, tmp_path):
    import shutil

    _, chain, pub = beacon
    broken = tmp_path / "broken"
    shutil.copytree(chain, broken)
    (broken / "pulse-000002.json").unlink()
    with pytest.raises(VerificationError, match="gap"):
        build_site(broken, tmp_path / "site", public_key=pub)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["broken"]
    # A key other than the one that signed the pulses (RFC 8032 TEST 2 key).
    other = write_public_key(tmp_path / "other.pub", OTHER_SECRET)
    with pytest.raises(VerificationError, match="refusing to publish"):
        build_site(chain, tmp_path / "site", public_key=other)
    assert not (tmp_path / "site").exists()


def test_out_folder_rules(beacon, tmp_path):
    _, chain, pub = beacon
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "keep.txt").write_text("not a site")
    with pytest.raises(ParameterError, match="not empty"):
        build_site(chain, foreign, public_key=pub)
    assert [p.name for p in foreign.iterdir()] == ["keep.txt"]
    with pytest.raises(ParameterError, match="must not contain one another"):
        build_site(chain, chain / "site", public_key=pub)
    empty = tmp_path / "empty"
    empty.mkdir()
    assert build_site(chain, empty, public_key=pub).replaced is False
    # Rebuilding over an earlier site replaces it as a whole and leaves no temporary folder.
    (empty / "stale.html").write_text("old")
    again = build_site(chain, empty, public_key=pub)
    assert again.replaced and not (empty / "stale.html").exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["empty", "foreign"]


def test_check_site_detects_tampering_and_removal(site, tmp_path):
    import shutil

    out, result = site
    ok = check_site(out, write_public_key(tmp_path / "op.pub"))
    assert ok.pulses == 3 and ok.head_sha256 == result.head_sha256 and ok.signatures_checked
    tampered = tmp_path / "tampered"
    shutil.copytree(out, tampered)
    p = tampered / "chain/pulse-000002.json"
    data = bytearray(p.read_bytes())
    at = data.index(b'"output_bits":4542') + len('"output_bits":')
    data[at] = ord("5")  # one byte: 4542 -> 5542
    p.write_bytes(bytes(data))
    with pytest.raises(VerificationError):
        check_site(tampered)
    removed = tmp_path / "removed"
    shutil.copytree(out, removed)
    (removed / "chain/pulse-000002.json").unlink()
    with pytest.raises(VerificationError):
        check_site(removed)


def test_without_a_key_the_site_publishes_none_and_says_so(beacon, tmp_path):
    _, chain, _ = beacon
    res = build_site(chain, tmp_path / "site")
    assert res.key_fingerprint is None
    m = _manifest(tmp_path / "site")
    assert m["public_key"] is None and not (tmp_path / "site/operator-key.pub").exists()
    assert m["build_check"]["signer_trusted"] is False
    assert any("integrity, not authorship" in n for n in m["build_check"]["notes"])
    assert "no operator key was published" in (tmp_path / "site/index.html").read_text()
    assert check_site(tmp_path / "site").signatures_checked is False


def test_unsigned_chain_publishes_with_a_warning(tmp_path):
    chain = synthetic_chain(tmp_path, [{"status": "certified"}] * 2, secret=None)
    res = build_site(chain, tmp_path / "site")
    assert res.key_fingerprint is None
    notes = _manifest(tmp_path / "site")["build_check"]["notes"]
    assert any(n.startswith("0 of 2 pulse(s) signed") for n in notes), notes
    # An unsigned chain cannot be published under an operator key.
    with pytest.raises(VerificationError):
        build_site(chain, tmp_path / "keyed", public_key=write_public_key(tmp_path / "k.pub"))


# ------------------------------------------------------------------ block-by-block plot


def _blocks_body(values):
    return {"status": "certified", "estimate": {
        "chsh_estimate": 2.7, "blocks": [
            {"index": k, "first_trial": 1000 * k, "trials": 1000, "chsh_estimate": v,
             "chsh_lower_bound": v - 0.1, "chsh_upper_bound": v + 0.1}
            for k, v in enumerate(values)]},
        "entropy": {"finite_size": {"method": "martingale-azuma",
                                     "details": {"chsh_threshold": 2.5}}}}


def test_block_plot_from_per_block_chsh_values(tmp_path):
    values = [2.0, 2.5, 2.8284271247461903, 2.7]
    chain = synthetic_chain(tmp_path, [_blocks_body(values)])
    build_site(chain, tmp_path / "site")
    page = (tmp_path / "site/pulses/pulse-000001.html").read_text(encoding="utf-8")
    svg = page[page.index("<svg"):page.index("</svg>") + 6]
    root = ET.fromstring(svg)  # well-formed XML
    ns = {"s": "http://www.w3.org/2000/svg"}
    points = root.findall("s:circle", ns)
    assert len(points) == len(values)
    # Geometry: the point of a block at S = 2 lies on the local-bound line, the one at
    # 2 sqrt 2 (Tsirelson's bound; Cirel'son 1980) on that line, the one at 2.5 on the
    # protocol threshold line.
    lines = {ln.get("class"): float(ln.get("y1")) for ln in root.findall("s:line", ns)
             if ln.get("class", "").startswith("ref-")}
    ys = [float(c.get("cy")) for c in points]
    assert ys[0] == pytest.approx(lines["ref-local"], abs=0.01)
    assert ys[1] == pytest.approx(lines["ref-threshold"], abs=0.01)
    assert ys[2] == pytest.approx(lines["ref-quantum"], abs=0.01)
    assert ys[3] < ys[1] < ys[0]  # larger values are drawn higher
    assert len([ln for ln in root.findall("s:line", ns) if ln.get("class") == "bar"]) == 4


def test_block_plot_of_a_probability_estimation_pulse(tmp_path):
    """A real adaptive-calibration run (ch-photonic protocol, small parameters): the pulse page
    plots one point per block at that block's recorded share of log2 T."""
    chain = build_pef_chain(tmp_path)
    build_site(chain, tmp_path / "site")
    record = json.loads((tmp_path / "site/chain/pulse-000001.json").read_bytes())
    blocks = record["entropy"]["finite_size"]["details"]["blocks"]
    assert len(blocks) >= 3
    page = (tmp_path / "site/pulses/pulse-000001.html").read_text(encoding="utf-8")
    svg = ET.fromstring(page[page.index("<svg"):page.index("</svg>") + 6])
    ns = {"s": "http://www.w3.org/2000/svg"}
    points = svg.findall("s:circle", ns)
    assert len(points) == len(blocks)
    zero = next(float(ln.get("y1")) for ln in svg.findall("s:line", ns)
                if ln.get("class") == "ref-local")
    ys = [float(c.get("cy")) for c in points]
    # Linear scale: heights above the zero line are proportional to the scores.
    k = max(range(len(blocks)), key=lambda i: abs(blocks[i]["log2_t_block"]))
    scale = (zero - ys[k]) / blocks[k]["log2_t_block"]
    for y, b in zip(ys, blocks, strict=True):
        assert zero - y == pytest.approx(scale * b["log2_t_block"], abs=0.02)
    assert "block" in points[1].find("s:title", ns).text


def test_recorded_checks_are_listed(tmp_path):
    body = {"status": "certified",
            "design": {"checks": [
                {"name": "test_fraction", "statistic": 12.0, "p_value": 0.31, "threshold": 1e-9,
                 "passed": True, "applicable": True},
                {"name": "serial_settings", "statistic": 3.5, "p_value": 1e-12,
                 "threshold": 1e-9, "passed": False, "applicable": True}]},
            "output_screens": {"tests": [
                {"name": "monobit", "statistic": 0.2, "p_value": 0.84, "passed": True,
                 "applicable": True},
                {"name": "runs", "statistic": None, "p_value": None, "passed": None,
                 "applicable": False}]}}
    chain = synthetic_chain(tmp_path, [body])
    build_site(chain, tmp_path / "site")
    page = (tmp_path / "site/pulses/pulse-000001.html").read_text(encoding="utf-8")
    rows = re.findall(r"<tr><td><code>(\w+)</code></td>.*?<td>([\w ]+)</td></tr>", page)
    assert rows == [("test_fraction", "passed"), ("serial_settings", "FAILED"),
                    ("monobit", "passed"), ("runs", "not applicable")]


def test_block_series_finds_probability_estimation_scores():
    record = {"entropy": {"finite_size": {"details": {"blocks": [
        {"index": 0, "first_trial": 0, "log2_t_block": 0.0},
        {"index": 1, "first_trial": 500, "log2_t_block": 3.25},
        {"index": 2, "first_trial": 1000, "log2_t_block": "-inf"}]}}}}
    (series,) = block_series(record)
    assert series.kind == "pef-score" and series.path == "entropy.finite_size.details.blocks"
    assert series.values[:2] == (0.0, 3.25) and series.values[2] == float("-inf")
    svg = svg_block_plot(series)
    assert svg == svg_block_plot(series)  # deterministic bytes
    assert svg.count("minus-inf") == 1
    ET.fromstring(svg)


def test_svg_plot_escapes_and_survives_degenerate_series():
    s = BlockSeries(kind="chsh", path="x", label='<b>"quoted"</b>', first_trials=(None,),
                    values=(None,), lower=None, upper=None)
    root = ET.fromstring(svg_block_plot(s))
    assert root.find("{http://www.w3.org/2000/svg}title").text == '<b>"quoted"</b>'


# ------------------------------------------------------------------ CLI


def test_cli_publish(beacon, tmp_path):
    _, chain, pub = beacon
    runner = CliRunner()
    res = runner.invoke(app, ["publish", str(chain), "--out", str(tmp_path / "s"),
                              "--pubkey", str(pub), "--json"])
    assert res.exit_code == 0, res.output
    data = json.loads(res.stdout)
    assert data["pulses"] == 3 and data["key_fingerprint"] and data["replaced"] is False
    res = runner.invoke(app, ["publish", str(chain), "--out", str(tmp_path / "s"),
                              "--pubkey", str(pub)])
    assert res.exit_code == 0 and "http.server" in res.stdout
    missing = runner.invoke(app, ["publish", str(tmp_path / "nope"), "--out", str(tmp_path / "t")])
    assert missing.exit_code == 2 and missing.stderr.count("\n") == 1
    other = write_public_key(tmp_path / "other.pub", OTHER_SECRET)
    bad = runner.invoke(app, ["publish", str(chain), "--out", str(tmp_path / "t"),
                              "--pubkey", str(other)])
    assert bad.exit_code == 1 and "refusing to publish" in bad.stderr
    assert not (tmp_path / "t").exists()


def test_manifest_reads_back_with_the_strict_reader(site):
    out, _ = site
    data = (out / "manifest.json").read_bytes()
    assert canonicalize(parse_json(data)) + b"\n" == data


def test_demo_builds_and_checks_its_site(tmp_path):
    runner = CliRunner()
    res = runner.invoke(app, ["demo", "--out", str(tmp_path / "demo"), "--json"])
    assert res.exit_code == 0, res.output
    summary = json.loads(res.stdout)
    site = summary["site"]
    assert Path(site["index_file"]).is_file()
    assert site["checked"]["signatures_checked"] is True
    assert site["checked"]["pulses"] == len(summary["pulses"])
    assert site["head_sha256"] == summary["pulses"][-1]["record_sha256"]
    assert site["serve"].endswith(site["dir"]) and "--bind 127.0.0.1" in site["serve"]
    check_site(site["dir"], summary["public_key_file"])
