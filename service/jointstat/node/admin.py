"""The operator's API of a running node: a small gRPC service on the admin socket, one JSON object each way.

Theory of operation
-------------------
The node serves ``jointstat.admin.v1.Admin`` on ``node.admin`` only — a Unix socket (default
``<data_dir>/admin.sock``, in the owner-only data directory, the socket itself made 0600) or a loopback address;
the config refuses anything else, so the API is never reachable from the network. There is no TLS on it: whoever
can open the socket is the node's operator. Every method is unary and takes and returns one UTF-8 JSON object
(no generated stubs; the method names are the API):

=================  ==================================  =========================================================
method             request                             answer
=================  ==================================  =========================================================
``Status``         ``{}``                              node name, start time, addresses, sessions running
``ListJobs``       ``{}``                              ``jobs``: name, peer, role, schedule, next run, last run
``RunJob``         ``{"job": NAME}``                   ``job``, ``session`` (first attempt), ``scheduled_for``
``History``        ``{"job": NAME?, "limit": N?}``     ``runs``: the job store's rows, most recent first
``ListSessions``   ``{"limit": N?}``                   ``sessions``: live and recent sessions
``ShowSession``    ``{"session": ID}``                 ``session``: status, phase, AND gates done/total, bytes,
                                                       rate, time left, phases, result file
=================  ==================================  =========================================================

An unknown job or session answers ``NOT_FOUND``, a request that cannot be honoured (a job this node only accepts)
``FAILED_PRECONDITION``, a malformed request ``INVALID_ARGUMENT``; the details say why. ``AdminClient`` is the
blocking client the ``jointstat jobs`` / ``jointstat sessions`` commands and the demo use.
"""

from __future__ import annotations

import json
from collections.abc import Awaitable, Callable
from typing import Any, Protocol

import grpc

SERVICE = "jointstat.admin.v1.Admin"
METHODS = ("Status", "ListJobs", "RunJob", "History", "ListSessions", "ShowSession")
CALL_TIMEOUT_S = 15.0


class AdminError(Exception):
    """The admin API refused a request or could not be reached; ``code`` is the gRPC status code."""

    def __init__(self, message: str, code: grpc.StatusCode | None = None) -> None:
        super().__init__(message)
        self.code = code


class RequestError(Exception):
    """Raised by an admin handler: answer with ``code`` and this message."""

    def __init__(self, code: grpc.StatusCode, message: str) -> None:
        super().__init__(message)
        self.code = code


class AdminHandlers(Protocol):
    """What the daemon provides to the admin API (each returns a JSON-ready dict)."""

    async def admin_status(self, request: dict[str, Any]) -> dict[str, Any]: ...
    async def admin_list_jobs(self, request: dict[str, Any]) -> dict[str, Any]: ...
    async def admin_run_job(self, request: dict[str, Any]) -> dict[str, Any]: ...
    async def admin_history(self, request: dict[str, Any]) -> dict[str, Any]: ...
    async def admin_list_sessions(self, request: dict[str, Any]) -> dict[str, Any]: ...
    async def admin_show_session(self, request: dict[str, Any]) -> dict[str, Any]: ...


def _encode(value: dict[str, Any]) -> bytes:
    return json.dumps(value, sort_keys=True, default=str).encode("utf-8")


def _decode(data: bytes) -> dict[str, Any]:
    try:
        value = json.loads(data.decode("utf-8")) if data else {}
    except (UnicodeDecodeError, json.JSONDecodeError):
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, "the request is not UTF-8 JSON") from None
    if not isinstance(value, dict):
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, "the request must be a JSON object")
    return value


def _snake(name: str) -> str:
    return "".join("_" + c.lower() if c.isupper() else c for c in name).lstrip("_")


def admin_handler(target: AdminHandlers) -> grpc.GenericRpcHandler:
    """The generic handler serving ``target``'s methods as the admin service."""

    def wrap(method: Callable[[dict[str, Any]], Awaitable[dict[str, Any]]]) -> grpc.RpcMethodHandler:
        async def handle(data: bytes, context: grpc.aio.ServicerContext) -> bytes:
            try:
                return _encode(await method(_decode(data)))
            except RequestError as exc:
                await context.abort(exc.code, str(exc))
                raise AssertionError("unreachable") from None

        return grpc.unary_unary_rpc_method_handler(
            handle, request_deserializer=None, response_serializer=None
        )

    handlers = {name: wrap(getattr(target, f"admin_{_snake(name)}")) for name in METHODS}
    return grpc.method_handlers_generic_handler(SERVICE, handlers)


def text_field(request: dict[str, Any], key: str, *, required: bool = True) -> str | None:
    value = request.get(key)
    if value is None and not required:
        return None
    if not isinstance(value, str) or not value:
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, f"{key!r} must be a non-empty string")
    return value


def limit_field(request: dict[str, Any], default: int = 50) -> int:
    value = request.get("limit", default)
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= 10_000:
        raise RequestError(grpc.StatusCode.INVALID_ARGUMENT, "'limit' must be an integer from 1 to 10000")
    return value


class AdminClient:
    """Blocking client of a node's admin API at a gRPC target (``unix:PATH`` or ``127.0.0.1:PORT``)."""

    def __init__(self, target: str, *, timeout: float = CALL_TIMEOUT_S) -> None:
        self.target = target
        self.timeout = timeout
        self._channel = grpc.insecure_channel(target)

    def close(self) -> None:
        self._channel.close()

    def __enter__(self) -> AdminClient:
        return self

    def __exit__(self, *_exc: object) -> None:
        self.close()

    def call(self, method: str, **request: Any) -> dict[str, Any]:
        if method not in METHODS:
            raise ValueError(f"no admin method {method!r}; the methods are {', '.join(METHODS)}")
        rpc = self._channel.unary_unary(
            f"/{SERVICE}/{method}", request_serializer=None, response_deserializer=None
        )
        try:
            data = rpc(_encode(request), timeout=self.timeout)
        except grpc.RpcError as exc:
            code = exc.code() if hasattr(exc, "code") else None
            details = exc.details() if hasattr(exc, "details") else str(exc)
            if code == grpc.StatusCode.UNAVAILABLE:
                raise AdminError(
                    f"no node answers on {self.target} (is it running? {details or 'unavailable'})", code
                ) from None
            raise AdminError(
                details or (code.name if code is not None else "admin call failed"), code
            ) from None
        value = json.loads(bytes(data).decode("utf-8"))
        if not isinstance(value, dict):
            raise AdminError("the node's answer is not a JSON object")
        return value

    def status(self) -> dict[str, Any]:
        return self.call("Status")

    def jobs(self) -> list[dict[str, Any]]:
        return list(self.call("ListJobs")["jobs"])

    def run_job(self, job: str) -> dict[str, Any]:
        return self.call("RunJob", job=job)

    def history(self, job: str | None = None, limit: int = 50) -> list[dict[str, Any]]:
        request: dict[str, Any] = {"limit": limit}
        if job is not None:
            request["job"] = job
        return list(self.call("History", **request)["runs"])

    def sessions(self, limit: int = 50) -> list[dict[str, Any]]:
        return list(self.call("ListSessions", limit=limit)["sessions"])

    def session(self, session_id: str) -> dict[str, Any]:
        return dict(self.call("ShowSession", session=session_id)["session"])
