"""``watchdog-edge card``: build a model card from training rows, or show one."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from watchdog_edge.cli.helpformat import PlainCommand, PlainGroup
from watchdog_edge.errors import WatchdogError

app = typer.Typer(
    cls=PlainGroup,
    help=(
        "Model cards. A card records what the model did on its training data (loss, row count, "
        "fitted parameters, training range and histograms of the inputs, target range, optional held-out loss), "
        "so the agent knows which error to expect in the field and which inputs are new to the "
        "model. Build one at training time from a CSV of the training rows with the model's "
        "fitted prediction on each row; show one to see the loss the agent will expect."
    ),
    no_args_is_help=True,
)


def _fail(e: Exception | str) -> typer.Exit:
    """Print the error as one line on stderr; exit code 2."""
    parts = [s.strip() for s in str(e).splitlines() if s.strip()]
    typer.echo("error: " + (parts[0] + (" " + "; ".join(parts[1:]) if parts[1:] else "")), err=True)
    return typer.Exit(2)


@app.command(cls=PlainCommand)
def build(
    train: Path = typer.Argument(
        ...,
        help="CSV of training rows with a header row: the features, the measured "
        "target and the model's fitted prediction on each row.",
    ),
    target: str = typer.Option(..., "--target", help="Column holding the measured value (the truth)."),
    prediction: str = typer.Option(
        ..., "--prediction", help="Column holding the model's fitted prediction on that row."
    ),
    params: Optional[int] = typer.Option(
        None,
        "--params",
        metavar="D",
        help="Number of fitted parameters d (coefficients, intercept included). Needed only for a "
        "least-squares fit without --holdout: the expected loss is then the final prediction error, "
        "which needs more rows than parameters.",
    ),
    features: Optional[str] = typer.Option(
        None,
        "--features",
        help="Comma-separated feature columns to profile; default: every other numeric column except one named id.",
    ),
    loss: str = typer.Option("squared", "--loss", help="squared or absolute: the per-pair error the agent will watch."),
    least_squares: bool = typer.Option(
        True,
        "--least-squares/--not-least-squares",
        help="Was the model fitted by least squares? Only then can the training loss "
        "be adjusted for optimism without a hold-out set.",
    ),
    holdout: Optional[Path] = typer.Option(
        None,
        "--holdout",
        help="CSV of rows the model never saw, with the same target "
        "and prediction columns: their loss is the best "
        "estimate of field error and is used first.",
    ),
    model_id: Optional[str] = typer.Option(
        None,
        "--id",
        help="Model id as named in the agent's config; default: the training file's name without extension.",
    ),
    version: Optional[str] = typer.Option(None, "--version", help="Model version text, as the predictions carry it."),
    bins: int = typer.Option(
        10,
        "--bins",
        min=2,
        max=100,
        help="Quantile bins per feature histogram (used by the shift check); tied cut points are merged.",
    ),
    estimate: str = typer.Option(
        "fpe",
        "--expected-loss-estimate",
        help="Without a hold-out, how a least-squares card's training loss is adjusted for new data: "
        "fpe (Akaike's final prediction error: new noise at the training inputs) or random_design "
        "(new inputs drawn like the training ones; larger where d/N is high). See README 'Expected loss'.",
    ),
    allow_no_expected_loss: bool = typer.Option(
        False,
        "--allow-no-expected-loss",
        help="Write the card even when no expected loss follows from it (no hold-out, and absolute loss "
        "or not least squares); the agent then refuses it for gap, drift and baseline.",
    ),
    out: Path = typer.Option(..., "-o", "--output", help="Where to write the card (JSON)."),
) -> None:
    """Compute a card: training loss and count, training range of the inputs, histograms, target range,
    held-out loss; warn about what the card leaves the checks unable to do."""
    from watchdog_edge.files.cardbuild import build_card, card_cautions, render_card
    from watchdog_edge.files.cardfile import save_card

    if estimate not in ("fpe", "random_design"):
        raise _fail(f"--expected-loss-estimate = {estimate!r}: use 'fpe' or 'random_design'")
    try:
        feats = [f.strip() for f in features.split(",") if f.strip()] if features is not None else None
        card = build_card(
            train,
            target=target,
            prediction=prediction,
            params=params,
            features=feats,
            loss=loss,
            least_squares=least_squares,
            holdout_path=holdout,
            model_id=model_id,
            version=version,
            bins=bins,
            estimate=estimate,  # type: ignore[arg-type]  # checked above
            require_expected_loss=not allow_no_expected_loss,
        )
        save_card(card, out)
    except WatchdogError as e:
        raise _fail(e) from None
    except OSError as e:
        raise _fail(f"cannot write the card to {out}: {e.strerror}") from None
    typer.echo(render_card(card))
    typer.echo(f"written to {out}")
    for caution in card_cautions(card):
        typer.echo(f"warning: {caution}", err=True)


@app.command(cls=PlainCommand)
def show(card: Path = typer.Argument(..., help="A model card JSON file.")) -> None:
    """Print a card readably, with the loss the agent will expect in the field and where it comes from."""
    from watchdog_edge.files.cardbuild import render_card
    from watchdog_edge.files.cardfile import load_card

    try:
        typer.echo(render_card(load_card(card)))
    except WatchdogError as e:
        raise _fail(e) from None
    except OSError as e:  # load_card names only a missing file; a folder or no permission lands here
        raise _fail(f"cannot read the card {card}: {e.strerror}") from None
