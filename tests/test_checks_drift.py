"""``drift``: change detection on the loss stream (river's ADWIN and Page-Hinkley), rises only."""

from __future__ import annotations

import json
import math
import subprocess
import sys

import numpy as np
import pytest
from pydantic import ValidationError

from watchdog_edge.core.cards import ModelCard, format_validation
from watchdog_edge.core.checks import settings_class
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.drift import (
    DriftCheck,
    DriftSettings,
    autocorrelations,
    change_point,
    choose_block,
    windowed_time,
)
from watchdog_edge.core.records import Pair, Prediction, Truth

EXPECTED = 4.0  # expected squared error: residual standard deviation 2


def make_check(window: int = 300, min_pairs: int = 50, **settings) -> DriftCheck:
    card = ModelCard(
        model_id="boiler",
        training={"loss": EXPECTED, "count": 1000},
        fitted_parameters=4,
        holdout={"loss": EXPECTED, "count": 300},
    )
    ctx = CheckContext("boiler", card, "squared", EXPECTED, "holdout", window_size=window, min_pairs=min_pairs)
    return DriftCheck(DriftSettings(**settings), ctx)


def errors(rng: np.random.Generator, *parts: tuple[int, float]) -> np.ndarray:
    """Normal errors in consecutive parts of (count, standard deviation)."""
    return np.concatenate([rng.normal(0.0, sd, n) for n, sd in parts])


def run(check: DriftCheck, err: np.ndarray, start: int = 0, dt: float = 10.0) -> list[tuple[int, object]]:
    out = []
    for i, e in enumerate(err, start):
        t = 1_700_000_000.0 + i * dt
        pair = Pair(
            Prediction("boiler", str(i), 50.0, t - 5, ts=t - 7),
            Truth("boiler", str(i), 50.0 + float(e), t, ts=t - 2),
            t,
        )
        check.on_pair(pair, float(e) ** 2)
        v = check.evaluate(t)
        if v is not None:
            out.append((i, v))
    return out


def test_a_rise_in_the_loss_is_raised_with_its_change_point_and_the_loss_before_and_after():
    rng = np.random.default_rng(4)
    err = errors(rng, (3000, 2.0), (1500, 4.0))  # mean squared error 4, then 16
    out = run(make_check(), err)
    assert out, "the rise was not detected"
    i, v = out[0]
    assert v.level == "warning"
    assert 3000 <= i <= 3000 + 200  # stated delay: within 200 pairs
    f = v.figures
    cp = round((f["change_t"] - 1_700_000_000.0) / 10)
    assert abs(cp - 3000) <= 30
    assert f["change_ts"] == pytest.approx(f["change_t"] - 2)  # the truth's source time
    # The means are plain means of the squared errors on each side of the change point; the
    # before side is the segment kept (the last ``history_pairs`` pairs, 2000 by default).
    sq = err**2
    assert f["pairs_before"] + f["pairs_after"] == 2000
    assert f["mean_before"] == pytest.approx(sq[cp - f["pairs_before"] : cp].mean())
    assert f["mean_after"] == pytest.approx(sq[cp : i + 1].mean())
    assert f["mean_before"] == pytest.approx(4.0, rel=0.1) and f["mean_after"] > 10
    assert f["detector"] == "ADWIN"
    assert "changed for the worse" in v.summary and "ADWIN" in v.summary
    json.dumps(f)
    # Nothing else is said while the loss stays high.
    assert len(out) == 1


def test_detections_are_river_adwin_fed_the_clipped_loss_ratio():
    # river.drift.ADWIN driven directly with min(loss / expected, clip) detects at the same pairs.
    from river import drift

    rng = np.random.default_rng(8)
    err = errors(rng, (2000, 2.0), (1000, 5.0), (1000, 1.0), (1000, 6.0))
    ref = drift.ADWIN(delta=0.002)
    ref_hits = []
    for i, e in enumerate(err):
        ref.update(min(e * e / EXPECTED, 10.0))
        if ref.drift_detected:
            ref_hits.append(i)
    check = make_check()
    ours = []
    for i, e in enumerate(err):
        pair = Pair(Prediction("boiler", str(i), 0.0, float(i)), Truth("boiler", str(i), float(e), float(i)), float(i))
        before = check.figures()["detections"]
        check.on_pair(pair, float(e) ** 2)
        check.evaluate(float(i))
        if check.figures()["detections"] > before:
            ours.append(i)
    assert ours == ref_hits and len(ref_hits) >= 3


def test_falls_are_ignored():
    rng = np.random.default_rng(2)
    check = make_check()
    out = run(check, errors(rng, (3000, 2.0), (2000, 0.7)))
    assert out == []
    assert check.figures()["detections"] >= 1
    assert check.figures()["detections"] == check.snapshot()["ignored"]


def test_clears_when_the_loss_since_the_change_recovers():
    rng = np.random.default_rng(6)
    check = make_check(window=200, min_pairs=50, clear_after_evaluations=3, evaluate_every_pairs=10)
    out = run(check, errors(rng, (2000, 2.0), (600, 4.0), (1500, 2.0)))
    levels = [(i, v.level) for i, v in out]
    assert [lv for _, lv in levels] == ["warning", "normal"]
    raised_at, cleared_at = levels[0][0], levels[1][0]
    assert 2000 <= raised_at <= 2200
    assert 2600 < cleared_at <= 2600 + 600
    cleared = out[1][1]
    # The clear rule is gap's: mean loss since the change at or below 4 x 1.25 x 0.9 = 4.5.
    assert cleared.figures["clear_limit"] == pytest.approx(4.5)
    assert cleared.figures["live_loss_since_change"] <= 4.5
    assert "back within the clearing limit" in cleared.summary


def test_hold_clears_after_the_hold_time_on_a_tick():
    rng = np.random.default_rng(6)
    check = make_check(clear_on="hold", hold_s=3600)
    out = run(check, errors(rng, (2000, 2.0), (400, 4.0)))
    [(i, v)] = out
    t_raise = 1_700_000_000.0 + i * 10
    assert check.evaluate(t_raise + 3599) is None
    v = check.evaluate(t_raise + 3600)
    assert v.level == "normal" and "held for 3600 s" in v.summary


def test_page_hinkley_detects_the_same_rise():
    rng = np.random.default_rng(4)
    out = run(make_check(detector="page_hinkley"), errors(rng, (3000, 2.0), (1500, 4.0)))
    i, v = out[0]
    assert 3000 <= i <= 3300 and v.figures["detector"] == "Page-Hinkley"
    assert abs(round((v.figures["change_t"] - 1_700_000_000.0) / 10) - 3000) <= 50


def test_no_alert_on_a_long_stationary_stream():
    rng = np.random.default_rng(10)
    check = make_check()
    assert run(check, errors(rng, (50_000, 2.0))) == []


def test_change_point_is_the_least_squares_split():
    # Brute force with numpy: the split minimising the residual sum of squares of two means.
    rng = np.random.default_rng(12)
    for _ in range(30):
        n = int(rng.integers(12, 200))
        k0 = int(rng.integers(5, n - 5))
        x = np.r_[rng.normal(0, 1, k0), rng.normal(rng.uniform(-3, 3), 1, n - k0)]
        rss = [((x[:k] - x[:k].mean()) ** 2).sum() + ((x[k:] - x[k:].mean()) ** 2).sum() for k in range(5, n - 4)]
        assert change_point(x) == 5 + int(np.argmin(rss))


def test_snapshot_restore_mid_episode_gives_identical_verdicts():
    rng = np.random.default_rng(14)
    err = errors(rng, (1500, 2.0), (800, 4.5), (1500, 2.0), (700, 5.0))
    live = make_check()
    run(live, err[:2100])  # inside the first episode
    assert live.figures()["level"] == "warning"
    copy = make_check()
    copy.restore(json.loads(json.dumps(live.snapshot())))
    a = run(live, err[2100:], start=2100)
    b = run(copy, err[2100:], start=2100)
    assert a == b and [v.level for _, v in a] == ["normal", "warning"]


def test_settings_do_not_import_river_and_are_explained():
    code = (
        "import sys; from watchdog_edge.core.checks import settings_class as s\n"
        "for n in ('gap', 'range', 'shift', 'feed_stop', 'drift', 'baseline'):\n"
        "    try:\n        s(n)\n    except ModuleNotFoundError:\n        pass\n"
        "print(sorted(m for m in ('river', 'scipy') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"
    assert settings_class("drift") is DriftSettings
    with pytest.raises(ValidationError) as e:
        DriftSettings(detector="cusum")
    assert "detector = 'cusum'" in format_validation(e.value)
    with pytest.raises(ValidationError) as e:
        DriftSettings(clip=0.5)
    assert "clip = 0.5" in format_validation(e.value)


def losses_ar1(rng: np.random.Generator, phi: float, n: int) -> np.ndarray:
    """Squared AR(1) errors scaled to the expected loss (variance EXPECTED)."""
    from scipy.signal import lfilter

    e = lfilter([1.0], [1.0, -phi], rng.normal(size=n)) * math.sqrt((1 - phi * phi) * EXPECTED)
    return e


def test_a_short_burst_does_not_hide_a_later_lasting_rise():
    # Issue 10 item 1: after a burst (8 pairs at 10 x) the segment searched for the next change
    # kept the burst, so a later lasting doubling was split as "burst, then new level", read as
    # a fall and never reported (1 of 50 raised, against 50 of 50 without the burst). Now the
    # segment starts where river's detector starts afresh (after each detection) and the split
    # goes the way the detector saw the change. 20 seeds here, 50 in bench/gap_drift_quality.py.
    for seed in range(20):
        rng = np.random.default_rng(seed)
        err = errors(rng, (3000, 2.0), (8, 2.0 * math.sqrt(10)), (992, 2.0), (2000, 2.0 * math.sqrt(2)))
        out = run(make_check(window=500, min_pairs=100), err)
        later = [(i, v) for i, v in out if i >= 4000 and v.level != "normal"]
        assert later, f"seed {seed}: the doubling at 4000 was never raised ({[(i, v.level) for i, v in out]})"
        i, v = later[0]
        assert i <= 4000 + 400
        assert abs(round((v.figures["change_t"] - 1_700_000_000.0) / 10) - 4000) <= 100
        assert v.figures["mean_after"] > 1.5 * v.figures["mean_before"]


@pytest.mark.parametrize("phi", [0.0, 0.5, 0.9])
def test_autocorrelated_stationary_losses_raise_nothing(phi):
    # Issue 10 item 2: raw ADWIN raised 0, 4 and 87 times in 50,000 stationary pairs at AR(1)
    # coefficients 0, 0.5 and 0.9. Block means over twice the integrated autocorrelation time
    # keep it quiet (bench/gap_drift_quality.py: 100,000-pair runs, with raw ADWIN beside).
    rng = np.random.default_rng(60 + int(10 * phi))
    check = make_check()
    assert run(check, losses_ar1(rng, phi, 40_000)) == []
    block = check.snapshot()["block"]
    # External check: the integrated autocorrelation time of squared AR(1) errors is
    # (1 + phi^2) / (1 - phi^2) (their autocorrelations are phi^(2k); textbook, from memory):
    # 1, 1.67 and 9.5; the block is 1 for independent losses and near twice it otherwise.
    tau = (1 + phi**2) / (1 - phi**2)
    if phi == 0.0:
        assert block == 1
    else:
        assert tau <= block <= 5 * tau


def test_block_means_still_detect_a_doubling_on_autocorrelated_losses():
    rng = np.random.default_rng(70)
    err = losses_ar1(rng, 0.5, 6000)
    err[3000:] *= math.sqrt(2.0)
    out = run(make_check(), err)
    assert out and out[0][1].level == "warning" and 3000 <= out[0][0] <= 3000 + 400


def test_the_block_and_its_calibration_survive_a_snapshot():
    rng = np.random.default_rng(9)
    err = losses_ar1(rng, 0.9, 6000)
    err[3500:] *= math.sqrt(3.0)
    for cut in (30, 300, 2000):  # before the first choice of the block, between the two, after both
        live, copy = make_check(), make_check()
        run(live, err[:cut])
        copy.restore(json.loads(json.dumps(live.snapshot())))
        a, b = run(live, err[cut:], start=cut), run(copy, err[cut:], start=cut)
        assert a == b and a, cut


def diluted_ar1(rng: np.random.Generator, n: int, share: float = 0.45) -> np.ndarray:
    """Errors of a fair model with a small card: an independent part (its coefficients' own
    error on new inputs) plus AR(1) 0.9 field noise holding ``share`` of the variance EXPECTED."""
    from scipy.signal import lfilter

    noise = lfilter([1.0], [1.0, -0.9], rng.normal(size=n)) * math.sqrt((1 - 0.81) * share * EXPECTED)
    return noise + rng.normal(0.0, math.sqrt((1 - share) * EXPECTED), n)


def test_autocorrelation_diluted_by_independent_errors_still_sets_the_block():
    # Issue 10 item 2, the worst stream of bench/detection_quality.py (30 training rows, 20
    # features, AR(1) 0.9 errors) raised 46 false alerts per 100,000 records: the coefficients'
    # error on new inputs adds an independent part to every loss, the lag-1 autocorrelation of
    # the losses falls to about 0.17, below the 2 / sqrt(n) that chose blocks of 1, while their
    # integrated autocorrelation time stays near 2.5. With the windowed time the block is set.
    from statsmodels.tsa.stattools import acf

    rng = np.random.default_rng(21)
    losses = diluted_ar1(rng, 2000) ** 2
    r = losses / EXPECTED
    assert float(acf(r, nlags=1)[1]) < 0.2  # the lag-1 autocorrelation is diluted
    assert choose_block(r) >= 4
    for seed in range(3):
        check = make_check()
        assert run(check, diluted_ar1(np.random.default_rng(30 + seed), 40_000)) == [], seed
        assert check.snapshot()["block"] >= 3


def test_the_windowed_autocorrelation_time_matches_outside_references():
    # Autocorrelations as statsmodels' acf (sums over n - k pairs over n times the variance),
    # and the time of AR(1) series against (1 + a) / (1 - a) (its autocorrelations are a^k).
    from scipy.signal import lfilter
    from statsmodels.tsa.stattools import acf

    rng = np.random.default_rng(5)
    x = rng.chisquare(1, 700)
    assert autocorrelations(x)[:40] == pytest.approx(acf(x, nlags=39, fft=True), abs=1e-9)
    for a in (0.3, 0.6, 0.9):
        times = [windowed_time(lfilter([1.0], [1.0, -a], rng.normal(size=20_000)))[0] for _ in range(5)]
        assert float(np.mean(times)) == pytest.approx((1 + a) / (1 - a), rel=0.15), a


def test_a_weak_but_lasting_autocorrelation_is_measured_over_the_whole_level():
    # With the AR part holding only 30 % of the error variance, the lag-1 autocorrelation of
    # the losses is about 0.07: from 2,000 pairs the block came out anywhere from 1 to 12
    # (here 1 for seed 41 after early detections). The sums accumulated over the level since
    # the latest detection choose it again after 8,000 and 32,000 pairs: at least 3 in each
    # stream. (False alerts on such streams: about 2 per 100,000 pairs with min_pairs = 50,
    # most of them in the first few thousand pairs; see NOTES-drift.md.)
    for seed in range(40, 44):
        check = make_check()
        run(check, diluted_ar1(np.random.default_rng(seed), 40_000, share=0.3))
        snap = check.snapshot()
        assert snap["chosen_from"] >= 8000 and snap["block"] >= 3, (seed, snap["block"], snap["chosen_from"])


def test_the_long_autocorrelation_sums_survive_a_snapshot():
    rng = np.random.default_rng(3)
    err = diluted_ar1(rng, 20_000, share=0.3)
    err[17_000:] *= 2.0  # a lasting rise to 4 times the loss
    live, copy = make_check(), make_check()
    run(live, err[:12_500])
    assert live.snapshot()["long"]["n"] >= 8000
    copy.restore(json.loads(json.dumps(live.snapshot())))
    a, b = run(live, err[12_500:], start=12_500), run(copy, err[12_500:], start=12_500)
    assert a == b and a and a[0][0] >= 17_000
