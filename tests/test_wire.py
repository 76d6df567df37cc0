"""The wire format: generated Python messages match ``proto/`` exactly, and the transport uses the versioned service."""

from __future__ import annotations

import importlib.util
from pathlib import Path

from jointstat.protocol import frames as fr
from jointstat.transport import channel
from jointstat.wire.jointstat.v1 import session_pb2 as pb

ROOT = Path(__file__).resolve().parent.parent


def _generator():
    spec = importlib.util.spec_from_file_location("proto_generate", ROOT / "proto" / "generate.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_regenerating_the_stubs_from_proto_changes_nothing(tmp_path: Path) -> None:
    gen = _generator()
    written = gen.generate(tmp_path)
    assert written, "the generator wrote no files"
    for path in written:
        committed = gen.WIRE_DIR / path.relative_to(tmp_path)
        assert committed.exists(), f"{committed} is not committed; run proto/generate.py"
        assert committed.read_bytes() == path.read_bytes(), f"{committed} is stale; run proto/generate.py"


def test_the_service_is_versioned_and_one_bidirectional_stream_of_frames() -> None:
    service = pb.DESCRIPTOR.services_by_name["Session"]
    assert pb.DESCRIPTOR.package == "jointstat.v1"
    method = service.methods_by_name["Exchange"]
    assert method.client_streaming and method.server_streaming
    assert method.input_type.full_name == method.output_type.full_name == "jointstat.v1.Frame"
    assert channel.METHOD_PATH == "/jointstat.v1.Session/Exchange"


def test_every_frame_type_of_the_session_is_a_field_of_the_frame_body() -> None:
    body = pb.Frame.DESCRIPTOR.oneofs_by_name["body"]
    assert [f.name for f in body.fields] == list(fr.FRAME_TYPES)


def test_abort_reasons_mirror_the_wire_enum() -> None:
    wire = {v.number for v in pb.AbortReason.DESCRIPTOR.values}
    assert wire == {int(r) for r in fr.AbortReason}


def test_both_ends_limit_messages_to_four_mebibytes() -> None:
    options = dict(channel.MESSAGE_OPTIONS)
    assert options["grpc.max_send_message_length"] == 4 * 1024 * 1024
    assert options["grpc.max_receive_message_length"] == 4 * 1024 * 1024
