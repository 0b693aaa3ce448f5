"""The page as HTML text: tables, level lists and an inline SVG plot per model, drawn here.

Everything is made on the server from the history, so the page reads the same without
scripts; ``static/page.js`` only fetches a fresh copy of the main part when something changed.
Every text that came from the broker is escaped. No style attribute is used (the page's
content security policy allows only the packaged stylesheet): SVG elements carry classes.
"""

from __future__ import annotations

import html
import math
import time
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import datetime, timezone
from typing import Any

from watchdog_edge.readers.history import (
    AlertRow,
    HistoryReader,
    Point,
    check_levels,
    number,
    parse_time,
    planned_spans,
)

CAUTION = (
    "Advisory only. This page shows how far models' predictions are from measured values; it is "
    "not a protection or safety system and does not replace alarms, interlocks or trips. What to "
    "do about the equipment is for your site's rules and qualified people to decide."
)

SPANS: dict[str, float] = {"1h": 3600.0, "6h": 6 * 3600.0, "1d": 86400.0, "7d": 7 * 86400.0}
DEFAULT_SPAN = "1d"
MAX_BUCKETS = 400  # drawn points per model at most: about one per two pixels of the plot
MAX_DOTS = 240  # with more drawn points than this, the line is drawn without a dot per point
LATEST_ALERTS = 12  # rows in the page's list of latest alerts
LEVEL_ORDER = {"critical": 0, "warning": 1, "normal": 2}


def esc(value: Any) -> str:
    """HTML-escaped text of any value (quotes too, so it is safe in attributes)."""
    return html.escape(str(value), quote=True)


def fmt(value: float | None) -> str:
    """A figure in four significant digits, or a dash.

    >>> fmt(0.000123456), fmt(1234567.0), fmt(None)
    ('0.0001235', '1.235e+06', '–')
    """
    if value is None or not math.isfinite(value):
        return "–"
    return f"{value:.4g}"


def plural(n: int, word: str) -> str:
    """``n`` and the word, with an s unless n is 1.

    >>> plural(1, "model"), plural(3, "agent")
    ('1 model', '3 agents')
    """
    return f"{n} {word}" if n == 1 else f"{n} {word}s"


def utc(t: float, seconds: bool = True) -> str:
    """Unix seconds as ``YYYY-MM-DD HH:MM[:SS]`` in UTC.

    >>> utc(0)
    '1970-01-01 00:00:00'
    """
    return datetime.fromtimestamp(t, tz=timezone.utc).strftime("%Y-%m-%d %H:%M:%S" if seconds else "%Y-%m-%d %H:%M")


def age(seconds: float) -> str:
    """A duration as a short text.

    >>> age(5), age(125), age(7300), age(200000)
    ('5 s', '2 min', '2.0 h', '2.3 d')
    """
    if seconds < 0:
        return "0 s"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.0f} min"
    if seconds < 172800:
        return f"{seconds / 3600:.1f} h"
    return f"{seconds / 86400:.1f} d"


# --- axes ----------------------------------------------------------------------------------
def nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values covering ``[lo, hi]``: steps of 1, 2 or 5 times a power of ten.

    >>> nice_ticks(0, 1.0)
    [0.0, 0.2, 0.4, 0.6000000000000001, 0.8, 1.0]
    """
    if not (math.isfinite(lo) and math.isfinite(hi)) or hi <= lo:
        return [lo]
    raw = (hi - lo) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 5, 10) if m * power >= raw)
    first = math.ceil(lo / step - 1e-9)
    return [i * step for i in range(first, first + count * 3) if i * step <= hi + step * 1e-9]


_TIME_STEPS = (60, 300, 600, 900, 1800, 3600, 7200, 10800, 21600, 43200, 86400, 172800)


def time_ticks(since: float, until: float, count: int = 7) -> list[float]:
    """Tick times at whole minutes, hours or days (UTC) across ``[since, until]``."""
    step = next((s for s in _TIME_STEPS if (until - since) / s <= count), _TIME_STEPS[-1])
    first = math.ceil(since / step) * step
    return [float(first + i * step) for i in range(int((until - first) // step) + 1)]


# --- the plot ------------------------------------------------------------------------------
@dataclass(frozen=True)
class Frame:
    """Where the plot area lies in the SVG and the data range it shows."""

    since: float
    until: float
    ymax: float
    width: int = 960
    height: int = 250
    left: int = 70
    right: int = 14
    top: int = 22
    bottom: int = 30

    def x(self, t: float) -> float:
        span = self.until - self.since
        return self.left + (t - self.since) / span * (self.width - self.left - self.right)

    def y(self, v: float) -> float:
        return self.top + (1.0 - v / self.ymax) * (self.height - self.top - self.bottom)


def _path(frame: Frame, xs: Sequence[float], values: Sequence[float | None]) -> str:
    """SVG path data through the points, broken where a value is missing."""
    parts: list[str] = []
    pen_down = False
    base = frame.height - frame.bottom
    scale = (frame.height - frame.top - frame.bottom) / frame.ymax
    for x, v in zip(xs, values):
        if v is None:
            pen_down = False
            continue
        parts.append(f"{'L' if pen_down else 'M'}{x:.1f},{base - v * scale:.1f}")
        pen_down = True
    return "".join(parts)


def _band(frame: Frame, points: Sequence[Point]) -> list[str]:
    """Polygons of the interval (lower to upper), one per run of points that have both."""
    runs: list[list[Point]] = [[]]
    for p in points:
        if p.lower is None or p.upper is None:
            if runs[-1]:
                runs.append([])
            continue
        runs[-1].append(p)
    out = []
    for run in runs:
        if len(run) == 1:  # a lone point: a short vertical bar
            p = run[0]
            assert p.lower is not None and p.upper is not None
            out.append(
                f'<line class="band-bar" x1="{frame.x(p.t):.1f}" x2="{frame.x(p.t):.1f}" '
                f'y1="{frame.y(p.lower):.1f}" y2="{frame.y(p.upper):.1f}"/>'
            )
        elif run:
            upper = " ".join(f"{frame.x(p.t):.1f},{frame.y(p.upper):.1f}" for p in run if p.upper is not None)
            lower = " ".join(f"{frame.x(p.t):.1f},{frame.y(p.lower):.1f}" for p in reversed(run) if p.lower is not None)
            out.append(f'<polygon class="band" points="{upper} {lower}"/>')
    return out


def plot_svg(
    model: str,
    points: Sequence[Point],
    alerts: Sequence[AlertRow],
    planned: Sequence[tuple[float, float]],
    since: float,
    until: float,
    raw_count: int,
    ylabel: str = "live loss",
) -> str:
    """The model's plot: live loss with its interval, expected loss, limits, alerts, planned work.

    ``points`` are the history's buckets in time order; ``raw_count`` the states behind them
    (an attribute of the SVG, with the number of drawn points, for readers and tests).
    """
    values = [
        v
        for p in points
        for v in (p.live_loss, p.upper, p.expected_loss, p.warning_limit, p.critical_limit)
        if v is not None
    ]
    top = max(values) if values else 1.0
    ymax = top * 1.08 if top > 0 else 1.0
    f = Frame(since, until, ymax)
    w, h = f.width, f.height
    bottom_y, top_y = h - f.bottom, f.top
    out = [
        f'<svg class="plot" viewBox="0 0 {w} {h}" role="img" preserveAspectRatio="xMidYMid meet" '
        f'data-model="{esc(model)}" data-points="{raw_count}" data-drawn="{len(points)}" '
        f'data-since="{since:.3f}" data-until="{until:.3f}" aria-label="live loss of {esc(model)} over time">'
    ]
    for start, end in planned:
        x0, x1 = f.x(max(start, since)), f.x(min(end, until))
        out.append(
            f'<rect class="planned" x="{x0:.1f}" y="{top_y}" width="{max(x1 - x0, 2.0):.1f}" '
            f'height="{bottom_y - top_y}" data-start="{start:.3f}" data-end="{end:.3f}">'
            f"<title>planned work {esc(utc(start, False))} to {esc(utc(end, False))} UTC</title></rect>"
        )
    for v in nice_ticks(0.0, ymax):
        y = f.y(v)
        out.append(f'<line class="grid" x1="{f.left}" x2="{w - f.right}" y1="{y:.1f}" y2="{y:.1f}"/>')
        out.append(f'<text class="tick" x="{f.left - 6}" y="{y + 4:.1f}" text-anchor="end">{fmt(v)}</text>')
    multi_day = until - since > 2 * 86400
    for t in time_ticks(since, until):
        x = f.x(t)
        label = datetime.fromtimestamp(t, tz=timezone.utc).strftime("%m-%d %H:%M" if multi_day else "%H:%M")
        out.append(f'<line class="grid" x1="{x:.1f}" x2="{x:.1f}" y1="{top_y}" y2="{bottom_y}"/>')
        out.append(f'<text class="tick" x="{x:.1f}" y="{bottom_y + 18}" text-anchor="middle">{label}</text>')
    out.append(f'<text class="axis-title" x="{f.left - 40}" y="{top_y - 7}">{esc(ylabel)}</text>')
    out.append(f'<line class="axis" x1="{f.left}" x2="{w - f.right}" y1="{bottom_y}" y2="{bottom_y}"/>')
    out.append(f'<line class="axis" x1="{f.left}" x2="{f.left}" y1="{top_y}" y2="{bottom_y}"/>')
    out.extend(_band(f, points))
    xs = [f.x(p.t) for p in points]
    for cls, key in (
        ("expected", "expected_loss"),
        ("limit-warning", "warning_limit"),
        ("limit-critical", "critical_limit"),
        ("live", "live_loss"),
    ):
        d = _path(f, xs, [getattr(p, key) for p in points])
        if d:
            out.append(f'<path class="{cls}" d="{d}"/>')
    if len(points) <= MAX_DOTS:
        for p in points:
            if p.live_loss is not None:
                out.append(
                    f'<circle class="pt" cx="{f.x(p.t):.1f}" cy="{f.y(p.live_loss):.1f}" r="2.2" '
                    f'data-t="{p.t:.3f}" data-live="{p.live_loss!r}" data-n="{p.count}">'
                    f"<title>{esc(utc(p.t))} UTC: live loss {fmt(p.live_loss)} "
                    f"({fmt(p.lower)} to {fmt(p.upper)})</title></circle>"
                )
    for a in alerts:
        if not since <= a.t <= until:
            continue
        x = f.x(a.t)
        sev = a.severity if a.severity in ("warning", "critical") else "other"
        raised = a.state == "raised"
        shape = (
            f'<polygon points="{x - 6:.1f},{top_y - 10} {x + 6:.1f},{top_y - 10} {x:.1f},{top_y}"/>'
            if raised
            else f'<circle cx="{x:.1f}" cy="{top_y - 5}" r="4.5"/>'
        )
        out.append(
            f'<g class="alert-mark sev-{sev} {"raised" if raised else "cleared"}" data-alert-id="{esc(a.alert_id)}" '
            f'data-t="{a.t:.3f}"><title>{esc(utc(a.t))} UTC, {esc(a.check)} {esc(a.state)} {esc(a.severity)}: '
            f"{esc(a.summary)}</title>"
            f'<line x1="{x:.1f}" x2="{x:.1f}" y1="{top_y}" y2="{bottom_y}"/>{shape}</g>'
        )
    if not points:
        out.append(
            f'<text class="empty" x="{w / 2:.0f}" y="{h / 2:.0f}" text-anchor="middle">'
            "no live-loss figures in this span</text>"
        )
    out.append("</svg>")
    return "".join(out)


LEGEND = (
    '<ul class="legend">'
    '<li><span class="key key-live"></span>live loss</li>'
    '<li><span class="key key-band"></span>its confidence interval</li>'
    '<li><span class="key key-expected"></span>expected loss</li>'
    '<li><span class="key key-warning"></span>warning limit</li>'
    '<li><span class="key key-critical"></span>critical limit</li>'
    '<li><span class="key key-planned"></span>planned work</li>'
    '<li><span class="key key-raised">▼</span>alert raised</li>'
    '<li><span class="key key-cleared">○</span>alert cleared</li>'
    "</ul>"
)


# --- the parts of the page ----------------------------------------------------------------
def _level_class(level: str) -> str:
    return level if level in LEVEL_ORDER else "unknown"


def _levels_list(levels: dict[str, str]) -> str:
    if not levels:
        return '<p class="muted">no checks reported</p>'
    items = "".join(
        f'<li class="level level-{_level_class(lv)}" data-check="{esc(name)}" data-level="{esc(lv)}">'
        f'<span class="check">{esc(name)}</span> <span class="word">{esc(lv)}</span></li>'
        for name, lv in sorted(levels.items())
    )
    return f'<ul class="levels">{items}</ul>'


def _worst(levels: dict[str, str]) -> str:
    return min(levels.values(), key=lambda lv: LEVEL_ORDER.get(lv, 3), default="unknown")


def agents_table(agents: dict[str, tuple[float, dict[str, Any]]], now: float) -> str:
    """Every agent, online or offline, with its heartbeat age and a few counters."""
    if not agents:
        return '<p class="muted">No agent status received yet.</p>'
    rows = []
    for name, (_received, st) in agents.items():
        conn = st.get("connection")
        conn = conn if conn in ("online", "offline") else "unknown"
        hb = parse_time(st.get("heartbeat"))
        rows.append(
            f'<tr class="agent conn-{conn}" data-agent="{esc(name)}" data-connection="{conn}">'
            f'<td>{esc(name)}</td><td class="conn"><span class="word">{conn}</span></td>'
            f"<td>{esc(age(now - hb)) + ' ago' if hb is not None else '–'}</td>"
            f"<td>{esc(st.get('version', '–'))}</td>"
            f"<td class='num'>{esc(_int(st.get('received')))}</td>"
            f"<td class='num'>{esc(_int(st.get('alerts_sent')))}</td>"
            f"<td class='num'>{esc(_int(st.get('outbox_depth')))}</td>"
            f"<td class='num'>{esc(_int(st.get('bad_total')))}</td></tr>"
        )
    return (
        '<table class="agents"><thead><tr><th>agent</th><th>connection</th><th>last heartbeat</th>'
        "<th>version</th><th>messages received</th><th>alerts sent</th><th>alerts waiting</th>"
        "<th>bad records</th></tr></thead><tbody>" + "".join(rows) + "</tbody></table>"
    )


def _int(value: Any) -> str:
    return str(value) if isinstance(value, int) and not isinstance(value, bool) else "–"


def _alert_extra(a: AlertRow) -> str:
    parts = []
    if a.state == "cleared" and a.closes:
        parts.append(f"closes {esc(a.closes)}")
    if a.note:
        parts.append(esc(a.note))
    return f'<br><span class="muted note">{"; ".join(parts)}</span>' if parts else ""


def alerts_table(alerts: Sequence[AlertRow], now: float) -> str:
    """The latest alerts, newest first, each with its summary."""
    if not alerts:
        return '<p class="muted">No alerts in the kept history.</p>'
    rows = []
    for a in alerts:
        sev = a.severity if a.severity in ("warning", "critical") else "other"
        rows.append(
            f'<tr class="alert sev-{sev} {"raised" if a.state == "raised" else "cleared"}" '
            f'data-alert-id="{esc(a.alert_id)}" data-model="{esc(a.model)}">'
            f'<td class="when">{esc(utc(a.t))}<br><span class="muted">{esc(age(now - a.t))} ago</span></td>'
            f"<td>{esc(a.model)}</td><td>{esc(a.check or '–')}</td>"
            f'<td><span class="word">{esc(a.state or "–")}</span></td>'
            f'<td><span class="word sev">{esc(a.severity or "–")}</span></td>'
            f'<td class="summary">{esc(a.summary or "")}{_alert_extra(a)}</td></tr>'
        )
    return (
        '<table class="alerts"><thead><tr><th>time (UTC)</th><th>model</th><th>check</th><th>state</th>'
        "<th>severity</th><th>summary</th></tr></thead><tbody>" + "".join(rows) + "</tbody></table>"
    )


def _figures_line(state: dict[str, Any]) -> str:
    checks = state.get("checks")
    gap = checks.get("gap") if isinstance(checks, dict) else None
    fig = gap.get("figures") if isinstance(gap, dict) else None
    fig = fig if isinstance(fig, dict) else {}
    live, lo, hi = number(fig.get("live_loss")), number(fig.get("lower")), number(fig.get("upper"))
    exp = number(fig.get("expected_loss", state.get("expected_loss")))
    conf = number(fig.get("confidence"))
    conf_text = f"{conf * 100:.0f}% " if conf is not None else ""
    pairs = state.get("pairs")
    parts = [
        f"live loss <b>{fmt(live)}</b> ({conf_text}interval {fmt(lo)} to {fmt(hi)})",
        f"expected <b>{fmt(exp)}</b>",
        f"warning limit {fmt(number(fig.get('warning_limit')))}",
        f"critical limit {fmt(number(fig.get('critical_limit')))}",
    ]
    if isinstance(pairs, int) and not isinstance(pairs, bool):
        parts.append(f"{pairs} pairs")
    pending = state.get("pending")
    if isinstance(pending, int) and not isinstance(pending, bool):
        parts.append(f"{pending} records waiting for their pair")
    return '<p class="figures">' + " · ".join(parts) + "</p>"


def _ylabel(state: dict[str, Any]) -> str:
    kind = state.get("loss")
    if kind in ("squared", "absolute"):
        return f"live mean {kind} error"
    return "live loss"


def planned_note(state: dict[str, Any], t: float) -> str:
    """A line on the planned-work window the latest state tells of, or nothing."""
    spans = planned_spans(state, t)
    if not spans:
        return ""
    raw = state.get("planned_work")
    name = raw.get("name") if isinstance(raw, dict) and isinstance(raw.get("name"), str) else None
    reason = raw.get("reason") if isinstance(raw, dict) and isinstance(raw.get("reason"), str) else None
    start, end = spans[0]
    what = f"Planned work '{esc(name)}'" if name else "Planned work"
    why = f" ({esc(reason)})" if reason else ""
    held = state.get("held_raises")
    held_text = f" Raises held back so far: {held}." if isinstance(held, int) and not isinstance(held, bool) else ""
    return (
        f'<p class="planned-note">{what}{why}: {esc(utc(start, False))} to {esc(utc(end, False))} UTC. '
        f"Alerts of this model are held back meanwhile; its checks keep computing.{held_text}</p>"
    )


def model_section(
    reader: HistoryReader, model: str, t: float, state: dict[str, Any], since: float, until: float, now: float
) -> str:
    """One model: its levels, its latest figures, its plot and its planned work."""
    levels = check_levels(state)
    worst = _worst(levels)
    points = reader.series(model, since, until, MAX_BUCKETS)
    alerts = reader.alerts(model, since, 500)
    planned = reader.planned(model, since, until)
    version = state.get("model_version")
    agent = state.get("agent")
    head = (
        f'<h2><span class="model-id">{esc(model)}</span>'
        f'<span class="overall level-{_level_class(worst)}"><span class="word">{esc(worst)}</span></span></h2>'
        f'<p class="muted">version {esc(version if version is not None else "–")}'
        + (f" · agent {esc(agent)}" if isinstance(agent, str) else "")
        + f" · state published {esc(utc(t))} UTC ({esc(age(now - t))} ago)</p>"
    )
    note = planned_note(state, t)
    return (
        f'<section class="model worst-{_level_class(worst)}" id="model-{esc(model)}" data-model="{esc(model)}">'
        + head
        + _levels_list(levels)
        + _figures_line(state)
        + note
        + plot_svg(model, points, alerts, planned, since, until, sum(p.count for p in points), _ylabel(state))
        + "</section>"
    )


def main_part(reader: HistoryReader, span: str, now: float, version: str) -> str:
    """The part of the page that the script refreshes: summary, models, alerts, agents."""
    span_s = SPANS.get(span, SPANS[DEFAULT_SPAN])
    since, until = now - span_s, now
    states = reader.latest_states()
    agents = reader.agents()
    alerts = reader.alerts(limit=LATEST_ALERTS)
    worst = {m: _worst(check_levels(st)) for m, (_, st) in states.items()}
    tally = {lv: sum(1 for w in worst.values() if w == lv) for lv in ("critical", "warning", "normal")}
    online = sum(1 for _, st in agents.values() if st.get("connection") == "online")
    summary = (
        f'<p class="tally">{plural(len(states), "model")}: {tally["critical"]} critical, {tally["warning"]} warning, '
        f"{tally['normal']} normal · {plural(len(agents), 'agent')}: {online} online, "
        f"{len(agents) - online} not online</p>"
    )
    ordered = sorted(states, key=lambda m: (LEVEL_ORDER.get(worst[m], 3), m))
    sections = "".join(model_section(reader, m, *states[m], since, until, now) for m in ordered)
    if not states:
        sections = '<p class="muted">No model state received yet. Is an agent publishing to this broker?</p>'
    return (
        f'<div id="live" data-version="{esc(version)}" data-now="{now:.3f}">'
        + summary
        + '<h2 class="part">Latest alerts</h2>'
        + alerts_table(alerts, now)
        + '<h2 class="part">Agents</h2>'
        + agents_table(agents, now)
        + '<h2 class="part">Models</h2>'
        + LEGEND
        + sections
        + "</div>"
    )


def full_page(reader: HistoryReader, span: str, version: str, now: float | None = None, footer: str = "") -> str:
    """The whole page: head, caution, span choice, the live part and a footer."""
    now = time.time() if now is None else now
    span = span if span in SPANS else DEFAULT_SPAN
    current = ' aria-current="page" class="current"'
    links = " ".join(f'<a href="?span={k}"{current if k == span else ""}>{k}</a>' for k in SPANS)
    return (
        '<!doctype html><html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        "<title>watchdog-edge: models at a glance</title>"
        '<link rel="icon" href="/static/icon.svg" type="image/svg+xml">'
        '<link rel="stylesheet" href="/static/page.css"><script src="/static/page.js" defer></script>'
        "</head><body>"
        '<header><h1>watchdog-edge <span class="muted">models at a glance</span></h1>'
        f'<p class="caution" role="note"><b>Caution.</b> {esc(CAUTION)}</p>'
        f'<nav>Plot span: {links} <span id="updated" class="muted" aria-live="polite"></span></nav></header>'
        f'<main id="main" data-span="{esc(span)}">' + main_part(reader, span, now, version) + "</main>"
        f'<footer class="muted">{footer}Times are UTC. This page only reads: it changes nothing on the broker '
        "or in any agent.</footer></body></html>"
    )
