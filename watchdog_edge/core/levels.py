"""The one rule by which every check moves between levels; part of the alert rules (``alerts``).

Rules of this file:
1. A check evaluates and brings two levels: ``raised``, the level its evidence for trouble
   reaches against the limits, and ``calm``, the highest level its evidence for calm cannot yet
   rule out (the limits eased by hysteresis; never below ``raised``).
2. Up at once: when ``raised`` is above the current level, the level becomes ``raised``
   (normal -> warning or critical, warning -> critical).
3. Down slowly, one rule for every way down: when ``calm`` is below the current level for
   ``clear_after`` evaluations in a row, the level becomes the highest ``calm`` of those
   evaluations (critical -> warning, critical -> normal, warning -> normal): every one of
   them supports it. Any evaluation that is not calm restarts the count.
4. Nothing else moves a level, except ``reset`` (a new model version, or a check whose
   evidence ends by itself, such as a hold that runs out).

``alerts.AlertBook`` turns the levels into raised and cleared alerts.
"""

from __future__ import annotations

from typing import Any, Literal

Level = Literal["normal", "warning", "critical"]

RANK: dict[str, int] = {"normal": 0, "warning": 1, "critical": 2}


def level_above(x: float, warning: float, critical: float, factor: float = 1.0) -> Level:
    """The level of a figure that grows with trouble against limits scaled by ``factor``.

    >>> level_above(0.3, warning=0.1, critical=0.25), level_above(0.22, 0.1, 0.25, factor=0.8)
    ('critical', 'critical')
    """
    if x > critical * factor:
        return "critical"
    if x > warning * factor:
        return "warning"
    return "normal"


class LevelRule:
    """The level of one check, moved by rules 2 and 3 above.

    >>> r = LevelRule(clear_after=2)
    >>> [r.update(raised, calm) for raised, calm in [
    ...     ("critical", "critical"), ("warning", "warning"), ("warning", "warning"),
    ...     ("normal", "normal"), ("normal", "normal")]]
    ['critical', 'critical', 'warning', 'warning', 'normal']
    """

    __slots__ = ("clear_after", "level", "calm_run", "calm_top")

    def __init__(self, clear_after: int) -> None:
        self.clear_after = clear_after
        self.level: Level = "normal"
        self.calm_run = 0
        self.calm_top: Level = "normal"  # the highest calm level of the current run

    def update(self, raised: Level, calm: Level) -> Level:
        """Take one evaluation's two levels and return the level after it."""
        rank = RANK
        now = rank[self.level]
        up = rank[raised]
        if rank[calm] < up:  # calm is never below raised
            calm = raised
        if up > now:
            self.level = raised
            self.calm_run = 0
        elif rank[calm] < now:
            top = calm if self.calm_run == 0 or rank[calm] > rank[self.calm_top] else self.calm_top
            self.calm_run += 1
            if self.calm_run >= self.clear_after:
                self.level = top
                self.calm_run = 0
            else:
                self.calm_top = top
        else:
            self.calm_run = 0
        return self.level

    def reset(self) -> None:
        """Back to normal at once (rule 4)."""
        self.level = "normal"
        self.calm_run = 0

    def snapshot(self) -> dict[str, Any]:
        return {"level": self.level, "calm_run": self.calm_run, "calm_top": self.calm_top}

    def restore(self, data: dict[str, Any]) -> None:
        self.level = data["level"]
        self.calm_run = int(data["calm_run"])
        self.calm_top = data.get("calm_top", "normal")


class LevelGate(LevelRule):
    """The rule for one figure that grows with trouble (a share, an index) against two limits.

    ``raised`` is the figure against the limits; ``calm`` against the limits x (1 - hysteresis).

    >>> g = LevelGate(warning=0.1, critical=0.25, hysteresis=0.2, clear_after=2)
    >>> [g.update_figure(x) for x in (0.05, 0.3, 0.22, 0.15, 0.15, 0.07, 0.07)]
    ['normal', 'critical', 'critical', 'critical', 'warning', 'warning', 'normal']
    """

    __slots__ = ("warning", "critical", "hysteresis")

    def __init__(self, warning: float, critical: float, hysteresis: float, clear_after: int) -> None:
        super().__init__(clear_after)
        self.warning = warning
        self.critical = critical
        self.hysteresis = hysteresis

    def update_figure(self, x: float) -> Level:
        """Take one evaluation's figure and return the level after it."""
        return self.update(
            level_above(x, self.warning, self.critical),
            level_above(x, self.warning, self.critical, 1.0 - self.hysteresis),
        )
