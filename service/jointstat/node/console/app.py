"""The console's web application (Starlette) and its server (Hypercorn), running inside the node's event loop.

Theory of operation
-------------------
``build_app`` wires the routes of ``routes.Pages`` with three layers around them, outermost first:

1. *Security headers* on every response: a strict Content-Security-Policy (``default-src 'none'``; scripts,
   styles, images and fetches from the console itself only; no inline script or style; forms post only to the
   console; no framing; no ``<base>``), ``X-Content-Type-Options: nosniff``, ``X-Frame-Options: DENY``,
   ``Referrer-Policy: no-referrer``, ``Cross-Origin-Opener-Policy`` and ``-Resource-Policy: same-origin``, a
   ``Permissions-Policy`` turning off device access, and ``Cache-Control: no-store`` on everything but the static
   files.
2. *Host check* (``TrustedHostMiddleware``): on loopback the ``Host`` header must name a loopback host, so a web
   page elsewhere cannot reach the console through a DNS name rebound to 127.0.0.1. Behind the operator's proxy
   the proxy decides which names reach the console.
3. *Body limit*: a request with a body must declare its ``Content-Length`` (411 otherwise) within the limit of
   its route — ``MAX_UPLOAD_BYTES`` for the log upload, ``MAX_FORM_BYTES`` elsewhere (413 beyond); the body is
   counted as it arrives too, so nothing past the limit is read.

``ConsoleServer`` binds the listening socket itself (so a busy port or a bad address fails the node's start
naming ``node.console``, and port 0 gives a port the node can report), hands it to Hypercorn's asyncio ``serve``
with a shutdown trigger — which Hypercorn documents for embedding: it installs no signal handlers of its own, so
SIGTERM stays the node's — and ``stop`` fires the trigger: the socket closes at once, requests in flight get
``GRACEFUL_S`` to finish.

Static files (one stylesheet, one small script of our own for live progress, an icon) are served from the
package; the pages load nothing from any other origin.

Sources: Content-Security-Policy — W3C Content Security Policy Level 3; cookie attributes ``HttpOnly``,
``SameSite`` and the ``__Host-`` prefix — RFC 6265 and its revision draft (RFC 6265bis); ``Sec-Fetch-Site`` — W3C
Fetch Metadata Request Headers; the token and header rules follow the OWASP Cross-Site Request Forgery and HTTP
Headers cheat sheets (common practice).
"""

from __future__ import annotations

import asyncio
import contextlib
import logging
import socket
from pathlib import Path
from typing import Any

from jinja2 import Environment, FileSystemLoader, StrictUndefined
from starlette.applications import Starlette
from starlette.middleware import Middleware
from starlette.middleware.trustedhost import TrustedHostMiddleware
from starlette.requests import Request
from starlette.responses import PlainTextResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles
from starlette.templating import Jinja2Templates
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from jointstat.node.console import present
from jointstat.node.console.auth import Visits
from jointstat.node.console.routes import Pages
from jointstat.node.console.settings import ConsoleSettings
from jointstat.node.console.view import NodeView

log = logging.getLogger("jointstat.node.console")
SERVER_LOG = logging.getLogger("jointstat.node.console.server")
SERVER_LOG.setLevel(logging.WARNING)

HERE = Path(__file__).resolve().parent
UPLOAD_PATH = "/audit/compare"
GRACEFUL_S = 2.0

CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; "
    "form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
)
SECURITY_HEADERS = {
    "content-security-policy": CONTENT_SECURITY_POLICY,
    "x-content-type-options": "nosniff",
    "x-frame-options": "DENY",
    "referrer-policy": "no-referrer",
    "cross-origin-opener-policy": "same-origin",
    "cross-origin-resource-policy": "same-origin",
    "permissions-policy": "camera=(), microphone=(), geolocation=(), usb=(), payment=()",
}


class SecurityHeaders:
    """Adds ``SECURITY_HEADERS`` to every response, and ``Cache-Control: no-store`` outside ``/static/``."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        static = str(scope.get("path", "")).startswith("/static/")

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = [
                    (k, v)
                    for k, v in message.get("headers", [])
                    if k.decode("latin-1").lower() not in SECURITY_HEADERS
                ]
                headers += [(k.encode("latin-1"), v.encode("latin-1")) for k, v in SECURITY_HEADERS.items()]
                if not static:
                    headers = [(k, v) for k, v in headers if k.lower() != b"cache-control"]
                    headers.append((b"cache-control", b"no-store"))
                message = {**message, "headers": headers}
            await send(message)

        await self.app(scope, receive, send_with_headers)


class BodyTooLarge(Exception):
    pass


class BodyLimit:
    """Refuses bodies without a ``Content-Length`` (411) or over the route's limit (413); counts what arrives."""

    def __init__(self, app: ASGIApp, settings: ConsoleSettings) -> None:
        self.app = app
        self.settings = settings

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] in ("GET", "HEAD", "OPTIONS"):
            await self.app(scope, receive, send)
            return
        limit = (
            self.settings.max_upload_bytes + 64 * 1024
            if scope["path"] == UPLOAD_PATH
            else (self.settings.max_form_bytes)
        )
        declared = dict(scope.get("headers", [])).get(b"content-length")
        if declared is None:
            await PlainTextResponse("A request body needs a Content-Length.", status_code=411)(
                scope, receive, send
            )
            return
        try:
            length = int(declared)
        except ValueError:
            await PlainTextResponse("Content-Length is not a number.", status_code=400)(scope, receive, send)
            return
        if length > limit:
            # Drain nothing and close: the client is told at once, before it sends the body.
            await PlainTextResponse(
                f"The request is larger than the console accepts here ({limit} bytes).", status_code=413
            )(scope, receive, send)
            return
        seen = 0
        started = False

        async def counted() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > min(limit, length):
                    raise BodyTooLarge
            return message

        async def watched(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, counted, watched)
        except BodyTooLarge:
            if started:
                raise
            await PlainTextResponse("The request body is longer than its Content-Length.", status_code=413)(
                scope, receive, send
            )


def templates() -> Jinja2Templates:
    """Jinja2 with autoescaping on for every template and undefined names as errors."""
    env = Environment(
        loader=FileSystemLoader(HERE / "templates"),
        autoescape=True,
        undefined=StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    for name in ("when", "when_in", "count", "size", "duration", "rate", "output", "percent", "phase_name"):
        env.filters[name] = getattr(present, name)
    return Jinja2Templates(env=env)


def build_app(view: NodeView, visits: Visits, settings: ConsoleSettings) -> Starlette:
    """The console's ASGI application (see the module docstring)."""
    pages = Pages(view, settings, visits, templates())

    def bound(name: str) -> Any:
        return getattr(pages, name)

    async def not_found(request: Request, exc: Exception) -> Response:
        return pages.refusal(request, 404, "There is no such page in this console.")

    async def not_allowed(request: Request, exc: Exception) -> Response:
        return PlainTextResponse("That method is not allowed here.", status_code=405)

    routes = [
        Route("/", bound("home")),
        Route("/login", bound("login_page"), methods=["GET"]),
        Route("/login", bound("login"), methods=["POST"]),
        Route("/logout", bound("logout"), methods=["POST"]),
        Route("/jobs", bound("jobs"), methods=["GET"]),
        Route("/jobs/{name}/run", bound("run_now"), methods=["POST"]),
        Route("/sessions", bound("sessions"), methods=["GET"]),
        Route("/sessions/live", bound("sessions_live"), methods=["GET"]),
        Route("/sessions/{session}", bound("session"), methods=["GET"]),
        Route("/sessions/{session}/progress", bound("session_progress"), methods=["GET"]),
        Route("/results", bound("results"), methods=["GET"]),
        Route("/audit", bound("audit"), methods=["GET"]),
        Route(UPLOAD_PATH, bound("compare"), methods=["POST"]),
        Mount("/static", app=StaticFiles(directory=HERE / "static"), name="static"),
    ]
    middleware = [Middleware(SecurityHeaders)]
    if settings.allowed_hosts is not None:
        middleware.append(Middleware(TrustedHostMiddleware, allowed_hosts=list(settings.allowed_hosts)))
    middleware.append(Middleware(BodyLimit, settings=settings))
    return Starlette(
        routes=routes,
        middleware=middleware,
        exception_handlers={404: not_found, 405: not_allowed},
    )


def _report_end(task: asyncio.Task[None]) -> None:
    """A server that ends on its own (not by ``stop``) is an error worth a log line."""
    if not task.cancelled() and task.exception() is not None:
        exc = task.exception()
        log.error("console: the web server stopped: %s: %s", type(exc).__name__, exc)


class ConsoleServer:
    """The console served by Hypercorn on the running event loop (see the module docstring)."""

    def __init__(self, app: ASGIApp, host: str, port: int) -> None:
        self.app = app
        self.host = host
        self.port = port
        self._stop = asyncio.Event()
        self._task: asyncio.Task[None] | None = None

    def _listen(self) -> socket.socket:
        infos = socket.getaddrinfo(self.host, self.port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
        family, kind, proto, _, address = infos[0]
        sock = socket.socket(family, kind, proto)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            sock.bind(address)
            sock.listen(128)
            sock.setblocking(False)
        except OSError:
            sock.close()
            raise
        return sock

    async def start(self) -> int:
        """Listen and start serving; returns the port. ``OSError`` names ``node.console`` if it cannot listen."""
        from hypercorn.asyncio import serve
        from hypercorn.config import Config

        try:
            sock = self._listen()
        except OSError as exc:
            where = f"[{self.host}]:{self.port}" if ":" in self.host else f"{self.host}:{self.port}"
            raise OSError(f"node.console: cannot listen on {where} ({exc.strerror or exc})") from None
        port = int(sock.getsockname()[1])
        config = Config()
        config.bind = [f"fd://{sock.detach()}"]
        config.accesslog = None
        config.errorlog = SERVER_LOG  # its warnings and errors only (not its start-up banner)
        config.include_server_header = False
        config.graceful_timeout = GRACEFUL_S
        self._task = asyncio.create_task(
            # Starlette's ASGI callable and Hypercorn's typed ASGI protocols describe the same interface differently.
            serve(self.app, config, shutdown_trigger=self._stop.wait),  # type: ignore[arg-type]
            name="jointstat-console",
        )
        self._task.add_done_callback(_report_end)
        self.port = port
        return port

    async def stop(self) -> None:
        """Stop listening; give requests in flight ``GRACEFUL_S`` to finish."""
        if self._task is None:
            return
        self._stop.set()
        with contextlib.suppress(asyncio.CancelledError, Exception):
            await asyncio.wait_for(self._task, GRACEFUL_S + 5.0)
        self._task = None
