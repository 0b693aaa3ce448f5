"""Losses and the live loss window.

The window keeps the last ``size`` losses (optionally also no older than ``max_age_s`` of core
time) in a ring buffer of C doubles (``array.array``), which takes a Python float several
times faster than a numpy array does, and which numpy reads without a copy when the interval
is computed; with a compensated running sum, so adding a pair and reading the mean are O(1). The
running sum is rebuilt exactly with ``math.fsum`` once per ``size`` updates, so rounding error
cannot build up over a stream of millions of pairs.
"""

from __future__ import annotations

import math
from array import array
from collections.abc import Callable
from typing import Any

import numpy as np

from watchdog_edge.core.cards import LossKind


def squared_loss(truth: float, prediction: float) -> float:
    """(truth - prediction) squared."""
    e = truth - prediction
    return e * e


def absolute_loss(truth: float, prediction: float) -> float:
    """|truth - prediction|."""
    return abs(truth - prediction)


def loss_function(kind: LossKind) -> Callable[[float, float], float]:
    """The loss for a card's loss kind."""
    if kind == "squared":
        return squared_loss
    if kind == "absolute":
        return absolute_loss
    raise ValueError(f"unknown loss kind {kind!r}; use 'squared' or 'absolute'")


class LossWindow:
    """The last ``size`` losses with their core times, in a ring buffer.

    >>> w = LossWindow(size=3)
    >>> for t, x in enumerate([1.0, 2.0, 3.0, 10.0]):
    ...     w.push(float(t), x)
    >>> len(w), w.mean()
    (3, 5.0)
    """

    def __init__(self, size: int, max_age_s: float | None = None) -> None:
        self.size = int(size)
        self.max_age_s = max_age_s
        self._x = array("d", bytes(8 * self.size))
        self._t = array("d", bytes(8 * self.size))
        self._xv = np.frombuffer(self._x)  # numpy views of the same memory
        self._tv = np.frombuffer(self._t)
        self._start = 0  # index of the oldest loss
        self._n = 0
        self._sum = 0.0
        self._comp = 0.0  # compensation term: the rounding errors of the running sum
        self._since_refresh = 0

    def __len__(self) -> int:
        return self._n

    def _add(self, v: float) -> None:
        # Knuth's TwoSum: the exact rounding error of the sum goes to the compensation term
        s = self._sum
        r = s + v
        b = r - s
        self._comp += (s - (r - b)) + (v - b)
        self._sum = r

    def push(self, t: float, loss: float) -> None:
        """Add one loss at core time ``t``."""
        s, c = self._sum, self._comp
        if self._n == self.size:
            i = self._start
            v = -self._x[i]
            # _add written out, since this runs on every pair
            r = s + v
            b = r - s
            c += (s - (r - b)) + (v - b)
            s = r
            self._start = i + 1 if i + 1 < self.size else 0
        else:
            i = self._start + self._n
            if i >= self.size:
                i -= self.size
            self._n += 1
        self._x[i] = loss
        self._t[i] = t
        r = s + loss
        b = r - s
        c += (s - (r - b)) + (loss - b)
        self._sum, self._comp = r, c
        self._since_refresh += 1
        if self._since_refresh >= self.size:
            self._refresh()

    def expire(self, now: float) -> None:
        """Drop losses older than ``max_age_s`` (no-op without an age bound)."""
        if self.max_age_s is None:
            return
        limit = now - self.max_age_s
        while self._n and self._t[self._start] < limit:
            self._add(-self._x[self._start])
            self._start = (self._start + 1) % self.size
            self._n -= 1
        if not self._n:
            self._sum = self._comp = 0.0

    def _refresh(self) -> None:
        self._sum = math.fsum(self.array().tolist())
        self._comp = 0.0
        self._since_refresh = 0

    def mean(self) -> float:
        """Mean loss in the window (NaN when empty)."""
        return (self._sum + self._comp) / self._n if self._n else math.nan

    def _ordered(self, buf: np.ndarray) -> np.ndarray:
        end = self._start + self._n
        if end <= self.size:
            return buf[self._start : end].copy()
        return np.concatenate((buf[self._start :], buf[: end - self.size]))

    def array(self) -> np.ndarray:
        """The losses, oldest first (a copy)."""
        return self._ordered(self._xv)

    def clear(self) -> None:
        self._start = self._n = 0
        self._sum = self._comp = 0.0
        self._since_refresh = 0

    def snapshot(self) -> dict[str, Any]:
        return {
            "t": self._ordered(self._tv).tolist(),
            "x": self.array().tolist(),
            "since": self._since_refresh,
            "sum": self._sum,
            "comp": self._comp,
        }

    def restore(self, data: dict[str, Any]) -> None:
        n = len(data["x"])
        self._xv[:n] = data["x"]
        self._tv[:n] = data["t"]
        self._start, self._n = 0, n
        self._since_refresh = int(data["since"])
        self._sum = float(data["sum"])
        self._comp = float(data["comp"])
