"""Report rendering: one self-contained HTML page, or Markdown with SVG figure files."""

from __future__ import annotations

import base64
import hashlib
import html
import re
from collections.abc import Mapping, Sequence
from typing import Any

from dicert._docview import _exact, _get, _num, _str
from dicert.reporting.content import (
    _DASH,
    Fact,
    _acceptance,
    _assumption_groups,
    _design_rows,
    _eps_facts,
    _references,
    _sections,
    _summary,
    bibtex_entries,
)
from dicert.reporting.figures import _Figure, _figures

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
    from dicert.stages.record_compat import upgrade_body

    record = upgrade_body(record)  # records /1 and /2 under today's names
    figs, notes = _figures(record, with_plan=with_plan)
    return _render_html(record, figs, notes)


def _csp(css: str) -> str:
    digest = base64.b64encode(hashlib.sha256(css.encode("utf-8")).digest()).decode()
    # Only the one inline style sheet (by its hash); no scripts, images, fonts or connections.
    return (f"default-src 'none'; style-src 'sha256-{digest}'; img-src 'none'; "
            "script-src 'none'; base-uri 'none'; form-action 'none'")


def _html_design(record: Mapping[str, Any]) -> str:
    """The design-conformance section (or the note of a record without one)."""
    out: list[str] = []
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
    return "".join(out)


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
    out.append("<h2>Design checks</h2>\n" + _html_design(record))
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
            trs.append(f'<tr class="total"><td>soundness error</td><td class="val num" '
                       f'data-key="soundness_error" data-kind="exact" data-decimals="0">'
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
    from dicert.stages.record_compat import upgrade_body

    record = upgrade_body(record)  # records /1 and /2 under today's names
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
            out.append(f"| **soundness error** | **{total.text}** | "
                       "the whole protocol (meaning below) | "
                       "`soundness_error` |\n")
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


