"""The command line as a user meets it: replay, check-config, and their errors."""

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from helpers import card
from typer.testing import CliRunner

from watchdog_edge.cli.app import app
from watchdog_edge.files.cardfile import save_card
from watchdog_edge.replay.recording import RecordingWriter

runner = CliRunner()

CONFIG = """
[agent]
name = "test-gw"

[broker]
username = "watcher"
password_env = "WATCHDOG_TEST_PASSWORD"

[[models]]
id = "pump-flow"
card = "pump.json"
prediction_topic = "station/pump/pred"
truth_topic = "station/pump/truth"
window = { size_pairs = 200, min_pairs = 100 }

[models.checks.range]
enabled = false
[models.checks.shift]
enabled = false
"""


@pytest.fixture()
def site(tmp_path: Path) -> Path:
    save_card(card("pump-flow", holdout=1.0), tmp_path / "pump.json")
    (tmp_path / "config.toml").write_text(CONFIG)
    rng = np.random.default_rng(11)
    errs = np.concatenate([rng.normal(0, 1, 600), rng.normal(0, 2.5, 400)])
    with RecordingWriter(tmp_path / "rec.jsonl") as w:
        for i, e in enumerate(errs):
            t = 1_780_000_000 + 30.0 * i
            w.message(t, "station/pump/pred", json.dumps({"id": i, "value": 10.0}).encode())
            w.message(t + 20, "station/pump/truth", json.dumps({"id": i, "value": 10.0 + e}).encode())
            if i == 500:
                w.message(t + 21, "station/pump/truth", b"\xff\xfe not json")
    return tmp_path


def test_replay_is_deterministic_byte_for_byte(site):
    for name in ("a.jsonl", "b.jsonl"):
        r = runner.invoke(
            app,
            [
                "replay",
                str(site / "rec.jsonl"),
                "--config",
                str(site / "config.toml"),
                "--alerts",
                str(site / name),
                "--tick-every",
                "60",
            ],
        )
        assert r.exit_code == 0, r.output
    a, b = (site / "a.jsonl").read_bytes(), (site / "b.jsonl").read_bytes()
    assert a == b and a
    alerts = [json.loads(x) for x in a.splitlines()]
    assert alerts[0]["check"] == "gap" and alerts[0]["state"] == "raised"
    assert "gap" in r.output and "not_json 1" in r.output


@pytest.mark.parametrize("every", ["60", "60s", "1m"])
def test_replay_takes_the_tick_period_in_any_unit(site, every):
    r = runner.invoke(
        app,
        ["replay", str(site / "rec.jsonl"), "--config", str(site / "config.toml"), "--quiet", "--tick-every", every],
    )
    assert r.exit_code == 0, r.output
    r0 = runner.invoke(
        app,
        ["replay", str(site / "rec.jsonl"), "--config", str(site / "config.toml"), "--quiet", "--tick-every", "60"],
    )
    assert r.output == r0.output


def test_a_duration_without_sense_is_refused_with_examples(site):
    r = runner.invoke(
        app, ["replay", str(site / "rec.jsonl"), "--config", str(site / "config.toml"), "--tick-every", "often"]
    )
    assert r.exit_code == 2
    assert "--tick-every 'often': not a duration; give a positive time such as 60s, 15m, 6h or 2d" in r.output


def test_replay_json_summary(site):
    r = runner.invoke(app, ["replay", str(site / "rec.jsonl"), "--config", str(site / "config.toml"), "--json"])
    assert r.exit_code == 0
    data = json.loads(r.stdout)
    assert data["status"]["paired"] == 1000
    assert data["status"]["bad"] == {"not_json": 1}
    assert data["models"]["pump-flow"]["checks"]["gap"]["level"] in ("warning", "critical")


def test_check_config_prints_resolved_settings_without_secrets(site):
    os.environ["WATCHDOG_TEST_PASSWORD"] = "s3cret-value"
    try:
        r = runner.invoke(app, ["check-config", str(site / "config.toml")])
    finally:
        del os.environ["WATCHDOG_TEST_PASSWORD"]
    assert r.exit_code == 0, r.output
    assert "valid" in r.output and "warning_tolerance = 0.25" in r.output
    assert "s3cret-value" not in r.output
    assert 'password_env = "WATCHDOG_TEST_PASSWORD" # value not shown' in r.output


def test_check_config_output_loads_again_as_the_same_config_and_ends_with_one_summary(site):
    r = runner.invoke(app, ["check-config", str(site / "config.toml")])
    assert r.exit_code == 0, r.output
    lines = r.stdout.rstrip("\n").splitlines()
    assert lines[-1] == f"# {site / 'config.toml'}: valid; 1 model, 2 checks on, cards loaded, no warnings."
    # the derived expected loss stands as a comment, in words, not as a key
    assert "# expected squared loss 1, from the held-out loss (card pump.json)" in r.stdout
    (site / "again.toml").write_text(r.stdout)
    first = runner.invoke(app, ["check-config", str(site / "config.toml"), "--json"])
    again = runner.invoke(app, ["check-config", str(site / "again.toml"), "--json"])
    assert again.exit_code == 0, again.output
    assert json.loads(again.stdout) == json.loads(first.stdout)
    assert json.loads(first.stdout)["models"][0]["expected_loss"]["source"] == "holdout"  # JSON keeps the code


def test_help_shows_no_value_for_flags_and_plain_argument_names():
    r = runner.invoke(app, ["check-config", "--help"], env={"COLUMNS": "120"})
    assert r.exit_code == 0
    assert "<bool>" not in r.output and "{config}" not in r.output
    assert "[OPTIONS] CONFIG" in r.output
    r = runner.invoke(app, ["card", "build", "--help"], env={"COLUMNS": "120"})
    assert "{train}" not in r.output and "[OPTIONS] TRAIN" in r.output and "<bool>" not in r.output


def test_check_config_error_names_key_value_and_rule(site):
    bad = site / "bad.toml"
    bad.write_text(CONFIG.replace("size_pairs = 200", "size_pairs = -3"))
    r = runner.invoke(app, ["check-config", str(bad)])
    assert r.exit_code == 2
    assert "models[0] (id 'pump-flow').window.size_pairs = -3" in r.output
    assert "greater than or equal to 2" in r.output


def test_missing_card_is_named(site):
    (site / "pump.json").unlink()
    r = runner.invoke(app, ["check-config", str(site / "config.toml")])
    assert r.exit_code == 2 and "pump.json" in r.output and "not found" in r.output


def test_console_script_runs_as_a_real_process(site):
    out = subprocess.run(
        [
            sys.executable,
            "-m",
            "watchdog_edge.cli.app",
            "replay",
            str(site / "rec.jsonl"),
            "--config",
            str(site / "config.toml"),
            "--quiet",
        ],
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert out.returncode == 0, out.stderr
    assert "alerts" in out.stdout
