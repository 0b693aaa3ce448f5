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
    for column in ("AR 0.9", "n=300", "d=1", "discrete", "delay: doubling", "delay: FriedmanDrift"):
        assert column in header
    # every data row has a cell per column
    widths = {line.count("|") for line in table.splitlines() if line.startswith("|")}
    assert len(widths) == 1
