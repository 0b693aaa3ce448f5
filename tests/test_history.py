"""The page's history: reading payloads defensively, bucketing, and both bounds (age and size)."""

from __future__ import annotations

import datetime as dt
import json
import sqlite3
from pathlib import Path

import numpy as np
import pytest

from watchdog_edge.readers.history import History, check_levels, gap_figures, parse_time, planned_spans


def state(live: float, level: str = "normal", **extra: object) -> dict:
    """A retained model state shaped as the agent publishes it (Monitor.state plus agent and ts)."""
    return {
        "model": "m",
        "model_version": "2",
        "pairs": 400,
        "expected_loss": 1.0,
        "checks": {
            "gap": {
                "level": level,
                "figures": {
                    "live_loss": live,
                    "lower": live - 0.1,
                    "upper": live + 0.1,
                    "expected_loss": 1.0,
                    "warning_limit": 1.25,
                    "critical_limit": 2.0,
                },
            },
            "range": {"level": "normal", "figures": {}},
        },
        **extra,
    }


@pytest.fixture
def history(tmp_path: Path) -> History:
    h = History(tmp_path / "h.sqlite", max_age_days=7, max_bytes=50_000_000)
    yield h
    h.close()


def test_parse_time_reads_rfc3339_as_the_agent_writes_it() -> None:
    # The reference: the standard library's own datetime for the same instant.
    ref = dt.datetime(2026, 12, 1, 10, 0, 0, 250000, tzinfo=dt.timezone.utc).timestamp()
    assert parse_time("2026-12-01T10:00:00.250Z") == ref
    assert parse_time("2026-12-01T11:00:00.250+01:00") == ref
    assert parse_time(ref) == ref
    assert parse_time(True) is None and parse_time("yesterday") is None and parse_time(float("inf")) is None


def test_payloads_with_wrong_types_give_none_not_guesses() -> None:
    bad = {"checks": {"gap": {"level": 3, "figures": {"live_loss": "1.5", "lower": None, "upper": float("nan")}}}}
    assert check_levels(bad) == {}
    assert set(gap_figures(bad).values()) == {None}
    assert check_levels({"checks": ["gap"]}) == {} and gap_figures({"checks": None})["live_loss"] is None


@pytest.mark.parametrize(
    "raw, expected",
    [
        # the shape the core publishes: one window with RFC 3339 start and end, or null
        ({"name": "clean", "start": "1970-01-01T00:01:40Z", "end": "1970-01-01T00:05:00Z"}, [(100.0, 300.0)]),
        (None, []),
        ([{"from": 100, "until": 200}, {"since": 250}], [(100.0, 200.0), (250.0, 260.0)]),
        ({"windows": [{"start": 10, "end": 20}]}, [(10.0, 20.0)]),
        ({"active": True}, [(260.0, 260.0)]),
        ({"start": 300, "end": 100}, []),
        ("soon", []),
        ([1, "x", {"start": "never"}], []),
    ],
)
def test_planned_spans_read_defensively(raw: object, expected: list) -> None:
    assert planned_spans({"planned_work": raw}, 260.0) == expected


def test_a_state_published_twice_is_kept_once(history: History) -> None:
    assert history.add_state("m", 100.0, state(1.0)) is True
    assert history.add_state("m", 100.0, state(1.0)) is False  # the retained copy after a reconnect
    assert history.add_state("m", 160.0, state(1.2)) is True
    with history.reader() as r:
        assert r.count_states("m", 0, 1000) == 2
        t, latest = r.latest_states()["m"]
        assert t == 160.0 and latest["checks"]["gap"]["figures"]["live_loss"] == 1.2


def test_an_older_state_does_not_replace_the_latest(history: History) -> None:
    history.add_state("m", 200.0, state(2.0))
    history.add_state("m", 100.0, state(1.0))  # arrives late
    with history.reader() as r:
        assert r.latest_states()["m"][0] == 200.0


def test_alerts_are_kept_once_per_alert_id(history: History) -> None:
    a = {"alert_id": "abc", "model": "m", "check": "gap", "state": "raised", "severity": "warning", "summary": "s"}
    assert history.add_alert(a, 10.0, "m") is True
    assert history.add_alert(a, 10.0, "m") is False  # a re-send after reconnect has the same id
    assert history.add_alert({"model": "m"}, 11.0, "m") is False  # no id: not kept
    with history.reader() as r:
        rows = r.alerts()
    assert [(x.alert_id, x.check, x.severity) for x in rows] == [("abc", "gap", "warning")]


def test_series_buckets_agree_with_numpy(history: History) -> None:
    rng = np.random.default_rng(3)
    t = np.sort(rng.uniform(0, 3600, 500))
    live = rng.gamma(2.0, 0.5, 500)
    for ti, v in zip(t, live):
        history.add_state("m", float(ti), state(float(v)))
    since, until, buckets = 0.0, 3600.0, 12
    with history.reader() as r:
        pts = r.series("m", since, until, buckets)
    # The reference: numpy's bincount over the same bucket index, outside SQLite. Buckets are
    # whole multiples of the width in Unix time; with 12 asked for over the span, at most 12
    # (the first and last may be partial), so the width is the span over 11.
    idx = np.floor(t / ((until - since) / (buckets - 1))).astype(int)
    counts = np.bincount(idx, minlength=buckets)
    means = np.bincount(idx, weights=live, minlength=buckets) / np.maximum(counts, 1)
    lowest = [float(np.min(live[idx == i] - 0.1)) for i in range(buckets) if counts[i]]
    assert [p.count for p in pts] == [int(c) for c in counts if c]
    assert np.allclose([p.live_loss for p in pts], means[counts > 0], rtol=1e-12)
    assert np.allclose([p.lower for p in pts], lowest, rtol=1e-12)
    assert sum(p.count for p in pts) == 500


def test_a_lone_state_in_its_bucket_is_drawn_exactly(history: History) -> None:
    for i, v in enumerate([1.1, 0.9, 1.7]):
        history.add_state("m", 1000.0 + 600 * i, state(v))
    with history.reader() as r:
        pts = r.series("m", 0.0, 3000.0, 480)
    assert [(p.t, p.live_loss) for p in pts] == [(1000.0, 1.1), (1600.0, 0.9), (2200.0, 1.7)]


def test_prune_removes_what_is_older_than_the_age_bound(tmp_path: Path) -> None:
    h = History(tmp_path / "h.sqlite", max_age_days=1, max_bytes=50_000_000)
    now = 10 * 86400.0
    for k in range(48):
        h.add_state("m", now - k * 3600.0, state(1.0))
        h.add_alert({"alert_id": f"a{k}", "model": "m"}, now - k * 3600.0, "m")
    removed = h.prune(now)
    with h.reader() as r:
        assert r.count_states("m", 0, now) == 25  # 0 h to 24 h old
        assert len(r.alerts(limit=100)) == 25
    assert removed["age"] == 2 * 23
    h.close()


def test_prune_holds_the_size_bound_and_keeps_the_newest(tmp_path: Path) -> None:
    path = tmp_path / "h.sqlite"
    cap = 600_000
    h = History(path, max_age_days=365, max_bytes=cap)
    for k in range(12_000):  # about 1.1 MB of states, over the bound
        h.add_state(f"m{k % 20}", 1000.0 + k, state(1.0 + k * 1e-4, planned_work={"start": 1.0, "end": 2.0}))
    assert h.used_bytes() > 1.5 * cap
    removed = h.prune(2000.0)
    assert removed["size"] > 0 and removed["age"] == 0
    assert h.used_bytes() <= cap
    h.close()
    assert path.stat().st_size <= cap * 1.1  # freed pages went back: the file itself is bounded
    db = sqlite3.connect(path)
    oldest, newest = db.execute("SELECT min(t), max(t) FROM states").fetchone()
    assert newest == 1000.0 + 11_999 and oldest > 1000.0  # the oldest went first
    db.close()


def test_planned_spans_are_merged_and_clipped_when_a_window_ends_early(history: History) -> None:
    w = {"start": 100.0, "end": 500.0}
    history.add_state("m", 120.0, state(1.0, planned_work=w))
    history.add_state("m", 180.0, state(1.0, planned_work=w))
    history.add_state("m", 240.0, state(1.0, planned_work=None))  # ended early by a command
    history.add_state("m", 600.0, state(1.0, planned_work=[{"start": 590, "end": 700}, {"start": 650, "end": 800}]))
    with history.reader() as r:
        assert r.planned("m", 0.0, 1000.0) == [(100.0, 240.0), (590.0, 800.0)]


def test_the_history_file_can_be_read_while_it_is_written(history: History) -> None:
    history.add_state("m", 1.0, state(1.0))
    reader = history.reader()
    history.add_state("m", 2.0, state(1.0))  # the writer does not wait for the open reader
    assert reader.count_states("m", 0, 10) == 2
    reader.close()
    with history.reader() as ro, pytest.raises(sqlite3.OperationalError):  # and readers cannot write
        ro.db.execute("DELETE FROM states")


def test_stored_payload_is_the_state_as_received(history: History) -> None:
    st = state(1.0, agent="gw-1", extra_key_from_a_newer_agent={"x": 1})
    history.add_state("m", 5.0, st, agent="gw-1")
    with history.reader() as r:
        assert r.latest_states()["m"][1] == json.loads(json.dumps(st))


def test_a_clear_keeps_what_it_closes_and_an_alert_its_note(history: History) -> None:
    clear = {
        "alert_id": "c1",
        "model": "m",
        "state": "cleared",
        "severity": "warning",
        "closes": ["warning", "critical"],
    }
    held = {
        "alert_id": "r1",
        "model": "m",
        "state": "raised",
        "severity": "warning",
        "note": "held back during planned work",
    }
    history.add_alert(clear, 20.0, "m")
    history.add_alert(held, 10.0, "m")
    history.add_alert({"alert_id": "odd", "model": "m", "closes": "warning"}, 5.0, "m")  # not a list: left out
    with history.reader() as r:
        rows = {a.alert_id: a for a in r.alerts()}
    assert rows["c1"].closes == "warning, critical" and rows["c1"].note is None
    assert rows["r1"].note == "held back during planned work" and rows["r1"].closes is None
    assert rows["odd"].closes is None


def test_buckets_stay_put_when_the_span_moves_on(history: History) -> None:
    for k in range(3000):
        history.add_state("m", 10_000.0 + 7.0 * k, state(1.0 + (k % 13) * 0.01))
    with history.reader() as r:
        a = r.series("m", 10_000.0, 30_000.0, 50)
        b = r.series("m", 10_003.0, 30_003.0, 50)  # a refresh three seconds later
        assert len(a) <= 50 and len(b) <= 50
    inner = {(p.t, p.live_loss, p.count) for p in a[1:-1]}
    assert inner <= {(p.t, p.live_loss, p.count) for p in b}  # whole buckets are the same buckets
