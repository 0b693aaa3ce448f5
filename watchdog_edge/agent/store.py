"""The agent's state on disk: one SQLite file in WAL mode.

Four things live here, and the rules between them are what make "nothing lost" hold (a fifth,
``published``, keeps the latest retained state and status for readers when the broker is away):

- ``journal``: every inbound message (topic, payload bytes, receive time) and every timer tick,
  exactly like a recording line. Rows are written in small batched transactions before the
  messages are acknowledged to the broker, and trimmed when a snapshot covers them.
- ``snapshots``: the core's ``snapshot()`` as JSON together with the last journal row it has
  seen. A restart loads the latest one and replays the journal rows after it.
- ``outbox``: alerts waiting for the broker's PUBACK. They are written in the *same*
  transaction as the journal rows that caused them, so a crash can never keep one without the
  other, and they leave only when the broker has acknowledged them.
- ``dead_letters``: raw bad payloads with topic, time and reason, bounded by count and by bytes
  (the oldest go first; how many went is counted).

``synchronous=NORMAL`` in WAL mode survives a crash of the process (the WAL is in the OS page
cache); a power cut can lose the last commits. ``FULL`` syncs the WAL on every commit.
(SQLite documentation, "PRAGMA synchronous" and "Write-Ahead Logging".)
"""

from __future__ import annotations

import errno
import json
import os
import sqlite3
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import Any, Literal

from watchdog_edge.core.events import DeadLetter
from watchdog_edge.errors import StoreError, StoreWriteError

SCHEMA_VERSION = 1
_CACHE_KIB = 512

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS journal (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    t REAL NOT NULL,
    topic TEXT,
    payload BLOB,
    tick INTEGER NOT NULL DEFAULT 0,
    mid INTEGER
);
CREATE TABLE IF NOT EXISTS snapshots (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    t REAL NOT NULL,
    journal_seq INTEGER NOT NULL,
    data TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS outbox (
    n INTEGER PRIMARY KEY AUTOINCREMENT,
    alert_id TEXT NOT NULL UNIQUE,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    t REAL NOT NULL,
    journal_seq INTEGER
);
CREATE TABLE IF NOT EXISTS published (
    topic TEXT PRIMARY KEY,
    payload BLOB NOT NULL,
    t REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS dead_letters (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    topic TEXT NOT NULL,
    t REAL NOT NULL,
    reason TEXT NOT NULL,
    detail TEXT NOT NULL,
    payload BLOB NOT NULL,
    size INTEGER NOT NULL
);
"""


_PIECE = 1000  # list items or dict entries encoded in one go when writing a snapshot


def snapshot_text(data: Any) -> str:
    """``json.dumps(data, separators=(",", ":"))``, built piece by piece to stay near the text's own size.

    json.dumps gathers a large list as tens of thousands of small strings before joining
    them, about seven times the size of the text; a snapshot holds lists of 20,000 entries
    (the pairing memory), so that peak was the agent's largest. Here lists and dicts are
    encoded ``_PIECE`` items at a time into one growing buffer. Python's JSON reads back its
    own NaN and Infinity literals exactly (a core that has seen nothing holds its clock at
    -inf), so they are allowed in this private file.

    >>> snapshot_text({"a": [1, 2.5, float("-inf")], "b": {"c": None}})
    '{"a":[1,2.5,-Infinity],"b":{"c":null}}'
    """
    out = bytearray()
    _encode(data, out)
    return out.decode("ascii")  # json.dumps escapes every non-ASCII character


def _encode(obj: Any, out: bytearray) -> None:
    dumps = json.dumps
    if isinstance(obj, dict) and all(type(k) is str for k in obj):
        if len(obj) > _PIECE:
            out += b"{"
            items = iter(obj.items())
            first = True
            while piece := dict(islice(items, _PIECE)):
                if not first:
                    out += b","
                out += dumps(piece, separators=(",", ":"))[1:-1].encode("ascii")
                first = False
            out += b"}"
            return
        out += b"{"
        for k, (key, value) in enumerate(obj.items()):
            if k:
                out += b","
            out += dumps(key).encode("ascii")
            out += b":"
            _encode(value, out)
        out += b"}"
    elif isinstance(obj, (list, tuple)) and len(obj) > _PIECE:
        out += b"["
        for start in range(0, len(obj), _PIECE):
            if start:
                out += b","
            out += dumps(obj[start : start + _PIECE], separators=(",", ":"))[1:-1].encode("ascii")
        out += b"]"
    else:
        out += dumps(obj, separators=(",", ":")).encode("ascii")


@dataclass(frozen=True, slots=True)
class JournalEntry:
    """One journal row: a message (``topic`` and ``payload`` set) or a tick (``tick`` true)."""

    t: float
    topic: str | None = None
    payload: bytes | None = None
    tick: bool = False
    mid: int | None = None
    seq: int | None = None


@dataclass(frozen=True, slots=True)
class OutboxItem:
    """An alert waiting for its PUBACK."""

    alert_id: str
    topic: str
    payload: bytes
    t: float


@dataclass(frozen=True, slots=True)
class Snapshot:
    """The latest core snapshot and the journal row it covers up to."""

    t: float
    journal_seq: int
    data: dict[str, Any]


@dataclass(frozen=True, slots=True)
class StoredDeadLetter:
    """A dead letter read back; ``size`` is the original payload size, ``payload`` may be cut."""

    id: int
    topic: str
    t: float
    reason: str
    detail: str
    payload: bytes
    size: int

    @property
    def truncated(self) -> bool:
        return len(self.payload) < self.size

    def to_dict(self) -> dict[str, Any]:
        """Plain data for ``--json`` output; the payload as text when it is UTF-8."""
        try:
            text: str | None = self.payload.decode("utf-8")
        except UnicodeDecodeError:
            text = None
        out: dict[str, Any] = {
            "id": self.id,
            "topic": self.topic,
            "t": self.t,
            "reason": self.reason,
            "detail": self.detail,
            "size": self.size,
            "truncated": self.truncated,
        }
        if text is not None:
            out["payload"] = text
        else:
            import base64

            out["payload_b64"] = base64.b64encode(self.payload).decode("ascii")
        return out


def _write_error(path: Path, e: sqlite3.Error) -> StoreWriteError:
    text = str(e)
    low = text.lower()
    if "full" in low:
        why = "the disk (or agent.state_dir's file system) is full"
    elif "readonly" in low or "read-only" in low:
        why = "the state file or its folder is read-only"
    else:
        why = "the file system reported an error"
    return StoreWriteError(
        f"cannot write the state file {path}: {text} ({why}); free space or make agent.state_dir "
        "writable: the agent goes on by itself"
    )


class Store:
    """The agent's SQLite file. Use from one thread only (the agent's worker).

    >>> import tempfile, os
    >>> s = Store(os.path.join(tempfile.mkdtemp(), "state.sqlite"))
    >>> s.append([JournalEntry(1.0, "plant/pred", b'{"id": 1, "value": 2.0}')])
    1
    >>> [e.topic for e in s.journal_tail(0)]
    ['plant/pred']
    >>> s.close()
    """

    def __init__(
        self,
        path: str | Path,
        synchronous: Literal["NORMAL", "FULL"] = "NORMAL",
        dead_letter_max_count: int = 1000,
        dead_letter_max_bytes: int = 1_048_576,
    ) -> None:
        if synchronous not in ("NORMAL", "FULL"):
            raise StoreError(f"sqlite_synchronous = {synchronous!r}: must be 'NORMAL' or 'FULL'")
        self.path = Path(path)
        make_private(self.path)
        self.dead_letter_max_count = dead_letter_max_count
        self.dead_letter_max_bytes = dead_letter_max_bytes
        try:
            # isolation_level=None: we open transactions ourselves with BEGIN, so a batch is
            # exactly one transaction.
            self._db = sqlite3.connect(str(self.path), isolation_level=None, timeout=10.0)
            mode = self._db.execute("PRAGMA journal_mode=WAL").fetchone()[0]
            self._db.execute(f"PRAGMA synchronous={synchronous}")
            # The agent appends and rarely reads back: a small page cache holds the pages a commit
            # touches (SQLite's default is 2 MB).
            self._db.execute(f"PRAGMA cache_size=-{_CACHE_KIB}")
            self._db.executescript(_SCHEMA)
            found = self._meta_get("schema_version")
            if found is None:
                self._meta_set("schema_version", str(SCHEMA_VERSION))
        except sqlite3.Error as e:
            low = str(e).lower()
            if "full" in low or "readonly" in low or "read-only" in low or "disk i/o" in low:
                raise _write_error(self.path, e) from None
            raise StoreError(f"cannot open the state file {self.path}: {e}; check agent.state_dir") from None
        if str(mode).lower() != "wal":
            raise StoreError(
                f"the state file {self.path} cannot use WAL mode (got {mode!r}); "
                "put agent.state_dir on a local file system"
            )
        if found is not None and int(found) != SCHEMA_VERSION:
            raise StoreError(
                f"the state file {self.path} has schema {found}, this version reads "
                f"{SCHEMA_VERSION}; move it away to start fresh"
            )
        self._last_seq = self.last_seq()

    # --- plumbing -------------------------------------------------------------------------
    @contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        """One write transaction; a failed write rolls back and becomes a StoreWriteError."""
        db = self._db
        try:
            db.execute("BEGIN")
            yield db
            db.execute("COMMIT")
        except sqlite3.Error as e:
            self._rollback()
            raise _write_error(self.path, e) from None
        except BaseException:
            self._rollback()
            raise

    def _rollback(self) -> None:
        if self._db.in_transaction:
            try:
                self._db.execute("ROLLBACK")
            except sqlite3.Error:
                pass  # SQLite rolled back already (it does after some I/O errors)

    def close(self) -> None:
        """Close the file (a WAL checkpoint happens on the last close)."""
        self._db.close()

    @property
    def synchronous(self) -> str:
        """The PRAGMA in force: 'NORMAL' or 'FULL'."""
        code = self._db.execute("PRAGMA synchronous").fetchone()[0]
        return {0: "OFF", 1: "NORMAL", 2: "FULL", 3: "EXTRA"}[int(code)]

    @property
    def journal_mode(self) -> str:
        return str(self._db.execute("PRAGMA journal_mode").fetchone()[0]).upper()

    def _meta_get(self, key: str) -> str | None:
        row = self._db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        return None if row is None else row[0]

    def _meta_set(self, key: str, value: str) -> None:
        self._db.execute(
            "INSERT INTO meta (key, value) VALUES (?, ?) ON CONFLICT(key) DO UPDATE SET value = excluded.value",
            (key, value),
        )

    def counter(self, key: str) -> int:
        """A persisted counter (for example ``alerts_sent``); 0 when never set."""
        v = self._meta_get("counter." + key)
        return 0 if v is None else int(v)

    # --- journal, outbox and dead letters: one transaction per batch ----------------------
    def append(
        self,
        entries: Iterable[JournalEntry],
        alerts: Iterable[OutboxItem] = (),
        dead_letters: Iterable[DeadLetter] = (),
    ) -> int:
        """Write a batch in one transaction; return the last journal ``seq`` (0 if none yet).

        Alerts already in the outbox (same ``alert_id``) are kept once.
        """
        rows = [(e.t, e.topic, None if e.payload is None else bytes(e.payload), int(e.tick), e.mid) for e in entries]
        return self.commit(rows, alerts, dead_letters)

    def commit(
        self,
        rows: list[tuple[float, str | None, bytes | None, int, int | None]],
        alerts: Iterable[OutboxItem] = (),
        dead_letters: Iterable[DeadLetter] = (),
    ) -> int:
        """``append`` for journal rows given as ``(t, topic, payload, tick, mid)`` tuples (the agent's hot path)."""
        dl = list(dead_letters)
        with self._transaction() as db:
            if rows:
                db.executemany("INSERT INTO journal (t, topic, payload, tick, mid) VALUES (?, ?, ?, ?, ?)", rows)
            # One writer, AUTOINCREMENT: the rows just written took the next seq numbers.
            last = self._last_seq + len(rows)
            for a in alerts:
                db.execute(
                    "INSERT OR IGNORE INTO outbox (alert_id, topic, payload, t, journal_seq) VALUES (?, ?, ?, ?, ?)",
                    (a.alert_id, a.topic, bytes(a.payload), a.t, last),
                )
            if dl:
                self._insert_dead_letters(dl)
        self._last_seq = last
        return last

    def journal_tail(self, after_seq: int) -> Iterator[JournalEntry]:
        """Journal rows after ``after_seq`` in order (what a restart replays)."""
        cur = self._db.execute(
            "SELECT seq, t, topic, payload, tick, mid FROM journal WHERE seq > ? ORDER BY seq", (after_seq,)
        )
        for seq, t, topic, payload, tick, mid in cur:
            yield JournalEntry(
                t=t, topic=topic, payload=None if payload is None else bytes(payload), tick=bool(tick), mid=mid, seq=seq
            )

    def journal_depth(self) -> int:
        """Rows in the journal (not yet covered by a snapshot)."""
        # seq numbers are consecutive (one writer; a snapshot trims a prefix), so the two ends
        # of the primary key give the count without reading every page of the journal.
        lo, hi = self._db.execute("SELECT (SELECT MIN(seq) FROM journal), (SELECT MAX(seq) FROM journal)").fetchone()
        return 0 if lo is None else int(hi) - int(lo) + 1

    def last_seq(self) -> int:
        """The highest journal ``seq`` ever written (kept across trims)."""
        row = self._db.execute("SELECT seq FROM sqlite_sequence WHERE name = 'journal'").fetchone()
        return 0 if row is None else int(row[0])

    # --- snapshots ------------------------------------------------------------------------
    def save_snapshot(self, data: dict[str, Any], t: float, journal_seq: int | None = None) -> int:
        """Store the core's snapshot covering the journal up to ``journal_seq`` (default: all of it).

        In the same transaction the journal rows it covers are deleted and older snapshots
        dropped. Returns the covered ``seq``.
        """
        text = snapshot_text(data)
        with self._transaction() as db:
            seq = self.last_seq() if journal_seq is None else journal_seq
            db.execute("INSERT INTO snapshots (t, journal_seq, data) VALUES (?, ?, ?)", (t, seq, text))
            db.execute("DELETE FROM snapshots WHERE id < (SELECT MAX(id) FROM snapshots)")
            db.execute("DELETE FROM journal WHERE seq <= ?", (seq,))
        return seq

    def latest_snapshot(self) -> Snapshot | None:
        """The newest snapshot, or None on a first start."""
        row = self._db.execute("SELECT t, journal_seq, data FROM snapshots ORDER BY id DESC LIMIT 1").fetchone()
        if row is None:
            return None
        return Snapshot(t=row[0], journal_seq=int(row[1]), data=json.loads(row[2]))

    # --- outbox ---------------------------------------------------------------------------
    def outbox(self) -> list[OutboxItem]:
        """Alerts still waiting for a PUBACK, oldest first."""
        return [
            OutboxItem(alert_id=a, topic=tp, payload=bytes(p), t=t)
            for a, tp, p, t in self._db.execute("SELECT alert_id, topic, payload, t FROM outbox ORDER BY n")
        ]

    def outbox_depth(self) -> int:
        return int(self._db.execute("SELECT COUNT(*) FROM outbox").fetchone()[0])

    def mark_sent(self, alert_ids: Iterable[str]) -> int:
        """The broker acknowledged these alerts: remove them and count them; return how many left."""
        ids = list(alert_ids)
        if not ids:
            return 0
        with self._transaction() as db:
            removed = 0
            for a in ids:
                removed += db.execute("DELETE FROM outbox WHERE alert_id = ?", (a,)).rowcount
            self._meta_set("counter.alerts_sent", str(self.counter("alerts_sent") + removed))
        return removed

    # --- the latest retained messages, for readers with no broker -------------------------
    def keep_published(self, rows: Iterable[tuple[str, bytes, float]]) -> None:
        """Keep the latest retained payload per topic, ``(topic, payload, t)`` rows, in one transaction."""
        with self._transaction() as db:
            db.executemany(
                "INSERT INTO published (topic, payload, t) VALUES (?, ?, ?) "
                "ON CONFLICT(topic) DO UPDATE SET payload = excluded.payload, t = excluded.t",
                rows,
            )

    # --- dead letters ---------------------------------------------------------------------
    def _insert_dead_letters(self, letters: list[DeadLetter]) -> None:
        db = self._db
        cap = self.dead_letter_max_bytes
        for d in letters:
            raw = bytes(d.payload)
            # A single payload can be larger than the whole budget (an oversize message): keep
            # its head so an operator still sees what it was, and its true size.
            db.execute(
                "INSERT INTO dead_letters (topic, t, reason, detail, payload, size) VALUES (?, ?, ?, ?, ?, ?)",
                (d.topic, d.t, d.reason, d.detail, raw[:cap], len(raw)),
            )
        count, total = db.execute("SELECT COUNT(*), COALESCE(SUM(LENGTH(payload)), 0) FROM dead_letters").fetchone()
        dropped = 0
        while count > self.dead_letter_max_count or total > cap:
            row = db.execute("SELECT id, LENGTH(payload) FROM dead_letters ORDER BY id LIMIT 1").fetchone()
            db.execute("DELETE FROM dead_letters WHERE id = ?", (row[0],))
            count -= 1
            total -= row[1]
            dropped += 1
        if dropped:
            self._meta_set("counter.dead_letters_dropped", str(self.counter("dead_letters_dropped") + dropped))

    def add_dead_letters(self, letters: Iterable[DeadLetter]) -> None:
        """Store dead letters on their own (the agent normally passes them to ``append``)."""
        self.append((), (), letters)

    def dead_letters(self, limit: int | None = None) -> list[StoredDeadLetter]:
        """Dead letters kept, oldest first (the newest ``limit`` when given)."""
        sql = "SELECT id, topic, t, reason, detail, payload, size FROM dead_letters ORDER BY id"
        rows = self._db.execute(sql).fetchall()
        if limit is not None:
            rows = rows[-limit:] if limit > 0 else []
        return [
            StoredDeadLetter(id=r[0], topic=r[1], t=r[2], reason=r[3], detail=r[4], payload=bytes(r[5]), size=r[6])
            for r in rows
        ]

    def dead_letter_stats(self) -> dict[str, int]:
        """Count and bytes kept, and how many were dropped to stay within the bounds."""
        count, total = self._db.execute(
            "SELECT COUNT(*), COALESCE(SUM(LENGTH(payload)), 0) FROM dead_letters"
        ).fetchone()
        return {"count": int(count), "bytes": int(total), "dropped": self.counter("dead_letters_dropped")}


def make_private(path: Path) -> None:
    """Create the state folder (0700) and the state file (0600) private to the agent's user.

    The file holds payloads and dead letters. SQLite gives its ``-wal`` and ``-shm`` files the
    mode of the database file, so they are private as well. A folder or file that exists
    already keeps its owner; its mode is narrowed to the same bits.
    """
    folder = path.parent
    try:
        if not folder.exists():
            folder.mkdir(mode=0o700, parents=True)
            os.chmod(folder, 0o700)  # mkdir's mode is filtered by the umask
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o600)
        os.close(fd)
        for p in (path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
            if p.exists() and p.stat().st_mode & 0o077:
                os.chmod(p, 0o600)
    except OSError as e:
        cls = StoreWriteError if e.errno in (errno.EROFS, errno.ENOSPC, errno.EDQUOT) else StoreError
        raise cls(
            f"agent.state_dir = {str(folder)!r}: cannot create the state file there ({e.strerror}); "
            "check that the folder exists and is writable by the agent's user"
        ) from None


def open_readonly(path: str | Path) -> sqlite3.Connection:
    """Open a state file for reading while an agent may be writing it (WAL allows that)."""
    p = Path(path)
    if not p.exists():
        raise StoreError(f"no state file at {p}; has the agent run with this config (agent.state_dir)?")
    return sqlite3.connect(f"file:{p}?mode=ro", uri=True, timeout=10.0)


def read_dead_letters(path: str | Path, limit: int | None = None) -> list[StoredDeadLetter]:
    """Dead letters of a state file, opened read-only (for ``watchdog-edge deadletters``)."""
    db = open_readonly(path)
    try:
        try:
            rows = db.execute(
                "SELECT id, topic, t, reason, detail, payload, size FROM dead_letters ORDER BY id"
            ).fetchall()
        except sqlite3.OperationalError as e:
            raise StoreError(f"{path} is not a watchdog-edge state file ({e})") from None
    finally:
        db.close()
    if limit is not None:
        rows = rows[-limit:] if limit > 0 else []
    return [
        StoredDeadLetter(id=r[0], topic=r[1], t=r[2], reason=r[3], detail=r[4], payload=bytes(r[5]), size=r[6])
        for r in rows
    ]


def read_published(path: str | Path) -> list[tuple[str, bytes, float]]:
    """The latest retained payloads the agent kept, ``(topic, payload, t)``, opened read-only."""
    db = open_readonly(path)
    try:
        try:
            rows = db.execute("SELECT topic, payload, t FROM published ORDER BY topic").fetchall()
        except sqlite3.OperationalError as e:
            raise StoreError(
                f"{path} holds no retained copies ({e}); is it a watchdog-edge state file of this version?"
            ) from None
    finally:
        db.close()
    return [(str(r[0]), bytes(r[1]), float(r[2])) for r in rows]


STATE_FILE = "state.sqlite"


def state_path(state_dir: Path) -> Path:
    """Where the agent keeps its SQLite file inside ``agent.state_dir``."""
    return Path(state_dir) / STATE_FILE
