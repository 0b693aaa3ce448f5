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


def test_a_last_line_cut_by_a_crash_is_skipped_and_counted(tmp_path, caplog):
    from watchdog_edge.replay.recording import ReadCounts

    rec = tmp_path / "cut.jsonl"
    good = '{"t": 1.0, "topic": "a/pred", "payload": "{\\"id\\": 1, \\"value\\": 2}"}\n'
    rec.write_text(good * 3 + good[:25])  # the writer was killed in the middle of line 4
    counts = ReadCounts()
    with caplog.at_level("WARNING"):
        lines = list(read_recording(rec, counts=counts))
    assert len(lines) == 3 and counts.cut_last_line == 1 and counts.bad_lines_skipped == 0
    assert "line 4" in caplog.text and "cut short" in caplog.text
    # A complete last line without its line end is an ordinary line.
    rec.write_text(good * 2 + good.rstrip("\n"))
    assert len(list(read_recording(rec))) == 3


def test_a_bad_line_elsewhere_stops_unless_asked_to_skip(tmp_path):
    from watchdog_edge.replay.recording import ReadCounts

    rec = tmp_path / "bad.jsonl"
    good = '{"t": 1.0, "topic": "a/pred", "payload": "{}"}\n'
    rec.write_text(good + '{"t": 2.0, "topic": "a/pr\n' + good + '{"t": "x"}\n' + good)
    with pytest.raises(RecordingError, match="line 2: not JSON"):
        list(read_recording(rec))
    counts = ReadCounts()
    assert len(list(read_recording(rec, skip_bad=True, counts=counts))) == 3
    assert counts.bad_lines_skipped == 2 and counts.cut_last_line == 0


def test_replay_command_reports_skipped_lines(tmp_path):
    import subprocess
    import sys

    from helpers import card

    from watchdog_edge.files.cardfile import save_card

    save_card(card("m"), tmp_path / "m.json")
    (tmp_path / "c.toml").write_text(
        '[[models]]\nid = "m"\ncard = "m.json"\nprediction_topic = "m/pred"\ntruth_topic = "m/truth"\n'
    )
    good = '{"t": 1.0, "topic": "m/pred", "payload": "{\\"id\\": 1, \\"value\\": 2}"}\n'
    (tmp_path / "r.jsonl").write_text(good + "{oops\n" + good + good[:10])
    cmd = [sys.executable, "-m", "watchdog_edge.cli.app", "replay", str(tmp_path / "r.jsonl"), "-c"]
    out = subprocess.run([*cmd, str(tmp_path / "c.toml"), "--json"], capture_output=True, text=True, timeout=60)
    assert out.returncode == 2 and "line 2" in out.stderr, out.stderr
    out = subprocess.run(
        [*cmd, str(tmp_path / "c.toml"), "--json", "--skip-bad-lines"], capture_output=True, text=True, timeout=60
    )
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["skipped_lines"] == {"cut_last_line": 1, "bad": 1}
    assert "cut short" in out.stderr


def test_trim_cut_line_keeps_whole_lines_only(tmp_path):
    from watchdog_edge.replay.recording import trim_cut_line

    p = tmp_path / "r.jsonl"
    assert trim_cut_line(p) == 0  # no file yet: nothing to do
    whole = '{"t": 1.0, "tick": true}\n' * 3
    p.write_text(whole)
    assert trim_cut_line(p) == 0 and p.read_text() == whole
    p.write_text(whole + '{"t": 2.0, "to')
    assert trim_cut_line(p) == len('{"t": 2.0, "to') and p.read_text() == whole
    p.write_text('{"t": 2.0, "to')  # a first line cut: nothing whole is left
    assert trim_cut_line(p) == 14 and p.read_bytes() == b""
