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
     until it clears, and so does the check's ``level`` in the retained state (no alerts
     flapping between severities); the check's own figures show warning;
   - in an episode -> normal: one "cleared" alert carrying the episode's highest severity.
3. A new model version ends the old version's open episodes with "cleared" alerts, since
   their windows are gone; the new version starts quiet.
4. ``alert_id`` is a digest of agent, model, model version, check, episode start, state and
   severity. A raise and its clear differ; a re-send of the same alert has the same id.
5. ``episode`` is a digest of agent, model, model version, check and episode start: the raise,
   its escalation and its clear carry the same one. A clear lists in ``closes`` the severities
   whose raises were published in the episode, lowest first.
6. Planned work (``hold``): a raise or escalation is not published but kept (its summary and
   figures) and counted; the episode goes on as usual. ``release`` at the end of the window
   publishes each still-open episode's held severity as a "raised" alert with a note, its
   ``alert_id`` by rule 4. A clear is published only for an episode with a published raise:
   an episode that opened and closed inside a window is counted, never published.
"""

from __future__ import annotations

import hashlib
from typing import Any

from watchdog_edge.core.checks.base import Verdict
from watchdog_edge.core.events import Alert, rfc3339
from watchdog_edge.core.levels import RANK as _RANK
from watchdog_edge.core.levels import Level, LevelGate, LevelRule, level_above

__all__ = ["AlertBook", "Level", "LevelGate", "LevelRule", "alert_id", "episode_id", "level_above"]


def episode_id(agent: str, model: str, version: str | None, check: str, episode_start: float) -> str:
    """Stable id of one episode, shared by its raises and its clear.

    >>> episode_id("gw", "m", None, "gap", 10.0) == episode_id("gw", "m", None, "gap", 10.0)
    True
    >>> episode_id("gw", "m", None, "gap", 10.0) == episode_id("gw", "m", None, "gap", 11.0)
    False
    """
    key = "\x1f".join(["episode", agent, model, version or "", check, repr(float(episode_start))])
    return hashlib.sha256(key.encode()).hexdigest()[:24]


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
        self._open: dict[str, dict[str, Any]] = {}  # check -> {"start", "severity", "published", "kept"}
        self.held = 0  # raises held back by planned work (rule 6)

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
        closes: tuple[str, ...] = (),
        note: str | None = None,
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
            episode_id(self.agent, self.model, version, check, start),
            closes,
            note,
        )

    def update(self, check: str, verdict: Verdict, t: float, version: str | None, hold: bool = False) -> Alert | None:
        """Apply one verdict; return the alert it causes, if any (none while ``hold``, rule 6)."""
        ep = self._open.get(check)
        if verdict.level == "normal":
            if ep is None:
                return None
            del self._open[check]
            if not ep["published"]:
                return None
            return self._alert(
                check,
                version,
                ep["start"],
                "cleared",
                ep["severity"],
                t,
                verdict.summary,
                verdict.figures,
                _closes(ep),
            )
        if ep is None:
            ep = self._open[check] = {"start": t, "severity": verdict.level, "published": []}
            if hold:
                self._hold(ep, verdict, t)
                return None
            ep["published"].append(verdict.level)
            return self._alert(check, version, t, "raised", verdict.level, t, verdict.summary, verdict.figures)
        if _RANK[verdict.level] > _RANK[ep["severity"]]:
            ep["severity"] = verdict.level
            if hold:
                self._hold(ep, verdict, t)
                return None
            ep["published"].append(verdict.level)
            return self._alert(
                check, version, ep["start"], "raised", verdict.level, t, verdict.summary, verdict.figures
            )
        return None

    def _hold(self, ep: dict[str, Any], verdict: Verdict, t: float) -> None:
        ep["kept"] = {"t": t, "summary": verdict.summary, "figures": verdict.figures}
        self.held += 1

    def holding(self) -> int:
        """Open episodes whose current severity is held back, waiting for the window's end."""
        return sum(1 for ep in self._open.values() if ep["severity"] not in ep["published"])

    def release(self, t: float, version: str | None, note: str) -> list[Alert]:
        """Planned work ended: publish each open episode's held severity as raised, with ``note``."""
        out = []
        for c, ep in self._open.items():
            if ep["severity"] in ep["published"]:
                continue
            kept = ep.pop("kept", None) or {"t": ep["start"], "summary": "", "figures": {}}
            ep["published"].append(ep["severity"])
            out.append(
                self._alert(
                    c,
                    version,
                    ep["start"],
                    "raised",
                    ep["severity"],
                    t,
                    kept["summary"],
                    kept["figures"],
                    note=note.format(raised=rfc3339(kept["t"])),
                )
            )
        return out

    def close_all(self, t: float, version: str | None, reason: str) -> list[Alert]:
        """End every open episode (a new model version arrived); only published episodes say so."""
        out = [
            self._alert(c, version, ep["start"], "cleared", ep["severity"], t, reason, {}, _closes(ep))
            for c, ep in self._open.items()
            if ep["published"]
        ]
        self._open.clear()
        return out

    def snapshot(self) -> dict[str, Any]:
        return {c: dict(ep, published=list(ep["published"])) for c, ep in self._open.items()}

    def restore(self, data: dict[str, Any]) -> None:
        # snapshots made before episodes kept their published severities know only the highest
        self._open = {
            c: {
                "start": float(ep["start"]),
                "severity": ep["severity"],
                "published": list(ep.get("published", [ep["severity"]])),
                **({"kept": ep["kept"]} if "kept" in ep else {}),
            }
            for c, ep in data.items()
        }


def _closes(ep: dict[str, Any]) -> tuple[str, ...]:
    """The severities whose raises were published in an episode, lowest first."""
    return tuple(sorted(set(ep["published"]), key=_RANK.__getitem__))
