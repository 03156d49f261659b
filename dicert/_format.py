"""One number format per kind, for every table dicert prints (stdlib only).

The rounding direction of each kind is chosen so that a printed number is never more
favourable than the computed one:

- ``error``: errors, p-values (smaller looks better): 3 significant digits, rounded UP;
- ``bits``: entropy, bits, rates (larger looks better): 6 significant digits, rounded DOWN;
- ``bits_short``: the same in a narrow column: whole bits below 1e6, else 3 significant
  digits (2.34e6), rounded DOWN;
- ``chsh``: CHSH point estimates: 4 decimals, to nearest;
- ``lower`` / ``upper``: lower / upper confidence bounds: 4 decimals, rounded DOWN / UP;
- ``count``: counts (trials, test rounds, raw / output / seed bits): integers with thousands
  separators ",";
- ``number``: other values (gamma, a win probability, expected trials): 6 significant
  digits, to nearest, thousands separators;
- ``exact``: a value compared against a limit: shortest round-trip form, in full;
- ``digest``: SHA-256 digests, key fingerprints: in full, never cut;
- ``text``: words as they are; ``flag``: ``yes`` / ``no``.

:func:`fmt` writes one value; :func:`parse` reads a written value back (used by the tests
to check a table against the JSON object and the record).
"""

from __future__ import annotations

import math
from decimal import ROUND_CEILING, ROUND_FLOOR, ROUND_HALF_EVEN, Decimal
from typing import Any

KINDS = ("error", "bits", "bits_short", "chsh", "lower", "upper", "count", "number", "exact",
         "digest", "text", "flag")

#: Written for a missing value (None).
MISSING = "-"

#: Significant digits / decimals per kind.
ERROR_DIGITS = 3
BITS_DIGITS = 6
CHSH_DECIMALS = 4
NUMBER_DIGITS = 6

#: Rounding direction of each numeric kind (what the tests check).
DIRECTION = {"error": "up", "bits": "down", "bits_short": "down", "lower": "down", "upper": "up",
             "chsh": "nearest",
             "number": "nearest", "count": "exact", "exact": "exact"}


def _significant(value: float, digits: int, rounding: str) -> Decimal:
    """``value`` rounded to ``digits`` significant digits in the given direction."""
    d = Decimal(repr(float(value)))
    if d == 0:
        return Decimal(0)
    exp = d.adjusted() - digits + 1  # the exponent of the last kept digit
    q = d.quantize(Decimal(1).scaleb(exp), rounding=rounding)
    if q.adjusted() > d.adjusted():  # 9.995 -> 10.0: one digit more than asked; drop it
        q = q.quantize(Decimal(1).scaleb(exp + 1), rounding=rounding)
    return q


def _plain(q: Decimal, group: bool) -> str:
    """A Decimal in positional or scientific notation (no trailing zeros after the point)."""
    if q == 0:
        return "0"
    adj = q.adjusted()
    if -4 <= adj < 15:
        text = f"{q:f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
        if group:
            sign = "-" if text.startswith("-") else ""
            whole, _, frac = text.lstrip("-").partition(".")
            text = sign + f"{int(whole):,}" + ("." + frac if frac else "")
        return text
    mant = q.scaleb(-adj)
    m = f"{mant:f}"
    if "." in m:
        m = m.rstrip("0").rstrip(".")
    return f"{m}e{adj:+03d}"


def _decimals(value: float, decimals: int, rounding: str) -> str:
    q = Decimal(repr(float(value))).quantize(Decimal(1).scaleb(-decimals), rounding=rounding)
    text = f"{q:f}"
    return "0." + "0" * decimals if text.lstrip("-") == "0." + "0" * decimals else text


def fmt(value: Any, kind: str) -> str:
    """``value`` written in the format of ``kind`` (see the module docstring)."""
    if kind not in KINDS:
        raise ValueError(f"unknown number kind {kind!r}")
    if value is None:
        return MISSING
    if kind in ("digest", "text"):
        return str(value)
    if kind == "flag":
        return "yes" if value else "no"
    if hasattr(value, "item") and getattr(value, "ndim", None) == 0:  # a numpy scalar
        value = value.item()
    if isinstance(value, bool):
        return "yes" if value else "no"
    if not isinstance(value, (int, float)):
        return str(value)
    if kind == "count":
        if isinstance(value, float) and not value.is_integer():
            raise ValueError(f"a count must be a whole number, got {value!r}")
        return f"{int(value):,}"
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    if kind == "exact":
        return repr(value) if isinstance(value, float) else str(value)
    if kind == "error":
        return _plain(_significant(value, ERROR_DIGITS, ROUND_CEILING), group=False)
    if kind == "bits":
        return _plain(_significant(value, BITS_DIGITS, ROUND_FLOOR), group=True)
    if kind == "bits_short":
        if abs(value) < 10**6:
            return str(math.floor(value))
        q = _significant(value, 3, ROUND_FLOOR)
        adj = q.adjusted()
        m = f"{q.scaleb(-adj):f}"
        return (m.rstrip("0").rstrip(".") if "." in m else m) + f"e{adj}"
    if kind == "number":
        return _plain(_significant(value, NUMBER_DIGITS, ROUND_HALF_EVEN), group=True)
    rounding = {"chsh": ROUND_HALF_EVEN, "lower": ROUND_FLOOR, "upper": ROUND_CEILING}[kind]
    return _decimals(value, CHSH_DECIMALS, rounding)


def parse(text: str) -> float | int | None:
    """A number written by :func:`fmt` read back (thousands separators dropped)."""
    t = text.strip()
    if t == MISSING:
        return None
    t = t.replace(",", "")
    try:
        return int(t)
    except ValueError:
        return float(t)


def resolution(text: str) -> float:
    """The size of one unit in the last written digit of ``text`` (e.g. 0.0001 for 2.6977)."""
    t = text.strip().replace(",", "").lstrip("-")
    mant, _, exp = t.lower().partition("e")
    e = int(exp) if exp else 0
    frac = mant.partition(".")[2]
    return 10.0 ** (e - len(frac))


def consistent(text: str, value: Any, kind: str) -> bool:
    """Whether ``text`` is ``value`` written as ``kind``, rounded in that kind's direction.

    Used by the tests: a table cell against the JSON number (and the record's)."""
    if value is None:
        return text == MISSING
    if kind in ("digest", "text"):
        return text == str(value)
    if kind == "flag":
        return text == ("yes" if value else "no")
    shown = parse(text)
    v = float(value)
    if kind in ("count", "exact"):
        return shown == value
    step = resolution(text)
    digits = {"error": ERROR_DIGITS, "bits": BITS_DIGITS, "number": NUMBER_DIGITS,
              "bits_short": 3 if abs(shown) >= 10**6 else None}.get(kind)
    if digits is not None and shown != 0:
        # significant digits: "1030" written at 3 digits is a step of 10, not 1
        step = max(step, 10.0 ** (math.floor(math.log10(abs(shown))) - digits + 1))
    slack = 1e-12 * max(abs(v), 1e-300)
    direction = DIRECTION[kind]
    if direction == "up":
        return v - slack <= shown < v + step + slack
    if direction == "down":
        return v - step - slack < shown <= v + slack
    return abs(shown - v) <= step / 2 + slack


__all__ = ["KINDS", "DIRECTION", "MISSING", "fmt", "parse", "consistent", "resolution"]
