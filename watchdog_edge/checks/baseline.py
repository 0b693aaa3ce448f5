"""``baseline``: does a cheap online learner beat the deployed model on the same pairs?

Learners from river, chosen by name: ``mean`` (a running mean of the truth), ``linear``
(standard scaling, then linear regression by SGD) and ``tree`` (a Hoeffding adaptive tree
regressor). Each is scored test-then-train on every pair that carries features: it predicts
from the pair's features, its loss (the card's loss kind) is taken, and then it learns the
truth. A learner that cannot predict yet (or gives a non-finite value) is scored on the running
mean of the truths.

Every ``evaluate_every`` scored pairs, over the last ``window`` scored pairs, each learner's
losses are compared with the model's by a one-sided Diebold-Mariano test on the differences
(model loss - learner loss; Newey-West long-run variance, Harvey-Leybourne-Newbold correction,
Student t with n - 1 degrees of freedom; see ``watchdog_edge.stats.diebold_mariano``). The check
raises when some learner is better with p < 1 - ``confidence`` and by a margin
1 - learner loss / model loss of at least ``margin`` (critical from ``critical_margin``), and
clears when no learner has been better, by ``margin`` x (1 - ``hysteresis``), for
``clear_after`` evaluations in a row.

Inputs: a missing feature (null or absent) is imputed by the running mean of its earlier
values (0 before any) and counted; a feature name never seen before simply joins the inputs.

CPU budget for small gateways: only a ``learn_share`` of the pairs is used, chosen by a
BLAKE2 hash of the pair's id (so replay picks the same ones), and at most ``max_pairs_per_s``
pairs per second of core time (a token bucket of one second's worth); a skipped pair is
neither scored nor learned, and the skips are counted in the figures.

river is imported only when a BaselineCheck is built. Learners go into snapshots as a pickle,
base64 encoded inside the JSON (same river version and platform only, like replay's promise).
"""

from __future__ import annotations

import base64
import hashlib
import math
import pickle
from typing import Any, Literal

import numpy as np
from pydantic import Field, field_validator, model_validator

from ..records import Pair
from ..stats import diebold_mariano
from .base import Check, CheckContext, CheckSettings, Level, Verdict

LearnerName = Literal["mean", "linear", "tree"]

DESCRIPTIONS = {
    "mean": "running mean of the truth",
    "linear": "online linear regression on the inputs",
    "tree": "online regression tree (Hoeffding adaptive tree)",
}


class BaselineSettings(CheckSettings):
    """Settings of ``baseline`` (opt-in; uses river).

    >>> s = BaselineSettings(learners=["mean", "tree"], learn_share=0.5)
    >>> s.confidence, s.margin, s.window
    (0.99, 0.1, None)
    """

    learners: list[LearnerName] = Field(default_factory=lambda: ["mean", "linear"], min_length=1, description="Online learners to compare the model with: mean, linear, tree.")
    confidence: float = Field(0.99, gt=0.5, lt=1, description="One-sided confidence of the Diebold-Mariano test that a learner is better.")
    margin: float = Field(0.1, ge=0, lt=1, description="Raise only when 1 - learner loss / model loss is at least this.")
    critical_margin: float | None = Field(None, gt=0, lt=1, description="Critical when the margin is at least this (null: warning only).")
    window: int | None = Field(None, ge=30, le=100_000, description="Latest scored pairs compared (null: the model's window size).")
    min_pairs: int = Field(200, ge=20, description="Scored pairs needed in the window before the first test.")
    evaluate_every: int = Field(50, ge=1, description="Scored pairs between tests.")
    hysteresis: float = Field(0.5, ge=0, lt=1, description="Clear only when no learner is better by margin x (1 - this) with confidence.")
    clear_after: int = Field(3, ge=1, description="Evaluations in a row that must meet the clearing rule.")
    learn_share: float = Field(1.0, gt=0, le=1, description="Share of pairs the learners use, chosen by a hash of the pair id.")
    max_pairs_per_s: float | None = Field(None, gt=0, description="At most this many pairs per second of core time are used (null: no limit).")
    seed: int = Field(0, ge=0, description="Seed of the tree learner's randomness, so replay equals live.")

    @field_validator("learners")
    @classmethod
    def _unique(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError(f"learners {v} name a learner twice; list each once")
        return v

    @model_validator(mode="after")
    def _order(self) -> "BaselineSettings":
        if self.critical_margin is not None and self.critical_margin < self.margin:
            raise ValueError(f"critical_margin ({self.critical_margin}) must be >= margin ({self.margin})")
        if self.window is not None and self.min_pairs > self.window:
            raise ValueError(f"min_pairs ({self.min_pairs}) must be <= window ({self.window})")
        return self


def make_learner(name: str, seed: int = 0) -> Any:
    """A fresh river regressor for a learner name."""
    from river import dummy, linear_model, preprocessing, stats, tree

    if name == "mean":
        return dummy.StatisticRegressor(stats.Mean())
    if name == "linear":
        return preprocessing.StandardScaler() | linear_model.LinearRegression()
    if name == "tree":
        return tree.HoeffdingAdaptiveTreeRegressor(seed=seed)
    raise ValueError(f"unknown learner {name!r}; use mean, linear or tree")


def hash_share(key: str) -> float:
    """A stable number in [0, 1) from a text (BLAKE2b, unlike ``hash()`` the same in every run).

    >>> hash_share("42") == hash_share("42") and 0 <= hash_share("42") < 1
    True
    """
    digest = hashlib.blake2b(key.encode("utf-8"), digest_size=8).digest()
    return int.from_bytes(digest, "big") / 2.0**64


def _pack(obj: Any) -> str:
    return base64.b64encode(pickle.dumps(obj)).decode("ascii")


def _unpack(text: str) -> Any:
    return pickle.loads(base64.b64decode(text))


def _fmt(x: float) -> str:
    return f"{x:.4g}"


class BaselineCheck(Check):
    """Test-then-train online learners against the deployed model, by Diebold-Mariano.

    >>> import random
    >>> from watchdog_edge.cards import ModelCard
    >>> from watchdog_edge.records import Prediction, Truth
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...                  holdout={"loss": 1.0, "count": 50})
    >>> ctx = CheckContext("m", card, "squared", 1.0, "holdout", window_size=300)
    >>> check = BaselineCheck(BaselineSettings(learners=["mean"]), ctx)
    >>> rng, verdicts = random.Random(1), []
    >>> for i in range(300):       # the truth hovers near 10; the model always says 7
    ...     y = 10 + rng.gauss(0, 1)
    ...     pair = Pair(Prediction("m", str(i), 7.0, i, features={"x": 1.0}), Truth("m", str(i), y, i), i)
    ...     check.on_pair(pair, (y - 7.0) ** 2)
    ...     verdicts.append(check.evaluate(float(i)))
    >>> v = [v for v in verdicts if v is not None][-1]
    >>> v.level, v.figures["learner"], v.figures["margin"] > 0.5
    ('warning', 'mean', True)
    """

    name = "baseline"
    settings_model = BaselineSettings

    def __init__(self, settings: BaselineSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        self.settings: BaselineSettings = settings
        self.names: tuple[str, ...] = tuple(settings.learners)
        self.size = settings.window if settings.window is not None else context.window_size
        self.min_pairs = min(settings.min_pairs, self.size)
        self._absolute = context.loss_kind == "absolute"
        self.learners = {n: make_learner(n, settings.seed) for n in self.names}
        self._impute: dict[str, list[float]] = {}  # feature -> [count, mean]
        self._truth_n = 0
        self._truth_mean = 0.0
        self._tokens: float | None = None
        self._tokens_t = 0.0
        self._counts = {"scored": 0, "no_features": 0, "skipped_share": 0, "skipped_rate": 0, "imputed": 0}
        self.reset()

    def reset(self) -> None:
        # A new model version: the comparison starts over; the learners keep what they learned
        # about the process, which does not depend on the deployed model.
        k = len(self.names)
        self._model_loss = np.zeros(self.size)
        self._learner_loss = np.zeros((k, self.size))
        self._pos = 0
        self._filled = 0
        self._since_eval = 0
        self._level: Level = "ok"
        self._calm_run = 0
        self._figures: dict[str, Any] = {}

    # -- intake ---------------------------------------------------------------------------
    def _admit(self, pair: Pair) -> bool:
        s = self.settings
        if s.learn_share < 1.0 and hash_share(pair.id) >= s.learn_share:
            self._counts["skipped_share"] += 1
            return False
        rate = s.max_pairs_per_s
        if rate is not None:
            cap = max(1.0, rate)
            t = pair.t
            if self._tokens is None:
                self._tokens = cap
            elif t > self._tokens_t:
                self._tokens = min(cap, self._tokens + (t - self._tokens_t) * rate)
            self._tokens_t = max(t, self._tokens_t)
            if self._tokens < 1.0:
                self._counts["skipped_rate"] += 1
                return False
            self._tokens -= 1.0
        return True

    def _inputs(self, feats: dict[str, float | None]) -> dict[str, float]:
        imp = self._impute
        x: dict[str, float] = {}
        for name, v in feats.items():
            st = imp.get(name)
            if st is None:
                st = imp[name] = [0.0, 0.0]
            if v is None:
                x[name] = st[1]
                self._counts["imputed"] += 1
            else:
                x[name] = v
                st[0] += 1.0
                st[1] += (v - st[1]) / st[0]
        for name, st in imp.items():
            if name not in x:
                x[name] = st[1]
                self._counts["imputed"] += 1
        return x

    def on_pair(self, pair: Pair, loss: float) -> None:
        feats = pair.prediction.features
        if not feats:
            self._counts["no_features"] += 1
            return
        if not self._admit(pair):
            return
        x = self._inputs(feats)
        y = pair.truth.value
        pos = self._pos
        fallback = self._truth_mean
        row = self._learner_loss
        for j, name in enumerate(self.names):
            learner = self.learners[name]
            p = learner.predict_one(x)
            if p is None or not math.isfinite(p):
                p = fallback
            e = y - p
            row[j, pos] = abs(e) if self._absolute else e * e
            learner.learn_one(x, y)
        self._model_loss[pos] = loss
        self._truth_n += 1
        self._truth_mean += (y - self._truth_mean) / self._truth_n
        self._pos = pos + 1 if pos + 1 < self.size else 0
        if self._filled < self.size:
            self._filled += 1
        self._since_eval += 1
        self._counts["scored"] += 1

    # -- verdict --------------------------------------------------------------------------
    def _ordered(self, a: np.ndarray) -> np.ndarray:
        if self._filled < self.size:
            return a[: self._filled]
        return np.concatenate((a[self._pos:], a[: self._pos]))

    def compare(self) -> dict[str, dict[str, float]]:
        """Each learner against the model over the current window."""
        model = self._ordered(self._model_loss)
        m = float(model.mean())
        out = {}
        for j, name in enumerate(self.names):
            learner = self._ordered(self._learner_loss[j])
            lm = float(learner.mean())
            dm = diebold_mariano(model, learner)
            p = float(dm.p_value)
            out[name] = {
                "learner_loss": lm,
                "statistic": float(dm.statistic),
                "p_value": p if math.isfinite(p) else 1.0,
                "margin": 1.0 - lm / m if m > 0 else 0.0,
                "bandwidth": float(dm.bandwidth),
            }
        return out

    def evaluate(self, t: float) -> Verdict | None:
        s = self.settings
        if self._since_eval < s.evaluate_every or self._filled < self.min_pairs:
            return None
        self._since_eval = 0
        res = self.compare()
        alpha = 1.0 - s.confidence
        passing = {n: r for n, r in res.items() if r["p_value"] < alpha and r["margin"] >= s.margin}
        if passing:
            best = max(passing, key=lambda n: passing[n]["margin"])
        else:
            best = min(res, key=lambda n: (res[n]["p_value"], -res[n]["margin"]))
        r = res[best]
        if passing:
            target: Level = ("critical" if s.critical_margin is not None and r["margin"] >= s.critical_margin
                             else "warning")
            if target == "critical" or self._level == "ok":
                self._level = target
            self._calm_run = 0
        elif self._level != "ok":
            calm_margin = s.margin * (1 - s.hysteresis)
            still = any(v["p_value"] < alpha and v["margin"] >= calm_margin for v in res.values())
            if still:
                self._calm_run = 0
            else:
                self._calm_run += 1
                if self._calm_run >= s.clear_after:
                    self._level = "ok"
                    self._calm_run = 0
        self._figures = {
            "learner": best,
            "model_loss": float(self._ordered(self._model_loss).mean()),
            "learner_loss": r["learner_loss"],
            "statistic": r["statistic"],
            "p_value": r["p_value"],
            "margin": r["margin"],
            "confidence": s.confidence,
            "required_margin": s.margin,
            "pairs": self._filled,
            "learners": res,
            "loss": self.context.loss_kind,
            **self._counts,
        }
        return Verdict(self._level, self._summary(best, r), dict(self._figures))

    def _summary(self, best: str, r: dict[str, float]) -> str:
        kind = "squared" if self.context.loss_kind == "squared" else "absolute"
        model = self._figures["model_loss"]
        n = self._filled
        if self._level == "ok":
            return (f"No online learner beats the deployed model with confidence over the last {n} pairs "
                    f"(best: {DESCRIPTIONS[best]}, mean {kind} error {_fmt(r['learner_loss'])} against "
                    f"the model's {_fmt(model)}).")
        return (f"A cheap {DESCRIPTIONS[best]} beats the deployed model: mean {kind} error "
                f"{_fmt(r['learner_loss'])} against the model's {_fmt(model)} over the last {n} pairs "
                f"({r['margin']:.0%} lower, Diebold-Mariano p = {r['p_value']:.2g}); the model may need "
                f"retraining or its inputs checking.")

    def figures(self) -> dict[str, Any]:
        out = dict(self._figures)
        out.update(self._counts)
        out["level"] = self._level
        return out

    # -- persistence ----------------------------------------------------------------------
    def snapshot(self) -> dict[str, Any]:
        return {
            "learners": {n: _pack(m) for n, m in self.learners.items()},
            "impute": {k: list(v) for k, v in self._impute.items()},
            "truth_n": self._truth_n, "truth_mean": self._truth_mean,
            "tokens": self._tokens, "tokens_t": self._tokens_t, "counts": dict(self._counts),
            "model_loss": self._model_loss.tolist(), "learner_loss": self._learner_loss.tolist(),
            "pos": self._pos, "filled": self._filled, "since_eval": self._since_eval,
            "level": self._level, "calm_run": self._calm_run, "figures": self._figures,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self.learners = {n: _unpack(data["learners"][n]) if n in data["learners"]
                         else make_learner(n, self.settings.seed) for n in self.names}
        self._impute = {k: [float(a), float(b)] for k, (a, b) in data["impute"].items()}
        self._truth_n = int(data["truth_n"])
        self._truth_mean = float(data["truth_mean"])
        self._tokens = data["tokens"]
        self._tokens_t = float(data["tokens_t"])
        self._counts = {k: int(v) for k, v in data["counts"].items()}
        self._model_loss = np.array(data["model_loss"], dtype=float)
        self._learner_loss = np.array(data["learner_loss"], dtype=float).reshape(len(self.names), self.size)
        self._pos = int(data["pos"])
        self._filled = int(data["filled"])
        self._since_eval = int(data["since_eval"])
        self._level = data["level"]
        self._calm_run = int(data["calm_run"])
        self._figures = data["figures"]
