"""Certification reports: one self-contained document per audit record (HTML or Markdown).

A report restates what a record certifies, for a paper or a beacon operator's publication:
the job, the data and its digests, the design checks, the CHSH estimate, the acceptance test,
the entropy bounds with their references (and BibTeX entries built from them), the error
budget term by term, the output and seed use, the assumptions verbatim, and figures. Every
number comes from the record; each one is tagged with the record key it came from (a
``data-key`` attribute in HTML, a column in Markdown), so that a reader or a test can trace
it. Bounds are written in the safe direction: lower bounds and certified bits rounded down,
error parameters and p-values in full or rounded up.

Rendering is pure (:func:`render_html`, :func:`render_markdown` take the parsed record and
return text and figures); :func:`write_report` reads the record and writes atomically. The
figures reuse the beacon site's SVG plot (:func:`dicert.beacon.pages.svg_block_plot`) and its
style sheet; the HTML embeds everything (no external resources; a Content-Security-Policy
meta forbids loading any).
"""

from __future__ import annotations

import base64
import dataclasses
import hashlib
import html
import json
import math
import os
import re
from collections.abc import Mapping, Sequence
from decimal import ROUND_CEILING, Decimal
from pathlib import Path
from typing import Any

from dicert._display import displayed
from dicert.beacon.pages import (
    CHSH_QUANTUM_BOUND,
    _c,
    _down,
    _exact,
    _fmt,
    _fmt_axis,
    _get,
    _nice_ticks,
    _num,
    _str,
    block_series,
    svg_block_plot,
)
from dicert.errors import ParameterError

__all__ = ["FORMATS", "Fact", "ReportResult", "report_format", "render_html",
           "render_markdown", "write_report", "bibtex_entries"]

#: Output formats and the file extensions that imply them.
FORMATS = {"html": (".html", ".htm"), "md": (".md", ".markdown")}

#: No-signalling (algebraic) maximum of |CHSH| (Clauser, Horne, Shimony & Holt 1969).
CHSH_MAX = 4.0

_DASH = "\u2014"

#: What each error term bounds (the record names the terms; their meaning is the method's).
EPS_MEANING = {
    "eps_est": "estimation: probability that the CHSH confidence bound fails (Azuma-Hoeffding)",
    "eps_ext": "extraction: distance of the extractor's output from uniform given a source of "
               "that min-entropy (leftover hash lemma)",
    "eps_ea": "entropy accumulation: error of the finite-size entropy bound",
    "eps_s": "smoothing parameter of the smooth min-entropy",
    "eps_pe": "probability estimation: error of the estimated probability bound",
    "eps_comp": "completeness: probability that honest devices are refused",
}


class ReportError(ParameterError):
    """A record that cannot be reported on, or an unsupported output format."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Fact:
    """One number or string of the report, with the record key it came from.

    ``kind``: ``digest`` / ``text`` (verbatim), ``int`` (exact integer), ``exact`` (float in
    full, shortest round-trip form), ``down`` (rounded down to ``decimals``), ``up`` (rounded
    up to ``decimals``), ``approx`` (a point estimate to 6 significant digits). ``key`` is a
    dotted record path, or two joined by `` / `` for a ratio.
    """

    label: str
    key: str
    kind: str
    value: Any
    text: str
    decimals: int = 0


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ReportResult:
    """What :func:`write_report` wrote, and the headline numbers."""

    record: str
    out: str
    format: str
    files: tuple[str, ...]
    figures: tuple[str, ...]
    status: str | None
    trials: int | None
    chsh_lower: float | None
    min_entropy_bits: float | None
    output_bits: int | None
    eps_total: float | None
    record_sha256: str | None

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows: list[tuple[str, object]] = [("out", self.out), ("format", self.format),
                                          ("status", self.status),
                                          ("output_bits", self.output_bits)]
        if full:
            rows += [("figures", len(self.figures)), ("trials", self.trials),
                     ("chsh_lower", self.chsh_lower),
                     ("min_entropy_bits", self.min_entropy_bits),
                     ("eps_total", self.eps_total), ("record_sha256", self.record_sha256)]
        return rows


# --------------------------------------------------------------------------- numbers


def _up(value: float | None, decimals: int) -> str:
    """A number written rounded UP (never optimistic for an error or a p-value)."""
    if value is None:
        return _DASH
    q = Decimal(value).quantize(Decimal(1).scaleb(-decimals), rounding=ROUND_CEILING)
    return f"{q:f}"


def _at(record: Any, path: str) -> Any:
    """The value at a dotted record path (list entries by index), or None."""
    cur = record
    for part in path.split("."):
        if isinstance(cur, list) and part.isdigit() and int(part) < len(cur):
            cur = cur[int(part)]
        elif isinstance(cur, Mapping) and part in cur:
            cur = cur[part]
        else:
            return None
    return cur


def _value(record: Mapping[str, Any], key: str) -> Any:
    if " / " in key:
        a, b = (_num(_at(record, k)) for k in key.split(" / "))
        return a / b if a is not None and b else None
    return _at(record, key)


def _fact(record: Mapping[str, Any], label: str, key: str, kind: str, decimals: int = 6) -> Fact:
    v = _value(record, key)
    if kind in ("digest", "text"):
        text = _DASH if v is None else ("yes" if v else "no") if isinstance(v, bool) else str(v)
    elif kind == "int":
        iv = v if isinstance(v, int) and not isinstance(v, bool) else None
        text = _fmt(iv)
    elif kind == "exact":
        text = str(v) if isinstance(v, int) and not isinstance(v, bool) else _exact(_num(v))
    elif kind == "down":
        text = _down(_num(v), decimals)
    elif kind == "up":
        text = _up(_num(v), decimals)
    elif kind == "approx":
        n = _num(v)
        text = _DASH if n is None else f"{n:.6g}"
    else:  # pragma: no cover - programming error
        raise ValueError(kind)
    return Fact(label=label, key=key, kind=kind, value=v, text=text, decimals=decimals)


# --------------------------------------------------------------------------- references


_REF = re.compile(
    r"^(?P<authors>.+?),\s+(?P<journal>[A-Z][A-Za-z.& ]*?)\s+(?P<volume>\d+),\s+"
    r"(?P<pages>[\w\-()]+)\s+\((?P<year>\d{4})\)(?P<rest>.*)$")


def _split_refs(text: str) -> list[str]:
    """One cited string may hold several works separated by '; ' (e.g. 'A ...; B ...')."""
    parts = re.split(r";\s+(?=[A-Z]\.\s)", text)
    return [p.strip() for p in parts if p.strip()]


def _bib_author(name: str) -> str:
    name = name.strip()
    if name == "et al.":
        return "others"
    m = re.match(r"^((?:[A-Z][a-z]?\.\s*-?)+)\s*(.+)$", name)
    return f"{m.group(2)}, {m.group(1).strip()}" if m else name


def _bib_escape(text: str) -> str:
    return text.replace("{", "").replace("}", "").replace("&", r"\&")


def bibtex_entries(references: Sequence[str]) -> list[tuple[str, str]]:
    """BibTeX entries for reference strings as records cite them ('A. B, C. D, Journal VOL,
    PAGES (YEAR)'): ``[(cited text, entry)]``. A string that does not parse becomes a
    ``@misc`` entry carrying it verbatim. Records cite no titles, so entries have none."""
    out: list[tuple[str, str]] = []
    keys: set[str] = set()
    for cited in references:
        for ref in _split_refs(str(cited)):
            m = _REF.match(ref)
            if m:
                raw = m.group("authors").replace(" et al.", ", et al.")
                names = [a for a in (x.strip() for x in raw.split(",")) if a]
                first = _bib_author(names[0]).split(",")[0]
                base = re.sub(r"[^a-z]", "", first.lower()) + m.group("year")
                fields = [("author", " and ".join(_bib_author(a) for a in names)),
                          ("journal", m.group("journal").strip()),
                          ("volume", m.group("volume")), ("pages", m.group("pages")),
                          ("year", m.group("year"))]
                rest = m.group("rest").strip(" ,;")
                if rest:
                    arxiv = re.search(r"arXiv:(\S+)", rest)
                    if arxiv:
                        fields.append(("eprint", arxiv.group(1).rstrip(".,")))
                        fields.append(("archivePrefix", "arXiv"))
                    fields.append(("note", rest))
                kind = "article"
            else:
                base = "ref" + hashlib.sha256(ref.encode()).hexdigest()[:8]
                fields = [("note", ref)]
                kind = "misc"
            key, n = base, 1
            while key in keys:
                n += 1
                key = f"{base}{chr(ord('a') + n - 1)}"
            keys.add(key)
            body = ",\n".join(f"  {k} = {{{_bib_escape(v)}}}" for k, v in fields)
            out.append((ref, f"@{kind}{{{key},\n{body}\n}}"))
    return out


def _references(record: Mapping[str, Any]) -> list[str]:
    refs: list[str] = []
    for path in ("references", "entropy.finite_size.references"):
        items = _get(record, path)
        if isinstance(items, list):
            refs.extend(str(x) for x in items if str(x) not in refs)
    sr = _get(record, "entropy.finite_size.details.single_round")
    if isinstance(sr, Mapping) and isinstance(sr.get("reference"), str):
        for r in _split_refs(sr["reference"]):
            if r not in refs and not any(r in x for x in refs):
                refs.append(r)
    return refs


# --------------------------------------------------------------------------- content


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class _Acceptance:
    statistic: Fact
    limit: Fact
    relation: str  # ">=" or "<="
    name: str
    passed: bool | None


def _acceptance(record: Mapping[str, Any]) -> _Acceptance | None:
    """The acceptance statistic of the finite-size method and its pre-declared limit."""
    d = "entropy.finite_size.details"
    accepted = _get(record, "entropy.finite_size.accepted")
    passed = accepted if isinstance(accepted, bool) else None
    for stat, limit, rel, name in (
            (f"{d}.chsh_estimate", f"{d}.chsh_threshold", ">=",
             "martingale estimate of the CHSH value"),
            (f"{d}.losses", f"{d}.count_limit", "<=", "number of lost CHSH games in test rounds"),
            (f"{d}.log2_t", f"{d}.threshold_log2", ">=",
             "log2 of the product of probability estimation factors")):
        if _num(_get(record, stat)) is not None and _num(_get(record, limit)) is not None:
            kind = "int" if rel == "<=" else "exact"
            return _Acceptance(statistic=_fact(record, "statistic", stat, kind),
                               limit=_fact(record, "limit (declared)", limit, kind),
                               relation=rel, name=name, passed=passed)
    return None


def _method_names(record: Mapping[str, Any]) -> tuple[str, str]:
    fin = _get(record, "entropy.finite_size") or {}
    method = _str(fin.get("method")) if isinstance(fin, Mapping) else None
    sr = _get(record, "entropy.finite_size.details.single_round")
    if isinstance(sr, Mapping):
        single = _str(sr.get("method")) or _DASH
    else:
        single = _str(sr) or _DASH
    return method or _DASH, single


def _summary(record: Mapping[str, Any]) -> str:
    """The job in one paragraph (plain text)."""
    status = _str(record.get("status")) or "unknown"
    proto = _str(_get(record, "protocol.name")) or "an unnamed protocol"
    method, single = _method_names(record)
    side = _str(_get(record, "entropy.finite_size.side_information")) or "unstated"
    files = _get(record, "log.files")
    nfiles = len(files) if isinstance(files, list) else 0
    trials = _get(record, "log.trials")
    tests = _get(record, "estimate.test_trials")
    tool = _get(record, "tool") or {}
    parts = [
        f"{tool.get('name', 'dicert')} {tool.get('version', '')}".strip()
        + f" analysed a Bell-test log ({nfiles} file{'s' if nfiles != 1 else ''}, "
        f"{_fmt(trials)} trials, {_fmt(tests)} test rounds) under the protocol '{proto}', "
        f"with the finite-size method {method} (single-round bound {single}) against an "
        f"adversary holding {side} side information."]
    lower = _num(_get(record, "estimate.chsh_lower"))
    if lower is not None:
        parts.append(f"The CHSH value was estimated at "
                     f"{_fmt(_num(_get(record, 'estimate.chsh')))} with a lower confidence "
                     f"bound of {_down(lower, 6)} (local bound 2).")
    if status == "certified":
        parts.append(
            f"The pre-declared acceptance test passed; the run certified "
            f"{_down(_num(record.get('certified_min_entropy_bits')), 3)} bits of smooth "
            f"min-entropy and the Toeplitz extractor produced "
            f"{_fmt(_get(record, 'extractor.output_bits'))} output bits, with total soundness "
            f"error {_exact(_num(_get(record, 'eps.total')))}.")
    elif status == "aborted":
        parts.append(f"The protocol ABORTED: {_str(record.get('abort_reason')) or 'no reason'}"
                     ". No output bits are certified.")
    else:
        parts.append(f"Status: {status}"
                     + (f" ({_str(record.get('abort_reason'))})" if record.get('abort_reason')
                        else "") + ". The output was not released.")
    parts.append("The certificate holds only under the assumptions listed below.")
    return " ".join(parts)


def _sections(record: Mapping[str, Any]) -> list[tuple[str, list[Fact]]]:
    f = lambda *a, **k: _fact(record, *a, **k)  # noqa: E731
    data = [f("record (SHA-256 of the canonical body, RFC 8785)", "record_sha256", "digest"),
            f("record format", "format", "text"),
            f("status", "status", "text"),
            f("trial log (SHA-256 of the bytes analysed)", "log.sha256", "digest"),
            f("scope of the digest", "log.scope", "text"),
            f("bytes analysed", "log.bytes_read", "int"),
            f("trials analysed", "log.trials", "int"),
            f("trials in the log", "log.trials_in_log", "int"),
            f("test rounds", "estimate.test_trials", "int"),
            f("trials declared in the protocol", "design.trials.declared", "int"),
            f("where n came from", "design.trials.source", "text"),
            f("protocol", "protocol.name", "text"),
            f("protocol file (SHA-256)", "protocol.sha256", "digest"),
            f("previous record in the chain", "previous_record_sha256", "digest"),
            f("signing key fingerprint", "signature.key_fingerprint", "digest")]
    files = _get(record, "log.files")
    if isinstance(files, list):
        for i, item in enumerate(files):
            if isinstance(item, Mapping):
                data.append(f(f"file {i + 1}: name", f"log.files.{i}.name", "text"))
                data.append(f(f"file {i + 1}: bytes", f"log.files.{i}.bytes", "int"))
                data.append(f(f"file {i + 1}: SHA-256", f"log.files.{i}.sha256", "digest"))
    estimate = [f("CHSH estimate (point value)", "estimate.chsh", "approx"),
                f("its standard error", "estimate.chsh_stderr", "approx"),
                f("CHSH lower confidence bound (rounded down)", "estimate.chsh_lower", "down"),
                f("error of the confidence bound", "estimate.eps", "exact"),
                f("confidence bound method", "estimate.bound_method", "text"),
                f("CHSH-game win probability", "estimate.win_probability", "approx"),
                f("p-value of local realism (in full)", "estimate.p_value_local", "exact"),
                f("log10 of that p-value (rounded up)", "estimate.log10_p_value_local", "up",
                  decimals=2),
                f("p-value method", "estimate.p_value_method", "text"),
                f("test-round probability gamma", "estimate.gamma", "exact")]
    fin = "entropy.finite_size"
    sr = "entropy.single_round"
    entropy = [f("finite-size method", f"{fin}.method", "text"),
               f("single-round method", f"{fin}.details.single_round", "text"),
               f("single-round method", f"{fin}.details.single_round.method", "text"),
               f("single-round reference", f"{fin}.details.single_round.reference", "text"),
               f("side information", f"{fin}.side_information", "text"),
               f("certified smooth min-entropy, bits (rounded down)",
                 "certified_min_entropy_bits", "down", decimals=3),
               f("per trial analysed, bits (rounded down)",
                 "certified_min_entropy_bits / log.trials", "down", decimals=6),
               f("min-entropy if accepted, bits (rounded down)",
                 f"{fin}.details.min_entropy_if_accepted_bits", "down", decimals=3),
               f("entropy error", f"{fin}.entropy_error", "exact"),
               f("smoothing parameter", f"{fin}.smoothing_eps", "exact"),
               f("single-round min-entropy bound", f"{sr}.bound_min_entropy", "text"),
               f("single-round von Neumann bound", f"{sr}.bound_von_neumann", "text"),
               f("single-round min-entropy at the CHSH lower bound (rounded down)",
                 f"{sr}.min_entropy_per_round_at_chsh_lower", "down"),
               f("single-round von Neumann entropy at the CHSH lower bound (rounded down)",
                 f"{sr}.von_neumann_per_round_at_chsh_lower", "down")]
    output = [f("output bits", "extractor.output_bits", "int"),
              f("output file", "bits_file", "text"),
              f("output (SHA-256)", "extractor.output_sha256", "digest"),
              f("extractor", "extractor.kind", "text"),
              f("output rule", "extractor.output_rule", "text"),
              f("extractor error", "extractor.eps_ext", "exact"),
              f("raw bits harvested", "extractor.raw_bits", "int"),
              f("raw bits (SHA-256)", "extractor.raw_sha256", "digest"),
              f("harvested parties", "harvest.parties", "text"),
              f("harvested rounds", "harvest.rounds", "text"),
              f("seed bytes supplied", "extractor.seed_bytes", "int"),
              f("seed bits used (n + m - 1)", "extractor.seed_bits_used", "int"),
              f("seed (SHA-256)", "extractor.seed_sha256", "digest"),
              f("output screens passed", "output_screens.passed", "text")]
    return [("data", [x for x in data if x.value is not None or x.kind == "digest"]),
            # a p-value of 0 is an underflow: its log10 (next row) is the number to quote
            ("estimate", [x for x in estimate if x.value is not None
                          and not (x.key == "estimate.p_value_local" and x.value == 0)]),
            ("entropy", [x for x in entropy if x.value is not None
                         and not isinstance(x.value, Mapping)]),
            ("output", [x for x in output if x.value is not None])]


def _eps_facts(record: Mapping[str, Any]) -> tuple[list[tuple[Fact, str]], Fact | None, str]:
    terms = _get(record, "eps.terms")
    rows = []
    if isinstance(terms, Mapping):
        for name in sorted(terms):
            rows.append((_fact(record, name, f"eps.terms.{name}", "exact"),
                         EPS_MEANING.get(name, "as named in the record")))
    total = _fact(record, "total soundness error", "eps.total", "exact") \
        if _num(_get(record, "eps.total")) is not None else None
    return rows, total, _str(_get(record, "eps.form")) or ""


def _assumption_groups(record: Mapping[str, Any]) -> list[tuple[str, list[str]]]:
    groups, seen = [], set()
    for path, title in (("assumptions", "Assumptions of the certificate"),
                        ("entropy.finite_size.assumptions",
                         "Further assumptions of the finite-size method"),
                        ("design.assumed", "Assumed, not checkable on the data (design)")):
        items = _get(record, path)
        if isinstance(items, list):
            fresh = [str(x) for x in items if str(x) not in seen]
            seen.update(fresh)
            if fresh:
                groups.append((title, fresh))
    return groups


def _design_rows(record: Mapping[str, Any]) -> list[dict[str, str]] | None:
    design = record.get("design")
    if not isinstance(design, Mapping):
        return None
    rows = []
    for i, c in enumerate(design.get("checks") or []):
        if not isinstance(c, Mapping):
            continue
        passed = c.get("passed")
        verdict = "passed" if passed is True else "FAILED" if passed is False else _DASH
        if c.get("applicable") is False:
            verdict = "not applicable"
        p = _num(c.get("p_value"))
        rows.append({"name": str(c.get("name", _DASH)), "key": f"design.checks.{i}",
                     "statistic": _fmt(c.get("statistic") if isinstance(c.get("statistic"), int)
                                       else _num(c.get("statistic"))),
                     "p_value": _DASH if p is None else _exact(p),
                     "threshold": _exact(_num(c.get("threshold"))), "result": verdict,
                     "meaning": str(c.get("meaning", "")),
                     "reference": str(c.get("reference", ""))})
    return rows


# --------------------------------------------------------------------------- figures


def _clip_chsh(series):
    """CHSH intervals clipped to the no-signalling range [-4, 4] (an Azuma interval can run
    past it at small gamma; the clipped interval still contains every physical value)."""
    def clip(band):
        if band is None:
            return None
        return tuple(None if v is None else max(-CHSH_MAX, min(CHSH_MAX, v)) for v in band)
    return dataclasses.replace(series, lower=clip(series.lower), upper=clip(series.upper))


def _svg_acceptance(acc: _Acceptance, *, width: int = 720, height: int = 120) -> str:
    """The acceptance statistic on a number line against its pre-declared limit."""
    s, lim = float(acc.statistic.value), float(acc.limit.value)
    lo, hi = min(s, lim), max(s, lim)
    span = max(hi - lo, abs(lim) * 0.05, 1e-9)
    lo, hi = lo - 0.6 * span, hi + 0.6 * span
    if acc.relation == "<=":
        lo = max(lo, 0.0) if min(s, lim) >= 0 else lo
    left, right, top, ph = 24.0, 24.0, 30.0, 36.0
    pw = width - left - right

    def sx(v: float) -> float:
        return left + pw * (v - lo) / (hi - lo)

    ok_lo, ok_hi = (lim, hi) if acc.relation == ">=" else (lo, lim)
    rel = "\u2265" if acc.relation == ">=" else "\u2264"
    label = f"acceptance: {acc.name} {rel} limit"
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 {width} {height}" '
        f'role="img" aria-label="{html.escape(label)}">',
        f"<title>{html.escape(label)}</title>",
        f'<rect class="accept-region" x="{_c(sx(ok_lo))}" y="{_c(top)}" '
        f'width="{_c(sx(ok_hi) - sx(ok_lo))}" height="{_c(ph)}"/>',
        f'<rect class="frame" x="{_c(left)}" y="{_c(top)}" width="{_c(pw)}" height="{_c(ph)}"/>',
    ]
    for v in _nice_ticks(lo, hi):
        parts.append(f'<text class="tick" x="{_c(sx(v))}" y="{_c(top + ph + 16)}" '
                     f'text-anchor="middle">{_fmt_axis(v)}</text>')
    parts.append(f'<line class="ref-threshold" x1="{_c(sx(lim))}" y1="{_c(top - 6)}" '
                 f'x2="{_c(sx(lim))}" y2="{_c(top + ph)}"/>')
    parts.append(f'<text class="reflabel" x="{_c(sx(lim))}" y="{_c(top - 10)}" '
                 f'text-anchor="middle">limit {html.escape(acc.limit.text)}</text>')
    cls = "point" if acc.passed is not False else "point minus-inf"
    parts.append(f'<circle class="{cls}" cx="{_c(sx(s))}" cy="{_c(top + ph / 2)}" r="5">'
                 f"<title>statistic {html.escape(acc.statistic.text)}</title></circle>")
    parts.append(f'<text class="axis" x="{_c(sx(s))}" y="{_c(top + ph / 2 - 9)}" '
                 f'text-anchor="middle">statistic</text>')
    parts.append(f'<text class="axis" x="{_c(left + pw / 2)}" y="{_c(height - 4)}" '
                 f'text-anchor="middle">shaded: accepted region</text>')
    parts.append("</svg>")
    return "\n".join(parts)


def _svg_plan(curve: Sequence[tuple[float, float]], run: tuple[float, float] | None, label: str,
              *, width: int = 720, height: int = 300) -> str:
    """Certified bits against trials (log-log) from the planner, with the run marked."""
    pts = [(x, y) for x, y in curve if x > 0 and y > 0]
    allp = pts + ([run] if run and run[0] > 0 and run[1] > 0 else [])
    left, right, top, bottom = 72.0, 16.0, 16.0, 42.0
    pw, ph = width - left - right, height - top - bottom
    lx = [math.log10(x) for x, _ in allp] or [0.0, 1.0]
    ly = [math.log10(y) for _, y in allp] or [0.0, 1.0]
    x0, x1 = math.floor(min(lx)), math.ceil(max(lx))
    y0, y1 = math.floor(min(ly)), math.ceil(max(ly))
    x1, y1 = max(x1, x0 + 1), max(y1, y0 + 1)

    def sx(v: float) -> float:
        return left + pw * (math.log10(v) - x0) / (x1 - x0)

    def sy(v: float) -> float:
        return top + ph * (y1 - math.log10(v)) / (y1 - y0)

    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 {width} {height}" '
        f'role="img" aria-label="{html.escape(label)}">',
        f"<title>{html.escape(label)}</title>",
        f'<rect class="frame" x="{_c(left)}" y="{_c(top)}" width="{_c(pw)}" height="{_c(ph)}"/>',
    ]
    step_x = max(1, (x1 - x0 + 5) // 6)
    for k in range(x0, x1 + 1, step_x):
        x = sx(10.0 ** k)
        parts.append(f'<line class="grid" x1="{_c(x)}" y1="{_c(top)}" x2="{_c(x)}" '
                     f'y2="{_c(top + ph)}"/>')
        parts.append(f'<text class="tick" x="{_c(x)}" y="{_c(top + ph + 16)}" '
                     f'text-anchor="middle">1e{k}</text>')
    step_y = max(1, (y1 - y0 + 5) // 6)
    for k in range(y0, y1 + 1, step_y):
        y = sy(10.0 ** k)
        parts.append(f'<line class="grid" x1="{_c(left)}" y1="{_c(y)}" x2="{_c(left + pw)}" '
                     f'y2="{_c(y)}"/>')
        parts.append(f'<text class="tick" x="{_c(left - 6)}" y="{_c(y + 4)}" '
                     f'text-anchor="end">1e{k}</text>')
    if len(pts) >= 2:
        d = " ".join(f"{'M' if i == 0 else 'L'}{_c(sx(x))},{_c(sy(y))}"
                     for i, (x, y) in enumerate(pts))
        parts.append(f'<path class="curve" d="{d}"/>')
    if run and run[0] > 0 and run[1] > 0:
        parts.append(f'<circle class="point" cx="{_c(sx(run[0]))}" cy="{_c(sy(run[1]))}" r="5">'
                     f"<title>this run: {_fmt(int(run[0]))} trials, {_fmt(int(run[1]))} bits"
                     "</title></circle>")
        parts.append(f'<text class="reflabel" x="{_c(sx(run[0]) + 8)}" '
                     f'y="{_c(sy(run[1]) - 8)}">this run</text>')
    parts.append(f'<text class="axis" x="{_c(left + pw / 2)}" y="{_c(height - 6)}" '
                 f'text-anchor="middle">trials (log scale)</text>')
    parts.append(f'<text class="axis" x="14" y="{_c(top + ph / 2)}" text-anchor="middle" '
                 f'transform="rotate(-90 14 {_c(top + ph / 2)})">certified output bits</text>')
    parts.append("</svg>")
    return "\n".join(parts)


def _protocol_from_record(record: Mapping[str, Any]):
    import tomllib

    from dicert.protocol import protocol_from_dict

    text = _get(record, "protocol.content")
    if not isinstance(text, str):
        return None
    try:
        tables = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        try:
            tables = json.loads(text)
        except ValueError:
            return None
    return protocol_from_dict(tables, str(_get(record, "protocol.name") or "<record>"))


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class _Figure:
    name: str  # file stem suffix for Markdown
    title: str
    caption: str
    svg: str


def _plan_figure(record: Mapping[str, Any]) -> tuple[_Figure | None, str]:
    """The planner's certified-bits curve at the run's size for the record's method."""
    from dicert.errors import DicertError

    trials = _get(record, "log.trials")
    method = _str(_get(record, "entropy.finite_size.method")) or ""
    if not isinstance(trials, int) or trials < 1:
        return None, "the record gives no trial count, so there is no planner curve"
    try:
        protocol = _protocol_from_record(record)
        if protocol is None:
            return None, "the record's protocol text could not be read back"
        from dicert.planning import plan

        est_chsh = _num(_get(record, "estimate.chsh"))
        chsh = None
        if est_chsh is not None:  # plan for devices as good as this run's estimate, at most
            chsh = min(max(est_chsh, 2.0 + 1e-6), CHSH_QUANTUM_BOUND - 1e-9)
        result = plan(protocol, chsh=chsh, trials=trials, n_points=24, gamma_points=1)
    except (DicertError, ValueError, ArithmeticError) as exc:
        return None, f"the planner could not model this protocol ({exc})"
    rows = [m for m in result.methods if m.name == method] or \
        [m for m in result.methods if method and m.name.startswith(method)]
    if not rows:
        return None, f"the planner has no row for the method {method or '(none)'}"
    row = rows[0]
    out_bits = _get(record, "extractor.output_bits")
    run = (float(trials), float(out_bits)) if isinstance(out_bits, int) else None
    # the region around this run (the planner's sweep runs to 1e14 trials)
    curve = [(x, y) for x, y in zip(row.curve_trials, row.curve_certified_bits)
             if x <= 100.0 * trials]
    label = f"certified output bits against trials, planner row {row.name}"
    caption = (f"Planner (dicert.planning.plan) for this protocol, method {row.name}, honest "
               f"devices at CHSH {result.chsh:.6g} (this run's estimate, kept inside "
               "(2, 2\u221a2)), "
               f"gamma {result.gamma:g}: certified output bits on acceptance against the number "
               f"of trials; at this run's {_fmt(trials)} trials the planner expects "
               f"{_fmt(int(row.certified_bits))} bits; the marked point is this run's output "
               f"({_fmt(out_bits if isinstance(out_bits, int) else None)} bits). The curve is "
               "informational (a plan, not a certificate).")
    return _Figure(name="plan", title="Certified bits against trials (planner)", caption=caption,
                   svg=_svg_plan(curve, run, label)), ""


def _figures(record: Mapping[str, Any], *,
             with_plan: bool = True) -> tuple[list[_Figure], list[str]]:
    figs, notes = [], []
    threshold = _num(_get(record, "entropy.finite_size.details.chsh_threshold"))
    for s in block_series(record):
        if s.kind == "chsh":
            s = _clip_chsh(s)
            cap = (f"CHSH estimate per block of consecutive trials (from {s.path}), with its "
                   "two-sided confidence interval clipped to the no-signalling range [-4, 4], "
                   "the local bound 2, Tsirelson's bound 2\u221a2"
                   + (f" and the protocol's threshold {_fmt_axis(threshold)}" if threshold
                      is not None else "") + ". Informational: certification uses the whole log.")
            figs.append(_Figure(name="blocks", title="CHSH value per block", caption=cap,
                                svg=svg_block_plot(s, threshold=threshold)))
        else:
            cap = (f"Score per block (from {s.path}): each block's share of log2 of the "
                   "product of probability estimation factors; the run accepts when their sum "
                   "reaches the threshold shown in the acceptance figure.")
            figs.append(_Figure(name="scores", title="Probability-estimation score per block",
                                caption=cap, svg=svg_block_plot(s)))
        break
    if not figs:
        notes.append("This record holds no per-block data, so there is no per-block figure.")
    acc = _acceptance(record)
    if acc is not None:
        figs.append(_Figure(
            name="acceptance", title="Acceptance test",
            caption=(f"The acceptance statistic ({acc.name}) {acc.statistic.text} against its "
                     f"pre-declared limit {acc.limit.text}; the run accepts iff statistic "
                     f"{acc.relation} limit."),
            svg=_svg_acceptance(acc)))
    else:
        notes.append("The record names no acceptance statistic, so there is no acceptance figure.")
    if with_plan:
        fig, note = _plan_figure(record)
        if fig is not None:
            figs.append(fig)
        else:
            notes.append(f"No planner figure: {note}.")
    return figs, notes


# --------------------------------------------------------------------------- rendering


_SECTION_TITLES = {"data": "Data", "estimate": "Bell estimate",
                   "entropy": "Entropy: single-round and finite-size",
                   "output": "Output and seed use"}

_NO_DESIGN = ("This record predates design-conformance checks (it has no `design` section): "
              "whether the log matched the protocol's declared design (test-round fraction, "
              "settings distribution, serial independence) was not checked, only assumed.")


def _title(record: Mapping[str, Any]) -> str:
    name = _str(_get(record, "protocol.name")) or "record"
    idx = record.get("pulse_index")
    return (f"Certification report: {name}"
            + (f", pulse {idx}" if isinstance(idx, int) and not isinstance(idx, bool) else ""))


def _plot_css() -> str:
    """The beacon style sheet (shared, so that the plots look the same) plus report rules."""
    from importlib import resources

    base = resources.files("dicert.beacon").joinpath("assets", "style.css").read_text("utf-8")
    return base + (
        "svg.plot .accept-region { fill: #e3f4e9; }\n"
        "svg.plot .curve { fill: none; stroke: var(--accent); stroke-width: 2; }\n"
        "pre.bib { background: var(--panel); padding: 8px; overflow-x: auto; }\n"
        "figcaption { font-size: 0.88em; color: var(--muted); max-width: 760px; }\n"
        "td.key, td.key code { color: var(--muted); font-size: 0.85em; }\n"
        ".caution { border-left: 4px solid var(--warn); padding: 4px 12px; "
        "background: var(--warn-bg); }\n")


def _standalone_svg(svg: str) -> str:
    """An SVG that carries its own style (for a figure file next to a Markdown report)."""
    css = _plot_css()
    root = re.search(r":root\s*\{[^}]*\}", css)
    rules = [line for line in css.splitlines() if line.startswith("svg.plot")]
    style = ((root.group(0) if root else "") + "\n" + "\n".join(rules)
             + "\nsvg.plot { font-family: sans-serif; }")
    head, rest = svg.split(">", 1)
    return ('<?xml version="1.0" encoding="UTF-8"?>\n' + head + ">\n<style>"
            + html.escape(style, quote=False) + "</style>" + rest + "\n")


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _html_facts(facts: Sequence[Fact]) -> str:
    rows = []
    for x in facts:
        cls = ' class="digest"' if x.kind == "digest" else ""
        val = f"<code{cls}>{_e(x.text)}</code>" if x.kind == "digest" else _e(x.text)
        rows.append(f'<tr><td>{_e(x.label)}</td><td class="val" data-key="{_e(x.key)}" '
                    f'data-kind="{x.kind}" data-decimals="{x.decimals}">{val}</td>'
                    f'<td class="key"><code>{_e(x.key)}</code></td></tr>')
    return ('<div class="table-wrap"><table class="facts"><thead><tr><th>quantity</th>'
            "<th>value</th><th>record key</th></tr></thead>\n<tbody>" + "\n".join(rows)
            + "</tbody></table></div>\n")


def render_html(record: Mapping[str, Any], *, with_plan: bool = True) -> str:
    """The report as one self-contained HTML page (inline SVG figures, inline style, no
    scripts; a Content-Security-Policy meta forbids every external load)."""
    figs, notes = _figures(record, with_plan=with_plan)
    return _render_html(record, figs, notes)


def _csp(css: str) -> str:
    digest = base64.b64encode(hashlib.sha256(css.encode("utf-8")).digest()).decode()
    # Only the one inline style sheet (by its hash); no scripts, images, fonts or connections.
    return (f"default-src 'none'; style-src 'sha256-{digest}'; img-src 'none'; "
            "script-src 'none'; base-uri 'none'; form-action 'none'")


def _render_html(record: Mapping[str, Any], figs: Sequence[_Figure], notes: Sequence[str]) -> str:
    css = _plot_css()
    title = _title(record)
    out = ["<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n",
           '<meta name="viewport" content="width=device-width, initial-scale=1">\n',
           f'<meta http-equiv="Content-Security-Policy" content="{_csp(css)}">\n',
           '<meta name="referrer" content="no-referrer">\n',
           f"<title>{_e(title)}</title>\n<style>{css}</style>\n</head>\n<body>\n",
           f"<header><h1>{_e(title)}</h1></header>\n<main>\n",
           f'<p id="summary">{_e(_summary(record))}</p>\n']
    sections = dict(_sections(record))
    out.append("<h2>Data</h2>\n" + _html_facts(sections["data"]))
    out.append("<h2>Design checks</h2>\n")
    rows = _design_rows(record)
    if rows is None:
        out.append(f'<p class="note" id="no-design">{_e(_NO_DESIGN.replace("`", ""))}</p>\n')
    else:
        sig = _exact(_num(_get(record, 'design.significance')))
        out.append(f"<p>Significance of every check: {sig}; "
                   f"overall: {'passed' if _get(record, 'design.passed') else 'FAILED'}.</p>\n")
        trs = "\n".join(
            f'<tr data-key="{_e(r["key"])}"><td><code>{_e(r["name"])}</code><br>'
            f'<span class="small">{_e(r["meaning"])}</span></td>'
            f'<td class="num">{_e(r["statistic"])}</td><td class="num">{_e(r["p_value"])}</td>'
            f'<td class="num">{_e(r["threshold"])}</td><td>{_e(r["result"])}</td>'
            f'<td class="small">{_e(r["reference"])}</td></tr>' for r in rows)
        checked = _get(record, "design.checked")
        if isinstance(checked, list) and checked:
            out.append("<p>Checked on the data:</p>\n<ul>"
                       + "".join(f"<li>{_e(c)}</li>" for c in checked) + "</ul>\n")
        out.append('<div class="table-wrap"><table class="checks"><thead><tr><th>check</th>'
                   "<th>statistic</th><th>p-value</th><th>significance</th><th>result</th>"
                   "<th>method</th></tr></thead>\n<tbody>" + trs + "</tbody></table></div>\n")
    out.append("<h2>Bell estimate</h2>\n" + _html_facts(sections["estimate"]))
    out.append("<h2>Acceptance test</h2>\n")
    acc = _acceptance(record)
    if acc is None:
        out.append("<p>The record names no acceptance statistic.</p>\n")
    else:
        verdict = {True: "passed", False: "FAILED", None: _DASH}[acc.passed]
        out.append(f"<p>Accept iff the {_e(acc.name)} {_e(acc.relation)} the limit fixed in the "
                   f"protocol before the data were taken. Result: <strong>{verdict}</strong>."
                   "</p>\n" + _html_facts([acc.statistic, acc.limit]))
    out.append("<h2>Entropy: single-round and finite-size</h2>\n"
               + _html_facts(sections["entropy"]))
    refs = bibtex_entries(_references(record))
    if refs:
        out.append("<h3>References</h3>\n<ol>"
                   + "".join(f"<li>{_e(r)}</li>" for r, _ in refs) + "</ol>\n"
                   + "<p class=\"small\">BibTeX (records cite no titles; add them):</p>\n"
                   + '<pre class="bib">' + _e("\n\n".join(b for _, b in refs)) + "</pre>\n")
    out.append("<h2>Error budget</h2>\n")
    terms, total, form = _eps_facts(record)
    if total is None and not terms:
        out.append("<p>The record holds no error budget.</p>\n")
    else:
        trs = [f'<tr><td><code>{_e(x.label)}</code></td><td class="val num" '
               f'data-key="{_e(x.key)}" data-kind="exact" data-decimals="0">{_e(x.text)}</td>'
               f"<td>{_e(m)}</td></tr>" for x, m in terms]
        if total is not None:
            trs.append(f'<tr class="total"><td>total soundness error</td><td class="val num" '
                       f'data-key="eps.total" data-kind="exact" data-decimals="0">'
                       f"{_e(total.text)}</td><td>the whole protocol (meaning below)</td></tr>")
        out.append('<table class="eps"><thead><tr><th>term</th><th>value (in full)</th>'
                   "<th>what it bounds</th></tr></thead>\n<tbody>" + "\n".join(trs)
                   + "</tbody></table>\n")
        if form:
            out.append(f'<p id="eps-meaning">Meaning of the total: {_e(form)}.</p>\n')
    out.append("<h2>Output and seed use</h2>\n" + _html_facts(sections["output"]))
    out.append("<h2>Figures</h2>\n")
    for i, fig in enumerate(figs, start=1):
        out.append(f'<figure id="fig-{fig.name}"><h3>Figure {i}. {_e(fig.title)}</h3>\n{fig.svg}\n'
                   f"<figcaption>{_e(fig.caption)}</figcaption></figure>\n")
    for n in notes:
        out.append(f'<p class="note">{_e(n)}</p>\n')
    out.append("<h2>Assumptions</h2>\n")
    groups = _assumption_groups(record)
    for t, items in groups:
        out.append(f"<h3>{_e(t)}</h3>\n<ul>" + "".join(f"<li>{_e(a)}</li>" for a in items)
                   + "</ul>\n")
    if not groups:
        out.append("<p>The record lists no assumptions.</p>\n")
    caution = _str(record.get("caution"))
    if caution:
        out.append(f'<p class="caution" id="caution"><strong>Caution.</strong> {_e(caution)}</p>\n')
    out.append('<p class="small">Generated by dicert from the record alone; re-check the record '
               "itself with <code>dicert verify</code> and a trusted key.</p>\n")
    out.append("</main>\n</body>\n</html>\n")
    return "".join(out)


def _md(text: Any) -> str:
    """Record text for Markdown: table pipes escaped, and a '<' that could open an HTML tag or
    comment written as an entity (so raw HTML in a record is shown, never rendered); other
    text stays verbatim ('P < 1e-09', '<= total')."""
    text = re.sub(r"<(?=[A-Za-z/!?])", "&lt;", str(text))
    return text.replace("|", "\\|").replace("\n", " ")


def _md_facts(facts: Sequence[Fact]) -> str:
    lines = ["| quantity | value | record key |", "|---|---|---|"]
    for x in facts:
        val = f"`{x.text}`" if x.kind == "digest" and x.text != _DASH else _md(x.text)
        lines.append(f"| {_md(x.label)} | {val} | `{x.key}` |")
    return "\n".join(lines) + "\n"


def render_markdown(record: Mapping[str, Any], *, figure_prefix: str = "report",
                    with_plan: bool = True) -> tuple[str, dict[str, str]]:
    """The report in Markdown and its figures as standalone SVG files: ``(text, {file name:
    SVG})``; the text references the files by relative name ``{figure_prefix}-{name}.svg``."""
    figs, notes = _figures(record, with_plan=with_plan)
    files = {f"{figure_prefix}-{f.name}.svg": _standalone_svg(f.svg) for f in figs}
    out = [f"# {_md(_title(record))}\n\n", _md(_summary(record)) + "\n\n"]
    sections = dict(_sections(record))
    out.append("## Data\n\n" + _md_facts(sections["data"]) + "\n## Design checks\n\n")
    rows = _design_rows(record)
    if rows is None:
        out.append(f"*Note.* {_NO_DESIGN}\n\n")
    else:
        out.append(f"Significance of every check: "
                   f"{_exact(_num(_get(record, 'design.significance')))}; overall: "
                   f"{'passed' if _get(record, 'design.passed') else 'FAILED'}.\n\n"
                   + ("Checked on the data:\n\n" if _get(record, "design.checked") else "")
                   + "".join(f"- {_md(c)}\n" for c in (_get(record, "design.checked") or []))
                   + "\n| check | statistic | p-value | significance | result | method |\n"
                   "|---|---|---|---|---|---|\n")
        for r in rows:
            out.append(f"| `{r['name']}` | {r['statistic']} | {r['p_value']} | "
                       f"{r['threshold']} | {r['result']} | {_md(r['reference'])} |\n")
        out.append("\n")
    out.append("## Bell estimate\n\n" + _md_facts(sections["estimate"])
               + "\n## Acceptance test\n\n")
    acc = _acceptance(record)
    if acc is None:
        out.append("The record names no acceptance statistic.\n\n")
    else:
        verdict = {True: "passed", False: "FAILED", None: _DASH}[acc.passed]
        out.append(f"Accept iff the {acc.name} {acc.relation} the limit fixed in the protocol "
                   f"before the data were taken. Result: **{verdict}**.\n\n"
                   + _md_facts([acc.statistic, acc.limit]) + "\n")
    out.append("## Entropy: single-round and finite-size\n\n" + _md_facts(sections["entropy"]))
    refs = bibtex_entries(_references(record))
    if refs:
        out.append("\n### References\n\n" + "".join(f"{i}. {_md(r)}\n" for i, (r, _) in
                                                   enumerate(refs, start=1)))
        out.append("\nBibTeX (records cite no titles; add them):\n\n```bibtex\n"
                   + "\n\n".join(b for _, b in refs) + "\n```\n")
    out.append("\n## Error budget\n\n")
    terms, total, form = _eps_facts(record)
    if total is None and not terms:
        out.append("The record holds no error budget.\n")
    else:
        out.append("| term | value (in full) | what it bounds | record key |\n|---|---|---|---|\n")
        for x, m in terms:
            out.append(f"| `{x.label}` | {x.text} | {_md(m)} | `{x.key}` |\n")
        if total is not None:
            out.append(f"| **total soundness error** | **{total.text}** | "
                       "the whole protocol (meaning below) | "
                       "`eps.total` |\n")
        if form:
            out.append(f"\nMeaning of the total: {_md(form)}.\n")
    out.append("\n## Output and seed use\n\n" + _md_facts(sections["output"]))
    out.append("\n## Figures\n\n")
    for i, fig in enumerate(figs, start=1):
        out.append(f"![Figure {i}. {_md(fig.title)}]({figure_prefix}-{fig.name}.svg)\n\n"
                   f"*Figure {i}. {_md(fig.title)}.* {_md(fig.caption)}\n\n")
    for n in notes:
        out.append(f"*Note.* {_md(n)}\n\n")
    out.append("## Assumptions\n\n")
    groups = _assumption_groups(record)
    for t, items in groups:
        out.append(f"### {t}\n\n" + "".join(f"- {_md(a)}\n" for a in items) + "\n")
    if not groups:
        out.append("The record lists no assumptions.\n\n")
    caution = _str(record.get("caution"))
    if caution:
        out.append(f"> **Caution.** {_md(caution)}\n\n")
    out.append("Generated by dicert from the record alone; re-check the record itself with "
               "`dicert verify` and a trusted key.\n")
    return "".join(out), files


# --------------------------------------------------------------------------- I/O


def report_format(out: str | os.PathLike[str], fmt: str | None) -> str:
    """The output format from ``--format`` and the file extension (checked before any work)."""
    suffix = Path(out).suffix.lower()
    by_ext = next((k for k, exts in FORMATS.items() if suffix in exts), None)
    if fmt is not None:
        if fmt not in FORMATS:
            raise ReportError(f"--format: unsupported format {fmt!r}; use one of "
                              + ", ".join(FORMATS))
        if by_ext is not None and by_ext != fmt:
            raise ReportError(f"{out}: extension {suffix!r} does not match --format {fmt}")
        if by_ext is None:
            raise ReportError(f"{out}: unsupported extension {suffix or '(none)'!r} for --format "
                              f"{fmt}; use " + ", ".join(FORMATS[fmt]))
        return fmt
    if by_ext is None:
        raise ReportError(f"{out}: unsupported extension {suffix or '(none)'!r}; use .html or "
                          ".md (or --format html|md)")
    return by_ext


def _load_record(path: str | os.PathLike[str]) -> dict[str, Any]:
    from dicert._io import read_user_file

    data = read_user_file(path, "record file", ReportError, max_bytes=1 << 30)
    try:
        record = json.loads(data.decode("utf-8"))
    except UnicodeDecodeError:
        raise ReportError(f"{path}: not UTF-8 text; expected a dicert record (JSON)") from None
    except json.JSONDecodeError as exc:
        raise ReportError(f"{path}, line {exc.lineno} column {exc.colno}: not valid JSON "
                          f"({exc.msg}); expected a dicert record") from None
    if not isinstance(record, dict):
        raise ReportError(f"{path}: top level is not a JSON object; expected a dicert record")
    fmt = record.get("format")
    if not (isinstance(fmt, str) and fmt.startswith("dicert-record/")):
        raise ReportError(f"{path}: key 'format' is {fmt!r}, expected 'dicert-record/N'; not a "
                          "dicert record")
    if record.get("kind", "certification") != "certification":
        raise ReportError(f"{path}: key 'kind' is {record.get('kind')!r}; only certification "
                          "records have a report")
    for key in ("status", "log", "eps"):
        if key not in record:
            raise ReportError(f"{path}: key {key!r} missing; not a certification record")
    return record


def write_report(record: str | os.PathLike[str], out: str | os.PathLike[str], *,
                 fmt: str | None = None, with_plan: bool = True) -> ReportResult:
    """Render the report of a record file into ``out`` (HTML or Markdown; Markdown figures
    as SVG files next to it, ``<stem>-<figure>.svg``), written as one unit (temporary
    siblings, then renames).

    Raises :class:`ReportError` (exit code 2) for an unsupported format or extension (before
    the record is read) and for a file that is not a certification record.
    """
    import contextlib

    from dicert._io import make_parent, output_errors, write_temp_sibling

    kind = report_format(out, fmt)
    rec = _load_record(record)
    out_path = Path(out)
    figures: list[str] = []
    outputs: list[tuple[Path, bytes]] = []
    if kind == "html":
        outputs.append((out_path, render_html(rec, with_plan=with_plan).encode("utf-8")))
    else:
        text, files = render_markdown(rec, figure_prefix=out_path.stem, with_plan=with_plan)
        for name, svg in files.items():
            outputs.append((out_path.with_name(name), svg.encode("utf-8")))
            figures.append(str(out_path.with_name(name)))
        outputs.append((out_path, text.encode("utf-8")))
    # The files appear together: every temporary sibling first, then the renames (the report
    # last), so a full disk leaves earlier files as they were and no temporary file behind.
    make_parent(out_path)
    temps: list[tuple[Path, Path]] = []
    try:
        for target, data in outputs:
            temps.append((write_temp_sibling(target, data), target))
        for tmp, target in temps:
            with output_errors(target, tmp):
                os.replace(tmp, target)
    except BaseException:
        for tmp, _ in temps:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
        raise
    written = [str(t) for t, _ in outputs]
    out_bits = _get(rec, "extractor.output_bits")
    trials = _get(rec, "log.trials")
    return ReportResult(
        record=str(record), out=str(out_path), format=kind, files=tuple(written),
        figures=tuple(figures), status=_str(rec.get("status")),
        trials=trials if isinstance(trials, int) else None,
        chsh_lower=_num(_get(rec, "estimate.chsh_lower")),
        min_entropy_bits=_num(rec.get("certified_min_entropy_bits")),
        output_bits=out_bits if isinstance(out_bits, int) else None,
        eps_total=_num(_get(rec, "eps.total")), record_sha256=_str(rec.get("record_sha256")))
