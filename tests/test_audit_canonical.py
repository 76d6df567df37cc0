"""Canonical JSON (RFC 8785) for our subset: strings, integers, booleans, null, arrays and objects."""

from __future__ import annotations

import json
from typing import Any

import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.canonical import MAX_SAFE_INTEGER, CanonicalError, canonicalize, is_canonical, parse

json_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-MAX_SAFE_INTEGER, max_value=MAX_SAFE_INTEGER)
    | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=8), inner, max_size=5),
    max_leaves=25,
)


def test_rfc8785_string_and_literal_example_without_its_numbers() -> None:
    # RFC 8785 §3.2.2 / §3.2.3 example (from memory), "numbers" member dropped: floats are outside our subset.
    text = (
        r'{"string": "\u20ac$\u000F\u000aA'
        + "'"
        + r'\u0042\u0022\u005c\\\"\/", "literals": [null, true, false]}'
    )
    expected = '{"literals":[null,true,false],"string":"€$\\u000f\\nA\'B\\"\\\\\\\\\\"/"}'.encode()
    assert canonicalize(parse(text)) == expected


def test_rfc8785_member_sorting_example_orders_by_utf16_code_units() -> None:
    # RFC 8785 §3.2.3 sorting example (from memory): the emoji (surrogates D83D DE00) sorts before U+FB33.
    obj = {
        "\u20ac": "Euro Sign",
        "\r": "Carriage Return",
        "\ufb33": "Hebrew Letter Dalet With Dagesh",
        "1": "One",
        "\U0001f600": "Emoji: Grinning Face",
        "\u0080": "Control",
        "\u00f6": "Latin Small Letter O With Diaeresis",
    }
    assert list(parse(canonicalize(obj)).values()) == [
        "Carriage Return",
        "One",
        "Control",
        "Latin Small Letter O With Diaeresis",
        "Euro Sign",
        "Emoji: Grinning Face",
        "Hebrew Letter Dalet With Dagesh",
    ]


def test_rfc8785_safe_integer_extremes_are_plain_digits() -> None:
    # RFC 8785 Appendix B (from memory): 9007199254740991 and -9007199254740991 serialise as their digits.
    assert canonicalize([9007199254740991, -9007199254740991, 0]) == b"[9007199254740991,-9007199254740991,0]"


def test_only_controls_quote_and_backslash_are_escaped_and_hex_is_lower_case() -> None:
    assert canonicalize("\x00\x1f\x7f\u0080\u2028é/") == '"\\u0000\\u001f\x7f\u0080\u2028é/"'.encode()
    assert canonicalize('\b\f\n\r\t"\\') == b'"\\b\\f\\n\\r\\t\\"\\\\"'


@pytest.mark.parametrize(
    ("value", "where"),
    [
        ({"a": [1, 2.5]}, r"\$\.a\[1\]: floats are not allowed"),
        ({"t": 4.0}, r"\$\.t: floats are not allowed"),
        ([MAX_SAFE_INTEGER + 1], r"\$\[0\]: integer outside"),
        ({"k": b"raw"}, r"\$\.k: values of type bytes"),
        ({1: "x"}, r"\$: object member names must be strings"),
        ({"s": "\ud800"}, r"\$\.s: string contains a lone surrogate"),
    ],
)
def test_values_outside_the_subset_are_refused_naming_where(value: Any, where: str) -> None:
    with pytest.raises(CanonicalError, match=where):
        canonicalize(value)


@pytest.mark.parametrize(
    ("data", "message"),
    [
        (b'{"a":1,"a":2}', "duplicate member name"),
        (b'{"a":1.5}', "not an integer"),
        (b'{"a":1e3}', "not an integer"),
        (b"[NaN]", "NaN is not JSON"),
        (b"[9007199254740992]", "integer outside"),
        (b'"\xff"', "not UTF-8"),
        (b'{"a":', "not JSON"),
    ],
)
def test_the_strict_reader_refuses_what_canonical_json_cannot_hold(data: bytes, message: str) -> None:
    with pytest.raises(CanonicalError, match=message):
        parse(data)


@pytest.mark.parametrize(
    "data",
    [
        b'{"b":1, "a":2}',
        b'{"b":1,"a":2}',
        b'{"a":-0}',
        b'{"a":"\\u0041"}',
        b'{"a":"\\/"}',
        b'{"a":1} ',
        b" [1]",
    ],
)
def test_other_spellings_of_the_same_value_are_not_canonical(data: bytes) -> None:
    assert not is_canonical(data)
    assert is_canonical(canonicalize(parse(data)))


@given(json_values)
def test_canonicalising_is_idempotent_through_the_reader(value: Any) -> None:
    once = canonicalize(value)
    assert canonicalize(parse(once)) == once
    assert parse(once) == value
    assert is_canonical(once)


@given(st.dictionaries(st.text(max_size=6), json_values, max_size=6))
def test_member_order_does_not_change_the_bytes(obj: dict[str, Any]) -> None:
    reordered = dict(reversed(list(obj.items())))
    assert canonicalize(reordered) == canonicalize(obj)


ascii_names = st.text(alphabet=st.characters(max_codepoint=0x7F), max_size=6)
ascii_named_values = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-MAX_SAFE_INTEGER, max_value=MAX_SAFE_INTEGER)
    | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=5) | st.dictionaries(ascii_names, inner, max_size=5),
    max_leaves=25,
)


@given(st.dictionaries(ascii_names, ascii_named_values, max_size=6))
def test_agrees_with_the_json_module_when_member_names_are_ascii(obj: dict[str, Any]) -> None:
    # For ASCII names code-point order (the json module's sort) equals UTF-16 order, and `json`'s escaping with
    # ensure_ascii=False is the same minimal set (controls as lower-case \u00xx, quote, backslash).
    expected = json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode()
    assert canonicalize(obj) == expected
