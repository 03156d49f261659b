"""Report figures as inline SVG: the per-block plot of the beacon site, the acceptance
statistic against its limit, and the planner's certified bits against trials."""

from __future__ import annotations

import dataclasses
import html
import json
import math
from collections.abc import Mapping, Sequence
from typing import Any

from dicert._docview import (
    CHSH_QUANTUM_BOUND,
    _c,
    _fmt,
    _fmt_axis,
    _get,
    _nice_ticks,
    _num,
    _str,
)
from dicert.beacon.pages import block_series, svg_block_plot
from dicert.reporting.content import CHSH_MAX, _acceptance, _Acceptance

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
    from dicert.stages.record_compat import CURRENT_FORMAT

    return protocol_from_dict(tables, str(_get(record, "protocol.name") or "<record>"),
                              legacy_keys=record.get("format") != CURRENT_FORMAT)


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
        from dicert.planning import plan, plan_plot_range

        est_chsh = _num(_get(record, "estimate.chsh_estimate"))
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
    # the region around this run, as `dicert plan --plot` shows it (the sweep runs to 1e14)
    lo, hi = plan_plot_range(result)
    curve = [(x, y) for x, y in zip(row.curve_trials, row.curve_output_bits)
             if lo <= x <= hi]
    label = f"certified output bits against trials, planner row {row.name}"
    caption = (f"Planner (dicert.planning.plan) for this protocol, method {row.name}, honest "
               f"devices at CHSH {result.chsh:.6g} (this run's estimate, kept inside "
               "(2, 2\u221a2)), "
               f"gamma {result.gamma:g}: certified output bits on acceptance against the number "
               f"of trials; at this run's {_fmt(trials)} trials the planner expects "
               f"{_fmt(int(row.output_bits))} bits; the marked point is this run's output "
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
            figs.append(_Figure(name="blocks", title="CHSH estimate per block", caption=cap,
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


