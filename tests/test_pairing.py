"""Pairing edge cases: either side first, duplicates, expiry, the memory cap."""

import json

from hypothesis import example, given, settings
from hypothesis import strategies as st

from watchdog_edge.core.pairing import COUNTERS, Pairer
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


class _Plain:
    """The pairing rules written plainly (lists scanned in full), to hold the Pairer to them."""

    def __init__(self, horizon_s: float, cap: int) -> None:
        self.h, self.cap = horizon_s, cap
        self.preds: dict[str, float] = {}
        self.truths: dict[str, float] = {}
        self.done: dict[str, float] = {}
        self.counts = dict.fromkeys(COUNTERS, 0)
        self.recs: dict[tuple[bool, str], object] = {}  # (is a prediction, id) -> the record held

    def expire(self, now: float) -> None:
        for store, key in ((self.preds, "expired_predictions"), (self.truths, "expired_truths")):
            old = [k for k, t in store.items() if t + self.h < now]
            for k in old:
                del store[k]
            self.counts[key] += len(old)
        for k in [k for k, t in self.done.items() if t + self.h < now]:
            del self.done[k]

    def add(self, side: str, rid: str, t: float, rec: object = None) -> object:
        """None when the record is held or dropped; else the waiting record it pairs with."""
        mine, other = (self.preds, self.truths) if side == "p" else (self.truths, self.preds)
        name = "predictions" if side == "p" else "truths"
        self.counts[name] += 1
        if rid in mine or rid in self.done:
            self.counts["duplicate_" + name] += 1
            return None
        if rid in other:
            del other[rid]
            self.counts["paired"] += 1
            self.done[rid] = t
            if len(self.done) > self.cap:
                del self.done[next(iter(self.done))]
            return self.recs.pop((other is self.preds, rid))
        mine[rid] = t
        self.recs[(side == "p", rid)] = rec
        while len(self.preds) + len(self.truths) > self.cap:
            op = min(self.preds.values(), default=None)
            ot = min(self.truths.values(), default=None)
            if ot is None or (op is not None and op <= ot):
                del self.preds[min(self.preds, key=self.preds.__getitem__)]
                self.counts["evicted_predictions"] += 1
            else:
                del self.truths[min(self.truths, key=self.truths.__getitem__)]
                self.counts["evicted_truths"] += 1
        return None


@settings(max_examples=300, deadline=None)
# a record whose horizon ends at the very time of the next one, in floating point
@example(
    steps=[("p", 0, 0.5976432851712189, True, False), ("t", 0, 20.0, True, False)], horizon=20.0, cap=8, restore_at=120
)
# an expired prediction, still held by the lazy expiry, is found by its truth
@example(steps=[("p", 0, 0.0, False, True), ("t", 0, 21.0, False, True)], horizon=20.0, cap=8, restore_at=120)
@given(
    steps=st.lists(
        st.tuples(st.sampled_from("pt"), st.integers(0, 12), st.floats(0, 30), st.booleans(), st.booleans()),
        min_size=1,
        max_size=120,
    ),
    horizon=st.sampled_from([5.0, 20.0, 1e9]),
    cap=st.integers(1, 8),
    restore_at=st.integers(0, 120),
)
def test_pairer_follows_the_plain_rules(steps, horizon, cap, restore_at):
    # The counts are read after some steps only: reading them brings the lazy expiry up to
    # date, and between reads the records past their horizon must still never pair. Each
    # record has a value of its own, and some have every field: a pair must hold the very
    # records that were added, also across a snapshot.
    p, plain, t = Pairer(horizon, cap), _Plain(horizon, cap), 0.0
    for i, (side, rid, dt, look, full) in enumerate(steps):
        if i == restore_at:  # a snapshot taken mid-stream continues the same way
            q = Pairer(horizon, cap)
            q.restore(json.loads(json.dumps(p.snapshot())))
            p = q
        t += dt
        if t > p.due:  # as the core calls it
            p.expire(t)
        plain.expire(t)
        if side == "p":
            rec = P(rid, t, v=float(i))
            if full:
                rec.ts, rec.features, rec.model_version = t - 1.0, {"a": float(-i), "b": None}, f"v{i}"
            got = p.add_prediction(rec)
        else:
            rec = T(rid, t, v=float(-i))
            if full:
                rec.ts, rec.model = t - 0.5, "other"
            got = p.add_truth(rec)
        other = plain.add(side, str(rid), t, rec)
        assert (got is not None) == (other is not None)
        if got is not None:
            assert got.t == t
            assert (got.prediction, got.truth) == ((other, rec) if side == "t" else (rec, other))
        if look:
            assert p.counts == plain.counts and p.pending == len(plain.preds) + len(plain.truths)
    assert p.counts == plain.counts and p.pending == len(plain.preds) + len(plain.truths)
