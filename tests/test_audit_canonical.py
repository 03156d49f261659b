"""Tests of dicert.audit.canonical against RFC 8785 and an independent implementation."""

from __future__ import annotations

import json
import math
import struct
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from dicert.audit.canonical import (
    MAX_SAFE_INTEGER,
    canonical_sha256,
    canonicalize,
    format_number,
    parse_json,
)
from dicert.errors import ParameterError, VerificationError

VECTORS = Path(__file__).parent / "vectors" / "rfc8785"


def _appendix_b_rows():
    rows = []
    for line in (VECTORS / "appendix-b-numbers.txt").read_text().splitlines():
        if line and not line.startswith("#"):
            bits, expected = line.split()
            rows.append((bits, expected))
    return rows


@pytest.mark.parametrize(("bits", "expected"), _appendix_b_rows())
def test_rfc8785_appendix_b_number_samples(bits, expected):
    # RFC 8785 (Rundgren, Jordan, Erdtman, 2020), Appendix B, Number Serialization Samples.
    value = struct.unpack(">d", bytes.fromhex(bits))[0]
    if expected == "error":
        with pytest.raises(ParameterError):
            format_number(value)
        with pytest.raises(ParameterError, match=r"\$\[1\]"):
            canonicalize([0, value])
    else:
        assert format_number(value) == expected
        assert canonicalize(value) == expected.encode()


def test_rfc8785_section_3_2_2_example():
    # RFC 8785 section 3.2.2 (input) and 3.2.3 (sorted, serialised output) example.
    data = json.loads((VECTORS / "section-3.2.2-input.json").read_text(encoding="utf-8"))
    expected = (VECTORS / "section-3.2.2-output.json").read_bytes()
    assert canonicalize(data) == expected


def test_rfc8785_section_3_2_4_utf8_bytes():
    # RFC 8785 section 3.2.4: the UTF-8 bytes of the section 3.2.2 example, in hex.
    data = json.loads((VECTORS / "section-3.2.2-input.json").read_text(encoding="utf-8"))
    expected = bytes.fromhex((VECTORS / "section-3.2.4-output.hex").read_text().replace("\n", " "))
    assert canonicalize(data) == expected


def test_rfc8785_section_3_2_3_sorting_by_utf16_code_units():
    # RFC 8785 section 3.2.3: member order follows UTF-16 code units, so the emoji
    # (surrogates D83D DE00) sorts before U+FB33 although its code point is larger.
    data = json.loads((VECTORS / "section-3.2.3-sorting-input.json").read_text(encoding="utf-8"))
    order = (VECTORS / "section-3.2.3-sorting-order.txt").read_text(encoding="utf-8").splitlines()
    assert list(json.loads(canonicalize(data)).values()) == order


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        # ECMA-262 Number::toString boundaries (RFC 8785 section 3.2.2.3): plain notation for
        # 1e-6 <= |x| < 1e21, exponent form outside; "from memory" of the ECMAScript rules,
        # each case re-derivable by hand from the four branches of the algorithm.
        (1.0, "1"),
        (-1.5, "-1.5"),
        (100.0, "100"),
        (1e20, "100000000000000000000"),
        (1e21, "1e+21"),
        (1.5e21, "1.5e+21"),
        (1e-6, "0.000001"),
        (1.5e-7, "1.5e-7"),
        (1e-7, "1e-7"),
        (0.1, "0.1"),
        (123456789012345680.0, "123456789012345680"),
        (-0.0, "0"),
        (7, "7"),
        (-(2**53 - 1), "-9007199254740991"),
    ],
)
def test_ecmascript_number_branches(value, expected):
    assert format_number(value) == expected


@pytest.mark.parametrize("value", [2**53, -(2**53), 10**30])
def test_integers_outside_ijson_range_refused(value):
    # RFC 7493 (I-JSON) section 2.2: integers beyond +-(2**53 - 1) are not interoperable.
    with pytest.raises(ParameterError, match="safe range"):
        canonicalize({"n": value})
    assert MAX_SAFE_INTEGER == 2**53 - 1


def test_string_escapes():
    # RFC 8785 section 3.2.2.2: only " \ and U+0000..U+001F are escaped; \b \t \n \f \r by
    # name, the others as lower-case \u00xx; U+007F and non-ASCII stay literal.
    text = "".join(chr(c) for c in range(0x20)) + '"\\/\x7f\u00e9\U0001f600'
    expected = (
        '"\\u0000\\u0001\\u0002\\u0003\\u0004\\u0005\\u0006\\u0007\\b\\t\\n\\u000b\\f\\r'
        "\\u000e\\u000f\\u0010\\u0011\\u0012\\u0013\\u0014\\u0015\\u0016\\u0017\\u0018\\u0019"
        '\\u001a\\u001b\\u001c\\u001d\\u001e\\u001f\\"\\\\/\x7f\u00e9\U0001f600"'
    )
    assert canonicalize(text) == expected.encode("utf-8")


@pytest.mark.parametrize(
    ("bad", "where"),
    [
        ({"a": [1, math.nan]}, r"\$\.a\[1\]"),
        ({"a": {"b": math.inf}}, r"\$\.a\.b"),
        ({"s": "x\ud800y"}, r"\$\.s"),  # lone surrogate, RFC 7493 section 2.1
        ({1: "non-string key"}, r"\$"),
        ({"k": {1, 2}}, r"\$\.k"),
        ({"k": b"bytes"}, r"\$\.k"),
    ],
)
def test_unrepresentable_values_name_their_path(bad, where):
    with pytest.raises(ParameterError, match=where):
        canonicalize(bad)


def test_tuples_and_numpy_integers_accepted_and_deterministic():
    np = pytest.importorskip("numpy")
    a = {"b": (1, 2), "a": np.int64(3), "c": np.float64(0.25)}
    b = {"c": 0.25, "a": 3, "b": [1, 2]}
    assert canonicalize(a) == canonicalize(b) == b'{"a":3,"b":[1,2],"c":0.25}'
    assert canonical_sha256(a) == canonical_sha256(b)


def test_parse_json_strict():
    assert parse_json(b'{"a":[1,2.5,"x"]}') == {"a": [1, 2.5, "x"]}
    with pytest.raises(VerificationError, match="duplicate"):
        parse_json(b'{"a":1,"a":2}', source="r.json")
    with pytest.raises(VerificationError, match="NaN"):
        parse_json(b'{"a":NaN}')
    with pytest.raises(VerificationError, match="byte 1: invalid UTF-8"):
        parse_json(b'"\xff"')
    with pytest.raises(VerificationError, match="byte-order mark"):
        parse_json(b"\xef\xbb\xbf{}")
    # The canonical text of the double 2**53 (RFC 8785 Appendix B) reads back as that double.
    assert parse_json(b"9007199254740992") == 2.0**53
    assert isinstance(parse_json(b"9007199254740992"), float)
    with pytest.raises(VerificationError, match=r"r\.json: line 2 column 1"):
        parse_json(b'{"a":1,\n}', source="r.json")


# -- cross-check against the independent reference library ``rfc8785`` (PyPI, by Trail of
# Bits; general-purpose RFC 8785 implementation, function rfc8785.dumps) on generated values.
_finite = st.floats(allow_nan=False, allow_infinity=False)
_ints = st.integers(min_value=-MAX_SAFE_INTEGER, max_value=MAX_SAFE_INTEGER)
_text = st.text(st.characters(blacklist_categories=("Cs",)), max_size=12)
_json = st.recursive(
    st.none() | st.booleans() | _ints | _finite | _text,
    lambda kids: st.lists(kids, max_size=5) | st.dictionaries(_text, kids, max_size=5),
    max_leaves=25,
)


@settings(max_examples=400, deadline=None)
@given(_json)
def test_matches_reference_library(value):
    rfc8785 = pytest.importorskip("rfc8785")
    assert canonicalize(value) == rfc8785.dumps(value)


@settings(max_examples=300, deadline=None)
@given(_finite)
def test_numbers_round_trip_and_match_reference(x):
    rfc8785 = pytest.importorskip("rfc8785")
    text = format_number(x)
    assert text.encode() == rfc8785.dumps(x)
    assert float(text) == x  # shortest round-trip digits read back exactly (common practice)


@settings(max_examples=200, deadline=None)
@given(_json)
def test_canonical_form_is_a_fixed_point(value):
    once = canonicalize(value)
    assert canonicalize(parse_json(once)) == once
