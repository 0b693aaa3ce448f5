"""The live agent as a real process against a real mosquitto: alerts, state, crashes, TLS, replay.

Each test starts its own broker on a free port (tests/broker.py) and runs
``python -m watchdog_edge.cli.app run`` as a subprocess; nothing is mocked.
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
import pytest
from broker import Broker, make_tls
from paho.mqtt.enums import CallbackAPIVersion

from watchdog_edge.agent.store import Store, read_dead_letters, state_path
from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import Alert
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.files.cardfile import save_card
from watchdog_edge.files.configfile import load_cards, load_config
from watchdog_edge.replay.recording import read_recording, replay

PRED = "plant/pump/pred"
TRUTH = "plant/pump/truth"
ALERTS = "watchdog/pump/alerts"
STATE = "watchdog/pump/state"
STATUS = "watchdog/agents/edge-1/status"
REPO = Path(__file__).resolve().parents[1]


# --- set-up helpers ------------------------------------------------------------------------
def write_setup(
    tmp: Path,
    broker: Broker,
    broker_extra: str = "",
    agent_extra: str = "",
    checks: str = "",
    window: str = "size_pairs = 60\nmin_pairs = 40",
    snapshot_every_s: float = 1.0,
) -> Path:
    """A card with held-out squared loss 1.0 and a config for model 'pump' talking to ``broker``."""
    card = ModelCard(
        model_id="pump",
        model_version="v1",
        loss="squared",
        training={"loss": 0.9, "count": 5000},
        fitted_parameters=4,
        least_squares=True,
        holdout={"loss": 1.0, "count": 1000},
    )
    save_card(card, tmp / "pump.card.json")
    checks = checks or ("[models.checks.gap]\nevaluate_every_pairs = 5\n[models.checks.feed_stop]\nenabled = false\n")
    # the card has no feature profiles, so the input checks have nothing to watch here
    checks += "[models.checks.range]\nenabled = false\n[models.checks.shift]\nenabled = false\n"
    text = f"""
[agent]
name = "edge-1"
state_dir = "state"
tick_every_s = 0.2
snapshot_every_s = 1.0
state_every_s = 0.5
{agent_extra}

[broker]
host = "{broker.host_name if hasattr(broker, "host_name") else broker.host}"
port = {broker.port}
keepalive_s = 5
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

    def __init__(
        self,
        broker: Broker,
        client_id: str,
        subscribe: list[str] = (),
        clean: bool = True,
        tls: dict | None = None,
        auth: tuple[str, str] | None = None,
        host: str | None = None,
    ) -> None:
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

    def wait_for(self, predicate, timeout: float = 15.0, what: str = "condition", detail=None) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if predicate():
                return
            time.sleep(0.05)
        raise AssertionError(f"timed out waiting for {what}" + (f"\n{detail()}" if detail else ""))

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
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "watchdog_edge.cli.app", "run", "--config", str(config), *extra],
            stdout=self._fh,
            stderr=subprocess.STDOUT,
            env=e,
            cwd=config.parent,
        )

    def text(self) -> str:
        if not self._fh.closed:
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
@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_end_to_end_gap_alert_and_retained_state(tmp_path, broker, protocol):
    cfg = write_setup(tmp_path, broker, broker_extra=f'protocol = "{protocol}"\n')
    watcher = Client(broker, "watcher", [ALERTS, STATE, STATUS])
    agent = AgentProc(cfg)
    try:
        agent.wait_ready()
        pub = Client(broker, "publisher")
        # Errors with standard deviation 3 give a mean squared error near 9 against an
        # expected 1.0 from the card: the gap check must go critical (its CUSUM may raise a
        # warning some pairs before the interval proves the critical level).
        send_pairs(pub, 0, 80, 3.0, np.random.default_rng(1))
        watcher.wait_for(
            lambda: any(x["severity"] == "critical" for x in watcher.json_on(ALERTS)), what="a critical gap alert"
        )
        first = watcher.json_on(ALERTS)[0]
        assert (first["check"], first["state"], first["model"]) == ("gap", "raised", "pump")
        a = next(x for x in watcher.json_on(ALERTS) if x["severity"] == "critical")
        assert (a["check"], a["state"], a["severity"], a["model"], a["agent"]) == (
            "gap",
            "raised",
            "critical",
            "pump",
            "edge-1",
        )
        assert a["model_version"] == "v1"
        assert set(a) == {
            "alert_id",
            "agent",
            "model",
            "model_version",
            "check",
            "state",
            "severity",
            "ts",
            "summary",
            "figures",
            "episode",
        }
        assert a["figures"]["expected_loss"] == 1.0
        # retained state, read by a client that connects afterwards
        late = Client(broker, "late-reader", [STATE, STATUS])
        late.wait_for(lambda: late.on(STATE) and late.on(STATUS), what="retained state and status")
        # the first one comes from the broker's retained copy (later ones are live updates)
        assert late.on(STATE)[0].retain and late.on(STATUS)[0].retain
        # the state is republished right after the alert goes out
        late.wait_for(
            lambda: late.json_on(STATE)[-1]["checks"]["gap"]["level"] == "critical", what="state showing the gap"
        )
        state = late.json_on(STATE)[-1]
        assert state["pairs"] >= 40
        # the status is refreshed every agent.state_every_s with the core's counters
        late.wait_for(lambda: late.json_on(STATUS)[-1]["received"] >= 16, what="status counters")
        status = late.json_on(STATUS)[-1]
        assert status["connection"] == "online" and status["paired"] >= 40 and status["alerts_sent"] >= 1
        assert status["outbox_depth"] == 0 and status["version"]
        late.close()
        pub.close()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    watcher.wait_for(lambda: watcher.json_on(STATUS)[-1]["connection"] == "offline", what="status offline")
    watcher.close()


def test_last_will_sets_status_offline_after_sigkill(tmp_path, broker):
    cfg = write_setup(tmp_path, broker)
    watcher = Client(broker, "watcher", [STATUS])
    agent = AgentProc(cfg)
    agent.wait_ready()
    watcher.wait_for(
        lambda: watcher.on(STATUS) and watcher.json_on(STATUS)[-1]["connection"] == "online", what="status online"
    )
    agent.stop(signal.SIGKILL)
    # MQTT 3.1.1 section 3.1.2.5: the server publishes the will when the network connection
    # closes without a DISCONNECT; it was set retained, so a later reader sees it too (section number from memory).
    watcher.wait_for(lambda: watcher.json_on(STATUS)[-1]["connection"] == "offline", what="the last will")
    late = Client(broker, "late", [STATUS])
    late.wait_for(lambda: late.on(STATUS), what="retained status")
    assert late.json_on(STATUS)[-1] == {
        "agent": "edge-1",
        "connection": "offline",
        "version": late.json_on(STATUS)[-1]["version"],
    }
    assert late.on(STATUS)[-1].retain
    late.close()
    watcher.close()


def _alerts_by_id(msgs: list[dict]) -> dict[str, dict]:
    """Alert id -> content; asserts that every duplicate has the same content as the first."""
    seen: dict[str, dict] = {}
    for a in msgs:
        if a["alert_id"] in seen:
            assert seen[a["alert_id"]] == a, "a re-sent alert changed its content"
        seen.setdefault(a["alert_id"], a)
    return seen


def _replay_alerts(cfg: Path, recording: Path) -> list[dict]:
    config = load_config(cfg)
    mon = Monitor(config, load_cards(config))
    from watchdog_edge.agent.agent import alert_payload

    return [json.loads(alert_payload(e)) for e in replay(mon, read_recording(recording)) if isinstance(e, Alert)]


SILENCE = (
    "[models.checks.gap]\nevaluate_every_pairs = 5\n"
    "[models.checks.feed_stop]\nprediction_timeout_s = 1.0\ntruth_timeout_s = 1.0\n"
)


@pytest.mark.slow
def test_broker_down_while_the_model_degrades_every_alert_arrives(tmp_path, broker):
    cfg = write_setup(tmp_path, broker, checks=SILENCE)
    rec = tmp_path / "live.jsonl"
    watcher = Client(broker, "watcher", [ALERTS], clean=False)
    agent = AgentProc(cfg, "--record", str(rec))
    try:
        agent.wait_ready()
        pub = Client(broker, "publisher")
        rng = np.random.default_rng(2)
        send_pairs(pub, 0, 50, 1.0, rng)  # healthy: squared error near the card's 1.0
        send_pairs(pub, 50, 80, 3.0, rng)  # degrading
        broker.stop()
        # Down for longer than the feed_stop timeout: the agent raises feed_stop alerts that it
        # cannot deliver; they wait in the outbox.
        time.sleep(2.5)
        broker.start()
        pub.connected.clear()
        pub.wait_for(pub.c.is_connected, what="publisher reconnect")
        send_pairs(pub, 130, 20, 3.0, rng)  # traffic again: feed_stop clears
        expected = None

        def all_arrived() -> bool:
            nonlocal expected
            got = _alerts_by_id(watcher.json_on(ALERTS))
            return {"gap", "feed_stop"} <= {a["check"] for a in got.values()} and any(
                a["state"] == "cleared" for a in got.values() if a["check"] == "feed_stop"
            )

        try:
            watcher.wait_for(all_arrived, timeout=20, what="gap and feed_stop alerts after the restart")
        except AssertionError:
            raise AssertionError(
                f"{[(a['check'], a['state']) for a in watcher.json_on(ALERTS)]}\n{agent.text()}"
            ) from None
        pub.close()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    received = _alerts_by_id(watcher.json_on(ALERTS))
    # Every alert the agent raised (replayed from its own recording) reached the subscriber.
    produced = _alerts_by_id(_replay_alerts(cfg, rec))
    assert set(produced) == set(received)
    assert produced == received
    assert "lost the broker connection" in agent.text()
    watcher.close()


def _status_now(reader_broker: Broker, timeout: float = 10.0) -> dict:
    c = Client(reader_broker, f"status-{time.monotonic_ns()}", [STATUS])
    c.wait_for(lambda: c.on(STATUS), timeout=timeout, what="status")
    s = c.json_on(STATUS)[-1]
    c.close()
    return s


@pytest.mark.slow
def test_sigkill_mid_stream_then_restart_counts_each_acknowledged_record_once(tmp_path, broker):
    cfg = write_setup(tmp_path, broker, checks=SILENCE, snapshot_every_s=0.7)
    watcher = Client(broker, "watcher", [ALERTS, STATUS], clean=False)
    agent = AgentProc(cfg)
    agent.wait_ready()
    acked_preds: list[int] = []
    acked_truths: list[int] = []
    stop = threading.Event()
    rng = np.random.default_rng(3)

    def publisher() -> None:
        pub = Client(broker, "steady-publisher")
        i = 0
        while not stop.is_set():
            p, t = pair_payloads(range(i, i + 1), rng.normal(0.0, 3.0, 1))
            if pub.publish(PRED, p, timeout=30):
                acked_preds.append(i)
            if pub.publish(TRUTH, t, timeout=30):
                acked_truths.append(i)
            i += 1
            time.sleep(0.002)
        pub.close()

    th = threading.Thread(target=publisher, daemon=True)
    th.start()
    try:
        watcher.wait_for(lambda: any(a["check"] == "gap" for a in watcher.json_on(ALERTS)), what="gap raised")
        # Freeze the broker: inbound traffic stops, the agent's feed_stop alert gets no PUBACK.
        os.kill(broker.proc.pid, signal.SIGSTOP)
        db_path = state_path(tmp_path / "state")
        deadline = time.monotonic() + 10
        waiting: list[str] = []
        while time.monotonic() < deadline and not waiting:
            waiting = [a.alert_id for a in _outbox(db_path) if b'"feed_stop"' in a.payload]
            time.sleep(0.05)
        assert waiting, "the feed_stop alert never reached the outbox"
        agent.stop(signal.SIGKILL)
        os.kill(broker.proc.pid, signal.SIGCONT)
        time.sleep(0.7)  # the publisher keeps sending; the broker queues for the dead agent
        agent2 = AgentProc(cfg)
        agent2.wait_ready()
        time.sleep(0.7)
        stop.set()
        th.join(20)
        n = len(acked_preds)
        watcher.wait_for(
            lambda: (
                watcher.json_on(STATUS)[-1].get("predictions", -1) == n
                and watcher.json_on(STATUS)[-1].get("truths", -1) == len(acked_truths)
            ),
            timeout=20,
            what=f"status counting {n} predictions, {len(acked_truths)} truths",
            detail=lambda: f"{watcher.json_on(STATUS)[-1]}\n{agent.text()}\n{agent2.text()}",
        )
    finally:
        stop.set()
        rc = agent2.stop() if "agent2" in locals() else None
    assert rc == 0, agent2.text()
    final = _status_now(broker)
    assert final["duplicate_predictions"] == 0 and final["duplicate_truths"] == 0
    assert final["paired"] == len(set(acked_preds) & set(acked_truths))
    assert final["outbox_depth"] == 0
    got = _alerts_by_id(watcher.json_on(ALERTS))
    assert set(waiting) <= set(got), "the alert waiting in the outbox was not re-sent"
    gap_raised = [a for a in got.values() if a["check"] == "gap" and a["state"] == "raised"]
    assert len(gap_raised) == 1, f"gap raised more than once: {gap_raised}"
    assert gap_raised[0]["summary"] and "deployment" in gap_raised[0]["summary"]
    # the window went on across the crash: the state counts every pair, not only the new ones
    st = Store(state_path(tmp_path / "state"))
    snap = st.latest_snapshot()
    st.close()
    assert snap is not None and snap.data["monitor"]["tracks"]["pump"]["pairs"] == final["paired"]
    watcher.close()


def _outbox(db_path: Path) -> list:
    import sqlite3

    from watchdog_edge.agent.store import OutboxItem

    if not db_path.exists():
        return []
    db = sqlite3.connect(f"file:{db_path}?mode=ro", uri=True, timeout=5)
    try:
        rows = db.execute("SELECT alert_id, topic, payload, t FROM outbox").fetchall()
    except sqlite3.OperationalError:
        rows = []
    db.close()
    return [OutboxItem(r[0], r[1], bytes(r[2]), r[3]) for r in rows]


@pytest.mark.slow
def test_tls_and_password_accepted_wrong_password_and_untrusted_ca_refused(tmp_path):
    tls = make_tls(tmp_path / "tls")
    rogue = make_tls(tmp_path / "rogue", name="rogue")
    b = Broker(tmp_path / "broker", tls=tls, passwords={"edge": "right-one"})
    try:
        (tmp_path / "pw-bad").write_text("wrong-one\n")
        base = f'username = "edge"\n[broker.tls]\nca_file = "{tls.ca}"\n'
        good = write_setup(tmp_path, b, broker_extra='password_env = "WD_TEST_BROKER_PW"\n' + base)
        agent = AgentProc(good, env={"WD_TEST_BROKER_PW": "right-one"})
        agent.wait_ready()
        assert agent.stop() == 0, agent.text()
        assert "right-one" not in agent.text()

        bad_pw = write_setup(tmp_path, b, broker_extra='password_file = "pw-bad"\n' + base)
        a2 = AgentProc(bad_pw)
        rc = a2.proc.wait(20)
        out = a2.text()
        a2.stop()
        assert rc == 3, out
        line = [ln for ln in out.splitlines() if ln.startswith("watchdog-edge:")]
        assert len(line) == 1 and "refused the connection" in line[0] and "password" in line[0], out
        assert "wrong-one" not in out

        untrusted = write_setup(
            tmp_path,
            b,
            broker_extra=(
                f'username = "edge"\npassword_env = "WD_TEST_BROKER_PW"\n[broker.tls]\nca_file = "{rogue.ca}"\n'
            ),
        )
        a3 = AgentProc(untrusted, env={"WD_TEST_BROKER_PW": "right-one"})
        rc = a3.proc.wait(20)
        out = a3.text()
        a3.stop()
        assert rc == 3, out
        line = [ln for ln in out.splitlines() if ln.startswith("watchdog-edge:")]
        assert len(line) == 1 and "certificate" in line[0] and "ca_file" in line[0], out
    finally:
        b.stop()


@pytest.mark.slow
def test_live_alerts_equal_replay_of_the_recording(tmp_path, broker):
    cfg = write_setup(tmp_path, broker, checks=SILENCE + "[models.checks.drift]\nenabled = false\n")
    rec = tmp_path / "live.jsonl"
    watcher = Client(broker, "watcher", [ALERTS])
    agent = AgentProc(cfg, "--record", str(rec))
    try:
        agent.wait_ready()
        pub = Client(broker, "publisher")
        rng = np.random.default_rng(4)
        send_pairs(pub, 0, 60, 3.0, rng)  # gap from deployment
        time.sleep(1.6)  # feed_stop raised by ticks alone
        send_pairs(pub, 60, 120, 0.5, rng)  # healthy again: feed_stop and, later, gap clear
        watcher.wait_for(lambda: len(_alerts_by_id(watcher.json_on(ALERTS))) >= 3, what="three alerts")
        time.sleep(0.5)
        pub.close()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    lines = list(read_recording(rec))
    assert any(ln.tick for ln in lines) and any(not ln.tick for ln in lines)
    live = [json.loads(m.payload) for m in watcher.on(ALERTS)]
    replayed = _replay_alerts(cfg, rec)
    assert [a["alert_id"] for a in replayed] == list(_alerts_by_id(live))
    assert replayed == list(_alerts_by_id(live).values())
    watcher.close()


@pytest.mark.slow
def test_bad_payloads_go_to_dead_letters_with_their_reason_and_good_ones_pair(tmp_path, broker):
    cfg = write_setup(tmp_path, broker, agent_extra="max_payload_bytes = 1024")
    agent = AgentProc(cfg)
    agent.wait_ready()
    pub = Client(broker, "publisher")
    bad = [
        (PRED, b"{not json", "not_json"),
        (PRED, b"\xff\xfe\x00", "not_json"),
        (TRUTH, b"42", "not_object"),
        (PRED, b'{"value": 1.0}', "missing_id"),
        (TRUTH, b'{"id": 5}', "missing_value"),
        (PRED, b'{"id": 6, "value": "high"}', "bad_type"),
        (PRED, b'{"id": 7, "value": NaN}', "not_finite"),
        (TRUTH, b'{"id": 8, "value": Infinity}', "not_finite"),
        (PRED, b'{"id": 9, "value": 1.0, "ts": "yesterday"}', "bad_ts"),
        (PRED, b'{"id": 10, "value": 1.0, "pad": "' + b"x" * 2000 + b'"}', "oversize"),
    ]
    good_ids = []
    for k, (topic, payload, _) in enumerate(bad):
        i = 1000 + k
        p, t = pair_payloads(range(i, i + 1), np.zeros(1))
        assert pub.publish(PRED, p) and pub.publish(topic, payload) and pub.publish(TRUTH, t)
        good_ids.append(i)
    # An array: good elements are taken, the bad one is dead-lettered on its own.
    assert pub.publish(PRED, json.dumps([{"id": 2000, "value": 1.0}, {"id": 2001}]).encode())
    assert pub.publish(TRUTH, b'[{"id": 2000, "value": 1.5}]')
    good_ids.append(2000)
    db = state_path(tmp_path / "state")
    deadline = time.monotonic() + 15
    letters: list = []
    while time.monotonic() < deadline and len(letters) < len(bad) + 1:
        letters = read_dead_letters(db) if db.exists() else []
        time.sleep(0.1)
    time.sleep(0.6)
    status = _status_now(broker)
    pub.close()
    assert agent.stop() == 0, agent.text()
    assert status["paired"] == len(good_ids)
    assert [d.reason for d in letters] == [r for _, _, r in bad] + ["missing_value"]
    for d, (topic, payload, reason) in zip(letters, bad):
        assert d.topic == topic and payload.startswith(d.payload)
        # an oversize payload is kept cut to agent.max_payload_bytes; its detail gives the size
        assert d.size == (1024 if reason == "oversize" else len(payload))
    assert f"{len(bad[-1][1])} bytes" in letters[len(bad) - 1].detail
    assert json.loads(letters[-1].payload) == {"id": 2001}
    assert status["bad"] == {
        "not_json": 2,
        "not_object": 1,
        "missing_id": 1,
        "missing_value": 2,
        "bad_type": 1,
        "not_finite": 2,
        "bad_ts": 1,
        "oversize": 1,
    }
    # and the operator's command shows them
    env = dict(os.environ, PYTHONPATH=str(REPO))
    out = subprocess.run(
        [sys.executable, "-m", "watchdog_edge.cli.app", "deadletters", "--config", str(cfg), "--json"],
        capture_output=True,
        text=True,
        env=env,
        timeout=30,
    )
    assert out.returncode == 0, out.stderr
    rows = [json.loads(x) for x in out.stdout.splitlines()]
    assert [r["reason"] for r in rows] == [d.reason for d in letters]
    assert "payload_b64" in rows[1] and rows[0]["payload"] == "{not json"
    table = subprocess.run(
        [sys.executable, "-m", "watchdog_edge.cli.app", "deadletters", "--config", str(cfg), "--last", "2"],
        capture_output=True,
        text=True,
        env=env,
        timeout=30,
    )
    assert table.returncode == 0 and "oversize" in table.stdout and "missing_value" in table.stdout


def test_refusal_while_running_is_logged_counted_and_survived(tmp_path):
    from broker import make_password_file

    b = Broker(tmp_path / "broker", passwords={"edge": "first"})
    try:
        (tmp_path / "pw").write_text("first\n")
        cfg = write_setup(tmp_path, b, broker_extra='username = "edge"\npassword_file = "pw"\n')
        agent = AgentProc(cfg)
        agent.wait_ready()
        # The operator rotates the broker's password; the running agent still has the old one.
        b.stop()
        make_password_file(b.folder / "passwords", {"edge": "second", "reader": "r"})
        b.start()
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and "refused the connection" not in agent.text():
            time.sleep(0.1)
        assert "refused the connection" in agent.text(), agent.text()
        assert agent.proc.poll() is None  # still running, retrying
        # Put the old password back: the agent gets in on its own and reports the refusals.
        b.stop()
        make_password_file(b.folder / "passwords", {"edge": "first", "reader": "r"})
        b.start()
        reader = Client(b, "reader", [STATUS], auth=("reader", "r"))
        reader.wait_for(
            lambda: any(
                s.get("link", {}).get("connection_refused", 0) >= 1 and s["connection"] == "online"
                for s in reader.json_on(STATUS)
            ),
            timeout=20,
            what="status counting the refusal",
        )
        last = [s for s in reader.json_on(STATUS) if s.get("link")][-1]
        assert "password" in last["link"]["last_refusal"]
        reader.close()
        assert agent.stop() == 0, agent.text()
        assert "first" not in agent.text().replace("first full", "")
    finally:
        b.stop()


def test_a_redelivered_message_already_journaled_is_acknowledged_and_not_fed_twice(tmp_path, broker):
    # MQTT 3.1.1, 4.4: a message whose PUBACK did not reach the broker comes again with DUP
    # set and the same packet id. The agent's own batch step is driven here with such
    # messages; the link is never started (nothing goes over the network).
    from watchdog_edge.agent.agent import Agent
    from watchdog_edge.agent.link import Inbound

    cfg = write_setup(tmp_path, broker)
    config = load_config(cfg)
    agent = Agent(config, load_cards(config))
    agent.intake_open = True
    first, second = b'{"id": 1, "value": 2.0}', b'{"id": 2, "value": 3.0}'

    def deliver(*msgs: Inbound) -> None:
        for m in msgs:
            agent._on_message(m)
        agent._process(tick=False)

    deliver(Inbound(PRED, first, 5, 1, False))
    deliver(Inbound(PRED, first, 5, 1, True))  # the re-send: acknowledged, not fed
    assert agent.monitor.status()["predictions"] == 1 and agent.counters["redelivered"] == 1
    deliver(Inbound(PRED, second, 5, 1, True))  # same id, other content: a new message
    assert agent.monitor.status()["predictions"] == 2 and agent.store.journal_depth() == 2
    agent._snapshot()
    agent._close_files()

    # After a restart the packet ids come back from the snapshot.
    again = Agent(config, load_cards(config))
    again.intake_open = True
    again._on_message(Inbound(PRED, second, 5, 1, True))
    again._on_message(Inbound(PRED, first, 6, 1, True))  # DUP, but never journaled: fed
    again._process(tick=False)
    status = again.monitor.status()
    assert again.counters["redelivered"] == 1 and status["predictions"] == 3
    assert status["duplicate_predictions"] == 1  # id 1 again: the core counts it, as it must
    again._close_files()


def test_broker_unreachable_at_boot_is_retried_and_reported_once_connected(tmp_path):
    # On a gateway the agent often starts before the broker: it waits, saying so, instead of exiting.
    b = Broker(tmp_path / "broker")
    b.stop()
    (tmp_path / "pw").write_text("secret\n")
    os.chmod(tmp_path / "pw", 0o644)
    cfg = write_setup(tmp_path, b, broker_extra='username = "edge"\npassword_file = "pw"\n')
    agent = AgentProc(cfg)
    try:
        deadline = time.monotonic() + 15
        while time.monotonic() < deadline and "cannot be reached yet" not in agent.text():
            time.sleep(0.1)
        assert "cannot be reached yet" in agent.text() and "connection refused" in agent.text(), agent.text()
        time.sleep(1.0)
        assert agent.proc.poll() is None, agent.text()  # still waiting, not exit 3
        b.start()
        agent.wait_ready()
        status = _status_now(b)
        link = status["link"]
        assert link["unreachable_at_start"] >= 1 and link["waited_for_broker_s"] > 1.0, link
        assert "answered after" in agent.text()
        # The password file others can read: a warning at start and in the status (as ssh does for keys).
        assert any("password_file" in w and "chmod 600" in w for w in status["warnings"]), status["warnings"]
        assert "can be read by group and others" in agent.text()
        assert "secret" not in agent.text()
    finally:
        rc = agent.stop()
        b.stop()
    assert rc == 0, agent.text()


def test_stopped_while_waiting_for_the_broker_exits_cleanly(tmp_path):
    b = Broker(tmp_path / "broker")
    b.stop()
    agent = AgentProc(write_setup(tmp_path, b))
    deadline = time.monotonic() + 15
    while time.monotonic() < deadline and "cannot be reached yet" not in agent.text():
        time.sleep(0.1)
    assert agent.stop() == 0, agent.text()
    assert "stopped before the broker could be reached" in agent.text()


def test_tls_without_hostname_verification_says_so_at_start_and_in_the_status(tmp_path):
    tls = make_tls(tmp_path / "tls", server_host="broker.invalid")  # a name that is not our host
    b = Broker(tmp_path / "broker", tls=tls)
    try:
        extra = f'[broker.tls]\nca_file = "{tls.ca}"\nverify_hostname = false\n'
        agent = AgentProc(write_setup(tmp_path, b, broker_extra=extra))
        try:
            agent.wait_ready()
            reader = Client(b, "reader", [STATUS], tls={"ca_certs": str(tls.ca)})
            reader.c.tls_insecure_set(True)
            reader.wait_for(lambda: reader.on(STATUS), what="status")
            warnings = reader.json_on(STATUS)[-1]["warnings"]
            reader.close()
        finally:
            rc = agent.stop()
        assert rc == 0, agent.text()
        assert any("verify_hostname = false" in w for w in warnings), warnings
        assert "verify_hostname = false" in agent.text()
    finally:
        b.stop()


def test_check_config_warns_about_a_password_file_others_can_read(tmp_path, broker):
    (tmp_path / "pw").write_text("secret\n")
    os.chmod(tmp_path / "pw", 0o640)
    cfg = write_setup(tmp_path, broker, broker_extra='username = "edge"\npassword_file = "pw"\n')
    env = dict(os.environ, PYTHONPATH=str(REPO))
    cmd = [sys.executable, "-m", "watchdog_edge.cli.app", "check-config", str(cfg)]
    out = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=60)
    assert out.returncode == 0, out.stderr
    assert "can be read by its group (mode 640)" in out.stderr and "chmod 600" in out.stderr, out.stderr
    os.chmod(tmp_path / "pw", 0o600)
    out = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=60)
    assert "password_file" not in out.stderr


def test_a_restart_completes_the_recording_a_crash_left_short(tmp_path, broker):
    # Recording lines are written after the journal commit; a crash in between leaves the
    # journal ahead of the recording. The next start writes what is missing (and removes a cut
    # line first), so the one recording holds exactly what the journal held.
    from watchdog_edge.agent.agent import Agent
    from watchdog_edge.agent.link import Inbound

    cfg = write_setup(tmp_path, broker)
    config = load_config(cfg)
    rec = tmp_path / "live.jsonl"
    agent = Agent(config, load_cards(config), record=rec)
    agent.intake_open = True
    for i in range(6):
        agent._on_message(Inbound(PRED, f'{{"id": {i}, "value": 2.0}}'.encode(), i + 1, 1, False))
        agent._process(tick=i == 3)
    journal = [(e.t, e.topic, e.payload, e.tick) for e in agent.store.journal_tail(0)]
    agent._close_files()
    lines = rec.read_bytes().splitlines(keepends=True)
    assert len(lines) == len(journal) == 7
    rec.write_bytes(b"".join(lines[:4]) + lines[4][:9])  # two rows never written, one cut
    again = Agent(config, load_cards(config), record=rec)
    again._close_files()
    got = [(ln.t, ln.topic, ln.payload, ln.tick) for ln in read_recording(rec)]
    assert got == journal
    assert os.stat(rec).st_mode & 0o777 == 0o600
