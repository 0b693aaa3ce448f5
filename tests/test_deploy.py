"""The deploy kit: deploy/check.sh proves the shipped ACL and bridge on two real mosquitto brokers."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from broker import INSTALL_HINT

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"


def test_deploy_check_proves_the_acl_and_the_bridge():
    for tool in ("mosquitto_pub", "mosquitto_sub", "mosquitto_passwd"):
        if not shutil.which(tool):
            pytest.fail(f"{tool} is not installed; deploy/check.sh needs it: {INSTALL_HINT}")
    r = subprocess.run(["bash", str(DEPLOY / "check.sh")], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "FAIL" not in r.stdout
    # each rule the kit promises is tried, not only some
    for words in (
        "the agent cannot publish outside its topics",
        "a sensor cannot read alerts",
        "a viewer cannot send planned-work commands",
        "bridge: an alert raised on the gateway arrives on the central broker",
        "bridge: a command from the central broker reaches the agent",
        "bridge: nothing but the command topic comes back",
    ):
        assert f"ok    {words}" in r.stdout, words


def test_units_run_the_commands_as_the_service_user():
    for unit, command in (
        ("watchdog-edge.service", "watchdog-edge run --config"),
        ("watchdog-edge-page.service", "watchdog-edge page --config"),
        ("watchdog-edge-metrics.service", "watchdog-edge metrics --config"),
    ):
        text = (DEPLOY / unit).read_text()
        assert "User=watchdog-edge" in text and command in text, unit
