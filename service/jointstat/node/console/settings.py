"""The console's settings, derived from the node config (``node.console``, ``node.console_behind_proxy``)."""

from __future__ import annotations

from dataclasses import dataclass

from jointstat.node.console.auth import COOKIE, SECURE_COOKIE

MAX_UPLOAD_BYTES = (
    64 << 20
)  # a peer's session log: a few KiB per session, so years of nightly runs (common practice)
MAX_FORM_BYTES = 64 << 10  # every other form: a token, a CSRF field
POLL_MS = 500  # how often a page showing a running session asks for its progress
LOOPBACK_HOSTS = ("127.0.0.1", "localhost", "::1", "[::1]")


@dataclass(frozen=True)
class ConsoleSettings:
    """``secure_cookie`` when served through the operator's TLS proxy; ``allowed_hosts`` the Host headers accepted
    (None: any, which the proxy then decides)."""

    secure_cookie: bool = False
    allowed_hosts: tuple[str, ...] | None = LOOPBACK_HOSTS
    poll_ms: int = POLL_MS
    max_upload_bytes: int = MAX_UPLOAD_BYTES
    max_form_bytes: int = MAX_FORM_BYTES

    @property
    def cookie_name(self) -> str:
        return SECURE_COOKIE if self.secure_cookie else COOKIE

    @property
    def token_hint(self) -> str:
        return (
            "The token is in the node's console token file: node.console_token_file in its config, "
            "or console.token in its data directory."
        )
