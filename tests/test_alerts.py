"""Alert state rules: transitions only, ids stable and distinct as the contract says."""

from watchdog_edge.core.alerts import AlertBook, alert_id, episode_id
from watchdog_edge.core.checks.base import Verdict

OK, WARN, CRIT = Verdict("normal", "fine"), Verdict("warning", "up"), Verdict("critical", "way up")


def test_transitions_only_never_one_alert_per_evaluation():
    b = AlertBook("gw", "m")
    seq = [OK, OK, WARN, WARN, WARN, CRIT, CRIT, WARN, OK, OK]
    out = [b.update("gap", v, float(i), "v1") for i, v in enumerate(seq)]
    got = [(i, a.state, a.severity) for i, a in enumerate(out) if a]
    assert got == [(2, "raised", "warning"), (5, "raised", "critical"), (8, "cleared", "critical")]


def test_ids_differ_between_raise_and_clear_and_repeat_for_resends():
    b = AlertBook("gw", "m")
    r = b.update("gap", WARN, 10.0, "v1")
    c = b.update("gap", OK, 20.0, "v1")
    assert r.alert_id != c.alert_id
    assert r.alert_id == alert_id("gw", "m", "v1", "gap", 10.0, "raised", "warning")
    assert c.alert_id == alert_id("gw", "m", "v1", "gap", 10.0, "cleared", "warning")  # episode start, not clear time
    # Every input of the id matters.
    base = ("gw", "m", "v1", "gap", 10.0, "raised", "warning")
    variants = [
        ("gw2",) + base[1:],
        base[:1] + ("m2",) + base[2:],
        base[:2] + ("v2",) + base[3:],
        base[:3] + ("drift",) + base[4:],
        base[:4] + (11.0,) + base[5:],
        base[:6] + ("critical",),
    ]
    assert len({alert_id(*v) for v in variants} | {alert_id(*base)}) == len(variants) + 1


def test_contract_json_fields():
    a = AlertBook("gw", "m").update("gap", Verdict("warning", "Live loss is up.", {"pairs": 500}), 1764600000.25, None)
    d = a.to_dict()
    assert list(d) == [
        "alert_id",
        "agent",
        "model",
        "model_version",
        "check",
        "state",
        "severity",
        "ts",
        "summary",
        "figures",
        "episode",
    ]
    assert d["ts"] == "2025-12-01T14:40:00.250Z"
    assert d["figures"] == {"pairs": 500}


def test_new_version_closes_open_episodes():
    b = AlertBook("gw", "m")
    b.update("gap", WARN, 1.0, "v1")
    b.update("range", CRIT, 2.0, "v1")
    closed = b.close_all(3.0, "v1", "new version")
    assert {(a.check, a.state, a.severity) for a in closed} == {
        ("gap", "cleared", "warning"),
        ("range", "cleared", "critical"),
    }
    assert b.level("gap") == "normal"


def test_raise_escalation_and_clear_share_the_episode_and_the_clear_says_what_it_closes():
    b = AlertBook("gw", "m")
    raised = b.update("gap", WARN, 10.0, "v1")
    worse = b.update("gap", CRIT, 12.0, "v1")
    cleared = b.update("gap", OK, 20.0, "v1")
    assert raised.episode == worse.episode == cleared.episode == episode_id("gw", "m", "v1", "gap", 10.0)
    assert len({raised.alert_id, worse.alert_id, cleared.alert_id}) == 3
    assert cleared.to_dict()["closes"] == ["warning", "critical"]
    assert "closes" not in raised.to_dict()
    # the next episode of the same check is another episode
    again = b.update("gap", CRIT, 30.0, "v1")
    assert again.episode != raised.episode
    assert b.update("gap", OK, 40.0, "v1").closes == ("critical",)


def test_episode_id_depends_on_each_of_its_inputs_and_not_on_state_or_severity():
    base = ("gw", "m", "v1", "gap", 10.0)
    variants = [("gw2",) + base[1:], base[:1] + ("m2",) + base[2:], base[:2] + ("v2",) + base[3:]]
    variants += [base[:3] + ("drift",) + base[4:], base[:4] + (11.0,)]
    assert len({episode_id(*v) for v in variants} | {episode_id(*base)}) == len(variants) + 1
    # an episode id is never an alert id of the same episode
    assert episode_id(*base) not in {
        alert_id(*base, s, v) for s in ("raised", "cleared") for v in ("warning", "critical")
    }


def test_a_version_change_closes_with_the_published_severities_and_a_snapshot_keeps_them():
    b = AlertBook("gw", "m")
    b.update("gap", WARN, 1.0, "v1")
    b.update("gap", CRIT, 2.0, "v1")
    again = AlertBook("gw", "m")
    again.restore(b.snapshot())
    (closed,) = again.close_all(3.0, "v1", "new version")
    assert closed.closes == ("warning", "critical")
    assert closed.episode == episode_id("gw", "m", "v1", "gap", 1.0)
