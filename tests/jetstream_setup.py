"""Shared set-up of the JetStream tests and bench: cards, config, worker processes, traffic, reading streams."""

from __future__ import annotations

import asyncio
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import nats
import nats.errors
import numpy as np

from watchdog_edge.agent.agent import alert_payload
from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import Config
from watchdog_edge.files.cardfile import save_card
from watchdog_edge.files.configfile import load_cards, load_config
from watchdog_edge.jetstream.engine import read_input
from watchdog_edge.jetstream.subjects import COMMANDS, server_config
from watchdog_edge.jetstream.worker import partition_config
from watchdog_edge.replay.recording import RecordLine, replay

REPO = Path(__file__).resolve().parents[1]


def write_setup(
    tmp: Path,
    servers: list[str],
    models: list[str],
    partitions: int = 4,
    jetstream_extra: str = "",
    checks: str = "[models.checks.gap]\nevaluate_every_pairs = 5\n[models.checks.feed_stop]\nenabled = false\n",
    replicas: int = 1,
) -> Path:
    """Cards (held-out squared loss 1.0) for ``models`` and a config with one model_level entry."""
    (tmp / "cards").mkdir(parents=True, exist_ok=True)
    for m in models:
        card = ModelCard(
            model_id=m,
            model_version="v1",
            loss="squared",
            training={"loss": 0.9, "count": 5000},
            fitted_parameters=4,
            least_squares=True,
            holdout={"loss": 1.0, "count": 1000},
        )
        save_card(card, tmp / "cards" / f"{m}.json")
    checks += "[models.checks.range]\nenabled = false\n[models.checks.shift]\nenabled = false\n"
    text = f"""
[agent]
name = "central"
tick_every_s = 0.5
state_every_s = 1.0

[jetstream]
servers = {json.dumps(servers)}
partitions = {partitions}
replicas = {replicas}
lease_s = 1.5
snapshot_every_s = 1.0
snapshot_every_messages = 200
fetch_batch_messages = 100
alert_duplicate_window_s = 60
{jetstream_extra}

[[models]]
id = "site"
model_level = 2
card = "cards/{{model}}.json"
prediction_topic = "plant/+/pred"
truth_topic = "plant/+/truth"
[models.window]
size_pairs = 60
min_pairs = 40
{checks}
"""
    cfg = tmp / "config.toml"
    cfg.write_text(text)
    return cfg


def mappings_for(cfg: Path) -> str:
    return server_config(load_config(cfg))


class WorkerProc:
    """A worker started as its own process through the command line; stopped or killed by its pid."""

    def __init__(self, config: Path, worker_id: str, log: Path) -> None:
        self.log = log
        self._fh = open(log, "w")
        env = dict(os.environ, PYTHONPATH=str(REPO))
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "watchdog_edge.cli.app", "jetstream", "run", "--config", str(config)]
            + ["--worker-id", worker_id, "--log-level", "info"],
            stdout=self._fh,
            stderr=subprocess.STDOUT,
            env=env,
        )

    def text(self) -> str:
        return self.log.read_text(errors="replace")

    def kill(self) -> None:
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=10)
        self._fh.close()

    def stop(self, timeout: float = 20.0) -> int:
        if self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGTERM)
            try:
                self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(timeout=5)
        self._fh.close()
        return self.proc.returncode


def pair_messages(model: str, start: int, n: int, sigma: float, rng: np.random.Generator, chunk: int = 10) -> list:
    """(topic, payload) messages: chunks of predictions (10.0) then their truths (10.0 + error)."""
    out = []
    for s in range(start, start + n, chunk):
        ids = range(s, min(s + chunk, start + n))
        errors = rng.normal(0.0, sigma, len(ids))
        out.append((f"plant/{model}/pred", json.dumps([{"id": i, "value": 10.0, "model_version": "v1"} for i in ids])))
        out.append(
            (
                f"plant/{model}/truth",
                json.dumps([{"id": str(i), "value": 10.0 + float(e)} for i, e in zip(ids, errors)]),
            )
        )
    return [(t, p.encode()) for t, p in out]


def traffic(models: list[str], seed: int = 7, pairs: int = 200) -> list[tuple[str, bytes]]:
    """Interleaved traffic: every model healthy, then half of them degrade, then they recover."""
    rng = np.random.default_rng(seed)
    per = {}
    for k, m in enumerate(models):
        bad = k % 2 == 0
        msgs = pair_messages(m, 0, pairs // 4, 1.0, rng)
        msgs += pair_messages(m, pairs // 4, pairs // 4, 3.0 if bad else 1.0, rng)
        msgs += pair_messages(m, pairs // 2, pairs // 2, 0.5, rng)
        per[m] = msgs
    out = []
    for i in range(max(len(v) for v in per.values())):
        for m in models:
            if i < len(per[m]):
                out.append(per[m][i])
    return out


async def _read_alerts(url: str, cfg: Config, idle_s: float) -> list[dict]:
    nc = await nats.connect(url, connect_timeout=2)
    js = nc.jetstream(timeout=10)
    sub = await js.subscribe(
        f"{cfg.jetstream.subject_prefix}.alerts.>", stream=cfg.jetstream.alert_stream, ordered_consumer=True
    )
    out = []
    try:
        while True:
            try:
                msg = await sub.next_msg(timeout=idle_s)
            except Exception:
                break
            out.append(json.loads(msg.data))
    finally:
        await nc.close()
    return out


def _retry(make, tries: int = 5):
    """Run a coroutine made by ``make``; again after a server-side timeout (a leader election, say)."""
    for i in range(tries):
        try:
            return asyncio.run(make())
        except (nats.errors.Error, asyncio.TimeoutError, OSError):
            if i == tries - 1:
                raise
            time.sleep(1.0)
    raise AssertionError("unreachable")


def read_alerts(url: str, cfg_path: Path, idle_s: float = 1.0) -> list[dict]:
    """Every alert in the alert stream, in order."""
    cfg = load_config(cfg_path)
    return _retry(lambda: _read_alerts(url, cfg, idle_s))


async def _read_lines(url: str, cfg: Config, idle_s: float) -> dict[int, list[RecordLine]]:
    """Each partition's stored messages, with the planned-work commands (which every partition meets) in place."""
    nc = await nats.connect(url, connect_timeout=2)
    stored: list[tuple[int, RecordLine]] = []
    try:
        async for m in read_input(nc.jetstream(timeout=10), cfg.jetstream, None, idle_s):
            line = RecordLine(m.t, tick=True) if m.topic is None else RecordLine(m.t, m.topic, m.payload)
            stored.append((m.partition, line))
    finally:
        await nc.close()
    out: dict[int, list[RecordLine]] = {}
    for p in sorted({p for p, _ in stored if p != COMMANDS}):
        out[p] = [line for q, line in stored if q in (p, COMMANDS)]
    return out


def replay_stream(url: str, cfg_path: Path) -> dict[str, list[dict]]:
    """Alerts per model from a replay of each partition's stored messages (the workers' times)."""
    cfg = load_config(cfg_path)
    cards = load_cards(cfg)
    per_model: dict[str, list[dict]] = {}
    for p, lines in _retry(lambda: _read_lines(url, cfg, 1.0)).items():
        pc = partition_config(cfg, p)
        mon = Monitor(pc, {m.id: cards[m.id] for m in pc.models}, [m.id for m in cfg.models])
        for ev in replay(mon, lines):
            if hasattr(ev, "alert_id"):
                per_model.setdefault(ev.model, []).append(json.loads(alert_payload(ev)))
    return per_model


def by_model(alerts: list[dict[str, Any]]) -> dict[str, list[dict]]:
    out: dict[str, list[dict]] = {}
    for a in alerts:
        out.setdefault(a["model"], []).append(a)
    return out


def wait_for(predicate, timeout: float, what: str, detail=None) -> float:
    """Poll until true; the seconds it took. Fails with ``what`` (and ``detail()``) on timeout."""
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        try:
            if predicate():
                return time.monotonic() - t0
        except Exception:  # a server electing a new leader, say: ask again
            pass
        time.sleep(0.1)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}" + (f": {detail()}" if detail else ""))
