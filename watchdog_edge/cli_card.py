"""``watchdog-edge card``: build a model card from training rows, or show one."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from .errors import WatchdogError

app = typer.Typer(
    help=("Model cards: what the model did on its training data, so the agent knows what error to "
          "expect in the field. Build one at training time from a CSV of the training rows and the "
          "model's fitted predictions on them."),
    no_args_is_help=True,
)


@app.command()
def build(
    train: Path = typer.Argument(..., help="CSV of training rows with a header: features, the target and the fitted prediction."),
    target: str = typer.Option(..., "--target", help="Column holding the measured value."),
    prediction: str = typer.Option(..., "--prediction", help="Column holding the model's fitted prediction on that row."),
    params: int = typer.Option(..., "--params", help="Number of fitted parameters d (coefficients, intercept included)."),
    features: Optional[str] = typer.Option(None, "--features", help="Comma-separated feature columns; default: every other numeric column."),
    loss: str = typer.Option("squared", "--loss", help="squared or absolute: the loss the agent will watch."),
    least_squares: bool = typer.Option(True, "--least-squares/--not-least-squares",
                                       help="Was the model fitted by least squares? Only then can the training loss be adjusted by the final prediction error."),
    holdout: Optional[Path] = typer.Option(None, "--holdout", help="CSV of held-out rows (same target and prediction columns): the best estimate of field error."),
    model_id: Optional[str] = typer.Option(None, "--id", help="Model id; default: the training file's name."),
    version: Optional[str] = typer.Option(None, "--version", help="Model version text."),
    bins: int = typer.Option(10, "--bins", min=2, max=100, help="Quantile bins per feature histogram (used by the shift check)."),
    out: Path = typer.Option(..., "-o", "--output", help="Where to write the card (JSON)."),
) -> None:
    """Compute training loss, counts, envelope, histograms, target range and held-out loss."""
    from .cardbuild import build_card, render_card
    from .cards import save_card

    try:
        feats = [f.strip() for f in features.split(",") if f.strip()] if features else None
        card = build_card(train, target=target, prediction=prediction, params=params, features=feats,
                          loss=loss, least_squares=least_squares, holdout_path=holdout,
                          model_id=model_id, version=version, bins=bins)
    except WatchdogError as e:
        typer.echo(f"error: {e}", err=True)
        raise typer.Exit(2)
    save_card(card, out)
    typer.echo(render_card(card))
    typer.echo(f"written to {out}")


@app.command()
def show(card: Path = typer.Argument(..., help="A model card JSON file.")) -> None:
    """Print a card readably, with the loss the agent will expect in the field."""
    from .cardbuild import render_card
    from .cards import load_card

    try:
        typer.echo(render_card(load_card(card)))
    except WatchdogError as e:
        typer.echo(f"error: {e}", err=True)
        raise typer.Exit(2)
