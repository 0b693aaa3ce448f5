"""Loss functions against scikit-learn's metrics; the window against numpy."""

import numpy as np
import pytest
from sklearn.metrics import mean_absolute_error, mean_squared_error

from watchdog_edge.core.losses import LossWindow, absolute_loss, loss_function, squared_loss


def test_mean_losses_match_scikit_learn():
    rng = np.random.default_rng(1)
    y, p = rng.normal(size=400), rng.normal(size=400)
    w_sq, w_abs = LossWindow(400), LossWindow(400)
    for i, (a, b) in enumerate(zip(y, p)):
        w_sq.push(i, squared_loss(a, b))
        w_abs.push(i, absolute_loss(a, b))
    assert w_sq.mean() == pytest.approx(mean_squared_error(y, p), rel=1e-12)
    assert w_abs.mean() == pytest.approx(mean_absolute_error(y, p), rel=1e-12)


def test_window_keeps_the_last_n_and_matches_numpy():
    rng = np.random.default_rng(2)
    x = rng.exponential(size=3000)
    w = LossWindow(500)
    for i, v in enumerate(x):
        w.push(float(i), float(v))
    np.testing.assert_array_equal(w.array(), x[-500:])
    assert w.mean() == pytest.approx(np.mean(x[-500:]), rel=1e-12)


def test_running_mean_is_stable_over_a_million_losses_with_a_large_offset():
    # Reference: numpy's pairwise summation of the same last window.
    rng = np.random.default_rng(3)
    x = 1e9 + rng.uniform(0, 1, 1_000_000)
    w = LossWindow(500)
    push = w.push
    for i, v in enumerate(x.tolist()):
        push(i, v)
    ref = np.mean(x[-500:])
    assert abs(w.mean() - ref) < 1e-6  # 1e-15 of the offset; an uncompensated sum drifts far more


def test_age_bound_drops_old_pairs():
    w = LossWindow(100, max_age_s=10)
    for t in range(20):
        w.push(float(t), float(t))
    w.expire(20.0)
    assert w.array().tolist() == [float(t) for t in range(10, 20)]
    assert w.mean() == pytest.approx(14.5)


def test_unknown_loss_kind():
    with pytest.raises(ValueError, match="squared"):
        loss_function("huber")
