"""Known-answer vector files of our own plain format, and their reader.

A file is a list of records separated by blank lines; each record is ``name = value`` lines (hex strings for bytes,
decimal for lengths); lines starting with ``#`` are comments. ``tccr_hash.txt`` and ``prg_ctr.txt`` are written by
``generate.py`` from jointstat's own code and checked by ``tests/test_primitive_vectors.py`` against independent
implementations written in the test from the definitions.
"""

from __future__ import annotations

from pathlib import Path

HERE = Path(__file__).resolve().parent


def read_vectors(path: Path, fields: tuple[str, ...]) -> list[dict[str, str]]:
    """The records of a vector file; each must have exactly ``fields``. Errors name the file and the line."""
    records: list[dict[str, str]] = []
    record: dict[str, str] = {}
    start = 0

    def close() -> None:
        if not record:
            return
        if tuple(record) != fields:
            raise ValueError(
                f"{path.name}: the record at line {start} has fields {', '.join(record)}; "
                f"expected {', '.join(fields)} in that order"
            )
        records.append(dict(record))
        record.clear()

    lines = path.read_text(encoding="ascii").splitlines()
    for number, raw in enumerate(lines, start=1):
        line = raw.strip()
        if line.startswith("#"):
            continue
        if not line:
            close()
            continue
        name, sep, value = (part.strip() for part in line.partition("="))
        if not sep or not name or name in record:
            raise ValueError(f"{path.name}, line {number}: expected a new 'name = value' line, got {raw!r}")
        if not record:
            start = number
        record[name] = value
    close()
    return records
