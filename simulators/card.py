"""The model card the simulator writes at "training time", computed here with numpy."""

from __future__ import annotations

import numpy as np

from watchdog_edge.cards import FeatureProfile, Histogram, LossFigure, ModelCard, TargetRange

from .fit import PolynomialModel


def mean_loss(y: np.ndarray, yhat: np.ndarray, kind: str) -> float:
    """Mean squared or absolute error."""
    e = np.asarray(y, dtype=float) - np.asarray(yhat, dtype=float)
    return float(np.mean(e * e) if kind == "squared" else np.mean(np.abs(e)))


def quantile_histogram(values: np.ndarray, bins: int = 10) -> Histogram:
    """Bins at training quantiles (ties merged), shares counted with the card's open outer bins.

    >>> h = quantile_histogram(np.arange(100.0), bins=4)
    >>> h.shares
    [0.25, 0.25, 0.25, 0.25]
    """
    v = np.asarray(values, dtype=float)
    missing = np.isnan(v)
    v = v[~missing]
    edges = np.unique(np.quantile(v, np.linspace(0.0, 1.0, bins + 1)))
    if len(edges) < 2:
        edges = np.array([edges[0] - 0.5, edges[0] + 0.5])
    # bin i is [edges[i], edges[i+1]) with the outer bins open: searchsorted on the inner edges
    idx = np.searchsorted(edges[1:-1], v, side="right")
    counts = np.bincount(idx, minlength=len(edges) - 1)
    shares = counts / max(1, len(v))
    return Histogram(edges=[float(e) for e in edges], shares=[float(s) for s in shares],
                     missing=float(missing.mean()) if len(missing) else 0.0)


def build_card(model: PolynomialModel, model_id: str, version: str, loss: str,
               x_train: np.ndarray, y_train: np.ndarray,
               x_hold: np.ndarray | None = None, y_hold: np.ndarray | None = None,
               notes: str | None = None) -> ModelCard:
    """A card from the training rows (and optional holdout rows) of a least-squares fit."""
    features = {}
    for j, name in enumerate(model.features):
        col = x_train[:, j]
        features[name] = FeatureProfile(min=float(np.nanmin(col)), max=float(np.nanmax(col)),
                                        histogram=quantile_histogram(col))
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
