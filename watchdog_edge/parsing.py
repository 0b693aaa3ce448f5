"""Payload bytes to records: JSON object or array, field remapping, strict validation.

Validation is written out by hand rather than through pydantic: it runs once per record on the
hot path, and a hand check of a few fields costs well under a microsecond.
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from datetime import datetime
from typing import Any, Callable

from .records import Prediction, Truth

# Reasons a record is set aside; they are the keys of the "bad" counters.
REASONS = (
    "oversize", "not_json", "not_object", "missing_id", "missing_value",
    "bad_type", "not_finite", "bad_ts", "unknown_topic",
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


def _id(raw: Any) -> str:
    if raw is _MISSING or raw is None:
        raise BadRecord("missing_id", "record has no id")
    if isinstance(raw, str):
        if not raw:
            raise BadRecord("missing_id", "id is empty text")
        return raw
    if isinstance(raw, int) and not isinstance(raw, bool):
        return str(raw)
    raise BadRecord("bad_type", f"id has type {type(raw).__name__}; give text or an integer")


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
    """Turns decoded JSON elements into records for one model and one kind."""

    def __init__(self, model: str, kind: str, fields: FieldMap) -> None:
        self.model = model
        self.kind = kind
        self._plain = all("." not in p for p in (fields.id, fields.value, fields.ts))
        self._keys = (fields.id, fields.value, fields.ts)
        self._id = compile_path(fields.id)
        self._value = compile_path(fields.value)
        self._ts = compile_path(fields.ts)
        self._features = compile_path(fields.features)
        self._version = compile_path(fields.model_version)

    def parse(self, obj: Any, t: float) -> Prediction | Truth:
        """One element; raises :class:`BadRecord`."""
        if type(obj) is not dict:
            raise BadRecord("not_object", f"element is {type(obj).__name__}, not a JSON object")
        if self._plain:  # the common case: top-level keys, looked up without a path walk
            k_id, k_value, k_ts = self._keys
            raw_id = obj.get(k_id, _MISSING)
            raw_value = obj.get(k_value, _MISSING)
            raw_ts = obj.get(k_ts, _MISSING)
        else:
            raw_id, raw_value, raw_ts = self._id(obj), self._value(obj), self._ts(obj)
        rid = raw_id if type(raw_id) is str and raw_id else _id(raw_id)
        value = (float(raw_value) if type(raw_value) is float and math.isfinite(raw_value)
                 else _number(raw_value, "value", "missing_value"))
        ts = None if raw_ts is _MISSING or raw_ts is None else parse_ts(raw_ts)
        if self.kind == "truth":
            return Truth(self.model, rid, value, t, ts)
        feats = _features(self._features(obj))
        raw_v = self._version(obj)
        if raw_v is _MISSING or raw_v is None:
            version = None
        elif isinstance(raw_v, str):
            version = raw_v
        elif isinstance(raw_v, int) and not isinstance(raw_v, bool):
            version = str(raw_v)
        else:
            raise BadRecord("bad_type", f"model_version has type {type(raw_v).__name__}; give text")
        return Prediction(self.model, rid, value, t, ts, feats, version)


_decoder = json.JSONDecoder()
_scan_once = _decoder.scan_once
_decode_json = _decoder.decode


def loads_json(text: str) -> Any:
    """``json.loads`` of text without its wrappers: scan once, fall back for whitespace or errors.

    >>> loads_json('{"id": 1}'), loads_json(' [1] ')
    ({'id': 1}, [1])
    """
    try:
        doc, end = _scan_once(text, 0)
    except StopIteration:
        return _decode_json(text)  # leading whitespace or not JSON: the full decoder says which
    if end != len(text) and text[end:].strip():
        return _decode_json(text)  # trailing data: let the full decoder raise its error
    return doc


def decode(payload: bytes, max_bytes: int) -> list[Any]:
    """Payload bytes to a list of JSON elements (one object becomes a list of one)."""
    if len(payload) > max_bytes:
        raise BadRecord("oversize", f"payload of {len(payload)} bytes is over the limit of {max_bytes}")
    try:
        doc = loads_json(payload.decode("utf-8"))
    except (ValueError, UnicodeDecodeError) as e:
        raise BadRecord("not_json", f"payload is not JSON: {e}") from None
    if isinstance(doc, list):
        return doc
    if isinstance(doc, dict):
        return [doc]
    raise BadRecord("not_object", f"payload is a JSON {type(doc).__name__}; send an object or an array of objects")


def element_bytes(obj: Any) -> bytes:
    """Raw form of one bad array element for the dead-letter store."""
    return json.dumps(obj, separators=(",", ":"), allow_nan=True).encode()
