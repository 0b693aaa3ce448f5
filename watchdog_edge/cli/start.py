"""Start the live agent and map its failures to the process's exit codes (no typer here)."""

from __future__ import annotations

import logging
import math
import signal
import sys
import time
from pathlib import Path
from typing import Any

from watchdog_edge.errors import BrokerError, StoreWriteError, WatchdogError

_STOP_SIGNALS = (signal.SIGTERM, signal.SIGINT)


def _fail(message: str, code: int) -> int:
    print(f"watchdog-edge: {message}", file=sys.stderr, flush=True)
    return code


def _open_agent(agent_class: Any, cfg: Any, cards: Any, record: Path | None, write_error: type[Exception]) -> Any:
    """The agent, waiting while its state folder is read-only or full (no crash loop); None if stopped.

    Without its journal the agent cannot acknowledge anything, so it does not connect: the
    broker keeps the messages, and the retained status stays offline (the last will). The log
    says why, once a minute.
    """
    stop: list[int] = []
    previous = {sig: signal.signal(sig, lambda signum, frame: stop.append(signum)) for sig in _STOP_SIGNALS}
    log = logging.getLogger("watchdog_edge.agent.agent")
    wait, last_log = 1.0, -math.inf
    try:
        while True:
            try:
                return agent_class(cfg, cards, record=record)
            except write_error as e:
                if time.monotonic() - last_log >= 60.0:
                    last_log = time.monotonic()
                    log.error("%s; waiting, retried with backoff (logged once a minute)", e)
            until = time.monotonic() + wait
            wait = min(wait * 2, 10.0)
            while not stop and time.monotonic() < until:
                time.sleep(0.1)
            if stop:
                log.info("stopped while waiting for the state folder")
                return None
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def run_agent(config: Path, record: Path | None = None, log_level: str = "info") -> int:
    """Load the config and cards, run the agent until a signal; the process's exit code.

    0 after a clean stop, 2 for a bad config, card or log level, 3 when the broker refuses
    the agent at start, 1 when it stops on a broker error while running.
    """
    level = getattr(logging, log_level.upper(), None)
    if not isinstance(level, int):
        return _fail(f"--log-level {log_level!r} is not one of debug, info, warning, error", 2)
    logging.basicConfig(level=level, stream=sys.stderr, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from watchdog_edge.agent.agent import Agent
    from watchdog_edge.caution import CAUTION
    from watchdog_edge.files.configfile import load_cards, load_config

    logging.getLogger("watchdog_edge").info("starting with %s. Caution: %s", config, CAUTION)

    try:
        cfg = load_config(config)
        cards = load_cards(cfg)
        agent = _open_agent(Agent, cfg, cards, record, StoreWriteError)
        if agent is None:
            return 0
    except BrokerError as e:  # a bad outbound topic, say
        return _fail(str(e), 2)
    except WatchdogError as e:
        return _fail(str(e).replace("\n", " "), 2)
    try:
        return agent.run()
    except BrokerError as e:
        if agent.running:
            return _fail(f"stopped: {e}", 1)
        return _fail(f"cannot start: {e}", 3)
