"""The fault campaign: crashes, broker restarts, a bad network, a full disk, floods, clocks, fuzzing, security.

Everything runs here, on mosquitto brokers started on free loopback ports, with the agent as
a real ``watchdog-edge run`` process; each row ends by itself within a bounded time. It prints
one table:

    fault | tried | published | took | lost | dup pairs | alerts vs replay | dup raises | outcome

- *published*: messages the broker acknowledged to the publisher (QoS 1);
- *took*: journal rows the agent committed (read from an audit copy a SQLite trigger keeps
  beside the journal, so snapshots trimming the journal do not hide anything);
- *lost*: published messages the agent never took;
- *dup pairs*: pairs formed more than once (a replay of the taken messages, pairs minus
  distinct ids);
- *alerts vs replay*: the alerts a subscriber received, de-duplicated by ``alert_id`` and in
  core-time order, against a replay of exactly the messages (and ticks) the agent took, as
  sequences of (check, state, severity);
- *dup raises*: distinct raises for the same check, severity and episode.

    python3 bench/faults.py            # the full form (about 6 minutes on 2 cores)
    python3 bench/faults.py --short    # the form tests/test_faults.py runs in CI
    python3 bench/faults.py --only kill,network --markdown

Some rows need root (a small tmpfs for the full disk and the read-only folder; a broker that
drops to the ``mosquitto`` user); without root they run what they can and say so. The
clock, flood and fuzz rows drive the core directly.
"""

from __future__ import annotations

import argparse
import atexit
import contextlib
import errno
import json
import os
import pwd
import random
import select
import shutil
import signal
import socket
import sqlite3
import subprocess
import sys
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import paho.mqtt.client as paho
from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion

REPO = Path(__file__).resolve().parents[1]
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from watchdog_edge.agent.store import Store, state_path  # noqa: E402
from watchdog_edge.core.cards import LossFigure, ModelCard  # noqa: E402
from watchdog_edge.core.checks.gap import GapSettings  # noqa: E402
from watchdog_edge.core.events import Alert  # noqa: E402
from watchdog_edge.core.monitor import Monitor  # noqa: E402
from watchdog_edge.core.settings import BrokerSettings, PairingSettings, WindowSettings  # noqa: E402
from watchdog_edge.errors import WatchdogError  # noqa: E402
from watchdog_edge.files.cardfile import save_card  # noqa: E402
from watchdog_edge.files.configfile import load_cards, load_config  # noqa: E402
from watchdog_edge.replay.recording import read_recording  # noqa: E402

PRED = "plant/pump/pred"
TRUTH = "plant/pump/truth"
ALERTS = "watchdog/pump/alerts"
STATE = "watchdog/pump/state"
STATUS = "watchdog/agents/edge-1/status"
INSTALL_HINT = "apt-get install -y mosquitto mosquitto-clients"
IS_ROOT = os.geteuid() == 0


# --- the table ------------------------------------------------------------------------------
@dataclass
class Row:
    """One line of the table; ``ok`` is whether the row met what the design promises."""

    fault: str
    tried: int = 1
    published: int | str = "-"
    took: int | str = "-"
    lost: int | str = "-"
    dup_pairs: int | str = "-"
    alerts: str = "-"
    dup_raises: int | str = "-"
    outcome: str = ""
    ok: bool = True
    details: dict[str, Any] = field(default_factory=dict)


COLUMNS = (
    ("fault", "fault"),
    ("tried", "tried"),
    ("published", "published"),
    ("took", "took"),
    ("lost", "lost"),
    ("dup_pairs", "dup pairs"),
    ("alerts", "alerts vs replay"),
    ("dup_raises", "dup raises"),
    ("outcome", "outcome"),
)


def table(rows: list[Row], markdown: bool = False) -> str:
    """The rows as a plain or Markdown table."""
    cells = [[str(getattr(r, k)) for k, _ in COLUMNS] for r in rows]
    heads = [h for _, h in COLUMNS]
    if markdown:
        out = ["| " + " | ".join(heads) + " |", "|" + "---|" * len(heads)]
        out += ["| " + " | ".join(c.replace("|", "/") for c in row) + " |" for row in cells]
        return "\n".join(out)
    widths = [max(len(h), *(len(c[i]) for c in cells)) if cells else len(h) for i, h in enumerate(heads)]
    widths[-1] = len(heads[-1])  # the outcome runs on
    line = "  ".join(h.ljust(w) for h, w in zip(heads, widths))
    out = [line, "-" * len(line)]
    out += ["  ".join(c.ljust(w) for c, w in zip(row, widths)) for row in cells]
    return "\n".join(out)


# --- processes and ports --------------------------------------------------------------------
def free_port() -> int:
    """A TCP port nobody listens on right now (the OS picks it)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_port(port: int, timeout: float) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return True
        except OSError:
            time.sleep(0.05)
    return False


def _reachable_by(user: str, folder: Path) -> bool:
    """Whether ``user`` can reach ``folder`` (every parent searchable by others or owned by it)."""
    uid = pwd.getpwnam(user).pw_uid
    for p in [folder, *folder.parents]:
        st = p.stat()
        if not (st.st_mode & 0o001 or (st.st_uid == uid and st.st_mode & 0o100)) and p != folder:
            return False
    return True


class Broker:
    """mosquitto on a free loopback port with persistence on; stop (SIGTERM), kill (SIGKILL), start.

    Run as root, mosquitto drops to the ``mosquitto`` user: its folder (persistence, log) is
    given to that user, as a gateway's must be, or it keeps nothing on disk.
    """

    def __init__(
        self,
        folder: Path,
        autosave_interval_s: int = 1,
        passwords: dict[str, str] | None = None,
        acl: str | None = None,
        tls: Any = None,
    ) -> None:
        exe = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
        if not os.path.exists(exe):
            raise SystemExit(f"mosquitto is not installed; the campaign needs a real broker: {INSTALL_HINT}")
        self.exe = exe
        folder.mkdir(parents=True, exist_ok=True)
        if IS_ROOT and not _reachable_by("mosquitto", folder):
            # A folder under a private parent (pytest's, say): the broker gets one of its own.
            folder = Path(tempfile.mkdtemp(prefix="wd-broker-"))
            atexit.register(shutil.rmtree, folder, True)
        self.folder = folder
        self.port = free_port()
        self.host = "127.0.0.1"
        self.proc: subprocess.Popen[bytes] | None = None
        self.log = folder / "mosquitto.log"
        lines = [
            "per_listener_settings false",
            f"listener {self.port} 127.0.0.1",
            "persistence true",
            f"persistence_location {folder}/",
            f"autosave_interval {autosave_interval_s}",
            "max_queued_messages 100000",
            "max_inflight_messages 20",
            f"log_dest file {self.log}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
        ]
        if not IS_ROOT:
            lines.append(f"user {pwd.getpwuid(os.geteuid()).pw_name}")
        if passwords:
            pw = folder / "passwords"
            pw.write_text("")
            tool = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"
            for user, secret in passwords.items():
                subprocess.run([tool, "-b", str(pw), user, secret], check=True, capture_output=True)
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines.append("allow_anonymous true")
        if acl is not None:
            (folder / "acl").write_text(acl)
            lines.append(f"acl_file {folder / 'acl'}")
        if tls is not None:
            for name, src in (("ca.crt", tls.ca), ("server.crt", tls.server_cert), ("server.key", tls.server_key)):
                shutil.copyfile(src, folder / name)
            lines += [
                f"cafile {folder / 'ca.crt'}",
                f"certfile {folder / 'server.crt'}",
                f"keyfile {folder / 'server.key'}",
            ]
        (folder / "mosquitto.conf").write_text("\n".join(lines) + "\n")
        if IS_ROOT:
            owner = pwd.getpwnam("mosquitto")
            for p in [folder, *folder.rglob("*")]:
                os.chown(p, owner.pw_uid, owner.pw_gid)
            for p in [*folder.glob("passwords"), *folder.glob("server.key")]:
                os.chmod(p, 0o600)
        self.start()

    def start(self, timeout: float = 10.0) -> None:
        self.proc = subprocess.Popen(
            [self.exe, "-c", str(self.folder / "mosquitto.conf")], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
        )
        if not wait_port(self.port, timeout):
            self.kill()
            raise RuntimeError(f"mosquitto did not listen on {self.port}: {self.log_text()[-600:]}")

    def stop(self) -> None:
        """SIGTERM by pid: mosquitto saves its persistence file on the way out."""
        self._end(signal.SIGTERM)

    def kill(self) -> None:
        """SIGKILL by pid: whatever was not autosaved is gone."""
        self._end(signal.SIGKILL)

    def _end(self, sig: int) -> None:
        if self.proc is None:
            return
        if self.proc.poll() is None:
            os.kill(self.proc.pid, sig)
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                os.kill(self.proc.pid, signal.SIGKILL)
                self.proc.wait(5)
        self.proc = None

    def persistence_owner(self) -> str:
        db = self.folder / "mosquitto.db"
        return pwd.getpwuid(db.stat().st_uid).pw_name if db.exists() else "(no file)"

    def log_text(self) -> str:
        try:
            return self.log.read_text(errors="replace")
        except OSError:
            return ""


class Relay:
    """A loopback TCP relay between the agent and the broker that can freeze, drop or half-close.

    ``freeze``: stops moving bytes on the open connections (both ways), which stay open;
    ``drop``: closes both ends with a reset (SO_LINGER 0); ``half_close``: sends the agent an
    end of stream (FIN) while keeping the broker's side open. New connections pass normally.
    """

    def __init__(self, target_port: int) -> None:
        self.target = target_port
        self.listener = socket.socket()
        self.listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.listener.bind(("127.0.0.1", 0))
        self.listener.listen(16)
        self.port = int(self.listener.getsockname()[1])
        self.lock = threading.Lock()
        self.pairs: list[tuple[socket.socket, socket.socket, dict[str, bool]]] = []
        self.closed = False
        self.accepted = 0
        self.thread = threading.Thread(target=self._serve, daemon=True, name="relay")
        self.thread.start()

    def _serve(self) -> None:
        while not self.closed:
            with self.lock:
                socks = [self.listener] + [s for a, b, st in self.pairs if not st["frozen"] for s in (a, b)]
            try:
                readable, _, _ = select.select(socks, [], [], 0.05)
            except (OSError, ValueError):
                continue
            for s in readable:
                if s is self.listener:
                    try:
                        client, _ = self.listener.accept()
                        upstream = socket.create_connection(("127.0.0.1", self.target), timeout=2)
                    except OSError:
                        with contextlib.suppress(Exception):
                            client.close()
                        continue
                    with self.lock:
                        self.pairs.append((client, upstream, {"frozen": False}))
                        self.accepted += 1
                    continue
                self._move(s)

    def _move(self, s: socket.socket) -> None:
        with self.lock:
            pair = next((p for p in self.pairs if s in (p[0], p[1])), None)
        if pair is None or pair[2]["frozen"]:
            return
        client, upstream, _ = pair
        other = upstream if s is client else client
        try:
            data = s.recv(65536)
        except OSError:
            data = b""
        if not data:
            self._close_pair(pair)
            return
        try:
            other.sendall(data)
        except OSError:
            self._close_pair(pair)

    def _close_pair(self, pair: tuple[socket.socket, socket.socket, dict[str, bool]], reset: bool = False) -> None:
        with self.lock:
            if pair in self.pairs:
                self.pairs.remove(pair)
        for s in pair[:2]:
            with contextlib.suppress(OSError):
                if reset:
                    s.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, b"\x01\x00\x00\x00\x00\x00\x00\x00")
                s.close()

    def fault(self, mode: str) -> None:
        """Apply ``freeze``, ``drop`` or ``half_close`` to every open connection."""
        with self.lock:
            pairs = list(self.pairs)
        for pair in pairs:
            if mode == "freeze":
                pair[2]["frozen"] = True
            elif mode == "drop":
                self._close_pair(pair, reset=True)
            elif mode == "half_close":
                with contextlib.suppress(OSError):
                    pair[0].shutdown(socket.SHUT_WR)  # the agent reads end of stream
                pair[2]["frozen"] = True  # and nothing more moves on this connection

    def release_frozen(self) -> None:
        """Close connections left frozen (their peers have given up on them)."""
        with self.lock:
            pairs = [p for p in self.pairs if p[2]["frozen"]]
        for p in pairs:
            self._close_pair(p)

    def close(self) -> None:
        self.closed = True
        self.thread.join(2)
        self.listener.close()
        with self.lock:
            pairs = list(self.pairs)
        for p in pairs:
            self._close_pair(p)


# --- the agent's files ----------------------------------------------------------------------
def _key(model: Any, new: str, old: str) -> str:
    """The config key by its unit-carrying name where this version has it (the keys are being renamed)."""
    return new if new in model.model_fields else old


KEEPALIVE = _key(BrokerSettings, "keepalive_s", "keepalive")
WINDOW_SIZE = _key(WindowSettings, "size_pairs", "size")
EVALUATE_EVERY = _key(GapSettings, "evaluate_every_pairs", "evaluate_every")
MAX_UNPAIRED = _key(PairingSettings, "max_unpaired_records", "max_unpaired")

CHECKS = (
    f"[models.checks.gap]\n{EVALUATE_EVERY} = 5\n"
    "[models.checks.feed_stop]\nenabled = false\n"
    "[models.checks.range]\nenabled = false\n"
    "[models.checks.shift]\nenabled = false\n"
)


def write_setup(
    folder: Path,
    port: int,
    *,
    broker_extra: str = "",
    agent_extra: str = "",
    snapshot_every_s: float = 0.5,
    keepalive_s: int = 5,
) -> Path:
    """A card (held-out squared loss 1.0) and a config for model 'pump' on the broker at ``port``."""
    folder.mkdir(parents=True, exist_ok=True)
    save_card(
        ModelCard(
            model_id="pump",
            model_version="v1",
            loss="squared",
            training=LossFigure(loss=0.9, count=5000),
            fitted_parameters=4,
            least_squares=True,
            holdout=LossFigure(loss=1.0, count=1000),
        ),
        folder / "pump.card.json",
    )
    text = f"""
[agent]
name = "edge-1"
state_dir = "state"
tick_every_s = 0.5
snapshot_every_s = {snapshot_every_s}
state_every_s = 0.5
{agent_extra}

[broker]
host = "127.0.0.1"
port = {port}
{KEEPALIVE} = {keepalive_s}
reconnect_min_s = 0.1
reconnect_max_s = 1.0
{broker_extra}

[[models]]
id = "pump"
card = "pump.card.json"
prediction_topic = "{PRED}"
truth_topic = "{TRUTH}"
[models.window]
{WINDOW_SIZE} = 60
min_pairs = 40
{CHECKS}
"""
    cfg = folder / "config.toml"
    cfg.write_text(text)
    return cfg


AUDIT_SQL = """
CREATE TABLE IF NOT EXISTS audit_journal (
    seq INTEGER PRIMARY KEY, t REAL NOT NULL, topic TEXT, payload BLOB, tick INTEGER NOT NULL
);
CREATE TRIGGER IF NOT EXISTS audit_journal_copy AFTER INSERT ON journal BEGIN
    INSERT INTO audit_journal (seq, t, topic, payload, tick) VALUES (NEW.seq, NEW.t, NEW.topic, NEW.payload, NEW.tick);
END;
"""


def install_audit(state_dir: Path) -> Path:
    """Create the state file with a trigger that copies every journal row into ``audit_journal``.

    The copy is written in the same transaction as the row, so it holds exactly what the agent
    committed, including what later snapshots trim from the journal.
    """
    path = state_path(state_dir)
    Store(path).close()
    db = sqlite3.connect(path)
    db.executescript(AUDIT_SQL)
    db.close()
    return path


def audit_rows(path: Path) -> list[tuple[float, str | None, bytes | None, int]]:
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10)
    try:
        rows = db.execute("SELECT t, topic, payload, tick FROM audit_journal ORDER BY seq").fetchall()
    finally:
        db.close()
    return [(t, topic, None if p is None else bytes(p), tick) for t, topic, p, tick in rows]


def integrity(path: Path) -> str:
    """``PRAGMA integrity_check`` on the state file, opened read-only."""
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=10)
    try:
        return str(db.execute("PRAGMA integrity_check").fetchone()[0])
    finally:
        db.close()


class AgentProc:
    """``watchdog-edge run`` as a real subprocess, its output in a log file."""

    def __init__(self, config: Path, *extra: str) -> None:
        self.log = config.parent / f"agent-{time.monotonic_ns()}.log"
        self._fh = open(self.log, "w")
        env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "watchdog_edge.cli.app", "run", "--config", str(config), *extra],
            stdout=self._fh,
            stderr=subprocess.STDOUT,
            env=env,
            cwd=config.parent,
        )

    def text(self) -> str:
        return self.log.read_text(errors="replace")

    def wait_for(self, needle: str, timeout: float = 30.0) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if needle in self.text():
                return True
            if self.proc.poll() is not None:
                return needle in self.text()
            time.sleep(0.05)
        return False

    def wait_ready(self, timeout: float = 30.0) -> None:
        if not self.wait_for("connected to", timeout):
            raise RuntimeError(f"agent not ready (exit {self.proc.poll()}):\n{self.text()[-2000:]}")

    def end(self, sig: int = signal.SIGTERM, timeout: float = 30.0) -> int:
        if self.proc.poll() is None:
            os.kill(self.proc.pid, sig)
        try:
            rc = self.proc.wait(timeout)
        except subprocess.TimeoutExpired:
            os.kill(self.proc.pid, signal.SIGKILL)
            rc = self.proc.wait(5)
        self._fh.close()
        return rc


def _client(client_id: str, port: int, clean: bool, v5: bool = False) -> paho.Client:
    kwargs: dict[str, Any] = dict(callback_api_version=CallbackAPIVersion.VERSION2, client_id=client_id)
    if v5:
        kwargs["protocol"] = MQTTProtocolVersion.MQTTv5
    else:
        kwargs["clean_session"] = clean
    c = paho.Client(**kwargs)
    c.reconnect_delay_set(0.1, 1.0)  # type: ignore[arg-type]  # paho takes seconds as floats too
    return c


class Watcher:
    """A subscriber with a persistent session on the alert and status topics; keeps what arrives."""

    def __init__(self, port: int, client_id: str = "faults-watcher") -> None:
        self.messages: list[tuple[str, bytes]] = []
        self.lock = threading.Lock()
        self.c = _client(client_id, port, clean=False)
        self.ready = threading.Event()

        def on_connect(c: paho.Client, u: Any, flags: Any, rc: Any, props: Any) -> None:
            if not rc.is_failure:
                c.subscribe([(ALERTS, 1), (STATUS, 1)])
                self.ready.set()

        def on_message(c: paho.Client, u: Any, msg: paho.MQTTMessage) -> None:
            with self.lock:
                self.messages.append((msg.topic, bytes(msg.payload)))

        self.c.on_connect = on_connect
        self.c.on_message = on_message
        self.c.connect("127.0.0.1", port, keepalive=5)
        self.c.loop_start()
        if not self.ready.wait(10):
            raise RuntimeError("the watcher could not connect")

    def alerts(self) -> list[dict[str, Any]]:
        """Alerts received, de-duplicated by ``alert_id`` (a re-send must be identical)."""
        seen: dict[str, dict[str, Any]] = {}
        with self.lock:
            msgs = [json.loads(p) for tp, p in self.messages if tp == ALERTS]
        for a in msgs:
            seen.setdefault(a["alert_id"], a)
        return sorted(seen.values(), key=lambda a: a["ts"])

    def status(self) -> dict[str, Any]:
        with self.lock:
            found = [json.loads(p) for tp, p in self.messages if tp == STATUS]
        full = [s for s in found if "link" in s]
        return full[-1] if full else (found[-1] if found else {})

    def close(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


class Publisher:
    """Predictions and truths, one record a message at QoS 1, in a thread; keeps the ids the broker acknowledged.

    The error's spread changes every ``phase`` pairs (1.0, then 3.0, ...), so the gap check
    raises and clears again and again under load.
    """

    def __init__(self, port: int, rate_pairs_s: float = 120.0, phase: int = 150, seed: int = 1) -> None:
        self.c = _client("faults-publisher", port, clean=False)
        self.c.max_inflight_messages_set(100)
        self.c.connect("127.0.0.1", port, keepalive=5)
        self.c.loop_start()
        self.rate = rate_pairs_s
        self.phase = phase
        self.rng = random.Random(seed)
        self.sent: list[tuple[str, int, paho.MQTTMessageInfo]] = []
        self.stop_flag = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True, name="publisher")
        self.next_id = 0

    def start(self) -> Publisher:
        self.thread.start()
        return self

    def _run(self) -> None:
        t0 = time.monotonic()
        while not self.stop_flag.is_set():
            i = self.next_id
            sigma = 1.0 if (i // self.phase) % 2 == 0 else 3.0
            err = self.rng.gauss(0.0, sigma)
            p = json.dumps({"id": i, "value": 10.0, "model_version": "v1"}).encode()
            t = json.dumps({"id": str(i), "value": 10.0 + err}).encode()
            self.sent.append((PRED, i, self.c.publish(PRED, p, qos=1)))
            self.sent.append((TRUTH, i, self.c.publish(TRUTH, t, qos=1)))
            self.next_id += 1
            ahead = t0 + self.next_id / self.rate - time.monotonic()
            if ahead > 0:
                time.sleep(ahead)

    def finish(self, timeout: float = 60.0) -> tuple[set[int], set[int]]:
        """Stop sending, wait for outstanding PUBACKs; the prediction and truth ids acknowledged."""
        self.stop_flag.set()
        if self.thread.ident is not None:
            self.thread.join(10)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline and not all(_acked(info) for _, _, info in self.sent):
            time.sleep(0.1)
        self.c.disconnect()
        self.c.loop_stop()
        preds = {i for tp, i, info in self.sent if tp == PRED and _acked(info)}
        truths = {i for tp, i, info in self.sent if tp == TRUTH and _acked(info)}
        return preds, truths


def _acked(info: paho.MQTTMessageInfo) -> bool:
    """Whether the broker acknowledged the message; paho also sends later what was published offline.

    ``is_published`` raises for a message published while disconnected even after paho has
    sent it on reconnect, so the flag it reads is read directly.
    """
    return bool(info._published)


# --- measuring a run against its replay -----------------------------------------------------
def measure(
    row: Row,
    cfg: Path,
    state: Path,
    preds: set[int],
    truths: set[int],
    watcher: Watcher | None,
    promise_lost: bool = True,
) -> Row:
    """Fill the row's columns from the audit copy, a replay of it, and the alerts received."""
    rows = audit_rows(state)
    took_p: Counter[int] = Counter()
    took_t: Counter[int] = Counter()
    for _, topic, payload, tick in rows:
        if tick:
            continue
        i = int(json.loads(payload or b"{}")["id"])
        (took_p if topic == PRED else took_t)[i] += 1
    config = load_config(cfg)
    mon = Monitor(config, load_cards(config))
    replayed: list[Alert] = []
    for t, topic, payload, tick in rows:
        out = mon.tick(t) if tick else mon.feed(topic or "", payload or b"", t)
        replayed.extend(e for e in out if isinstance(e, Alert))
    lost = len(preds - set(took_p)) + len(truths - set(took_t))
    paired = mon.status()["paired"]
    row.published = len(preds) + len(truths)
    row.took = sum(took_p.values()) + sum(took_t.values())
    row.lost = lost
    row.dup_pairs = paired - len(set(took_p) & set(took_t))
    resent = sum(c - 1 for c in took_p.values()) + sum(c - 1 for c in took_t.values())
    row.details.update(resent_by_publisher=resent, paired=paired, integrity=integrity(state))
    expected = [(a.check, a.state, a.severity) for a in replayed]
    if watcher is not None:
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and len(watcher.alerts()) < len(replayed):
            time.sleep(0.1)
        live = watcher.alerts()
        got = [(a["check"], a["state"], a["severity"]) for a in live]
        same_ids = [a["alert_id"] for a in live] == [a.alert_id for a in replayed]
        row.alerts = f"equal ({len(got)})" if got == expected and same_ids else f"differ: {len(got)} vs {len(expected)}"
        row.dup_raises = duplicate_raises(live)
        row.ok &= got == expected and same_ids and row.dup_raises == 0
        # The agent's own counters, from the status it publishes at its clean stop.
        more = _bounded(5)
        while more() and watcher.status().get("connection") != "offline":
            time.sleep(0.05)
        final = watcher.status()
        if "paired" in final:
            row.details["live_paired"] = final["paired"]
            row.ok &= final["paired"] == paired
    row.ok &= row.dup_pairs == 0 and row.details["integrity"] == "ok"
    if promise_lost:
        row.ok &= lost == 0
    return row


def duplicate_raises(alerts: list[dict[str, Any]]) -> int:
    """Raises of a severity a check's open episode already had (in core-time order), e.g. after a restart.

    >>> a = [{"check": "gap", "state": s, "severity": "warning"} for s in ("raised", "raised", "cleared", "raised")]
    >>> duplicate_raises(a)
    1
    """
    open_: dict[str, set[str]] = {}
    dup = 0
    for a in alerts:
        had = open_.setdefault(a["check"], set())
        if a["state"] == "cleared":
            had.clear()
        elif a["severity"] in had:
            dup += 1
        else:
            had.add(a["severity"])
    return dup


def _bounded(seconds: float) -> Callable[[], bool]:
    """A clock that says True until ``seconds`` have passed."""
    deadline = time.monotonic() + seconds
    return lambda: time.monotonic() < deadline


def _wait_taken(state: Path, preds: set[int], truths: set[int], timeout: float = 30.0) -> None:
    """Wait until the audit copy holds every acknowledged id (or the time is up)."""
    want = len(preds) + len(truths)
    more = _bounded(timeout)
    while more():
        rows = audit_rows(state)
        ids = {(tp, int(json.loads(p)["id"])) for _, tp, p, tick in rows if not tick and p}
        if sum(1 for i in preds if (PRED, i) in ids) + sum(1 for i in truths if (TRUTH, i) in ids) >= want:
            return
        time.sleep(0.2)


# --- the rows -------------------------------------------------------------------------------
def row_agent_kill(root: Path, kills: int, seed: int = 11) -> Row:
    """SIGKILL the agent at random points under load, restart it each time."""
    rng = random.Random(seed)
    row = Row(f"agent SIGKILLed under load ({kills}x)", tried=kills)
    broker = Broker(root / "broker")
    try:
        cfg = write_setup(root / "agent", broker.port)
        state = install_audit(root / "agent" / "state")
        watcher = Watcher(broker.port)
        rec = root / "agent" / "live.jsonl"  # one recording, appended to by every run
        first = AgentProc(cfg, "--record", str(rec))  # its session at the broker exists before anything is published
        first.wait_ready()
        first.end(signal.SIGKILL)
        pub = Publisher(broker.port).start()
        checks: list[str] = []
        cut_recordings = unreadable = 0
        recorded: list[tuple[float, str | None, bytes | None, int]] = []
        for _ in range(kills):
            agent = AgentProc(cfg, "--record", str(rec))
            agent.wait_ready()
            time.sleep(rng.uniform(0.2, 1.5))
            agent.end(signal.SIGKILL)
            checks.append(integrity(state))
            text = rec.read_bytes()
            if text and not text.endswith(b"\n"):
                cut_recordings += 1
        agent = AgentProc(cfg, "--record", str(rec))
        agent.wait_ready()
        time.sleep(1.0)
        preds, truths = pub.finish()
        _wait_taken(state, preds, truths)
        rc = agent.end()
        try:
            recorded = [(ln.t, ln.topic, ln.payload, int(ln.tick)) for ln in read_recording(rec)]
        except WatchdogError:
            unreadable = 1
        journal = [(t, tp, p, tick) for t, tp, p, tick in audit_rows(state)]
        missing = len(set(journal) - set(recorded))
        same = recorded == journal
        measure(row, cfg, state, preds, truths, watcher)
        watcher.close()
        bad = [c for c in checks if c != "ok"]
        row.ok &= rc == 0 and not bad and not unreadable and same and "live_paired" in row.details
        row.outcome = (
            f"{'pass' if row.ok else 'FAIL'}: integrity_check ok after {len(checks) - len(bad)}/{len(checks)} kills; "
            f"one --record file across the restarts: {'replayable' if not unreadable else 'UNREADABLE'}, "
            f"{len(recorded)} lines, {'equal to the journal' if same else f'{missing} journal rows missing'} "
            f"({cut_recordings} kills cut a line); "
            "the agent's status counts "
            f"{row.details.get('live_paired', '?')} pairs, the replay {row.details['paired']}; exit {rc} at the end"
        )
    finally:
        broker.stop()
    return row


def row_boot_order(root: Path, wait_s: float = 3.0) -> Row:
    """The agent starts before the broker (a gateway booting): it waits, says so, and takes everything."""
    row = Row(f"broker up {wait_s:.0f} s after the agent (boot order)")
    broker = Broker(root / "broker")
    try:
        cfg = write_setup(root / "agent", broker.port)
        state = install_audit(root / "agent" / "state")
        broker.stop()
        agent = AgentProc(cfg)
        said = agent.wait_for("cannot be reached yet", 15)
        time.sleep(wait_s)
        alive = agent.proc.poll() is None
        broker.start()
        agent.wait_ready(30)
        watcher = Watcher(broker.port)
        pub = Publisher(broker.port).start()
        time.sleep(2.0)
        preds, truths = pub.finish()
        _wait_taken(state, preds, truths)
        time.sleep(1.0)  # a status refresh after the last message
        status = watcher.status()
        rc = agent.end()
        measure(row, cfg, state, preds, truths, watcher)
        watcher.close()
        link = status.get("link", {})
        row.ok &= said and alive and rc == 0 and link.get("unreachable_at_start", 0) >= 1
        row.outcome = (
            f"{'pass' if row.ok else 'FAIL'}: log said it waits: {said}; still running, not exit 3: {alive}; "
            f"status link.unreachable_at_start {link.get('unreachable_at_start')}, "
            f"waited_for_broker_s {link.get('waited_for_broker_s')}"
        )
    finally:
        broker.stop()
    return row


def row_broker_restart(root: Path, restarts: int, seed: int = 12) -> Row:
    """Restart the broker (SIGTERM, persistence on) under load."""
    rng = random.Random(seed)
    row = Row(f"broker restarted under load ({restarts}x)", tried=restarts)
    broker = Broker(root / "broker")
    try:
        cfg = write_setup(root / "agent", broker.port)
        state = install_audit(root / "agent" / "state")
        watcher = Watcher(broker.port)
        agent = AgentProc(cfg)
        agent.wait_ready()
        pub = Publisher(broker.port).start()
        for _ in range(restarts):
            time.sleep(rng.uniform(0.5, 1.5))
            broker.stop()
            time.sleep(rng.uniform(0.1, 1.0))
            broker.start()
        time.sleep(1.5)
        preds, truths = pub.finish()
        _wait_taken(state, preds, truths)
        status = watcher.status()
        rc = agent.end()
        measure(row, cfg, state, preds, truths, watcher)
        watcher.close()
        owner = broker.persistence_owner()
        row.ok &= rc == 0 and (owner == "mosquitto" or not IS_ROOT)
        row.outcome = (
            f"{'pass' if row.ok else 'FAIL'}: persistence file owned by {owner}; agent reconnected "
            f"{status.get('link', {}).get('connects', '?')} times; {row.details['resent_by_publisher']} "
            "messages sent twice by the publisher (QoS 1 is at least once), each counted once"
        )
    finally:
        broker.stop()
    return row


def row_broker_kill_under_load(root: Path, kills: int, seed: int = 13) -> Row:
    """SIGKILL the broker under load with autosave_interval 1 s; the agent keeps up, so little is queued."""
    rng = random.Random(seed)
    row = Row(f"broker SIGKILLed under load ({kills}x, autosave_interval 1 s)", tried=kills)
    broker = Broker(root / "broker", autosave_interval_s=1)
    try:
        cfg = write_setup(root / "agent", broker.port)
        state = install_audit(root / "agent" / "state")
        watcher = Watcher(broker.port)
        agent = AgentProc(cfg)
        agent.wait_ready()
        pub = Publisher(broker.port).start()
        for _ in range(kills):
            time.sleep(rng.uniform(1.0, 2.0))
            broker.kill()
            time.sleep(0.3)
            broker.start()
        time.sleep(1.5)
        preds, truths = pub.finish()
        _wait_taken(state, preds, truths, timeout=15)
        rc = agent.end()
        measure(row, cfg, state, preds, truths, watcher, promise_lost=False)
        watcher.close()
        row.ok &= rc == 0
        row.outcome = (
            f"measured: {row.lost} lost of {row.published}; lost = messages the broker had "
            "acknowledged but neither delivered nor saved when killed"
        )
    finally:
        broker.kill()
    return row


def row_broker_kill_queue(root: Path, autosave_s: int, messages: int = 200) -> Row:
    """The agent away, messages queued for it, the broker SIGKILLed 2 s later: what survives?"""
    row = Row(f"broker SIGKILLed, agent away (autosave_interval {autosave_s} s)")
    broker = Broker(root / "broker", autosave_interval_s=autosave_s)
    try:
        cfg = write_setup(root / "agent", broker.port)
        state = install_audit(root / "agent" / "state")
        agent = AgentProc(cfg)
        agent.wait_ready()
        time.sleep(2.5)  # its session and subscriptions reach the broker's file (autosave 1 s)
        agent.end()
        pub = Publisher(broker.port, rate_pairs_s=1000.0)
        pub.next_id = 0
        for i in range(messages // 2):
            pub.sent.append((PRED, i, pub.c.publish(PRED, json.dumps({"id": i, "value": 10.0}).encode(), qos=1)))
            pub.sent.append((TRUTH, i, pub.c.publish(TRUTH, json.dumps({"id": i, "value": 10.5}).encode(), qos=1)))
        preds, truths = pub.finish()
        time.sleep(2.0)
        broker.kill()
        broker.start()
        agent = AgentProc(cfg)
        agent.wait_ready()
        _wait_taken(state, preds, truths, timeout=5)
        rc = agent.end()
        measure(row, cfg, state, preds, truths, None, promise_lost=False)
        row.ok &= rc == 0
        row.outcome = (
            f"measured: {row.lost} of {row.published} queued messages lost; they were "
            f"{'older' if autosave_s <= 2 else 'younger'} than autosave_interval when the broker died"
        )
    finally:
        broker.kill()
    return row


def row_network(root: Path, modes: tuple[str, ...], keepalive_s: int = 5) -> Row:
    """Freeze, drop or half-close the agent's connection through a relay, under load."""
    row = Row(f"network between agent and broker: {', '.join(modes)}", tried=len(modes))
    broker = Broker(root / "broker")
    relay = Relay(broker.port)
    try:
        cfg = write_setup(root / "agent", relay.port, keepalive_s=keepalive_s)
        state = install_audit(root / "agent" / "state")
        watcher = Watcher(broker.port)
        agent = AgentProc(cfg)
        agent.wait_ready()
        pub = Publisher(broker.port).start()
        noticed: dict[str, float] = {}
        for mode in modes:
            time.sleep(1.5)
            before = agent.text().count("lost the broker connection")
            t0 = time.monotonic()
            relay.fault(mode)
            more = _bounded(3 * keepalive_s + 5)
            while more() and agent.text().count("lost the broker connection") <= before:
                time.sleep(0.05)
            noticed[mode] = time.monotonic() - t0
            relay.release_frozen()
            agent.wait_for("reconnected to the broker", 10)
        time.sleep(2.0)
        preds, truths = pub.finish()
        _wait_taken(state, preds, truths)
        status = watcher.status()
        rc = agent.end()
        measure(row, cfg, state, preds, truths, watcher)
        watcher.close()
        link = status.get("link", {})
        within = all(v <= keepalive_s + 2 for v in noticed.values())
        row.ok &= rc == 0 and within and link.get("disconnects", 0) >= len(modes)
        row.outcome = (
            f"{'pass' if row.ok else 'FAIL'}: noticed after "
            + ", ".join(f"{m} {v:.1f} s" for m, v in noticed.items())
            + f" (keepalive {keepalive_s} s); "
            f"status: {link.get('disconnects')} disconnects, last: {link.get('last_disconnect')}"
        )
    finally:
        relay.close()
        broker.stop()
    return row


@contextlib.contextmanager
def tmpfs(folder: Path, size_kib: int, readonly: bool = False) -> Iterator[Path]:
    folder.mkdir(parents=True, exist_ok=True)
    opts = f"size={size_kib}k,mode=0700" + (",ro" if readonly else "")
    subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(folder)], check=True, capture_output=True)
    try:
        yield folder
    finally:
        for _ in range(20):
            if subprocess.run(["umount", str(folder)], capture_output=True).returncode == 0:
                break
            time.sleep(0.25)


def _fill(folder: Path, leave_kib: int) -> Path:
    """A file that fills ``folder``'s file system up to ``leave_kib`` free."""
    st = os.statvfs(folder)
    free = st.f_bavail * st.f_frsize
    filler = folder / "filler"
    with open(filler, "wb") as fh:
        left = max(0, free - leave_kib * 1024)
        chunk = b"\0" * 65536
        try:
            while left > 0:
                fh.write(chunk[: min(left, len(chunk))])
                left -= min(left, len(chunk))
        except OSError as e:
            if e.errno != errno.ENOSPC:
                raise
    return filler


def row_disk_full(root: Path) -> Row:
    """The state folder's file system fills up under load, then space comes back."""
    row = Row("state folder full (32 MB tmpfs filled up), then space freed")
    if not IS_ROOT:
        row.outcome = "not run: mounting a small tmpfs needs root"
        return row
    broker = Broker(root / "broker")
    state_dir = root / "agent" / "state"
    try:
        with tmpfs(state_dir, 32768):
            cfg = write_setup(root / "agent", broker.port, snapshot_every_s=2.0)
            state = install_audit(state_dir)
            watcher = Watcher(broker.port)
            agent = AgentProc(cfg)
            agent.wait_ready()
            pub = Publisher(broker.port, rate_pairs_s=200.0).start()
            time.sleep(1.0)
            filler = _fill(state_dir, 48)
            said = agent.wait_for("cannot write the state file", 30)
            time.sleep(2.0)
            during = watcher.status().get("store", {})
            alive = agent.proc.poll() is None
            filler.unlink()
            recovered = agent.wait_for("takes writes again", 30)
            time.sleep(1.0)
            preds, truths = pub.finish()
            _wait_taken(state, preds, truths)
            rc = agent.end()
            measure(row, cfg, state, preds, truths, watcher)
            watcher.close()
            row.ok &= said and alive and recovered and rc == 0 and during.get("writes") == "failing"
            row.outcome = (
                f"{'pass' if row.ok else 'FAIL'}: log said so: {said}; status store.writes "
                f"{during.get('writes')!r} holding {during.get('held_messages')} messages; "
                f"no restart (process alive: {alive}); recovered by itself: {recovered}; "
                "acks held back, so the broker kept the rest"
            )
    finally:
        broker.stop()
    return row


def row_read_only(root: Path) -> Row:
    """The state folder is read-only when the agent starts; it becomes writable later."""
    row = Row("state folder read-only at start, then writable")
    if not IS_ROOT:
        row.outcome = "not run: a read-only mount needs root"
        return row
    broker = Broker(root / "broker")
    state_dir = root / "agent" / "state"
    try:
        with tmpfs(state_dir, 8192):
            cfg = write_setup(root / "agent", broker.port)
            install_audit(state_dir)
            state = state_path(state_dir)
            # a first run makes the session at the broker, then the folder goes read-only
            first = AgentProc(cfg)
            first.wait_ready()
            first.end()
            subprocess.run(["mount", "-o", "remount,ro", str(state_dir)], check=True, capture_output=True)
            pub = Publisher(broker.port).start()
            agent = AgentProc(cfg)
            said = agent.wait_for("Read-only file system", 20)
            time.sleep(2.0)
            alive = agent.proc.poll() is None
            subprocess.run(["mount", "-o", "remount,rw", str(state_dir)], check=True, capture_output=True)
            agent.wait_ready(40)
            time.sleep(1.0)
            preds, truths = pub.finish()
            _wait_taken(state, preds, truths)
            rc = agent.end()
            measure(row, cfg, state, preds, truths, None)
            row.ok &= said and alive and rc == 0
            row.outcome = (
                f"{'pass' if row.ok else 'FAIL'}: log said read-only: {said}; waited without exiting: "
                f"{alive}; went on by itself once writable (status stays offline meanwhile: "
                "without its journal it takes nothing)"
            )
    finally:
        broker.stop()
    return row


def _core(max_unpaired: int = 20000, horizon_s: float = 7200.0) -> Monitor:
    from watchdog_edge.core.settings import parse_config

    cfg = parse_config(
        {
            "models": [
                {
                    "id": "pump",
                    "card": "pump.card.json",
                    "prediction_topic": PRED,
                    "truth_topic": TRUTH,
                    "window": {WINDOW_SIZE: 60, "min_pairs": 40},
                    "pairing": {MAX_UNPAIRED: max_unpaired, "horizon_s": horizon_s},
                    "checks": {"range": {"enabled": False}, "shift": {"enabled": False}},
                }
            ]
        }
    )
    card = ModelCard(
        model_id="pump",
        loss="squared",
        training=LossFigure(loss=0.9, count=5000),
        fitted_parameters=4,
        least_squares=True,
        holdout=LossFigure(loss=1.0, count=1000),
    )
    return Monitor(cfg, {"pump": card})


def _rss_kib() -> int:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    return 0


def row_flood(n: int, cap: int = 20000) -> Row:
    """``n`` predictions that never get a truth, through the core: the pairing memory stays at its cap."""
    import gc

    row = Row(f"flood of {n:,} unmatched predictions (core)", published=n)
    mon = _core(max_unpaired=cap)
    feed = mon.feed
    t = 1_764_600_000.0
    for i in range(cap):
        feed(PRED, b'{"id": %d, "value": 1.5}' % i, t + i * 1e-3)
    gc.collect()
    at_cap = _rss_kib()
    for i in range(cap, n):
        feed(PRED, b'{"id": %d, "value": 1.5}' % i, t + i * 1e-3)
    gc.collect()
    after = _rss_kib()
    st = mon.status()
    evicted = st["evicted_predictions"]
    row.took = st["predictions"]
    row.lost = 0
    row.ok = evicted == n - cap and st["models"]["pump"]["pending"] == cap and after - at_cap < 8 * 1024
    row.outcome = (
        f"{'pass' if row.ok else 'FAIL'}: evicted {evicted:,} = {n:,} - cap {cap:,} exactly; "
        f"pending {st['models']['pump']['pending']:,}; RSS {at_cap / 1024:.0f} MB at the cap, "
        f"{after / 1024:.0f} MB after the flood"
    )
    return row


def row_clock() -> Row:
    """Receive-time jumps backwards and forwards, truths before predictions, skewed source ts."""
    row = Row("clock jumps, truths first, skewed source ts (core)")
    mon = _core(horizon_s=600.0)
    t = 1_764_600_000.0
    notes = []
    # truths before predictions, source timestamps an hour off either way
    for i in range(100):
        mon.feed(TRUTH, json.dumps({"id": i, "value": 10.5, "ts": t - 3600}).encode(), t + i)
    for i in range(100):
        mon.feed(PRED, json.dumps({"id": i, "value": 10.0, "ts": t + 3600}).encode(), t + 100 + i)
    st = mon.status()
    ok = st["paired"] == 100
    notes.append(f"truths first: {st['paired']}/100 paired")
    # the gateway clock jumps back an hour: treated as the latest time, counted
    back = t + 200 - 3600
    for i in range(100, 150):
        mon.feed(PRED, json.dumps({"id": i, "value": 10.0}).encode(), back + i)
        mon.feed(TRUTH, json.dumps({"id": i, "value": 10.5}).encode(), back + i)
    st = mon.status()
    ok &= st["clock_backwards"] == 100 and st["paired"] == 150
    notes.append(f"jump back 1 h: {st['clock_backwards']} readings counted, pairs go on ({st['paired']})")
    # forwards a day: what waits expires (horizon 600 s) and is counted, not paired late
    mon.feed(PRED, b'{"id": 900, "value": 10.0}', t + 300)
    mon.tick(t + 300 + 86400)
    mon.feed(TRUTH, b'{"id": 900, "value": 10.0}', t + 300 + 86400)
    st = mon.status()
    ok &= st["expired_predictions"] == 1 and st["paired"] == 150
    notes.append(f"jump forward 1 day: {st['expired_predictions']} expired, counted")
    row.took = st["records"]
    row.lost = 0
    row.ok = ok
    row.outcome = f"{'pass' if ok else 'FAIL'}: " + "; ".join(notes)
    return row


def row_fuzz(examples: int) -> Row:
    """hypothesis: payloads and topics into the core; configs, cards and recordings into the loaders."""
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as st

    from watchdog_edge.files.cardfile import load_card
    from watchdog_edge.files.configfile import load_config as load_cfg

    row = Row(f"fuzzing: payloads, topics, configs, cards, recordings ({examples} examples each)", tried=4 * examples)
    mon = _core()
    fed = {"messages": 0, "taken": 0}
    json_values = st.recursive(
        st.none() | st.booleans() | st.floats(allow_nan=True) | st.integers() | st.text(max_size=20),
        lambda kids: st.lists(kids, max_size=4) | st.dictionaries(st.text(max_size=8), kids, max_size=4),
        max_leaves=12,
    )
    record = st.fixed_dictionaries(
        {},
        optional={
            "id": st.integers() | st.text(max_size=6) | st.none() | st.floats(),
            "value": st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=4) | st.none(),
            "ts": st.floats() | st.text(max_size=25) | st.integers(),
            "features": json_values,
            "model_version": json_values,
        },
    )
    payloads = (
        st.integers(0, 500).map(lambda i: b'{"id": %d, "value": 1.5}' % i)
        | st.binary(max_size=200)
        | json_values.map(lambda v: json.dumps(v).encode())
        | record.map(lambda v: json.dumps(v).encode())
        | st.lists(record, max_size=5).map(lambda v: json.dumps(v).encode())
    )
    # Mostly the model's own topics, so that the payloads reach the parser.
    topics = st.sampled_from([PRED, TRUTH]) | st.sampled_from(["plant/other", "", "#", "plant/pump/pred/x"])
    topics = topics | st.sampled_from([PRED, TRUTH]) | st.text(max_size=30)
    failures: list[str] = []
    quick = settings(max_examples=examples, deadline=None, suppress_health_check=list(HealthCheck), database=None)

    @quick
    @given(topics, payloads, st.floats(min_value=0, max_value=4e9))
    def feed_core(topic: str, payload: bytes, t: float) -> None:
        before = mon.status()
        out = mon.feed(topic, payload, t)
        after = mon.status()
        fed["messages"] += 1
        dead = [e for e in out if type(e).__name__ == "DeadLetter"]
        taken = (after["predictions"] + after["truths"]) - (before["predictions"] + before["truths"])
        taken += sum(after[k] - before[k] for k in ("duplicate_predictions", "duplicate_truths") if k in after)
        if after["bad_total"] - before["bad_total"] != len(dead):
            failures.append(f"bad count off for {payload[:40]!r}")
        if after["received"] - before["received"] != 1:
            failures.append(f"message not counted: {payload[:40]!r}")
        fed["taken"] += taken

    tmp = Path(tempfile.mkdtemp(prefix="wd-fuzz-"))
    one_line: dict[str, int] = Counter()

    def loaded(kind: str, fn: Callable[[], Any], p_name: Path) -> None:
        try:
            fn()
        except WatchdogError as e:
            # One clear error, no traceback; its first line names the file (a config's further
            # lines list each broken key on its own).
            if str(p_name) not in str(e).splitlines()[0]:
                failures.append(f"{kind}: the error does not name the file: {str(e)[:80]!r}")
            one_line[kind] += 1
        except Exception as e:  # the campaign reports any other escape
            failures.append(f"{kind}: {type(e).__name__}: {e}"[:160])

    @quick
    @given(st.text(max_size=300) | st.binary(max_size=300).map(lambda b: b.decode("latin-1")))
    def configs(text: str) -> None:
        p = tmp / "c.toml"
        p.write_text(text, encoding="utf-8", errors="surrogateescape")
        loaded("config", lambda: load_cfg(p), p)

    @quick
    @given(json_values | st.dictionaries(st.sampled_from(["model_id", "loss", "training", "features"]), json_values))
    def cards(data: Any) -> None:
        p = tmp / "card.json"
        p.write_text(json.dumps(data))
        loaded("card", lambda: load_card(p), p)

    @quick
    @given(st.lists(st.binary(max_size=80) | json_values.map(json.dumps).map(str.encode), max_size=5))
    def recordings(lines: list[bytes]) -> None:
        p = tmp / "r.jsonl"
        p.write_bytes(b"\n".join(lines) + b"\n")
        loaded("recording", lambda: list(read_recording(p)), p)

    for test in (feed_core, configs, cards, recordings):
        try:
            test()
        except Exception as e:
            failures.append(f"{test.__name__}: {type(e).__name__}: {e}"[:200])
    shutil.rmtree(tmp, ignore_errors=True)
    st_ = mon.status()
    row.published = fed["messages"]
    row.took = st_["records"]
    row.ok = not failures
    row.outcome = (
        f"{'pass' if row.ok else 'FAIL: ' + '; '.join(failures[:3])}: no exception escaped; bad records by "
        f"reason {dict(sorted(st_['bad'].items()))}; clear errors naming the file: {dict(one_line)}"
    )
    return row


def _set_passwords(broker: Broker, users: dict[str, str]) -> None:
    pw = broker.folder / "passwords"
    pw.write_text("")
    tool = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"
    for user, secret in users.items():
        subprocess.run([tool, "-b", str(pw), user, secret], check=True, capture_output=True)
    if IS_ROOT:
        owner = pwd.getpwnam("mosquitto")
        os.chown(pw, owner.pw_uid, owner.pw_gid)
        os.chmod(pw, 0o600)


def _read_status(port: int, auth: tuple[str, str]) -> dict[str, Any]:
    """The retained agent status as a new reader sees it (empty if none came within 2 s)."""
    got: list[dict[str, Any]] = []
    c = _client(f"status-{time.monotonic_ns()}", port, clean=True)
    c.username_pw_set(*auth)
    c.on_message = lambda cl, u, m: got.append(json.loads(m.payload))
    c.on_connect = lambda cl, u, f, rc, pr: cl.subscribe(STATUS, 1)
    try:
        c.connect("127.0.0.1", port)
    except OSError:
        return {}
    c.loop_start()
    more = _bounded(2)
    while more() and not got:
        time.sleep(0.05)
    c.loop_stop()
    c.disconnect()
    return got[-1] if got else {}


def _read_status_tls(port: int, ca: Path) -> dict[str, Any]:
    """The retained agent status read over TLS (empty if none came within 2 s)."""
    got: list[dict[str, Any]] = []
    c = _client(f"status-{time.monotonic_ns()}", port, clean=True)
    c.tls_set(ca_certs=str(ca))
    c.tls_insecure_set(True)
    c.on_message = lambda cl, u, m: got.append(json.loads(m.payload))
    c.on_connect = lambda cl, u, f, rc, pr: cl.subscribe(STATUS, 1)
    try:
        c.connect("127.0.0.1", port)
    except OSError:
        return {}
    c.loop_start()
    more = _bounded(2)
    while more() and not got:
        time.sleep(0.05)
    c.loop_stop()
    c.disconnect()
    full = [g for g in got if "link" in g]
    return full[-1] if full else {}


def row_security(root: Path) -> list[Row]:
    """Refused password, untrusted certificate, a publish the ACL denies, a password file others can read."""
    sys.path.insert(0, str(REPO / "tests"))
    from broker import make_tls  # the tests' certificate maker (cryptography, or openssl)

    rows: list[Row] = []
    # refused password: at start exit 3 with one line; while running, counted in the status
    broker = Broker(root / "pw-broker", passwords={"edge": "right", "reader": "r"})
    try:
        folder = root / "pw"
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "pw").write_text("wrong\n")
        os.chmod(folder / "pw", 0o600)
        cfg = write_setup(folder, broker.port, broker_extra='username = "edge"\npassword_file = "pw"\n')
        a = AgentProc(cfg)
        rc = a.proc.wait(30)
        a.end()
        lines = [ln for ln in a.text().splitlines() if ln.startswith("watchdog-edge:")]
        ok = rc == 3 and len(lines) == 1 and "password" in lines[0] and "wrong" not in a.text()
        rows.append(
            Row("refused password at start", outcome=f"{'pass' if ok else 'FAIL'}: exit {rc}; {lines[:1]}", ok=ok)
        )
        # While running: the broker's password changes under the agent, then changes back.
        (folder / "pw").write_text("right\n")
        a = AgentProc(cfg)
        a.wait_ready()
        broker.stop()
        _set_passwords(broker, {"edge": "rotated", "reader": "r"})
        broker.start()
        refused_logged = a.wait_for("refused the connection", 15)
        broker.stop()
        _set_passwords(broker, {"edge": "right", "reader": "r"})
        broker.start()
        status: dict[str, Any] = {}
        more = _bounded(15)
        while more() and not status.get("link", {}).get("connection_refused"):
            status = _read_status(broker.port, ("reader", "r"))
        a.end()
        link = status.get("link", {})
        ok = (
            refused_logged and link.get("connection_refused", 0) >= 1 and "password" in (link.get("last_refusal") or "")
        )
        rows.append(
            Row(
                "password refused while running",
                ok=ok,
                outcome=f"{'pass' if ok else 'FAIL'}: kept retrying; log line: {refused_logged}; once back in, "
                f"status link.connection_refused {link.get('connection_refused')}, last_refusal says why",
            )
        )
    finally:
        broker.stop()
    # untrusted certificate
    tls = make_tls(root / "tls")
    rogue = make_tls(root / "rogue", name="rogue")
    broker = Broker(root / "tls-broker", tls=tls)
    try:
        folder = root / "cert"
        cfg = write_setup(folder, broker.port, broker_extra=f'[broker.tls]\nca_file = "{rogue.ca}"\n')
        a = AgentProc(cfg)
        rc = a.proc.wait(30)
        a.end()
        lines = [ln for ln in a.text().splitlines() if ln.startswith("watchdog-edge:")]
        ok = rc == 3 and len(lines) == 1 and "certificate" in lines[0]
        rows.append(
            Row("untrusted broker certificate", outcome=f"{'pass' if ok else 'FAIL'}: exit {rc}; {lines[:1]}", ok=ok)
        )
        # hostname verification switched off: accepted, and said at start and in the status
        folder = root / "nohost"
        cfg = write_setup(
            folder, broker.port, broker_extra=f'[broker.tls]\nca_file = "{tls.ca}"\nverify_hostname = false\n'
        )
        a = AgentProc(cfg)
        a.wait_ready()
        seen: dict[str, Any] = {}
        more = _bounded(10)
        while more() and "warnings" not in seen:
            seen = _read_status_tls(broker.port, tls.ca)
        a.end()
        warn = [w for w in seen.get("warnings", []) if "verify_hostname = false" in w]
        ok = bool(warn) and "verify_hostname = false" in a.text()
        rows.append(
            Row(
                "TLS hostname verification off",
                ok=ok,
                outcome=f"{'pass' if ok else 'FAIL'}: connects; warned in the log at start and in the status "
                f"({len(warn)} warning)",
            )
        )
    finally:
        broker.stop()
    # a publish the ACL denies: MQTT 5 says so in the PUBACK (reason 0x87); 3.1.1 has no way to
    acl = (
        "user edge\ntopic read plant/#\ntopic readwrite watchdog/agents/#\ntopic readwrite watchdog/pump/state\n"
        "user feeder\ntopic write plant/#\nuser reader\ntopic read #\n"
    )
    for protocol in ("5", "3.1.1"):
        broker = Broker(root / f"acl-broker-{protocol}", passwords={"edge": "e", "feeder": "f", "reader": "r"}, acl=acl)
        try:
            folder = root / f"acl-{protocol}"
            folder.mkdir(parents=True, exist_ok=True)
            (folder / "pw").write_text("e\n")
            os.chmod(folder / "pw", 0o644)  # readable by all: the world-readable secret row
            cfg = write_setup(
                folder, broker.port, broker_extra=f'username = "edge"\npassword_file = "pw"\nprotocol = "{protocol}"\n'
            )
            a = AgentProc(cfg)
            a.wait_ready()
            got: list[dict[str, Any]] = []
            reader = _client(f"acl-reader-{protocol}", broker.port, clean=True)
            reader.username_pw_set("reader", "r")
            reader.on_message = lambda c, u, m, got=got: got.append(json.loads(m.payload))
            reader.on_connect = lambda c, u, f, rc, pr: c.subscribe(STATUS, 1)
            reader.connect("127.0.0.1", broker.port)
            reader.loop_start()
            feeder = _client(f"acl-feeder-{protocol}", broker.port, clean=True)
            feeder.username_pw_set("feeder", "f")
            feeder.connect("127.0.0.1", broker.port)
            feeder.loop_start()
            rng = random.Random(5)
            for i in range(80):  # errors of spread 3 against an expected squared error of 1: gap raises
                feeder.publish(PRED, json.dumps({"id": i, "value": 10.0}).encode(), qos=1).wait_for_publish(5)
                feeder.publish(TRUTH, json.dumps({"id": i, "value": 10 + rng.gauss(0, 3)}).encode(), qos=1)
            a.wait_for("alert gap raised", 15)
            more = _bounded(10)
            while more() and not any(s.get("link", {}).get("publish_refused") for s in got):
                time.sleep(0.1)
            time.sleep(0.6)
            last = [s for s in got if "link" in s]
            status = last[-1] if last else {}
            feeder.loop_stop()
            feeder.disconnect()
            reader.loop_stop()
            reader.disconnect()
            a.end()
            refused = status.get("link", {}).get("publish_refused", 0)
            logged = "refused a publish" in a.text()
            if protocol == "5":
                ok = refused >= 1 and logged and status.get("outbox_depth", 0) >= 1
                rows.append(
                    Row(
                        "alert publish denied by the ACL (MQTT 5)",
                        ok=ok,
                        outcome=f"{'pass' if ok else 'FAIL'}: status link.publish_refused {refused}, "
                        f"alert kept in the outbox ({status.get('outbox_depth')}); log line: {logged}",
                    )
                )
                warn = [w for w in status.get("warnings", []) if "password_file" in w]
                check = subprocess.run(
                    [sys.executable, "-m", "watchdog_edge.cli.app", "check-config", str(cfg)],
                    capture_output=True,
                    text=True,
                    timeout=60,
                    env=dict(os.environ, PYTHONPATH=str(REPO)),
                )
                in_check = "password_file" in check.stderr and "chmod 600" in check.stderr
                ok = bool(warn) and in_check and "can be read by group and others" in a.text()
                rows.append(
                    Row(
                        "password file readable by others",
                        ok=ok,
                        outcome=f"{'pass' if ok else 'FAIL'}: warned in the log at start, in the status "
                        f"({len(warn)} warning) and by check-config ({in_check})",
                    )
                )
            else:
                rows.append(
                    Row(
                        "alert publish denied by the ACL (MQTT 3.1.1)",
                        ok=True,
                        outcome=f"measured: not visible (publish_refused {refused}): 3.1.1 PUBACKs carry no "
                        "reason, the broker drops the message silently; use protocol 5",
                    )
                )
        finally:
            broker.stop()
    return rows


# --- the campaign ---------------------------------------------------------------------------
@dataclass(frozen=True)
class Form:
    """How much of each fault a run tries."""

    kills: int
    restarts: int
    broker_kills: int
    flood: int
    fuzz: int
    network: tuple[str, ...] = ("freeze", "drop", "half_close")


SHORT = Form(kills=3, restarts=1, broker_kills=1, flood=100_000, fuzz=60)
FULL = Form(kills=20, restarts=5, broker_kills=3, flood=1_000_000, fuzz=400)
ROWS = ("kill", "boot", "restart", "broker_kill", "network", "disk", "flood", "clock", "fuzz", "security")


def campaign(short: bool = False, only: tuple[str, ...] = ROWS, root: Path | None = None) -> list[Row]:
    """Run the chosen rows; every one ends by itself. The rows in table order."""
    p = SHORT if short else FULL
    base = root or Path(tempfile.mkdtemp(prefix="wd-faults-"))
    os.chmod(base, 0o755)  # the broker, running as user mosquitto, reaches its folder through here
    rows: list[Row] = []

    def run(name: str, fn: Callable[[], Any]) -> None:
        if name not in only:
            return
        t0 = time.monotonic()
        try:
            got = fn()
        except Exception as e:  # a row that breaks is reported, the rest still run
            got = Row(name, ok=False, outcome=f"FAIL: {type(e).__name__}: {e}"[:300])
        for r in got if isinstance(got, list) else [got]:
            r.details["seconds"] = round(time.monotonic() - t0, 1)
            rows.append(r)
            print(f"  [{r.details['seconds']:6.1f} s] {r.fault}: {r.outcome}", file=sys.stderr, flush=True)

    run("kill", lambda: row_agent_kill(base / "kill", p.kills))
    run("boot", lambda: row_boot_order(base / "boot"))
    run("restart", lambda: row_broker_restart(base / "restart", p.restarts))
    run("broker_kill", lambda: row_broker_kill_under_load(base / "bkill", p.broker_kills))
    run("broker_kill", lambda: row_broker_kill_queue(base / "bkill-1", 1))
    run("broker_kill", lambda: row_broker_kill_queue(base / "bkill-60", 60))
    run("network", lambda: row_network(base / "net", p.network))
    run("disk", lambda: row_disk_full(base / "full"))
    run("disk", lambda: row_read_only(base / "ro"))
    run("flood", lambda: row_flood(p.flood))
    run("clock", row_clock)
    run("fuzz", lambda: row_fuzz(p.fuzz))
    run("security", lambda: row_security(base / "sec"))
    if root is None:
        shutil.rmtree(base, ignore_errors=True)
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--short", action="store_true", help="the short form CI runs")
    ap.add_argument("--only", default=",".join(ROWS), help=f"comma-separated rows of {', '.join(ROWS)}")
    ap.add_argument("--markdown", action="store_true", help="print the table as Markdown")
    ap.add_argument("--keep", type=Path, default=None, help="run in this folder and keep its files")
    args = ap.parse_args()
    only = tuple(x.strip() for x in args.only.split(",") if x.strip())
    t0 = time.monotonic()
    rows = campaign(args.short, only, args.keep)
    print(table(rows, args.markdown))
    print(f"\n{len(rows)} rows in {time.monotonic() - t0:.0f} s; {sum(not r.ok for r in rows)} failed")
    sys.exit(0 if all(r.ok for r in rows) else 1)


if __name__ == "__main__":
    main()
