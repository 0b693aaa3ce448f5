"""``watchdog-edge status`` and ``watchdog-edge metrics`` as real processes against real agents and mosquitto.

Two agents (the fleet case) publish to one broker; the readers see both. With the broker
gone, ``status --config`` reads the agent's own state file, read-only.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
import urllib.request

import numpy as np
import pytest
from broker import free_port
from prometheus_client.openmetrics.parser import text_string_to_metric_families as parse_openmetrics
from prometheus_client.parser import text_string_to_metric_families as parse_text
from test_agent import ALERTS, REPO, STATUS, AgentProc, Client, send_pairs, write_setup


def cli(*args: str, timeout: float = 60) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run(
        [sys.executable, "-m", "watchdog_edge.cli.app", *args], capture_output=True, text=True, env=env, timeout=timeout
    )


def second_agent(tmp_path, first):
    """The same setup as a second agent, edge-2, watching a model 'fan' on its own topics."""
    text = first.read_text()
    for a, b in (
        ('name = "edge-1"', 'name = "edge-2"'),
        ('id = "pump"', 'id = "fan"'),
        ("plant/pump/", "plant/fan/"),
        ('state_dir = "state"', 'state_dir = "state2"'),
    ):
        text = text.replace(a, b)
    cfg = tmp_path / "config2.toml"
    cfg.write_text(text)
    return cfg


def scrape(port: int) -> str:
    req = urllib.request.Request(f"http://127.0.0.1:{port}/metrics", headers={"Accept": "application/openmetrics-text"})
    with urllib.request.urlopen(req, timeout=5) as r:
        assert r.headers["Content-Type"].startswith("application/openmetrics-text")
        return r.read().decode()


def samples(text: str, parser) -> dict[tuple, float]:
    out = {}
    for fam in parser(text):
        for s in fam.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


@pytest.mark.slow
def test_status_and_metrics_of_a_fleet_of_two_agents_then_the_state_file_with_no_broker(tmp_path, broker):
    cfg1 = write_setup(tmp_path, broker)
    cfg2 = second_agent(tmp_path, cfg1)
    watcher = Client(broker, "watcher", [ALERTS, STATUS])
    agents = [AgentProc(cfg1), AgentProc(cfg2)]
    port = free_port()
    exporter = subprocess.Popen(
        [sys.executable, "-m", "watchdog_edge.cli.app", "metrics", "--broker", f"127.0.0.1:{broker.port}"]
        + ["--listen", f"127.0.0.1:{port}"],
        env=dict(os.environ, PYTHONPATH=str(REPO)),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        for a in agents:
            a.wait_ready()
        pub = Client(broker, "publisher")
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))  # pump degrades; fan gets nothing
        watcher.wait_for(lambda: watcher.json_on(ALERTS), what="a gap alert")
        watcher.wait_for(lambda: watcher.json_on(STATUS) and watcher.json_on(STATUS)[-1]["alerts_sent"] >= 1)

        r = cli("status", "--broker", f"127.0.0.1:{broker.port}", "--json")
        assert r.returncode == 0, r.stderr
        data = json.loads(r.stdout)
        assert {a["agent"]: a["connection"] for a in data["agents"]} == {"edge-1": "online", "edge-2": "online"}
        assert all(0 <= a["heartbeat_age_s"] < 30 for a in data["agents"])
        models = {m["model"]: m for m in data["models"]}
        assert set(models) == {"pump", "fan"}
        pump = models["pump"]
        assert pump["agent"] == "edge-1" and pump["checks"]["gap"] == "critical"
        assert pump["live_loss"] > pump["critical_limit"] > pump["warning_limit"] > pump["expected_loss"] == 1.0
        assert pump["lower"] <= pump["live_loss"] <= pump["upper"] and pump["pairs"] >= 40
        assert pump["last_alert"]["check"] == "gap" and pump["last_alert"]["state"] == "raised"
        assert 0 <= pump["last_alert_age_s"] < 60 and pump["planned_work"] is None
        assert models["fan"]["checks"]["gap"] == "normal" and models["fan"]["last_alert"] is None

        table = cli("status", "--broker", f"127.0.0.1:{broker.port}", "--model", "pump")
        assert table.returncode == 0, table.stderr
        assert "edge-1" in table.stdout and "gap=critical" in table.stdout and "not a protection system" in table.stdout
        assert "fan" not in table.stdout.split("MODEL", 1)[1]

        # the state file, read while its agent runs
        r = cli("status", "--state-file", str(tmp_path / "state" / "state.sqlite"), "--json")
        assert r.returncode == 0, r.stderr
        assert [m["model"] for m in json.loads(r.stdout)["models"]] == ["pump"]
        pub.close()
    finally:
        codes = [a.stop() for a in agents]
    assert codes == [0, 0], [a.text() for a in agents]
    try:
        # Both agents have stopped: their final status (offline, with counters) is retained.
        watcher.wait_for(lambda: watcher.json_on(STATUS)[-1]["connection"] == "offline", what="status offline")
        final = watcher.json_on(STATUS)[-1]
        deadline = time.monotonic() + 15
        while True:
            try:
                text = scrape(port)
                got = samples(text, parse_openmetrics)
                if got.get(("watchdog_edge_online", (("agent", "edge-1"),))) == 0.0:
                    break
            except OSError:
                pass
            assert time.monotonic() < deadline and exporter.poll() is None, (
                exporter.stderr.read() if exporter.poll() is not None else "no metrics"
            )
            time.sleep(0.2)
        e1 = (("agent", "edge-1"),)
        assert got[("watchdog_edge_received_total", e1)] == final["received"]
        assert got[("watchdog_edge_paired_total", e1)] == final["paired"]
        assert (
            got[
                (
                    "watchdog_edge_alerts_total",
                    (("agent", "edge-1"), ("check", "gap"), ("severity", "critical"), ("state", "raised")),
                )
            ]
            == 1
        )
        assert got[("watchdog_edge_check_level", (("agent", "edge-1"), ("check", "gap"), ("model", "pump")))] == 2
        assert got[("watchdog_edge_check_level", (("agent", "edge-2"), ("check", "gap"), ("model", "fan")))] == 0
        assert got[("watchdog_edge_expected_loss", (("agent", "edge-1"), ("model", "pump")))] == 1.0
        assert got[("watchdog_edge_live_loss", (("agent", "edge-1"), ("model", "pump")))] > 1.0
        assert got[("watchdog_edge_outbox_depth", e1)] == 0
        assert got[("watchdog_edge_heartbeat_age_seconds", e1)] >= 0
        assert ("watchdog_edge_journal_depth", e1) in got and ("watchdog_edge_reconnects_total", e1) in got
        assert ("watchdog_edge_expired_total", (("agent", "edge-1"), ("kind", "truth"))) in got
        # the classic text format, read by prometheus-client's other parser, says the same
        plain = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read().decode()
        assert samples(plain, parse_text)[("watchdog_edge_received_total", e1)] == final["received"]
    finally:
        exporter.terminate()
        assert exporter.wait(10) == 0
    broker.stop()
    # No broker: --config falls back to the agent's own state file and says so.
    r = cli("status", "--config", str(cfg1), "--json", "--wait", "1")
    assert r.returncode == 0, r.stderr
    assert "reading the agent's state file" in r.stderr
    data = json.loads(r.stdout)
    assert data["source"].startswith("state file") and data["agents"][0]["connection"] == "offline"
    assert data["models"][0]["checks"]["gap"] == "critical"
    watcher.close()


def test_status_with_no_broker_and_no_config_fails_saying_what_to_do(tmp_path):
    r = cli("status", "--broker", f"127.0.0.1:{free_port()}", "--wait", "1")
    assert r.returncode == 2 and "cannot reach the broker" in r.stderr


def test_status_help_teaches_the_sources_and_the_flags():
    r = cli("status", "--help")
    assert r.returncode == 0
    for words in ("--state-file", "--broker", "read-only", "fleet", "late", "Examples", "not a protection system"):
        assert words in r.stdout, words


def test_planned_work_with_wait_0_delivers_the_command_and_exits_0_without_an_agent(broker):
    """For JetStream workers, which publish no agent status: the broker's acknowledgement is the answer."""
    watcher = Client(broker, "command-watcher", subscribe=["watchdog/agents/+/commands/#"])
    try:
        where = ["--agent", "central", "--broker", f"{broker.host}:{broker.port}"]
        r = cli(
            "planned-work", "begin", "meter-calibration", *where, "--for", "90m", "--model", "steam-flow", "--wait", "0"
        )
        assert r.returncode == 0, r.stderr
        assert "not watched (--wait 0)" in r.stdout
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and not watcher.messages:
            time.sleep(0.05)
        (msg,) = watcher.messages
        assert msg.topic == "watchdog/agents/central/commands/planned-work"
        doc = json.loads(msg.payload)
        assert doc["action"] == "begin" and doc["name"] == "meter-calibration" and doc["models"] == ["steam-flow"]
        # watching a status nobody publishes still fails, saying why
        r = cli("planned-work", "end", "meter-calibration", *where, "--wait", "0.5")
        assert r.returncode == 1 and "is the agent running?" in r.stderr
    finally:
        watcher.close()
