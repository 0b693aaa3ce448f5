"""``simulate`` and ``tune``: invented field traffic, and tolerances chosen on recorded traffic.

Registered on the main app by ``register(app)``; the work is done in the ``simulators`` package.
"""

from __future__ import annotations

import os
import shlex
import sys
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from watchdog_edge.cli.durations import parse_duration_s
from watchdog_edge.cli.helpformat import PlainCommand
from watchdog_edge.errors import ConfigError, WatchdogError


def _fail(e: Exception) -> None:
    Console(stderr=True).print(f"[bold red]error:[/bold red] {e}", highlight=False, soft_wrap=True)
    raise typer.Exit(2)


def simulate(
    scenario: str = typer.Argument(
        ...,
        help="A scenario file, or the name of a shipped one (cold-store, pumping-station, greenhouse, dairy-chiller).",
    ),
    to_recording: Optional[Path] = typer.Option(
        None,
        "--to-recording",
        help="Write a recording (JSON Lines) here, with its incidents file, config and card beside it.",
    ),
    broker: Optional[str] = typer.Option(None, "--broker", help="Publish live to this broker, HOST:PORT, at QoS 1."),
    speed: float = typer.Option(1.0, "--speed", help="Live only: simulated seconds per wall-clock second."),
    duration: Optional[str] = typer.Option(
        None,
        "--duration",
        metavar="DURATION",
        help="Simulated time: 90m, 6h, 2d (a bare number is hours; default: the scenario's).",
    ),
    seed: Optional[int] = typer.Option(
        None, "--seed", help="Seed; the same seed gives the same traffic, byte for byte."
    ),
    files: Optional[Path] = typer.Option(
        None,
        "--files",
        help="Live only: also write the card, config (pointing at --broker) and incidents file into this folder.",
    ),
) -> None:
    """Simulate an invented site: train its model, then send its predictions and truths.

    Exactly one of --to-recording and --broker. Live, the payloads are those the recording would hold for the same seed; they are paced by the wall clock at --speed.
    """
    from simulators.bundle import config_data, incidents_data, write_bundle
    from simulators.generate import simulate as run_sim
    from simulators.scenario import load_scenario, resolve_scenario

    console = Console(stderr=True, highlight=False)
    if (to_recording is None) == (broker is None):
        _fail(ConfigError("give exactly one of --to-recording FILE and --broker HOST:PORT"))
    try:
        hours = parse_duration_s(duration, "--duration", bare_unit="h") / 3600 if duration else None
        path = resolve_scenario(scenario)
        sc = load_scenario(path)
        run = run_sim(sc, seed=seed, duration_h=hours)
        name = path.stem
        if to_recording is not None:
            paths = write_bundle(run, to_recording, name)
            console.print(
                f"{len(run.messages)} messages ({run.counts['predictions']} predictions, "
                f"{run.counts['truths']} truths) from {sc.site.name}, seed {run.seed}"
            )
            console.print(
                f"recording  {paths.recording}\nincidents  {paths.incidents} ({len(run.incidents)})\n"
                f"config     {paths.config}\ncard       {paths.card}"
            )
            console.print(
                f"replay it: watchdog-edge replay {shlex.quote(str(paths.recording))} "
                f"--config {shlex.quote(str(paths.config))}",
                soft_wrap=True,
                markup=False,
            )
            return
        from simulators.live import parse_broker, publish_live

        host, port = parse_broker(broker or "")
        if files is not None:
            import json

            import watchdog_edge.files.tomlout as tomlout
            from watchdog_edge.files.cardfile import save_card

            files.mkdir(parents=True, exist_ok=True)
            card_path = files / f"{sc.model.id}.card.json"
            save_card(run.card, card_path)
            (files / f"{name}.config.toml").write_text(
                tomlout.dumps(config_data(sc, card_path.name, broker=(host, port))), encoding="utf-8"
            )
            (files / f"{name}.incidents.json").write_text(
                json.dumps(incidents_data(run, name), indent=2) + "\n", encoding="utf-8"
            )
            console.print(f"card, config and incidents written to {files}")
        span = run.end_t - run.start_t
        console.print(
            f"publishing {len(run.messages)} messages to {host}:{port} over "
            f"{span / speed:.0f} s ({span / 3600:g} h simulated at {speed:g}x)"
        )
        acked = publish_live(run.messages, host, port, speed=speed, start_t=run.start_t)
        console.print(f"{acked} messages acknowledged by the broker")
    except (WatchdogError, ValueError) as e:
        _fail(e)


def tune(
    recording: Path = typer.Argument(..., help="Recording to tune on (JSON Lines)."),
    config: Path = typer.Option(..., "--config", "-c", help="The TOML config whose check settings are varied."),
    incidents: Optional[Path] = typer.Option(
        None, "--incidents", help="Incidents file (JSON): kind and span of each known incident."
    ),
    grid: Optional[Path] = typer.Option(
        None,
        "--grid",
        help="Grid file (TOML \\[grid] table of dotted keys -> lists). Default: window.size_pairs x gap confidence x gap tolerance x shift on/off (x ADWIN delta when drift is on).",
    ),
    check_recording: Optional[Path] = typer.Option(
        None, "--check-recording", help="A second recording (another seed or day) to check the chosen setting on."
    ),
    check_incidents: Optional[Path] = typer.Option(
        None, "--check-incidents", help="Incidents file of the --check-recording recording."
    ),
    model: Optional[list[str]] = typer.Option(
        None, "--model", metavar="ID", help="Tune only this model (repeatable); default every model."
    ),
    grace: Optional[str] = typer.Option(
        None,
        "--grace",
        metavar="DURATION",
        help="How long after an incident's end an alert still counts: 90s, 15m, 2h (a bare number is seconds; default: one window).",
    ),
    false_alert_budget: float = typer.Option(
        0.5, "--false-alert-budget", help="Without incidents: false alerts per day you accept."
    ),
    workers: Optional[int] = typer.Option(None, "--workers", help="Worker processes (default: one per CPU)."),
    tick_every: Optional[str] = typer.Option(
        None,
        "--tick-every",
        metavar="DURATION",
        help="Add a timer tick this often, e.g. 1s or 60s (a bare number is seconds), as replay does.",
    ),
    snippet_out: Optional[Path] = typer.Option(
        None, "--snippet", help="Where to write the best setting as TOML (default: RECORDING.best.toml)."
    ),
    plot_out: Optional[Path] = typer.Option(
        None, "--plot", help="Where to write the PNG plot (default: RECORDING.tune.png)."
    ),
    results_out: Optional[Path] = typer.Option(None, "--results", help="Also write every setting's figures as JSON."),
    checks: Optional[str] = typer.Option(
        None,
        "--checks",
        help="Count only alerts of these checks, comma-separated (e.g. gap,drift); default every check.",
    ),
    top: int = typer.Option(15, "--top", help="Rows of the ranked table to print."),
) -> None:
    """Replay a recording across a grid of check settings and rank them.

    The recording is parsed and paired once; each setting is applied to that one pass, spread over one worker process per CPU. With --incidents each setting is scored by missed incidents, false alerts per day outside the incidents (plus a grace of one window, window.size_pairs over the pair rate) and detection delay; settings whose grid neighbours raise false alerts rank lower. Without incidents, the tightest setting within --false-alert-budget wins. The best setting is written as a \\[\\[models]] TOML snippet and a PNG plot (the plot needs matplotlib: pip install 'watchdog-edge\\[plot]').

    Choosing on one recording is itself a fit: check the choice on --check-recording (another day, or another seed).
    """
    import json

    from rich import box
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
    from rich.table import Table

    from simulators import tune as tuning
    from simulators.bundle import load_incidents, sibling
    from simulators.plot import draw, trace

    # a pipe or file gets 160 columns unless COLUMNS says otherwise
    console = Console(highlight=False, width=None if sys.stdout.isatty() or "COLUMNS" in os.environ else 160)
    try:
        inc = load_incidents(incidents) if incidents else None
        hinc = load_incidents(check_incidents) if check_incidents else None
        if check_incidents and not check_recording:
            raise ConfigError("--check-incidents needs --check-recording RECORDING")
        g = tuning.load_grid(grid) if grid else None
        grace_s = parse_duration_s(grace, "--grace") if grace is not None else None
        tick_s = parse_duration_s(tick_every, "--tick-every") if tick_every is not None else None
        with Progress(
            TextColumn("tuning"),
            BarColumn(),
            MofNCompleteColumn(),
            TimeElapsedColumn(),
            console=Console(stderr=True),
            transient=True,
        ) as bar:
            task = bar.add_task("settings", total=None)

            def progress(done: int, total: int) -> None:
                bar.update(task, completed=done, total=total)

            only = [c.strip() for c in checks.split(",") if c.strip()] if checks else None
            result = tuning.tune(
                config,
                recording,
                inc,
                g,
                workers,
                check_recording,
                hinc,
                model,
                grace_s,
                false_alert_budget,
                tick_s,
                progress,
                only,
            )
    except (WatchdogError, ValueError) as e:
        _fail(e)
        return
    for s, why in result.invalid:
        console.print(f"[yellow]skipped[/yellow] {s.label()}: {why.splitlines()[-1].strip()}")
    table = Table(
        title=f"{len(result.rows)} settings on {recording.name}"
        + ("" if result.with_incidents else f" (no incidents: false-alert budget {false_alert_budget:g}/day)"),
        box=box.SIMPLE_HEAD,  # light rules leave the columns their room: 12 columns fit 130 characters
        pad_edge=False,
        collapse_padding=True,
    )

    def column(header: str) -> None:
        # headers break after dots and at spaces, and fold rather than being cut short on a narrow screen
        table.add_column(header.replace(".", ".\n").replace(" ", "\n"), justify="right", overflow="fold")

    column("#")
    keys = list(result.best.setting.values)
    for k in keys:
        column(tuning._short(k))
    if result.with_incidents:
        column("detected")
        column("false/day")
        column("neighbours false/day")
        for d in result.best.score.detections:
            column(f"delay {d['kind']}")
    else:
        column("false/day")
        column("neighbours false/day")
        column("within budget")

    def cells(sc, near: float | None) -> list[str]:
        near_text = "-" if near is None else f"{near:.2f}"
        if result.with_incidents:
            n = len(sc.detections)
            return [f"{n - sc.missed}/{n}", f"{sc.false_alerts_per_day:.2f}", near_text] + [
                tuning._fmt_delay(d["delay_s"]) if d["delay_s"] is not None else "missed" for d in sc.detections
            ]
        quiet = (near if near is not None else sc.false_alerts_per_day) <= false_alert_budget
        return [f"{sc.false_alerts_per_day:.2f}", near_text, "yes" if quiet else "no"]

    for rank, row in enumerate(result.rows[:top], 1):
        table.add_row(
            str(rank), *(str(row.setting.values[k]) for k in keys), *cells(row.score, row.robust_false_alerts_per_day)
        )
    if result.best.check_score is not None:
        h = result.best.check_score
        if result.with_incidents and hinc is None:
            h_cells = ["-", f"{h.false_alerts_per_day:.2f}", "-"] + ["-"] * len(result.best.score.detections)
        elif result.with_incidents and len(h.detections) != len(result.best.score.detections):
            n = len(h.detections)
            h_cells = [f"{n - h.missed}/{n}", f"{h.false_alerts_per_day:.2f}", "-"] + ["-"] * len(
                result.best.score.detections
            )
        else:
            h_cells = cells(h, None)
        table.add_row("[bold]check[/bold]", *(str(result.best.setting.values[k]) for k in keys), *h_cells)
    console.print(table)
    console.print(
        "neighbours false/day: the most false alerts per day of the setting and its grid neighbours "
        "(one step along one numeric key); a setting quiet by luck beside noisy ones ranks lower.",
        soft_wrap=True,
    )
    if result.best.check_score is not None:
        console.print(
            f"check: the first row's setting on the check recording {check_recording.name if check_recording else ''}; "
            "trust the choice only if it holds there.",
            soft_wrap=True,
        )
    for first, last in tuning.ties(result, top):
        console.print(
            f"rows {first} to {last} score alike; among them the order is the grid's: values listed "
            "earlier in the grid (the more alert-prone) come first.",
            soft_wrap=True,
        )
    if result.with_incidents and result.best.score.missed:
        console.print(
            f"[bold]No setting detects every incident[/bold]: the first row misses {result.best.score.missed} "
            f"of {len(result.best.score.detections)}. Try a grid with more alert-prone values.",
            soft_wrap=True,
        )
    if not result.with_incidents and not tuning.meets_budget(result):
        console.print(
            f"[bold]No setting meets the budget[/bold] of {false_alert_budget:g} false alerts per day "
            "(neighbours included); the rows are ordered quietest first, and the snippet holds the quietest, "
            "which does not meet it. Widen the grid towards less alert-prone values, or raise --false-alert-budget.",
            soft_wrap=True,
        )

    snippet_path = snippet_out or sibling(recording, ".best.toml")
    snippet_path.write_text(tuning.snippet(result, snippet_path.parent, recording), encoding="utf-8")
    which = "first row" if not result.with_incidents and not tuning.meets_budget(result) else "best setting"
    console.print(f"{which}: {result.best.setting.label()}\nTOML snippet: {snippet_path}", soft_wrap=True)
    if results_out:
        data = {
            "recording": str(recording),
            "with_incidents": result.with_incidents,
            "best": {
                "setting": result.best.setting.values,
                **result.best.score.to_dict(),
                "check_recording": result.best.check_score.to_dict() if result.best.check_score else None,
            },
            "rows": [
                {
                    "setting": r.setting.values,
                    "tightness": r.setting.tightness,
                    "neighbourhood_false_alerts_per_day": r.robust_false_alerts_per_day,
                    **r.score.to_dict(),
                }
                for r in result.rows
            ],
        }
        results_out.write_text(json.dumps(data, indent=2, default=str) + "\n", encoding="utf-8")
        console.print(f"results: {results_out}")

    plot_path = plot_out or sibling(recording, ".tune.png")
    best_cfg = tuning.best_config(result)
    from watchdog_edge.files.configfile import load_cards

    target = (model or [m.id for m in best_cfg.models])[0]
    tr = trace(best_cfg, load_cards(best_cfg), result.intake.steps, target)
    try:
        draw(
            tr,
            [i for i in (inc or []) if i.get("model") in (None, target)],
            plot_path,
            f"{target}: {result.best.setting.label()}",
            result.intake.start,
            result.intake.end,
        )
    except ModuleNotFoundError as e:
        if not (e.name or "").startswith("matplotlib"):
            raise
        console.print(
            "plot skipped: matplotlib is not installed. The table and the snippet above are complete; "
            "for the plot, install the extra: pip install 'watchdog-edge[plot]'",
            soft_wrap=True,
            markup=False,
        )
    else:
        console.print(f"plot: {plot_path}")


def register(app: typer.Typer) -> None:
    """Add ``simulate`` and ``tune`` to the main ``watchdog-edge`` app."""
    app.command("simulate", cls=PlainCommand)(simulate)
    app.command("tune", cls=PlainCommand)(tune)
