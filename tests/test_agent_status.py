"""The retained status follows the alerts: refreshed when an alert goes out and when it is acknowledged.

A real agent process against a real mosquitto; the periodic refresh is set to ten minutes,
so any status that shows the alert can only come from the refresh on alerts.
"""

from __future__ import annotations

import json

import numpy as np
from test_agent import ALERTS, STATUS, AgentProc, Client, send_pairs, write_setup

from watchdog_edge.agent.store import read_published, state_path


def test_status_is_refreshed_on_every_alert_not_only_on_its_period(tmp_path, broker):
    cfg = write_setup(tmp_path, broker)
    cfg.write_text(cfg.read_text().replace("state_every_s = 0.5", "state_every_s = 600"))
    watcher = Client(broker, "watcher", [ALERTS, STATUS])
    agent = AgentProc(cfg)
    try:
        agent.wait_ready()
        watcher.wait_for(lambda: watcher.on(STATUS), what="the status at start")
        assert watcher.json_on(STATUS)[-1]["received"] == 0
        assert watcher.json_on(STATUS)[-1]["state_every_s"] == 600
        pub = Client(broker, "publisher")
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))
        watcher.wait_for(lambda: watcher.json_on(ALERTS), what="a gap alert")
        # well inside the ten-minute period: the status already counts the alert as sent
        watcher.wait_for(
            lambda: watcher.json_on(STATUS)[-1]["alerts_sent"] >= 1,
            timeout=10,
            what="a status with alerts_sent >= 1",
            detail=lambda: watcher.json_on(STATUS),
        )
        last = watcher.json_on(STATUS)[-1]
        assert last["received"] > 0 and last["paired"] >= 40 and last["connection"] == "online"
        # the state file keeps the same status for readers with no broker (read-only, agent running)
        kept = dict((t, p) for t, p, _ in read_published(state_path(tmp_path / "state")))
        assert STATUS in kept and "watchdog/pump/state" in kept
        pub.close()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    # the status after the stop says offline, and no later "online" overtakes it
    watcher.wait_for(lambda: watcher.json_on(STATUS)[-1]["connection"] == "offline", what="status offline")
    watcher.close()


COMMANDS = "watchdog/agents/edge-1/commands/planned-work"


def test_planned_work_by_command_holds_raises_live_and_replay_gives_the_same_alerts(tmp_path, broker):
    from test_agent import STATE, _replay_alerts

    cfg = write_setup(tmp_path, broker)
    watcher = Client(broker, "watcher", [ALERTS, STATE, STATUS])
    recording = tmp_path / "live.jsonl"
    agent = AgentProc(cfg, "--record", str(recording))
    try:
        agent.wait_ready()
        operator = Client(broker, "operator")
        begin = {"action": "begin", "name": "meter-calibration", "duration_s": 600, "reason": "meter calibration"}
        assert operator.publish(COMMANDS, json.dumps(begin))
        watcher.wait_for(
            lambda: watcher.on(STATE) and (watcher.json_on(STATE)[-1]["planned_work"] or {}).get("name"),
            what="the window in the retained state",
        )
        assert watcher.json_on(STATUS)[-1]["planned_work"][0]["name"] == "meter-calibration"
        pub = Client(broker, "publisher")
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))
        watcher.wait_for(lambda: watcher.json_on(STATE)[-1]["held_raises"] >= 1, what="a held raise in the state")
        assert watcher.json_on(ALERTS) == []  # held back, not published
        assert operator.publish(COMMANDS, json.dumps({"action": "end", "name": "meter-calibration"}))
        watcher.wait_for(lambda: watcher.json_on(ALERTS), what="the held raise, published at the end")
        (released,) = watcher.json_on(ALERTS)
        assert released["state"] == "raised" and "meter-calibration" in released["note"]
        watcher.wait_for(lambda: watcher.json_on(STATE)[-1]["planned_work"] is None, what="the window gone")
        assert "planned work 'meter-calibration' began" in agent.text()
        operator.close()
        pub.close()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    # the commands are in the recording like any message: replay holds and releases the same way
    assert _replay_alerts(cfg, recording) == watcher.json_on(ALERTS)
    watcher.close()
