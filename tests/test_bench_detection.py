"""bench/detection_quality.py runs and gives a row per check (tiny counts; no timing)."""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "bench"))

import detection_quality


def test_the_detection_table_has_a_row_per_check_and_reference():
    table = detection_quality.run(records=400, reps=1, sizes=(300,), dims=(1,), jobs=0, change=(600, 600))
    rows = [line.split("|")[1].strip() for line in table.splitlines() if line.startswith("| ") and "---" not in line]
    assert rows[0] == "check"
    assert rows[1:] == [
        "gap",
        "drift",
        "range",
        "shift",
        "baseline",
        "shift, short window on all features",
        "shift, whole window only",
        "raw ADWIN",
        "rolling mean",
    ]
    header = table.splitlines()[0]
    for column in (
        "AR 0.9",
        "n=300",
        "d=1",
        "discrete",
        "delay: doubling",
        "delay: FriedmanDrift",
        "delay: step to 1.15 x (within tolerance)",
    ):
        assert column in header
    # every data row has a cell per column
    widths = {line.count("|") for line in table.splitlines() if line.startswith("|")}
    assert len(widths) == 1
    # streams whose model is in truth beyond the tolerance are named, not counted as false
    assert any(line.startswith("Streams whose model's field loss") for line in table.splitlines())
    # and the step within the tolerance says where a raise is false and where it is right
    assert any(line.startswith("Step to 1.15 x expected") for line in table.splitlines())


def test_a_stream_whose_model_is_beyond_the_tolerance_does_not_count_gap_raises_as_false():
    # 30 rows and 20 features: the least-squares fit is poor on new inputs, far beyond 1.25 x the
    # final prediction error the card gives (the classic optimism of a fit with few spare rows).
    r = detection_quality.false_alerts((30, 20, "continuous", 0.0, 2000, 1007))
    assert r["field_ratio"] > 1.25 and set(r["right"]) == {"gap", "rolling mean"}
    assert r["rate"]["gap"] == 0.0 and r["rate"]["rolling mean"] == 0.0
    fair = detection_quality.false_alerts((3000, 5, "continuous", 0.0, 2000, 7))
    assert fair["field_ratio"] < 1.1 and fair["right"] == {}


def test_the_delay_bound_uses_the_kullback_leibler_information_of_squared_gaussian_errors():
    # External check: KL of a squared N(0, 2) error against a squared N(0, 1.25) one, by
    # numerical integration of scipy's chi-square densities, against (r - 1 - ln r) / 2.
    import math

    import pytest
    from scipy import integrate
    from scipy import stats as sps

    def kl(a: float, b: float) -> float:
        def term(x: float) -> float:
            log_a = sps.chi2.logpdf(x / a, 1) - math.log(a)
            log_b = sps.chi2.logpdf(x / b, 1) - math.log(b)
            return math.exp(log_a) * (log_a - log_b)

        return integrate.quad(term, 0, math.inf, limit=200)[0]

    assert detection_quality.kl_scale(2.0 / 1.25) == pytest.approx(kl(2.0, 1.25), rel=1e-6)
    assert detection_quality.kl_scale(2.0) == pytest.approx(kl(2.0, 1.0), rel=1e-6)
    assert round(detection_quality.delay_bound(1e6)) == 213  # ln(1e6) / 0.0650
