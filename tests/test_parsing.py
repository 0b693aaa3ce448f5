"""Parsing and validation of inbound payloads, one test per class of bad input."""

import json
import math

import pytest
from helpers import card, config
from hypothesis import given, settings
from hypothesis import strategies as st

from watchdog_edge.core.events import DeadLetter
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.parsing import BadRecord, FieldMap, RecordParser, decode, loads_json, loads_json_exact, parse_ts

PRED = RecordParser("m", "prediction", FieldMap())
TRUTH = RecordParser("m", "truth", FieldMap())


def one(payload: bytes, parser=PRED):
    return parser.parse(decode(payload, 10_000)[0], t=1.0)


def reason(payload: bytes, parser=PRED) -> str:
    with pytest.raises(BadRecord) as e:
        one(payload, parser)
    return e.value.reason


def test_integer_and_text_ids_compare_by_text():
    assert one(b'{"id": 42, "value": 1}').id == "42"
    assert one(b'{"id": "42", "value": 1}', TRUTH).id == "42"


def test_every_bad_class_has_its_reason():
    assert reason(b"not json at all") == "not_json"
    assert reason(b"\xff\xfe\x00") == "not_json"
    assert reason(b'"just text"') == "not_object"
    assert reason(b'{"value": 1}') == "missing_id"
    assert reason(b'{"id": "", "value": 1}') == "missing_id"
    assert reason(b'{"id": 1}') == "missing_value"
    assert reason(b'{"id": 1, "value": null}') == "missing_value"
    assert reason(b'{"id": 1, "value": "3.2"}') == "bad_type"
    assert reason(b'{"id": 1, "value": true}') == "bad_type"
    assert reason(b'{"id": 1.5, "value": 1}') == "bad_type"
    assert reason(b'{"id": [1], "value": 1}') == "bad_type"
    assert reason(b'{"id": 1, "value": NaN}') == "not_finite"
    assert reason(b'{"id": 1, "value": Infinity}') == "not_finite"
    assert reason(b'{"id": 1, "value": 1e999}') == "not_finite"
    assert reason(b'{"id": 1, "value": 1, "ts": "yesterday"}') == "bad_ts"
    assert reason(b'{"id": 1, "value": 1, "ts": "2026-01-01T00:00:00"}') == "bad_ts"  # no offset
    assert reason(b'{"id": 1, "value": 1, "features": {"a": "x"}}') == "bad_type"
    assert reason(b'{"id": 1, "value": 1, "features": {"a": NaN}}') == "not_finite"
    assert reason(b'{"id": 1, "value": 1, "features": [1, 2]}') == "bad_type"


def test_oversize_payload_is_rejected_before_parsing():
    with pytest.raises(BadRecord) as e:
        decode(b'{"id": 1, "value": 1}' + b" " * 100, max_bytes=50)
    assert e.value.reason == "oversize"


def test_array_gives_each_element():
    els = decode(b'[{"id": 1, "value": 1}, 5, {"id": 2, "value": 2}]', 1000)
    assert len(els) == 3


def test_ts_as_unix_seconds_or_rfc3339():
    # RFC 3339 section 5.8 gives "1985-04-12T23:20:50.52Z" and "1996-12-19T16:39:57-08:00" as examples.
    assert parse_ts("1985-04-12T23:20:50.52Z") == pytest.approx(482196050.52)
    assert parse_ts("1996-12-19T16:39:57-08:00") == 851042397.0
    assert parse_ts(1764600000.25) == 1764600000.25


def test_dotted_field_paths_remap_existing_payloads():
    p = RecordParser("m", "truth", FieldMap(id="meter.serial", value="meter.reading.kw", ts="at"))
    tr = p.parse({"meter": {"serial": 9, "reading": {"kw": 4.5}}, "at": 10}, t=11.0)
    assert (tr.id, tr.value, tr.ts, tr.t) == ("9", 4.5, 10.0, 11.0)
    with pytest.raises(BadRecord) as e:
        p.parse({"meter": {"serial": 9, "reading": 3}}, t=11.0)
    assert e.value.reason == "missing_value"


def test_features_allow_null_as_missing_and_version_as_text():
    pr = one(b'{"id": 1, "value": 2.5, "features": {"a": 1, "b": null}, "model_version": 3}')
    assert pr.features == {"a": 1.0, "b": None}
    assert pr.model_version == "3"
    assert math.isclose(pr.value, 2.5)


# --- the fast reader against the standard library's json module (the reference) -----------
# Integers within 64 bits (signed or unsigned); beyond them see the next two tests.
JSON_VALUES = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(min_value=-(2**63), max_value=2**64 - 1)
    | st.floats(allow_nan=False, allow_infinity=False)
    | st.text(),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=5), inner, max_size=4),
    max_leaves=12,
)


@settings(max_examples=400, deadline=None)
@given(JSON_VALUES)
def test_reads_every_document_exactly_as_the_json_module(doc):
    # Reference: Python's own json module, text as json.dumps writes it (integers of any size,
    # floats by repr, escapes of every kind). Equality through repr tells -0.0 from 0.0.
    text = json.dumps(doc)
    assert repr(loads_json(text)) == repr(json.loads(text))
    assert repr(loads_json(text.encode())) == repr(json.loads(text))


@given(st.integers(min_value=-(10**40), max_value=10**40))
def test_an_integer_beyond_64_bits_reads_as_the_float_the_parser_would_make_of_it(n):
    # A value, a feature or a time is a float in the end: float(n) is what the json module's
    # integer becomes there. Ids and versions need the exact digits: see the test below.
    got = loads_json(json.dumps({"v": n}))["v"]
    assert got == n if -(2**63) <= n < 2**64 else (type(got) is float and got == float(n))
    assert loads_json_exact(json.dumps({"v": n}))["v"] == n


def test_literals_orjson_refuses_are_read_as_the_json_module_reads_them():
    for text in ('{"v": NaN}', '{"v": -Infinity}', '{"v": 1e999}', '{"v": "\\ud800"}', " [1] "):
        assert repr(loads_json(text)) == repr(json.loads(text))


def test_ids_beyond_64_bits_stay_exact_and_whole_floats_stay_bad():
    big = 123456789012345678901234567890
    payload = json.dumps([{"id": big, "value": 1.0}, {"id": 2**70, "value": 2.0}, {"id": 1e19, "value": 3.0}]).encode()
    mon = Monitor(config(checks={"range": {"enabled": False}, "shift": {"enabled": False}}), {"m": card()})
    ev = mon.feed("m/pred", payload, 1.0)
    assert [d.reason for d in ev if isinstance(d, DeadLetter)] == ["bad_type"]  # only the float 1e19
    mon.feed("m/truth", json.dumps({"id": str(big), "value": 1.5}).encode(), 2.0)
    mon.feed("m/truth", json.dumps({"id": str(2**70), "value": 2.5}).encode(), 2.0)
    assert mon.status()["paired"] == 2


def test_model_version_as_text_is_kept():
    assert one(b'{"id": 1, "value": 2.5, "model_version": "2026.11-a"}').model_version == "2026.11-a"
    assert reason(b'{"id": 1, "value": 2.5, "model_version": 1.5}') == "bad_type"


def test_nesting_too_deep_is_a_bad_record_not_a_crash():
    assert reason(b"[" * 5_000) == "not_json"
    mon = Monitor(config(), {"m": card()})
    ev = mon.feed("m/pred", b"[" * 30_000, 1.0)  # under max_payload_bytes
    # Valid JSON, an array in an array: refused as not an object, or as nested too deeply
    # where the reader's depth limit comes first.
    ev += mon.feed("m/pred", b"[" * 30_000 + b"]" * 30_000, 2.0)
    reasons = [d.reason for d in ev if isinstance(d, DeadLetter)]
    assert reasons[0] == "not_json" and reasons[1] in ("not_json", "not_object") and len(reasons) == 2
    mon.feed("m/pred", b'{"id": 1, "value": 1.0}', 3.0)
    mon.feed("m/truth", b'{"id": 1, "value": 1.5}', 4.0)
    assert mon.status()["paired"] == 1
