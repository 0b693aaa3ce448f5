"""Durations on the command line: ``60s``, ``15m``, ``6h`` and ``2d`` alike, in every option.

One parser for every option that takes a time span (``--tick-every``, ``--grace``, ``--duration``);
a bare number is read in the option's own unit, which its help names.
"""

from __future__ import annotations

import math
import re

from watchdog_edge.errors import ConfigError

_DURATION = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*(s|m|h|d)?\s*$")
SECONDS = {"s": 1.0, "m": 60.0, "h": 3600.0, "d": 86400.0}


def parse_duration_s(text: str, option: str, bare_unit: str = "s") -> float:
    """Seconds in ``text``: a positive number with ``s``, ``m``, ``h`` or ``d``; a bare number is in ``bare_unit``.

    >>> parse_duration_s("90m", "--grace"), parse_duration_s("2d", "--grace"), parse_duration_s("45", "--grace")
    (5400.0, 172800.0, 45.0)
    >>> parse_duration_s("6", "--duration", bare_unit="h")
    21600.0
    >>> parse_duration_s("soon", "--grace")
    Traceback (most recent call last):
    ...
    watchdog_edge.errors.ConfigError: --grace 'soon': not a duration; give a positive time such as 60s, 15m, 6h or 2d
    """
    m = _DURATION.match(text)
    value = float(m.group(1)) if m else math.nan
    if not m or not value > 0 or not math.isfinite(value):
        raise ConfigError(f"{option} {text!r}: not a duration; give a positive time such as 60s, 15m, 6h or 2d")
    return value * SECONDS[m.group(2) or bare_unit]
