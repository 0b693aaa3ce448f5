"""The ``run`` command without the command-line toolkit: start the agent, map failures to exit codes.

``watchdog-edge run`` is the command that stays up for months on a small gateway, so its
plain forms (``run --config FILE [--record FILE] [--log-level LEVEL]``) start without typer,
click and rich, about 3 MB of memory the agent never uses. Anything else (``--help``, an
unknown option, a missing value) goes to the full command line, which prints its usual help
and errors. ``cli_agent.run`` calls the same ``run_agent``.
"""

from __future__ import annotations

import logging
import sys
from pathlib import Path

from .errors import BrokerError, WatchdogError


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
    from .agent import Agent
    from .config import load_config
    from .monitor import load_cards

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


def parse_run(args: list[str]) -> tuple[Path, Path | None, str] | None:
    """``(config, record, log_level)`` from the arguments after ``run``; None unless plainly valid.

    >>> parse_run(["--config", "c.toml", "--record=r.jsonl"])
    (PosixPath('c.toml'), PosixPath('r.jsonl'), 'info')
    >>> parse_run(["--help"]) is None, parse_run([]) is None
    (True, True)
    """
    values: dict[str, str] = {}
    names = {"--config": "config", "-c": "config", "--record": "record", "--log-level": "log_level"}
    i = 0
    while i < len(args):
        arg = args[i]
        name, eq, value = arg.partition("=")
        if name not in names or names[name] in values:
            return None
        if not eq:
            if i + 1 >= len(args) or args[i + 1].startswith("-"):
                return None
            value = args[i + 1]
            i += 1
        if not value:
            return None
        values[names[name]] = value
        i += 1
    if "config" not in values:
        return None
    record = values.get("record")
    return Path(values["config"]), Path(record) if record else None, values.get("log_level", "info")


def lean_main(argv: list[str]) -> int | None:
    """Run the agent for a plain ``run`` command line; None for anything the full command line must handle."""
    if argv[:1] != ["run"]:
        return None
    parsed = parse_run(argv[1:])
    if parsed is None:
        return None
    return run_agent(*parsed)


def main() -> None:
    """Console-script entry point: ``run`` started lean, every other command through typer."""
    code = lean_main(sys.argv[1:])
    if code is not None:
        sys.exit(code)
    from .cli import main as full_main

    full_main()
