"""What every sans-I/O OT party shares: how it fails, and the checks of its messages and outputs.

Theory of operation: each party class (``base``, ``extension``) declares its ``TABLE`` of ``(state, event)`` →
``(handler name, allowed next states)``, where an event is a message kind or ``start()``, and the one table
dispatch of ``jointstat.machine`` runs it. This module says how an OT party fails: a pair missing from the table
raises ``OTError`` naming the state, the event and what the state would have accepted; a handler's ``OTError``, or a
point that fails validation (``PointError``, turned into an ``OTError``), or any other exception leaves the party
in ``failed``, which refuses everything: one bad message aborts the OT for good, and no partial output is ever
released (outputs are read only in ``done``). A handler checks the message (size, points) before it changes
anything.
"""

from __future__ import annotations

from typing import ClassVar, NoReturn

from jointstat.machine import DONE, FAILED, START, TableMachine
from jointstat.ot.messages import OTError, OTMessage
from jointstat.primitives.group import PointError


class OTMachine(TableMachine[OTMessage | None, list[OTMessage]]):
    """An OT party: ``start()`` and ``receive(message)`` through the subclass's ``TABLE`` (module docstring)."""

    ROLE: ClassVar[str] = "OT party"

    def __init__(self, role: str | None = None) -> None:
        super().__init__()
        self.role = role or self.ROLE

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

    # -- how an OT party fails (jointstat.machine) ---------------------------------------------------------------------
    def _refuse_ended(self, state: str, event: str) -> Exception:
        return OTError(
            f"{self.role} in state {state!r}: refusing {event!r}, an earlier error aborted this OT"
        )

    def _refuse_unexpected(self, state: str, event: str) -> Exception:
        self._state = FAILED
        accepted = ", ".join(self.accepted_events(state)) or "nothing"
        what = "start() called" if event == START else f"unexpected {event!r} message"
        return OTError(f"{self.role} in state {state!r}: {what}; this state accepts {accepted}")

    def _handler_failed(self, state: str, event: str, exc: Exception) -> NoReturn:
        self._state = FAILED
        if isinstance(exc, PointError):
            raise OTError(f"{self.role} in state {state!r}: {event!r} message: {exc}") from None
        raise exc

    def _refuse_next(self, state: str, event: str, next_state: str) -> Exception:
        self._state = FAILED
        return AssertionError(f"{self.role}: handler for {state!r}/{event!r} chose {next_state!r}")

    # -- checks for the handlers ---------------------------------------------------------------------------------------
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
