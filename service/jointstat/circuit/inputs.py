"""Input encoding: records from CSV or SQL, validated against a party's table and encoded to its input bits.

Theory of operation
-------------------
``read_csv`` (a file with a header row) and ``read_sql`` (a query against a SQLAlchemy database URL; SQLite is
built in) read the columns the statistic needs and check every value against its column's type:

* ``unsigned`` / ``signed`` — a decimal integer inside the column's range;
* ``fixed`` — a decimal number, scaled by 2^fraction_bits, whose scaled value is inside the column's range. A value
  with more precision than the column holds (41.26 in a column with one fraction bit, whose steps are halves) is
  refused, unless the column says how to round it: ``rounding: nearest`` (a tie to the even neighbour), ``down``
  (toward −∞), ``up`` (toward +∞) or ``toward_zero``; integer columns take the same rule for a decimal such as 3.5;
* ``boolean`` — true/false, yes/no, 1/0 (any case);
* ``identifier`` (formerly ``key``) — any non-empty text (surrounding spaces removed; letter case folded when the
  column says ``fold_case``), hashed as HMAC-SHA-256(secret, "jointstat key v1" ‖ 0x00 ‖ UTF-8 text) and
  truncated to the column's width: the first 8 bytes of the MAC as a big-endian integer, shifted right by
  64 − width.

CSV files: a header row, then one record per line; a record is numbered by the file line it starts on (the header
is line 1), so errors point at the line an editor shows. Blank lines at the end of the file are ignored; a blank
line followed by more records is refused (it is more likely a missing record than decoration).

The key secret is shared by the two organisations (each node holds it in a secret file; it is not in the
manifest); without it the hashed keys cannot be linked to identifiers. Collisions: two distinct identifiers share
a w-bit hash with probability 2^-w. Within one table of n keys some pair collides with probability about
n(n − 1)/2^(w+1) (a collision makes two rows look like a duplicate key, which is reported); across the tables a
keyed join counts about n_g·n_e/2^w false matches in expectation — at 32 bits with 65,536 rows on each side that
is about 1, at 48 bits about 2^-16. ``collision_probability`` computes the first; ``manifest.expected_false_matches``
the second, and a manifest bounds it (``matching.max_false_matches``).

Any problem raises ``InputError`` naming the file and line (or the query, with the URL's password hidden, and
the row) and the column — never the value, which is private — and nothing is encoded, so nothing reaches the peer.

``encode_inputs`` then checks uniqueness where a statistic forbids duplicate keys, and lays the bits out exactly as
``jointstat.circuit.compile`` declares them: one validity bit per row (1 for a record, 0 for padding), then, for
each row order, each column as rows × bits, least significant bit first, the rows sorted in that order
(ascending by the encoded value, ties in file order) and padded to the table's capacity with all-zero rows. The
circuit therefore reveals the capacity, never the true count. The table's part of the encoding is deterministic:
the same records, secret and manifest always give the same bits. When the manifest noises an output, the layout
ends with the party's random bits for the noise: drawn fresh from the operating system's CSPRNG (``os.urandom``)
at every encoding, so every attempt of a run draws new noise; they are never logged, stored or reused.
"""

from __future__ import annotations

import csv
import hashlib
import hmac
import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from decimal import ROUND_CEILING, ROUND_DOWN, ROUND_FLOOR, ROUND_HALF_EVEN, Decimal, InvalidOperation
from pathlib import Path
from typing import Any

import numpy as np

from jointstat.circuit.agreement import BaseColumn, IdentifierColumn, Table
from jointstat.circuit.compile import COLUMN, RANDOM, VALID, CompiledStatistic
from jointstat.circuit.encode import int_to_bits
from jointstat.circuit.library.noise import random_bits
from jointstat.circuit.model import Party

KEY_DOMAIN = b"jointstat key v1\x00"
MIN_SECRET_BYTES = 16
_INTEGER = re.compile(r"[+-]?\d+")
_DECIMAL = re.compile(r"[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?")
_TRUE = {"1", "true", "t", "yes", "y"}
ROUNDING_MODES = {
    "nearest": ROUND_HALF_EVEN,
    "down": ROUND_FLOOR,
    "up": ROUND_CEILING,
    "toward_zero": ROUND_DOWN,
}
_FALSE = {"0", "false", "f", "no", "n"}


class InputError(ValueError):
    """Bad input: names the source (file or query), the line or row and the column, never the value."""

    def __init__(
        self, source: str, message: str, row: int | None = None, column: str | None = None, unit: str = "row"
    ) -> None:
        self.source, self.row, self.column, self.unit = source, row, column, unit
        where = source
        if row is not None:
            where += f", {unit} {row}"
        if column is not None:
            where += f", column {column!r}"
        super().__init__(f"{where}: {message}")


@dataclass
class Records:
    """Validated records of one party: encoded integers per column, with where each row came from."""

    source: str
    columns: dict[str, list[int]]
    rows: list[int]  # where each record is: its file line (CSV, the header is line 1) or its row number (SQL)
    keys: dict[str, list[str]] = field(default_factory=dict, repr=False)  # normalised identifiers (private)
    unit: str = "row"  # "line" for a file, "row" for a query result

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
    if isinstance(col, IdentifierColumn):
        text = normalise_key(str(value), col.fold_case)
        if not text:
            raise ValueError("the identifier is empty")
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
    if isinstance(value, bool):
        raise ValueError("not an integer" if kind != "fixed" else "not a number")
    if kind in ("unsigned", "signed") and isinstance(value, int):
        v = value
    elif kind in ("unsigned", "signed") and isinstance(value, str) and _INTEGER.fullmatch(value.strip()):
        v = int(value.strip())
    else:
        v = _scaled(col, value)
    if not lo <= v <= hi:
        if kind == "fixed":
            step = Decimal(1) / (1 << col.frac)
            lo_v, hi_v = (Decimal(lo) * step).normalize(), (Decimal(hi) * step).normalize()
            raise ValueError(
                f"the value is outside the range of this fixed-point column ({lo_v:f} to {hi_v:f})"
            )
        raise ValueError(
            f"the value is outside the range of this {kind} {col.bits}-bit column ({lo} to {hi})"
        )
    return v, None


def _scaled(col: BaseColumn, value: Any) -> int:
    """A decimal value × 2^fraction_bits as an integer, rounded only as the column's ``rounding`` says."""
    what = "not a number" if col.type == "fixed" else "not an integer"
    if isinstance(value, float | Decimal) and not math.isfinite(float(value)):
        raise ValueError(what)
    text = repr(value) if isinstance(value, float) else str(value).strip()
    if not _DECIMAL.fullmatch(text):
        raise ValueError(what)
    try:
        scaled = Decimal(text) * (1 << col.frac)
        whole = scaled.to_integral_value()
    except InvalidOperation:
        raise ValueError(what) from None
    if whole == scaled:
        return int(whole)
    rule = col.rounding_rule
    if rule is None:
        step = (
            "whole numbers" if col.frac == 0 else f"steps of 2^-{col.frac} = {Decimal(1) / (1 << col.frac)}"
        )
        raise ValueError(
            f"the value has more precision than the column holds ({step}); round it in the source, or say in the "
            "manifest how the column rounds (rounding: nearest, down, up or toward_zero)"
        )
    return int(scaled.quantize(Decimal(1), rounding=ROUNDING_MODES[rule]))


def _records(
    source: str,
    header: Sequence[str],
    rows: Iterable[tuple[int, Sequence[Any]]],
    table: Table,
    columns: Sequence[str] | None,
    secret: bytes | None,
    unit: str = "row",
) -> Records:
    """Validated records from numbered rows (each row's number is where it is: a file line or a result row)."""
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
    cols: dict[str, BaseColumn] = {}
    for name in names:
        col = table.column(name)
        assert col is not None
        cols[name] = col
    if any(c.identifier for c in cols.values()):
        secret = check_secret(secret, source)
    out = Records(source, {n: [] for n in names}, [], {n: [] for n in names if cols[n].identifier}, unit)
    for number, row in rows:
        if len(out) >= table.capacity:
            raise InputError(
                source, f"more rows than the table's capacity of {table.capacity}", row=number, unit=unit
            )
        for name in names:
            pos = index[name]
            if pos >= len(row):
                raise InputError(
                    source, "the row has no value for this column", row=number, column=name, unit=unit
                )
            try:
                value, key_text = _parse(cols[name], row[pos], secret)
            except ValueError as exc:
                raise InputError(source, str(exc), row=number, column=name, unit=unit) from None
            out.columns[name].append(value)
            if key_text is not None:
                out.keys[name].append(key_text)
        out.rows.append(number)
    return out


def _csv_rows(reader: Any, source: str) -> Iterable[tuple[int, list[str]]]:
    """Each record with the file line it starts on; blank lines at the end are skipped, others refused."""
    blank: int | None = None
    line = reader.line_num  # the lines read so far (the header's)
    for row in reader:
        start, line = line + 1, reader.line_num
        if not row or (len(row) == 1 and not row[0].strip()):
            blank = start if blank is None else blank
            continue
        if blank is not None:
            raise InputError(
                source,
                "the line is blank, and records follow it (only blank lines at the end are ignored)",
                row=blank,
                unit="line",
            )
        yield start, row


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
            return _records(source, header, _csv_rows(reader, source), table, columns, key_secret, "line")
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
            numbered = ((i, tuple(r)) for i, r in enumerate(result, start=1))
            return _records(source, header, numbered, table, columns, key_secret)
    except SQLAlchemyError as exc:
        detail = str(getattr(exc, "orig", None) or type(exc).__name__).splitlines()[0]
        raise InputError(source, f"the query failed: {detail}") from None
    finally:
        engine.dispose()


# -- encoding ------------------------------------------------------------------------------------------------------


def encode_inputs(
    compiled: CompiledStatistic,
    party: Party,
    records: Records,
    *,
    random_source: np.random.Generator | None = None,
) -> np.ndarray:
    """The party's input bits for the compiled job (layout in ``jointstat.circuit.compile``). The random bits of
    the noise, if any, come from the OS CSPRNG (``random_source`` only in tests, to repeat a run)."""
    party = Party(party)
    layout = compiled.inputs[party]
    table = compiled.manifest.table(party)
    n = len(records)
    if n > layout.capacity:
        raise InputError(
            records.source,
            f"more rows than the table's capacity of {layout.capacity}",
            row=n,
            unit=records.unit,
        )
    for name in layout.columns:
        if name not in records.columns:
            raise InputError(records.source, "the records do not include this column", column=name)
    for name in layout.unique:
        col = table.column(name)
        assert col is not None
        _check_unique(records, name, col)
    orders: dict[str | None, list[int]] = {}
    parts = []
    for f in layout.fields:
        if f.kind == VALID:
            valid = np.zeros(layout.capacity, dtype=np.uint8)
            valid[:n] = 1
            parts.append(valid)
        elif f.kind == COLUMN:
            if f.order not in orders:
                order = list(range(n))
                if f.order is not None:
                    keys = records.columns[f.order]
                    order.sort(key=lambda i: keys[i])
                orders[f.order] = order
            values = [records.columns[f.name][i] for i in orders[f.order]] + [0] * (layout.capacity - n)
            parts.append(int_to_bits(values, f.width).reshape(-1))
        elif f.kind == RANDOM:
            parts.append(random_bits(1, f.width, random_source).reshape(-1))
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
        first, again, unit = records.rows[j], records.rows[i], records.unit
        if texts is not None and texts[i] != texts[j]:
            raise InputError(
                records.source,
                f"different identifiers in {unit}s {first} and {again} have the same {col.bits}-bit hash; use a"
                " wider identifier column (see the collision note in jointstat.circuit.inputs)",
                row=again,
                column=name,
                unit=unit,
            )
        raise InputError(
            records.source,
            f"duplicate value (also in {unit} {first}); this statistic needs each value once per party",
            row=again,
            column=name,
            unit=unit,
        )
