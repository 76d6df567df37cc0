"""``jointstat audit verify|compare`` and ``jointstat keys init`` from the command line (exit 0 ok, 1 problem, 2 usage)."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
from jointstat.audit import SessionLog
from jointstat.cli import main
from jointstat.node.keys import load_signing_key

from tests.test_audit_log import MANIFEST, FakeClock, run_session, write_pair


def test_verify_says_ok_for_a_good_log(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    pa, _ = write_pair(tmp_path, ["completed", "aborted"])
    assert main(["audit", "verify", str(pa)]) == 0
    out = capsys.readouterr().out
    assert "ok — 14 records by node alpha, chain and signatures verify" in out
    assert "sessions: 2 (1 aborted, 1 completed)" in out


def test_verify_names_the_first_bad_record_and_exits_1(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    data = bytearray(pa.read_bytes())
    third = data.index(b"\n", data.index(b"\n") + 1) + 1
    data[data.index(b'"bytes_sent":', third) + len(b'"bytes_sent":')] ^= 0x03  # one digit of a byte count
    pa.write_bytes(bytes(data))
    assert main(["audit", "verify", str(pa)]) == 1
    out = capsys.readouterr().out
    assert "first bad record at line 4 (seq 3): signature" in out
    assert "the 3 records before it verify" in out


def test_verify_json_output(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    assert main(["audit", "verify", str(pa), "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["ok"] is True and report["records"] == 10 and report["problem"] is None
    assert report["ends_with_checkpoint"] is True and report["last_checkpoint"] == 10
    assert report["sessions"][0]["outcome"] == "completed"


def test_verify_with_a_pinned_key(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    keydir = tmp_path / "keys"
    assert main(["keys", "init", "--out", str(keydir), "--trial-ca", "--nodes", "alpha,beta"]) == 0
    key_a = load_signing_key(keydir / "alpha.signing.key.pem")
    key_b = load_signing_key(keydir / "beta.signing.key.pem")
    clock = FakeClock()
    pa, pb = tmp_path / "alpha.log", tmp_path / "beta.log"
    with SessionLog(pa, key_a, "alpha", clock=clock) as a, SessionLog(pb, key_b, "beta", clock=clock) as b:
        run_session(a, b, "night-2025-03-01", "completed")
    capsys.readouterr()
    assert main(["audit", "verify", str(pa), "--key", str(keydir / "alpha.signing.pub.pem")]) == 0
    assert "(pinned key)" in capsys.readouterr().out
    assert main(["audit", "verify", str(pa), "--key", str(keydir / "beta.signing.pub.pem")]) == 1
    assert "first bad record at line 1 (seq 0): key: the log names public key" in capsys.readouterr().out
    args = [
        "--my-key",
        str(keydir / "alpha.signing.pub.pem"),
        "--their-key",
        str(keydir / "beta.signing.pub.pem"),
    ]
    assert main(["audit", "compare", str(pa), str(pb), *args]) == 0


def test_unreadable_inputs_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    pa, _ = write_pair(tmp_path, ["completed"])
    assert main(["audit", "verify", str(tmp_path / "absent.log")]) == 2
    assert "absent.log: cannot read" in capsys.readouterr().err
    (tmp_path / "junk.pem").write_text("not a key")
    assert main(["audit", "verify", str(pa), "--key", str(tmp_path / "junk.pem")]) == 2
    assert "not a PEM or base64 Ed25519 public key" in capsys.readouterr().err


def test_compare_agreeing_and_disagreeing_logs(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    pa, pb = write_pair(tmp_path, ["completed", "completed", "aborted"])
    assert main(["audit", "compare", str(pa), str(pb)]) == 0
    out = capsys.readouterr().out
    assert "3 sessions in both, 0 only in mine, 0 only in theirs" in out and "ok — both logs attest" in out
    assert main(["audit", "compare", str(pa), str(pa), "--json"]) == 1
    report = json.loads(capsys.readouterr().out)
    assert report["ok"] is False
    assert "both logs are signed by the same key; they are not two nodes' logs" in report["problems"]


def test_keys_init_for_one_node(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "keys"
    assert main(["keys", "init", "--out", str(out), "--node", "north-bank", "--json"]) == 0
    written = json.loads(capsys.readouterr().out)
    assert [Path(p).name for p in written["files"]] == [
        "north-bank.signing.key.pem",
        "north-bank.signing.pub.pem",
    ]
    key = load_signing_key(out / "north-bank.signing.key.pem")
    assert (
        written["nodes"][0]["fingerprint"] == hashlib.sha256(key.public_key().public_bytes_raw()).hexdigest()
    )
    before = (out / "north-bank.signing.key.pem").read_bytes()
    assert main(["keys", "init", "--out", str(out), "--node", "north-bank"]) == 2
    assert "refusing to overwrite" in capsys.readouterr().err
    assert (out / "north-bank.signing.key.pem").read_bytes() == before
    assert main(["keys", "init", "--out", str(out), "--node", "north-bank", "--force"]) == 0
    assert (out / "north-bank.signing.key.pem").read_bytes() != before


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["--trial-ca"], "--trial-ca needs --nodes"),
        (["--trial-ca", "--nodes", "alpha,beta", "--node", "alpha"], "takes --nodes NAME,NAME, not --node"),
        (["--nodes", "alpha,beta"], "--nodes is for --trial-ca"),
        (["--node", "North Bank"], "node name 'North Bank'"),
    ],
)
def test_keys_init_usage_errors_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], args: list[str], message: str
) -> None:
    assert main(["keys", "init", "--out", str(tmp_path / "k"), *args]) == 2
    assert message in capsys.readouterr().err
    assert not (tmp_path / "k").exists()


def test_a_log_written_with_keys_from_keys_init_verifies_end_to_end(tmp_path: Path) -> None:
    assert main(["keys", "init", "--out", str(tmp_path), "--node", "alpha"]) == 0
    key = load_signing_key(tmp_path / "alpha.signing.key.pem")
    with SessionLog(tmp_path / "alpha.log", key, "alpha", clock=FakeClock()) as log:
        log.session_started("s-1", job="shared-donors", manifest_digest=MANIFEST, role="garbler", peer="beta")
        log.session_aborted("s-1", reason="manifest_mismatch", detail="the peer compiled a different circuit")
    assert (
        main(
            ["audit", "verify", str(tmp_path / "alpha.log"), "--key", str(tmp_path / "alpha.signing.pub.pem")]
        )
        == 0
    )
