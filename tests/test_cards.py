"""Model cards: loading errors, the expected loss, and least-squares optimism against theory."""

import json

import numpy as np
import pytest

from watchdog_edge.cards import ModelCard, expected_loss, final_prediction_error, load_card
from watchdog_edge.errors import CardError

from helpers import card


def test_load_errors_name_the_file_and_field(tmp_path):
    with pytest.raises(CardError, match="not found"):
        load_card(tmp_path / "none.json")
    bad = tmp_path / "bad.json"
    bad.write_text("{")
    with pytest.raises(CardError, match="not valid JSON"):
        load_card(bad)
    data = json.loads(card().model_dump_json())
    data["training"]["count"] = 0
    data["colour"] = "red"
    bad.write_text(json.dumps(data))
    with pytest.raises(CardError) as e:
        load_card(bad)
    assert "training.count = 0" in str(e.value) and "colour: unknown key" in str(e.value)


def test_expected_loss_sources():
    assert expected_loss(card(holdout=2.0)) == (2.0, "holdout")
    value, src = expected_loss(card(holdout=None, train=1.0, n=100, d=10))
    assert src == "fpe" and value == pytest.approx(110 / 90)
    with pytest.raises(CardError, match="holdout"):
        expected_loss(card(holdout=None, loss="absolute"))
    with pytest.raises(CardError, match="holdout"):
        expected_loss(card(holdout=None, least_squares=False))
    with pytest.raises(CardError, match="fitted_parameters=20"):
        expected_loss(card(holdout=None, n=20, d=20))


def test_least_squares_optimism_matches_theory_and_fpe():
    # Standard linear-regression result (Hastie, Tibshirani and Friedman, The Elements of
    # Statistical Learning, 2nd ed., section 7.4): with d fitted parameters and N points at fixed
    # inputs, E[training MSE] = sigma^2 (1 - d/N) and E[MSE on fresh noise at the same inputs]
    # = sigma^2 (1 + d/N). Akaike's (1970) final prediction error E_train (N + d)/(N - d)
    # therefore estimates the fresh-noise MSE without bias.
    rng = np.random.default_rng(10)
    n, deg, sigma, reps = 40, 5, 0.5, 4000
    d = deg + 1
    x = np.linspace(-1, 1, n)
    f = np.cos(2 * x)
    y = f + rng.normal(0, sigma, (reps, n))
    fresh = f + rng.normal(0, sigma, (reps, n))
    coef = np.polynomial.polynomial.polyfit(x, y.T, deg)  # one fit per repetition
    fitted = np.polynomial.polynomial.polyval(x, coef)
    train = np.mean((y - fitted) ** 2, axis=1)
    test = np.mean((fresh - fitted) ** 2, axis=1)
    s2 = sigma ** 2
    # Tolerances: 4 standard errors of the mean over the repetitions.
    assert abs(train.mean() - s2 * (1 - d / n)) < 4 * train.std() / np.sqrt(reps)
    assert abs(test.mean() - s2 * (1 + d / n)) < 4 * test.std() / np.sqrt(reps)
    fpe = np.array([final_prediction_error(t, n, d) for t in train])
    assert abs(fpe.mean() - test.mean()) < 4 * np.std(fpe - test) / np.sqrt(reps)


def test_histogram_shape_is_validated():
    with pytest.raises(ValueError, match="one share per bin"):
        ModelCard(model_id="m", training={"loss": 1, "count": 10}, fitted_parameters=1,
                  features={"a": {"min": 0, "max": 1, "histogram": {"edges": [0, 1], "shares": [0.5, 0.5]}}})
