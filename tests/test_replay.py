"""Recording lines: the contract's format, both ways, and clear errors for a bad line."""

import base64
import json

import pytest

from watchdog_edge.errors import RecordingError
from watchdog_edge.replay.recording import RecordingWriter, RecordLine, parse_line, read_recording, with_ticks


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
    assert got == [
        RecordLine(1764600000.25, "plant/a/pred", b'{"id": 1, "value": 2}'),
        RecordLine(1764600000.5, "plant/a/pred", b"\xff\xfebinary"),
        RecordLine(1764600001.0, tick=True),
    ]


def test_bad_payload_text_replays_as_it_came():
    line = parse_line('{"t": 5, "topic": "a", "payload": "{not json"}')
    assert line.payload == b"{not json"


@pytest.mark.parametrize(
    "text,needle",
    [
        ("{oops", "not JSON"),
        ('{"topic": "a", "payload": "x"}', "'t'"),
        ('{"t": "soon", "topic": "a", "payload": "x"}', "'t'"),
        ('{"t": 1, "payload": "x"}', "'topic'"),
        ('{"t": 1, "topic": "a"}', "payload"),
        ('{"t": 1, "topic": "a", "payload_b64": "***"}', "base64"),
        ("[1, 2]", "object"),
        ('{"t": NaN, "topic": "a", "payload": "x"}', "'t'"),
        ("[" * 5000, "not JSON"),
    ],
)
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


def test_lines_other_tools_write_are_read_too(tmp_path):
    # Integer times, other key orders and spacing, a NaN inside the payload text, a payload
    # that is not UTF-8 on disk (kept byte for byte) and a ``tick`` line with extra keys.
    path = tmp_path / "other.jsonl"
    path.write_bytes(
        b'{"topic":"a/pred","t":1764600000,"payload":"{\\"id\\":1,\\"value\\":NaN}"}\n'
        b'  {"payload": "caf\xe9", "t": 1764600001.5, "topic": "a/pred"}  \n'
        b'{"t": 1764600002, "tick": true, "note": "from a logger"}\n'
    )
    got = list(read_recording(path))
    assert got[0] == RecordLine(1764600000.0, "a/pred", b'{"id":1,"value":NaN}')
    assert got[1] == RecordLine(1764600001.5, "a/pred", b"caf\xe9")
    assert got[2] == RecordLine(1764600002.0, tick=True)
