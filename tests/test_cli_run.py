"""The lean start of ``run``: plain command lines skip typer, everything else reaches it."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from watchdog_edge.cli.main import parse_run

REPO = Path(__file__).resolve().parents[1]


def _cli(*args: str) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    return subprocess.run(
        [sys.executable, "-X", "importtime", "-m", "watchdog_edge.cli.app", *args],
        capture_output=True,
        text=True,
        env=env,
        timeout=60,
    )


def test_plain_run_command_lines_are_parsed_and_others_left_to_typer():
    assert parse_run(["--config", "a.toml"]) == (Path("a.toml"), None, "info")
    assert parse_run(["-c", "a.toml", "--record", "r.jsonl", "--log-level", "debug"]) == (
        Path("a.toml"),
        Path("r.jsonl"),
        "debug",
    )
    assert parse_run(["--log-level=warning", "--config=a.toml"]) == (Path("a.toml"), None, "warning")
    for args in (
        [],
        ["--help"],
        ["--config"],
        ["--config", "--record", "r"],
        ["--config", "a", "--config", "b"],
        ["--config", "a", "extra"],
        ["--config="],
        ["--record", "r.jsonl"],
    ):
        assert parse_run(args) is None, args


def _imported(stderr: str) -> set[str]:
    # -X importtime writes one "import time: ... | module" line per imported module.
    return {ln.rsplit("|", 1)[-1].strip() for ln in stderr.splitlines() if ln.startswith("import time:")}


def test_run_starts_without_the_command_line_toolkit_and_keeps_its_exit_codes(tmp_path):
    out = _cli("run", "--config", str(tmp_path / "missing.toml"))
    mods = _imported(out.stderr)
    assert "watchdog_edge.cli.main" in mods
    assert not {"typer", "click", "rich"} & mods, sorted(
        m for m in mods if m.split(".")[0] in ("typer", "click", "rich")
    )
    errors = [ln for ln in out.stderr.splitlines() if ln.startswith("watchdog-edge:")]
    assert out.returncode == 2 and len(errors) == 1 and "missing.toml" in errors[0]


def test_help_and_mistakes_still_get_typer(tmp_path):
    helped = _cli("run", "--help")
    assert helped.returncode == 0 and "--record" in helped.stdout and "typer" in _imported(helped.stderr)
    wrong = _cli("run", "--confg", "x.toml")
    assert wrong.returncode == 2 and "typer" in _imported(wrong.stderr)
