"""Building cards from CSV: losses against scikit-learn, histograms against numpy, clear errors."""

import csv
import json

import numpy as np
import pytest
from sklearn.metrics import mean_absolute_error, mean_squared_error
from typer.testing import CliRunner

from watchdog_edge.cardbuild import build_card, quantile_histogram, render_card
from watchdog_edge.cli import app
from watchdog_edge.errors import DataError


def write(path, header, rows):
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(header)
        w.writerows(rows)
    return path


@pytest.fixture()
def rows():
    rng = np.random.default_rng(8)
    x1, x2 = rng.normal(20, 5, 300), rng.uniform(0, 1, 300)
    y = 1.5 * x1 + 3 * x2 + rng.normal(0, 1, 300)
    pred = 1.5 * x1 + 3 * x2
    return x1, x2, y, pred


def test_losses_and_counts_match_scikit_learn(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(tmp_path / "t.csv", ["id", "flow", "valve", "y", "p"],
                  [[i, a, b, c, d] for i, (a, b, c, d) in enumerate(zip(x1[:200], x2[:200], y[:200], pred[:200]))])
    hold = write(tmp_path / "h.csv", ["flow", "valve", "y", "p"], list(zip(x1[200:], x2[200:], y[200:], pred[200:])))
    card = build_card(train, target="y", prediction="p", params=3, holdout_path=hold)
    assert card.training.loss == pytest.approx(mean_squared_error(y[:200], pred[:200]), rel=1e-9)
    assert card.holdout.loss == pytest.approx(mean_squared_error(y[200:], pred[200:]), rel=1e-9)
    assert (card.training.count, card.holdout.count) == (200, 100)
    assert list(card.features) == ["flow", "valve"]  # default: other numeric columns, not the id
    assert card.model_id == "t"
    ab = build_card(train, target="y", prediction="p", params=3, loss="absolute", least_squares=False, holdout_path=hold)
    assert ab.training.loss == pytest.approx(mean_absolute_error(y[:200], pred[:200]), rel=1e-9)
    assert card.features["flow"].min == pytest.approx(x1[:200].min())


def test_histogram_edges_are_numpy_quantiles_and_shares_count_open_outer_bins():
    rng = np.random.default_rng(9)
    v = rng.gamma(2.0, 3.0, 5000)
    h = quantile_histogram(v, bins=8)
    np.testing.assert_allclose(h.edges, np.quantile(v, np.linspace(0, 1, 9)))
    counts, _ = np.histogram(v, bins=np.array(h.edges))  # numpy closes the last bin; same here since max is an edge
    np.testing.assert_allclose(h.shares, counts / v.size)
    with_missing = np.concatenate([v[:900], [np.nan] * 100])
    assert quantile_histogram(with_missing).missing == pytest.approx(0.1)


def test_errors_name_the_column_and_the_row(tmp_path):
    t = write(tmp_path / "t.csv", ["a", "y", "p"], [[1, 2, 3], [4, "five", 6], [7, 8, 9]])
    with pytest.raises(DataError, match=r"column 'y', row 3: 'five' is not a number"):
        build_card(t, target="y", prediction="p", params=1)
    with pytest.raises(DataError, match=r"no column 'truth'; the columns are a, y, p"):
        build_card(t, target="truth", prediction="p", params=1)
    e = write(tmp_path / "e.csv", ["a", "y", "p"], [[1, "", 3], [2, 2, 2], [3, 3, 3]])
    with pytest.raises(DataError, match=r"column 'y', row 2: empty cell"):
        build_card(e, target="y", prediction="p", params=1)
    few = write(tmp_path / "few.csv", ["a", "y", "p"], [[1, 2, 3], [4, 5, 6], [7, 8, 9]])
    with pytest.raises(DataError, match=r"N > d"):
        build_card(few, target="y", prediction="p", params=3)


def test_cli_build_then_show(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(tmp_path / "train.csv", ["flow", "valve", "y", "p"], list(zip(x1, x2, y, pred)))
    out = tmp_path / "card.json"
    r = CliRunner().invoke(app, ["card", "build", str(train), "--target", "y", "--prediction", "p", "--params", "3",
                                 "--features", "flow", "--id", "pump-7", "--version", "1.2", "-o", str(out)])
    assert r.exit_code == 0, r.output
    data = json.loads(out.read_text())
    assert data["model_id"] == "pump-7" and list(data["features"]) == ["flow"]
    r = CliRunner().invoke(app, ["card", "show", str(out)])
    assert r.exit_code == 0
    assert "final prediction error" in r.output and "(300 + 3) / (300 - 3)" in r.output
    r = CliRunner().invoke(app, ["card", "build", str(train), "--target", "nope", "--prediction", "p",
                                 "--params", "3", "-o", str(out)])
    assert r.exit_code == 2 and "no column 'nope'" in r.output


def test_render_says_when_no_expected_loss_can_be_given(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(tmp_path / "train.csv", ["flow", "y", "p"], list(zip(x1, y, pred)))
    card = build_card(train, target="y", prediction="p", params=2, loss="absolute")
    assert "unavailable" in render_card(card) and "holdout" in render_card(card)
