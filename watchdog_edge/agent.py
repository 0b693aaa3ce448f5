"""The live agent: MQTT in, journal, core, outbox, retained state and status.

The rules of this file, in the order a message meets them:

1. paho's network thread only puts received messages and connection events on a queue.
2. One worker (the main thread) takes messages in small batches: each message gets its receive
   time ``t`` here and goes through ``Monitor.feed``; a due timer tick goes through
   ``Monitor.tick``. Journal rows, the alerts they caused (outbox) and the dead letters are
   committed in ONE transaction; only then are the messages acknowledged (manual PUBACK) and
   the alerts published. Acks are never held back for a snapshot.
3. An alert leaves the outbox only when its PUBACK arrives. On every connect the outbox rows
   that paho does not hold in flight are published again, with the same ``alert_id``.
4. A snapshot of the core is taken every ``agent.snapshot_every_s`` and at shutdown; it trims
   the journal. A restart restores the snapshot and feeds the journal's tail through the core;
   the alerts and dead letters this produces were committed the first time, so they are not
   published or stored again: replay of the tail only rebuilds the state.
5. A message the broker sends again (DUP flag, same packet id and content) after its journal
   row was committed but before our PUBACK reached the broker is acknowledged and not fed
   twice (MQTT 3.1.1, 4.4: the re-send keeps its packet identifier).
6. SIGTERM or SIGINT: stop intake (later messages stay with the broker, unacknowledged), finish
   the batch, wait for outstanding PUBACKs while connected, snapshot, publish status offline,
   disconnect, exit 0.
"""

from __future__ import annotations

import json
import logging
import math
import queue
import signal
import threading
import time
import zlib
from collections import OrderedDict
from pathlib import Path
from typing import Any

from . import __version__
from .cards import ModelCard
from .config import Config
from .errors import BrokerError
from .events import Alert, DeadLetter, rfc3339
from .monitor import Monitor
from .mqtt import Inbound, Link, LinkEvent, outbound_topic, status_payload
from .replay import RecordingWriter
from .store import JournalEntry, OutboxItem, Store, state_path

log = logging.getLogger("watchdog_edge.agent")

_REMEMBERED_MIDS = 1000  # far above any broker's inflight window (mosquitto's default is 20)
_LOG_EVERY_S = 60.0
_QUEUE_SHED = 10000


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


def _content_key(topic: str, payload: bytes) -> tuple[int, int]:
    return zlib.crc32(topic.encode("utf-8", "surrogateescape") + b"\x00" + payload), len(payload)


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
        self.store = Store(state_path(config.resolve(a.state_dir)), a.sqlite_synchronous,
                           a.dead_letter_max_count, a.dead_letter_max_bytes)
        # Unbounded on purpose: at QoS 1 the broker's inflight window bounds what is in here;
        # QoS 0 traffic beyond _QUEUE_SHED waiting messages is shed and counted.
        self.q: queue.SimpleQueue[Inbound | LinkEvent] = queue.SimpleQueue()
        self.intake_open = False
        self.stopping = threading.Event()
        self.pending: dict[int, str] = {}  # mid -> alert_id awaiting PUBACK
        self.pending_other: set[int] = set()  # mids of retained state/status awaiting PUBACK
        self.recent: OrderedDict[int, tuple[int, int]] = OrderedDict()  # mid -> content key
        self._carry: list[Inbound | LinkEvent] = []
        self.counters = {"connects": 0, "disconnects": 0, "connection_refused": 0, "connect_failures": 0,
                         "redelivered": 0, "journal_batches": 0, "snapshots": 0, "shed_qos0": 0}
        self.last_refusal: str | None = None
        self._log_times: dict[str, float] = {}
        self.started = time.time()
        self.running = False  # true once the broker accepted us
        self.monitor = self._restore()
        self.recorder = RecordingWriter(record) if record is not None else None
        subs = []
        for m in config.models:
            for flt in (m.prediction_topic, m.truth_topic):
                if flt not in subs:
                    subs.append(flt)
        self.link = Link(b, b.client_id or f"watchdog-edge-{a.name}", subs, self.status_topic,
                         status_payload(a.name, "offline", version=__version__), config.base_dir,
                         self._on_message, self._on_event)

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
            for mid, crc, size in snap.data.get("recent", []):
                self.recent[int(mid)] = (int(crc), int(size))
            after = snap.journal_seq
        n = 0
        for e in self.store.journal_tail(after):
            # Events are dropped on purpose: the alerts are in the outbox or already sent, the
            # dead letters already stored (rule 4).
            if e.tick:
                mon.tick(e.t)
            else:
                mon.feed(e.topic or "", e.payload or b"", e.t)
                if e.mid is not None:
                    self._remember(e.mid, e.topic or "", e.payload or b"")
            n += 1
        if snap is not None or n:
            log.info("resumed from %s and %d journal rows; %d alerts wait in the outbox",
                     "a snapshot" if snap is not None else "no snapshot", n, self.store.outbox_depth())
        return mon

    def _remember(self, mid: int, topic: str, payload: bytes) -> None:
        self.recent[mid] = _content_key(topic, payload)
        self.recent.move_to_end(mid)
        while len(self.recent) > _REMEMBERED_MIDS:
            self.recent.popitem(last=False)

    # --- paho thread -----------------------------------------------------------------------
    def _on_message(self, msg: Inbound) -> None:
        if self.intake_open:
            if msg.qos == 0 and self.q.qsize() > _QUEUE_SHED:
                self.counters["shed_qos0"] += 1
                return
            self.q.put(msg)

    def _on_event(self, ev: LinkEvent) -> None:
        self.q.put(ev)

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
        self.intake_open = True
        try:
            self.link.start()
        except BrokerError:
            self.intake_open = False
            self._close_files()
            raise
        self.running = True
        for sig in (signal.SIGTERM, signal.SIGINT):
            signal.signal(sig, self._on_signal)
        log.info("agent %s connected to %s:%d; listening on %s", self.name, self.config.broker.host,
                 self.config.broker.port, ", ".join(self.link.subscriptions))
        now = time.monotonic()
        next_tick = now + a.tick_every_s
        next_snapshot = now + a.snapshot_every_s
        next_state = now  # publish state and status right away
        batch_max = a.journal_batch_max
        while not self.stopping.is_set():
            wait = max(0.0, min(next_tick, next_state, next_snapshot, time.monotonic() + 0.2) - time.monotonic())
            items = self._take(batch_max, wait)
            now = time.monotonic()
            tick = now >= next_tick
            if tick:
                # Skip missed ticks after a stall rather than firing a burst of them.
                next_tick = max(next_tick + a.tick_every_s, now)
            self._process(items, tick)
            if now >= next_state:
                next_state = now + a.state_every_s
                self._publish_states(self.monitor.models())
                self._publish_status("online")
            if now >= next_snapshot:
                next_snapshot = now + a.snapshot_every_s
                self._snapshot()
        return self._shutdown()

    def _on_signal(self, signum: int, frame: Any) -> None:
        self.stopping.set()

    def _take(self, batch_max: int, wait: float) -> list[Inbound | LinkEvent]:
        items: list[Inbound | LinkEvent] = []
        if self._carry:  # left over when the last batch hit agent.journal_batch_ms
            items, self._carry = self._carry, []
        else:
            try:
                items.append(self.q.get(timeout=wait) if wait > 0 else self.q.get_nowait())
            except queue.Empty:
                return items
        messages = sum(isinstance(i, Inbound) for i in items)
        while messages < batch_max:
            try:
                it = self.q.get_nowait()
            except queue.Empty:
                break
            items.append(it)
            messages += isinstance(it, Inbound)
        return items

    def _process(self, items: list[Inbound | LinkEvent], tick: bool) -> None:
        entries: list[JournalEntry] = []
        outbox: list[OutboxItem] = []
        dead: list[DeadLetter] = []
        acks: list[tuple[int, int]] = []
        acked_alerts: list[str] = []
        events: list[LinkEvent] = []
        alerted: set[str] = set()  # models whose retained state is refreshed after this batch
        mon = self.monitor
        rec = self.recorder
        # A batch commits (and acks) no later than agent.journal_batch_ms after it started,
        # even when its messages are slow to process; the rest waits for the next batch.
        deadline = time.perf_counter() + self.config.agent.journal_batch_ms / 1000.0
        for k, it in enumerate(items):
            if type(it) is Inbound:
                if entries and time.perf_counter() >= deadline:
                    self._carry = items[k:]
                    break
                if it.dup and self.recent.get(it.mid) == _content_key(it.topic, it.payload):
                    self.counters["redelivered"] += 1
                    acks.append((it.mid, it.qos))
                    continue
                t = time.time()
                out = mon.feed(it.topic, it.payload, t)
                entries.append(JournalEntry(t, it.topic, it.payload, mid=it.mid if it.qos else None))
                if it.qos:
                    acks.append((it.mid, it.qos))
                    self._remember(it.mid, it.topic, it.payload)
                if rec is not None:
                    rec.message(t, it.topic, it.payload)
                if out:
                    self._collect(out, outbox, dead, alerted)
            elif it.kind == "puback":
                alert_id = self.pending.pop(it.mid, None)
                if alert_id is not None:
                    acked_alerts.append(alert_id)
                else:
                    self.pending_other.discard(it.mid)
            else:
                events.append(it)
        if tick:
            t = time.time()
            out = mon.tick(t)
            entries.append(JournalEntry(t, tick=True))
            if rec is not None:
                rec.tick(t)
            if out:
                self._collect(out, outbox, dead, alerted)
        if entries or outbox or dead:
            self.store.append(entries, outbox, dead)
            self.counters["journal_batches"] += 1
        # Committed: alerts go out first (latency), then the acks, then the rest.
        for item in outbox:
            self._publish_alert(item)
        for mid, qos in acks:
            self.link.ack(mid, qos)
        if rec is not None and entries:
            rec.flush()
        if outbox:
            self._publish_states(sorted(alerted))
        if acked_alerts:
            self.store.mark_sent(acked_alerts)
        for ev in events:
            self._link_event(ev)

    def _collect(self, out: list[Any], outbox: list[OutboxItem], dead: list[DeadLetter], alerted: set[str]) -> None:
        for ev in out:
            if isinstance(ev, Alert):
                outbox.append(OutboxItem(ev.alert_id, self.alert_topics[ev.model], alert_payload(ev), ev.t))
                alerted.add(ev.model)
                log.warning("alert %s %s %s on %s: %s", ev.check, ev.state, ev.severity, ev.model, ev.summary)
            elif isinstance(ev, DeadLetter):
                dead.append(ev)
                self._log_limited("bad." + ev.reason, logging.WARNING,
                                  "bad record on %s (%s): %s; kept in the dead letters (logged once a minute per reason)",
                                  ev.topic, ev.reason, ev.detail)
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
            log.warning("lost the broker connection (%s); alerts wait in the outbox, reconnecting", ev.detail)
        elif ev.kind == "refused":
            self.counters["connection_refused"] += 1
            self.last_refusal = ev.detail
            self._log_limited("refused", logging.ERROR, "%s", ev.detail)
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
        if not self.link.connected.is_set():
            return
        now = time.time()
        for m in models:
            if m not in self.state_topics:
                continue
            st = dict(self.monitor.state(m), agent=self.name, ts=rfc3339(now))
            mid = self.link.publish(self.state_topics[m], json.dumps(json_safe(st), separators=(",", ":")).encode(),
                                    qos=1, retain=True)
            self.pending_other.add(mid)

    def status(self, state: str = "online") -> dict[str, Any]:
        """The agent status as published (counters of the core, the outbox, the journal, the link)."""
        core = self.monitor.status()
        core.pop("models", None)
        now = time.time()
        return json_safe({
            "agent": self.name, "state": state, "version": __version__, "heartbeat": rfc3339(now),
            "uptime_s": round(now - self.started, 3), **core,
            "alerts_sent": self.store.counter("alerts_sent"), "outbox_depth": self.store.outbox_depth(),
            "journal_depth": self.store.journal_depth(), "dead_letters": self.store.dead_letter_stats(),
            "link": dict(self.counters, connected=self.link.connected.is_set(), last_refusal=self.last_refusal),
        })

    def _publish_status(self, state: str) -> int | None:
        if not self.link.connected.is_set():
            return None
        mid = self.link.publish(self.status_topic, json.dumps(self.status(state), separators=(",", ":")).encode(),
                                qos=1, retain=True)
        self.pending_other.add(mid)
        return mid

    def _snapshot(self) -> None:
        data = {"monitor": self.monitor.snapshot(),
                "recent": [[mid, crc, size] for mid, (crc, size) in self.recent.items()]}
        self.store.save_snapshot(data, time.time())
        self.counters["snapshots"] += 1

    # --- shutdown ---------------------------------------------------------------------------
    def _drain_events(self, until: float, done) -> None:
        while time.monotonic() < until and not done():
            items = self._take(self.config.agent.journal_batch_max, 0.02)
            if items:
                self._process(items, tick=False)

    def _shutdown(self) -> int:
        log.info("stopping: intake closed, flushing the outbox")
        self.intake_open = False
        # Messages already queued were received before the stop: journal and acknowledge them.
        while True:
            items = self._take(self.config.agent.journal_batch_max, 0.0)
            if not items:
                break
            self._process(items, tick=False)
        self._drain_events(time.monotonic() + 5.0, lambda: not self.pending or not self.link.connected.is_set())
        self._snapshot()
        mid = self._publish_status("offline")
        if mid is not None:
            self._drain_events(time.monotonic() + 2.0,
                               lambda: mid not in self.pending_other or not self.link.connected.is_set())
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
