"""Recordings (JSON Lines, one received message or tick a line) and replay through the core.

A line is ``{"t": 1764600000.25, "topic": "plant/a/pred", "payload": "<text as received>"}``,
with ``"payload_b64"`` instead of ``"payload"`` for bytes that are not UTF-8, or
``{"t": 1764600001.0, "tick": true}`` for a timer tick of the live agent.
"""

from __future__ import annotations

import base64
import json
import math
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import IO, Any

import orjson

from watchdog_edge.core.events import Event
from watchdog_edge.core.parsing import loads_json
from watchdog_edge.errors import RecordingError

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


def parse_lines(
    texts: Iterable[str | bytes], source: str = "recording", first: int = 1, close: bool = False
) -> Iterator[RecordLine]:
    """Recording lines from their texts, blank ones skipped; line numbers count from ``first``.

    With ``close`` the texts (an open file) are closed when the lines end or stop being read.
    """
    try:
        for i, text in enumerate(texts, first):
            try:
                obj = _orjson_loads(text)  # the common case: a well-formed line, read in one step
            except _OrjsonError:
                obj = _parse_slowly(text, i, source)
                if obj is not None:
                    yield _check_line(obj, i, source)
                continue
            if type(obj) is dict:  # orjson's floats are finite and its text holds no surrogates
                t = obj.get("t")
                payload = obj.get("payload")
                if type(t) is float and type(payload) is str and "tick" not in obj:
                    topic = obj.get("topic")
                    if type(topic) is str and topic:
                        yield RecordLine(t, topic, payload.encode())
                        continue
            yield _check_line(obj, i, source)
    finally:
        if close and hasattr(texts, "close"):
            texts.close()


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


def read_recording(path: str | Path) -> Iterator[RecordLine]:
    """Lines of a recording file, in order; a missing file is an error at once."""
    p = Path(path)
    try:
        fh = p.open("rb")
    except FileNotFoundError:
        raise RecordingError(f"recording not found: {p}") from None
    return parse_lines(fh, str(p), close=True)


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

    def __init__(self, target: str | Path | IO[str], append: bool = False) -> None:
        if isinstance(target, (str, Path)):
            self._fh: IO[str] = open(target, "a" if append else "w", encoding="utf-8")
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
