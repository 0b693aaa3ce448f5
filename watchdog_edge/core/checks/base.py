"""The one shape every check has.

A check is fed the inputs it declares in ``takes`` (predictions, truths, pairs: the verbs
``on_prediction``, ``on_truth``, ``on_pair``) and asked for a verdict (``evaluate``) after the
inputs named in ``reacts_to`` and on ticks. It returns ``None`` when it has nothing new to say
(not enough data, or not due yet), else a :class:`Verdict` holding its level. Levels move by
the one rule of ``watchdog_edge.core.levels`` (a check brings its evidence, the rule moves the
level); turning levels into raised and cleared alerts is done in ``watchdog_edge.core.alerts``.
A check never builds alerts itself.

Checks are pure: no clock, no I/O, no randomness except seeded by data. ``snapshot`` returns
plain JSON-able data and ``restore`` takes it back exactly.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, ClassVar, Generic, Literal, TypeVar

from pydantic import BaseModel, ConfigDict

from watchdog_edge.core.cards import LossKind, ModelCard
from watchdog_edge.core.levels import Level
from watchdog_edge.core.records import Pair, Prediction, Truth

Input = Literal["prediction", "truth", "pair"]


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


SettingsT = TypeVar("SettingsT", bound=CheckSettings)


class Check(Generic[SettingsT]):
    """Base class, generic over the check's settings type.

    Subclasses set ``name``, ``settings_model`` and ``takes`` and write the verbs they take.
    """

    name: ClassVar[str] = ""
    settings_model: ClassVar[type[CheckSettings]] = CheckSettings
    # The inputs whose verb the core calls (``on_prediction`` for "prediction", and so on);
    # the core never calls the verb of an input left out. A test holds this equal to the verbs
    # each check writes.
    takes: ClassVar[frozenset[Input]] = frozenset()
    # The inputs (and "tick") after which ``evaluate`` may have something new to say; the core
    # skips the call after other inputs. A check that is unsure names all of them.
    reacts_to: ClassVar[frozenset[str]] = frozenset({"prediction", "truth", "pair", "tick"})
    # Whether on_pair reads pair.prediction.features. When no check of a model does, the live
    # core keeps waiting predictions without their features (less memory per unpaired record).
    pair_features: ClassVar[bool] = True

    def __init__(self, settings: SettingsT, context: CheckContext) -> None:
        self.settings: SettingsT = settings
        self.context = context

    # Each verb returns whether ``evaluate`` at this input's time may have something new to
    # say. False lets the core skip that call, so a check returns False only where it is sure
    # evaluate would return None (not due yet); saying False wrongly loses alerts. True is
    # always safe.

    def on_prediction(self, prediction: Prediction) -> bool:
        """Take one prediction (as it arrives, before any truth); False: evaluate is not due."""
        return True

    def on_truth(self, truth: Truth) -> bool:
        """Take one truth as it arrives (paired or not); False: evaluate is not due."""
        return True

    def on_pair(self, pair: Pair, loss: float) -> bool:
        """Take one pair and its loss (in the card's loss kind); False: evaluate is not due."""
        return True

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
