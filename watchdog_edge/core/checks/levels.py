"""Levels with hysteresis for checks whose figure grows with trouble (a share, an index).

The rule: the level rises at once when the figure passes a limit; it falls only when the figure
has stayed at or below that limit x (1 - hysteresis) for ``clear_after`` evaluations in a row.
"""

from __future__ import annotations

from typing import Any

from watchdog_edge.core.checks.base import Level


class LevelGate:
    """Level of one figure against a warning and a critical limit.

    >>> g = LevelGate(warning=0.1, critical=0.25, hysteresis=0.2, clear_after=2)
    >>> [g.update(x) for x in (0.05, 0.3, 0.22, 0.07, 0.07)]
    ['normal', 'critical', 'critical', 'critical', 'normal']
    """

    __slots__ = ("warning", "critical", "hysteresis", "clear_after", "level", "calm_run")

    def __init__(self, warning: float, critical: float, hysteresis: float, clear_after: int) -> None:
        self.warning = warning
        self.critical = critical
        self.hysteresis = hysteresis
        self.clear_after = clear_after
        self.level: Level = "normal"
        self.calm_run = 0

    @staticmethod
    def _rank(level: str) -> int:
        return 2 if level == "critical" else 1 if level == "warning" else 0

    def _level_of(self, x: float, factor: float) -> Level:
        if x > self.critical * factor:
            return "critical"
        if x > self.warning * factor:
            return "warning"
        return "normal"

    def update(self, x: float) -> Level:
        """Take one evaluation's figure and return the level after it."""
        raw = self._level_of(x, 1.0)
        calm = self._level_of(x, 1.0 - self.hysteresis)  # never below ``raw``
        if self._rank(raw) > self._rank(self.level):
            self.level = raw
            self.calm_run = 0
        elif self._rank(calm) < self._rank(self.level):
            self.calm_run += 1
            if self.calm_run >= self.clear_after:
                self.level = calm
                self.calm_run = 0
        else:
            self.calm_run = 0
        return self.level

    def reset(self) -> None:
        self.level = "normal"
        self.calm_run = 0

    def snapshot(self) -> dict[str, Any]:
        return {"level": self.level, "calm_run": self.calm_run}

    def restore(self, data: dict[str, Any]) -> None:
        self.level = data["level"]
        self.calm_run = int(data["calm_run"])
