"""Pairing edge cases: either side first, duplicates, expiry, the memory cap."""

from watchdog_edge.core.pairing import Pairer
from watchdog_edge.core.records import Prediction, Truth


def P(i, t, v=1.0):
    return Prediction("m", str(i), v, t)


def T(i, t, v=2.0):
    return Truth("m", str(i), v, t)


def test_truth_first_or_prediction_first():
    p = Pairer(100, 100)
    assert p.add_truth(T(1, 0)) is None
    pair = p.add_prediction(P(1, 5))
    assert pair.truth.value == 2.0 and pair.t == 5
    assert p.add_prediction(P(2, 6)) is None
    assert p.add_truth(T(2, 9)).prediction.t == 6
    assert p.counts["paired"] == 2 and p.pending == 0


def test_duplicates_are_counted_and_first_wins():
    p = Pairer(100, 100)
    p.add_prediction(P(1, 0, v=1.0))
    p.add_prediction(P(1, 1, v=9.0))  # pending duplicate
    pair = p.add_truth(T(1, 2))
    assert pair.prediction.value == 1.0
    assert p.add_truth(T(1, 3)) is None  # already paired
    assert p.add_prediction(P(1, 4)) is None
    assert p.counts["duplicate_predictions"] == 2
    assert p.counts["duplicate_truths"] == 1
    assert p.counts["paired"] == 1


def test_expiry_after_the_horizon_is_counted():
    p = Pairer(horizon_s=60, max_unpaired=100)
    p.add_prediction(P(1, 0))
    p.add_truth(T(2, 10))
    p.expire(59)
    assert p.pending == 2
    p.expire(65)
    assert p.counts["expired_predictions"] == 1 and p.pending == 1
    p.expire(71)
    assert p.counts["expired_truths"] == 1 and p.pending == 0
    assert p.add_truth(T(1, 72)) is None  # its prediction is gone: the truth now waits


def test_cap_evicts_the_oldest_and_counts_it():
    p = Pairer(horizon_s=1e9, max_unpaired=3)
    p.add_prediction(P(1, 0))
    p.add_truth(T(2, 1))
    p.add_prediction(P(3, 2))
    p.add_prediction(P(4, 3))
    assert p.pending == 3
    assert p.counts["evicted_predictions"] == 1
    p.add_truth(T(5, 4))
    assert p.counts["evicted_truths"] == 1
    assert p.add_truth(T(1, 5)) is None  # 1 was evicted


def test_snapshot_round_trip():
    p = Pairer(100, 10)
    p.add_prediction(P(1, 0))
    p.add_truth(T(2, 1))
    p.add_prediction(P(3, 2))
    p.add_truth(T(3, 3))
    q = Pairer(100, 10)
    q.restore(p.snapshot())
    assert q.counts == p.counts and q.pending == 2
    assert q.add_truth(T(1, 4)).prediction.value == 1.0
    assert q.add_truth(T(3, 5)) is None and q.counts["duplicate_truths"] == 1
