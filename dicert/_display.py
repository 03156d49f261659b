"""How results show themselves: a short repr, ``summary()``, ``to_dict()`` and a notebook table.

A result class defines ``_headline(self, full: bool) -> list[tuple[str, object]]``: the few
numbers that matter (``full=False``, for the repr) or a few more (``full=True``, for
``summary()`` and ``_repr_html_``). :func:`displayed` then gives it

- ``__repr__``: ``Name(key=value, ...)`` over the headline only, so big payloads (the record,
  count arrays, the protocol's TOML text) stay attributes and never flood a console;
- ``summary()``: an aligned text block;
- ``to_dict()``: every field as plain JSON values (:func:`dicert._plain.plain`), unless the
  class already has its own;
- ``_repr_html_()``: a small two-column table, which Jupyter shows for the last expression.

Stdlib only (numpy enters through ``to_dict``), so decorating costs nothing at import.
"""

from __future__ import annotations

import html
import math
import os
import re
from typing import Any, TypeVar

T = TypeVar("T", bound=type)

#: A SHA-256 digest, key fingerprint or signature in hex: shown whole, never cut.
_HEX = re.compile(r"[0-9a-f]{32,128}")


def _fmt(v: Any) -> str:
    """One value, short: floats to 6 significant digits, long strings and sequences cut."""
    if hasattr(v, "item") and getattr(v, "ndim", None) == 0:  # a numpy scalar
        v = v.item()
    if isinstance(v, bool) or v is None:
        return repr(v)
    if isinstance(v, float) or type(v).__name__.startswith("float"):
        f = float(v)
        return repr(f) if not math.isfinite(f) else f"{f:.6g}"
    if isinstance(v, int):
        return repr(int(v))
    if isinstance(v, str):
        if _HEX.fullmatch(v):  # a digest or key fingerprint: never cut
            return repr(v)
        return repr(v if len(v) <= 40 else v[:37] + "...")
    if isinstance(v, dict):
        items = list(v.items())
        body = ", ".join(f"{k!r}: {_fmt(x)}" for k, x in items[:4])
        return "{" + body + (", ..." if len(items) > 4 else "") + "}"
    if isinstance(v, (tuple, list)):
        body = ", ".join(_fmt(x) for x in v[:4]) + (", ..." if len(v) > 4 else "")
        return f"[{body}]" if isinstance(v, list) else f"({body}{',' if len(v) == 1 else ''})"
    s = str(v)
    return repr(s if len(s) <= 40 else s[:37] + "...")


def _text(v: Any) -> str:
    """One value for a table cell or summary line (strings and paths unquoted, uncut)."""
    if isinstance(v, (str, os.PathLike)):
        return os.fspath(v)
    return _fmt(v)


def _rows(obj: Any, full: bool) -> list[tuple[str, Any]]:
    return [(k, v) for k, v in obj._headline(full)]


def _repr(self: Any) -> str:
    inner = ", ".join(f"{k}={_fmt(v)}" for k, v in _rows(self, False))
    return f"{type(self).__name__}({inner})"


def _summary(self: Any) -> str:
    rows = _rows(self, True)
    width = max((len(k) for k, _ in rows), default=0)
    lines = [type(self).__name__]
    lines += [f"  {k.replace('_', ' '):<{width}}  {_text(v)}" for k, v in rows]
    return "\n".join(lines)


def _to_dict(self: Any) -> dict:
    from dicert._plain import plain

    return plain(self)


def _repr_html_(self: Any) -> str:
    cells = "".join(f"<tr><th style=\"text-align:left\">{html.escape(k.replace('_', ' '))}</th>"
                    f"<td style=\"text-align:left\">{html.escape(_text(v))}</td></tr>"
                    for k, v in _rows(self, True))
    return (f"<table><caption style=\"text-align:left\"><b>{html.escape(type(self).__name__)}"
            f"</b></caption>{cells}</table>")


def displayed(cls: T) -> T:
    """Class decorator (put it above ``@dataclass``): repr, summary, to_dict, _repr_html_."""
    if "_headline" not in cls.__dict__:
        raise TypeError(f"{cls.__name__} must define _headline(self, full)")
    cls.__repr__ = _repr  # type: ignore[assignment]
    cls._repr_html_ = _repr_html_  # type: ignore[attr-defined]
    if "summary" not in cls.__dict__:
        cls.summary = _summary  # type: ignore[attr-defined]
    if "to_dict" not in cls.__dict__:
        cls.to_dict = _to_dict  # type: ignore[attr-defined]
    return cls


def short_digest(d: str | None) -> str | None:
    """A digest as shown in a repr: in full (a digest is never cut; README glossary)."""
    return d


__all__ = ["displayed", "short_digest"]
