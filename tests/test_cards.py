"""Model cards: loading errors, the expected loss, and least-squares optimism against theory."""

import json

import numpy as np
import pytest
from helpers import card

from watchdog_edge.core.cards import ModelCard, expected_loss, final_prediction_error, random_design_error
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


@pytest.mark.parametrize("n, d, ratio_to_fpe", [(28, 20, 2.24), (30, 5, 1.03), (200, 10, None)])
def test_random_design_estimate_matches_monte_carlo_ols_on_gaussian_inputs(n, d, ratio_to_fpe):
    # Outside check: least squares fitted with numpy (an intercept and d - 1 Gaussian
    # regressors, correct linear model, Gaussian noise), its squared error measured at new
    # Gaussian inputs. The mean field error must be sigma^2 (1 + 1/N)(N - 2)/(N - d - 1) (the
    # S_p criterion's target, Hocking 1976), and the estimate from each fit's training loss
    # must be unbiased for it. The issue's own Monte Carlo found the field error 2.24 times
    # the final prediction error at N = 28, d = 20, and 1.03 times at N = 30, d = 5.
    rng = np.random.default_rng(n * 100 + d)
    reps, new, sigma = 20000, 50, 0.7
    p = d - 1
    beta = rng.normal(size=d)
    x = np.concatenate([np.ones((reps, n, 1)), rng.standard_normal((reps, n, p))], axis=2)
    y = x @ beta + rng.normal(0, sigma, (reps, n))
    xtx = np.einsum("rni,rnj->rij", x, x)
    coef = np.linalg.solve(xtx, np.einsum("rni,rn->ri", x, y)[..., None])[..., 0]
    train = np.mean((y - np.einsum("rni,ri->rn", x, coef)) ** 2, axis=1)
    x0 = np.concatenate([np.ones((reps, new, 1)), rng.standard_normal((reps, new, p))], axis=2)
    y0 = x0 @ beta + rng.normal(0, sigma, (reps, new))
    field = np.mean((y0 - np.einsum("rni,ri->rn", x0, coef)) ** 2, axis=1)
    theory = sigma**2 * (1 + 1 / n) * (n - 2) / (n - d - 1)
    se = field.std() / np.sqrt(reps)
    assert abs(field.mean() - theory) < 4 * se
    est = np.array([random_design_error(t, n, d) for t in train])
    assert abs(est.mean() - field.mean()) < 4 * np.hypot(est.std(), field.std()) / np.sqrt(reps)
    fpe = np.array([final_prediction_error(t, n, d) for t in train])
    if ratio_to_fpe is not None:
        assert field.mean() / fpe.mean() == pytest.approx(ratio_to_fpe, abs=0.08)
        assert random_design_error(1.0, n, d) / final_prediction_error(1.0, n, d) == pytest.approx(
            ratio_to_fpe, abs=0.005
        )
    # the check can fail: at N = 28, d = 20 the final prediction error is far below the field error
    if d == 20:
        assert fpe.mean() < field.mean() / 2


def test_the_card_chooses_its_estimate_and_old_cards_load(tmp_path):
    c = card(holdout=None, train=1.0, n=28, d=20)
    assert expected_loss(c) == (pytest.approx(6.0), "fpe")  # the default, as the contract says
    c2 = c.model_copy(update={"expected_loss_estimate": "random_design"})
    assert expected_loss(c2) == (pytest.approx(29 * 26 / (8 * 7)), "random_design")
    with pytest.raises(CardError, match="two more training rows"):
        random_design_error(1.0, 21, 20)
    # A card written by the previous version (card_format 1, no new fields) loads as before.
    old = {
        "card_format": 1,
        "model_id": "pump",
        "loss": "squared",
        "training": {"loss": 0.5, "count": 400},
        "fitted_parameters": 4,
        "least_squares": True,
        "features": {"flow": {"min": 0, "max": 9, "histogram": {"edges": [0, 3, 6, 9], "shares": [0.3, 0.4, 0.3]}}},
        "target": {"min": 1.0, "max": 7.5},
    }
    path = tmp_path / "old.json"
    path.write_text(json.dumps(old))
    loaded = load_card(path)
    assert loaded.card_format == 1 and loaded.target.constant_loss is None
    assert expected_loss(loaded) == (pytest.approx(0.5 * 404 / 396), "fpe")
    # and the input checks take its histogram as before (edges, open outer bins)
    from watchdog_edge.core.checks.base import CheckContext
    from watchdog_edge.core.checks.shift import ShiftCheck, ShiftSettings
    from watchdog_edge.core.records import Prediction

    shift = ShiftCheck(
        ShiftSettings(recent_predictions=50, evaluate_every_predictions=50),
        CheckContext("pump", loaded, "squared", 1.0, "fpe"),
    )
    for i in range(50):
        shift.on_prediction(Prediction("pump", str(i), 0.0, float(i), features={"flow": float(i % 10)}))
    assert shift.counts()["flow"] == [15, 15, 20, 0]  # [0, 3), [3, 6), [6, inf), missing
    old["card_format"] = 3
    path.write_text(json.dumps(old))
    with pytest.raises(CardError, match="card_format = 3.*expected 1 or 2"):
        load_card(path)
