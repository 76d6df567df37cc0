"""The console's pages and its two actions: Jobs (run now), Sessions (live progress), Results, Audit (upload).

Theory of operation
-------------------
Every handler but the login page requires a logged-in visit (``auth``): a page answers a visit that is not logged
in with a redirect to ``/login``, a JSON endpoint with 401. Every POST also requires the visit's CSRF token and
is refused when the browser says it comes from another site (``Sec-Fetch-Site``). Handlers only read the node
through ``NodeView`` and render templates with autoescaping; values from the node or the user reach a page only
as template variables, never as markup.

*Run now* goes to the new session's page, which (like the Sessions page) asks ``…/progress`` (``/sessions/live``)
for the counts every ``ConsoleSettings.poll_ms`` while the session runs; the Results page charts every output whose
released values are all numbers (``charts``), and lists the latest runs with withheld ones marked; the Audit page
verifies this node's log and, on upload, cross-checks the peer's (``checks``).
"""

from __future__ import annotations

import logging
import re
from collections.abc import Awaitable, Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from starlette.datastructures import FormData, UploadFile
from starlette.requests import Request
from starlette.responses import JSONResponse, RedirectResponse, Response
from starlette.templating import Jinja2Templates

from jointstat.audit.records import public_key_text
from jointstat.node.console.auth import Visit, Visits, csrf_ok
from jointstat.node.console.charts import ChartPoint, line_chart
from jointstat.node.console.checks import LogChecks
from jointstat.node.console.settings import ConsoleSettings
from jointstat.node.console.view import JobView, NodeView, PhaseView, ResultView, RunRefused, SessionView

log = logging.getLogger("jointstat.node.console")

SESSION_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._:-]{0,127}")
SESSIONS_LISTED = 50
RESULTS_CHARTED = 60
RESULTS_LISTED = 20
FORM_LIMITS = {"max_files": 1, "max_fields": 4, "max_part_size": 64 * 1024}

Handler = Callable[["Pages", Request, Visit], Awaitable[Response]]
FormHandler = Callable[["Pages", Request, Visit, FormData], Awaitable[Response]]


@dataclass(frozen=True)
class OutputSeries:
    """One output of a job across its runs: a chart when its values are numbers."""

    name: str
    chart: Any  # Markup of the SVG, or None when the output is not numeric


@dataclass(frozen=True)
class JobResults:
    job: JobView
    outputs: list[str]
    series: list[OutputSeries]
    rows: list[ResultView]  # newest first
    problems: list[str]
    total: int


def _numeric(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool)


def job_results(job: JobView, results: list[ResultView]) -> JobResults:
    """What the Results page shows of one job: a chart per numeric output, the latest runs, damaged files."""
    good = [r for r in results if r.problem is None and r.finished_at is not None]
    problems = [r.problem for r in results if r.problem is not None]
    names: list[str] = []
    for r in good:
        for name in r.outputs:
            if name not in names:
                names.append(name)
    series = []
    for name in names:
        values = [r.outputs.get(name) for r in good if not r.withheld]
        if values and all(v is None or _numeric(v) for v in values) and any(_numeric(v) for v in values):
            points = [
                ChartPoint(r.finished_at, None if r.withheld else r.outputs.get(name))  # type: ignore[arg-type]
                for r in good
                if r.withheld or _numeric(r.outputs.get(name))
            ]
            series.append(OutputSeries(name, line_chart(name, points)))
        else:
            series.append(OutputSeries(name, None))
    return JobResults(job, names, series, good[::-1][:RESULTS_LISTED], problems, len(good))


def page(handler: Handler) -> Callable[[Pages, Request], Awaitable[Response]]:
    """A page for logged-in visits; others are sent to the login page."""

    async def wrapped(self: Pages, request: Request) -> Response:
        visit = self.visit(request)
        if visit is None or not visit.logged_in:
            return RedirectResponse("/login", status_code=303)
        return await handler(self, request, visit)

    return wrapped


def api(handler: Handler) -> Callable[[Pages, Request], Awaitable[Response]]:
    """A JSON endpoint for logged-in visits; others get 401."""

    async def wrapped(self: Pages, request: Request) -> Response:
        visit = self.visit(request)
        if visit is None or not visit.logged_in:
            return JSONResponse({"error": "not logged in; reload the page to log in again"}, status_code=401)
        return await handler(self, request, visit)

    return wrapped


def action(*, login: bool = True) -> Callable[[FormHandler], Callable[[Pages, Request], Awaitable[Response]]]:
    """A state-changing POST: same-site, a known visit (logged in unless ``login=False``), its CSRF token."""

    def decorate(handler: FormHandler) -> Callable[[Pages, Request], Awaitable[Response]]:
        async def wrapped(self: Pages, request: Request) -> Response:
            if request.headers.get("sec-fetch-site", "same-origin") not in ("same-origin", "none"):
                return self.refusal(
                    request, 403, "This request came from another site; the console refused it."
                )
            visit = self.visit(request)
            if visit is None or (login and not visit.logged_in):
                if login:
                    return RedirectResponse("/login", status_code=303)
                return self.refusal(
                    request,
                    403,
                    "Your browser did not send the console's cookie. Reload the page and try again.",
                )
            form = await request.form(**FORM_LIMITS)
            if not csrf_ok(visit, form.get("csrf")):
                await form.close()
                log.warning(
                    "console: a %s request without this visit's CSRF token was refused", request.url.path
                )
                return self.refusal(
                    request,
                    403,
                    "This form did not carry the console's check token (it is old, or it did not come from this "
                    "console). Reload the page and try again.",
                )
            try:
                return await handler(self, request, visit, form)
            finally:
                await form.close()

        return wrapped

    return decorate


class Pages:
    """The route handlers (see the module docstring)."""

    def __init__(
        self, view: NodeView, settings: ConsoleSettings, visits: Visits, templates: Jinja2Templates
    ) -> None:
        self.view = view
        self.settings = settings
        self.visits = visits
        self.templates = templates
        self.checks = LogChecks(view)

    # -- helpers -------------------------------------------------------------------------------------------------

    def visit(self, request: Request) -> Visit | None:
        return self.visits.get(request.cookies.get(self.settings.cookie_name))

    def set_cookie(self, response: Response, value: str) -> None:
        response.set_cookie(
            self.settings.cookie_name,
            value,
            path="/",
            httponly=True,
            samesite="strict",
            secure=self.settings.secure_cookie,
        )

    def render(
        self, request: Request, template: str, visit: Visit | None, status: int = 200, **context: Any
    ) -> Response:
        base = {
            "node_name": self.view.node_name,
            "csrf": visit.csrf if visit is not None else "",
            "logged_in": visit is not None and visit.logged_in,
            "poll_ms": self.settings.poll_ms,
            "now": datetime.now(UTC),
        }
        return self.templates.TemplateResponse(request, template, {**base, **context}, status_code=status)

    def refusal(self, request: Request, status: int, message: str) -> Response:
        visit = self.visit(request)
        return self.render(
            request, "refused.html", visit, status, title="Refused", section="", message=message
        )

    # -- login ---------------------------------------------------------------------------------------------------

    async def login_page(self, request: Request) -> Response:
        visit = self.visit(request)
        if visit is not None and visit.logged_in:
            return RedirectResponse("/jobs", status_code=303)
        cookie = None
        if visit is None:
            cookie, visit = self.visits.start()
        response = self.render(
            request, "login.html", visit, title="Log in", section="", token_path=self.settings.token_hint
        )
        if cookie is not None:
            self.set_cookie(response, cookie)
        return response

    @action(login=False)
    async def login(self, request: Request, visit: Visit, form: FormData) -> Response:
        token = form.get("token")
        if not isinstance(token, str) or not self.visits.token_ok(token.strip()):
            log.warning("console: a login with a wrong token was refused")
            return self.render(
                request,
                "login.html",
                visit,
                403,
                title="Log in",
                section="",
                token_path=self.settings.token_hint,
                error="That is not this node's console token.",
            )
        old = request.cookies.get(self.settings.cookie_name)
        assert old is not None
        cookie, _ = self.visits.log_in(old)
        log.info("console: an operator logged in")
        response = RedirectResponse("/jobs", status_code=303)
        self.set_cookie(response, cookie)
        return response

    @action()
    async def logout(self, request: Request, visit: Visit, form: FormData) -> Response:
        self.visits.end(request.cookies.get(self.settings.cookie_name))
        response = RedirectResponse("/login", status_code=303)
        response.delete_cookie(
            self.settings.cookie_name,
            path="/",
            httponly=True,
            samesite="strict",
            secure=self.settings.secure_cookie,
        )
        return response

    # -- jobs ----------------------------------------------------------------------------------------------------

    async def home(self, request: Request) -> Response:
        return RedirectResponse("/jobs", status_code=303)

    async def _jobs(
        self, request: Request, visit: Visit, status: int = 200, error: str | None = None
    ) -> Response:
        jobs = await self.view.jobs()
        budgets = any(j.privacy_budget is not None for j in jobs)
        return self.render(
            request,
            "jobs.html",
            visit,
            status,
            title="Jobs",
            section="jobs",
            jobs=jobs,
            budgets=budgets,
            error=error,
        )

    @page
    async def jobs(self, request: Request, visit: Visit) -> Response:
        return await self._jobs(request, visit)

    @action()
    async def run_now(self, request: Request, visit: Visit, form: FormData) -> Response:
        name = request.path_params["name"]
        try:
            session = await self.view.run_now(name)
        except RunRefused as exc:
            return await self._jobs(request, visit, 409, error=f"Job {name} was not started: {exc}")
        log.info("console: the operator ran job %s now (session %s)", name, session)
        return RedirectResponse(f"/sessions/{session}", status_code=303)

    # -- sessions ------------------------------------------------------------------------------------------------

    async def _running(self) -> tuple[list[SessionView], list[SessionView]]:
        listed = await self.view.sessions(SESSIONS_LISTED)
        running = []
        for s in listed:
            if s.live and not s.ended:
                full = await self.view.session(s.session)
                running.append(full or s)
        finished = [s for s in listed if s.ended or not s.live]
        return running, finished

    @page
    async def sessions(self, request: Request, visit: Visit) -> Response:
        running, finished = await self._running()
        return self.render(
            request,
            "sessions.html",
            visit,
            title="Sessions",
            section="sessions",
            running=running,
            finished=finished,
        )

    @api
    async def sessions_live(self, request: Request, visit: Visit) -> Response:
        listed = await self.view.sessions(SESSIONS_LISTED)
        out = []
        for s in listed:
            if s.live:
                full = await self.view.session(s.session)
                data = (full or s).progress()
                data.update(
                    {"job": s.job, "role": s.role, "peer": s.peer, "started_at": s.started_at.isoformat()}
                )
                out.append(data)
        return JSONResponse({"sessions": out}, headers={"Cache-Control": "no-store"})

    async def _session(self, request: Request) -> SessionView | None:
        sid = request.path_params["session"]
        if not SESSION_ID.fullmatch(sid):
            return None
        return await self.view.session(sid)

    @page
    async def session(self, request: Request, visit: Visit) -> Response:
        s = await self._session(request)
        if s is None:
            return self.render(
                request,
                "refused.html",
                visit,
                404,
                title="No such session",
                section="sessions",
                message="This node knows no session with that id.",
            )
        phases = list(s.phases)
        from_log = False
        if not phases and s.ended:
            phases = [
                PhaseView(p["phase"], p["duration_us"] / 1e6, p["bytes_sent"], p["bytes_received"])
                for p in await self.checks.phases_of(s.session)
            ]
            from_log = bool(phases)
        return self.render(
            request,
            "session.html",
            visit,
            title=f"Session {s.session[:12]}",
            section="sessions",
            s=s,
            phases=phases,
            phases_from_log=from_log,
        )

    @api
    async def session_progress(self, request: Request, visit: Visit) -> Response:
        s = await self._session(request)
        if s is None:
            return JSONResponse({"error": "no such session"}, status_code=404)
        return JSONResponse(s.progress(), headers={"Cache-Control": "no-store"})

    # -- results -------------------------------------------------------------------------------------------------

    @page
    async def results(self, request: Request, visit: Visit) -> Response:
        jobs = await self.view.jobs()
        shown = [job_results(job, await self.view.results(job.name, RESULTS_CHARTED)) for job in jobs]
        return self.render(request, "results.html", visit, title="Results", section="results", jobs=shown)

    # -- audit ---------------------------------------------------------------------------------------------------

    async def _audit(self, request: Request, visit: Visit, status: int = 200, **context: Any) -> Response:
        check = await self.checks.own()
        keys = self.view.log_keys()
        return self.render(
            request,
            "audit.html",
            visit,
            status,
            title="Audit",
            section="audit",
            check=check,
            own_key=public_key_text(keys.own),
            peers=sorted(keys.peers),
            max_upload=self.settings.max_upload_bytes,
            **context,
        )

    @page
    async def audit(self, request: Request, visit: Visit) -> Response:
        return await self._audit(request, visit)

    @action()
    async def compare(self, request: Request, visit: Visit, form: FormData) -> Response:
        upload = form.get("log")
        if not isinstance(upload, UploadFile):
            return await self._audit(
                request, visit, 400, upload_error="Choose the peer's session log file first."
            )
        data = await upload.read(self.settings.max_upload_bytes + 1)
        if len(data) > self.settings.max_upload_bytes:
            return await self._audit(
                request, visit, 413, upload_error="That file is larger than the console accepts."
            )
        if not data:
            return await self._audit(request, visit, 400, upload_error="That file is empty.")
        result = await self.checks.compare(data)
        name = upload.filename or "the uploaded log"
        return await self._audit(request, visit, compare=result, upload_name=name)
