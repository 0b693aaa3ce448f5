"""Choose check settings on recorded traffic: one parse pass, many settings, one worker per CPU.

The recording is parsed and paired once (``Monitor.intake``) into steps (with several workers,
each worker parses it too, alongside: see ``_Workers``); each setting of the grid is a Monitor
built from the config with some keys replaced, and ``apply(steps)`` gives its alerts. Checks do not see each other, so a check runs once per distinct value of the grid keys
that reach it (its own keys, and ``window.*`` for the checks that read the model's window), and
a setting's alerts are put together from those runs; checks the grid does not reach run once. A raised alert counts as a detection of an incident when it comes between the
incident's start and its end plus a grace period (default: one window, i.e. the window size
divided by the recording's pair rate); any other raised alert is a false alert.

Ranking with incidents: fewest missed incidents, then the fewest false alerts per day of the
setting *and its grid neighbours* (one step along one numeric key), then its own false alerts, then
the mean delay. Taking the neighbours in guards against the commonest way of overfitting a
threshold: picking a setting that sits just at the edge of a noisy region and was quiet on
this one recording by luck (common practice, no single source). Without incidents: the
tightest setting whose neighbourhood stays within the false-alert budget.

Grid file (TOML): each key is a dotted path inside a ``[[models]]`` entry, each value the list
of values to try, listed from the most alert-prone to the least (the order decides which
setting is "tightest" when there is no incidents file)::

    [grid]
    "window.size_pairs" = [100, 200, 400]
    "checks.gap.confidence" = [0.9, 0.95, 0.99]
    "checks.gap.warning_tolerance" = [0.25, 0.5, 1.0]
"""

from __future__ import annotations

import copy
import functools
import gc
import itertools
import math
import multiprocessing as mp
import os
import sys
import time
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import Alert, DeadLetter, PlannedWork
from watchdog_edge.core.monitor import Monitor, PairStep, Step
from watchdog_edge.core.renames import CONFIG_RENAMES
from watchdog_edge.core.settings import Config, parse_config
from watchdog_edge.core.stats import size_quantile_caches
from watchdog_edge.errors import ConfigError, RecordingError
from watchdog_edge.files.configfile import load_cards
from watchdog_edge.files.documents import read_document
from watchdog_edge.replay.recording import read_recording, with_ticks

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

# Keys that change what intake does (parsing, pairing, routing) cannot vary: the steps are shared.
TUNE_QUANTILE_CACHE_ENTRIES = 16384  # a day of one scenario over the default grid meets about 8,000
_FIXED_PREFIXES = ("id", "card", "prediction_topic", "truth_topic", "fields", "pairing")


# -- grid ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Setting:
    """One point of the grid: dotted key -> value, and its tightness (0 = most alert-prone)."""

    index: int
    values: dict[str, Any]
    tightness: float
    position: tuple[int, ...] = ()  # index of each value in its grid list

    def neighbours(self, others: Iterable[Setting]) -> list[Setting]:
        """Settings one step away along exactly one numeric grid key.

        A switch (``enabled = [true, false]``) or a choice of text (a detector's name) is not a
        scale: settings that differ there are not neighbours.
        """
        out = []
        for o in others:
            steps = 0
            for (_key, v), a, b in zip(self.values.items(), self.position, o.position):
                if a == b:
                    continue
                if not _is_number(v) or abs(a - b) != 1:
                    steps = 99
                    break
                steps += 1
            if steps == 1:
                out.append(o)
        return out

    def label(self) -> str:
        return ", ".join(f"{_short(k)}={v}" for k, v in self.values.items())


def _is_number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _short(key: str) -> str:
    return key.removeprefix("checks.")


def _flatten(prefix: str, obj: Any, out: dict[str, list]) -> None:
    if isinstance(obj, dict):
        for k, v in obj.items():
            _flatten(f"{prefix}.{k}" if prefix else k, v, out)
    elif isinstance(obj, list):
        if not obj:
            raise ConfigError(f"grid key {prefix!r} has an empty list; give at least one value")
        out[prefix] = obj
    else:
        out[prefix] = [obj]


def default_grid(cfg: Config) -> dict[str, list]:
    """A grid around the config's first model: three window sizes, gap confidence and tolerance;
    shift on or off when it is on (its index fires on any input with a daily cycle that the
    window does not cover whole); ADWIN's delta when drift is on."""
    m = cfg.models[0]
    size, min_pairs = m.window.size_pairs, m.window.min_pairs
    grid: dict[str, list] = {
        "window.size_pairs": sorted({max(min_pairs, size // 2), size, size * 2}),
        "checks.gap.confidence": [0.9, 0.95, 0.99],
        "checks.gap.warning_tolerance": [0.25, 0.5, 1.0],
    }
    enabled = m.enabled_checks()
    if "shift" in enabled:
        grid["checks.shift.enabled"] = [True, False]
    if "drift" in enabled:
        grid["checks.drift.delta"] = [0.01, 0.002, 0.0005]
    return grid


def load_grid(path: str | Path) -> dict[str, list]:
    """Read a grid file: a ``[grid]`` table of dotted keys -> lists of values."""
    p = Path(path)
    raw = read_document(p, "grid file", tomllib.loads, ConfigError, "TOML")
    if not isinstance(raw.get("grid"), dict) or not raw["grid"]:
        raise ConfigError(
            f'grid file {p} needs a [grid] table of keys -> lists, e.g. "checks.gap.warning_tolerance" = [0.25, 0.5]'
        )
    extra = [k for k in raw if k != "grid"]
    if extra:
        raise ConfigError(f"grid file {p}: unknown top-level key {extra[0]!r}; only [grid] is read")
    out: dict[str, list] = {}
    _flatten("", raw["grid"], out)
    return out


def expand(grid: dict[str, list]) -> list[Setting]:
    """Every combination of the grid's values, in a stable order."""
    for key in grid:
        new = CONFIG_RENAMES.get("models[]." + key)
        if new is not None:
            raise ConfigError(f"grid key {key!r} was renamed; write {new.removeprefix('models[].')!r} instead")
        if key.split(".")[0] in _FIXED_PREFIXES:
            raise ConfigError(
                f"grid key {key!r} cannot vary: parsing and pairing run once for all "
                "settings; tune window and check settings only"
            )
        if not key.startswith(("window.", "checks.")):
            raise ConfigError(
                f"grid key {key!r}: give a key inside a [[models]] entry that starts "
                "with 'window.' or 'checks.' (e.g. checks.gap.confidence)"
            )
    keys = list(grid)
    out = []
    for i, combo in enumerate(itertools.product(*(range(len(grid[k])) for k in keys))):
        tight = sum(pos / (len(grid[k]) - 1) for k, pos in zip(keys, combo) if len(grid[k]) > 1)
        out.append(Setting(i, {k: grid[k][pos] for k, pos in zip(keys, combo)}, tight, tuple(combo)))
    return out


def _set(d: dict, dotted: str, value: Any) -> None:
    parts = dotted.split(".")
    for p in parts[:-1]:
        nxt = d.get(p)
        if not isinstance(nxt, dict):
            nxt = {}
            d[p] = nxt
        d = nxt
    d[parts[-1]] = value


def with_setting(raw: dict, setting: Setting, models: list[str] | None) -> dict:
    """A copy of the raw config data with the setting's keys set in the chosen models."""
    data = copy.deepcopy(raw)
    for m in data.get("models", []):
        if models is None or m.get("id") in models:
            for k, v in setting.values.items():
                _set(m, k, v)
    return data


# -- one shared parse pass ----------------------------------------------------------------------
@dataclass
class Intake:
    """A recording parsed and paired once: the steps every setting is applied to."""

    steps: list[Step]
    start: float
    end: float
    pairs: dict[str, int]
    pair_span: dict[str, tuple[float, float]]

    def pair_rate(self, model: str) -> float:
        """Pairs per second of core time for one model (0 when it has fewer than two)."""
        a, b = self.pair_span.get(model, (0.0, 0.0))
        n = self.pairs.get(model, 0)
        return (n - 1) / (b - a) if n > 1 and b > a else 0.0


def intake_recording(
    config: Config, cards: dict[str, ModelCard], recording: str | Path, tick_every: float | None = None
) -> Intake:
    """Parse and pair a recording once, through the same core as replay."""
    mon = Monitor(config, cards)
    steps: list[Step] = []
    start = end = math.nan
    pairs: dict[str, int] = {}
    span: dict[str, tuple[float, float]] = {}
    intake, intake_tick, add = mon.intake, mon.intake_tick, steps.append
    lines = read_recording(recording)
    for line in with_ticks(lines, tick_every) if tick_every else lines:
        t = line.t
        if line.tick:
            out = intake_tick(t)
        else:
            assert line.topic is not None and line.payload is not None  # a message line has both
            out = intake(line.topic, line.payload, t)
        if not t <= end:  # the first line (end is NaN) or a later receive time
            end = t
            if math.isnan(start):
                start = t
        for s in out:
            if isinstance(s, (DeadLetter, PlannedWork)):  # events, not steps
                continue
            add(s)
            if type(s) is PairStep:
                pairs[s.model] = pairs.get(s.model, 0) + 1
                a, _ = span.get(s.model, (s.t, s.t))
                span[s.model] = (a, s.t)
    if not steps:
        raise RecordingError(
            f"recording {recording} gave no predictions or truths on the config's topics; "
            "check the topics in the config against the recording"
        )
    return Intake(steps, start, end, pairs, span)


# -- which checks a grid reaches ----------------------------------------------------------------
# Checks with windows of their own: the model's [window] table does not reach them. A check
# not listed here is taken to read it (slower if wrong, never inexact).
_WINDOW_FREE = frozenset({"range", "shift", "feed_stop"})


def reaches(key: str, check: str) -> bool:
    """Whether a grid key can change the alerts of ``check``.

    >>> reaches("checks.gap.confidence", "gap"), reaches("window.size_pairs", "shift")
    (True, False)
    """
    parts = key.split(".")
    if parts[0] == "checks":
        return len(parts) > 1 and parts[1] == check
    return parts[0] == "window" and check not in _WINDOW_FREE


def varied_checks(keys: Iterable[str]) -> set[str]:
    """Checks whose alerts can differ between the grid's settings.

    Every other check gives the same alerts under every setting (checks do not see each other),
    so its alerts are computed once and shared; each varied check runs on its own, once per
    distinct value of the keys that reach it (see ``tune``).
    """
    from watchdog_edge.core.checks import CHECK_NAMES

    return {n for n in CHECK_NAMES for k in keys if reaches(k, n)}


def only_checks(raw: dict, drop: set[str], models: list[str] | None) -> dict:
    """Config data with the ``drop`` checks switched off (in the chosen models; every check in
    the others, whose alerts are not looked at)."""
    data = copy.deepcopy(raw)
    from watchdog_edge.core.checks import registered

    for m in data.get("models", []):
        chosen = models is None or m.get("id") in models
        for name in registered():
            if name in drop or not chosen:
                _set(m, f"checks.{name}.enabled", False)
    return data


def _sort_marks(marks: list[Mark]) -> list[Mark]:
    return sorted(marks, key=lambda m: (m.t, m.model, m.check, m.severity))


# -- evaluating settings ------------------------------------------------------------------------
@dataclass(frozen=True)
class Mark:
    """A raised alert, reduced to what scoring needs."""

    t: float
    model: str
    check: str
    severity: str


def apply_setting(
    config: Config,
    cards: dict[str, ModelCard],
    steps: list[Step],
    models: list[str] | None = None,
    checks: list[str] | None = None,
) -> list[Mark]:
    """The raised alerts of one setting on the shared steps (of ``models`` and ``checks``)."""
    mon = Monitor(config, cards)
    # Settings with the same checks switched on need the same steps: filter once per check set.
    key = tuple((m.id, tuple(m.enabled_checks())) for m in config.models)
    cache = _W.setdefault("relevant", {})
    if _W.get("relevant_of") is not steps:  # the object itself: an id() can be reused
        cache.clear()
        _W["relevant_of"] = steps
    if key not in cache:
        cache[key] = mon.relevant(steps)
    return _sort_marks(
        [
            Mark(e.t, e.model, e.check, e.severity)
            for e in mon.apply(cache[key])
            if isinstance(e, Alert)
            and e.state == "raised"
            and (models is None or e.model in models)
            and (checks is None or e.check in checks)
        ]
    )


_W: dict[str, Any] = {}
_SHARED = -1  # job index of the run of the checks the grid does not reach


def _init_worker(
    steps: list[Step], cards: dict[str, ModelCard], base_dir: str, models: list[str] | None, checks: list[str] | None
) -> None:
    _W.update(steps=steps, cards=cards, base_dir=Path(base_dir), models=models, checks=checks)


def _run_one(job: tuple[int, dict]) -> tuple[int, list[Mark]]:
    index, data = job
    cfg = parse_config(data, _W["base_dir"])
    return index, apply_setting(cfg, _W["cards"], _W["steps"], _W["models"], _W["checks"])


@dataclass(frozen=True)
class Checked:
    """A grid setting's config validated (in a worker): its error, or what the run needs of it."""

    index: int
    error: str | None
    checks_on: frozenset[str] = frozenset()  # in the chosen models
    window_pairs: tuple[tuple[str, int], ...] = ()  # (model, window.size_pairs) of the chosen models


def _check_setting(task: tuple[int, dict, str]) -> Checked:
    index, data, label = task
    try:
        cfg = parse_config(data, _W["base_dir"], f"grid setting {label}")
    except ConfigError as e:
        return Checked(index, str(e))
    models = _W["models"]
    chosen = [m for m in cfg.models if models is None or m.id in models]
    return Checked(
        index,
        None,
        frozenset(n for m in chosen for n in m.enabled_checks()),
        tuple((m.id, m.window.size_pairs) for m in chosen),
    )


def _segments(groups: list[Any], workers: int) -> list[int]:
    """Where each worker's run of tasks starts: ``workers`` runs of about equal length, each
    moved forward to the start of a group (a run of equal keys), so that a group is split
    only when it is longer than a run. The last entry is the number of tasks.

    >>> _segments(["a", "a", "b", "b", "b", "c"], 2)
    [0, 5, 6]
    """
    n = len(groups)
    starts = [0]
    for k in range(1, workers):
        i = max(starts[-1], k * n // workers)
        j = i
        while 0 < j < n and groups[j] == groups[j - 1]:
            j += 1
        starts.append(i if j >= n else j)
    return [*starts, n]


class _Queue:
    """The tasks of a phase in runs, one per worker, in shared memory; made before the fork
    and set again for each phase.

    A worker takes the tasks of its own run from the front; when its run is empty it takes the
    last task of the longest run left, from the back. Tasks in a run are grid neighbours, whose
    checks meet the same quantiles (see ``tune``): taking from the back keeps a stolen group
    with the thief and the front of the run with its owner, so a group is rarely solved twice,
    and the workers still finish within one task of each other, even when one starts late.

    Each phase has a number, and a worker takes only from the phase it was told of: one that
    comes late to a phase the parent has already finished alone (and set the next) would
    otherwise take the next phase's tasks and send them back as the old phase's results.
    """

    def __init__(self, ctx: Any, workers: int) -> None:
        self.workers = workers
        self._bounds = ctx.RawArray("q", 2 * workers)
        self._taken = ctx.RawArray("q", workers)  # tasks each worker took in this phase
        self._done = ctx.RawValue("q", 0)
        self._phase = ctx.RawValue("q", 0)
        self._lock = ctx.Lock()

    def set(self, starts: list[int]) -> int:
        """A new phase, and its number: worker k's run is tasks ``starts[k]`` to ``starts[k + 1]``."""
        with self._lock:
            for k in range(self.workers):
                self._bounds[2 * k], self._bounds[2 * k + 1] = starts[k], starts[k + 1]
                self._taken[k] = 0
            self._done.value = 0
            self._phase.value += 1
            return int(self._phase.value)

    def take(self, me: int, phase: int) -> int | None:
        """The index of the next task of ``phase`` for worker ``me``; None when every task is
        taken, or when that phase is over."""
        b = self._bounds
        with self._lock:
            if self._phase.value != phase:
                return None
            lo, hi = b[2 * me], b[2 * me + 1]
            if lo < hi:
                b[2 * me] = lo + 1
                self._taken[me] += 1
                return lo
            victim, left = -1, 0
            for k in range(self.workers):
                if b[2 * k + 1] - b[2 * k] > left:
                    victim, left = k, b[2 * k + 1] - b[2 * k]
            if victim < 0:
                return None
            b[2 * victim + 1] -= 1
            self._taken[me] += 1
            return int(b[2 * victim + 1])

    def taken(self, me: int) -> int:
        """How many tasks worker ``me`` took in this phase (final once ``take`` gives None)."""
        with self._lock:
            return int(self._taken[me])

    def finished(self) -> int:
        """One more task done; the number done so far, by every worker."""
        with self._lock:
            self._done.value += 1
            return int(self._done.value)


def _run_phase(fn: Callable[[Any], Any], tasks: list[Any], phase: int, queue: _Queue, me: int, conn: Any) -> None:
    out = []
    while (i := queue.take(me, phase)) is not None:
        out.append((i, fn(tasks[i])))
        queue.finished()
    conn.send(("results", out))


def _helper(
    queue: _Queue,
    me: int,
    conn: Any,
    init: tuple[Any, ...],
    first: tuple[Callable[[Any], Any], list[Any], int] | None,
    parse: Callable[[], Intake] | None,
    siblings: list[Any],
) -> None:
    """A forked worker: the first phase's tasks, then its own parse pass if given, then the
    phases the parent sends, until it says stop; results (or the error) go back by ``conn``.

    ``siblings`` are the parent's ends of the pipes of the workers forked before this one:
    this copy of them is closed at once, so that a pipe ends when the parent closes it.
    """
    for other in siblings:
        other.close()
    try:
        _init_worker(*init)  # the same objects after a fork; copies where processes are spawned
        if first is not None:
            _run_phase(*first, queue, me, conn)
        if parse is not None:
            _W["steps"] = parse().steps
        while True:
            try:
                msg = conn.recv()
            except EOFError:  # the parent has closed its end
                break
            if msg[0] != "phase":
                break
            _run_phase(msg[1], msg[2], msg[3], queue, me, conn)
    except BaseException as e:  # handed to the parent, which raises it
        try:
            conn.send(("error", e))
        except Exception:  # an error that cannot be pickled: its text
            conn.send(("error", RuntimeError(f"a tuning worker failed: {e!r}")))
    finally:
        conn.close()


_ENDED: list[Any] = []  # workers told to stop, not yet waited for


def _reap(wait: bool = True) -> None:
    """Wait for the workers told to stop (they are ending, if not ended); without ``wait``,
    only for those already ended (the others at the next call, or when this process ends)."""
    for p in list(_ENDED):
        p.join(None if wait else 0)
        if p.exitcode is not None:
            _ENDED.remove(p)


class _Workers:
    """This process and ``workers - 1`` forked worker processes, for the phases of a run.

    The workers are forked once, at the start of a run, and each phase's tasks are dealt out
    by a shared ``_Queue``; this process works too rather than wait, and only results come
    back, once per worker and phase. With one worker everything runs in this process.

    Forked before the parse (``parse`` given), each worker first runs the ``first`` phase (the
    settings' validation, which needs no steps) while this process parses, then parses the
    recording itself: its steps are its own from the start, so nothing is copied, pickled or
    shared, and the other CPUs are not idle during this process's parse (the run's one serial
    phase), which the workers do alongside. The parse is deterministic: every worker's steps
    are the ones this process parses. Forked after it (``steps`` given), the workers share
    this process's steps.
    """

    def __init__(
        self,
        workers: int,
        steps: list[Step],
        cards: dict[str, ModelCard],
        base_dir: Path,
        models: list[str] | None,
        checks: list[str] | None,
        first: tuple[Callable[[Any], Any], list[Any]] | None = None,
        parse: Callable[[], Intake] | None = None,
    ) -> None:
        _reap(wait=False)
        self._n = workers
        self._first = first
        self._first_phase = 0  # the first phase's number in the queue
        self._conns: list[tuple[Any, Any]] = []  # (process, this end of its pipe)
        self._owed: list[int] = []  # per worker: results of past phases it took no task in, not read
        init = (steps, cards, str(base_dir), models, checks)
        _init_worker(*init)
        if workers <= 1:
            return
        ctx = mp.get_context("fork") if "fork" in mp.get_all_start_methods() else mp.get_context()
        self._queue = _Queue(ctx, workers)
        first_phase = None
        if first is not None:  # this process parses meanwhile: the workers share the first phase
            phase = self._queue.set([0, *_segments(list(range(len(first[1]))), workers - 1)])
            first_phase = (*first, phase)
            self._first_phase = phase
        for me in range(1, workers):
            mine, theirs = ctx.Pipe()
            siblings = [c for _, c in self._conns]
            p = ctx.Process(
                target=_helper, args=(self._queue, me, theirs, init, first_phase, parse, siblings), daemon=True
            )
            p.start()
            theirs.close()
            self._conns.append((p, mine))
            self._owed.append(0)

    def share(self, steps: list[Step]) -> None:
        """The steps this process parsed, for the phases it runs itself."""
        _W["steps"] = steps

    def __enter__(self) -> _Workers:
        return self

    def __exit__(self, *exc: object) -> None:
        for k, (p, conn) in enumerate(self._conns):
            if exc[0] is None:
                # The empty results of phases it took no task in are read first: unread, a
                # long run of them fills the pipe and the worker waits on it for ever.
                try:
                    while self._owed[k]:
                        self._results(p, conn)
                        self._owed[k] -= 1
                    conn.send(("stop",))
                except Exception:  # it has ended (or failed after the run had every result)
                    pass
            else:  # after an error here or in a worker: the others' results are not wanted
                p.terminate()
            conn.close()
            # A worker's exit (its memory handed back) takes some milliseconds: not waited
            # for; it is reaped once ended (``_reap``).
            _ENDED.append(p)
        self._conns.clear()
        if exc[0] is not None:
            _reap()

    def _results(self, p: Any, conn: Any) -> list[tuple[int, Any]]:
        try:
            kind, body = conn.recv()
        except EOFError:
            p.join()
            raise RuntimeError(f"a tuning worker ended without its results (exit code {p.exitcode})") from None
        if kind == "error":
            raise body
        return body

    def first(self) -> list[Any]:
        """The results of the ``first`` phase, in task order."""
        assert self._first is not None
        fn, tasks = self._first
        self._first = None
        if self._n <= 1:
            return [fn(t) for t in tasks]
        return self._collect(fn, tasks, self._first_phase)

    def _collect(
        self, fn: Callable[[Any], Any], tasks: list[Any], phase: int, progress: Callable[[int], None] | None = None
    ) -> list[Any]:
        results: dict[int, Any] = {}
        reported = 0
        while (i := self._queue.take(0, phase)) is not None:
            results[i] = fn(tasks[i])
            done = self._queue.finished()
            if progress:
                progress(done - reported)
                reported = done
        for k, (p, conn) in enumerate(self._conns, 1):
            if self._queue.taken(k) == 0:
                # it took no task (still parsing, say): its empty results are not waited for
                self._owed[k - 1] += 1
                continue
            while self._owed[k - 1]:
                self._results(p, conn)
                self._owed[k - 1] -= 1
            results.update(self._results(p, conn))
        if progress and len(tasks) > reported:
            progress(len(tasks) - reported)
        return [results[i] for i in range(len(tasks))]

    def map(
        self,
        fn: Callable[[Any], Any],
        tasks: list[Any],
        progress: Callable[[int], None] | None = None,
        groups: list[Any] | None = None,
    ) -> list[Any]:
        """``fn`` of every task, in task order. ``groups`` (a key per task) marks runs of
        neighbouring tasks that are best run by one worker."""
        if self._n <= 1:
            out = []
            for task in tasks:
                out.append(fn(task))
                if progress:
                    progress(1)
            return out
        phase = self._queue.set(_segments(groups if groups is not None else list(range(len(tasks))), self._n))
        for _, conn in self._conns:
            conn.send(("phase", fn, tasks, phase))
        return self._collect(fn, tasks, phase, progress)


def evaluate_all(
    jobs: list[tuple[int, dict]],
    steps: list[Step],
    cards: dict[str, ModelCard],
    base_dir: Path,
    models: list[str] | None,
    workers: int,
    progress: Callable[[int], None] | None = None,
    checks: list[str] | None = None,
) -> dict[int, list[Mark]]:
    """Alerts of every job (index, config data); ``workers`` processes, or in-process for 1."""
    with _Workers(workers, steps, cards, base_dir, models, checks) as pool:
        out = dict(pool.map(_run_one, jobs, progress))
    _reap(wait=False)
    return out


# -- scoring ------------------------------------------------------------------------------------
@dataclass
class Score:
    """How one setting did on one recording."""

    alerts: int
    false_alerts: int
    false_alerts_per_day: float
    healthy_days: float
    grace_s: float
    detections: list[dict[str, Any]] = field(default_factory=list)

    @property
    def missed(self) -> int:
        return sum(1 for d in self.detections if d["detected_at"] is None)

    @property
    def mean_delay_s(self) -> float:
        delays = [d["delay_s"] for d in self.detections if d["delay_s"] is not None]
        return sum(delays) / len(delays) if delays else math.nan

    def to_dict(self) -> dict[str, Any]:
        return {
            "alerts": self.alerts,
            "false_alerts": self.false_alerts,
            "false_alerts_per_day": self.false_alerts_per_day,
            "healthy_days": self.healthy_days,
            "grace_s": self.grace_s,
            "missed": self.missed,
            "mean_delay_s": None if math.isnan(self.mean_delay_s) else self.mean_delay_s,
            "detections": self.detections,
        }


def _union_length(spans: Iterable[tuple[float, float]], lo: float, hi: float) -> float:
    total, cur_a = 0.0, 0.0
    cur_b: float | None = None
    for a, b in sorted((max(lo, a), min(hi, b)) for a, b in spans):
        if b <= a:
            continue
        if cur_b is None or a > cur_b:
            if cur_b is not None:
                total += cur_b - cur_a
            cur_a, cur_b = a, b
        else:
            cur_b = max(cur_b, b)
    if cur_b is not None:
        total += cur_b - cur_a
    return total


def score(marks: list[Mark], incidents: list[dict[str, Any]], start: float, end: float, grace_s: float) -> Score:
    """Detections, delays and false alerts of one setting's raised alerts."""
    spans = [(float(inc["start"]), float(inc["end"]) + grace_s) for inc in incidents]
    detections = []
    for inc, (a, b) in zip(incidents, spans):
        hit = next((m for m in marks if a <= m.t <= b and inc.get("model") in (None, m.model)), None)
        detections.append(
            {
                "kind": inc["kind"],
                "start": inc["start"],
                "end": inc["end"],
                "detected_at": None if hit is None else hit.t,
                "delay_s": None if hit is None else hit.t - float(inc["start"]),
                "check": None if hit is None else hit.check,
                "severity": None if hit is None else hit.severity,
            }
        )
    false = [
        m
        for m in marks
        if not any(a <= m.t <= b and inc.get("model") in (None, m.model) for inc, (a, b) in zip(incidents, spans))
    ]
    healthy_s = max(0.0, (end - start) - _union_length(spans, start, end))
    days = healthy_s / 86400.0
    per_day = len(false) / days if days > 0 else (math.inf if false else 0.0)
    return Score(len(marks), len(false), per_day, days, grace_s, detections)


# -- the whole tuning run -----------------------------------------------------------------------
@dataclass
class Row:
    setting: Setting
    score: Score
    check_score: Score | None = None
    # the most false alerts per day of this setting and its grid neighbours: a setting on the
    # edge of a noisy region is quiet on this recording by luck, and another day shows it
    robust_false_alerts_per_day: float = 0.0
    marks: list[Mark] = field(default_factory=list)


@dataclass
class TuneResult:
    rows: list[Row]  # ranked, best first
    best: Row
    with_incidents: bool
    false_alert_budget: float
    invalid: list[tuple[Setting, str]]
    intake: Intake
    config: Config
    raw_config: dict
    models: list[str] | None
    check_intake: Intake | None = None
    checks: list[str] | None = None


def _grace(cfg: Config, intake: Intake, models: list[str] | None, grace_s: float | None) -> float:
    return _grace_of(
        tuple((m.id, m.window.size_pairs) for m in cfg.models if models is None or m.id in models), intake, grace_s
    )


def _grace_of(window_pairs: tuple[tuple[str, int], ...], intake: Intake, grace_s: float | None) -> float:
    """The grace period: the given one, else the longest window of the chosen models in time."""
    if grace_s is not None:
        return grace_s
    rates = []
    for model, size in window_pairs:
        r = intake.pair_rate(model)
        if r > 0:
            rates.append(size / r)
    return max(rates) if rates else 0.0


def rank_key(row: Row, with_incidents: bool, budget: float) -> tuple:
    s = row.score
    delay = s.mean_delay_s if not math.isnan(s.mean_delay_s) else math.inf
    robust = row.robust_false_alerts_per_day
    if with_incidents:
        return (s.missed, robust, s.false_alerts_per_day, delay, row.setting.tightness, row.setting.index)
    # healthy recording: within the false-alert budget (neighbours included) first, then the
    # tightest, then the fewest false alerts; over the budget, the fewest false alerts first, so
    # that when nothing meets the budget the first row is the quietest, not the most alert-prone
    over = robust > budget
    return (over, robust if over else 0.0, row.setting.tightness, s.false_alerts_per_day, row.setting.index)


def score_key(row: Row, with_incidents: bool, budget: float) -> tuple:
    """The part of the ranking that scores a row; rows equal here tie and grid order decides."""
    if with_incidents:
        return rank_key(row, with_incidents, budget)[:4]
    key = rank_key(row, with_incidents, budget)
    return (key[0], key[1], key[3])


def ties(result: TuneResult, top: int) -> list[tuple[int, int]]:
    """Runs of rows (1-based, first and last) among the first ``top`` whose scores are equal."""
    keys = [score_key(r, result.with_incidents, result.false_alert_budget) for r in result.rows[:top]]
    runs = []
    i = 0
    while i < len(keys):
        j = i
        while j + 1 < len(keys) and keys[j + 1] == keys[i]:
            j += 1
        if j > i:
            runs.append((i + 1, j + 1))
        i = j + 1
    return runs


def meets_budget(result: TuneResult) -> bool:
    """Without incidents: whether the first row stays within the false-alert budget, neighbours included."""
    return result.best.robust_false_alerts_per_day <= result.false_alert_budget


@contextmanager
def _collector_paused() -> Iterator[None]:
    """Python's cyclic garbage collector off for a tuning run, as it was after.

    A run builds large structures without cycles that live to its end (the steps, a monitor
    per setting): the collector would scan them again and again, and in forked workers (which
    inherit the switch) each pass writes to, and so copies, the pages it reads. Measured on
    a day's recording: 6 % faster with one worker, 24 % with two. The few cycles a run makes
    (about a thousand objects) are collected once it is switched back on.
    """
    was_on = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        if was_on:
            gc.enable()


@_collector_paused()
def tune(
    config_path: str | Path,
    recording: str | Path,
    incidents: list[dict[str, Any]] | None = None,
    grid: dict[str, list] | None = None,
    workers: int | None = None,
    check_recording: str | Path | None = None,
    check_incidents: list[dict[str, Any]] | None = None,
    models: list[str] | None = None,
    grace_s: float | None = None,
    false_alert_budget: float = 0.5,
    tick_every: float | None = None,
    progress: Callable[[int, int], None] | None = None,
    checks: list[str] | None = None,
    timings: dict[str, float] | None = None,
) -> TuneResult:
    """Evaluate every grid setting on a recording and rank them; see the module docstring.

    ``timings``, when given, receives the wall time in seconds of each phase: ``setup``
    (config, cards, the grid, starting the worker that validates the settings), ``parse``
    (the shared parse pass, alongside that validation when there are several workers),
    ``workers`` (from the parse to the last result: the validation in one worker, then the
    checks' runs), ``merge`` (scoring and ranking, and the check recording if any).
    """
    clock = time.perf_counter
    t0 = clock()
    p = Path(config_path)
    try:
        raw = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"config file not found: {p}") from None
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"config file {p} is not valid TOML: {e}") from None
    base_dir = p.parent.resolve()
    cfg = parse_config(raw, base_dir, str(p))
    if models is not None:
        unknown = [m for m in models if m not in {x.id for x in cfg.models}]
        if unknown:
            raise ConfigError(
                f"--model {unknown[0]!r} is not in {p}; models there: {', '.join(x.id for x in cfg.models)}"
            )
    cards = load_cards(cfg)
    grid = grid if grid is not None else default_grid(cfg)
    settings = expand(grid)
    varied = varied_checks(grid)
    chosen = [m for m in cfg.models if models is None or m.id in models]
    fixed = {n for m in chosen for n in m.enabled_checks()} - varied
    if checks is not None:
        from watchdog_edge.core.checks import CHECK_NAMES

        unknown = [c for c in checks if c not in CHECK_NAMES]
        if unknown:
            raise ConfigError(f"--checks names {unknown[0]!r}; known checks are {', '.join(CHECK_NAMES)}")
    data_of = {s.index: with_setting(raw, s, models) for s in settings}
    # Settings replay the same windows and meet the same quantiles again: room for all of them
    # (about 170 bytes each, at most some megabytes), made before the workers fork.
    size_quantile_caches(TUNE_QUANTILE_CACHE_ENTRIES)
    n_workers = max(1, workers if workers is not None else (os.cpu_count() or 1))
    done = 0

    def tick(k: int) -> None:
        nonlocal done
        done += k
        if progress:
            progress(done, len(jobs))

    jobs: list[tuple[int, dict]] = []
    job_of: dict[tuple, int] = {}  # (check, the values of the grid keys that reach it) -> job
    group_of: list[tuple] = []  # job -> (check, the values of the keys reaching it but the last)
    parts: dict[int, list[int]] = {}  # setting -> the jobs whose alerts make up its alerts
    invalid = []
    checked: dict[int, Checked] = {}
    validation = [(s.index, data_of[s.index], s.label()) for s in settings]
    with _Workers(
        n_workers,
        [],
        cards,
        base_dir,
        models,
        checks,
        first=(_check_setting, validation),
        parse=functools.partial(intake_recording, cfg, cards, recording, tick_every),
    ) as pool:
        # The parse pass is the run's one serial phase: the workers, forked before it,
        # validate the settings (they need no steps) meanwhile, then parse for themselves.
        t1 = clock()
        intake = intake_recording(cfg, cards, recording, tick_every)
        t2 = clock()
        pool.share(intake.steps)
        for c in pool.first():
            checked[c.index] = c
        for s in settings:
            c = checked[s.index]
            if c.error is not None:
                invalid.append((s, c.error))
                continue
            # Each varied check runs on its own, once per distinct value of the keys that reach
            # it (checks do not see each other): a grid of gap settings x shift on/off runs gap
            # once per gap setting and shift once, not every pair of them.
            parts[s.index] = []
            for check in sorted(varied & c.checks_on):
                key = (check, tuple((k, repr(v)) for k, v in s.values.items() if reaches(k, check)))
                if key not in job_of:
                    job_of[key] = len(jobs)
                    jobs.append((len(jobs), only_checks(data_of[s.index], varied - {check} | fixed, models)))
                    group_of.append(key[:1] + key[1][:-1])
                parts[s.index].append(job_of[key])
        if not parts:
            raise ConfigError("no grid setting gives a valid config; first problem:\n" + invalid[0][1])
        # Jobs of one check that differ only in the last grid key reaching it are neighbours
        # that meet the same quantiles (in the default grid they differ in the gap tolerance,
        # which changes no interval): kept together, one worker solves them once.
        first: dict[tuple, int] = {}
        for j, grp in enumerate(group_of):
            first.setdefault(grp, j)
        order = sorted(range(len(jobs)), key=lambda j: (first[group_of[j]], j))
        jobs = [jobs[j] for j in order]
        groups: list[Any] = [group_of[j] for j in order]
        if fixed:
            # the checks outside the grid: one more job, run alongside the settings
            jobs.insert(0, (_SHARED, only_checks(raw, varied, models)))
            groups.insert(0, _SHARED)
        marks = dict(pool.map(_run_one, jobs, tick, groups))
    t3 = clock()
    shared = marks.pop(_SHARED, [])
    with_inc = incidents is not None
    rows = []
    for s in settings:
        if s.index not in parts:
            continue
        g = _grace_of(checked[s.index].window_pairs, intake, grace_s)
        ms = _sort_marks([m for j in parts[s.index] for m in marks[j]] + shared)
        rows.append(Row(s, score(ms, incidents or [], intake.start, intake.end, g), marks=ms))
    by_index = {r.setting.index: r for r in rows}
    for r in rows:
        near = [
            by_index[n.index].score.false_alerts_per_day
            for n in r.setting.neighbours(by_index[i].setting for i in by_index)
        ]
        r.robust_false_alerts_per_day = max([r.score.false_alerts_per_day, *near])
    rows.sort(key=lambda r: rank_key(r, with_inc, false_alert_budget))
    best = rows[0]
    hold = None
    if check_recording is not None:
        best_cfg = parse_config(data_of[best.setting.index], base_dir, f"grid setting {best.setting.label()}")
        hold = intake_recording(cfg, cards, check_recording, tick_every)
        hm = apply_setting(best_cfg, cards, hold.steps, models, checks)
        g = _grace(best_cfg, hold, models, grace_s)
        best.check_score = score(hm, check_incidents or [], hold.start, hold.end, g)
    if timings is not None:
        timings.update(setup=t1 - t0, parse=t2 - t1, workers=t3 - t2, merge=clock() - t3)
    _reap(wait=False)
    return TuneResult(rows, best, with_inc, false_alert_budget, invalid, intake, cfg, raw, models, hold, checks)


def best_config(result: TuneResult) -> Config:
    """The config with the best setting applied (validated)."""
    data = with_setting(result.raw_config, result.best.setting, result.models)
    return parse_config(data, result.config.base_dir, "best setting")


def snippet(result: TuneResult, where: Path, recording: str | Path) -> str:
    """The best setting as ``[[models]]`` entries ready to paste over the config's ones.

    Card paths are rewritten relative to ``where`` (the snippet's folder), so the snippet on
    its own also loads in ``check-config``.
    """
    from watchdog_edge.files import tomlout

    data = with_setting(result.raw_config, result.best.setting, result.models)
    out_models = []
    for m in data["models"]:
        if result.models is not None and m["id"] not in result.models:
            continue
        m = dict(m)
        card = result.config.resolve(m["card"]).resolve()
        try:
            m["card"] = os.path.relpath(card, where.resolve())
        except ValueError:  # another drive on Windows
            m["card"] = str(card)
        out_models.append(m)
    s = result.best.score
    lines = [
        f"Best of {len(result.rows)} settings from 'watchdog-edge tune' on {Path(recording).name}:",
        f"  {result.best.setting.label()}",
    ]
    if result.with_incidents:
        lines.append(
            f"  missed {s.missed} of {len(s.detections)} incidents, "
            f"{s.false_alerts_per_day:.2f} false alerts per day, mean delay "
            f"{_fmt_delay(s.mean_delay_s)}"
        )
    elif meets_budget(result):
        lines.append(f"  {s.false_alerts_per_day:.2f} false alerts per day (budget {result.false_alert_budget:g})")
    else:
        lines.append(
            f"  NO setting meets the budget of {result.false_alert_budget:g} false alerts per day; this is the "
            f"quietest: {s.false_alerts_per_day:.2f} per day ({result.best.robust_false_alerts_per_day:.2f} with "
            "its grid neighbours)"
        )
    if result.best.check_score is not None:
        h = result.best.check_score
        lines.append(
            f"  on the check recording: missed {h.missed} of {len(h.detections)}, {h.false_alerts_per_day:.2f} false alerts per day"
        )
    lines.append("Paste over the matching [[models]] entry of your config.")
    return tomlout.dumps({"models": out_models}, header=lines)


def _fmt_delay(s: float | None) -> str:
    if s is None or (isinstance(s, float) and math.isnan(s)):
        return "-"
    return f"{s / 60:.0f} min" if s < 7200 else f"{s / 3600:.1f} h"
