"""OpenMetrics text of what the agents publish, served by ``watchdog-edge metrics``.

It runs as a reader process beside the broker, not inside the agent: the agent stays one
lean thread with no HTTP server, one endpoint serves every agent of a fleet from a central
broker, and the heartbeat age is measured from outside, where a dead agent shows as an age
that keeps growing. Values are built at each scrape from the latest retained status and
state (prometheus-client's custom-collector pattern), so nothing is double counted after a
reader restart: counters are the agent's own totals.
"""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Iterator
from typing import Any

from prometheus_client.core import CounterMetricFamily, GaugeMetricFamily, Metric
from prometheus_client.registry import Collector, CollectorRegistry

from watchdog_edge.readers.fleet import BrokerAccess, FleetView, age_s

LEVELS = {"normal": 0, "warning": 1, "critical": 2}
_PREFIX = "watchdog_edge_"


def _num(x: Any) -> float | None:
    return float(x) if isinstance(x, (int, float)) and not isinstance(x, bool) else None


class FleetCollector(Collector):
    """Metric families from a ``FleetView`` that another thread keeps up to date."""

    def __init__(self, view: FleetView, clock: Any = time.time) -> None:
        self.view = view
        self.clock = clock

    def collect(self) -> Iterator[Metric]:
        """One family per metric, built from the latest status and state of every agent."""
        v = self.view.copy()
        now = self.clock()
        p = _PREFIX

        def counter(name: str, doc: str, labels: list[str]) -> CounterMetricFamily:
            return CounterMetricFamily(p + name, doc, labels=labels)

        def gauge(name: str, doc: str, labels: list[str], unit: str = "") -> GaugeMetricFamily:
            return GaugeMetricFamily(p + name, doc, labels=labels, unit=unit)

        received = counter("received", "Messages received by the agent.", ["agent"])
        records = counter("paired", "Predictions paired with their truths.", ["agent"])
        expired = counter("expired", "Unpaired records dropped after the pairing horizon.", ["agent", "kind"])
        evicted = counter("evicted", "Unpaired records evicted by the memory cap.", ["agent", "kind"])
        duplicates = counter(
            "duplicates", "Records whose id was already waiting (first arrival wins).", ["agent", "kind"]
        )
        bad = counter("bad_records", "Bad inbound records, by reason (kept as dead letters).", ["agent", "reason"])
        alerts = counter(
            "alerts", "Alerts published, by check, state and severity.", ["agent", "check", "state", "severity"]
        )
        held = counter("held_raises", "Raises held back by planned work.", ["agent"])
        reconnects = counter("reconnects", "Connections to the broker after the first.", ["agent"])
        outbox = gauge("outbox_depth", "Alerts waiting for the broker's acknowledgement.", ["agent"])
        journal = gauge("journal_depth", "Journal rows not yet covered by a snapshot.", ["agent"])
        heartbeat = gauge(
            "heartbeat_age", "Age of the agent's latest status, measured by this reader.", ["agent"], "seconds"
        )
        online = gauge("online", "1 when the agent's retained status says online.", ["agent"])
        planned_agent = gauge("planned_work_windows", "Planned-work windows running on the agent.", ["agent"])
        live = gauge("live_loss", "Live mean loss of the model over its window (gap check).", ["agent", "model"])
        expected = gauge("expected_loss", "Loss the model card leads one to expect.", ["agent", "model"])
        limit = gauge("loss_limit", "Warning and critical limits of the live loss.", ["agent", "model", "severity"])
        level = gauge("check_level", "Level per check: 0 normal, 1 warning, 2 critical.", ["agent", "model", "check"])
        pairs = gauge("window_pairs", "Pairs seen by the model in its current version.", ["agent", "model"])
        planned = gauge("planned_work_active", "1 while planned work holds the model's raises.", ["agent", "model"])

        for name, st in sorted(v.agents.items()):
            lab = [name]
            for cfam, key in ((received, "received"), (records, "paired")):
                x = _num(st.get(key))
                if x is not None:
                    cfam.add_metric(lab, x)
            for cfam, key in ((expired, "expired"), (evicted, "evicted"), (duplicates, "duplicate")):
                for kind in ("prediction", "truth"):
                    x = _num(st.get(f"{key}_{kind}s"))
                    if x is not None:
                        cfam.add_metric([name, kind], x)
            for reason, n in sorted((st.get("bad") or {}).items()):
                bad.add_metric([name, reason], float(n))
            for check, by_state in sorted((st.get("alerts") or {}).items()):
                for state, by_sev in sorted(by_state.items()):
                    for sev, n in sorted(by_sev.items()):
                        alerts.add_metric([name, check, state, sev], float(n))
            if _num(st.get("held_raises")) is not None:
                held.add_metric(lab, float(st["held_raises"]))
            connects = _num((st.get("link") or {}).get("connects"))
            if connects is not None:
                reconnects.add_metric(lab, max(0.0, connects - 1))
            for fam, key in ((outbox, "outbox_depth"), (journal, "journal_depth")):
                x = _num(st.get(key))
                if x is not None:
                    fam.add_metric(lab, x)
            age = age_s(st.get("heartbeat"), now)
            if age is not None:
                heartbeat.add_metric(lab, round(age, 3))
            online.add_metric(lab, 1.0 if st.get("connection") == "online" else 0.0)
            if "planned_work" in st:
                planned_agent.add_metric(lab, float(len(st.get("planned_work") or [])))
        for (a, m), st in sorted(v.models.items()):
            lab = [a, m]
            gap = ((st.get("checks") or {}).get("gap") or {}).get("figures") or {}
            for gfam, raw in (
                (live, gap.get("live_loss")),
                (expected, st.get("expected_loss")),
                (pairs, st.get("pairs")),
            ):
                x = _num(raw)
                if x is not None:
                    gfam.add_metric(lab, x)
            for sev in ("warning", "critical"):
                x = _num(gap.get(f"{sev}_limit"))
                if x is not None:
                    limit.add_metric([a, m, sev], x)
            for check, c in sorted((st.get("checks") or {}).items()):
                level.add_metric([a, m, check], float(LEVELS.get(c.get("level"), 0)))
            planned.add_metric(lab, 1.0 if st.get("planned_work") else 0.0)
        yield from (received, records, expired, evicted, duplicates, bad, alerts, held, reconnects)
        yield from (outbox, journal, heartbeat, online, planned_agent, live, expected, limit, level, pairs, planned)


def registry_for(view: FleetView) -> CollectorRegistry:
    """A registry holding only the fleet collector (no process metrics of the reader itself)."""
    reg = CollectorRegistry(auto_describe=False)
    reg.register(FleetCollector(view))
    return reg


def follow(access: BrokerAccess, filters: tuple[str, ...], view: FleetView) -> Any:
    """Keep ``view`` up to date from the broker in paho's network thread; returns the started client."""

    def on_connect(c: Any, u: Any, flags: Any, rc: Any, props: Any) -> None:
        if not rc.is_failure:
            c.subscribe([(f, 1) for f in filters])

    def on_message(c: Any, u: Any, msg: Any) -> None:
        view.take(msg.payload)

    c = access.client()
    c.on_connect = on_connect
    c.on_message = on_message
    c.reconnect_delay_set(1, 30)
    c.connect_async(access.host, access.port, keepalive=30)
    c.loop_start()
    return c


def serve(
    access: BrokerAccess, filters: tuple[str, ...], addr: str, port: int, stop: threading.Event | None = None
) -> int:
    """Serve ``/metrics`` until SIGTERM or SIGINT (or ``stop``); 0 on a clean stop."""
    import logging

    from prometheus_client import start_http_server

    log = logging.getLogger("watchdog_edge.readers.metrics")
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(message)s")
    stop = stop or threading.Event()
    view = FleetView(f"broker {access.host}:{access.port}")
    client = follow(access, filters, view)
    server, thread = start_http_server(port, addr=addr, registry=registry_for(view))
    if addr not in ("127.0.0.1", "::1", "localhost"):
        log.warning("serving metrics on %s:%d, beyond this host: the endpoint has no password", addr, port)
    log.info(
        "metrics of the agents on %s:%d served at http://%s:%d/metrics (advisory monitor; not a protection system)",
        access.host,
        access.port,
        addr,
        port,
    )
    for sig in (signal.SIGTERM, signal.SIGINT):
        signal.signal(sig, lambda *_: stop.set())
    while not stop.wait(0.5):
        pass
    server.shutdown()
    thread.join(5)
    client.disconnect()
    client.loop_stop()
    log.info("stopped")
    return 0
