"""``feed_stop``: has a model's prediction feed or truth feed stopped?

Driven by core time: ``evaluate(t)`` runs after every record and on every timer tick, so a feed
that stops is noticed on the next tick. Each feed's quiet time is counted from its latest record;
before a feed's first record, from the first moment the check saw anything of this model (a
record of either feed, or an evaluation, i.e. usually the agent's start). So a feed that never
starts is reported once its timeout has passed since the watchdog began watching.

A level is warning when a feed has been silent for longer than its timeout, critical when
longer than ``critical_factor`` x the timeout. It falls back as soon as the feed delivers again
(a record is proof the feed is alive; no hysteresis is needed: the one level rule of
``core/levels.py`` with ``clear_after`` 1 and the same level as evidence both ways). A verdict is returned only when
the level changes. The check keeps the next time at which a limit can be passed, so most calls
of ``evaluate`` cost one comparison.
"""

from __future__ import annotations

import math
from typing import Any

from pydantic import Field, model_validator

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Level, Verdict
from watchdog_edge.core.levels import LevelRule
from watchdog_edge.core.records import Prediction, Truth


class FeedStopSettings(CheckSettings):
    """Settings of ``feed_stop``; a timeout of ``None`` switches that feed's watch off.

    >>> FeedStopSettings(truth_timeout_s=None).prediction_timeout_s
    600.0
    """

    prediction_timeout_s: float | None = Field(
        600.0,
        gt=0,
        description="Warning when no prediction arrived for longer than this many seconds (null: do not watch predictions).",
    )
    truth_timeout_s: float | None = Field(
        3600.0,
        gt=0,
        description="Warning when no truth arrived for longer than this many seconds (null: do not watch truths).",
    )
    critical_factor: float | None = Field(
        6.0,
        ge=1,
        description="Critical when a feed is silent for longer than its timeout x this (null: never critical).",
    )

    @model_validator(mode="after")
    def _something(self) -> FeedStopSettings:
        if self.enabled and self.prediction_timeout_s is None and self.truth_timeout_s is None:
            raise ValueError("both prediction_timeout_s and truth_timeout_s are null; set one, or set enabled = false")
        return self


def _duration(s: float) -> str:
    if s < 120:
        return f"{s:.0f} s"
    if s < 7200:
        return f"{s / 60:.0f} min"
    if s < 172800:
        return f"{s / 3600:.1f} h"
    return f"{s / 86400:.1f} days"


class FeedStopCheck(Check[FeedStopSettings]):
    """Seconds since the latest prediction and truth against their timeouts.

    >>> from watchdog_edge.core.cards import ModelCard
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...                  holdout={"loss": 1.0, "count": 50})
    >>> check = FeedStopCheck(FeedStopSettings(prediction_timeout_s=60, truth_timeout_s=600),
    ...                      CheckContext("m", card, "squared", 1.0, "holdout"))
    >>> check.on_truth(Truth("m", "1", 2.0, t=0.0))  # True: evaluate may have something new
    True
    >>> check.on_prediction(Prediction("m", "1", 2.0, t=0.0))
    True
    >>> check.evaluate(30.0) is None
    True
    >>> v = check.evaluate(90.0)
    >>> v.level, v.figures["seconds_since_prediction"]
    ('warning', 90.0)
    """

    # what the verbs read, in the object itself (see RangeCheck)
    __slots__ = (
        "_start", "_last_prediction", "_last_truth", "_quiet_predictions", "_quiet_truths", "_fresh", "_now", "_next",
    )  # fmt: skip

    name = "feed_stop"
    settings_model = FeedStopSettings
    # A pair comes with the truth or prediction just evaluated at the same time: nothing new.
    takes = frozenset({"prediction", "truth"})
    reacts_to = frozenset({"prediction", "truth", "tick"})

    def __init__(self, settings: FeedStopSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        self._start: float | None = None
        self._last_prediction: float | None = None
        self._last_truth: float | None = None
        self._rule = LevelRule(clear_after=1)
        self._now: float | None = None
        self._next = -math.inf  # no level change is possible up to this core time ...
        self._fresh = True  # ... unless a record arrived on a feed that was past its limit
        self._quiet_predictions = self._quiet_truths = False  # past their limits at the last look

    def reset(self) -> None:
        # A new model version keeps the feeds' times (they are not a window), but the alert
        # states were closed, so the current level must be reported afresh.
        self._rule.reset()
        self._fresh = True

    def on_prediction(self, prediction: Prediction) -> bool:
        t = prediction.t
        if self._start is None:
            self._start = t
        if self._last_prediction is None or t > self._last_prediction:
            self._last_prediction = t
        if self._quiet_predictions:
            self._fresh = True
        # _due(t) written out: this runs for every prediction
        if self._now is None or t > self._now:
            self._now = t
        return self._fresh or self._now > self._next

    def on_truth(self, truth: Truth) -> bool:
        t = truth.t
        if self._start is None:
            self._start = t
        if self._last_truth is None or t > self._last_truth:
            self._last_truth = t
        if self._quiet_truths:
            self._fresh = True
        if self._now is None or t > self._now:  # _due(t), written out as above
            self._now = t
        return self._fresh or self._now > self._next

    def _due(self, t: float) -> bool:
        """Move the clock to ``t`` as evaluate would; False when evaluate at ``t`` has nothing new."""
        if self._now is None or t > self._now:
            self._now = t
        return self._fresh or self._now > self._next

    def _since(self, last: float | None, t: float) -> float:
        """Seconds from a feed's latest record (before the first, from the start) to ``t``."""
        ref = last if last is not None else self._start if self._start is not None else t
        return max(0.0, t - ref)

    def _level(self, t: float) -> Level:
        """The level at ``t``; also sets the next time a limit can be passed and the quiet feeds."""
        s = self.settings
        level: Level = "normal"
        nxt = math.inf
        quiet_feeds = []
        for last, limit in ((self._last_prediction, s.prediction_timeout_s), (self._last_truth, s.truth_timeout_s)):
            if limit is None:
                quiet_feeds.append(False)
                continue
            ref = last if last is not None else self._start if self._start is not None else t  # start: set by evaluate
            quiet = max(0.0, t - ref)
            quiet_feeds.append(quiet > limit)
            crit = None if s.critical_factor is None else limit * s.critical_factor
            if crit is not None and quiet > crit:
                level = "critical"
            elif quiet > limit:
                if level == "normal":
                    level = "warning"
                if crit is not None:
                    nxt = min(nxt, ref + crit)
            else:
                nxt = min(nxt, ref + limit)
        self._next = nxt
        # Only a record on a feed past its limit can bring the level down before ``nxt``.
        self._quiet_predictions, self._quiet_truths = quiet_feeds
        return level

    def evaluate(self, t: float) -> Verdict | None:
        now = self._now
        if now is None or t > now:
            self._now = now = t
        if not self._fresh and now <= self._next:
            return None
        if self._start is None:
            self._start = now
        self._fresh = False
        before = self._rule.level
        seen = self._level(now)
        level = self._rule.update(seen, seen)
        if level == before:
            return None
        return Verdict(level, self._summary(level), self.figures())

    def _summary(self, level: Level) -> str:
        s = self.settings
        t = self._now
        assert t is not None
        parts = []
        for what, last, limit in (
            ("prediction", self._last_prediction, s.prediction_timeout_s),
            ("truth", self._last_truth, s.truth_timeout_s),
        ):
            if limit is None:
                continue
            quiet = self._since(last, t)
            if quiet > limit:
                how = "since the watchdog began watching" if last is None else "since the latest one"
                parts.append(f"no {what} has arrived for {_duration(quiet)} {how} (limit {_duration(limit)})")
        if level == "normal" or not parts:
            return f"Predictions and truths for model {self.context.model} are arriving again within their time limits."
        return f"Model {self.context.model}: {'; '.join(parts)}; check the feed and its publisher."

    def figures(self) -> dict[str, Any]:
        s = self.settings
        t = self._now
        out: dict[str, Any] = {
            "level": self._rule.level,
            "prediction_timeout_s": s.prediction_timeout_s,
            "truth_timeout_s": s.truth_timeout_s,
            "seconds_since_prediction": None,
            "seconds_since_truth": None,
            "prediction_seen": self._last_prediction is not None,
            "truth_seen": self._last_truth is not None,
        }
        if t is not None and self._start is not None:
            out["seconds_since_prediction"] = self._since(self._last_prediction, t)
            out["seconds_since_truth"] = self._since(self._last_truth, t)
        return out

    def snapshot(self) -> dict[str, Any]:
        return {
            "start": self._start,
            "last_prediction": self._last_prediction,
            "last_truth": self._last_truth,
            "reported": self._rule.level,
            "now": self._now,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self._next = -math.inf
        self._fresh = True
        self._start = data["start"]
        self._last_prediction = data["last_prediction"]
        self._last_truth = data["last_truth"]
        self._rule.restore({"level": data["reported"], "calm_run": 0})
        self._now = data["now"]
