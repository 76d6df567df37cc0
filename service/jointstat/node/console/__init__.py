"""The operator console: the node's jobs, live sessions, results and verified session logs in a browser.

Theory of operation
-------------------
Off unless the node config sets ``node.console`` (a loopback ``host:port``; another address only with
``node.console_behind_proxy: true``, when the operator's own TLS-terminating proxy serves it). ``Console`` is
what the daemon starts and stops: it loads (or, at first start, makes) the login token (``auth``), builds the
Starlette application (``app.build_app``, pages in ``routes``, templates in ``templates/``, a stylesheet and a
small script of our own in ``static/``) over the node's ``view.NodeView`` — the only thing of the node the
console can see — and serves it with Hypercorn on the node's own event loop (``app.ConsoleServer``).

The console shows job settings and outcomes, session progress and phase timings, this node's own results with
a chart per numeric output, and the verification of the session logs (``checks``). It never shows an input
value, a wire label, Δ, a key or any other secret: none of them is in what ``NodeView`` gives it. It changes
nothing but two things: "run now" of a job this node initiates, and checking an uploaded peer log (which is
read, verified and discarded).
"""

from __future__ import annotations

import logging
from pathlib import Path

from jointstat.node.console.app import ConsoleServer, build_app
from jointstat.node.console.auth import Visits, load_login_token
from jointstat.node.console.settings import LOOPBACK_HOSTS, ConsoleSettings
from jointstat.node.console.view import NodeView

log = logging.getLogger("jointstat.node.console")


class Console:
    """The console of one node: ``await start()`` returns the port it listens on; ``await stop()``."""

    def __init__(
        self,
        view: NodeView,
        *,
        host: str,
        port: int,
        behind_proxy: bool,
        token_file: Path,
        make_token: bool,
    ) -> None:
        self.view = view
        self.host = host
        self.port = port
        self.token_file = token_file
        self.make_token = make_token
        self.settings = ConsoleSettings(
            secure_cookie=behind_proxy,
            allowed_hosts=None if behind_proxy else (*LOOPBACK_HOSTS, host),
        )
        self._server: ConsoleServer | None = None

    async def start(self) -> int:
        token = load_login_token(self.token_file, create=self.make_token)
        app = build_app(self.view, Visits(token), self.settings)
        self._server = ConsoleServer(app, self.host, self.port)
        self.port = await self._server.start()
        log.info(
            "console: serving on %s port %d; log in with the token in %s",
            self.host,
            self.port,
            self.token_file,
        )
        return self.port

    async def stop(self) -> None:
        if self._server is not None:
            await self._server.stop()
            self._server = None


__all__ = ["Console", "ConsoleSettings", "NodeView"]
