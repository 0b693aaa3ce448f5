"""MQTT topic filters and names: matching, validation, and routing topics to models."""

from __future__ import annotations

from typing import Generic, TypeVar


def validate_filter(flt: str) -> None:
    """Raise ValueError when ``flt`` is not a valid MQTT topic filter (MQTT 3.1.1, 4.7)."""
    if not flt:
        raise ValueError("a topic filter must not be empty")
    if "\x00" in flt:
        raise ValueError("a topic filter must not contain NUL")
    levels = flt.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            raise ValueError(f"'#' must be a whole level and the last one, in {flt!r}")
        if "+" in level and level != "+":
            raise ValueError(f"'+' must be a whole level, in {flt!r}")


def validate_level(text: str, what: str = "topic level") -> None:
    """A value that goes into an outbound topic must be one non-empty level without wildcards."""
    if not text:
        raise ValueError(f"{what} must not be empty")
    for bad, name in (("+", "'+'"), ("#", "'#'"), ("/", "'/'"), ("\x00", "NUL")):
        if bad in text:
            raise ValueError(f"{what} {text!r} must not contain {name}")


def matches(flt: str, topic: str) -> bool:
    """True when ``topic`` matches ``flt``; ``$``-topics never match a leading wildcard.

    >>> matches("sport/tennis/+", "sport/tennis/player1"), matches("sport/#", "sport")
    (True, True)
    """
    if topic.startswith("$") and flt[:1] in ("+", "#"):
        return False
    f_levels = flt.split("/")
    t_levels = topic.split("/")
    for i, f in enumerate(f_levels):
        if f == "#":
            return True
        if i >= len(t_levels):
            return False
        if f != "+" and f != t_levels[i]:
            return False
    return len(f_levels) == len(t_levels)


T = TypeVar("T")


class Router(Generic[T]):
    """Maps a topic to every target listening on it (one meter may serve two models).

    Exact filters are looked up in a dict; wildcard filters are scanned once per topic and the
    answer cached.

    >>> Router([("a/+/pred", "m1"), ("a/x/pred", "m2")]).route("a/x/pred")
    ('m2', 'm1')
    """

    def __init__(self, routes: list[tuple[str, T]], cache_size: int = 4096) -> None:
        self._exact: dict[str, list[T]] = {}
        self._wild: list[tuple[str, T]] = []
        for flt, target in routes:
            validate_filter(flt)
            if "+" in flt or "#" in flt:
                self._wild.append((flt, target))
            else:
                self._exact.setdefault(flt, []).append(target)
        self.cache: dict[str, tuple[T, ...]] = {}  # topic -> targets, for callers that look first
        self._cache_size = cache_size

    def route(self, topic: str) -> tuple[T, ...]:
        """Every target for ``topic``; empty when nothing listens."""
        hit = self.cache.get(topic)
        if hit is not None:
            return hit
        found = list(self._exact.get(topic, ()))
        for flt, target in self._wild:
            if matches(flt, topic) and target not in found:
                found.append(target)
        result = tuple(found)
        if len(self.cache) >= self._cache_size:
            self.cache.clear()
        self.cache[topic] = result
        return result
