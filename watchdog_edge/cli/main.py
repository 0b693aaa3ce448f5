"""The ``run`` command without the command-line toolkit: start the agent, map failures to exit codes.

``watchdog-edge run`` is the command that stays up for months on a small gateway, so its
plain forms (``run --config FILE [--record FILE] [--log-level LEVEL]``) start without typer,
click and rich, about 3 MB of memory the agent never uses. Anything else (``--help``, an
unknown option, a missing value) goes to the full command line, which prints its usual help
and errors. The typer ``run`` command calls the same ``run_agent`` (``cli/start.py``).
"""

from __future__ import annotations

import sys
from pathlib import Path

from watchdog_edge.cli.start import run_agent


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
    from watchdog_edge.cli.app import main as full_main

    full_main()
