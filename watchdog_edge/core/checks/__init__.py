"""Registry of checks by name. Modules are imported lazily so that river is imported only
when a check that needs it (``drift``, ``baseline``) is configured."""

from __future__ import annotations

import importlib

from watchdog_edge.core.checks.base import Check, CheckContext, CheckSettings, Verdict

# name -> (module, check class, settings class, on by default)
_REGISTRY: dict[str, tuple[str, str, str, bool]] = {
    "gap": ("watchdog_edge.core.checks.gap", "GapCheck", "GapSettings", True),
    "range": ("watchdog_edge.core.checks.range", "RangeCheck", "RangeSettings", True),
    "shift": ("watchdog_edge.core.checks.shift", "ShiftCheck", "ShiftSettings", True),
    "feed_stop": ("watchdog_edge.core.checks.feed_stop", "FeedStopCheck", "FeedStopSettings", True),
    "drift": ("watchdog_edge.core.checks.drift", "DriftCheck", "DriftSettings", False),
    "baseline": ("watchdog_edge.core.checks.baseline", "BaselineCheck", "BaselineSettings", False),
}

CHECK_NAMES: tuple[str, ...] = tuple(_REGISTRY)


def _available(name: str) -> bool:
    try:
        importlib.import_module(_REGISTRY[name][0])
    except ModuleNotFoundError as e:
        if e.name == _REGISTRY[name][0]:
            return False
        raise
    return True


def registered() -> list[str]:
    """Names of the checks whose module is present."""
    return [n for n in CHECK_NAMES if _available(n)]


def default_on(name: str) -> bool:
    return _REGISTRY[name][3]


def settings_class(name: str) -> type[CheckSettings]:
    """The settings model of a check; importing it never imports river."""
    mod = importlib.import_module(_REGISTRY[name][0])
    return getattr(mod, _REGISTRY[name][2])


def check_class(name: str) -> type[Check]:
    mod = importlib.import_module(_REGISTRY[name][0])
    return getattr(mod, _REGISTRY[name][1])


__all__ = [
    "Check",
    "CheckContext",
    "CheckSettings",
    "Verdict",
    "CHECK_NAMES",
    "registered",
    "default_on",
    "settings_class",
    "check_class",
]
