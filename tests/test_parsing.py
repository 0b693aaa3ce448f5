"""Parsing and validation of inbound payloads, one test per class of bad input."""

import math

import pytest

from watchdog_edge.parsing import BadRecord, FieldMap, RecordParser, decode, parse_ts

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
