"""A JetStream worker: the sans-I/O core run on the partitions this worker holds.

The rules of this file, in the order a partition meets them:

1. Leases. A partition is held by the worker whose key ``p.<n>`` is in the lease bucket; the
   bucket's age limit is ``lease_s``, so a key lapses when its holder stops renewing it (every
   ``lease_s / 3``, compare-and-set on the key's revision). Every worker also keeps a key
   ``w.<worker id>`` there: the live workers, counted from the bucket's subjects in one
   request. A worker holds about its share, ceil(partitions / live workers): it claims free
   partitions (create-if-absent) while under it and hands the excess back (snapshot,
   acknowledge, delete its key) while over it. Renewals go first in a round, and each lease
   call gives up after ``lease_s / 3``, so one slow call cannot outlast the lease.
2. Claim. The new holder reads the partition's snapshot (or starts fresh), writes it back at
   once (compare-and-set: a previous holder that still runs cannot write over it from now
   on), and re-makes the partition's durable consumer to deliver from the sequence after the
   snapshot. Every message after the snapshot was never acknowledged (rule 5), so the worker
   continues from exactly the unacknowledged messages, in stream order.
3. Time. A message's receive time is the time the stream stored it (in its reply subject),
   never this worker's clock: a replacement worker, and a replay of the stream, compute the
   same alerts with the same ids. Timer ticks are messages too: the holder publishes one to
   ``PREFIX.in.<n>.t`` every ``agent.tick_every_s``.
4. Alerts. Bad records go to the dead-letter stream first (message id: partition, stream
   sequence, index). The alerts of a fetched batch are published to the alert stream, each with its
   ``alert_id`` as ``Nats-Msg-Id``, and their publish acknowledgements awaited. The stream
   sequence of the last message whose alerts are stored is kept in the snapshot bucket
   (``p.<n>.mark``); a holder that feeds those messages again after a claim publishes none of
   their alerts, and the duplicate window drops a re-send of the rest.
5. Acknowledgement. After ``snapshot_every_messages`` messages or ``snapshot_every_s``, the
   core's snapshot goes to the snapshot bucket (compare-and-set, rule 2) and only then is the
   last message acknowledged (ack policy "all": it covers every message before it). A worker
   that dies loses nothing: its successor starts at the last snapshot (rule 2).
6. Retained state per model goes to the state bucket after every alert, every planned-work
   window that begins or ends, and every ``agent.state_every_s``.
7. Planned-work commands (subjects.py, rule 4) are in the input stream but in no partition's
   consumer: before feeding a batch, the holder takes the commands stored before the batch's
   last message from the worker's ``Commands`` (engine.py), which reads each stretch of the
   stream once for all partitions, and feeds each at its place in stream order, with its
   stored time. Every partition thus meets every
   command where a replay of the stream meets it; a command's dead letter has one id in all
   partitions (``c-<sequence>-<index>``), so the stream keeps it once. A command stored after
   a partition's last message is fed before the next tick (within ``agent.tick_every_s``).
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import logging
import math
import os
import socket
import time
import zlib
from dataclasses import dataclass, field
from typing import Any

import nats
import nats.errors
import nats.js.errors
from nats.aio.client import Client as NATS
from nats.js import JetStreamContext
from nats.js.kv import KeyValue

from watchdog_edge import __version__
from watchdog_edge.agent.agent import alert_payload, json_safe
from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import Alert, DeadLetter, PlannedWork, rfc3339
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import Config
from watchdog_edge.jetstream.engine import (
    Commands,
    InboundMessage,
    PullFeed,
    ensure_all,
    start_consumer,
    worth_waiting,
)
from watchdog_edge.jetstream.subjects import Subjects, delivery, partition_of, topic_to_subject

log = logging.getLogger("watchdog_edge.jetstream.worker")

SNAPSHOT_FORMAT = 1
_KEY_OK = set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_=./")


def state_key(model: str) -> str:
    """The state bucket's key of a model: its id where the bucket allows it, else a hex form."""
    if model and set(model) <= _KEY_OK and not model.startswith(".") and not model.endswith("."):
        return model
    return "x." + model.encode().hex()


def partition_config(config: Config, p: int) -> Config:
    """The config with only the models of partition ``p``."""
    n = config.jetstream.partitions
    return config.model_copy(update={"models": [m for m in config.models if partition_of(m.id, n) == p]})


def default_worker_id() -> str:
    """Host name and process id, as a key-safe token."""
    host = "".join(c if c.isalnum() or c in "-_" else "-" for c in socket.gethostname()) or "host"
    return f"{host}-{os.getpid()}"


class SnapshotTooLarge(Exception):
    """A partition's snapshot does not fit in one message of the server."""


class StartRefused(Exception):
    """The streams and buckets could not be made at start (a refusal, or not ready within the start timeout)."""


class LostPartition(Exception):
    """Another worker holds the partition now (a compare-and-set failed): stop working on it."""


@dataclass
class Partition:
    """One held partition: its core, its place in the stream, its lease."""

    number: int
    lease_rev: int
    monitor: Monitor | None = None
    applied: int = 0  # stream sequence of the last message fed to the core
    snapshotted: int = 0  # stream sequence the stored snapshot covers
    snapshot_rev: int = 0
    mark: int = 0  # alerts of messages up to this sequence are in the alert stream
    since_snapshot: int = 0
    last_snapshot: float = field(default_factory=time.monotonic)
    task: asyncio.Task | None = None
    release: bool = False  # hand back: final snapshot, ack, delete the lease
    claimed_at: float = field(default_factory=time.monotonic)
    last_msg: Any = None  # the last message fed: acknowledging it covers every one before it


class Worker:
    """One worker process. ``await run(stop)`` works until ``stop`` is set; the return is the exit code."""

    def __init__(self, config: Config, cards: dict[str, ModelCard], worker_id: str | None = None) -> None:
        self.config = config
        self.cards = cards
        self.settings = config.jetstream
        self.id = worker_id or default_worker_id()
        self.subjects = Subjects(self.settings.subject_prefix, self.settings.partitions)
        self.held: dict[int, Partition] = {}
        self.nc: NATS | None = None
        self.js: JetStreamContext | None = None
        self.lease_js: JetStreamContext | None = None
        self.commands: Commands | None = None
        self.buckets: dict[str, KeyValue] = {}
        self.mqtt_alert_subjects = {
            m.id: topic_to_subject(config.broker.topics.alerts.format(model=m.id, agent=config.agent.name))
            for m in config.models
        }
        self.counters = {
            "messages": 0,
            "ticks": 0,
            "alerts_published": 0,
            "alerts_held_back": 0,
            "dead_letters": 0,
            "commands": 0,
            "snapshots": 0,
            "claims": 0,
            "handed_back": 0,
            "lost": 0,
            "resumed": 0,
        }
        self.started = time.time()
        self._dead_logged: dict[str, float] = {}
        self._planned_logged: dict[tuple[str, ...], None] = {}
        self._errors_logged: dict[str, float] = {}

    # --- connection -------------------------------------------------------------------------
    async def connect(self) -> None:
        """Connect, make the streams and buckets if missing; NoServersError or StartRefused otherwise.

        Both steps share ``jetstream.start_timeout_s``: a server that is up but whose JetStream
        is still electing its leaders (a cluster started a moment ago) is asked again, with a
        growing pause, until the timeout; a refusal that needs a person (a name the server
        refuses, replicas it cannot place on one server) ends the start at once. A request under
        way when the timeout passes may add up to 5 s. Once connected, the client reconnects for
        as long as it takes.
        """
        s = self.settings
        loop = asyncio.get_running_loop()
        deadline = loop.time() + s.start_timeout_s
        try:
            self.nc = await asyncio.wait_for(
                nats.connect(
                    servers=s.servers,
                    name=f"watchdog-edge-{self.id}",
                    max_reconnect_attempts=-1,
                    reconnect_time_wait=0.25,
                    connect_timeout=2,
                    allow_reconnect=True,
                    error_cb=self._on_error,
                    disconnected_cb=self._on_disconnected,
                    reconnected_cb=self._on_reconnected,
                ),
                s.start_timeout_s,
            )
        except asyncio.TimeoutError:
            raise nats.errors.NoServersError() from None
        a = self.config.agent
        pause = 0.2
        for attempt in range(1, 1_000_000):
            self.js = self.nc.jetstream(timeout=5)  # the buckets keep it: no shorter timeout here
            self.commands = Commands(self.nc, self.js, s)
            try:
                self.buckets = await ensure_all(self.js, s, s.lease_s, a.dead_letter_max_count, a.dead_letter_max_bytes)
                # lease calls wait at most a third of the lease: a slow one must not outlast the lease
                self.lease_js = self.nc.jetstream(timeout=max(0.5, s.lease_s / 3))
                self.buckets["leases"] = await self.lease_js.key_value(s.lease_bucket)
                break
            except Exception as e:
                if not worth_waiting(e):
                    raise StartRefused(f"cannot make or use the streams and buckets: {e}") from None
                left = deadline - loop.time()
                if left <= 0:
                    raise StartRefused(
                        f"JetStream at {', '.join(s.servers)} was not ready within jetstream.start_timeout_s "
                        f"({s.start_timeout_s} s; {attempt} tries; last: {type(e).__name__} {e}); raise the "
                        "timeout for a cluster that takes longer to elect its leaders"
                    ) from None
                log.warning(
                    "JetStream not ready to make the streams and buckets (%s); trying again in %.1f s "
                    "(%.1f s of the start timeout left)",
                    f"{type(e).__name__}: {e}" if str(e) else type(e).__name__,
                    min(pause, left),
                    left,
                )
                await asyncio.sleep(min(pause, left))
                pause = min(2 * pause, 2.0)

    async def _on_error(self, e: Exception) -> None:
        now = time.monotonic()
        key = type(e).__name__
        if self._errors_logged.get(key, 0.0) + 60.0 <= now:  # once a minute per kind
            self._errors_logged[key] = now
            log.warning("NATS connection: %s (logged once a minute per kind)", e or key)

    async def _on_disconnected(self) -> None:
        log.warning("lost the NATS server; reconnecting (unacknowledged messages wait in the stream)")

    async def _on_reconnected(self) -> None:
        url = self.nc.connected_url if self.nc is not None else None
        log.info("reconnected to %s", url.netloc if url is not None else "a NATS server")

    # --- the main loop ----------------------------------------------------------------------
    async def run(self, stop: asyncio.Event) -> int:
        """Hold a share of the partitions and work on them until ``stop`` is set."""
        connecting = asyncio.ensure_future(self.connect())
        stopping = asyncio.ensure_future(stop.wait())
        await asyncio.wait([connecting, stopping], return_when=asyncio.FIRST_COMPLETED)
        if not connecting.done():  # a signal while still connecting
            connecting.cancel()
            with contextlib.suppress(asyncio.CancelledError, Exception):
                await connecting
            return 0
        stopping.cancel()
        connecting.result()
        log.info(
            "worker %s on %s: %d partitions, %d models (advisory: the alerts speak of the models' error, "
            "not of the plant; site rules and qualified people decide)",
            self.id,
            ", ".join(self.settings.servers),
            self.settings.partitions,
            len(self.config.models),
        )
        every = self.settings.lease_s / 3
        try:
            while not stop.is_set():
                try:
                    await self._leases()
                except (nats.errors.Error, asyncio.TimeoutError, OSError) as e:
                    log.warning("lease round failed (%s); retrying", e)
                with contextlib.suppress(asyncio.TimeoutError):
                    await asyncio.wait_for(stop.wait(), every)
        finally:
            await self._shutdown()
        return 0

    async def _leases(self) -> None:
        leases = self.buckets["leases"]
        # renew what we hold first; a failed compare-and-set means the lease lapsed and someone took it
        for p, part in list(self.held.items()):
            if part.task is not None and part.task.done():
                self.held.pop(p, None)
                continue
            try:
                part.lease_rev = await leases.update(f"p.{p}", self.id.encode(), last=part.lease_rev)
            except nats.js.errors.KeyWrongLastSequenceError:
                log.warning("partition %d: lease lost to another worker; stopping work on it", p)
                self.counters["lost"] += 1
                self._drop(p)
        await leases.put(f"w.{self.id}", json.dumps(self.status()).encode())
        # the live workers: one stream request (no consumer to make, unlike listing the keys)
        bucket = self.settings.lease_bucket
        assert self.lease_js is not None
        info = await self.lease_js.stream_info(f"KV_{bucket}", subjects_filter=f"$KV.{bucket}.w.>")
        live = max(1, len(info.state.subjects or {}))
        share = math.ceil(self.settings.partitions / live)
        working = [p for p, part in self.held.items() if not part.release]
        if len(working) > share:
            # hand back the most recently claimed ones: the others keep their warm state
            for p in sorted(working, key=lambda q: self.held[q].claimed_at)[share:]:
                self.held[p].release = True
                log.info("partition %d: handing back (share is %d with %d workers)", p, share, live)
            return
        n = self.settings.partitions
        start = partition_of(self.id, n)  # workers start their search at different places
        for i in range(n):
            if len(working) >= share:
                break
            p = (start + i) % n
            if p in self.held:
                continue
            try:
                rev = await leases.create(f"p.{p}", self.id.encode())
            except nats.js.errors.KeyWrongLastSequenceError:
                continue
            part = Partition(p, rev)
            self.held[p] = part
            working.append(p)
            self.counters["claims"] += 1
            part.task = asyncio.create_task(self._work(part), name=f"partition-{p}")

    def _drop(self, p: int) -> None:
        part = self.held.pop(p, None)
        if part is not None and part.task is not None:
            part.task.cancel()

    # --- one partition ----------------------------------------------------------------------
    async def _claim(self, part: Partition) -> Any:
        assert self.js is not None
        p = part.number
        snaps = self.buckets["snapshots"]
        cfg = partition_config(self.config, p)
        cards = {m.id: self.cards[m.id] for m in cfg.models}
        try:
            entry = await snaps.get(f"p.{p}")
        except nats.js.errors.KeyNotFoundError:
            entry = None
        part.snapshot_rev = (entry.revision or 0) if entry is not None else 0
        every = [m.id for m in self.config.models]  # a command or window may name any model of the agent
        if entry is not None and entry.value:
            data = json.loads(zlib.decompress(entry.value))
            part.monitor = Monitor.restore(cfg, cards, data["monitor"], every)
            part.applied = part.snapshotted = int(data["seq"])
        else:
            part.monitor = Monitor(cfg, cards, every)
            part.applied = part.snapshotted = 0
        try:
            mark = await snaps.get(f"p.{p}.mark")
            part.mark = int(mark.value or b"0")
        except nats.js.errors.KeyNotFoundError:
            part.mark = 0
        # fence: from this write on, an earlier holder's snapshot write fails its compare-and-set
        await self._store_snapshot(part)
        durable = await start_consumer(self.js, self.settings, p, part.applied)
        log.info(
            "partition %d claimed: %d models, resuming after stream sequence %d",
            p,
            len(cfg.models),
            part.applied,
        )
        feed = PullFeed(self.nc, self.settings.input_stream, durable, self.settings.fetch_batch_messages)
        await feed.start()
        return feed

    async def _work(self, part: Partition) -> None:
        p = part.number
        try:
            for attempt in range(1_000_000):  # bounded in practice by the lease: a lost one cancels this task
                try:
                    await self._run_partition(part)
                    return
                except (nats.errors.Error, asyncio.TimeoutError, OSError) as e:
                    # a server going away, a leader being elected: start again from the snapshot,
                    # which is where every unacknowledged message is fed again from (rule 2)
                    log.warning("partition %d: %s; resuming from its snapshot (attempt %d)", p, e, attempt + 1)
                    self.counters["resumed"] += 1
                    await asyncio.sleep(min(2.0, 0.2 * (attempt + 1)))
        except LostPartition:
            log.warning("partition %d: another worker wrote its snapshot; stopping work on it", p)
            self.counters["lost"] += 1
        except asyncio.CancelledError:
            raise
        except Exception:
            log.exception("partition %d failed; its lease will lapse and a worker will take it again", p)
        finally:
            self.held.pop(p, None)

    async def _run_partition(self, part: Partition) -> None:
        p = part.number
        a = self.config.agent
        part.last_msg = None
        part.since_snapshot = 0
        sub = await self._claim(part)
        try:
            next_tick = time.monotonic() + a.tick_every_s
            next_state = time.monotonic()
            while not part.release:
                now = time.monotonic()
                if now >= next_tick:
                    next_tick = max(next_tick + a.tick_every_s, now)
                    assert self.nc is not None
                    await self.nc.publish(self.subjects.tick(p), b"")
                msgs = await sub.take(timeout=min(0.25, a.tick_every_s))
                if msgs:
                    await self._process(part, msgs)
                now = time.monotonic()
                if part.since_snapshot and (
                    part.since_snapshot >= self.settings.snapshot_every_messages
                    or now - part.last_snapshot >= self.settings.snapshot_every_s
                ):
                    await self._snapshot_and_ack(part)
                if now >= next_state:
                    next_state = now + a.state_every_s
                    await self._put_states(part, part.monitor.models() if part.monitor else [])
            # handing back (rule 1)
            await self._snapshot_and_ack(part)
        finally:
            await sub.stop()
        with contextlib.suppress(nats.js.errors.APIError):
            await self.buckets["leases"].delete(f"p.{p}", last=part.lease_rev)
        self.counters["handed_back"] += 1
        log.info("partition %d handed back after stream sequence %d", p, part.applied)

    async def _process(self, part: Partition, msgs: list[Any]) -> None:
        mon = part.monitor
        assert mon is not None and self.js is not None
        feed, tick, split = mon.feed, mon.tick, self.subjects.split
        alerts: list[tuple[int, Alert]] = []
        dead: list[tuple[int, DeadLetter]] = []
        planned: list[PlannedWork] = []
        last = None
        # the commands stored before the last of these messages, fed in stream order (rule 7)
        commands = await self._commands_before(part, delivery(msgs[-1].reply).stream_seq) if msgs else []
        k = 0
        for msg in msgs:
            d = delivery(msg.reply)
            if d.stream_seq <= part.applied:  # delivered again (ack wait ran out): already fed
                continue
            while k < len(commands) and commands[k].seq < d.stream_seq:
                c = commands[k]
                k += 1
                if c.seq <= part.applied:
                    continue
                self._sort(c.seq, feed(c.topic or "", c.payload, c.t), alerts, dead, planned, command=True)
                self.counters["commands"] += 1
                part.applied = c.seq
                part.since_snapshot += 1
            t = d.timestamp_ns / 1e9
            _, topic = split(msg.subject)
            if topic is None:
                out = tick(t)
                self.counters["ticks"] += 1
            else:
                out = feed(topic, msg.data, t)
                self.counters["messages"] += 1
            part.applied = d.stream_seq
            part.since_snapshot += 1
            last = msg
            if out:
                self._sort(d.stream_seq, out, alerts, dead, planned)
        if last is not None:
            part.last_msg = last
        if dead:
            await self._publish_dead(part, dead)
        if planned:
            await self._planned_work(part, planned)
        if alerts:
            await self._publish_alerts(part, alerts)

    @staticmethod
    def _sort(
        seq: int,
        out: list[Any],
        alerts: list[tuple[int, Alert]],
        dead: list[tuple[int, DeadLetter]],
        planned: list[PlannedWork],
        command: bool = False,
    ) -> None:
        for ev in out:
            if type(ev) is Alert:
                alerts.append((seq, ev))
            elif type(ev) is DeadLetter:
                # a command's dead letter is the same in every partition: one id, kept once (rule 4)
                dead.append((-seq if command else seq, ev))
            elif type(ev) is PlannedWork:
                planned.append(ev)

    async def _commands_before(self, part: Partition, seq: int) -> list[InboundMessage]:
        """The planned-work commands stored after what the partition has fed and before ``seq``."""
        assert self.commands is not None
        held = [q.applied for q in self.held.values() if q.monitor is not None]
        if held:
            self.commands.forget_before(min(held) + 1)
        return await self.commands.between(part.applied, seq)

    async def _planned_work(self, part: Partition, events: list[PlannedWork]) -> None:
        """Log a window beginning or ending (once a worker, not once a partition); retained state of its models."""
        mine = part.monitor.models() if part.monitor is not None else []
        touched: set[str] = set()
        for ev in events:
            w = ev.window
            covered = [m for m in mine if w["models"] is None or m in w["models"]]
            touched.update(covered)
            key = (w["name"], ev.state, w["start"], w["end"])
            if key in self._planned_logged:
                continue
            self._planned_logged[key] = None
            while len(self._planned_logged) > 256:
                del self._planned_logged[next(iter(self._planned_logged))]
            log.warning("%s", ev.log_line(", ".join(w["models"]) if w["models"] else "every model"))
        if touched:
            await self._put_states(part, sorted(touched))

    async def _publish_alerts(self, part: Partition, alerts: list[tuple[int, Alert]]) -> None:
        assert self.js is not None and self.nc is not None
        stream = self.settings.alert_stream
        new = [(seq, a) for seq, a in alerts if seq > part.mark]
        self.counters["alerts_held_back"] += len(alerts) - len(new)
        for _, a in new:
            body = alert_payload(a)
            await self.js.publish(
                self.subjects.alert(a.model), body, stream=stream, headers={"Nats-Msg-Id": a.alert_id}
            )
            if self.settings.mirror_alerts_to_mqtt:
                await self.nc.publish(self.mqtt_alert_subjects[a.model], body)
            log.warning("alert %s %s %s on %s: %s", a.check, a.state, a.severity, a.model, a.summary)
        self.counters["alerts_published"] += len(new)
        if new:
            part.mark = new[-1][0]
            await self.buckets["snapshots"].put(f"p.{part.number}.mark", str(part.mark).encode())
            await self._put_states(part, sorted({a.model for _, a in new}))

    async def _publish_dead(self, part: Partition, dead: list[tuple[int, DeadLetter]]) -> None:
        """Bad records to the dead-letter stream: raw bytes, reason and detail in headers (rule 4's ids)."""
        assert self.js is not None
        subject = self.subjects.dead(part.number)
        for k, (seq, d) in enumerate(dead):
            headers = {
                # seq < 0: a command's, which every partition meets; the duplicate window keeps one
                "Nats-Msg-Id": f"c-{-seq}-{k}" if seq < 0 else f"{part.number}-{seq}-{k}",
                "Wd-Reason": d.reason,
                "Wd-Topic": d.topic,
                "Wd-Time": rfc3339(d.t),
                "Wd-Detail": d.detail.replace("\r", " ").replace("\n", " ")[:500],
            }
            await self.js.publish(subject, d.payload, stream=self.settings.dead_letter_stream, headers=headers)
            self.counters["dead_letters"] += 1
            if self._dead_logged.get(d.reason, 0.0) + 60.0 <= time.monotonic():
                self._dead_logged[d.reason] = time.monotonic()
                log.warning(
                    "bad record on %s (%s): %s; kept in stream %s (logged once a minute per reason)",
                    d.topic,
                    d.reason,
                    d.detail,
                    self.settings.dead_letter_stream,
                )

    async def _put_states(self, part: Partition, models: list[str]) -> None:
        mon = part.monitor
        if mon is None:
            return
        state = self.buckets["state"]
        ts = rfc3339(time.time())
        for m in models:
            st = dict(mon.state(m), agent=self.config.agent.name, worker=self.id, partition=part.number, ts=ts)
            await state.put(state_key(m), json.dumps(json_safe(st), separators=(",", ":")).encode())

    async def _store_snapshot(self, part: Partition) -> None:
        assert part.monitor is not None
        data = {"format": SNAPSHOT_FORMAT, "seq": part.applied, "worker": self.id, "monitor": part.monitor.snapshot()}
        blob = zlib.compress(json.dumps(data, separators=(",", ":")).encode(), 1)
        snaps = self.buckets["snapshots"]
        key = f"p.{part.number}"
        limit = self.nc.max_payload if self.nc is not None else 0
        if limit and len(blob) > limit - 1024:
            raise SnapshotTooLarge(
                f"partition {part.number}: the snapshot of its {len(part.monitor.models())} models is {len(blob)} bytes "
                f"compressed, over the server's max_payload of {limit}; raise jetstream.partitions (fewer models "
                "a partition) or max_payload in the server's config"
            )
        try:
            if part.snapshot_rev:
                part.snapshot_rev = await snaps.update(key, blob, last=part.snapshot_rev)
            else:
                part.snapshot_rev = await snaps.create(key, blob)
        except nats.js.errors.KeyWrongLastSequenceError:
            raise LostPartition() from None
        part.snapshotted = part.applied
        part.since_snapshot = 0
        part.last_snapshot = time.monotonic()
        self.counters["snapshots"] += 1

    async def _snapshot_and_ack(self, part: Partition) -> None:
        last = part.last_msg
        if not part.since_snapshot:
            return
        await self._store_snapshot(part)
        if last is not None:
            await last.ack_sync(timeout=5)  # ack policy "all": every message up to it
            part.last_msg = None

    # --- status and shutdown -----------------------------------------------------------------
    def status(self) -> dict[str, Any]:
        """What this worker holds and has done, as kept under ``w.<id>`` in the lease bucket."""
        return {
            "worker": self.id,
            "agent": self.config.agent.name,
            "version": __version__,
            "heartbeat": rfc3339(time.time()),
            "uptime_s": round(time.time() - self.started, 3),
            "partitions": sorted(self.held),
            "planned_work": self._windows(),
            "command_lookups": self.commands.gets if self.commands is not None else 0,
            **self.counters,
        }

    def _windows(self) -> list[dict[str, Any]]:
        """The planned-work windows active in the held partitions (every partition meets every window)."""
        seen: dict[str, dict[str, Any]] = {}
        for part in list(self.held.values()):
            if part.monitor is not None:
                for w in part.monitor.active_windows():
                    seen.setdefault(w["name"], w)
        return [seen[n] for n in sorted(seen)]

    async def _shutdown(self) -> None:
        held = list(self.held.values())
        for part in held:
            part.release = True
        tasks = [part.task for part in held if part.task is not None]
        if tasks:
            await asyncio.wait(tasks, timeout=10)
        if self.lease_js is not None:
            with contextlib.suppress(Exception):  # gone at once, not after lease_s
                bucket = self.settings.lease_bucket
                await self.lease_js.purge_stream(f"KV_{bucket}", subject=f"$KV.{bucket}.w.{self.id}")
        if self.nc is not None:
            with contextlib.suppress(Exception):
                await asyncio.wait_for(self.nc.flush(), 5)
            with contextlib.suppress(Exception):
                await self.nc.close()
        log.info("worker %s stopped", self.id)
