"""Losses and the live loss window.

The window keeps the last ``size`` losses (optionally also no older than ``max_age_s`` of core
time) with a compensated running sum, so adding a pair and reading the mean are O(1). The
running sum is rebuilt exactly with ``math.fsum`` once per ``size`` updates, so rounding error
cannot build up over a stream of millions of pairs.
"""

from __future__ import annotations

import math
from collections import deque
from typing import Any, Callable

import numpy as np

from .cards import LossKind


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
    """The last ``size`` losses with their core times.

    >>> w = LossWindow(size=3)
    >>> for t, x in enumerate([1.0, 2.0, 3.0, 10.0]):
    ...     w.push(float(t), x)
    >>> len(w), w.mean()
    (3, 5.0)
    """

    def __init__(self, size: int, max_age_s: float | None = None) -> None:
        self.size = int(size)
        self.max_age_s = max_age_s
        self._t: deque[float] = deque()
        self._x: deque[float] = deque()
        self._sum = 0.0
        self._comp = 0.0  # Neumaier compensation term
        self._since_refresh = 0

    def __len__(self) -> int:
        return len(self._x)

    def _add(self, v: float) -> None:
        s = self._sum + v
        if abs(self._sum) >= abs(v):
            self._comp += (self._sum - s) + v
        else:
            self._comp += (v - s) + self._sum
        self._sum = s

    def push(self, t: float, loss: float) -> None:
        """Add one loss at core time ``t``."""
        self._t.append(t)
        self._x.append(loss)
        self._add(loss)
        if len(self._x) > self.size:
            self._t.popleft()
            self._add(-self._x.popleft())
        self._since_refresh += 1
        if self._since_refresh >= self.size:
            self._refresh()

    def expire(self, now: float) -> None:
        """Drop losses older than ``max_age_s`` (no-op without an age bound)."""
        if self.max_age_s is None:
            return
        limit = now - self.max_age_s
        dropped = False
        while self._t and self._t[0] < limit:
            self._t.popleft()
            self._add(-self._x.popleft())
            dropped = True
        if dropped and not self._x:
            self._sum = self._comp = 0.0

    def _refresh(self) -> None:
        self._sum = math.fsum(self._x)
        self._comp = 0.0
        self._since_refresh = 0

    def mean(self) -> float:
        """Mean loss in the window (NaN when empty)."""
        n = len(self._x)
        return (self._sum + self._comp) / n if n else math.nan

    def array(self) -> np.ndarray:
        """The losses, oldest first."""
        return np.fromiter(self._x, dtype=float, count=len(self._x))

    def clear(self) -> None:
        self._t.clear()
        self._x.clear()
        self._sum = self._comp = 0.0
        self._since_refresh = 0

    def snapshot(self) -> dict[str, Any]:
        return {"t": list(self._t), "x": list(self._x), "since": self._since_refresh,
                "sum": self._sum, "comp": self._comp}

    def restore(self, data: dict[str, Any]) -> None:
        self._t = deque(float(v) for v in data["t"])
        self._x = deque(float(v) for v in data["x"])
        self._since_refresh = int(data["since"])
        self._sum = float(data["sum"])
        self._comp = float(data["comp"])
