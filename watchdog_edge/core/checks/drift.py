"""``drift``: has the stream of losses changed? (ADWIN or Page-Hinkley from river.drift)

Each pair's loss is divided by the card's expected loss and clipped at ``clip``, so the
detector's settings do not depend on the target's units and one wild truth cannot dominate;
the detector is fed that ratio. When it reports a change, the change point is estimated on the
segment of ratios since the previous change (at most ``history_pairs`` pairs) as the split into two
means with the least residual sum of squares (the maximum-likelihood change point of a normal
mean shift, Hinkley 1970; from memory), keeping at least 5 pairs on each side. The check
reacts to rises only: it raises when the mean loss after the change point is at least
(1 + ``min_rise``) x the mean before it, and, when clearing by recovery, above the clearing
limit as well (a rise that ends within the limit would clear at once). Falls are counted only.

Clearing, per ``clear_on``:
- ``recovery``: the mean loss of the pairs since the change point (the last ``window.size_pairs`` of
  them, and at least ``min_pairs`` of them) is at or below expected x (1 + ``warning_tolerance``)
  x (1 - ``hysteresis``) for ``clear_after_evaluations`` evaluations in a row (the one
  level rule of ``core/levels.py``, on the live mean), evaluations every ``evaluate_every_pairs`` pairs;
- ``hold``: ``hold_s`` seconds of core time after the latest raising change.

river is imported only when a DriftCheck is built, never by importing this module. The
detector's state is kept in snapshots as a pickle, base64 encoded inside the JSON; a snapshot is
therefore only for the same river version and platform, like the promise of replay.
"""

from __future__ import annotations

import base64
import math
import pickle
from collections import deque
from typing import Any, Literal

import numpy as np
from pydantic import Field

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Level, Verdict, fmt
from watchdog_edge.core.events import rfc3339
from watchdog_edge.core.levels import LevelRule
from watchdog_edge.core.losses import LossWindow
from watchdog_edge.core.records import Pair


class DriftSettings(CheckSettings):
    """Settings of ``drift`` (opt-in; uses river).

    >>> s = DriftSettings(detector="page_hinkley", clear_on="hold", hold_s=1800)
    >>> s.clip, s.delta, s.warning_tolerance
    (10.0, 0.002, 0.25)
    """

    detector: Literal["adwin", "page_hinkley"] = Field(
        "adwin",
        description="Change detector from river.drift: adwin (ADWIN) or page_hinkley (Page-Hinkley, upward mode).",
    )
    delta: float = Field(
        0.002,
        gt=0,
        lt=1,
        description="ADWIN's confidence parameter: smaller means fewer false changes and later detection.",
    )
    ph_delta: float = Field(
        0.25, ge=0, description="Page-Hinkley's tolerated rise of the loss ratio before it accumulates evidence."
    )
    ph_threshold: float = Field(
        150.0, gt=0, description="Page-Hinkley's detection threshold on the accumulated rise of the loss ratio."
    )
    ph_min_instances: int = Field(
        30, ge=1, description="Pairs Page-Hinkley needs after a start or a change before it may detect."
    )
    clip: float = Field(
        10.0,
        gt=1,
        description="The loss divided by the expected loss is clipped at this before it reaches the detector.",
    )
    min_rise: float = Field(
        0.2,
        ge=0,
        description="Raise only when the mean loss after the change is at least (1 + this) x the mean before.",
    )
    severity: Literal["warning", "critical"] = Field("warning", description="Level of a raised drift alert.")
    clear_on: Literal["recovery", "hold"] = Field(
        "recovery",
        description="recovery: clear when the loss since the change is back within the limit; hold: clear hold_s seconds after the latest change.",
    )
    hold_s: float = Field(
        3600.0, gt=0, description="Seconds of core time a raised drift is held when clear_on = 'hold'."
    )
    warning_tolerance: float = Field(
        0.25, gt=0, description="The warning limit is expected loss x (1 + this), as for gap."
    )
    hysteresis: float = Field(
        0.1, ge=0, lt=1, description="Clear only when the mean loss is at or below the warning limit x (1 - this)."
    )
    clear_after_evaluations: int = Field(3, ge=1, description="Evaluations in a row that must meet the clearing rule.")
    evaluate_every_pairs: int = Field(10, ge=1, description="Pairs between evaluations of the clearing rule.")
    history_pairs: int = Field(
        2000,
        ge=100,
        le=1_000_000,
        description="Latest pairs kept to place the change point and the means before and after it.",
    )


def _detector(settings: DriftSettings) -> Any:
    from river import drift  # imported here so that the settings never import river

    if settings.detector == "adwin":
        return drift.ADWIN(delta=settings.delta)
    return drift.PageHinkley(
        min_instances=settings.ph_min_instances, delta=settings.ph_delta, threshold=settings.ph_threshold, mode="up"
    )


def change_point(x: np.ndarray, min_side: int = 5) -> int:
    """Index of the first value after the least-squares split of ``x`` into two means.

    Splitting after k values lowers the residual sum of squares by S_k^2 n / (k (n - k)), with
    S_k the sum of the first k deviations from the mean; both sides keep ``min_side`` values
    when ``x`` is long enough.

    >>> change_point(np.array([1.0, 1.2, 0.9, 1.1, 3.0, 3.2, 2.9]), min_side=1)
    4
    """
    n = len(x)
    if n < 2:
        return n
    side = max(1, min(min_side, n // 2))
    k = np.arange(side, n - side + 1)
    cs = np.cumsum(x - x.mean())[k - 1]
    gain = cs * cs / (k * (n - k))
    return int(k[int(np.argmax(gain))])


class DriftCheck(Check[DriftSettings]):
    """Change detection on the loss stream; raises on rises only.

    >>> from watchdog_edge.core.cards import ModelCard
    >>> from watchdog_edge.core.records import Prediction, Truth
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...                  holdout={"loss": 1.0, "count": 50})
    >>> check = DriftCheck(DriftSettings(), CheckContext("m", card, "squared", 1.0, "holdout"))
    >>> raised = []
    >>> for i in range(600):
    ...     err = (1.0 if i < 400 else 2.0) * (1 if i % 2 else -1)   # squared error 1, then 4
    ...     due = check.on_pair(Pair(Prediction("m", str(i), 0.0, i), Truth("m", str(i), err, i), float(i)), err * err)
    ...     v = check.evaluate(float(i))
    ...     if v is not None: raised.append((i, v))
    >>> [(i, v.level, v.figures["change_t"]) for i, v in raised]
    [(415, 'warning', 400.0)]
    """

    name = "drift"
    takes = frozenset({"pair"})
    reacts_to = frozenset({"pair", "tick"})  # ticks end a hold
    pair_features = False  # it takes the loss only
    settings_model = DriftSettings

    def __init__(self, settings: DriftSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        self.warning_limit = context.expected_loss * (1 + settings.warning_tolerance)
        self.clear_limit = self.warning_limit * (1 - settings.hysteresis)
        self.min_pairs = max(1, min(context.min_pairs, context.window_size))
        self.reset()

    def reset(self) -> None:
        s = self.settings
        self._detector = _detector(s)
        self._seq = 0
        self._segment_start = 0
        # (seq, t, ts, loss, ratio) of the latest pairs
        self._history: deque[tuple[int, float, float | None, float, float]] = deque(maxlen=s.history_pairs)
        self._since_change = LossWindow(self.context.window_size, self.context.window_max_age_s)
        self._rule = LevelRule(s.clear_after_evaluations)
        self._pending = False
        self._raised_t: float | None = None
        self._since_eval = 0
        self._detections = 0
        self._ignored = 0
        self._change: dict[str, Any] = {}
        self._figures: dict[str, Any] = {}

    def on_pair(self, pair: Pair, loss: float) -> bool:
        exp = self.context.expected_loss
        ratio = min(loss / exp, self.settings.clip) if exp > 0 else (self.settings.clip if loss > 0 else 0.0)
        seq = self._seq
        self._seq = seq + 1
        self._history.append((seq, pair.t, pair.ts, loss, ratio))
        if self._rule.level != "normal":  # only a raised drift needs the loss since its change
            self._since_change.push(pair.t, loss)
            self._since_eval += 1
        det = self._detector
        det.update(ratio)
        if det.drift_detected:
            self._on_change(pair.t)
        return self._pending or self._rule.level != "normal"  # else evaluate has nothing to say

    def _on_change(self, t: float) -> None:
        self._detections += 1
        seg = [h for h in self._history if h[0] >= self._segment_start]
        ratios = np.fromiter((h[4] for h in seg), dtype=float, count=len(seg))
        k = min(change_point(ratios), len(seg) - 1)
        losses = np.fromiter((h[3] for h in seg), dtype=float, count=len(seg))
        before = float(losses[:k].mean()) if k > 0 else math.nan
        after = float(losses[k:].mean())
        cp_seq, cp_t, cp_ts = seg[k][0], seg[k][1], seg[k][2]
        self._segment_start = cp_seq
        self._since_change.clear()
        for h in seg[k:]:
            self._since_change.push(h[1], h[3])
        rise = not math.isnan(before) and after >= before * (1 + self.settings.min_rise)
        if rise and self.settings.clear_on == "recovery" and after <= self.clear_limit:
            rise = False
        if not rise:
            self._ignored += 1
            return
        self._change = {
            "change_t": cp_t,
            "change_ts": cp_ts,
            "mean_before": before,
            "mean_after": after,
            "pairs_before": k,
            "pairs_after": len(seg) - k,
            "detected_t": t,
        }
        self._raised_t = t
        # a rise is evidence at the check's one severity (core/levels.py raises at once)
        self._rule.update(self.settings.severity, self.settings.severity)
        self._pending = True

    def evaluate(self, t: float) -> Verdict | None:
        s = self.settings
        if self._pending:
            self._pending = False
            self._update_figures()
            return Verdict(self._rule.level, self._raise_summary(), dict(self._figures))
        if self._rule.level == "normal":
            return None
        if s.clear_on == "hold":
            raised_t = self._raised_t if self._raised_t is not None else t  # set with every raise
            if t - raised_t < s.hold_s:
                return None
            self._rule.reset()  # the hold ran out: the evidence ends by itself
            self._update_figures()
            return Verdict("normal", self._hold_summary(), dict(self._figures))
        if self._since_eval < s.evaluate_every_pairs:
            return None
        self._since_eval = 0
        w = self._since_change
        w.expire(t)
        if len(w) < self.min_pairs:
            return None
        # no new rise here: only the way down, when the mean since the change is calm
        calm: Level = "normal" if w.mean() <= self.clear_limit else self._rule.level
        if self._rule.update("normal", calm) != "normal":
            return None
        self._update_figures()
        return Verdict("normal", self._recovery_summary(), dict(self._figures))

    def _update_figures(self) -> None:
        s = self.settings
        w = self._since_change
        self._figures = {
            "detector": "ADWIN" if s.detector == "adwin" else "Page-Hinkley",
            **self._change,
            "live_loss_since_change": w.mean() if len(w) else None,
            "pairs_since_change": len(w),
            "expected_loss": self.context.expected_loss,
            "clear_limit": self.clear_limit,
            "clear_on": s.clear_on,
            "detections": self._detections,
            "ignored_changes": self._ignored,
            "loss": self.context.loss_kind,
        }

    def _raise_summary(self) -> str:
        c = self._change
        kind = "squared" if self.context.loss_kind == "squared" else "absolute"
        det = "ADWIN" if self.settings.detector == "adwin" else "Page-Hinkley"
        ratio = c["mean_after"] / c["mean_before"] if c["mean_before"] > 0 else math.inf
        src = "" if c["change_ts"] is None else f", source time {rfc3339(c['change_ts'])}"
        return (
            f"The model's error changed for the worse at {rfc3339(c['change_t'])}{src}: mean {kind} "
            f"error {fmt(c['mean_before'])} before and {fmt(c['mean_after'])} after "
            f"({ratio:.2g} times), found by {det} {c['pairs_after']} pairs after the change."
        )

    def _recovery_summary(self) -> str:
        w = self._since_change
        kind = "squared" if self.context.loss_kind == "squared" else "absolute"
        return (
            f"The mean {kind} error since the change, {fmt(w.mean())} over {len(w)} pairs, is back "
            f"within the clearing limit {fmt(self.clear_limit)}."
        )

    def _hold_summary(self) -> str:
        return (
            f"The drift raised at {rfc3339(self._raised_t or 0.0)} has been held for "
            f"{self.settings.hold_s:g} s and is cleared; the gap check keeps watching the error level."
        )

    def figures(self) -> dict[str, Any]:
        out = dict(self._figures)
        out["level"] = self._rule.level
        out["detections"] = self._detections
        return out

    def snapshot(self) -> dict[str, Any]:
        return {
            "detector": base64.b64encode(pickle.dumps(self._detector)).decode("ascii"),
            "seq": self._seq,
            "segment_start": self._segment_start,
            "history": [list(h) for h in self._history],
            "since_change": self._since_change.snapshot(),
            "level": self._rule.level,
            "pending": self._pending,
            "raised_t": self._raised_t,
            "clear_run": self._rule.calm_run,
            "calm_top": self._rule.calm_top,
            "since_eval": self._since_eval,
            "detections": self._detections,
            "ignored": self._ignored,
            "change": self._change,
            "figures": self._figures,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self._detector = pickle.loads(base64.b64decode(data["detector"]))
        self._seq = int(data["seq"])
        self._segment_start = int(data["segment_start"])
        self._history = deque((tuple(h) for h in data["history"]), maxlen=self.settings.history_pairs)
        self._since_change.restore(data["since_change"])
        self._rule.restore(
            {"level": data["level"], "calm_run": data["clear_run"], "calm_top": data.get("calm_top", "normal")}
        )
        self._pending = data["pending"]
        self._raised_t = data["raised_t"]
        self._since_eval = int(data["since_eval"])
        self._detections = int(data["detections"])
        self._ignored = int(data["ignored"])
        self._change = data["change"]
        self._figures = data["figures"]
