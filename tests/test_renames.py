"""Renamed keys: one map old -> new, and every loader refuses an old key naming the new one."""

import pytest

import watchdog_edge.core.checks as registry
from watchdog_edge.core.renames import CONFIG_RENAMES, SCENARIO_RENAMES, old_keys, renamed_messages
from watchdog_edge.core.settings import AgentSettings, BrokerSettings, PairingSettings, WindowSettings, parse_config
from watchdog_edge.errors import ConfigError

MODEL = {"id": "pump", "card": "pump.json", "prediction_topic": "p/pred", "truth_topic": "p/truth"}


def _fields_at(path: str) -> set[str]:
    """The settings fields of the table a dotted config path ends in."""
    parts = path.replace("[]", "").split(".")[:-1]
    if parts == ["agent"]:
        return set(AgentSettings.model_fields)
    if parts == ["broker"]:
        return set(BrokerSettings.model_fields)
    if parts == ["models", "window"]:
        return set(WindowSettings.model_fields)
    if parts == ["models", "pairing"]:
        return set(PairingSettings.model_fields)
    assert parts[:2] == ["models", "checks"], path
    return set(registry.settings_class(parts[2]).model_fields)


@pytest.mark.parametrize("old,new", sorted(CONFIG_RENAMES.items()))
def test_each_new_key_exists_and_each_old_key_is_gone(old, new):
    assert new.rsplit(".", 1)[1] in _fields_at(new)
    assert old.rsplit(".", 1)[1] not in _fields_at(old)


def _put(data: dict, path: str, value) -> dict:
    cur = data
    parts = path.split(".")
    for p in parts[:-1]:
        if p.endswith("[]"):
            cur = cur.setdefault(p[:-2], [dict(MODEL)])[0]
        else:
            cur = cur.setdefault(p, {})
    cur[parts[-1]] = value
    return data


@pytest.mark.parametrize("old,new", sorted(CONFIG_RENAMES.items()))
def test_config_validation_refuses_an_old_key_and_names_the_new_one(old, new):
    data = _put({"models": [dict(MODEL)]}, old, 7)
    with pytest.raises(ConfigError) as e:
        parse_config(data)
    where = new.replace("models[]", "models[0] (id 'pump')")
    assert f"write {where} instead" in str(e.value)
    shown_old = old.replace("models[]", "models[0] (id 'pump')")
    assert f"{shown_old} = 7" in str(e.value)


def test_old_keys_are_found_in_every_list_element_and_only_there():
    data = {"models": [{"id": "a", "window": {"size": 5}}, {"id": "b", "window": {"size_pairs": 5}}]}
    assert old_keys(data, CONFIG_RENAMES) == [
        ("models[0] (id 'a').window.size", 5, "models[0] (id 'a').window.size_pairs")
    ]
    assert old_keys({"models": "not a list"}, CONFIG_RENAMES) == []


def test_scenario_renames_point_at_the_configs_keys():
    msgs = renamed_messages(
        {"monitor": {"window_size": 200, "checks": {"shift": {"window": 500}}}, "incidents": [{"note": "x"}]},
        SCENARIO_RENAMES,
    )
    assert "monitor.window_size = 200: this key was renamed; write monitor.window.size_pairs instead" in msgs
    assert (
        "monitor.checks.shift.window = 500: this key was renamed; write monitor.checks.shift.recent_predictions instead"
        in msgs
    )
    assert "incidents[0].note = 'x': this key was renamed; write incidents[0].detail instead" in msgs


def test_a_scenario_with_old_keys_is_refused_with_the_new_names():
    import tomllib

    from simulators.scenario import SCENARIO_DIR, parse_scenario

    data = tomllib.loads((SCENARIO_DIR / "pumping-station.toml").read_text())
    parse_scenario(data)  # the shipped file uses the new keys
    data["payload"] = {"prediction_value": "estimate.kw"}
    data["incidents"][0]["note"] = "re-ranged"
    data["incidents"][-1]["kind"] = "stall"
    with pytest.raises(ConfigError) as e:
        parse_scenario(data, "pumping-station.toml")
    assert (
        "payload.prediction_value = 'estimate.kw': this key was renamed; write fields.prediction.value instead"
        in str(e.value)
    )
    assert "incidents[0].note = 're-ranged': this key was renamed; write incidents[0].detail instead" in str(e.value)
    assert (
        f"incidents[{len(data['incidents']) - 1}].kind = 'stall': this value was renamed; write 'feed_stop' instead"
        in str(e.value)
    )


def test_a_tune_grid_with_an_old_key_is_refused_with_the_new_name():
    from simulators.tune import expand

    with pytest.raises(
        ConfigError, match="grid key 'checks.shift.warning' was renamed; write 'checks.shift.warning_index'"
    ):
        expand({"checks.shift.warning": [0.1, 0.2]})
