"""The SQLite state file: journal, snapshots, outbox and dead letters on a real file."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap

import pytest

from watchdog_edge.agent.store import JournalEntry, OutboxItem, Store, read_dead_letters
from watchdog_edge.core.events import DeadLetter
from watchdog_edge.errors import StoreError


def _msg(i: int, t: float = 0.0) -> JournalEntry:
    return JournalEntry(t=t or 1000.0 + i, topic="plant/pred", payload=f'{{"id": {i}, "value": 1.5}}'.encode(), mid=i)


def test_wal_and_synchronous_modes_are_in_force(tmp_path):
    # PRAGMA journal_mode / synchronous read back what SQLite actually uses (SQLite docs, "PRAGMA").
    s = Store(tmp_path / "a.sqlite")
    assert s.journal_mode == "WAL"
    assert s.synchronous == "NORMAL"
    s.close()
    f = Store(tmp_path / "b.sqlite", synchronous="FULL")
    assert f.synchronous == "FULL"
    f.close()
    with pytest.raises(StoreError, match="NORMAL' or 'FULL"):
        Store(tmp_path / "c.sqlite", synchronous="OFF")  # type: ignore[arg-type]


def test_journal_keeps_messages_and_ticks_in_order_and_bytes_exact(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    raw = b"\xff\xfe not utf-8 \x00"
    last = s.append([_msg(1), JournalEntry(t=1001.5, tick=True), JournalEntry(t=1002.0, topic="x/y", payload=raw)])
    assert last == 3
    tail = list(s.journal_tail(0))
    assert [(e.t, e.topic, e.tick) for e in tail] == [
        (1001.0, "plant/pred", False),
        (1001.5, None, True),
        (1002.0, "x/y", False),
    ]
    assert tail[2].payload == raw and tail[0].mid == 1
    assert [e.seq for e in s.journal_tail(2)] == [3]
    s.close()


def test_snapshot_trims_the_journal_and_a_reopen_resumes_from_it(tmp_path):
    path = tmp_path / "s.sqlite"
    s = Store(path)
    s.append([_msg(i) for i in range(5)])
    covered = s.save_snapshot({"models": {"m": {"n": 5}}}, t=1005.0)
    assert covered == 5 and s.journal_depth() == 0
    s.append([_msg(i) for i in range(5, 8)])
    s.save_snapshot({"models": {"m": {"n": 7}}}, t=1007.0, journal_seq=7)  # row 8 not covered
    s.close()

    r = Store(path)
    snap = r.latest_snapshot()
    assert snap is not None and snap.data == {"models": {"m": {"n": 7}}} and snap.journal_seq == 7
    assert [e.seq for e in r.journal_tail(snap.journal_seq)] == [8]
    # seq numbers keep growing after trims, so a tail is never confused with old rows
    assert r.append([_msg(9)]) == 9
    assert r._db.execute("SELECT COUNT(*) FROM snapshots").fetchone()[0] == 1
    r.close()


def test_outbox_holds_alerts_until_acknowledged_and_counts_them(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    a1 = OutboxItem("id-1", "watchdog/m/alerts", b'{"alert_id": "id-1"}', 10.0)
    a2 = OutboxItem("id-2", "watchdog/m/alerts", b'{"alert_id": "id-2"}', 11.0)
    s.append([_msg(1)], [a1])
    s.append([_msg(2)], [a2, a1])  # the same alert id again is kept once
    assert [a.alert_id for a in s.outbox()] == ["id-1", "id-2"]
    assert s.mark_sent(["id-1", "unknown"]) == 1
    assert [a.alert_id for a in s.outbox()] == ["id-2"] and s.outbox_depth() == 1
    assert s.counter("alerts_sent") == 1
    s.close()


def test_a_failed_batch_leaves_neither_journal_rows_nor_alerts(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    bad = OutboxItem("id-x", "t", None, 1.0)  # type: ignore[arg-type]  # bytes(None) fails mid-batch
    with pytest.raises(TypeError):
        s.append([_msg(1), _msg(2)], [bad])
    assert s.journal_depth() == 0 and s.outbox_depth() == 0
    s.close()


def test_seq_numbers_and_depth_follow_the_journal_across_failures_trims_and_reopens(tmp_path):
    # commit() counts seq numbers itself instead of asking SQLite after every batch, and
    # journal_depth() reads the two ends of the key: both must agree with the table.
    path = tmp_path / "s.sqlite"
    s = Store(path)

    def count() -> int:
        return s._db.execute("SELECT COUNT(*) FROM journal").fetchone()[0]

    assert s.commit([(1.0, "p", b"a", 0, 1), (1.5, None, None, 1, None)]) == 2
    with pytest.raises(TypeError):
        s.commit([(2.0, "p", b"b", 0, 2)], [OutboxItem("x", "t", None, 2.0)])  # type: ignore[arg-type]
    assert s.commit([(3.0, "p", b"c", 0, 3)], [OutboxItem("a1", "o", b"{}", 3.0)]) == 3
    assert s._db.execute("SELECT journal_seq FROM outbox WHERE alert_id = 'a1'").fetchone()[0] == 3
    assert [e.seq for e in s.journal_tail(0)] == [1, 2, 3]
    assert s.journal_depth() == count() == 3
    s.save_snapshot({"n": 2}, t=4.0, journal_seq=2)
    assert s.journal_depth() == count() == 1
    s.close()
    s = Store(path)
    assert s.commit([(5.0, "p", b"d", 0, 4)]) == 4
    assert s.journal_depth() == count() == 2
    s.save_snapshot({"n": 4}, t=6.0)
    assert s.journal_depth() == count() == 0
    s.close()


def test_a_killed_writer_never_leaves_alerts_without_their_journal_rows(tmp_path):
    # A real process appends batches (5 messages + 1 alert each) until it is SIGKILLed; after
    # that the file must hold whole batches only: the transaction is the unit (SQLite atomic commit).
    path = tmp_path / "s.sqlite"
    code = textwrap.dedent(f"""
        import sys
        from watchdog_edge.agent.store import Store, JournalEntry, OutboxItem
        s = Store({str(path)!r})
        i = 0
        while True:
            rows = [JournalEntry(t=float(i * 5 + k), topic="p", payload=b"x" * 200) for k in range(5)]
            s.append(rows, [OutboxItem(f"a{{i}}", "o", b"alert", float(i))])
            i += 1
            if i == 50:
                print("ready", flush=True)
    """)
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "ready"
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=10)
    s = Store(path)
    n_alerts, n_rows = s.outbox_depth(), s.journal_depth()
    assert n_alerts >= 50
    assert n_rows == 5 * n_alerts
    assert s._db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    s.close()


def test_dead_letters_are_bounded_by_count_and_bytes_and_readable_back(tmp_path):
    path = tmp_path / "s.sqlite"
    s = Store(path, dead_letter_max_count=3, dead_letter_max_bytes=2048)
    for i in range(5):
        s.add_dead_letters([DeadLetter("plant/pred", float(i), "not_json", f"line {i}", f"bad {i}".encode())])
    kept = s.dead_letters()
    assert [d.detail for d in kept] == ["line 2", "line 3", "line 4"]  # oldest dropped first
    assert s.dead_letter_stats() == {"count": 3, "bytes": sum(len(d.payload) for d in kept), "dropped": 2}

    big = b"{" * 5000
    s.add_dead_letters([DeadLetter("plant/pred", 9.0, "too_large", "5000 bytes", big)])
    stats = s.dead_letter_stats()
    assert stats["bytes"] <= 2048
    newest = s.dead_letters(limit=1)[0]
    assert newest.reason == "too_large" and newest.size == 5000 and newest.truncated
    assert newest.payload == big[:2048]

    # An operator reads them while the agent still has the file open (WAL readers do not block).
    back = read_dead_letters(path)
    assert [d.reason for d in back] == [d.reason for d in s.dead_letters()]
    assert back[-1].to_dict()["size"] == 5000
    s.close()


def test_non_utf8_dead_letter_reads_back_as_base64(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    s.add_dead_letters([DeadLetter("a/b", 1.0, "not_json", "bytes", b"\xff\x00\x81")])
    d = s.dead_letters()[0].to_dict()
    assert "payload" not in d and d["payload_b64"] == "/wCB"  # base64 of ff 00 81 (RFC 4648)
    s.close()


def test_reading_a_missing_or_foreign_file_says_what_to_check(tmp_path):
    with pytest.raises(StoreError, match="agent.state_dir"):
        read_dead_letters(tmp_path / "none.sqlite")
    other = tmp_path / "other.sqlite"
    sqlite3.connect(other).execute("CREATE TABLE x (a)").connection.commit()
    with pytest.raises(StoreError, match="not a watchdog-edge state file"):
        read_dead_letters(other)


def test_a_newer_schema_is_refused(tmp_path):
    path = tmp_path / "s.sqlite"
    s = Store(path)
    s._db.execute("UPDATE meta SET value = '99' WHERE key = 'schema_version'")
    s.close()
    with pytest.raises(StoreError, match="schema 99"):
        Store(path)


def test_snapshot_keeps_infinities_exactly(tmp_path):
    s = Store(tmp_path / "s.sqlite")
    s.save_snapshot({"now": float("-inf"), "x": [1.5, float("inf")]}, t=1.0)
    back = s.latest_snapshot().data
    assert back["now"] == float("-inf") and back["x"] == [1.5, float("inf")]
    s.close()


def test_snapshot_text_is_exactly_what_json_dumps_writes():
    # The snapshot is written piece by piece (to save memory); the text must not change.
    import json
    import random

    from hypothesis import given, settings
    from hypothesis import strategies as st

    from watchdog_edge.agent.store import _PIECE, snapshot_text

    def dumps(x):
        return json.dumps(x, separators=(",", ":"))

    leaves = st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=8)
    values = st.recursive(
        leaves,
        lambda inner: st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=5), inner, max_size=5),
        max_leaves=30,
    )

    @settings(max_examples=200, deadline=None)
    @given(values)
    def small(v):
        assert snapshot_text(v) == dumps(v)

    small()
    rng = random.Random(5)
    n = 2 * _PIECE + 7  # past the piece size, with a remainder
    big = {
        "pairers": {"m": {"done": [[str(i), 1.7e9 + rng.random()] for i in range(n)], "preds": []}},
        "ids": {f"k{i}": (i, float("inf") if i % 97 == 0 else i / 7, "é") for i in range(n)},
        "window": tuple(rng.gauss(0, 1) for _ in range(n)),
        "mixed": {1: "a", "b": [float("nan")]},
    }
    assert snapshot_text(big) == dumps(big)


def test_state_folder_and_files_are_private_to_the_agents_user(tmp_path):
    # The state file holds payloads and dead letters: folder 0700, file 0600, and SQLite's
    # -wal and -shm files take the database file's mode (SQLite docs, "Write-Ahead Logging").
    old = os.umask(0o022)  # a common default umask, which would give 0755 and 0644
    try:
        s = Store(tmp_path / "state" / "deep" / "state.sqlite")
        s.append([_msg(1)])
        folder = tmp_path / "state" / "deep"
        modes = {p.name: p.stat().st_mode & 0o777 for p in folder.iterdir()}
        assert folder.stat().st_mode & 0o777 == 0o700
        assert modes["state.sqlite"] == 0o600 and modes["state.sqlite-wal"] == 0o600, modes
        assert all(m == 0o600 for m in modes.values()), modes
        s.close()
        # A file made earlier with loose bits is narrowed on the next open.
        os.chmod(folder / "state.sqlite", 0o644)
        Store(folder / "state.sqlite").close()
        assert (folder / "state.sqlite").stat().st_mode & 0o777 == 0o600
    finally:
        os.umask(old)


def test_a_write_the_file_system_refuses_is_one_clear_error_and_keeps_nothing_half(tmp_path):
    from watchdog_edge.agent.store import StoreWriteError

    s = Store(tmp_path / "s.sqlite")
    s.append([_msg(1)])
    # SQLite's own page limit stands in for a full disk here (SQLite docs, "PRAGMA max_page_count":
    # a write past it fails with SQLITE_FULL); tests/test_faults.py fills a real small file system.
    pages = s._db.execute("PRAGMA page_count").fetchone()[0]
    s._db.execute(f"PRAGMA max_page_count={pages}")
    big = [JournalEntry(t=2000.0 + i, topic="plant/pred", payload=b"x" * 4000, mid=i) for i in range(50)]
    with pytest.raises(StoreWriteError, match=r"cannot write the state file .*full.*free space"):
        s.append(big)
    assert s.journal_depth() == 1  # the failed batch left nothing behind
    s._db.execute("PRAGMA max_page_count=1073741823")
    assert s.append(big) == 51  # space back: the same batch goes in
    assert s._db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    s.close()
