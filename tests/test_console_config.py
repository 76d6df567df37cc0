"""The console's settings in the node config, and its login token file.

Specification: the console is off unless ``node.console`` is set; it listens on loopback only, unless
``node.console_behind_proxy`` is true (the operator's own TLS proxy serves it); every refusal names the field.
Its address may not be one of the node's other addresses. The login token file is made at the console's first
start in the data directory, owner-only, and read back unchanged later; a configured token file must exist, be
owner-only and hold one line of at least 32 printable characters, and the problems name the field, never the
token.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path
from typing import Any

import pytest
import yaml
from jointstat.node.config import ConfigError, HostPort, load_node_config, parse_node_config
from jointstat.node.console.auth import load_login_token

from tests.test_node_config import base_config, node_dir, problems_of, write_config

__all__ = ["node_dir"]  # the fixture, imported for the tests below


def with_node(**node: Any) -> dict[str, Any]:
    data = base_config()
    data["node"].update(node)
    return data


def test_the_console_is_off_unless_its_address_is_set() -> None:
    config = parse_node_config(yaml.safe_dump(base_config()), "node.yaml")
    assert config.node.console is None and "console" not in config.node.addresses()


@pytest.mark.parametrize("address", ["127.0.0.1:7304", "127.9.9.9:0", "[::1]:7304", "localhost:7304"])
def test_the_console_listens_on_a_loopback_address(address: str) -> None:
    config = parse_node_config(yaml.safe_dump(with_node(console=address)), "node.yaml", Path("/srv/node"))
    assert config.node.console is not None and config.node.console.is_loopback
    assert config.node.addresses()["console"] == config.node.console
    assert config.node.console_token_path() == Path("/srv/node/data/console.token")


@pytest.mark.parametrize(
    "address", ["0.0.0.0:7304", "192.0.2.10:7304", "[::]:7304", "console.example.org:443"]
)
def test_another_address_is_refused_naming_the_field_unless_behind_the_operators_proxy(address: str) -> None:
    (problem,) = problems_of(with_node(console=address))
    assert problem.startswith("node.console: ") and "is not a loopback address" in problem
    assert "node.console_behind_proxy" in problem
    config = parse_node_config(
        yaml.safe_dump(with_node(console=address, console_behind_proxy=True)), "node.yaml"
    )
    assert config.node.console == HostPort(
        address.rsplit(":", 1)[0].strip("[]"), int(address.rsplit(":", 1)[1])
    )


def test_behind_proxy_on_a_loopback_address_is_refused_as_a_mistake() -> None:
    (problem,) = problems_of(with_node(console="127.0.0.1:7304", console_behind_proxy=True))
    assert problem.startswith("node.console_behind_proxy: the console address is loopback")


def test_console_settings_without_a_console_are_refused() -> None:
    problems = problems_of(with_node(console_behind_proxy=True, console_token_file="token"))
    assert problems == [
        "node.console_behind_proxy: applies only to the console; set node.console",
        "node.console_token_file: applies only to the console; set node.console",
    ]


@pytest.mark.parametrize("value", ["yes", 1, "true"])
def test_behind_proxy_must_be_a_boolean(value: object) -> None:
    (problem,) = problems_of(with_node(console="0.0.0.0:7304", console_behind_proxy=value))
    assert problem.startswith("node.console_behind_proxy: ")


@pytest.mark.parametrize("other", ["listen", "admin", "metrics"])
def test_the_console_may_not_share_an_address_with_the_nodes_other_listeners(other: str) -> None:
    data = with_node(console="127.0.0.1:7300")
    data["node"][other] = "127.0.0.1:7300"
    problems = problems_of(data)
    assert any(p.startswith("node.") and "same address as node." in p and "console" in p for p in problems)


def test_a_configured_token_file_must_exist_be_owner_only_and_hold_a_long_enough_token(
    node_dir: Path,
) -> None:
    data = with_node(console="127.0.0.1:7304", console_token_file="console-token.txt")
    config = load_node_config(write_config(node_dir, data))
    token = node_dir / "console-token.txt"
    assert [str(p) for p in config.secret_problems()] == [
        f"node.console_token_file: console login token {token}: no such file"
    ]
    token.write_text("S3cret-but-short\n", encoding="ascii")
    token.chmod(0o640)
    (problem,) = [str(p) for p in config.secret_problems()]
    assert problem.startswith("node.console_token_file: ") and "mode 0640" in problem
    token.chmod(0o600)
    (problem,) = [str(p) for p in config.secret_problems()]
    assert problem == f"node.console_token_file: {token}: the login token must be at least 32 characters long"
    assert "S3cret" not in problem
    token.write_text("two words are not a token at all, sorry\n", encoding="ascii")
    (problem,) = [str(p) for p in config.secret_problems()]
    assert "one line of printable ASCII without spaces" in problem and "words" not in problem
    token.write_text("k" * 40 + "\n", encoding="ascii")
    assert config.secret_problems() == []
    assert load_login_token(token, create=False) == "k" * 40


def test_the_default_token_file_is_not_required_before_the_first_start(node_dir: Path) -> None:
    config = load_node_config(write_config(node_dir, with_node(console="127.0.0.1:7304")))
    assert config.secret_problems() == []


def test_the_token_is_made_owner_only_at_first_start_and_read_back_unchanged(tmp_path: Path) -> None:
    old = os.umask(0)
    try:
        path = tmp_path / "console.token"
        token = load_login_token(path, create=True)
    finally:
        os.umask(old)
    assert stat.S_IMODE(path.stat().st_mode) == 0o600
    assert len(token) == 43 and path.read_text(encoding="ascii") == token + "\n"  # 32 random bytes, base64url
    assert load_login_token(path, create=True) == token
    assert load_login_token(tmp_path / "again.token", create=True) != token


def test_a_token_file_others_can_read_is_refused_at_start_naming_the_field(tmp_path: Path) -> None:
    path = tmp_path / "console.token"
    load_login_token(path, create=True)
    path.chmod(0o644)
    with pytest.raises(ConfigError) as caught:
        load_login_token(path, create=True)
    assert "node.console: console login token" in str(caught.value) and "mode 0644" in str(caught.value)
    with pytest.raises(ConfigError, match=r"node\.console_token_file: console login token .*: no such file"):
        load_login_token(tmp_path / "missing", create=False)
