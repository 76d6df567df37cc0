"""A job's result files: this node's own outputs of each completed run, written once and read back oldest first.

Theory of operation
-------------------
The node writes one JSON file per completed run (``write_result``, format ``jointstat-result/1``) into the job's
result directory, owner-only and atomically (``secrets.write_private_file``: a reader sees the whole file or
none), named ``<UTC time>-<session id>.json`` so that names sort by time. It holds the job, the session, this
node's role, the manifest digest, the times, ``withheld`` (the disclosure rule's flag, or null when this node
receives no output), ``withheld_by`` (each withheld output and the rule that withheld it, e.g. ``{"spend.mean":
"no_rows"}``; empty when nothing is) and the named outputs as the compiled manifest decoded them (addressed
``<statistic>.<output>`` when the manifest lists several statistics). ``read_result`` parses
one file strictly: the format tag, the job, the session, the role, the times, the ``withheld`` flag and the named
outputs; anything else is a ``ResultFileError`` naming the file and the field (never a value). ``job_results``
lists the newest ``limit`` files of a directory and reads each, giving them oldest first by their finish time
(names carry whole seconds only); a file that cannot be read is returned as a ``ResultFileError`` after them, so
one damaged file does not hide the others.

Only this node's own results are in these files; the other party's never reach this node.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from jointstat.circuit.model import Party
from jointstat.node.secrets import ensure_private_dir, write_private_file

if TYPE_CHECKING:
    from jointstat.node.config import JobConfig

RESULT_FORMAT = "jointstat-result/1"  # the tag write_result writes
MAX_RESULT_BYTES = 1 << 20
RESULT_NAME = re.compile(r"\d{8}T\d{6}Z-[A-Za-z0-9][A-Za-z0-9._:-]{0,127}\.json")
OutputValue = int | float | bool | str | list[Any] | None


class ResultFileError(Exception):
    """A result file that cannot be read; the message names the file and what is wrong, never a value."""

    def __init__(self, path: Path, message: str) -> None:
        super().__init__(f"{path}: {message}")
        self.path = path


@dataclass(frozen=True)
class ResultRecord:
    """One completed run's result as this node received it."""

    path: Path
    job: str
    session: str
    role: str
    scheduled_for: datetime
    finished_at: datetime
    withheld: bool | None  # None: this node receives no output of the job (only the peer does)
    outputs: dict[str, OutputValue]
    withheld_by: dict[str, str] = field(default_factory=dict)  # output → the rule that withheld it


def write_result(
    job: JobConfig,
    *,
    session_id: str,
    party: Party,
    digest: bytes,
    scheduled_for: datetime,
    finished_at: datetime,
    outputs: dict[str, Any],
) -> Path:
    """Write this node's result of one session of ``job``, owner-only and atomically; returns the file's path."""
    directory = ensure_private_dir(job.results)
    stamp = finished_at.astimezone(UTC).strftime("%Y%m%dT%H%M%SZ")
    body = {
        "format": RESULT_FORMAT,
        "job": job.name,
        "session": session_id,
        "role": Party(party).role_name,
        "manifest_digest": digest.hex(),
        "scheduled_for": scheduled_for.astimezone(UTC).isoformat(),
        "finished_at": finished_at.astimezone(UTC).isoformat(),
        "withheld": outputs.get("withheld") if outputs else None,
        "withheld_by": dict(outputs.get("withheld_by") or {}),
        "outputs": {k: v for k, v in outputs.items() if k not in ("withheld", "withheld_by")},
    }
    data = (json.dumps(body, indent=2) + "\n").encode("utf-8")
    return write_private_file(directory / f"{stamp}-{session_id}.json", data)


def _time(path: Path, body: dict[str, Any], key: str) -> datetime:
    value = body.get(key)
    try:
        parsed = datetime.fromisoformat(value) if isinstance(value, str) else None
    except ValueError:
        parsed = None
    if parsed is None or parsed.tzinfo is None:
        raise ResultFileError(path, f"{key} is not an ISO 8601 time with a time zone")
    return parsed


def _text(path: Path, body: dict[str, Any], key: str) -> str:
    value = body.get(key)
    if not isinstance(value, str) or not value:
        raise ResultFileError(path, f"{key} is missing or not text")
    return value


def read_result(path: str | Path) -> ResultRecord:
    """Parse one result file (see the module docstring)."""
    p = Path(path)
    try:
        with p.open("rb") as f:
            data = f.read(MAX_RESULT_BYTES + 1)
    except OSError as exc:
        raise ResultFileError(p, f"cannot read ({exc.strerror})") from None
    if len(data) > MAX_RESULT_BYTES:
        raise ResultFileError(p, f"larger than {MAX_RESULT_BYTES} bytes, not a result file")
    try:
        body = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise ResultFileError(p, "not UTF-8 JSON") from None
    if not isinstance(body, dict) or body.get("format") != RESULT_FORMAT:
        raise ResultFileError(p, f"not a result file (format is not {RESULT_FORMAT})")
    role = _text(p, body, "role")
    if role not in ("garbler", "evaluator"):
        raise ResultFileError(p, "role is neither garbler nor evaluator")
    withheld = body.get("withheld")
    if withheld is not None and not isinstance(withheld, bool):
        raise ResultFileError(p, "withheld is neither true, false nor null")
    outputs = body.get("outputs")
    if not isinstance(outputs, dict) or not all(isinstance(k, str) for k in outputs):
        raise ResultFileError(p, "outputs is not an object of named values")
    withheld_by = body.get("withheld_by", {})
    if not isinstance(withheld_by, dict) or not all(
        isinstance(k, str) and isinstance(v, str) for k, v in withheld_by.items()
    ):
        raise ResultFileError(p, "withheld_by is not an object of output names and rules")
    return ResultRecord(
        path=p,
        job=_text(p, body, "job"),
        session=_text(p, body, "session"),
        role=role,
        scheduled_for=_time(p, body, "scheduled_for"),
        finished_at=_time(p, body, "finished_at"),
        withheld=withheld,
        outputs=dict(outputs),
        withheld_by=dict(withheld_by),
    )


def job_results(directory: str | Path, limit: int = 100) -> list[ResultRecord | ResultFileError]:
    """The newest ``limit`` result files of a job's directory, oldest first (none if it does not exist yet)."""
    d = Path(directory)
    try:
        names = sorted(entry.name for entry in d.iterdir() if RESULT_NAME.fullmatch(entry.name))
    except FileNotFoundError:
        return []
    except OSError as exc:
        return [ResultFileError(d, f"cannot list the directory ({exc.strerror})")]
    good: list[ResultRecord] = []
    bad: list[ResultFileError] = []
    for name in names[-limit:] if limit > 0 else []:
        try:
            good.append(read_result(d / name))
        except ResultFileError as exc:
            bad.append(exc)
    good.sort(key=lambda r: r.finished_at)  # names carry whole seconds only
    return [*good, *bad]
