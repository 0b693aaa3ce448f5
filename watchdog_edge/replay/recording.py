"""Recordings (JSON Lines, one received message or tick a line) and replay through the core.

A line is ``{"t": 1764600000.25, "topic": "plant/a/pred", "payload": "<text as received>"}``,
with ``"payload_b64"`` instead of ``"payload"`` for bytes that are not UTF-8, or
``{"t": 1764600001.0, "tick": true}`` for a timer tick of the live agent.
"""

from __future__ import annotations

import base64
import json
import logging
import math
import os
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import orjson

from watchdog_edge.core.events import Event
from watchdog_edge.core.parsing import loads_json
from watchdog_edge.errors import RecordingError

log = logging.getLogger("watchdog_edge.replay.recording")

_orjson_loads = orjson.loads
_OrjsonError = orjson.JSONDecodeError


@dataclass(slots=True)
class RecordLine:
    """One line of a recording (treated as immutable; not frozen, which costs 4x to build)."""

    t: float
    topic: str | None = None
    payload: bytes | None = None
    tick: bool = False


def parse_line(text: str | bytes, lineno: int = 0, source: str = "recording") -> RecordLine | None:
    """One recording line; ``None`` for a blank line; :class:`RecordingError` when malformed."""
    return next(parse_lines((text,), source, lineno), None)


@dataclass(slots=True)
class ReadCounts:
    """Lines a reading skipped: a last line cut short, and bad lines skipped on request."""

    cut_last_line: int = 0
    bad_lines_skipped: int = 0


_LOG_BAD_LINES = 10  # bad lines logged one by one at most; the rest only counted


def parse_lines(
    texts: Iterable[str | bytes],
    source: str = "recording",
    first: int = 1,
    close: bool = False,
    cut_last_ok: bool = False,
    skip_bad: bool = False,
    counts: ReadCounts | None = None,
) -> Iterator[RecordLine]:
    """Recording lines from their texts, blank ones skipped; line numbers count from ``first``.

    With ``close`` the texts (an open file) are closed when the lines end or stop being read.
    With ``cut_last_ok`` a bad line without a line end (only a file's last line can lack one:
    the writer was stopped mid-line by a crash or power loss) is skipped with a warning; with
    ``skip_bad`` every other bad line is skipped with a warning too. ``counts`` counts both.
    """
    try:
        for i, text in enumerate(texts, first):
            try:
                obj = _orjson_loads(text)  # the common case: a well-formed line, read in one step
            except _OrjsonError:
                try:
                    obj = _parse_slowly(text, i, source)
                    line = None if obj is None else _check_line(obj, i, source)
                except RecordingError as e:
                    if not _tolerate(e, text, i, source, cut_last_ok, skip_bad, counts):
                        raise
                    continue
                if line is not None:
                    yield line
                continue
            if type(obj) is dict:  # orjson's floats are finite and its text holds no surrogates
                t = obj.get("t")
                payload = obj.get("payload")
                if type(t) is float and type(payload) is str and "tick" not in obj:
                    topic = obj.get("topic")
                    if type(topic) is str and topic:
                        yield RecordLine(t, topic, payload.encode())
                        continue
            try:
                line = _check_line(obj, i, source)
            except RecordingError as e:
                if not _tolerate(e, text, i, source, cut_last_ok, skip_bad, counts):
                    raise
                continue
            yield line
    finally:
        if close and hasattr(texts, "close"):
            texts.close()


def _tolerate(
    e: RecordingError,
    text: str | bytes,
    lineno: int,
    source: str,
    cut_last_ok: bool,
    skip_bad: bool,
    counts: ReadCounts | None,
) -> bool:
    """Whether a bad line is skipped (and counted, and logged) rather than stopping the reading."""
    ends = text.endswith(b"\n") if isinstance(text, bytes) else text.endswith("\n")
    if cut_last_ok and not ends:
        if counts is not None:
            counts.cut_last_line += 1
        log.warning(
            "%s, line %d: the last line is cut short (a crash or power loss while it was written); skipped",
            source,
            lineno,
        )
        return True
    if skip_bad:
        if counts is not None:
            counts.bad_lines_skipped += 1
            if counts.bad_lines_skipped <= _LOG_BAD_LINES:
                log.warning("%s; skipped as asked", e)
        else:
            log.warning("%s; skipped as asked", e)
        return True
    return False


def _parse_slowly(text: str | bytes, lineno: int, source: str) -> Any:
    """What orjson refused: blank lines, bytes that are not UTF-8, NaN literals, or bad JSON."""
    if not isinstance(text, str):
        text = text.decode("utf-8", "surrogateescape")
    text = text.strip()
    if not text:
        return None
    try:
        return loads_json(text)
    except ValueError as e:
        raise RecordingError(f"{source}, line {lineno}: not JSON ({e})") from None


def _check_line(obj: Any, lineno: int, source: str) -> RecordLine:
    """Every rule of a line, each with its own message."""
    if not isinstance(obj, dict):
        raise RecordingError(f"{source}, line {lineno}: a line must be a JSON object")
    t = obj.get("t")
    if isinstance(t, bool) or not isinstance(t, (int, float)) or not math.isfinite(t):
        raise RecordingError(f"{source}, line {lineno}: 't' must be the receive time in Unix seconds, got {t!r}")
    if obj.get("tick") is True:
        return RecordLine(float(t), tick=True)
    topic = obj.get("topic")
    if not isinstance(topic, str) or not topic:
        raise RecordingError(f"{source}, line {lineno}: 'topic' must be non-empty text, got {topic!r}")
    if "payload" in obj:
        p = obj["payload"]
        if not isinstance(p, str):
            raise RecordingError(
                f"{source}, line {lineno}: 'payload' must be the payload as text (use 'payload_b64' for bytes)"
            )
        try:  # bytes that were not UTF-8 on disk come back as they were
            payload = p.encode("utf-8", "surrogateescape")
        except UnicodeEncodeError:  # a lone surrogate written as a JSON escape
            payload = p.encode("utf-8", "surrogatepass")
    elif "payload_b64" in obj:
        try:
            payload = base64.b64decode(obj["payload_b64"], validate=True)
        except (ValueError, TypeError):
            raise RecordingError(f"{source}, line {lineno}: 'payload_b64' is not valid base64") from None
    else:
        raise RecordingError(f"{source}, line {lineno}: a message line needs 'payload' or 'payload_b64'")
    return RecordLine(float(t), topic, payload)


def read_recording(path: str | Path, skip_bad: bool = False, counts: ReadCounts | None = None) -> Iterator[RecordLine]:
    """Lines of a recording file, in order; a missing file is an error at once.

    A last line cut short by a crash is skipped with a warning (and counted in ``counts``);
    any other bad line is an error, unless ``skip_bad`` (then it is skipped and counted too).
    """
    p = Path(path)
    try:
        fh = p.open("rb")
    except FileNotFoundError:
        raise RecordingError(f"recording not found: {p}") from None
    return parse_lines(fh, str(p), close=True, cut_last_ok=True, skip_bad=skip_bad, counts=counts)


def format_message(t: float, topic: str, payload: bytes) -> str:
    """The recording line for one received message."""
    try:
        text = payload.decode("utf-8")
        body = {"t": t, "topic": topic, "payload": text}
    except UnicodeDecodeError:
        body = {"t": t, "topic": topic, "payload_b64": base64.b64encode(payload).decode()}
    return json.dumps(body, ensure_ascii=False, separators=(", ", ": "))


def format_tick(t: float) -> str:
    return json.dumps({"t": t, "tick": True}, separators=(", ", ": "))


class RecordingWriter:
    """Appends lines to a recording; usable as a context manager.

    >>> import io
    >>> buf = io.StringIO()
    >>> w = RecordingWriter(buf)
    >>> w.message(1.5, "a/pred", b'{"id": 1, "value": 2}'); w.tick(2.0)
    >>> buf.getvalue().splitlines()[1]
    '{"t": 2.0, "tick": true}'
    """

    def __init__(self, target: str | Path | IO[str], append: bool = False, private: bool = False) -> None:
        if isinstance(target, (str, Path)):
            if private:  # the agent's recording holds payloads: readable by its user only
                flags = os.O_WRONLY | os.O_CREAT | (os.O_APPEND if append else os.O_TRUNC)
                self._fh: IO[str] = os.fdopen(os.open(target, flags, 0o600), "a" if append else "w", encoding="utf-8")
            else:
                self._fh = open(target, "a" if append else "w", encoding="utf-8")
            self._own = True
        else:
            self._fh = target
            self._own = False

    def message(self, t: float, topic: str, payload: bytes) -> None:
        self._fh.write(format_message(t, topic, payload) + "\n")

    def tick(self, t: float) -> None:
        self._fh.write(format_tick(t) + "\n")

    def flush(self) -> None:
        self._fh.flush()

    def close(self) -> None:
        if self._own:
            self._fh.close()

    def __enter__(self) -> RecordingWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def trim_cut_line(path: str | Path) -> int:
    """Cut a recording back to its last line end (a line cut short by a crash); the bytes removed.

    >>> import tempfile, os
    >>> p = os.path.join(tempfile.mkdtemp(), "r.jsonl")
    >>> _ = open(p, "w").write('{"t": 1.0, "tick": true}\\n{"t": 2.0, "ti')
    >>> trim_cut_line(p), open(p).read()
    (14, '{"t": 1.0, "tick": true}\\n')
    """
    p = Path(path)
    try:
        size = p.stat().st_size
    except FileNotFoundError:
        return 0
    if size == 0:
        return 0
    with open(p, "rb+") as fh:
        fh.seek(size - 1)
        if fh.read(1) == b"\n":
            return 0
        end, keep = size, 0
        while end > 0:
            start = max(0, end - 65536)
            fh.seek(start)
            i = fh.read(end - start).rfind(b"\n")
            if i >= 0:
                keep = start + i + 1
                break
            end = start
        fh.truncate(keep)
    return size - keep


def last_line(path: str | Path) -> RecordLine | None:
    """The last line of a recording whose lines are whole (see :func:`trim_cut_line`); None if empty."""
    p = Path(path)
    try:
        size = p.stat().st_size
    except FileNotFoundError:
        return None
    with open(p, "rb") as fh:
        end = size
        while end > 0:
            start = max(0, end - 65536)
            fh.seek(start)
            text = fh.read(size - start).rstrip(b"\r\n")
            i = text.rfind(b"\n")
            if i >= 0 or start == 0:
                line = text[i + 1 :]
                return parse_line(line, source=str(p)) if line.strip() else None
            end = start
    return None


def with_ticks(lines: Iterable[RecordLine], every: float | None) -> Iterator[RecordLine]:
    """Insert ticks at whole multiples of ``every`` seconds of receive time between lines."""
    if not every:
        yield from lines
        return
    next_tick: float | None = None
    for line in lines:
        if next_tick is None:
            next_tick = (math.floor(line.t / every) + 1) * every
        while next_tick <= line.t:
            yield RecordLine(next_tick, tick=True)
            next_tick += every
        yield line


def replay(
    monitor,
    lines: Iterable[RecordLine],
    tick_every: float | None = None,
    on_event: Callable[[Event], None] | None = None,
    keep: bool = True,
) -> list[Event]:
    """Drive ``monitor`` with recording lines; return every event in order.

    With ``keep=False`` nothing is gathered (the result is empty): a long replay that hands
    its events to ``on_event`` then holds none of them.
    """
    events: list[Event] = []
    feed, tick = monitor.feed, monitor.tick
    for line in with_ticks(lines, tick_every) if tick_every else lines:
        out = tick(line.t) if line.tick else feed(line.topic, line.payload, line.t)
        if out:
            if keep:
                events.extend(out)
            if on_event is not None:
                for ev in out:
                    on_event(ev)
    return events


def alert_line(alert) -> str:
    """An alert as one JSON line (the contract's object, keys in the contract's order)."""
    return json.dumps(alert.to_dict(), ensure_ascii=False, separators=(", ", ": "))
