"""Topic filters, checked against the examples of the MQTT 3.1.1 standard, section 4.7."""

import pytest

from watchdog_edge.core.topics import Router, matches, validate_filter, validate_level


@pytest.mark.parametrize(
    "flt,topic,expected",
    [
        # MQTT 3.1.1, 4.7.1.2: "sport/tennis/player1/#" matches these three.
        ("sport/tennis/player1/#", "sport/tennis/player1", True),
        ("sport/tennis/player1/#", "sport/tennis/player1/ranking", True),
        ("sport/tennis/player1/#", "sport/tennis/player1/score/wimbledon", True),
        # 4.7.1.2: "sport/#" also matches the singular "sport".
        ("sport/#", "sport", True),
        # 4.7.1.3: "sport/tennis/+" matches "sport/tennis/player1" but not "sport/tennis/player1/ranking".
        ("sport/tennis/+", "sport/tennis/player1", True),
        ("sport/tennis/+", "sport/tennis/player1/ranking", False),
        # 4.7.1.3: "sport/+" does not match "sport" but does match "sport/".
        ("sport/+", "sport", False),
        ("sport/+", "sport/", True),
        # 4.7.2: "#" and "+/monitor/Clients" do not match topics beginning with "$".
        ("#", "$SYS/monitor/Clients", False),
        ("+/monitor/Clients", "$SYS/monitor/Clients", False),
        ("$SYS/#", "$SYS/monitor/Clients", True),
    ],
)
def test_standard_examples(flt, topic, expected):
    assert matches(flt, topic) is expected


@pytest.mark.parametrize("bad", ["sport/tennis#", "sport/tennis/#/ranking", "sport+", ""])
def test_invalid_filters_from_the_standard(bad):
    # 4.7.1.2 and 4.7.1.3 name "sport/tennis#", "sport/tennis/#/ranking" and "sport+" as invalid.
    with pytest.raises(ValueError):
        validate_filter(bad)


def test_outbound_levels_refuse_wildcards_and_empty():
    for bad in ["", "a+b", "x#", "a/b", "nul\x00"]:
        with pytest.raises(ValueError):
            validate_level(bad)
    validate_level("compressor-kw")


def test_router_sends_one_topic_to_every_listening_model():
    r = Router([("site/meter", ("a", "truth")), ("site/meter", ("b", "truth")), ("site/+/pred", ("c", "prediction"))])
    assert r.route("site/meter") == (("a", "truth"), ("b", "truth"))
    assert r.route("site/x/pred") == (("c", "prediction"),)
    assert r.route("elsewhere") == ()
