"""The deploy kit: deploy/check.sh proves the shipped ACL and bridge on two real mosquitto brokers."""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import pytest
from broker import INSTALL_HINT

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"


@pytest.mark.broker
@pytest.mark.slow
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


@pytest.mark.broker
@pytest.mark.slow
def test_the_real_agent_works_under_the_shipped_acl(tmp_path):
    """The agent as a process, with the shipped ACL and accounts: it reads its feeds and its
    commands, publishes alerts, state and status; a viewer's command never reaches it."""
    import json

    import numpy as np
    from broker import Broker
    from test_agent import AgentProc, Client
    from test_readers import cli

    from watchdog_edge.core.cards import ModelCard
    from watchdog_edge.files.cardfile import save_card

    users = ["watchdog-edge", "model-steam-flow", "meter-steam-flow", "operator", "viewer"]
    secret = {u: f"pw-{u}" for u in users}
    broker = Broker(tmp_path / "broker", passwords=secret, acl=(DEPLOY / "mosquitto-watchdog.acl").read_text())
    try:
        save_card(
            ModelCard(
                model_id="steam-flow",
                model_version="v1",
                training={"loss": 0.9, "count": 5000},
                fitted_parameters=4,
                least_squares=True,
                holdout={"loss": 1.0, "count": 1000},
            ),
            tmp_path / "steam-flow.card.json",
        )
        (tmp_path / "agent.pass").write_text(secret["watchdog-edge"] + "\n")
        cfg = tmp_path / "config.toml"
        cfg.write_text(
            f"""
[agent]
name = "boiler-house-1"
state_dir = "state"
tick_every_s = 0.2
state_every_s = 0.5

[broker]
host = "127.0.0.1"
port = {broker.port}
username = "watchdog-edge"
password_file = "agent.pass"
reconnect_min_s = 0.1
reconnect_max_s = 0.5

[[models]]
id = "steam-flow"
card = "steam-flow.card.json"
prediction_topic = "plant/boiler/steam-flow/pred"
truth_topic = "plant/boiler/steam-flow/meter"
[models.window]
size_pairs = 60
min_pairs = 40
[models.checks.gap]
evaluate_every_pairs = 5
[models.checks.feed_stop]
enabled = false
[models.checks.range]
enabled = false
[models.checks.shift]
enabled = false
"""
        )
        operator = Client(broker, "ops", ["watchdog/#"], auth=("operator", secret["operator"]))
        agent = AgentProc(cfg)
        try:
            agent.wait_ready()
            model = Client(broker, "model", auth=("model-steam-flow", secret["model-steam-flow"]))
            meter = Client(broker, "meter", auth=("meter-steam-flow", secret["meter-steam-flow"]))
            viewer = Client(broker, "viewer", auth=("viewer", secret["viewer"]))
            cmd = "watchdog/agents/boiler-house-1/commands/planned-work"
            viewer.publish(cmd, json.dumps({"action": "begin", "name": "from-viewer", "duration_s": 60}))
            rng = np.random.default_rng(1)
            for s in range(0, 80, 10):
                ids = range(s, s + 10)
                model.publish("plant/boiler/steam-flow/pred", json.dumps([{"id": i, "value": 10.0} for i in ids]))
                errs = rng.normal(0.0, 3.0, 10)
                meter.publish(
                    "plant/boiler/steam-flow/meter",
                    json.dumps([{"id": i, "value": 10.0 + float(e)} for i, e in zip(ids, errs)]),
                )
            operator.wait_for(lambda: operator.json_on("watchdog/steam-flow/alerts"), what="an alert under the ACL")
            operator.wait_for(lambda: operator.on("watchdog/steam-flow/state"), what="retained state under the ACL")
            status = operator.json_on("watchdog/agents/boiler-house-1/status")
            assert status and status[-1]["connection"] == "online"
            # the operator's tool: the command goes out and the agent's status confirms it
            (tmp_path / "op.pass").write_text(secret["operator"])
            (tmp_path / "viewer.pass").write_text(secret["viewer"])
            where = ["--agent", "boiler-house-1", "--broker", f"127.0.0.1:{broker.port}"]
            op = ["--broker-user", "operator", "--broker-password-file", str(tmp_path / "op.pass")]
            begin = ["planned-work", "begin", "from-operator", *where, "--for", "60", "--model", "steam-flow"]
            r = cli(*begin, "--reason", "meter check", *op)
            assert r.returncode == 0, r.stdout + r.stderr
            assert "planned work 'from-operator' began on boiler-house-1" in r.stdout
            assert "planned work 'from-operator' began" in agent.text()
            # a viewer is refused by the broker (MQTT 5 reason code), and the tool says so
            r = cli(
                "planned-work", "begin", "from-viewer-tool", *where, "--for", "60",
                "--broker-user", "viewer", "--broker-password-file", str(tmp_path / "viewer.pass"),
            )  # fmt: skip
            assert r.returncode == 2 and "refused the command" in r.stderr, r.stdout + r.stderr
            r = cli("planned-work", "end", "from-operator", *where, *op)
            assert r.returncode == 0 and "'from-operator' ended" in r.stdout, r.stdout + r.stderr
            assert "from-viewer" not in agent.text()
            for c in (model, meter, viewer):
                c.close()
        finally:
            rc = agent.stop()
        assert rc == 0, agent.text()
        operator.wait_for(
            lambda: operator.json_on("watchdog/agents/boiler-house-1/status")[-1]["connection"] == "offline",
            what="status offline under the ACL",
        )
        operator.close()
    finally:
        broker.stop()
