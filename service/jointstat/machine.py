"""One table-driven state machine for every sans-I/O party: the OT parties and the two protocol sessions.

Theory of operation
-------------------
A machine class declares one table, ``TABLE``, mapping ``(state, event)`` to ``(handler name, allowed next
states)``. An event is the kind of a message from the peer, or a call of the party's own (``start()``, or the
session's ``tables sent``). ``_dispatch(event, message)`` does, in order:

1. refuse the event if the machine is in one of its ``ENDED`` states (``_refuse_ended``);
2. look up ``(state, event)``; a missing pair is refused (``_refuse_unexpected``) with a message that names the
   state, the event and the events the state accepts (``accepted_events``);
3. run the handler, which checks the message before it changes anything, does the work and returns the next state
   and what to send; an exception from it becomes the machine's own error (``_handler_failed``, which raises);
4. check that the next state is one the table allows (``_refuse_next``), and only then move to it.

The four hooks say how a kind of party fails (every kind defines them); each returns (or raises) the error, and
moves the machine to its failed state where that kind of party does so. An OT party (``ot.party``) raises
``OTError`` and refuses everything afterwards; a session (``protocol.session``) raises ``ProtocolError`` carrying
the abort frame for its peer. So the table is the one source of every
state and transition of a party: the module docstrings' transition tables are tested against the dictionaries.

Nothing here touches a socket, a clock, a thread or a file, and this module imports nothing of jointstat: it sits
below ``ot`` and ``protocol``, next to ``canonical``.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable, Mapping
from typing import ClassVar, Generic, NoReturn, TypeVar

START = "start()"
NEW = "new"
DONE = "done"
FAILED = "failed"

Transition = tuple[str, tuple[str, ...]]
"""(the name of the handler method, the states it may move to)."""

Table = Mapping[tuple[str, str], Transition]

M = TypeVar("M")  # what a handler takes: the decoded message (None for a call such as start())
R = TypeVar("R")  # what a handler gives back to send: messages or frames


class TableMachine(ABC, Generic[M, R]):
    """Dispatch of events through the subclass's ``TABLE``; see the module docstring for the order of the checks."""

    TABLE: ClassVar[Table] = {}
    ENDED: ClassVar[frozenset[str]] = frozenset({FAILED})

    def __init__(self) -> None:
        self._state = NEW

    @property
    def state(self) -> str:
        """The current state: one named in ``TABLE``, or done, or failed."""
        return self._state

    @classmethod
    def accepted_events(cls, state: str) -> list[str]:
        """The events ``state`` accepts, sorted (what an error about an unexpected event lists)."""
        return sorted(event for (st, event) in cls.TABLE if st == state)

    def _dispatch(self, event: str, message: M) -> R:
        state = self._state
        if state in self.ENDED:
            raise self._refuse_ended(state, event)
        transition = self.TABLE.get((state, event))
        if transition is None:
            raise self._refuse_unexpected(state, event)
        handler_name, allowed = transition
        handler: Callable[[M], tuple[str, R]] = getattr(self, handler_name)
        try:
            next_state, out = handler(message)
        except Exception as exc:
            self._handler_failed(state, event, exc)
            raise  # a hook that did not raise: the handler's own exception goes on
        if next_state not in allowed:
            raise self._refuse_next(state, event, next_state)
        self._state = next_state
        return out

    # -- how this kind of party fails: each kind of party says it ----------------------------------------------------
    @abstractmethod
    def _refuse_ended(self, state: str, event: str) -> Exception:
        """The error for an event after the machine has ended (in one of ``ENDED``)."""

    @abstractmethod
    def _refuse_unexpected(self, state: str, event: str) -> Exception:
        """The error for an event the table does not list for ``state``; moves the machine to failed."""

    @abstractmethod
    def _handler_failed(self, state: str, event: str, exc: Exception) -> NoReturn:
        """Raise the error for an exception from the handler of ``(state, event)``; moves the machine to failed."""

    @abstractmethod
    def _refuse_next(self, state: str, event: str, next_state: str) -> Exception:
        """The error for a handler that chose a state the table does not allow (a bug); moves the machine to failed."""
