"""The built-in demo: an invented cold store whose gateway predicts compressor power.

Two models read the same sensors (outside air temperature, door openings in the last two
minutes, goods in the store) and are scored against the same power meter, whose reading
arrives about 15 minutes later for every second prediction:

* ``compressor-kw`` is a linear least-squares model fitted on 1,200 logged rows and checked
  on 300 held-out rows. On day 3.5 the condenser starts to foul and the compressor draws more
  and more power for the same duty: a degradation the model cannot know about.
* ``compressor-kw-quick`` is a cubic in all three inputs (20 coefficients) fitted on 28 rows
  logged by hand during commissioning, with no hold-out: the final prediction error already
  inflates its training error several times, and the field is worse still.

The field traffic also has a meter feed that stops for three hours, a heat wave beyond the
training range, a few garbled messages, and repeats.
"""

from __future__ import annotations

import csv
import json
import shlex
from pathlib import Path

import numpy as np
from rich.console import Console

from watchdog_edge.caution import CAUTION
from watchdog_edge.files.cardbuild import build_card
from watchdog_edge.files.cardfile import save_card
from watchdog_edge.replay.recording import RecordingWriter

START = 1_779_926_400.0  # 2026-05-28T00:00:00Z, an invented week
STEP_S = 120.0
FEATURES = ("ambient_c", "door_openings", "goods_t")
SITE = "coldstore/harbour-3"


def true_power(ambient: np.ndarray, doors: np.ndarray, goods: np.ndarray) -> np.ndarray:
    """Compressor draw in kW without noise: the invented physics of this store."""
    return 2.2 + 0.24 * ambient + 0.0022 * ambient**2 + 0.38 * doors + 0.16 * goods


def _inputs(rng: np.random.Generator, hours: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    daily = np.sin(2 * np.pi * (hours % 24 - 9) / 24)
    ambient = 16 + 7.5 * daily + rng.normal(0, 1.5, hours.size)
    busy = ((hours % 24) >= 6) & ((hours % 24) < 20)
    doors = rng.poisson(np.where(busy, 2.5, 0.3)).astype(float)
    # Goods in tonnes: a morning delivery, drawn down through the day.
    goods = np.clip(34 - 6 * np.clip((hours % 24 - 7) / 12, 0, 1) + rng.normal(0, 1.2, hours.size), 5, 60)
    return ambient, doors, goods


def _design_linear(a, d, g) -> np.ndarray:
    return np.column_stack([np.ones_like(a), a, d, g])


def _design_cubic(a, d, g) -> np.ndarray:
    # Every monomial of total degree <= 3 in the three inputs, scaled to keep the fit solvable.
    x = [(a - 16) / 8, (d - 1.5) / 2, (g - 30) / 8]
    cols = [np.ones_like(a)]
    for i in range(3):
        cols.append(x[i])
    for i in range(3):
        for j in range(i, 3):
            cols.append(x[i] * x[j])
    for i in range(3):
        for j in range(i, 3):
            for k in range(j, 3):
                cols.append(x[i] * x[j] * x[k])
    return np.column_stack(cols)


def _write_csv(path: Path, a, d, g, y, pred) -> None:
    with path.open("w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow([*FEATURES, "power_kw", "predicted_kw"])
        for row in zip(a, d, g, y, pred):
            w.writerow([f"{v:.6g}" for v in row])


def build_site(folder: Path, seed: int = 7, days: float = 6.0) -> dict[str, Path]:
    """Write cards, config and a recording for the demo into ``folder``; return their paths."""
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    noise_sd = 0.45

    # Training log: a month of two-minute rows, sampled.
    hours = rng.uniform(0, 24 * 30, 1500)
    a, d, g = _inputs(rng, hours)
    y = true_power(a, d, g) + rng.normal(0, noise_sd, a.size)
    fit, hold = slice(0, 1200), slice(1200, 1500)
    coef, *_ = np.linalg.lstsq(_design_linear(a[fit], d[fit], g[fit]), y[fit], rcond=None)
    lin = lambda a_, d_, g_: _design_linear(a_, d_, g_) @ coef  # noqa: E731
    _write_csv(folder / "train-linear.csv", a[fit], d[fit], g[fit], y[fit], lin(a[fit], d[fit], g[fit]))
    _write_csv(folder / "holdout-linear.csv", a[hold], d[hold], g[hold], y[hold], lin(a[hold], d[hold], g[hold]))

    # Commissioning: 28 rows logged by hand over three working days, fitted with a 20-coefficient cubic.
    qh = np.sort(rng.uniform(0, 3, 28)).round() * 24 + rng.uniform(8, 17, 28)
    qa, qd, qg = _inputs(rng, qh)
    qy = true_power(qa, qd, qg) + rng.normal(0, noise_sd, qa.size)
    qcoef, *_ = np.linalg.lstsq(_design_cubic(qa, qd, qg), qy, rcond=None)
    cubic = lambda a_, d_, g_: _design_cubic(a_, d_, g_) @ qcoef  # noqa: E731
    _write_csv(folder / "train-quick.csv", qa, qd, qg, qy, cubic(qa, qd, qg))

    card_lin = build_card(
        folder / "train-linear.csv",
        target="power_kw",
        prediction="predicted_kw",
        params=4,
        features=list(FEATURES),
        holdout_path=folder / "holdout-linear.csv",
        model_id="compressor-kw",
        version="2026.11-a",
    )
    card_quick = build_card(
        folder / "train-quick.csv",
        target="power_kw",
        prediction="predicted_kw",
        params=20,
        features=list(FEATURES),
        model_id="compressor-kw-quick",
        version="2026.11-q",
    )
    save_card(card_lin, folder / "compressor-kw.card.json")
    save_card(card_quick, folder / "compressor-kw-quick.card.json")

    # Field traffic.
    n = int(days * 86400 / STEP_S)
    fh_hours = np.arange(n) * STEP_S / 3600
    fa, fd, fg = _inputs(rng, fh_hours)
    heat = (fh_hours >= 24 * 4.5) & (fh_hours < 24 * 4.5 + 10)  # a heat wave, afternoon of day 5
    fa = np.where(heat, fa + 16 * np.sin(np.pi * (fh_hours - 24 * 4.5) / 10).clip(0), fa)
    fouling = np.clip((fh_hours - 24 * 3.5) / 18, 0, 1) * 0.12  # up to 12% more draw
    power = true_power(fa, fd, fg) * (1 + fouling) + rng.normal(0, noise_sd, n)
    p_lin = lin(fa, fd, fg)
    p_quick = cubic(fa, fd, fg)

    stall = (fh_hours >= 24 * 2 + 3) & (fh_hours < 24 * 2 + 6)  # meter gateway rebooting
    delays = 900 + rng.uniform(-60, 60, n)
    lost = rng.uniform(size=n) < 0.03
    events: list[tuple[float, int, str, bytes]] = []
    for i in range(n):
        t = START + i * STEP_S + rng.uniform(0.05, 0.4)
        feats = {"ambient_c": round(float(fa[i]), 3), "door_openings": int(fd[i]), "goods_t": round(float(fg[i]), 3)}
        rid = f"h3-{i:06d}"
        for topic, value, ver in (
            (f"{SITE}/compressor/pred", p_lin[i], "2026.11-a"),
            (f"{SITE}/compressor/pred-quick", p_quick[i], "2026.11-q"),
        ):
            body = {
                "id": rid,
                "value": round(float(value), 4),
                "ts": round(t - 0.05, 3),
                "features": feats,
                "model_version": ver,
            }
            events.append((t, 0, topic, json.dumps(body).encode()))
        if i % 2 == 0 and not lost[i] and not stall[i]:
            tt = t + delays[i]
            body = {"meter": {"id": rid, "kw": round(float(power[i]), 4)}, "read_at": round(t, 3)}
            events.append((tt, 1, f"{SITE}/meter", json.dumps(body).encode()))
            if rng.uniform() < 0.01:  # the meter bridge repeats itself now and then
                events.append((tt + 1.0, 1, f"{SITE}/meter", json.dumps(body).encode()))
        if i % 1500 == 700:  # a garbled frame and a bad reading now and then
            events.append((t + 3, 2, f"{SITE}/meter", b'{"meter": {"id": "h3-x", "kw": '))
            events.append((t + 4, 2, f"{SITE}/meter", b'{"meter": {"id": "h3-y", "kw": NaN}}'))
    events.sort(key=lambda e: (e[0], e[1]))
    stop = START + n * STEP_S  # the recording ends with the last prediction's interval
    events = [e for e in events if e[0] <= stop]

    recording = folder / "recording.jsonl"
    end = events[-1][0]
    with RecordingWriter(recording) as w:
        next_tick = START + 60.0
        for t, _, topic, payload in events:
            while next_tick <= t:
                w.tick(next_tick)
                next_tick += 60.0
            w.message(round(t, 3), topic, payload)
        while next_tick <= end:
            w.tick(next_tick)
            next_tick += 60.0

    config = folder / "config.toml"
    config.write_text(_config_text(SITE), encoding="utf-8")
    return {"config": config, "recording": recording, "folder": folder}


_HEAD = """\
# Demo config: an invented cold store, two models of compressor power, all six checks on.
[agent]
name = "harbour-3-gateway"
state_dir = "state"

[broker]
host = "127.0.0.1"
port = 1883
"""

_MODEL = """
[[models]]
id = "{model}"
card = "{model}.card.json"
prediction_topic = "{site}/compressor/{topic}"
truth_topic = "{site}/meter"
fields.truth = {{ id = "meter.id", value = "meter.kw", ts = "read_at" }}
pairing = {{ horizon_s = 3600 }}
window = {{ size_pairs = 300, min_pairs = 100 }}

[models.checks.gap]
warning_tolerance = 0.25
critical_tolerance = 1.0
[models.checks.range]
[models.checks.shift]
recent_predictions = 2160
[models.checks.feed_stop]
truth_timeout_s = 3600
[models.checks.drift]
[models.checks.baseline]
learners = ["mean", "linear"]
"""


def _config_text(site: str) -> str:
    return _HEAD + "".join(
        _MODEL.format(model=m, site=site, topic=t)
        for m, t in (("compressor-kw", "pred"), ("compressor-kw-quick", "pred-quick"))
    )


def run_demo(folder: Path, seed: int = 7, days: float = 6.0, console: Console | None = None) -> list:
    """Build the demo site, replay it through the core, print alerts and a summary."""
    from watchdog_edge.core.events import Alert
    from watchdog_edge.files.configfile import load_monitor
    from watchdog_edge.replay.recording import alert_line, read_recording, replay
    from watchdog_edge.replay.report import format_alert, print_summary

    console = console or Console(highlight=False)
    console.print(f"[bold]watchdog-edge demo[/bold]: an invented cold store, {days:g} days of traffic, seed {seed}")
    console.print(f"Caution: {CAUTION}\n")
    paths = build_site(folder, seed=seed, days=days)
    console.print(f"wrote model cards, config and recording to {folder}/\n")
    mon = load_monitor(paths["config"])
    alerts: list[Alert] = []
    out = (folder / "alerts.jsonl").open("w", encoding="utf-8")

    def on_event(ev) -> None:
        if isinstance(ev, Alert):
            alerts.append(ev)
            out.write(alert_line(ev) + "\n")
            day = (ev.t - START) / 86400
            console.print(f"day {day:4.2f}  " + format_alert(ev))

    with out:
        replay(mon, read_recording(paths["recording"]), on_event=on_event)
    console.print()
    print_summary(mon, console)
    console.print(f"\n{len(alerts)} alerts written to {folder / 'alerts.jsonl'}")
    console.print("Replay it yourself (same alerts, byte for byte):")
    rec, cfg = shlex.quote(str(paths["recording"])), shlex.quote(str(paths["config"]))
    # one line however narrow the terminal, so that it pastes whole
    console.print(f"  watchdog-edge replay {rec} --config {cfg} --alerts again.jsonl", soft_wrap=True, markup=False)
    return alerts
