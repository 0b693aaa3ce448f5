"""Model cards: loading errors, the expected loss, and least-squares optimism against theory."""

import json

import numpy as np
import pytest
from helpers import card

from watchdog_edge.core.cards import ModelCard, expected_loss, final_prediction_error
from watchdog_edge.errors import CardError
from watchdog_edge.files.cardfile import load_card


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
    assert "training.count = 0" in str(e.value) and "colour = 'red': unknown key" in str(e.value)


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
    # Statistical Learning, 2nd ed., section 7.4): with d fitted parameters, N fixed inputs and
    # a correct model, E[training MSE] = sigma^2 (1 - d/N) and E[MSE on fresh noise at the same
    # inputs] = sigma^2 (1 + d/N). Akaike's (1970) final prediction error E_train (N + d)/(N - d)
    # therefore estimates the fresh-noise MSE without bias.
    rng = np.random.default_rng(10)
    n, d, sigma, reps = 40, 4, 0.5, 20000
    x = np.linspace(-1, 1, n)
    f = 1.0 + 0.5 * x - 2.0 * x**2 + 0.3 * x**3  # inside the fitted family: no bias term
    y = f[:, None] + rng.normal(0, sigma, (n, reps))
    fresh = f[:, None] + rng.normal(0, sigma, (n, reps))
    coef = np.polyfit(x, y, d - 1)  # d coefficients; one fit per column (repetition)
    fitted = np.vander(x, d) @ coef
    train = np.mean((y - fitted) ** 2, axis=0)
    test = np.mean((fresh - fitted) ** 2, axis=0)
    s2 = sigma**2
    # Tolerances from the number of repetitions: N * train / sigma^2 is chi-square with N - d
    # degrees of freedom, N * test / sigma^2 is chi-square with N + d (fresh noise plus the
    # fitted noise), independent of train; a chi-square with k df has variance 2k. Allow 4
    # standard errors of the mean over the repetitions.
    se_train = s2 * np.sqrt(2 * (n - d)) / n / np.sqrt(reps)
    se_test = s2 * np.sqrt(2 * (n + d)) / n / np.sqrt(reps)
    assert abs(train.mean() - s2 * (1 - d / n)) < 4 * se_train
    assert abs(test.mean() - s2 * (1 + d / n)) < 4 * se_test
    # the optimism is far outside the tolerance, so the check can fail
    assert abs(train.mean() - test.mean()) > 50 * (se_train + se_test)
    fpe = np.array([final_prediction_error(t, n, d) for t in train])
    se_diff = np.hypot(se_train * (n + d) / (n - d), se_test)
    assert abs(fpe.mean() - test.mean()) < 4 * se_diff


def test_final_prediction_error_formula_and_its_limit():
    # Akaike (1970): FPE = E_train (N + d) / (N - d); worked by hand: 2 x 60 / 40 = 3
    assert final_prediction_error(2.0, 50, 10) == pytest.approx(3.0)
    with pytest.raises(CardError, match=r"training.count=10 and fitted_parameters=10.*'holdout'"):
        final_prediction_error(1.0, 10, 10)


def test_histogram_shape_is_validated():
    with pytest.raises(ValueError, match="one share per bin"):
        ModelCard(
            model_id="m",
            training={"loss": 1, "count": 10},
            fitted_parameters=1,
            features={"a": {"min": 0, "max": 1, "histogram": {"edges": [0, 1], "shares": [0.5, 0.5]}}},
        )
