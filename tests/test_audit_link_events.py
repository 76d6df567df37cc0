"""Cuts and resumes in the session log: one session, its link events inside it.

Specification: a session that was cut and resumed is logged as one session — one start, one transcript, one peer
attestation, one completion — with a ``link_event`` record for each cut, resume and refused attempt between its start
and its end; the verifier counts them and the two nodes' logs still cross-check. A link event outside an open
session, or with free text that looks like key material, is refused and nothing is written.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest
from jointstat.audit import AuditError, SessionLog, compare_logs, verify_log

from tests.test_audit_log import MANIFEST, FakeClock, keys


def resumed_session(a: SessionLog, b: SessionLog, sid: str) -> None:
    ka, kb = a.public_key, b.public_key
    a.session_started(
        sid, job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta", peer_key=kb
    )
    b.session_started(
        sid, job="shared-donors", manifest_digest=MANIFEST, role="evaluator", peer="alpha", peer_key=ka
    )
    digest = hashlib.sha256(sid.encode()).digest()
    sig_a, sig_b = a.transcript(sid, digest), b.transcript(sid, digest)
    for log in (a, b):
        log.link_event(
            sid, event="cut", at_us=1_200_000, frames_sent=40, frames_received=38, detail="stream reset"
        )
        log.link_event(sid, event="resume_refused", at_us=1_250_000, frames_sent=40, frames_received=38)
        log.link_event(sid, event="resumed", at_us=1_300_000, frames_sent=40, frames_received=38)
    a.peer_attestation(sid, sig_b)
    b.peer_attestation(sid, sig_a)
    a.session_completed(sid, duration_us=52_000)
    b.session_completed(sid, duration_us=51_000)


def test_a_resumed_session_is_one_session_with_its_cuts_and_resumes_recorded_inside_it(
    tmp_path: Path,
) -> None:
    ka, kb = keys()
    pa, pb = tmp_path / "alpha.log", tmp_path / "beta.log"
    with (
        SessionLog(pa, ka, "alpha", clock=FakeClock()) as a,
        SessionLog(pb, kb, "beta", clock=FakeClock()) as b,
    ):
        resumed_session(a, b, "s-0001")
    for path in (pa, pb):
        report = verify_log(path)
        assert report.ok, report.problem
        (session,) = report.sessions.values()
        assert (session.outcome, session.cuts, session.resumes) == ("completed", 1, 1)
        (shown,) = report.to_dict()["sessions"]
        assert (shown["cuts"], shown["resumes"]) == (1, 1)
    assert compare_logs(pa, pb).ok


def test_link_events_outside_an_open_session_or_with_key_like_text_are_refused(tmp_path: Path) -> None:
    ka, _ = keys()
    with SessionLog(tmp_path / "alpha.log", ka, "alpha", clock=FakeClock()) as log:
        records = log.records
        with pytest.raises(AuditError, match="never started"):
            log.link_event("s-0009", event="cut", at_us=1, frames_sent=0, frames_received=0)
        log.session_started(
            "s-0002", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta"
        )
        with pytest.raises(AuditError, match="key material"):
            log.link_event(
                "s-0002", event="cut", at_us=1, frames_sent=0, frames_received=0, detail="a" * 40 + "1Bc"
            )
        with pytest.raises(AuditError, match="event"):
            log.link_event("s-0002", event="teleported", at_us=1, frames_sent=0, frames_received=0)  # type: ignore[arg-type]
        assert log.records == records + 1  # only the start was written
