"""The paho-mqtt adapter: a persistent QoS 1 session, reconnects, TLS, passwords, outbound topics.

It does I/O and nothing else: messages go to ``on_message``, connection changes and PUBACKs
to ``on_event``, both called from ``Link.poll`` in the caller's thread; the agent decides what
to do with them.

- Persistent session: a fixed client id; on MQTT 3.1.1 clean session off; on MQTT 5 clean start
  off with a session expiry interval (paho's own default would start clean on the first connect).
- Manual acknowledgement: ``ack(mid)`` is called by the agent only after its journal commit.
- Reconnect with exponential backoff and jitter; subscriptions are renewed on every connect.
- Few system calls: paho runs on a ``BufferedSocket`` (link_socket.py), and the PUBACKs of a
  batch leave in one write. The two private paho steps this needs live in paho_private.py;
  without them (another paho) the link runs on paho's own client, slower, the same otherwise.
- The last will sets the retained agent status to offline when the agent dies.
"""

from __future__ import annotations

import json
import logging
import os
import random
import select
import socket
import ssl
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode, MQTTProtocolVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from watchdog_edge.agent.link_socket import BufferedSocket
from watchdog_edge.agent.paho_private import client_class, missing_steps
from watchdog_edge.core.settings import BrokerSettings
from watchdog_edge.errors import BrokerError, BrokerUnreachable, ConfigError

log = logging.getLogger("watchdog_edge.agent.link")


# --- outbound topics -----------------------------------------------------------------------
def check_topic_name(topic: str) -> str:
    """Raise BrokerError unless ``topic`` is a valid topic *name* to publish to.

    A name must not be empty and must not hold the wildcards ``+`` or ``#`` or the NUL
    character (MQTT 3.1.1, sections 4.7.1 and 4.7.3); we also refuse empty levels, which
    come from an empty model id or agent name in a template.

    >>> check_topic_name("watchdog/m1/alerts")
    'watchdog/m1/alerts'
    """
    if not topic:
        raise BrokerError("outbound topic is empty; check broker.topics")
    for bad, name in (("+", "'+'"), ("#", "'#'"), ("\x00", "NUL")):
        if bad in topic:
            raise BrokerError(
                f"outbound topic {topic!r} contains {name}; model ids, agent names and "
                "broker.topics templates must not hold wildcards or NUL"
            )
    if "" in topic.split("/"):
        raise BrokerError(f"outbound topic {topic!r} has an empty level; check broker.topics and the ids in it")
    if len(topic.encode("utf-8")) > 65535:
        raise BrokerError("outbound topic is longer than MQTT allows (65535 bytes)")
    return topic


def outbound_topic(template: str, *, model: str | None = None, agent: str | None = None) -> str:
    """Fill a topic template (``{model}``, ``{agent}``) and check the result.

    Each filled-in value must be a single non-empty level without wildcards, slash or NUL.

    >>> outbound_topic("watchdog/{model}/alerts", model="pump-7")
    'watchdog/pump-7/alerts'
    """
    values = {"model": model, "agent": agent}
    for key, value in values.items():
        if "{" + key + "}" in template:
            if value is None:
                raise BrokerError(f"topic template {template!r} needs {{{key}}} but none was given")
            for bad, name in (("+", "'+'"), ("#", "'#'"), ("/", "'/'"), ("\x00", "NUL")):
                if bad in value:
                    raise BrokerError(f"{key} {value!r} cannot go into topic {template!r}: it contains {name}")
            if not value:
                raise BrokerError(f"{key} is empty and cannot go into topic {template!r}")
    try:
        topic = template.format(**{k: v for k, v in values.items() if v is not None})
    except (KeyError, IndexError, ValueError) as e:
        raise BrokerError(
            f"topic template {template!r} is malformed ({e}); only {{model}} and {{agent}} are known"
        ) from None
    return check_topic_name(topic)


# --- secrets -------------------------------------------------------------------------------


def client_tls(client: Any, settings: BrokerSettings, base_dir: Path) -> None:
    """Set up TLS on a paho client from ``broker.tls`` (paths relative to the config); nothing without it."""
    tls = settings.tls
    if tls is None:
        return

    def path(p: str | None) -> str | None:
        if p is None:
            return None
        q = Path(p).expanduser()
        full = q if q.is_absolute() else base_dir / q
        if not full.exists():
            raise ConfigError(f"broker.tls: file {p!r} does not exist (looked at {full})")
        return str(full)

    try:
        client.tls_set(
            ca_certs=path(tls.ca_file),
            certfile=path(tls.cert_file),
            keyfile=path(tls.key_file),
            cert_reqs=ssl.CERT_REQUIRED,
            tls_version=ssl.PROTOCOL_TLS_CLIENT,
        )
    except (ssl.SSLError, OSError) as e:
        raise ConfigError(f"broker.tls: cannot load the certificates or key ({e}); check the files") from None
    client.tls_insecure_set(not tls.verify_hostname)


def read_password(settings: BrokerSettings, base_dir: Path) -> str | None:
    """The broker password from ``password_file`` or ``password_env``; never from the command line."""
    if settings.password_file:
        p = Path(settings.password_file).expanduser()
        p = p if p.is_absolute() else base_dir / p
        try:
            text = p.read_text(encoding="utf-8")
        except OSError as e:
            raise ConfigError(
                f"broker.password_file = {settings.password_file!r}: cannot read it ({e.strerror}); "
                "create the file or fix the path"
            ) from None
        return text.rstrip("\r\n")
    if settings.password_env:
        value = os.environ.get(settings.password_env)
        if value is None:
            raise ConfigError(
                f"broker.password_env = {settings.password_env!r}: that environment variable is not "
                "set; export it before starting the agent"
            )
        return value
    return None


def secret_warnings(settings: BrokerSettings, base_dir: Path) -> list[str]:
    """Warnings about how the broker's secrets are set up: files others can read, hostname checks off.

    A password or key file that group or others can read is reported the way ssh reports a
    private key with loose permissions; TLS without hostname verification accepts any
    certificate the CA signed, for any host.
    """
    out: list[str] = []
    files: list[tuple[str, str | None]] = [("broker.password_file", settings.password_file)]
    if settings.tls is not None:
        files.append(("broker.tls.key_file", settings.tls.key_file))
    for key, name in files:
        if not name:
            continue
        p = Path(name).expanduser()
        p = p if p.is_absolute() else base_dir / p
        try:
            mode = p.stat().st_mode & 0o777
        except OSError:
            continue  # a missing file is an error elsewhere
        if mode & 0o077:
            out.append(
                f"{key} = {name!r} can be read by {'group and others' if mode & 0o007 else 'its group'} "
                f"(mode {mode:o}); make it private to the agent's user: chmod 600 {p}"
            )
    if settings.tls is not None and not settings.tls.verify_hostname:
        out.append(
            "broker.tls.verify_hostname = false: the broker's certificate is not checked against "
            f"broker.host ({settings.host}); any certificate the CA signed is accepted. Turn it on "
            "unless the certificate cannot name the host"
        )
    return out


# --- backoff -------------------------------------------------------------------------------
class Backoff:
    """Exponential backoff with jitter: the n-th wait is uniform in [d/2, d], d = min(max, base * 2^n).

    Jitter spreads the reconnects of many gateways after a broker restart (common practice,
    no single source).

    >>> b = Backoff(1.0, 8.0, random.Random(1))
    >>> [round(b.next(), 2) <= d for d in (1, 2, 4, 8, 8)]
    [True, True, True, True, True]
    """

    def __init__(self, base: float, cap: float, rng: random.Random | None = None) -> None:
        self.base, self.cap = base, max(cap, base)
        self.attempt = 0
        self._rng = rng or random.Random()

    def next(self) -> float:
        d = min(self.cap, self.base * (2 ** min(self.attempt, 30)))
        self.attempt += 1
        return d * (0.5 + 0.5 * self._rng.random())

    def reset(self) -> None:
        self.attempt = 0


# --- the link ------------------------------------------------------------------------------
class Inbound(NamedTuple):
    """A received PUBLISH as the agent needs it (a tuple: one is made for every message)."""

    topic: str
    payload: bytes
    mid: int
    qos: int
    dup: bool


@dataclass(frozen=True, slots=True)
class LinkEvent:
    """Something the agent should know: ``connected``, ``refused``, ``disconnected``, ``unreachable``,
    ``puback``, ``publish_refused`` (MQTT 5) or ``subscribe_refused``."""

    kind: str
    detail: str = ""
    mid: int = 0
    session_present: bool = False


def describe_failure(e: BaseException, host: str, port: int) -> str:
    """One line saying why a connection attempt failed and what to check."""
    where = f"{host}:{port}"
    if isinstance(e, ssl.SSLCertVerificationError):
        reason = e.verify_message or str(e)
        return (
            f"TLS certificate of the broker at {where} was not accepted: {reason}; "
            "check broker.tls.ca_file and that broker.host matches the certificate"
        )
    if isinstance(e, ssl.SSLError):
        return f"TLS handshake with {where} failed: {e.reason or e}; check broker.tls (certificates, key, TLS port)"
    if isinstance(e, ConnectionRefusedError):
        return f"nothing accepts connections at {where} (connection refused); is the broker running on that port?"
    if isinstance(e, socket.gaierror):
        return f"cannot resolve broker host {host!r}: {e.strerror}"
    if isinstance(e, (socket.timeout, TimeoutError)):
        return f"no answer from {where} in time; check broker.host, broker.port and the network"
    if isinstance(e, OSError):
        return f"cannot reach {where}: {e.strerror or e}"
    return f"cannot connect to {where}: {e}"


def describe_refusal(reason: Any, host: str, port: int) -> str:
    """One line for a CONNACK that refused us (bad password, not authorised, ...)."""
    text = str(reason)
    hint = ""
    low = text.lower()
    if "user name" in low or "password" in low or "authoriz" in low or "authentic" in low:
        hint = "; check broker.username and the password in broker.password_file or broker.password_env"
    elif "identifier" in low:
        hint = "; check broker.client_id"
    return f"broker at {host}:{port} refused the connection: {text}{hint}"


def _no_op(*args: Any) -> None:
    return None


class Link:
    """One persistent MQTT session for the agent, driven from the caller's thread.

    Nothing runs behind the caller's back: ``poll`` waits for traffic and reads it (paho's
    callbacks run there, so ``on_message`` and ``on_event`` are called from ``poll``) and
    keeps the session alive; ``ack`` and ``publish`` queue packets that ``flush`` writes in
    one system call. When the connection is lost, ``poll`` reconnects with backoff and
    jitter; the blocking part of a reconnect (name lookup, TCP, TLS handshake) runs in a
    short-lived thread, so that the caller's timers keep running meanwhile.
    """

    def __init__(
        self,
        settings: BrokerSettings,
        client_id: str,
        subscriptions: list[str],
        will_topic: str,
        will_payload: bytes,
        base_dir: Path,
        on_message: Callable[[Inbound], None],
        on_event: Callable[[LinkEvent], None],
        *,
        fast_paho: bool = True,
    ) -> None:
        """``fast_paho=False`` builds paho's own client, as when paho lacks the steps of paho_private.py."""
        self.settings = settings
        self.client_id = client_id
        self.subscriptions = list(subscriptions)
        self.on_message = on_message
        self.on_event = on_event
        self.connected = threading.Event()
        self._first_result: str | None = None
        self._first_done = False
        self._closing = False
        self._delivered = 0
        self._attempt: threading.Thread | None = None
        self._attempt_error: BaseException | None = None
        self._sub_mids: dict[int, list[str]] = {}
        self._next_attempt = 0.0
        self.backoff = Backoff(settings.reconnect_min_s, settings.reconnect_max_s)
        v5 = settings.protocol == "5"
        self.v5 = v5
        kwargs: dict[str, Any] = dict(
            callback_api_version=CallbackAPIVersion.VERSION2,
            client_id=client_id,
            protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311,
            manual_ack=True,
        )
        if not v5:
            kwargs["clean_session"] = False
        cls = client_class(fast_paho)
        if fast_paho and cls is paho.Client:
            log.warning(
                "the installed paho-mqtt lacks %s: the MQTT link runs on paho's own client, slower; "
                "paho-mqtt 2.0 to 2.2 has them",
                ", ".join(missing_steps()),
            )
        c = cls(**kwargs)
        # A fresh process holds no unacknowledged outbound messages of its own; the outbox
        # re-sends what waited on disk. Inside one process paho re-sends in-flight QoS 1
        # messages after a reconnect (MQTT 3.1.1, 4.4).
        c.max_queued_messages_set(0)
        client_tls(c, settings, base_dir)
        password = read_password(settings, base_dir)
        if settings.username is not None:
            c.username_pw_set(settings.username, password)
        elif password is not None:
            raise ConfigError(
                "broker.password_file or broker.password_env is set but broker.username is not; set broker.username"
            )
        c.will_set(check_topic_name(will_topic), will_payload, qos=1, retain=True)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_message = self._on_message
        c.on_publish = self._on_publish
        c.on_subscribe = self._on_subscribe
        # With these two set (paho's interface for an outside event loop) paho only queues
        # packets and ``flush`` writes them; without them paho writes each packet at once.
        c.on_socket_register_write = _no_op
        c.on_socket_unregister_write = _no_op
        self.client = c

    # --- paho callbacks (inside poll) --------------------------------------------------------
    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        if reason_code.is_failure:
            detail = describe_refusal(reason_code, self.settings.host, self.settings.port)
            if not self._first_done:
                self._first_result = detail
                self._first_done = True
            self.on_event(LinkEvent("refused", detail))
            return
        self.backoff.reset()
        for flt in self.subscriptions:
            _, mid = client.subscribe(flt, qos=1)
            self._sub_mids[mid] = [flt]
        self.connected.set()
        if not self._first_done:
            self._first_result = None
            self._first_done = True
        self.on_event(LinkEvent("connected", session_present=bool(flags.session_present)))

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        was = self.connected.is_set()
        self.connected.clear()
        if was:
            self.on_event(LinkEvent("disconnected", str(reason_code)))

    def _on_message(self, client, userdata, msg) -> None:
        self._delivered += 1
        self.on_message(Inbound(msg.topic, msg.payload, msg.mid, msg.qos, msg.dup))

    def _on_publish(self, client, userdata, mid, reason_code, properties) -> None:
        # MQTT 5 PUBACKs carry a reason code (3.4.2.1): 0x87 "Not authorized" is how a broker
        # says its ACL dropped the message. MQTT 3.1.1 has no such code, so there a denied
        # publish looks delivered.
        if getattr(reason_code, "is_failure", False):
            self.on_event(LinkEvent("publish_refused", str(reason_code), mid=mid))
        else:
            self.on_event(LinkEvent("puback", str(reason_code), mid=mid))

    def _on_subscribe(self, client, userdata, mid, reason_codes, properties) -> None:
        # SUBACK return code 0x80 (MQTT 3.1.1, 3.9.3) or a v5 reason code >= 0x80: refused.
        refused = [
            f"{flt} ({rc})"
            for flt, rc in zip(self._sub_mids.pop(mid, []), reason_codes)
            if getattr(rc, "is_failure", False)
        ]
        if refused:
            self.on_event(LinkEvent("subscribe_refused", ", ".join(refused)))

    # --- connection --------------------------------------------------------------------------
    def _connect_args(self) -> dict[str, Any]:
        s = self.settings
        args: dict[str, Any] = dict(host=s.host, port=s.port, keepalive=s.keepalive_s)
        if self.v5:
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = s.session_expiry_s
            args.update(clean_start=False, properties=props)
        return args

    def start(self, timeout: float = 15.0) -> None:
        """Connect once and wait for the CONNACK; raise BrokerError with a one-line reason if refused.

        ``BrokerUnreachable`` (a BrokerError) when nothing answered at the address, which a
        caller may retry; any other BrokerError needs a person (password, certificate, port).

        Messages the broker kept for the session may already arrive (through ``on_message``)
        before this returns.
        """
        s = self.settings
        try:
            self.client.connect(**self._connect_args())
        except ssl.SSLError as e:  # a certificate or TLS setting: a person must fix it
            raise BrokerError(describe_failure(e, s.host, s.port)) from None
        except OSError as e:  # refused, no route, no name yet, timeout: the broker may come later
            raise BrokerUnreachable(describe_failure(e, s.host, s.port)) from None
        deadline = time.monotonic() + timeout
        while not self._first_done and time.monotonic() < deadline:
            self.poll(0.05)
        if not self._first_done:
            self.stop(clean=False)
            raise BrokerError(
                f"broker at {s.host}:{s.port} did not answer the connect within {timeout:.0f} s "
                "(is it an MQTT port? does it need TLS?)"
            )
        if self._first_result is not None:
            self.stop(clean=False)
            raise BrokerError(self._first_result)

    def poll(self, timeout: float, max_messages: int = 1000) -> None:
        """Wait up to ``timeout`` s for traffic, read what came (about ``max_messages`` at most), keep alive.

        While the connection is down it reconnects (with backoff) instead, and returns within
        ``timeout`` as well.
        """
        c = self.client
        sock = c.socket()
        if self._attempt is not None or sock is None:
            self._reconnect_step(timeout)
            return
        buffered = sock if isinstance(sock, BufferedSocket) else None
        if not (buffered is not None and (buffered.pending() > 0 or buffered.error is not None)):
            try:
                readable, writable, _ = select.select([sock], [sock] if self.want_write() else [], [], timeout)
            except (OSError, ValueError):
                readable, writable = [sock], []  # the read below finds out what is wrong
            if writable:
                self.flush()
                if c.socket() is None:
                    return
            if not readable:
                self._misc()
                return
        self._delivered = 0
        while True:
            rc = c.loop_read()
            if rc != MQTTErrorCode.MQTT_ERR_SUCCESS or c.socket() is None:
                self._lost(rc)
                return
            if self._delivered >= max_messages or buffered is None or buffered.pending() <= 0:
                break
        self._misc()

    def _misc(self) -> None:
        c = self.client
        if c.socket() is None:
            return
        self._ping_early()
        rc = c.loop_misc()  # keepalive: a PINGREQ, or a dead connection noticed
        if rc != MQTTErrorCode.MQTT_ERR_SUCCESS or c.socket() is None:
            self._lost(rc)
        elif self.want_write():
            self.flush()

    def _ping_early(self) -> None:
        """Send the PINGREQ after half a keepalive without a byte from the broker.

        paho pings only after a whole keepalive of silence and gives up one more keepalive
        later, so a frozen connection (a stalled link, a half-dead NAT) went unnoticed for up
        to two keepalives. Pinging at half makes paho's own check close it once a whole
        keepalive has passed without an answer. It reads paho 2's private timers; with a
        paho without them, paho's own timing applies.
        """
        c = self.client
        last = getattr(c, "_last_bytes_received", None)
        ping_t = getattr(c, "_ping_t", None)
        keepalive = getattr(c, "_keepalive", 0)
        if last is None or ping_t != 0 or not keepalive or not self.connected.is_set():
            return
        # Past a whole keepalive already (the caller's loop was busy that long): leave it to
        # paho, which pings first and only then waits, so a busy spell is no disconnect.
        if keepalive / 2 <= paho.time_func() - last < keepalive:
            try:
                c._send_pingreq()
            except Exception:
                return  # paho's own check finds out what is wrong
            # The PINGREQ is a packet out: without this, paho's check, seeing nothing sent for
            # a keepalive, would treat the wait as fresh and start the silence over.
            c._last_msg_out = paho.time_func()

    def _lost(self, rc: MQTTErrorCode) -> None:
        # paho has closed the socket (and called on_disconnect) by now.
        if self.connected.is_set():
            self.connected.clear()
            self.on_event(LinkEvent("disconnected", paho.error_string(rc)))
        if not self._first_done:
            s = self.settings
            self._first_result = (
                f"broker at {s.host}:{s.port} closed the connection before "
                f"accepting it ({paho.error_string(rc)}); check TLS and credentials"
            )
            self._first_done = True
        self._next_attempt = time.monotonic() + self.backoff.next()

    def _reconnect_step(self, timeout: float) -> None:
        attempt = self._attempt
        if attempt is not None:
            attempt.join(timeout)
            if attempt.is_alive():
                return
            self._attempt = None
            err = self._attempt_error
            if err is not None:
                s = self.settings
                self.on_event(LinkEvent("unreachable", describe_failure(err, s.host, s.port)))
                self._next_attempt = time.monotonic() + self.backoff.next()
            return
        if self._closing or not self._first_done:
            time.sleep(timeout)
            return
        wait = self._next_attempt - time.monotonic()
        if wait > timeout:
            time.sleep(timeout)
            return
        if wait > 0:
            time.sleep(wait)
        self._attempt_error = None
        self._attempt = threading.Thread(target=self._reconnect, name="mqtt-reconnect", daemon=True)
        self._attempt.start()

    def _reconnect(self) -> None:
        # The only code that touches the client outside the caller's thread: the caller
        # leaves the client alone until this thread has ended (see poll, flush, publish).
        try:
            self.client.reconnect()
        except Exception as e:
            self._attempt_error = e

    def stop(self, clean: bool = True, timeout: float = 3.0) -> None:
        """Disconnect with a DISCONNECT packet, so the broker does not publish the will."""
        self._closing = True
        self.connected.clear()
        if self._attempt is not None:
            self._attempt.join(timeout)
            if self._attempt.is_alive():
                return  # still connecting (a slow name lookup, say): leave the client to it
            self._attempt = None
        c = self.client
        if c.socket() is None:
            return
        sock = c.socket()
        if isinstance(sock, BufferedSocket):
            sock.expect_close()
        try:
            c.disconnect()
        except Exception:
            return
        deadline = time.monotonic() + (timeout if clean else 0.5)
        while c.socket() is not None and time.monotonic() < deadline:
            self.flush()  # writing the DISCONNECT closes the socket
            if c.socket() is not None:
                self.poll(0.02)

    # --- traffic -------------------------------------------------------------------------------
    def want_write(self) -> bool:
        """True when packets wait to be written (``flush`` writes them)."""
        c = self.client
        if c.want_write():
            return True
        sock = c.socket()
        return isinstance(sock, BufferedSocket) and sock.has_output()

    def flush(self) -> None:
        """Write the queued packets (acks, publishes, pings) without blocking."""
        c = self.client
        if self._attempt is not None or c.socket() is None:
            return
        if c.want_write():
            rc = c.loop_write()
            if rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
                self._lost(rc)
                return
        sock = c.socket()  # None once a DISCONNECT went out
        if isinstance(sock, BufferedSocket):
            sock.flush()

    def ack(self, mid: int, qos: int = 1) -> None:
        """Queue the acknowledgement of an inbound message (after the journal commit).

        Without a connection it is dropped: the broker sends the message again, marked DUP.
        """
        if qos > 0 and self.connected.is_set():
            self.client.ack(mid, qos)

    def publish(self, topic: str, payload: bytes, qos: int = 1, retain: bool = False) -> int:
        """Queue a PUBLISH; returns its mid (the PUBACK arrives as a ``puback`` event)."""
        if self._attempt is not None:
            self._attempt.join()
            self._reconnect_step(0.0)
        info = self.client.publish(topic, payload, qos=qos, retain=retain)
        # Without a connection (or losing it right now) paho keeps a QoS 1 message and sends
        # it after the reconnect; only a refusal of the message itself is an error.
        if info.rc not in (
            MQTTErrorCode.MQTT_ERR_SUCCESS,
            MQTTErrorCode.MQTT_ERR_NO_CONN,
            MQTTErrorCode.MQTT_ERR_CONN_LOST,
        ):
            raise BrokerError(f"cannot publish to {topic!r}: {paho.error_string(info.rc)}")
        return info.mid


def status_payload(agent: str, state: str, **fields: Any) -> bytes:
    """The retained agent status as JSON bytes (``connection`` is ``online`` or ``offline``)."""
    return json.dumps({"agent": agent, "connection": state, **fields}, separators=(",", ":")).encode()
