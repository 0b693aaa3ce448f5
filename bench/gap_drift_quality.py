"""Detection quality of ``gap`` and ``drift`` on synthetic losses (issue 10, items 0 to 3 and 8).

Prints, with raw ADWIN (river.drift.ADWIN fed the clipped loss ratio pair by pair, as drift
did before blocks) measured in the same run as the reference:

1. drift: false alerts per 100,000 stationary pairs at AR(1) error coefficients 0, 0.5, 0.9
   (target at most 1), with raw ADWIN's detections beside them;
2. drift: delay to raise a lasting doubling of the loss (median and 90th percentile, pairs),
   ours against raw ADWIN's on the same streams (target: ours on independent losses at most
   twice raw ADWIN's there); 2b. the same two for detector = page_hinkley;
3. drift: a burst (8 pairs at 10 x) 1,000 pairs before a lasting doubling: doublings raised
   (target 50 of 50);
4. gap: one-sided 95 % bounds on the mean of n = 500 squared AR(1) errors, share of draws where
   the upper bound is below the true mean (target at most 7 %) and the lower above (at most 6 %);
5. gap: false alerts per 100,000 stationary pairs at AR 0, 0.5, 0.9 (target 0), and bursts of
   gross errors (blocks of 10 to 30 pairs at 50 to 10,000 x): raised within 10 pairs?

Errors are Gaussian with expected squared error 1; AR(1) errors are scaled to variance 1.

    python3 bench/gap_drift_quality.py [--runs 3] [--draws 10000] [--seeds 50]
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

import numpy as np
from scipy.signal import lfilter

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.drift import DriftCheck, DriftSettings
from watchdog_edge.core.checks.gap import GapCheck, GapSettings
from watchdog_edge.core.records import Pair, Prediction, Truth
from watchdog_edge.core.stats import loss_interval

PHIS = (0.0, 0.5, 0.9)
N_STATIONARY = 100_000


def context() -> CheckContext:
    card = ModelCard(
        model_id="m", training={"loss": 1.0, "count": 5000}, fitted_parameters=5, holdout={"loss": 1.0, "count": 2000}
    )
    return CheckContext("m", card, "squared", 1.0, "holdout", window_size=500, min_pairs=100)


def errors(rng: np.random.Generator, phi: float, n: int) -> np.ndarray:
    return lfilter([1.0], [1.0, -phi], rng.normal(size=n)) * math.sqrt(1 - phi * phi)


PAIR = Pair(Prediction("m", "0", 0.0, 0.0), Truth("m", "0", 0.0, 0.0), 0.0)


def raises(check: GapCheck | DriftCheck, losses: np.ndarray) -> list[int]:
    """Indices of the pairs at which the check went from normal to raised."""
    out = []
    level = "normal"
    for i, loss in enumerate(losses.tolist()):
        check.on_pair(PAIR, loss)
        v = check.evaluate(float(i))
        if v is not None:
            if level == "normal" and v.level != "normal":
                out.append(i)
            level = v.level
    return out


def raw_adwin(losses: np.ndarray) -> list[int]:
    from river import drift

    det = drift.ADWIN(delta=0.002)
    out = []
    for i, r in enumerate(np.minimum(losses, 10.0).tolist()):
        det.update(r)
        if det.drift_detected:
            out.append(i)
    return out


def drift_false_alerts(runs: int) -> None:
    print(f"\n1. drift: false alerts per 100,000 stationary pairs ({runs} runs of {N_STATIONARY:,} pairs)")
    print("   AR coef | drift alerts /100k | block chosen | raw ADWIN detections /100k")
    for phi in PHIS:
        ours = raw = 0
        blocks = []
        for r in range(runs):
            e = errors(np.random.default_rng(1000 + r + int(100 * phi)), phi, N_STATIONARY)
            check = DriftCheck(DriftSettings(), context())
            ours += len(raises(check, e * e))
            blocks.append(check._block)
            raw += len(raw_adwin(e * e))
        print(f"   {phi:7.1f} | {ours / runs:18.2f} | {str(sorted(set(blocks))):>12} | {raw / runs:8.2f}")


def drift_delays(seeds: int) -> None:
    print(f"\n2. drift: delay to raise a lasting doubling of the loss at pair 3,000 ({seeds} seeds)")
    print("   AR coef | ours median, p90 (missed) | raw ADWIN median, p90 (missed)")
    for phi in PHIS:
        ours, raw = [], []
        miss_o = miss_r = 0
        for s in range(seeds):
            e = errors(np.random.default_rng(5000 + s + int(100 * phi)), phi, 6000)
            e[3000:] *= math.sqrt(2.0)
            hit = [i - 3000 for i in raises(DriftCheck(DriftSettings(), context()), e * e) if i >= 3000]
            ref = [i - 3000 for i in raw_adwin(e * e) if i >= 3000]
            ours.append(hit[0]) if hit else None
            raw.append(ref[0]) if ref else None
            miss_o += not hit
            miss_r += not ref
        fo = f"{np.median(ours):5.0f}, {np.percentile(ours, 90):5.0f} ({miss_o})" if ours else "-"
        fr = f"{np.median(raw):5.0f}, {np.percentile(raw, 90):5.0f} ({miss_r})" if raw else "-"
        print(f"   {phi:7.1f} | {fo:>25} | {fr:>25}")


def page_hinkley(runs: int, seeds: int) -> None:
    print(f"\n2b. drift with detector = page_hinkley: false alerts per 100,000 ({runs} runs), delay to a doubling")
    print("   AR coef | false alerts /100k | delay median (missed of {seeds})".replace("{seeds}", str(seeds)))
    settings = DriftSettings(detector="page_hinkley")
    for phi in PHIS:
        alerts = 0
        for r in range(runs):
            e = errors(np.random.default_rng(1000 + r + int(100 * phi)), phi, N_STATIONARY)
            alerts += len(raises(DriftCheck(settings, context()), e * e))
        delays = []
        for s in range(seeds):
            e = errors(np.random.default_rng(5000 + s + int(100 * phi)), phi, 6000)
            e[3000:] *= math.sqrt(2.0)
            hit = [i - 3000 for i in raises(DriftCheck(settings, context()), e * e) if i >= 3000]
            delays += hit[:1]
        med = f"{np.median(delays):.0f}" if delays else "-"
        print(f"   {phi:7.1f} | {alerts / runs:18.2f} | {med} ({seeds - len(delays)})")


def drift_burst(seeds: int) -> None:
    found = 0
    for s in range(seeds):
        e = np.random.default_rng(s).normal(size=6000)
        e[3000:3008] *= math.sqrt(10.0)
        e[4000:] *= math.sqrt(2.0)
        found += any(i >= 4000 for i in raises(DriftCheck(DriftSettings(), context()), e * e))
    print(f"\n3. drift: burst (8 pairs at 10 x) then a lasting doubling: raised in {found} of {seeds}")


def gap_coverage(draws: int) -> None:
    print(f"\n4. gap: 95 % bounds on the mean of n = 500 squared AR(1) errors ({draws:,} draws)")
    print("   AR coef | upper below true mean | lower above true mean")
    for phi in PHIS:
        rng = np.random.default_rng(77 + int(10 * phi))
        e = lfilter([1.0], [1.0, -phi], rng.normal(size=(draws, 600)), axis=1)[:, 100:] * math.sqrt(1 - phi * phi)
        below = above = 0
        for row in e * e:
            iv = loss_interval(row, 0.95)
            below += iv.upper < 1.0
            above += iv.lower_live > 1.0
        print(f"   {phi:7.1f} | {100 * below / draws:20.2f}% | {100 * above / draws:20.2f}%")


def gap_quality(runs: int) -> None:
    print(f"\n5. gap: false alerts per 100,000 stationary pairs ({runs} runs), and bursts of gross errors")
    for phi in PHIS:
        alerts = 0
        for r in range(runs):
            e = errors(np.random.default_rng(9000 + r + int(100 * phi)), phi, N_STATIONARY)
            alerts += len(raises(GapCheck(GapSettings(), context()), e * e))
        print(f"   AR {phi:.1f}: {alerts / runs:.2f} false alerts /100k")
    print("   bursts: AR coef, block pairs, times expected -> pairs from the block's start to the raise")
    for phi in PHIS:
        row = []
        for block in (10, 20, 30):
            for times in (50.0, 300.0, 10_000.0):
                rng = np.random.default_rng(int(times) + block + int(10 * phi))
                e = errors(rng, phi, 2000)
                e[1000 : 1000 + block] += (
                    rng.choice([-1.0, 1.0], block) * math.sqrt(times) * (1 + 0.2 * rng.normal(size=block))
                )
                hit = [i - 1000 for i in raises(GapCheck(GapSettings(), context()), e * e) if i >= 1000]
                row.append(str(hit[0]) if hit else "never")
        print(f"   AR {phi:.1f}: {' '.join(f'{x:>5}' for x in row)}  (blocks 10, 20, 30 x 50, 300, 10,000 x)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=3, help="runs of 100,000 stationary pairs per AR coefficient")
    ap.add_argument("--draws", type=int, default=10_000, help="draws for the coverage of gap's bounds")
    ap.add_argument("--seeds", type=int, default=50, help="seeds for the delays and the burst")
    a = ap.parse_args()
    t0 = time.perf_counter()
    drift_false_alerts(a.runs)
    drift_delays(a.seeds)
    page_hinkley(a.runs, a.seeds)
    drift_burst(a.seeds)
    gap_coverage(a.draws)
    gap_quality(a.runs)
    print(f"\n({time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
