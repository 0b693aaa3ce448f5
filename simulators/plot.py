"""The tuning plot: live loss and its interval against the expected-loss band, alerts and incidents.

matplotlib is imported only when a plot is drawn (Agg backend, no display needed).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.events import Alert
from watchdog_edge.core.monitor import Monitor, PairStep, Step
from watchdog_edge.core.settings import Config

WIDTH_PX, HEIGHT_PX, DPI = 1400, 700, 100


@dataclass
class Trace:
    """The gap check's figures over time for one model, and the alerts of the run."""

    model: str
    t: list[float] = field(default_factory=list)
    live: list[float] = field(default_factory=list)
    lower: list[float] = field(default_factory=list)
    upper: list[float] = field(default_factory=list)
    expected: float | None = None
    warning: float | None = None
    critical: float | None = None
    alerts: list[Alert] = field(default_factory=list)


def trace(config: Config, cards: dict[str, ModelCard], steps: list[Step], model: str) -> Trace:
    """Apply the steps to a fresh monitor, keeping the gap figures after each new evaluation."""
    mon = Monitor(config, cards)
    tr = Trace(model)
    last = None
    for s in steps:
        events = mon.apply([s])
        tr.alerts.extend(e for e in events if isinstance(e, Alert) and e.model == model)
        if type(s) is not PairStep or s.model != model:
            continue
        gap = mon.state(model)["checks"].get("gap")
        figs = gap["figures"] if gap else {}
        if "live_loss" not in figs:
            continue
        key = (figs["live_loss"], figs["lower"], figs["upper"])
        if key == last:
            continue
        last = key
        tr.t.append(s.t)
        tr.live.append(figs["live_loss"])
        tr.lower.append(figs["lower"])
        tr.upper.append(figs["upper"])
        tr.expected = figs["expected_loss"]
        tr.warning = figs["warning_limit"]
        tr.critical = figs["critical_limit"]
    return tr


_CHECK_COLOURS = {
    "gap": "#c0392b",
    "range": "#8e44ad",
    "shift": "#2c7fb8",
    "feed_stop": "#7f8c8d",
    "drift": "#d35400",
    "baseline": "#16a085",
}


def draw(
    tr: Trace,
    incidents: list[dict[str, Any]],
    path: str | Path,
    title: str,
    start: float,
    end: float,
    width_px: int = WIDTH_PX,
    height_px: int = HEIGHT_PX,
) -> Path:
    """Write the PNG (``width_px`` x ``height_px``); time is hours from ``start``."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    hours = lambda t: (t - start) / 3600.0  # noqa: E731
    fig, ax = plt.subplots(figsize=(width_px / DPI, height_px / DPI), dpi=DPI)
    try:
        for i, inc in enumerate(incidents):
            ax.axvspan(
                hours(inc["start"]),
                hours(inc["end"]),
                color="#f4d03f",
                alpha=0.25,
                label="incident" if i == 0 else None,
            )
            ax.text(
                hours(inc["start"]),
                1.0,
                f" {inc['kind']}",
                transform=ax.get_xaxis_transform(),
                va="top",
                ha="left",
                fontsize=8,
                color="#7d6608",
            )
        x = [hours(t) for t in tr.t]
        if x:
            ax.fill_between(
                x, tr.lower, tr.upper, step="post", color="#5dade2", alpha=0.35, label="interval on the live mean loss"
            )
            ax.step(x, tr.live, where="post", color="#1b4f72", lw=1.2, label="live mean loss")
        if tr.expected is not None and tr.warning is not None and tr.critical is not None:
            ax.axhspan(tr.expected, tr.warning, color="#27ae60", alpha=0.15, label="expected loss to warning limit")
            ax.axhline(tr.expected, color="#27ae60", lw=1.0)
            ax.axhline(tr.warning, color="#e67e22", lw=1.0, ls="--", label="warning limit")
            ax.axhline(tr.critical, color="#c0392b", lw=1.0, ls=":", label="critical limit")
        seen: set[tuple[str, str]] = set()
        for a in tr.alerts:
            colour = _CHECK_COLOURS.get(a.check, "black")
            raised = a.state == "raised"
            ax.axvline(
                hours(a.t),
                color=colour,
                lw=1.0 if raised else 0.8,
                ls="-" if raised else ":",
                alpha=0.8 if raised else 0.6,
                label=f"{a.check} {a.state}" if (a.check, a.state) not in seen else None,
            )
            seen.add((a.check, a.state))
        ax.set_xlim(0, max(hours(end), 1e-9))
        positive = [v for v in tr.lower + tr.live + tr.upper if v > 0]
        if positive and max(positive) / min(positive) > 50:
            ax.set_yscale("log")
            # a lower bound near zero (a wide interval) would squash the rest of the plot
            floor = min(v for v in tr.live + ([tr.expected] if tr.expected else []) if v > 0) / 5
            ax.set_ylim(bottom=floor)
        ax.set_xlabel("hours since the start of the recording")
        ax.set_ylabel("mean loss")
        ax.set_title(title, fontsize=10)
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=8, framealpha=0.9)
        ax.grid(True, alpha=0.3)
        fig.subplots_adjust(left=0.06, right=0.80, top=0.93, bottom=0.09)
        out = Path(path)
        fig.savefig(out, dpi=DPI)
    finally:
        plt.close(fig)
    return out
