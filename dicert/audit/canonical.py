"""RFC 8785 JSON Canonicalization Scheme (JCS): the byte form that dicert hashes and signs.

A JSON value has many spellings; hashing and signing need exactly one. RFC 8785 fixes it:

* numbers are IEEE 754 doubles written as ECMAScript's ``Number::toString`` writes them
  (shortest round-trip digits; plain notation for 1e-6 <= |x| < 1e21, otherwise
  ``d.ddde+N`` / ``d.ddde-N``); ``-0`` is written ``0``; NaN and the infinities are refused;
* strings escape only ``"``, ``\\`` and the controls U+0000..U+001F (``\\b \\t \\n \\f \\r`` by
  name, the rest as ``\\u00xx`` in lower-case hex); everything else is literal UTF-8;
  lone surrogates are refused (I-JSON, RFC 7493 section 2.1);
* object members are sorted by their names compared as arrays of UTF-16 code units;
* no whitespace anywhere.

Integers must lie in the I-JSON safe range [-(2**53 - 1), 2**53 - 1] (RFC 7493 section 2.2), so
that every reader maps them to the same double. This is our own implementation; the tests
cross-check it against the published examples and an independent library.

References
----------
.. [1] A. Rundgren, B. Jordan, S. Erdtman, "JSON Canonicalization Scheme (JCS)", RFC 8785, 2020.
.. [2] T. Bray, "The I-JSON Message Format", RFC 7493, 2015.
.. [3] ECMA-262, ECMAScript Language Specification, "Number::toString" (section 6.1.6.1.20 of the
   2020 edition; 7.1.12.1 of the 6th edition, 2015) and "QuoteJSONString".
"""

from __future__ import annotations

import hashlib
import json
import math
import numbers
from collections.abc import Mapping
from typing import Any

from dicert.errors import ParameterError, VerificationError

__all__ = [
    "MAX_SAFE_INTEGER",
    "canonical_sha256",
    "canonicalize",
    "format_number",
    "parse_json",
]

#: Largest integer magnitude I-JSON allows (RFC 7493 section 2.2).
MAX_SAFE_INTEGER = 2**53 - 1

_NAMED_ESCAPES = {
    0x08: "\\b",
    0x09: "\\t",
    0x0A: "\\n",
    0x0C: "\\f",
    0x0D: "\\r",
    0x22: '\\"',
    0x5C: "\\\\",
}
_ESCAPES = {c: _NAMED_ESCAPES.get(c, f"\\u{c:04x}") for c in range(0x20)}
_ESCAPES[0x22] = _NAMED_ESCAPES[0x22]
_ESCAPES[0x5C] = _NAMED_ESCAPES[0x5C]


class _Unrepresentable(Exception):
    """Internal: a value has no RFC 8785 form; carries the reason."""


def format_number(value: float | int) -> str:
    """Write a finite number as ECMAScript ``Number::toString`` does (RFC 8785 section 3.2.2.3).

    Parameters
    ----------
    value : float or int
        A finite double, or an integer within the I-JSON safe range.

    Returns
    -------
    str
        The canonical spelling, e.g. ``1e+30``, ``4.5``, ``0.002``, ``1e-27``.

    Raises
    ------
    ParameterError
        For NaN, the infinities, or integers outside [-(2**53 - 1), 2**53 - 1].

    References
    ----------
    .. [1] RFC 8785, section 3.2.2.3 and Appendix B.
    .. [2] ECMA-262, Number::toString.
    """
    try:
        return _format_number(value)
    except _Unrepresentable as exc:
        raise ParameterError(f"number {value!r}: {exc}") from None


def _format_number(value: float | int) -> str:
    if isinstance(value, bool):
        raise _Unrepresentable("a boolean is not a number")
    if isinstance(value, numbers.Integral):
        ivalue = int(value)
        if abs(ivalue) > MAX_SAFE_INTEGER:
            raise _Unrepresentable(
                "integer outside the I-JSON safe range +-(2**53 - 1) (RFC 7493 section 2.2)"
            )
        return str(ivalue)  # exact as a double, and below 1e21: plain digits
    x = float(value)
    if not math.isfinite(x):
        raise _Unrepresentable("NaN and Infinity have no JSON form (RFC 8785 section 3.2.2.3)")
    if x == 0.0:
        return "0"  # also -0
    sign = "-" if x < 0 else ""
    # repr gives the shortest digit string that reads back to the same double, choosing the
    # nearest such string (ties to even) -- the digit choice ECMAScript prescribes.
    mantissa, _, exp_text = repr(abs(x)).partition("e")
    int_part, _, frac_part = mantissa.partition(".")
    all_digits = int_part + frac_part
    stripped = all_digits.lstrip("0")
    # Write x = 0.d1 d2 ... dk * 10**n with d1 != 0 (ECMAScript's n and k).
    n = len(int_part) - (len(all_digits) - len(stripped)) + (int(exp_text) if exp_text else 0)
    digits = stripped.rstrip("0")
    k = len(digits)
    if k <= n <= 21:
        text = digits + "0" * (n - k)
    elif 0 < n <= 21:
        text = digits[:n] + "." + digits[n:]
    elif -6 < n <= 0:
        text = "0." + "0" * (-n) + digits
    else:
        e = n - 1
        head = digits if k == 1 else digits[0] + "." + digits[1:]
        text = f"{head}e{'+' if e >= 0 else '-'}{abs(e)}"
    return sign + text


def _quote(text: str) -> str:
    try:
        text.encode("utf-8")
    except UnicodeEncodeError:
        raise _Unrepresentable(
            "string holds a lone UTF-16 surrogate, which I-JSON forbids (RFC 7493 section 2.1)"
        ) from None
    return '"' + text.translate(_ESCAPES) + '"'


def _utf16_key(name: str) -> bytes:
    # Big-endian UTF-16 bytes compare exactly as sequences of unsigned 16-bit code units.
    return name.encode("utf-16-be")


def _serialize(obj: Any, path: str, out: list[str]) -> None:
    if obj is None:
        out.append("null")
    elif obj is True:
        out.append("true")
    elif obj is False:
        out.append("false")
    elif isinstance(obj, str):
        try:
            out.append(_quote(obj))
        except _Unrepresentable as exc:
            raise ParameterError(f"cannot canonicalize {path}: {exc}") from None
    elif isinstance(obj, (float, numbers.Integral)) and not isinstance(obj, bool):
        try:
            out.append(_format_number(obj))
        except _Unrepresentable as exc:
            raise ParameterError(f"cannot canonicalize {path}: {exc}") from None
    elif isinstance(obj, Mapping):
        members = []
        for name, value in obj.items():
            if not isinstance(name, str):
                raise ParameterError(
                    f"cannot canonicalize {path}: member name {name!r} is not a string"
                )
            try:
                members.append((_utf16_key(name), _quote(name), name, value))
            except (_Unrepresentable, UnicodeEncodeError):
                raise ParameterError(
                    f"cannot canonicalize {path}: member name {name!r} holds a lone surrogate"
                ) from None
        members.sort(key=lambda m: m[0])
        out.append("{")
        for i, (_, quoted, name, value) in enumerate(members):
            if i:
                out.append(",")
            out.append(quoted)
            out.append(":")
            _serialize(value, f"{path}.{name}", out)
        out.append("}")
    elif isinstance(obj, (list, tuple)):
        out.append("[")
        for i, value in enumerate(obj):
            if i:
                out.append(",")
            _serialize(value, f"{path}[{i}]", out)
        out.append("]")
    else:
        raise ParameterError(
            f"cannot canonicalize {path}: {type(obj).__module__}.{type(obj).__qualname__} "
            "is not a JSON type (use dict, list, str, int, float, bool or None)"
        )


def canonicalize(obj: Any) -> bytes:
    """Serialise a JSON value to its RFC 8785 canonical UTF-8 bytes.

    Parameters
    ----------
    obj : JSON value
        ``dict`` (string keys), ``list``/``tuple``, ``str``, ``int``, ``float``, ``bool`` or
        ``None``, nested freely. Integer types registered as ``numbers.Integral`` (e.g. numpy
        integers) and ``float`` subclasses are accepted; other objects are refused.

    Returns
    -------
    bytes
        The canonical form; equal JSON values give identical bytes.

    Raises
    ------
    ParameterError
        Naming the JSON path (``$.a.b[2]``) of the first value without a canonical form: NaN or
        an infinity, an integer outside the I-JSON safe range, a lone surrogate, a non-string
        member name, or a non-JSON type.

    References
    ----------
    .. [1] A. Rundgren, B. Jordan, S. Erdtman, RFC 8785 (2020), section 3.2.
    """
    out: list[str] = []
    _serialize(obj, "$", out)
    return "".join(out).encode("utf-8")


def canonical_sha256(obj: Any) -> str:
    """Hex SHA-256 of ``canonicalize(obj)``."""
    return hashlib.sha256(canonicalize(obj)).hexdigest()


def _reject_constant(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def _no_duplicates(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    result: dict[str, Any] = {}
    for name, value in pairs:
        if name in result:
            raise ValueError(f"duplicate member name {name!r} (I-JSON, RFC 7493 section 2.3)")
        result[name] = value
    return result


def _parse_int(text: str) -> int | float:
    # JSON numbers are doubles (RFC 8785 section 3.2.2.3): an integer literal beyond the safe
    # range, e.g. the canonical "9007199254740992" of the double 2**53, reads as that double.
    value = int(text)
    return value if abs(value) <= MAX_SAFE_INTEGER else float(text)


def parse_json(data: bytes | str, *, source: str = "<data>") -> Any:
    """Parse I-JSON strictly: UTF-8 only, no duplicate member names, no NaN/Infinity.

    Integer literals within the I-JSON safe range become ``int``; larger ones become the
    ``float`` they denote, so ``canonicalize(parse_json(canonicalize(v))) == canonicalize(v)``.

    Parameters
    ----------
    data : bytes or str
        The document. Bytes must be UTF-8 without a byte-order mark.
    source : str
        Where the data came from, used in error messages (a file name).

    Raises
    ------
    VerificationError
        With the source and the line/column (or byte offset) of the first problem. Parsed
        documents are evidence under verification, so a malformed one fails verification.
    """
    if isinstance(data, bytes):
        if data.startswith(b"\xef\xbb\xbf"):
            raise VerificationError(f"{source}: byte 0: a UTF-8 byte-order mark is not allowed")
        try:
            text = data.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise VerificationError(f"{source}: byte {exc.start}: invalid UTF-8") from None
    else:
        text = data
    try:
        return json.loads(
            text,
            object_pairs_hook=_no_duplicates,
            parse_constant=_reject_constant,
            parse_int=_parse_int,
        )
    except json.JSONDecodeError as exc:
        raise VerificationError(
            f"{source}: line {exc.lineno} column {exc.colno}: invalid JSON ({exc.msg})"
        ) from None
    except (ValueError, RecursionError) as exc:
        raise VerificationError(f"{source}: invalid JSON ({exc})") from None
