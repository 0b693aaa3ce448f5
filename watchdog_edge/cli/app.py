"""The ``watchdog-edge`` command line."""

from __future__ import annotations

import sys

if __name__ == "__main__":
    # ``python -m watchdog_edge.cli.app run ...`` starts the agent without typer (see cli_run.py).
    from watchdog_edge.cli.main import lean_main

    _code = lean_main(sys.argv[1:])
    if _code is not None:
        sys.exit(_code)

import json
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from watchdog_edge.caution import CAUTION
from watchdog_edge.cli.helpformat import PlainCommand, PlainGroup
from watchdog_edge.errors import WatchdogError

app = typer.Typer(
    cls=PlainGroup,
    help=(
        "Watch a deployed regression model: pair its predictions with late measured truths, "
        "compare the live error with the error its model card leads you to expect, and raise "
        "alerts when they part. Start with 'watchdog-edge demo'.\n\n"
        f"Caution: {CAUTION}"
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
err_console = Console(stderr=True)


def fail(e: Exception, code: int = 2) -> None:
    """Print a WatchdogError as the user should read it and exit non-zero."""
    err_console.print(f"[bold red]error:[/bold red] {e}", highlight=False, soft_wrap=True)
    raise typer.Exit(code)


@app.command("check-config", cls=PlainCommand)
def check_config(
    config: Path = typer.Argument(..., help="The TOML config file to validate."),
    as_json: bool = typer.Option(False, "--json", help="Print the resolved settings as JSON."),
) -> None:
    """Validate a config and its model cards; print every resolved setting, defaults included.

    Secrets are never shown: a password is only ever read from the file or environment
    variable that the config names, and here only whether it is set is printed.
    """
    from watchdog_edge.core.monitor import Monitor
    from watchdog_edge.core.settings import config_warnings
    from watchdog_edge.files.configfile import load_cards, load_config

    try:
        cfg = load_config(config)
        cards = load_cards(cfg)
        Monitor(cfg, cards)  # builds every check: catches a card unfit for a check
    except WatchdogError as e:
        fail(e)
    from watchdog_edge.core.cards import expected_loss
    from watchdog_edge.replay.report import source_words

    data = cfg.model_dump(mode="json")
    comments: dict[tuple[str | int, ...], list[str] | str] = {}
    b = data["broker"]
    if b.get("password_file"):
        comments[("broker", "password_file")] = "contents not shown"
    if b.get("password_env"):
        comments[("broker", "password_env")] = "value not shown"
    for i, m in enumerate(data["models"]):
        card = cards[m["id"]]
        exp, src = expected_loss(card)
        if as_json:
            m["expected_loss"] = {"value": exp, "source": src, "loss": card.loss}
        comments[("models", i)] = [
            f"expected {card.loss} loss {exp:.6g}, from the {source_words(src)} (card {m['card']})"
        ]
    from watchdog_edge.agent.link import secret_warnings

    warnings = config_warnings(cfg) + secret_warnings(cfg.broker, cfg.base_dir)
    if as_json:
        typer.echo(json.dumps(data, indent=2))
    else:
        from watchdog_edge.files.tomlout import dumps

        typer.echo(f"# {config}: resolved settings, defaults included; this text loads again as a config.\n")
        typer.echo(dumps(data, comments))
    for w in warnings:
        err_console.print(f"[yellow]warning:[/yellow] {w}", highlight=False, soft_wrap=True)
    if not as_json:
        on = sum(len(m.enabled_checks()) for m in cfg.models)
        n = len(cfg.models)
        said = f"{len(warnings)} warning{'s' if len(warnings) != 1 else ''} above" if warnings else "no warnings"
        typer.echo(f"# {config}: valid; {n} model{'s' if n != 1 else ''}, {on} checks on, cards loaded, {said}.")


@app.command(cls=PlainCommand)
def replay(
    recording: Path = typer.Argument(..., help="Recording (JSON Lines, one received message or tick a line)."),
    config: Path = typer.Option(..., "--config", "-c", help="The TOML config that names models, topics and cards."),
    alerts: Optional[Path] = typer.Option(None, "--alerts", help="Write every alert to this file as JSON Lines."),
    tick_every: Optional[str] = typer.Option(
        None,
        "--tick-every",
        metavar="DURATION",
        help="Add a timer tick this often in receive time, e.g. 1s or 60s; a bare number is seconds "
        "(recordings made elsewhere have none).",
    ),
    as_json: bool = typer.Option(False, "--json", help="Print the summary as JSON instead of tables."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="Do not print alerts as they happen."),
    skip_bad_lines: bool = typer.Option(
        False,
        "--skip-bad-lines",
        help="Skip and count malformed lines instead of stopping (a cut last line is always skipped).",
    ),
) -> None:
    """Run a recording through the same core as the live agent and report what it finds.

    The same recording with the same config and cards gives the same alerts, byte for byte,
    as the live agent gave while recording it.
    """
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from watchdog_edge.cli.durations import parse_duration_s
    from watchdog_edge.core.events import Alert
    from watchdog_edge.files.configfile import load_monitor
    from watchdog_edge.replay.recording import ReadCounts, alert_line, read_recording
    from watchdog_edge.replay.recording import replay as run_replay
    from watchdog_edge.replay.report import format_alert, print_summary, summary

    console = Console(stderr=as_json)
    try:
        tick_s = parse_duration_s(tick_every, "--tick-every") if tick_every is not None else None
        mon = load_monitor(config)
        size = recording.stat().st_size if recording.exists() else 0
        out = alerts.open("w", encoding="utf-8") if alerts else None
        found: list[Alert] = []

        def on_event(ev) -> None:
            if isinstance(ev, Alert):
                found.append(ev)
                if out:
                    out.write(alert_line(ev) + "\n")
                if not quiet and not as_json:
                    console.print(format_alert(ev), highlight=False)

        skipped = ReadCounts()
        lines = read_recording(recording, skip_bad=skip_bad_lines, counts=skipped)
        show_bar = size > 5_000_000 and console.is_terminal
        if show_bar:
            with Progress(
                TextColumn("replay"),
                BarColumn(),
                TextColumn("{task.percentage:>3.0f}%"),
                TimeRemainingColumn(),
                console=Console(stderr=True),
            ) as bar:
                task = bar.add_task("replay", total=size)
                done = 0

                def counted():
                    nonlocal done
                    for ln in lines:
                        done += 80 + (len(ln.payload) if ln.payload else 0)
                        if done > 1_000_000:
                            bar.advance(task, done)
                            done = 0
                        yield ln

                run_replay(mon, counted(), tick_s, on_event)
        else:
            run_replay(mon, lines, tick_s, on_event)
        if out:
            out.close()
    except WatchdogError as e:
        fail(e)
    if as_json:
        data = summary(mon)
        data["alerts"] = len(found)
        data["skipped_lines"] = {"cut_last_line": skipped.cut_last_line, "bad": skipped.bad_lines_skipped}
        typer.echo(json.dumps(data, indent=2, default=str))
    else:
        print_summary(mon, console)
        console.print(f"{len(found)} alerts" + (f", written to {alerts}" if alerts else ""))
        if skipped.cut_last_line or skipped.bad_lines_skipped:
            console.print(
                f"skipped lines: {skipped.cut_last_line} cut last line, {skipped.bad_lines_skipped} bad lines"
            )


@app.command(cls=PlainCommand)
def demo(
    folder: Path = typer.Option(Path("watchdog-demo"), "--folder", "-o", help="Where the demo leaves its files."),
    seed: int = typer.Option(7, "--seed", help="Seed of the invented data; the same seed gives the same files."),
    duration: str = typer.Option(
        "6d", "--duration", metavar="DURATION", help="Field traffic to simulate: 6d, 36h (a bare number is days)."
    ),
) -> None:
    """Watch two invented cold-store models: one overfit from the start, one that degrades.

    Generates training data, fits a sensible model and an over-complex one on too few rows,
    writes their model cards and a config with all six checks on, synthesises a live stream
    with late, sparse truths and a fault that appears later, replays it through the core
    (alerts printed as they happen), and leaves every file in FOLDER so that you can run
    'watchdog-edge replay' on them yourself.
    """
    from watchdog_edge.cli.demo import run_demo
    from watchdog_edge.cli.durations import parse_duration_s

    try:
        days = parse_duration_s(duration, "--duration", bare_unit="d") / 86400
        run_demo(folder, seed=seed, days=days, console=Console(highlight=False))
    except WatchdogError as e:
        fail(e)


def _register_optional() -> None:
    """Sub-commands that live in their own modules."""
    import importlib

    try:
        from watchdog_edge.cli.card import app as card_app

        app.add_typer(card_app, name="card")
    except ModuleNotFoundError as e:
        if e.name != "watchdog_edge.cli.card":
            raise
    for mod in (
        "watchdog_edge.cli.agent",
        "watchdog_edge.cli.sim",
        "watchdog_edge.cli.jetstream",
        "watchdog_edge.cli.status",
        "watchdog_edge.cli.page",
    ):
        try:
            importlib.import_module(mod).register(app)
        except ModuleNotFoundError as e:
            if e.name != mod:
                raise


_register_optional()


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":
    main()
