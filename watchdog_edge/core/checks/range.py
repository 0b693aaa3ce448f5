"""``range``: predictions made on inputs outside the training range (extrapolation).

Each prediction's features are compared with the card's per-feature ``min`` and ``max``, widened
on each side by ``margin`` x (max - min). Over the last ``recent_predictions`` predictions that carry
features, the share of those with at least one input outside is the figure that raises and
clears; the check keeps only the outside ones (with their place in the stream), so a
prediction inside the training range costs a comparison per feature and nothing more. Needs no
truth. The figures give, per feature outside in the window, how many predictions were
outside and the largest distance below ``low`` and above ``high`` (the training range's edges), in
the feature's own units.

A feature that is null or absent in a prediction is not outside (``shift`` counts missing
values); a feature the card does not describe is ignored; a prediction with no features at
all is not counted.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any

from pydantic import Field, model_validator

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Verdict, fmt
from watchdog_edge.core.levels import LevelGate
from watchdog_edge.core.records import Prediction


def distance(x: float) -> str:
    """A distance in a summary: three significant digits, never in exponent form.

    >>> distance(12.3456), distance(0.012345), distance(1234.5)
    ('12.3', '0.0123', '1230')
    """
    if x == 0 or not math.isfinite(x):
        return f"{x:g}"
    digits = 2 - math.floor(math.log10(abs(x)))
    r = round(x, digits)
    return f"{r:.{max(digits, 0)}f}"


class RangeSettings(CheckSettings):
    """Settings of ``range``.

    >>> s = RangeSettings(recent_predictions=500, warning_share=0.02)
    >>> s.critical_share, s.margin
    (0.2, 0.0)
    """

    recent_predictions: int = Field(
        200, ge=10, le=1_000_000, description="Number of latest predictions (with features) the share is taken over."
    )
    margin: float = Field(
        0.0, ge=0, le=10, description="Widen each feature's [min, max] by this share of (max - min) on each side."
    )
    warning_share: float = Field(
        0.05, gt=0, lt=1, description="Warning when more than this share of the window is outside the training range."
    )
    critical_share: float = Field(
        0.2, gt=0, le=1, description="Critical when more than this share of the window is outside the training range."
    )
    min_predictions: int = Field(100, ge=1, description="Predictions needed in the window before the first evaluation.")
    evaluate_every_predictions: int = Field(20, ge=1, description="Predictions between evaluations.")
    hysteresis: float = Field(
        0.2, ge=0, lt=1, description="Clear only when the share is at or below the limit x (1 - this)."
    )
    clear_after_evaluations: int = Field(3, ge=1, description="Evaluations in a row that must meet the clearing rule.")

    @model_validator(mode="after")
    def _order(self) -> RangeSettings:
        if self.critical_share < self.warning_share:
            raise ValueError(f"critical_share ({self.critical_share}) must be >= warning_share ({self.warning_share})")
        if self.min_predictions > self.recent_predictions:
            raise ValueError(
                f"min_predictions ({self.min_predictions}) must be <= recent_predictions ({self.recent_predictions})"
            )
        return self


class RangeCheck(Check[RangeSettings]):
    """Share of recent predictions whose inputs lie outside the card's training range.

    >>> from watchdog_edge.core.cards import ModelCard
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...                  holdout={"loss": 1.0, "count": 50},
    ...                  features={"temp": {"min": 0.0, "max": 50.0}})
    >>> ctx = CheckContext("m", card, "squared", 1.0, "holdout")
    >>> check = RangeCheck(RangeSettings(recent_predictions=20, min_predictions=20, evaluate_every_predictions=20), ctx)
    >>> for i in range(20):
    ...     due = check.on_prediction(Prediction("m", str(i), 1.0, float(i), features={"temp": 58.0 if i < 5 else 20.0}))
    >>> v = check.evaluate(20.0)
    >>> v.level, v.figures["share"], v.figures["features"]["temp"]["max_distance_above"]
    ('critical', 0.25, 8.0)
    """

    name = "range"
    takes = frozenset({"prediction"})
    reacts_to = frozenset({"prediction"})  # its counts move only with predictions
    settings_model = RangeSettings

    def __init__(self, settings: RangeSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        bounds = []
        for fname, prof in context.card.features.items():
            pad = settings.margin * (prof.max - prof.min)
            bounds.append((fname, prof.min - pad, prof.max + pad))
        self._bounds: tuple[tuple[str, float, float], ...] = tuple(bounds)
        self._gate = LevelGate(
            settings.warning_share, settings.critical_share, settings.hysteresis, settings.clear_after_evaluations
        )
        self.reset()

    def reset(self) -> None:
        self._seq = 0  # predictions with features taken so far
        # (seq, {feature: signed distance}) of the outside predictions that may still be in
        # the window: the share is their count over the window, so inside ones cost nothing
        self._details: deque[tuple[int, dict[str, float]]] = deque()
        self._last_eval = 0  # ``_seq`` at the latest evaluation
        self._gate.reset()
        self._figures: dict[str, Any] = {}

    def on_prediction(self, prediction: Prediction) -> bool:
        feats = prediction.features
        if not feats or not self._bounds:
            return False  # not counted: evaluate has nothing new
        far: dict[str, float] | None = None
        for fname, lo, hi in self._bounds:
            x = feats.get(fname)
            if x is None or lo <= x <= hi:
                continue
            if far is None:
                far = {}
            far[fname] = x - lo if x < lo else x - hi  # signed distance past the nearer edge
        if far is not None:
            self._details.append((self._seq, far))
        self._seq += 1
        return self._seq - self._last_eval >= self.settings.evaluate_every_predictions

    @property
    def _filled(self) -> int:
        return min(self._seq, self.settings.recent_predictions)

    def evaluate(self, t: float) -> Verdict | None:
        s = self.settings
        if self._seq - self._last_eval < s.evaluate_every_predictions or self._seq < s.min_predictions:
            return None
        self._last_eval = self._seq
        oldest = self._seq - self._filled
        details = self._details
        while details and details[0][0] < oldest:
            details.popleft()
        outside = len(details)
        share = outside / self._filled
        level = self._gate.update_figure(share)
        per: dict[str, dict[str, Any]] = {}
        for _, far in details:
            for fname, d in far.items():
                f = per.get(fname)
                if f is None:
                    f = per[fname] = {"outside": 0, "max_distance_below": None, "max_distance_above": None}
                f["outside"] += 1
                if d < 0:
                    if f["max_distance_below"] is None or -d > f["max_distance_below"]:
                        f["max_distance_below"] = -d
                elif f["max_distance_above"] is None or d > f["max_distance_above"]:
                    f["max_distance_above"] = d
        limits = {fname: (lo, hi) for fname, lo, hi in self._bounds}
        for fname, f in per.items():
            f["low"], f["high"] = limits[fname]
        self._figures = {
            "share": share,
            "outside": outside,
            "predictions": self._filled,
            "warning_share": s.warning_share,
            "critical_share": s.critical_share,
            "margin": s.margin,
            "features": per,
        }
        return Verdict(level, self._summary(level, share, per), dict(self._figures))

    def _summary(self, level: str, share: float, per: dict[str, dict[str, Any]]) -> str:
        s = self.settings
        head = f"{share:.1%} of the last {self._filled} predictions had inputs outside the training range"
        if level == "normal":
            return f"{head}, within the limit of {s.warning_share:.1%}."
        limit = s.critical_share if level == "critical" else s.warning_share
        if s.margin:
            up, down = "the upper edge (training maximum plus margin)", "the lower edge (training minimum minus margin)"
        else:
            up, down = "the training maximum", "the training minimum"
        worst = sorted(per.items(), key=lambda kv: -kv[1]["outside"])[:3]
        parts = []
        for fname, f in worst:
            bits = []
            if f["max_distance_above"] is not None:
                bits.append(f"up to {distance(f['max_distance_above'])} above {up} {fmt(f['high'])}")
            if f["max_distance_below"] is not None:
                bits.append(f"up to {distance(f['max_distance_below'])} below {down} {fmt(f['low'])}")
            parts.append(f"{fname} {' and '.join(bits)}")
        more = "" if len(per) <= 3 else f" (and {len(per) - 3} more features)"
        return f"{head} (the {level} limit is {limit:.1%}), so the model is extrapolating: {'; '.join(parts)}{more}."

    def figures(self) -> dict[str, Any]:
        out = dict(self._figures)
        out["level"] = self._gate.level
        return out

    def snapshot(self) -> dict[str, Any]:
        oldest = self._seq - self._filled  # only what the window still holds
        return {
            "seq": self._seq,
            "details": [[seq, far] for seq, far in self._details if seq >= oldest],
            "since_eval": self._seq - self._last_eval,
            "gate": self._gate.snapshot(),
            "figures": self._figures,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self._seq = int(data["seq"])
        self._details = deque((int(seq), {k: float(v) for k, v in far.items()}) for seq, far in data["details"])
        self._last_eval = self._seq - int(data["since_eval"])
        self._gate.restore(data["gate"])
        self._figures = data["figures"]
