"""Planned-work windows: raises held back and counted, open episodes published when the window ends.

The traffic: predictions every 10 s for three hours; truths every 60 s that stop after 1000 s
and return from 4000 s. The feed_stop check (truth timeout 600 s, critical at 3 x) then goes
warning at 1570 s, critical at 2770 s and normal at 4020 s (tests/test_checks_feed_stop.py
derives these times step by step).
"""

from __future__ import annotations

import json

import pytest
from helpers import card, config

from watchdog_edge.core.alerts import alert_id, episode_id
from watchdog_edge.core.events import Alert, DeadLetter, PlannedWork
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import parse_config
from watchdog_edge.errors import ConfigError

T0 = 1764547200.0  # 2025-12-01T00:00:00Z
COMMANDS = "watchdog/agents/edge-agent/commands/planned-work"
CHECKS = {
    "gap": {"enabled": False},
    "range": {"enabled": False},
    "shift": {"enabled": False},
    "feed_stop": {"prediction_timeout_s": 120, "truth_timeout_s": 600, "critical_factor": 3},
}


def make(planned: list[dict] | None = None) -> Monitor:
    data = config(["m"], checks=CHECKS).model_dump(mode="json")
    data["planned_work"] = planned or []
    return Monitor(parse_config(data), {"m": card("m")})


def traffic(commands: dict[int, dict] | None = None):
    """(kind, t, topic, payload) in time order; commands at their offsets before the records."""
    commands = commands or {}
    for s in range(0, 3 * 3600, 10):
        t = T0 + s
        if s in commands:
            yield "msg", t, COMMANDS, json.dumps(commands[s]).encode()
        yield "msg", t, "m/pred", json.dumps({"id": s, "value": 1.0}).encode()
        if s % 60 == 0 and (s <= 1000 or s >= 4000):
            yield "msg", t, "m/truth", json.dumps({"id": s, "value": 1.0}).encode()
        yield "tick", t, None, None


def run(mon: Monitor, commands: dict[int, dict] | None = None, steps: bool = False) -> list:
    out = []
    for kind, t, topic, payload in traffic(commands):
        if steps:
            got = mon.apply(mon.intake_tick(t) if kind == "tick" else mon.intake(topic, payload, t))
        else:
            got = mon.tick(t) if kind == "tick" else mon.feed(topic, payload, t)
        out.extend(got)
    return out


def alerts(events: list) -> list[tuple]:
    return [(a.t - T0, a.state, a.severity) for a in events if isinstance(a, Alert)]


def test_without_planned_work_the_feed_stop_episode_is_published_as_usual():
    assert alerts(run(make())) == [
        (1570, "raised", "warning"),
        (2770, "raised", "critical"),
        (4020, "cleared", "critical"),
    ]


def test_an_episode_inside_a_window_is_counted_never_published():
    mon = make([{"name": "cleaning", "daily_at": "00:20", "duration_s": 3600}])  # 1200 s to 4800 s
    events = run(mon)
    assert alerts(events) == []
    st = mon.state("m")
    assert st["held_raises"] == 2 and st["held_open"] == 0
    assert [(e.t - T0, e.state) for e in events if isinstance(e, PlannedWork)] == [(1200, "began"), (4800, "ended")]


def test_open_episodes_are_published_when_the_window_ends_with_a_note_and_the_usual_ids():
    mon = make([{"name": "cleaning", "daily_at": "00:20", "duration_s": 1800, "reason": "probe cleaning"}])
    events = run(mon)
    got = [a for a in events if isinstance(a, Alert)]
    assert alerts(events) == [(3000, "raised", "critical"), (4020, "cleared", "critical")]
    released, cleared = got
    # the id rule is unchanged: the same id as the critical raise of the run without a window
    assert released.alert_id == alert_id("edge-agent", "m", None, "feed_stop", T0 + 1570, "raised", "critical")
    assert released.episode == cleared.episode == episode_id("edge-agent", "m", None, "feed_stop", T0 + 1570)
    assert released.note is not None and "cleaning" in released.note and "probe cleaning" in released.note
    assert released.to_dict()["note"] == released.note and "2025-12-01T00:46:10.000Z" in released.note
    assert released.figures["seconds_since_truth"] > 1800  # the figures of the held critical raise
    assert cleared.closes == ("critical",)  # the warning raise was never published
    assert mon.state("m")["held_raises"] == 2


def test_a_daily_window_in_a_stated_time_zone():
    # Europe/Berlin is UTC+1 in December (CET; from memory): 01:20 there is 00:20 UTC.
    local = make([{"name": "cleaning", "daily_at": "01:20", "duration_s": 1800, "timezone": "Europe/Berlin"}])
    utc = make([{"name": "cleaning", "daily_at": "00:20", "duration_s": 1800}])
    assert [a.to_dict() for a in run(local) if isinstance(a, Alert)] == [
        a.to_dict() for a in run(utc) if isinstance(a, Alert)
    ]


def test_a_dated_window_for_one_model_leaves_the_other_alone():
    data = config(["m", "n"], checks=CHECKS).model_dump(mode="json")
    data["planned_work"] = [
        {"name": "stop", "models": ["m"], "start": "2025-12-01T00:00:00Z", "end": "2025-12-01T03:00:00+00:00"}
    ]
    mon = Monitor(parse_config(data), {"m": card("m"), "n": card("n")})
    out = []
    for kind, t, topic, payload in traffic():
        for model in ("m", "n"):
            if kind == "tick":
                if model == "m":
                    out += mon.tick(t)
            else:
                out += mon.feed(topic.replace("m/", model + "/"), payload, t)
    assert {a.model for a in out if isinstance(a, Alert)} == {"n"}
    assert mon.state("m")["planned_work"]["name"] == "stop" and mon.state("n")["planned_work"] is None


def test_a_command_window_holds_like_a_config_window_and_replay_through_steps_agrees():
    begin = {"action": "begin", "name": "calibration", "duration_s": 1500, "models": ["m"], "by": "op"}
    events = run(make(), {1500: begin})
    assert alerts(events) == [(3000, "raised", "critical"), (4020, "cleared", "critical")]
    began = [e for e in events if isinstance(e, PlannedWork)][0]
    assert began.window["source"] == "command" and began.window["by"] == "op"
    # intake + apply (what tune uses) gives the very same events
    again = run(make(), {1500: begin}, steps=True)
    assert [a.to_dict() for a in again if isinstance(a, Alert)] == [a.to_dict() for a in events if isinstance(a, Alert)]


def test_ending_a_command_window_early_releases_the_held_warning_and_later_raises_go_out():
    begin = {"action": "begin", "name": "calibration", "duration_s": 5000}
    events = run(make(), {1500: begin, 2000: {"action": "end", "name": "calibration"}})
    assert alerts(events) == [(2000, "raised", "warning"), (2770, "raised", "critical"), (4020, "cleared", "critical")]
    cleared = [a for a in events if isinstance(a, Alert)][-1]
    assert cleared.closes == ("warning", "critical")


def test_a_snapshot_taken_inside_a_window_continues_exactly():
    begin = {"action": "begin", "name": "calibration", "duration_s": 1500}
    whole = run(make(), {1500: begin})
    mon = make()
    first, rest = [], []
    for kind, t, topic, payload in traffic({1500: begin}):
        target = first if t - T0 < 2500 else rest
        if t - T0 == 2500 and target is rest and not rest:
            data = json.loads(json.dumps(mon.snapshot()))
            mon = Monitor.restore(mon.config, {"m": card("m")}, data)
        target.extend(mon.tick(t) if kind == "tick" else mon.feed(topic, payload, t))
    assert [a.to_dict() for a in first + rest if isinstance(a, Alert)] == [
        a.to_dict() for a in whole if isinstance(a, Alert)
    ]


@pytest.mark.parametrize(
    "doc, words",
    [
        (b"not json", "not a planned-work command"),
        ({"action": "pause", "name": "x", "duration_s": 1}, "action = 'pause'"),
        ({"action": "begin", "name": "", "duration_s": 1}, "name = ''"),
        ({"action": "begin", "name": "x"}, "exactly one of duration_s"),
        ({"action": "begin", "name": "x", "duration_s": 1, "until": "2026-01-01T00:00:00Z"}, "exactly one"),
        ({"action": "begin", "name": "x", "duration_s": -5}, "must end after now"),
        ({"action": "begin", "name": "x", "duration_s": 30 * 86400}, "within 7 days"),
        ({"action": "begin", "name": "x", "until": "tomorrow"}, "until = 'tomorrow'"),
        ({"action": "begin", "name": "x", "duration_s": 60, "models": ["pump"]}, "'pump' is not a model"),
        ({"action": "end", "name": "never-began"}, "nothing to end"),
    ],
)
def test_a_bad_command_is_dead_lettered_with_what_to_fix(doc, words):
    mon = make()
    raw = doc if isinstance(doc, bytes) else json.dumps(doc).encode()
    (dl,) = mon.feed(COMMANDS, raw, T0)
    assert isinstance(dl, DeadLetter) and dl.reason == "bad_command" and words in dl.detail, dl.detail
    assert mon.status()["bad"] == {"bad_command": 1} and mon.status()["planned_work"] == []


def test_status_and_state_show_the_running_window():
    mon = make()
    mon.feed(COMMANDS, json.dumps({"action": "begin", "name": "stop", "duration_s": 600, "reason": "plant stop"}), T0)
    (w,) = mon.status()["planned_work"]
    assert (w["name"], w["start"], w["end"], w["models"], w["reason"]) == (
        "stop",
        "2025-12-01T00:00:00.000Z",
        "2025-12-01T00:10:00.000Z",
        None,
        "plant stop",
    )
    assert mon.state("m")["planned_work"] == w
    ended = mon.tick(T0 + 600)
    assert [e.state for e in ended if isinstance(e, PlannedWork)] == ["ended"]
    assert mon.status()["planned_work"] == [] and mon.state("m")["planned_work"] is None


@pytest.mark.parametrize(
    "entry, words",
    [
        ({"name": "a", "daily_at": "02:00"}, "needs both daily_at"),
        ({"name": "a", "daily_at": "25:00", "duration_s": 60}, "HH:MM"),
        ({"name": "a", "daily_at": "02:00", "duration_s": 60, "timezone": "Mars/Olympus"}, "unknown time zone"),
        ({"name": "a", "start": "2026-01-02T00:00:00Z", "end": "2026-01-01T00:00:00Z"}, "must come after start"),
        ({"name": "a", "start": "2026-01-02T00:00:00", "end": "2026-01-03T00:00:00Z"}, "no UTC offset"),
        ({"name": "a", "daily_at": "02:00", "duration_s": 60, "start": "2026-01-01T00:00:00Z"}, "daily_at with"),
    ],
)
def test_config_windows_are_validated_with_the_key_and_the_rule(entry, words):
    data = config(["m"], checks=CHECKS).model_dump(mode="json")
    data["planned_work"] = [entry]
    with pytest.raises(ConfigError) as e:
        parse_config(data)
    assert "planned_work[0]" in str(e.value) and words in str(e.value), str(e.value)


def test_a_window_naming_an_unknown_model_is_refused_at_start():
    with pytest.raises(ConfigError, match="planned_work\\[cleaning\\].models: 'pump' is not a model"):
        make([{"name": "cleaning", "models": ["pump"], "daily_at": "02:00", "duration_s": 60}])


def test_a_daily_window_occurs_once_a_day_through_both_daylight_saving_changes():
    from datetime import datetime, timezone
    from zoneinfo import ZoneInfo

    from watchdog_edge.core.planned import Schedule
    from watchdog_edge.core.settings import PlannedWorkSettings

    zone = ZoneInfo("Europe/Berlin")
    s = Schedule([PlannedWorkSettings(name="flush", daily_at="02:30", duration_s=1800, timezone="Europe/Berlin")])
    t = datetime(2026, 1, 1, tzinfo=timezone.utc).timestamp()
    end_of_year = datetime(2027, 1, 1, tzinfo=timezone.utc).timestamp()
    starts = []
    for _ in range(2000):  # bounded: two edges a day
        t = s.next_change(t)
        if t >= end_of_year:
            break
        w = s.active("m", t)
        if w is not None and w.start == t:
            starts.append(w)
            assert w.end - w.start == 1800
    assert len(starts) == 365
    local = {datetime.fromtimestamp(w.start, zone).strftime("%H:%M") for w in starts}
    # EU summer time begins on the last Sunday of March (2026-03-29) at 02:00 local, so 02:30
    # does not exist that day and the window begins at 03:30 (rule from memory)
    assert local == {"02:30", "03:30"}
    odd = [datetime.fromtimestamp(w.start, zone).date().isoformat() for w in starts]
    odd = [d for d, w in zip(odd, starts) if datetime.fromtimestamp(w.start, zone).hour != 2]
    assert odd == ["2026-03-29"]


def test_status_counts_every_published_alert_by_check_state_and_severity():
    mon = make()
    events = []
    for kind, t, topic, payload in traffic():
        if t - T0 > 2000:  # the feed_stop warning is open
            break
        events += mon.tick(t) if kind == "tick" else mon.feed(topic, payload, t)
    # a new model version closes the open episode with a clear of its own
    events += mon.feed("m/pred", json.dumps({"id": "x", "value": 1.0, "model_version": "v2"}).encode(), T0 + 2001)
    published = [a for a in events if isinstance(a, Alert)]
    # (the new version's feed_stop check still knows when the last truth came, and raises again)
    assert [(a.model_version, a.state) for a in published] == [(None, "raised"), (None, "cleared"), ("v2", "raised")]
    assert mon.status()["alerts"] == {"feed_stop": {"raised": {"warning": 2}, "cleared": {"warning": 1}}}
    assert mon.state("m")["last_alert"]["state"] == "raised"
