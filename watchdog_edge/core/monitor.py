"""The sans-I/O monitoring core: topic, payload and receive time in; events out.

``feed`` and ``tick`` are all an adapter needs. ``feed`` gives what ``apply(intake(...))``
gives: ``intake`` routes, parses and pairs (it owns the pairing buffers and the bad-record
counters) and returns typed steps (:class:`PredictionStep`, :class:`TruthStep`,
:class:`PairStep`, :class:`TickStep`, :class:`PlannedStep`); ``apply`` runs the live windows, the checks and the
alert states on them. A tuner intakes a recording once and applies the same steps to many
monitors built with other check settings. ``feed`` does both in one pass, without steps.

The core never reads a clock, opens a socket, starts a thread or touches disk.
"""

from __future__ import annotations

import base64
import math
from collections import deque
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from typing import Any, NamedTuple, TypeVar

import orjson

import watchdog_edge.core.checks as registry
from watchdog_edge.core.alerts import AlertBook
from watchdog_edge.core.cards import ModelCard, expected_loss
from watchdog_edge.core.checks.base import Check, CheckContext, Input, Verdict
from watchdog_edge.core.events import Alert, DeadLetter, Event, PlannedWork, VersionStarted, rfc3339
from watchdog_edge.core.losses import loss_function
from watchdog_edge.core.pairing import COUNTERS as PAIR_COUNTERS
from watchdog_edge.core.pairing import Pairer
from watchdog_edge.core.parsing import (
    REASONS,
    BadRecord,
    InexactNumber,
    RecordParser,
    decode,
    decode_exact,
    element_bytes,
)
from watchdog_edge.core.planned import CommandError, Schedule, Window
from watchdog_edge.core.records import Pair, Prediction, Truth
from watchdog_edge.core.settings import Config, ModelSettings
from watchdog_edge.core.topics import Router
from watchdog_edge.errors import CardError, ConfigError

_orjson_loads = orjson.loads
_OrjsonError = orjson.JSONDecodeError

SNAPSHOT_FORMAT = 1


# The steps of ``intake``, one small immutable class per kind. Tuples: a tuner keeps millions
# of them, and a tuple is the cheapest object to build and to keep.
class PredictionStep(NamedTuple):
    """A good prediction of one model, for ``apply``."""

    t: float
    model: str
    prediction: Prediction


class TruthStep(NamedTuple):
    """A good truth of one model, for ``apply``."""

    t: float
    model: str
    truth: Truth


class PairStep(NamedTuple):
    """A prediction paired with its truth, for ``apply``."""

    t: float
    model: str
    pair: Pair


class TickStep(NamedTuple):
    """A timer tick, for ``apply``."""

    t: float


class PlannedStep(NamedTuple):
    """Planned work began or ended: the window now holding each model, or None, for ``apply``."""

    t: float
    holding: dict[str, Window | None]


Step = PredictionStep | TruthStep | PairStep | TickStep | PlannedStep


@dataclass(slots=True, eq=False)
class PredictionLane:
    """Where the predictions of one topic filter go: one model's parser, pairer and track."""

    model: str
    parse: Callable[[Any, float], Prediction]  # the parser's bound method
    pairer: Pairer
    track: ModelTrack


@dataclass(slots=True, eq=False)
class TruthLane:
    """Where the truths of one topic filter go: one model's parser, pairer and track."""

    model: str
    parse: Callable[[Any, float], Truth]
    pairer: Pairer
    track: ModelTrack


Lane = PredictionLane | TruthLane
_R = TypeVar("_R", Prediction, Truth)


class ModelTrack:
    """Windows, checks and alert states of one model."""

    # slots: the attributes sit in the object itself, one memory read fewer each, which
    # counts when many models take turns and their objects are out of the cache
    __slots__ = (
        "settings", "card", "context", "loss", "checks", "_takes", "_judges", "_on_prediction", "_on_truth",
        "_on_pair", "_on_tick", "book", "keeps_features", "version", "version_seen", "pairs", "stale_pairs",
        "last_alert", "alerts", "planned",
    )  # fmt: skip

    def __init__(self, agent: str, settings: ModelSettings, card: ModelCard) -> None:
        self.settings = settings
        self.card = card
        try:
            exp, source = expected_loss(card)
        except CardError as e:
            raise ConfigError(f"models[{settings.id}].card: {e}") from None
        self.context = CheckContext(
            model=settings.id,
            card=card,
            loss_kind=card.loss,
            expected_loss=exp,
            expected_source=source,
            window_size=settings.window.size_pairs,
            window_max_age_s=settings.window.max_age_s,
            min_pairs=settings.window.min_pairs,
        )
        self.loss = loss_function(card.loss)
        self.checks: dict[str, Check[Any]] = {}
        for name in settings.enabled_checks():
            cls = registry.check_class(name)
            self.checks[name] = cls(settings.checks[name], self.context)

        # Per input kind: the checks that take it (as they declare), and those whose verdict
        # it may change.
        items = list(self.checks.items())
        self._takes: dict[Input, list[Check[Any]]] = {
            kind: [c for _, c in items if kind in c.takes] for kind in ("prediction", "truth", "pair")
        }
        self._judges = {
            kind: [(n, c) for n, c in items if kind in c.reacts_to] for kind in ("prediction", "truth", "pair", "tick")
        }

        # Per input kind, in check order: (name, its verb for the input or None, its evaluate
        # or None), as bound methods. A verb that returns False says evaluate would have
        # nothing new to say: the call is skipped (see Check.on_prediction).
        def route(kind: Input, verb: Callable[[Check[Any]], Any]) -> tuple[tuple[str, Any, Any], ...]:
            return tuple(
                (n, verb(c) if kind in c.takes else None, c.evaluate if kind in c.reacts_to else None)
                for n, c in items
                if kind in c.takes or kind in c.reacts_to
            )

        self._on_prediction = route("prediction", lambda c: c.on_prediction)
        self._on_truth = route("truth", lambda c: c.on_truth)
        self._on_pair = route("pair", lambda c: c.on_pair)
        self._on_tick = tuple((n, c.evaluate) for n, c in self._judges["tick"])
        self.book = AlertBook(agent, settings.id)
        self.keeps_features = any(c.pair_features for c in self._takes["pair"])
        self.version: str | None = None
        self.version_seen = False
        self.pairs = 0
        self.stale_pairs = 0
        self.last_alert: dict[str, Any] | None = None  # the latest published alert, in short
        self.alerts: dict[str, int] = {}  # "check/state/severity" -> alerts published
        self.planned: Window | None = None  # the planned-work window holding this model's raises

    def _verdict(self, name: str, verdict: Verdict, t: float, out: list[Event]) -> None:
        alert = self.book.update(name, verdict, t, self.version, self.planned is not None)
        if alert is not None:
            self._note(alert)
            out.append(alert)

    def _note(self, a: Alert) -> None:
        self.last_alert = {"check": a.check, "state": a.state, "severity": a.severity, "ts": a.ts, "t": a.t}
        key = f"{a.check}/{a.state}/{a.severity}"
        self.alerts[key] = self.alerts.get(key, 0) + 1

    def set_planned(self, window: Window | None, t: float, out: list[Event]) -> None:
        """Hold this model's raises in ``window``; ``None`` ends the holding and releases what was held."""
        was = self.planned
        self.planned = window
        if window is None and was is not None:
            why = f" ({was.reason})" if was.reason else ""
            note = (
                f"Raised at {{raised}} during planned work '{was.name}'{why}; held back and "
                f"published when the window ended at {rfc3339(t)}."
            )
            released = self.book.release(t, self.version, note)
            for a in released:
                self._note(a)
            out.extend(released)

    def prediction(self, p: Prediction, out: list[Event]) -> None:
        v = p.model_version
        if v is not None and v != self.version:
            self._new_version(p, out)
        self.version_seen = True
        t = p.t
        for name, take, ask in self._on_prediction:
            if (take is not None and not take(p)) or ask is None:
                continue
            verdict = ask(t)
            if verdict is not None:
                self._verdict(name, verdict, t, out)

    def _new_version(self, p: Prediction, out: list[Event]) -> None:
        if self.version_seen or self.version is not None:
            closed = self.book.close_all(
                p.t,
                self.version,
                f"Model version {p.model_version} replaced {self.version}; live windows start afresh.",
            )
            for a in closed:
                self._note(a)
            out.extend(closed)
            for check in self.checks.values():
                check.reset()
        out.append(VersionStarted(self.settings.id, p.t, self.version, p.model_version))
        self.version = p.model_version

    def truth(self, tr: Truth, out: list[Event]) -> None:
        # the loop of prediction() and pair(), written out in each: a shared helper would cost
        # one more call for every record
        t = tr.t
        for name, take, ask in self._on_truth:
            if (take is not None and not take(tr)) or ask is None:
                continue
            verdict = ask(t)
            if verdict is not None:
                self._verdict(name, verdict, t, out)

    def pair(self, pr: Pair, out: list[Event]) -> None:
        p = pr.prediction
        v = p.model_version
        if v is not None and v != self.version:
            self.stale_pairs += 1  # the pair belongs to a version no longer live
            return
        self.pairs += 1
        loss = self.loss(pr.truth.value, p.value)
        t = pr.t
        for name, take, ask in self._on_pair:
            if (take is not None and not take(pr, loss)) or ask is None:
                continue
            verdict = ask(t)
            if verdict is not None:
                self._verdict(name, verdict, t, out)

    def tick(self, t: float, out: list[Event]) -> None:
        for name, ask in self._on_tick:
            verdict = ask(t)
            if verdict is not None:
                self._verdict(name, verdict, t, out)

    def state(self) -> dict[str, Any]:
        checks = {}
        for name, check in self.checks.items():
            checks[name] = {"level": self.book.level(name), "figures": check.figures()}
        return {
            "model": self.settings.id,
            "model_version": self.version,
            "pairs": self.pairs,
            "stale_pairs": self.stale_pairs,
            "expected_loss": self.context.expected_loss,
            "expected_source": self.context.expected_source,
            "loss": self.context.loss_kind,
            "checks": checks,
            "last_alert": None if self.last_alert is None else {k: v for k, v in self.last_alert.items() if k != "t"},
            "planned_work": None if self.planned is None else self.planned.to_dict(),
            "held_raises": self.book.held,
            "held_open": self.book.holding(),
        }

    def snapshot(self) -> dict[str, Any]:
        return {
            "version": self.version,
            "version_seen": self.version_seen,
            "pairs": self.pairs,
            "stale_pairs": self.stale_pairs,
            "book": self.book.snapshot(),
            "checks": {n: c.snapshot() for n, c in self.checks.items()},
            "held_raises": self.book.held,
            "last_alert": self.last_alert,
            "alerts": dict(self.alerts),
            "planned": None if self.planned is None else self.planned.snapshot(),
        }

    def restore(self, data: dict[str, Any]) -> None:
        self.version = data["version"]
        self.version_seen = data["version_seen"]
        self.pairs = data["pairs"]
        self.stale_pairs = data["stale_pairs"]
        self.book.restore(data["book"])
        self.book.held = data.get("held_raises", 0)
        self.last_alert = data.get("last_alert")
        self.alerts = dict(data.get("alerts", {}))
        self.planned = None if data.get("planned") is None else Window.restore(data["planned"])
        for n, c in self.checks.items():
            if n in data["checks"]:
                c.restore(data["checks"][n])


class Monitor:
    """The core. Feed it what a recording line holds; act on the events it returns.

    >>> from watchdog_edge.core.settings import parse_config
    >>> cfg = parse_config({"models": [{"id": "m", "card": "m.json",
    ...     "prediction_topic": "site/pred", "truth_topic": "site/truth"}]})
    >>> card = ModelCard(model_id="m", training={"loss": 1.0, "count": 200}, fitted_parameters=3,
    ...                  least_squares=True)
    >>> mon = Monitor(cfg, {"m": card})
    >>> mon.feed("site/pred", b'{"id": 1, "value": 2.0}', t=100.0)
    []
    >>> mon.feed("site/truth", b'{"id": "1", "value": 2.5}', t=160.0)
    []
    >>> mon.status()["models"]["m"]["paired"]
    1
    """

    def __init__(self, config: Config, cards: dict[str, ModelCard], command_models: list[str] | None = None) -> None:
        # command_models: the models a planned-work window may name (default: this config's).
        # A JetStream partition's monitor holds some of the agent's models but meets every
        # command and config window of the agent, which may name the others.
        self.config = config
        self.agent = config.agent.name
        routes: list[tuple[str, Lane]] = []
        self.parsers: dict[tuple[str, str], RecordParser] = {}
        self.pairers: dict[str, Pairer] = {}
        self.tracks: dict[str, ModelTrack] = {}
        for m in config.models:
            if m.id not in cards:
                raise ConfigError(f"models[{m.id}].card: no model card was given for model {m.id!r}")
            self.parsers[(m.id, "prediction")] = RecordParser(m.id, "prediction", m.fields.prediction_map())
            self.parsers[(m.id, "truth")] = RecordParser(m.id, "truth", m.fields.truth_map())
            self.pairers[m.id] = Pairer(m.pairing.horizon_s, m.pairing.max_unpaired_records, m.id)
            self.tracks[m.id] = ModelTrack(self.agent, m, cards[m.id])
            pairer, track = self.pairers[m.id], self.tracks[m.id]
            routes.append(
                (m.prediction_topic, PredictionLane(m.id, self.parsers[(m.id, "prediction")].prediction, pairer, track))
            )
            routes.append((m.truth_topic, TruthLane(m.id, self.parsers[(m.id, "truth")].truth, pairer, track)))
        self.router: Router[Lane] = Router(routes)
        self._routes = self.router.cache  # looked up first: most topics are already there
        self.max_payload = config.agent.max_payload_bytes
        self.now = float("-inf")
        self.received = 0
        self.ticks = 0
        self.clock_backwards = 0
        self.bad = dict.fromkeys(REASONS, 0)
        self._dead: deque[DeadLetter] = deque()
        self._dead_bytes = 0
        self._exact: tuple[bytes | None, list[Any]] = (None, [])
        # planned work: the windows, the command topic, and the next time the holding may change
        self.schedule = Schedule(config.planned_work)
        self.command_models = list(self.tracks) if command_models is None else list(command_models)
        for pw in config.planned_work:
            unknown = [m for m in pw.models or () if m not in self.command_models]
            if unknown:
                raise ConfigError(
                    f"planned_work[{pw.name}].models: {unknown[0]!r} is not a model of this config; "
                    f"models are {', '.join(self.command_models)}"
                )
        self.command_topic = config.broker.topics.planned_work.replace("{agent}", self.agent)
        if self.router.route(self.command_topic):
            raise ConfigError(
                f"broker.topics.planned_work = {config.broker.topics.planned_work!r}: the command topic "
                f"{self.command_topic!r} matches a model's prediction or truth topic; give it a topic of its own"
            )
        self._pw_next = -math.inf if self.schedule else math.inf
        self._pw_active: dict[str, Window] = {}

    # -- time -------------------------------------------------------------------------------
    def _clock(self, t: float) -> float:
        t = float(t)
        if t < self.now:
            self.clock_backwards += 1
            return self.now
        self.now = t
        return t

    # -- intake: route, parse, pair ---------------------------------------------------------
    def _dead_letter(self, topic: str, t: float, reason: str, detail: str, raw: bytes, out: list[Any]) -> None:
        self.bad[reason] += 1
        raw = raw[: self.max_payload]
        dl = DeadLetter(topic, t, reason, detail, raw)
        self._dead.append(dl)
        self._dead_bytes += len(raw)
        limits = self.config.agent
        while self._dead and (
            len(self._dead) > limits.dead_letter_max_count or self._dead_bytes > limits.dead_letter_max_bytes
        ):
            self._dead_bytes -= len(self._dead.popleft().payload)
        out.append(dl)

    def _message(
        self, topic: str, payload: bytes | str, t: float, out: list[Any]
    ) -> tuple[float, bytes, tuple[Lane, ...], Any] | None:
        """What ``intake`` (and ``feed``, written out) does first: the clock, routing, expiry, decoding.

        Returns the receive time, raw bytes, lanes and decoded elements; None when the message
        went to the dead letters (in ``out``).
        """
        if type(t) is not float:
            t = float(t)
        if t < self.now:
            self.clock_backwards += 1
            t = self.now
        else:
            self.now = t
        self.received += 1
        if type(payload) is bytes:
            raw = payload
        else:
            raw = payload.encode() if isinstance(payload, str) else bytes(payload)
        if t >= self._pw_next:
            self._planned(t, out, True)
        lanes = self._routes.get(topic) or self.router.route(topic)
        if not lanes:
            if topic == self.command_topic:
                self._command(raw, t, out, True)
                return None
            self._dead_letter(topic, t, "unknown_topic", f"no model listens on topic {topic!r}", raw, out)
            return None
        for lane in lanes:
            pairer = lane.pairer
            if t > pairer.due:  # Pairer.expire(t) written out: mostly it only notes the time
                pairer.now = t
                if t > pairer.late:
                    pairer.expire(t)
        # decode()'s common case written out (a payload orjson reads as an object or an array);
        # anything else goes through decode() for its rules and its reasons
        doc = None
        if len(raw) <= self.max_payload:
            try:
                doc = _orjson_loads(raw)
            except _OrjsonError:
                pass
        if type(doc) is dict:
            elements: Any = (doc,)
        elif type(doc) is list:
            elements = doc
        else:
            try:
                elements = decode(raw, self.max_payload)
            except BadRecord as e:
                self._dead_letter(topic, t, e.reason, e.detail, raw, out)
                return None
        return t, raw, lanes, elements

    def feed(self, topic: str, payload: bytes | str, t: float) -> list[Any]:
        """One received message at receive time ``t``; the events it causes."""
        # The hot path: what _message() does is written out here, and each lane kind's loop
        # with the track's prediction and truth loops, to save calls per message and per record
        # (about 2 % of replay's instructions, measured with callgrind). intake() calls
        # _message(); tests/test_monitor.py holds feed and apply(intake(...)) equal.
        if type(t) is not float:
            t = float(t)
        if t < self.now:
            self.clock_backwards += 1
            t = self.now
        else:
            self.now = t
        self.received += 1
        if type(payload) is bytes:
            raw = payload
        else:
            raw = payload.encode() if isinstance(payload, str) else bytes(payload)
        out: list[Any] = []
        if t >= self._pw_next:
            self._planned(t, out, False)
        lanes = self._routes.get(topic) or self.router.route(topic)
        if not lanes:
            if topic == self.command_topic:
                self._command(raw, t, out, False)
                return out
            self._dead_letter(topic, t, "unknown_topic", f"no model listens on topic {topic!r}", raw, out)
            return out
        for lane in lanes:
            pairer = lane.pairer
            if t > pairer.due:  # Pairer.expire(t) written out: mostly it only notes the time
                pairer.now = t
                if t > pairer.late:
                    pairer.expire(t)
        # decode()'s common case written out (a payload orjson reads as an object or an array);
        # anything else goes through decode() for its rules and its reasons
        doc = None
        if len(raw) <= self.max_payload:
            try:
                doc = _orjson_loads(raw)
            except _OrjsonError:
                pass
        if type(doc) is dict:
            elements: Any = (doc,)
        elif type(doc) is list:
            elements = doc
        else:
            try:
                elements = decode(raw, self.max_payload)
            except BadRecord as e:
                self._dead_letter(topic, t, e.reason, e.detail, raw, out)
                return out
        for lane in lanes:
            pairer, track = lane.pairer, lane.track
            if isinstance(lane, PredictionLane):
                parse_p = lane.parse
                for el in elements:
                    try:
                        p = parse_p(el, t)
                    except BadRecord as e:
                        rejected = self._reject(e, parse_p, el, elements, raw, topic, t, out)
                        if rejected is None:
                            continue
                        p = rejected
                    # track.prediction(p, out) written out (p.t is t): a call and its argument
                    # passing saved on every prediction, the replay's hottest path
                    v = p.model_version
                    if v is not None and v != track.version:
                        track._new_version(p, out)
                    track.version_seen = True
                    for name, take, ask in track._on_prediction:
                        if (take is not None and not take(p)) or ask is None:
                            continue
                        verdict = ask(t)
                        if verdict is not None:
                            track._verdict(name, verdict, t, out)
                    if not track.keeps_features:
                        p.features = {}  # rebound, not cleared: a check may still hold the dict
                    pr = pairer.add_prediction(p)
                    if pr is not None:
                        track.pair(pr, out)
            else:
                parse_t = lane.parse
                for el in elements:
                    try:
                        tr = parse_t(el, t)
                    except BadRecord as e:
                        rejected_t = self._reject(e, parse_t, el, elements, raw, topic, t, out)
                        if rejected_t is None:
                            continue
                        tr = rejected_t
                    # track.truth(tr, out) written out (tr.t is t)
                    for name, take, ask in track._on_truth:
                        if (take is not None and not take(tr)) or ask is None:
                            continue
                        verdict = ask(t)
                        if verdict is not None:
                            track._verdict(name, verdict, t, out)
                    pr = pairer.add_truth(tr)
                    if pr is not None:
                        track.pair(pr, out)
        return out

    def intake(self, topic: str, payload: bytes | str, t: float) -> list[Step | DeadLetter | PlannedWork]:
        """Route, parse and pair one message like ``feed``, without running the checks.

        Returns the steps and dead letters; :meth:`apply` of them gives the events ``feed``
        would have given, in the same order.
        """
        out: list[Any] = []
        opened = self._message(topic, payload, t, out)
        if opened is None:
            return out
        t, raw, lanes, elements = opened
        add = out.append
        # Steps are built with tuple.__new__, skipping NamedTuple's Python-level __new__: half
        # the cost of a step, and a tuner builds one or two per record.
        new = tuple.__new__
        for lane in lanes:
            pairer, model = lane.pairer, lane.model
            if isinstance(lane, PredictionLane):
                parse_p = lane.parse
                for el in elements:
                    try:
                        p = parse_p(el, t)
                    except BadRecord as e:
                        rejected = self._reject(e, parse_p, el, elements, raw, topic, t, out)
                        if rejected is None:
                            continue
                        p = rejected
                    add(new(PredictionStep, (t, model, p)))
                    pr = pairer.add_prediction(p)
                    if pr is not None:
                        add(new(PairStep, (t, model, pr)))
            else:
                parse_t = lane.parse
                for el in elements:
                    try:
                        tr = parse_t(el, t)
                    except BadRecord as e:
                        rejected_t = self._reject(e, parse_t, el, elements, raw, topic, t, out)
                        if rejected_t is None:
                            continue
                        tr = rejected_t
                    add(new(TruthStep, (t, model, tr)))
                    pr = pairer.add_truth(tr)
                    if pr is not None:
                        add(new(PairStep, (t, model, pr)))
        return out

    def _reject(
        self,
        e: BadRecord,
        parse: Callable[[Any, float], _R],
        el: Any,
        elements: list[Any],
        raw: bytes,
        topic: str,
        t: float,
        out: list[Any],
    ) -> _R | None:
        """Dead-letter a bad element; an inexact number gets a second, exact reading first."""
        if type(e) is InexactNumber:
            k = next(i for i, x in enumerate(elements) if x is el)
            if self._exact[0] is not raw:  # read once per payload, however many elements need it
                self._exact = (raw, decode_exact(raw))
            try:
                return parse(self._exact[1][k], t)
            except BadRecord as again:
                e = again
        self._dead_letter(topic, t, e.reason, e.detail, raw if len(elements) == 1 else element_bytes(el), out)
        return None

    # -- planned work ------------------------------------------------------------------------
    def _command(self, raw: bytes, t: float, out: list[Any], steps: bool) -> None:
        """A message on the planned-work command topic: begin or end a window (planned.py)."""
        try:
            doc = decode(raw, self.max_payload)
            if len(doc) != 1:
                raise CommandError("send one planned-work command per message, as one JSON object")
            self.schedule.command(doc[0], t, self.command_models)
        except BadRecord as e:
            self._dead_letter(self.command_topic, t, "bad_command", f"not a planned-work command: {e.detail}", raw, out)
            return
        except CommandError as e:
            self._dead_letter(self.command_topic, t, "bad_command", str(e), raw, out)
            return
        self._planned(t, out, steps)

    def _planned(self, t: float, out: list[Any], steps: bool) -> None:
        """Windows may have begun or ended by ``t``: report them and set each model's holding."""
        self._pw_next = self.schedule.next_change(t)
        active = self.schedule.windows_at(t)
        now = {w.name: w for w in active}
        for name, w in self._pw_active.items():
            if name not in now:
                out.append(PlannedWork(t, "ended", w.to_dict()))
        for name, w in now.items():
            if self._pw_active.get(name) != w:
                out.append(PlannedWork(t, "began", w.to_dict()))
        self._pw_active = now
        holding: dict[str, Window | None] = {}
        for m in self.tracks:
            covering = [w for w in active if w.covers(m)]
            holding[m] = max(covering, key=lambda w: (w.end, w.name)) if covering else None
        if steps:
            out.append(PlannedStep(t, holding))
        else:
            self._hold(holding, t, out)

    def _hold(self, holding: dict[str, Window | None], t: float, out: list[Any]) -> None:
        for m, w in holding.items():
            self.tracks[m].set_planned(w, t, out)

    def _expire(self, t: float) -> None:
        for p in self.pairers.values():
            p.expire(t)

    def intake_tick(self, t: float) -> list[Step | DeadLetter | PlannedWork]:
        """A timer tick as a step."""
        t = self._clock(t)
        self.ticks += 1
        self._expire(t)
        if t >= self._pw_next:
            out: list[Any] = []
            self._planned(t, out, True)
            out.append(TickStep(t))
            return out
        return [TickStep(t)]

    # -- apply: windows, checks, alerts -----------------------------------------------------
    def apply(self, steps: Iterable[Step | DeadLetter | PlannedWork]) -> list[Event]:
        """Run steps from ``intake`` through the checks; dead letters pass through."""
        out: list[Event] = []
        tracks = self.tracks
        for s in steps:
            # the common kinds first; ``type(s) is`` is the cheapest test of a step's kind
            if type(s) is PairStep:
                tracks[s.model].pair(s.pair, out)
            elif type(s) is PredictionStep:
                tracks[s.model].prediction(s.prediction, out)
            elif type(s) is TruthStep:
                tracks[s.model].truth(s.truth, out)
            elif type(s) is TickStep:
                if s.t > self.now:
                    self.now = s.t
                for tr in tracks.values():
                    tr.tick(s.t, out)
            elif type(s) is PlannedStep:
                self._hold(s.holding, s.t, out)
            elif isinstance(s, (DeadLetter, PlannedWork)):  # they pass through
                out.append(s)
        return out

    def relevant(self, steps: Iterable[Step | DeadLetter | PlannedWork]) -> list[Step]:
        """The steps that can change this monitor's alerts, for applying one recording many times.

        Pairs and ticks are kept; a prediction or truth only where some enabled check of its
        model takes or judges it, or where a prediction starts a new model version. Dead
        letters are dropped. ``apply`` of the result gives the same alerts as ``apply`` of all.
        """
        wants = {
            m: (
                bool(tr._takes["prediction"] or tr._judges["prediction"]),
                bool(tr._takes["truth"] or tr._judges["truth"]),
            )
            for m, tr in self.tracks.items()
        }
        version: dict[str, str | None] = {}
        out: list[Step] = []
        for s in steps:
            if type(s) is PredictionStep:
                v = s.prediction.model_version
                new_version = v is not None and v != version.get(s.model)
                if new_version:
                    version[s.model] = v
                if not (wants[s.model][0] or new_version):
                    continue
            elif type(s) is TruthStep:
                if not wants[s.model][1]:
                    continue
            elif type(s) is not PairStep and type(s) is not TickStep and type(s) is not PlannedStep:
                continue  # a dead letter or a planned-work event
            out.append(s)
        return out

    def tick(self, t: float) -> list[Event]:
        """A timer tick at core time ``t``."""
        return self.apply(self.intake_tick(t))

    # -- state ------------------------------------------------------------------------------
    @property
    def records(self) -> int:
        """Good records taken (every one reaches its model's pairer, duplicates included)."""
        return sum(p.counts["predictions"] + p.counts["truths"] for p in self.pairers.values())

    def models(self) -> list[str]:
        return list(self.tracks)

    def state(self, model: str) -> dict[str, Any]:
        """Every check's level and latest figures for one model."""
        st = self.tracks[model].state()
        st["pairing"] = dict(self.pairers[model].counts)
        st["pending"] = self.pairers[model].pending
        return st

    def status(self) -> dict[str, Any]:
        """Counters of the whole core."""
        totals = dict.fromkeys(PAIR_COUNTERS, 0)
        per_model = {}
        for m, p in self.pairers.items():
            per_model[m] = dict(p.counts, pending=p.pending, stale_pairs=self.tracks[m].stale_pairs)
            for k, v in p.counts.items():
                totals[k] += v
        return {
            "received": self.received,
            "records": self.records,
            "ticks": self.ticks,
            "bad": {k: v for k, v in self.bad.items() if v},
            "bad_total": sum(self.bad.values()),
            "clock_backwards": self.clock_backwards,
            "dead_letters_kept": len(self._dead),
            "planned_work": self.active_windows(),
            "held_raises": sum(tr.book.held for tr in self.tracks.values()),
            "alerts": self.alert_counts(),
            **totals,
            "models": per_model,
        }

    def active_windows(self) -> list[dict[str, Any]]:
        """The planned-work windows active at the last time fed, as shown in status."""
        return [w.to_dict() for w in self._pw_active.values()]

    def alert_counts(self) -> dict[str, dict[str, dict[str, int]]]:
        """Alerts published since the first start: check -> state -> severity -> count."""
        out: dict[str, dict[str, dict[str, int]]] = {}
        for tr in self.tracks.values():
            for key, n in tr.alerts.items():
                check, state, severity = key.split("/")
                by_sev = out.setdefault(check, {}).setdefault(state, {})
                by_sev[severity] = by_sev.get(severity, 0) + n
        return out

    def dead_letters(self) -> list[DeadLetter]:
        """The dead letters the core still holds (bounded by count and bytes)."""
        return list(self._dead)

    # -- snapshot ---------------------------------------------------------------------------
    def snapshot(self) -> dict[str, Any]:
        """All state as plain JSON-able data."""
        return {
            "format": SNAPSHOT_FORMAT,
            "agent": self.agent,
            "now": self.now if self.now != float("-inf") else None,  # strict JSON has no infinity
            "received": self.received,
            "records": self.records,
            "ticks": self.ticks,
            "clock_backwards": self.clock_backwards,
            "bad": dict(self.bad),
            "dead": [
                {
                    "topic": d.topic,
                    "t": d.t,
                    "reason": d.reason,
                    "detail": d.detail,
                    "payload": base64.b64encode(d.payload).decode(),
                }
                for d in self._dead
            ],
            "pairers": {m: p.snapshot() for m, p in self.pairers.items()},
            "tracks": {m: tr.snapshot() for m, tr in self.tracks.items()},
            "planned": {
                "commands": self.schedule.snapshot(),
                "active": [w.snapshot() for w in self._pw_active.values()],
            },
        }

    @classmethod
    def restore(
        cls,
        config: Config,
        cards: dict[str, ModelCard],
        data: dict[str, Any],
        command_models: list[str] | None = None,
    ) -> Monitor:
        """A monitor that continues exactly where ``snapshot`` left off."""
        if data.get("format") != SNAPSHOT_FORMAT:
            raise ConfigError(f"snapshot format {data.get('format')!r} is not {SNAPSHOT_FORMAT}; start without it")
        mon = cls(config, cards, command_models)
        mon.now = float(data["now"]) if data["now"] is not None else float("-inf")
        mon.received = data["received"]
        mon.ticks = data["ticks"]
        mon.clock_backwards = data["clock_backwards"]
        mon.bad.update(data["bad"])
        for d in data["dead"]:
            dl = DeadLetter(d["topic"], d["t"], d["reason"], d["detail"], base64.b64decode(d["payload"]))
            mon._dead.append(dl)
            mon._dead_bytes += len(dl.payload)
        for m, snap in data["pairers"].items():
            if m in mon.pairers:
                mon.pairers[m].restore(snap)
        for m, snap in data["tracks"].items():
            if m in mon.tracks:
                mon.tracks[m].restore(snap)
        planned = data.get("planned") or {"commands": [], "active": []}
        mon.schedule.restore(planned["commands"])
        mon._pw_active = {d["name"]: Window.restore(d) for d in planned["active"]}
        mon._pw_next = -math.inf if (mon.schedule or mon._pw_active) else math.inf
        return mon
