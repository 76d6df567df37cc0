"""Mutated frames sent to a node: each rejected with a clear reason; no crash, no hang.

Specification: 10,000 frames — bits flipped, truncated, a length prefix made oversized (or the frame over the
4 MiB limit), the type made unknown (or its wire type wrong), valid frames sent out of order — each in a session an
honest peer otherwise plays correctly, most through the session server's own stream handler, 200 over the real
wire: every one ends with the node's session aborted (or the stream refused) for a named reason, none is
accepted, none hangs, nothing escapes a handler, and the node serves an honest session afterwards. The mutations
themselves are checked, and the server keeps only a bounded number of refusal messages however many streams it
refuses. Memory (resident growth, what the node's code retains per case) is measured, never bounded here:
``jointstat bench faults`` prints it.
"""

from __future__ import annotations

import asyncio
import functools
from collections import Counter

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from jointstat.circuit.model import Party
from jointstat.harness import mutations
from jointstat.harness.fuzzer import FUZZ_LIMITS, WIRE_SAMPLE, Fuzzer, FuzzReport, MemoryContext
from jointstat.harness.identities import Pair
from jointstat.harness.mutations import MUTATIONS, mutate
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason, ProtocolError
from jointstat.transport.server import REFUSALS_KEPT, SessionServer

from tests.reliability.conftest import FUZZ_FRAMES

CLEAR_REASONS = {r.name.lower() for r in AbortReason} - {"unspecified", "internal"}


def test_ten_thousand_mutated_frames_are_each_rejected_with_a_clear_reason(
    fuzzing: FuzzReport,
) -> None:
    assert fuzzing.figures["frames_fuzzed"] == len(fuzzing.outcomes) == FUZZ_FRAMES >= 10_000
    verdicts = Counter(o.verdict for o in fuzzing.outcomes)
    assert verdicts == {"rejected": FUZZ_FRAMES}, [o for o in fuzzing.outcomes if o.verdict != "rejected"][:5]
    for o in fuzzing.outcomes:
        own = not o.by_peer
        assert o.reason is not None
        # The node's own rejection names one of the protocol's reasons (gRPC's own status for a frame over 4 MiB
        # on the wire); when the honest peer found the damage first, the node ended with the peer's abort.
        assert o.reason in CLEAR_REASONS | {"transport"} or not own, o


def test_every_mutation_is_sent_two_thousand_times_some_over_the_wire(fuzzing: FuzzReport) -> None:
    by_kind = Counter(o.case.mutation for o in fuzzing.outcomes)
    assert by_kind == {m: FUZZ_FRAMES // len(MUTATIONS) for m in MUTATIONS}
    assert sum(o.case.wire for o in fuzzing.outcomes) == WIRE_SAMPLE
    # Both roles, both programs, and first frames (refused by the server before any session) as well as later ones.
    assert {(o.case.node_role, o.case.program) for o in fuzzing.outcomes} == {
        (r, c) for r in Party for c in ("plain", "ot")
    }
    assert 0 < sum(o.refused_first_frame for o in fuzzing.outcomes) < FUZZ_FRAMES // 2


def test_the_node_names_the_damage_it_finds(fuzzing: FuzzReport) -> None:
    reasons = Counter(o.reason for o in fuzzing.outcomes if not o.by_peer)
    for reason in (
        "malformed_frame",
        "unexpected_frame",
        "transcript_mismatch",
        "invalid_output",
        "bad_signature",
    ):
        assert reasons[reason] > 0, reasons


def test_nothing_crashes_or_hangs_and_the_memory_figures_of_bench_faults_are_measured(
    fuzzing: FuzzReport,
) -> None:
    f = fuzzing.figures
    assert fuzzing.crashes == [] and f["fuzz_crashes"] == 0 and f["fuzz_hung"] == 0
    # Resident memory after a warm-up tenth and at the end; what the node's code still holds per case, traced. Their
    # size is for `jointstat bench faults` to show, not for a test to bound.
    assert isinstance(f["fuzz_rss_growth_mib"], float)
    assert isinstance(f["fuzz_node_retained_bytes_per_case"], float)


def test_the_node_serves_an_honest_session_after_the_fuzzing(fuzzing: FuzzReport) -> None:
    assert fuzzing.figures["node_serves_after_fuzzing"] is True


def test_no_abort_message_of_the_fuzzing_holds_a_secret(fuzzing: FuzzReport) -> None:
    assert fuzzing.findings == []
    assert fuzzing.figures["log_lines_scanned"] > 0


# -- the mutations ---------------------------------------------------------------------------------------------------


@functools.cache
def session_frames() -> tuple[list[bytes], list[bytes]]:
    """(the frames of one honest session, the fuzzer's reference frames of another session)."""
    from jointstat.protocol.pipe import run_in_memory

    fuzzer = Fuzzer(seed=3)
    node, peer = fuzzer.sessions("ot", Party.GARBLER, b"a live session", 8)
    seen: list[bytes] = []
    run_in_memory(node, peer, intercept=lambda _to, data: (seen.append(data), [data])[1])  # type: ignore[arg-type]
    assert node.done and peer.done
    return seen, fuzzer.references[("ot", Party.GARBLER)]


@pytest.fixture(scope="module")
def frames() -> list[bytes]:
    return session_frames()[0]


@given(st.integers(0, 2**32 - 1), st.data())
def test_every_mutation_changes_the_frame(seed: int, data: st.DataObject) -> None:
    live, references = session_frames()
    frame = data.draw(st.sampled_from(live))
    how = data.draw(st.sampled_from(MUTATIONS))
    out = mutate(frame, how, np.random.default_rng(seed), references, previous=live[0])
    assert out and out != [frame]


@given(st.integers(0, 2**32 - 1))
def test_an_oversized_length_prefix_never_decodes(seed: int) -> None:
    rng = np.random.default_rng(seed)
    for frame in session_frames()[0]:
        (mutated,) = mutate(frame, mutations.OVERSIZED, rng, [])
        with pytest.raises(ProtocolError) as info:
            fr.decode(mutated)
        assert info.value.reason == AbortReason.MALFORMED_FRAME


def test_an_unknown_frame_type_is_named_as_such(frames: list[bytes]) -> None:
    rng = np.random.default_rng(11)
    seen = Counter()
    for frame in frames * 20:
        (mutated,) = mutate(frame, mutations.UNKNOWN_TYPE, rng, [])
        with pytest.raises(ProtocolError) as info:
            fr.decode(mutated)
        seen["unknown frame type" in str(info.value)] += 1
    assert seen[True] > 0


def test_frames_out_of_order_are_valid_frames(frames: list[bytes]) -> None:
    rng = np.random.default_rng(5)
    references = session_frames()[1]
    for frame in frames:
        for sent in mutate(frame, mutations.OUT_OF_ORDER, rng, references, previous=frames[0]):
            kind, _ = fr.decode(sent)  # every one decodes: only its place is wrong
            assert kind in fr.FRAME_TYPES


# -- a regression: refusals are remembered in bounded memory ---------------------------------------------------------


async def test_a_server_keeps_only_the_latest_refusal_messages_however_many_streams_it_refuses() -> None:
    pair = Pair.fresh()
    server = SessionServer(pair.node_tls(), limits=FUZZ_LIMITS)
    refused = REFUSALS_KEPT + 250
    for i in range(refused):
        ctx = MemoryContext(pair.peer.issued.certificate)
        # A valid hello of a session nobody expects: refused with an abort frame, before any session runs.
        hello = fr.hello_frame(
            party=Party.GARBLER,
            session_id=b"nobody expects %d" % i,
            manifest_digest=bytes(32),
            program_digest=bytes(32),
        )
        ctx.to_node.put_nowait(hello)
        await asyncio.wait_for(server._exchange(None, ctx), timeout=5)  # type: ignore[arg-type]
        kind, frame = fr.decode(ctx.written[-1])
        assert kind == fr.ABORT and frame.abort.reason == AbortReason.SESSION_REFUSED
    assert len(server.refused) == REFUSALS_KEPT
    assert server.refused[-1] == "no session with this id is expected here"
