"""RFC 8785 §3.2.2.3: floats in canonical JSON take ECMAScript's Number-to-String form (used by manifest digests).

The IEEE 754 bit patterns and expected strings are from RFC 8785 Appendix B (from memory); each expected string was
confirmed on 2026-12-02 against ECMAScript itself (Node.js v20, ``String(number)``) on the development machine.
"""

from __future__ import annotations

import math
import struct

import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.canonical import CanonicalError, canonicalize

APPENDIX_B = [
    ("0000000000000000", "0"),
    ("8000000000000000", "0"),
    ("0000000000000001", "5e-324"),
    ("7fefffffffffffff", "1.7976931348623157e+308"),
    ("4340000000000000", "9007199254740992"),
    ("4430000000000000", "295147905179352830000"),
    ("44b52d02c7e14af5", "9.999999999999997e+22"),
    ("44b52d02c7e14af6", "1e+23"),
    ("3eb0c6f7a0b5ed8d", "0.000001"),
    ("3eb0c6f7a0b5ed8c", "9.999999999999997e-7"),
    ("41b3de4355555553", "333333333.3333332"),
    ("41b3de4355555556", "333333333.3333334"),
    ("c0f3880000000000", "-80000"),
]


@pytest.mark.parametrize(("bits", "text"), APPENDIX_B)
def test_floats_serialise_as_ecmascript_does(bits: str, text: str) -> None:
    value = struct.unpack(">d", bytes.fromhex(bits))[0]
    assert canonicalize(value, allow_floats=True) == text.encode()


@given(st.floats(allow_nan=False, allow_infinity=False))
def test_the_float_form_reads_back_to_the_same_float(x: float) -> None:
    assert float(canonicalize(x, allow_floats=True)) == x


def test_floats_are_refused_unless_allowed_and_never_nan_or_infinite() -> None:
    with pytest.raises(CanonicalError, match=r"\$.p: floats are not allowed"):
        canonicalize({"p": 0.5})
    for bad in (math.nan, math.inf, -math.inf):
        with pytest.raises(CanonicalError, match="no NaN or infinity"):
            canonicalize([bad], allow_floats=True)
