"""The page in a real headless Chromium (Debian's chromium and chromium-driver, driven by selenium).

Each test starts its own mosquitto and page process, publishes retained states, statuses and
alerts as an agent would, and reads what the browser shows. Screenshots are kept as artefacts:
in the folder named by WATCHDOG_TEST_ARTEFACTS, else in the test's temporary folder (the path
is printed). These tests never skip: without Chromium they fail and say how to install it.
"""

from __future__ import annotations

import math
import os
import shutil
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from broker import Broker
from pageproc import PageProc, alert_payload, publish, state_payload, status_payload

INSTALL_HINT = "apt-get update && apt-get install -y chromium chromium-driver"
# Flags for a sandboxed CI machine without a display or network; a fresh profile per test.
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--disable-dev-shm-usage",
]


def artefact_dir(tmp_path: Path) -> Path:
    folder = Path(os.environ.get("WATCHDOG_TEST_ARTEFACTS") or tmp_path / "artefacts")
    folder.mkdir(parents=True, exist_ok=True)
    return folder


@pytest.fixture
def browser(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Iterator[Any]:
    """A headless Chromium through Debian's chromedriver; fails (never skips) when either is missing."""
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    driver_path = shutil.which("chromedriver") or (
        "/usr/bin/chromedriver" if os.path.exists("/usr/bin/chromedriver") else None
    )
    if not chromium or not driver_path:
        pytest.fail(f"this test needs a real headless Chromium and its driver; install them: {INSTALL_HINT}")
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        pytest.fail("selenium is missing: python3 -m pip install -e '.[test]'")
    # the driver and browser are given by path: selenium must not look for (or download) others
    monkeypatch.setenv("SE_OFFLINE", "true")
    opts = webdriver.ChromeOptions()
    opts.binary_location = chromium
    for flag in CHROMIUM_FLAGS:
        opts.add_argument(flag)
    opts.add_argument(f"--user-data-dir={tmp_path / 'chromium-profile'}")
    opts.add_argument("--window-size=1280,900")
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(options=opts, service=Service(executable_path=driver_path))
    driver.set_page_load_timeout(20)
    try:
        yield driver
    finally:
        driver.quit()


def screenshot(driver: Any, path: Path) -> Path:
    """The whole page (the window is made as tall as the document) as a PNG."""
    height = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(1280, min(int(height) + 40, 8000))
    time.sleep(0.2)
    driver.save_screenshot(str(path))
    print(f"screenshot kept at {path}")
    return path


def severe_console_messages(driver: Any) -> list[str]:
    return [e["message"] for e in driver.get_log("browser") if e.get("level") == "SEVERE"]


@pytest.mark.slow
def test_the_page_draws_the_published_points_and_shows_a_new_alert_within_two_seconds(
    tmp_path: Path, broker: Broker, browser: Any
) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    page = PageProc(tmp_path, broker).wait_ready()
    try:
        now = time.time()
        lives = [0.92, 1.04, 1.18, 1.11, 1.37]
        times = [now - 600 * (len(lives) - 1 - i) for i in range(len(lives))]
        publish(
            broker,
            [("watchdog/agents/edge-1/status", status_payload("edge-1"), True)]
            + [("watchdog/pump/state", state_payload("pump", t, v), True) for t, v in zip(times, lives)],
        )
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            browser.get(page.url)
            dots = browser.find_elements(By.CSS_SELECTOR, 'svg.plot[data-model="pump"] circle.pt')
            if len(dots) == len(lives):
                break
            time.sleep(0.2)
        # the plot shows exactly the points published, at their times and values
        dots = browser.find_elements(By.CSS_SELECTOR, 'svg.plot[data-model="pump"] circle.pt')
        assert len(dots) == len(lives)
        assert [float(d.get_attribute("data-live")) for d in dots] == lives
        got_times = [float(d.get_attribute("data-t")) for d in dots]
        assert all(math.isclose(a, b, abs_tol=0.001) for a, b in zip(got_times, times))
        # a later point lies to the right, a larger loss higher up (SVG y grows downwards)
        cx = [float(d.get_attribute("cx")) for d in dots]
        cy = [float(d.get_attribute("cy")) for d in dots]
        assert cx == sorted(cx) and cy[4] < cy[2] < cy[1] < cy[0]
        assert browser.find_element(By.CSS_SELECTOR, 'tr[data-agent="edge-1"]').get_attribute("data-connection") == (
            "online"
        )
        assert "Advisory only" in browser.find_element(By.CSS_SELECTOR, "p.caution").text
        # the packaged stylesheet applied (the caution has its left rule) and nothing came from elsewhere
        style = browser.execute_script("return getComputedStyle(document.querySelector('p.caution')).borderLeftStyle")
        assert style == "solid"
        origins = browser.execute_script(
            "return performance.getEntriesByType('resource').map(e => new URL(e.name).origin)"
        )
        assert set(origins) <= {page.url.rstrip("/")} and origins
        time.sleep(1.2)  # the script has polled at least once
        assert browser.find_element(By.ID, "updated").text.startswith(("checked", "updated"))

        # an alert raised now appears on the open page, without a reload, within 2 s
        publish(broker, [("watchdog/pump/alerts", alert_payload("pump", time.time(), "alert-in-test"), False)])
        sent = time.monotonic()
        WebDriverWait(browser, 2.0, poll_frequency=0.05).until(
            lambda d: d.find_elements(By.CSS_SELECTOR, 'tr.alert[data-alert-id="alert-in-test"]')
        )
        seen_after = time.monotonic() - sent
        print(f"the alert appeared on the page {seen_after:.2f} s after its PUBACK")
        row = browser.find_element(By.CSS_SELECTOR, 'tr.alert[data-alert-id="alert-in-test"]')
        assert "above the warning limit" in row.text and "raised" in row.text
        assert browser.find_elements(By.CSS_SELECTOR, 'svg.plot g.alert-mark[data-alert-id="alert-in-test"]')
        assert severe_console_messages(browser) == []  # no script error, no policy violation
        screenshot(browser, artefact_dir(tmp_path) / "page-alert.png")
    finally:
        assert page.stop() == 0, page.text()


def demo_messages(now: float) -> tuple[list[tuple[str, Any, bool]], dict[str, int]]:
    """Six hours of invented traffic for three models, two agents, alerts and a planned-work window."""
    msgs: list[tuple[str, Any, bool]] = []
    counts = {}
    raised: dict[str, tuple[float, float, float]] = {}
    start = now - 6 * 3600 + 60
    steps = range(0, 6 * 60, 2)  # one state every two minutes
    cleaning = {
        "name": "probe cleaning",
        "source": "command",
        "start": start + 150 * 60,
        "end": start + 195 * 60,
        "reason": "probe cleaning, weekly",
    }
    for model, agent in (("chiller-3", "edge-cold"), ("pump-7", "edge-pumps"), ("greenhouse-2", "edge-cold")):
        n = 0
        for k in steps:
            t = start + k * 60
            x = k / 360
            if model == "chiller-3":
                live = 0.95 + 0.08 * math.sin(k / 17) + (0.0 if x < 0.55 else 4.0 * (x - 0.55) ** 1.2)
                expected = 1.0
            elif model == "pump-7":
                live = 0.42 + 0.05 * math.sin(k / 11) + (0.35 if 160 <= k < 190 else 0.0)
                expected = 0.45
            else:
                live = 2.3 + 0.25 * math.sin(k / 29)
                expected = 2.5
            level = "normal"
            lower = live * 0.88
            if model == "chiller-3" and lower > 1.25 * expected:
                level = "critical" if lower > 2 * expected else "warning"
                if level not in raised:  # the first evaluation at this level raises an alert
                    raised[level] = (t, live, lower)
            planned = {**cleaning, "start": _iso(cleaning["start"]), "end": _iso(cleaning["end"])}
            in_window = model == "pump-7" and cleaning["start"] <= t <= cleaning["end"]
            msgs.append(
                (
                    f"watchdog/{model}/state",
                    state_payload(model, t, live, level, agent, planned if in_window else None, expected, 0.12),
                    True,
                )
            )
            n += 1
        counts[model] = n
    for severity, limit in (("warning", 1.25), ("critical", 2.0)):
        t, live, lower = raised[severity]
        a = alert_payload("chiller-3", t, f"c3-{severity}", severity, "raised", round(live, 3), round(lower, 3), limit)
        msgs.append(("watchdog/chiller-3/alerts", a, False))
    msgs.append(("watchdog/agents/edge-cold/status", status_payload("edge-cold"), True))
    msgs.append(("watchdog/agents/edge-pumps/status", status_payload("edge-pumps", "offline", now - 700), True))
    return msgs, counts


def _iso(t: float) -> str:
    from watchdog_edge.core.events import rfc3339

    return rfc3339(t)


def test_a_page_of_invented_demo_data_reads_well(tmp_path: Path, broker: Broker, browser: Any) -> None:
    from selenium.webdriver.common.by import By

    page = PageProc(tmp_path, broker).wait_ready()
    try:
        now = time.time()
        msgs, counts = demo_messages(now)
        publish(broker, msgs)
        expected_models = set(counts)
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline:
            browser.get(page.url + "?span=6h")
            drawn = {
                e.get_attribute("data-model"): int(e.get_attribute("data-points"))
                for e in browser.find_elements(By.CSS_SELECTOR, "svg.plot")
            }
            if drawn == counts and len(browser.find_elements(By.CSS_SELECTOR, "tr.alert")) == 2:
                break
            time.sleep(0.3)
        assert drawn == counts and set(drawn) == expected_models
        # the worst model comes first, and its level reads as a word
        first = browser.find_element(By.CSS_SELECTOR, "section.model")
        assert first.get_attribute("data-model") == "chiller-3"
        assert "critical" in first.find_element(By.CSS_SELECTOR, "h2 .overall").text
        assert len(first.find_elements(By.CSS_SELECTOR, "g.alert-mark")) == 2
        pump = browser.find_element(By.CSS_SELECTOR, 'section.model[data-model="pump-7"]')
        assert len(pump.find_elements(By.CSS_SELECTOR, "rect.planned")) == 1
        offline = browser.find_element(By.CSS_SELECTOR, 'tr[data-agent="edge-pumps"]')
        assert offline.get_attribute("data-connection") == "offline"
        assert severe_console_messages(browser) == []
        screenshot(browser, artefact_dir(tmp_path) / "page-demo.png")
    finally:
        assert page.stop() == 0, page.text()
