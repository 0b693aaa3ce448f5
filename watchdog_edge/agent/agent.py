"""The live agent: MQTT in, journal, core, outbox, retained state and status.

The rules of this file, in the order a message meets them:

1. One thread does the work. ``Link.poll`` waits for traffic and reads what has come; paho's
   callbacks only append the messages and connection events to two lists. There is no
   queue between threads and no second thread contending for the interpreter lock (only a
   reconnect's blocking connect runs in a short-lived thread, see mqtt.py). A signal
   handler only sets a flag.
2. The messages are taken in small batches (``agent.journal_batch_max_messages``, and no longer than
   ``agent.journal_batch_ms`` of work): each gets its receive time ``t`` and goes through
   ``Monitor.feed``; a due timer tick goes through ``Monitor.tick``. Journal rows, the alerts
   they caused (outbox) and the dead letters are committed in ONE transaction; only then are
   the messages acknowledged (manual PUBACK, all of a batch in one write) and the alerts
   published. Acks are never held back for a snapshot.
3. An alert leaves the outbox only when its PUBACK arrives. On every connect the outbox rows
   that paho does not hold in flight are published again, with the same ``alert_id``; while
   the broker is away, alerts only wait in the outbox (ticks, and so the feed_stop check, go on).
4. A snapshot of the core is taken every ``agent.snapshot_every_s`` and at shutdown; it trims
   the journal. A restart restores the snapshot and feeds the journal's tail through the core;
   the alerts and dead letters this produces were committed the first time, so they are not
   published or stored again: replay of the tail only rebuilds the state.
5. A message the broker sends again (DUP flag, same packet id and content) after its journal
   row was committed but before our PUBACK reached the broker is acknowledged and not fed
   twice (MQTT 3.1.1, 4.4: the re-send keeps its packet identifier).
6. The state file cannot be written (disk full, read-only): the batch that failed stays in
   memory with its acknowledgements held back, and no further message is taken or tick run,
   so the broker keeps everything after it (the agent stops acknowledging). The commit is
   retried with backoff; when it succeeds the agent goes on by itself. Monitoring in memory
   while acks wait would not go far anyway: the broker stops sending at its inflight window
   (mosquitto's default is 20), and a journal missing rows would break "replay equals live".
7. The broker is unreachable at start (refused, no route, no name, timeout): the agent retries
   with backoff, as it does after losing the connection; only a refusal a person must fix
   (password, authorisation, certificate) stops it at start.
8. SIGTERM or SIGINT: stop intake (later messages stay with the broker, unacknowledged), finish
   the batch, wait for outstanding PUBACKs while connected, snapshot, publish status offline,
   disconnect, exit 0.
"""

from __future__ import annotations

import json
import logging
import math
import signal
import time
import zlib
from itertools import islice
from pathlib import Path
from typing import Any, NamedTuple

from watchdog_edge import __version__
from watchdog_edge.agent.link import (
    Backoff,
    Inbound,
    Link,
    LinkEvent,
    outbound_topic,
    secret_warnings,
    status_payload,
)
from watchdog_edge.agent.store import OutboxItem, Store, state_path
from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import Alert, DeadLetter, PlannedWork, rfc3339
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import Config
from watchdog_edge.errors import BrokerError, BrokerUnreachable, StoreWriteError, WatchdogError
from watchdog_edge.replay.recording import RecordingWriter, last_line, trim_cut_line

log = logging.getLogger("watchdog_edge.agent.agent")

_REMEMBERED_MIDS = 1000  # far above any broker's inflight window (mosquitto's default is 20)
_LOG_EVERY_S = 60.0
_POLL_MAX_S = 0.2  # longest wait for traffic, and so for noticing a stop signal


def json_safe(obj: Any) -> Any:
    """Plain data with NaN and infinities as None, so every payload is valid JSON (RFC 8259)."""
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    return obj


def alert_payload(alert: Alert) -> bytes:
    """The contract's alert JSON as published."""
    return json.dumps(json_safe(alert.to_dict()), separators=(",", ":"), ensure_ascii=False).encode()


class RecentMessages:
    """Content keys (CRC-32 of topic, NUL and payload; payload length) of the latest messages, by packet id.

    It recognises a re-sent message (rule 5) without keeping payloads in memory.

    >>> r = RecentMessages(size=2)
    >>> r.remember(7, "a/pred", b'{"id": 1}')
    >>> r.seen(7, "a/pred", b'{"id": 1}'), r.seen(7, "a/pred", b'{"id": 2}'), r.seen(8, "a/pred", b'{"id": 1}')
    (True, False, False)
    """

    def __init__(self, size: int = _REMEMBERED_MIDS) -> None:
        self.size = size
        self.keys: dict[int, tuple[int, int]] = {}
        self._topic_crc: dict[str, int] = {}

    def key(self, topic: str, payload: bytes) -> tuple[int, int]:
        """The content key; the same as zlib.crc32 over topic, NUL and payload in one piece."""
        start = self._topic_crc.get(topic)
        if start is None:
            if len(self._topic_crc) >= 1024:  # many topics under a wildcard: keep it bounded
                self._topic_crc.clear()
            start = self._topic_crc[topic] = zlib.crc32(topic.encode("utf-8", "surrogateescape") + b"\x00")
        return zlib.crc32(payload, start), len(payload)

    def remember(self, mid: int, topic: str, payload: bytes) -> None:
        """Note that the message with packet id ``mid`` is journaled."""
        keys = self.keys
        keys.pop(mid, None)  # a reused id moves to the newest end
        keys[mid] = self.key(topic, payload)
        if len(keys) > 2 * self.size:  # trimmed now and then, not at every message
            for old in list(islice(keys, len(keys) - self.size)):
                del keys[old]

    def restore(self, rows: list[list[int]]) -> None:
        """Keys saved with a snapshot: ``[mid, crc, size]`` rows, oldest first."""
        for mid, crc, size in rows:
            self.keys.pop(int(mid), None)
            self.keys[int(mid)] = (int(crc), int(size))

    def rows(self) -> list[list[int]]:
        """The keys as ``[mid, crc, size]`` rows for a snapshot, oldest first."""
        return [
            [mid, crc, size] for mid, (crc, size) in islice(self.keys.items(), max(0, len(self.keys) - self.size), None)
        ]

    def seen(self, mid: int, topic: str, payload: bytes) -> bool:
        """True when this very message (packet id and content) was journaled."""
        kept = self.keys.get(mid)
        return kept is not None and kept == self.key(topic, payload)


class _HeldBatch(NamedTuple):
    """A batch fed to the core whose journal commit failed: its rows, alerts, dead letters and acks."""

    rows: list[tuple]
    outbox: list[OutboxItem]
    dead: list[DeadLetter]
    acks: list[tuple[int, int]]
    alerted: set[str]


class Agent:
    """One running agent. ``run()`` blocks until SIGTERM/SIGINT and returns the exit code."""

    def __init__(self, config: Config, cards: dict[str, ModelCard], record: str | Path | None = None) -> None:
        self.config = config
        self.cards = cards
        a = config.agent
        self.name = a.name
        b = config.broker
        self.topics = b.topics
        # Check every outbound topic now, so a bad id fails at start and not at the first alert.
        self.alert_topics = {m.id: outbound_topic(b.topics.alerts, model=m.id, agent=a.name) for m in config.models}
        self.state_topics = {m.id: outbound_topic(b.topics.state, model=m.id, agent=a.name) for m in config.models}
        self.status_topic = outbound_topic(b.topics.status, agent=a.name, model=None)
        self.store = Store(
            state_path(config.resolve(a.state_dir)),
            a.sqlite_synchronous,
            a.dead_letter_max_count,
            a.dead_letter_max_bytes,
        )
        # Filled by the link's callbacks inside Link.poll. The inbox holds at most about one
        # batch: poll reads no further, and what is not read waits in the socket and the broker.
        self.inbox: list[Inbound] = []
        self.events: list[LinkEvent] = []
        self.intake_open = False
        self.stopping = False
        self.pending: dict[int, str] = {}  # mid -> alert_id awaiting PUBACK
        self.pending_other: set[int] = set()  # mids of retained state/status awaiting PUBACK
        self.recent = RecentMessages()
        self.counters = {
            "connects": 0,
            "disconnects": 0,
            "connection_refused": 0,
            "connect_failures": 0,
            "redelivered": 0,
            "journal_batches": 0,
            "snapshots": 0,
            "unreachable_at_start": 0,
            "publish_refused": 0,
            "subscribe_refused": 0,
        }
        self.last_refusal: str | None = None
        self.last_disconnect: str | None = None
        self.waited_for_broker_s = 0.0
        # Rule 6: a batch whose commit failed, kept until the state file takes it.
        self.held: _HeldBatch | None = None
        self.store_failures = 0
        self.store_error: str | None = None
        self.store_error_since: float | None = None
        self._store_backoff = Backoff(1.0, 10.0)
        self._store_retry_at = 0.0
        self.warnings = secret_warnings(b, config.base_dir)
        self._log_times: dict[str, float] = {}
        self.started = time.time()
        self.running = False  # true once the broker accepted us
        self.said_offline = False  # set at shutdown: no "online" status after "offline"
        self.monitor = self._restore()
        self.recorder = self._open_recording(record) if record is not None else None
        subs = []
        for m in config.models:
            for flt in (m.prediction_topic, m.truth_topic):
                if flt not in subs:
                    subs.append(flt)
        # planned-work commands arrive as records the core routes (and the journal keeps)
        subs.append(self.monitor.command_topic)
        self.link = Link(
            b,
            b.client_id or f"watchdog-edge-{a.name}",
            subs,
            self.status_topic,
            status_payload(a.name, "offline", version=__version__),
            config.base_dir,
            self._on_message,
            self.events.append,
        )

    def _open_recording(self, record: str | Path) -> RecordingWriter:
        """The ``--record`` file, appended to: a restart continues the recording a crash cut.

        A last line the crash cut short is removed first, and the journal rows a crash left
        out (committed, not yet written to the recording) are written now, so the file holds
        what the journal held; replaying it from the top gives what the agent gave since its
        state folder was fresh.
        """
        cut = trim_cut_line(record)
        if cut:
            log.warning("recording %s: removed its last line, cut short by an earlier stop (%d bytes)", record, cut)
        try:
            last = last_line(record)
        except WatchdogError:
            last = None  # not a recording we can read: append, and leave it as it is
        writer = RecordingWriter(record, append=True, private=True)
        if last is None:
            return writer
        # Rows of the journal's tail after the recording's last line (all of them if that line
        # is older than the tail: a snapshot covered it).
        mark = (last.t, last.tick, last.topic, last.payload)
        start = self._restored_after
        for e in self.store.journal_tail(self._restored_after):
            if (e.t, e.tick, e.topic, e.payload) == mark and e.seq is not None:
                start = e.seq
        added = 0
        for e in self.store.journal_tail(start):
            if e.tick:
                writer.tick(e.t)
            else:
                writer.message(e.t, e.topic or "", e.payload or b"")
            added += 1
        writer.flush()
        if added:
            log.info("recording %s: wrote %d journal rows an earlier stop left out of it", record, added)
        return writer

    # --- restart ---------------------------------------------------------------------------
    def _restore(self) -> Monitor:
        snap = self.store.latest_snapshot()
        if snap is None:
            mon = Monitor(self.config, self.cards)
            after = 0
        else:
            mon = Monitor.restore(self.config, self.cards, snap.data["monitor"])
            # Packet ids of the latest messages, so that a re-send of one already covered by
            # the snapshot is still recognised (rule 5).
            self.recent.restore(snap.data.get("recent", []))
            after = snap.journal_seq
        self._restored_after = after
        n = 0
        for e in self.store.journal_tail(after):
            # Events are dropped on purpose: the alerts are in the outbox or already sent, the
            # dead letters already stored (rule 4).
            if e.tick:
                mon.tick(e.t)
            else:
                mon.feed(e.topic or "", e.payload or b"", e.t)
                if e.mid is not None:
                    self.recent.remember(e.mid, e.topic or "", e.payload or b"")
            n += 1
        if snap is not None or n:
            log.info(
                "resumed from %s and %d journal rows; %d alerts wait in the outbox",
                "a snapshot" if snap is not None else "no snapshot",
                n,
                self.store.outbox_depth(),
            )
        return mon

    # --- link callbacks (inside Link.poll) ----------------------------------------------------
    def _on_message(self, msg: Inbound) -> None:
        if self.intake_open:
            self.inbox.append(msg)

    # --- logging at most once a minute per key ---------------------------------------------
    def _log_limited(self, key: str, level: int, text: str, *args: Any) -> None:
        now = time.monotonic()
        last = self._log_times.get(key)
        if last is None or now - last >= _LOG_EVERY_S:
            self._log_times[key] = now
            log.log(level, text, *args)

    # --- the loop --------------------------------------------------------------------------
    def run(self) -> int:
        """Connect, then work until a signal; 0 on a clean shutdown. BrokerError if refused at start."""
        a = self.config.agent
        link = self.link
        for w in self.warnings:
            log.warning("%s", w)
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, self._on_signal)
        self.intake_open = True
        try:
            connected = self._connect_at_start()
        except BrokerError:
            self.intake_open = False
            self._close_files()
            raise
        if not connected:  # stopped by a signal while waiting for the broker
            self.intake_open = False
            self._close_files()
            log.info("stopped before the broker could be reached")
            return 0
        self.running = True
        log.info(
            "agent %s connected to %s:%d; listening on %s",
            self.name,
            self.config.broker.host,
            self.config.broker.port,
            ", ".join(link.subscriptions),
        )
        now = time.monotonic()
        next_tick = now + a.tick_every_s
        next_snapshot = now + a.snapshot_every_s
        next_state = now  # publish state and status right away
        batch_max = a.journal_batch_max_messages
        while not self.stopping:
            if self.held is not None:
                # Rule 6: keep the session alive, take nothing new, retry the commit now and then.
                link.poll(max(0.0, min(self._store_retry_at - time.monotonic(), _POLL_MAX_S)), 0)
                now = time.monotonic()
                if now >= self._store_retry_at:
                    self._retry_held()
                if self.events:
                    self._handle_events()
                if now >= next_state:
                    next_state = now + a.state_every_s
                    self._publish_status("online")
                if self.held is None:  # the state file took the batch: ticks start afresh
                    next_tick = now + a.tick_every_s
                link.flush()
                continue
            room = batch_max - len(self.inbox)
            if room > 0:
                if self.inbox or self.events:
                    wait = 0.0
                else:
                    now = time.monotonic()
                    wait = max(0.0, min(next_tick, next_state, next_snapshot, now + _POLL_MAX_S) - now)
                link.poll(wait, room)
            now = time.monotonic()
            tick = now >= next_tick
            if tick:
                # Skip missed ticks after a stall rather than firing a burst of them.
                next_tick = max(next_tick + a.tick_every_s, now)
            if self.inbox or self.events or tick:
                self._process(tick)
            if now >= next_state:
                next_state = now + a.state_every_s
                self._publish_states(self.monitor.models())
                self._publish_status("online")
            if now >= next_snapshot:
                next_snapshot = now + a.snapshot_every_s
                self._snapshot()
            link.flush()
        return self._shutdown()

    def _on_signal(self, signum: int, frame: Any) -> None:
        self.stopping = True

    def _connect_at_start(self) -> bool:
        """Connect, retrying an unreachable broker with backoff (rule 7); False if stopped meanwhile."""
        b = self.config.broker
        backoff = Backoff(b.reconnect_min_s, b.reconnect_max_s)
        began = time.monotonic()
        while True:
            try:
                self.link.start()
                break
            except BrokerUnreachable as e:
                self.counters["unreachable_at_start"] += 1
                wait = backoff.next()
                self._log_limited(
                    "unreachable_at_start",
                    logging.WARNING,
                    "the broker cannot be reached yet: %s; retrying with backoff (next in %.1f s, "
                    "logged once a minute)",
                    e,
                    wait,
                )
                until = time.monotonic() + wait
                while not self.stopping and time.monotonic() < until:
                    time.sleep(min(0.1, max(0.0, until - time.monotonic())))
                if self.stopping:
                    return False
        if self.counters["unreachable_at_start"]:
            self.waited_for_broker_s = round(time.monotonic() - began, 3)
            log.info(
                "the broker answered after %.1f s of waiting (%d attempts failed)",
                self.waited_for_broker_s,
                self.counters["unreachable_at_start"],
            )
        return True

    def _process(self, tick: bool) -> None:
        items = self.inbox
        rows: list[tuple] = []
        outbox: list[OutboxItem] = []
        dead: list[DeadLetter] = []
        acks: list[tuple[int, int]] = []
        alerted: set[str] = set()  # models whose retained state is refreshed after this batch
        feed = self.monitor.feed
        recent = self.recent
        clock = time.time
        # A batch commits (and acks) no later than agent.journal_batch_ms after it started,
        # even when its messages are slow to process; the rest waits for the next batch.
        perf = time.perf_counter
        a = self.config.agent
        deadline = perf() + a.journal_batch_ms / 1000.0
        # paho may read a few packets past the batch (it reads one per outbound message still
        # in flight): they wait for the next batch.
        batch_max = a.journal_batch_max_messages
        done = 0
        for topic, payload, mid, qos, dup in items:
            if done >= batch_max or (rows and perf() >= deadline):
                break
            done += 1
            if dup and recent.seen(mid, topic, payload):
                self.counters["redelivered"] += 1
                acks.append((mid, qos))
                continue
            t = clock()
            out = feed(topic, payload, t)
            if qos:
                rows.append((t, topic, payload, 0, mid))
                acks.append((mid, qos))
                recent.remember(mid, topic, payload)
            else:
                rows.append((t, topic, payload, 0, None))
            if out:
                self._collect(out, outbox, dead, alerted)
        self.inbox = items[done:] if done < len(items) else []
        if tick:
            t = clock()
            out = self.monitor.tick(t)
            rows.append((t, None, None, 1, None))
            if out:
                self._collect(out, outbox, dead, alerted)
        if rows or outbox or dead:
            try:
                self.store.commit(rows, outbox, dead)
            except StoreWriteError as e:
                self._hold(_HeldBatch(rows, outbox, dead, acks, alerted), e)
                return
            self.counters["journal_batches"] += 1
            if self.store_error is not None:
                self._store_ok()
        self._committed(rows, outbox, acks, alerted)
        if self.events:
            self._handle_events()

    def _committed(
        self, rows: list[tuple], outbox: list[OutboxItem], acks: list[tuple[int, int]], alerted: set[str]
    ) -> None:
        """After the commit: alerts out first (latency), then the acks in one write, then the recording."""
        rec = self.recorder
        link = self.link
        if outbox and link.connected.is_set():
            for item in outbox:
                self._publish_alert(item)
        for mid, qos in acks:
            link.ack(mid, qos)
        link.flush()
        if rec is not None and rows:
            # Written only now, so the recording holds exactly what the journal holds; a crash
            # during this one write cuts at most the last line.
            for t, topic, payload, tick, _ in rows:
                if tick:
                    rec.tick(t)
                else:
                    rec.message(t, topic, payload)
            rec.flush()
        if outbox or alerted:
            self._publish_states(sorted(alerted))
            self._refresh_status()  # received and outbox depth as they are now

    def _handle_events(self) -> None:
        if self.events:
            events = self.events[:]
            self.events.clear()  # the same list: the link appends to it
            acked_alerts: list[str] = []
            for ev in events:
                if ev.kind == "puback":
                    alert_id = self.pending.pop(ev.mid, None)
                    if alert_id is not None:
                        acked_alerts.append(alert_id)
                    else:
                        self.pending_other.discard(ev.mid)
            if acked_alerts:
                try:
                    self.store.mark_sent(acked_alerts)  # before a reconnect re-sends the outbox
                except StoreWriteError as e:
                    # They stay in the outbox and go out again later with the same alert_id.
                    self._store_trouble(e)
                self._refresh_status()  # alerts_sent counts acknowledged alerts
            for ev in events:
                if ev.kind != "puback":
                    self._link_event(ev)

    def _collect(self, out: list[Any], outbox: list[OutboxItem], dead: list[DeadLetter], alerted: set[str]) -> None:
        for ev in out:
            if isinstance(ev, Alert):
                outbox.append(OutboxItem(ev.alert_id, self.alert_topics[ev.model], alert_payload(ev), ev.t))
                alerted.add(ev.model)
                log.warning("alert %s %s %s on %s: %s", ev.check, ev.state, ev.severity, ev.model, ev.summary)
            elif isinstance(ev, DeadLetter):
                dead.append(ev)
                self._log_limited(
                    "bad." + ev.reason,
                    logging.WARNING,
                    "bad record on %s (%s): %s; kept in the dead letters (logged once a minute per reason)",
                    ev.topic,
                    ev.reason,
                    ev.detail,
                )
            elif isinstance(ev, PlannedWork):
                w = ev.window
                covered = w["models"] or self.monitor.models()
                alerted.update(covered)
                log.warning("%s", ev.log_line(", ".join(covered)))
            else:
                log.info("%s", ev)

    def _link_event(self, ev: LinkEvent) -> None:
        if ev.kind == "connected":
            self.counters["connects"] += 1
            if self.counters["connects"] > 1:
                log.info("reconnected to the broker (session present: %s)", ev.session_present)
            self._publish_status("online")
            self._resend_outbox()
        elif ev.kind == "disconnected":
            self.counters["disconnects"] += 1
            self.last_disconnect = f"{rfc3339(time.time())} {ev.detail}"
            log.warning("lost the broker connection (%s); alerts wait in the outbox, reconnecting", ev.detail)
        elif ev.kind == "refused":
            self.counters["connection_refused"] += 1
            self.last_refusal = ev.detail
            self._log_limited("refused", logging.ERROR, "%s", ev.detail)
        elif ev.kind == "publish_refused":
            self.counters["publish_refused"] += 1
            alert_id = self.pending.pop(ev.mid, None)
            self.pending_other.discard(ev.mid)
            what = f"alert {alert_id} stays in the outbox" if alert_id else "a state or status message was dropped"
            self._log_limited(
                "publish_refused",
                logging.ERROR,
                "the broker refused a publish (%s): %s; check the broker's ACL for this agent's "
                "topics (logged once a minute)",
                ev.detail,
                what,
            )
        elif ev.kind == "subscribe_refused":
            self.counters["subscribe_refused"] += 1
            self._log_limited(
                "subscribe_refused",
                logging.ERROR,
                "the broker refused the subscription to %s; no records arrive from there: check "
                "the broker's ACL for this agent",
                ev.detail,
            )
        elif ev.kind == "unreachable":
            self.counters["connect_failures"] += 1
            self._log_limited("unreachable", logging.WARNING, "reconnect failed: %s", ev.detail)

    # --- publishing -------------------------------------------------------------------------
    def _publish_alert(self, item: OutboxItem) -> None:
        mid = self.link.publish(item.topic, item.payload, qos=1, retain=False)
        self.pending[mid] = item.alert_id

    def _resend_outbox(self) -> None:
        in_flight = set(self.pending.values())
        for item in self.store.outbox():
            if item.alert_id not in in_flight:
                self._publish_alert(item)

    def _publish_states(self, models: list[str]) -> None:
        """Publish the retained state of ``models`` and keep a copy in the state file.

        The copy is written while the broker is away too, so that ``watchdog-edge status``
        on the gateway can read it (read-only) when there is no broker to ask.
        """
        now = time.time()
        connected = self.link.connected.is_set()
        kept = []
        for m in models:
            if m not in self.state_topics:
                continue
            st = dict(self.monitor.state(m), agent=self.name, ts=rfc3339(now))
            payload = json.dumps(json_safe(st), separators=(",", ":")).encode()
            kept.append((self.state_topics[m], payload, now))
            if connected:
                mid = self.link.publish(self.state_topics[m], payload, qos=1, retain=True)
                self.pending_other.add(mid)
        if kept:
            self._keep_published(kept)

    def status(self, connection: str = "online") -> dict[str, Any]:
        """The agent status as published (counters of the core, the outbox, the journal, the link)."""
        core = self.monitor.status()
        core.pop("models", None)
        now = time.time()
        return json_safe(
            {
                "agent": self.name,
                "connection": connection,
                "version": __version__,
                "heartbeat": rfc3339(now),
                "uptime_s": round(now - self.started, 3),
                "state_every_s": self.config.agent.state_every_s,
                **core,
                "alerts_sent": self.store.counter("alerts_sent"),
                "outbox_depth": self.store.outbox_depth(),
                "journal_depth": self.store.journal_depth(),
                "dead_letters": self.store.dead_letter_stats(),
                "link": dict(
                    self.counters,
                    connected=self.link.connected.is_set(),
                    last_refusal=self.last_refusal,
                    last_disconnect=self.last_disconnect,
                    waited_for_broker_s=self.waited_for_broker_s,
                ),
                "store": self._store_status(),
                "warnings": self.warnings,
            }
        )

    def _keep_published(self, rows: list[tuple[str, bytes, float]]) -> None:
        """The readers' copy of retained messages; a full or read-only state file only skips it."""
        try:
            self.store.keep_published(rows)
        except StoreWriteError as e:
            self._store_trouble(e)

    def _publish_status(self, connection: str) -> int | None:
        """Publish the retained status (kept in the state file as well); the message id, if sent."""
        payload = json.dumps(self.status(connection), separators=(",", ":")).encode()
        self._keep_published([(self.status_topic, payload, time.time())])
        if not self.link.connected.is_set():
            return None
        mid = self.link.publish(self.status_topic, payload, qos=1, retain=True)
        self.pending_other.add(mid)
        return mid

    def _refresh_status(self) -> None:
        """The status again after alerts went out or were acknowledged (not once offline was said)."""
        if not self.said_offline:
            self._publish_status("online")

    def _snapshot(self) -> None:
        if self.held is not None:
            return  # the core holds messages the journal lacks: a snapshot now would skip them
        data = {"monitor": self.monitor.snapshot(), "recent": self.recent.rows()}
        try:
            self.store.save_snapshot(data, time.time())
        except StoreWriteError as e:
            self._store_trouble(e)  # nothing lost: the journal still holds every row
            return
        self.counters["snapshots"] += 1
        if self.store_error is not None:
            self._store_ok()

    def _store_ok(self) -> None:
        log.warning("the state file takes writes again")
        self.store_error = None
        self.store_error_since = None

    # --- the state file cannot be written (rule 6) ------------------------------------------
    def _store_trouble(self, e: StoreWriteError) -> None:
        self.store_failures += 1
        if self.store_error is None:
            self.store_error_since = time.time()
        self.store_error = str(e)
        self._log_limited("store", logging.ERROR, "%s (logged once a minute)", e)

    def _hold(self, batch: _HeldBatch, e: StoreWriteError) -> None:
        self.held = batch
        self._store_trouble(e)
        self._store_retry_at = time.monotonic() + self._store_backoff.next()
        self._log_limited(
            "store.hold",
            logging.ERROR,
            "the journal cannot take %d messages: intake paused, they and every later message wait "
            "unacknowledged with the broker; retrying by itself with backoff (logged once a minute)",
            len(batch.acks),
        )

    def _retry_held(self) -> None:
        batch = self.held
        assert batch is not None
        try:
            self.store.commit(batch.rows, batch.outbox, batch.dead)
        except StoreWriteError as e:
            self._store_trouble(e)
            self._store_retry_at = time.monotonic() + self._store_backoff.next()
            return
        self.held = None
        self._store_backoff.reset()
        self.counters["journal_batches"] += 1
        since = self.store_error_since or time.time()
        log.warning(
            "the state file takes writes again after %.1f s: %d held messages committed, intake resumed",
            time.time() - since,
            len(batch.acks),
        )
        self.store_error = None
        self.store_error_since = None
        self._committed(batch.rows, batch.outbox, batch.acks, batch.alerted)

    def _store_status(self) -> dict[str, Any]:
        return {
            "writes": "accepted" if self.held is None and self.store_error is None else "failing",
            "error": self.store_error,
            "since": None if self.store_error_since is None else rfc3339(self.store_error_since),
            "held_messages": 0 if self.held is None else len(self.held.acks),
            "write_failures": self.store_failures,
        }

    # --- shutdown ---------------------------------------------------------------------------
    def _drain_events(self, seconds: float, done) -> None:
        until = time.monotonic() + seconds
        while time.monotonic() < until and not done():
            self.link.poll(0.02)
            if self.held is not None:
                self._handle_events()
            elif self.inbox or self.events:
                self._process(tick=False)
            self.link.flush()

    def _shutdown(self) -> int:
        log.info("stopping: intake closed, flushing the outbox")
        self.intake_open = False
        # Messages already read were received before the stop: journal and acknowledge them.
        while self.inbox and self.held is None:
            self._process(tick=False)
        if self.held is not None:
            self._retry_held()  # a last try; otherwise the broker sends the held messages again
        self._drain_events(5.0, lambda: not self.pending or not self.link.connected.is_set())
        self._snapshot()
        self.said_offline = True
        mid = self._publish_status("offline")
        if mid is not None:
            self._drain_events(2.0, lambda: mid not in self.pending_other or not self.link.connected.is_set())
        self.link.stop(clean=True)
        left = self.store.outbox_depth()
        if left:
            log.warning("%d alerts wait in the outbox for the next start", left)
        self._close_files()
        log.info("stopped cleanly")
        return 0

    def _close_files(self) -> None:
        if self.recorder is not None:
            self.recorder.close()
            self.recorder = None
        self.store.close()
