"""The small hierarchy of errors a user can meet; each message says what to fix.

Every error watchdog-edge raises on purpose is one of these; the command line prints the
message (no traceback) and exits non-zero. Bad records in the stream are never errors: they
are counted and kept aside as dead letters.

::

    WatchdogError       base: something the user can fix stops the command
    ├── ConfigError     the TOML config (or a snapshot made with another config) breaks a
    │                   rule: names the key path, the value and the rule, says what to do
    ├── CardError       a model card is missing, malformed, or lacks what a check needs
    ├── RecordingError  a recording cannot be read, or holds nothing for the config's topics
    ├── DataError       training or hold-out rows (CSV) are unusable: names column and row
    ├── BrokerError     the MQTT broker refused the agent or could not be reached
    │   └── BrokerUnreachable  nothing answered at its address: the agent retries it
    └── StoreError      the agent's state file (SQLite) cannot be opened, written or read
        └── StoreWriteError    the disk is full or read-only: the agent holds back
                               its acks and retries

>>> issubclass(StoreError, WatchdogError)
True
"""

from __future__ import annotations


class WatchdogError(Exception):
    """Base of every error watchdog-edge raises on purpose."""


class ConfigError(WatchdogError):
    """The TOML config breaks a rule; the message names the key, the value and the rule."""


class CardError(WatchdogError):
    """A model card is missing, malformed or lacks a field a check needs."""


class RecordingError(WatchdogError):
    """A recording file cannot be read, or gives nothing for the config; the message names the line."""


class DataError(WatchdogError):
    """Training or hold-out data (CSV) is unusable; the message names the column and row."""


class BrokerError(WatchdogError):
    """The broker refused us or could not be reached; the message gives the reason."""


class BrokerUnreachable(BrokerError):
    """Nothing answered at the broker's address (refused, no route, no name, timeout): worth retrying."""


class StoreError(WatchdogError):
    """The state file cannot be opened, used or read; the message names the file and what to do."""


class StoreWriteError(StoreError):
    """The state file refused a write (disk full, read-only, I/O error); nothing of the batch was kept."""
