"""The beacon site's in-browser checks, run in a real headless Chromium (Debian's `chromium`
and `chromium-driver`, driven with selenium).

The site is served from a local http.server bound to 127.0.0.1 on a free port; the browser
runs with networking features off and a fresh profile. Skipped with a message where no browser
is installed; `.ci/run` installs one, and under CI (CI=true) a missing browser is a failure.
"""

from __future__ import annotations

import functools
import hashlib
import http.server
import json
import os
import shutil
import threading
from pathlib import Path

import pytest

from site_support import OTHER_SECRET, build_chain, write_public_key

from dicert.audit.canonical import canonicalize

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
VECTORS = Path(__file__).parent / "vectors"
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-dev-shm-usage", "--window-size=1400,1000")


def _need_browser():
    missing = [str(p) for p in (CHROMIUM, CHROMEDRIVER) if not p.exists()]
    try:
        import selenium  # noqa: F401
    except ImportError:
        missing.append("selenium (pip install -e '.[test]')")
    if missing:
        msg = ("no headless browser for the site test: missing " + ", ".join(missing)
               + "; install Debian's chromium and chromium-driver "
                 "(apt-get install chromium chromium-driver)")
        if os.environ.get("CI") == "true":
            pytest.fail(msg + " -- .ci/run installs them, so CI must have them")
        pytest.skip(msg)


class _QuietHandler(http.server.SimpleHTTPRequestHandler):
    def log_message(self, *args):  # keep test output clean
        pass


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    """A local HTTP server on 127.0.0.1 (free port) serving a folder of site copies."""
    _need_browser()
    root = tmp_path_factory.mktemp("www")
    handler = functools.partial(_QuietHandler, directory=str(root))
    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    thread = threading.Thread(target=httpd.serve_forever, daemon=True)
    thread.start()
    try:
        yield root, f"http://127.0.0.1:{httpd.server_address[1]}"
    finally:
        httpd.shutdown()
        httpd.server_close()
        thread.join(timeout=10)


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    _need_browser()
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}")
    driver = webdriver.Chrome(service=Service(str(CHROMEDRIVER)), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


@pytest.fixture(scope="module")
def sites(server, tmp_path_factory):
    """The published site (valid) plus tampered copies, all under the server's folder."""
    from dicert.beacon import build_site

    root, _ = server
    work = tmp_path_factory.mktemp("beacon")
    chain = build_chain(work)
    pub = write_public_key(work / "operator.pub")
    good = root / "good"
    result = build_site(chain, good, public_key=pub, title="Test beacon (invented)")
    build_site(chain, root / "nokey", title="Test beacon without key (invented)")
    return good, result


def _copy(sites, server, name) -> Path:
    good, _ = sites
    root, _ = server
    dst = root / name
    shutil.copytree(good, dst)
    return dst


def _rewrite_manifest(site: Path, edit) -> None:
    m = json.loads((site / "manifest.json").read_bytes())
    edit(m)
    (site / "manifest.json").write_bytes(canonicalize(m) + b"\n")


def _open(browser, url):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    browser.get(url)
    WebDriverWait(browser, 60).until(
        lambda d: d.find_element(By.ID, "chain-result").get_attribute("data-state") != "pending")
    result = browser.find_element(By.ID, "chain-result")
    cells = {int(c.get_attribute("data-result-for")): (c.get_attribute("data-state"), c.text)
             for c in browser.find_elements(By.CSS_SELECTOR, "[data-result-for]")}
    return result.get_attribute("data-state"), result.text, cells


def test_valid_chain_shows_valid(browser, server, sites, tmp_path):
    from selenium.webdriver.common.by import By

    _, base = server
    _, result = sites
    state, text, cells = _open(browser, f"{base}/good/index.html")
    rows = browser.find_elements(By.CSS_SELECTOR, "#pulses tbody tr")
    assert [r.get_attribute("data-index") for r in rows] == ["1", "2", "3"]
    assert "certified" in rows[0].text and "aborted" in rows[2].text
    assert state == "valid", text
    assert text.startswith("VALID: all 3 pulses") and result.key_fingerprint in text
    assert cells == {i: ("valid", "valid: hash chain and signature") for i in (1, 2, 3)}
    assert browser.find_element(By.ID, "head-digest").text == result.head_sha256
    shot = tmp_path / "beacon-index.png"
    assert browser.save_screenshot(str(shot))
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 10_000
    # The head comparison: a head obtained elsewhere, given in the URL fragment.
    _open(browser, f"{base}/good/index.html#head={result.head_sha256}")
    cmp = browser.find_element(By.ID, "compare-result")
    assert cmp.get_attribute("data-state") == "valid", cmp.text


def test_pulse_page_checks_its_pulse(browser, server, sites, tmp_path):
    from selenium.webdriver.common.by import By

    _, base = server
    state, text, _ = _open(browser, f"{base}/good/pulses/pulse-000002.html")
    assert state == "valid", text
    mine = browser.find_element(By.ID, "pulse-result")
    assert mine.get_attribute("data-state") == "valid"
    assert mine.text == "Pulse 2: valid: hash chain and signature"
    assert browser.save_screenshot(str(tmp_path / "beacon-pulse-2.png"))


def test_one_changed_byte_shows_invalid_naming_the_pulse(browser, server, sites, tmp_path):
    site = _copy(sites, server, "tampered")
    p = site / "chain" / "pulse-000002.json"
    data = bytearray(p.read_bytes())
    at = data.index(b'"output_bits":4542') + len('"output_bits":')
    data[at] = ord("5")  # one byte: 4542 -> 5542 output bits
    p.write_bytes(bytes(data))
    _, base = server
    state, text, cells = _open(browser, f"{base}/tampered/index.html")
    assert state == "invalid"
    assert "pulse 2: " in text and "[invalid: pulse 2]" in text
    assert cells[2][0] == "invalid" and "record_sha256 does not match the body" in cells[2][1]
    assert cells[1][0] == "valid" and cells[3][0] == "valid"
    assert browser.save_screenshot(str(tmp_path / "beacon-tampered.png"))


def test_removed_pulse_shows_invalid(browser, server, sites):
    _, base = server
    # The record file deleted from the server.
    site = _copy(sites, server, "removed")
    (site / "chain" / "pulse-000002.json").unlink()
    state, text, cells = _open(browser, f"{base}/removed/index.html")
    assert state == "invalid" and "[invalid: pulse 2]" in text
    assert cells[2][0] == "invalid" and "HTTP 404" in cells[2][1]
    # The record deleted and the manifest rewritten without it: pulse 3 no longer links.
    site = _copy(sites, server, "removed-listed")
    (site / "chain" / "pulse-000002.json").unlink()
    _rewrite_manifest(site, lambda m: m["pulses"].pop(1))
    state, text, cells = _open(browser, f"{base}/removed-listed/index.html")
    assert state == "invalid"
    assert "pulse 2 is missing" in text and "[invalid: pulse 3]" in text


def test_truncated_chain_is_caught_by_a_known_head(browser, server, sites):
    """Dropping the newest pulse and rewriting the manifest leaves a consistent shorter chain;
    only a head digest obtained elsewhere catches it."""
    from selenium.webdriver.common.by import By

    _, result = sites
    site = _copy(sites, server, "truncated")
    (site / "chain" / "pulse-000003.json").unlink()
    (site / "pulses" / "pulse-000003.html").unlink()

    def drop_last(m):
        m["pulses"].pop()
        m["chain"].update(pulses=2, head_index=2, head_sha256=m["pulses"][-1]["record_sha256"])
    _rewrite_manifest(site, drop_last)
    index = (site / "index.html").read_text(encoding="utf-8")
    start = index.index('<tr id="pulse-3"')
    index = index[:start] + index[index.index("</tr>", start) + 5:]
    index = index.replace(result.head_sha256, json.loads(
        (site / "manifest.json").read_bytes())["chain"]["head_sha256"])
    (site / "index.html").write_text(index, encoding="utf-8")
    _, base = server
    url = f"{base}/truncated/index.html#head={result.head_sha256}"
    state, text, _ = _open(browser, url)
    assert state == "valid", text  # internally consistent ...
    cmp = browser.find_element(By.ID, "compare-result")
    assert cmp.get_attribute("data-state") == "invalid"  # ... but not the head we know
    assert "DOES NOT MATCH" in cmp.text


def test_altered_signature_shows_invalid(browser, server, sites):
    """Only the signature value changed (the body digest still matches, the manifest is made
    to agree): the browser's Ed25519 check alone must catch it."""
    site = _copy(sites, server, "badsig")
    p = site / "chain" / "pulse-000001.json"
    record = json.loads(p.read_bytes())
    value = record["signature"]["value"]
    record["signature"]["value"] = ("0" if value[0] != "0" else "1") + value[1:]
    data = canonicalize(record) + b"\n"
    p.write_bytes(data)

    def fix(m):
        m["pulses"][0].update(file_sha256=hashlib.sha256(data).hexdigest(), file_bytes=len(data))
    _rewrite_manifest(site, fix)
    _, base = server
    state, text, cells = _open(browser, f"{base}/badsig/index.html")
    assert state == "invalid", text
    assert cells[1] == ("invalid", "INVALID: Ed25519 signature does not verify")
    assert cells[2][0] == "valid" and cells[3][0] == "valid"


def test_foreign_key_shows_invalid(browser, server, sites):
    """A pulse re-sealed and signed with another key (RFC 8032 TEST 2 key)."""
    from dicert.audit import signing
    from dicert.audit.record import record_body, seal_record

    site = _copy(sites, server, "foreign")
    p = site / "chain" / "pulse-000003.json"
    forged = seal_record(record_body(json.loads(p.read_bytes())),
                         signing.private_key_from_bytes(OTHER_SECRET))
    data = canonicalize(forged) + b"\n"
    p.write_bytes(data)

    def fix(m):
        m["pulses"][2].update(file_sha256=hashlib.sha256(data).hexdigest(), file_bytes=len(data))
    _rewrite_manifest(site, fix)
    _, base = server
    state, text, cells = _open(browser, f"{base}/foreign/index.html")
    assert state == "invalid" and "[invalid: pulse 3]" in text
    assert "signed by another key" in cells[3][1]


def test_site_without_key_checks_the_hash_chain_only(browser, server, sites):
    _, base = server
    state, text, cells = _open(browser, f"{base}/nokey/index.html")
    assert state == "partial", text
    assert text.startswith("HASH CHAIN VALID (3 pulses") and "no operator key" in text
    assert {s for s, _ in cells.values()} == {"partial"}


def _appendix_b_rows():
    rows = []
    for line in (VECTORS / "rfc8785" / "appendix-b-numbers.txt").read_text().splitlines():
        if line and not line.startswith("#"):
            bits, expected = line.split()
            if expected != "error":
                rows.append((bits, expected))
    return rows


def test_browser_canonical_form_matches_rfc8785_vectors(browser, server, sites):
    """The page's own canonicaliser against RFC 8785 (Rundgren, Jordan, Erdtman, 2020):
    Appendix B number samples, the section 3.2.2 example and the section 3.2.3 sorting
    example (UTF-16 code-unit order)."""
    _, base = server
    _open(browser, f"{base}/good/index.html")
    rows = _appendix_b_rows()
    got = browser.execute_script(
        "return arguments[0].map(function (h) {"
        "  var dv = new DataView(new ArrayBuffer(8));"
        "  for (var i = 0; i < 8; i++) dv.setUint8(i, parseInt(h.substr(2 * i, 2), 16));"
        "  return window.dicertSite.canonicalize(dv.getFloat64(0)); });",
        [bits for bits, _ in rows])
    assert got == [expected for _, expected in rows]
    example = (VECTORS / "rfc8785" / "section-3.2.2-input.json").read_text(encoding="utf-8")
    out = browser.execute_script(
        "return window.dicertSite.canonicalize(JSON.parse(arguments[0]));", example)
    assert out.encode("utf-8") == (VECTORS / "rfc8785" / "section-3.2.2-output.json").read_bytes()
    sorting = (VECTORS / "rfc8785" / "section-3.2.3-sorting-input.json").read_text(encoding="utf-8")
    out = browser.execute_script(
        "return window.dicertSite.canonicalize(JSON.parse(arguments[0]));", sorting)
    order = (VECTORS / "rfc8785" / "section-3.2.3-sorting-order.txt").read_text(
        encoding="utf-8").splitlines()
    assert list(json.loads(out).values()) == order


def test_browser_ed25519_matches_rfc8032_vectors(browser, server, sites):
    """The page's key import (SPKI prefix, RFC 8410) and WebCrypto Ed25519 against RFC 8032
    section 7.1 TESTs 1-3; a flipped signature bit must fail."""
    _, base = server
    _open(browser, f"{base}/good/index.html")
    for line in (VECTORS / "rfc8032" / "ed25519-section-7.1.txt").read_text().splitlines():
        if not line or line.startswith("#"):
            continue
        _, _, public, message, signature = line.split()
        message = "" if message == "-" else message
        call = ("var done = arguments[arguments.length - 1];"
                "window.dicertSite.verifyEd25519(arguments[0], arguments[1], arguments[2])"
                ".then(done, function (e) { done('error: ' + e); });")
        assert browser.execute_async_script(call, public, message, signature) is True
        flipped = signature[:-1] + format(int(signature[-1], 16) ^ 1, "x")
        assert browser.execute_async_script(call, public, message, flipped) is False


def test_page_checks_only_fetch_from_the_site(browser, server, sites):
    """Every resource the browser loaded came from the local server (Resource Timing API)."""
    _, base = server
    _open(browser, f"{base}/good/pulses/pulse-000001.html")
    names = browser.execute_script(
        "return performance.getEntriesByType('resource').map(function (e) { return e.name; });")
    assert names and all(n.startswith(base + "/") for n in names), names


def test_demo_site_shows_valid(browser, server):
    """The site `dicert demo` builds from its chain checks out in the browser."""
    from dicert.cli.demo import run_demo

    root, base = server
    summary = run_demo(root / "demo")
    rel = Path(summary["site"]["index_file"]).relative_to(root)
    state, text, cells = _open(browser, f"{base}/{rel.as_posix()}")
    assert state == "valid", text
    assert sorted(cells) == [p["pulse"] for p in summary["pulses"]]


def test_browser_without_ed25519_says_signature_check_unavailable(browser, server, sites):
    """A browser whose WebCrypto lacks Ed25519 (simulated: importKey rejects the algorithm as
    older browsers do) checks the hash chain and says the signature check is unavailable."""
    src = """(function () {
      var orig = crypto.subtle.importKey.bind(crypto.subtle);
      crypto.subtle.importKey = function (fmt, data, alg, ext, usages) {
        var name = typeof alg === 'string' ? alg : alg && alg.name;
        if (name === 'Ed25519') {
          return Promise.reject(new DOMException('Unrecognized algorithm', 'NotSupportedError'));
        }
        return orig(fmt, data, alg, ext, usages);
      };
    })();"""
    ident = browser.execute_cdp_cmd("Page.addScriptToEvaluateOnNewDocument", {"source": src})
    try:
        _, base = server
        state, text, cells = _open(browser, f"{base}/good/index.html")
        assert state == "partial", text
        assert "Signature check unavailable in this browser" in text
        assert cells == {i: ("partial", "hash chain valid; signature check unavailable in this "
                                        "browser") for i in (1, 2, 3)}
        # The hash chain is still checked: a changed byte is caught without signatures.
        site = _copy(sites, server, "tampered-nosig")
        p = site / "chain" / "pulse-000001.json"
        data = bytearray(p.read_bytes())
        at = data.index(b'"output_bits":4542') + len('"output_bits":')
        data[at] = ord("3")
        p.write_bytes(bytes(data))
        state, text, cells = _open(browser, f"{base}/tampered-nosig/index.html")
        assert state == "invalid" and "[invalid: pulse 1]" in text
    finally:
        browser.execute_cdp_cmd("Page.removeScriptToEvaluateOnNewDocument", ident)
