"""Model cards: what the model did at training time, and the loss to expect in the field."""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from watchdog_edge.core.validation import format_validation as _format_validation
from watchdog_edge.errors import CardError

# Format 2 added value histograms (discrete features), the loss of predicting the training
# mean, and the choice of estimate for the expected loss; format 1 cards load unchanged.
CARD_FORMAT = 2
KNOWN_FORMATS = (1, 2)
LossKind = Literal["squared", "absolute"]
Estimate = Literal["fpe", "random_design"]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class LossFigure(_Strict):
    """A mean loss and the number of rows it was measured on."""

    loss: float = Field(ge=0)
    count: int = Field(ge=1)


class Histogram(_Strict):
    """Training histogram of one feature: bins cut at ``edges``, or one bin per value.

    ``edges`` are k+1 increasing cut points; the k bins are ``[edges[i], edges[i+1])``, except
    that the first bin is open to minus infinity and the last to plus infinity. A feature with
    few distinct values (a switch, a mode, a count) has ``values`` instead: k increasing values,
    one bin each, and live values that match none of them are counted apart (as "other").
    ``shares`` are the training shares of the k bins among non-missing values; ``missing`` the
    share of rows where the feature was missing.

    >>> Histogram(values=[0, 1], shares=[0.45, 0.55]).bins
    2
    """

    edges: list[float] | None = None
    values: list[float] | None = None
    shares: list[float]
    missing: float = Field(default=0.0, ge=0, le=1)

    @property
    def bins(self) -> int:
        """Number of bins with a training share (the card's k)."""
        return len(self.shares)

    @model_validator(mode="after")
    def _shape(self) -> Histogram:
        if (self.edges is None) == (self.values is None):
            raise ValueError("a histogram has either 'edges' (bins between cut points) or 'values' (one bin per value)")
        if self.values is not None:
            if not self.values or len(self.shares) != len(self.values):
                raise ValueError(
                    f"histogram has {len(self.values)} values but {len(self.shares)} shares; "
                    "it needs one share per value, and at least one value"
                )
            if any(b <= a for a, b in zip(self.values, self.values[1:])):
                raise ValueError("histogram values must increase strictly")
        else:
            assert self.edges is not None
            if len(self.edges) < 2:
                raise ValueError(f"histogram has {len(self.edges)} edges; it needs at least 2")
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
    """Training range of the target; ``constant_loss`` is the loss to expect on new data from
    always predicting the training mean (squared loss) or median (absolute loss), the least a
    model must beat. Cards of format 1 lack it."""

    min: float
    max: float
    constant_loss: float | None = Field(default=None, ge=0)


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
    # Without a held-out loss, how a least-squares card's training loss is adjusted: Akaike's
    # final prediction error (new noise at the training inputs) or the random-design estimate
    # (new inputs drawn like the training ones); see README "Expected loss".
    expected_loss_estimate: Estimate = "fpe"
    holdout: LossFigure | None = None
    features: dict[str, FeatureProfile] = Field(default_factory=dict)
    target: TargetRange | None = None
    created: str | None = None
    notes: str | None = None

    @field_validator("card_format")
    @classmethod
    def _known_format(cls, v: int) -> int:
        if v not in KNOWN_FORMATS:
            known = " or ".join(str(k) for k in KNOWN_FORMATS)
            raise ValueError(f"card_format {v} is not understood by this version (expected {known})")
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


def random_design_error(train_loss: float, n: int, d: int) -> float:
    """Expected squared error at a new input drawn like the training inputs, estimated from the
    training loss of a least-squares fit with an intercept and d - 1 Gaussian regressors:

        train_loss x (N + 1)(N - 2) / ((N - d)(N - d - 1))

    The mean squared error sigma^2 (1 + 1/N)(N - 2)/(N - d - 1) at a new Gaussian input is the
    S_p criterion's target (Hocking 1976, Biometrics 32, "The analysis and selection of
    variables in linear regression"; Thompson 1978; from memory, checked by Monte Carlo in
    tests/test_cards.py); sigma^2 is estimated by train_loss x N / (N - d).

    >>> round(random_design_error(1.0, 28, 20), 3)   # the final prediction error gives 6
    13.464
    """
    if d + 1 >= n:
        raise CardError(
            f"the random-design estimate needs at least two more training rows than fitted parameters, "
            f"got training.count={n} and fitted_parameters={d}; add a 'holdout' loss to the card"
        )
    return train_loss * (n + 1) * (n - 2) / ((n - d) * (n - d - 1))


ESTIMATES = {"fpe": final_prediction_error, "random_design": random_design_error}


def expected_loss(card: ModelCard) -> tuple[float, str]:
    """The loss to expect on new data and where it comes from (``holdout``, ``fpe`` or
    ``random_design``, the card's ``expected_loss_estimate``)."""
    if card.holdout is not None:
        return card.holdout.loss, "holdout"
    if card.loss == "squared" and card.least_squares:
        if card.fitted_parameters is None:
            raise CardError(
                f"card for model '{card.model_id}' has no 'holdout' loss and no fitted_parameters: the final "
                "prediction error needs the count of fitted parameters; add fitted_parameters, or a 'holdout' loss "
                "(build the card with --params D, or with --holdout HOLDOUT.csv)"
            )
        how = card.expected_loss_estimate
        return ESTIMATES[how](card.training.loss, card.training.count, card.fitted_parameters), how
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
