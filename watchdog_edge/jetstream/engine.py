"""What the workers need on the JetStream server: streams, buckets, consumers; reading the input back.

Every call here is idempotent, so any number of workers may start at once.
"""

from __future__ import annotations

import asyncio
import base64
import calendar
import contextlib
import json
import math
import time
from collections.abc import AsyncIterator
from dataclasses import dataclass
from typing import Any

import nats.errors
import nats.js.errors
from nats.js import JetStreamContext
from nats.js.api import (
    AckPolicy,
    ConsumerConfig,
    DeliverPolicy,
    RetentionPolicy,
    StorageType,
    StreamConfig,
)
from nats.js.kv import KeyValue

from watchdog_edge.core.settings import JetStreamSettings
from watchdog_edge.jetstream.subjects import COMMANDS, Subjects, delivery

# Refusals that a new or changing cluster gives until its leaders are elected and its peers
# known; every other refusal (a 400 for a bad name, R3 on a single server, ...) needs a person.
# The codes are nats-server's ``err_code`` values (from its errors.json; the cluster test meets
# them on a cluster started a moment before the worker).
WAIT_ERR_CODES = {
    10005: "no suitable peers for placement",
    10008: "JetStream system temporarily unavailable",
    10023: "insufficient resources",
}


def worth_waiting(e: BaseException) -> bool:
    """True for what a JetStream still electing its leaders answers; False for a refusal a person must fix."""
    if isinstance(e, (asyncio.TimeoutError, nats.errors.NoRespondersError, nats.errors.ConnectionClosedError)):
        return True
    if isinstance(e, nats.errors.NoServersError):
        return True
    if isinstance(e, nats.js.errors.ServiceUnavailableError):  # 503: no JetStream leader to answer yet
        return True
    # a 500 can be for good (10074: replicas > 1 on a single server), so only the listed codes wait
    return isinstance(e, nats.js.errors.APIError) and e.err_code in WAIT_ERR_CODES


class StreamMismatch(Exception):
    """A stream of the workers' name exists but does not take their subjects: a person must settle it."""


async def ensure_stream(js: JetStreamContext, config: StreamConfig) -> None:
    """Create the stream unless it exists (a worker never changes a stream someone else made).

    An existing stream must take the workers' subjects; StreamMismatch otherwise.
    """
    try:
        info = await js.stream_info(config.name or "")
        missing = [x for x in config.subjects or [] if x not in (info.config.subjects or [])]
        if missing:
            raise StreamMismatch(
                f"stream {config.name} exists with subjects {info.config.subjects}, without {missing}, which "
                "the workers need; give the workers another stream name in [jetstream] or fix the stream"
            )
    except nats.js.errors.NotFoundError:
        try:
            await js.add_stream(config)
        except nats.js.errors.BadRequestError as refused:
            try:
                await js.stream_info(config.name or "")  # made meanwhile by another worker: fine
            except nats.js.errors.NotFoundError:
                raise refused from None  # not made: the refusal stands


async def ensure_all(
    js: JetStreamContext, s: JetStreamSettings, lease_ttl_s: float, dead_max_count: int, dead_max_bytes: int
) -> dict[str, KeyValue]:
    """The input, alert and dead-letter streams and the three buckets; returns the buckets by role."""
    subjects = Subjects(s.subject_prefix, s.partitions)
    if s.create_streams:
        await ensure_stream(
            js,
            StreamConfig(
                name=s.input_stream,
                subjects=[subjects.all_inbound()],
                retention=RetentionPolicy.LIMITS,
                max_age=s.input_max_age_s,
                storage=StorageType.FILE,
                num_replicas=s.replicas,
                duplicate_window=120.0,
            ),
        )
        await ensure_stream(
            js,
            StreamConfig(
                name=s.alert_stream,
                subjects=[subjects.all_alerts()],
                retention=RetentionPolicy.LIMITS,
                storage=StorageType.FILE,
                num_replicas=s.replicas,
                duplicate_window=s.alert_duplicate_window_s,
            ),
        )
        await ensure_stream(
            js,
            StreamConfig(
                name=s.dead_letter_stream,
                subjects=[subjects.all_dead()],
                retention=RetentionPolicy.LIMITS,
                max_msgs=dead_max_count,
                max_bytes=dead_max_bytes,
                storage=StorageType.FILE,
                num_replicas=s.replicas,
                duplicate_window=s.alert_duplicate_window_s,
            ),
        )
    buckets = {}
    for role, name, ttl in (
        ("snapshots", s.snapshot_bucket, None),
        ("state", s.state_bucket, None),
        ("leases", s.lease_bucket, lease_ttl_s),
    ):
        try:
            buckets[role] = await js.key_value(name)
        except nats.js.errors.BucketNotFoundError:
            if not s.create_streams:
                raise
            try:
                buckets[role] = await js.create_key_value(bucket=name, history=1, ttl=ttl, replicas=s.replicas)
            except nats.js.errors.BadRequestError as refused:
                try:
                    buckets[role] = await js.key_value(name)
                except nats.js.errors.BucketNotFoundError:
                    raise refused from None
    return buckets


async def start_consumer(js: JetStreamContext, s: JetStreamSettings, p: int, after_seq: int) -> str:
    """(Re)make partition ``p``'s durable consumer so that it delivers from stream sequence ``after_seq + 1``.

    Only the holder of the partition's lease calls this. Starting at the snapshot's sequence
    (rather than waiting for the previous holder's unacknowledged messages to come back after
    their ack wait) keeps the messages of a model in stream order, which the core needs.
    """
    name = f"{s.durable_prefix}{p}"
    try:
        await js.delete_consumer(s.input_stream, name)
    except nats.js.errors.NotFoundError:
        pass
    await js.add_consumer(
        s.input_stream,
        ConsumerConfig(
            durable_name=name,
            filter_subject=Subjects(s.subject_prefix, s.partitions).partition_filter(p),
            deliver_policy=DeliverPolicy.BY_START_SEQUENCE if after_seq else DeliverPolicy.ALL,
            opt_start_seq=after_seq + 1 if after_seq else None,
            # acknowledged after each snapshot: one ack covers every message before it
            ack_policy=AckPolicy.ALL,
            ack_wait=max(60.0, 6 * s.snapshot_every_s),
            max_ack_pending=2 * s.snapshot_every_messages + 2 * s.fetch_batch_messages,
            # The consumer's own state (what it delivered, what was acknowledged) is kept in the
            # server's memory, not written to its store: no holder reads it back, since every
            # claim re-makes the consumer from the snapshot's sequence. The messages stay in the
            # file store, replicated. It cuts the server's CPU per record (bench/jetstream_throughput.py);
            # a consumer lost with a restarted server is re-made from the snapshot (PullFeed).
            mem_storage=True,
        ),
    )
    return name


@dataclass(frozen=True, slots=True)
class InboundMessage:
    """One stored inbound message: partition, stream sequence, stored time, topic (None: a tick), payload."""

    partition: int
    seq: int
    t: float
    topic: str | None
    payload: bytes


def rfc3339_ns(text: str) -> int:
    """Unix nanoseconds of the server's RFC 3339 time (it gives nanoseconds; floats would lose them).

    >>> rfc3339_ns("2026-12-02T17:16:40.843405263Z"), rfc3339_ns("1970-01-01T00:00:01.5+00:00")
    (1796231800843405263, 1500000000)
    """
    body, offset = text, 0
    if body.endswith("Z"):
        body = body[:-1]
    elif len(body) > 6 and body[-6] in "+-" and body[-3] == ":":
        sign = 1 if body[-6] == "+" else -1
        offset = sign * (int(body[-5:-3]) * 3600 + int(body[-2:]) * 60)
        body = body[:-6]
    whole, _, frac = body.partition(".")
    seconds = calendar.timegm(time.strptime(whole, "%Y-%m-%dT%H:%M:%S")) - offset
    return seconds * 1_000_000_000 + int((frac + "000000000")[:9])


async def next_command(nc: Any, s: JetStreamSettings, from_seq: int, timeout: float = 5.0) -> InboundMessage | None:
    """The first planned-work command stored at stream sequence ``from_seq`` or later; None when there is none.

    One request to the stream (a message get by subject); stream sequences only grow, so a
    "none" holds for every sequence the caller has already seen delivered.
    """
    subjects = Subjects(s.subject_prefix, s.partitions)
    req = {"seq": from_seq, "next_by_subj": subjects.all_commands()}
    resp = await nc.request(f"$JS.API.STREAM.MSG.GET.{s.input_stream}", json.dumps(req).encode(), timeout=timeout)
    doc = json.loads(resp.data)
    err = doc.get("error")
    if err is not None:
        if err.get("code") == 404:
            return None
        raise nats.js.errors.APIError(
            code=err.get("code"), err_code=err.get("err_code"), description=err.get("description")
        )
    m = doc["message"]
    p, topic = subjects.split(m["subject"])
    data = base64.b64decode(m["data"]) if m.get("data") else b""
    return InboundMessage(p, int(m["seq"]), rfc3339_ns(m["time"]) / 1e9, topic, data)


class Commands:
    """The planned-work commands of the input stream, read once for every partition a worker holds.

    A message get by subject makes the server pass over every message from the sequence given
    to the first command (about 0.16 ms of its CPU per 1,000 messages, measured on 2.9), so a
    get per batch and partition would cost a scan of the backlog each time. Here the worker
    keeps one stretch of sequences, ``known_from`` to ``known_to``, in which it holds every
    command, and extends it only past its end: a "none" reaches the stream's last sequence,
    asked just before, since a command stored later gets a higher sequence. With traffic
    flowing, nearly every batch passes the end, so the stretch is extended at most every
    ``gap_s``: a partition then waits that long at most, and the server answers at most
    two requests per ``gap_s`` per worker whatever the rate.
    """

    def __init__(self, nc: Any, js: JetStreamContext, s: JetStreamSettings, gap_s: float = 0.05) -> None:
        self.nc, self.js, self.s = nc, js, s
        self.gap_s = gap_s
        self.asked_at = -math.inf
        self.known_from = 1
        self.known_to = 0
        self.found: list[InboundMessage] = []
        self.lock = asyncio.Lock()
        self.gets = 0  # message gets made (for the status counters)

    async def between(self, after: int, before: int) -> list[InboundMessage]:
        """The commands stored after sequence ``after`` and before ``before``, in stream order."""
        async with self.lock:
            if after + 1 < self.known_from:  # a partition resuming from an older snapshot: start again there
                self.known_from, self.known_to, self.found = after + 1, after, []
            while self.known_to < before - 1:
                wait = self.asked_at + self.gap_s - asyncio.get_running_loop().time()
                if wait > 0:
                    await asyncio.sleep(wait)
                self.asked_at = asyncio.get_running_loop().time()
                last = (await self.js.stream_info(self.s.input_stream)).state.last_seq
                found = await next_command(self.nc, self.s, self.known_to + 1)
                self.gets += 1
                if found is None:
                    self.known_to = max(before - 1, last)
                    break
                self.found.append(found)
                self.known_to = found.seq
            return [c for c in self.found if after < c.seq < before]

    def forget_before(self, seq: int) -> None:
        """Drop what no held partition needs any more (every one has fed past ``seq``)."""
        if seq > self.known_from:
            self.found = [c for c in self.found if c.seq >= seq]
            self.known_from = min(seq, self.known_to + 1)


async def read_input(
    js: JetStreamContext, s: JetStreamSettings, partition: int | None = None, idle_s: float = 1.0
) -> AsyncIterator[InboundMessage]:
    """Every message of the input stream (or one partition and the commands) in stream order, up to its last now.

    It also stops when none comes for ``idle_s``.

        The time is the one the workers use: the stream's stored time, so a replay of this gives
        the workers' alerts.
    """
    subjects = Subjects(s.subject_prefix, s.partitions)
    # one partition's holder also reads the commands (subjects.py, rule 4); the server (2.9)
    # takes one filter a consumer, so the others are skipped here
    flt = subjects.all_inbound()
    last = (await js.stream_info(s.input_stream)).state.last_seq
    sub = await js.subscribe(flt, stream=s.input_stream, ordered_consumer=True, deliver_policy=DeliverPolicy.ALL)
    try:
        while True:
            try:
                msg = await sub.next_msg(timeout=idle_s)
            except (asyncio.TimeoutError, nats.errors.TimeoutError):
                return
            d = delivery(msg.reply)
            p, topic = subjects.split(msg.subject)
            if partition is None or p == partition or p == COMMANDS:
                yield InboundMessage(p, d.stream_seq, d.timestamp_ns / 1e9, topic, msg.data)
            if d.stream_seq >= last:
                return
    finally:
        await sub.unsubscribe()


class PullFeed:
    """A pull consumer read in batches with one pull request outstanding at a time.

    nats-py's ``fetch`` waits for each message with its own timer task; here the messages are
    gathered by a subscription callback and taken as a list, which halves the client's cost
    per message (see bench/jetstream_throughput.py).
    """

    def __init__(
        self, nc: Any, stream: str, durable: str, batch: int, expires_s: float = 1.0, unserved_s: float = 10.0
    ) -> None:
        self.nc = nc
        self.unserved_s = unserved_s
        self.unserved_since: float | None = None
        self.subject = f"$JS.API.CONSUMER.MSG.NEXT.{stream}.{durable}"
        self.batch = batch
        self.expires_s = expires_s
        self.msgs: list[Any] = []
        self.remaining = 0  # messages the outstanding request may still bring
        self.asked_at = 0.0
        self.ready = asyncio.Event()
        self.gone: str | None = None  # why the consumer stopped serving us
        self.sub: Any = None
        self.inbox = ""

    async def start(self) -> None:
        self.inbox = self.nc.new_inbox()
        self.sub = await self.nc.subscribe(self.inbox, cb=self._on_msg)

    async def _on_msg(self, msg: Any) -> None:
        if msg.reply:  # a message of the stream
            self.unserved_since = None
            self.msgs.append(msg)
            self.remaining -= 1
            if self.remaining <= 0 or len(self.msgs) >= self.batch:
                self.ready.set()
            return
        status = (msg.headers or {}).get("Status", "")
        if status == "100":  # an idle heartbeat
            return
        self.remaining = 0  # the request is over: no messages, timed out, or refused
        if status == "409" and "Deleted" in (msg.headers or {}).get("Description", ""):
            self.gone = "the consumer was deleted"
        self.unserved_since = None  # an answer (a timeout too): the consumer is served
        self.ready.set()

    async def take(self, timeout: float) -> list[Any]:
        """What has arrived; waits up to ``timeout`` when nothing has. Raises when the consumer is gone."""
        loop = asyncio.get_running_loop()
        if self.remaining > 0 and loop.time() - self.asked_at > self.expires_s + 2.0:
            # no answer at all, not even "timed out": lost with a reconnect, a leader being
            # elected, or no consumer any more (a server restarted without it: its state was in
            # memory). Ask again; when nothing answers for ``unserved_s``, the holder re-makes it.
            if self.unserved_since is None:
                self.unserved_since = self.asked_at
            elif loop.time() - self.unserved_since > self.unserved_s:
                self.gone = f"nothing has answered the consumer's pull requests for {self.unserved_s:.0f} s"
            self.remaining = 0
        if self.remaining <= 0:
            self.remaining = self.batch
            self.asked_at = loop.time()
            req = {"batch": self.batch, "expires": int(self.expires_s * 1e9)}
            await self.nc.publish(self.subject, json.dumps(req).encode(), reply=self.inbox)
        if not self.msgs:
            self.ready.clear()
            with contextlib.suppress(asyncio.TimeoutError):
                await asyncio.wait_for(self.ready.wait(), timeout)
        if self.gone:
            raise ConsumerGone(self.gone)
        out, self.msgs = self.msgs, []
        return out

    async def stop(self) -> None:
        if self.sub is not None:
            with contextlib.suppress(Exception):
                await self.sub.unsubscribe()


class ConsumerGone(nats.errors.Error):
    """The consumer was deleted (another holder re-made it) or nothing serves it: resume from the snapshot."""
