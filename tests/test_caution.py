"""The advisory caution stands wherever a user starts or reads the tool: help, demo, run's start log."""

import io
import re
import subprocess
import sys

from rich.console import Console
from test_agent import AgentProc, write_setup

from watchdog_edge.caution import CAUTION
from watchdog_edge.cli.demo import run_demo


def _flat(text: str) -> str:
    """Text as words: help screens and consoles wrap lines and draw boxes."""
    return re.sub(r"[\s│]+", " ", text)


def test_the_caution_says_what_the_tool_is_not_and_who_decides():
    for words in ("not a protection or safety system", "alarms, interlocks or trips", "qualified people"):
        assert words in CAUTION


def test_main_help_carries_the_caution():
    out = subprocess.run(
        [sys.executable, "-m", "watchdog_edge.cli.app", "--help"],
        capture_output=True,
        text=True,
        timeout=60,
        env={"COLUMNS": "90", "PATH": "/usr/bin:/bin", "PYTHONPATH": ":".join(sys.path)},
    )
    assert out.returncode == 0, out.stderr
    assert CAUTION in _flat(out.stdout)


def test_demo_output_carries_the_caution_explains_expiry_and_suggests_a_command_that_pastes(tmp_path):
    buf = io.StringIO()
    folder = tmp_path / "a rather long folder name for a narrow terminal"
    run_demo(folder, days=1.0, console=Console(file=buf, width=50))
    text = buf.getvalue()
    assert CAUTION in _flat(text)
    assert "predictions expired: no truth came for them within pairing.horizon_s = 3600 s" in _flat(text)
    assert "Truths are sparser than predictions here" in _flat(text)
    # the suggested command is one line however narrow the terminal, and quotes the paths
    [cmd] = [ln.strip() for ln in text.splitlines() if ln.strip().startswith("watchdog-edge replay")]
    assert cmd.endswith("--alerts again.jsonl") and f"'{folder / 'recording.jsonl'}'" in cmd


def test_run_start_log_line_carries_the_caution(tmp_path, broker):
    agent = AgentProc(write_setup(tmp_path, broker))
    try:
        agent.wait_ready()
    finally:
        rc = agent.stop()
    assert rc == 0, agent.text()
    first = [ln for ln in agent.text().splitlines() if "starting with" in ln]
    assert len(first) == 1 and first[0].endswith(f"Caution: {CAUTION}"), agent.text()


def test_the_documents_a_user_reads_first_carry_the_caution():
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    readme = (root / "README.md").read_text()
    assert readme.index("not a substitute for alarms, interlocks or trips") < readme.index("pip install")
    for name in ("README.md", "deploy/README.md", "deploy/config.toml", "simulators/README.md"):
        text = _flat((root / name).read_text().replace("#", " ").replace(">", " "))
        assert "not a protection" in text and "interlocks or trips" in text, name
        assert "qualified people" in text, name
    assert "severity` describes the model, not the plant" in readme


def test_the_deploy_example_config_uses_the_current_keys():
    from pathlib import Path

    import tomllib

    from watchdog_edge.core.settings import parse_config

    root = Path(__file__).resolve().parent.parent
    cfg = parse_config(tomllib.loads((root / "deploy/config.toml").read_text()), root / "deploy", "deploy/config.toml")
    assert cfg.broker.keepalive_s == 30 and cfg.models[0].window.size_pairs == 500
    unit = (root / "deploy/watchdog-edge.service").read_text()
    assert "User=watchdog-edge\n" in unit and "Group=watchdog-edge\n" in unit
