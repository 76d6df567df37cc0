"""Sessions that hand the harness their secrets, so a scan can look for every one of them in the logs.

Theory of operation
-------------------
``RecordingGarbler`` and ``RecordingEvaluator`` are the protocol's own sessions (``protocol.session``) with a
``Secrets`` record attached; they run exactly as the plain sessions do and, at the points where a secret comes into
being, add it to the record under the session id:

- the garbler's Δ, when it is drawn at hello;
- both labels of each evaluator input wire, K and K ⊕ Δ, once oblivious transfer has given the garbler the zero
  labels K;
- both labels of each garbler input wire: the labels it sends for its own input bits (``garbler_input_labels``,
  W⁰ ⊕ x·Δ), and the other label of each pair (⊕ Δ);
- both labels of each output wire, W⁰ and W⁰ ⊕ Δ, from the garbling backend's output labels, when the table
  stream has ended;
- on the evaluator's side: the labels it was given and obtained by OT for every input wire, and the labels the
  evaluating backend gave each party's output wires.

Labels inside the program (neither input nor output) are not recorded: they are never anywhere but in the
backends' arrays while the program runs. The all-zero block that public bits carry (a public output's labels are 0
and Δ on the garbler's side, 0 on the evaluator's) is left out by ``Secrets.add_labels``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

from jointstat.circuit.model import Party
from jointstat.garble.backends import EvaluatorBackend
from jointstat.harness.scanner import Secrets
from jointstat.primitives.blocks import BLOCK_DTYPE
from jointstat.protocol import frames as fr
from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.session import CorrelatedOT
from jointstat.protocol.sides import Session


def sid_text(session_id: bytes) -> str:
    """A session id as the harness files its secrets: the text itself if it is printable ASCII, else hex."""
    if session_id.isascii() and session_id.decode().isprintable():
        return session_id.decode()
    return session_id.hex()


def _raw(blocks: np.ndarray) -> bytes:
    return np.ascontiguousarray(blocks, dtype=BLOCK_DTYPE).astype("<u8").tobytes()


class RecordingGarbler(GarblerSession):
    """A garbler session that hands the harness its Δ and both labels of every input and output wire."""

    secrets: Secrets | None = None

    def _record(self, blocks: np.ndarray) -> None:
        blocks = blocks[(blocks != 0).any(axis=1)]  # a public bit's labels, 0 and Δ, are not labels to record
        if self.secrets is None or blocks.size == 0:
            return
        made = [blocks]
        if self._delta is not None:
            made.append(blocks ^ self._delta)
        self.secrets.add_labels(sid_text(self.session_id), b"".join(_raw(m) for m in made))

    def _on_hello(self, frame: Any) -> tuple[str, list[bytes]]:
        out = super()._on_hello(frame)
        if self.secrets is not None and self._delta is not None:
            self.secrets.add_delta(sid_text(self.session_id), _raw(self._delta.reshape(1, 2)))
        return out

    def _after_ot(self, ot: CorrelatedOT, replies: list[bytes]) -> tuple[str, list[bytes]]:
        out = super()._after_ot(ot, replies)
        if self._evaluator_zero is not None:
            self._record(self._evaluator_zero)
        return out

    def _emit(self, kind: str, data: bytes) -> bytes:
        if kind == fr.GARBLER_INPUT_LABELS:
            payload = bytes(fr.payload_of(kind, fr.decode(data)[1]))
            self._record(np.frombuffer(payload, dtype=BLOCK_DTYPE).reshape(-1, 2))
        return super()._emit(kind, data)

    def _on_tables_sent(self, frame: Any) -> tuple[str, list[bytes]]:
        if self._output_zero is not None:
            for party in Party:
                self._record(self._output_zero[party])
        return super()._on_tables_sent(frame)


class RecordingEvaluator(EvaluatorSession):
    """An evaluator session that hands the harness the labels it is given, obtains and computes."""

    secrets: Secrets | None = None

    def _record(self, blocks: np.ndarray | None) -> None:
        if self.secrets is not None and blocks is not None and blocks.size:
            self.secrets.add_labels(sid_text(self.session_id), _raw(blocks))

    def _start_program(self, given: np.ndarray) -> tuple[str, list[bytes]]:
        self._record(given)
        self._record(self._own_labels)
        return super()._start_program(given)

    def _after_tables(self) -> tuple[str, list[bytes]]:
        if self._consumer is not None and isinstance(self._consumer.result, EvaluatorBackend):
            for party in Party:
                self._record(self._consumer.result.output_labels(party))
        return super()._after_tables()


def recording_session(secrets: Secrets, chunk_bytes: int | None = None) -> Callable[..., Session]:
    """A stand-in for ``protocol.session.new_session`` making sessions that record their secrets into ``secrets``
    (``chunk_bytes``, when given, overrides the garbler's frame size)."""

    def make(party: Party, **kwargs: Any) -> Session:
        session: RecordingGarbler | RecordingEvaluator
        if Party(party) == Party.GARBLER:
            if chunk_bytes is not None:
                kwargs["chunk_bytes"] = chunk_bytes
            session = RecordingGarbler(**kwargs)
        else:
            kwargs.pop("chunk_bytes", None)
            kwargs.pop("replay_limit_bytes", None)
            session = RecordingEvaluator(**kwargs)
        session.secrets = secrets
        return session

    return make
