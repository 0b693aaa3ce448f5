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


def _fields(p: Prediction) -> tuple:
    """A waiting prediction's fields: (id, value, t, ts, features or None, version, model)."""
    # No features as None, not {}: a tuple holding a dict, even an empty one, stays tracked.
    return (p.id, p.value, p.t, p.ts, p.features or None, p.model_version, p.model)


# The id stays in the tuple although it is the dict's key: a paired id is kept (in the done
# set and the queue) as the very text object the prediction brought, not a second copy, and a
# 3-tuple takes the same 64 bytes as a 2-tuple.
def _prediction(fields: tuple, model: str | None) -> Prediction:
    if len(fields) == 3:  # the short form: nothing but id, value and time
        return Prediction(model or "", fields[0], fields[1], fields[2])
    pid, value, t, ts, features, version, model = fields
    return Prediction(model, pid, value, t, ts, {} if features is None else features, version)


def _truth(fields: tuple, model: str | None) -> Truth:
    if len(fields) == 3:
        return Truth(model or "", fields[0], fields[1], fields[2])
    return Truth(fields[4], *fields[:4])


# Queue entries already taken from the front before the front is cut off. Until then they
# keep their ids alive, so this stays small; cutting moves the rest of the list (about 60
# pointers a taken entry with a queue of 15,000).
_CUT_AT = 256

# Lazy expiry waits until the earliest deadline is this share of the horizon behind core time:
# about 3 % more records held, for expiry in batches (see Pairer.expire).
_SLACK = 1 / 32

# A paired id's entry in the predictions' dict; index 2 (a waiting record's time) matches no time.
PAIRED: tuple = ("", None, None)


class _Arrivals:
    """Ids and core times in arrival order, taken from the front by moving ``head``.

    The times are doubles in an array, not float objects in a deque: 8 bytes an entry
    instead of 32, which matters for the ids kept a whole horizon (every paired id, and
    the queue entries of records that paired) -- measured in bench/replay_throughput.py.
    """

    __slots__ = ("ids", "ts", "head")

    def __init__(self) -> None:
        self.ids: list[str] = []
        self.ts = array("d")
        self.head = 0

    def __len__(self) -> int:
        return len(self.ts) - self.head

    def cut(self) -> None:
        """Drop the entries already taken, once they are many or half the queue or more."""
        h = self.head
        if h >= _CUT_AT or (h and h * 2 >= len(self.ts)):
            del self.ids[:h]
            del self.ts[:h]
            self.head = 0

    def clear(self) -> None:
        self.ids.clear()
        del self.ts[:]
        self.head = 0

    def items(self) -> list[tuple[str, float]]:
        h = self.head
        return list(zip(self.ids[h:], self.ts[h:]))


class Pairer:
    """Holds unpaired records of one model.

    A waiting record is kept as a plain tuple of its fields rather than as the record object:
    a tuple of numbers and text is not tracked by Python's garbage collector once it has been
    seen, so thousands of records waiting for a late truth add nothing to each collection's
    work (about a sixth of replay's time when they were objects). The record is built again
    when it pairs or is written to a snapshot. A record with nothing but id, value and time
    (of the pairer's model) is kept as ``(id, value, t)``, 32 bytes less than all its fields.

    Each store is a plain dict by id beside a queue of ids and core times in arrival order
    (which is core-time order): expiry and eviction take from the front of the queues. A
    record that pairs leaves the dict and its queue entry stays until it reaches the front,
    where it is recognised as gone and skipped. A paired id stays in the predictions' dict
    as ``PAIRED`` for the horizon after its pairing (with a queue of its own): one lookup
    finds a duplicate of either kind, and the id costs a dict entry and no second text. What the pairer holds is bounded by the
    horizon (or the cap): with a long horizon and a model whose truths never come, that is
    every prediction of the horizon, and every paired id of the horizon is kept to count
    duplicates.

    >>> p = Pairer(horizon_s=60, max_unpaired=100)
    >>> p.add_truth(Truth("m", "7", 1.5, t=10.0)) is None
    True
    >>> p.add_prediction(Prediction("m", "7", 1.0, t=12.0)).error
    0.5
    """

    # slots: the attributes sit in the object itself, one memory read fewer each, which
    # counts when many models take turns and their objects are out of the cache
    __slots__ = (
        "horizon_s", "max_unpaired", "model", "_preds", "_truths", "_pred_q", "_truth_q", "_done", "_done_q",
        "_expiring", "_counts", "due", "now", "_slack", "late", "_pred_add", "_truth_add", "_done_add",
    )  # fmt: skip

    def __init__(self, horizon_s: float, max_unpaired: int, model: str | None = None) -> None:
        self.horizon_s = float(horizon_s)
        self.max_unpaired = int(max_unpaired)
        self.model = model  # the model of records kept in the short form (else the first one's)
        # id -> the record's fields; index 2 is its core time ``t``
        self._preds: dict[str, tuple] = {}
        self._truths: dict[str, tuple] = {}
        self._pred_q = _Arrivals()
        self._truth_q = _Arrivals()
        self._done = 0  # paired ids in ``_preds`` as PAIRED, for the horizon after their pairing
        self._done_q = _Arrivals()
        self._expiring = (
            (self._preds, self._pred_q, "expired_predictions"),
            (self._truths, self._truth_q, "expired_truths"),
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
        self._pred_add = (self._pred_q.ids.append, self._pred_q.ts.append)
        self._truth_add = (self._truth_q.ids.append, self._truth_q.ts.append)
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
            truth = truths.get(pid)
            if truth is not None and truth[2] + self.horizon_s < self.now:
                self._expire(self.now)  # it has expired: count it so
                truth = truths.get(pid)
            if truth is not None:
                del truths[pid]
                return self._pair(pid, p, _truth(truth, self.model), p.t)
        # _fields(p) written out: this runs for every prediction
        t = p.t
        if p.ts is None and p.model_version is None and not p.features and p.model == self.model:
            preds[pid] = (pid, p.value, t)
        else:
            if self.model is None:
                self.model = p.model
            preds[pid] = (pid, p.value, t, p.ts, p.features or None, p.model_version, p.model)
        add_id, add_t = self._pred_add
        add_id(pid)
        add_t(t)
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
        pred = self._preds.get(tid)
        if self.now > self.due and (
            tid in self._truths or (pred is not None and (pred is PAIRED or pred[2] + self.horizon_s < self.now))
        ):
            self._expire(self.now)  # what was found may have expired: expire for real and look again
            pred = self._preds.get(tid)
        if pred is PAIRED or tid in self._truths:
            self._counts["duplicate_truths"] += 1
            return None
        if pred is not None:
            return self._pair(pred[0], _prediction(pred, self.model), tr, tr.t)
        t = tr.t
        if tr.ts is None and tr.model == self.model:
            self._truths[tid] = (tid, tr.value, t)
        else:
            if self.model is None:
                self.model = tr.model
            self._truths[tid] = (tid, tr.value, t, tr.ts, tr.model)
        add_id, add_t = self._truth_add
        add_id(tid)
        add_t(t)
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
    def _front(store: dict[str, tuple], q: _Arrivals) -> float | None:
        """Core time of the oldest record still in ``store``; queue entries of records gone are dropped."""
        ids, ts, i, n = q.ids, q.ts, q.head, len(q.ts)
        while i < n:
            rec = store.get(ids[i])
            if rec is not None and rec[2] == ts[i]:
                q.head = i
                return ts[i]
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
                q, store, key = self._pred_q, self._preds, "evicted_predictions"
            else:
                q, store, key = self._truth_q, self._truths, "evicted_truths"
            del store[q.ids[q.head]]
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
        # Runs for most records of a steady stream (each one moves ``due``): a queue is only
        # walked when its front has expired, and the new ``due`` is taken on the way.
        h = self.horizon_s
        first = math.inf
        for store, q, key in self._expiring:
            ts = q.ts
            i, end = q.head, len(ts)
            if i < end and ts[i] + h < now:
                ids = q.ids
                n = 0
                while i < end:
                    ti = ts[i]  # read once: each read of an array of doubles makes a float
                    if not ti + h < now:
                        break
                    rid = ids[i]
                    rec = store.get(rid)
                    if rec is not None and rec[2] == ti:  # else it paired, or was evicted, already
                        del store[rid]
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
        return {
            "preds": [asdict(_prediction(f, model)) for f in self._preds.values() if f is not PAIRED],
            "truths": [asdict(_truth(f, model)) for f in self._truths.values()],
            "done": self._done_q.items(),
            "counts": dict(self._counts),
        }

    def restore(self, data: dict[str, Any]) -> None:
        # in place: _expiring holds these very stores and queues
        for store, q, _ in self._expiring:
            store.clear()
            q.clear()
        self._done = 0
        self._done_q.clear()
        self.now = -math.inf  # as after an eager expiry: nothing is past its horizon until asked
        # the records go through add_*, which keeps each in its form; counts are restored after
        for d in data["preds"]:
            p = Prediction(**d)
            self._store(self._preds, self._pred_q, _fields(p), p.model)
        for d in data["truths"]:
            tr = Truth(**d)
            self._store(self._truths, self._truth_q, (tr.id, tr.value, tr.t, tr.ts, tr.model), tr.model)
        for k, t in data["done"]:
            self._preds[k] = PAIRED
            self._done += 1
            self._done_q.ids.append(k)
            self._done_q.ts.append(float(t))
        self._counts.update(data["counts"])
        self._set_due()

    def _store(self, store: dict[str, tuple], q: _Arrivals, fields: tuple, model: str) -> None:
        """Keep a restored record, in its short form when it has nothing else."""
        if self.model is None:
            self.model = model
        short = (
            fields[3] is None and model == self.model and (len(fields) == 5 or (not fields[4] and fields[5] is None))
        )
        store[fields[0]] = fields[:3] if short else fields
        q.ids.append(fields[0])
        q.ts.append(fields[2])
