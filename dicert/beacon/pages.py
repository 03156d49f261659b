"""Pure rendering of a beacon site: pulse summaries, HTML pages and inline SVG plots.

Everything here takes parsed records and returns strings; :mod:`dicert.beacon.build` does the
file work. Pages are deterministic functions of the records (no clock, no paths of the build
machine), escape every value taken from a record, and reference only files inside the site.
Numbers a reader needs exactly (digests, bit counts) are written in full; long values wrap
instead of being cut.
"""

from __future__ import annotations

import dataclasses
import html
import json
import math
from collections.abc import Mapping, Sequence
from typing import Any

from dicert._docview import (  # shared with the report
    _DASH,
    CHSH_QUANTUM_BOUND,
    _c,
    _down,
    _e,
    _exact,
    _fmt,
    _fmt_axis,
    _get,
    _int,
    _nice_ticks,
    _num,
    _str,
)

__all__ = [
    "BlockSeries",
    "PulseView",
    "SiteInfo",
    "block_series",
    "pulse_page_name",
    "pulse_view",
    "render_index",
    "render_pulse_page",
    "svg_block_plot",
]

#: Content-Security-Policy of every page: nothing may be loaded from outside the site.
CSP = ("default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; "
       "connect-src 'self'; base-uri 'none'; form-action 'none'")

#: Reference lines of a CHSH plot: the local bound and Tsirelson's bound (common practice).
CHSH_LOCAL_BOUND = 2.0


def pulse_page_name(index: int) -> str:
    """File name of the page of pulse ``index`` (inside ``pulses/``)."""
    return f"pulse-{index:06d}.html"










@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PulseView:
    """What the pages show about one pulse (values taken from its record; None if absent)."""

    index: int
    record_file: str  # relative to the site root
    page_file: str  # relative to the site root
    record_sha256: str
    previous_record_sha256: str | None
    file_sha256: str
    file_bytes: int
    status: str | None
    time: str | None
    trials: int | None
    output_bits: int | None
    chsh_estimate: float | None
    chsh_lower_bound: float | None
    certified_min_entropy_bits: float | None
    soundness_error: float | None
    output_sha256: str | None
    key_fingerprint: str | None
    protocol_name: str | None
    method: str | None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SiteInfo:
    """Chain-wide facts shown on every page."""

    title: str
    pulses: int
    head_index: int
    head_sha256: str
    key_fingerprint: str | None  # of the published operator key; None if none published
    key_file: str | None  # relative to the site root
    build_notes: tuple[str, ...]  # what the build checked (from the chain inspection)
    caution: str


def _today(record: Mapping[str, Any]) -> dict:
    """A record of any format under today's member names (dicert-record/4)."""
    from dicert.stages.record_compat import upgrade_body

    return upgrade_body(record)


def pulse_view(record: Mapping[str, Any], *, index: int, record_file: str, page_file: str,
               record_sha256: str, file_sha256: str, file_bytes: int) -> PulseView:
    """Summarise a record for the pages (tolerant: a missing member shows as a dash; records
    of earlier formats are read under today's names, :mod:`dicert.stages.record_compat`)."""
    record = _today(record)
    ts = _get(record, "volatile.timestamps")
    time = None
    if isinstance(ts, Mapping):
        time = _str(ts.get("finished")) or _str(ts.get("started"))
    chsh_lower = _num(_get(record, "estimate.chsh_lower_bound"))
    return PulseView(
        index=index, record_file=record_file, page_file=page_file,
        record_sha256=record_sha256,
        previous_record_sha256=_str(record.get("previous_record_sha256")),
        file_sha256=file_sha256, file_bytes=file_bytes,
        status=_str(record.get("status")), time=time,
        trials=_int(_get(record, "log.trials")) if _int(_get(record, "log.trials")) is not None
        else _int(_get(record, "estimate.trials")),
        output_bits=_int(_get(record, "extractor.output_bits")),
        chsh_estimate=_num(_get(record, "estimate.chsh_estimate")), chsh_lower_bound=chsh_lower,
        certified_min_entropy_bits=_num(record.get("certified_min_entropy_bits")),
        soundness_error=_num(record.get("soundness_error")),
        output_sha256=_str(_get(record, "extractor.output_sha256")),
        key_fingerprint=_str(_get(record, "signature.key_fingerprint")),
        protocol_name=_str(_get(record, "protocol.name")),
        method=_str(_get(record, "entropy.finite_size.method")),
    )


# --------------------------------------------------------------------------- block data


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class BlockSeries:
    """One per-block quantity found in a record, ready to plot.

    ``kind`` is ``chsh`` (CHSH estimate per block, optional interval) or ``pef-score`` (each
    block's share of log2 T of a probability-estimation run).
    """

    kind: str
    path: str  # where in the record (dotted)
    label: str
    first_trials: tuple[int | None, ...]
    values: tuple[float | None, ...]
    lower: tuple[float | None, ...] | None
    upper: tuple[float | None, ...] | None


def _walk_block_lists(obj: Any, path: str, out: list[tuple[str, list]]) -> None:
    if isinstance(obj, Mapping):
        for key in sorted(obj):
            value = obj[key]
            sub = f"{path}.{key}" if path else str(key)
            if (key in ("blocks", "per_block") and isinstance(value, list) and value
                    and all(isinstance(v, Mapping) for v in value)):
                out.append((sub, value))
            else:
                _walk_block_lists(value, sub, out)


def _score(value: Any) -> float | None:
    if value == "-inf":
        return -math.inf
    return _num(value)


def block_series(record: Mapping[str, Any]) -> list[BlockSeries]:
    """Every per-block series the record holds (lists named ``blocks``/``per_block`` whose
    entries carry ``chsh_estimate`` or ``log2_t_block``), in a fixed order; the record is
    read under today's names (:func:`dicert.stages.record_compat.upgrade_body`)."""
    found: list[tuple[str, list]] = []
    _walk_block_lists(record, "", found)
    series: list[BlockSeries] = []
    for path, blocks in found:
        firsts = tuple(_int(b.get("first_trial")) for b in blocks)
        if any(_num(b.get("chsh_estimate")) is not None for b in blocks):
            lo = tuple(_num(b.get("chsh_lower_bound")) for b in blocks)
            hi = tuple(_num(b.get("chsh_upper_bound")) for b in blocks)
            series.append(BlockSeries(
                kind="chsh", path=path, label="CHSH estimate per block",
                first_trials=firsts, values=tuple(_num(b.get("chsh_estimate")) for b in blocks),
                lower=lo if any(v is not None for v in lo) else None,
                upper=hi if any(v is not None for v in hi) else None))
        elif any("log2_t_block" in b for b in blocks):
            series.append(BlockSeries(
                kind="pef-score", path=path,
                label="score per block (log2 of the product of probability estimation factors)",
                first_trials=firsts, values=tuple(_score(b.get("log2_t_block")) for b in blocks),
                lower=None, upper=None))
    return series








# long: one SVG document assembled element by element (axes, ticks, reference lines, points,
# intervals); splitting it would only pass the scale around.
def svg_block_plot(series: BlockSeries, *, threshold: float | None = None,
                   width: int = 720, height: int = 260) -> str:
    """An inline SVG plot of a per-block series (no scripts, no external references).

    CHSH series get reference lines at the local bound 2, at Tsirelson's bound 2 sqrt 2
    (B. S. Cirel'son, Lett. Math. Phys. 4, 93 (1980)) and at the protocol's threshold if
    given; intervals are drawn as vertical bars. Minus-infinity scores are drawn at the bottom
    edge and marked. Deterministic: the same series gives the same bytes.
    """
    n = len(series.values)
    left, right, top, bottom = 64.0, 16.0, 16.0, 40.0
    pw, ph = width - left - right, height - top - bottom
    finite = [v for v in series.values if v is not None and math.isfinite(v)]
    for band in (series.lower, series.upper):
        if band:
            finite.extend(v for v in band if v is not None and math.isfinite(v))
    refs: list[tuple[float, str, str]] = []
    if series.kind == "chsh":
        refs.append((CHSH_LOCAL_BOUND, "local bound 2", "ref-local"))
        refs.append((CHSH_QUANTUM_BOUND, "2\u221a2", "ref-quantum"))
        if threshold is not None:
            refs.append((threshold, f"threshold {_fmt_axis(threshold)}", "ref-threshold"))
    else:
        refs.append((0.0, "0", "ref-local"))
    lo = min(finite + [r[0] for r in refs]) if finite else 0.0
    hi = max(finite + [r[0] for r in refs]) if finite else 1.0
    if hi - lo < 1e-9:
        lo, hi = lo - 0.5, hi + 0.5
    pad = 0.05 * (hi - lo)
    lo, hi = lo - pad, hi + pad

    def sx(i: int) -> float:
        return left + (pw * (i + 0.5) / n if n else pw / 2)

    def sy(v: float) -> float:
        if v == -math.inf:
            return top + ph
        return top + ph * (hi - v) / (hi - lo)

    title = html.escape(series.label)
    parts = [
        f'<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 {width} {height}" '
        f'role="img" aria-label="{title}">',
        f"<title>{title}</title>",
        f'<rect class="frame" x="{_c(left)}" y="{_c(top)}" width="{_c(pw)}" height="{_c(ph)}"/>',
    ]
    for v in _nice_ticks(lo, hi):
        y = sy(v)
        parts.append(f'<line class="grid" x1="{_c(left)}" y1="{_c(y)}" x2="{_c(left + pw)}" '
                     f'y2="{_c(y)}"/>')
        parts.append(f'<text class="tick" x="{_c(left - 6)}" y="{_c(y + 4)}" '
                     f'text-anchor="end">{_fmt_axis(v)}</text>')
    for value, label, cls in refs:
        y = sy(value)
        parts.append(f'<line class="{cls}" x1="{_c(left)}" y1="{_c(y)}" x2="{_c(left + pw)}" '
                     f'y2="{_c(y)}"/>')
        parts.append(f'<text class="reflabel" x="{_c(left + pw - 4)}" y="{_c(y - 4)}" '
                     f'text-anchor="end">{html.escape(label)}</text>')
    for i, v in enumerate(series.values):
        x = sx(i)
        if series.lower and series.upper:
            a, b = series.lower[i], series.upper[i]
            if a is not None and b is not None:
                parts.append(f'<line class="bar" x1="{_c(x)}" y1="{_c(sy(a))}" x2="{_c(x)}" '
                             f'y2="{_c(sy(b))}"/>')
        if v is None:
            continue
        first = series.first_trials[i]
        tip = f"block {i}" + (f", first trial {first}" if first is not None else "")
        tip += f": {_fmt_axis(v) if math.isfinite(v) else '-infinity'}"
        cls = "point" if math.isfinite(v) else "point minus-inf"
        parts.append(f'<circle class="{cls}" cx="{_c(x)}" cy="{_c(sy(v))}" r="3">'
                     f"<title>{html.escape(tip)}</title></circle>")
    # x axis: block numbers at a few positions
    if n:
        ticks = sorted({0, n - 1, *(round((n - 1) * k / 4) for k in range(1, 4))})
        for i in ticks:
            parts.append(f'<text class="tick" x="{_c(sx(i))}" y="{_c(top + ph + 16)}" '
                         f'text-anchor="middle">{i}</text>')
    parts.append(f'<text class="axis" x="{_c(left + pw / 2)}" y="{_c(height - 6)}" '
                 f'text-anchor="middle">block</text>')
    parts.append("</svg>")
    return "\n".join(parts)


# --------------------------------------------------------------------------- HTML












def _code(value: str | None) -> str:
    if value is None:
        return _DASH
    return f'<code class="digest">{_e(value)}</code>'


def _head(title: str, root: str) -> str:
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f'<meta http-equiv="Content-Security-Policy" content="{CSP}">\n'
        '<meta name="referrer" content="no-referrer">\n'
        f"<title>{_e(title)}</title>\n"
        f'<link rel="icon" href="{root}/assets/icon.svg">\n'
        f'<link rel="stylesheet" href="{root}/assets/style.css">\n'
        f'<script src="{root}/assets/check.js" defer></script>\n'
        "</head>\n"
    )


def _check_panel(info: SiteInfo, *, scope: str) -> str:
    key = (f"the operator's Ed25519 key, fingerprint {_code(info.key_fingerprint)} "
           "(compare it with the fingerprint the operator publishes elsewhere)"
           if info.key_fingerprint else
           "no operator key was published with this site, so signatures cannot be checked here")
    return f"""<section id="check" class="check" data-state="pending">
<h2>Check {scope} in your browser</h2>
<p id="chain-result" class="result" data-state="pending">Not checked yet: the check needs
JavaScript and a page served over HTTP(S).</p>
<ul id="check-details"></ul>
<p class="small">The script in this folder fetches every pulse record, computes the SHA-256 of
its canonical body (RFC 8785) and compares it with the record's own digest, with the next
pulse's <code>previous_record_sha256</code>, with <code>manifest.json</code> and with the head
digest above; it checks Ed25519 signatures with the browser's WebCrypto against {key}.
These checks are a convenience. The authoritative check is
<code>dicert verify --chain chain/ --pubkey KEY</code> on a copy of this folder, with a key
you trust.</p>
<form id="compare" class="compare">
<label>Compare with a head digest you obtained elsewhere:
<input id="expected-head" name="head" size="70" autocomplete="off" spellcheck="false"></label>
<button type="submit">Compare</button>
<span id="compare-result" data-state="none"></span>
</form>
</section>
"""


def _chain_facts(info: SiteInfo, root: str) -> str:
    key = (f'{_code(info.key_fingerprint)} (<a href="{root}/{_e(info.key_file)}">public key</a>)'
           if info.key_fingerprint and info.key_file else "none published")
    notes = "".join(f"<li>{_e(n)}</li>" for n in info.build_notes)
    return f"""<dl class="facts">
<dt>Pulses</dt><dd>{info.pulses}</dd>
<dt>Head (pulse {info.head_index})</dt><dd><code id="head-digest" class="digest">{_e(info.head_sha256)}</code></dd>
<dt>Operator key fingerprint</dt><dd>{key}</dd>
<dt>Machine-readable</dt><dd><a href="{root}/manifest.json">manifest.json</a> (the chain),
<a href="{root}/chain/">chain/</a> (every pulse record, exact bytes)</dd>
</dl>
<details class="build-notes"><summary>Checked when this site was built</summary>
<ul>{notes}</ul></details>
"""


def _caution(info: SiteInfo) -> str:
    return (f'<p class="caution"><strong>Caution.</strong> {_e(info.caution)}</p>\n')


def render_index(info: SiteInfo, pulses: Sequence[PulseView]) -> str:
    """The site's ``index.html``: the chain facts, the check panel and the table of pulses."""
    rows = []
    for p in pulses:
        chsh = _fmt(p.chsh_estimate)
        if p.chsh_lower_bound is not None:
            chsh += f'<br><span class="small">lower bound {_down(p.chsh_lower_bound, 5)}</span>'
        rows.append(
            f'<tr id="pulse-{p.index}" data-index="{p.index}" '
            f'data-record-sha256="{_e(p.record_sha256)}">\n'
            f'<td><a href="{_e(p.page_file)}">{p.index}</a></td>\n'
            f'<td class="time">{_e(p.time) if p.time else _DASH}</td>\n'
            f'<td class="status status-{_e(p.status or "unknown")}">{_e(p.status or _DASH)}</td>\n'
            f'<td class="num">{_fmt(p.output_bits)}</td>\n'
            f'<td class="num">{chsh}</td>\n'
            f'<td class="num">{_down(p.certified_min_entropy_bits, 1)}</td>\n'
            f"<td>record {_code(p.record_sha256)}<br>previous {_code(p.previous_record_sha256)}"
            f"<br>output {_code(p.output_sha256)}</td>\n"
            f'<td class="check-cell" data-state="pending" data-result-for="{p.index}">'
            "not checked</td>\n"
            f'<td><a href="{_e(p.record_file)}">JSON</a></td>\n</tr>'
        )
    table = "\n".join(rows)
    return (
        _head(info.title, ".")
        + f'<body data-root="." data-page="index">\n<header>\n<h1>{_e(info.title)}</h1>\n'
        + "<p>Every pulse of this randomness beacon: certified random bits with a signed, "
          "hash-chained audit record.</p>\n</header>\n<main>\n"
        + _chain_facts(info, ".")
        + _check_panel(info, scope="the whole chain")
        + '<h2>Pulses</h2>\n<div class="table-wrap">\n<table id="pulses">\n<thead><tr>'
          "<th>pulse</th><th>time (UTC)</th><th>status</th><th>output bits</th>"
          "<th>CHSH estimate</th><th>certified min-entropy (bits)</th><th>digests (SHA-256)</th>"
          "<th>browser check</th><th>record</th></tr></thead>\n<tbody>\n"
        + table
        + "\n</tbody>\n</table>\n</div>\n"
        + _caution(info)
        + "</main>\n</body>\n</html>\n"
    )


def _dl(rows: Sequence[tuple[str, str]]) -> str:
    return ('<dl class="facts">\n'
            + "\n".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in rows)
            + "\n</dl>\n")


def _eps_table(record: Mapping[str, Any]) -> str:
    """The error budget term by term, numbers in full (as recorded, never rounded); the
    record under today's names (:func:`dicert.stages.record_compat.upgrade_body`)."""
    budget = record.get("error_budget")
    if not isinstance(budget, Mapping):
        return "<p>The record holds no error budget.</p>\n"
    rows = []
    terms = budget.get("terms")
    for term in terms if isinstance(terms, list) else []:
        if isinstance(term, Mapping):
            rows.append(f"<tr><td><code>{_e(_str(term.get('name')) or _DASH)}</code></td>"
                        f'<td class="num">{_exact(term.get("value"))}</td>'
                        f"<td>{_e(_str(term.get('meaning')) or '')}</td></tr>")
    rows.append('<tr class="total"><td>soundness error</td>'
                f'<td class="num">{_exact(record.get("soundness_error"))}</td>'
                "<td>the sum of the terms</td></tr>")
    other = [(k, budget[k]) for k in sorted(budget) if k not in ("terms", "total", "meaning")]
    form = _str(budget.get("meaning"))
    extra = ""
    if other:
        extra = ("<p>Other members of the record's error budget:</p>\n"
                 + _dl([(k, _e(json.dumps(v, sort_keys=True))) for k, v in other]))
    return ('<table class="eps"><thead><tr><th>term</th><th>value</th><th>meaning</th></tr>'
            "</thead>\n<tbody>" + "\n".join(rows) + "</tbody></table>\n"
            + (f'<p class="small">Meaning of the total: {_e(form)}</p>\n' if form else "")
            + extra)


def _assumptions(record: Mapping[str, Any]) -> str:
    groups = []
    seen: set[str] = set()
    for path, title in (("assumptions", "Assumptions of the certificate"),
                        ("entropy.finite_size.assumptions",
                         "Further assumptions of the finite-size method")):
        items = _get(record, path)
        if isinstance(items, list):
            items = [x for x in items if str(x) not in seen]
            seen.update(str(x) for x in items)
        if isinstance(items, list) and items:
            lis = "".join(f"<li>{_e(x)}</li>" for x in items)
            groups.append(f"<h3>{_e(title)}</h3>\n<ul>{lis}</ul>\n")
    return "".join(groups) or "<p>The record lists no assumptions.</p>\n"


def _checks(record: Mapping[str, Any]) -> str:
    """Tables of the statistical checks a record carries (design conformance, output screens)."""
    out = []
    for path, title in (("design.checks", "Design-conformance checks"),
                        ("output_screens.tests", "Screens of the output bits")):
        items = _get(record, path)
        if not isinstance(items, list) or not items:
            continue
        rows = []
        for c in items:
            if not isinstance(c, Mapping):
                continue
            passed = c.get("passed")
            verdict = ("passed" if passed is True else "FAILED" if passed is False else _DASH)
            if c.get("applicable") is False:
                verdict = "not applicable"
            rows.append(
                f"<tr><td><code>{_e(c.get('name', _DASH))}</code></td>"
                f'<td class="num">{_e(_fmt(_num(c.get("statistic"))))}</td>'
                f'<td class="num">{_e(_fmt(_num(c.get("p_value"))))}</td>'
                f'<td class="num">{_e(_fmt(_num(c.get("threshold"))))}</td>'
                f"<td>{_e(verdict)}</td></tr>")
        out.append(f"<h3>{_e(title)}</h3>\n<table class=\"checks\"><thead><tr><th>check</th>"
                   "<th>statistic</th><th>p-value</th><th>threshold</th><th>result</th></tr>"
                   "</thead>\n<tbody>" + "\n".join(rows) + "</tbody></table>\n")
    return "".join(out)


def render_pulse_page(info: SiteInfo, pulse: PulseView, record: Mapping[str, Any], *,
                      previous: PulseView | None, following: PulseView | None) -> str:
    """The page of one pulse (``pulses/pulse-NNNNNN.html``)."""
    as_written, record = record, _today(record)  # numbers under today's names
    root = ".."
    est = record.get("estimate") if isinstance(record.get("estimate"), Mapping) else {}
    fin = _get(record, "entropy.finite_size") or {}
    details = fin.get("details") if isinstance(fin, Mapping) else None
    threshold = _num(details.get("chsh_threshold")) if isinstance(details, Mapping) else None
    numbers = [
        ("status", _e(pulse.status or _DASH)),
        ("abort reason", _e(_str(record.get("abort_reason")) or _DASH)),
        ("time (UTC)", _e(pulse.time or _DASH)),
        ("trials", _fmt(pulse.trials)),
        ("CHSH estimate", _fmt(pulse.chsh_estimate)),
        ("its standard error", _fmt(_num(est.get("chsh_stderr")))),
        ("CHSH lower bound (rounded down)", _down(pulse.chsh_lower_bound, 6)),
        ("acceptance threshold (declared in the protocol)", _exact(threshold)),
        ("CHSH-game win probability", _fmt(_num(est.get("win_probability")))),
        ("log10 p-value of local realism", _fmt(_num(est.get("log10_p_value_local")))),
        ("finite-size method", _e(pulse.method or _DASH)),
        ("side information", _e(_str(fin.get("side_information") if isinstance(fin, Mapping)
                                      else None) or _DASH)),
        ("certified min-entropy (bits, rounded down)",
         _down(pulse.certified_min_entropy_bits, 3)),
        ("output bits", _fmt(pulse.output_bits)),
        ("soundness error", _exact(pulse.soundness_error)),
        ("protocol", _e(pulse.protocol_name or _DASH) + " "
         + _code(_str(_get(record, "protocol.sha256")))),
    ]
    digests = [
        ("record (SHA-256 of the canonical body)", _code(pulse.record_sha256)),
        ("previous record", _code(pulse.previous_record_sha256)),
        ("record file bytes", _code(pulse.file_sha256)),
        ("output bits", _code(pulse.output_sha256)),
        ("raw bits", _code(_str(_get(record, "extractor.raw_sha256")))),
        ("trial log", _code(_str(_get(record, "log.sha256")))),
        ("extractor seed", _code(_str(_get(record, "extractor.seed_sha256")))),
        ("signing key fingerprint", _code(pulse.key_fingerprint)),
        ("signature (Ed25519)", _code(_str(_get(record, "signature.value")))),
    ]
    plots = []
    for s in block_series(record):
        plots.append(f"<h3>{_e(s.label)}</h3>\n<p class=\"small\">From <code>{_e(s.path)}</code>, "
                     f"{len(s.values)} blocks.</p>\n<figure>\n"
                     + svg_block_plot(s, threshold=threshold if s.kind == "chsh" else None)
                     + "\n</figure>\n")
    plot_html = "".join(plots) or (
        "<p>This record holds no per-block data, so there is no block-by-block plot.</p>\n")
    nav = []
    if previous is not None:
        nav.append(f'<a href="{_e(pulse_page_name(previous.index))}">&larr; pulse '
                   f"{previous.index}</a>")
    nav.append(f'<a href="{root}/index.html">all pulses</a>')
    if following is not None:
        nav.append(f'<a href="{_e(pulse_page_name(following.index))}">pulse '
                   f"{following.index} &rarr;</a>")
    full = json.dumps(as_written, indent=2, sort_keys=True, ensure_ascii=False, allow_nan=False)
    return (
        _head(f"{info.title}: pulse {pulse.index}", root)
        + f'<body data-root="{root}" data-page="pulse" data-pulse="{pulse.index}">\n'
        + f'<header>\n<nav>{" | ".join(nav)}</nav>\n'
        + f"<h1>{_e(info.title)}: pulse {pulse.index}</h1>\n</header>\n<main>\n"
        + f'<p id="pulse-result" class="result" data-state="pending">Pulse {pulse.index}: not '
          "checked yet.</p>\n"
        + "<h2>Numbers</h2>\n" + _dl(numbers)
        + "<h2>Error budget</h2>\n" + _eps_table(record)
        + "<h2>Block by block</h2>\n" + plot_html
        + ("<h2>Recorded checks</h2>\n" + checks if (checks := _checks(record)) else "")
        + "<h2>Assumptions</h2>\n" + _assumptions(record)
        + "<h2>Digests</h2>\n" + _dl(digests)
        + f'<p><a href="{root}/{_e(pulse.record_file)}">The record as published (JSON, exact '
          "bytes)</a></p>\n"
        + _chain_facts(info, root)
        + _check_panel(info, scope="this pulse and its chain")
        + "<details><summary>The whole record</summary>\n"
        + f'<pre class="record">{_e(full)}</pre>\n</details>\n'
        + _caution(info)
        + "</main>\n</body>\n</html>\n"
    )
