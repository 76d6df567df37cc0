"""Frames and the transcript: encoding round trips, size limits, chunking, and the per-direction transcript digest."""

from __future__ import annotations

import hashlib

import pytest
from hypothesis import assume, given
from hypothesis import strategies as st
from jointstat.circuit.model import Party
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason, ProtocolError, Transcript
from jointstat.wire.jointstat.v1 import session_pb2 as pb

SID = b"transcript-test"


def test_a_hello_round_trips_with_every_field_and_its_signature_covers_them() -> None:
    signed: list[bytes] = []

    def sign(digest: bytes) -> bytes:
        signed.append(digest)
        return b"s" * 64

    program_digest = hashlib.sha256(b"a program").digest()
    data = fr.hello_frame(
        party=Party.EVALUATOR,
        session_id=SID,
        manifest_digest=bytes(range(32)),
        program_digest=program_digest,
        sign=sign,
    )
    kind, frame = fr.decode(data)
    assert kind == fr.HELLO
    assert (
        frame.hello.protocol_version == fr.PROTOCOL_VERSION == 4
    )  # 2: signed hellos; 3: programs and their digest; 4: acknowledgements and resume
    assert frame.hello.session_id == SID and frame.hello.manifest_digest == bytes(range(32))
    assert frame.hello.program_digest == program_digest
    assert frame.hello.role == fr.role_to_wire(Party.EVALUATOR)
    assert frame.hello.signature == b"s" * 64
    assert signed == [fr.hello_digest_of(frame.hello)]


def test_the_hello_digest_is_a_sha256_of_every_field_but_the_signature() -> None:
    # Recomputed with hashlib from the encoding the frames module documents (4-byte big-endian numbers).
    def n(value: int) -> bytes:
        return value.to_bytes(4, "big")

    expected = hashlib.sha256(
        b"jointstat hello v1" + n(2) + n(2) + n(len(SID)) + SID + n(32) + bytes(range(32)) + n(32) + bytes(32)
    ).digest()
    got = fr.hello_digest(
        version=2,
        role=fr.role_to_wire(Party.EVALUATOR),
        session_id=SID,
        manifest_digest=bytes(range(32)),
        program_digest=bytes(32),
    )
    assert got == expected
    # Moving a byte from one field to the next changes the digest: every field is length-prefixed.
    moved = fr.hello_digest(
        version=2,
        role=fr.role_to_wire(Party.EVALUATOR),
        session_id=SID + b"\x00",
        manifest_digest=bytes(range(1, 32)),
        program_digest=bytes(32),
    )
    assert moved != got


@given(st.sampled_from(sorted(fr.PAYLOAD_FIELD)), st.binary(max_size=300))
def test_payload_frames_round_trip(kind: str, payload: bytes) -> None:
    got_kind, frame = fr.decode(fr.payload_frame(kind, payload))
    assert got_kind == kind and fr.payload_of(kind, frame) == payload


# -- garbled tables: the direct encoding and the protobuf library agree, both ways ------------------------------------


@given(st.binary(min_size=1, max_size=3000))
def test_a_tables_frame_written_directly_is_the_protobuf_librarys_own_encoding(tables: bytes) -> None:
    direct = fr.payload_frame(fr.GARBLED_TABLES, tables)
    library = pb.Frame(garbled_tables=pb.GarbledTables(tables=tables)).SerializeToString()
    assert direct == library  # so the library reads what the direct encoder writes, and the reverse
    assert pb.Frame.FromString(direct).garbled_tables.tables == tables


@given(st.binary(min_size=1, max_size=3000))
def test_a_tables_frame_the_library_wrote_decodes_without_a_copy(tables: bytes) -> None:
    data = pb.Frame(garbled_tables=pb.GarbledTables(tables=tables)).SerializeToString()
    kind, frame = fr.decode(data)
    assert kind == fr.GARBLED_TABLES and isinstance(frame, fr.TablesFrame)  # the direct path
    assert frame.payload.obj is data and bytes(fr.payload_of(kind, frame)) == tables  # a view, no copy


def _varint(value: int, extra: int = 0) -> bytes:
    """``value`` as a protobuf varint, padded with ``extra`` redundant bytes (still valid: protobuf encoding guide)."""
    out = bytearray(fr._varint(value))
    for _ in range(extra):
        out[-1] |= 0x80
        out.append(0)
    return bytes(out)


def _other_encodings(tables: bytes, rnd: st.DataObject) -> bytes:
    """A valid encoding of Frame{garbled_tables{tables}} that is not the one ``payload_frame`` writes."""
    how = rnd.draw(
        st.sampled_from(["padded lengths", "unknown field inside", "unknown field after", "two halves"])
    )
    if how == "padded lengths":
        inner = b"\x0a" + _varint(len(tables), rnd.draw(st.integers(0, 4))) + tables
        return b"\x2a" + _varint(len(inner), rnd.draw(st.integers(1, 4))) + inner
    if how == "unknown field inside":  # field 7 (varint) before the tables: unknown fields are skipped
        inner = b"\x38\x01\x0a" + _varint(len(tables)) + tables
        return b"\x2a" + _varint(len(inner)) + inner
    if how == "unknown field after":  # field 100 (varint) after the garbled_tables field, in the frame itself
        return fr.payload_frame(fr.GARBLED_TABLES, tables) + bytes([0xA0, 0x06, 0x01])
    # The message in two parts: protobuf merges repeated occurrences of a message field, and for a bytes field the
    # last value wins, so the first part's tables are replaced by the second's.
    decoy = b"\x2a\x05\x0a\x03abc"
    return decoy + fr.payload_frame(fr.GARBLED_TABLES, tables)


@given(st.binary(min_size=1, max_size=3000), st.data())
def test_a_tables_frame_in_another_valid_protobuf_encoding_decodes_as_the_library_reads_it(
    tables: bytes, rnd: st.DataObject
) -> None:
    data = _other_encodings(tables, rnd)
    expected = pb.Frame.FromString(data).garbled_tables.tables
    assert expected == tables
    kind, frame = fr.decode(data)
    assert kind == fr.GARBLED_TABLES and bytes(fr.payload_of(kind, frame)) == expected


def test_a_frame_whose_first_bytes_look_like_tables_but_is_another_type_decodes_as_that_type() -> None:
    # garbled_tables then a hello: the last field of a oneof wins (protobuf encoding guide), so it is a hello.
    hello = fr.hello_frame(
        party=Party.GARBLER, session_id=SID, manifest_digest=bytes(32), program_digest=bytes(32)
    )
    kind, frame = fr.decode(fr.payload_frame(fr.GARBLED_TABLES, bytes(64)) + hello)
    assert kind == fr.HELLO and frame.hello.session_id == SID


@pytest.mark.parametrize(
    "data",
    [
        b"\x2a\x05\x0a\x07abc",  # the inner length runs past the frame
        b"\x2a\x09\x0a\x03abc",  # the outer length runs past the frame
        b"\x2a" + b"\xff" * 10 + b"\x01",  # a length of more than ten varint bytes
    ],
)
def test_a_truncated_tables_frame_is_malformed_on_either_path(data: bytes) -> None:
    with pytest.raises(ProtocolError) as info:
        fr.decode(data)
    assert info.value.reason == AbortReason.MALFORMED_FRAME


@given(st.integers(0, 5000), st.integers(1, 700))
def test_chunking_splits_a_payload_in_order_into_bounded_frames(size: int, chunk: int) -> None:
    payload = hashlib.shake_128(size.to_bytes(4, "big")).digest(size) if size else b""
    frames = fr.chunked_frames(fr.GARBLER_OUTPUT_LABELS, payload, chunk)
    assert len(frames) == -(-size // chunk)
    parts = [fr.payload_of(fr.GARBLER_OUTPUT_LABELS, fr.decode(f)[1]) for f in frames]
    assert all(0 < len(p) <= chunk for p in parts)
    assert b"".join(parts) == payload


def test_the_largest_payload_fits_in_a_four_mebibyte_frame() -> None:
    assert (
        len(fr.payload_frame(fr.GARBLED_TABLES, bytes(fr.MAX_PAYLOAD_BYTES))) <= fr.MAX_FRAME_BYTES == 4 << 20
    )


def test_an_outgoing_frame_over_the_limit_is_refused() -> None:
    with pytest.raises(ProtocolError, match="exceeds"):
        fr.payload_frame(fr.GARBLED_TABLES, bytes(fr.MAX_FRAME_BYTES))


def test_an_abort_carries_its_reason_and_a_bounded_message() -> None:
    info = fr.abort_of(fr.decode(fr.abort_frame(AbortReason.BAD_SIGNATURE, "x" * 5000))[1])
    assert info.reason == AbortReason.BAD_SIGNATURE and info.by_peer
    assert len(info.message) == fr.MAX_MESSAGE_CHARS


def test_an_abort_with_a_reason_code_from_a_newer_version_reads_as_unspecified() -> None:
    _, frame = fr.decode(fr.abort_frame(AbortReason.INTERNAL, "m"))
    frame.abort.reason = 99
    assert fr.abort_of(fr.decode(fr.encode(frame))[1]).reason == AbortReason.UNSPECIFIED


frames_strategy = st.lists(
    st.tuples(st.sampled_from([Party.GARBLER, Party.EVALUATOR]), st.binary(min_size=1, max_size=40)),
    max_size=12,
)


def _transcripts(frames: list[tuple[Party, bytes]]) -> tuple[Transcript, Transcript]:
    g, e = Transcript(Party.GARBLER, SID), Transcript(Party.EVALUATOR, SID)
    for sender, data in frames:
        if sender == Party.GARBLER:
            g.sent(fr.BASE_OT, data)
            e.received(fr.BASE_OT, data)
        else:
            e.sent(fr.BASE_OT, data)
            g.received(fr.BASE_OT, data)
    return g, e


@given(frames_strategy, st.randoms())
def test_both_sides_agree_whatever_the_interleaving_of_the_two_directions(frames, rnd) -> None:
    g, e = _transcripts(frames)
    # The evaluator sees the same per-direction orders, interleaved differently.
    from_g = [f for f in frames if f[0] == Party.GARBLER]
    from_e = [f for f in frames if f[0] == Party.EVALUATOR]
    merged = []
    while from_g or from_e:
        source = from_g if from_g and (not from_e or rnd.random() < 0.5) else from_e
        merged.append(source.pop(0))
    _, e2 = _transcripts(merged)
    assert g.digest() == e.digest() == e2.digest()


@given(frames_strategy.filter(lambda f: len(f) >= 2))
def test_reordering_frames_of_one_direction_changes_the_digest(frames) -> None:
    sender = frames[0][0]
    own = [i for i, f in enumerate(frames) if f[0] == sender]
    assume(len(own) >= 2 and frames[own[0]][1] != frames[own[1]][1])
    swapped = list(frames)
    swapped[own[0]], swapped[own[1]] = swapped[own[1]], swapped[own[0]]
    assert _transcripts(frames)[0].digest() != _transcripts(swapped)[0].digest()


@given(frames_strategy.filter(bool), st.integers(0, 100))
def test_changing_one_byte_of_one_frame_changes_the_digest(frames, where) -> None:
    i = where % len(frames)
    sender, data = frames[i]
    changed = list(frames)
    changed[i] = (sender, bytes([data[0] ^ 1]) + data[1:])
    assert _transcripts(frames)[0].digest() != _transcripts(changed)[0].digest()


def test_splitting_a_frame_differently_changes_the_digest() -> None:
    whole = [(Party.GARBLER, b"abcd")]
    split = [(Party.GARBLER, b"ab"), (Party.GARBLER, b"cd")]
    assert _transcripts(whole)[0].digest() != _transcripts(split)[0].digest()  # lengths are hashed too


def test_the_digest_binds_the_session_id() -> None:
    a, b = Transcript(Party.GARBLER, b"one"), Transcript(Party.GARBLER, b"two")
    assert a.digest() != b.digest()


def test_finish_and_abort_frames_are_not_part_of_the_transcript() -> None:
    t, u = Transcript(Party.GARBLER, SID), Transcript(Party.GARBLER, SID)
    t.sent(fr.FINISH, b"finish bytes")
    t.received(fr.ABORT, b"abort bytes")
    assert t.digest() == u.digest()
    assert (t.frames_sent, t.frames_received) == (1, 1)
