"""Canonical JSON (RFC 8785, JSON Canonicalization Scheme): one byte form per value, for signatures and digests.

Used by the signed session logs (integers only) and by the manifest digest (which may hold decimal parameters
such as a percentile or bin edges, and so allows floats).

Theory of operation: a signed record must have exactly one byte form, so that a signature or hash over those bytes
means one thing. RFC 8785 fixes that form: no whitespace (§3.2.1), literals ``null``/``true``/``false``
(§3.2.2.1), strings with the minimal escaping of §3.2.2.2 (``\\"``, ``\\\\``, ``\\b``, ``\\f``, ``\\n``, ``\\r``,
``\\t``, other controls below U+0020 as ``\\u00xx`` in lower-case hex, everything else as literal UTF-8), object
members sorted by the UTF-16 code units of their names (§3.2.3), and UTF-8 output (§3.2.4).

Numbers (§3.2.2.3) are serialised as ECMAScript does. Integers must lie in the I-JSON safe range
|n| ≤ 2^53 − 1 (RFC 7493 §2.2), for which that serialisation is the plain decimal digits with a leading ``-`` for
negatives. Floats are refused (with an error naming where) unless ``allow_floats`` is set; then a finite float
gets ECMAScript's Number-to-String form: the shortest digits that round-trip (Python's ``repr`` finds them),
placed as in ECMA-262 §7.1.12.1 (plain notation for exponents in [-6, 21), else ``d.ddde±n``).

``parse`` is the strict reader used by verification: UTF-8 only, no duplicate member names, no floats, no
``NaN``/``Infinity``, integers in the safe range. ``canonicalize(parse(b)) == b`` holds exactly when ``b`` is
the canonical form of its value; verification compares the bytes, so a record has one accepted spelling.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from typing import Any

MAX_SAFE_INTEGER = (1 << 53) - 1

_ESCAPES = {'"': '\\"', "\\": "\\\\", "\b": "\\b", "\f": "\\f", "\n": "\\n", "\r": "\\r", "\t": "\\t"}
_TRANSLATE = {i: f"\\u{i:04x}" for i in range(0x20)} | {ord(k): v for k, v in _ESCAPES.items()}


class CanonicalError(ValueError):
    """A value outside the canonical-JSON subset, or bytes that are not strict JSON; the message says where."""


def _utf16_key(name: str) -> bytes:
    # Big-endian UTF-16 bytes compare exactly like sequences of UTF-16 code units (RFC 8785 §3.2.3).
    return name.encode("utf-16-be", "surrogatepass")


def _string(s: str, where: str) -> str:
    try:
        s.encode("utf-8")
    except UnicodeEncodeError:
        raise CanonicalError(f"{where}: string contains a lone surrogate; not valid Unicode") from None
    return '"' + s.translate(_TRANSLATE) + '"'


def _shortest(x: float) -> tuple[str, int]:
    """(digits, exponent) with x = int(digits) × 10^exponent, digits the shortest round-trip form of x > 0."""
    mant, _, e = repr(x).partition("e")
    exp = int(e) if e else 0
    whole, _, fraction = mant.partition(".")
    digits = (whole + fraction).lstrip("0")
    exp -= len(fraction)
    stripped = digits.rstrip("0")
    exp += len(digits) - len(stripped)
    return stripped or "0", exp


def _number(x: float, where: str) -> str:
    """ECMAScript Number-to-String of a finite float (RFC 8785 §3.2.2.3, ECMA-262 §7.1.12.1)."""
    if not math.isfinite(x):
        raise CanonicalError(f"{where}: canonical JSON has no NaN or infinity")
    if x == 0:
        return "0"
    digits, exp = _shortest(abs(x))
    sign = "-" if x < 0 else ""
    k = len(digits)
    n = exp + k  # the value is 0.digits × 10^n
    if k <= n <= 21:
        return sign + digits + "0" * (n - k)
    if 0 < n <= 21:
        return sign + digits[:n] + "." + digits[n:]
    if -6 < n <= 0:
        return sign + "0." + "0" * (-n) + digits
    e = n - 1
    mant = digits[0] + ("." + digits[1:] if k > 1 else "")
    return f"{sign}{mant}e{'+' if e > 0 else '-'}{abs(e)}"


def _emit(value: Any, where: str, out: list[str], floats: bool) -> None:
    if value is None:
        out.append("null")
    elif value is True:
        out.append("true")
    elif value is False:
        out.append("false")
    elif isinstance(value, int):
        if not -MAX_SAFE_INTEGER <= value <= MAX_SAFE_INTEGER:
            raise CanonicalError(f"{where}: integer outside ±(2^53 − 1) cannot be represented exactly")
        out.append(str(int(value)))
    elif isinstance(value, float):
        if not floats:
            raise CanonicalError(
                f"{where}: floats are not allowed; use integers (e.g. microseconds) or strings"
            )
        out.append(_number(value, where))
    elif isinstance(value, str):
        out.append(_string(value, where))
    elif isinstance(value, Mapping):
        for key in value:
            if not isinstance(key, str):
                raise CanonicalError(
                    f"{where}: object member names must be strings, found {type(key).__name__}"
                )
        out.append("{")
        for i, key in enumerate(sorted(value, key=_utf16_key)):
            if i:
                out.append(",")
            out.append(_string(key, where))
            out.append(":")
            _emit(value[key], f"{where}.{key}", out, floats)
        out.append("}")
    elif isinstance(value, Sequence) and not isinstance(value, bytes | bytearray):
        out.append("[")
        for i, item in enumerate(value):
            if i:
                out.append(",")
            _emit(item, f"{where}[{i}]", out, floats)
        out.append("]")
    else:
        raise CanonicalError(f"{where}: values of type {type(value).__name__} have no canonical JSON form")


def canonicalize(value: Any, *, allow_floats: bool = False) -> bytes:
    """The RFC 8785 canonical UTF-8 bytes of ``value`` (dict/list/tuple/str/int/bool/None, and float if allowed)."""
    out: list[str] = []
    _emit(value, "$", out, allow_floats)
    return "".join(out).encode("utf-8")


def _no_float(text: str) -> Any:
    raise CanonicalError(f"number {text} is not an integer; floats are not allowed")


def _no_constant(text: str) -> Any:
    raise CanonicalError(f"{text} is not JSON")


def _safe_int(text: str) -> int:
    n = int(text)
    if not -MAX_SAFE_INTEGER <= n <= MAX_SAFE_INTEGER:
        raise CanonicalError("integer outside ±(2^53 − 1)")
    return n


def _pairs(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    obj: dict[str, Any] = {}
    for key, value in pairs:
        if key in obj:
            raise CanonicalError(f"duplicate member name {json.dumps(key)}")
        obj[key] = value
    return obj


def parse(data: bytes | str) -> Any:
    """Strict JSON reader: UTF-8, no duplicate names, integers only (safe range), no NaN/Infinity."""
    if isinstance(data, bytes | bytearray):
        try:
            text = bytes(data).decode("utf-8")
        except UnicodeDecodeError as exc:
            raise CanonicalError(f"not UTF-8 (byte {exc.start})") from None
    else:
        text = data
    try:
        return json.loads(
            text,
            parse_float=_no_float,
            parse_int=_safe_int,
            parse_constant=_no_constant,
            object_pairs_hook=_pairs,
        )
    except json.JSONDecodeError as exc:
        raise CanonicalError(f"not JSON: {exc.msg} at column {exc.colno}") from None
    except RecursionError:
        raise CanonicalError("not JSON: nested too deeply") from None


def is_canonical(data: bytes) -> bool:
    """Whether ``data`` is strict JSON written in its RFC 8785 canonical form."""
    try:
        return canonicalize(parse(data)) == data
    except CanonicalError:
        return False
