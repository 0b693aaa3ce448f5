"""Keys that were renamed, old -> new, in one place: config validation and scenario loading refuse
an old key with a message that names the new one.

A path is dotted; ``[]`` stands for any element of a list (``models[]`` is every ``[[models]]``
entry). The new path says where the value now goes, which may be another table.

>>> old_keys({"broker": {"keepalive": 30}}, CONFIG_RENAMES)
[('broker.keepalive', 30, 'broker.keepalive_s')]
"""

from __future__ import annotations

from typing import Any

# Units in the names: a window, a period or a limit says what it counts.
CONFIG_RENAMES: dict[str, str] = {
    "broker.keepalive": "broker.keepalive_s",
    "agent.journal_batch_max": "agent.journal_batch_max_messages",
    "models[].pairing.max_unpaired": "models[].pairing.max_unpaired_records",
    "models[].window.size": "models[].window.size_pairs",
    "models[].checks.gap.evaluate_every": "models[].checks.gap.evaluate_every_pairs",
    "models[].checks.drift.evaluate_every": "models[].checks.drift.evaluate_every_pairs",
    "models[].checks.drift.history": "models[].checks.drift.history_pairs",
    "models[].checks.baseline.evaluate_every": "models[].checks.baseline.evaluate_every_pairs",
    "models[].checks.baseline.window": "models[].checks.baseline.recent_pairs",
    "models[].checks.range.window": "models[].checks.range.recent_predictions",
    "models[].checks.range.evaluate_every": "models[].checks.range.evaluate_every_predictions",
    "models[].checks.shift.window": "models[].checks.shift.recent_predictions",
    "models[].checks.shift.evaluate_every": "models[].checks.shift.evaluate_every_predictions",
    "models[].checks.shift.warning": "models[].checks.shift.warning_index",
    "models[].checks.shift.critical": "models[].checks.shift.critical_index",
    **{
        f"models[].checks.{c}.clear_after": f"models[].checks.{c}.clear_after_evaluations"
        for c in ("gap", "range", "shift", "drift", "baseline")
    },
}

# A scenario says the same things as a config with the config's keys.
SCENARIO_RENAMES: dict[str, str] = {
    "monitor.window_size": "monitor.window.size_pairs",
    "monitor.min_pairs": "monitor.window.min_pairs",
    "monitor.horizon_s": "monitor.pairing.horizon_s",
    "payload.prediction_value": "fields.prediction.value",
    "payload.truth_value": "fields.truth.value",
    "payload.features": "fields.prediction.features",
    "incidents[].note": "incidents[].detail",
    **{
        "monitor." + k.removeprefix("models[]."): "monitor." + v.removeprefix("models[].")
        for k, v in CONFIG_RENAMES.items()
        if k.startswith("models[].checks.")
    },
}


# Values that were renamed: key path -> {old value: new value}.
SCENARIO_VALUE_RENAMES: dict[str, dict[str, str]] = {
    # the incident where the truth feed stops is named like the check that catches it
    "incidents[].kind": {"stall": "feed_stop"},
}


def _split(path: str) -> list[str]:
    out: list[str] = []
    for part in path.split("."):
        if part.endswith("[]"):
            out += [part[:-2], "[]"]
        else:
            out.append(part)
    return out


def _find(data: Any, parts: list[str], shown: str, labels: tuple[str, ...]) -> list[tuple[str, Any, tuple[str, ...]]]:
    if not parts:
        return []
    head, rest = parts[0], parts[1:]
    if head == "[]":
        if not isinstance(data, list):
            return []
        found: list[tuple[str, Any, tuple[str, ...]]] = []
        for i, item in enumerate(data):
            label = f"[{i}]"
            if isinstance(item, dict) and isinstance(item.get("id"), str):
                label += f" (id {item['id']!r})"
            found += _find(item, rest, shown + label, (*labels, label))
        return found
    if not isinstance(data, dict) or head not in data:
        return []
    here = f"{shown}.{head}" if shown else head
    if not rest:
        return [(here, data[head], labels)]
    return _find(data[head], rest, here, labels)


def old_keys(data: Any, renames: dict[str, str]) -> list[tuple[str, Any, str]]:
    """Every old key present in ``data``: (where it stands, its value, where it goes now)."""
    out: list[tuple[str, Any, str]] = []
    for old, new in renames.items():
        for where, value, labels in _find(data, _split(old), "", ()):
            pieces = new.split("[]")
            target = pieces[0] + "".join(lab + rest for lab, rest in zip(labels, pieces[1:]))
            out.append((where, value, target))
    return out


def renamed_value_messages(data: Any, renames: dict[str, dict[str, str]]) -> list[str]:
    """One error line per old value: key path, value, rule, what to do.

    >>> renamed_value_messages({"incidents": [{"kind": "stall"}]}, SCENARIO_VALUE_RENAMES)
    ["incidents[0].kind = 'stall': this value was renamed; write 'feed_stop' instead"]
    """
    out = []
    for path, values in renames.items():
        for where, value, _ in _find(data, _split(path), "", ()):
            if isinstance(value, str) and value in values:
                out.append(f"{where} = {value!r}: this value was renamed; write {values[value]!r} instead")
    return out


def renamed_messages(data: Any, renames: dict[str, str]) -> list[str]:
    """One error line per old key: key path, value, rule, what to do.

    >>> renamed_messages({"models": [{"id": "m", "window": {"size": 300}}]}, CONFIG_RENAMES)
    ["models[0] (id 'm').window.size = 300: this key was renamed; write models[0] (id 'm').window.size_pairs instead"]
    """
    out = []
    for where, value, new in old_keys(data, renames):
        shown = "{...}" if isinstance(value, dict) else repr(value)
        out.append(f"{where} = {shown}: this key was renamed; write {new} instead")
    return out
