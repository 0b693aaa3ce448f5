"""Building a model card from training rows: losses, training range, histograms, hold-out, cautions.

``card_from_arrays`` does the computation; ``build_card`` reads the rows from CSV files first;
``render_card`` shows a card as text and ``card_cautions`` says what the card leaves the
checks unable to do. Row numbers in messages count as a spreadsheet does: the header is row
1, the first data row is row 2.
"""

from __future__ import annotations

import csv
import math
from collections.abc import Collection, Sequence
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from watchdog_edge.core.cards import (
    Estimate,
    FeatureProfile,
    Histogram,
    LossFigure,
    ModelCard,
    TargetRange,
    expected_loss,
    final_prediction_error,
    random_design_error,
)
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.range import RangeCheck, RangeSettings
from watchdog_edge.core.checks.shift import ShiftCheck, ShiftSettings
from watchdog_edge.errors import CardError, DataError

# Cautions: the expected field loss this many times the training loss or more is "high d/N".
HIGH_OPTIMISM = 1.5
# range is of little use where a fifth of the inputs leaving the range is not significant.
RANGE_EXCURSION = 0.2

LOSS_KINDS = ("squared", "absolute")
# Cell texts read as missing: the empty cell, and the "nan" that numpy and many tools write.
_MISSING = frozenset({"", "nan"})


def _check_loss(kind: str) -> None:
    if kind not in LOSS_KINDS:
        raise CardError(f"loss {kind!r} is not known; use 'squared' or 'absolute'")


def mean_loss(y: np.ndarray, yhat: np.ndarray, kind: str) -> float:
    """Mean squared or absolute error of ``yhat`` against ``y``.

    >>> mean_loss(np.array([1.0, 2.0]), np.array([0.0, 4.0]), "squared")
    2.5
    """
    _check_loss(kind)
    e = np.asarray(y, dtype=float) - np.asarray(yhat, dtype=float)
    return float(np.mean(e * e)) if kind == "squared" else float(np.mean(np.abs(e)))


def quantile_histogram(values: np.ndarray, bins: int = 10) -> Histogram:
    """Bins cut at training quantiles (ties merged), shares counted with open outer bins.

    A constant feature gets one bin with two equal edges (the schema allows it).

    >>> quantile_histogram(np.arange(100.0), bins=4).shares
    [0.25, 0.25, 0.25, 0.25]
    """
    if bins < 1:
        raise CardError(f"bins must be at least 1, got {bins}")
    v = np.asarray(values, dtype=float)
    missing = np.isnan(v)
    present = v[~missing]
    if present.size == 0:
        raise DataError("a feature with no values has no histogram; leave it out of the features")
    edges = np.unique(np.quantile(present, np.linspace(0.0, 1.0, bins + 1)))
    if edges.size < 2:
        edges = np.array([edges[0], edges[0]])
    # Bin i is [edges[i], edges[i+1]); searching only the inner edges opens the two outer bins.
    idx = np.searchsorted(edges[1:-1], present, side="right")
    counts = np.bincount(idx, minlength=edges.size - 1)
    return Histogram(
        edges=[float(e) for e in edges], shares=[float(c) / present.size for c in counts], missing=float(missing.mean())
    )


def value_histogram(values: np.ndarray, bins: int = 10) -> Histogram | None:
    """One bin per value for a feature with few distinct values, else None.

    Few means at most ``bins`` distinct values, each seen twice on average or more (so a
    continuous feature measured on a handful of rows keeps quantile bins).

    >>> value_histogram(np.array([0, 1, 1, 0, 1, 1.0])).shares
    [0.3333333333333333, 0.6666666666666666]
    >>> value_histogram(np.arange(50.0)) is None
    True
    """
    v = np.asarray(values, dtype=float)
    missing = np.isnan(v)
    present = v[~missing]
    if present.size == 0:
        return None
    distinct, counts = np.unique(present, return_counts=True)
    if distinct.size > bins or 2 * distinct.size > present.size:
        return None
    return Histogram(
        values=[float(x) for x in distinct],
        shares=[float(c) / present.size for c in counts],
        missing=float(missing.mean()),
    )


def constant_loss(y: np.ndarray, kind: str) -> float:
    """Leave-one-out loss of predicting each training row by the mean (squared loss) or the
    median (absolute loss) of the other rows: what a model must beat.

    >>> constant_loss(np.array([1.0, 2.0, 3.0]), "squared")   # (1.5^2 + 0 + 1.5^2) / 3
    1.5
    """
    _check_loss(kind)
    y = np.asarray(y, dtype=float)
    n = y.size
    if kind == "squared":
        # y_i - mean of the others = (y_i - mean) n / (n - 1)
        return float(np.mean((y - y.mean()) ** 2) * (n / (n - 1)) ** 2)
    ys = np.sort(y)
    r = np.arange(n)  # the rank left out
    m = n - 1

    def kth(k: int) -> np.ndarray:  # the k-th smallest of the others, for every left-out rank
        return np.where(k < r, ys[k], ys[np.minimum(k + 1, n - 1)])

    med = kth((m - 1) // 2) if m % 2 else 0.5 * (kth(m // 2 - 1) + kth(m // 2))
    return float(np.mean(np.abs(ys - med)))


def card_from_arrays(
    *,
    model_id: str,
    x: dict[str, np.ndarray],
    y: np.ndarray,
    yhat: np.ndarray,
    params: int | None,
    loss: str = "squared",
    least_squares: bool = True,
    holdout: tuple[np.ndarray, np.ndarray] | None = None,
    version: str | None = None,
    bins: int = 10,
    notes: str | None = None,
    estimate: Estimate = "fpe",
    require_expected_loss: bool = True,
) -> ModelCard:
    """A card from training arrays (NaN = missing feature); ``holdout`` is ``(truth, prediction)``.

    Features with few distinct values get one bin per value (:func:`value_histogram`), the
    others quantile bins. A card from which no expected loss follows is refused unless
    ``require_expected_loss`` is False.
    """
    _check_loss(loss)
    if params is not None and params < 0:
        raise CardError(
            f"--params {params}: fitted parameters must be a count >= 0; give the model's coefficient count"
        )
    if bins < 1:
        raise CardError(f"bins must be at least 1, got {bins}")
    y = np.asarray(y, dtype=float)
    if y.size < 2:
        raise DataError(f"need at least 2 training rows, got {y.size}")
    if loss == "squared" and least_squares and holdout is None and params is None:
        raise CardError(
            "--params is missing: with least squares and no hold-out rows the expected loss is the final "
            "prediction error, which needs the number of fitted parameters; give --params D, or hold-out rows "
            "with --holdout HOLDOUT.csv"
        )
    if loss == "squared" and least_squares and holdout is None and params is not None and y.size <= params:
        raise DataError(
            f"{y.size} training rows for {params} fitted parameters: the final prediction error needs "
            "more rows than parameters (N > d); give hold-out rows (--holdout) or more training rows"
        )
    features = {}
    for name, col in x.items():
        col = np.asarray(col, dtype=float)
        present = col[~np.isnan(col)]
        if present.size == 0:
            raise DataError(f"feature column '{name}' has no values in any row; leave it out of --features")
        hist = value_histogram(col, bins) or quantile_histogram(col, bins)
        features[name] = FeatureProfile(min=float(present.min()), max=float(present.max()), histogram=hist)
    hold = None
    if holdout is not None:
        hy, hp = holdout
        if np.asarray(hy).size < 1:
            raise DataError("the hold-out rows are empty; give at least one row or leave out --holdout")
        hold = LossFigure(loss=mean_loss(hy, hp, loss), count=int(np.asarray(hy).size))
    card = ModelCard(
        model_id=model_id,
        model_version=version,
        loss=loss,
        training=LossFigure(loss=mean_loss(y, yhat, loss), count=int(y.size)),
        fitted_parameters=params,
        least_squares=least_squares,
        expected_loss_estimate=estimate,
        holdout=hold,
        features=features,
        target=TargetRange(min=float(y.min()), max=float(y.max()), constant_loss=constant_loss(y, loss)),
        created=datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        notes=notes,
    )
    if require_expected_loss:
        try:
            expected_loss(card)
        except CardError as e:
            raise CardError(
                f"{e}. The agent would refuse this card; to write it anyway (for a config that turns "
                "gap, drift and baseline off), pass --allow-no-expected-loss"
            ) from None
    return card


def _number(cell: str) -> float | None:
    """The cell's value, NaN when missing, None when the text is not a number."""
    s = cell.strip()
    if s.lower() in _MISSING:
        return math.nan
    try:
        return float(s)
    except ValueError:
        return None


def read_table(path: str | Path, numeric: Collection[str] | None = None) -> tuple[list[str], dict[str, np.ndarray]]:
    """Read a CSV with a header row into ``(columns, {column: array})``, one array per column.

    Columns named in ``numeric`` (every column when None) must hold numbers: an empty cell (or
    ``nan``) is missing and reads as NaN; other text raises DataError naming the file, column and
    row (header = row 1). Other columns come back as float arrays when all their cells are
    numbers or empty, else as text arrays (dtype object). Array index i is spreadsheet row i + 2.

    >>> import os, tempfile
    >>> p = os.path.join(tempfile.mkdtemp(), "t.csv")
    >>> _ = open(p, "w").write("a,b\\n1,2\\n3,\\n")
    >>> cols, data = read_table(p)
    >>> cols, data["a"].tolist(), bool(np.isnan(data["b"][1]))
    (['a', 'b'], [1.0, 3.0], True)
    """
    p = Path(path)
    try:
        with p.open(newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.reader(fh))
    except FileNotFoundError:
        raise DataError(f"CSV file not found: {p}") from None
    except IsADirectoryError:
        raise DataError(f"{p} is a folder, not a CSV file") from None
    except UnicodeDecodeError as e:
        raise DataError(f"{p} is not UTF-8 text (byte {e.start}); save the CSV as UTF-8") from None
    except csv.Error as e:
        raise DataError(f"{p} cannot be read as CSV: {e}") from None
    if not rows or not any(c.strip() for c in rows[0]):
        raise DataError(f"{p} has no header row; row 1 must name the columns")
    header = [h.strip() for h in rows[0]]
    if len(header) == 1 and ";" in header[0]:
        raise DataError(
            f"{p}: the header (row 1) reads as one column {header[0]!r}: the columns seem to be separated by "
            "';', and a CSV here is separated by ','; save the file with ',' between columns (and '.' as the "
            "decimal mark)"
        )
    for i, name in enumerate(header):
        if not name:
            raise DataError(f"{p}: column {i + 1} of the header (row 1) has no name")
        if name in header[:i]:
            raise DataError(f"{p}: column '{name}' appears twice in the header (row 1)")
    body = rows[1:]
    while body and not any(c.strip() for c in body[-1]):  # blank lines at the end are not rows
        body.pop()
    for i, cells in enumerate(body):
        if not any(c.strip() for c in cells):
            body[i] = [""] * len(header)  # a blank line inside the data: every cell missing
        elif len(cells) != len(header):
            raise DataError(
                f"{p}, row {i + 2}: {len(cells)} cells, but the header has {len(header)} columns ({', '.join(header)})"
            )
    strict = set(header) if numeric is None else set(numeric)
    data: dict[str, np.ndarray] = {}
    for j, name in enumerate(header):
        values = np.empty(len(body))
        text = False
        for i, cells in enumerate(body):
            v = _number(cells[j])
            if v is None:
                if name in strict:
                    raise DataError(
                        f"{p}, column '{name}', row {i + 2}: {cells[j]!r} is not a number; "
                        "fix the cell, or leave it empty where the value is missing"
                    )
                text = True
                break
            if math.isinf(v):
                raise DataError(f"{p}, column '{name}', row {i + 2}: {cells[j]!r} is not a finite number")
            values[i] = v
        data[name] = np.array([c[j].strip() for c in body], dtype=object) if text else values
    return header, data


def _require(path: str | Path, header: list[str], name: str, role: str) -> None:
    if name not in header:
        raise DataError(f"{path}: no {role} column '{name}'; the columns are {', '.join(header)}")


def _complete(path: str | Path, data: dict[str, np.ndarray], name: str) -> np.ndarray:
    col = data[name]
    gaps = np.flatnonzero(np.isnan(col))
    if gaps.size:
        raise DataError(
            f"{path}, column '{name}', row {gaps[0] + 2}: empty cell; the target and the "
            f"prediction need a value in every row ({gaps.size} empty)"
        )
    return col


def _default_features(
    path: str | Path, header: list[str], data: dict[str, np.ndarray], target: str, prediction: str
) -> list[str]:
    out = []
    for name in header:
        if name in (target, prediction) or name.lower() == "id":
            continue
        col = data[name]
        if col.dtype != object:
            out.append(name)
            continue
        numbers = [_number(c) for c in col]
        if any(v is not None and not math.isnan(v) for v in numbers):
            # Partly numbers: most likely a typo in a feature column, which must not vanish silently.
            i = next(k for k, v in enumerate(numbers) if v is None)
            raise DataError(
                f"{path}, column '{name}', row {i + 2}: {col[i]!r} is not a number in an "
                "otherwise numeric column; fix the cell, or list the feature columns "
                "with --features"
            )
    return out


def build_card(
    train_path: str | Path,
    *,
    target: str,
    prediction: str,
    params: int | None = None,
    features: Sequence[str] | None = None,
    loss: str = "squared",
    least_squares: bool = True,
    holdout_path: str | Path | None = None,
    model_id: str | None = None,
    version: str | None = None,
    bins: int = 10,
    estimate: Estimate = "fpe",
    require_expected_loss: bool = True,
) -> ModelCard:
    """A card from a CSV of training rows holding the target and the model's fitted prediction.

    ``features`` default to every other numeric column except one named ``id``; ``model_id``
    defaults to the training file's stem; ``holdout_path`` is a CSV with the same target and
    prediction columns.
    """
    _check_loss(loss)
    wanted = [target, prediction] + list(features or [])
    header, data = read_table(train_path, numeric=wanted)
    _require(train_path, header, target, "target")
    _require(train_path, header, prediction, "prediction")
    if features is None:
        features = _default_features(train_path, header, data, target, prediction)
    for f in features:
        _require(train_path, header, f, "feature")
    y = _complete(train_path, data, target)
    yhat = _complete(train_path, data, prediction)
    hold = None
    if holdout_path is not None:
        hh, hd = read_table(holdout_path, numeric=[target, prediction])
        _require(holdout_path, hh, target, "target")
        _require(holdout_path, hh, prediction, "prediction")
        if hd[target].size == 0:
            raise DataError(f"{holdout_path} has a header but no rows")
        hold = (_complete(holdout_path, hd, target), _complete(holdout_path, hd, prediction))
    return card_from_arrays(
        model_id=model_id or Path(train_path).stem,
        x={f: data[f] for f in features},
        y=y,
        yhat=yhat,
        params=params,
        loss=loss,
        least_squares=least_squares,
        holdout=hold,
        version=version,
        bins=bins,
        estimate=estimate,
        require_expected_loss=require_expected_loss,
    )


def card_cautions(card: ModelCard) -> list[str]:
    """What the card leaves the checks unable to do, one sentence each (``card build`` prints
    them as warnings, ``card show`` lists them); empty when there is nothing to say."""
    out = []
    n, d = card.training.count, card.fitted_parameters
    try:
        value, source = expected_loss(card)
    except CardError as e:
        out.append(f"no usable expected loss: {e}; gap, drift and baseline cannot run on this card")
        value, source = math.nan, ""
    train = card.training.loss
    if source and train > 0 and value / train >= HIGH_OPTIMISM:
        how = "the held-out loss" if source == "holdout" else _estimate_name(source)
        extra = ""
        if source == "fpe" and d is not None and d + 1 < n:
            extra = (
                f" (for inputs drawn anew, the random-design estimate puts it at "
                f"{random_design_error(train, n, d) / train:.3g} times)"
            )
        out.append(
            f"high d/N: {d if d is not None else 'an unknown number of'} fitted parameters on {n} rows; "
            f"{how} puts the field error at "
            f"{value / train:.3g} times the training error{extra}; the model is likely overfit and "
            "its expected loss uncertain: fit fewer parameters, add rows or give a hold-out set"
        )
    target = card.target
    if source and target is not None and target.constant_loss is not None and value >= target.constant_loss:
        out.append(
            f"the expected loss {value:.4g} is no better than predicting the training "
            f"{'mean' if card.loss == 'squared' else 'median'} ({target.constant_loss:.4g}): the model "
            "is not expected to beat a constant"
        )
    if card.features:
        ctx = CheckContext(card.model_id, card, card.loss, 1.0, "holdout")
        rng = RangeCheck(RangeSettings.model_validate({}), ctx)
        warning, _ = rng.limits(rng.settings.recent_predictions)
        if warning >= RANGE_EXCURSION:
            out.append(
                f"too few rows for range: from {rng.training_rows} rows and {len(card.features)} features, as many "
                f"as {rng.expected_share:.1%} of fair inputs fall outside the training range on average, so range "
                "raises "
                f"only above {warning:.1%} of its window and a fifth of the inputs leaving the range would "
                "go unseen (far-outside inputs are still raised at once); add training rows"
            )
        shift = ShiftCheck(ShiftSettings.model_validate({}), ctx)
        base = shift.settings
        blunt = {
            k: f * base.warning_index for k, f in shift.factors.items() if f * base.warning_index > base.critical_index
        }
        if blunt:
            worst = max(blunt, key=blunt.__getitem__)
            out.append(
                f"too few rows for shift: the card's histograms are estimated from few rows, so the index "
                f"must pass {blunt[worst]:.3g} ({worst}; {len(blunt)} of {len(shift.factors)} features above "
                f"the usual critical {base.critical_index:g}) before a move is told from chance; add training rows "
                "or build with fewer --bins"
            )
    return out


def _estimate_name(source: str) -> str:
    return "the final prediction error" if source == "fpe" else "the random-design estimate"


def render_card(card: ModelCard, expected: tuple[float, str] | None = None) -> str:
    """The card as readable text, with the expected field loss and where it comes from.

    ``expected`` is ``(value, source)`` as from ``expected_loss``; computed when not given.
    """
    g = ".6g"
    lines = [
        f"model card   {card.model_id}",
        f"  version            {card.model_version or '(none)'}",
        f"  loss kind          {card.loss} error",
        f"  training loss      {card.training.loss:{g}} over {card.training.count} rows",
        f"  fitted parameters  {card.fitted_parameters if card.fitted_parameters is not None else '(not given)'}",
        f"  least squares      {'yes' if card.least_squares else 'no'}",
    ]
    if card.holdout:
        lines.append(f"  held-out loss      {card.holdout.loss:{g}} over {card.holdout.count} rows")
    else:
        lines.append("  held-out loss      (none)")
    n, d, train = card.training.count, card.fitted_parameters, card.training.loss
    try:
        value, source = expected if expected is not None else expected_loss(card)
    except CardError as e:
        lines.append(f"  expected in field  unavailable: {e}")
    else:
        if source == "holdout":
            how = "the held-out loss"
        elif source == "fpe":
            how = (
                f"the training loss corrected for fitting (final prediction error), training loss x (N + d) / (N - d) = "
                f"{train:{g}} x ({n} + {d}) / ({n} - {d})"
            )
        else:
            how = (
                f"the random-design estimate, training loss x (N + 1)(N - 2) / ((N - d)(N - d - 1)) = "
                f"{train:{g}} x ({n} + 1)({n} - 2) / (({n} - {d})({n} - {d} - 1))"
            )
        lines.append(f"  expected in field  {value:{g}}, from {how}")
        if train > 0:
            lines.append(f"  optimism ratio     {value / train:.4g} (expected / training loss)")
        else:
            lines.append("  optimism ratio     undefined (the training loss is 0)")
    if card.loss == "squared" and card.least_squares and d is not None:
        # both estimates, whichever the card uses: they differ where d/N is high
        for name, fn in (("fpe", final_prediction_error), ("random_design", random_design_error)):
            try:
                est = f"{fn(train, n, d):{g}}"
            except CardError:
                est = "not defined for these N and d"
            chosen = "  (the card's choice without hold-out)" if name == card.expected_loss_estimate else ""
            label = "FPE (same inputs)" if name == "fpe" else "random design"
            lines.append(f"  {label:<19}{est}{chosen}")
    if card.target:
        lines.append(f"  target range       {card.target.min:{g}} .. {card.target.max:{g}}")
        if card.target.constant_loss is not None:
            const = "mean" if card.loss == "squared" else "median"
            lines.append(f"  constant's loss    {card.target.constant_loss:{g}} (predicting the training {const})")
    if card.features:
        width = max(7, *(len(n) for n in card.features))
        lines.append(f"  {'feature':<{width}}  {'min':>12}  {'max':>12}  {'bins':>9}  {'missing':>7}")
        for name, f in card.features.items():
            h = f.histogram
            nb = "-" if h is None else f"{h.bins} values" if h.values is not None else str(h.bins)
            miss = f"{h.missing:.1%}" if h else "-"
            lines.append(f"  {name:<{width}}  {f.min:>12{g}}  {f.max:>12{g}}  {nb:>9}  {miss:>7}")
    else:
        lines.append("  features           (none)")
    cautions = card_cautions(card)
    if cautions:
        lines.append("  cautions")
        lines.extend(f"  - {c}" for c in cautions)
    return "\n".join(lines)
