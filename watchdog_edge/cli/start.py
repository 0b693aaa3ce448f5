"""Start the live agent and map its failures to the process's exit codes (no typer here)."""

from __future__ import annotations

import logging
import sys
from pathlib import Path

from watchdog_edge.errors import BrokerError, WatchdogError


def _fail(message: str, code: int) -> int:
    print(f"watchdog-edge: {message}", file=sys.stderr, flush=True)
    return code


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
        agent = Agent(cfg, cards, record=record)
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
