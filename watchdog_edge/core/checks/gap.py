"""``gap``: live loss against the loss the model card leads us to expect."""

from __future__ import annotations

import math
from typing import Any, Literal

from pydantic import Field, model_validator

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Verdict, fmt
from watchdog_edge.core.levels import LevelRule, level_above
from watchdog_edge.core.losses import LossWindow
from watchdog_edge.core.records import Pair
from watchdog_edge.core.stats import mean_interval

FROM_DEPLOYMENT = "present from deployment"
AFTER_HEALTHY = "appeared after a healthy period"


class GapSettings(CheckSettings):
    """Settings of ``gap``.

    >>> GapSettings(warning_tolerance=0.5).critical_tolerance
    1.0
    """

    confidence: float = Field(
        0.95, gt=0.5, lt=1, description="One-sided confidence of the bounds on the live mean loss."
    )
    warning_tolerance: float = Field(
        0.25, gt=0, description="Warning when the lower bound exceeds expected x (1 + this)."
    )
    critical_tolerance: float = Field(
        1.0, gt=0, description="Critical when the lower bound exceeds expected x (1 + this)."
    )
    tolerance_kind: Literal["relative", "absolute"] = Field(
        "relative", description="relative: limits are expected x (1 + tol); absolute: expected + tol, in loss units."
    )
    hysteresis: float = Field(
        0.1, ge=0, lt=1, description="Clear only when the upper bound is below the warning limit x (1 - this)."
    )
    clear_after_evaluations: int = Field(3, ge=1, description="Evaluations in a row that must meet the clearing rule.")
    evaluate_every_pairs: int = Field(10, ge=1, description="Pairs between evaluations of the interval.")

    @model_validator(mode="after")
    def _order(self) -> GapSettings:
        if self.critical_tolerance < self.warning_tolerance:
            raise ValueError(
                f"critical_tolerance ({self.critical_tolerance}) must be >= warning_tolerance ({self.warning_tolerance})"
            )
        return self


class GapCheck(Check[GapSettings]):
    """Raises when the live mean loss is, with confidence, above the expected loss.

    >>> from watchdog_edge.core.cards import ModelCard
    >>> from watchdog_edge.core.records import Pair, Prediction, Truth
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...                  holdout={"loss": 1.0, "count": 50})
    >>> ctx = CheckContext("m", card, "squared", 1.0, "holdout", window_size=50, min_pairs=50)
    >>> gap = GapCheck(GapSettings(evaluate_every_pairs=1), ctx)
    >>> for i in range(50):
    ...     err = 3.0 if i % 2 else -3.0            # squared error 9, nine times the expected 1
    ...     due = gap.on_pair(Pair(Prediction("m", str(i), 0.0, i), Truth("m", str(i), err, i), i), err * err)
    >>> v = gap.evaluate(50.0)
    >>> v.level, v.figures["diagnosis"]
    ('critical', 'present from deployment')
    """

    name = "gap"
    settings_model = GapSettings
    takes = frozenset({"pair"})
    reacts_to = frozenset({"pair", "tick"})  # ticks only matter for the age bound
    pair_features = False  # it takes the loss only

    def __init__(self, settings: GapSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        self.window = LossWindow(context.window_size, context.window_max_age_s)
        exp = context.expected_loss
        if settings.tolerance_kind == "relative":
            self.warning_limit = exp * (1 + settings.warning_tolerance)
            self.critical_limit = exp * (1 + settings.critical_tolerance)
        else:
            self.warning_limit = exp + settings.warning_tolerance
            self.critical_limit = exp + settings.critical_tolerance
        self.clear_limit = self.warning_limit * (1 - settings.hysteresis)
        self.min_pairs = min(context.min_pairs, context.window_size)
        self._rule = LevelRule(settings.clear_after_evaluations)
        self.reset()

    def reset(self) -> None:
        self.window.clear()
        self._rule.reset()
        self._since_eval = 0
        self._evaluated = False
        self._clean_pairs = 0  # pairs seen since evaluations began, with no open gap
        self._healthy_seen = False  # one full window without a gap has passed
        self._diagnosis: str | None = None
        self._figures: dict[str, Any] = {}
        self._stale = False  # the window moved since the figures were computed

    def on_pair(self, pair: Pair, loss: float) -> bool:
        self.window.push(pair.t, loss)
        self._since_eval += 1
        if self._evaluated and self._rule.level == "normal":
            self._clean_pairs += 1
            if self._clean_pairs >= self.context.window_size:
                self._healthy_seen = True
        # Between evaluations nothing is due, unless an age bound may drop pairs.
        return self._since_eval >= self.settings.evaluate_every_pairs or self.context.window_max_age_s is not None

    def evaluate(self, t: float) -> Verdict | None:
        if self.context.window_max_age_s is not None:
            before = len(self.window)
            self.window.expire(t)
            if len(self.window) != before:
                self._since_eval = max(self._since_eval, self.settings.evaluate_every_pairs)
        if self._since_eval < self.settings.evaluate_every_pairs or len(self.window) < self.min_pairs:
            return None
        self._since_eval = 0
        self._evaluated = True
        if self._rule.level == "normal" and self.window.mean() <= self.warning_limit:
            # The lower bound never exceeds the mean, so nothing can be raised: skip the
            # interval, the costliest step, while the model is healthy.
            self._stale = True
            return None
        iv = self._interval()
        # Evidence for the one level rule (core/levels.py): the lower bound raises; the upper
        # bound, against the limits eased by the hysteresis, says how far it may come down.
        hy = 1 - self.settings.hysteresis
        was = self._rule.level
        level = self._rule.update(
            level_above(iv.lower, self.warning_limit, self.critical_limit),
            level_above(iv.upper, self.warning_limit, self.critical_limit, hy),
        )
        if was == "normal" and level != "normal":
            self._diagnosis = AFTER_HEALTHY if self._healthy_seen else FROM_DEPLOYMENT
            self._clean_pairs = 0
        elif level == "normal" and was != "normal":
            self._clean_pairs = 0

        self._store_figures(iv)
        if level != "normal":
            self._figures["diagnosis"] = self._diagnosis
        return Verdict(level, self._summary(iv), dict(self._figures))

    def _interval(self) -> Any:
        self._stale = False
        return mean_interval(self.window.array(), self.settings.confidence)

    def _store_figures(self, iv: Any) -> None:
        s = self.settings
        self._figures = {
            "live_loss": iv.mean,
            "lower": iv.lower,
            "upper": iv.upper,
            "confidence": s.confidence,
            "expected_loss": self.context.expected_loss,
            "expected_source": self.context.expected_source,
            "warning_limit": self.warning_limit,
            "critical_limit": self.critical_limit,
            "pairs": iv.n,
            "bandwidth": iv.bandwidth,
            "loss": self.context.loss_kind,
        }

    def _summary(self, iv: Any) -> str:
        kind = "squared" if self.context.loss_kind == "squared" else "absolute"
        pct = int(round(self.settings.confidence * 100))
        src = "held-out loss" if self.context.expected_source == "holdout" else "final prediction error"
        if self._level == "normal":
            return (
                f"Live mean {kind} error {fmt(iv.mean)} over {iv.n} pairs is back within the "
                f"warning limit {fmt(self.warning_limit)} (upper {pct}% bound {fmt(iv.upper)})."
            )
        why = (
            "the model may be overfit, or its training data unlike the field"
            if self._diagnosis == FROM_DEPLOYMENT
            else "the model or its inputs have degraded"
        )
        limit = self.critical_limit if self._level == "critical" else self.warning_limit
        return (
            f"Live mean {kind} error {fmt(iv.mean)} over {iv.n} pairs (lower {pct}% bound "
            f"{fmt(iv.lower)}) is above the {self._level} limit {fmt(limit)} set from the expected "
            f"{fmt(self.context.expected_loss)} ({src}); {self._diagnosis}: {why}."
        )

    @property
    def _level(self) -> str:
        return self._rule.level

    def live_mean(self) -> float:
        return self.window.mean() if len(self.window) else math.nan

    def figures(self) -> dict[str, Any]:
        if self._stale and len(self.window) >= 2:  # evaluations skipped the interval: bring it up to date
            self._store_figures(self._interval())
        out = dict(self._figures)
        out["level"] = self._level
        out["window_pairs"] = len(self.window)
        return out

    def snapshot(self) -> dict[str, Any]:
        return {
            "window": self.window.snapshot(),
            "level": self._level,
            "since_eval": self._since_eval,
            "clear_run": self._rule.calm_run,
            "calm_top": self._rule.calm_top,
            "evaluated": self._evaluated,
            "clean_pairs": self._clean_pairs,
            "healthy_seen": self._healthy_seen,
            "diagnosis": self._diagnosis,
            "figures": self._figures,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self.window.restore(data["window"])
        self._rule.restore(
            {"level": data["level"], "calm_run": data["clear_run"], "calm_top": data.get("calm_top", "normal")}
        )
        self._since_eval = data["since_eval"]
        self._evaluated = data["evaluated"]
        self._clean_pairs = data["clean_pairs"]
        self._healthy_seen = data["healthy_seen"]
        self._diagnosis = data["diagnosis"]
        self._figures = data["figures"]
