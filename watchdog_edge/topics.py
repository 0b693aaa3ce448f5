"""MQTT topic filters and names: matching, validation, and routing topics to models."""

from __future__ import annotations


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


Route = tuple[tuple[str, str], ...]


class Router:
    """Maps a topic to every ``(model, kind)`` listening on it (one meter may serve two models).

    Exact filters are looked up in a dict; wildcard filters are scanned once per topic and the
    answer cached.

    >>> Router([("a/+/pred", "m1", "prediction"), ("a/x/pred", "m2", "prediction")]).route("a/x/pred")
    (('m2', 'prediction'), ('m1', 'prediction'))
    """

    def __init__(self, routes: list[tuple[str, str, str]], cache_size: int = 4096) -> None:
        self._exact: dict[str, list[tuple[str, str]]] = {}
        self._wild: list[tuple[str, str, str]] = []
        for flt, model, kind in routes:
            validate_filter(flt)
            if "+" in flt or "#" in flt:
                self._wild.append((flt, model, kind))
            else:
                self._exact.setdefault(flt, []).append((model, kind))
        self._cache: dict[str, Route] = {}
        self._cache_size = cache_size

    def route(self, topic: str) -> Route:
        """Every (model, kind) for ``topic``; empty when no model listens."""
        hit = self._cache.get(topic)
        if hit is not None:
            return hit
        found = list(self._exact.get(topic, ()))
        for flt, model, kind in self._wild:
            if matches(flt, topic) and (model, kind) not in found:
                found.append((model, kind))
        result: Route = tuple(found)
        if len(self._cache) >= self._cache_size:
            self._cache.clear()
        self._cache[topic] = result
        return result
