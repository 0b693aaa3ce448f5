"""Building a model card from training rows: losses, envelope, quantile histograms, hold-out.

``card_from_arrays`` does the computation; ``build_card`` reads the rows from CSV files first.
"""

from __future__ import annotations

import csv
import math
from datetime import datetime, timezone
from pathlib import Path
from typing import Sequence

import numpy as np

from .cards import FeatureProfile, Histogram, LossFigure, ModelCard, TargetRange
from .errors import DataError


def mean_loss(y: np.ndarray, yhat: np.ndarray, kind: str) -> float:
    """Mean squared or absolute error of ``yhat`` against ``y``.

    >>> mean_loss(np.array([1.0, 2.0]), np.array([0.0, 4.0]), "squared")
    2.5
    """
    e = np.asarray(y, dtype=float) - np.asarray(yhat, dtype=float)
    if kind == "squared":
        return float(np.mean(e * e))
    if kind == "absolute":
        return float(np.mean(np.abs(e)))
    raise DataError(f"loss {kind!r} is not known; use 'squared' or 'absolute'")


def quantile_histogram(values: np.ndarray, bins: int = 10) -> Histogram:
    """Bins cut at training quantiles (ties merged), shares counted with open outer bins.

    >>> quantile_histogram(np.arange(100.0), bins=4).shares
    [0.25, 0.25, 0.25, 0.25]
    """
    v = np.asarray(values, dtype=float)
    missing = np.isnan(v)
    present = v[~missing]
    if present.size == 0:
        return Histogram(edges=[0.0, 1.0], shares=[1.0], missing=1.0)
    edges = np.unique(np.quantile(present, np.linspace(0.0, 1.0, bins + 1)))
    if edges.size < 2:  # a constant feature: one bin around its value
        edges = np.array([edges[0] - 0.5, edges[0] + 0.5])
    # bin i is [edges[i], edges[i+1]); searching the inner edges opens the two outer bins
    idx = np.searchsorted(edges[1:-1], present, side="right")
    counts = np.bincount(idx, minlength=edges.size - 1)
    return Histogram(edges=[float(e) for e in edges], shares=[float(c) / present.size for c in counts],
                     missing=float(missing.mean()))


def card_from_arrays(*, model_id: str, x: dict[str, np.ndarray], y: np.ndarray, yhat: np.ndarray,
                     params: int, loss: str = "squared", least_squares: bool = True,
                     holdout: tuple[np.ndarray, np.ndarray] | None = None, version: str | None = None,
                     bins: int = 10, notes: str | None = None) -> ModelCard:
    """A card from training arrays; ``holdout`` is ``(truth, prediction)`` of held-out rows."""
    y = np.asarray(y, dtype=float)
    if y.size < 2:
        raise DataError(f"need at least 2 training rows, got {y.size}")
    if least_squares and holdout is None and y.size <= params:
        raise DataError(
            f"{y.size} training rows for {params} fitted parameters: the final prediction error needs "
            "more rows than parameters (N > d); add --holdout rows or more training rows")
    features = {}
    for name, col in x.items():
        col = np.asarray(col, dtype=float)
        present = col[~np.isnan(col)]
        if present.size == 0:
            raise DataError(f"feature column {name!r} has no values; leave it out with --features")
        features[name] = FeatureProfile(min=float(present.min()), max=float(present.max()),
                                        histogram=quantile_histogram(col, bins))
    hold = None
    if holdout is not None:
        hy, hp = holdout
        hold = LossFigure(loss=mean_loss(hy, hp, loss), count=int(np.asarray(hy).size))
    return ModelCard(
        model_id=model_id, model_version=version, loss=loss,
        training=LossFigure(loss=mean_loss(y, yhat, loss), count=int(y.size)),
        fitted_parameters=params, least_squares=least_squares, holdout=hold, features=features,
        target=TargetRange(min=float(y.min()), max=float(y.max())),
        created=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"), notes=notes,
    )


def read_table(path: str | Path) -> tuple[list[str], list[list[str]]]:
    """Header and rows of a CSV file; errors name the file."""
    p = Path(path)
    try:
        with p.open(newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except FileNotFoundError:
        raise DataError(f"CSV file not found: {p}") from None
    if not rows:
        raise DataError(f"{p} is empty; it needs a header row and data rows")
    header = [h.strip() for h in rows[0]]
    return header, rows[1:]


def column(path: str | Path, header: list[str], rows: list[list[str]], name: str,
           allow_missing: bool) -> np.ndarray:
    """One numeric column; an empty cell is NaN where allowed; a bad cell names column and row."""
    if name not in header:
        raise DataError(f"{path}: no column {name!r}; the columns are {', '.join(header)}")
    j = header.index(name)
    out = np.empty(len(rows))
    for i, row in enumerate(rows):
        cell = row[j].strip() if j < len(row) else ""
        where = f"{path}, column {name!r}, row {i + 2}"  # row 1 is the header, as a spreadsheet shows it
        if cell == "":
            if not allow_missing:
                raise DataError(f"{where}: empty cell; the target and prediction need a value in every row")
            out[i] = math.nan
            continue
        try:
            v = float(cell)
        except ValueError:
            raise DataError(f"{where}: {cell!r} is not a number") from None
        if not math.isfinite(v):
            raise DataError(f"{where}: {cell!r} is not a finite number")
        out[i] = v
    return out


def _numeric(header: list[str], rows: list[list[str]], name: str) -> bool:
    j = header.index(name)
    seen = False
    for row in rows[:200]:
        cell = row[j].strip() if j < len(row) else ""
        if cell:
            try:
                float(cell)
            except ValueError:
                return False
            seen = True
    return seen


def build_card(train_path: str | Path, *, target: str, prediction: str, params: int,
               features: Sequence[str] | None = None, loss: str = "squared", least_squares: bool = True,
               holdout_path: str | Path | None = None, model_id: str | None = None,
               version: str | None = None, bins: int = 10) -> ModelCard:
    """A card from a CSV of training rows with the model's fitted predictions on them."""
    if loss not in ("squared", "absolute"):
        raise DataError(f"loss {loss!r} is not known; use 'squared' or 'absolute'")
    if params < 0:
        raise DataError(f"--params must be the number of fitted parameters (>= 0), got {params}")
    header, rows = read_table(train_path)
    if features is None:
        features = [h for h in header if h not in (target, prediction) and h.lower() != "id" and _numeric(header, rows, h)]
    y = column(train_path, header, rows, target, allow_missing=False)
    yhat = column(train_path, header, rows, prediction, allow_missing=False)
    x = {f: column(train_path, header, rows, f, allow_missing=True) for f in features}
    hold = None
    if holdout_path is not None:
        hh, hr = read_table(holdout_path)
        if not hr:
            raise DataError(f"{holdout_path} has a header but no rows")
        hold = (column(holdout_path, hh, hr, target, allow_missing=False),
                column(holdout_path, hh, hr, prediction, allow_missing=False))
    return card_from_arrays(model_id=model_id or Path(train_path).stem, x=x, y=y, yhat=yhat, params=params,
                            loss=loss, least_squares=least_squares, holdout=hold, version=version, bins=bins)


def render_card(card: ModelCard) -> str:
    """The card as readable text, with the expected field loss and where it comes from."""
    from .cards import expected_loss
    from .errors import CardError

    lines = [f"model card: {card.model_id}" + (f"  version {card.model_version}" if card.model_version else "")]
    lines.append(f"  loss kind          {card.loss} error")
    lines.append(f"  training loss      {card.training.loss:.6g} over {card.training.count} rows")
    lines.append(f"  fitted parameters  {card.fitted_parameters}  ({'least squares' if card.least_squares else 'not least squares'})")
    if card.holdout:
        lines.append(f"  held-out loss      {card.holdout.loss:.6g} over {card.holdout.count} rows")
    try:
        exp, src = expected_loss(card)
        if src == "holdout":
            how = "the held-out loss"
        else:
            n, d = card.training.count, card.fitted_parameters
            how = f"final prediction error: {card.training.loss:.4g} x ({n} + {d}) / ({n} - {d})"
        ratio = exp / card.training.loss if card.training.loss > 0 else math.inf
        lines.append(f"  expected in field  {exp:.6g}  from {how}; {ratio:.3g} x the training loss")
    except CardError as e:
        lines.append(f"  expected in field  unavailable: {e}")
    if card.target:
        lines.append(f"  target range       {card.target.min:.6g} .. {card.target.max:.6g}")
    if card.features:
        lines.append("  features:")
        width = max(len(n) for n in card.features)
        for name, f in card.features.items():
            h = f.histogram
            extra = f", {len(h.shares)} bins, {h.missing:.1%} missing" if h else ""
            lines.append(f"    {name:<{width}}  {f.min:.6g} .. {f.max:.6g}{extra}")
    return "\n".join(lines)
