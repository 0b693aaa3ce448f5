"""Pairing predictions with their truths by id, within a horizon of core time.

Either side may come first. First arrival wins; a second prediction or truth for an id that is
pending or already paired (within the horizon) is counted as a duplicate. Unpaired records
expire after ``horizon_s``; above ``max_unpaired`` pending records the oldest is evicted.
"""

from __future__ import annotations

from collections import OrderedDict
from dataclasses import asdict
from typing import Any

from .records import Pair, Prediction, Truth

COUNTERS = (
    "predictions", "truths", "paired", "duplicate_predictions", "duplicate_truths",
    "expired_predictions", "expired_truths", "evicted_predictions", "evicted_truths",
)


class Pairer:
    """Holds unpaired records of one model.

    >>> p = Pairer(horizon_s=60, max_unpaired=100)
    >>> p.add_truth(Truth("m", "7", 1.5, t=10.0)) is None
    True
    >>> p.add_prediction(Prediction("m", "7", 1.0, t=12.0)).error
    0.5
    """

    def __init__(self, horizon_s: float, max_unpaired: int) -> None:
        self.horizon_s = float(horizon_s)
        self.max_unpaired = int(max_unpaired)
        self._preds: OrderedDict[str, Prediction] = OrderedDict()
        self._truths: OrderedDict[str, Truth] = OrderedDict()
        self._done: OrderedDict[str, float] = OrderedDict()  # paired ids -> pairing time
        self.counts = dict.fromkeys(COUNTERS, 0)
        self.due = float("inf")  # no record can expire before this core time

    @property
    def pending(self) -> int:
        return len(self._preds) + len(self._truths)

    def add_prediction(self, p: Prediction) -> Pair | None:
        """Store a prediction, or pair it with a waiting truth."""
        self.counts["predictions"] += 1
        if p.id in self._preds or p.id in self._done:
            self.counts["duplicate_predictions"] += 1
            return None
        truth = self._truths.pop(p.id, None)
        if truth is not None:
            return self._pair(p, truth, p.t)
        self._preds[p.id] = p
        if p.t + self.horizon_s < self.due:
            self.due = p.t + self.horizon_s
        if len(self._preds) + len(self._truths) > self.max_unpaired:
            self._cap()
        return None

    def add_truth(self, tr: Truth) -> Pair | None:
        """Store a truth, or pair it with a waiting prediction."""
        self.counts["truths"] += 1
        if tr.id in self._truths or tr.id in self._done:
            self.counts["duplicate_truths"] += 1
            return None
        pred = self._preds.pop(tr.id, None)
        if pred is not None:
            return self._pair(pred, tr, tr.t)
        self._truths[tr.id] = tr
        if tr.t + self.horizon_s < self.due:
            self.due = tr.t + self.horizon_s
        if len(self._preds) + len(self._truths) > self.max_unpaired:
            self._cap()
        return None

    def _pair(self, p: Prediction, tr: Truth, t: float) -> Pair:
        self.counts["paired"] += 1
        self._done[p.id] = t
        if t + self.horizon_s < self.due:
            self.due = t + self.horizon_s
        if len(self._done) > self.max_unpaired:
            self._done.popitem(last=False)
        return Pair(p, tr, t)

    def _cap(self) -> None:
        while len(self._preds) + len(self._truths) > self.max_unpaired:
            # Evict whichever side holds the oldest record.
            op = next(iter(self._preds.values()), None)
            ot = next(iter(self._truths.values()), None)
            if ot is None or (op is not None and op.t <= ot.t):
                self._preds.popitem(last=False)
                self.counts["evicted_predictions"] += 1
            else:
                self._truths.popitem(last=False)
                self.counts["evicted_truths"] += 1

    def expire(self, now: float) -> None:
        """Drop records older than the horizon (records arrive in core-time order)."""
        if now <= self.due:
            return
        limit = now - self.horizon_s
        for store, key in ((self._preds, "expired_predictions"), (self._truths, "expired_truths")):
            while store:
                first = next(iter(store.values()))
                if first.t >= limit:
                    break
                store.popitem(last=False)
                self.counts[key] += 1
        while self._done:
            k, t = next(iter(self._done.items()))
            if t >= limit:
                break
            self._done.popitem(last=False)
        firsts = [next(iter(self._preds.values())).t if self._preds else None,
                  next(iter(self._truths.values())).t if self._truths else None,
                  next(iter(self._done.values())) if self._done else None]
        known = [f for f in firsts if f is not None]
        self.due = min(known) + self.horizon_s if known else float("inf")

    def snapshot(self) -> dict[str, Any]:
        return {
            "preds": [asdict(p) for p in self._preds.values()],
            "truths": [asdict(t) for t in self._truths.values()],
            "done": list(self._done.items()),
            "counts": dict(self.counts),
        }

    def restore(self, data: dict[str, Any]) -> None:
        self._preds = OrderedDict((d["id"], Prediction(**d)) for d in data["preds"])
        self._truths = OrderedDict((d["id"], Truth(**d)) for d in data["truths"])
        self._done = OrderedDict((k, float(t)) for k, t in data["done"])
        self.counts.update(data["counts"])
        firsts = [r.t for r in (*self._preds.values(), *self._truths.values())] + list(self._done.values())
        self.due = min(firsts) + self.horizon_s if firsts else float("inf")
