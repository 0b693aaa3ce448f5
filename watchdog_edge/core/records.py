"""Inbound records after parsing: predictions, truths, and the pairs they form.

They are treated as immutable but not declared frozen: a frozen dataclass costs about four
times as much to build, and two to four are built per record on the hot path.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass(slots=True)
class Prediction:
    """One prediction as received: ``id`` is always text, ``t`` the receive (core) time."""

    model: str
    id: str
    value: float
    t: float
    ts: float | None = None
    features: dict[str, float | None] = field(default_factory=dict)
    model_version: str | None = None


@dataclass(slots=True)
class Truth:
    """One measured value as received."""

    model: str
    id: str
    value: float
    t: float
    ts: float | None = None


@dataclass(slots=True)
class Pair:
    """A prediction joined with its truth; ``t`` is the core time the pair was made."""

    prediction: Prediction
    truth: Truth
    t: float

    @property
    def model(self) -> str:
        return self.prediction.model

    @property
    def id(self) -> str:
        return self.prediction.id

    @property
    def error(self) -> float:
        """Truth minus prediction."""
        return self.truth.value - self.prediction.value

    @property
    def ts(self) -> float | None:
        """Source time of the truth, else of the prediction."""
        return self.truth.ts if self.truth.ts is not None else self.prediction.ts
