"""What the agents have published, gathered from a broker or from an agent's state file.

A message is told apart by its content, not its topic, so any topic templates and bridge
layouts work: an agent status has ``agent`` and ``connection``; a model state has ``agent``,
``model`` and ``checks``. Alerts are not retained; the state names the latest one.
"""

from __future__ import annotations

import json
import threading
import time
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion

from watchdog_edge.agent.store import read_published
from watchdog_edge.errors import BrokerError, WatchdogError

DEFAULT_FILTERS = ("watchdog/#",)


@dataclass
class FleetView:
    """The latest status per agent and state per (agent, model), with where they came from."""

    source: str
    agents: dict[str, dict[str, Any]] = field(default_factory=dict)
    models: dict[tuple[str, str], dict[str, Any]] = field(default_factory=dict)
    lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def take(self, payload: bytes | bytearray) -> str | None:
        """File one retained message; 'status', 'state' or None when it is neither."""
        try:
            doc = json.loads(payload)
        except (ValueError, UnicodeDecodeError):
            return None
        if not isinstance(doc, dict) or not isinstance(doc.get("agent"), str):
            return None
        with self.lock:
            if "connection" in doc:
                self.agents[doc["agent"]] = doc
                return "status"
            if isinstance(doc.get("model"), str) and isinstance(doc.get("checks"), dict):
                self.models[(doc["agent"], doc["model"])] = doc
                return "state"
        return None

    def copy(self) -> FleetView:
        """A consistent copy (the broker thread may be filing messages meanwhile)."""
        with self.lock:
            return FleetView(self.source, dict(self.agents), dict(self.models))


@dataclass(frozen=True)
class BrokerAccess:
    """How a reader reaches a broker; the password is read from a file, never given on the command line."""

    host: str = "127.0.0.1"
    port: int = 1883
    username: str | None = None
    password_file: Path | None = None
    ca_file: Path | None = None
    client_id: str | None = None
    password: str | None = field(default=None, repr=False)  # already read (the agent config's source)

    def client(self, mqtt5: bool = False) -> paho.Client:
        """A paho client set up with these credentials (clean session: a reader keeps no queue)."""
        if mqtt5:
            c = paho.Client(
                CallbackAPIVersion.VERSION2, client_id=self.client_id or "", protocol=MQTTProtocolVersion.MQTTv5
            )
        else:
            c = paho.Client(CallbackAPIVersion.VERSION2, client_id=self.client_id or "", clean_session=True)
        if self.username:
            password = self.password
            if self.password_file is not None:
                try:
                    password = self.password_file.read_text(encoding="utf-8").rstrip("\r\n")
                except OSError as e:
                    raise WatchdogError(
                        f"--password-file {self.password_file}: cannot read it ({e.strerror}); fix the path"
                    ) from None
            c.username_pw_set(self.username, password)
        if self.ca_file is not None:
            c.tls_set(ca_certs=str(self.ca_file))
        return c


def read_broker(
    access: BrokerAccess,
    filters: tuple[str, ...] = DEFAULT_FILTERS,
    wait_s: float = 2.0,
    quiet_s: float = 0.3,
) -> FleetView:
    """Subscribe, take the retained messages, and return once they stop coming (at most ``wait_s``).

    MQTT has no end-of-retained marker: after the SUBACK the broker sends every retained
    message at once, so ``quiet_s`` without a message ends the reading early.
    """
    view = FleetView(f"broker {access.host}:{access.port}")
    subscribed = threading.Event()
    refused: list[str] = []
    last = [time.monotonic()]

    def on_connect(c: paho.Client, u: Any, flags: Any, rc: Any, props: Any) -> None:
        if rc.is_failure:
            refused.append(str(rc))
            return
        c.subscribe([(f, 1) for f in filters])

    def on_subscribe(c: paho.Client, u: Any, mid: int, rcs: Any, props: Any) -> None:
        last[0] = time.monotonic()
        subscribed.set()

    def on_message(c: paho.Client, u: Any, msg: paho.MQTTMessage) -> None:
        last[0] = time.monotonic()
        view.take(msg.payload)

    c = access.client()
    c.on_connect = on_connect
    c.on_subscribe = on_subscribe
    c.on_message = on_message
    try:
        c.connect(access.host, access.port, keepalive=10)
    except OSError as e:
        raise BrokerError(f"cannot reach the broker at {access.host}:{access.port}: {e}") from None
    c.loop_start()
    try:
        deadline = time.monotonic() + wait_s
        while time.monotonic() < deadline and not refused:
            if subscribed.is_set() and time.monotonic() - last[0] >= quiet_s:
                break
            time.sleep(0.02)
        if refused:
            raise BrokerError(
                f"the broker at {access.host}:{access.port} refused the connection ({refused[0]}); "
                "check --user and --password-file"
            )
        if not subscribed.is_set():
            raise BrokerError(f"no answer from the broker at {access.host}:{access.port} within {wait_s} s")
    finally:
        c.disconnect()
        c.loop_stop()
    return view


def read_state_file(path: str | Path) -> FleetView:
    """The copies of the latest status and state the agent keeps in its state file (opened read-only)."""
    view = FleetView(f"state file {path}")
    for _topic, payload, _t in read_published(path):
        view.take(payload)
    return view


def age_s(ts: str | None, now: float) -> float | None:
    """Seconds from an RFC 3339 time to ``now``; None when there is no time."""
    if not ts:
        return None
    try:
        return now - datetime.fromisoformat(ts.replace("Z", "+00:00")).timestamp()
    except ValueError:
        return None
