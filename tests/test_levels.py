"""The one level rule of every check (core/levels.py): up at once, down after k calm evaluations,
critical stepping down to warning by the same rule."""

import numpy as np

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.checks.base import CheckContext
from watchdog_edge.core.checks.gap import GapCheck, GapSettings
from watchdog_edge.core.checks.range import RangeCheck, RangeSettings
from watchdog_edge.core.levels import LevelGate, LevelRule
from watchdog_edge.core.records import Pair, Prediction, Truth


def run(rule: LevelRule, seq):
    return [rule.update(raised, calm) for raised, calm in seq]


def test_up_at_once_and_escalation_at_once():
    assert run(LevelRule(3), [("warning", "warning"), ("critical", "critical")]) == ["warning", "critical"]
    assert run(LevelRule(3), [("critical", "critical")]) == ["critical"]


def test_down_only_after_k_calm_evaluations_in_a_row_and_a_break_restarts_the_count():
    r = LevelRule(3)
    r.update("warning", "warning")
    got = run(r, [("normal", "normal"), ("normal", "normal"), ("normal", "warning"), ("normal", "normal")])
    assert got == ["warning"] * 4  # the third was not calm: the count starts again
    assert run(r, [("normal", "normal")] * 2) == ["warning", "normal"]


def test_critical_steps_down_to_warning_and_then_clears():
    r = LevelRule(2)
    r.update("critical", "critical")
    got = run(r, [("warning", "warning")] * 2 + [("normal", "normal")] * 2)
    assert got == ["critical", "warning", "warning", "normal"]


def test_the_step_down_goes_only_as_far_as_every_evaluation_of_the_run_allows():
    # calm warning, then calm normal: the two agree only on warning
    r = LevelRule(2)
    r.update("critical", "critical")
    assert run(r, [("normal", "warning"), ("normal", "normal")]) == ["critical", "warning"]


def test_calm_is_never_read_below_raised():
    r = LevelRule(1)
    r.update("critical", "critical")
    assert r.update("warning", "normal") == "warning"


def test_snapshot_restore_continues_exactly():
    a = LevelRule(3)
    run(a, [("critical", "critical"), ("normal", "warning")])
    b = LevelRule(3)
    b.restore(a.snapshot())
    tail = [("normal", "normal")] * 3
    assert run(a, tail) == run(b, tail)


def test_figure_gate_uses_the_eased_limits_for_the_way_down():
    g = LevelGate(warning=0.1, critical=0.25, hysteresis=0.2, clear_after=2)
    # 0.22 is below the critical limit but above it eased (0.2): not calm
    assert [g.update_figure(x) for x in (0.3, 0.22, 0.22, 0.22)] == ["critical"] * 4
    assert [g.update_figure(x) for x in (0.15, 0.15, 0.05, 0.05)] == ["critical", "warning", "warning", "normal"]


def _ctx(card=None, size=100, min_pairs=100):
    card = card or ModelCard(
        model_id="m", training={"loss": 1.0, "count": 1000}, fitted_parameters=2, holdout={"loss": 1.0, "count": 500}
    )
    return CheckContext("m", card, "squared", 1.0, "holdout", window_size=size, min_pairs=min_pairs)


def test_gap_steps_down_from_critical_to_warning_when_the_loss_eases_between_the_limits():
    # Regression (detection issue, item 9): gap stayed critical until it cleared. Expected loss
    # 1, limits 1.25 and 2; losses near 6, then near 1.5: with confidence above warning, and
    # below critical x (1 - hysteresis) = 1.8.
    rng = np.random.default_rng(3)
    gap = GapCheck(GapSettings(evaluate_every_pairs=10, clear_after_evaluations=3), _ctx())
    levels = []
    for i, loss in enumerate(list(rng.uniform(5.0, 7.0, 200)) + list(rng.uniform(1.4, 1.6, 300))):
        t = float(i)
        pr = Pair(Prediction("m", str(i), 0.0, t), Truth("m", str(i), 0.0, t), t)
        if gap.on_pair(pr, float(loss)):
            v = gap.evaluate(t)
            if v is not None:
                levels.append(v.level)
    assert "critical" in levels
    after = levels[levels.index("critical") :]
    assert after[-1] == "warning" and "normal" not in after
    assert gap.figures()["level"] == "warning"


def test_range_steps_down_from_critical_to_warning_by_the_same_rule():
    # A card of a million rows: range's limits allow for the outside share a card's row count
    # explains, and only so large a card leaves 2 of 20 significant (a warning at 5 %).
    card = ModelCard(
        model_id="m",
        training={"loss": 1.0, "count": 1_000_000},
        fitted_parameters=2,
        holdout={"loss": 1.0, "count": 500},
        features={"x": {"min": 0.0, "max": 1.0}},
    )
    check = RangeCheck(
        RangeSettings(
            recent_predictions=20, min_predictions=20, evaluate_every_predictions=20, clear_after_evaluations=2
        ),
        _ctx(card),
    )
    levels = []
    # 30 % outside (critical), then 10 % outside (warning: above 5 %, and above 5 % x 0.8)
    for i in range(200):
        out = (i % 10 < 3) if i < 60 else (i % 10 == 0)
        t = float(i)
        if check.on_prediction(Prediction("m", str(i), 0.0, t, features={"x": 2.0 if out else 0.5})):
            v = check.evaluate(t)
            if v is not None:
                levels.append(v.level)
    assert levels[:3] == ["critical"] * 3
    assert levels[-1] == "warning" and "normal" not in levels
