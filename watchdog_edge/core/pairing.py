"""Pairing predictions with their truths by id, within a horizon of core time.

Either side may come first. First arrival wins; a second prediction or truth for an id that is
pending or already paired (within the horizon) is counted as a duplicate. Unpaired records
expire after ``horizon_s``; above ``max_unpaired`` pending records the oldest is evicted.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import asdict, astuple
from typing import Any

from watchdog_edge.core.records import Pair, Prediction, Truth

COUNTERS = (
    "predictions",
    "truths",
    "paired",
    "duplicate_predictions",
    "duplicate_truths",
    "expired_predictions",
    "expired_truths",
    "evicted_predictions",
    "evicted_truths",
)


def _fields(p: Prediction) -> tuple:
    # No features as None, not {}: a tuple holding a dict, even an empty one, stays tracked.
    return (p.model, p.id, p.value, p.t, p.ts, p.features or None, p.model_version)


def _prediction(fields: tuple) -> Prediction:
    model, pid, value, t, ts, features, version = fields
    return Prediction(model, pid, value, t, ts, {} if features is None else features, version)


class Pairer:
    """Holds unpaired records of one model.

    A waiting record is kept as a plain tuple of its fields rather than as the record object:
    a tuple of numbers and text is not tracked by Python's garbage collector once it has been
    seen, so thousands of records waiting for a late truth add nothing to each collection's
    work (about a sixth of replay's time when they were objects). The record is built again
    when it pairs or is written to a snapshot.

    >>> p = Pairer(horizon_s=60, max_unpaired=100)
    >>> p.add_truth(Truth("m", "7", 1.5, t=10.0)) is None
    True
    >>> p.add_prediction(Prediction("m", "7", 1.0, t=12.0)).error
    0.5
    """

    def __init__(self, horizon_s: float, max_unpaired: int) -> None:
        self.horizon_s = float(horizon_s)
        self.max_unpaired = int(max_unpaired)
        # id -> the record's fields in declaration order (index 3 is its core time ``t``)
        self._preds: OrderedDict[str, tuple] = OrderedDict()
        self._truths: OrderedDict[str, tuple] = OrderedDict()
        self._done: OrderedDict[str, float] = OrderedDict()  # paired ids -> pairing time
        self._expiring = ((self._preds, "expired_predictions"), (self._truths, "expired_truths"))
        self.counts = dict.fromkeys(COUNTERS, 0)
        self.due = float("inf")  # no record can expire before this core time

    @property
    def pending(self) -> int:
        return len(self._preds) + len(self._truths)

    def add_prediction(self, p: Prediction) -> Pair | None:
        """Store a prediction, or pair it with a waiting truth."""
        self.counts["predictions"] += 1
        pid = p.id
        if pid in self._preds or pid in self._done:
            self.counts["duplicate_predictions"] += 1
            return None
        truth = self._truths.pop(pid, None)
        if truth is not None:
            return self._pair(p, Truth(*truth), p.t)
        # _fields(p) written out: this runs for every prediction
        self._preds[pid] = (p.model, pid, p.value, p.t, p.ts, p.features or None, p.model_version)
        if p.t + self.horizon_s < self.due:
            self.due = p.t + self.horizon_s
        if len(self._preds) + len(self._truths) > self.max_unpaired:
            self._cap()
        return None

    def add_truth(self, tr: Truth) -> Pair | None:
        """Store a truth, or pair it with a waiting prediction."""
        self.counts["truths"] += 1
        tid = tr.id
        if tid in self._truths or tid in self._done:
            self.counts["duplicate_truths"] += 1
            return None
        pred = self._preds.pop(tid, None)
        if pred is not None:
            return self._pair(_prediction(pred), tr, tr.t)
        self._truths[tid] = (tr.model, tid, tr.value, tr.t, tr.ts)
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
            if ot is None or (op is not None and op[3] <= ot[3]):
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
        for store, key in self._expiring:
            n = 0
            while store and next(iter(store.values()))[3] < limit:
                store.popitem(last=False)
                n += 1
            if n:
                self.counts[key] += n
        done = self._done
        while done and next(iter(done.values())) < limit:
            done.popitem(last=False)
        self._set_due()

    def _set_due(self) -> None:
        first = math.inf
        if self._preds:
            first = next(iter(self._preds.values()))[3]
        if self._truths:
            first = min(first, next(iter(self._truths.values()))[3])
        if self._done:
            first = min(first, next(iter(self._done.values())))
        self.due = first + self.horizon_s

    def snapshot(self) -> dict[str, Any]:
        return {
            "preds": [asdict(_prediction(f)) for f in self._preds.values()],
            "truths": [asdict(Truth(*f)) for f in self._truths.values()],
            "done": list(self._done.items()),
            "counts": dict(self.counts),
        }

    def restore(self, data: dict[str, Any]) -> None:
        # in place: _expiring holds these very stores
        self._preds.clear()
        self._preds.update((d["id"], _fields(Prediction(**d))) for d in data["preds"])
        self._truths.clear()
        self._truths.update((d["id"], astuple(Truth(**d))) for d in data["truths"])
        self._done = OrderedDict((k, float(t)) for k, t in data["done"])
        self.counts.update(data["counts"])
        self._set_due()
