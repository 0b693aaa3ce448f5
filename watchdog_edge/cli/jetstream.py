"""The ``jetstream`` commands: run a worker, print the server's mappings, export the input stream."""

from __future__ import annotations

import asyncio
from pathlib import Path
from typing import Optional

import typer

from watchdog_edge.errors import WatchdogError

app = typer.Typer(
    help="Run the monitor as NATS JetStream workers, partitioned by model (see README, 'Past one gateway'). "
    "Advisory only: it watches the models' error, not the plant; it defers to site rules and qualified people.",
    no_args_is_help=True,
)

RUN_HELP = """Run one JetStream worker: hold a share of the partitions, feed their messages through the core, publish alerts to the alert stream (alert_id as the message id) and retained state per model to a key-value bucket.

Start as many as you like, on one machine or many: they share the partitions through leases in a key-value bucket, and when one stops or dies the others take its partitions within about jetstream.lease_s. A partition's snapshot is kept in a key-value bucket and messages are acknowledged only after a snapshot covers them, so a replacement worker continues where the last snapshot left off and no alert is lost or raised twice.

Stop it with SIGTERM or Ctrl-C: it snapshots and acknowledges its partitions, hands them back and exits 0. A bad config or card exits 2; no server reached within jetstream.start_timeout_s at start, or a JetStream that refuses to make the streams and buckets (or is not ready within that timeout: a new cluster electing its leaders is waited for), exits 3; once connected it reconnects for as long as it takes.

The NATS server needs JetStream and the subject mappings printed by 'watchdog-edge jetstream mappings'; with an MQTT listener (mqtt { port: 1883 }) gateways publish to it unchanged.

\b
Example:
  watchdog-edge jetstream mappings --config central.toml >> nats-server.conf
  watchdog-edge jetstream run --config central.toml
"""


def _fail(message: str, code: int) -> None:
    typer.echo(f"watchdog-edge: {message}", err=True)
    raise typer.Exit(code)


@app.command("run", help=RUN_HELP)
def run(
    config: Path = typer.Option(..., "--config", "-c", help="The TOML config file with a [jetstream] section."),
    worker_id: Optional[str] = typer.Option(
        None, "--worker-id", help="This worker's name in the lease bucket (default: host name and process id)."
    ),
    log_level: str = typer.Option("info", "--log-level", help="debug, info, warning or error."),
) -> None:
    from watchdog_edge.jetstream.start import run_worker

    raise typer.Exit(run_worker(config, worker_id, log_level))


@app.command("mappings")
def mappings(
    config: Path = typer.Option(..., "--config", "-c", help="The TOML config file with a [jetstream] section."),
) -> None:
    """Print the subject mappings the NATS server needs: model topics into partitions, and the command topic."""
    from watchdog_edge.files.configfile import load_config
    from watchdog_edge.jetstream.subjects import server_config

    try:
        typer.echo(server_config(load_config(config)), nl=False)
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "), 2)


@app.command("export")
def export(
    config: Path = typer.Option(..., "--config", "-c", help="The TOML config file with a [jetstream] section."),
    out: Path = typer.Option(..., "--out", "-o", help="The recording to write (JSON Lines, overwritten)."),
    partition: Optional[int] = typer.Option(
        None,
        "--partition",
        min=0,
        help="Only this partition (and the planned-work commands, which every partition reads).",
    ),
) -> None:
    """Write the input stream as a recording with the times the workers used (the stream's stored times).

    'watchdog-edge replay' of one partition's recording gives the alerts the workers raised for its models.
    """
    from watchdog_edge.files.configfile import load_config
    from watchdog_edge.jetstream.start import export_recording

    try:
        n = asyncio.run(export_recording(load_config(config), out, partition))
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "), 2)
    typer.echo(f"{n} lines written to {out}")


def register(main_app: typer.Typer) -> None:
    """Add ``jetstream`` to the main command line."""
    main_app.add_typer(app, name="jetstream")
