"""The console in a real browser: headless Chromium (Debian's ``chromium`` and ``chromium-driver``, driven by
Selenium with the system chromedriver — nothing is downloaded) against two trial nodes running as processes.

Specification: an operator opening the console is sent to the login page; a wrong token is refused; the right
one shows the job list; "Run now" on the large job opens the session's page, whose progress bar and figures
update without a reload until the session completes, with its phase timings filled in; the Sessions page lists
it; the Results page shows a chart of each numeric output across the runs (and a withheld run as such); the
Audit page verifies this node's log, and uploading the peer's log shows that the logs agree. No page loads
anything from elsewhere or trips the Content-Security-Policy (the browser's console stays free of errors). A
screenshot of each page is saved under the test's temporary directory (``screens/``).

The tests are skipped, saying so, only when no Chromium and chromedriver are installed (``make test`` installs
them when it can).
"""

from __future__ import annotations

import base64
import os
import shutil
import signal
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from jointstat.node.admin import AdminClient, AdminError
from jointstat.node.config import load_node_config

from tests.consoletools import LARGE_JOB, SMALL_JOB, ConsolePair, console_pair, large_manifest
from tests.test_node_daemon import BATHS, LIBRARY
from tests.test_node_process import start_node, wait_until

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMEDRIVER = shutil.which("chromedriver")
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--window-size=1360,900",
)
POLL_S = 0.5  # how often a session's page asks for its progress (console.settings.POLL_MS)
WAIT_S = 120.0  # liveness bound for start-up and sessions on a shared 2-core machine; not a speed claim

pytestmark = pytest.mark.skipif(
    CHROMIUM is None or CHROMEDRIVER is None,
    reason="no browser: the console's browser tests need Debian's chromium and chromium-driver packages "
    "(make test installs them when it runs as root with apt-get; otherwise: apt-get install chromium chromium-driver)",
)

# How many of the baths' rows take part on each night's run of the small job (invented): the number of shared
# members changes from night to night, and on the fourth night only two are left — below the manifest's minimum
# of 3 — so that night's result is withheld. MATCHES is what each night gives (the demo's CSV files, read by hand).
NIGHTS = (5, 7, 12, 3, 9)
MATCHES = (3, 4, 6, None, 5)


def keep_baths_rows(pair: ConsolePair, rows: int) -> None:
    """The baths' CSV for one night: the header and the first ``rows`` rows of the demo's file."""
    lines = (pair.root / "baths-original.csv").read_text(encoding="utf-8").splitlines()
    pair.inputs[BATHS].write_text("\n".join(lines[: rows + 1]) + "\n", encoding="utf-8")


def answering(client: AdminClient) -> bool:
    try:
        client.status()
    except AdminError:
        return False
    return True


@pytest.fixture(scope="module")
def nodes(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ConsolePair]:
    """Two node processes with a console on the library's node; the small job already run on five nights."""
    root = tmp_path_factory.mktemp("console-browser")
    pair = console_pair(root, large=True)
    shutil.copy(pair.inputs[BATHS], root / "baths-original.csv")
    procs = {name: start_node(pair.configs[name], root / f"{name}.out") for name in (BATHS, LIBRARY)}
    admin = {n: AdminClient(str(load_node_config(pair.configs[n]).node.admin)) for n in procs}
    try:
        for name in procs:
            wait_until(lambda n=name: answering(admin[n]), f"node {name} to start")
        for rows in NIGHTS:
            keep_baths_rows(pair, rows)
            sid = admin[LIBRARY].run_job(SMALL_JOB)["session"]
            wait_until(
                lambda s=sid: (
                    admin[LIBRARY].session(s)["status"] == "completed"
                    and admin[LIBRARY].session(s).get("result_path")
                ),
                "a night's run of the small job",
                poll=0.1,
            )
        keep_baths_rows(pair, 12)
        yield pair
    finally:
        codes = {}
        for name, proc in procs.items():
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
            codes[name] = proc.wait(timeout=WAIT_S)
        for client in admin.values():
            client.close()
    assert codes == {BATHS: 0, LIBRARY: 0}, [(root / f"{n}.out").read_text() for n in codes]


@pytest.fixture(scope="module")
def browser(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    from selenium import webdriver
    from selenium.webdriver.chrome.options import Options
    from selenium.webdriver.chrome.service import Service

    os.environ.setdefault("SE_OFFLINE", "true")  # Selenium Manager must not look anything up
    assert CHROMIUM is not None and CHROMEDRIVER is not None
    options = Options()
    options.binary_location = CHROMIUM
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={tmp_path_factory.mktemp('chromium-profile')}")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()


@pytest.fixture(scope="module")
def screens(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("screens")


def screenshot(driver: Any, path: Path) -> None:
    """The whole page, not only the window (Chrome DevTools' captureBeyondViewport)."""
    metrics = driver.execute_cdp_cmd("Page.getLayoutMetrics", {})
    size = metrics["cssContentSize"]
    shot = driver.execute_cdp_cmd(
        "Page.captureScreenshot",
        {
            "format": "png",
            "captureBeyondViewport": True,
            "clip": {"x": 0, "y": 0, "width": size["width"], "height": size["height"], "scale": 1},
        },
    )
    path.write_bytes(base64.b64decode(shot["data"]))


def text_of(driver: Any, css: str) -> str:
    from selenium.webdriver.common.by import By

    return str(driver.find_element(By.CSS_SELECTOR, css).text)


def wait_for(driver: Any, css: str) -> Any:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions
    from selenium.webdriver.support.ui import WebDriverWait

    return WebDriverWait(driver, WAIT_S).until(
        expected_conditions.presence_of_element_located((By.CSS_SELECTOR, css))
    )


def browser_errors(driver: Any, expected: tuple[str, ...] = ()) -> list[str]:
    """The browser console's errors (a CSP violation is one), but for those containing an ``expected`` text."""
    return [
        entry["message"]
        for entry in driver.get_log("browser")
        if entry["level"] == "SEVERE" and not any(text in entry["message"] for text in expected)
    ]


def test_an_operator_logs_in_runs_a_job_watches_it_complete_and_checks_results_and_logs(
    nodes: ConsolePair, browser: Any, screens: Path
) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions
    from selenium.webdriver.support.ui import WebDriverWait

    driver, url = browser, nodes.url(LIBRARY)

    # Any page sends a visitor without a login to the login page; a wrong token is refused.
    driver.get(f"{url}/jobs")
    assert driver.current_url == f"{url}/login"
    driver.find_element(By.ID, "token").send_keys("not-the-token-" + "x" * 40)
    driver.find_element(By.CSS_SELECTOR, "form[action='/login'] button").click()
    # A click does not wait for the page the form posts to (a loaded machine showed the old page): wait for it.
    refused = "That is not this node's console token."
    WebDriverWait(driver, WAIT_S).until(
        expected_conditions.text_to_be_present_in_element((By.CSS_SELECTOR, "main"), refused),
        message="the refused login's page did not come",
    )
    screenshot(driver, screens / "1-login-refused.png")
    driver.find_element(By.ID, "token").send_keys(nodes.token(LIBRARY))
    driver.find_element(By.CSS_SELECTOR, "form[action='/login'] button").click()
    WebDriverWait(driver, WAIT_S).until(
        lambda d: d.current_url != f"{url}/login", message="the login did not leave the login page"
    )

    # The job list.
    assert driver.current_url == f"{url}/jobs"
    rows = {r.get_attribute("data-job"): r for r in driver.find_elements(By.CSS_SELECTOR, "tr[data-job]")}
    assert set(rows) == {SMALL_JOB, LARGE_JOB}
    small = rows[SMALL_JOB].text
    assert "garbler" in small and BATHS in small and "Europe/London" in small and "completed" in small
    screenshot(driver, screens / "2-jobs.png")

    # Run the large job now and watch its progress on the session page, without a reload.
    rows[LARGE_JOB].find_element(By.CSS_SELECTOR, "button").click()
    wait_for(driver, "article[data-progress]")
    assert "/sessions/" in driver.current_url
    sid = driver.current_url.rsplit("/", 1)[1]
    driver.execute_script("window.consoleTestMark = 'same page';")
    seen: list[tuple[str, int, int]] = []
    mid_shot = False
    deadline = time.monotonic() + WAIT_S
    while time.monotonic() < deadline:
        status = text_of(driver, "[data-field='status']")
        bar = driver.find_element(By.CSS_SELECTOR, "progress[data-field='bar']")
        value, maximum = int(float(bar.get_attribute("value"))), int(float(bar.get_attribute("max")))
        seen.append((status, value, maximum))
        if status == "running" and 0 < value < maximum and not mid_shot:
            screenshot(driver, screens / "3-session-running.png")
            mid_shot = True
        if status in ("completed", "aborted", "refused", "failed"):
            break
        time.sleep(0.1)
    assert seen and seen[0][0] != "completed", seen[:3]
    with AdminClient(str(load_node_config(nodes.configs[LIBRARY]).node.admin)) as admin:
        phases_us = {p["phase"]: p["duration_us"] for p in admin.session(sid)["phases"]}
    if phases_us["garbling"] >= 3 * POLL_S * 1e6:  # the page asked at least twice while the tables flowed
        assert any(s == "running" and 0 < v < m for s, v, m in seen), (
            f"no progress between start and end: {seen}"
        )
    done_values = [v for s, v, _ in seen if s == "running"]
    assert done_values == sorted(done_values)  # the bar only moves forwards
    assert seen[-1][0] == "completed" and seen[-1][1] == seen[-1][2] > 1, seen[-1]
    assert driver.execute_script("return window.consoleTestMark;") == "same page"
    phases = [r.text for r in driver.find_elements(By.CSS_SELECTOR, "tbody[data-rows='phases'] tr")]
    assert {"prepare", "garbling", "finish"} <= {p.split()[0] for p in phases}, phases
    wait_for(driver, "[data-field='result-link']:not([hidden])")
    total = text_of(driver, "[data-field='total']")
    assert (
        text_of(driver, "[data-field='done']") == total
        and text_of(driver, "[data-field='percent']") == "100%"
    )
    screenshot(driver, screens / "4-session-completed.png")

    # The session list: a run started elsewhere (here: the command line's admin API) appears among the running
    # sessions and ends there, without a reload.
    driver.find_element(By.LINK_TEXT, "Sessions").click()
    assert sid[:12] in text_of(driver, "main")
    assert driver.find_element(By.CSS_SELECTOR, "[data-empty='running']").is_displayed()
    driver.execute_script("window.consoleTestMark = 'sessions page';")
    with AdminClient(str(load_node_config(nodes.configs[LIBRARY]).node.admin)) as admin:
        other = admin.run_job(LARGE_JOB)["session"]
    row = wait_for(driver, f"tbody[data-rows='running'] tr[data-session='{other}']")
    assert row.find_element(By.CSS_SELECTOR, "a").get_attribute("href").endswith(f"/sessions/{other}")
    assert LARGE_JOB in row.text
    deadline = time.monotonic() + WAIT_S
    while row.find_element(By.CSS_SELECTOR, "[data-field='status']").text != "completed":
        assert time.monotonic() < deadline, row.text
        time.sleep(0.1)
    assert row.find_element(By.CSS_SELECTOR, "[data-field='percent']").text == "100%"
    assert driver.execute_script("return window.consoleTestMark;") == "sessions page"
    screenshot(driver, screens / "5-sessions.png")

    # Results: a chart of each numeric output of the small job over the five nights, the withheld night marked.
    driver.find_element(By.LINK_TEXT, "Results").click()
    section = driver.find_element(By.ID, f"job-{SMALL_JOB}")
    charts = section.find_elements(By.CSS_SELECTOR, "figure.chart-box")
    assert [c.find_element(By.TAG_NAME, "figcaption").text for c in charts] == ["matches"]
    svg = charts[0].find_element(By.TAG_NAME, "svg")
    dots = svg.find_elements(By.CSS_SELECTOR, "circle.dot")
    values = [
        int(d.find_element(By.TAG_NAME, "title").get_attribute("textContent").rsplit(": ", 1)[1])
        for d in dots
    ]
    assert values == [m for m in MATCHES if m is not None]
    heights = [float(d.get_attribute("cy")) for d in dots]
    assert heights.index(min(heights)) == values.index(max(values))  # the largest value is drawn highest
    assert len(svg.find_elements(By.CSS_SELECTOR, "rect.withheld")) == 1
    table = [
        r.find_elements(By.CSS_SELECTOR, "td")[-1].text
        for r in section.find_elements(By.CSS_SELECTOR, "tbody tr")
    ]
    assert table == ["5", "withheld the disclosure rule kept these results back", "6", "4", "3"]
    large = driver.find_element(By.ID, f"job-{LARGE_JOB}")
    assert sid[:12] in large.text
    screenshot(driver, screens / "6-results.png")

    # Audit: this node's log verifies; the peer's log, uploaded, agrees with it.
    driver.find_element(By.LINK_TEXT, "Audit").click()
    assert "The log verifies." in text_of(driver, "[data-verdict='own-ok']")
    driver.find_element(By.ID, "log").send_keys(str(nodes.log(BATHS)))
    driver.find_element(By.CSS_SELECTOR, "form.upload button").click()
    verdict = wait_for(driver, "[data-verdict]:not([data-verdict='own-ok'])")
    assert verdict.get_attribute("data-verdict") == "logs-agree", verdict.text
    assert "The logs agree." in verdict.text
    screenshot(driver, screens / "7-audit-logs-agree.png")

    # The refused login's 403 is the only error the browser noted.
    assert (
        browser_errors(
            driver, expected=("/login - Failed to load resource: the server responded with a status of 403",)
        )
        == []
    )


def test_the_browser_sees_no_console_page_without_the_login(nodes: ConsolePair, browser: Any) -> None:
    from selenium.webdriver.common.by import By

    browser.delete_all_cookies()
    for path in ("/jobs", "/sessions", "/results", "/audit", f"/sessions/{'0' * 32}"):
        browser.get(nodes.url(LIBRARY) + path)
        assert browser.current_url == nodes.url(LIBRARY) + "/login"
        assert browser.find_elements(By.CSS_SELECTOR, "nav") == []


def test_the_large_manifest_is_the_demo_statistic_with_larger_tables(tmp_path: Path) -> None:
    from jointstat.circuit.manifest import load_manifest
    from jointstat.circuit.model import Party

    from tests.test_node_daemon import DEMO

    large, demo = load_manifest(large_manifest(tmp_path)), load_manifest(DEMO / "manifest.yaml")
    assert large.table(Party.GARBLER).capacity == large.table(Party.EVALUATOR).capacity == 4096
    assert large.statistic == demo.statistic and large.outputs == demo.outputs
