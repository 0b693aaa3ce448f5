"""Alert states: every rule that turns check levels into raised and cleared alerts.

How a check's level moves (up at once, down after ``clear_after_evaluations`` calm evaluations, critical
stepping down to warning by the same rule) is the one rule of ``watchdog_edge.core.levels``,
which every check uses and this module owns. The rules below start from those levels.

Rules of this file:
1. Each (model, check) is either quiet or in an episode. An episode starts when the check's
   level leaves "normal"; its start time is the core time of that first raise.
2. Alerts are emitted on transitions only, never once per evaluation:
   - quiet -> warning or critical: one "raised" alert at that severity;
   - in an episode, a severity the episode has not yet had above it (warning -> critical):
     a new "raised" alert at the new severity, same episode start. A check whose level steps
     down from critical to warning raises nothing new: the episode keeps its highest severity
     until it clears (no alerts flapping between severities; the retained level shows warning);
   - in an episode -> normal: one "cleared" alert carrying the episode's highest severity.
3. A new model version ends the old version's open episodes with "cleared" alerts, since
   their windows are gone; the new version starts quiet.
4. ``alert_id`` is a digest of agent, model, model version, check, episode start, state and
   severity. A raise and its clear differ; a re-send of the same alert has the same id.
"""

from __future__ import annotations

import hashlib
from typing import Any

from watchdog_edge.core.checks.base import Verdict
from watchdog_edge.core.events import Alert
from watchdog_edge.core.levels import RANK as _RANK
from watchdog_edge.core.levels import Level, LevelGate, LevelRule, level_above

__all__ = ["AlertBook", "Level", "LevelGate", "LevelRule", "alert_id", "level_above"]


def alert_id(
    agent: str, model: str, version: str | None, check: str, episode_start: float, state: str, severity: str
) -> str:
    """Stable id of one alert.

    >>> alert_id("gw", "m", None, "gap", 10.0, "raised", "warning") == alert_id(
    ...     "gw", "m", None, "gap", 10.0, "raised", "warning")
    True
    """
    key = "\x1f".join([agent, model, version or "", check, repr(float(episode_start)), state, severity])
    return hashlib.sha256(key.encode()).hexdigest()[:24]


class AlertBook:
    """Episode state of every check of one model."""

    def __init__(self, agent: str, model: str) -> None:
        self.agent = agent
        self.model = model
        self._open: dict[str, dict[str, Any]] = {}  # check -> {"start", "severity"}

    def level(self, check: str) -> str:
        ep = self._open.get(check)
        return ep["severity"] if ep else "normal"

    def _alert(
        self,
        check: str,
        version: str | None,
        start: float,
        state: str,
        severity: str,
        t: float,
        summary: str,
        figures: dict[str, Any],
    ) -> Alert:
        return Alert(
            alert_id(self.agent, self.model, version, check, start, state, severity),
            self.agent,
            self.model,
            version,
            check,
            state,
            severity,
            t,
            summary,
            figures,
        )

    def update(self, check: str, verdict: Verdict, t: float, version: str | None) -> Alert | None:
        """Apply one verdict; return the alert it causes, if any."""
        ep = self._open.get(check)
        if verdict.level == "normal":
            if ep is None:
                return None
            del self._open[check]
            return self._alert(
                check, version, ep["start"], "cleared", ep["severity"], t, verdict.summary, verdict.figures
            )
        if ep is None:
            self._open[check] = {"start": t, "severity": verdict.level}
            return self._alert(check, version, t, "raised", verdict.level, t, verdict.summary, verdict.figures)
        if _RANK[verdict.level] > _RANK[ep["severity"]]:
            ep["severity"] = verdict.level
            return self._alert(
                check, version, ep["start"], "raised", verdict.level, t, verdict.summary, verdict.figures
            )
        return None

    def close_all(self, t: float, version: str | None, reason: str) -> list[Alert]:
        """End every open episode (a new model version arrived)."""
        out = [
            self._alert(c, version, ep["start"], "cleared", ep["severity"], t, reason, {})
            for c, ep in self._open.items()
        ]
        self._open.clear()
        return out

    def snapshot(self) -> dict[str, Any]:
        return {c: dict(ep) for c, ep in self._open.items()}

    def restore(self, data: dict[str, Any]) -> None:
        self._open = {c: {"start": float(ep["start"]), "severity": ep["severity"]} for c, ep in data.items()}
