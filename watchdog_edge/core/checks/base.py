"""The one shape every check has.

A check is fed predictions, truths and pairs (``on_prediction``, ``on_truth``, ``on_pair``) and asked for a verdict
(``evaluate``) after every input and on every tick. It returns ``None`` when it has nothing new
to say (not enough data, or not due yet), else a :class:`Verdict` holding the level it wants to
be at, hysteresis included. Turning levels into raised and cleared alerts is done in one place,
``watchdog_edge.core.alerts``; a check never builds alerts itself.

Checks are pure: no clock, no I/O, no randomness except seeded by data. ``snapshot`` returns
plain JSON-able data and ``restore`` takes it back exactly.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, ClassVar, Literal

from pydantic import BaseModel, ConfigDict

from watchdog_edge.core.cards import LossKind, ModelCard
from watchdog_edge.core.records import Pair, Prediction, Truth

Level = Literal["normal", "warning", "critical"]


class CheckSettings(BaseModel):
    """Base of every check's settings; unknown keys are errors."""

    model_config = ConfigDict(extra="forbid")
    enabled: bool = True


def fmt(x: float) -> str:
    """A figure in an alert summary: four significant digits."""
    return f"{x:.4g}"


@dataclass(frozen=True, slots=True)
class Verdict:
    """What a check concludes at one evaluation."""

    level: Level
    summary: str
    figures: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class CheckContext:
    """What a check knows of its model: the card and the loss to expect."""

    model: str
    card: ModelCard
    loss_kind: LossKind
    expected_loss: float
    expected_source: str  # "holdout" | "fpe"
    window_size: int = 500
    window_max_age_s: float | None = None
    min_pairs: int = 100


class Check:
    """Base class; subclasses set ``name`` and ``settings_model`` and override the verbs."""

    name: ClassVar[str] = ""
    settings_model: ClassVar[type[CheckSettings]] = CheckSettings
    # The inputs after which ``evaluate`` may have something new to say; the core skips the
    # call after other inputs. A check that is unsure keeps the default: all of them.
    reacts_to: ClassVar[frozenset[str]] = frozenset({"prediction", "truth", "pair", "tick"})
    # Whether on_pair reads pair.prediction.features. When no check of a model does, the live
    # core keeps waiting predictions without their features (less memory per unpaired record).
    pair_features: ClassVar[bool] = True

    def __init__(self, settings: CheckSettings, context: CheckContext) -> None:
        self.settings = settings
        self.context = context

    # The verbs may return False to say that ``evaluate`` at this input's time would return
    # None: the core then skips the call. Anything else (None, the default) means "ask me".
    # Saying False wrongly loses alerts, so a check says it only where it is sure.

    def on_prediction(self, prediction: Prediction) -> bool | None:
        """Take one prediction (as it arrives, before any truth)."""
        return None

    def on_truth(self, truth: Truth) -> bool | None:
        """Take one truth as it arrives (paired or not)."""
        return None

    def on_pair(self, pair: Pair, loss: float) -> bool | None:
        """Take one pair and its loss (in the card's loss kind)."""
        return None

    def evaluate(self, t: float) -> Verdict | None:
        """The check's level now, or ``None`` when it has nothing new to say."""
        return None

    def figures(self) -> dict[str, Any]:
        """The latest figures, for the retained state topic."""
        return {}

    def reset(self) -> None:
        """Start afresh (a new model version was deployed)."""

    def snapshot(self) -> dict[str, Any]:
        """Plain data that ``restore`` takes back."""
        return {}

    def restore(self, data: dict[str, Any]) -> None:
        """Take back what ``snapshot`` gave."""
