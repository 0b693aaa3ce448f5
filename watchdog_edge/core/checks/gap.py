"""``gap``: live loss against the loss the model card leads us to expect.

Three tests, any of which raises:
- the interval: one-sided bounds on the live mean loss (`stats.loss_interval`: a gamma law
  matched to the mean and its prewhitened Newey-West standard error, with a Student
  correction for that standard error's own noise), the lower one widened for the card's own
  degrees of freedom (an F law); raised when it exceeds the limits. The lower bound is looked
  at every ``evaluate_every_pairs`` pairs on an overlapping window, so a 95 % bound per look
  would be crossed by chance far more often than 5 % of the time: ``confidence`` is held over
  any span of one window instead (`stats.window_span_level`: 0.95 gives 0.9926 per look);
- the CUSUM (squared loss; ``cusum``): a window mean must wait for the change to fill the
  window, so a CUSUM of the log-likelihood ratio of squared Gaussian errors at the critical
  limit against the warning limit raises a warning sooner, at the false-alarm rate the interval
  allows at the warning limit (see ``__init__``); a doubling is raised about 40 pairs sooner.
  Its threshold's widening for autocorrelation (kappa) is measured while the CUSUM is at rest,
  not on a window that holds the rise. It raises from normal only: in an open episode the
  interval alone decides;
- gross errors: at least ``gross_min_pairs`` of the latest ``gross_run_pairs`` losses above
  ``gross_multiple`` x the warning limit, while the live mean is above the warning limit
  widened for the card's degrees of freedom alone (the live variance says nothing then).
  A burst of gross errors inflates the long-run variance so much that no interval on the mean
  can exclude the limit, exactly when the model fails most; a run of losses that far above
  the limit needs no variance estimate. It is looked at on every pair (one comparison), so a
  burst is raised within ``gross_run_pairs`` pairs of its start. Under Gaussian errors with a
  mean loss at the warning limit a loss above 20 times it has probability 8e-6 (chi-square
  with 1 degree of freedom), so five in ten do not happen by chance, even on strongly
  autocorrelated errors (bench/gap_drift_quality.py measures it).
Clearing uses the live upper bound alone: the card's uncertainty is fixed for a deployment,
so counting it there could keep an episode open for good.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any, Literal

from pydantic import Field, model_validator

from watchdog_edge.core.cards import expected_loss_df
from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Verdict, fmt
from watchdog_edge.core.levels import RANK, LevelRule, level_above
from watchdog_edge.core.losses import LossWindow
from watchdog_edge.core.records import Pair
from watchdog_edge.core.stats import (
    LossInterval,
    chi2_ppf,
    f_ppf,
    loss_interval,
    prewhitened_long_run_variance,
    window_span_level,
)

FROM_DEPLOYMENT = "present from deployment"
AFTER_HEALTHY = "appeared after a healthy period"


def _kappa(long_run_variance: float, mean: float) -> float:
    """The losses' long-run variance over 2 mean^2 (chi-square's own), at least 1."""
    return max(1.0, long_run_variance / (2.0 * mean * mean)) if mean > 0 else 1.0


class GapSettings(CheckSettings):
    """Settings of ``gap``.

    >>> GapSettings(warning_tolerance=0.5).critical_tolerance
    1.0
    """

    confidence: float = Field(
        0.95,
        gt=0.5,
        lt=1,
        description="One-sided confidence of the upper bound at each evaluation, and of the lower bound over any span of one window.",
    )
    confidence_span: Literal["window", "evaluation"] = Field(
        "window",
        description="window: the lower bound holds its confidence over any span of one window of evaluations "
        "(a correction for looking every evaluate_every_pairs); evaluation: at each evaluation alone "
        "(raises sooner, and falsely more often).",
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
    card_uncertainty: bool = Field(
        True,
        description="Widen the lower bound for the card's own degrees of freedom (held-out count, or N - d).",
    )
    cusum: bool = Field(
        True,
        description="A CUSUM of squared errors, the critical against the warning limit, beside the interval (squared loss).",
    )
    gross_multiple: float = Field(20.0, gt=1, description="A loss above the warning limit x this is a gross error.")
    gross_run_pairs: int = Field(10, ge=1, description="Latest pairs looked at for gross errors.")
    gross_min_pairs: int = Field(
        5,
        ge=1,
        description="Gross errors among the latest gross_run_pairs that raise; above gross_run_pairs turns the test off.",
    )

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
        self.card_df = (
            expected_loss_df(context.card, context.expected_source) if settings.card_uncertainty else math.inf
        )
        self.gross_threshold = self.warning_limit * settings.gross_multiple
        self.raise_confidence = (
            window_span_level(settings.confidence) if settings.confidence_span == "window" else settings.confidence
        )
        # A card from N - d degrees of freedom may be low by chance: the gross-error test asks
        # the live mean to exceed the limit by the card's own one-sided factor, chi2 / df.
        self.card_factor = (
            1.0 if math.isinf(self.card_df) else self.card_df / chi2_ppf(1.0 - self.raise_confidence, self.card_df)
        )
        # The CUSUM: the log-likelihood ratio of a squared Gaussian error (a gamma scale family of
        # shape 1/2) at scale s1 = the critical limit against s0 = the warning limit, both times
        # the card's factor: a x loss - c per pair. Its threshold ln(ARL) sets the mean pairs to a
        # false alarm at the warning limit to ARL (Lorden 1971, from memory: at least e^h for
        # independent losses); ARL = size_pairs / (1 - confidence), the rate the interval allows
        # (1 - confidence per window span). Autocorrelation and a spread other than chi-square's
        # scale it by kappa, the window's long-run variance over 2 mean^2 (at least 1), as the
        # Brownian approximation of the CUSUM asks.
        s0 = self.warning_limit * self.card_factor
        s1 = self.critical_limit * self.card_factor
        self.cusum_on = settings.cusum and context.loss_kind == "squared" and s1 > s0 * (1 + 1e-9) and s0 > 0
        self._cusum_a = 0.5 * (1.0 / s0 - 1.0 / s1) if self.cusum_on else 0.0
        self._cusum_c = 0.5 * math.log(s1 / s0) if self.cusum_on else 0.0
        self.cusum_threshold = math.log(context.window_size / (1.0 - settings.confidence))
        self._rule = LevelRule(settings.clear_after_evaluations)
        self.reset()

    def reset(self) -> None:
        self.window.clear()
        self._rule.reset()
        self._since_eval = 0
        self._evaluated = False
        self._clean_pairs = 0  # pairs since evaluations began, or the live mean was last over the limit
        self._healthy_seen = False  # one full window of them has passed
        self._diagnosis: str | None = None
        self._figures: dict[str, Any] = {}
        self._stale = False  # the window moved since the figures were computed
        self._seq = 0  # pairs taken
        self._gross: deque[int] = deque(maxlen=self.settings.gross_min_pairs)  # seq of the latest gross errors
        self._raised_by = ""
        self._cusum = 0.0
        self._kappa = 1.0
        self._kappa_age = -1  # pairs since kappa was last measured at rest; -1: never

    def _gross_run(self) -> int:
        """Gross errors among the latest ``gross_run_pairs`` pairs (counted up to gross_min_pairs)."""
        first = self._seq - self.settings.gross_run_pairs
        return sum(1 for q in self._gross if q >= first)

    def on_pair(self, pair: Pair, loss: float) -> bool:
        self.window.push(pair.t, loss)
        self._since_eval += 1
        self._seq += 1
        burst = False
        if self.cusum_on:
            # A gross error counts as one at the gross-error threshold: a single glitch adds at
            # most about 3.5 at the defaults, against a threshold of kappa x 9.2, so it never
            # raises from rest alone; a run of them does, as does the gross-error test.
            x = loss if loss < self.gross_threshold else self.gross_threshold
            self._cusum = max(0.0, self._cusum + self._cusum_a * x - self._cusum_c)
            if self._kappa_age >= 0:
                self._kappa_age += 1
            # A crossing is looked at on the pair it happens (one comparison), not at the next
            # multiple of evaluate_every_pairs, once kappa is known from a time at rest: before
            # that each look measures kappa anew on the window at hand, which would cost an
            # interval a pair while the sum rises.
            burst = (
                self._kappa_age >= 0
                and self._cusum > self._kappa * self.cusum_threshold
                and self._rule.level == "normal"
            )
        if loss > self.gross_threshold:
            self._gross.append(self._seq)
            # A burst: evaluate now, not at the next multiple of evaluate_every_pairs.
            burst = burst or (self._rule.level == "normal" and self._gross_run() >= self.settings.gross_min_pairs)
        if self._evaluated and self._rule.level == "normal":
            self._clean_pairs += 1
            if self._clean_pairs >= self.context.window_size:
                self._healthy_seen = True
        # Between evaluations nothing is due, unless an age bound may drop pairs.
        return (
            burst or self._since_eval >= self.settings.evaluate_every_pairs or self.context.window_max_age_s is not None
        )

    def evaluate(self, t: float) -> Verdict | None:
        if self.context.window_max_age_s is not None:
            before = len(self.window)
            self.window.expire(t)
            if len(self.window) != before:
                self._since_eval = max(self._since_eval, self.settings.evaluate_every_pairs)
        if len(self.window) < self.min_pairs:
            return None
        s = self.settings
        mean = self.window.mean()
        gross = self._gross_run() >= s.gross_min_pairs and mean > self.warning_limit * self.card_factor
        crossed = self._cusum > self._kappa * self.cusum_threshold
        early = gross or (crossed and self._kappa_age >= 0)  # looked at before the cadence (see on_pair)
        if self._since_eval < s.evaluate_every_pairs and not (early and self._rule.level == "normal"):
            return None
        self._since_eval = 0
        self._evaluated = True
        if mean > self.warning_limit:
            # A healthy period is a full window of pairs over which the live mean stayed within
            # the warning limit, not merely one in which the gap was not yet proven: a model
            # bad from the start but slow to prove so is still diagnosed as bad from the start.
            self._clean_pairs = 0
        # kappa is measured while the CUSUM is at rest (no sign of a rise since it last touched
        # zero), about twice a window: measured on a window that straddles a rise, the change
        # itself reads as persistence and inflates kappa, and so the threshold, exactly when
        # the CUSUM should raise.
        kappa_due = (
            self.cusum_on
            and self._rule.level == "normal"
            and self._cusum == 0.0
            and (self._kappa_age < 0 or self._kappa_age >= self.context.window_size // 2)
        )
        if self._rule.level == "normal" and mean <= self.warning_limit and not crossed:
            # The lower bound never exceeds the mean, nor has the CUSUM passed kappa x its
            # threshold, so nothing can be raised: skip the interval, the costliest step.
            if kappa_due:
                # the long-run variance alone, without the interval's quantiles (tune runs this
                # for every setting)
                arr = self.window.array()
                self._kappa, self._kappa_age = _kappa(prewhitened_long_run_variance(arr), float(arr.mean())), 0
            self._stale = True
            return None
        iv = self._interval()
        if kappa_due or (self._kappa_age < 0 and self.cusum_on):
            # Also when never measured at rest (a CUSUM that has not touched zero at an
            # evaluation since the start): the window at hand is then all there is.
            self._kappa, self._kappa_age = _kappa(iv.n * iv.std_error**2, iv.mean), 0 if kappa_due else -1
            crossed = self._cusum > self._kappa * self.cusum_threshold
        # Evidence for the one level rule (core/levels.py): the lower bound (or a run of gross
        # errors with the live mean over the limit) raises; the live upper bound, against the
        # limits eased by the hysteresis, says how far it may come down.
        raised = level_above(iv.lower, self.warning_limit, self.critical_limit)
        if gross:
            by_gross = level_above(mean / self.card_factor, self.warning_limit, self.critical_limit)
            if RANK[by_gross] > RANK[raised]:
                raised = by_gross
        # The CUSUM finds an onset: it raises from normal only. In an open episode it keeps the
        # sum of the bad pairs, which would hold the episode long after the loss came back, so
        # there the interval alone decides (raise to critical, step down, clear).
        by_cusum = self._rule.level == "normal" and crossed
        if by_cusum and raised == "normal":
            raised = "warning"
        if raised != "normal":
            self._raised_by = (
                "interval" if iv.lower > self.warning_limit else ("CUSUM" if by_cusum and not gross else "gross errors")
            )
        hy = 1 - self.settings.hysteresis
        was = self._rule.level
        level = self._rule.update(raised, level_above(iv.upper, self.warning_limit, self.critical_limit, hy))
        if was == "normal" and level != "normal":
            self._diagnosis = AFTER_HEALTHY if self._healthy_seen else FROM_DEPLOYMENT
            self._clean_pairs = 0
        elif level == "normal" and was != "normal":
            self._clean_pairs = 0

        self._store_figures(iv)
        if (was == "normal") != (level == "normal"):
            self._cusum = 0.0  # a CUSUM starts again after an alarm, and after a clear
        if level != "normal":
            self._figures["diagnosis"] = self._diagnosis
            self._figures["raised_by"] = self._raised_by
        return Verdict(level, self._summary(iv), dict(self._figures))

    def _interval(self) -> LossInterval:
        self._stale = False
        return loss_interval(
            self.window.array(), self.settings.confidence, self.card_df, raise_confidence=self.raise_confidence
        )

    def _store_figures(self, iv: LossInterval) -> None:
        s = self.settings
        # The live mean above which the interval raises, and how much of its margin over the
        # warning limit is the card's uncertainty rather than the live window's.
        live_factor = f_ppf(iv.lower_level, iv.live_df, math.inf)
        total_factor = live_factor if math.isinf(self.card_df) else f_ppf(iv.lower_level, iv.live_df, self.card_df)
        card_share = (total_factor - live_factor) / (total_factor - 1.0) if total_factor > 1.0 else 0.0
        self._figures = {
            "live_loss": iv.mean,
            "lower": iv.lower,
            "upper": iv.upper,
            "lower_live_only": iv.lower_live,
            "confidence": s.confidence,
            "raise_confidence": self.raise_confidence,
            "lower_level": iv.lower_level,
            "expected_loss": self.context.expected_loss,
            "expected_source": self.context.expected_source,
            "warning_limit": self.warning_limit,
            "critical_limit": self.critical_limit,
            "raise_above_live_loss": self.warning_limit * total_factor,
            "card_df": None if math.isinf(self.card_df) else self.card_df,
            "live_df": iv.live_df,
            "variance_df": iv.variance_df,
            "card_share_of_margin": card_share,
            "gross_errors": self._gross_run(),
            "cusum": self._cusum,
            "cusum_threshold": self._kappa * self.cusum_threshold,
            "pairs": iv.n,
            "bandwidth": iv.bandwidth,
            "prewhitening_rho": iv.rho,
            "loss": self.context.loss_kind,
        }

    def _summary(self, iv: LossInterval) -> str:
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
        if self._raised_by == "gross errors":
            card = f"{fmt(self.card_factor)} x (the card's own uncertainty) " if self.card_factor > 1.005 else ""
            return (
                f"{self._gross_run()} of the latest {self.settings.gross_run_pairs} {kind} errors are over "
                f"{fmt(self.gross_threshold)}, and the live mean {fmt(iv.mean)} over {iv.n} pairs is above "
                f"{card}the {self._level} limit {fmt(limit)} set from the expected {fmt(self.context.expected_loss)} "
                f"({src}); {self._diagnosis}: {why}."
            )
        if self._raised_by == "CUSUM":
            return (
                f"The CUSUM of {kind} errors, the critical against the warning limit, reached "
                f"{fmt(self._figures['cusum'])} over its threshold {fmt(self._figures['cusum_threshold'])}: the live "
                f"loss has risen over the warning limit {fmt(limit)} set from the expected "
                f"{fmt(self.context.expected_loss)} ({src}) (live mean {fmt(iv.mean)} over {iv.n} pairs); "
                f"{self._diagnosis}: {why}."
            )
        return (
            f"Live mean {kind} error {fmt(iv.mean)} over {iv.n} pairs (lower bound {fmt(iv.lower)}, "
            f"{pct}% over a window span) is above the {self._level} limit {fmt(limit)} set from the expected "
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
            "seq": self._seq,
            "gross": list(self._gross),
            "raised_by": self._raised_by,
            "cusum": self._cusum,
            "kappa": self._kappa,
            "kappa_age": self._kappa_age,
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
        self._seq = int(data.get("seq", 0))  # snapshots from before the gross-error test lack these
        self._gross = deque(data.get("gross", []), maxlen=self.settings.gross_min_pairs)
        self._raised_by = data.get("raised_by", "interval" if self._level != "normal" else "")
        self._cusum = float(data.get("cusum", 0.0))
        self._kappa = float(data.get("kappa", 1.0))  # snapshots from before kappa was kept: measured anew
        self._kappa_age = int(data.get("kappa_age", -1))
