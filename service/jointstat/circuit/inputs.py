"""Input encoding: records from CSV or SQL, validated against a party's table and encoded to its input bits.

Theory of operation
-------------------
``read_csv`` (a file with a header row) and ``read_sql`` (a query against a SQLAlchemy database URL; SQLite is
built in) read the columns the statistic needs and check every value against its column's type:

* ``unsigned`` / ``signed`` — a decimal integer inside the column's range;
* ``fixed`` — a decimal number, scaled by 2^fraction_bits and rounded to the nearest integer (ties to even),
  whose scaled value is inside the column's range;
* ``boolean`` — true/false, yes/no, 1/0 (any case);
* ``key`` — any non-empty text (surrounding spaces removed; letter case folded when the column says
  ``fold_case``), hashed as HMAC-SHA-256(secret, "jointstat key v1" ‖ 0x00 ‖ UTF-8 text) and truncated to the
  column's width: the first 8 bytes of the MAC as a big-endian integer, shifted right by 64 − width.

The key secret is shared by the two organisations (each node holds it in a secret file; it is not in the
manifest); without it the hashed keys cannot be linked to identifiers. Collisions: two distinct identifiers share
a w-bit hash with probability 2^-w. Within one table of n keys some pair collides with probability about
n(n − 1)/2^(w+1) (a collision makes two rows look like a duplicate key, which is reported); across the tables a
keyed join counts about n_g·n_e/2^w false matches in expectation — at 32 bits with 65,536 rows on each side that
is about 1, at 48 bits about 2^-16. ``collision_probability`` computes the first; ``manifest.expected_false_matches``
the second, and a manifest bounds it (``matching.max_false_matches``).

Any problem raises ``InputError`` naming the file (or the query, with the URL's password hidden), the row and the
column — never the value, which is private — and nothing is encoded, so nothing reaches the peer.

``encode_inputs`` then sorts the rows when the statistic needs them sorted (ascending by the encoded value, ties
in file order), checks uniqueness when it forbids duplicate keys, pads to the table's capacity and lays the bits
out exactly as ``jointstat.circuit.compile`` declares them: one validity bit per row (1 for a record, 0 for
padding), then each column as rows × bits, least significant bit first; padding rows are all zero. The circuit
therefore reveals the capacity, never the true count. Encoding is deterministic: the same records, secret and
manifest always give the same bits.
"""

from __future__ import annotations

import csv
import hashlib
import hmac
import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from decimal import ROUND_HALF_EVEN, Decimal, InvalidOperation
from pathlib import Path
from typing import Any

import numpy as np

from jointstat.circuit.agreement import BaseColumn, KeyColumn, Table
from jointstat.circuit.compile import CompiledStatistic
from jointstat.circuit.encode import int_to_bits
from jointstat.circuit.model import Party

KEY_DOMAIN = b"jointstat key v1\x00"
MIN_SECRET_BYTES = 16
_INTEGER = re.compile(r"[+-]?\d+")
_DECIMAL = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")
_TRUE = {"1", "true", "t", "yes", "y"}
_FALSE = {"0", "false", "f", "no", "n"}


class InputError(ValueError):
    """Bad input: names the source (file or query), the row and the column, never the value."""

    def __init__(self, source: str, message: str, row: int | None = None, column: str | None = None) -> None:
        self.source, self.row, self.column = source, row, column
        where = source
        if row is not None:
            where += f", row {row}"
        if column is not None:
            where += f", column {column!r}"
        super().__init__(f"{where}: {message}")


@dataclass
class Records:
    """Validated records of one party: encoded integers per column, with where each row came from."""

    source: str
    columns: dict[str, list[int]]
    rows: list[int]  # the source row number of each record (1 = first data row)
    keys: dict[str, list[str]] = field(default_factory=dict, repr=False)  # normalised identifiers (private)

    def __len__(self) -> int:
        return len(self.rows)


# -- hashing -----------------------------------------------------------------------------------------------------


def hash_key(secret: bytes, text: str, width: int) -> int:
    """HMAC-SHA-256(secret, KEY_DOMAIN ‖ UTF-8 text), first 8 bytes big-endian, top ``width`` bits."""
    mac = hmac.new(secret, KEY_DOMAIN + text.encode("utf-8"), hashlib.sha256).digest()
    return int.from_bytes(mac[:8], "big") >> (64 - width)


def normalise_key(text: str, fold_case: bool) -> str:
    text = text.strip()
    return text.casefold() if fold_case else text


def collision_probability(n: int, width: int) -> float:
    """Probability that some two of n distinct identifiers share a width-bit hash (birthday bound, exact form)."""
    if n < 2:
        return 0.0
    return -math.expm1(-n * (n - 1) / 2.0 / 2.0**width)


def check_secret(secret: bytes | None, source: str) -> bytes:
    if secret is None:
        raise InputError(source, "the table has key columns but no key secret was given")
    if len(secret) < MIN_SECRET_BYTES:
        raise InputError(source, f"the key secret must be at least {MIN_SECRET_BYTES} bytes")
    return bytes(secret)


# -- value parsing -------------------------------------------------------------------------------------------------


def _parse(col: BaseColumn, value: Any, secret: bytes | None) -> tuple[int, str | None]:
    """(encoded integer, normalised key text or None); raises ValueError with a message that omits the value."""
    kind = col.type
    if value is None or (isinstance(value, str) and not value.strip()):
        raise ValueError("the value is missing")
    if isinstance(col, KeyColumn):
        text = normalise_key(str(value), col.fold_case)
        if not text:
            raise ValueError("the key is empty")
        assert secret is not None
        return hash_key(secret, text, col.bits), text
    if kind == "boolean":
        if isinstance(value, bool):
            return int(value), None
        word = str(value).strip().lower()
        if word in _TRUE:
            return 1, None
        if word in _FALSE:
            return 0, None
        raise ValueError("not a boolean (true/false, yes/no or 1/0)")
    lo, hi = col.range()
    if kind in ("unsigned", "signed"):
        if isinstance(value, bool):
            raise ValueError("not an integer")
        if isinstance(value, int):
            v = value
        elif isinstance(value, float | Decimal):
            if not math.isfinite(float(value)) or value != int(value):
                raise ValueError("not an integer")
            v = int(value)
        else:
            text = str(value).strip()
            if not _INTEGER.fullmatch(text):
                raise ValueError("not an integer")
            v = int(text)
        what = f"{kind} {col.bits}-bit column"
    else:  # fixed
        if isinstance(value, bool):
            raise ValueError("not a number")
        text = repr(value) if isinstance(value, float) else str(value).strip()
        if not _DECIMAL.fullmatch(text):
            raise ValueError("not a number")
        try:
            scaled = (Decimal(text) * (1 << col.frac)).quantize(Decimal(1), rounding=ROUND_HALF_EVEN)
        except InvalidOperation:
            raise ValueError("not a number") from None
        v = int(scaled)
        step = Decimal(1) / (1 << col.frac)
        lo_v, hi_v = Decimal(lo) * step, Decimal(hi) * step
        what = f"fixed-point column ({lo_v.normalize():f} to {hi_v.normalize():f})"
        if not lo <= v <= hi:
            raise ValueError(f"the value is outside the range of this {what}")
        return v, None
    if not lo <= v <= hi:
        raise ValueError(f"the value is outside the range of this {what} ({lo} to {hi})")
    return v, None


def _records(
    source: str,
    header: Sequence[str],
    rows: Iterable[Sequence[Any]],
    table: Table,
    columns: Sequence[str] | None,
    secret: bytes | None,
) -> Records:
    names = [c.name for c in table.columns] if columns is None else list(columns)
    index: dict[str, int] = {}
    for name in names:
        if table.column(name) is None:
            raise InputError(source, "the manifest's table has no such column", column=name)
        positions = [i for i, h in enumerate(header) if h.strip() == name]
        if not positions:
            raise InputError(source, "the column is missing (the header row does not name it)", column=name)
        if len(positions) > 1:
            raise InputError(source, "the header names this column more than once", column=name)
        index[name] = positions[0]
    cols = {name: table.column(name) for name in names}
    if any(c.type == "key" for c in cols.values()):  # type: ignore[union-attr]
        secret = check_secret(secret, source)
    out = Records(source, {n: [] for n in names}, [], {n: [] for n in names if cols[n].type == "key"})  # type: ignore[union-attr]
    for number, row in enumerate(rows, start=1):
        if len(out) >= table.capacity:
            raise InputError(source, f"more rows than the table's capacity of {table.capacity}", row=number)
        for name in names:
            pos = index[name]
            if pos >= len(row):
                raise InputError(source, "the row has no value for this column", row=number, column=name)
            try:
                value, key_text = _parse(cols[name], row[pos], secret)  # type: ignore[arg-type]
            except ValueError as exc:
                raise InputError(source, str(exc), row=number, column=name) from None
            out.columns[name].append(value)
            if key_text is not None:
                out.keys[name].append(key_text)
        out.rows.append(number)
    return out


def read_csv(
    path: str | Path, table: Table, *, columns: Sequence[str] | None = None, key_secret: bytes | None = None
) -> Records:
    """Records of ``table`` from a CSV file with a header row (only ``columns`` are read, default all)."""
    source = str(path)
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            reader = csv.reader(fh)
            header = next(reader, None)
            if header is None:
                raise InputError(source, "the file is empty (a header row is expected)")
            return _records(source, header, reader, table, columns, key_secret)
    except OSError as exc:
        raise InputError(source, f"cannot read the file: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise InputError(source, "the file is not UTF-8 text") from None
    except csv.Error as exc:
        raise InputError(source, f"malformed CSV: {exc}") from None


def describe_query(url: str, query: str) -> str:
    """How errors name a query: its text (shortened) and the URL with any password hidden."""
    from sqlalchemy.engine import make_url
    from sqlalchemy.exc import ArgumentError

    try:
        shown = make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        shown = "<unparsable database URL>"
    text = " ".join(query.split())
    if len(text) > 80:
        text = text[:77] + "..."
    return f"query {text!r} on {shown}"


def read_sql(
    url: str,
    query: str,
    table: Table,
    *,
    columns: Sequence[str] | None = None,
    key_secret: bytes | None = None,
) -> Records:
    """Records of ``table`` from the result of ``query`` against the database at ``url`` (SQLAlchemy)."""
    from sqlalchemy import create_engine, text
    from sqlalchemy.exc import ArgumentError, SQLAlchemyError

    source = describe_query(url, query)
    try:
        engine = create_engine(url)
    except (ArgumentError, SQLAlchemyError, ImportError) as exc:
        raise InputError(source, f"cannot use the database URL: {type(exc).__name__}") from None
    try:
        with engine.connect() as conn:
            result = conn.execute(text(query))
            header = list(result.keys())
            return _records(source, header, (tuple(r) for r in result), table, columns, key_secret)
    except SQLAlchemyError as exc:
        detail = str(getattr(exc, "orig", None) or type(exc).__name__).splitlines()[0]
        raise InputError(source, f"the query failed: {detail}") from None
    finally:
        engine.dispose()


# -- encoding ------------------------------------------------------------------------------------------------------


def encode_inputs(compiled: CompiledStatistic, party: Party, records: Records) -> np.ndarray:
    """The party's input bits for the compiled circuit (layout in ``jointstat.circuit.compile``)."""
    party = Party(party)
    layout = compiled.inputs[party]
    table = compiled.manifest.table(party)
    n = len(records)
    if n > layout.capacity:
        raise InputError(records.source, f"more rows than the table's capacity of {layout.capacity}", row=n)
    for name in layout.columns:
        if name not in records.columns:
            raise InputError(records.source, "the records do not include this column", column=name)
    order = list(range(n))
    needs = layout.needs
    if needs.unique:
        _check_unique(records, needs.unique, table.column(needs.unique))  # type: ignore[arg-type]
    if needs.sort_by:
        keys = records.columns[needs.sort_by]
        order.sort(key=lambda i: keys[i])
    parts = [np.zeros(layout.capacity, dtype=np.uint8)]
    parts[0][:n] = 1
    for f in layout.fields[1:]:
        values = [records.columns[f.name][i] for i in order] + [0] * (layout.capacity - n)
        parts.append(int_to_bits(values, f.width).reshape(-1))
    bits = np.concatenate(parts)
    if bits.shape[0] != layout.bits:
        raise AssertionError(
            "input layout and encoding disagree"
        )  # the compile layout and this encoder share it
    return bits


def _check_unique(records: Records, name: str, col: BaseColumn) -> None:
    values = records.columns[name]
    seen: dict[int, int] = {}
    texts = records.keys.get(name)
    for i, v in enumerate(values):
        j = seen.get(v)
        if j is None:
            seen[v] = i
            continue
        first, again = records.rows[j], records.rows[i]
        if texts is not None and texts[i] != texts[j]:
            raise InputError(
                records.source,
                f"different keys in rows {first} and {again} have the same {col.bits}-bit hash; use a wider key"
                " column (see the collision note in jointstat.circuit.inputs)",
                row=again,
                column=name,
            )
        raise InputError(
            records.source,
            f"duplicate value (also in row {first}); this statistic needs each value once per party",
            row=again,
            column=name,
        )
