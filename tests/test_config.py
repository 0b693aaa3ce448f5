"""Config loading: defaults, and errors that name the key, the value and the rule."""

import pytest

from watchdog_edge.core.settings import parse_config
from watchdog_edge.errors import ConfigError
from watchdog_edge.files.configfile import load_config

MODEL = {"id": "m", "card": "m.json", "prediction_topic": "a/pred", "truth_topic": "a/truth"}


def err(data) -> str:
    with pytest.raises(ConfigError) as e:
        parse_config(data)
    return str(e.value)


def test_defaults_are_filled_in():
    cfg = parse_config({"models": [MODEL]})
    m = cfg.models[0]
    assert m.window.size_pairs == 500 and m.pairing.horizon_s == 7200
    assert cfg.broker.topics.alerts == "watchdog/{model}/alerts"
    assert m.checks["gap"].warning_tolerance == 0.25 and m.checks["gap"].critical_tolerance == 1.0
    assert "gap" in m.enabled_checks()


def test_error_names_key_value_and_rule():
    msg = err({"models": [dict(MODEL, window={"size_pairs": 0})]})
    assert "models[0] (id 'm').window.size_pairs = 0" in msg and "greater than or equal to 2" in msg


def test_unknown_key_is_named():
    msg = err({"models": [dict(MODEL, widow={"size": 5})]})
    assert "widow" in msg and "unknown key" in msg


def test_unknown_check_lists_the_known_ones():
    msg = err({"models": [dict(MODEL, checks={"gapp": {}})]})
    assert "'gapp'" in msg and "gap" in msg


def test_check_setting_error_is_named():
    msg = err({"models": [dict(MODEL, checks={"gap": {"confidence": 1.5}})]})
    assert "checks.gap.confidence = 1.5" in msg


def test_wildcards_in_model_id_and_bad_filters_are_refused():
    assert "model id 'a+b'" in err({"models": [dict(MODEL, id="a+b")]})
    assert "'#' must be a whole level" in err({"models": [dict(MODEL, truth_topic="a/#/b")]})


def test_duplicate_model_ids():
    assert "appears twice" in err({"models": [MODEL, MODEL]})


def test_needs_a_model():
    assert "models" in err({})


def test_both_password_sources_refused():
    assert "not both" in err({"models": [MODEL], "broker": {"password_file": "p", "password_env": "P"}})


def test_file_errors(tmp_path):
    with pytest.raises(ConfigError, match="not found"):
        load_config(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[agent\nname = 1\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(bad)


def test_paths_resolve_against_the_config_folder(tmp_path):
    p = tmp_path / "sub" / "c.toml"
    p.parent.mkdir()
    p.write_text('[[models]]\nid = "m"\ncard = "cards/m.json"\nprediction_topic = "a"\ntruth_topic = "b"\n')
    cfg = load_config(p)
    assert cfg.resolve(cfg.models[0].card) == (tmp_path / "sub" / "cards" / "m.json").resolve()


def test_model_id_from_a_topic_level(tmp_path):
    from helpers import card, pred, truth

    from watchdog_edge.core.events import DeadLetter
    from watchdog_edge.core.monitor import Monitor
    from watchdog_edge.files.cardfile import save_card
    from watchdog_edge.files.configfile import load_cards

    (tmp_path / "cards").mkdir()
    for mid in ("pump-1", "pump-2"):
        save_card(card(mid), tmp_path / "cards" / f"{mid}.json")
    cfgfile = tmp_path / "c.toml"
    cfgfile.write_text(
        '[[models]]\nid = "pumps"\ncard = "cards/{model}.json"\nmodel_level = 2\n'
        'prediction_topic = "station/+/pred"\ntruth_topic = "station/+/truth"\n'
    )
    cfg = load_config(cfgfile)
    assert [(m.id, m.prediction_topic) for m in cfg.models] == [
        ("pump-1", "station/pump-1/pred"),
        ("pump-2", "station/pump-2/pred"),
    ]
    mon = Monitor(cfg, load_cards(cfg))
    mon.feed("station/pump-2/pred", pred(1, 3.0), 1.0)
    mon.feed("station/pump-2/truth", truth(1, 3.5), 2.0)
    assert mon.status()["models"]["pump-2"]["paired"] == 1
    ev = mon.feed("station/pump-9/pred", pred(1, 3.0), 3.0)
    assert [e.reason for e in ev if isinstance(e, DeadLetter)] == ["unknown_topic"]


def test_model_level_rules_are_explained():
    msg = err({"models": [dict(MODEL, card="cards/{model}.json", model_level=2)]})
    assert "must have '+' at level 2" in msg
    msg = err({"models": [dict(MODEL, prediction_topic="s/+/p", truth_topic="s/+/t", model_level=2)]})
    assert "{model} in the file name" in msg
    assert "model_level is not set" in err({"models": [dict(MODEL, card="{model}.json")]})


def test_every_error_has_one_form_inside_a_check_as_anywhere_else():
    msgs = []
    msgs.append(msg := err({"agent": {"colour": "red"}, "models": [dict(MODEL, checks={"gap": {"colour": "red"}})]}))
    lines = msg.splitlines()[1:]
    assert "  agent.colour = 'red': unknown key; check the spelling against the documented keys" in lines
    assert (
        "  models[0] (id 'm').checks.gap.colour = 'red': unknown key; check the spelling against the documented keys"
        in lines
    )
    # a rule across a check's keys names the check's table, with no stray dot and no library wording
    msgs.append(
        msg := err({"models": [dict(MODEL, checks={"gap": {"warning_tolerance": 2.0, "critical_tolerance": 1.0}})]})
    )
    assert "  models[0] (id 'm').checks.gap: critical_tolerance (1.0) must be >= warning_tolerance (2.0)" in msg
    msgs.append(msg := err({"models": [dict(MODEL, checks={"shift": {"recent_predictions": 10}})]}))
    assert (
        "  models[0] (id 'm').checks.shift.recent_predictions = 10: Input should be greater than or equal to 50" in msg
    )
    msgs.append(msg := err({"models": [MODEL, MODEL]}))
    assert "model id 'm' appears twice; give each [[models]] entry its own id" in msg
    for m in msgs:
        assert "Value error" not in m and ". =" not in m and "each []" not in m
