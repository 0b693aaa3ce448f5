"""Records per second through JetStream workers, against a bare nats-py consumer in the same run.

One nats-server (JetStream, on free loopback ports, started and stopped here) is fresh for
each measurement. Once the consumers are ready they are paused (SIGSTOP), this process
publishes the same records (one record a
message: predictions with a truth for each, over many models, through the workers' subject
mapping), and the consumers are let go (SIGCONT):

- reference: a bare nats-py consumer in its own process that only fetches, decodes each
  payload (orjson) and acknowledges each message;
- one worker, then two workers (processes of ``watchdog-edge jetstream run``), once every
  partition is held, until every partition's consumer has nothing left to deliver and the
  workers have finished what they pulled (their CPU time stops growing).

Each is timed from SIGCONT until the last record is consumed.

It prints records per second of each, their ratios, CPU seconds per record of the workers
and of the server (user + system time of the processes over the run; the figures that carry
to a machine with more cores), peak memory per worker, and the failover time: SIGKILL one of
two workers and time until the other holds every partition (goal: under 5 s with lease_s = 3).

It also prints the ceiling of the two-worker ratio that this run's CPU per record allows. A
worker is one Python thread: with ``w`` CPU seconds per record for the workers and ``s`` for
the server, on ``C`` cores that nothing else uses, ``n`` workers go at most
``min(n / w, C / (w + s))`` records per second. With two workers on two cores the server
takes its share of the cores the workers need, so two workers over one is at most
``min(2/w2, C/(w2+s2)) / min(1/w1, C/(w1+s1))``, i.e. ``2 w / (w + s)`` when the figures are
alike: under 1.5 as soon as ``s > w / 3``. Other work on the machine (the load average is
printed) lowers what the wall clock shows further; the CPU per record does not depend on it.

``--per-message K`` adds labelled rows with the same records sent K to a message (a JSON array,
which the core takes as K records): the server's cost is per message, so it shows what a
gateway that batches gets. The plain rows keep one record a message.

    python3 bench/jetstream_throughput.py [--records 100000] [--models 64] [--partitions 8] [--per-message 10]
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

import nats  # noqa: E402
import numpy as np  # noqa: E402
from broker import free_port  # noqa: E402
from jetstream_setup import WorkerProc, mappings_for, write_setup  # noqa: E402
from natsserver import NatsServer  # noqa: E402

from watchdog_edge.files.configfile import load_config  # noqa: E402
from watchdog_edge.jetstream.subjects import topic_to_subject  # noqa: E402

BARE = r"""
import asyncio, sys, time, orjson, nats
async def main(url, partitions, total):
    nc = await nats.connect(url)
    js = nc.jetstream()
    subs = [await js.pull_subscribe(f"wd.in.{p}.>", durable=f"bare{p}", stream="WATCHDOG_IN") for p in range(partitions)]
    done = 0
    print("ready", flush=True)
    c0 = time.process_time()
    async def one(sub):
        nonlocal done
        while done < total:
            try:
                msgs = await sub.fetch(500, timeout=0.25)
            except (nats.errors.TimeoutError, asyncio.TimeoutError):
                continue
            for m in msgs:
                orjson.loads(m.data)
                await m.ack()
            done += len(msgs)
    await asyncio.gather(*(one(s) for s in subs))
    print((time.process_time() - c0) / total, flush=True)
    await nc.close()
asyncio.run(main(sys.argv[1], int(sys.argv[2]), int(sys.argv[3])))
"""


def messages(records: int, models: int, seed: int = 1) -> list[tuple[str, bytes]]:
    """Predictions and, 20 predictions later, their truths; one record a message."""
    rng = np.random.default_rng(seed)
    out: list[tuple[str, bytes]] = []
    pending: list[tuple[str, bytes]] = []
    i = 0
    while len(out) < records:
        m = f"m{i % models}"
        out.append((f"plant/{m}/pred", json.dumps({"id": i, "value": 10.0, "model_version": "v1"}).encode()))
        pending.append((f"plant/{m}/truth", json.dumps({"id": i, "value": 10.0 + float(rng.normal())}).encode()))
        if len(pending) > 20:
            out.append(pending.pop(0))
        i += 1
    return out[:records]


def per_message(msgs: list[tuple[str, bytes]], k: int) -> list[tuple[str, bytes]]:
    """The same records, ``k`` of one topic to a message (a JSON array), in the order the k-th of each came."""
    out: list[tuple[str, bytes]] = []
    held: dict[str, list[bytes]] = {}
    for topic, payload in msgs:
        buf = held.setdefault(topic, [])
        buf.append(payload)
        if len(buf) == k:
            out.append((topic, b"[" + b",".join(buf) + b"]"))
            held[topic] = []
    out += [(t, b"[" + b",".join(buf) + b"]") for t, buf in held.items() if buf]
    return out


def ceiling(cores: int, w1: float, s1: float, w2: float, s2: float) -> float:
    """Two workers over one at most, from CPU seconds per record of workers (w) and server (s) in each run.

    >>> round(ceiling(2, 12.4e-6, 4.4e-6, 12.4e-6, 4.4e-6), 3)
    1.476
    """
    return min(2 / w2, cores / (w2 + s2)) / min(1 / w1, cores / (w1 + s1))


async def _make_stream(url: str) -> None:
    from nats.js.api import StreamConfig

    nc = await nats.connect(url)
    await nc.jetstream().add_stream(StreamConfig(name="WATCHDOG_IN", subjects=["wd.in.>"], duplicate_window=120.0))
    await nc.close()


async def _fill(url: str, msgs: list[tuple[str, bytes]]) -> None:
    nc = await nats.connect(url)
    js = nc.jetstream()
    for k, (topic, payload) in enumerate(msgs):
        await nc.publish(topic_to_subject(topic), payload)
        if k % 5000 == 4999:
            await nc.flush()
            while (await js.stream_info("WATCHDOG_IN")).state.messages < k - 20000:
                await asyncio.sleep(0.01)
    await nc.flush()
    for _ in range(600):
        if (await js.stream_info("WATCHDOG_IN")).state.messages >= len(msgs):
            break
        await asyncio.sleep(0.05)
    await nc.close()


class Probe:
    """One connection that reads the partition leases and the consumers' progress."""

    def __init__(self, url: str, partitions: int) -> None:
        self.url = url
        self.partitions = partitions

    async def __aenter__(self) -> Probe:
        self.nc = await nats.connect(self.url)
        self.js = self.nc.jetstream()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.nc.close()

    async def held(self) -> dict[str, str]:
        out: dict[str, str] = {}
        try:
            kv = await self.js.key_value("watchdog_leases")
            for k in await kv.keys():
                if k.startswith("p."):
                    out[k] = ((await kv.get(k)).value or b"").decode()
        except Exception:
            pass
        return out

    async def even(self, n: int) -> None:
        """Wait until ``n`` workers hold an even share each."""
        for _ in range(3000):
            owners = list((await self.held()).values())
            if len(owners) == self.partitions and all(
                owners.count(f"w{i + 1}") == self.partitions // n for i in range(n)
            ):
                return
            await asyncio.sleep(0.02)
        raise RuntimeError("the workers did not share the partitions evenly within 60 s")

    async def drained(self, durable: str) -> bool:
        """Nothing left to deliver on any partition (the last batch is then in hand)."""
        for p in range(self.partitions):
            try:
                if (await self.js.consumer_info("WATCHDOG_IN", f"{durable}{p}")).num_pending:
                    return False
            except Exception:
                return False
        return True


def cpu_ns(pid: int) -> int:
    """CPU time of a process in nanoseconds (the scheduler's own count, finer than clock ticks)."""
    return int(Path(f"/proc/{pid}/schedstat").read_text().split()[0])


async def finished(probe: Probe, pids: list[int], t0: float, quiet_s: float = 0.5) -> float:
    """Seconds from ``t0`` until the workers finished the records: every partition drained, and then
    the last moment the workers were busy (over 5 ms of CPU in a 20 ms poll) before ``quiet_s`` of quiet.

    Drained alone is not the end: the last pulled batches (up to ``fetch_batch_messages`` a
    partition) are then still in the workers' hands.
    """
    last_busy = t0
    prev = sum(cpu_ns(p) for p in pids)
    drained = False
    for k in range(30000):
        await asyncio.sleep(0.02)
        now = time.perf_counter()
        cur = sum(cpu_ns(p) for p in pids)
        if cur - prev > 5_000_000:  # a quarter of a core: records, not a lease renewal's blip
            last_busy = now
        prev = cur
        if not drained and k % 5 == 0:
            drained = await probe.drained("watchdog-p")
        if drained and now - last_busy > quiet_s:
            break
    return last_busy - t0


def cpu_s(pid: int) -> float:
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def peak_rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024
    return float("nan")


def fresh(tmp: Path, name: str, args, lease_s: float = 8.0) -> tuple[NatsServer, Path]:
    port = free_port()
    folder = tmp / name
    models = [f"m{i}" for i in range(args.models)]
    extra = "snapshot_every_messages = 5000\n"  # the default; fetch_batch_messages too is left at its default
    cfg = write_setup(folder, [f"nats://127.0.0.1:{port}"], models, partitions=args.partitions, jetstream_extra="")
    text = cfg.read_text()
    text = (
        text.replace("lease_s = 1.5", f"lease_s = {lease_s}")
        .replace("snapshot_every_s = 1.0", "snapshot_every_s = 10.0")
        .replace("snapshot_every_messages = 200\n", "")
        .replace("fetch_batch_messages = 100\n", "")
        .replace("[jetstream]\n", "[jetstream]\n" + extra)
        # Ticks cost time, not records (each partition's checks once a tick): one every 30 s keeps
        # them out of a run of a few seconds, whose figure is records per second.
        .replace("tick_every_s = 0.5", "tick_every_s = 30.0")
        .replace("state_every_s = 1.0", "state_every_s = 60.0")  # the default
    )
    cfg.write_text(text)
    load_config(cfg)
    srv = NatsServer(folder / "srv", port=port, mappings=mappings_for(cfg), mqtt=False)
    asyncio.run(_make_stream(srv.url))
    return srv, cfg


def run_workers(tmp: Path, n: int, args, msgs, records: int | None = None, tag: str = "") -> dict:
    """``n`` workers on a fresh server; ``records`` is how many records ``msgs`` hold (one a message by default)."""
    records = records or len(msgs)
    srv, cfg = fresh(tmp, f"w{n}{tag}", args)
    workers = [WorkerProc(cfg, f"w{i + 1}", tmp / f"w{n}{tag}-{i + 1}.log") for i in range(n)]

    async def measure() -> dict:
        async with Probe(srv.url, args.partitions) as probe:
            await probe.even(n)
            # paused (SIGSTOP) while the stream is filled, well within lease_s; timed from SIGCONT
            for w in workers:
                os.kill(w.proc.pid, signal.SIGSTOP)
            await _fill(srv.url, msgs)
            c0 = sum(cpu_s(w.proc.pid) for w in workers)
            s0 = cpu_s(srv.proc.pid)
            t0 = time.perf_counter()
            for w in workers:
                os.kill(w.proc.pid, signal.SIGCONT)
            elapsed = await finished(probe, [w.proc.pid for w in workers], t0)
            cpu = sum(cpu_s(w.proc.pid) for w in workers) - c0
            server_cpu = cpu_s(srv.proc.pid) - s0
            return {
                "server_cpu_per_record": server_cpu / records,
                "rate": records / elapsed,
                "cpu_per_record": cpu / records,
                "peak_mib": [peak_rss_mib(w.proc.pid) for w in workers],
            }

    try:
        return asyncio.run(measure())
    finally:
        for w in workers:
            w.stop()
        srv.stop()


def run_failover(tmp: Path, args, lease_s: float) -> float:
    """Two workers; SIGKILL the first; seconds until the second holds every partition."""
    srv, cfg = fresh(tmp, "failover", args, lease_s)
    workers = [WorkerProc(cfg, f"w{i + 1}", tmp / f"f-{i + 1}.log") for i in range(2)]

    async def measure() -> float:
        async with Probe(srv.url, args.partitions) as probe:
            await probe.even(2)
            await asyncio.sleep(1.0)
            os.kill(workers[0].proc.pid, signal.SIGKILL)
            t0 = time.perf_counter()
            for _ in range(3000):
                held = await probe.held()
                if len(held) == args.partitions and set(held.values()) == {"w2"}:
                    break
                await asyncio.sleep(0.05)
            return time.perf_counter() - t0

    try:
        return asyncio.run(measure())
    finally:
        for w in workers:
            w.stop()
        srv.stop()


def run_bare(tmp: Path, args, msgs) -> dict:
    srv, _ = fresh(tmp, "bare", args)
    proc = subprocess.Popen(
        [sys.executable, "-c", BARE, srv.url, str(args.partitions), str(len(msgs))],
        stdout=subprocess.PIPE,
        text=True,
    )
    try:
        assert proc.stdout is not None and proc.stdout.readline().strip() == "ready"
        os.kill(proc.pid, signal.SIGSTOP)
        asyncio.run(_fill(srv.url, msgs))
        t0 = time.perf_counter()
        os.kill(proc.pid, signal.SIGCONT)
        cpu = float(proc.stdout.readline())
        elapsed = time.perf_counter() - t0
        proc.wait(timeout=60)
        return {"rate": len(msgs) / elapsed, "cpu_per_record": cpu}
    finally:
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
            proc.wait()
        srv.stop()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--records", type=int, default=100_000)
    ap.add_argument("--models", type=int, default=64)
    ap.add_argument("--partitions", type=int, default=8)
    ap.add_argument("--per-message", type=int, default=0, help="Also run with this many records a message.")
    args = ap.parse_args()
    msgs = messages(args.records, args.models)
    load0 = os.getloadavg()
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        bare = run_bare(tmp, args, msgs)
        one = run_workers(tmp, 1, args, msgs)
        two = run_workers(tmp, 2, args, msgs)
        two["failover_s"] = run_failover(tmp, args, 3.0)
        if args.per_message > 1:
            batched = per_message(msgs, args.per_message)
            one_b = run_workers(tmp, 1, args, batched, len(msgs), "b")
            two_b = run_workers(tmp, 2, args, batched, len(msgs), "b")
    load1 = os.getloadavg()
    cores = os.cpu_count() or 1
    print(f"{args.records} records, {args.models} models, {args.partitions} partitions, {cores} cores")
    print(
        f"load average (1 min) at start {load0[0]:.2f}, at end {load1[0]:.2f}: "
        "other work on the machine takes cores from the wall-clock figures"
    )
    print(f"bare nats-py consumer (decode + ack each): {bare['rate']:>9,.0f} records/s")
    print(
        f"one worker:                               {one['rate']:>9,.0f} records/s  "
        f"({one['rate'] / bare['rate']:.2f} x bare)"
    )
    print(
        f"two workers:                              {two['rate']:>9,.0f} records/s  "
        f"({two['rate'] / one['rate']:.2f} x one worker)"
    )
    c1, c2 = one["cpu_per_record"] * 1e6, two["cpu_per_record"] * 1e6
    print(
        f"CPU per record: bare {bare['cpu_per_record'] * 1e6:.1f} us, one worker {c1:.1f} us, "
        f"two workers {c2:.1f} us ({(c2 / c1 - 1) * 100:+.0f} %)"
    )
    print(
        f"nats-server CPU per record meanwhile: one worker {one['server_cpu_per_record'] * 1e6:.1f} us, "
        f"two workers {two['server_cpu_per_record'] * 1e6:.1f} us"
    )
    print(
        f"peak memory per worker: one {one['peak_mib'][0]:.0f} MiB; two "
        + ", ".join(f"{m:.0f}" for m in two["peak_mib"])
        + " MiB"
    )
    print(f"failover after SIGKILL of one of two workers (lease_s 3): {two['failover_s']:.2f} s")
    w1, s1 = one["cpu_per_record"], one["server_cpu_per_record"]
    w2, s2 = two["cpu_per_record"], two["server_cpu_per_record"]
    top = ceiling(cores, w1, s1, w2, s2)
    print(
        f"ceiling of two workers over one from this run's CPU per record: min(2/w2, {cores}/(w2+s2)) / "
        f"min(1/w1, {cores}/(w1+s1)) = {top:.2f} x; measured {two['rate'] / one['rate']:.2f} x "
        f"({two['rate'] / one['rate'] / top * 100:.0f} % of the ceiling)"
    )
    if args.per_message > 1:
        k = args.per_message
        print(f"-- the same records, {k} to a message (a JSON array; not the benchmark's shape) --")
        print(f"one worker, {k} a message:  {one_b['rate']:>9,.0f} records/s")
        print(
            f"two workers, {k} a message: {two_b['rate']:>9,.0f} records/s  "
            f"({two_b['rate'] / one_b['rate']:.2f} x one worker)"
        )
        wb1, sb1 = one_b["cpu_per_record"], one_b["server_cpu_per_record"]
        wb2, sb2 = two_b["cpu_per_record"], two_b["server_cpu_per_record"]
        print(
            f"CPU per record, {k} a message: one worker {wb1 * 1e6:.1f} us (server {sb1 * 1e6:.1f} us), "
            f"two workers {wb2 * 1e6:.1f} us (server {sb2 * 1e6:.1f} us); "
            f"ceiling {ceiling(cores, wb1, sb1, wb2, sb2):.2f} x"
        )


if __name__ == "__main__":
    main()
