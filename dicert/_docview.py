"""Values of an audit record as documents show them: the beacon site's pages
(:mod:`dicert.beacon.pages`) and the certification report (:mod:`dicert.reporting`).

Record access that never raises (a missing or mistyped member is None), and the number forms
of a document: grouped with narrow no-break spaces, rounded DOWN for bounds and certified bits
(:func:`_down`), written in full where a reader re-checks it (:func:`_exact`); plus the small
helpers of the inline SVG plots (coordinates with fixed decimals, tick values). Stdlib only.
"""

from __future__ import annotations

import html
import math
from collections.abc import Mapping
from typing import Any

#: Tsirelson's bound 2 sqrt 2 (Cirel'son 1980): the largest quantum CHSH value.
CHSH_QUANTUM_BOUND = 2.0 * math.sqrt(2.0)
_DASH = "\u2014"


def _get(record: Any, path: str) -> Any:
    cur = record
    for part in path.split("."):
        if not isinstance(cur, Mapping) or part not in cur:
            return None
        cur = cur[part]
    return cur


def _num(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    return float(value) if math.isfinite(value) else None


def _int(value: Any) -> int | None:
    if isinstance(value, bool) or not isinstance(value, int):
        return None
    return value


def _str(value: Any) -> str | None:
    return value if isinstance(value, str) else None


def _fmt_axis(v: float) -> str:
    text = f"{v:.4g}"
    return "0" if text == "-0" else text


def _c(v: float) -> str:
    """A coordinate, written with a fixed number of decimals (deterministic bytes)."""
    text = f"{v:.2f}"
    return "0.00" if text == "-0.00" else text


def _nice_ticks(lo: float, hi: float, target: int = 6) -> list[float]:
    """Tick values at 1, 2, 2.5 or 5 times a power of ten inside [lo, hi] (common practice)."""
    raw = (hi - lo) / max(target - 1, 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 2.5, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step)
    ticks = []
    k = first
    while k * step <= hi + 1e-12 * step:
        ticks.append(round(k * step, 12))
        k += 1
    return ticks


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _fmt(value: Any, digits: int = 6) -> str:
    if value is None:
        return _DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}".replace(",", "\u202f")  # narrow no-break space groups digits
    if isinstance(value, float):
        if 1e3 <= abs(value) < 1e15:
            return f"{value:,.1f}".replace(",", "\u202f")
        if value == 0 or 1e-4 <= abs(value) < 1e3:
            return f"{value:.{digits}g}"
        return f"{value:.4e}"
    return str(value)


def _group(text: str) -> str:
    head, dot, tail = text.partition(".")
    sign = "-" if head.startswith("-") else ""
    digits = head.lstrip("-")
    groups = []
    while len(digits) > 3:
        groups.insert(0, digits[-3:])
        digits = digits[:-3]
    groups.insert(0, digits)
    return sign + "\u202f".join(groups) + dot + tail


def _down(value: float | None, decimals: int) -> str:
    """A bound written rounded DOWN (never optimistic), e.g. a lower bound or certified bits."""
    if value is None:
        return _DASH
    from decimal import ROUND_FLOOR, Decimal

    q = Decimal(value).quantize(Decimal(1).scaleb(-decimals), rounding=ROUND_FLOOR)
    return _group(f"{q:f}")


def _exact(value: Any) -> str:
    """A number written in full (shortest round-trip form, as in the record)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return _DASH if value is None else _e(value)
    if isinstance(value, int):
        return str(value)
    return repr(value) if math.isfinite(value) else _e(value)


__all__ = ["CHSH_QUANTUM_BOUND", "_c", "_down", "_e", "_exact", "_fmt", "_fmt_axis", "_get",
           "_group", "_int", "_nice_ticks", "_num", "_str"]
