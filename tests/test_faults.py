"""The fault campaign's short form: the same code as ``bench/faults.py``, with small counts.

Real mosquitto brokers on free loopback ports, the agent as a real process, a loopback TCP
relay for the network faults, a real small tmpfs for the full and read-only state folder
(that needs root, as .ci/run has). The full form and its table are in the README, section
"Faults, measured": ``python3 bench/faults.py``.
"""

from __future__ import annotations

import importlib.util
import os
import sys
from pathlib import Path

import pytest
from broker import INSTALL_HINT, mosquitto_binary

pytestmark = pytest.mark.broker  # every test here but the last starts brokers or agents

REPO = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("faults", REPO / "bench" / "faults.py")
assert _spec is not None and _spec.loader is not None
faults = importlib.util.module_from_spec(_spec)
sys.modules["faults"] = faults
_spec.loader.exec_module(faults)


def _check(rows: list) -> None:
    text = faults.table(rows)
    print(text)
    assert all(r.ok for r in rows), text


@pytest.fixture(autouse=True)
def _needs_mosquitto() -> None:
    mosquitto_binary()  # fails (never skips) with the install hint: INSTALL_HINT
    assert INSTALL_HINT


def test_agent_sigkilled_at_random_points_loses_and_doubles_nothing(tmp_path):
    os.chmod(tmp_path, 0o755)
    row = faults.row_agent_kill(tmp_path, kills=3)
    _check([row])
    assert row.lost == 0 and row.dup_pairs == 0 and row.dup_raises == 0
    assert row.alerts.startswith("equal") and row.details["integrity"] == "ok"
    assert row.published == row.took and row.published > 0


def test_an_agent_that_boots_before_its_broker_waits_and_takes_everything(tmp_path):
    os.chmod(tmp_path, 0o755)
    row = faults.row_boot_order(tmp_path, wait_s=2.0)
    _check([row])
    assert row.lost == 0 and "unreachable_at_start" in row.outcome


def test_broker_restarted_under_load_loses_nothing_and_keeps_its_files_as_mosquitto(tmp_path):
    os.chmod(tmp_path, 0o755)
    row = faults.row_broker_restart(tmp_path, restarts=1)
    _check([row])
    assert row.lost == 0 and row.alerts.startswith("equal")
    if faults.IS_ROOT:
        assert "owned by mosquitto" in row.outcome


def test_broker_sigkilled_loses_only_what_its_autosave_interval_had_not_saved(tmp_path):
    # mosquitto saves its in-memory state every autosave_interval seconds (mosquitto.conf(5));
    # a SIGKILL loses what was queued since. Queued 2 s before the kill: kept at 1 s, lost at 60 s.
    os.chmod(tmp_path, 0o755)
    kept = faults.row_broker_kill_queue(tmp_path / "a", autosave_s=1)
    gone = faults.row_broker_kill_queue(tmp_path / "b", autosave_s=60)
    _check([kept, gone])
    assert kept.lost == 0 and kept.published == 200
    assert gone.lost == gone.published == 200 and gone.took == 0


def test_frozen_dropped_and_half_closed_connections_are_noticed_and_lose_nothing(tmp_path):
    os.chmod(tmp_path, 0o755)
    row = faults.row_network(tmp_path, ("drop", "half_close", "freeze"))
    _check([row])
    assert row.lost == 0 and row.alerts.startswith("equal")
    assert "Keep alive timeout" in row.outcome  # the freeze, noticed by the keepalive


def test_full_then_read_only_state_folder_pauses_and_recovers_by_itself(tmp_path):
    if not faults.IS_ROOT:
        pytest.fail("this test mounts a small tmpfs for the state folder: run the tests as root (as .ci/run does)")
    os.chmod(tmp_path, 0o755)
    full = faults.row_disk_full(tmp_path / "full")
    ro = faults.row_read_only(tmp_path / "ro")
    _check([full, ro])
    assert full.lost == 0 and ro.lost == 0 and full.alerts.startswith("equal")


def test_core_rows_flood_clock_and_fuzzing():
    rows = [faults.row_flood(100_000, cap=20_000), faults.row_clock(), faults.row_fuzz(60)]
    _check(rows)
    assert "evicted 80,000" in rows[0].outcome


def test_security_rows_are_each_visible(tmp_path):
    os.chmod(tmp_path, 0o755)
    rows = faults.row_security(tmp_path)
    _check(rows)
    assert [r.fault for r in rows] == [
        "refused password at start",
        "password refused while running",
        "untrusted broker certificate",
        "TLS hostname verification off",
        "alert publish denied by the ACL (MQTT 5)",
        "password file readable by others",
        "alert publish denied by the ACL (MQTT 3.1.1)",
    ]


def test_the_table_has_the_campaigns_columns():
    rows = [faults.Row("x", published=3, took=3, lost=0, outcome="pass")]
    head = faults.table(rows).splitlines()[0].split("  ")
    assert [h.strip() for h in head if h.strip()] == [
        "fault",
        "tried",
        "published",
        "took",
        "lost",
        "dup pairs",
        "alerts vs replay",
        "dup raises",
        "outcome",
    ]
    assert faults.table(rows, markdown=True).startswith("| fault | tried |")
