"""The live agent as a real process against a real mosquitto: alerts, state, crashes, TLS, replay.

Each test starts its own broker on a free port (tests/broker.py) and runs
``python -m watchdog_edge.cli run`` as a subprocess; nothing is mocked.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion

from broker import Broker, make_tls  # noqa: F401  (fixture module beside the tests)
from broker import broker  # noqa: F401  pytest fixture
from watchdog_edge.cards import ModelCard, save_card
from watchdog_edge.events import Alert
from watchdog_edge.monitor import Monitor, load_cards
from watchdog_edge.config import load_config
from watchdog_edge.replay import read_recording, replay
from watchdog_edge.store import Store, read_dead_letters, state_path

PRED = "plant/pump/pred"
TRUTH = "plant/pump/truth"
ALERTS = "watchdog/pump/alerts"
STATE = "watchdog/pump/state"
STATUS = "watchdog/agents/edge-1/status"
REPO = Path(__file__).resolve().parents[1]


# --- set-up helpers ------------------------------------------------------------------------
def write_setup(tmp: Path, broker: Broker, broker_extra: str = "", agent_extra: str = "",
                checks: str = "", window: str = "size = 60\nmin_pairs = 40") -> Path:
    """A card with held-out squared loss 1.0 and a config for model 'pump' talking to ``broker``."""
    card = ModelCard(model_id="pump", model_version="v1", loss="squared", training={"loss": 0.9, "count": 5000},
                     fitted_parameters=4, least_squares=True, holdout={"loss": 1.0, "count": 1000})
    save_card(card, tmp / "pump.card.json")
    checks = checks or ('[models.checks.gap]\nevaluate_every = 5\n'
                        '[models.checks.silence]\nenabled = false\n')
    text = f"""
[agent]
name = "edge-1"
state_dir = "state"
tick_every_s = 0.2
snapshot_every_s = 1.0
state_every_s = 0.5
{agent_extra}

[broker]
host = "{broker.host_name if hasattr(broker, 'host_name') else broker.host}"
port = {broker.port}
keepalive = 5
reconnect_min_s = 0.1
reconnect_max_s = 0.5
{broker_extra}

[[models]]
id = "pump"
card = "pump.card.json"
prediction_topic = "{PRED}"
truth_topic = "{TRUTH}"
[models.window]
{window}
{checks}
"""
    cfg = tmp / "config.toml"
    cfg.write_text(text)
    return cfg


class Client:
    """A test-side MQTT client that records what it receives (a subscriber and a publisher)."""

    def __init__(self, broker: Broker, client_id: str, subscribe: list[str] = (), clean: bool = True,
                 tls: dict | None = None, auth: tuple[str, str] | None = None, host: str | None = None) -> None:
        self.messages: list[paho.MQTTMessage] = []
        self.lock = threading.Lock()
        self.c = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=clean)
        if tls:
            self.c.tls_set(**tls)
        if auth:
            self.c.username_pw_set(*auth)
        self.connected = threading.Event()
        subs = list(subscribe)

        def on_connect(c, u, flags, rc, props):
            if not rc.is_failure:
                for s in subs:
                    c.subscribe(s, qos=1)
                self.connected.set()

        def on_message(c, u, msg):
            with self.lock:
                self.messages.append(msg)

        self.c.on_connect = on_connect
        self.c.on_message = on_message
        self.c.reconnect_delay_set(0.1, 0.5)
        self.c.connect(host or broker.host, broker.port, keepalive=5)
        self.c.loop_start()
        assert self.connected.wait(10), "test client could not connect"

    def publish(self, topic: str, payload: bytes | str, qos: int = 1, timeout: float = 10.0) -> bool:
        """Publish and wait for the PUBACK; True when the broker acknowledged it."""
        info = self.c.publish(topic, payload, qos=qos)
        try:
            info.wait_for_publish(timeout)
        except RuntimeError:
            return False
        return info.is_published()

    def on(self, topic: str) -> list[paho.MQTTMessage]:
        with self.lock:
            return [m for m in self.messages if m.topic == topic]

    def json_on(self, topic: str) -> list[dict]:
        return [json.loads(m.payload) for m in self.on(topic)]

    def wait_for(self, predicate, timeout: float = 15.0, what: str = "condition") -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if predicate():
                return
            time.sleep(0.05)
        raise AssertionError(f"timed out waiting for {what}")

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


class AgentProc:
    """``watchdog-edge run`` as a real subprocess."""

    def __init__(self, config: Path, *extra: str, env: dict | None = None) -> None:
        self.log = config.parent / f"agent-{time.monotonic_ns()}.log"
        self._fh = open(self.log, "w")
        e = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        if env:
            e.update(env)
        self.proc = subprocess.Popen([sys.executable, "-m", "watchdog_edge.cli", "run", "--config", str(config),
                                      *extra], stdout=self._fh, stderr=subprocess.STDOUT, env=e, cwd=config.parent)

    def text(self) -> str:
        self._fh.flush()
        return self.log.read_text()

    def wait_ready(self, timeout: float = 20.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if "connected to" in self.text():
                return
            if self.proc.poll() is not None:
                raise AssertionError(f"agent exited with {self.proc.returncode}:\n{self.text()}")
            time.sleep(0.05)
        raise AssertionError(f"agent not ready:\n{self.text()}")

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 20.0) -> int:
        if self.proc.poll() is None:
            os.kill(self.proc.pid, sig)
        try:
            rc = self.proc.wait(timeout)
        finally:
            if self.proc.poll() is None:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(5)
            self._fh.close()
        return rc


def pair_payloads(ids: range, errors: np.ndarray, version: str = "v1") -> tuple[bytes, bytes]:
    """Prediction and truth arrays for ``ids``: prediction 10.0, truth 10.0 + error."""
    preds = [{"id": i, "value": 10.0, "model_version": version} for i in ids]
    truths = [{"id": str(i), "value": 10.0 + float(e)} for i, e in zip(ids, errors)]
    return json.dumps(preds).encode(), json.dumps(truths).encode()


def send_pairs(pub: Client, start: int, n: int, sigma: float, rng: np.random.Generator, chunk: int = 10) -> list[int]:
    """Send ``n`` pairs in chunks (predictions first, truths later); return ids acknowledged."""
    acked = []
    for s in range(start, start + n, chunk):
        ids = range(s, min(s + chunk, start + n))
        p, t = pair_payloads(ids, rng.normal(0.0, sigma, len(ids)))
        if pub.publish(PRED, p) and pub.publish(TRUTH, t):
            acked.extend(ids)
    return acked


# --- tests ---------------------------------------------------------------------------------
def test_end_to_end_gap_alert_and_retained_state(tmp_path, broker):
    cfg = write_setup(tmp_path, broker)
    watcher = Client(broker, "watcher", [ALERTS, STATE, STATUS])
    agent = AgentProc(cfg)
    try:
        agent.wait_ready()
        pub = Client(broker, "publisher")
        # Errors with standard deviation 3 give a mean squared error near 9 against an
        # expected 1.0 from the card: the gap check must go critical.
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))
        watcher.wait_for(lambda: watcher.json_on(ALERTS), what="a gap alert")
        a = watcher.json_on(ALERTS)[0]
        assert (a["check"], a["state"], a["severity"], a["model"], a["agent"]) == (
            "gap", "raised", "critical", "pump", "edge-1")
        assert a["model_version"] == "v1"
        assert set(a) == {"alert_id", "agent", "model", "model_version", "check", "state", "severity", "ts",
                          "summary", "figures"}
        assert a["figures"]["expected_loss"] == 1.0
        # retained state, read by a client that connects afterwards
        late = Client(broker, "late-reader", [STATE, STATUS])
        late.wait_for(lambda: late.on(STATE) and late.on(STATUS), what="retained state and status")
        state = late.json_on(STATE)[-1]
        assert late.on(STATE)[-1].retain
        assert state["checks"]["gap"]["state"] in ("critical", "warning")
        assert state["pairs"] >= 40
        # the status is refreshed every agent.state_every_s with the core's counters
        late.wait_for(lambda: late.json_on(STATUS)[-1]["received"] >= 16, what="status counters")
        status = late.json_on(STATUS)[-1]
        assert status["state"] == "online" and status["paired"] >= 40 and status["alerts_sent"] >= 1
        assert status["outbox_depth"] == 0 and status["version"]
        late.close()
        pub.close()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    watcher.wait_for(lambda: watcher.json_on(STATUS)[-1]["state"] == "offline", what="status offline")
    watcher.close()
