"""Recording lines: the contract's format, both ways, and clear errors for a bad line."""

import base64
import json

import pytest

from watchdog_edge.errors import RecordingError
from watchdog_edge.replay import RecordLine, RecordingWriter, parse_line, read_recording, with_ticks


def test_round_trip_text_bytes_and_ticks(tmp_path):
    path = tmp_path / "rec.jsonl"
    with RecordingWriter(path) as w:
        w.message(1764600000.25, "plant/a/pred", b'{"id": 1, "value": 2}')
        w.message(1764600000.5, "plant/a/pred", b"\xff\xfebinary")
        w.tick(1764600001.0)
    lines = path.read_text().splitlines()
    assert json.loads(lines[0]) == {"t": 1764600000.25, "topic": "plant/a/pred", "payload": '{"id": 1, "value": 2}'}
    assert json.loads(lines[1])["payload_b64"] == base64.b64encode(b"\xff\xfebinary").decode()
    assert json.loads(lines[2]) == {"t": 1764600001.0, "tick": True}
    got = list(read_recording(path))
    assert got == [RecordLine(1764600000.25, "plant/a/pred", b'{"id": 1, "value": 2}'),
                   RecordLine(1764600000.5, "plant/a/pred", b"\xff\xfebinary"),
                   RecordLine(1764600001.0, tick=True)]


def test_bad_payload_text_replays_as_it_came():
    line = parse_line('{"t": 5, "topic": "a", "payload": "{not json"}')
    assert line.payload == b"{not json"


@pytest.mark.parametrize("text,needle", [
    ("{oops", "not JSON"),
    ('{"topic": "a", "payload": "x"}', "'t'"),
    ('{"t": "soon", "topic": "a", "payload": "x"}', "'t'"),
    ('{"t": 1, "payload": "x"}', "'topic'"),
    ('{"t": 1, "topic": "a"}', "payload"),
    ('{"t": 1, "topic": "a", "payload_b64": "***"}', "base64"),
    ("[1, 2]", "object"),
])
def test_bad_lines_name_the_line(text, needle, tmp_path):
    path = tmp_path / "bad.jsonl"
    path.write_text('{"t": 1, "tick": true}\n\n' + text + "\n")
    with pytest.raises(RecordingError) as e:
        list(read_recording(path))
    assert "line 3" in str(e.value) and needle in str(e.value)


def test_missing_file_is_a_clear_error(tmp_path):
    with pytest.raises(RecordingError, match="not found"):
        list(read_recording(tmp_path / "nope.jsonl"))


def test_ticks_are_added_on_whole_multiples():
    lines = [RecordLine(10.5, "a", b"{}"), RecordLine(13.2, "a", b"{}")]
    got = [(ln.t, ln.tick) for ln in with_ticks(lines, 1.0)]
    assert got == [(10.5, False), (11.0, True), (12.0, True), (13.0, True), (13.2, False)]
