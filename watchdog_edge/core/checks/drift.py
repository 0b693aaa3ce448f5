"""``drift``: has the stream of losses changed? (ADWIN or Page-Hinkley from river.drift)

Each pair's loss is divided by the card's expected loss and clipped at ``clip``, so the
detector's settings do not depend on the target's units and one wild truth cannot dominate.
The detector is fed the means of blocks of ``block_pairs`` consecutive ratios. Both detectors
take their inputs as independent; field errors are autocorrelated, and raw ADWIN raised 4 and
87 times in 50,000 stationary pairs at AR(1) coefficients 0.5 and 0.9. Means over blocks long
enough to hold most of the losses' long-run variance are nearly independent, keep the
detector's own variance estimate honest, and cost about a block of delay. Prewhitening the
stream instead would feed the detector innovations, in which a lasting rise of the level shows
only as a short blip. With ``block_pairs = 0`` (the default) the block is chosen by
``choose_block`` after ``min_pairs``, 500 and ``calibration_pairs`` (2,000) pairs since the
detector's latest start, and from autocorrelations summed over the whole level after 8,000,
32,000 ... pairs (``_long_accumulate``); each time only from more pairs than the block in force
came from. Page-Hinkley sums deviations, and block means do not change a sum's variance: it
is fed pair by pair with its threshold multiplied by half the block (about the integrated
autocorrelation time) instead.

When the detector reports a change, the change point is estimated on the segment the detector
itself was looking at (river's detectors start afresh after each detection, so the pairs since
the previous one; at most ``history_pairs`` pairs) as the split into two means with the least
residual sum of squares (the maximum-likelihood change point of a normal mean shift, Hinkley
1970; from memory), keeping at least 5 pairs on each side. Starting the segment at our own
previous change point instead kept an old burst in it, so that a later lasting rise was split
as "burst, then new level", read as a fall and never reported, while the detector had moved on.
The check reacts to rises only: it raises when the mean loss after the change point is at least
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
from watchdog_edge.core.stats import prewhitened_long_run_variance


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
    block_pairs: int = Field(
        0,
        ge=0,
        le=1000,
        description="Pairs per block mean fed to the detector; 0 chooses it from the first calibration_pairs pairs.",
    )
    calibration_pairs: int = Field(
        2000,
        ge=50,
        le=100_000,
        description="Pairs looked at to choose block_pairs when it is 0 (at most history_pairs are kept).",
    )
    history_pairs: int = Field(
        2000,
        ge=100,
        le=1_000_000,
        description="Latest pairs kept to place the change point and the means before and after it.",
    )


_MAX_BLOCK = 64
_TAU_FACTOR = 2.0  # blocks of this many prewhitened integrated autocorrelation times (see choose_block)
_BLOCK_SHARE = 0.75  # share of the long-run variance a block's mean must hold (see choose_block)
_LAGS = 64  # autocorrelations accumulated over a long level, lags 1 .. this
_LONG_FIRST = 8000  # pairs of one level before the accumulated autocorrelations choose the block
_SOKAL_C = 5.0  # Sokal's window: the first lag M with M >= 5 x the time summed up to M


def autocorrelations(x: np.ndarray) -> np.ndarray:
    """Sample autocorrelations of ``x`` at lags 0 .. n - 1 (sums over n - k pairs, divided by n
    times the variance: the usual biased estimate, statsmodels' ``acf``), by FFT.

    >>> autocorrelations(np.array([1.0, 2.0, 3.0, 4.0]))[:2].round(2).tolist()
    [1.0, 0.25]
    """
    n = x.size
    z = x - x.mean()
    f = np.fft.rfft(z, 2 * n)
    acov = np.fft.irfft(f * np.conj(f), 2 * n)[:n]
    return acov / acov[0] if acov[0] > 0 else np.r_[1.0, np.zeros(n - 1)]


def windowed_time(x: np.ndarray) -> tuple[float, int]:
    """Integrated autocorrelation time 1 + 2 (rho_1 + ... + rho_M) with Sokal's automatic window
    (the first M with M >= 5 x the time up to M; Sokal 1997, also emcee's ``integrated_time``;
    from memory), and M.

    An AR(1) series with coefficient 0.5 has the time (1 + 0.5) / (1 - 0.5) = 3:

    >>> x = np.zeros(20_000)
    >>> e = np.random.default_rng(0).normal(size=x.size)
    >>> for i in range(1, x.size):
    ...     x[i] = 0.5 * x[i - 1] + e[i]
    >>> round(windowed_time(x)[0])
    3
    """
    return _windowed(autocorrelations(x))


def _windowed(rho: np.ndarray) -> tuple[float, int]:
    taus = 2.0 * np.cumsum(rho) - 1.0
    lags = np.arange(taus.size)
    ok = lags >= _SOKAL_C * taus
    m = int(np.argmax(ok)) if bool(ok.any()) else taus.size - 1
    return float(taus[m]), m


def choose_block(ratios: np.ndarray) -> int:
    """Pairs per block: 1 for losses without significant autocorrelation, else the larger of
    two choices, at most 64.

    - 2 x the prewhitened integrated autocorrelation time (long-run variance over variance),
      when the lag-1 autocorrelation is above 2 / sqrt(n) (common practice); the factor 2 is
      our choice, measured in bench/gap_drift_quality.py (1.5 and 3 gave as few false alerts
      on AR(1) losses, 3 a slower detection; 1.5 more false alerts on the streams of
      bench/detection_quality.py);
    - the shortest block b whose mean holds ``_BLOCK_SHARE`` (3/4) of the long-run variance,
      1 + 2 sum_k (1 - k / b) rho_k >= 3/4 x Sokal's windowed time, when that time is above 1
      by twice its standard deviation under independence, 2 sqrt(M / n) (each
      autocorrelation has variance about 1 / n); the means of such blocks have an integrated
      time of at most about 4/3. For a geometric autocorrelation this is about 2 x the time.

    The first alone missed losses where an independent part (the error of the model's own
    coefficients on new inputs, large with a small card) dilutes an autocorrelation that
    lasts: lag 1 near 0.17, not significant on 100 or 500 pairs, but a time of 2.5 (squared
    AR(1) 0.9 errors, a 30-row, 20-feature card): blocks of 1 and 46 false alerts in 100,000
    pairs. And 2 x that diluted time is too short a block: the memory is as long as the
    undiluted noise's, which the share rule sees.

    >>> choose_block(np.random.default_rng(0).chisquare(1, 500))
    1
    """
    n = ratios.size
    z = ratios - ratios.mean()
    var = float(np.dot(z, z)) / n
    if n < 3 or var <= 0.0:
        return 1
    block = 1
    rho1 = float(np.dot(z[1:], z[:-1])) / n / var
    if rho1 > 2.0 / math.sqrt(n):
        block = math.ceil(_TAU_FACTOR * prewhitened_long_run_variance(ratios) / var)
    return max(block, block_from_autocorrelations(autocorrelations(ratios), n))


def block_from_autocorrelations(rho: np.ndarray, n: int) -> int:
    """The block of Sokal's windowed time alone (``choose_block``), from autocorrelations
    ``rho`` estimated on ``n`` values; 1 where that time is not significant.

    >>> block_from_autocorrelations(0.5 ** np.arange(200), 10_000)  # time 3
    6
    """
    block = 1
    sokal, m = _windowed(rho)
    if sokal - 1.0 > 4.0 * math.sqrt(max(m, 1) / n):
        # the shortest block whose mean holds _BLOCK_SHARE of the windowed long-run variance
        r = rho[1 : m + 1]
        k = np.arange(1, m + 1)
        for b in range(2, _MAX_BLOCK + 1):
            if 1.0 + 2.0 * float(np.dot(np.clip(1.0 - k / b, 0.0, None), r)) >= _BLOCK_SHARE * sokal:
                break
        block = max(block, b)
    return int(min(_MAX_BLOCK, max(1, block)))


def _detector(settings: DriftSettings, block: int = 1) -> Any:
    from river import drift  # imported here so that the settings never import river

    if settings.detector == "adwin":
        # ADWIN looks for a cut every `clock` inputs (32 by default); with blocks it keeps
        # looking about as often in pairs.
        return drift.ADWIN(delta=settings.delta, clock=max(1, 32 // block))
    # Page-Hinkley sums the deviations, and a block mean does not change a sum's variance: it
    # is fed pair by pair, and its threshold is scaled by the integrated autocorrelation time
    # (block / 2) instead, as the sum's variance is.
    return drift.PageHinkley(
        min_instances=settings.ph_min_instances,
        delta=settings.ph_delta,
        threshold=settings.ph_threshold * max(1.0, block / 2.0),
        mode="up",
    )


def change_point(x: np.ndarray, min_side: int = 5, direction: int = 0) -> int:
    """Index of the first value after the least-squares split of ``x`` into two means.

    Splitting after k values lowers the residual sum of squares by S_k^2 n / (k (n - k)), with
    S_k the sum of the first k deviations from the mean; both sides keep ``min_side`` values
    when ``x`` is long enough. ``direction`` 1 considers only splits where the mean rises
    (S_k < 0), -1 only falls, 0 both; when no split goes that way, all are considered.

    >>> change_point(np.array([1.0, 1.2, 0.9, 1.1, 3.0, 3.2, 2.9]), min_side=1)
    4
    >>> change_point(np.array([5.0, 5.0, 1.0, 1.0, 1.0, 3.0, 3.0]), min_side=1, direction=1)
    5
    """
    n = len(x)
    if n < 2:
        return n
    side = max(1, min(min_side, n // 2))
    k = np.arange(side, n - side + 1)
    cs = np.cumsum(x - x.mean())[k - 1]
    gain = cs * cs / (k * (n - k))
    if direction:
        way = (cs < 0) if direction > 0 else (cs > 0)
        if np.any(way):
            gain = np.where(way, gain, -1.0)
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
        self._chosen = s.block_pairs  # 0 until chosen from the first calibration_pairs pairs
        self._block = s.block_pairs if s.detector == "adwin" else min(1, s.block_pairs)  # pairs per input
        self._auto = s.block_pairs == 0
        last = min(s.calibration_pairs, s.history_pairs)
        first = min(self.min_pairs, last)
        self._calibrate_at = {first, max(first, last // 4), last} if self._auto else set()
        self._chosen_from = 0  # pairs the block in force was chosen from
        self._detector = _detector(s, max(1, self._chosen))
        self._chunk = max(1, min(1000, s.history_pairs - _LAGS))
        self._long_reset(0)
        self._acc = 0.0  # sum of the ratios of the block being filled
        self._acc_n = 0
        self._win_sum = 0.0  # sum and count of the detector's inputs since its window began
        self._win_n = 0
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
        if self._auto and self._calibration_due(seq) and self._calibrate(pair.t):
            return self._pending or self._rule.level != "normal"  # the new detector has had this pair
        if self._auto and seq + 1 - self._long_upto >= self._chunk and self._long_accumulate(pair.t):
            return self._pending or self._rule.level != "normal"
        if self._block == 0:
            return self._pending or self._rule.level != "normal"
        if self._block == 1:
            self._feed(ratio, seq, pair.t)
        else:
            self._acc += ratio
            self._acc_n += 1
            if self._acc_n == self._block:
                self._feed(self._acc / self._block, seq, pair.t)
                self._acc = 0.0
                self._acc_n = 0
        return self._pending or self._rule.level != "normal"  # else evaluate has nothing to say

    def _calibration_due(self, seq: int) -> bool:
        """Whether the pairs since the detector's latest start have just reached a calibration
        point that is more than the block in force was chosen from."""
        n = seq + 1 - self._segment_start
        return n > self._chosen_from and n in self._calibrate_at

    def _calibrate(self, t: float) -> bool:
        """Choose the block from the pairs since the detector's latest start and feed them to
        a new detector.

        Done after ``min_pairs`` pairs, again after a quarter of ``calibration_pairs`` and after
        all of them (at most ``history_pairs``): an estimate from 500 pairs of strongly
        autocorrelated losses still came out too small in a good share of streams, and the one
        from 2,000 is about twice as precise. Only the pairs since the detector's latest
        detection are used (at least ``min_pairs`` of them, else the block stays): they are
        the ones it holds as one level, a level shift inside them would pass for a long
        memory, and the new detector finds in them only changes the old one has not reported,
        handled as usual. Re-choosing only until a first raise kept blocks of 1 chosen from
        100 pairs on autocorrelated losses where that first raise was itself a false one."""
        seg = [h for h in self._history if h[0] >= self._segment_start]
        ratios = np.fromiter((h[4] for h in seg), dtype=float, count=len(seg))
        self._chosen_from = len(seg)
        block = choose_block(ratios)
        if block == self._chosen:
            return False
        self._refeed(block, t)
        return True

    def _refeed(self, block: int, t: float) -> None:
        """A new detector with ``block``, fed the pairs since the latest detection."""
        seg = [h for h in self._history if h[0] >= self._segment_start]
        ratios = np.fromiter((h[4] for h in seg), dtype=float, count=len(seg))
        self._chosen = block
        self._detector = _detector(self.settings, block)
        if self.settings.detector != "adwin":
            block = 1
        self._block = block
        self._win_sum, self._win_n = 0.0, 0
        b = block
        for k in range(0, len(seg) - len(seg) % b, b):
            self._feed(float(ratios[k : k + b].mean()), seg[k + b - 1][0], t)
        rest = len(seg) % b
        self._acc = float(ratios[len(ratios) - rest :].sum()) if rest else 0.0
        self._acc_n = rest

    def _long_reset(self, start: int) -> None:
        """Start accumulating autocorrelations afresh at pair ``start`` (a detection)."""
        self._long_start = start  # first pair of the level
        self._long_upto = start  # pairs before this one are accumulated
        self._long_n = 0
        self._long_sum = 0.0
        self._long_prod = np.zeros(_LAGS + 1)  # sums of x_t x_(t-k), k = 0 .. _LAGS
        self._long_next = _LONG_FIRST

    def _long_accumulate(self, t: float) -> bool:
        """Add the pairs since the last call to the sums behind the autocorrelations of the
        level since the detector's latest start, and choose the block from them after 8,000,
        32,000, 128,000 ... pairs: the 2,000 pairs of the last calibration leave a weak but
        lasting autocorrelation uncertain (a lag-1 value of 0.07 was estimated anywhere from
        0.01 to 0.11), and a level that lasts gives far more. True when the block changed."""
        lo = max(self._long_start, self._long_upto - _LAGS)
        seg = [h[4] for h in self._history if h[0] >= lo]
        x = np.asarray(seg, dtype=float)
        new = min(self._seq - self._long_upto, x.size)  # the last `new` values are not yet counted
        head = x.size - new
        for k in range(min(_LAGS, x.size - 1) + 1):
            first = max(head, k)
            self._long_prod[k] += float(np.dot(x[first:], x[first - k : x.size - k]))
        self._long_sum += float(x[head:].sum())
        self._long_n += new
        self._long_upto = self._seq
        n = self._long_n
        if n < self._long_next:
            return False
        self._long_next *= 4
        if n <= self._chosen_from:
            return False
        self._chosen_from = n
        mean = self._long_sum / n
        acov = self._long_prod / (n - np.arange(_LAGS + 1)) - mean * mean
        if acov[0] <= 0.0:
            return False
        rho = acov / acov[0]
        block = block_from_autocorrelations(rho, n)
        if rho[1] > 2.0 / math.sqrt(n):  # as choose_block's prewhitened rule, for an AR(1)
            block = max(block, math.ceil(_TAU_FACTOR * (1 + rho[1]) / (1 - rho[1])))
        block = min(_MAX_BLOCK, block)
        if block == self._chosen:
            return False
        self._refeed(block, t)
        return True

    def _feed(self, value: float, seq: int, t: float) -> None:
        det = self._detector
        det.update(value)
        self._win_sum += value  # the inputs since the detector's latest start
        self._win_n += 1
        if det.drift_detected:
            self._on_change(t, seq)

    def _on_change(self, t: float, seq: int) -> None:
        self._detections += 1
        seg = [h for h in self._history if self._segment_start <= h[0] <= seq]
        ratios = np.fromiter((h[4] for h in seg), dtype=float, count=len(seg))
        # Only rises are raised, so the split sought is the best rising one: the best split of
        # a segment holding two changes can be the other (a burst's fall before a lasting rise,
        # or an early high stretch before a higher one). Where no split rises, the best split.
        losses = np.fromiter((h[3] for h in seg), dtype=float, count=len(seg))
        exp = self.context.expected_loss
        width = 0
        direction = 0
        dropped_mean = math.nan
        if self.settings.detector == "adwin":
            det = self._detector
            kept_n, kept_sum = int(det.width), float(det.total)
            if self._win_n > kept_n:
                dropped_mean = (self._win_sum - kept_sum) / (self._win_n - kept_n)
                if kept_sum / kept_n <= dropped_mean:
                    dropped_mean = math.nan  # the detector saw a fall
            width = kept_n * self._block
        self._win_sum, self._win_n = 0.0, 0
        k = min(change_point(ratios, direction=direction), len(seg) - 1)
        before = float(losses[:k].mean()) if k > 0 else math.nan
        if (
            width >= len(seg)
            and not math.isnan(dropped_mean)
            and not before * (1 + self.settings.min_rise) <= float(losses[k:].mean())
        ):
            # The detector's kept window is longer than our history, and within the history
            # no split shows the rise it saw: the change is older than the latest ``history_pairs``
            # pairs. The mean before it is then the part the detector dropped (clipped ratios
            # x the expected loss), and the change point the oldest pair we hold.
            k = 0
            before = dropped_mean * exp
        after = float(losses[k:].mean())
        cp_t, cp_ts = seg[k][1], seg[k][2]
        # river's detectors start afresh at the input after a detection: so does the segment.
        self._segment_start = seq + 1
        self._long_reset(seq + 1)
        rise = not math.isnan(before) and after >= before * (1 + self.settings.min_rise)
        if rise and self.settings.clear_on == "recovery" and after <= self.clear_limit:
            rise = False
        if rise and self._rule.level != "normal" and after < self._change["mean_after"] * (1 + self.settings.min_rise):
            # Started afresh inside the rise already raised, the detector found the tail of
            # the same rise (its cut is by whole buckets): the same episode.
            return
        self._since_change.clear()
        cp_seq = seg[k][0]
        for h in self._history:  # to the latest pair: a change found while calibrating is older
            if h[0] >= cp_seq:
                self._since_change.push(h[1], h[3])
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
            "block": self._block,
            "chosen_block": self._chosen,
            "chosen_from": self._chosen_from,
            "long": {
                "start": self._long_start,
                "upto": self._long_upto,
                "n": self._long_n,
                "sum": self._long_sum,
                "prod": self._long_prod.tolist(),
                "next": self._long_next,
            },
            "acc": self._acc,
            "acc_n": self._acc_n,
            "win_sum": self._win_sum,
            "win_n": self._win_n,
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
        self._block = int(data.get("block", 1))  # snapshots from before blocks fed pair by pair
        self._chosen = int(data.get("chosen_block", self._block))
        self._chosen_from = int(data.get("chosen_from", 0 if self._chosen == 0 else self._seq))
        long = data.get("long")
        self._long_reset(int(data["seq"]))  # snapshots from before these sums start afresh
        if long is not None:
            self._long_start, self._long_upto = int(long["start"]), int(long["upto"])
            self._long_n, self._long_sum = int(long["n"]), float(long["sum"])
            self._long_prod = np.asarray(long["prod"], dtype=float)
            self._long_next = int(long["next"])
        self._acc = float(data.get("acc", 0.0))
        self._acc_n = int(data.get("acc_n", 0))
        self._win_sum = float(data.get("win_sum", 0.0))
        self._win_n = int(data.get("win_n", 0))
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
