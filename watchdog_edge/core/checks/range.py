"""``range``: predictions made on inputs outside the training range (extrapolation).

Each prediction's features are compared with the card's per-feature ``min`` and ``max``, widened
on each side by ``margin`` x (max - min). Over the last ``recent_predictions`` predictions that carry
features, the share of those with at least one input outside is the figure that raises and
clears; the check keeps only the outside ones (with their place in the stream), so a
prediction inside the range costs a comparison per feature and nothing more. Needs no
truth. The figures give, per feature outside in the window, how many predictions were
outside and the largest distance below ``low`` and above ``high`` (the range's edges), in
the feature's own units.

Some inputs fall outside even when nothing has changed, the more so the fewer training rows
the card has. By order statistics, a new value drawn like n training values falls outside
their min-max with probability 2/(n + 1) (any continuous distribution; ties only lower it).
For one card that probability is itself random: it is the sum of the two outer spacings,
Beta(2, n - 1)-distributed. With d features, a prediction is outside when any feature is, so
the card's outside rate is at most the sum of the d features' rates (the union bound; we use
it rather than the rate under independence, 1 - (1 - 2/(n + 1))^d, because it holds whatever
the features' dependence). The check therefore:

1. bounds the card's rate from above: the sum of d Beta(2, n - 1) is bounded by a gamma
   variable of shape 2d and scale 1/(n + 1) (each Beta(2, n - 1) is gamma(2)/(n + 1) with the
   gamma's mean-one denominator averaged away, which only thickens the tail), whose upper
   ``CARD_TAIL`` quantile is ``q_hi``; n is the card's row count less its missing values for
   the feature with the most missing;
2. raises a warning only when the outside count in the window is significant against a
   binomial(window, ``q_hi``) at level ``significance`` (one-sided), and above
   ``warning_share``; critical above ``critical_share`` and that same count limit.

``expected_share`` in the figures is the union bound's mean, sum over features of
2/(n_j + 1); ``warning_limit`` is the share the window must pass to raise. Where the warning
limit is above a fifth, a fifth of the inputs leaving the range cannot be told from chance at
this card's row count, and ``card build`` says so.

A prediction with an input far beyond the training min or max raises critical at once,
whatever the share. Far means more than k training ranges (max - min) past the nearer edge,
where k is the larger of ``far_outside_ranges`` (3) and what the card's row count asks for
an exponential tail, the heaviest of the common ones: for n exponential training values a
new one passes max + k ranges with probability n/(n + 1) / C(n + k, k + 1) (the minimum and
the range are independent, by the memoryless property, and the range is the largest of n - 1
exponentials), and k is the smallest with that below ``FAR_PROBABILITY`` (1e-9):
14 ranges for 20 rows, 10 for 30, 5 for 100, 3 from 1,000. A Gaussian input never gets that far; a
sensor dropout, a fill value (-999) or a unit change lands tens of ranges away. A feature
constant in training has no range to measure by and is left out of this rule.

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
from watchdog_edge.core.tails import binomial_limit, erlang_isf


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


# The share of fair cards whose own outside rate may exceed the rate the test assumes.
CARD_TAIL = 1e-3
# The chance that a fair input from an exponential tail counts as far outside.
FAR_PROBABILITY = 1e-9


def far_ranges(rows: int, floor: float, probability: float = FAR_PROBABILITY) -> float:
    """Training ranges beyond the edge past which an input is far outside, for a card of
    ``rows`` rows: at least ``floor`` (see the module docstring).

    >>> [far_ranges(n, 3.0) for n in (20, 30, 100, 1000, 100_000)]
    [14.0, 10.0, 5.0, 3.0, 3.0]
    """
    n = max(rows, 2)
    target = -math.log(probability) + math.log(n / (n + 1))
    a = 1
    # log C(n - 1 + a, a) must reach ``target``
    while math.lgamma(n + a) - math.lgamma(a + 1) - math.lgamma(n) < target:
        a += 1
    return max(floor, float(a - 1))


def outside_rate_bound(rows: int, features: int, tail: float = CARD_TAIL) -> float:
    """Upper ``tail`` quantile of a fair card's outside rate, for ``features`` features each
    with ``rows`` training values (see the module docstring).

    >>> round(outside_rate_bound(300, 1), 4)   # mean 2/301 = 0.0066
    0.0307
    """
    if features < 1:
        return 0.0
    return min(1.0, erlang_isf(tail, 2 * features) / (max(rows, 1) + 1))


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
    significance: float = Field(
        1e-6,
        gt=0,
        lt=0.01,
        description="Raise only when the outside count is this unlikely (one-sided) from the card's own "
        "outside rate; small, because the test is repeated at every evaluation.",
    )
    far_outside_ranges: float = Field(
        3.0,
        gt=0,
        description="An input more than this many training ranges (max - min) beyond the training min or "
        "max raises critical at once; cards with few rows raise it further (see the check's docs).",
    )

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
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 10000}, fitted_parameters=2,
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

    # what on_prediction reads, in the object itself (the rest stays in the instance dict):
    # one memory read fewer each when many models take turns
    __slots__ = ("_bounds", "_details", "_seq", "_far_new", "_last_eval", "_every", "_min", "_far")

    name = "range"
    takes = frozenset({"prediction"})
    reacts_to = frozenset({"prediction"})  # its counts move only with predictions
    settings_model = RangeSettings

    def __init__(self, settings: RangeSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        bounds = []
        card = context.card
        rows = card.training.count
        for fname, prof in card.features.items():
            pad = settings.margin * (prof.max - prof.min)
            bounds.append((fname, prof.min - pad, prof.max + pad))
            if prof.histogram is not None:
                rows = min(rows, round(card.training.count * (1.0 - prof.histogram.missing)))
        self._bounds: tuple[tuple[str, float, float], ...] = tuple(bounds)
        self.training_rows = max(rows, 1)
        self.far_ranges = far_ranges(self.training_rows, settings.far_outside_ranges)
        # distance past the widened edge beyond which an input is far outside
        self._far = {
            fname: self.far_ranges * (prof.max - prof.min) - settings.margin * (prof.max - prof.min)
            for fname, prof in card.features.items()
            if prof.max > prof.min
        }
        d = len(bounds)
        self.expected_share = min(1.0, 2.0 * d / (self.training_rows + 1))
        self.rate_bound = outside_rate_bound(self.training_rows, d)
        self._gate = LevelGate(
            settings.warning_share, settings.critical_share, settings.hysteresis, settings.clear_after_evaluations
        )
        self._every = settings.evaluate_every_predictions  # read for every prediction
        self._min = settings.min_predictions
        self.reset()

    def limits(self, predictions: int) -> tuple[float, float]:
        """Warning and critical limits on the outside share over ``predictions`` predictions:
        the share must exceed them to raise."""
        s = self.settings
        c = binomial_limit(predictions, self.rate_bound, s.significance)
        chance = (c - 1) / predictions  # a share above it means a count of c or more
        warning = max(s.warning_share, chance)
        return warning, max(s.critical_share, warning)

    def reset(self) -> None:
        self._seq = 0  # predictions with features taken so far
        # (seq, {feature: signed distance}) of the outside predictions that may still be in
        # the window: the share is their count over the window, so inside ones cost nothing
        self._details: deque[tuple[int, dict[str, float]]] = deque()
        self._last_eval = 0  # ``_seq`` at the latest evaluation
        self._far_new = False  # a far-outside prediction came since the latest evaluation
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
            if self._is_far(far):
                self._far_new = True
        self._seq += 1
        # evaluate's own test of "not due": before min_predictions it says nothing either
        return self._far_new or (self._seq - self._last_eval >= self._every and self._seq >= self._min)

    def _is_far(self, far: dict[str, float]) -> bool:
        lim = self._far
        return any(fname in lim and abs(d) > lim[fname] for fname, d in far.items())

    @property
    def _filled(self) -> int:
        return min(self._seq, self.settings.recent_predictions)

    def evaluate(self, t: float) -> Verdict | None:
        s = self.settings
        due = self._seq - self._last_eval >= s.evaluate_every_predictions and self._seq >= s.min_predictions
        if not (due or self._far_new):
            return None
        self._far_new = False
        self._last_eval = self._seq
        oldest = self._seq - self._filled
        details = self._details
        while details and details[0][0] < oldest:
            details.popleft()
        outside = len(details)
        filled = self._filled
        share = outside / filled
        far_count = sum(1 for _, far in details if self._is_far(far))
        warning, critical = self.limits(filled)
        self._gate.warning, self._gate.critical = warning, critical
        # a far-outside input counts as a full window outside: critical now, cleared by the
        # usual rule once it has left the window
        level = self._gate.update_figure(1.0 if far_count else share)
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
            "predictions": filled,
            "expected_share": self.expected_share,
            "warning_limit": warning,
            "critical_limit": critical,
            "far_outside": far_count,
            "far_outside_ranges": self.far_ranges,
            "training_rows": self.training_rows,
            "warning_share": s.warning_share,
            "critical_share": s.critical_share,
            "margin": s.margin,
            "features": per,
        }
        return Verdict(level, self._summary(level, share, per, far_count), dict(self._figures))

    def _summary(self, level: str, share: float, per: dict[str, dict[str, Any]], far_count: int) -> str:
        s = self.settings
        head = (
            f"{share:.1%} of the last {self._filled} predictions had inputs outside the training range "
            f"(at most {self.expected_share:.1%} expected from {self.training_rows} training rows)"
        )
        warning, critical = self._gate.warning, self._gate.critical
        if level == "normal":
            return f"{head}, within the limit of {warning:.1%}."
        if far_count:
            head += (
                f"; {far_count} of them more than {self.far_ranges:g} training ranges beyond the training min or max"
            )
        limit = critical if level == "critical" else warning
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
            "far_new": self._far_new,
            "gate": self._gate.snapshot(),
            "figures": self._figures,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self._seq = int(data["seq"])
        self._details = deque((int(seq), {k: float(v) for k, v in far.items()}) for seq, far in data["details"])
        self._last_eval = self._seq - int(data["since_eval"])
        self._far_new = bool(data.get("far_new", False))
        self._gate.restore(data["gate"])
        self._figures = data["figures"]
