"""The page process over real HTTP and a real mosquitto: what it reads, how it binds, that it only reads.

The browser side (Chromium drawing the page) is in test_page_browser.py.
"""

from __future__ import annotations

import base64
import http.client as httpclient
import json
import re
import ssl
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from broker import Broker, make_tls
from pageproc import PageProc, alert_payload, http, publish, state_payload, status_payload
from test_agent import AgentProc, Client, send_pairs, write_setup

from watchdog_edge.core.settings import TopicTemplates
from watchdog_edge.readers.history import History
from watchdog_edge.readers.page import Gate, Intake, TopicShape, check_bind, is_loopback
from watchdog_edge.readers.render import CAUTION, esc


def listening_addresses(port: int) -> set[str]:
    """Local addresses with a listening TCP socket on ``port``, from the kernel's own table (/proc/net/tcp)."""
    found = set()
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        try:
            lines = Path(table).read_text().splitlines()[1:]
        except FileNotFoundError:
            continue
        for line in lines:
            local, state = line.split()[1], line.split()[3]
            addr, p = local.split(":")
            if int(p, 16) == port and state == "0A":  # 0A: LISTEN
                found.add(addr)
    return found


# --- pieces ----------------------------------------------------------------------------------
def test_basic_credentials_as_rfc7617_writes_them_and_bearer_tokens() -> None:
    # RFC 7617, section 2: user "Aladdin", password "open sesame" -> "QWxhZGRpbjpvcGVuIHNlc2FtZQ==".
    gate = Gate("open sesame", user="Aladdin")
    assert gate.allows("Basic QWxhZGRpbjpvcGVuIHNlc2FtZQ==")
    assert gate.allows("basic QWxhZGRpbjpvcGVuIHNlc2FtZQ==")  # the scheme is case-insensitive (RFC 7235, 2.1)
    assert not gate.allows("Basic " + base64.b64encode(b"Aladdin:open sesamE").decode())
    assert not gate.allows("Basic " + base64.b64encode(b"someone:open sesame").decode())
    assert not gate.allows("Basic not-base64!")
    assert gate.allows("Bearer open sesame") and not gate.allows("Bearer open")
    assert not gate.allows(None) and not gate.allows("") and not gate.allows("Digest x")


def test_binding_rules() -> None:
    assert is_loopback("127.0.0.1") and is_loopback("127.3.2.1") and is_loopback("::1") and is_loopback("localhost")
    assert not is_loopback("0.0.0.0") and not is_loopback("192.168.1.20") and not is_loopback("gateway.local")
    check_bind("127.0.0.1", False, None)
    with pytest.raises(Exception, match="add --allow-remote"):
        check_bind("0.0.0.0", False, "secret")
    with pytest.raises(Exception, match="needs a password"):
        check_bind("0.0.0.0", True, None)
    check_bind("0.0.0.0", True, "secret")


@pytest.mark.parametrize(
    "template, topic, fields",
    [
        ("watchdog/{model}/state", "watchdog/pump-7/state", {"model": "pump-7"}),
        ("watchdog/agents/{agent}/status", "watchdog/agents/edge-1/status", {"agent": "edge-1"}),
        ("site/{agent}/{model}/alerts", "site/gw/m1/alerts", {"agent": "gw", "model": "m1"}),
        ("watchdog/{model}/state", "watchdog/a/b/state", None),
        ("watchdog/{model}/state", "watchdog/m/alerts", None),
    ],
)
def test_topic_templates_become_filters_and_matchers(template: str, topic: str, fields: dict | None) -> None:
    shape = TopicShape(template)
    assert shape.match(topic) == fields
    assert "{" not in shape.filter and shape.filter.count("+") == template.count("{")


def test_intake_keeps_good_messages_and_counts_the_rest(tmp_path: Path) -> None:
    h = History(tmp_path / "h.sqlite")
    intake = Intake(h, TopicTemplates())
    now = time.time()
    assert intake.message("watchdog/m1/state", json.dumps(state_payload("m1", now, 1.0)).encode(), now) == "state"
    assert intake.message("watchdog/m1/alerts", json.dumps(alert_payload("m1", now, "a1")).encode(), now) == "alert"
    assert intake.message("watchdog/agents/e/status", json.dumps(status_payload("e")).encode(), now) == "status"
    assert intake.message("watchdog/m1/state", b"{not json", now) == "bad"
    assert intake.message("watchdog/m1/state", b"[1, 2]", now) == "bad"
    assert intake.message("watchdog/m1/alerts", b'{"model": "m1"}', now) == "bad"  # no alert_id
    assert intake.message("watchdog/agents/e/status", b"", now) == "cleared"
    assert intake.message("elsewhere/x", b"{}", now) == "other"
    assert intake.message("watchdog/m2/state", b" " * 1_000_001, now) == "bad"
    assert intake.bad == {"not_json": 1, "not_object": 1, "no_alert_id": 1, "oversize": 1}
    with h.reader() as r:
        assert list(r.latest_states()) == ["m1"] and len(r.alerts()) == 1 and r.agents() == {}
    h.close()


# --- the process -----------------------------------------------------------------------------
def test_page_binds_loopback_by_default_and_only_reads(tmp_path: Path, broker: Broker) -> None:
    page = PageProc(tmp_path, broker).wait_ready()
    try:
        now = time.time()
        publish(
            broker,
            [
                ("watchdog/agents/edge-1/status", status_payload("edge-1"), True),
                ("watchdog/pump/state", state_payload("pump", now - 60, 1.1), True),
                ("watchdog/pump/state", state_payload("pump", now, 1.3, "warning"), True),
                ("watchdog/pump/alerts", alert_payload("pump", now, "id-1"), False),
            ],
        )
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline:
            summary = json.loads(http(page.url + "api/summary")[2])
            if summary["alerts"] and summary["models"] and summary["agents"]:
                break
            time.sleep(0.05)
        assert summary["models"]["pump"]["levels"]["gap"] == "warning"
        assert summary["agents"] == {
            "edge-1": {"connection": "online", "heartbeat": summary["agents"]["edge-1"]["heartbeat"]}
        }
        assert summary["alerts"][0]["alert_id"] == "id-1"
        # bound to loopback only: the kernel's table shows 127.0.0.1 (0100007F) and nothing else
        assert listening_addresses(page.port) == {"0100007F"}
        assert "loopback only" in page.text()
        status, headers, body = http(page.url)
        assert status == 200
        html = body.decode()
        assert esc(CAUTION) in html
        assert 'data-points="2"' in html and 'data-alert-id="id-1"' in html
        assert f"Reading the broker at 127.0.0.1:{broker.port}." in html
        # nothing that writes: no form, every method but GET and HEAD refused, forms forbidden by policy
        assert "<form" not in html.lower() and "method=" not in html.lower()
        assert "form-action 'none'" in headers["Content-Security-Policy"]
        for method in ("POST", "PUT", "DELETE", "PATCH"):
            code, h, _ = http(page.url, method)
            assert code == 405 and h["Allow"] == "GET, HEAD", method
        assert http(page.url + "api/summary", "HEAD")[0] == 200
        # a refused request's body (unread) is never taken for a next request on the same connection
        conn = httpclient.HTTPConnection("127.0.0.1", page.port, timeout=10)
        conn.request("POST", "/", body=b"GET /api/summary HTTP/1.1\r\nHost: x\r\n\r\n")
        reply = conn.getresponse()
        assert reply.status == 405 and reply.getheader("Connection") == "close"
        reply.read()
        conn.close()
        # nothing from the internet: every resource is the page's own
        for path in ("", "static/page.js", "static/page.css", "static/icon.svg"):
            text = http(page.url + path)[2].decode()
            assert not re.search(r"(https?:)?//[a-z0-9]", text.replace("http://www.w3.org/2000/svg", "")), path
        assert http(page.url + "nothing-here")[0] == 404
    finally:
        assert page.stop() == 0, page.text()
    assert "page stopped" in page.text()


def test_a_bind_other_than_loopback_needs_the_flag_and_a_secret(tmp_path: Path, broker: Broker) -> None:
    for extra, said in (
        (["--bind", "0.0.0.0"], "add --allow-remote"),
        (["--bind", "0.0.0.0", "--allow-remote"], "needs a password or token"),
        (["--bind", "0.0.0.0", "--allow-remote", "--secret-env", "WD_PAGE_SECRET_UNSET"], "not set"),
    ):
        page = PageProc(tmp_path / "refused", broker, *extra)
        assert page.wait_exit() == 2
        assert said in page.text(), page.text()
        assert listening_addresses(page.port) == set()


def test_a_remote_bind_with_a_secret_says_so_and_asks_every_request_for_it(tmp_path: Path, broker: Broker) -> None:
    secret = "correct horse battery"
    page = PageProc(
        tmp_path,
        broker,
        "--bind",
        "0.0.0.0",
        "--allow-remote",
        "--secret-env",
        "WD_PAGE_SECRET",
        "--user",
        "ops",
        env={"WD_PAGE_SECRET": secret},
    ).wait_ready()
    try:
        log = page.text()
        assert "reachable from other machines" in log and "clear text" in log
        assert secret not in log
        assert listening_addresses(page.port) == {"00000000"}  # every IPv4 address
        # the test only ever connects to loopback
        for path in ("", "api/summary", "api/version", "fragment", "static/page.js"):
            code, headers, _ = http(page.url + path)
            assert code == 401 and headers["WWW-Authenticate"].startswith("Basic realm="), path
        assert http(page.url, auth=("ops", "wrong"))[0] == 401
        assert http(page.url, auth=("someone", secret))[0] == 401
        assert http(page.url, bearer="wrong")[0] == 401
        assert http(page.url, auth=("ops", secret))[0] == 200
        assert http(page.url + "api/summary", bearer=secret)[0] == 200
        assert http(page.url, "POST", auth=("ops", secret))[0] == 405  # still only reads
    finally:
        assert page.stop() == 0


def test_the_page_can_be_served_over_tls(tmp_path: Path, broker: Broker) -> None:
    tls = make_tls(tmp_path / "tls", "page", server_host="localhost")
    secret_file = tmp_path / "secret"
    secret_file.write_text("s3\n")
    page = PageProc(
        tmp_path,
        broker,
        "--tls-cert",
        str(tls.server_cert),
        "--tls-key",
        str(tls.server_key),
        "--secret-file",
        str(secret_file),
    ).wait_ready()
    try:
        ctx = ssl.create_default_context(cafile=str(tls.ca))
        url = page.url.replace("http://", "https://")
        assert http(url, bearer="s3", context=ctx)[0] == 200
        assert http(url, context=ctx)[0] == 401
        with pytest.raises(Exception):  # noqa: B017 (plain HTTP on the TLS port fails, whatever the error's type)
            http(page.url)
        assert f"page at {url}" in page.text()
    finally:
        assert page.stop() == 0


def test_the_page_serves_its_history_while_the_broker_is_away(tmp_path: Path) -> None:
    broker = Broker(tmp_path / "broker")
    page = PageProc(tmp_path, broker).wait_ready()
    try:
        publish(broker, [("watchdog/pump/state", state_payload("pump", time.time(), 1.0), True)])
        deadline = time.monotonic() + 10
        while "pump" not in json.loads(http(page.url + "api/summary")[2])["models"] and time.monotonic() < deadline:
            time.sleep(0.05)
        broker.stop()
        deadline = time.monotonic() + 10
        while json.loads(http(page.url + "api/summary")[2])["connected"] and time.monotonic() < deadline:
            time.sleep(0.05)
        status, _, body = http(page.url)
        assert status == 200
        assert "Not connected to the broker" in body.decode() and 'data-model="pump"' in body.decode()
        broker.start()  # and it comes back by itself
        deadline = time.monotonic() + 20
        while not json.loads(http(page.url + "api/summary")[2])["connected"] and time.monotonic() < deadline:
            time.sleep(0.1)
        assert json.loads(http(page.url + "api/summary")[2])["connected"], page.text()
    finally:
        assert page.stop() == 0
        broker.stop()


def test_the_page_reads_what_a_real_agent_publishes(tmp_path: Path, broker: Broker) -> None:
    cfg = write_setup(tmp_path, broker)
    page = PageProc(tmp_path / "page", None, "--config", str(cfg)).wait_ready()
    agent = AgentProc(cfg)
    try:
        agent.wait_ready()
        pub = Client(broker, "publisher")
        # errors with standard deviation 3 against an expected squared loss of 1: gap goes critical
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))
        pub.close()
        deadline = time.monotonic() + 20
        summary: dict = {}
        while time.monotonic() < deadline:
            summary = json.loads(http(page.url + "api/summary")[2])
            if summary["alerts"] and summary["models"].get("pump", {}).get("levels", {}).get("gap") == "critical":
                break
            time.sleep(0.1)
        assert summary["models"]["pump"]["levels"]["gap"] == "critical", (summary, page.text())
        assert summary["models"]["pump"]["expected_loss"] == 1.0
        # gap's CUSUM may raise a warning some pairs before the interval proves the critical level
        assert ("pump", "gap", "raised", "critical") in [
            (a["model"], a["check"], a["state"], a["severity"]) for a in summary["alerts"]
        ]
        assert summary["agents"]["edge-1"]["connection"] == "online"
        html = http(page.url)[2].decode()
        drawn = re.search(r'<svg class="plot"[^>]*data-model="pump"[^>]*data-points="(\d+)"', html)
        assert drawn and int(drawn.group(1)) >= 1
        assert 'class="pt"' in html and 'class="alert-mark sev-critical raised"' in html
    finally:
        assert agent.stop() == 0
    deadline = time.monotonic() + 10
    while json.loads(http(page.url + "api/summary")[2])["agents"]["edge-1"]["connection"] != "offline":
        assert time.monotonic() < deadline, "the page never showed the agent offline"
        time.sleep(0.1)
    assert 'data-connection="offline"' in http(page.url)[2].decode()
    assert page.stop() == 0


def test_page_help_carries_the_caution() -> None:
    out = subprocess.run(
        [sys.executable, "-m", "watchdog_edge.cli.app", "page", "--help"], capture_output=True, text=True, check=True
    ).stdout
    assert "Advisory only" in out and "127.0.0.1" in out and "--allow-remote" in out


def test_text_from_the_broker_is_escaped_on_the_page(tmp_path: Path) -> None:
    from watchdog_edge.readers.render import full_page

    h = History(tmp_path / "h.sqlite")
    intake = Intake(h, TopicTemplates())
    now = time.time()
    hostile = '<img src=x onerror="alert(1)">'
    st = state_payload("m", now, 1.0, level='"><script>alert(2)</script>')
    st["model"] = hostile
    st["model_version"] = "<b>v</b>"
    intake.message("watchdog/m/state", json.dumps(st).encode(), now)
    a = alert_payload("m", now, 'x" onmouseover="alert(3)')
    a["summary"] = "<script>alert(4)</script>"
    a["note"] = "<script>alert(5)</script>"
    intake.message("watchdog/m/alerts", json.dumps(a).encode(), now)
    intake.message("watchdog/agents/e/status", json.dumps(status_payload("<i>e</i>")).encode(), now)
    with h.reader() as r:
        html = full_page(r, "1d", "v1", now)
    for raw in ("<img", "<script>alert", 'onmouseover="alert', "<b>v</b>", "<i>e</i>"):
        assert raw not in html, raw
    assert "&lt;script&gt;alert(4)&lt;/script&gt;" in html and "&lt;img src=x" in html
    assert "&lt;script&gt;alert(5)&lt;/script&gt;" in html
    h.close()


def test_the_page_shades_a_real_agents_planned_work(tmp_path: Path, broker: Broker) -> None:
    from watchdog_edge.core.events import rfc3339

    cfg = write_setup(tmp_path, broker)
    now = time.time()
    head, sep, rest = cfg.read_text().partition("[[models]]")
    window = f'[[planned_work]]\nname = "probe cleaning"\nreason = "weekly"\nstart = "{rfc3339(now - 60)}"\nend = "{rfc3339(now + 600)}"\n\n'
    cfg.write_text(head + window + sep + rest)
    page = PageProc(tmp_path / "page", None, "--config", str(cfg)).wait_ready()
    agent = AgentProc(cfg)
    try:
        agent.wait_ready()
        pub = Client(broker, "publisher")
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))  # gap goes critical, but its raise is held
        pub.close()
        deadline = time.monotonic() + 20
        html = ""
        while time.monotonic() < deadline:
            html = http(page.url)[2].decode()
            if 'class="planned"' in html and re.search(r"Raises held back so far: [1-9]", html):
                break
            time.sleep(0.2)
        assert 'class="planned"' in html and "Planned work 'probe cleaning' (weekly)" in html, page.text()
        # the critical raise, and a warning before it where gap's CUSUM raised first
        assert re.search(r"Raises held back so far: [12]\b", html)
        assert json.loads(http(page.url + "api/summary")[2])["alerts"] == []  # held, so none published
    finally:
        assert agent.stop() == 0
        assert page.stop() == 0
