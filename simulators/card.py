"""The model card the simulator writes at "training time", computed here with numpy."""

from __future__ import annotations

import numpy as np

from watchdog_edge.core.cards import FeatureProfile, LossFigure, ModelCard, TargetRange
from watchdog_edge.files.cardbuild import mean_loss, quantile_histogram

from .fit import PolynomialModel


def build_card(
    model: PolynomialModel,
    model_id: str,
    version: str,
    loss: str,
    x_train: np.ndarray,
    y_train: np.ndarray,
    x_hold: np.ndarray | None = None,
    y_hold: np.ndarray | None = None,
    notes: str | None = None,
) -> ModelCard:
    """A card from the training rows (and optional holdout rows) of a least-squares fit."""
    features = {}
    for j, name in enumerate(model.features):
        col = x_train[:, j]
        features[name] = FeatureProfile(
            min=float(np.nanmin(col)), max=float(np.nanmax(col)), histogram=quantile_histogram(col)
        )
    holdout = None
    if x_hold is not None and y_hold is not None and len(y_hold):
        holdout = LossFigure(loss=mean_loss(y_hold, model.predict(x_hold), loss), count=len(y_hold))
    return ModelCard(
        model_id=model_id,
        model_version=version,
        loss=loss,
        training=LossFigure(loss=mean_loss(y_train, model.predict(x_train), loss), count=len(y_train)),
        fitted_parameters=model.parameters,
        least_squares=True,
        holdout=holdout,
        features=features,
        target=TargetRange(min=float(np.min(y_train)), max=float(np.max(y_train))),
        notes=notes,
    )
