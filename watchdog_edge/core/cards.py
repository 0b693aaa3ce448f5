"""Model cards: what the model did at training time, and the loss to expect in the field."""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from watchdog_edge.core.validation import format_validation as _format_validation
from watchdog_edge.errors import CardError

CARD_FORMAT = 1
LossKind = Literal["squared", "absolute"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class LossFigure(_Strict):
    """A mean loss and the number of rows it was measured on."""

    loss: float = Field(ge=0)
    count: int = Field(ge=1)


class Histogram(_Strict):
    """Training histogram of one feature.

    ``edges`` are k+1 increasing cut points; the k bins are ``[edges[i], edges[i+1])``, except
    that the first bin is open to minus infinity and the last to plus infinity. ``shares`` are
    the training shares of the k bins among non-missing values; ``missing`` the share of rows
    where the feature was missing.
    """

    edges: list[float] = Field(min_length=2)
    shares: list[float]
    missing: float = Field(default=0.0, ge=0, le=1)

    @model_validator(mode="after")
    def _shape(self) -> Histogram:
        if len(self.shares) != len(self.edges) - 1:
            raise ValueError(
                f"histogram has {len(self.edges)} edges but {len(self.shares)} shares; "
                "it needs exactly one share per bin (len(edges) - 1)"
            )
        if any(b < a for a, b in zip(self.edges, self.edges[1:])):
            raise ValueError("histogram edges must not decrease")
        if any(s < 0 for s in self.shares):
            raise ValueError("histogram shares must be >= 0")
        total = sum(self.shares)
        if self.shares and abs(total - 1.0) > 1e-6:
            raise ValueError(f"histogram shares sum to {total:.6f}, not 1")
        return self


class FeatureProfile(_Strict):
    """Training range (min, max) and histogram of one input feature."""

    min: float
    max: float
    histogram: Histogram | None = None

    @model_validator(mode="after")
    def _order(self) -> FeatureProfile:
        if self.max < self.min:
            raise ValueError(f"feature max {self.max} is below its min {self.min}")
        return self


class TargetRange(_Strict):
    min: float
    max: float


class ModelCard(_Strict):
    """The JSON file made at training time; see README "Model card"."""

    card_format: int = CARD_FORMAT
    model_id: str = Field(min_length=1)
    model_version: str | None = None
    loss: LossKind = "squared"
    training: LossFigure
    fitted_parameters: int | None = Field(
        None, ge=0, description="Fitted parameters d; needed for the final prediction error only (null: not given)."
    )
    least_squares: bool = False
    holdout: LossFigure | None = None
    features: dict[str, FeatureProfile] = Field(default_factory=dict)
    target: TargetRange | None = None
    created: str | None = None
    notes: str | None = None

    @field_validator("card_format")
    @classmethod
    def _known_format(cls, v: int) -> int:
        if v != CARD_FORMAT:
            raise ValueError(f"card_format {v} is not understood by this version (expected {CARD_FORMAT})")
        return v


def final_prediction_error(train_loss: float, n: int, d: int) -> float:
    """Akaike's final prediction error: ``train_loss * (n + d) / (n - d)``.

    >>> round(final_prediction_error(1.0, 100, 10), 6)
    1.222222
    """
    if d >= n:
        raise CardError(
            f"final prediction error needs more training rows than fitted parameters, "
            f"got training.count={n} and fitted_parameters={d}; add a 'holdout' loss to the card"
        )
    return train_loss * (n + d) / (n - d)


def expected_loss(card: ModelCard) -> tuple[float, str]:
    """The loss to expect on new data and where it comes from (``holdout`` or ``fpe``)."""
    if card.holdout is not None:
        return card.holdout.loss, "holdout"
    if card.loss == "squared" and card.least_squares:
        if card.fitted_parameters is None:
            raise CardError(
                f"card for model '{card.model_id}' has no 'holdout' loss and no fitted_parameters: the final "
                "prediction error needs the count of fitted parameters; add fitted_parameters, or a 'holdout' loss "
                "(build the card with --params D, or with --holdout HOLDOUT.csv)"
            )
        return (
            final_prediction_error(card.training.loss, card.training.count, card.fitted_parameters),
            "fpe",
        )
    why = "absolute loss" if card.loss == "absolute" else "a model not fitted by least squares"
    raise CardError(
        f"card for model '{card.model_id}' has no 'holdout' loss, and for {why} the training loss "
        'cannot be adjusted for optimism; add \'holdout\': {"loss": ..., "count": ...} '
        "(build the card with --holdout HOLDOUT.csv)"
    )


def format_validation(e: ValidationError) -> str:
    """One line per problem: the dotted key, the value given and the rule broken (see ``validation``)."""
    return _format_validation(e)


def expected_loss_df(card: ModelCard, source: str) -> float:
    """Degrees of freedom of the expected loss as a mean square: the held-out count for a
    held-out loss, N - d for one made from the training loss (its residuals have N - d).

    Under Gaussian errors the expected loss is then sigma^2 chi2(df) / df, which is what
    ``gap`` needs to allow for the card's own noise. For absolute loss the held-out count is
    on the safe side (a mean of absolute Gaussian errors has about 3.5 degrees of freedom per
    row, so the card is taken as noisier than it is).

    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 30}, fitted_parameters=4)
    >>> expected_loss_df(card, "fpe")
    26.0
    """
    if source == "holdout" and card.holdout is not None:
        return float(card.holdout.count)
    d = card.fitted_parameters if card.fitted_parameters is not None else 0
    return float(max(1, card.training.count - d))
