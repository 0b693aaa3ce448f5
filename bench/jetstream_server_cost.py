"""nats-server CPU per record for settings of the partition consumers, read as a worker reads them.

The workers' own CPU per record hardly depends on these settings; the server's does. Here a
client in this process pulls every partition with the workers' ``PullFeed`` (one pull request
outstanding per partition), reads each message's stream sequence and acknowledges every
5000 messages of a partition (ack policy "all"), as a worker does after its snapshots; no
core runs. One fresh nats-server (file storage) per measurement, filled with the records of
``bench/jetstream_throughput.py`` through the workers' subject mapping before the consumers
are made; the server's user + system CPU is read from /proc over the consuming alone.
The settings are measured in turn, round after round, so a change in the machine's load
meets each alike.

- ``file``: the consumer's state (delivered, acknowledged) written to the server's store;
- ``memory``: kept in the server's memory (``mem_storage``), as the workers make them;
- ``batch``: messages asked for in one pull request (``jetstream.fetch_batch_messages``);
- ``no acks``: ack policy "none", for reference only (the workers acknowledge).

    python3 bench/jetstream_server_cost.py [--records 200000] [--rounds 3] [--partitions 8]
"""

from __future__ import annotations

import argparse
import asyncio
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))
sys.path.insert(0, str(ROOT / "bench"))

import nats  # noqa: E402
from jetstream_throughput import _fill, cpu_s, fresh, messages  # noqa: E402
from nats.js.api import AckPolicy, ConsumerConfig, DeliverPolicy  # noqa: E402

from watchdog_edge.jetstream.engine import PullFeed  # noqa: E402
from watchdog_edge.jetstream.subjects import delivery  # noqa: E402

SETTINGS = {
    "file, batch 2000": {"mem": False, "batch": 2000, "acks": True},
    "memory, batch 2000": {"mem": True, "batch": 2000, "acks": True},
    "file, batch 5000": {"mem": False, "batch": 5000, "acks": True},
    "memory, batch 5000": {"mem": True, "batch": 5000, "acks": True},
    "no acks (reference), file, batch 2000": {"mem": False, "batch": 2000, "acks": False},
}


async def consume(url: str, partitions: int, total: int, mem: bool, batch: int, acks: bool) -> None:
    """Make one consumer a partition and read ``total`` messages as a worker would."""
    nc = await nats.connect(url)
    js = nc.jetstream()
    feeds = []
    for p in range(partitions):
        await js.add_consumer(
            "WATCHDOG_IN",
            ConsumerConfig(
                durable_name=f"c{p}",
                filter_subject=f"wd.in.{p}.>",
                deliver_policy=DeliverPolicy.ALL,
                ack_policy=AckPolicy.ALL if acks else AckPolicy.NONE,
                ack_wait=60.0,
                max_ack_pending=2 * 5000 + 2 * batch,
                mem_storage=mem,
            ),
        )
        feed = PullFeed(nc, "WATCHDOG_IN", f"c{p}", batch)
        await feed.start()
        feeds.append(feed)
    done = 0

    async def one(feed: PullFeed) -> None:
        nonlocal done
        since, last = 0, None
        while done < total:
            msgs = await feed.take(0.25)
            for m in msgs:
                delivery(m.reply)
            if msgs:
                last = msgs[-1]
                since += len(msgs)
                done += len(msgs)
            if acks and since >= 5000 and last is not None:
                await last.ack_sync(timeout=5)
                since = 0
        if acks and since and last is not None:
            await last.ack_sync(timeout=5)

    await asyncio.gather(*(one(f) for f in feeds))
    await nc.close()


def measure(tmp: Path, args: argparse.Namespace, msgs: list[tuple[str, bytes]], setting: dict) -> float:
    """Server CPU seconds per record while the consumers read every record."""
    srv, _ = fresh(tmp, "srv", args)
    try:
        asyncio.run(_fill(srv.url, msgs))
        s0 = cpu_s(srv.proc.pid)
        asyncio.run(consume(srv.url, args.partitions, len(msgs), **setting))
        return (cpu_s(srv.proc.pid) - s0) / len(msgs)
    finally:
        srv.stop()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--records", type=int, default=200_000)
    ap.add_argument("--models", type=int, default=64)
    ap.add_argument("--partitions", type=int, default=8)
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    msgs = messages(args.records, args.models)
    got: dict[str, list[float]] = {name: [] for name in SETTINGS}
    load0 = os.getloadavg()[0]
    t0 = time.monotonic()
    for _ in range(args.rounds):
        for name, setting in SETTINGS.items():
            with tempfile.TemporaryDirectory() as d:
                got[name].append(measure(Path(d), args, msgs, setting))
    print(
        f"{args.records} records, {args.models} models, {args.partitions} partitions, {args.rounds} rounds "
        f"in {time.monotonic() - t0:.0f} s; load average (1 min) {load0:.2f} at start, {os.getloadavg()[0]:.2f} at end"
    )
    base = statistics.median(got["file, batch 2000"])
    for name, values in got.items():
        med = statistics.median(values)
        runs = ", ".join(f"{v * 1e6:.2f}" for v in values)
        print(f"{name:40s} server CPU per record {med * 1e6:.2f} us (median of {runs}); {med / base - 1:+.0%}")


if __name__ == "__main__":
    main()
