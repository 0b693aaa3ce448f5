"""The ``run`` and ``deadletters`` commands (registered on the main app by ``register``)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import typer

from watchdog_edge.caution import CAUTION
from watchdog_edge.cli.helpformat import PlainCommand
from watchdog_edge.errors import WatchdogError

RUN_HELP = (
    """Run the live agent: subscribe to every model's prediction and truth topics, pair them, run the checks, and publish alerts, retained per-model state and a retained agent status.

What it keeps on disk, in agent.state_dir (one SQLite file):

\b
  journal      each message and timer tick, committed
               before the message is acknowledged (QoS 1)
  snapshot     the monitor's state, every
               agent.snapshot_every_s and on shutdown
  outbox       alerts until the broker acknowledges them,
               re-sent with the same alert_id
  dead letters bad payloads and why ('deadletters')

A restart resumes from the snapshot plus the journal, so windows continue and no alert is raised twice.

Stop it with SIGTERM or Ctrl-C: it finishes the batch in hand, sends what the broker accepts, takes a snapshot, sets its status to offline and exits 0. If the broker refuses it at start (wrong password, untrusted certificate, not authorised) it prints one line saying why and exits 3; a bad config or card exits 2. A broker that cannot be reached yet (it may start later than the agent at boot) is retried with backoff, as is a state folder that is full or read-only; the log says so.

The password comes from the file named by broker.password_file or the environment variable named by broker.password_env, never from the command line.

Caution: """
    + CAUTION
    + """

\b
Example:
  watchdog-edge run --config config.toml --record today.jsonl
  watchdog-edge replay today.jsonl --config config.toml
"""
)

DEADLETTERS_HELP = """List the bad payloads the agent set aside: time, topic, reason, size and the raw payload (cut to the dead-letter byte budget). It reads the agent's state file, also while the agent runs.

Reasons: oversize, not_json, not_object, missing_id, missing_value, bad_type, not_finite, bad_ts, unknown_topic. The store keeps at most agent.dead_letter_max_count letters and agent.dead_letter_max_bytes bytes; the oldest go first and are counted as dropped.

\b
Example:
  watchdog-edge deadletters --config config.toml --last 20
  watchdog-edge deadletters --config config.toml --json
"""


def _fail(message: str, code: int) -> None:
    typer.echo(f"watchdog-edge: {message}", err=True)
    raise typer.Exit(code)


def run(
    config: Path = typer.Option(..., "--config", "-c", help="The agent's TOML config file."),
    record: Optional[Path] = typer.Option(
        None,
        "--record",
        help="Also write every received message and timer tick to this JSON Lines recording "
        "(appended to, across restarts); 'watchdog-edge replay' on it gives the same alerts as the agent.",
    ),
    log_level: str = typer.Option("info", "--log-level", help="debug, info, warning or error."),
) -> None:
    from watchdog_edge.cli.start import run_agent

    raise typer.Exit(run_agent(config, record, log_level))


def deadletters(
    config: Path = typer.Option(..., "--config", "-c", help="The agent's TOML config file (to find agent.state_dir)."),
    as_json: bool = typer.Option(False, "--json", help="One JSON object per line, payload as text or payload_b64."),
    last: Optional[int] = typer.Option(None, "--last", min=1, help="Only the newest N letters."),
) -> None:
    from watchdog_edge.agent.store import read_dead_letters, state_path
    from watchdog_edge.core.events import rfc3339
    from watchdog_edge.files.configfile import load_config

    try:
        cfg = load_config(config)
        letters = read_dead_letters(state_path(cfg.resolve(cfg.agent.state_dir)), limit=last)
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "), 2)
    if as_json:
        for d in letters:
            typer.echo(json.dumps(d.to_dict(), ensure_ascii=False))
        return
    if not letters:
        typer.echo("no dead letters")
        return
    typer.echo(f"{'time (UTC)':<24}  {'reason':<13}  {'bytes':>6}  topic / detail / payload")
    for d in letters:
        shown = d.payload[:80].decode("utf-8", "backslashreplace").replace("\n", "\\n")
        more = "..." if len(d.payload) > 80 or d.truncated else ""
        typer.echo(f"{rfc3339(d.t):<24}  {d.reason:<13}  {d.size:>6}  {d.topic}")
        typer.echo(f"{'':<24}  {'':<13}  {'':>6}  {d.detail}")
        typer.echo(f"{'':<24}  {'':<13}  {'':>6}  {shown}{more}")


def register(app: typer.Typer) -> None:
    """Add ``run`` and ``deadletters`` to the main command line."""
    app.command("run", help=RUN_HELP, cls=PlainCommand)(run)
    app.command("deadletters", help=DEADLETTERS_HELP, cls=PlainCommand)(deadletters)
