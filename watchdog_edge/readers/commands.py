"""The one thing an operator writes: a planned-work command, then a look at the agent's status.

The command goes out over MQTT 5 at QoS 1, so that a broker which refuses it (the ACL lets
only operators publish on the command topic) says so in its PUBACK reason code rather than
dropping it in silence, as MQTT 3.1.1 brokers must. Then the agent's retained status is
read until it shows the window begun or ended: the agent answers a command only there (and
sets a bad one aside as a dead letter with reason ``bad_command``).
"""

from __future__ import annotations

import json
import threading
import time
from typing import Any

from watchdog_edge.errors import BrokerError
from watchdog_edge.readers.fleet import BrokerAccess

COMMAND_TEMPLATE = "watchdog/agents/{agent}/commands/planned-work"
STATUS_TEMPLATE = "watchdog/agents/{agent}/status"


def command_doc(
    action: str,
    name: str,
    duration_s: float | None = None,
    until: str | None = None,
    models: list[str] | None = None,
    reason: str = "",
    by: str | None = None,
) -> dict[str, Any]:
    """The command message as the agent reads it (core/planned.py).

    >>> command_doc("begin", "flush", duration_s=600, models=["pump"])
    {'action': 'begin', 'name': 'flush', 'duration_s': 600, 'models': ['pump']}
    """
    doc: dict[str, Any] = {"action": action, "name": name}
    if duration_s is not None:
        doc["duration_s"] = duration_s
    if until is not None:
        doc["until"] = until
    if models:
        doc["models"] = list(models)
    if reason:
        doc["reason"] = reason
    if by:
        doc["by"] = by
    return doc


def send_command(
    access: BrokerAccess, command_topic: str, status_topic: str, doc: dict[str, Any], wait_s: float = 5.0
) -> bool | None:
    """Publish ``doc`` and watch the agent's status; True when it shows the change, None when unseen or unwatched.

    Raises BrokerError when the broker cannot be reached or refuses the command.
    """
    c = access.client(mqtt5=True)
    connected = threading.Event()
    subscribed = threading.Event()
    published = threading.Event()
    refusal: list[str] = []
    statuses: list[dict[str, Any]] = []  # live updates only: the retained copy predates the command
    lock = threading.Lock()

    def on_connect(client: Any, u: Any, flags: Any, rc: Any, props: Any) -> None:
        if rc.is_failure:
            refusal.append(f"the broker refused the connection ({rc})")
        else:
            client.subscribe(status_topic, qos=1)
        connected.set()

    def on_subscribe(client: Any, u: Any, mid: int, rcs: Any, props: Any) -> None:
        subscribed.set()

    def on_publish(client: Any, u: Any, mid: int, rc: Any, props: Any) -> None:
        if rc.is_failure:
            refusal.append(f"the broker refused the command ({rc})")
        published.set()

    def on_message(client: Any, u: Any, msg: Any) -> None:
        if msg.retain:
            return
        try:
            doc_ = json.loads(msg.payload)
        except ValueError:
            return
        if isinstance(doc_, dict):
            with lock:
                statuses.append(doc_)

    c.on_connect = on_connect
    c.on_subscribe = on_subscribe
    c.on_publish = on_publish
    c.on_message = on_message
    try:
        c.connect(access.host, access.port, keepalive=10, clean_start=True)
    except OSError as e:
        raise BrokerError(f"cannot reach the broker at {access.host}:{access.port}: {e}") from None
    c.loop_start()
    try:
        if not connected.wait(10) or refusal:
            raise BrokerError(refusal[0] if refusal else f"no answer from the broker at {access.host}:{access.port}")
        subscribed.wait(5)  # so that the agent's answer cannot pass before we listen
        c.publish(command_topic, json.dumps(doc).encode(), qos=1)
        if not published.wait(10):
            raise BrokerError("the broker did not acknowledge the command within 10 s")
        if refusal:
            raise BrokerError(
                f"{refusal[0]} on {command_topic}; only an operator account may publish planned-work commands"
            )
        if wait_s <= 0:
            return None
        deadline = time.monotonic() + wait_s
        while time.monotonic() < deadline:
            with lock:
                seen = [_shows(s, doc) for s in statuses]
            if any(seen):
                return True
            time.sleep(0.05)
        return None
    finally:
        c.disconnect()
        c.loop_stop()


def _shows(status: dict[str, Any], doc: dict[str, Any]) -> bool:
    names = {w.get("name") for w in status.get("planned_work") or [] if isinstance(w, dict)}
    return (doc["name"] in names) == (doc["action"] == "begin") and status.get("connection") == "online"
