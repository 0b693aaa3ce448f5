"""Frozen events returned by the core's ``feed`` and ``tick``; adapters act on them."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import Any, Union


def rfc3339(t: float) -> str:
    """Core time (Unix seconds) as RFC 3339 text in UTC with millisecond precision."""
    dt = datetime.fromtimestamp(t, tz=timezone.utc)
    return dt.strftime("%Y-%m-%dT%H:%M:%S.") + f"{dt.microsecond // 1000:03d}Z"


@dataclass(frozen=True, slots=True)
class Alert:
    """A raise or a clear of one check on one model, as published on the alert topic."""

    alert_id: str
    agent: str
    model: str
    model_version: str | None
    check: str
    state: str  # "raised" | "cleared"
    severity: str  # "warning" | "critical"
    t: float
    summary: str
    figures: dict[str, Any] = field(default_factory=dict)
    episode: str = ""  # shared by an episode's raises and its clear (alerts.episode_id)
    closes: tuple[str, ...] = ()  # on a clear: the severities of the published raises it closes
    note: str | None = None  # on a raise held back by planned work and published when it ended

    @property
    def ts(self) -> str:
        return rfc3339(self.t)

    def to_dict(self) -> dict[str, Any]:
        """The contract's JSON object; ``closes`` only on a clear, ``note`` only where set."""
        out: dict[str, Any] = {
            "alert_id": self.alert_id,
            "agent": self.agent,
            "model": self.model,
            "model_version": self.model_version,
            "check": self.check,
            "state": self.state,
            "severity": self.severity,
            "ts": self.ts,
            "summary": self.summary,
            "figures": self.figures,
            "episode": self.episode,
        }
        if self.state == "cleared":
            out["closes"] = list(self.closes)
        if self.note is not None:
            out["note"] = self.note
        return out


@dataclass(frozen=True, slots=True)
class DeadLetter:
    """A bad inbound record kept aside with its raw bytes and the reason."""

    topic: str
    t: float
    reason: str
    detail: str
    payload: bytes


@dataclass(frozen=True, slots=True)
class VersionStarted:
    """A model reported a new ``model_version``: its live windows start afresh."""

    model: str
    t: float
    previous: str | None
    version: str | None


@dataclass(frozen=True, slots=True)
class PlannedWork:
    """A planned-work window began or ended (``window`` as ``planned.Window.to_dict`` gives it)."""

    t: float
    state: str  # "began" | "ended"
    window: dict[str, Any]

    def log_line(self, held: str) -> str:
        """One line for a log: the window, and what it does to raises (``held`` names the models).

        >>> w = {"name": "flush", "source": "command", "start": "s", "end": "e", "reason": ""}
        >>> PlannedWork(0.0, "ended", w).log_line("pump")
        "planned work 'flush' ended (command, s to e): episodes still open are published now, with a note"
        """
        w = self.window
        reason = f", {w['reason']}" if w["reason"] else ""
        what = (
            f"raises of {held} are held back and counted until it ends"
            if self.state == "began"
            else "episodes still open are published now, with a note"
        )
        return f"planned work '{w['name']}' {self.state} ({w['source']}, {w['start']} to {w['end']}{reason}): {what}"


Event = Union[Alert, DeadLetter, VersionStarted, PlannedWork]
