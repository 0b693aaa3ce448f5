"""The small hierarchy of errors a user can meet; each message says what to fix."""

from __future__ import annotations


class WatchdogError(Exception):
    """Base of every error watchdog-edge raises on purpose."""


class ConfigError(WatchdogError):
    """The TOML config breaks a rule; the message names the key, the value and the rule."""


class CardError(WatchdogError):
    """A model card is missing, malformed or lacks a field a check needs."""


class RecordingError(WatchdogError):
    """A recording file cannot be read; the message names the line."""


class DataError(WatchdogError):
    """Training or hold-out data (CSV) is unusable; the message names the column and row."""


class BrokerError(WatchdogError):
    """The broker refused us or could not be reached; the message gives the reason."""


class BrokerUnreachable(BrokerError):
    """Nothing answered at the broker's address (refused, no route, no name, timeout): worth retrying."""
