"""Payload bytes to records: JSON object or array, field remapping, strict validation.

Validation is written out by hand rather than through pydantic: it runs once per record on the
hot path, and a hand check of a few fields costs well under a microsecond. JSON is read with
orjson, with the ``json`` module behind it (see :func:`loads_json`).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import datetime
from typing import Any

import orjson

from watchdog_edge.core.records import Prediction, Truth

# Reasons a record is set aside; they are the keys of the "bad" counters.
REASONS = (
    "oversize",
    "not_json",
    "not_object",
    "missing_id",
    "missing_value",
    "bad_type",
    "not_finite",
    "bad_ts",
    "unknown_topic",
    "bad_command",  # a planned-work command that cannot be applied (core/planned.py)
)


class BadRecord(Exception):
    """One record failed validation; ``reason`` is one of :data:`REASONS`."""

    def __init__(self, reason: str, detail: str) -> None:
        super().__init__(f"{reason}: {detail}")
        self.reason = reason
        self.detail = detail


_MISSING = object()


def compile_path(path: str) -> Callable[[dict], Any]:
    """A getter for a dotted path such as ``"reading.kw"``; absent gives a sentinel."""
    parts = tuple(path.split("."))
    if len(parts) == 1:
        key = parts[0]
        return lambda obj: obj.get(key, _MISSING)

    def get(obj: dict) -> Any:
        cur: Any = obj
        for p in parts:
            if not isinstance(cur, dict):
                return _MISSING
            cur = cur.get(p, _MISSING)
            if cur is _MISSING:
                return _MISSING
        return cur

    return get


def parse_ts(raw: Any) -> float:
    """Source time as Unix seconds: a number, or RFC 3339 text.

    >>> parse_ts("2026-01-01T00:00:00Z")
    1767225600.0
    """
    if isinstance(raw, bool):
        raise BadRecord("bad_ts", "ts is a boolean; give Unix seconds or RFC 3339 text")
    if isinstance(raw, (int, float)):
        if not math.isfinite(raw):
            raise BadRecord("bad_ts", f"ts {raw!r} is not finite")
        return float(raw)
    if isinstance(raw, str):
        text = raw.strip()
        if text.endswith(("Z", "z")):
            text = text[:-1] + "+00:00"
        try:
            dt = datetime.fromisoformat(text)
        except ValueError:
            raise BadRecord("bad_ts", f"ts {raw!r} is not RFC 3339 text") from None
        if dt.tzinfo is None:
            raise BadRecord("bad_ts", f"ts {raw!r} has no UTC offset (RFC 3339 requires one)")
        return dt.timestamp()
    raise BadRecord("bad_ts", f"ts has type {type(raw).__name__}; give a number or text")


class InexactNumber(BadRecord):
    """An id or model version that reads as a whole float of 2**63 or more.

    Either the sender wrote a float there (a bad type) or an integer beyond 64 bits, which
    orjson reads as a float. The core reads such a payload again with the standard library,
    which keeps integers exact, and parses the element once more before judging it.
    """


_BEYOND_64_BITS = 2.0**63


def _text_of(raw: Any, name: str) -> str:
    """An id or model version as text: text as it is, an integer in decimal."""
    if isinstance(raw, str):
        return raw
    if isinstance(raw, int) and not isinstance(raw, bool):
        return str(raw)
    what = "give text or an integer" if name == "id" else "give text"
    if type(raw) is float and raw.is_integer() and abs(raw) >= _BEYOND_64_BITS:
        raise InexactNumber("bad_type", f"{name} has type float; {what}")
    raise BadRecord("bad_type", f"{name} has type {type(raw).__name__}; {what}")


def _id(raw: Any) -> str:
    if raw is _MISSING or raw is None:
        raise BadRecord("missing_id", "record has no id")
    if raw == "":
        raise BadRecord("missing_id", "id is empty text")
    return _text_of(raw, "id")


def _number(raw: Any, name: str, missing_reason: str) -> float:
    if raw is _MISSING or raw is None:
        raise BadRecord(missing_reason, f"record has no {name}")
    if isinstance(raw, bool) or not isinstance(raw, (int, float)):
        raise BadRecord("bad_type", f"{name} has type {type(raw).__name__}; give a number")
    value = float(raw)
    if not math.isfinite(value):
        raise BadRecord("not_finite", f"{name} is {raw!r}")
    return value


def _features(raw: Any) -> dict[str, float | None]:
    if raw is _MISSING or raw is None:
        return {}
    if not isinstance(raw, dict):
        raise BadRecord("bad_type", f"features has type {type(raw).__name__}; give an object")
    out: dict[str, float | None] = {}
    for name, v in raw.items():
        if v is None:
            out[name] = None
        elif isinstance(v, bool) or not isinstance(v, (int, float)):
            raise BadRecord("bad_type", f"feature {name!r} has type {type(v).__name__}; give a number or null")
        else:
            fv = float(v)
            if not math.isfinite(fv):
                raise BadRecord("not_finite", f"feature {name!r} is {v!r}")
            out[name] = fv
    return out


@dataclass(frozen=True)
class FieldMap:
    """Dotted paths of each field in a model's payloads."""

    id: str = "id"
    value: str = "value"
    ts: str = "ts"
    features: str = "features"
    model_version: str = "model_version"


class RecordParser:
    """Turns decoded JSON elements into records for one model and one kind.

    Validation is written out for the common case first (text or integer id, finite float
    value, features all finite floats, top-level keys); anything else goes through the full
    rules, which name what is wrong. ``x - x == 0.0`` holds exactly for finite floats.

    >>> RecordParser("m", "truth", FieldMap()).parse({"id": 7, "value": 1.5}, t=3.0)
    Truth(model='m', id='7', value=1.5, t=3.0, ts=None)
    """

    __slots__ = ("model", "kind", "_plain", "_keys", "_getters", "parse")  # in the object: read per record

    def __init__(self, model: str, kind: str, fields: FieldMap) -> None:
        self.model = model
        self.kind = kind
        paths = (fields.id, fields.value, fields.ts, fields.features, fields.model_version)
        self._plain = all("." not in p for p in paths)
        self._keys = paths
        self._getters = tuple(compile_path(p) for p in paths)
        self.parse: Callable[[Any, float], Prediction | Truth] = self.prediction if kind == "prediction" else self.truth

    def _fields(self, obj: Any, prediction: bool) -> tuple[Any, ...]:
        """The raw fields by their paths (absent: ``_MISSING`` for id and value, else None)."""
        if type(obj) is not dict:
            raise BadRecord("not_object", f"element is {type(obj).__name__}, not a JSON object")
        g = self._getters
        vals = tuple(f(obj) for f in (g if prediction else g[:3]))
        return (vals[0], vals[1]) + tuple(None if v is _MISSING else v for v in vals[2:])

    def truth(self, obj: Any, t: float) -> Truth:
        """One decoded element as a truth received at ``t``; raises :class:`BadRecord`."""
        if self._plain and type(obj) is dict:  # the common case, without a path walk
            k_id, k_value, k_ts = self._keys[:3]
            raw_id, raw_value, raw_ts = obj.get(k_id, _MISSING), obj.get(k_value, _MISSING), obj.get(k_ts)
        else:
            raw_id, raw_value, raw_ts = self._fields(obj, False)
        tid = type(raw_id)
        rid = raw_id if tid is str and raw_id else str(raw_id) if tid is int else _id(raw_id)
        value = (
            raw_value
            if type(raw_value) is float and raw_value - raw_value == 0.0
            else _number(raw_value, "value", "missing_value")
        )
        ts = None if raw_ts is None else parse_ts(raw_ts)
        return Truth(self.model, rid, value, t, ts)

    def prediction(self, obj: Any, t: float) -> Prediction:
        """One decoded element as a prediction received at ``t``; raises :class:`BadRecord`."""
        if self._plain and type(obj) is dict:
            k_id, k_value, k_ts, k_features, k_version = self._keys
            get = obj.get
            raw_id, raw_value, raw_ts = get(k_id, _MISSING), get(k_value, _MISSING), get(k_ts)
            feats, raw_v = get(k_features), get(k_version)
        else:
            raw_id, raw_value, raw_ts, feats, raw_v = self._fields(obj, True)
        tid = type(raw_id)
        rid = raw_id if tid is str and raw_id else str(raw_id) if tid is int else _id(raw_id)
        value = (
            raw_value
            if type(raw_value) is float and raw_value - raw_value == 0.0
            else _number(raw_value, "value", "missing_value")
        )
        ts = None if raw_ts is None else parse_ts(raw_ts)
        if type(feats) is dict:
            for v in feats.values():
                if type(v) is not float or v - v != 0.0:
                    feats = _features(feats)  # a copy with ints as floats, or the error
                    break
        else:
            feats = _features(feats)
        version = raw_v if raw_v is None or type(raw_v) is str else _text_of(raw_v, "model_version")
        return Prediction(self.model, rid, value, t, ts, feats, version)


_decoder = json.JSONDecoder()
# the decoder's scanner: an instance attribute set by JSONDecoder.__init__ that typeshed leaves out
_scan_once: Callable[[str, int], tuple[Any, int]] = vars(_decoder)["scan_once"]
_decode_json = _decoder.decode
_orjson_loads = orjson.loads
_OrjsonError = orjson.JSONDecodeError


def loads_json(text: str | bytes) -> Any:
    """JSON text or UTF-8 bytes to Python, exactly as ``json.loads`` reads them.

    orjson reads the common case about four times faster than the standard library. What
    orjson refuses (NaN and Infinity literals, numbers beyond the float range, lone surrogates,
    very deep nesting, bad UTF-8) goes to the standard library, which either reads it as it
    always did or raises the ``ValueError`` it always raised. One difference remains and is
    handled where it matters: orjson reads an integer beyond 64 bits as a float (see
    :class:`InexactNumber`). Nesting too deep for the standard library is a ``ValueError`` too.

    >>> loads_json('{"id": 1}'), loads_json(b' [1] '), loads_json('{"v": NaN}')
    ({'id': 1}, [1], {'v': nan})
    """
    try:
        return _orjson_loads(text)
    except _OrjsonError:
        pass
    return loads_json_exact(text)


def loads_json_exact(text: str | bytes) -> Any:
    """``json.loads`` without its wrappers (integers of any size stay integers).

    >>> loads_json_exact(b'{"id": 123456789012345678901234567890}')
    {'id': 123456789012345678901234567890}
    """
    if not isinstance(text, str):
        text = text.decode("utf-8")
    try:
        try:
            doc, end = _scan_once(text, 0)
        except StopIteration:
            return _decode_json(text)  # leading whitespace or not JSON: the full decoder says which
        if end != len(text) and text[end:].strip():
            return _decode_json(text)  # trailing data: let the full decoder raise its error
    except RecursionError:
        raise ValueError("nested too deeply") from None
    return doc


def decode(payload: bytes, max_bytes: int) -> list[Any]:
    """Payload bytes to a list of JSON elements (one object becomes a list of one)."""
    if len(payload) > max_bytes:
        raise BadRecord("oversize", f"payload of {len(payload)} bytes is over the limit of {max_bytes}")
    try:
        doc = _orjson_loads(payload)
    except _OrjsonError:
        try:
            doc = loads_json_exact(payload)
        except ValueError as e:  # UnicodeDecodeError included
            raise BadRecord("not_json", f"payload is not JSON: {e}") from None
    if type(doc) is dict:
        return [doc]
    if type(doc) is list:
        return doc
    raise BadRecord("not_object", f"payload is a JSON {type(doc).__name__}; send an object or an array of objects")


def decode_exact(payload: bytes) -> list[Any]:
    """The elements of a payload that :func:`decode` accepted, with integers of any size."""
    doc = loads_json_exact(payload)
    return [doc] if type(doc) is dict else doc


def element_bytes(obj: Any) -> bytes:
    """Raw form of one bad array element for the dead-letter store."""
    return json.dumps(obj, separators=(",", ":"), allow_nan=True).encode()
