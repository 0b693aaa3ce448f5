"""One parser for every duration on the command line."""

import pytest

from watchdog_edge.cli.durations import parse_duration_s
from watchdog_edge.errors import ConfigError


@pytest.mark.parametrize(
    "text,seconds",
    [
        ("60s", 60.0),
        ("15m", 900.0),
        ("6h", 21600.0),
        ("2d", 172800.0),
        ("1.5h", 5400.0),
        (" 90 m ", 5400.0),
        ("45", 45.0),
    ],
)
def test_units_s_m_h_d_alike(text, seconds):
    assert parse_duration_s(text, "--grace") == seconds


def test_a_bare_number_is_in_the_options_own_unit():
    assert parse_duration_s("6", "--duration", bare_unit="h") == 6 * 3600
    assert parse_duration_s("6", "--duration", bare_unit="d") == 6 * 86400
    assert parse_duration_s("6m", "--duration", bare_unit="d") == 360  # a unit given wins


@pytest.mark.parametrize("text", ["", "0", "0s", "-5m", "5w", "m", "nan", "inf", "1e3", "5 minutes"])
def test_nonsense_is_refused_naming_the_option(text):
    with pytest.raises(ConfigError, match=r"^--tick-every .*: not a duration; give a positive time such as 60s"):
        parse_duration_s(text, "--tick-every")
