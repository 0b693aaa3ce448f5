"""Start a worker, or export the input stream as a recording; map failures to exit codes (no typer here)."""

from __future__ import annotations

import asyncio
import logging
import signal
import sys
from pathlib import Path

import nats
import nats.errors

from watchdog_edge.core.settings import Config
from watchdog_edge.errors import WatchdogError
from watchdog_edge.jetstream.engine import read_input
from watchdog_edge.replay.recording import RecordingWriter


def _fail(message: str, code: int) -> int:
    print(f"watchdog-edge: {message}", file=sys.stderr, flush=True)
    return code


def run_worker(config: Path, worker_id: str | None = None, log_level: str = "info") -> int:
    """Load the config and cards, run one worker until SIGTERM or SIGINT; the process's exit code.

    0 after a clean stop, 2 for a bad config or card, 3 when no server can be reached at start or
    its JetStream refuses (or is not ready within the start timeout) to make the streams and buckets.
    """
    level = getattr(logging, log_level.upper(), None)
    if not isinstance(level, int):
        return _fail(f"--log-level {log_level!r} is not one of debug, info, warning, error", 2)
    logging.basicConfig(level=level, stream=sys.stderr, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from watchdog_edge.files.configfile import load_cards, load_config
    from watchdog_edge.jetstream.subjects import mappings
    from watchdog_edge.jetstream.worker import StartRefused, Worker

    try:
        cfg = load_config(config)
        cards = load_cards(cfg)
        mappings(cfg)  # every model topic must be partitionable
        worker = Worker(cfg, cards, worker_id)
    except WatchdogError as e:
        return _fail(str(e).replace("\n", " "), 2)

    async def main() -> int:
        stop = asyncio.Event()
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGTERM, signal.SIGINT):
            loop.add_signal_handler(sig, stop.set)
        return await worker.run(stop)

    try:
        return asyncio.run(main())
    except StartRefused as e:
        return _fail(str(e), 3)
    except (nats.errors.NoServersError, OSError) as e:
        return _fail(f"cannot reach a NATS server at {', '.join(cfg.jetstream.servers)}: {e}", 3)


async def export_recording(cfg: Config, out: Path, partition: int | None = None, idle_s: float = 1.0) -> int:
    """Write the input stream (or one partition) as a recording with the workers' times; lines written.

    Ticks are written as ticks, so ``replay`` of one partition's recording gives its alerts.
    """
    nc = await nats.connect(servers=cfg.jetstream.servers, connect_timeout=2, max_reconnect_attempts=2)
    n = 0
    try:
        with RecordingWriter(out) as w:
            async for m in read_input(nc.jetstream(), cfg.jetstream, partition, idle_s):
                if m.topic is None:
                    w.tick(m.t)
                else:
                    w.message(m.t, m.topic, m.payload)
                n += 1
    finally:
        await nc.close()
    return n
