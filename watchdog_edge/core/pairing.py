"""Pairing predictions with their truths by id, within a horizon of core time.

Either side may come first. First arrival wins; a second prediction or truth for an id that is
pending or already paired (within the horizon) is counted as a duplicate. Unpaired records
expire after ``horizon_s``; above ``max_unpaired`` pending records the oldest is evicted.
"""

from __future__ import annotations

import math
from array import array
from dataclasses import asdict
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


def _prediction(model: str | None, pid: str, value: float, t: float, more: tuple | None) -> Prediction:
    """A waiting prediction built again; ``more`` is (ts, features or None, version, model) or None."""
    if more is None:  # the short form: nothing but id, value and time, of the pairer's model
        return Prediction(model or "", pid, value, t)
    ts, features, version, own_model = more
    return Prediction(own_model, pid, value, t, ts, {} if features is None else features, version)


def _truth(model: str | None, tid: str, value: float, t: float, more: tuple | None) -> Truth:
    """A waiting truth built again; ``more`` is (ts, model) or None."""
    if more is None:
        return Truth(model or "", tid, value, t)
    return Truth(more[1], tid, value, t, more[0])


# Queue entries already taken from the front before the front is cut off. Until then they
# keep their ids alive, so this stays small; cutting moves the rest of the list (about 60
# pointers a taken entry with a queue of 15,000).
_CUT_AT = 256

# Lazy expiry waits until the earliest deadline is this share of the horizon behind core time:
# about 3 % more records held, for expiry in batches (see Pairer.expire).
_SLACK = 1 / 32

# A paired id's entry in the predictions' dict: no arrival number is negative.
PAIRED = -1


class _Arrivals:
    """Ids, core times and values in arrival order, taken from the front by moving ``head``.

    An entry's arrival number is ``base`` plus its index: the stores map a waiting record's id
    to that number, and its time and value are read here. Times and values are doubles in
    arrays, not float objects: 8 bytes each instead of 24 and a 64-byte tuple to hold them,
    which matters for the records kept a whole horizon -- measured in
    bench/replay_throughput.py. The queue of paired ids keeps no values.
    """

    __slots__ = ("ids", "ts", "values", "head", "base")

    def __init__(self) -> None:
        self.ids: list[str] = []
        self.ts = array("d")
        self.values = array("d")
        self.head = 0
        self.base = 0  # the arrival number of ids[0]

    def __len__(self) -> int:
        return len(self.ts) - self.head

    def cut(self) -> None:
        """Drop the entries already taken, once they are many or half the queue or more."""
        h = self.head
        if h >= _CUT_AT or (h and h * 2 >= len(self.ts)):
            del self.ids[:h]
            del self.ts[:h]
            if len(self.values):
                del self.values[:h]
            self.base += h
            self.head = 0

    def clear(self) -> None:
        self.ids.clear()
        del self.ts[:]
        del self.values[:]
        self.head = 0
        self.base = 0

    def items(self) -> list[tuple[str, float]]:
        h = self.head
        return list(zip(self.ids[h:], self.ts[h:]))


class Pairer:
    """Holds unpaired records of one model.

    A waiting record is kept as an entry in its side's queue (id, time, value) and, in a dict
    by id, its arrival number: no object of its own, so thousands of records waiting for a late
    truth cost about 60 bytes each less than as tuples of float objects (measured with
    tracemalloc on the replay bench's recording) and add nothing to the garbage collector's work. Fields beyond id, value and time (source time, features, model
    version, another model), rare in practice, are kept in a dict of their own. The record is
    built again when it pairs or is written to a snapshot.

    Expiry and eviction take from the front of the queues, which are in arrival (core-time)
    order. A record that pairs leaves its dict and its queue entry stays until it reaches the
    front, where it is recognised as gone (its id maps to another number, or to none) and
    skipped. A paired id stays in the predictions' dict as ``PAIRED`` for the horizon after its
    pairing (with a queue of its own): one lookup finds a duplicate of either kind, and the id
    costs a dict entry and no second text. What the pairer holds is bounded by the horizon (or
    the cap): with a long horizon and a model whose truths never come, that is every
    prediction of the horizon, and every paired id of the horizon is kept to count duplicates.

    >>> p = Pairer(horizon_s=60, max_unpaired=100)
    >>> p.add_truth(Truth("m", "7", 1.5, t=10.0)) is None
    True
    >>> p.add_prediction(Prediction("m", "7", 1.0, t=12.0)).error
    0.5
    """

    # slots: the attributes sit in the object itself, one memory read fewer each, which
    # counts when many models take turns and their objects are out of the cache
    __slots__ = (
        "horizon_s", "max_unpaired", "model", "_preds", "_truths", "_pred_q", "_truth_q", "_pred_more",
        "_truth_more", "_done", "_done_q", "_expiring", "_counts", "due", "now", "_slack", "late", "_pred_add",
        "_truth_add", "_done_add",
    )  # fmt: skip

    def __init__(self, horizon_s: float, max_unpaired: int, model: str | None = None) -> None:
        self.horizon_s = float(horizon_s)
        self.max_unpaired = int(max_unpaired)
        self.model = model  # the model of records kept in the short form (else the first one's)
        # id -> the waiting record's arrival number in its queue (PAIRED in _preds: paired)
        self._preds: dict[str, int] = {}
        self._truths: dict[str, int] = {}
        self._pred_q = _Arrivals()
        self._truth_q = _Arrivals()
        # id -> the fields beyond id, value and time, for records that have any
        self._pred_more: dict[str, tuple] = {}
        self._truth_more: dict[str, tuple] = {}
        self._done = 0  # paired ids in ``_preds`` as PAIRED, for the horizon after their pairing
        self._done_q = _Arrivals()
        self._expiring = (
            (self._preds, self._pred_q, self._pred_more, "expired_predictions"),
            (self._truths, self._truth_q, self._truth_more, "expired_truths"),
        )
        self._counts = dict.fromkeys(COUNTERS, 0)
        self.due = float("inf")  # no record can expire before this core time
        # Expiry is lazy: ``expire(now)`` notes ``now`` and removes records only once the
        # earliest deadline is ``_SLACK`` of the horizon behind it (``late``). Until then a
        # record past its deadline may still sit in a store; every path that could see one
        # (a lookup that finds it, the cap, the counts, ``pending``, a snapshot) expires
        # first, so what the pairer says and pairs is what an eager expiry gives.
        # Why: in a steady stream each message moves the earliest deadline, so eager expiry
        # ran for most records, one or two entries at a time; in batches it costs a fraction.
        self.now = -math.inf  # the latest core time expiry was asked for
        self._slack = self.horizon_s * _SLACK
        self.late = math.inf  # due + the slack: expire for real past this
        # bound appends of the queues, for the per-record path (the queues are only ever
        # changed in place, so these stay theirs)
        q = self._pred_q
        self._pred_add = (q.ids.append, q.ts.append, q.values.append)
        q = self._truth_q
        self._truth_add = (q.ids.append, q.ts.append, q.values.append)
        self._done_add = (self._done_q.ids.append, self._done_q.ts.append)

    @property
    def pending(self) -> int:
        """Records waiting for their other half."""
        if self.now > self.due:
            self._expire(self.now)
        return len(self._preds) - self._done + len(self._truths)

    @property
    def counts(self) -> dict[str, int]:
        """The counters of :data:`COUNTERS` (expiry brought up to date first)."""
        if self.now > self.due:
            self._expire(self.now)
        return self._counts

    def add_prediction(self, p: Prediction) -> Pair | None:
        """Store a prediction, or pair it with a waiting truth."""
        self._counts["predictions"] += 1
        pid = p.id
        preds = self._preds
        if pid in preds:  # waiting, or PAIRED
            if self.now > self.due:  # it may have expired: expire for real and look again
                self._expire(self.now)
            if pid in preds:
                self._counts["duplicate_predictions"] += 1
                return None
        truths = self._truths
        if truths:  # mostly empty: truths come after their predictions
            n = truths.get(pid)
            if n is not None and self._truth_q.ts[n - self._truth_q.base] + self.horizon_s < self.now:
                self._expire(self.now)  # it has expired: count it so
                n = truths.get(pid)
            if n is not None:
                del truths[pid]
                q = self._truth_q
                j = n - q.base
                more = self._truth_more.pop(pid, None) if self._truth_more else None
                return self._pair(pid, p, _truth(self.model, pid, q.values[j], q.ts[j], more), p.t)
        # stored in place (see _keep): this runs for every prediction
        t = p.t
        q = self._pred_q
        preds[pid] = q.base + len(q.ts)
        if p.ts is not None or p.model_version is not None or p.features or p.model != self.model:
            if self.model is None:
                self.model = p.model
            self._pred_more[pid] = (p.ts, p.features or None, p.model_version, p.model)
        add_id, add_t, add_value = self._pred_add
        add_id(pid)
        add_t(t)
        add_value(p.value)
        end = t + self.horizon_s
        if end < self.due:
            self.due = end
            self.late = end + self._slack
        if len(preds) - self._done + len(truths) > self.max_unpaired:
            self._cap()
        return None

    def add_truth(self, tr: Truth) -> Pair | None:
        """Store a truth, or pair it with a waiting prediction."""
        self._counts["truths"] += 1
        tid = tr.id
        n = self._preds.get(tid)
        if self.now > self.due and (
            tid in self._truths
            or (n is not None and (n < 0 or self._pred_q.ts[n - self._pred_q.base] + self.horizon_s < self.now))
        ):
            self._expire(self.now)  # what was found may have expired: expire for real and look again
            n = self._preds.get(tid)
        if (n is not None and n < 0) or tid in self._truths:
            self._counts["duplicate_truths"] += 1
            return None
        if n is not None:
            q = self._pred_q
            j = n - q.base
            pid = q.ids[j]  # the very text the prediction brought, kept as the paired id
            more = self._pred_more.pop(pid, None) if self._pred_more else None
            return self._pair(pid, _prediction(self.model, pid, q.values[j], q.ts[j], more), tr, tr.t)
        t = tr.t
        q = self._truth_q
        self._truths[tid] = q.base + len(q.ts)
        if tr.ts is not None or tr.model != self.model:
            if self.model is None:
                self.model = tr.model
            self._truth_more[tid] = (tr.ts, tr.model)
        add_id, add_t, add_value = self._truth_add
        add_id(tid)
        add_t(t)
        add_value(tr.value)
        end = t + self.horizon_s
        if end < self.due:
            self.due = end
            self.late = end + self._slack
        if len(self._preds) - self._done + len(self._truths) > self.max_unpaired:
            self._cap()
        return None

    def _pair(self, pid: str, p: Prediction, tr: Truth, t: float) -> Pair:
        self._counts["paired"] += 1
        self._preds[pid] = PAIRED  # in place of the waiting prediction, if any: its key stays
        self._done += 1
        add_id, add_t = self._done_add
        add_id(pid)
        add_t(t)
        end = t + self.horizon_s
        if end < self.due:
            self.due = end
            self.late = end + self._slack
        if self._done > self.max_unpaired and self.now > self.due:
            self._expire(self.now)
        if self._done > self.max_unpaired:
            q = self._done_q
            del self._preds[q.ids[q.head]]
            self._done -= 1
            q.head += 1
            q.cut()
        return Pair(p, tr, t)

    @staticmethod
    def _front(store: dict[str, int], q: _Arrivals) -> float | None:
        """Core time of the oldest record still in ``store``; queue entries of records gone are dropped."""
        ids, base, i, n = q.ids, q.base, q.head, len(q.ts)
        while i < n:
            if store.get(ids[i]) == base + i:
                q.head = i
                return q.ts[i]
            i += 1
        q.head = i
        q.cut()
        return None

    def _cap(self) -> None:
        if self.now > self.due:
            self._expire(self.now)  # the oldest may have expired: they go first, as expired
        while len(self._preds) - self._done + len(self._truths) > self.max_unpaired:
            # Evict whichever side holds the oldest record.
            op = self._front(self._preds, self._pred_q)
            ot = self._front(self._truths, self._truth_q)
            if ot is None or (op is not None and op <= ot):
                q, store, more, key = self._pred_q, self._preds, self._pred_more, "evicted_predictions"
            else:
                q, store, more, key = self._truth_q, self._truths, self._truth_more, "evicted_truths"
            rid = q.ids[q.head]
            del store[rid]
            if more:
                more.pop(rid, None)
            q.head += 1
            q.cut()
            self._counts[key] += 1

    def expire(self, now: float) -> None:
        """Drop records older than the horizon at core time ``now`` (records arrive in core-time order).

        Lazily: see ``late`` in ``__init__``. The core writes out the first lines.
        """
        if now > self.now:
            self.now = now
        if now > self.late:
            self._expire(now)

    def _expire(self, now: float) -> None:
        """Drop every record whose horizon ended before ``now``, and set ``due`` and ``late``."""
        if now <= self.due:
            return
        # "expired" is t + horizon < now, the very sum that ``due`` holds: written as
        # t < now - horizon it could differ from ``due`` in the last bit
        # A queue is only walked when its front has expired, and the new ``due`` is taken on
        # the way.
        h = self.horizon_s
        first = math.inf
        for store, q, more, key in self._expiring:
            ts = q.ts
            i, end = q.head, len(ts)
            if i < end and ts[i] + h < now:
                ids, base = q.ids, q.base
                n = 0
                while i < end:
                    ti = ts[i]  # read once: each read of an array of doubles makes a float
                    if not ti + h < now:
                        break
                    rid = ids[i]
                    if store.get(rid) == base + i:  # else it paired, or was evicted, already
                        del store[rid]
                        if more:
                            more.pop(rid, None)
                        n += 1
                    i += 1
                q.head = i
                if i >= _CUT_AT or i * 2 >= end:  # cut()'s test, written out: most calls cut nothing
                    q.cut()
                    i, end = q.head, len(ts)
                if n:
                    self._counts[key] += n
            if i < end:
                ti = ts[i]
                if ti < first:
                    first = ti
        q = self._done_q
        ts = q.ts
        i, end = q.head, len(ts)
        if i < end and ts[i] + h < now:
            preds, ids = self._preds, q.ids
            while i < end and ts[i] + h < now:
                del preds[ids[i]]
                i += 1
            self._done -= i - q.head
            q.head = i
            if i >= _CUT_AT or i * 2 >= end:
                q.cut()
                i, end = q.head, len(ts)
        if i < end:
            ti = ts[i]
            if ti < first:
                first = ti
        self.due = first + h
        self.late = self.due + self._slack

    def _set_due(self) -> None:
        first = math.inf
        for q in (self._pred_q, self._truth_q, self._done_q):
            if q.head < len(q.ts) and q.ts[q.head] < first:
                first = q.ts[q.head]
        self.due = first + self.horizon_s
        self.late = self.due + self._slack

    def snapshot(self) -> dict[str, Any]:
        if self.now > self.due:
            self._expire(self.now)
        model = self.model
        pq, tq = self._pred_q, self._truth_q
        pmore, tmore = self._pred_more, self._truth_more
        preds = [
            _prediction(model, pid, pq.values[n - pq.base], pq.ts[n - pq.base], pmore.get(pid))
            for pid, n in self._preds.items()
            if n >= 0
        ]
        truths = [
            _truth(model, tid, tq.values[n - tq.base], tq.ts[n - tq.base], tmore.get(tid))
            for tid, n in self._truths.items()
        ]
        return {
            "preds": [asdict(p) for p in preds],
            "truths": [asdict(tr) for tr in truths],
            "done": self._done_q.items(),
            "counts": dict(self._counts),
        }

    def restore(self, data: dict[str, Any]) -> None:
        # in place: _expiring holds these very stores and queues
        for store, q, mores, _ in self._expiring:
            store.clear()
            q.clear()
            mores.clear()
        self._done = 0
        self._done_q.clear()
        self.now = -math.inf  # as after an eager expiry: nothing is past its horizon until asked
        # each record is kept in its form; counts are restored after
        for d in data["preds"]:
            p = Prediction(**d)
            more = (p.ts, p.features or None, p.model_version, p.model)
            self._keep(self._preds, self._pred_q, self._pred_more, p.id, p.value, p.t, more, p.model)
        for d in data["truths"]:
            tr = Truth(**d)
            self._keep(
                self._truths, self._truth_q, self._truth_more, tr.id, tr.value, tr.t, (tr.ts, tr.model), tr.model
            )
        for k, t in data["done"]:
            self._preds[k] = PAIRED
            self._done += 1
            self._done_q.ids.append(k)
            self._done_q.ts.append(float(t))
        self._counts.update(data["counts"])
        self._set_due()

    def _keep(
        self, store: dict[str, int], q: _Arrivals, mores: dict[str, tuple], rid: str, value: float, t: float,
        more: tuple, model: str,
    ) -> None:  # fmt: skip
        """Keep a restored record; its further fields only when it has any (``more[0]`` is its ts)."""
        if self.model is None:
            self.model = model
        if more[0] is not None or model != self.model or any(v is not None for v in more[1:-1]):
            mores[rid] = more
        store[rid] = q.base + len(q.ts)
        q.ids.append(rid)
        q.ts.append(t)
        q.values.append(value)
