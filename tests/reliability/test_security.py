"""Security checks on a node and its transport: who gets in, what is replayed, who can read the files, what is logged.

Specification: a plaintext connection to a node is refused before any frame, and the node keeps serving; a
certificate that is expired, not yet valid, from another CA, or from the same CA but not pinned is refused in the
TLS handshake, as a client's and as a server's, and the session expected meanwhile is untouched; a session id used
before — by a completed or an aborted session — is refused, proposed again or replayed on the wire; the session log,
the job store, result files, key files and the node's config are created owner-only even under umask 000; and the
log scan finds a label, Δ or input value in any of its forms, while no line written by the fault campaign holds one.
"""

from __future__ import annotations

import asyncio
import base64
import datetime
import os
import stat
from pathlib import Path

import grpc
import numpy as np
import pytest
from jointstat.circuit.builder import Builder
from jointstat.circuit.model import Party
from jointstat.circuit.program import Program
from jointstat.harness.campaign import CampaignReport, NodeCampaign
from jointstat.harness.faultpoint import FaultPlan
from jointstat.harness.scanner import Secrets, scan_for_secrets, secret_forms
from jointstat.harness.scenario import JOB_ACCEPTED, NODE_METRES, NODE_NAME, TABLES, expected_result
from jointstat.protocol import EvaluatorSession, GarblerSession, signer, verifier
from jointstat.protocol import frames as fr
from jointstat.protocol.frames import AbortReason
from jointstat.transport import Limits, SessionServer, run_client
from jointstat.transport.channel import MESSAGE_OPTIONS, METHOD_PATH
from jointstat.transport.pki import Issued, issue, new_ca, node_tls
from jointstat.transport.proposals import PROPOSE_PATH, PROTOCOL_VERSION, propose
from jointstat.wire.jointstat.v1 import session_pb2 as pb

LIMITS = Limits(deadline_s=10, idle_timeout_s=5, abort_grace_s=0.5)
# A cleartext HTTP/2 client's first bytes: the connection preface and an empty SETTINGS frame (RFC 9113 §3.4 and
# §6.5, from memory; checked against the h2 and hyperframe libraries below).
HTTP2_PREFACE = b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n" + bytes.fromhex("000000040000000000")
TLS_ALERT = (
    0x15  # the record content type alert(21) of RFC 8446 §5.1 (from memory; checked against ssl below)
)


def test_the_cleartext_bytes_are_the_http2_preface_and_a_settings_frame_as_h2_writes_them() -> None:
    import h2.config
    import h2.connection
    from hyperframe.frame import Frame, SettingsFrame

    client = h2.connection.H2Connection(h2.config.H2Configuration(client_side=True))
    client.initiate_connection()
    sent = client.data_to_send()
    assert HTTP2_PREFACE[:24] == sent[:24]  # the 24-byte client connection preface
    frame, length = Frame.parse_frame_header(memoryview(HTTP2_PREFACE[24:]))
    assert isinstance(frame, SettingsFrame) and frame.stream_id == 0 and length == 0 and not frame.flags
    assert len(HTTP2_PREFACE) == 24 + 9  # a frame header is 9 bytes


def test_the_tls_alert_content_type_is_the_one_pythons_ssl_module_knows() -> None:
    import ssl

    assert ssl._TLSContentType.ALERT == TLS_ALERT  # CPython's own table of RFC 8446 content types


# -- plaintext -----------------------------------------------------------------------------------------------------


async def test_a_plaintext_connection_to_a_node_is_refused_before_any_frame_and_the_node_keeps_serving(
    tmp_path: Path,
) -> None:
    async with NodeCampaign(tmp_path) as c:
        hello = fr.hello_frame(
            party=Party.GARBLER,
            session_id=os.urandom(16),
            manifest_digest=c.job.digest,
            program_digest=c.job.program.digest,
        )
        async with grpc.aio.insecure_channel(f"127.0.0.1:{c.node_port}") as channel:
            call = channel.stream_stream(METHOD_PATH)(timeout=10)
            with pytest.raises(grpc.aio.AioRpcError) as stream_error:
                await call.write(hello)
                await call.read()
            proposal = channel.unary_unary(
                PROPOSE_PATH,
                request_serializer=pb.RunProposal.SerializeToString,
                response_deserializer=pb.RunAnswer.FromString,
            )
            with pytest.raises(grpc.aio.AioRpcError) as proposal_error:
                await proposal(
                    pb.RunProposal(protocol_version=PROTOCOL_VERSION, job=JOB_ACCEPTED), timeout=10
                )
        assert stream_error.value.code() == grpc.StatusCode.UNAVAILABLE
        assert proposal_error.value.code() == grpc.StatusCode.UNAVAILABLE
        # Cleartext HTTP/2 bytes on the raw socket: the node answers with no HTTP/2 at all (at most a TLS alert).
        reader, writer = await asyncio.open_connection("127.0.0.1", c.node_port)
        writer.write(HTTP2_PREFACE)
        await writer.drain()
        answer = await asyncio.wait_for(reader.read(4096), timeout=10)
        writer.close()
        assert answer == b"" or answer[0] == TLS_ALERT  # at most a TLS alert record
        assert c.node.state.sessions == {}  # nothing reached the node's jobs
        served = await c.run_accepted(None)
    assert served.node.outputs == expected_result()


# -- certificates --------------------------------------------------------------------------------------------------


def tiny_program(bld: Builder) -> None:
    a = bld.input(Party.GARBLER, 4)
    b = bld.input(Party.EVALUATOR, 4)
    bld.output(Party.EVALUATOR, bld.and_(a, b))


@pytest.fixture(scope="module")
def tiny() -> Program:
    return Program.of(tiny_program)


def sessions(program: Program, sid: bytes) -> tuple[GarblerSession, EvaluatorSession]:
    from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

    gk, ek = Ed25519PrivateKey.generate(), Ed25519PrivateKey.generate()
    common = {"session_id": sid, "program": program, "manifest_digest": bytes(32)}
    g = GarblerSession(
        inputs=np.ones(4, dtype=np.uint8), sign=signer(gk), verify=verifier(ek.public_key()), **common
    )  # type: ignore[arg-type]
    e = EvaluatorSession(
        inputs=np.ones(4, dtype=np.uint8), sign=signer(ek), verify=verifier(gk.public_key()), **common
    )  # type: ignore[arg-type]
    return g, e


NOW = datetime.datetime.now(datetime.UTC)
PROBLEMS = ("expired", "not yet valid", "from another CA", "from the same CA but not pinned")


def bad_certificate(problem: str, ca: Issued, other_ca: Issued, name: str) -> tuple[Issued, bool]:
    """(the certificate presented, whether the other side pins that very certificate)."""
    if problem == "expired":
        return issue(ca, name, now=NOW - datetime.timedelta(days=30), days=2), True
    if problem == "not yet valid":
        return issue(ca, name, now=NOW + datetime.timedelta(days=30), days=2), True
    if problem == "from another CA":
        return issue(other_ca, name), False
    return issue(ca, name), False


@pytest.mark.parametrize("side", ["client", "server"])
@pytest.mark.parametrize("problem", PROBLEMS)
async def test_a_bad_certificate_is_refused_in_the_handshake_and_the_expected_session_is_untouched(
    tiny: Program, problem: str, side: str
) -> None:
    ca, other_ca = new_ca("bike schemes trial CA"), new_ca("someone else's CA")
    server_good, client_good = issue(ca, "riverside.bikes.test"), issue(ca, "hillside.bikes.test")
    name = "hillside.bikes.test" if side == "client" else "riverside.bikes.test"
    bad, pinned_itself = bad_certificate(problem, ca, other_ca, name)
    if side == "client":
        server_tls = node_tls(server_good, bad if pinned_itself else client_good)
        client_tls = node_tls(bad, server_good)
    else:
        server_tls = node_tls(bad, client_good)
        client_tls = node_tls(client_good, bad if pinned_itself else server_good)
    garbler, evaluator = sessions(tiny, f"cert {problem} {side}".encode())
    async with SessionServer(server_tls, limits=LIMITS) as server:
        expected = server.expect(garbler)
        result = await run_client(evaluator, f"127.0.0.1:{server.port}", client_tls, limits=LIMITS)
        assert not expected.done() and garbler.state == "new"  # no frame ever reached the served session
        assert server.withdraw(garbler.session_id)
    assert not result.completed and result.outputs is None and result.counters.frames_received == 0
    assert result.abort is not None and result.abort.reason == AbortReason.CONNECTION_LOST


# -- replayed session ids ------------------------------------------------------------------------------------------


async def test_a_session_id_used_before_is_refused_proposed_again_or_replayed_on_the_wire(
    tmp_path: Path,
) -> None:
    async with NodeCampaign(tmp_path) as c:
        completed = await c.run_accepted(None)
        aborted = await c.run_accepted(FaultPlan("cut", TABLES, 2, Party.EVALUATOR))
        assert completed.node.store_status == "completed"
        assert aborted.node.store_status == "aborted"
        tls = c.keys.tls()
        options = [*MESSAGE_OPTIONS, ("grpc.ssl_target_name_override", tls.server_name())]
        for record in (completed, aborted):
            sid = bytes.fromhex(record.session_id)
            proposal = pb.RunProposal(
                protocol_version=PROTOCOL_VERSION,
                job=JOB_ACCEPTED,
                manifest_digest=c.job.digest,
                session_id=sid,
                scheduled_for_us=1,
                role=pb.ROLE_GARBLER,
                attempt=9,
                trigger="operator",
            )
            answer = await propose(c.keys.node_identity(c.node_port), proposal)
            assert not answer.accepted and "used before" in answer.message
            hello = fr.hello_frame(
                party=Party.GARBLER,
                session_id=sid,
                manifest_digest=c.job.digest,
                program_digest=c.job.program.digest,
            )
            async with grpc.aio.secure_channel(
                f"127.0.0.1:{c.node_port}", tls.channel_credentials(), options=options
            ) as channel:
                call = channel.stream_stream(METHOD_PATH)(timeout=10)
                await call.write(hello)
                kind, frame = fr.decode(await call.read())
            assert kind == fr.ABORT and frame.abort.reason == AbortReason.SESSION_REFUSED
            assert "used before" in frame.abort.message
        findings, _ = c.scan()
    assert findings == []


# -- owner-only files ----------------------------------------------------------------------------------------------


def loose(path: Path) -> bool:
    return bool(stat.S_IMODE(path.stat().st_mode) & 0o077)


async def test_logs_job_store_results_keys_and_config_are_owner_only_even_under_umask_000(
    tmp_path: Path,
) -> None:
    old = os.umask(0)
    try:
        async with NodeCampaign(tmp_path) as c:
            served = await c.run_accepted(None)
            node = c.node.config.node
            result = Path(c.node.config.job(JOB_ACCEPTED).results)
            files = [
                Path(node.session_log),
                Path(node.job_store),
                *(
                    Path(str(node.job_store) + s)
                    for s in ("-wal", "-shm")
                    if Path(str(node.job_store) + s).exists()
                ),
                *result.iterdir(),
                *c.keys.directory.iterdir(),
                tmp_path / f"{NODE_NAME}.yaml",
                c.peer_log,
            ]
            directories = [Path(node.data_dir), result.parent, result, c.keys.directory]
            directories += [p for p in Path(node.data_dir).rglob("*") if p.is_dir()]
            # Checked while the node runs: its store's write-ahead log and shared memory exist only until it closes.
            loose_files = [p for p in files if loose(p)]
            loose_directories = [d for d in directories if loose(d)]
    finally:
        os.umask(old)
    assert served.node.outputs == expected_result()
    assert any(p.suffix == ".json" for p in result.iterdir())  # a result file was written
    assert any(p.name.endswith("-wal") for p in files)  # the store's write-ahead log was among those checked
    assert loose_files == []
    assert loose_directories == []


# -- the log scan --------------------------------------------------------------------------------------------------


def test_the_log_scan_finds_a_label_a_delta_or_an_input_value_in_every_form_and_never_prints_it(
    tmp_path: Path,
) -> None:
    secrets = Secrets()
    rng = np.random.default_rng(17)
    delta, label = rng.bytes(16), rng.bytes(16)
    secrets.add_delta("s1", delta)
    secrets.add_labels("s1", label)
    secrets.add_value(NODE_METRES[0])
    forms = secret_forms(secrets)
    kinds = " | ".join(forms.values())
    for kind in ("as hex", "upper-case hex", "base64", "decimal", "bytes literal", "bit string", "bit array"):
        assert kind in kinds
    for form, what in forms.items():
        log = tmp_path / "planted.jsonl"
        log.write_text(f'{{"seq":1,"detail":"the peer said {form} and left"}}\n', encoding="utf-8")
        found = scan_for_secrets(secrets, [log])
        assert what in {f.what for f in found}, what
        assert all(form not in f.what for f in found)  # a finding names the secret, never shows it
    # Base64 inside a longer base64 string, at every alignment, is found too.
    for prefix in (b"", b"x", b"xy"):
        blob = base64.b64encode(prefix + delta + b"tail").decode()
        assert scan_for_secrets(secrets, texts=[("blob", blob)])


def test_no_line_written_during_the_fault_campaign_holds_a_label_a_delta_or_an_input_value(
    campaign: CampaignReport,
) -> None:
    assert campaign.findings == []
    # What was searched for, and where: every session's Δ and labels, both schemes' figures, thousands of lines.
    assert len(campaign.secrets.deltas) >= len(campaign.records) // 2
    assert len(campaign.secrets.blocks) > 1000 and campaign.secrets.values >= set(NODE_METRES)
    assert campaign.figures["log_lines_scanned"] >= 10 * len(campaign.records)
