"""Publish a simulated run live over MQTT (paho-mqtt 2.x, QoS 1), paced by the wall clock.

The payloads are exactly those of the recording for the same seed; only the pacing changes:
the message due at simulated time ``t`` goes out at ``wall_start + (t - run start) / speed``.
"""

from __future__ import annotations

import os
import threading
import time
from collections.abc import Callable

import paho.mqtt.client as mqtt

from watchdog_edge.errors import BrokerError

from .generate import Message

# paho queues QoS 1 messages beyond its in-flight window; waiting on the oldest keeps the
# queue (and our memory) bounded when the broker is slower than the schedule.
_MAX_PENDING = 200


def parse_broker(text: str) -> tuple[str, int]:
    """``"HOST:PORT"`` (or ``"HOST"``, port 1883) as a pair.

    >>> parse_broker("127.0.0.1:18830")
    ('127.0.0.1', 18830)
    """
    host, sep, port = text.rpartition(":")
    if not sep:
        return text, 1883
    try:
        p = int(port)
    except ValueError:
        raise BrokerError(f"--broker {text!r}: the port {port!r} is not a number; give HOST:PORT") from None
    if not 1 <= p <= 65535 or not host:
        raise BrokerError(f"--broker {text!r}: give HOST:PORT with a port from 1 to 65535")
    return host.strip("[]"), p


def publish_live(
    messages: list[Message],
    host: str,
    port: int,
    speed: float = 1.0,
    client_id: str | None = None,
    start_t: float | None = None,
    on_progress: Callable[[int], None] | None = None,
    connect_timeout: float = 10.0,
) -> int:
    """Publish ``messages`` at QoS 1 on their topics, paced at ``speed`` x real time.

    Returns the number of messages the broker acknowledged (PUBACK). Raises BrokerError when
    the broker cannot be reached or refuses the connection.
    """
    if speed <= 0:
        raise BrokerError(f"--speed must be positive, got {speed}")
    connected = threading.Event()
    refused: list[str] = []

    def on_connect(client, userdata, flags, reason_code, properties):
        if reason_code.is_failure:
            refused.append(str(reason_code))
        connected.set()

    client = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2, client_id=client_id or f"watchdog-sim-{os.getpid()}", protocol=mqtt.MQTTv311
    )
    client.on_connect = on_connect
    try:
        client.connect(host, port, keepalive=30)
    except OSError as e:
        raise BrokerError(f"cannot reach the broker at {host}:{port}: {e}; is it running?") from None
    client.loop_start()
    try:
        if not connected.wait(connect_timeout):
            raise BrokerError(f"the broker at {host}:{port} did not answer CONNECT within {connect_timeout:g} s")
        if refused:
            raise BrokerError(f"the broker at {host}:{port} refused the connection: {refused[0]}")
        if not messages:
            return 0
        t0 = messages[0].t if start_t is None else start_t
        wall0 = time.monotonic()
        pending: list[mqtt.MQTTMessageInfo] = []
        acked = 0
        for i, m in enumerate(messages):
            delay = wall0 + (m.t - t0) / speed - time.monotonic()
            if delay > 0:
                time.sleep(delay)
            info = client.publish(m.topic, m.payload, qos=1)
            if info.rc != mqtt.MQTT_ERR_SUCCESS and info.rc != mqtt.MQTT_ERR_NO_CONN:
                raise BrokerError(f"publish to {m.topic!r} failed: {mqtt.error_string(info.rc)}")
            pending.append(info)
            while len(pending) > _MAX_PENDING:
                pending.pop(0).wait_for_publish(30.0)
                acked += 1
            if on_progress is not None:
                on_progress(i + 1)
        for info in pending:
            info.wait_for_publish(30.0)
            if not info.is_published():
                raise BrokerError(f"the broker at {host}:{port} did not acknowledge a QoS 1 message within 30 s")
            acked += 1
        return acked
    finally:
        client.disconnect()
        client.loop_stop()
