"""The page's bounded history in SQLite: what agents published, kept for some days and up to a size.

The rules of this file:

1. Rows come from three kinds of message: a model's retained state (one row per distinct
   publication time with the gap check's figures; the latest state is also kept whole),
   an alert (one row per ``alert_id``: a re-sent alert is the same row), and an agent's retained
   status (only the latest per agent is kept).
2. The history is bounded twice: rows older than ``max_age_days`` go, and when the pages in
   use pass ``max_bytes`` the oldest states and alerts go until it fits (nine tenths of it).
   The file gives freed pages back (``auto_vacuum = INCREMENTAL``), so it does not only grow.
3. One connection writes (the MQTT thread), under a lock; each reader opens its own connection
   (WAL: readers never wait for the writer, nor the writer for them).
4. Payloads are read defensively: what another process publishes may lack a key, carry a
   string where a number belongs, or come from a newer agent with keys we do not know.
   Anything unusable is left out, never guessed.
"""

from __future__ import annotations

import json
import math
import sqlite3
import threading
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

SCHEMA = """
CREATE TABLE IF NOT EXISTS states (
    model TEXT NOT NULL,
    t REAL NOT NULL,
    agent TEXT,
    model_version TEXT,
    live_loss REAL, lower REAL, upper REAL,
    expected_loss REAL, warning_limit REAL, critical_limit REAL,
    pairs INTEGER,
    planned TEXT,
    PRIMARY KEY (model, t)
) WITHOUT ROWID;
CREATE INDEX IF NOT EXISTS states_t ON states (t);
CREATE TABLE IF NOT EXISTS alerts (
    alert_id TEXT PRIMARY KEY,
    t REAL NOT NULL,
    model TEXT NOT NULL,
    agent TEXT,
    check_name TEXT,
    state TEXT,
    severity TEXT,
    episode TEXT,
    summary TEXT,
    note TEXT,
    closes TEXT,
    payload TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS alerts_t ON alerts (t);
CREATE INDEX IF NOT EXISTS alerts_model_t ON alerts (model, t);
CREATE TABLE IF NOT EXISTS latest (
    model TEXT PRIMARY KEY,
    t REAL NOT NULL,
    received REAL NOT NULL,
    payload TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS agents (
    agent TEXT PRIMARY KEY,
    received REAL NOT NULL,
    payload TEXT NOT NULL
);
"""

DAY_S = 86400.0


# --- reading other processes' payloads -----------------------------------------------------
def parse_time(value: Any) -> float | None:
    """Unix seconds from a number or RFC 3339 text; None when it is neither.

    >>> parse_time("2025-12-01T10:00:00.500Z"), parse_time(1764583200), parse_time("soon")
    (1764583200.5, 1764583200.0, None)
    """
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        f = float(value)
        return f if math.isfinite(f) else None
    if isinstance(value, str) and value:
        text = value.strip()
        if text[-1:] in ("Z", "z"):
            text = text[:-1] + "+00:00"  # Python 3.10's fromisoformat does not take 'Z'
        try:
            dt = datetime.fromisoformat(text)
        except ValueError:
            return None
        if dt.tzinfo is None:
            dt = dt.replace(tzinfo=timezone.utc)
        return dt.timestamp()
    return None


def number(value: Any) -> float | None:
    """A finite float, or None for anything else (text, bool, NaN, missing).

    >>> number(2), number("2"), number(float("nan")), number(True)
    (2.0, None, None, None)
    """
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    f = float(value)
    return f if math.isfinite(f) else None


def text(value: Any, limit: int = 2000) -> str | None:
    """A string cut to ``limit`` characters, or None when it is not a string."""
    return value[:limit] if isinstance(value, str) else None


_START_KEYS = ("start", "from", "since", "begins", "start_ts", "starts")
_END_KEYS = ("end", "until", "to", "ends", "end_ts")


def planned_spans(state: dict[str, Any], t: float) -> list[tuple[float, float]]:
    """The planned-work windows a model's state tells of, as ``(start, end)`` Unix seconds.

    The key is ``planned_work`` (or ``planned``); its value may be one window or a list of
    them, each an object with a start and an end (numbers or RFC 3339 text; ``start``/``end``,
    ``from``/``until`` and like names are read). A window without an end lasts, as far as this
    state can tell, until the state's own time ``t``; one without a start starts there.
    Anything else is ignored.

    >>> planned_spans({"planned_work": {"start": 100, "end": "1970-01-01T00:03:20Z"}}, 150)
    [(100.0, 200.0)]
    >>> planned_spans({"planned_work": [{"since": 100}], "model": "m"}, 150), planned_spans({}, 1)
    ([(100.0, 150.0)], [])
    """
    raw = state.get("planned_work", state.get("planned"))
    if raw is None or raw is False:
        return []
    items: Iterable[Any]
    if isinstance(raw, dict):
        windows = raw.get("windows")
        items = windows if isinstance(windows, list) else [raw]
    elif isinstance(raw, list):
        items = raw
    else:
        return []
    spans: list[tuple[float, float]] = []
    for item in items[:50] if isinstance(items, list) else []:
        if not isinstance(item, dict):
            continue
        if item.get("active") is False:
            continue
        start = next((parse_time(item[k]) for k in _START_KEYS if k in item), None)
        end = next((parse_time(item[k]) for k in _END_KEYS if k in item), None)
        if start is None and end is None:
            if item.get("active") is True:
                spans.append((float(t), float(t)))
            continue
        start = float(t) if start is None else start
        end = float(t) if end is None else end
        if end >= start:
            spans.append((start, end))
    return spans


def check_levels(state: dict[str, Any]) -> dict[str, str]:
    """``{check: level}`` from a state's ``checks``; levels that are not text are left out."""
    checks = state.get("checks")
    out: dict[str, str] = {}
    if isinstance(checks, dict):
        for name, c in checks.items():
            if isinstance(c, dict) and isinstance(c.get("level"), str):
                out[str(name)[:100]] = c["level"][:40]
    return out


def gap_figures(state: dict[str, Any]) -> dict[str, float | None]:
    """The gap check's figures the plot draws, each a finite number or None."""
    checks = state.get("checks")
    gap = checks.get("gap") if isinstance(checks, dict) else None
    fig = gap.get("figures") if isinstance(gap, dict) else None
    fig = fig if isinstance(fig, dict) else {}
    out = {k: number(fig.get(k)) for k in ("live_loss", "lower", "upper", "warning_limit", "critical_limit")}
    out["expected_loss"] = number(fig.get("expected_loss", state.get("expected_loss")))
    return out


# --- the store -----------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Point:
    """One drawn point of a model's series (a time bucket's summary)."""

    t: float
    live_loss: float | None
    lower: float | None
    upper: float | None
    expected_loss: float | None
    warning_limit: float | None
    critical_limit: float | None
    count: int


@dataclass(frozen=True, slots=True)
class AlertRow:
    """An alert as the page lists it."""

    alert_id: str
    t: float
    model: str
    agent: str | None
    check: str | None
    state: str | None
    severity: str | None
    episode: str | None
    summary: str | None
    note: str | None = None
    closes: str | None = None


class History:
    """The writing side: one connection, used under a lock (the MQTT thread and the pruner).

    >>> import tempfile, os
    >>> h = History(os.path.join(tempfile.mkdtemp(), "h.sqlite"), max_age_days=7, max_bytes=10**7)
    >>> h.add_state("m", 1000.0, {"checks": {"gap": {"level": "normal", "figures": {"live_loss": 1.5}}}})
    True
    >>> [p.live_loss for p in h.reader().series("m", 0, 2000, 10)]
    [1.5]
    """

    def __init__(self, path: str | Path, max_age_days: float = 7.0, max_bytes: int = 64 * 1024 * 1024) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self.max_age_s = max_age_days * DAY_S
        self.max_bytes = max_bytes
        self.lock = threading.Lock()
        self.version = 0  # bumped on every change, so that a page knows to reload
        self.db = sqlite3.connect(self.path, check_same_thread=False, isolation_level=None)
        self.db.execute("PRAGMA auto_vacuum = INCREMENTAL")  # takes effect on a new file only
        self.db.execute("PRAGMA journal_mode = WAL")
        self.db.execute("PRAGMA synchronous = NORMAL")
        self.db.executescript(SCHEMA)

    def close(self) -> None:
        """Close the writing connection."""
        with self.lock:
            self.db.close()

    def reader(self) -> HistoryReader:
        """A new read-only view on its own connection (one per thread or request)."""
        return HistoryReader(self.path)

    # -- writing ----------------------------------------------------------------------------
    def add_state(self, model: str, t: float, state: dict[str, Any], agent: str | None = None) -> bool:
        """Keep one retained state published at ``t``; False when that publication is already kept."""
        g = gap_figures(state)
        spans = planned_spans(state, t)
        version = state.get("model_version")
        pairs = state.get("pairs")
        row = (
            model,
            t,
            agent,
            str(version)[:200] if isinstance(version, (str, int)) else None,
            g["live_loss"],
            g["lower"],
            g["upper"],
            g["expected_loss"],
            g["warning_limit"],
            g["critical_limit"],
            pairs if isinstance(pairs, int) and not isinstance(pairs, bool) else None,
            json.dumps(spans) if spans else None,
        )
        payload = json.dumps(state, separators=(",", ":"), allow_nan=False, default=str)
        with self.lock:
            cur = self.db.execute("INSERT OR IGNORE INTO states VALUES (?,?,?,?,?,?,?,?,?,?,?,?)", row)
            fresh = cur.rowcount > 0
            self.db.execute(
                "INSERT INTO latest VALUES (?,?,?,?) ON CONFLICT(model) DO UPDATE SET "
                "t=excluded.t, received=excluded.received, payload=excluded.payload WHERE excluded.t >= latest.t",
                (model, t, t, payload),
            )
            self.version += 1
        return fresh

    def add_alert(self, alert: dict[str, Any], t: float, model: str) -> bool:
        """Keep one alert (``t`` its own time); False when that ``alert_id`` is already kept."""
        alert_id = text(alert.get("alert_id"), 200)
        if alert_id is None:
            return False
        closes = alert.get("closes")  # on a clear: the severities it closes
        row = (
            alert_id,
            t,
            model,
            text(alert.get("agent"), 200),
            text(alert.get("check"), 100),
            text(alert.get("state"), 40),
            text(alert.get("severity"), 40),
            text(alert.get("episode"), 200),
            text(alert.get("summary")),
            text(alert.get("note")),
            ", ".join(c[:40] for c in closes[:10] if isinstance(c, str)) if isinstance(closes, list) else None,
            json.dumps(alert, separators=(",", ":"), allow_nan=False, default=str),
        )
        with self.lock:
            cur = self.db.execute("INSERT OR IGNORE INTO alerts VALUES (?,?,?,?,?,?,?,?,?,?,?,?)", row)
            self.version += 1
        return cur.rowcount > 0

    def set_status(self, agent: str, received: float, status: dict[str, Any]) -> None:
        """Keep the latest retained status of one agent."""
        payload = json.dumps(status, separators=(",", ":"), allow_nan=False, default=str)
        with self.lock:
            self.db.execute(
                "INSERT INTO agents VALUES (?,?,?) ON CONFLICT(agent) DO UPDATE SET "
                "received=excluded.received, payload=excluded.payload",
                (agent, received, payload),
            )
            self.version += 1

    def forget_agent(self, agent: str) -> None:
        """Drop an agent whose retained status was cleared (an empty retained message)."""
        with self.lock:
            self.db.execute("DELETE FROM agents WHERE agent = ?", (agent,))
            self.version += 1

    # -- bounds ---------------------------------------------------------------------------------
    def used_bytes(self) -> int:
        """Bytes in pages that hold data (the file less its free pages)."""
        with self.lock:
            return _used_bytes(self.db)

    def prune(self, now: float) -> dict[str, int]:
        """Apply both bounds; the number of rows removed for age and for size."""
        removed = {"age": 0, "size": 0}
        cutoff = now - self.max_age_s
        with self.lock:
            for table in ("states", "alerts"):
                removed["age"] += self.db.execute(f"DELETE FROM {table} WHERE t < ?", (cutoff,)).rowcount
            removed["age"] += self.db.execute("DELETE FROM latest WHERE received < ?", (cutoff,)).rowcount
            removed["age"] += self.db.execute("DELETE FROM agents WHERE received < ?", (cutoff,)).rowcount
            self.db.executescript("PRAGMA incremental_vacuum;")  # run to the end: execute() frees one page only
            target = int(self.max_bytes * 0.9)
            for _ in range(20):  # each round removes a share sized to the excess; a few rounds suffice
                used = _used_bytes(self.db)
                if used <= self.max_bytes:
                    break
                share = min(0.5, max(0.02, 1.0 - target / used))
                for table in ("states", "alerts"):
                    n = self.db.execute(f"SELECT count(*) FROM {table}").fetchone()[0]
                    k = math.ceil(n * share)
                    if k:
                        removed["size"] += self.db.execute(
                            f"DELETE FROM {table} WHERE t <= (SELECT t FROM {table} ORDER BY t LIMIT 1 OFFSET ?)",
                            (k - 1,),
                        ).rowcount
                self.db.executescript("PRAGMA incremental_vacuum;")  # run to the end: execute() frees one page only
            self.db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            if removed["age"] or removed["size"]:
                self.version += 1
        return removed


def _used_bytes(db: sqlite3.Connection) -> int:
    pages = db.execute("PRAGMA page_count").fetchone()[0]
    free = db.execute("PRAGMA freelist_count").fetchone()[0]
    size = db.execute("PRAGMA page_size").fetchone()[0]
    return int((pages - free) * size)


class HistoryReader:
    """Read-only queries for the page, on a connection of its own."""

    def __init__(self, path: str | Path) -> None:
        self.db = sqlite3.connect(f"file:{Path(path)}?mode=ro", uri=True, isolation_level=None)

    def close(self) -> None:
        """Close the connection."""
        self.db.close()

    def __enter__(self) -> HistoryReader:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def latest_states(self) -> dict[str, tuple[float, dict[str, Any]]]:
        """Every model's latest retained state and its time, by model id."""
        out: dict[str, tuple[float, dict[str, Any]]] = {}
        for model, t, payload in self.db.execute("SELECT model, t, payload FROM latest ORDER BY model"):
            try:
                data = json.loads(payload)
            except ValueError:
                continue
            if isinstance(data, dict):
                out[model] = (t, data)
        return out

    def agents(self) -> dict[str, tuple[float, dict[str, Any]]]:
        """Every agent's latest status and when it was received, by agent name."""
        out: dict[str, tuple[float, dict[str, Any]]] = {}
        for agent, received, payload in self.db.execute("SELECT agent, received, payload FROM agents ORDER BY agent"):
            try:
                data = json.loads(payload)
            except ValueError:
                continue
            if isinstance(data, dict):
                out[agent] = (received, data)
        return out

    def series(self, model: str, since: float, until: float, buckets: int) -> list[Point]:
        """The model's states in ``[since, until]``, summarised in at most ``buckets`` time buckets.

        A bucket holding one state is that state exactly; a bucket of many gives the mean of
        the live loss, the lowest lower bound and the highest upper bound, and the mean of the
        expected loss and the limits. Buckets are whole multiples of their width in Unix time,
        so a plot refreshed a little later groups the same states the same way.
        """
        width = max((until - since) / max(buckets - 1, 1), 1e-9)
        rows = self.db.execute(
            "SELECT avg(t), avg(live_loss), min(lower), max(upper), avg(expected_loss), "
            "avg(warning_limit), avg(critical_limit), count(*) FROM states "
            "WHERE model = ? AND t >= ? AND t <= ? GROUP BY CAST(t / ? AS INTEGER) ORDER BY 1",
            (model, since, until, width),
        )
        return [Point(*r) for r in rows]

    def count_states(self, model: str, since: float, until: float) -> int:
        """How many states of the model lie in ``[since, until]``."""
        return int(
            self.db.execute(
                "SELECT count(*) FROM states WHERE model = ? AND t >= ? AND t <= ?", (model, since, until)
            ).fetchone()[0]
        )

    def planned(self, model: str, since: float, until: float) -> list[tuple[float, float]]:
        """The planned-work spans the model's states told of that touch ``[since, until]``, merged."""
        spans: list[tuple[float, float]] = []
        for raw, last_seen in self.db.execute(
            "SELECT planned, max(t) FROM states WHERE model = ? AND planned IS NOT NULL AND t >= ? GROUP BY planned",
            (model, since - DAY_S),
        ):
            # A window ended early (by a command) stops being told of: clip it at the first
            # state after the last one that told of it.
            after = self.db.execute(
                "SELECT min(t) FROM states WHERE model = ? AND t > ? AND (planned IS NULL OR planned != ?)",
                (model, last_seen, raw),
            ).fetchone()[0]
            try:
                for a, b in json.loads(raw):
                    a, b = float(a), float(b)
                    if after is not None and a <= after < b:
                        b = float(after)
                    if b >= since and a <= until:
                        spans.append((a, b))
            except (ValueError, TypeError):
                continue
        spans.sort()
        merged: list[tuple[float, float]] = []
        for a, b in spans:
            if merged and a <= merged[-1][1]:
                merged[-1] = (merged[-1][0], max(merged[-1][1], b))
            else:
                merged.append((a, b))
        return merged

    def alerts(self, model: str | None = None, since: float = 0.0, limit: int = 50) -> list[AlertRow]:
        """The newest alerts (of one model, or of all), newest first."""
        sql = (
            "SELECT alert_id, t, model, agent, check_name, state, severity, episode, summary, note, closes "
            "FROM alerts WHERE t >= ?"
        )
        args: list[Any] = [since]
        if model is not None:
            sql += " AND model = ?"
            args.append(model)
        sql += " ORDER BY t DESC, alert_id LIMIT ?"
        args.append(limit)
        return [AlertRow(*r) for r in self.db.execute(sql, args)]

    def counts(self) -> dict[str, int]:
        """Rows kept per table and the bytes in use."""
        out = {t: int(self.db.execute(f"SELECT count(*) FROM {t}").fetchone()[0]) for t in ("states", "alerts")}
        out["bytes"] = _used_bytes(self.db)
        return out
