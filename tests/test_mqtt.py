"""The paho adapter against a real mosquitto: persistent sessions, manual acks, topics, secrets."""

from __future__ import annotations

import random
import threading
import time

import paho.mqtt.client as paho
import pytest
from broker import Broker, make_tls
from paho.mqtt import __version__ as paho_version
from paho.mqtt.enums import CallbackAPIVersion

from watchdog_edge.agent.link import (
    Backoff,
    Link,
    check_topic_name,
    outbound_topic,
    read_password,
    secret_warnings,
)
from watchdog_edge.agent.link_socket import BufferedSocket
from watchdog_edge.agent.paho_private import FastClient, client_class, missing_steps
from watchdog_edge.core.settings import BrokerSettings
from watchdog_edge.errors import BrokerError, BrokerUnreachable, ConfigError


def _publish(b: Broker, topic: str, payloads: list[bytes]) -> None:
    c = paho.Client(CallbackAPIVersion.VERSION2, client_id="pub-helper")
    c.connect(b.host, b.port)
    c.loop_start()
    for p in payloads:
        c.publish(topic, p, qos=1).wait_for_publish(10)
    c.disconnect()
    c.loop_stop()


class _Taker:
    """Collects what a Link delivers; the test's thread drives the link, as the agent does."""

    def __init__(self) -> None:
        self.messages: list = []
        self.events: list = []
        self.link: Link | None = None

    def pump(self, until, timeout: float = 10.0) -> bool:
        """Poll and flush the link until ``until()`` is true; False on timeout."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if until():
                return True
            self.link.poll(0.05)
            self.link.flush()
        return until()

    def get(self, n: int, timeout: float = 10.0) -> list:
        self.pump(lambda: len(self.messages) >= n, timeout)
        out, self.messages[:] = self.messages[:n], self.messages[n:]
        return out

    def kinds(self) -> list[str]:
        return [e.kind for e in self.events]


def _broker_saw_disconnects(b: Broker, n: int, client_id: str = "wd-test", timeout: float = 10.0) -> None:
    """Wait until the broker has logged ``n`` disconnects of ``client_id``.

    A new connection with the same client id that the broker reads before the old socket's
    last bytes takes the session over and drops those bytes (PUBACKs included); the agent
    recognises such re-sent messages, these tests want to see the acks themselves arrive.
    """
    deadline = time.monotonic() + timeout
    while b.log_text().count(f"Client {client_id} disconnected") < n and time.monotonic() < deadline:
        time.sleep(0.02)
    assert b.log_text().count(f"Client {client_id} disconnected") >= n, b.log_text()[-2000:]


def _link(b: Broker, tmp_path, taker: _Taker, protocol: str = "3.1.1", fast_paho: bool = True, **kw) -> Link:
    s = BrokerSettings(
        host="localhost" if "tls" in kw else b.host,
        port=b.port,
        protocol=protocol,
        keepalive_s=5,
        reconnect_min_s=0.1,
        reconnect_max_s=0.3,
        **kw,
    )
    taker.link = Link(
        s,
        "wd-test",
        ["site/#"],
        "watchdog/agents/t/status",
        b'{"connection":"offline"}',
        tmp_path,
        taker.messages.append,
        taker.events.append,
        fast_paho=fast_paho,
    )
    return taker.link


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_persistent_session_keeps_messages_while_away_and_redelivers_unacked(broker, tmp_path, protocol):
    # MQTT 3.1.1 section 3.1.2.4 (CleanSession = 0) and MQTT 5 section 3.1.2.4 / 3.1.2.11.2 (section numbers from memory)
    # (Clean Start = 0 with a Session Expiry Interval): the server keeps the subscription and
    # queues QoS 1 messages for the client; unacknowledged ones are re-sent with DUP = 1 (4.4).
    taker = _Taker()
    link = _link(broker, tmp_path, taker, protocol)
    link.start()
    assert isinstance(link.client.socket(), BufferedSocket)  # paho opened it through our step
    _publish(broker, "site/a", [b"one"])
    first = taker.get(1)
    assert [m.payload for m in first] == [b"one"]
    link.ack(first[0].mid)
    link.flush()
    _publish(broker, "site/a", [b"two"])  # received but never acknowledged
    assert [m.payload for m in taker.get(1)] == [b"two"]
    link.stop()

    _publish(broker, "site/b", [b"three", b"four"])  # sent while the agent is away
    taker2 = _Taker()
    link2 = _link(broker, tmp_path, taker2, protocol)
    link2.start()
    got = taker2.get(3)
    assert [m.payload for m in got] == [b"two", b"three", b"four"]
    assert got[0].dup is True  # the unacknowledged one comes back marked as a re-send
    for m in got:
        link2.ack(m.mid)
    link2.flush()  # the three acks leave together
    link2.stop()
    _broker_saw_disconnects(broker, 2)

    # They were all acknowledged: a third session gets nothing back.
    taker3 = _Taker()
    link3 = _link(broker, tmp_path, taker3, protocol)
    link3.start()
    assert taker3.get(1, timeout=1.0) == []
    link3.stop()


# fast: paho's client with the private steps of agent/paho_private.py; paho: paho's own
# client, as the link runs on a paho that lacks them
@pytest.mark.parametrize("fast", [True, False], ids=["fast", "paho"])
def test_reconnects_after_a_broker_restart_and_resubscribes(broker, tmp_path, fast):
    taker = _Taker()
    link = _link(broker, tmp_path, taker, fast_paho=fast)
    link.start()
    broker.stop()
    assert taker.pump(lambda: not link.connected.is_set()), "did not notice the broker going away"
    # While the broker is down, poll returns within its timeout (the agent's ticks go on).
    t0 = time.monotonic()
    link.poll(0.1)
    assert time.monotonic() - t0 < 1.0
    broker.start()
    assert taker.pump(link.connected.is_set), "did not reconnect"
    _publish(broker, "site/x", [b"after"])
    got = taker.get(1)
    assert [m.payload for m in got] == [b"after"]
    kinds = taker.kinds()
    assert kinds.count("connected") == 2 and "disconnected" in kinds
    link.stop()


def test_publish_waits_on_paho_and_goes_out_after_reconnect(broker, tmp_path):
    taker = _Taker()
    link = _link(broker, tmp_path, taker)
    link.start()
    got: list[bytes] = []
    done = threading.Event()
    watcher = paho.Client(CallbackAPIVersion.VERSION2, client_id="w", clean_session=False)
    watcher.on_connect = lambda c, u, f, rc, p: c.subscribe("out/#", qos=1)
    watcher.on_message = lambda c, u, m: (got.append(m.payload), done.set())
    watcher.reconnect_delay_set(0.1, 0.3)
    watcher.connect(broker.host, broker.port)
    watcher.loop_start()
    time.sleep(0.3)
    broker.stop()
    assert taker.pump(lambda: not link.connected.is_set())
    mid = link.publish("out/alerts", b"held", qos=1)  # no connection now: paho keeps it
    broker.start()
    assert taker.pump(done.is_set, timeout=15), "message published while offline never arrived"
    assert got == [b"held"]
    assert taker.pump(lambda: any(e.kind == "puback" and e.mid == mid for e in taker.events), timeout=5)
    watcher.loop_stop()
    link.stop()


def test_many_messages_over_tls_arrive_whole_in_order_and_are_all_acknowledged(tmp_path):
    # TLS hands paho its data record by record; the buffered socket must still give every
    # packet back whole, in order, and the acks of a batch must reach the broker.
    tls = make_tls(tmp_path / "tls")
    b = Broker(tmp_path / "broker", tls=tls)
    try:
        taker = _Taker()
        link = _link(b, tmp_path, taker, tls={"ca_file": str(tls.ca)})
        link.start()
        assert isinstance(link.client.socket(), BufferedSocket)
        sent = [f'{{"id": {k}, "value": {k * 0.5}, "pad": "{"x" * (k % 300)}"}}'.encode() for k in range(400)]
        pub = paho.Client(CallbackAPIVersion.VERSION2, client_id="tls-pub")
        pub.tls_set(ca_certs=str(tls.ca))
        pub.connect("localhost", b.port)
        pub.loop_start()
        infos = [pub.publish("site/tls", p, qos=1) for p in sent]
        got: list = []
        while len(got) < len(sent):
            batch = taker.get(10, timeout=10)
            assert batch, f"stalled after {len(got)} messages"
            for m in batch:
                link.ack(m.mid)
            got += batch
        link.flush()
        for info in infos:
            info.wait_for_publish(10)
        pub.disconnect()
        pub.loop_stop()
        assert [m.payload for m in got] == sent
        link.stop()
        _broker_saw_disconnects(b, 1)
        taker2 = _Taker()
        link2 = _link(b, tmp_path, taker2, tls={"ca_file": str(tls.ca)})
        link2.start()
        assert taker2.get(1, timeout=1.0) == []  # nothing left unacknowledged
        link2.stop()
    finally:
        b.stop()


@pytest.mark.parametrize("protocol", ["3.1.1", "5"])
def test_on_paho_own_client_the_link_receives_acknowledges_and_publishes(broker, tmp_path, protocol):
    # The fallback path of agent/paho_private.py (no private paho step), against the broker.
    taker = _Taker()
    link = _link(broker, tmp_path, taker, protocol, fast_paho=False)
    link.start()
    assert type(link.client) is paho.Client and not isinstance(link.client.socket(), BufferedSocket)
    _publish(broker, "site/a", [b"one", b"two"])
    got = taker.get(2)
    assert [m.payload for m in got] == [b"one", b"two"]
    for m in got:
        link.ack(m.mid)
    link.flush()
    taker.pump(lambda: False, timeout=0.3)  # let the broker read the acks
    link.stop()
    _broker_saw_disconnects(broker, 1)
    # acknowledged: the next session (the fast client) gets nothing back
    taker2 = _Taker()
    link2 = _link(broker, tmp_path, taker2, protocol)
    link2.start()
    assert taker2.get(1, timeout=1.0) == []
    link2.stop()


def test_the_paho_steps_the_link_replaces_still_exist():
    # The link replaces two private steps of paho 2.x for speed (agent/paho_private.py). A paho
    # without them still works (the "paho" runs above), only slower: this fails at upgrade time.
    missing = missing_steps()
    assert not missing, (
        f"paho-mqtt {paho_version} has no {', '.join(missing)} with the expected parameters: the MQTT link "
        "falls back to paho's own client (slower). Update agent/paho_private.py to this paho, or pin paho-mqtt<2.3"
    )
    assert client_class() is FastClient and client_class(fast=False) is paho.Client


def test_unreachable_broker_gives_one_line_reason(tmp_path):
    from broker import free_port

    s = BrokerSettings(host="127.0.0.1", port=free_port())
    link = Link(s, "x", ["a"], "s", b"", tmp_path, lambda m: None, lambda e: None)
    with pytest.raises(BrokerUnreachable, match=r"connection refused\); is the broker running"):
        link.start()  # BrokerUnreachable: the agent retries it at start (a broker that boots later)


def test_an_untrusted_certificate_is_not_taken_for_an_unreachable_broker(tmp_path):
    # A certificate needs a person: the agent must exit 3, not wait for it to change.
    from watchdog_edge.core.settings import TLSSettings

    tls = make_tls(tmp_path / "tls")
    rogue = make_tls(tmp_path / "rogue", name="rogue")
    b = Broker(tmp_path / "broker", tls=tls)
    try:
        s = BrokerSettings(host="127.0.0.1", port=b.port, tls=TLSSettings(ca_file=str(rogue.ca)))
        link = Link(s, "x", ["a"], "s", b"", tmp_path, lambda m: None, lambda e: None)
        with pytest.raises(BrokerError, match="certificate") as caught:
            link.start()
        assert not isinstance(caught.value, BrokerUnreachable)
    finally:
        b.stop()


def test_secret_warnings_name_the_file_its_mode_and_the_fix(tmp_path):
    import os

    from watchdog_edge.core.settings import TLSSettings

    (tmp_path / "pw").write_text("x\n")
    (tmp_path / "client.key").write_text("k")
    os.chmod(tmp_path / "pw", 0o600)
    os.chmod(tmp_path / "client.key", 0o600)
    tls = TLSSettings(key_file="client.key", verify_hostname=True)
    s = BrokerSettings(username="u", password_file="pw", tls=tls)
    assert secret_warnings(s, tmp_path) == []
    os.chmod(tmp_path / "pw", 0o604)
    os.chmod(tmp_path / "client.key", 0o640)
    got = secret_warnings(s, tmp_path)
    assert got[0].startswith("broker.password_file = 'pw' can be read by group and others (mode 604)")
    assert got[1].startswith("broker.tls.key_file = 'client.key' can be read by its group (mode 640)")
    assert all("chmod 600" in w for w in got)
    off = BrokerSettings(tls=TLSSettings(verify_hostname=False))
    assert ["verify_hostname = false" in w for w in secret_warnings(off, tmp_path)] == [True]


def test_outbound_topics_refuse_wildcards_nul_and_empty_levels():
    # MQTT 3.1.1 section 4.7.3: topic names used to publish must not contain wildcards (section numbers from memory);
    # section 1.5.3: no U+0000.
    assert outbound_topic("watchdog/{model}/alerts", model="pump-1") == "watchdog/pump-1/alerts"
    assert outbound_topic("wd/agents/{agent}/status", agent="edge") == "wd/agents/edge/status"
    for bad in ("a+b", "a#", "x/y", "nul\x00", ""):
        with pytest.raises(BrokerError):
            outbound_topic("watchdog/{model}/alerts", model=bad)
    with pytest.raises(BrokerError, match="empty level"):
        check_topic_name("watchdog//alerts")
    with pytest.raises(BrokerError, match=r"'\+'"):
        check_topic_name("watchdog/+/alerts")
    with pytest.raises(BrokerError, match="only {model} and {agent}"):
        outbound_topic("watchdog/{site}/alerts", model="m")


def test_password_comes_from_a_file_or_the_environment(tmp_path, monkeypatch):
    (tmp_path / "pw").write_text("s3cret\n")
    assert read_password(BrokerSettings(username="u", password_file="pw"), tmp_path) == "s3cret"
    monkeypatch.setenv("WD_TEST_PW", "from-env")
    assert read_password(BrokerSettings(username="u", password_env="WD_TEST_PW"), tmp_path) == "from-env"
    with pytest.raises(ConfigError, match="WD_MISSING_PW.*not set"):
        read_password(BrokerSettings(username="u", password_env="WD_MISSING_PW"), tmp_path)
    with pytest.raises(ConfigError, match="password_file = 'nope'"):
        read_password(BrokerSettings(username="u", password_file="nope"), tmp_path)
    assert read_password(BrokerSettings(), tmp_path) is None


def test_backoff_doubles_up_to_the_cap_with_jitter_and_resets():
    b = Backoff(0.5, 4.0, random.Random(7))
    waits = [b.next() for _ in range(8)]
    caps = [0.5, 1.0, 2.0, 4.0, 4.0, 4.0, 4.0, 4.0]
    assert all(c / 2 <= w <= c for w, c in zip(waits, caps))
    assert len({round(w, 6) for w in waits[3:]}) > 1  # jitter: not all the same at the cap
    b.reset()
    assert 0.25 <= b.next() <= 0.5


def test_a_busy_spell_longer_than_the_keepalive_is_no_disconnect(tmp_path, broker):
    # The link pings after half a keepalive of silence; a caller busy for longer than a whole
    # keepalive must not be taken for a dead connection when it polls again (the broker itself
    # allows 1.5 keepalives, MQTT 3.1.1 section 3.1.2.10, from memory).
    events: list = []
    s = BrokerSettings(host=broker.host, port=broker.port, keepalive_s=5)
    link = Link(s, "busy-caller", ["a/b"], "st/busy", b"off", tmp_path, lambda m: None, events.append)
    link.start()
    time.sleep(5.5)
    for _ in range(10):
        link.poll(0.1)
        link.flush()
    assert link.connected.is_set() and not [e for e in events if e.kind == "disconnected"], events
    link.stop()
