"""The secret scanner: every secret a run made, searched for in every line of logs and messages, in every form.

Theory of operation
-------------------
A harness records the secrets of the sessions it runs (``Secrets``: each garbler's Δ, wire labels of 16 bytes, and
the input values of both organisations; see ``harness.recording``). ``secret_forms`` writes each secret in the
forms a careless log line could hold it: a block (Δ or label) as lower- and upper-case hex, base64 (standard and
URL-safe, at each of the three alignments inside a longer base64 string), as a decimal integer in either byte
order, as either 64-bit half in decimal (when at least 10^12, so a count or a duration cannot match by chance) and
as a Python bytes literal; an input value in decimal, hex, the hex and base64 of its 8-byte encodings, and as a bit
string in either order, plain or printed as an array. ``scan_text`` finds, line by line, every (line, secret) where
one of the forms occurs, in one pass over each line: the forms are indexed by their first ``SCAN_PREFIX``
characters, and every form is at least that long. A finding names the secret's kind, number and form, never the
secret itself.
"""

from __future__ import annotations

import base64
import threading
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

SCAN_PREFIX = (
    8  # every searched form is at least this long; shorter ones would match counts and times by chance
)
BLOCK_BYTES = 16


@dataclass
class Secrets:
    """Everything secret a run produced, as the harness saw it: Δs, wire labels (16 bytes each), input values.

    ``value_bits`` is the width input values have in the program (their bit strings are searched at that width).
    """

    blocks: set[bytes] = field(default_factory=set)
    values: set[int] = field(default_factory=set)
    deltas: dict[str, bytes] = field(default_factory=dict)  # session id -> Δ (garbler side)
    labels: dict[str, set[bytes]] = field(default_factory=dict)  # session id -> labels seen or made
    value_bits: int = 64
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def add_delta(self, session_id: str, delta: bytes) -> None:
        with self._lock:
            self.deltas[session_id] = delta
            self.blocks.add(delta)

    def add_labels(self, session_id: str, raw: bytes | memoryview) -> None:
        """Labels as the bytes of consecutive 16-byte blocks. The all-zero block is left out: it is the label public
        bits carry (a public output's label, as it crosses the wire), no secret, and any run of zeros would match."""
        data = bytes(raw)
        blocks = {
            data[i : i + BLOCK_BYTES] for i in range(0, len(data) - len(data) % BLOCK_BYTES, BLOCK_BYTES)
        }
        blocks.discard(bytes(BLOCK_BYTES))
        with self._lock:
            self.labels.setdefault(session_id, set()).update(blocks)
            self.blocks.update(blocks)

    def add_value(self, value: int) -> None:
        with self._lock:
            self.values.add(int(value))

    def merge(self, other: Secrets) -> None:
        with self._lock:
            self.blocks |= other.blocks
            self.values |= other.values
            self.deltas.update(other.deltas)
            for sid, labels in other.labels.items():
                self.labels.setdefault(sid, set()).update(labels)

    def to_wire(self) -> dict[str, Any]:
        """A plain dict (for a pipe to another process)."""
        return {
            "deltas": {k: v.hex() for k, v in self.deltas.items()},
            "labels": {k: [b.hex() for b in v] for k, v in self.labels.items()},
            "values": sorted(self.values),
            "value_bits": self.value_bits,
        }

    @classmethod
    def from_wire(cls, data: dict[str, Any]) -> Secrets:
        out = cls(value_bits=int(data.get("value_bits", 64)))
        for sid, delta in data["deltas"].items():
            out.add_delta(sid, bytes.fromhex(delta))
        for sid, labels in data["labels"].items():
            out.add_labels(sid, b"".join(bytes.fromhex(h) for h in labels))
        for v in data["values"]:
            out.add_value(v)
        return out


def _b64_inner(data: bytes) -> set[str]:
    """Base64 (standard and URL-safe) substrings that encode only bytes of ``data``, at each of the 3 alignments."""
    out: set[str] = set()
    for offset in range(3):
        encoded = base64.b64encode(bytes(offset) + data).decode()
        first = -(-offset // 3)  # first 3-byte group lying wholly inside data
        last = (offset + len(data)) // 3  # one past the last such group
        if last - first >= 2:
            inner = encoded[4 * first : 4 * last]
            out |= {inner, inner.replace("+", "-").replace("/", "_")}
    return out


def secret_forms(secrets: Secrets) -> dict[str, str]:
    """Every text form searched for, mapped to a description that names the kind and form but not the value."""
    forms: dict[str, str] = {}
    for i, block in enumerate(sorted(secrets.blocks)):
        what = f"wire label or Δ #{i}"
        forms[block.hex()] = f"{what} as hex"
        forms[block.hex().upper()] = f"{what} as upper-case hex"
        for text in _b64_inner(block):
            forms[text] = f"{what} as base64"
        for order in ("little", "big"):
            forms[str(int.from_bytes(block, order))] = f"{what} as a {order}-endian decimal integer"
        for j in (0, 8):
            word = int.from_bytes(block[j : j + 8], "little")
            if word >= 10**12:  # a decimal too short would match counts and timings by chance
                forms[str(word)] = f"{what} as a decimal 64-bit word"
        forms[repr(block)[2:-1]] = f"{what} as a Python bytes literal"
    for i, value in enumerate(sorted(secrets.values)):
        what = f"input value #{i}"
        forms[str(value)] = f"{what} as decimal"
        forms[f"{value:x}"] = f"{what} as hex"
        forms[f"{value:X}"] = f"{what} as upper-case hex"
        orders: tuple[Literal["little", "big"], ...] = ("little", "big")
        for order in orders:
            raw = value.to_bytes(8, order)
            forms[raw.hex()] = f"{what} as {order}-endian bytes in hex"
            for text in _b64_inner(raw):
                forms[text] = f"{what} as base64 of {order}-endian bytes"
        msb_first = format(value, f"0{secrets.value_bits}b")[-secrets.value_bits :]
        lsb_first = msb_first[::-1]
        forms[lsb_first] = f"{what} as a bit string, least significant first"
        forms[msb_first] = f"{what} as a bit string, most significant first"
        forms[" ".join(lsb_first)] = f"{what} as a printed bit array"
    return forms


@dataclass(frozen=True)
class Finding:
    """A secret found in a log: where, and which secret in which form (never the secret itself)."""

    source: str
    line: int
    what: str


def _index(forms: dict[str, str]) -> dict[str, list[tuple[str, str]]]:
    """Forms by their first ``SCAN_PREFIX`` characters, so a line is searched in one pass, whatever the count."""
    index: dict[str, list[tuple[str, str]]] = {}
    for form, what in forms.items():
        if len(form) >= SCAN_PREFIX:
            index.setdefault(form[:SCAN_PREFIX], []).append((form, what))
    return index


def scan_text(source: str, text: str, forms: dict[str, str]) -> list[Finding]:
    """Every (line, secret) where a form of the secret occurs in the line."""
    index = _index(forms)
    found: list[Finding] = []
    for number, line in enumerate(text.splitlines(), start=1):
        hits: set[str] = set()
        for i in range(len(line) - SCAN_PREFIX + 1):
            for form, what in index.get(line[i : i + SCAN_PREFIX], ()):
                if what not in hits and line.startswith(form, i):
                    hits.add(what)
                    found.append(Finding(source, number, what))
    return found


def scan_for_secrets(
    secrets: Secrets, paths: Iterable[Path] = (), texts: Iterable[tuple[str, str]] = ()
) -> list[Finding]:
    """Search every line of the files ``paths`` and of the named ``texts`` for every form of every secret."""
    forms = secret_forms(secrets)
    found: list[Finding] = []
    for path in paths:
        found += scan_text(str(path), Path(path).read_text(errors="replace"), forms)
    for name, text in texts:
        found += scan_text(name, text, forms)
    return found
