"""``shift``: have the inputs moved away from the training data?

For each feature with a training histogram on the card, the population stability index (PSI)
compares the training shares with the last ``recent_predictions`` predictions:

    PSI = sum_i (a_i - e_i) * ln(a_i / e_i)

over the card's k bins (outer bins open to -inf and +inf) plus one bin for missing values.
Empty bins would make the logarithm infinite, so both sides get ``smoothing`` pseudo-counts per
bin: a_i = (c_i + s) / (n + s (k + 1)) from the live counts c_i, and e_i = (E_i n + s) /
(n + s (k + 1)) from the training shares E_i, as if the training side had n rows too.

The index is biased upwards on small windows: for a window of n rows drawn from the training
distribution, n x PSI is close to Pearson's chi-square statistic (ln(a/e) ~ (a - e)/e for small
differences), so it is about chi-square with b - 1 degrees of freedom, b the number of bins with
a training share, and its mean is about (b - 1) / n. Hence the default window of 1,000 predictions; ``check-config``
prints :func:`settings_warnings` for smaller ones (the limits below allow for the bias, at the
cost of missing small moves). Warning at 0.1 and critical at 0.25 are
common practice, no single source. Needs no truth.

A feature with few distinct values has one bin per value on the card (``values``); a live
value that matches none falls into an "other" bin, whose training share is 0.

The card's shares are themselves estimates from n training rows, so on unchanged inputs the
index is about chi-square(b - 1) x (1/window + 1/n) (the two-sample form of the same
approximation): from a card of 30 rows, 10 bins give an index of about 0.3 on average
without any change. Each feature's limits are therefore raised by the factor
max(1, chi-square_(b-1) upper ``significance`` quantile x (1/window + 1/n) / warning), so that
an index is reported only where it is both above the configured limit and significant given
both sample sizes; the figures give each feature's warning limit (``warning_limits``), and
the level is taken from the largest index relative to its factor. n is the card's row count
less the feature's missing share.

A window of 1,000 sees small moves but is slow to see a large one: a share moving from 45 %
to 75 % passes the warning index only once half the window has moved. So the index is also
taken over the latest ``short_window_predictions`` (250) predictions of the window, with its
own limits (the same rule, for the shorter window), looked at every
``short_window_every_predictions`` (50), and the level follows whichever of the two is
further above its limits; the figures give both (``index``, ``short_window_index``).

By default (``short_window_features = "discrete"``) the short window watches only the features
with one bin per value. Their few bins keep the chi-square limit near the exact one (for a 0/1
feature the exact binomial chance of passing it on unchanged inputs is about ``significance``
when the two values are balanced, some 25 times it for a value seen 3 % of the time), whereas
continuous features with ten bins on 250 predictions were behind the false alerts of the short
window on all features in ``bench/detection_quality.py``.

A count or a mode that follows the day (the demo's door openings) moves as much over a night as
a switch that really changed, and no test on a few hundred predictions tells the two apart. So
where a feature's short-window index passes its warning limit while the level is normal, the
older part of the window, cut into blocks of the short window's size, must pass Pearson's
chi-square test of homogeneity at ``homogeneity_significance`` (0.01); if the blocks already
differ (a cycle within the window, which should span whole cycles) the feature is left to the
whole window (``short_window_set_aside`` in the figures). The decision is held while the level
is raised (taken at the raise if the whole window raised), so that a lasting change, once in
the older blocks, does not switch the short window off and the level clear and rise again.

A prediction with no features at all is not counted; in one that has features, a feature that
is null or absent falls into the missing bin.
"""

from __future__ import annotations

import math
import operator
from array import array
from collections.abc import Callable, Sequence
from typing import Any, Literal

import numpy as np
from pydantic import Field, model_validator

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Verdict
from watchdog_edge.core.levels import LevelGate
from watchdog_edge.core.records import Prediction
from watchdog_edge.core.tails import chi2_isf

ADVISED_MIN_WINDOW = 1000


def limit_factor(warning: float, bins: int, window: int, rows: int, significance: float) -> float:
    """How much a feature's limits are raised for chance: ``bins`` bins with a training share,
    ``rows`` training rows, ``window`` live predictions (see the module docstring).

    >>> limit_factor(0.1, 10, 1000, 100_000, 1e-6)   # a large card: the limits stand
    1.0
    >>> round(limit_factor(0.1, 10, 1000, 30, 1e-6), 1)
    15.4
    """
    if bins < 2:
        return 1.0
    chance = chi2_isf(significance, bins - 1) * (1.0 / window + 1.0 / max(rows, 1))
    return max(1.0, chance / warning)


_NAN = float("nan")


class ShiftSettings(CheckSettings):
    """Settings of ``shift``.

    >>> s = ShiftSettings()
    >>> s.recent_predictions, s.warning_index, s.critical_index
    (1000, 0.1, 0.25)
    """

    recent_predictions: int = Field(
        1000,
        ge=50,
        le=1_000_000,
        description="Number of latest predictions (with features) compared with the training histogram.",
    )
    warning_index: float = Field(
        0.1, gt=0, description="Warning when a feature's population stability index exceeds this."
    )
    critical_index: float = Field(
        0.25, gt=0, description="Critical when a feature's population stability index exceeds this."
    )
    smoothing: float = Field(
        0.5, gt=0, le=10, description="Pseudo-count added to every bin on both sides, so empty bins stay finite."
    )
    evaluate_every_predictions: int = Field(
        250, ge=1, description="Predictions between evaluations (the index moves slowly on a window of 1000)."
    )
    short_window_predictions: int = Field(
        250,
        ge=0,
        description="Also compare the latest this many predictions of the window, with limits for their "
        "number, to see large moves sooner (off with 0).",
    )
    short_window_every_predictions: int = Field(
        50,
        ge=1,
        description="Predictions between evaluations where the short window watches some feature (a fifth "
        "of it, so that a large move is raised soon after the short window shows it).",
    )
    short_window_features: Literal["all", "discrete"] = Field(
        "discrete",
        description="Which features the short window watches: those with one bin per value (few distinct "
        "values: a switch, a mode, a count), whose few bins keep its limits close to exact, or all.",
    )
    homogeneity_significance: float = Field(
        0.01,
        ge=0,
        lt=1,
        description="The short window watches a feature only while the older part of the window, cut into "
        "blocks of its size, passes a chi-square test of homogeneity at this level: a feature that moves "
        "with a cycle (a day) fails it and is left to the whole window (0: always watch).",
    )
    hysteresis: float = Field(
        0.2, ge=0, lt=1, description="Clear only when the index is at or below the limit x (1 - this)."
    )
    clear_after_evaluations: int = Field(3, ge=1, description="Evaluations in a row that must meet the clearing rule.")
    significance: float = Field(
        1e-6,
        gt=0,
        lt=0.01,
        description="A feature's limits are raised until an index above them is this unlikely on unchanged "
        "inputs, given the window and the card's row count.",
    )

    @model_validator(mode="after")
    def _order(self) -> ShiftSettings:
        if self.critical_index < self.warning_index:
            raise ValueError(f"critical_index ({self.critical_index}) must be >= warning_index ({self.warning_index})")
        return self


def settings_warnings(settings: ShiftSettings) -> list[str]:
    """Advice on settings that are valid but unwise, for ``check-config`` to print.

    >>> settings_warnings(ShiftSettings(recent_predictions=200))[0][:50]
    'recent_predictions = 200 is below 1000: the popula'
    """
    out = []
    r = settings.short_window_predictions
    every = min(settings.evaluate_every_predictions, settings.short_window_every_predictions)
    if r and 5 * every > r:
        # a fifth: the move is then seen within a fifth of the short window of passing its limit
        # (a choice of ours, no source; the bench measures 250 with 50)
        out.append(
            f"short_window_predictions = {r} is looked at only every {every} predictions "
            f"(short_window_every_predictions), so a large move waits up to that long after the short "
            f"window has seen it; set short_window_every_predictions to about {max(1, r // 5)}"
        )
    if settings.homogeneity_significance and r < settings.recent_predictions < 3 * r:
        out.append(
            f"recent_predictions = {settings.recent_predictions} leaves fewer than two older blocks of "
            f"short_window_predictions = {r} for the homogeneity test, so the short window never raises; "
            f"use recent_predictions >= {3 * r}"
        )
    if settings.recent_predictions < ADVISED_MIN_WINDOW:
        out.append(
            f"recent_predictions = {settings.recent_predictions} is below {ADVISED_MIN_WINDOW}: the population "
            f"stability index is biased upwards on few predictions (about bins/predictions on unchanged inputs), "
            f"so the limits are raised for it and small moves of the inputs go unseen; use recent_predictions >= "
            f"{ADVISED_MIN_WINDOW} to see them"
        )
    return out


def population_stability_index(
    expected_shares: Sequence[float], actual_counts: Sequence[float], smoothing: float
) -> float:
    """PSI between expected shares and observed counts over the same bins, with additive smoothing.

    ``smoothing`` pseudo-counts go into every bin on both sides (see the module docstring).

    >>> round(population_stability_index([0.5, 0.5], [70, 30], smoothing=0.0), 6)
    0.16946
    """
    k = len(expected_shares)
    if k != len(actual_counts):
        raise ValueError(f"{k} expected shares but {len(actual_counts)} counts; they must cover the same bins")
    n = float(sum(actual_counts))
    if n <= 0:
        raise ValueError("actual_counts sum to 0; the index needs at least one observation")
    denom = n + smoothing * k
    total = 0.0
    for e, c in zip(expected_shares, actual_counts):
        a = (c + smoothing) / denom
        q = (e * n + smoothing) / denom
        if a == q:
            continue
        if a <= 0 or q <= 0:
            return math.inf
        total += (a - q) * math.log(a / q)
    return total


class ShiftCheck(Check[ShiftSettings]):
    """Population stability index per feature against the card's training histograms.

    Predictions are queued as they come (one list append) and binned in a batch with numpy
    when an evaluation is due or a snapshot is taken; binning in batches or one by one gives
    the same counts, so this changes nothing but the cost.

    >>> from watchdog_edge.core.cards import ModelCard
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...     holdout={"loss": 1.0, "count": 50}, features={"x": {"min": 0, "max": 4,
    ...     "histogram": {"edges": [0, 1, 2, 3, 4], "shares": [0.25, 0.25, 0.25, 0.25]}}})
    >>> check = ShiftCheck(ShiftSettings(recent_predictions=100, evaluate_every_predictions=100),
    ...                    CheckContext("m", card, "squared", 1.0, "holdout"))
    >>> for i in range(100):                       # every value in the top bin
    ...     due = check.on_prediction(Prediction("m", str(i), 0.0, float(i), features={"x": 3.5}))
    >>> v = check.evaluate(100.0)
    >>> v.level, round(v.figures["index"]["x"], 2)
    ('critical', 3.88)
    """

    # what on_prediction reads, in the object itself (see RangeCheck)
    __slots__ = ("names", "_getter", "_pending", "_npend", "_since_eval", "_every")

    name = "shift"
    takes = frozenset({"prediction"})
    reacts_to = frozenset({"prediction"})  # its counts move only with predictions
    settings_model = ShiftSettings

    def __init__(self, settings: ShiftSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        names: list[str] = []
        inner: list[list[float]] = []
        expected: list[list[float]] = []
        nbins: list[int] = []
        values: list[tuple[int, np.ndarray]] = []  # (column, values) of the one-bin-per-value features
        factors: list[float] = []
        recent_factors: list[float] = []
        r = settings.short_window_predictions
        self.recent = r if 0 < r < settings.recent_predictions else 0  # 0: no recent index
        short: list[str] = []  # the features the short window watches
        card = context.card
        for fname, prof in card.features.items():
            h = prof.histogram
            if h is not None and h.shares:
                present = 1.0 - h.missing
                shares = [sh * present for sh in h.shares]
                if h.values is not None:
                    values.append((len(names), np.array(h.values, dtype=float)))
                    inner.append([])
                    shares.append(0.0)  # the "other" bin: values the card never saw
                else:
                    assert h.edges is not None
                    inner.append(h.edges[1:-1])  # bin i is [edges[i], edges[i+1]); outer bins open
                names.append(fname)
                expected.append(shares + [h.missing])
                nbins.append(len(shares) + 1)  # the card's bins, then the missing bin
                seen = sum(1 for e in expected[-1] if e > 0)
                rows = round(card.training.count * present) if h.missing < 1 else card.training.count
                factors.append(
                    limit_factor(settings.warning_index, seen, settings.recent_predictions, rows, settings.significance)
                )
                if self.recent and (settings.short_window_features == "all" or h.values is not None):
                    short.append(fname)
                    recent_factors.append(
                        limit_factor(settings.warning_index, seen, self.recent, rows, settings.significance)
                    )
        self.names: tuple[str, ...] = tuple(names)
        self.expected: dict[str, list[float]] = dict(zip(names, expected))
        self.factors: dict[str, float] = dict(zip(names, factors))
        self.recent_factors: dict[str, float] = dict(zip(short, recent_factors))
        self._values = values
        self._nbins = np.array(nbins, dtype=np.int64)
        # Every feature's bins side by side in one flat count vector, at these offsets.
        self._offset = np.concatenate(([0], np.cumsum(self._nbins)[:-1])).astype(np.int64)
        self._total = int(self._nbins.sum()) if nbins else 0
        # Inner edges padded with +inf to one width, so that one comparison bins every
        # feature: the bin is the number of inner edges <= x (bisect_right).
        width = max((len(e) for e in inner), default=0)
        self._edges = np.full((len(names), max(width, 1)), np.inf)
        for j, e in enumerate(inner):
            self._edges[j, : len(e)] = e
        self._missing = self._nbins - 1
        # the features of one prediction, in ``names`` order (with no features nothing is queued)
        self._getter: Callable[[dict[str, float | None]], Any] = operator.itemgetter(*names) if names else tuple
        self._every = settings.evaluate_every_predictions
        if self.recent_factors:  # the short window has features to watch: look more often
            self._every = min(self._every, settings.short_window_every_predictions)
        self._gate = LevelGate(
            settings.warning_index, settings.critical_index, settings.hysteresis, settings.clear_after_evaluations
        )
        # the columns the short window may watch, and the older blocks of its size its test compares
        self._short_cols = np.array([names.index(n) for n in short], dtype=np.int64)
        self._blocks = (settings.recent_predictions - self.recent) // self.recent if self.recent else 0
        self._critical_x2: dict[int, float] = {}
        self.reset()

    def reset(self) -> None:
        self._counts = np.zeros(self._total, dtype=np.int64)
        # flat bin ids (offset included) of each prediction in the window; -1 where still empty
        # int16 where every bin id fits (nearly always): half the memory of a model's window
        dtype = np.int16 if self._total < 2**15 else np.int32
        self._ring = np.full((self.settings.recent_predictions, len(self.names)), -1, dtype=dtype)
        self._pos = 0
        self._filled = 0
        # the features of predictions not yet binned, row after row in ``names`` order, as
        # plain doubles (a null as NaN): 8 bytes a value, and the prediction's dict is let go
        self._pending = array("d")
        self._npend = 0
        self._since_eval = 0
        self._gate.reset()
        self._figures: dict[str, Any] = {}
        # the features the short window leaves to the whole window: decided while the level is
        # normal and held while it is raised (else a change, once in the older blocks, would
        # switch the short window off and the level would clear and rise again)
        self._set_aside: list[str] = []

    def on_prediction(self, prediction: Prediction) -> bool:
        feats = prediction.features
        if feats and self.names:
            try:
                row = self._getter(feats)
            except KeyError:  # some feature is absent: missing, like a null
                row = tuple(feats.get(n) for n in self.names)
                row = row if len(row) > 1 else row[0]
            pend = self._pending
            try:
                if type(row) is tuple:
                    pend.extend(row)
                else:
                    pend.append(row)
            except TypeError:  # a null: NaN, binned as missing (a row may be half in: cut it)
                del pend[self._npend * len(self.names) :]
                pend.extend(_NAN if v is None else v for v in (row if type(row) is tuple else (row,)))
            self._npend += 1
            self._since_eval += 1
        return self._since_eval >= self._every  # evaluate resets it, so below: nothing new

    def _flush(self) -> None:
        """Bin the queued predictions into the window."""
        m = self._npend
        if not m:
            return
        size = self.settings.recent_predictions
        k = len(self.names)
        x = np.frombuffer(self._pending, dtype=float)
        if m > size:  # only the newest ``size`` can stay in the window
            x = x[(m - size) * k :]
            m = size
        x = x.reshape(m, k)
        bins = (x[:, :, None] >= self._edges[None, :, :]).sum(axis=2)
        for j, vals in self._values:
            col = x[:, j]
            idx = np.minimum(np.searchsorted(vals, col), vals.size - 1)
            bins[:, j] = np.where(vals[idx] == col, idx, vals.size)  # no match: the "other" bin
        bins = np.where(np.isnan(x), self._missing, bins) + self._offset
        slots = (self._pos + np.arange(m)) % size
        old = self._ring[slots].ravel()
        self._counts += np.bincount(bins.ravel(), minlength=self._total) - np.bincount(
            old[old >= 0], minlength=self._total
        )
        self._ring[slots] = bins
        self._pos = int((self._pos + m) % size)
        self._filled = min(size, self._filled + m)
        self._pending = array("d")  # a new one: x still holds a view of the old
        self._npend = 0

    def counts(self) -> dict[str, list[int]]:
        """Live counts per feature: the card's bins, then the missing bin."""
        self._flush()
        c = self._counts.tolist()
        return {n: c[o : o + k] for n, o, k in zip(self.names, self._offset.tolist(), self._nbins.tolist())}

    def indices(self) -> dict[str, float]:
        """The index of every feature over the current window."""
        if not self._filled and not self._npend:
            return {}
        s = self.settings.smoothing
        return {n: population_stability_index(self.expected[n], c, s) for n, c in self.counts().items()}

    def recent_indices(self) -> dict[str, float]:
        """The index of every feature the short window watches, over the latest
        ``short_window_predictions`` of a full window."""
        self._flush()
        r = self.recent
        if not r or not self.recent_factors or self._filled < self.settings.recent_predictions:
            return {}
        slots = (self._pos - r + np.arange(r)) % self.settings.recent_predictions
        c = np.bincount(self._ring[slots].ravel(), minlength=self._total).tolist()
        sm = self.settings.smoothing
        watched = self.recent_factors
        return {
            n: population_stability_index(self.expected[n], c[o : o + k], sm)
            for n, o, k in zip(self.names, self._offset.tolist(), self._nbins.tolist())
            if n in watched
        }

    def homogeneous(self) -> dict[str, bool]:
        """For every feature the short window may watch: do the older blocks of the window (its
        size each, before the latest one) pass the chi-square test of homogeneity?"""
        self._flush()
        r, blocks, alpha = self.recent, self._blocks, self.settings.homogeneity_significance
        names = list(self.recent_factors)
        if not names or self._filled < self.settings.recent_predictions:
            return {}
        if alpha == 0:
            return dict.fromkeys(names, True)
        if blocks < 2:  # nothing to compare: the short window is not trusted
            return dict.fromkeys(names, False)
        size = self.settings.recent_predictions
        slots = (self._pos - r * (blocks + 1) + np.arange(r * blocks)) % size
        ids = self._ring[slots][:, self._short_cols].astype(np.int64)
        which = np.repeat(np.arange(blocks), r)[:, None] * self._total
        table = np.bincount((ids + which).ravel(), minlength=blocks * self._total).reshape(blocks, self._total)
        # every block holds r predictions, so a cell's expected count is its bin's total / blocks;
        # bins empty in every block drop out, and so do their degrees of freedom
        total = table.sum(axis=0)
        used = total > 0
        exp = np.where(used, total / blocks, 1.0)
        cell = np.where(used, ((table - exp) ** 2 / exp).sum(axis=0), 0.0)
        starts = self._offset[self._short_cols]
        x2 = np.add.reduceat(cell, starts)
        cols = np.add.reduceat(used.astype(np.int64), starts)
        out = {}
        for n, x, c in zip(names, x2.tolist(), cols.tolist()):
            if c < 2:  # one value only in every block: nothing differs
                out[n] = True
                continue
            df = (blocks - 1) * (c - 1)
            if df not in self._critical_x2:
                self._critical_x2[df] = chi2_isf(alpha, df)
            out[n] = x <= self._critical_x2[df]
        return out

    def evaluate(self, t: float) -> Verdict | None:
        if self._since_eval < self._every:
            return None
        self._since_eval = 0
        self._flush()
        if self._filled < self.settings.recent_predictions:
            return None
        s = self.settings
        idx = self.indices()
        f = self.factors
        # the level follows the index furthest above its own limits, over the whole window
        # or over its recent part
        score = {n: idx[n] / f[n] for n in idx}
        span = {n: self._filled for n in idx}
        rf = self.recent_factors
        every = self.recent_indices()
        # The homogeneity test decides only where the short window would raise, so it is run
        # then: while the level is normal and some short-window index passes its warning limit,
        # and at a raise (the decision is then held until the level clears).
        tested = False
        if self._gate.level == "normal":
            self._set_aside = []
            if any(v / rf[n] > s.warning_index for n, v in every.items()):
                self._set_aside = [n for n, ok in self.homogeneous().items() if not ok]
                tested = True
        recent = {n: v for n, v in every.items() if n not in self._set_aside}
        for n, v in recent.items():
            if v / rf[n] > score[n]:
                score[n], span[n] = v / rf[n], self.recent
        top = max(score, key=score.__getitem__)
        was = self._gate.level
        level = self._gate.update_figure(score[top])
        if was == "normal" and level != "normal" and not tested and every:
            # raised on the whole window: hold the test's decision for the raised time
            self._set_aside = [n for n, ok in self.homogeneous().items() if not ok]
            recent = {n: v for n, v in every.items() if n not in self._set_aside}
        self._figures = {
            "index": idx,
            "short_window_index": recent,
            "top_feature": top,
            "predictions": self._filled,
            "short_window_predictions": self.recent,
            "warning_index": s.warning_index,
            "critical_index": s.critical_index,
            "warning_limits": {n: s.warning_index * f[n] for n in idx},
            "critical_limits": {n: s.critical_index * f[n] for n in idx},
            "short_window_warning_limits": {n: s.warning_index * rf[n] for n in recent},
            # features the short window leaves to the whole window: their older blocks differ
            # (a cycle), or there are too few blocks to tell
            "short_window_set_aside": list(self._set_aside),
        }
        return Verdict(level, self._summary(level, score, span, top), dict(self._figures))

    def _summary(self, level: str, score: dict[str, float], span: dict[str, int], top: str) -> str:
        s = self.settings
        n = span[top]
        f = self.factors if n == self._filled else self.recent_factors
        warn = s.warning_index * f[top]
        idx = {k: v * (self.factors if span[k] == self._filled else self.recent_factors)[k] for k, v in score.items()}
        if level == "normal":
            return (
                f"The inputs of the last {n} predictions look like the training data: the largest "
                f"population stability index for its limit is {idx[top]:.3g} ({top}), within the warning limit "
                f"{warn:.3g}."
            )
        limit = (s.critical_index if level == "critical" else s.warning_index) * f[top]
        moved = [name for name, v in sorted(score.items(), key=lambda kv: -kv[1]) if v > s.warning_index]
        names = ", ".join(moved[:3]) + (f" and {len(moved) - 3} more" if len(moved) > 3 else "")
        return (
            f"The inputs have moved away from the training data: population stability index "
            f"{idx[top]:.3g} for {top} over the last {n} predictions (the {level} limit is {limit:.3g}); "
            f"features past their warning limit: {names or 'none now'}."
        )

    def figures(self) -> dict[str, Any]:
        out = dict(self._figures)
        out["level"] = self._gate.level
        return out

    def snapshot(self) -> dict[str, Any]:
        self._flush()  # binning now or later gives the same window
        return {
            "features": list(self.names),
            "ring": self._ring.tolist(),
            "counts": self._counts.tolist(),
            "pos": self._pos,
            "filled": self._filled,
            "since_eval": self._since_eval,
            "gate": self._gate.snapshot(),
            "figures": self._figures,
            "set_aside": list(self._set_aside),
        }

    def restore(self, data: dict[str, Any]) -> None:
        if list(data["features"]) != list(self.names):
            raise ValueError(f"shift snapshot covers features {data['features']}, the card has {list(self.names)}")
        self._ring = np.array(data["ring"], dtype=self._ring.dtype).reshape(
            self.settings.recent_predictions, len(self.names)
        )
        self._counts = np.array(data["counts"], dtype=np.int64)
        self._pos = int(data["pos"])
        self._filled = int(data["filled"])
        self._since_eval = int(data["since_eval"])
        self._pending = array("d")
        self._npend = 0
        self._gate.restore(data["gate"])
        self._figures = data["figures"]
        self._set_aside = [n for n in data.get("set_aside", []) if n in self.recent_factors]
