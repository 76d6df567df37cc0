"""The one table-driven state machine (``jointstat.machine``) that the OT parties and the sessions share.

Specification: a machine moves only along its table — an event its state does not list is refused naming the state,
the event and what the state accepts; a handler's error goes through the machine's failure hook; a handler that
picks a state its table does not allow is refused; an ended machine refuses everything. Every party keeps its states
and transitions in one table, and the transition table in its module's docstring lists exactly those transitions,
next states included (OT: ``ot.base``, ``ot.extension``; the sessions: ``protocol.session``).
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from pathlib import Path
from types import ModuleType
from typing import NoReturn

import pytest
from jointstat import machine
from jointstat.machine import DONE, FAILED, NEW, START, TableMachine, Transition
from jointstat.ot import base, extension
from jointstat.protocol import evaluator, garbler, session
from jointstat.protocol import frames as fr

# -- the dispatch ------------------------------------------------------------------------------------------------------


class Turnstile(TableMachine[str | None, list[str]]):
    """A coin-operated gate, the textbook example: a coin unlocks it, a push locks it again."""

    TABLE: Mapping[tuple[str, str], Transition] = {
        (NEW, START): ("_on_start", ("locked",)),
        ("locked", "coin"): ("_on_coin", ("unlocked",)),
        ("unlocked", "push"): ("_on_push", ("locked", DONE)),
        ("unlocked", "jam"): ("_on_jam", ("locked",)),
    }

    def __init__(self, pushes_left: int = 2) -> None:
        super().__init__()
        self.pushes_left = pushes_left

    def start(self) -> list[str]:
        return self._dispatch(START, None)

    def send(self, event: str) -> list[str]:
        return self._dispatch(event, event)

    def _on_start(self, _message: str | None) -> tuple[str, list[str]]:
        return "locked", ["ready"]

    def _on_coin(self, _message: str | None) -> tuple[str, list[str]]:
        return "unlocked", ["click"]

    def _on_push(self, _message: str | None) -> tuple[str, list[str]]:
        self.pushes_left -= 1
        return ("locked" if self.pushes_left else DONE), ["clunk"]

    def _on_jam(self, _message: str | None) -> tuple[str, list[str]]:
        return "broken", []  # not in the table: a bug the machine must catch

    # How a turnstile fails: a plain RuntimeError, and it stays failed.
    def _refuse_ended(self, state: str, event: str) -> Exception:
        return RuntimeError(f"turnstile in state {state!r}: {event!r} refused, it has ended")

    def _refuse_unexpected(self, state: str, event: str) -> Exception:
        self._state = FAILED
        accepted = ", ".join(self.accepted_events(state)) or "nothing"
        return RuntimeError(
            f"turnstile in state {state!r}: unexpected {event!r}; this state accepts {accepted}"
        )

    def _handler_failed(self, state: str, event: str, exc: Exception) -> NoReturn:
        self._state = FAILED
        raise exc

    def _refuse_next(self, state: str, event: str, next_state: str) -> Exception:
        self._state = FAILED
        return AssertionError(f"turnstile: handler for {state!r}/{event!r} chose {next_state!r}")


def test_a_machine_moves_along_its_table_and_returns_what_the_handler_sends() -> None:
    gate = Turnstile()
    assert gate.state == NEW
    assert gate.start() == ["ready"] and gate.state == "locked"
    assert gate.send("coin") == ["click"] and gate.state == "unlocked"
    assert gate.send("push") == ["clunk"] and gate.state == "locked"
    gate.send("coin")
    gate.send("push")
    assert gate.state == DONE


def test_an_event_the_state_does_not_list_is_refused_through_the_hook_with_what_the_state_accepts() -> None:
    gate = Turnstile()
    gate.start()
    with pytest.raises(RuntimeError, match=r"state 'locked': unexpected 'push'; this state accepts coin"):
        gate.send("push")
    assert gate.state == FAILED


def test_a_machine_in_an_ended_state_refuses_everything_before_looking_at_its_table() -> None:
    gate = Turnstile()
    gate.start()
    with pytest.raises(RuntimeError):
        gate.send("push")
    with pytest.raises(RuntimeError, match="has ended"):
        gate.send("coin")
    assert gate.state == FAILED


def test_a_handler_that_picks_a_state_outside_its_table_is_caught_and_the_machine_fails() -> None:
    gate = Turnstile()
    gate.start()
    gate.send("coin")
    with pytest.raises(AssertionError, match="'unlocked'/'jam' chose 'broken'"):
        gate.send("jam")
    assert gate.state == FAILED


def test_an_error_in_a_handler_goes_through_the_failure_hook() -> None:
    class Brittle(Turnstile):
        def _on_coin(self, _message: str | None) -> tuple[str, list[str]]:
            raise ValueError("counterfeit coin")

    gate = Brittle()
    gate.start()
    with pytest.raises(ValueError, match="counterfeit coin"):
        gate.send("coin")
    assert gate.state == FAILED


def test_accepted_events_are_listed_sorted_per_state() -> None:
    assert Turnstile.accepted_events("unlocked") == ["jam", "push"]
    assert Turnstile.accepted_events(DONE) == []


def test_the_machine_module_imports_nothing_of_jointstat() -> None:
    source = Path(machine.__file__).read_text(encoding="utf-8")
    assert not re.search(r"^\s*(from|import)\s+jointstat", source, re.M)


# -- the docstring tables match the dictionaries ----------------------------------------------------------------------


def documented_transitions(module: ModuleType) -> dict[str, set[tuple[str, str, frozenset[str]]]]:
    """The rows ``| party | state | event | sends | next |`` of a module docstring's transition table, by party.

    The event is the cell up to its first comma, without a parenthesis (``base_ot (A)`` → ``base_ot``); "next" is
    the comma-separated list of states once its parentheses (the conditions) are removed.
    """
    rows: dict[str, set[tuple[str, str, frozenset[str]]]] = {}
    for line in (module.__doc__ or "").splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if (
            not line.startswith("|")
            or len(cells) != 5
            or cells[0] in ("party", "session")
            or "---" in cells[0]
        ):
            continue
        party, state, event, _sends, nexts = cells
        event = re.sub(r"\s*\([^)]+\)", "", event).split(",")[0].strip()
        states = frozenset(s.strip() for s in re.sub(r"\([^)]*\)", "", nexts).split(","))
        rows.setdefault(party, set()).add((state, event, states))
    return rows


def actual_transitions(table: Mapping[tuple[str, str], Transition]) -> set[tuple[str, str, frozenset[str]]]:
    return {
        (state, event, frozenset(nexts)) for (state, event), (_, nexts) in table.items() if event != fr.ABORT
    }


@pytest.mark.parametrize(
    ("module", "tables"),
    [
        (base, {"BaseOTSender": base.BaseOTSender.TABLE, "BaseOTReceiver": base.BaseOTReceiver.TABLE}),
        (
            extension,
            {
                "CorrelatedOTSender": extension.CorrelatedOTSender.TABLE,
                "ExtensionSender": extension.ExtensionSender.TABLE,
                "CorrelatedOTReceiver": extension.CorrelatedOTReceiver.TABLE,
                "ExtensionReceiver": extension.ExtensionReceiver.TABLE,
            },
        ),
        (session, {"garbler": session.GARBLER_TABLE, "evaluator": session.EVALUATOR_TABLE}),
    ],
    ids=["ot.base", "ot.extension", "protocol.session"],
)
def test_the_docstring_table_lists_exactly_the_transitions_and_next_states_of_the_dictionaries(
    module: ModuleType, tables: dict[str, Mapping[tuple[str, str], Transition]]
) -> None:
    documented = documented_transitions(module)
    assert set(documented) == set(tables)
    for party, table in tables.items():
        assert documented[party] == actual_transitions(table), party


def test_the_table_parser_reads_conditions_and_event_details_as_the_tables_write_them() -> None:
    # The parser itself, on rows of the forms the tables use (so a table cannot pass by being misread).
    fake = ModuleType("fake")
    fake.__doc__ = (
        "| party | state | event | sends | next |\n"
        "|---|---|---|---|---|\n"
        "| P | new | start() | — | a, b (if so, then) |\n"
        "| P | a | thing (x), 32 B | y, z | done |\n"
    )
    assert documented_transitions(fake) == {
        "P": {("new", "start()", frozenset({"a", "b"})), ("a", "thing", frozenset({"done"}))}
    }


@pytest.mark.parametrize(
    "cls",
    [
        base.BaseOTSender,
        base.BaseOTReceiver,
        extension.ExtensionSender,
        extension.ExtensionReceiver,
        extension.CorrelatedOTSender,
        extension.CorrelatedOTReceiver,
        garbler.GarblerSession,
        evaluator.EvaluatorSession,
    ],
)
def test_every_party_is_run_by_the_one_table_machine_and_names_only_handlers_it_has(cls: type) -> None:
    assert issubclass(cls, TableMachine)
    assert "_dispatch" not in vars(cls)  # no party keeps a dispatch of its own
    for handler, nexts in cls.TABLE.values():
        assert callable(getattr(cls, handler)), handler
        assert nexts
