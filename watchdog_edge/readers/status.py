"""``watchdog-edge status``: one table of every agent and model, or the same as JSON.

An agent is reported ``online`` only when its retained status says so and its heartbeat is
not late (more than three status periods and ten seconds old): a state file read while the
agent is stopped still says online, and a broker may hold a status whose agent died with a
last will that never reached it.
"""

from __future__ import annotations

import time
from typing import Any

from watchdog_edge.readers.fleet import FleetView, age_s

CAUTION = "Advisory monitor of model error; it is not a protection system. Site rules and qualified people decide."
_LEVEL_ORDER = {"critical": 0, "warning": 1, "normal": 2}


def _late(status: dict[str, Any], age: float | None) -> bool:
    period = status.get("state_every_s") or 60.0
    return age is not None and age > 3 * float(period) + 10.0


def report(view: FleetView, now: float | None = None, agent: str | None = None, model: str | None = None) -> dict:
    """The status as plain data (what ``--json`` prints); filter by agent or model name if given."""
    now = time.time() if now is None else now
    agents = []
    names = set(view.agents) | {a for a, _ in view.models}
    for name in sorted(names):
        if agent is not None and name != agent:
            continue
        st = view.agents.get(name, {})
        age = age_s(st.get("heartbeat"), now)
        connection = st.get("connection", "unknown")
        if connection == "online" and _late(st, age):
            connection = "late"
        agents.append(
            {
                "agent": name,
                "connection": connection,
                "heartbeat": st.get("heartbeat"),
                "heartbeat_age_s": None if age is None else round(age, 1),
                "version": st.get("version"),
                "received": st.get("received"),
                "paired": st.get("paired"),
                "bad_total": st.get("bad_total"),
                "alerts_sent": st.get("alerts_sent"),
                "outbox_depth": st.get("outbox_depth"),
                "journal_depth": st.get("journal_depth"),
                "planned_work": st.get("planned_work") or [],
            }
        )
    models = []
    for (a, m), st in sorted(view.models.items()):
        if (agent is not None and a != agent) or (model is not None and m != model):
            continue
        checks = {name: c.get("level", "normal") for name, c in (st.get("checks") or {}).items()}
        gap = ((st.get("checks") or {}).get("gap") or {}).get("figures") or {}
        pairing = st.get("pairing") or {}
        last = st.get("last_alert")
        models.append(
            {
                "agent": a,
                "model": m,
                "model_version": st.get("model_version"),
                "checks": checks,
                "live_loss": gap.get("live_loss"),
                "lower": gap.get("lower"),
                "upper": gap.get("upper"),
                "expected_loss": st.get("expected_loss"),
                "warning_limit": gap.get("warning_limit"),
                "critical_limit": gap.get("critical_limit"),
                "loss": st.get("loss"),
                "pairs": st.get("pairs"),
                "pending": st.get("pending", pairing.get("pending")),
                "last_alert": last,
                "last_alert_age_s": None if not last else _round(age_s(last.get("ts"), now)),
                "planned_work": st.get("planned_work"),
                "held_raises": st.get("held_raises", 0),
                "state_ts": st.get("ts"),
            }
        )
    return {"source": view.source, "read_at": now, "caution": CAUTION, "agents": agents, "models": models}


def _round(x: float | None) -> float | None:
    return None if x is None else round(x, 1)


def ago(seconds: float | None) -> str:
    """A short age: ``45 s``, ``12 min``, ``3 h``, ``2 d``.

    >>> ago(45), ago(720), ago(None)
    ('45 s', '12 min', '-')
    """
    if seconds is None:
        return "-"
    s = max(0.0, seconds)
    for size, unit in ((86400, "d"), (3600, "h"), (60, "min")):
        if s >= size:
            return f"{s / size:.0f} {unit}"
    return f"{s:.0f} s"


def _num(x: Any) -> str:
    if x is None:
        return "-"
    if isinstance(x, float):
        return f"{x:.4g}"
    return str(x)


def _table(header: list[str], rows: list[list[str]]) -> list[str]:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(header)]
    out = ["  ".join(h.ljust(w) for h, w in zip(header, widths)).rstrip()]
    out += ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]
    return out


def _window(w: dict[str, Any] | None) -> str:
    if not w:
        return "-"
    return f"{w['name']} until {w['end'][:16].replace('T', ' ')}Z"


def format_report(data: dict[str, Any]) -> str:
    """The report as the plain-text table ``watchdog-edge status`` prints."""
    lines = [f"from {data['source']}", ""]
    arows = [
        [
            a["agent"],
            a["connection"],
            ago(a["heartbeat_age_s"]),
            _num(a["received"]),
            _num(a["alerts_sent"]),
            _num(a["outbox_depth"]),
            ", ".join(_window(w) for w in a["planned_work"]) or "-",
        ]
        for a in data["agents"]
    ]
    lines += _table(
        ["AGENT", "CONNECTION", "HEARTBEAT AGE", "RECEIVED", "ALERTS SENT", "OUTBOX", "PLANNED WORK"], arows
    )
    lines.append("")
    mrows = []
    for m in data["models"]:
        checks = sorted(m["checks"].items(), key=lambda kv: (_LEVEL_ORDER.get(kv[1], 3), kv[0]))
        live = "-"
        if m["live_loss"] is not None:
            live = f"{_num(m['live_loss'])} [{_num(m['lower'])}, {_num(m['upper'])}]"
        last = m["last_alert"]
        last_text = "-"
        if last:
            last_text = f"{last['check']} {last['state']} {last['severity']}, {ago(m['last_alert_age_s'])} ago"
        planned = _window(m["planned_work"])
        if m["planned_work"] and m["held_raises"]:
            planned += f" ({m['held_raises']} held)"
        mrows.append(
            [
                m["model"],
                m["agent"],
                m["model_version"] or "-",
                " ".join(f"{k}={v}" for k, v in checks),
                live,
                _num(m["expected_loss"]),
                f"{_num(m['warning_limit'])}/{_num(m['critical_limit'])}",
                _num(m["pairs"]),
                _num(m["pending"]),
                last_text,
                planned,
            ]
        )
    lines += _table(
        [
            "MODEL",
            "AGENT",
            "VERSION",
            "CHECK LEVELS",
            "LIVE LOSS [INTERVAL]",
            "EXPECTED",
            "LIMITS W/C",
            "PAIRS",
            "PENDING",
            "LAST ALERT",
            "PLANNED WORK",
        ],
        mrows,
    )
    lines += ["", data["caution"]]
    return "\n".join(lines)
