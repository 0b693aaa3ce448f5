"""Building cards from CSV: losses against scikit-learn, histograms against numpy, clear errors."""

import csv
import json

import numpy as np
import pytest
import typer
from sklearn.metrics import mean_absolute_error, mean_squared_error
from typer.testing import CliRunner

from watchdog_edge.cli.card import app as card_app
from watchdog_edge.core.cards import expected_loss
from watchdog_edge.errors import CardError, DataError
from watchdog_edge.files.cardbuild import (
    build_card,
    card_cautions,
    card_from_arrays,
    constant_loss,
    quantile_histogram,
    read_table,
    render_card,
    value_histogram,
)
from watchdog_edge.files.cardfile import load_card

cli = typer.Typer()
cli.add_typer(card_app, name="card")


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
    pred = 1.5 * x1 + 3 * x2 + 0.2
    return x1, x2, y, pred


@pytest.fixture()
def files(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(
        tmp_path / "t.csv",
        ["id", "flow", "site", "valve", "y", "p"],
        [[i, a, "north", b, c, d] for i, (a, b, c, d) in enumerate(zip(x1[:200], x2[:200], y[:200], pred[:200]))],
    )
    hold = write(tmp_path / "h.csv", ["flow", "y", "p"], list(zip(x1[200:], y[200:], pred[200:])))
    return train, hold


def test_read_table_gives_one_array_per_column_and_nan_for_empty(tmp_path):
    t = write(tmp_path / "t.csv", ["a", "b", "tag"], [[1, 2.5, "x"], [3, "", "y"], ["", "nan", "z"]])
    cols, data = read_table(t, numeric=["a", "b"])
    assert cols == ["a", "b", "tag"]
    np.testing.assert_array_equal(data["a"], [1.0, 3.0, np.nan])
    np.testing.assert_array_equal(data["b"], [2.5, np.nan, np.nan])
    assert data["tag"].tolist() == ["x", "y", "z"]  # not asked to be numeric: kept as text
    with pytest.raises(DataError, match=r"t\.csv, column 'tag', row 2: 'x' is not a number"):
        read_table(t)  # every column numeric by default


def test_read_table_rejects_ragged_rows_and_ignores_trailing_blank_lines(tmp_path):
    t = tmp_path / "t.csv"
    t.write_text("a,b\n1,2\n3,4\n\n\n")
    assert read_table(t)[1]["a"].tolist() == [1.0, 3.0]
    t.write_text("a,b\n1,2\n3,4,5\n")
    with pytest.raises(DataError, match=r"row 3: 3 cells, but the header has 2 columns \(a, b\)"):
        read_table(t)
    with pytest.raises(DataError, match="not found"):
        read_table(tmp_path / "nothing.csv")
    t.write_text("")
    with pytest.raises(DataError, match="no header row"):
        read_table(t)


def test_losses_and_counts_match_numpy_and_scikit_learn(files, rows):
    x1, x2, y, pred = rows
    train, hold = files
    card = build_card(train, target="y", prediction="p", params=3, holdout_path=hold)
    # External reference: scikit-learn's metrics, and the plain numpy mean.
    assert card.training.loss == pytest.approx(mean_squared_error(y[:200], pred[:200]), rel=1e-12)
    assert card.training.loss == pytest.approx(np.mean((y[:200] - pred[:200]) ** 2), rel=1e-12)
    assert card.holdout.loss == pytest.approx(mean_squared_error(y[200:], pred[200:]), rel=1e-12)
    assert (card.training.count, card.holdout.count) == (200, 100)
    assert expected_loss(card) == (card.holdout.loss, "holdout")
    ab = build_card(
        train, target="y", prediction="p", params=3, loss="absolute", least_squares=False, holdout_path=hold
    )
    assert ab.loss == "absolute"
    assert ab.training.loss == pytest.approx(mean_absolute_error(y[:200], pred[:200]), rel=1e-12)
    assert ab.holdout.loss == pytest.approx(np.mean(np.abs(y[200:] - pred[200:])), rel=1e-12)
    assert (card.target.min, card.target.max) == (pytest.approx(y[:200].min()), pytest.approx(y[:200].max()))


def test_defaults_features_id_and_training_range(files, rows):
    x1, x2, y, pred = rows
    train, _ = files
    card = build_card(train, target="y", prediction="p", params=3)
    # other numeric columns only: not the id, not the text column, not target or prediction
    assert list(card.features) == ["flow", "valve"]
    assert card.model_id == "t" and card.model_version is None
    assert card.features["flow"].min == pytest.approx(x1[:200].min())
    assert card.features["valve"].max == pytest.approx(x2[:200].max())
    chosen = build_card(
        train, target="y", prediction="p", params=3, features=["valve"], model_id="pump-7", version="1.2", bins=4
    )
    assert list(chosen.features) == ["valve"] and chosen.model_id == "pump-7" and chosen.model_version == "1.2"
    assert len(chosen.features["valve"].histogram.shares) == 4


def test_histogram_edges_are_numpy_quantiles_and_shares_match_numpy_histogram():
    rng = np.random.default_rng(9)
    v = rng.gamma(2.0, 3.0, 5000)
    h = quantile_histogram(v, bins=8)
    np.testing.assert_allclose(h.edges, np.quantile(v, np.linspace(0, 1, 9)), rtol=0, atol=0)
    # numpy.histogram's bins are [e_i, e_i+1) with the last one closed; ours open the outer
    # bins. On training data every value lies in [min, max] = [e_0, e_k], so counts agree.
    counts, _ = np.histogram(v, bins=np.array(h.edges))
    np.testing.assert_allclose(h.shares, counts / v.size, rtol=0, atol=1e-15)
    with_missing = np.concatenate([v[:900], [np.nan] * 100])
    hm = quantile_histogram(with_missing, bins=8)
    assert hm.missing == pytest.approx(0.1)
    counts, _ = np.histogram(v[:900], bins=np.array(hm.edges))
    np.testing.assert_allclose(hm.shares, counts / 900)  # shares are among the non-missing values


def test_tied_quantiles_are_merged_and_a_constant_feature_gets_one_bin():
    v = np.array([0.0] * 70 + list(np.linspace(1, 3, 30)))
    h = quantile_histogram(v, bins=10)
    q = np.quantile(v, np.linspace(0, 1, 11))
    np.testing.assert_array_equal(h.edges, np.unique(q))
    assert all(b > a for a, b in zip(h.edges, h.edges[1:]))
    assert len(h.shares) == len(h.edges) - 1 < 10
    assert h.shares[0] == pytest.approx(0.7)  # all the zeros sit in the first bin
    counts, _ = np.histogram(v, bins=np.array(h.edges))
    np.testing.assert_allclose(h.shares, counts / v.size)
    c = quantile_histogram(np.full(50, 4.2), bins=10)
    assert c.edges == [4.2, 4.2] and c.shares == [1.0]


def test_errors_name_the_column_and_the_row(tmp_path):
    t = write(tmp_path / "t.csv", ["a", "y", "p"], [[1, 2, 3], [4, "five", 6], [7, 8, 9]])
    with pytest.raises(DataError, match=r"t\.csv, column 'y', row 3: 'five' is not a number"):
        build_card(t, target="y", prediction="p", params=1)
    with pytest.raises(DataError, match=r"no target column 'truth'; the columns are a, y, p"):
        build_card(t, target="truth", prediction="p", params=1)
    with pytest.raises(DataError, match=r"no feature column 'b'; the columns are a, y, p"):
        build_card(t, target="p", prediction="a", params=1, features=["b"])
    e = write(tmp_path / "e.csv", ["a", "y", "p"], [[1, 1, 3], [2, 2, 2], [3, 3, ""]])
    with pytest.raises(DataError, match=r"e\.csv, column 'p', row 4: empty cell"):
        build_card(e, target="y", prediction="p", params=1)
    typo = write(tmp_path / "typo.csv", ["a", "y", "p"], [[1, 1, 1], ["1,5", 2, 2], [3, 3, 3]])
    with pytest.raises(DataError, match=r"column 'a', row 3: '1,5' is not a number.*--features"):
        build_card(typo, target="y", prediction="p", params=1)
    few = write(tmp_path / "few.csv", ["a", "y", "p"], [[1, 2, 3], [4, 5, 6], [7, 8, 9]])
    with pytest.raises(DataError, match=r"3 training rows for 3 fitted parameters.*N > d"):
        build_card(few, target="y", prediction="p", params=3)
    one = write(tmp_path / "one.csv", ["y", "p"], [[1, 2]])
    with pytest.raises(DataError, match="at least 2 training rows, got 1"):
        build_card(one, target="y", prediction="p", params=0)
    with pytest.raises(CardError, match=r"loss 'huber' is not known; use 'squared' or 'absolute'"):
        build_card(few, target="y", prediction="p", params=1, loss="huber")
    empty = write(tmp_path / "empty.csv", ["a", "y", "p"], [["", 1, 1], ["", 2, 2]])
    with pytest.raises(DataError, match="feature column 'a' has no values"):
        build_card(empty, target="y", prediction="p", params=1)


def test_few_rows_are_fine_with_a_holdout_and_holdout_errors_name_the_file(tmp_path):
    few = write(tmp_path / "few.csv", ["y", "p"], [[1, 1.5], [2, 2.5], [3, 2.0]])
    hold = write(tmp_path / "hold.csv", ["y", "p"], [[1, 2], [2, 2]])
    card = build_card(few, target="y", prediction="p", params=3, holdout_path=hold)
    assert card.holdout.loss == pytest.approx(0.5) and card.holdout.count == 2
    bad = write(tmp_path / "bad.csv", ["y", "pred"], [[1, 2]])
    with pytest.raises(DataError, match=r"bad\.csv: no prediction column 'p'; the columns are y, pred"):
        build_card(few, target="y", prediction="p", params=1, holdout_path=bad)
    gap = write(tmp_path / "gap.csv", ["y", "p"], [[1, 2], ["", 2]])
    with pytest.raises(DataError, match=r"gap\.csv, column 'y', row 3: empty cell"):
        build_card(few, target="y", prediction="p", params=1, holdout_path=gap)


def test_feature_missing_share_and_render_table(tmp_path):
    t = write(tmp_path / "t.csv", ["temp", "y", "p"], [["" if i % 4 == 0 else i, i, i + 1] for i in range(40)])
    card = build_card(t, target="y", prediction="p", params=2)
    h = card.features["temp"].histogram
    assert h.missing == pytest.approx(0.25)
    text = render_card(card)
    assert "25.0%" in text and "temp" in text and "feature" in text and "missing" in text
    assert "least squares      yes" in text and "(none)" in text  # no hold-out


def test_cli_build_then_show_round_trip(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(tmp_path / "train.csv", ["flow", "valve", "y", "p"], list(zip(x1, x2, y, pred)))
    out = tmp_path / "card.json"
    r = CliRunner().invoke(
        cli,
        [
            "card",
            "build",
            str(train),
            "--target",
            "y",
            "--prediction",
            "p",
            "--params",
            "3",
            "--features",
            "flow",
            "--id",
            "pump-7",
            "--version",
            "1.2",
            "--bins",
            "5",
            "-o",
            str(out),
        ],
    )
    assert r.exit_code == 0, r.output
    data = json.loads(out.read_text())
    assert data["model_id"] == "pump-7" and data["model_version"] == "1.2" and list(data["features"]) == ["flow"]
    assert len(data["features"]["flow"]["histogram"]["shares"]) == 5
    card = load_card(out)
    assert card.training.loss == pytest.approx(mean_squared_error(y, pred), rel=1e-12)
    r = CliRunner().invoke(cli, ["card", "show", str(out)])
    assert r.exit_code == 0, r.output
    fpe = card.training.loss * 303 / 297  # Akaike's final prediction error, N = 300, d = 3
    assert f"{fpe:.6g}" in r.stdout
    assert "final prediction error" in r.stdout and "(300 + 3) / (300 - 3)" in r.stdout
    assert f"{fpe / card.training.loss:.4g}" in r.stdout  # optimism ratio


def test_cli_show_with_holdout_prints_its_loss(tmp_path, files):
    train, hold = files
    out = tmp_path / "c.json"
    r = CliRunner().invoke(
        cli,
        [
            "card",
            "build",
            str(train),
            "--target",
            "y",
            "--prediction",
            "p",
            "--params",
            "3",
            "--loss",
            "absolute",
            "--not-least-squares",
            "--holdout",
            str(hold),
            "-o",
            str(out),
        ],
    )
    assert r.exit_code == 0, r.output
    card = load_card(out)
    assert card.loss == "absolute" and card.least_squares is False
    r = CliRunner().invoke(cli, ["card", "show", str(out)])
    assert f"expected in field  {card.holdout.loss:.6g}, from the held-out loss" in r.stdout


def test_cli_errors_are_one_line_on_stderr_with_exit_code_2(tmp_path, files):
    train, _ = files
    out = tmp_path / "card.json"
    r = CliRunner().invoke(
        cli, ["card", "build", str(train), "--target", "nope", "--prediction", "p", "--params", "3", "-o", str(out)]
    )
    assert r.exit_code == 2 and r.stdout == ""
    assert r.stderr.count("\n") == 1 and "no target column 'nope'" in r.stderr
    assert "Traceback" not in r.output and not out.exists()
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps({"model_id": "m", "training": {"loss": -1, "count": 5}, "colour": 1}))
    r = CliRunner().invoke(cli, ["card", "show", str(bad)])
    assert r.exit_code == 2 and r.stderr.count("\n") == 1
    assert "training.loss" in r.stderr and "colour = 1: unknown key" in r.stderr


def test_render_says_when_no_expected_loss_can_be_given(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(tmp_path / "train.csv", ["flow", "y", "p"], list(zip(x1, y, pred)))
    with pytest.raises(CardError, match="--allow-no-expected-loss"):
        build_card(train, target="y", prediction="p", params=2, loss="absolute")
    card = build_card(train, target="y", prediction="p", params=2, loss="absolute", require_expected_loss=False)
    text = render_card(card)
    assert "expected in field  unavailable" in text and "holdout" in text
    assert "- no usable expected loss" in text
    assert "expected in field  7, from the held-out loss" in render_card(card, expected=(7.0, "holdout"))


def test_params_is_needed_only_for_the_final_prediction_error(tmp_path, files):
    train, hold = files
    base = ["card", "build", str(train), "--target", "y", "--prediction", "p", "--features", "flow"]
    # not least squares, with hold-out rows: --params means nothing and is not asked for
    out = tmp_path / "a.json"
    r = CliRunner().invoke(cli, [*base, "--not-least-squares", "--holdout", str(hold), "-o", str(out)])
    assert r.exit_code == 0, r.output
    assert load_card(out).fitted_parameters is None and "fitted parameters  (not given)" in r.stdout
    # least squares with hold-out rows: the held-out loss is used, --params is not needed either
    r = CliRunner().invoke(cli, [*base, "--holdout", str(hold), "-o", str(tmp_path / "b.json")])
    assert r.exit_code == 0, r.output
    # least squares without hold-out: the final prediction error needs it, and the error says so
    r = CliRunner().invoke(cli, [*base, "-o", str(tmp_path / "c.json")])
    assert r.exit_code == 2
    assert "--params is missing" in r.stderr and "give --params D" in r.stderr


def test_a_semicolon_separated_file_gets_the_separator_named(tmp_path):
    p = tmp_path / "semi.csv"
    p.write_text("flow;y;p\n1,5;2;2,1\n")
    with pytest.raises(DataError, match=r"separated by ';', and a CSV here is separated by ','"):
        read_table(p)


def test_features_with_few_values_get_one_bin_per_value():
    rng = np.random.default_rng(2)
    switch = (rng.uniform(size=400) < 0.45).astype(float)
    mode = rng.choice([1.0, 2.0, 5.0], size=400, p=[0.2, 0.5, 0.3])
    mode[:40] = np.nan
    smooth = rng.normal(size=400)
    y = smooth + switch
    card = card_from_arrays(model_id="m", x={"switch": switch, "mode": mode, "t": smooth}, y=y, yhat=y, params=3)
    h = card.features["switch"].histogram
    assert h.values == [0.0, 1.0] and h.edges is None
    assert h.shares == pytest.approx([1 - switch.mean(), switch.mean()])
    hm = card.features["mode"].histogram
    assert hm.values == [1.0, 2.0, 5.0] and hm.missing == pytest.approx(0.1)
    np.testing.assert_allclose(hm.shares, [np.mean(mode[40:] == v) for v in (1, 2, 5)])
    assert card.features["t"].histogram.values is None  # continuous: quantile bins
    # a continuous feature on a handful of rows keeps quantile bins; more values than bins too
    assert value_histogram(np.arange(8.0)) is None and value_histogram(np.arange(12.0).repeat(3)) is None
    assert "2 values" in render_card(card)


def test_constant_loss_is_the_leave_one_out_loss_of_the_mean_or_median():
    # Outside check: brute-force leave-one-out with numpy (mean and median of the other rows).
    rng = np.random.default_rng(6)
    for n in (2, 3, 8, 31):
        y = rng.gamma(2.0, 1.0, n)
        others = [np.delete(y, i) for i in range(n)]
        sq = np.mean([(y[i] - o.mean()) ** 2 for i, o in enumerate(others)])
        ab = np.mean([abs(y[i] - np.median(o)) for i, o in enumerate(others)])
        assert constant_loss(y, "squared") == pytest.approx(sq, rel=1e-12)
        assert constant_loss(y, "absolute") == pytest.approx(ab, rel=1e-12)


def build_args(train, out, *extra):
    return ["card", "build", str(train), "--target", "y", "--prediction", "p", *extra, "-o", str(out)]


def test_build_warns_and_show_lists_what_the_card_cannot_do(tmp_path):
    # 28 rows, 20 parameters, 3 features: the demo's commissioning model. Its field error is
    # 6 times the training error by FPE, 13.5 by the random-design estimate; its range limit
    # is far above a fifth; its histograms come from 28 rows.
    rng = np.random.default_rng(11)
    x = rng.normal(size=(28, 3))
    y = x.sum(axis=1) + rng.normal(size=28)
    pred = y + rng.normal(0, 0.3, 28)
    train = write(tmp_path / "q.csv", ["a", "b", "c", "y", "p"], [[*r, t, q] for r, t, q in zip(x, y, pred)])
    out = tmp_path / "q.json"
    r = CliRunner().invoke(cli, build_args(train, out, "--params", "20"))
    assert r.exit_code == 0, r.output
    warnings = [line for line in r.stderr.splitlines() if line.startswith("warning: ")]
    assert any("high d/N" in w and "6 times" in w and "13.5 times" in w for w in warnings)
    assert any("too few rows for range" in w for w in warnings)
    assert any("too few rows for shift" in w for w in warnings)
    r = CliRunner().invoke(cli, ["card", "show", str(out)])
    assert "cautions" in r.stdout and "high d/N" in r.stdout
    assert "FPE (same inputs)" in r.stdout and "random design" in r.stdout
    # the random-design estimate as the card's choice
    r = CliRunner().invoke(cli, build_args(train, out, "--params", "20", "--expected-loss-estimate", "random_design"))
    assert r.exit_code == 0, r.output
    assert expected_loss(load_card(out))[1] == "random_design" and "the random-design estimate" in r.stdout


def test_build_warns_when_the_model_is_not_expected_to_beat_the_mean(tmp_path):
    rng = np.random.default_rng(12)
    x = rng.normal(size=3000)
    y = rng.normal(size=3000)  # x says nothing of y
    pred = 0.5 * x  # and the model adds noise
    train = write(tmp_path / "w.csv", ["x", "y", "p"], list(zip(x, y, pred)))
    r = CliRunner().invoke(cli, build_args(train, tmp_path / "w.json", "--params", "2"))
    assert r.exit_code == 0, r.output
    assert "no better than predicting the training mean" in r.stderr
    card = load_card(tmp_path / "w.json")
    assert card.target.constant_loss == pytest.approx(np.var(y) * (3000 / 2999) ** 2)
    # a good model on many rows draws no caution at all
    good = write(tmp_path / "g.csv", ["x", "y", "p"], list(zip(x, x + 0.1 * y, x)))
    r = CliRunner().invoke(cli, build_args(good, tmp_path / "g.json", "--params", "2"))
    assert r.exit_code == 0 and "warning" not in r.stderr
    assert card_cautions(load_card(tmp_path / "g.json")) == []


def test_build_refuses_a_card_with_no_usable_expected_loss_unless_asked(tmp_path, rows):
    x1, x2, y, pred = rows
    train = write(tmp_path / "a.csv", ["flow", "y", "p"], list(zip(x1, y, pred)))
    out = tmp_path / "a.json"
    r = CliRunner().invoke(cli, build_args(train, out, "--params", "2", "--loss", "absolute"))
    assert r.exit_code == 2 and not out.exists()
    assert "no 'holdout' loss" in r.stderr and "--allow-no-expected-loss" in r.stderr
    r = CliRunner().invoke(
        cli, build_args(train, out, "--params", "2", "--loss", "absolute", "--allow-no-expected-loss")
    )
    assert r.exit_code == 0 and out.exists()
    assert "warning: no usable expected loss" in r.stderr
