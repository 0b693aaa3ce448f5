"""``watchdog-edge page`` as a real subprocess for tests, and small HTTP and MQTT helpers around it."""

from __future__ import annotations

import base64
import json
import os
import signal
import socket
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
from broker import Broker, free_port
from paho.mqtt.enums import CallbackAPIVersion

REPO = Path(__file__).resolve().parents[1]


class PageProc:
    """The page process on a free port, reading ``broker``; stopped by its process id."""

    def __init__(self, folder: Path, broker: Broker | None, *extra: str, env: dict[str, str] | None = None) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        self.port = free_port()
        self.log = folder / f"page-{time.monotonic_ns()}.log"
        self._fh = open(self.log, "w")
        e = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        e.update(env or {})
        args = [sys.executable, "-m", "watchdog_edge.cli.app", "page", "--port", str(self.port)]
        if broker is not None:
            args += ["--broker", f"127.0.0.1:{broker.port}"]
        if "--history" not in extra:
            args += ["--history", str(folder / "page.sqlite")]
        self.proc = subprocess.Popen([*args, *extra], stdout=self._fh, stderr=subprocess.STDOUT, env=e, cwd=folder)
        self.url = f"http://127.0.0.1:{self.port}/"

    def text(self) -> str:
        if not self._fh.closed:
            self._fh.flush()
        return self.log.read_text()

    def wait_ready(self, timeout: float = 20.0, broker: bool = True) -> PageProc:
        """Until it listens and (with ``broker``) has subscribed."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise AssertionError(f"page process exited with {self.proc.returncode}:\n{self.text()}")
            if not broker or "connected to the broker" in self.text():
                try:
                    with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                        return self
                except OSError:
                    pass
            time.sleep(0.05)
        raise AssertionError(f"page process not ready in {timeout} s:\n{self.text()}")

    def wait_exit(self, timeout: float = 20.0) -> int:
        try:
            return self.proc.wait(timeout)
        finally:
            self._fh.close()

    def stop(self, timeout: float = 20.0) -> int:
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGTERM)
        try:
            rc = self.proc.wait(timeout)
        finally:
            if self.proc.poll() is None:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(5)
            if not self._fh.closed:
                self._fh.close()
        return rc

    def rss_kb(self) -> int:
        for line in Path(f"/proc/{self.proc.pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
        raise AssertionError("no VmRSS line")


def http(
    url: str,
    method: str = "GET",
    auth: tuple[str, str] | None = None,
    bearer: str | None = None,
    context: Any = None,
) -> tuple[int, dict[str, str], bytes]:
    """One request with the standard library's client; (status, headers, body), also for 4xx."""
    req = urllib.request.Request(url, method=method, data=b"x=1" if method in ("POST", "PUT") else None)
    if auth:
        req.add_header("Authorization", "Basic " + base64.b64encode(f"{auth[0]}:{auth[1]}".encode()).decode())
    if bearer:
        req.add_header("Authorization", f"Bearer {bearer}")
    try:
        with urllib.request.urlopen(req, timeout=10, context=context) as r:
            return r.status, dict(r.headers), r.read()
    except urllib.error.HTTPError as e:
        return e.code, dict(e.headers), e.read()


def publish(broker: Broker, messages: list[tuple[str, Any, bool]], client_id: str = "test-publisher") -> None:
    """Publish ``(topic, payload, retain)`` at QoS 1 and wait for every PUBACK; dicts go as JSON."""
    c = paho.Client(CallbackAPIVersion.VERSION2, client_id=client_id, clean_session=True)
    c.connect(broker.host, broker.port, keepalive=10)
    c.loop_start()
    try:
        infos = []
        for topic, payload, retain in messages:
            data = json.dumps(payload).encode() if isinstance(payload, (dict, list)) else payload
            infos.append(c.publish(topic, data, qos=1, retain=retain))
        for info in infos:
            info.wait_for_publish(10)
            assert info.is_published()
    finally:
        c.disconnect()
        c.loop_stop()


def state_payload(
    model: str,
    t: float,
    live: float,
    level: str = "normal",
    agent: str = "edge-1",
    planned: dict | None = None,
    expected: float = 1.0,
    width: float = 0.15,
) -> dict:
    """A retained model state shaped as the agent publishes it (Monitor.state plus agent and ts)."""
    from watchdog_edge.core.events import rfc3339

    return {
        "model": model,
        "model_version": "v3",
        "pairs": 500,
        "stale_pairs": 0,
        "expected_loss": expected,
        "expected_source": "holdout",
        "loss": "squared",
        "checks": {
            "gap": {
                "level": level,
                "figures": {
                    "live_loss": live,
                    "lower": live * (1 - width),
                    "upper": live * (1 + width),
                    "confidence": 0.95,
                    "expected_loss": expected,
                    "warning_limit": expected * 1.25,
                    "critical_limit": expected * 2.0,
                    "pairs": 500,
                    "level": level,
                },
            },
            "range": {"level": "normal", "figures": {}},
            "shift": {"level": "normal", "figures": {}},
            "feed_stop": {"level": "normal", "figures": {}},
        },
        "pairing": {},
        "pending": 3,
        "planned_work": planned,
        "agent": agent,
        "ts": rfc3339(t),
    }


def alert_payload(
    model: str,
    t: float,
    alert_id: str,
    severity: str = "warning",
    state: str = "raised",
    live: float = 1.9,
    lower: float = 1.6,
    limit: float = 1.25,
) -> dict:
    """An alert shaped as the agent publishes it (expected loss 1)."""
    from watchdog_edge.core.events import rfc3339

    return {
        "alert_id": alert_id,
        "agent": "edge-1",
        "model": model,
        "model_version": "v3",
        "check": "gap",
        "state": state,
        "severity": severity,
        "ts": rfc3339(t),
        "summary": (
            f"Live mean squared error {live:g} over 500 pairs (lower 95% bound {lower:g}) is above the {severity} "
            f"limit {limit:g} "
            "set from the expected 1 (held-out loss); appeared after a healthy period: the model or its inputs "
            "have degraded."
        ),
        "figures": {"live_loss": live, "lower": lower},
        "episode": f"ep-{alert_id}",
    }


def status_payload(agent: str, connection: str = "online", heartbeat: float | None = None) -> dict:
    """An agent status shaped as the agent publishes it."""
    from watchdog_edge.core.events import rfc3339

    return {
        "agent": agent,
        "connection": connection,
        "version": "0.1.0",
        "heartbeat": rfc3339(time.time() if heartbeat is None else heartbeat),
        "received": 12840,
        "alerts_sent": 3,
        "outbox_depth": 0,
        "bad_total": 2,
    }
