"""Text and JSON summaries of a monitor's state, shared by replay, demo and the agent."""

from __future__ import annotations

import math
from typing import Any

from rich.console import Console
from rich.table import Table

# Where the expected loss comes from, in words for screens; JSON and alerts keep the short code.
SOURCE_WORDS = {
    "holdout": "held-out loss",
    "fpe": "training loss corrected for fitting (final prediction error)",
}


def source_words(source: str) -> str:
    """The expected loss's source as a screen says it.

    >>> source_words("fpe")
    'training loss corrected for fitting (final prediction error)'
    """
    return SOURCE_WORDS.get(source, source)


def _num(x: Any) -> str:
    if x is None or (isinstance(x, float) and math.isnan(x)):
        return "-"
    if isinstance(x, float):
        return f"{x:.4g}"
    return str(x)


def summary(monitor) -> dict[str, Any]:
    """Plain data: status counters and every model's state."""
    return {"status": monitor.status(), "models": {m: monitor.state(m) for m in monitor.models()}}


def print_summary(monitor, console: Console) -> None:
    """One table per model: pairs, live loss with interval, expected loss, checks, counts."""
    status = monitor.status()
    for m in monitor.models():
        st = monitor.state(m)
        gap = st["checks"].get("gap", {}).get("figures", {})
        t = Table(
            title=f"model {m}" + (f" (version {st['model_version']})" if st["model_version"] else ""),
            show_header=False,
            title_justify="left",
        )
        t.add_column("what", style="bold")
        t.add_column("value")
        t.add_row("pairs", str(st["pairs"]))
        if gap.get("live_loss") is not None:
            pct = int(round(gap["confidence"] * 100))
            t.add_row(
                f"live {st['loss']} loss",
                f"{_num(gap['live_loss'])}  ({pct}% bounds {_num(gap['lower'])} .. {_num(gap['upper'])}, "
                f"last {gap['pairs']} pairs)",
            )
        t.add_row("expected loss", f"{_num(st['expected_loss'])}  (from the {source_words(st['expected_source'])})")
        if gap.get("warning_limit") is not None:
            t.add_row("limits", f"warning {_num(gap['warning_limit'])}, critical {_num(gap['critical_limit'])}")
        for name, c in st["checks"].items():
            colour = {"normal": "green", "warning": "yellow", "critical": "red"}[c["level"]]
            t.add_row(f"check {name}", f"[{colour}]{c['level']}[/{colour}]")
        pc = st["pairing"]
        t.add_row("records", f"{pc['predictions']} predictions, {pc['truths']} truths, {st['pending']} pending")
        t.add_row(
            "set aside",
            f"expired {pc['expired_predictions']} predictions / {pc['expired_truths']} truths; "
            f"duplicates {pc['duplicate_predictions']} / {pc['duplicate_truths']}; "
            f"evicted {pc['evicted_predictions']} / {pc['evicted_truths']}",
        )
        console.print(t)
        if pc["expired_predictions"]:
            horizon = monitor.config.model(m).pairing.horizon_s
            console.print(
                f"{pc['expired_predictions']} predictions expired: no truth came for them within "
                f"pairing.horizon_s = {horizon:g} s. Truths are sparser than predictions here "
                f"({pc['truths']} truths for {pc['predictions']} predictions): a prediction whose truth "
                "never comes waits that long and expires. That is expected; only pairs are scored."
                if pc["truths"] < pc["predictions"]
                else f"{pc['expired_predictions']} predictions expired: no truth came for them within "
                f"pairing.horizon_s = {horizon:g} s; if truths come later than that, raise it.",
            )
    bad = status["bad"]
    if bad:
        console.print("bad records by reason: " + ", ".join(f"{k} {v}" for k, v in sorted(bad.items())))
    else:
        console.print("bad records: none")
    if status["clock_backwards"]:
        console.print(f"receive times that went backwards (treated as the latest seen): {status['clock_backwards']}")


def format_alert(a) -> str:
    """One line for a person: time, model, check, state, severity and the summary."""
    colour = "red" if a.severity == "critical" else "yellow"
    if a.state == "cleared":
        colour = "green"
    return f"[{colour}]{a.ts} {a.model} {a.check} {a.state} ({a.severity})[/{colour}] {a.summary}"
