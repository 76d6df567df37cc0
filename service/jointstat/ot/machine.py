"""A small table-driven state machine shared by the sans-I/O OT parties.

Theory of operation: each party class declares one table ``TABLE`` mapping ``(state, event)`` to
``(handler name, allowed next states)``, where an event is a message kind or ``START`` for the ``start()``
call. ``start()`` and ``receive()`` look the pair up; a missing pair raises ``OTError`` naming the state,
the event and what the state would have accepted. The handler checks the message (size, points) before it
changes anything, does the work, and returns the next state and the messages to send; the machine checks
that the next state is one the table allows. Any error inside a handler leaves the party in ``FAILED``,
which refuses everything: one bad message aborts the OT for good, and no partial output is ever released
(outputs are read only in ``DONE``).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import ClassVar

from jointstat.ot.messages import OTError, OTMessage
from jointstat.primitives.group import PointError

START = "start()"
NEW = "new"
DONE = "done"
FAILED = "failed"

Transition = tuple[str, tuple[str, ...]]
Handler = Callable[[OTMessage | None], tuple[str, list[OTMessage]]]


class StateMachine:
    """Dispatch of ``start``/``receive`` through the subclass's ``TABLE``; see the module docstring."""

    ROLE: ClassVar[str] = "OT party"
    TABLE: ClassVar[Mapping[tuple[str, str], Transition]] = {}

    def __init__(self, role: str | None = None) -> None:
        self._state = NEW
        self.role = role or self.ROLE

    @property
    def state(self) -> str:
        """The current state name (one of the states in ``TABLE``, or ``done`` / ``failed``)."""
        return self._state

    @property
    def done(self) -> bool:
        """True once the protocol has finished successfully and the outputs may be read."""
        return self._state == DONE

    def start(self) -> list[OTMessage]:
        """The messages this party sends first (possibly none)."""
        return self._dispatch(START, None)

    def receive(self, message: OTMessage) -> list[OTMessage]:
        """Take one message from the peer; return the messages to send in reply (possibly none)."""
        if not isinstance(message, OTMessage):
            error = OTError(f"{self.role} in state {self._state!r}: expected an OTMessage")
            self._state = FAILED
            raise error
        return self._dispatch(message.kind, message)

    def _dispatch(self, event: str, message: OTMessage | None) -> list[OTMessage]:
        state = self._state
        if state == FAILED:
            raise OTError(
                f"{self.role} in state 'failed': refusing {event!r}, an earlier error aborted this OT"
            )
        transition = self.TABLE.get((state, event))
        if transition is None:
            accepted = sorted(ev for (st, ev) in self.TABLE if st == state) or ["nothing"]
            self._state = FAILED
            what = "start() called" if event == START else f"unexpected {event!r} message"
            raise OTError(f"{self.role} in state {state!r}: {what}; this state accepts {', '.join(accepted)}")
        handler_name, allowed = transition
        handler: Handler = getattr(self, handler_name)
        try:
            next_state, replies = handler(message)
        except OTError:
            self._state = FAILED
            raise
        except PointError as exc:
            self._state = FAILED
            raise OTError(f"{self.role} in state {state!r}: {event!r} message: {exc}") from None
        except Exception:
            self._state = FAILED
            raise
        if next_state not in allowed:
            self._state = FAILED
            raise AssertionError(f"{self.role}: handler for {state!r}/{event!r} chose {next_state!r}")
        self._state = next_state
        return replies

    def _error(self, event: str, problem: str) -> OTError:
        """An ``OTError`` whose text names the current state, the event and the problem (never a secret)."""
        return OTError(f"{self.role} in state {self._state!r}: {event!r} message: {problem}")

    def _expect_size(self, message: OTMessage, expected: int, unit: str) -> None:
        if len(message.payload) != expected:
            raise self._error(
                message.kind, f"payload is {len(message.payload)} bytes, expected {expected} ({unit})"
            )

    def _require_done(self, output: str) -> None:
        if self._state != DONE:
            raise OTError(f"{self.role} in state {self._state!r}: {output} is only available when done")
