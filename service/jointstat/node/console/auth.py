"""Who may use the console: one login token per node, server-side visits, a CSRF token per visit.

Theory of operation
-------------------
*Token.* The console has one login token, kept in an owner-only file: ``node.console_token_file`` if configured
(it must exist), else ``<data_dir>/console.token``, made at the console's first start from 32 random bytes
(``secrets.token_urlsafe``, 43 characters) and written owner-only and atomically
(``node.secrets.write_private_file``); an existing file is read only if no one but its owner can access it. The
operator copies it from the file into the login form; the node never prints, logs or shows it. Comparison is
constant-time over SHA-256 digests of both sides (``hmac.compare_digest``), so neither content nor length leaks
through timing.

*Visits.* Every browser gets a *visit*: a random 32-byte id in a cookie (``HttpOnly``, ``SameSite=Strict``,
``Path=/``; ``Secure`` and the ``__Host-`` name prefix when the console is served through the operator's TLS
proxy) and, kept on the server only, a CSRF token and whether the visit has logged in. The server keeps visits
by the SHA-256 of their id, so its memory never holds a usable cookie. A login replaces the visit with a new one
(new id, new CSRF token), so an id planted before the login is worth nothing after it. Visits expire after
``VISIT_IDLE_S`` without a request and ``VISIT_MAX_S`` in all; at most ``MAX_VISITS`` are kept (the oldest
anonymous ones go first), so a flood of cookie-less requests cannot exhaust memory. A restart of the node ends
every visit.

*CSRF.* Every state-changing request (log in, log out, run now, upload a log) is a POST carrying the visit's
CSRF token in a form field, compared in constant time; the ``SameSite=Strict`` cookie and the browser's
``Sec-Fetch-Site`` header (cross-site POSTs refused outright) are two more layers (OWASP CSRF Prevention Cheat
Sheet, "synchronizer token pattern"; common practice).
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from jointstat.node.config import ConfigError
from jointstat.node.keys import console_token_problem
from jointstat.node.secrets import SecretFileError, read_secret_file, write_private_file
from jointstat.problems import Problem

TOKEN_BYTES = 32
VISIT_ID_BYTES = 32
VISIT_IDLE_S = 8 * 3600.0  # common practice: a working day
VISIT_MAX_S = 24 * 3600.0
MAX_VISITS = 2000
COOKIE = "jointstat_console"
SECURE_COOKIE = "__Host-jointstat_console"


def load_login_token(path: Path, *, create: bool) -> str:
    """The console's login token from ``path``; made there first (owner-only) when ``create`` and missing."""
    if create and not path.exists():
        token = secrets.token_urlsafe(TOKEN_BYTES)
        try:
            write_private_file(path, (token + "\n").encode("ascii"))
            return token
        except SecretFileError as exc:
            if not path.exists():  # otherwise another process made it first: read that one
                raise ConfigError(str(path), [Problem("node.console", str(exc))]) from None
    field = "node.console" if create else "node.console_token_file"
    try:
        data = read_secret_file(path, "console login token")
    except SecretFileError as exc:
        raise ConfigError(str(path), [Problem(field, str(exc))]) from None
    problem = console_token_problem(data)
    if problem is not None:
        raise ConfigError(str(path), [Problem(field, problem)])
    return data.decode("ascii").removesuffix("\n")


def _digest(text: str) -> bytes:
    return hashlib.sha256(text.encode("utf-8", "surrogatepass")).digest()


def same_secret(presented: str, expected: str) -> bool:
    """Constant-time comparison of two secrets of any length (via their SHA-256 digests)."""
    return hmac.compare_digest(_digest(presented), _digest(expected))


@dataclass
class Visit:
    """One browser's visit: its CSRF token and whether it has logged in (kept on the server only)."""

    csrf: str
    logged_in: bool
    created: float
    seen: float


class Visits:
    """The server's table of visits (see the module docstring)."""

    def __init__(self, token: str, *, clock: Callable[[], float] = time.monotonic) -> None:
        self._token = token
        self._clock = clock
        self._visits: dict[bytes, Visit] = {}

    def __len__(self) -> int:
        return len(self._visits)

    def _key(self, cookie: str) -> bytes:
        return _digest(cookie)

    def _expired(self, visit: Visit, now: float) -> bool:
        return now - visit.seen > VISIT_IDLE_S or now - visit.created > VISIT_MAX_S

    def get(self, cookie: str | None) -> Visit | None:
        """The live visit this cookie names, or None (unknown, expired or no cookie)."""
        if not cookie:
            return None
        now = self._clock()
        key = self._key(cookie)
        visit = self._visits.get(key)
        if visit is None:
            return None
        if self._expired(visit, now):
            del self._visits[key]
            return None
        visit.seen = now
        return visit

    def start(self, *, logged_in: bool = False) -> tuple[str, Visit]:
        """A new visit: the cookie value to send and the visit."""
        now = self._clock()
        self._make_room(now)
        cookie = secrets.token_urlsafe(VISIT_ID_BYTES)
        visit = Visit(secrets.token_urlsafe(VISIT_ID_BYTES), logged_in, now, now)
        self._visits[self._key(cookie)] = visit
        return cookie, visit

    def _make_room(self, now: float) -> None:
        for key in [k for k, v in self._visits.items() if self._expired(v, now)]:
            del self._visits[key]
        while len(self._visits) >= MAX_VISITS:
            anonymous = [k for k, v in self._visits.items() if not v.logged_in]
            victims = anonymous or list(self._visits)
            oldest = min(victims, key=lambda k: self._visits[k].seen)
            del self._visits[oldest]

    def token_ok(self, presented: str) -> bool:
        return same_secret(presented, self._token)

    def log_in(self, cookie: str) -> tuple[str, Visit]:
        """Replace the (checked) visit by a new, logged-in one; the new cookie value and visit."""
        self._visits.pop(self._key(cookie), None)
        return self.start(logged_in=True)

    def end(self, cookie: str | None) -> None:
        if cookie:
            self._visits.pop(self._key(cookie), None)


def csrf_ok(visit: Visit | None, presented: object) -> bool:
    """Whether a form's CSRF field matches the visit's token (constant time)."""
    return visit is not None and isinstance(presented, str) and same_secret(presented, visit.csrf)
