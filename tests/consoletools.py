"""Shared by the console's tests: two trial nodes with a console, logging in, and reading pages for what they
must not hold (inline code, outside resources, secrets)."""

from __future__ import annotations

import re
import shutil
from dataclasses import dataclass
from html.parser import HTMLParser
from pathlib import Path
from typing import Any

import httpx
from jointstat.node.trial import TrialKeys, free_port, job_entry, make_trial_keys, node_config, write_config

from tests.test_node_daemon import BATHS, DEMO, LIBRARY

CSRF = re.compile(r'name="csrf" value="([^"]+)"')
SMALL_JOB = "shared-members"  # the demo's keyed join, 32-row tables: a session takes well under a second
LARGE_JOB = "shared-members-large"  # the same statistic over 4,096-row tables: a session lasts a few seconds
LARGE_CAPACITY = 4096


def csrf_of(html: str) -> str:
    found = CSRF.search(html)
    assert found is not None, "the page has no CSRF field"
    return found.group(1)


async def log_in(client: httpx.AsyncClient, token: str) -> httpx.Response:
    """Open the login page (which starts a visit) and log in; the answer to the login POST."""
    page = await client.get("/login")
    return await client.post("/login", data={"token": token, "csrf": csrf_of(page.text)})


class _Scanner(HTMLParser):
    """Collects inline script, inline style, event-handler attributes and references to other origins."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.inline: list[str] = []
        self.outside: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        names = dict(attrs)
        if tag == "script" and not names.get("src"):
            self.inline.append("<script> without src")
        if tag == "style":
            self.inline.append("<style> element")
        for name, value in attrs:
            if name == "style":
                self.inline.append(f"style attribute on <{tag}>")
            if name.startswith("on"):
                self.inline.append(f"{name} attribute on <{tag}>")
            if name in ("src", "href", "action", "formaction") and value is not None:
                v = value.strip().lower()
                if v.startswith(("http:", "https:", "//", "javascript:", "data:")):
                    self.outside.append(f"{name}={value} on <{tag}>")


def inline_code(html: str) -> list[str]:
    """Inline scripts, styles and event handlers (which the console's CSP would block, so must not exist)."""
    scanner = _Scanner()
    scanner.feed(html)
    return scanner.inline


def outside_references(html: str) -> list[str]:
    """Links, scripts, images and form targets that point at another origin."""
    scanner = _Scanner()
    scanner.feed(html)
    return scanner.outside


HEX_RUN = re.compile(r"[0-9A-Fa-f]{32,}")


def unexplained_hex(text: str, allowed: set[str]) -> list[str]:
    """Runs of 32 or more hex digits (the length of a label or Δ) that are not one of the ``allowed`` public ids."""
    return [run for run in HEX_RUN.findall(text) if run.lower() not in allowed]


@dataclass
class ConsolePair:
    root: Path
    keys: TrialKeys
    configs: dict[str, Path]
    consoles: dict[str, int]  # node name -> console port
    inputs: dict[str, Path]  # node name -> its CSV (both jobs read the same file)

    def token(self, name: str) -> str:
        return (self.root / name / "console.token").read_text(encoding="ascii").strip()

    def log(self, name: str) -> Path:
        return self.root / name / "sessions.jsonl"

    def url(self, name: str) -> str:
        return f"http://127.0.0.1:{self.consoles[name]}"


def large_manifest(root: Path) -> Path:
    """The demo manifest with 4,096-row tables (an invented, larger variant of the demo job)."""
    path = root / "shared-members-large.yaml"
    text = (DEMO / "manifest.yaml").read_text(encoding="utf-8")
    text = text.replace("capacity: 32", f"capacity: {LARGE_CAPACITY}").replace(
        "name: shared-members", "name: shared-members-large"
    )
    path.write_text(text, encoding="utf-8")
    return path


def console_pair(
    root: Path,
    *,
    consoles: tuple[str, ...] = (LIBRARY,),
    large: bool = False,
    extra_jobs: dict[str, list[dict[str, Any]]] | None = None,
    node_extra: dict[str, dict[str, Any]] | None = None,
) -> ConsolePair:
    """The demo's two nodes (the library initiates and garbles) with a console on ``consoles``; the small job, and
    with ``large`` also the 4,096-row one. Each node's input is a copy of the demo CSV in ``root``."""
    keys = make_trial_keys(root / "keys", (LIBRARY, BATHS))
    inputs = {LIBRARY: root / "library.csv", BATHS: root / "baths.csv"}
    shutil.copy(DEMO / "garbler.csv", inputs[LIBRARY])
    shutil.copy(DEMO / "evaluator.csv", inputs[BATHS])
    ports = {LIBRARY: free_port(), BATHS: free_port()}
    console_ports = {name: free_port() for name in consoles}
    manifests = {SMALL_JOB: DEMO / "manifest.yaml"}
    if large:
        manifests[LARGE_JOB] = large_manifest(root)
    configs = {}
    for name, peer in ((LIBRARY, BATHS), (BATHS, LIBRARY)):
        jobs = [
            job_entry(
                name=job,
                manifest=manifest,
                peer=peer,
                csv=inputs[name],
                initiate=name == LIBRARY,
                role="garbler" if name == LIBRARY else "evaluator",
                timezone="Europe/London",
            )
            for job, manifest in manifests.items()
        ]
        jobs += (extra_jobs or {}).get(name, [])
        config = node_config(
            name=name,
            peer=peer,
            keys=keys,
            data_dir=root / name,
            listen_port=ports[name],
            peer_port=ports[peer],
            metrics_port=0,
            admin=f"127.0.0.1:{free_port()}",
            jobs=jobs,
        )
        if name in console_ports:
            config["node"]["console"] = f"127.0.0.1:{console_ports[name]}"
        config["node"].update((node_extra or {}).get(name, {}))
        configs[name] = write_config(root / f"{name}.yaml", config)
    return ConsolePair(root, keys, configs, console_ports, inputs)
