"""An in-memory pipe that runs a garbler session and an evaluator session against each other in one thread.

Theory of operation: both sessions' ``start()`` frames go into one first-in-first-out queue tagged with their
destination; the pipe delivers the oldest frame and queues the replies for the other side. When the garbler is
ready to stream, its ``produce()`` frames are queued one at a time while fewer than ``window`` frames wait,
alternating with deliveries, so the evaluator evaluates while the garbler garbles and only a few frames are ever
queued; the garbler streams only while its replay buffer has room (``can_stream``), as the transport does. Each
direction stays in order, as on a gRPC stream. A ``ProtocolError`` on one side delivers its abort frame to the
other. ``intercept`` sees every frame before delivery and returns the frames to deliver instead (to drop, alter or
inject frames in tests).

Cuts: ``cuts`` lists delivery numbers (1 for the first frame delivered) at which the connection is cut just
before that delivery: every frame still queued is lost, as on a dropped connection. If both sessions can be
resumed (their OT has ended), the ``initiator`` opens the new "stream" with its resume frame, the other answers
with its own and the frames the initiator lacks, the initiator resends what the other lacks, and the run goes on;
the garbler streams nothing new until that exchange is over. Otherwise both sessions fail with
``connection_lost`` and ``PipeStats.lost`` is set: the caller starts a fresh session, as a node does.

This is what the transport does over gRPC, minus the network, the threads and the clocks.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

from jointstat.circuit.model import Party
from jointstat.protocol.evaluator import EvaluatorSession
from jointstat.protocol.frames import AbortReason, ProtocolError
from jointstat.protocol.garbler import GarblerSession
from jointstat.protocol.sides import Session

Intercept = Callable[[Party, bytes], list[bytes]]
WINDOW_FRAMES = 4


@dataclass
class PipeStats:
    frames: int = 0
    bytes: int = 0
    most_queued: int = 0
    cuts: int = 0
    resumes: int = 0
    lost: bool = False  # a cut came before both sides could resume: both failed (connection lost)
    stalled: bool = False  # the garbler's replay buffer was full and nothing was left to deliver
    most_replay_bytes: int = 0  # the most the garbler's replay buffer held


def run_in_memory(
    garbler: GarblerSession,
    evaluator: EvaluatorSession,
    *,
    intercept: Intercept | None = None,
    cuts: Sequence[int] = (),
    initiator: Party = Party.EVALUATOR,
    window: int = WINDOW_FRAMES,
) -> PipeStats:
    """Run both sessions until neither has anything to send; returns counts of what crossed the pipe."""
    sessions: dict[Party, Session] = {Party.GARBLER: garbler, Party.EVALUATOR: evaluator}
    other = {Party.GARBLER: Party.EVALUATOR, Party.EVALUATOR: Party.GARBLER}
    queue: deque[tuple[Party, bytes]] = deque()
    stats = PipeStats()
    stream: Iterator[bytes] | None = None
    cut_at = sorted(set(cuts))
    resuming: Party | None = None  # the initiator, until it has taken the answer to its resume
    attempt = 0

    def post(to: Party, frames: list[bytes]) -> None:
        for data in frames:
            for delivered in intercept(to, data) if intercept is not None else [data]:
                queue.append((to, delivered))

    def cut() -> bool:
        """Drop what is in flight; start the resume, or fail both sides. False when the run is over."""
        nonlocal resuming, attempt
        queue.clear()
        stats.cuts += 1
        if garbler.resumable and evaluator.resumable:
            attempt += 1
            resuming = initiator
            post(other[initiator], [sessions[initiator].resume_frame(attempt)])
            return True
        for session in sessions.values():
            session.fail(
                AbortReason.CONNECTION_LOST, "the connection was cut before the session could resume"
            )
        stats.lost = True
        return False

    post(Party.EVALUATOR, garbler.start())
    post(Party.GARBLER, evaluator.start())
    while True:
        if stream is None and garbler.ready_to_stream:
            stream = garbler.produce()
        if stream is not None and resuming is None and garbler.can_stream and len(queue) < window:
            try:
                data = next(stream, None)
            except ProtocolError as exc:
                data = None
                if exc.frame is not None:
                    post(Party.EVALUATOR, [exc.frame])
            if data is None:
                stream = None
            else:
                post(Party.EVALUATOR, [data])
            stats.most_replay_bytes = max(stats.most_replay_bytes, garbler.replay_bytes)
        if not queue:
            if stream is None or garbler.ended:
                return stats
            if not garbler.can_stream or resuming is not None:
                stats.stalled = True
                return stats
            continue
        if cut_at and stats.frames + 1 >= cut_at[0]:
            cut_at.pop(0)
            if not cut():
                return stats
            continue
        stats.most_queued = max(stats.most_queued, len(queue))
        to, data = queue.popleft()
        stats.frames += 1
        stats.bytes += len(data)
        target = sessions[to]
        if target.ended and not target.done:
            continue
        try:
            resumes = target.resumes
            replies = target.receive(data)
            if target.resumes > resumes and to == resuming:  # the initiator has taken the answer: resumed
                resuming = None
                stats.resumes += 1
            post(other[to], replies)
        except ProtocolError as exc:
            if exc.frame is not None:
                post(other[to], [exc.frame])
