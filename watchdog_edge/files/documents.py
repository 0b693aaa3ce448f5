"""Reading the user's files with errors that name the file and say what went wrong."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from watchdog_edge.errors import WatchdogError


def read_document(
    path: str | Path, what: str, parse: Callable[[str], Any], error: type[WatchdogError], syntax: str
) -> Any:
    """Read ``path`` as UTF-8 text and parse it; every failure becomes ``error``.

    ``what`` names the file for the user ("model card"), ``syntax`` its format ("JSON").

    >>> import json, tempfile, os
    >>> read_document(os.path.join(tempfile.gettempdir(), "surely-absent.json"), "model card",
    ...               json.loads, WatchdogError, "JSON")
    Traceback (most recent call last):
    ...
    watchdog_edge.errors.WatchdogError: model card not found: ...surely-absent.json
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise error(f"{what} not found: {p}") from None
    except (OSError, UnicodeDecodeError) as e:
        raise error(f"{what} {p} cannot be read: {e}") from None
    try:
        return parse(text)
    except ValueError as e:  # json.JSONDecodeError and tomllib.TOMLDecodeError are ValueErrors
        raise error(f"{what} {p} is not valid {syntax}: {e}") from None
