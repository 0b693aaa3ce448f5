"""Planned-work windows: spans in which a model's raises are held back (calibration, cleaning, a stop).

Rules of this file:
1. A window is data: a name, a start and an end in core time, the models it covers (or all) and
   a reason. Windows come from the config (``[[planned_work]]``: daily at a local time for a
   duration, or a dated span) and from command messages on the agent's planned-work topic,
   which the monitor routes like any record, so replay honours both.
2. Config windows are computed from the settings and the core time alone; command windows are
   state (kept in snapshots). A command window is ended early by an ``end`` command with its
   name; a config window cannot be ended by command.
3. A model is held while any window covers it; where several do, the one ending last is shown.
4. What holding means for alerts is in alerts.py (raises kept and counted, released at the end).

The command message (one JSON object)::

    {"action": "begin", "name": "meter-calibration", "duration_s": 3600,
     "models": ["pump"], "reason": "flow meter calibration", "by": "j.smith"}
    {"action": "begin", "name": "plant-stop", "until": "2026-12-03T06:00:00Z"}
    {"action": "end", "name": "meter-calibration"}

``models`` left out covers every model of the agent. The window starts at the message's receive
time; ``until`` is compared with core time (the receive clock), never with the sender's clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime, timedelta
from typing import Any
from zoneinfo import ZoneInfo

from watchdog_edge.core.events import rfc3339
from watchdog_edge.core.settings import PlannedWorkSettings, parse_rfc3339

MAX_COMMAND_WINDOWS = 64
MAX_COMMAND_SPAN_S = 7 * 86400.0
_ACTIONS = ("begin", "end")


@dataclass(frozen=True, slots=True)
class Window:
    """One span of planned work in core time (Unix seconds)."""

    name: str
    start: float
    end: float
    models: tuple[str, ...] | None  # None: every model
    reason: str = ""
    source: str = "config"  # "config" | "command"
    by: str | None = None

    def covers(self, model: str) -> bool:
        """True when this window holds ``model``'s raises."""
        return self.models is None or model in self.models

    def to_dict(self) -> dict[str, Any]:
        """As shown in retained state, status and metrics readers."""
        return {
            "name": self.name,
            "source": self.source,
            "start": rfc3339(self.start),
            "end": rfc3339(self.end),
            "models": None if self.models is None else list(self.models),
            "reason": self.reason,
            "by": self.by,
        }

    def snapshot(self) -> dict[str, Any]:
        """Plain data with times as Unix seconds (``restore`` reads it back)."""
        return {
            "name": self.name,
            "start": self.start,
            "end": self.end,
            "models": None if self.models is None else list(self.models),
            "reason": self.reason,
            "source": self.source,
            "by": self.by,
        }

    @classmethod
    def restore(cls, d: dict[str, Any]) -> Window:
        """The window ``snapshot`` gave."""
        models = d.get("models")
        return cls(
            d["name"],
            float(d["start"]),
            float(d["end"]),
            None if models is None else tuple(models),
            d.get("reason", ""),
            d.get("source", "config"),
            d.get("by"),
        )


class CommandError(ValueError):
    """A planned-work command that cannot be applied; the message says why and what to send."""


def _occurrences(s: PlannedWorkSettings, t: float) -> list[Window]:
    """The config window's spans near ``t`` (a dated span, or the daily ones from the day before on)."""
    models = None if s.models is None else tuple(s.models)
    if s.start is not None and s.end is not None:
        return [Window(s.name, parse_rfc3339(s.start), parse_rfc3339(s.end), models, s.reason, "config")]
    assert s.daily_at is not None and s.duration_s is not None
    zone = ZoneInfo(s.timezone)  # validated when the config was read; ZoneInfo caches it
    hh, mm = (int(x) for x in s.daily_at.split(":"))
    day = datetime.fromtimestamp(t, tz=zone).date()
    out = []
    for k in (-1, 0, 1, 2):
        d = day + timedelta(days=k)
        start = datetime(d.year, d.month, d.day, hh, mm, tzinfo=zone).timestamp()
        out.append(Window(s.name, start, start + s.duration_s, models, s.reason, "config"))
    return out


class Schedule:
    """Every planned-work window of one monitor, from the config and from commands.

    >>> from watchdog_edge.core.settings import PlannedWorkSettings
    >>> s = Schedule([PlannedWorkSettings(name="cleaning", daily_at="02:00", duration_s=1800)])
    >>> t = 1764554400.0  # 2025-12-01T02:00:00Z
    >>> s.active("pump", t).name, s.active("pump", t + 1800) is None, s.next_change(t)
    ('cleaning', True, 1764556200.0)
    """

    def __init__(self, entries: list[PlannedWorkSettings]) -> None:
        self.entries = list(entries)
        self.commands: dict[str, Window] = {}

    def __bool__(self) -> bool:
        return bool(self.entries or self.commands)

    def windows_at(self, t: float) -> list[Window]:
        """Every window active at ``t`` (start included, end excluded)."""
        out = [w for s in self.entries for w in _occurrences(s, t) if w.start <= t < w.end]
        out += [w for w in self.commands.values() if w.start <= t < w.end]
        return out

    def active(self, model: str, t: float) -> Window | None:
        """The window holding ``model`` at ``t``: of those covering it, the one ending last."""
        found = [w for w in self.windows_at(t) if w.covers(model)]
        return max(found, key=lambda w: (w.end, w.name)) if found else None

    def next_change(self, t: float) -> float:
        """The first start or end after ``t`` (infinity when none); ended command windows are dropped."""
        for name in [n for n, w in self.commands.items() if w.end <= t]:
            del self.commands[name]
        best = math.inf
        for s in self.entries:
            for w in _occurrences(s, t):
                for edge in (w.start, w.end):
                    if t < edge < best:
                        best = edge
        for w in self.commands.values():
            for edge in (w.start, w.end):
                if t < edge < best:
                    best = edge
        return best

    def command(self, doc: Any, t: float, models: list[str]) -> tuple[str, Window]:
        """Apply one command message at core time ``t``; ``("began" | "ended", window)``.

        Raises CommandError with the field, the value and the rule.
        """
        if not isinstance(doc, dict):
            raise CommandError("a planned-work command must be one JSON object")
        action = doc.get("action")
        if action not in _ACTIONS:
            raise CommandError(f"action = {action!r}: must be 'begin' or 'end'")
        name = doc.get("name")
        if not isinstance(name, str) or not name.strip() or len(name) > 200:
            raise CommandError(f"name = {name!r}: must be a non-empty text of at most 200 characters")
        if any(s.name == name for s in self.entries):
            raise CommandError(f"name = {name!r}: a config window has that name; choose another name")
        if action == "end":
            w = self.commands.pop(name, None)
            if w is None or w.end <= t:
                raise CommandError(f"name = {name!r}: no planned work of that name is running; nothing to end")
            return "ended", Window(w.name, w.start, t, w.models, w.reason, w.source, w.by)
        span = doc.get("duration_s")
        until = doc.get("until")
        if (span is None) == (until is None):
            raise CommandError("give exactly one of duration_s (seconds) or until (RFC 3339 time)")
        if until is not None:
            if not isinstance(until, str):
                raise CommandError(f"until = {until!r}: must be RFC 3339 text, e.g. 2026-12-03T06:00:00Z")
            try:
                end = parse_rfc3339(until)
            except ValueError as e:
                raise CommandError(f"until = {until!r}: {e}") from None
        else:
            if isinstance(span, bool) or not isinstance(span, (int, float)) or not math.isfinite(span):
                raise CommandError(f"duration_s = {span!r}: must be a number of seconds")
            end = t + float(span)
        if not t < end <= t + MAX_COMMAND_SPAN_S:
            raise CommandError(
                f"the window would end at {rfc3339(end) if math.isfinite(end) else end}: it must end after now "
                f"and within {MAX_COMMAND_SPAN_S / 86400:.0f} days; put longer spans in the config"
            )
        raw_models = doc.get("models")
        chosen: tuple[str, ...] | None = None
        if raw_models is not None:
            if not isinstance(raw_models, list) or not raw_models or not all(isinstance(m, str) for m in raw_models):
                raise CommandError(f"models = {raw_models!r}: must be a non-empty list of model ids, or left out")
            unknown = [m for m in raw_models if m not in models]
            if unknown:
                raise CommandError(f"models = {raw_models!r}: {unknown[0]!r} is not a model of this agent")
            chosen = tuple(raw_models)
        reason = doc.get("reason", "")
        by = doc.get("by")
        if not isinstance(reason, str) or (by is not None and not isinstance(by, str)):
            raise CommandError("reason and by must be text")
        if name not in self.commands and len(self.commands) >= MAX_COMMAND_WINDOWS:
            raise CommandError(f"{MAX_COMMAND_WINDOWS} windows are already running; end one first")
        w = Window(name, t, end, chosen, reason[:500], "command", None if by is None else by[:200])
        self.commands[name] = w  # the same name again replaces the window
        return "began", w

    def snapshot(self) -> list[dict[str, Any]]:
        """The command windows (config windows come from the config again)."""
        return [w.snapshot() for w in self.commands.values()]

    def restore(self, data: list[dict[str, Any]]) -> None:
        """Take back the command windows of a snapshot."""
        self.commands = {d["name"]: Window.restore(d) for d in data}
