"""The ``status``, ``metrics`` and ``planned-work`` commands (registered on the main app by ``register``)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer

from watchdog_edge.errors import BrokerError, WatchdogError

STATUS_HELP = """Show every agent and model at a glance: connection and heartbeat age per agent; per model each check's level, the live loss with its interval against the expected loss and the warning/critical limits, pairs, pending records, the last alert and its age, and any planned-work window.

Where it reads:

\b
  a broker      the retained status and state of every agent on it
                (a gateway's broker, or a central broker of a fleet)
  a state file  the agent's own copy, opened read-only; safe while
                the agent runs, and used when the broker is away

With --config it takes the broker's address and TLS CA from the agent's config and, if the broker cannot be reached, reads the agent's state file instead (and says so). Without --broker-user it uses the config's account; under the shipped ACL the agent's own account may not read watchdog/#, so give a reading account (viewer in deploy/mosquitto-watchdog.acl) with --broker-user and --broker-password-file.

An agent is 'late' when its status says online but its heartbeat is older than three status periods: it may have died without its last will reaching the broker.

Exit status: 0 when something was found, 1 when no agent was found, 2 on an error.

This is an advisory monitor of the model's error, not a protection system.

\b
Examples:
  watchdog-edge status --config /etc/watchdog-edge/config.toml
  watchdog-edge status -b central:8883 -u viewer --broker-password-file ~/.viewer-pass
  watchdog-edge status --state-file /var/lib/watchdog-edge/state.sqlite --json
  watchdog-edge status --broker 127.0.0.1:1883 --model pump --json | jq .models
"""

METRICS_HELP = """Serve the agents' counters and gauges as OpenMetrics text for the plant's existing scraping (opt-in; runs as its own process, the agent stays lean).

It subscribes to the retained status and state on a broker (one gateway or a central broker of a fleet) and answers each scrape from the latest of them. Heartbeat age is measured here, outside the agent, so a dead agent shows as a growing age rather than a frozen number.

Counters: received, paired, bad by reason, expired, evicted, alerts by check, state and severity, held raises, reconnects. Gauges: live loss, expected loss, level per check (0 normal, 1 warning, 2 critical), planned work active, outbox depth, journal depth, heartbeat age, online.

It binds to 127.0.0.1 by default; a wider --listen is for a scraper on another host behind your own firewall (the endpoint has no password).

\b
Example:
  watchdog-edge metrics --config /etc/watchdog-edge/config.toml --broker-user viewer --broker-password-file /etc/watchdog-edge/viewer.pass
  curl -H 'Accept: application/openmetrics-text' http://127.0.0.1:9710/metrics
"""


def _fail(message: str, code: int = 2) -> None:
    typer.echo(f"watchdog-edge: {message}", err=True)
    raise typer.Exit(code)


def _access(
    broker: Optional[str],
    config_path: Optional[Path],
    user: Optional[str],
    password_file: Optional[Path],
    ca_file: Optional[Path],
    client_id: str,
):
    """Broker access from the flags, with the agent config's host, port and CA as defaults."""
    from watchdog_edge.files.configfile import load_config
    from watchdog_edge.readers.fleet import BrokerAccess

    host, port, ca = "127.0.0.1", 1883, ca_file
    cfg = None
    if config_path is not None:
        cfg = load_config(config_path)
        host, port = cfg.broker.host, cfg.broker.port
        if ca is None and cfg.broker.tls is not None and cfg.broker.tls.ca_file:
            ca = cfg.resolve(cfg.broker.tls.ca_file)
        if user is None and cfg.broker.username:
            # the agent's own account: enough where no ACL limits it (the shipped ACL does)
            from watchdog_edge.agent.link import read_password

            secret = read_password(cfg.broker, cfg.base_dir)
            return BrokerAccess(host, port, cfg.broker.username, None, ca, client_id, secret), cfg
    if broker:
        h, sep, p = broker.rpartition(":")
        if not sep or not p.isdigit() or not h:
            raise WatchdogError(f"--broker {broker!r}: give HOST:PORT, e.g. 127.0.0.1:1883")
        host, port = h, int(p)
    return BrokerAccess(host, port, user, password_file, ca, client_id), cfg


def status(
    config: Optional[Path] = typer.Option(
        None, "--config", "-c", help="The agent's config: broker address, TLS CA, and the state file to fall back on."
    ),
    broker: Optional[str] = typer.Option(
        None, "--broker", "-b", help="HOST:PORT of the broker to read (overrides --config)."
    ),
    user: Optional[str] = typer.Option(
        None, "--broker-user", "-u", help="Broker user name (a reading account); default the config's."
    ),
    password_file: Optional[Path] = typer.Option(
        None, "--broker-password-file", help="File holding that user's broker password."
    ),
    ca_file: Optional[Path] = typer.Option(None, "--ca-file", help="CA certificate: connect with TLS."),
    state_file: Optional[Path] = typer.Option(
        None, "--state-file", help="Read this agent state file (read-only) instead of a broker."
    ),
    topic: list[str] = typer.Option(
        ["watchdog/#"], "--topic", "-t", help="Topic filter to read retained messages from; repeat for more."
    ),
    agent: Optional[str] = typer.Option(None, "--agent", help="Only this agent."),
    model: Optional[str] = typer.Option(None, "--model", help="Only this model."),
    wait: float = typer.Option(2.0, "--wait", min=0.2, max=60, help="Longest wait for retained messages, seconds."),
    as_json: bool = typer.Option(False, "--json", help="Print the report as one JSON object, for scripts."),
) -> None:
    from watchdog_edge.agent.store import state_path
    from watchdog_edge.readers.fleet import read_broker, read_state_file
    from watchdog_edge.readers.status import format_report, report

    try:
        if state_file is not None:
            view = read_state_file(state_file)
        else:
            access, cfg = _access(broker, config, user, password_file, ca_file, "")
            try:
                view = read_broker(access, tuple(topic), wait_s=wait)
            except BrokerError as e:
                if cfg is None or broker:
                    raise
                path = state_path(cfg.resolve(cfg.agent.state_dir))
                typer.echo(f"watchdog-edge: {e}; reading the agent's state file {path} instead", err=True)
                view = read_state_file(path)
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "))
    data = report(view, agent=agent, model=model)
    if as_json:
        typer.echo(json.dumps(data, indent=2))
    else:
        typer.echo(format_report(data))
    if not data["agents"]:
        typer.echo(
            "watchdog-edge: no agent found; check the broker address, the user's read access to "
            "watchdog/#, and --topic if your topic templates differ",
            err=True,
        )
        raise typer.Exit(1)


def metrics(
    config: Optional[Path] = typer.Option(
        None, "--config", "-c", help="The agent's config: broker address and TLS CA."
    ),
    broker: Optional[str] = typer.Option(
        None, "--broker", "-b", help="HOST:PORT of the broker to read (overrides --config)."
    ),
    user: Optional[str] = typer.Option(
        None, "--broker-user", "-u", help="Broker user name (a reading account); default the config's."
    ),
    password_file: Optional[Path] = typer.Option(
        None, "--broker-password-file", help="File holding that user's broker password."
    ),
    ca_file: Optional[Path] = typer.Option(None, "--ca-file", help="CA certificate: connect with TLS."),
    topic: list[str] = typer.Option(["watchdog/#"], "--topic", "-t", help="Topic filter to read; repeat for more."),
    listen: str = typer.Option("127.0.0.1:9710", "--listen", help="ADDRESS:PORT to serve /metrics on."),
) -> None:
    from watchdog_edge.readers.metrics import serve

    try:
        access, _ = _access(broker, config, user, password_file, ca_file, "")
        addr, sep, port = listen.rpartition(":")
        if not sep or not port.isdigit():
            raise WatchdogError(f"--listen {listen!r}: give ADDRESS:PORT, e.g. 127.0.0.1:9710")
        code = serve(access, tuple(topic), addr or "127.0.0.1", int(port))
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "))
    raise typer.Exit(code)


PLANNED_HELP = """Begin or end planned work on an agent: its raises (of the given models, or all) are held back and counted while the window runs; when it ends, episodes still open are published as raised with a note. The checks keep computing throughout.

It publishes a command on the agent's planned-work topic (watchdog/agents/AGENT/commands/planned-work by default) and then watches the agent's status until the window shows begun or ended. The shipped ACL lets only the operator account publish there; a refusal is reported (MQTT 5 reason code). A command the agent cannot apply is set aside as a dead letter with reason bad_command ('watchdog-edge deadletters' says why).

Windows that recur or are known in advance belong in the config ([[planned_work]]). JetStream workers publish no agent status: send them commands with --wait 0 (the broker's acknowledgement is the answer) and read planned_work in the lease bucket.

\\b
Examples:
  watchdog-edge planned-work begin meter-calibration --agent boiler-house-1 --for 1h \\
      --model steam-flow --reason "flow meter calibration" --broker-user operator --broker-password-file ~/.op-pass
  watchdog-edge planned-work begin plant-stop --agent boiler-house-1 --until 2026-12-03T06:00:00Z ...
  watchdog-edge planned-work end meter-calibration --agent boiler-house-1 ...
"""


def planned_work(
    action: str = typer.Argument(..., help="begin or end."),
    name: str = typer.Argument(..., help="The window's name (end takes the name begin gave)."),
    agent: str = typer.Option(..., "--agent", "-a", help="The agent's name (agent.name in its config)."),
    duration: Optional[str] = typer.Option(
        None, "--for", help="begin: length of the window: 90m, 4h, 2d (a bare number is seconds)."
    ),
    until: Optional[str] = typer.Option(None, "--until", help="begin: end of the window, RFC 3339 with an offset."),
    model: list[str] = typer.Option([], "--model", "-m", help="begin: a model to hold; repeat; none means all."),
    reason: str = typer.Option("", "--reason", help="begin: why, shown in state, status and the note."),
    by: Optional[str] = typer.Option(None, "--by", help="begin: who, shown with the window."),
    config: Optional[Path] = typer.Option(None, "--config", "-c", help="An agent config: broker address and TLS CA."),
    broker: Optional[str] = typer.Option(None, "--broker", "-b", help="HOST:PORT of the broker (overrides --config)."),
    user: Optional[str] = typer.Option(None, "--broker-user", "-u", help="Broker user name (an operator account)."),
    password_file: Optional[Path] = typer.Option(
        None, "--broker-password-file", help="File holding that user's broker password."
    ),
    ca_file: Optional[Path] = typer.Option(None, "--ca-file", help="CA certificate: connect with TLS."),
    topic: str = typer.Option(
        "watchdog/agents/{agent}/commands/planned-work",
        "--topic",
        help="Command topic template (broker.topics.planned_work).",
    ),
    status_topic: str = typer.Option(
        "watchdog/agents/{agent}/status", "--status-topic", help="Status topic template (broker.topics.status)."
    ),
    wait: float = typer.Option(
        5.0,
        "--wait",
        min=0,
        max=120,
        help="Seconds to watch the agent's status; 0 delivers the command without watching (JetStream workers "
        "publish no agent status).",
    ),
) -> None:
    from watchdog_edge.cli.durations import parse_duration_s
    from watchdog_edge.readers.commands import command_doc, send_command

    try:
        duration_s = parse_duration_s(duration, "--for") if duration is not None else None
    except WatchdogError as e:
        _fail(str(e))
    if action not in ("begin", "end"):
        _fail(f"action {action!r}: give begin or end")
    if action == "begin" and (duration_s is None) == (until is None):
        _fail("begin needs exactly one of --for SECONDS or --until TIME")
    if action == "end" and (duration_s is not None or until is not None or model or reason or by):
        _fail("end takes only the window's name")
    doc = command_doc(action, name, duration_s, until, model, reason, by)
    try:
        access, _ = _access(broker, config, user, password_file, ca_file, "")
        seen = send_command(
            access, topic.replace("{agent}", agent), status_topic.replace("{agent}", agent), doc, wait_s=wait
        )
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "))
    done = "began" if action == "begin" else "ended"
    if wait == 0:
        typer.echo(
            f"planned work '{name}': the broker took the command for {agent}; its status was not watched (--wait 0)"
        )
        return
    if seen:
        typer.echo(f"planned work '{name}' {done} on {agent} (its status shows it)")
        return
    typer.echo(
        f"watchdog-edge: the command was delivered, but {agent}'s status did not show '{name}' {done} within "
        f"{wait:g} s; is the agent running? A command it cannot apply is in 'watchdog-edge deadletters' as bad_command",
        err=True,
    )
    raise typer.Exit(1)


def register(app: typer.Typer) -> None:
    """Add ``status``, ``metrics`` and ``planned-work`` to the main command line."""
    app.command("status", help=STATUS_HELP)(status)
    app.command("metrics", help=METRICS_HELP)(metrics)
    app.command("planned-work", help=PLANNED_HELP)(planned_work)
