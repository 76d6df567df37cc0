"""The console's routes over a fixed ``NodeView`` (no node running): login, CSRF, security headers, cookie flags,
body limits, escaping, and what each page shows.

Specification: no page or JSON answer is given without a login; the login token is compared in full, a wrong one
refused; logging in replaces the visit (new cookie); the cookie is HttpOnly, SameSite=Strict, Path=/ (and Secure
with the ``__Host-`` prefix behind the operator's TLS proxy); every POST needs the visit's CSRF token and is
refused from another site; every response carries the security headers and the strict Content-Security-Policy;
pages hold no inline script or style and reference nothing elsewhere; a Host header that is not loopback is
refused; bodies without a length, or over the route's limit, are refused before they are read; run now starts
only jobs this node initiates; an uploaded peer log is cross-checked as ``audit compare`` does.
"""

from __future__ import annotations

import html
import re
from collections.abc import AsyncIterator
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, timedelta
from pathlib import Path

import httpx
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from jointstat.audit import SessionLog
from jointstat.node.console.app import CONTENT_SECURITY_POLICY, SECURITY_HEADERS, build_app
from jointstat.node.console.auth import Visits
from jointstat.node.console.settings import ConsoleSettings
from jointstat.node.console.view import (
    JobView,
    LogKeys,
    PhaseView,
    PrivacyBudget,
    ResultView,
    RunRefused,
    RunView,
    SessionView,
)

from tests.consoletools import csrf_of, inline_code, log_in, outside_references
from tests.test_audit_log import FakeClock, keys, run_session, write_pair

TOKEN = "Zq3" * 15  # 45 characters; any printable token of 32 or more is accepted (common practice)
BASE = "http://127.0.0.1:7304"
T0 = datetime(2025, 3, 3, 1, 15, tzinfo=UTC)
LIVE = "4be1" * 8
DONE = "s-0001"
HOSTILE = '<img src=x onerror="alert(1)">'


def job(
    name: str, *, initiates: bool, budget: PrivacyBudget | None = None, reason: str | None = None
) -> JobView:
    return JobView(
        name=name,
        role="garbler" if initiates else "evaluator",
        peer="beta",
        initiates=initiates,
        cron="15 2 * * 1",
        timezone="Europe/Paris",
        window_minutes=120,
        window_open=not initiates,
        next_run=T0 + timedelta(days=7) if initiates else None,
        last_run=RunView(name, "refused" if reason else "completed", "schedule", T0, T0, T0, reason, DONE, 1),
        last_success=T0,
        privacy_budget=budget,
    )


@dataclass
class FakeView:
    """A node seen by the console: two jobs, a running and a finished session, results, and a session log."""

    log_bytes: bytes
    node_name: str = "alpha"
    jobs_shown: list[JobView] = field(
        default_factory=lambda: [
            job("weekly-totals", initiates=True),
            job("monthly-check", initiates=False, reason="outside_window: not inside the run window"),
        ]
    )
    runs: list[str] = field(default_factory=list)
    results_shown: dict[str, list[ResultView]] = field(default_factory=dict)

    async def jobs(self) -> list[JobView]:
        return self.jobs_shown

    async def sessions(self, limit: int) -> list[SessionView]:
        running = SessionView(
            LIVE,
            "weekly-totals",
            "garbler",
            "beta",
            "operator",
            "running",
            None,
            "garbling",
            T0,
            True,
            and_gates_done=1_250_000,
            and_gates_total=5_000_000,
            bytes_sent=40 << 20,
            bytes_received=3 << 20,
            and_gates_per_s=2_500_000.0,
            seconds_left=1.5,
            elapsed_s=2.25,
            phases=(
                PhaseView("prepare", 0.25, 0, 0),
                PhaseView("oblivious_transfer", 0.125, 3 << 20, 3 << 20),
            ),
        )
        done = SessionView(
            DONE, "weekly-totals", "garbler", "beta", "schedule", "completed", None, None, T0, False
        )
        return [running, done][:limit]

    async def session(self, session_id: str) -> SessionView | None:
        for s in await self.sessions(10):
            if s.session == session_id:
                return s
        return None

    async def results(self, job: str, limit: int) -> list[ResultView]:
        return self.results_shown.get(job, [])[-limit:]

    async def run_now(self, job: str) -> str:
        for j in self.jobs_shown:
            if j.name == job and j.initiates:
                self.runs.append(job)
                return "7e57" * 8
        raise RunRefused(f"this node does not initiate job {job!r}; it runs when node beta starts it")

    async def session_log(self) -> bytes:
        return self.log_bytes

    def log_keys(self) -> LogKeys:
        alpha, beta = keys()
        return LogKeys(alpha.public_key(), {"beta": beta.public_key()})


@pytest.fixture
def logs(tmp_path: Path) -> tuple[Path, Path]:
    """Both nodes' logs (alpha is this node, beta its peer): two completed sessions and one aborted."""
    return write_pair(tmp_path, ["completed", "aborted", "completed"])


@pytest.fixture
def view(logs: tuple[Path, Path]) -> FakeView:
    return FakeView(logs[0].read_bytes())


def client_for(
    view: FakeView, settings: ConsoleSettings | None = None, base: str = BASE
) -> httpx.AsyncClient:
    app = build_app(view, Visits(TOKEN), settings or ConsoleSettings())
    return httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url=base, follow_redirects=False)


@pytest.fixture
async def anonymous(view: FakeView) -> AsyncIterator[httpx.AsyncClient]:
    async with client_for(view) as client:
        yield client


@pytest.fixture
async def operator(view: FakeView) -> AsyncIterator[httpx.AsyncClient]:
    async with client_for(view) as client:
        answer = await log_in(client, TOKEN)
        assert answer.status_code == 303 and answer.headers["location"] == "/jobs"
        yield client


async def csrf(client: httpx.AsyncClient) -> str:
    return csrf_of((await client.get("/jobs")).text)


def shown(answer: httpx.Response) -> str:
    """A page's text as the browser shows it (entities such as &#39; decoded)."""
    return html.unescape(answer.text)


PAGES = ("/", "/jobs", "/sessions", f"/sessions/{LIVE}", f"/sessions/{DONE}", "/results", "/audit")
JSON = ("/sessions/live", f"/sessions/{LIVE}/progress")


# -- login -------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("path", PAGES)
async def test_every_page_sends_a_visitor_without_a_login_to_the_login_page(
    anonymous: httpx.AsyncClient, path: str
) -> None:
    answer = await anonymous.get(path)
    assert answer.status_code == 303
    assert answer.headers["location"] == ("/jobs" if path == "/" else "/login")


@pytest.mark.parametrize("path", JSON)
async def test_the_live_progress_endpoints_answer_401_without_a_login(
    anonymous: httpx.AsyncClient, path: str
) -> None:
    answer = await anonymous.get(path)
    assert answer.status_code == 401 and "log in" in answer.json()["error"]


@pytest.mark.parametrize("wrong", ["", "Zq3", TOKEN[:-1], TOKEN + "x", TOKEN.lower(), " " * 45])
async def test_a_wrong_token_is_refused_and_the_visit_stays_logged_out(
    anonymous: httpx.AsyncClient, wrong: str
) -> None:
    answer = await log_in(anonymous, wrong)
    assert answer.status_code == 403
    assert "That is not this node's console token." in shown(answer)
    assert (await anonymous.get("/jobs")).headers["location"] == "/login"


async def test_the_right_token_logs_in_with_a_new_visit_and_the_old_cookie_is_worth_nothing(
    view: FakeView,
) -> None:
    async with client_for(view) as client:
        page = await client.get("/login")
        before = client.cookies["jointstat_console"]
        answer = await client.post("/login", data={"token": f"  {TOKEN}\n", "csrf": csrf_of(page.text)})
        after = client.cookies["jointstat_console"]
        assert answer.status_code == 303 and after != before
        assert (await client.get("/jobs")).status_code == 200
        client.cookies.set("jointstat_console", before)
        assert (await client.get("/jobs")).headers["location"] == "/login"


async def test_a_login_without_its_visits_csrf_token_is_refused_even_with_the_right_token(
    view: FakeView,
) -> None:
    async with client_for(view) as one, client_for(view) as other:
        await one.get("/login")
        others_csrf = csrf_of((await other.get("/login")).text)
        for form in ({"token": TOKEN}, {"token": TOKEN, "csrf": ""}, {"token": TOKEN, "csrf": others_csrf}):
            answer = await one.post("/login", data=form)
            assert answer.status_code == 403 and "check token" in shown(answer)
        assert (await one.get("/jobs")).headers["location"] == "/login"


async def test_a_login_without_the_visit_cookie_is_refused(anonymous: httpx.AsyncClient) -> None:
    page = await anonymous.get("/login")
    anonymous.cookies.clear()
    answer = await anonymous.post("/login", data={"token": TOKEN, "csrf": csrf_of(page.text)})
    assert answer.status_code == 403 and "did not send the console's cookie" in shown(answer)


async def test_a_logged_in_visit_opening_the_login_page_goes_to_the_jobs(operator: httpx.AsyncClient) -> None:
    assert (await operator.get("/login")).headers["location"] == "/jobs"


async def test_logging_out_needs_the_csrf_token_and_ends_the_visit(operator: httpx.AsyncClient) -> None:
    assert (await operator.post("/logout", data={})).status_code == 403
    assert (await operator.get("/jobs")).status_code == 200
    answer = await operator.post("/logout", data={"csrf": await csrf(operator)})
    assert answer.status_code == 303 and answer.headers["location"] == "/login"
    assert (
        "jointstat_console=" in answer.headers["set-cookie"] and "Max-Age=0" in answer.headers["set-cookie"]
    )
    assert (await operator.get("/jobs")).headers["location"] == "/login"


# -- cookies and headers -----------------------------------------------------------------------------------------


def cookie_attributes(header: str) -> tuple[str, dict[str, str]]:
    name_value, *attributes = [part.strip() for part in header.split(";")]
    attrs = {}
    for a in attributes:
        key, _, value = a.partition("=")
        attrs[key.lower()] = value
    return name_value.split("=", 1)[0], attrs


async def test_the_visit_cookie_is_http_only_same_site_strict_for_the_whole_console_and_not_secure_on_loopback(
    anonymous: httpx.AsyncClient,
) -> None:
    name, attrs = cookie_attributes((await anonymous.get("/login")).headers["set-cookie"])
    assert name == "jointstat_console"
    assert "httponly" in attrs and attrs["samesite"].lower() == "strict" and attrs["path"] == "/"
    assert (
        "secure" not in attrs and "domain" not in attrs and "max-age" not in attrs and "expires" not in attrs
    )


async def test_behind_the_operators_tls_proxy_the_cookie_is_secure_with_the_host_prefix(
    view: FakeView,
) -> None:
    settings = ConsoleSettings(secure_cookie=True, allowed_hosts=None)
    async with client_for(view, settings, base="https://console.example.org") as client:
        name, attrs = cookie_attributes((await client.get("/login")).headers["set-cookie"])
        assert name == "__Host-jointstat_console"
        assert "secure" in attrs and "httponly" in attrs and attrs["samesite"].lower() == "strict"
        assert attrs["path"] == "/" and "domain" not in attrs
        assert (await log_in(client, TOKEN)).status_code == 303
        assert (await client.get("/jobs")).status_code == 200


def assert_security_headers(answer: httpx.Response) -> None:
    for name, value in SECURITY_HEADERS.items():
        assert answer.headers.get(name) == value, (answer.request.url, name)
    csp = answer.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "'unsafe-inline'" not in csp and "'unsafe-eval'" not in csp
    assert "frame-ancestors 'none'" in csp and "form-action 'self'" in csp
    assert "server" not in answer.headers


async def test_every_answer_carries_the_security_headers_and_the_strict_content_security_policy(
    operator: httpx.AsyncClient, view: FakeView
) -> None:
    assert CONTENT_SECURITY_POLICY.startswith("default-src 'none'; script-src 'self'; style-src 'self'")
    answers = [
        await operator.get(p) for p in (*PAGES, *JSON, "/static/console.css", "/static/console.js", "/nope")
    ]
    answers.append(await operator.post("/jobs/weekly-totals/run", data={}))
    answers.append(
        await operator.post("/audit/compare", content=b"x" * 100, headers={"content-length": str(1 << 30)})
    )
    async with client_for(view) as anonymous:
        answers += [
            await anonymous.get("/jobs"),
            await anonymous.get("/login"),
            await anonymous.get("/sessions/live"),
        ]
    for answer in answers:
        assert_security_headers(answer)
        static = answer.request.url.path.startswith("/static/")
        assert (answer.headers.get("cache-control") == "no-store") != static


async def test_pages_hold_no_inline_script_or_style_and_reference_nothing_elsewhere(
    operator: httpx.AsyncClient, logs: tuple[Path, Path]
) -> None:
    pages = [(await operator.get(p)).text for p in PAGES[1:]]
    pages.append(
        (
            await operator.post(
                "/audit/compare",
                data={"csrf": await csrf(operator)},
                files={"log": ("beta.jsonl", logs[1].read_bytes())},
            )
        ).text
    )
    async with client_for(FakeView(b"")) as anonymous:
        pages.append((await anonymous.get("/login")).text)
    for page in pages:
        assert inline_code(page) == []
        assert outside_references(page) == []
        assert '<script src="/static/console.js" defer></script>' in page


async def test_a_host_header_that_is_not_loopback_is_refused(view: FakeView) -> None:
    async with client_for(view, base="http://rebound.example:7304") as client:
        assert (await client.get("/login")).status_code == 400
    async with client_for(view, base="http://localhost:7304") as client:
        assert (await client.get("/login")).status_code == 200
    async with client_for(view, base="http://[::1]:7304") as client:
        assert (await client.get("/login")).status_code == 200


# -- run now -----------------------------------------------------------------------------------------------------


async def test_run_now_without_the_csrf_token_is_refused_and_starts_nothing(
    operator: httpx.AsyncClient, view: FakeView
) -> None:
    for form in ({}, {"csrf": "forged"}, {"csrf": (await csrf(operator))[:-1]}):
        answer = await operator.post("/jobs/weekly-totals/run", data=form)
        assert answer.status_code == 403
    assert view.runs == []


@pytest.mark.parametrize("site", ["cross-site", "same-site"])
async def test_run_now_from_another_site_is_refused_even_with_the_token(
    operator: httpx.AsyncClient, view: FakeView, site: str
) -> None:
    answer = await operator.post(
        "/jobs/weekly-totals/run", data={"csrf": await csrf(operator)}, headers={"sec-fetch-site": site}
    )
    assert answer.status_code == 403 and "another site" in shown(answer)
    assert view.runs == []


async def test_run_now_without_a_login_goes_to_the_login_page_and_starts_nothing(
    anonymous: httpx.AsyncClient, view: FakeView
) -> None:
    page = await anonymous.get("/login")
    answer = await anonymous.post("/jobs/weekly-totals/run", data={"csrf": csrf_of(page.text)})
    assert answer.status_code == 303 and answer.headers["location"] == "/login"
    assert view.runs == []


async def test_run_now_starts_the_job_and_opens_its_session_page(
    operator: httpx.AsyncClient, view: FakeView
) -> None:
    answer = await operator.post(
        "/jobs/weekly-totals/run",
        data={"csrf": await csrf(operator)},
        headers={"sec-fetch-site": "same-origin"},
    )
    assert answer.status_code == 303 and answer.headers["location"] == f"/sessions/{'7e57' * 8}"
    assert view.runs == ["weekly-totals"]


async def test_run_now_of_a_job_the_peer_starts_is_refused_with_the_nodes_reason(
    operator: httpx.AsyncClient, view: FakeView
) -> None:
    answer = await operator.post("/jobs/monthly-check/run", data={"csrf": await csrf(operator)})
    assert answer.status_code == 409
    assert "Job monthly-check was not started: this node does not initiate job 'monthly-check'" in shown(
        answer
    )
    assert view.runs == []


async def test_routes_refuse_the_methods_they_do_not_serve(operator: httpx.AsyncClient) -> None:
    assert (await operator.get("/logout")).status_code == 405
    assert (await operator.get("/jobs/weekly-totals/run")).status_code == 405
    assert (await operator.post("/jobs", data={"csrf": await csrf(operator)})).status_code == 405


# -- body limits -------------------------------------------------------------------------------------------------


async def test_an_upload_over_the_limit_is_refused_before_its_body_is_read(view: FakeView) -> None:
    settings = ConsoleSettings(max_upload_bytes=4096)
    async with client_for(view, settings) as client:
        await log_in(client, TOKEN)
        token = await csrf(client)
        answer = await client.post(
            "/audit/compare", data={"csrf": token}, files={"log": ("big.jsonl", b"{}\n" * 30_000)}
        )
        assert answer.status_code == 413 and "larger than the console accepts" in shown(answer)
        fits = await client.post(
            "/audit/compare", data={"csrf": token}, files={"log": ("small.jsonl", b"{}\n" * 10)}
        )
        assert fits.status_code == 200


async def test_a_form_over_64_kib_is_refused(operator: httpx.AsyncClient, view: FakeView) -> None:
    answer = await operator.post(
        "/jobs/weekly-totals/run", data={"csrf": await csrf(operator), "pad": "x" * 70_000}
    )
    assert answer.status_code == 413
    assert view.runs == []


async def test_a_body_without_a_content_length_is_refused(
    operator: httpx.AsyncClient, view: FakeView
) -> None:
    async def chunks() -> AsyncIterator[bytes]:
        yield b"csrf=" + (await csrf(operator)).encode()

    answer = await operator.post(
        "/jobs/weekly-totals/run",
        content=chunks(),
        headers={"content-type": "application/x-www-form-urlencoded"},
    )
    assert answer.status_code == 411
    assert view.runs == []


async def test_a_body_longer_than_its_content_length_is_refused(view: FakeView) -> None:
    """A server in front would cut such a body; the console does not rely on it and counts what arrives."""
    app = build_app(view, Visits(TOKEN), ConsoleSettings())
    async with httpx.AsyncClient(transport=httpx.ASGITransport(app=app), base_url=BASE) as client:
        await log_in(client, TOKEN)
        token = await csrf(client)
        cookie = client.cookies["jointstat_console"]
    body = f"csrf={token}&pad={'x' * 300}".encode()
    messages = iter([{"type": "http.request", "body": body, "more_body": False}])
    sent: list[dict[str, object]] = []

    async def receive() -> dict[str, object]:
        return next(messages)

    async def send(message: dict[str, object]) -> None:
        sent.append(message)

    headers = {
        b"host": b"127.0.0.1:7304",
        b"cookie": f"jointstat_console={cookie}".encode(),
        b"content-type": b"application/x-www-form-urlencoded",
        b"content-length": str(len(body) - 300).encode(),  # says less than it sends
    }
    scope = {
        "type": "http",
        "method": "POST",
        "path": "/jobs/weekly-totals/run",
        "raw_path": b"/jobs/weekly-totals/run",
        "query_string": b"",
        "headers": list(headers.items()),
        "scheme": "http",
        "server": ("127.0.0.1", 7304),
        "client": ("127.0.0.1", 50000),
        "root_path": "",
        "http_version": "1.1",
        "asgi": {"version": "3.0"},
    }
    await app(scope, receive, send)  # type: ignore[arg-type]
    assert sent[0]["type"] == "http.response.start" and sent[0]["status"] == 413
    assert view.runs == []


# -- the audit page ----------------------------------------------------------------------------------------------


async def test_this_nodes_log_is_verified_on_the_server_with_a_verdict_per_session(
    operator: httpx.AsyncClient,
) -> None:
    page = shown(await operator.get("/audit"))
    assert 'data-verdict="own-ok"' in page and "The log verifies." in page
    assert page.count('class="pill attested"') == 2 and page.count('class="pill aborted"') == 1
    assert "aborted (peer_unreachable) by this node" in page


async def test_a_log_that_does_not_verify_is_reported_with_its_first_bad_record(
    logs: tuple[Path, Path],
) -> None:
    lines = logs[0].read_bytes().splitlines(keepends=True)
    at = next(i for i, line in enumerate(lines) if b'"duration_us":1001' in line)
    lines[at] = lines[at].replace(b'"duration_us":1001', b'"duration_us":1009')
    async with client_for(FakeView(b"".join(lines))) as client:
        await log_in(client, TOKEN)
        page = shown(await client.get("/audit"))
    assert 'data-verdict="own-bad"' in page and "The log does not verify." in page
    assert f"The first bad record is at line {at + 1} (record {at}):" in page and "signature" in page


async def test_the_peers_log_uploaded_is_cross_checked_and_the_logs_agree(
    operator: httpx.AsyncClient, logs: tuple[Path, Path]
) -> None:
    answer = await operator.post(
        "/audit/compare",
        data={"csrf": await csrf(operator)},
        files={"log": ("beta.jsonl", logs[1].read_bytes())},
    )
    assert answer.status_code == 200
    assert 'data-verdict="logs-agree"' in shown(answer) and "The logs agree." in shown(answer)
    assert "3 sessions appear in both logs" in shown(answer)


async def test_a_tampered_peer_log_is_reported_as_disagreeing_with_the_difference_listed(
    operator: httpx.AsyncClient, logs: tuple[Path, Path]
) -> None:
    lines = logs[1].read_bytes().splitlines(keepends=True)
    at = next(i for i, line in enumerate(lines) if b'"job":"shared-donors"' in line)
    lines[at] = lines[at].replace(b'"job":"shared-donors"', b'"job":"shared-donorz"', 1)
    answer = await operator.post(
        "/audit/compare",
        data={"csrf": await csrf(operator)},
        files={"log": ("beta.jsonl", b"".join(lines))},
    )
    assert 'data-verdict="logs-disagree"' in shown(answer) and "The logs disagree." in shown(answer)
    assert f"their log does not verify: line {at + 1} (seq {at}): signature" in shown(answer)


async def test_a_log_written_by_a_node_that_is_not_a_peer_is_not_compared(
    operator: httpx.AsyncClient, tmp_path: Path
) -> None:
    gamma = Ed25519PrivateKey.generate()
    path = tmp_path / "gamma.jsonl"
    with (
        SessionLog(path, gamma, "gamma", clock=FakeClock()) as log,
        SessionLog(tmp_path / "other.jsonl", keys()[0], "alpha", clock=FakeClock()) as other,
    ):
        run_session(other, log, "s-0009", "completed")
    answer = await operator.post(
        "/audit/compare",
        data={"csrf": await csrf(operator)},
        files={"log": ("gamma.jsonl", path.read_bytes())},
    )
    assert 'data-verdict="compare-refused"' in shown(answer)
    assert "written by node gamma, which is not a peer of this node (peers: beta)" in shown(answer)


async def test_an_upload_form_without_a_file_or_with_an_empty_one_says_so(
    operator: httpx.AsyncClient,
) -> None:
    token = await csrf(operator)
    none = await operator.post("/audit/compare", data={"csrf": token}, files={"other": ("x", b"")})
    assert none.status_code == 400 and "Choose the peer's session log file first." in shown(none)
    empty = await operator.post("/audit/compare", data={"csrf": token}, files={"log": ("x.jsonl", b"")})
    assert empty.status_code == 400 and "That file is empty." in shown(empty)


async def test_an_upload_without_the_csrf_token_is_not_read(
    operator: httpx.AsyncClient, logs: tuple[Path, Path]
) -> None:
    answer = await operator.post("/audit/compare", files={"log": ("beta.jsonl", logs[1].read_bytes())})
    assert answer.status_code == 403 and "logs agree" not in shown(answer)


# -- what the pages show -----------------------------------------------------------------------------------------


async def test_the_jobs_page_shows_each_jobs_settings_and_latest_outcome_and_run_now_only_where_this_node_starts(
    operator: httpx.AsyncClient,
) -> None:
    page = shown(await operator.get("/jobs"))
    rows = re.findall(r'<tr data-job="([^"]+)">(.*?)</tr>', page, re.S)
    assert [name for name, _ in rows] == ["weekly-totals", "monthly-check"]
    weekly, monthly = rows[0][1], rows[1][1]
    assert "garbler" in weekly and "starts the runs" in weekly and "beta" in weekly
    assert "<code>15 2 * * 1</code>" in weekly and "Europe/Paris" in weekly
    assert (
        "2025-03-10 02:15 CET" in weekly and "2025-03-10 01:15:00 UTC" in weekly
    )  # next run, in its zone (CET = UTC+1 before summer time: see tests/test_node_schedule.py) and UTC
    assert "closed" in weekly and "open" in monthly
    assert 'action="/jobs/weekly-totals/run"' in weekly and "Run now" in weekly
    assert "Run now" not in monthly and "when beta starts it" in monthly
    assert "refused" in monthly and "outside_window: not inside the run window" in monthly
    assert "Privacy budget" not in page


async def test_a_jobs_privacy_budget_gets_a_column_once_a_job_has_one(view: FakeView) -> None:
    budget = PrivacyBudget(0.75, 2.0, "ε")
    view.jobs_shown = [job("weekly-totals", initiates=True, budget=budget), *view.jobs_shown[1:]]
    async with client_for(view) as client:
        await log_in(client, TOKEN)
        page = (await client.get("/jobs")).text
    assert "Privacy budget left" in page and "0.75 of 2 ε" in page


async def test_the_sessions_page_shows_running_sessions_with_their_progress_and_finished_ones_with_outcome(
    operator: httpx.AsyncClient,
) -> None:
    page = (await operator.get("/sessions")).text
    running = re.search(rf'<tr data-session="{LIVE}">(.*?)</tr>', page, re.S)
    assert running is not None
    assert 'max="5000000" value="1250000"' in running.group(1)
    assert "1,250,000</span> of <span" in running.group(1) and "25%" in running.group(1)
    assert (
        "40.0 MiB" in running.group(1)
        and "2,500,000 AND gates/s" in running.group(1)
        and "1.5 s" in running.group(1)
    )
    assert 'data-live="/sessions/live"' in page
    finished = page.split("<h2>Finished</h2>")[1]
    assert DONE in finished and 'class="pill completed"' in finished


async def test_a_session_page_and_its_progress_answer_show_counts_bytes_rate_time_left_and_phases(
    operator: httpx.AsyncClient,
) -> None:
    page = (await operator.get(f"/sessions/{LIVE}")).text
    assert f'data-progress="/sessions/{LIVE}/progress"' in page and 'data-ended="no"' in page
    assert "oblivious transfer" in page and "0.125 s" in page
    progress = (await operator.get(f"/sessions/{LIVE}/progress")).json()
    assert progress["and_gates_done"] == 1_250_000 and progress["and_gates_total"] == 5_000_000
    assert (
        progress["bytes_sent"] == 40 << 20
        and progress["seconds_left"] == 1.5
        and progress["phase"] == "garbling"
    )
    assert [p["name"] for p in progress["phases"]] == ["prepare", "oblivious_transfer"]
    assert progress["ended"] is False and progress["live"] is True
    live = (await operator.get("/sessions/live")).json()["sessions"]
    assert [s["session"] for s in live] == [LIVE]


async def test_a_finished_sessions_phases_come_from_the_verified_log_when_the_node_no_longer_follows_it(
    operator: httpx.AsyncClient,
) -> None:
    page = shown(await operator.get(f"/sessions/{DONE}"))
    assert "Phase timings as this node's session log recorded them." in page
    assert page.count('<tr><th scope="row">') == 3  # handshake, base OT, OT extension in the test log
    assert 'data-ended="yes"' in page


@pytest.mark.parametrize("sid", ["0" * 32, "-starts-with-a-dash", "a" * 200, "bad id"])
async def test_an_unknown_or_malformed_session_id_is_not_found(operator: httpx.AsyncClient, sid: str) -> None:
    assert (await operator.get(f"/sessions/{sid}")).status_code == 404
    assert (await operator.get(f"/sessions/{sid}/progress")).status_code == 404


async def test_the_results_page_charts_numeric_outputs_and_shows_withheld_runs_as_withheld(
    view: FakeView,
) -> None:
    view.results_shown["weekly-totals"] = [
        ResultView(
            "weekly-totals",
            f"r{day}",
            T0 + timedelta(days=day),
            day == 2,
            {"count": None if day == 2 else 40 + day, "above": day % 2 == 0, "label": "ok"},
        )
        for day in range(5)
    ] + [ResultView("weekly-totals", None, None, None, problem="/results/bad.json: not UTF-8 JSON")]
    async with client_for(view) as client:
        await log_in(client, TOKEN)
        page = (await client.get("/results")).text
    section = page.split('id="job-weekly-totals"')[1].split("</section>")[0]
    assert (
        section.count("<figure") == 1 and "<figcaption>count</figcaption>" in section
    )  # flags and text: no chart
    assert section.count('class="dot"') == 4 and section.count('class="withheld"') == 1
    assert section.count('class="pill withheld">withheld</span>') == 1
    assert "A result file could not be read: /results/bad.json: not UTF-8 JSON" in section
    assert "Latest 5 of 5 results, newest first" in section
    assert "No results yet." in page.split('id="job-monthly-check"')[1]


async def test_text_from_the_node_is_escaped_never_markup(view: FakeView) -> None:
    view.jobs_shown = [replace(job("weekly-totals", initiates=True, reason=HOSTILE))]
    view.results_shown["weekly-totals"] = [
        ResultView("weekly-totals", "r1", T0, False, {HOSTILE: 1, "n": HOSTILE})
    ]
    async with client_for(view) as client:
        await log_in(client, TOKEN)
        pages = [(await client.get(p)).text for p in ("/jobs", "/results")]
    for page in pages:
        assert HOSTILE not in page and "&lt;img src=x onerror=" in page
        assert inline_code(page) == []


def test_visit_ids_are_kept_only_as_digests() -> None:
    visits = Visits(TOKEN)
    cookie, _ = visits.start()
    assert all(cookie.encode() not in key for key in visits._visits)
    assert visits.get(cookie) is not None and visits.get(cookie + "x") is None and visits.get(None) is None


class Clock:
    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        return self.now


def test_a_visit_ends_after_eight_idle_hours_or_a_day_in_all() -> None:
    clock = Clock()
    visits = Visits(TOKEN, clock=clock)
    idle, _ = visits.start(logged_in=True)
    busy, _ = visits.start(logged_in=True)
    clock.now += 4 * 3600
    assert visits.get(busy) is not None
    clock.now += 4 * 3600 + 1
    assert visits.get(idle) is None  # idle for more than 8 hours
    for _ in range(4):  # busy is used every 4 hours, up to 20 hours and a second in all
        assert visits.get(busy) is not None
        clock.now += 4 * 3600
    assert visits.get(busy) is None  # 24 hours and a second old


def test_a_flood_of_visits_evicts_the_oldest_anonymous_ones_before_any_login() -> None:
    from jointstat.node.console.auth import MAX_VISITS

    clock = Clock()
    visits = Visits(TOKEN, clock=clock)
    operator, _ = visits.start(logged_in=True)
    for _ in range(MAX_VISITS + 50):
        clock.now += 0.01
        visits.start()
    assert len(visits) == MAX_VISITS
    assert visits.get(operator) is not None
