"""``baseline``: does a cheap online learner beat the deployed model on the same pairs?

Learners from river, chosen by name: ``mean`` (a running mean of the truth), ``linear``
(standard scaling, then linear regression by SGD) and ``tree`` (a Hoeffding adaptive tree
regressor). Each is scored test-then-train on every pair that carries features: it predicts
from the pair's features, its loss (the card's loss kind) is taken, and then it learns the
truth. A learner that cannot predict yet (or gives a non-finite value) is scored on the running
mean of the truths.

Every ``evaluate_every_pairs`` scored pairs, over the last ``recent_pairs`` scored pairs, each learner's
losses are compared with the model's by a one-sided Diebold-Mariano test on the differences
(model loss - learner loss; Newey-West long-run variance, Harvey-Leybourne-Newbold correction,
Student t with n - 1 degrees of freedom; see ``watchdog_edge.core.stats.diebold_mariano``). The check
raises when some learner is better with p < 1 - ``confidence`` and by a margin
1 - learner loss / model loss of at least ``margin`` (critical from ``critical_margin``), and
clears when no learner has been better, by ``margin`` x (1 - ``hysteresis``), for
``clear_after_evaluations`` evaluations in a row.

Inputs: a missing feature (null or absent) is imputed by the mean of its earlier observed
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
from typing import Any, Literal, cast

import numpy as np
from pydantic import Field, field_validator, model_validator

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Level, Verdict, fmt
from watchdog_edge.core.levels import LevelRule
from watchdog_edge.core.records import Pair
from watchdog_edge.core.stats import diebold_mariano

LearnerName = Literal["mean", "linear", "tree"]

DESCRIPTIONS = {
    "mean": "running mean of the truth",
    "linear": "online linear regression on the inputs",
    "tree": "online regression tree (Hoeffding adaptive tree)",
}


class BaselineSettings(CheckSettings):
    """Settings of ``baseline`` (opt-in; uses river).

    >>> s = BaselineSettings(learners=["mean", "tree"], learn_share=0.5)
    >>> s.confidence, s.margin, s.recent_pairs
    (0.99, 0.1, None)
    """

    learners: list[LearnerName] = Field(
        default_factory=lambda: list[LearnerName](["mean", "linear"]),
        min_length=1,
        description="Online learners to compare the model with: mean, linear, tree.",
    )
    confidence: float = Field(
        0.99, gt=0.5, lt=1, description="One-sided confidence of the Diebold-Mariano test that a learner is better."
    )
    margin: float = Field(
        0.1, ge=0, lt=1, description="Raise only when 1 - learner loss / model loss is at least this."
    )
    critical_margin: float | None = Field(
        None, gt=0, lt=1, description="Critical when the margin is at least this (null: warning only)."
    )
    recent_pairs: int | None = Field(
        None, ge=30, le=100_000, description="Latest scored pairs compared (null: the model's window.size_pairs)."
    )
    min_pairs: int = Field(200, ge=20, description="Scored pairs needed in the window before the first test.")
    evaluate_every_pairs: int = Field(
        200, ge=1, description="Scored pairs between tests (a slow signal: each test costs about 0.1 ms per learner)."
    )
    hysteresis: float = Field(
        0.5, ge=0, lt=1, description="Clear only when no learner is better by margin x (1 - this) with confidence."
    )
    clear_after_evaluations: int = Field(3, ge=1, description="Evaluations in a row that must meet the clearing rule.")
    learn_share: float = Field(
        1.0, gt=0, le=1, description="Share of pairs the learners use, chosen by a hash of the pair id."
    )
    max_pairs_per_s: float | None = Field(
        None, gt=0, description="At most this many pairs per second of core time are used (null: no limit)."
    )
    seed: int = Field(0, ge=0, description="Seed of the tree learner's randomness, so replay equals live.")

    @field_validator("learners")
    @classmethod
    def _unique(cls, v: list[str]) -> list[str]:
        if len(set(v)) != len(v):
            raise ValueError(f"learners {v} name a learner twice; list each once")
        return v

    @model_validator(mode="after")
    def _order(self) -> BaselineSettings:
        if self.critical_margin is not None and self.critical_margin < self.margin:
            raise ValueError(f"critical_margin ({self.critical_margin}) must be >= margin ({self.margin})")
        if self.recent_pairs is not None and self.min_pairs > self.recent_pairs:
            raise ValueError(f"min_pairs ({self.min_pairs}) must be <= recent_pairs ({self.recent_pairs})")
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


class BaselineCheck(Check[BaselineSettings]):
    """Test-then-train online learners against the deployed model, by Diebold-Mariano.

    >>> import random
    >>> from watchdog_edge.core.cards import ModelCard
    >>> from watchdog_edge.core.records import Prediction, Truth
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 100}, fitted_parameters=2,
    ...                  holdout={"loss": 1.0, "count": 50})
    >>> ctx = CheckContext("m", card, "squared", 1.0, "holdout", window_size=300)
    >>> check = BaselineCheck(BaselineSettings(learners=["mean"]), ctx)
    >>> rng, verdicts = random.Random(1), []
    >>> for i in range(300):       # the truth hovers near 10; the model always says 7
    ...     y = 10 + rng.gauss(0, 1)
    ...     pair = Pair(Prediction("m", str(i), 7.0, i, features={"x": 1.0}), Truth("m", str(i), y, i), i)
    ...     due = check.on_pair(pair, (y - 7.0) ** 2)   # False: evaluate is not due (may be skipped)
    ...     verdicts.append(check.evaluate(float(i)))
    >>> v = [v for v in verdicts if v is not None][-1]
    >>> v.level, v.figures["learner"], v.figures["margin"] > 0.5
    ('warning', 'mean', True)
    """

    name = "baseline"
    takes = frozenset({"pair"})
    reacts_to = frozenset({"pair"})  # its windows move only with pairs
    settings_model = BaselineSettings

    def __init__(self, settings: BaselineSettings, context: CheckContext) -> None:
        super().__init__(settings, context)
        self.names: tuple[str, ...] = tuple(settings.learners)
        self.size = settings.recent_pairs if settings.recent_pairs is not None else context.window_size
        self.min_pairs = min(settings.min_pairs, self.size)
        self._every = settings.evaluate_every_pairs
        self._absolute = context.loss_kind == "absolute"
        self.learners = {n: make_learner(n, settings.seed) for n in self.names}
        self._order = [self.learners[n] for n in self.names]
        self._budgeted = settings.learn_share < 1.0 or settings.max_pairs_per_s is not None
        # Imputation: each feature's sum of observed values, and its count of them as
        # _cntv[i] + _n_fast (rows that had every known feature, in the known order).
        self._names: list[str] = []
        self._index: dict[str, int] = {}
        self._sumv: list[float] = []
        self._cntv: list[int] = []
        self._n_fast = 0
        self._fast_keys: tuple[str, ...] = ()
        self._pending: list[dict[str, float]] = []  # complete rows not yet in the sums
        self._truth_mean = 0.0
        self._tokens: float | None = None
        self._tokens_t = 0.0
        self._n_scored = self._n_no_features = self._n_skip_share = self._n_skip_rate = self._n_imputed = 0
        self._rule = LevelRule(settings.clear_after_evaluations)
        self.reset()

    def reset(self) -> None:
        # A new model version: the comparison starts over; the learners keep what they learned
        # about the process, which does not depend on the deployed model.
        # plain lists as ring buffers: cheaper to write one item than numpy arrays
        self._model_loss = [0.0] * self.size
        self._learner_loss = [[0.0] * self.size for _ in self.names]
        self._pos = 0
        self._filled = 0
        self._since_eval = 0
        self._model_mean = math.nan
        self._rule.reset()
        self._figures: dict[str, Any] = {}

    # -- intake ---------------------------------------------------------------------------
    def _admit(self, pair: Pair) -> bool:
        s = self.settings
        if s.learn_share < 1.0 and hash_share(pair.id) >= s.learn_share:
            self._n_skip_share += 1
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
                self._n_skip_rate += 1
                return False
            self._tokens -= 1.0
        return True

    def _fold(self) -> None:
        """Add the pending complete rows to the imputation sums.

        Done every 256 such rows and before any imputation, at points fixed by the data alone,
        so the rounding is the same live, in replay and after a restore.
        """
        pend = self._pending
        if not pend:
            return
        sumv, index = self._sumv, self._index
        for name in self._fast_keys:
            sumv[index[name]] += sum([d[name] for d in pend])
        self._n_fast += len(pend)
        pend.clear()

    def _inputs(self, feats: dict[str, float | None]) -> dict[str, float]:
        """The slow path: impute missing features, take in new ones."""
        self._fold()
        index, sumv, cntv = self._index, self._sumv, self._cntv
        x: dict[str, float] = {}
        imputed = 0
        for name, v in feats.items():
            i = index.get(name)
            if i is None:  # a new feature: its count starts now
                i = index[name] = len(sumv)
                self._names.append(name)
                sumv.append(0.0)
                cntv.append(-self._n_fast)
            if v is None:
                c = cntv[i] + self._n_fast
                x[name] = sumv[i] / c if c else 0.0
                imputed += 1
            else:
                x[name] = v
                sumv[i] += v
                cntv[i] += 1
        if len(x) < len(sumv):
            for i, name in enumerate(self._names):
                if name not in x:
                    c = cntv[i] + self._n_fast
                    x[name] = sumv[i] / c if c else 0.0
                    imputed += 1
        self._fast_keys = tuple(self._names)
        self._n_imputed += imputed
        return x

    def on_pair(self, pair: Pair, loss: float) -> bool:
        feats = pair.prediction.features
        if not feats:
            self._n_no_features += 1
            return self._due()
        if self._budgeted and not self._admit(pair):
            return self._due()
        if None not in feats.values() and tuple(feats) == self._fast_keys:
            # the usual case, inline: the known features in the known order, none missing;
            # its values join the imputation sums in batches (see _fold)
            full = cast("dict[str, float]", feats)  # no value is None: tested just above
            pend = self._pending
            pend.append(full)
            if len(pend) >= 256:
                self._fold()
            x = full
        else:
            x = self._inputs(feats)
        y = pair.truth.value
        pos = self._pos
        fallback = self._truth_mean
        absolute = self._absolute
        isfinite = math.isfinite
        for learner, row in zip(self._order, self._learner_loss):
            p = learner.predict_one(x)
            if p is None or not isfinite(p):
                p = fallback
            e = y - p
            row[pos] = abs(e) if absolute else e * e
            learner.learn_one(x, y)
        self._model_loss[pos] = loss
        n = self._n_scored = self._n_scored + 1
        self._truth_mean = fallback + (y - fallback) / n
        pos += 1
        self._pos = pos if pos < self.size else 0
        if self._filled < self.size:
            self._filled += 1
        self._since_eval += 1
        return self._since_eval >= self._every and self._filled >= self.min_pairs  # _due() inline

    def _due(self) -> bool:
        """Whether evaluate would test now (its own guard)."""
        return self._since_eval >= self._every and self._filled >= self.min_pairs

    # -- verdict --------------------------------------------------------------------------
    def _ordered(self, a: list[float]) -> np.ndarray:
        if self._filled < self.size:
            return np.array(a[: self._filled])
        return np.array(a[self._pos :] + a[: self._pos])

    def compare(self) -> dict[str, dict[str, float]]:
        """Each learner against the model over the current window."""
        model = self._ordered(self._model_loss)
        m = self._model_mean = float(model.mean())
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
        # kept tiny: it runs after every record, and the test below needs closures (cells)
        if not self._due():
            return None
        return self._test()

    def _test(self) -> Verdict:
        s = self.settings
        self._since_eval = 0
        res = self.compare()
        model_mean = self._model_mean
        alpha = 1.0 - s.confidence
        passing = {n: r for n, r in res.items() if r["p_value"] < alpha and r["margin"] >= s.margin}
        if passing:
            best = max(passing, key=lambda n: passing[n]["margin"])
        else:
            best = min(res, key=lambda n: (res[n]["p_value"], -res[n]["margin"]))
        r = res[best]
        # Evidence for the one level rule (core/levels.py): the best passing learner raises;
        # any significant learner whose margin passes the eased margins keeps the level up.
        crit = s.critical_margin
        raised: Level = "normal"
        if passing:
            raised = "critical" if crit is not None and r["margin"] >= crit else "warning"
        ease = 1 - s.hysteresis
        calm: Level = "normal"
        for v in res.values():
            if v["p_value"] < alpha:
                if crit is not None and v["margin"] >= crit * ease:
                    calm = "critical"
                    break
                if v["margin"] >= s.margin * ease:
                    calm = "warning"
        self._rule.update(raised, calm)
        self._figures = {
            "learner": best,
            "model_loss": model_mean,
            "learner_loss": r["learner_loss"],
            "statistic": r["statistic"],
            "p_value": r["p_value"],
            "margin": r["margin"],
            "confidence": s.confidence,
            "required_margin": s.margin,
            "pairs": self._filled,
            "learners": res,
            "loss": self.context.loss_kind,
            **self.counts(),
        }
        return Verdict(self._rule.level, self._summary(best, r), dict(self._figures))

    def _summary(self, best: str, r: dict[str, float]) -> str:
        kind = "squared" if self.context.loss_kind == "squared" else "absolute"
        model = self._figures["model_loss"]
        n = self._filled
        if self._rule.level == "normal":
            return (
                f"No online learner beats the deployed model with confidence over the last {n} pairs "
                f"(best: {DESCRIPTIONS[best]}, mean {kind} error {fmt(r['learner_loss'])} against "
                f"the model's {fmt(model)})."
            )
        return (
            f"A cheap {DESCRIPTIONS[best]} beats the deployed model: mean {kind} error "
            f"{fmt(r['learner_loss'])} against the model's {fmt(model)} over the last {n} pairs "
            f"({r['margin']:.0%} lower, Diebold-Mariano p = {r['p_value']:.2g}); the model may need "
            f"retraining or its inputs checking."
        )

    def counts(self) -> dict[str, int]:
        """Pairs scored, pairs without features, pairs skipped by the budget, values imputed."""
        return {
            "scored": self._n_scored,
            "no_features": self._n_no_features,
            "skipped_share": self._n_skip_share,
            "skipped_rate": self._n_skip_rate,
            "imputed": self._n_imputed,
        }

    def figures(self) -> dict[str, Any]:
        out = dict(self._figures)
        out.update(self.counts())
        out["level"] = self._rule.level
        return out

    # -- persistence ----------------------------------------------------------------------
    def snapshot(self) -> dict[str, Any]:
        return {
            "learners": {n: _pack(m) for n, m in self.learners.items()},
            "features": list(self._names),
            "sums": list(self._sumv),
            "feature_counts": list(self._cntv),
            "n_fast": self._n_fast,
            "fast_keys": list(self._fast_keys),
            "truth_mean": self._truth_mean,
            "pending": [[d[k] for k in self._fast_keys] for d in self._pending],
            "tokens": self._tokens,
            "tokens_t": self._tokens_t,
            "counts": self.counts(),
            "model_loss": list(self._model_loss),
            "learner_loss": [list(r) for r in self._learner_loss],
            "pos": self._pos,
            "filled": self._filled,
            "since_eval": self._since_eval,
            "level": self._rule.level,
            "calm_run": self._rule.calm_run,
            "calm_top": self._rule.calm_top,
            "figures": self._figures,
        }

    def restore(self, data: dict[str, Any]) -> None:
        self.learners = {
            n: _unpack(data["learners"][n]) if n in data["learners"] else make_learner(n, self.settings.seed)
            for n in self.names
        }
        self._order = [self.learners[n] for n in self.names]
        self._names = list(data["features"])
        self._index = {name: i for i, name in enumerate(self._names)}
        self._sumv = [float(v) for v in data["sums"]]
        self._cntv = [int(v) for v in data["feature_counts"]]
        self._n_fast = int(data["n_fast"])
        self._fast_keys = tuple(data["fast_keys"])
        self._pending = [dict(zip(self._fast_keys, (float(v) for v in row))) for row in data["pending"]]
        self._truth_mean = float(data["truth_mean"])
        self._tokens = data["tokens"]
        self._tokens_t = float(data["tokens_t"])
        c = data["counts"]
        self._n_scored, self._n_no_features = int(c["scored"]), int(c["no_features"])
        self._n_skip_share, self._n_skip_rate = int(c["skipped_share"]), int(c["skipped_rate"])
        self._n_imputed = int(c["imputed"])
        self._model_loss = [float(v) for v in data["model_loss"]]
        self._learner_loss = [[float(v) for v in r] for r in data["learner_loss"]]
        self._pos = int(data["pos"])
        self._filled = int(data["filled"])
        self._since_eval = int(data["since_eval"])
        self._rule.restore(
            {"level": data["level"], "calm_run": data["calm_run"], "calm_top": data.get("calm_top", "normal")}
        )
        self._figures = data["figures"]
