"""The field simulators: scenarios, processes, the deployed model and its card, recordings, live."""

from __future__ import annotations

import json
import threading
import time

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from typer.testing import CliRunner

from simulators.bundle import config_data, load_incidents, write_bundle
from simulators.fit import fit_polynomial
from simulators.generate import simulate, train
from simulators.live import parse_broker, publish_live
from simulators.process import ar1, daily_cycle, local_hour
from simulators.scenario import load_scenario, parse_scenario, scenario_names
from watchdog_edge.cli.app import app
from watchdog_edge.core.cards import expected_loss
from watchdog_edge.core.events import Alert
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.errors import ConfigError, RecordingError
from watchdog_edge.files.cardfile import load_card
from watchdog_edge.files.configfile import load_config, load_monitor
from watchdog_edge.replay.recording import read_recording, replay


def _tomlish(sc) -> dict:
    return sc.model_dump(mode="python", exclude_none=True)


# -- scenarios --------------------------------------------------------------------------------
def test_shipped_scenarios_load_and_name_three_or_more_sites():
    names = scenario_names()
    assert {"cold-store", "pumping-station", "greenhouse", "dairy-chiller"} <= set(names)
    sites = {load_scenario(n).site.name for n in names}
    assert len(sites) == len(names)
    kinds = {inc.kind for n in names for inc in load_scenario(n).incidents}
    assert {"drift", "step", "regime", "feed_stop", "overfit"} <= kinds


def test_scenario_errors_name_the_key_and_the_rule():
    data = _tomlish(load_scenario("dairy-chiller"))
    data["model"]["features"] = ["air_c", "pressure_bar"]
    with pytest.raises(ConfigError, match="'pressure_bar', which is not a sensor"):
        parse_scenario(data)
    data = _tomlish(load_scenario("dairy-chiller"))
    data["process"]["terms"].append({"coef": 1.0, "hinge": "air_c"})
    with pytest.raises(ConfigError, match="needs 'above'"):
        parse_scenario(data)
    data = _tomlish(load_scenario("dairy-chiller"))
    data["timing"]["truth_share"] = 1.5
    with pytest.raises(ConfigError, match=r"timing\.truth_share = 1\.5"):
        parse_scenario(data)
    with pytest.raises(ConfigError, match="shipped scenarios are: .*cold-store"):
        load_scenario("no-such-site")


# -- processes --------------------------------------------------------------------------------
def test_daily_cycle_peaks_at_its_hour_in_local_time():
    sc = load_scenario("cold-store")
    outdoor = sc.sensor("outdoor_c")
    t = sc.site.start_t + np.arange(0, 86400, 60.0)
    hours = local_hour(t, sc.site.utc_offset_h)
    level = daily_cycle(outdoor, hours)
    # mean + amplitude at the peak hour, mean - amplitude twelve hours later
    assert hours[np.argmax(level)] == pytest.approx(outdoor.peak_hour, abs=1 / 60)
    assert level.max() == pytest.approx(outdoor.mean + outdoor.daily_amplitude, abs=1e-3)
    assert level.min() == pytest.approx(outdoor.mean - outdoor.daily_amplitude, abs=1e-3)


def test_ar1_noise_has_the_stated_spread_and_lag_one_correlation():
    # an AR(1) with coefficient phi has lag-k autocorrelation phi**k and variance sd**2
    # (standard time-series result, e.g. Box & Jenkins); checked on a long series
    rng = np.random.default_rng(4)
    x = ar1(rng, 200_000, sd=2.0, step_s=60.0, tau_s=600.0)
    phi = np.exp(-60.0 / 600.0)
    assert x.std() == pytest.approx(2.0, rel=0.03)
    assert np.corrcoef(x[:-1], x[1:])[0, 1] == pytest.approx(phi, abs=0.01)
    assert np.corrcoef(x[:-5], x[5:])[0, 1] == pytest.approx(phi**5, abs=0.02)


def test_sensor_values_are_in_real_units_and_bounds():
    sc = load_scenario("pumping-station")
    run = simulate(sc, duration_h=2)
    flows = []
    for m in run.messages:
        if m.topic == sc.topics.prediction:
            body = json.loads(m.payload)
            flows.append(body["features"]["flow_m3h"])
            assert 3.0 < body["features"]["discharge_bar"] < 6.0
    assert min(flows) >= 0 and 150 < np.mean(flows) < 450


# -- the deployed model and its card ----------------------------------------------------------
def test_least_squares_fit_matches_scikit_learn():
    from sklearn.linear_model import LinearRegression
    from sklearn.preprocessing import PolynomialFeatures

    rng = np.random.default_rng(0)
    x = rng.normal(size=(300, 3)) * [5.0, 0.5, 20.0] + [10.0, 1.0, 300.0]
    y = 2.0 + x[:, 0] * x[:, 2] * 0.01 - 3.0 * x[:, 1] ** 2 + rng.normal(size=300)
    ours = fit_polynomial(["a", "b", "c"], x, y, degree=2)
    # scikit-learn: the same degree-2 basis, ordinary least squares
    poly = PolynomialFeatures(2)
    ref = LinearRegression().fit(poly.fit_transform(x), y)
    x_new = rng.normal(size=(50, 3)) * [5.0, 0.5, 20.0] + [10.0, 1.0, 300.0]
    np.testing.assert_allclose(ours.predict(x_new), ref.predict(poly.transform(x_new)), rtol=1e-7, atol=1e-7)
    assert ours.parameters == poly.n_output_features_ == 10


def test_card_figures_are_the_training_rows_figures():
    sc = load_scenario("pumping-station")
    model, card = train(sc, seed=3)
    assert card.training.count == sc.model.training_rows
    assert card.holdout is not None and card.holdout.count == sc.model.holdout_rows
    assert card.fitted_parameters == model.parameters == 10  # degree 2 in 3 features
    assert card.least_squares and card.loss == "squared"
    assert set(card.features) == set(sc.model.features)
    # a well-specified fit on thousands of rows: held-out loss close to the noise variance
    noise = sc.process.noise_sd**2 + sc.process.meter_sd**2
    assert card.holdout.loss == pytest.approx(noise, rel=0.25)


def test_over_complex_model_looks_good_in_training_and_is_poor_from_the_first_prediction(tmp_path):
    sc = load_scenario("greenhouse")
    run = simulate(sc, duration_h=6)
    assert run.card.fitted_parameters == 35 and run.card.training.count == 40
    noise = sc.process.noise_sd**2 + sc.process.meter_sd**2
    assert run.card.training.loss < noise / 2  # it fits its 40 rows too well
    paths = write_bundle(run, tmp_path / "gh.jsonl", "greenhouse")
    mon = load_monitor(paths.config)
    gaps = [
        e
        for e in replay(mon, read_recording(paths.recording))
        if isinstance(e, Alert) and e.check == "gap" and e.state == "raised"
    ]
    assert gaps, "the over-complex model must raise a gap"
    assert gaps[0].figures["diagnosis"] == "present from deployment"
    assert [i["kind"] for i in run.incidents][0] == "overfit"
    assert run.incidents[0]["start"] == run.start_t and run.incidents[0]["end"] == run.end_t


# -- incidents, truth timing ------------------------------------------------------------------
def _features(run, sc, name):
    out = {}
    for m in run.messages:
        if m.topic == sc.topics.prediction:
            b = json.loads(m.payload)
            out[b["ts"]] = b["features"][name]
    return out


def test_drift_and_step_change_only_the_reading_inside_their_spans():
    sc = load_scenario("dairy-chiller")
    quiet = sc.model_copy(update={"incidents": []})
    with_inc = simulate(sc, seed=9)
    without = simulate(quiet, seed=9)
    a, b = _features(with_inc, sc, "air_c"), _features(without, sc, "air_c")
    milk_a, milk_b = _features(with_inc, sc, "milk_in_c"), _features(without, sc, "milk_in_c")
    start = sc.site.start_t
    for ts in a:
        h = (ts - start) / 3600
        step = 7.0 if 1.0 <= h < 1.75 else 16.0 if 6.75 <= h < 7.5 else 0.0
        assert a[ts] - b[ts] == pytest.approx(step, abs=2e-3)
        drift = 6.0 * (h - 3.75) if 3.75 <= h < 4.75 else 0.0
        assert milk_a[ts] - milk_b[ts] == pytest.approx(drift, abs=2e-3)


def test_truths_are_late_sparse_and_stop_during_a_feed_stop():
    sc = load_scenario("dairy-chiller")
    run = simulate(sc)
    pred_t, truths = {}, []
    for m in run.messages:
        body = json.loads(m.payload)
        if m.topic == sc.topics.prediction:
            pred_t[body["id"]] = body["ts"]
        else:
            truths.append((m.t, body))
    tim = sc.timing
    for t, body in truths:
        late = t - pred_t[body["id"]]
        assert tim.truth_delay_min_s <= late <= tim.truth_delay_max_s + tim.latency_max_s + 1e-3
    stall = next(i for i in run.incidents if i["kind"] == "feed_stop")
    assert not [t for t, _ in truths if stall["start"] + tim.latency_max_s < t < stall["end"]]
    # share of predictions that get a truth: binomial, 4 standard deviations
    n = len(pred_t)
    expected = tim.truth_share * n
    got = len(truths) + run.counts["truths_withheld"] + run.counts["truths_after_end"]
    assert abs(got - expected) < 4 * np.sqrt(n * tim.truth_share * (1 - tim.truth_share))


# -- recordings -------------------------------------------------------------------------------
def test_same_seed_same_recording_byte_for_byte(tmp_path):
    runner = CliRunner()
    for name, seed in (("a", 5), ("b", 5), ("c", 6)):
        res = runner.invoke(
            app,
            [
                "simulate",
                "dairy-chiller",
                "--to-recording",
                str(tmp_path / name / "r.jsonl"),
                "--seed",
                str(seed),
                "--duration",
                "90m",
            ],
        )
        assert res.exit_code == 0, res.output
    a, b, c = ((tmp_path / n / "r.jsonl").read_bytes() for n in "abc")
    assert a == b and a != c
    for f in ("r.incidents.json", "r.config.toml", "r.card.json"):
        assert (tmp_path / "a" / f).read_bytes() == (tmp_path / "b" / f).read_bytes()
    lines = a.decode().splitlines()
    assert len(lines) > 500
    first = json.loads(lines[0])
    assert set(first) == {"t", "topic", "payload"} and isinstance(first["payload"], str)


def test_bundle_replays_with_its_config_and_card(tmp_path):
    sc = load_scenario("cold-store")
    run = simulate(sc, seed=2, duration_h=10)
    paths = write_bundle(run, tmp_path / "out" / "cs.jsonl", "cold-store")
    cfg = load_config(paths.config)
    assert cfg.models[0].id == sc.model.id and cfg.models[0].window.size_pairs == sc.monitor.window.size_pairs
    card = load_card(paths.card)
    assert expected_loss(card)[1] == "fpe"
    incidents = load_incidents(paths.incidents)
    assert [i["kind"] for i in incidents] == ["drift", "step"]  # the later ones start after 10 h
    mon = load_monitor(paths.config)
    events = replay(mon, read_recording(paths.recording))
    st = mon.status()
    assert st["bad_total"] == 0 and st["paired"] == run.counts["truths"]
    raised = [e for e in events if isinstance(e, Alert) and e.state == "raised"]
    assert raised and all(e.t >= incidents[0]["start"] for e in raised)


def test_nested_payload_fields_are_mapped_in_the_written_config(tmp_path):
    sc = load_scenario("pumping-station")
    data = config_data(sc, "card.json")
    assert data["models"][0]["fields"] == {"prediction": {"value": "estimate.kw"}, "truth": {"value": "meter.kw"}}
    run = simulate(sc, duration_h=3)
    paths = write_bundle(run, tmp_path / "pw.jsonl")
    mon = load_monitor(paths.config)
    replay(mon, read_recording(paths.recording))
    assert mon.status()["bad_total"] == 0 and mon.status()["paired"] == run.counts["truths"]


def test_incidents_file_errors_name_the_entry(tmp_path):
    p = tmp_path / "inc.json"
    p.write_text(json.dumps([{"kind": "step", "start": 10, "end": 5}]))
    with pytest.raises(RecordingError, match=r"incidents\[0\] ends"):
        load_incidents(p)
    p.write_text(json.dumps({"incidents": [{"kind": "step", "start": "noon", "end": 5}]}))
    with pytest.raises(RecordingError, match=r"incidents\[0\]\.start must be a time"):
        load_incidents(p)


def test_simulate_needs_exactly_one_target():
    res = CliRunner().invoke(app, ["simulate", "dairy-chiller"])
    assert res.exit_code == 2 and "exactly one of --to-recording" in res.output


# -- live -------------------------------------------------------------------------------------
def test_parse_broker():
    assert parse_broker("localhost:1884") == ("localhost", 1884)
    assert parse_broker("gw.local") == ("gw.local", 1883)
    with pytest.raises(Exception, match="HOST:PORT"):
        parse_broker("gw:0")


def test_live_publishing_delivers_every_message_at_qos1(broker):
    sc = load_scenario("dairy-chiller")
    run = simulate(sc, seed=4, duration_h=0.25)
    got: list[tuple[str, bytes, int]] = []
    ready = threading.Event()
    sub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="sim-test-sub")
    sub.on_connect = lambda c, u, f, rc, p: (c.subscribe("marshend/#", qos=1), None)
    sub.on_subscribe = lambda c, u, mid, rcs, p: ready.set()
    sub.on_message = lambda c, u, msg: got.append((msg.topic, msg.payload, msg.qos))
    sub.connect(broker.host, broker.port)
    sub.loop_start()
    try:
        assert ready.wait(10), "subscription not acknowledged"
        acked = publish_live(run.messages, broker.host, broker.port, speed=1e6)
        assert acked == len(run.messages)
        deadline = time.monotonic() + 10
        while len(got) < len(run.messages) and time.monotonic() < deadline:
            time.sleep(0.05)
    finally:
        sub.disconnect()
        sub.loop_stop()
    # one publisher, one topic filter: MQTT keeps the order of QoS 1 messages (MQTT 3.1.1, 4.6)
    assert [(t, p) for t, p, _ in got] == [(m.topic, m.payload) for m in run.messages]
    assert {q for _, _, q in got} == {1}


def test_live_publishing_fails_clearly_without_a_broker():
    from broker import free_port

    from watchdog_edge.errors import BrokerError

    with pytest.raises(BrokerError, match="cannot reach the broker"):
        publish_live([], "127.0.0.1", free_port())


# -- live, watched by the agent ---------------------------------------------------------------
@pytest.mark.slow
def test_scenario_streamed_live_and_watched_by_run_gives_the_alerts_of_its_replay(tmp_path, broker):
    """simulate --broker -> broker -> watchdog-edge run --record; replay of that recording."""
    import os
    import signal
    import subprocess
    import sys
    from pathlib import Path

    from watchdog_edge.agent.agent import alert_payload
    from watchdog_edge.files.configfile import load_cards

    repo = Path(__file__).resolve().parents[1]
    env = dict(os.environ, PYTHONPATH=str(repo) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    files = tmp_path / "site"
    cli = [sys.executable, "-m", "watchdog_edge.cli.app"]
    # the card and config (pointing at the test broker) come from simulate itself
    prep = subprocess.run(
        cli
        + [
            "simulate",
            "dairy-chiller",
            "--broker",
            f"{broker.host}:{broker.port}",
            "--files",
            str(files),
            "--duration",
            "1s",
            "--seed",
            "3",
        ],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert prep.returncode == 0, prep.stderr
    config = files / "dairy-chiller.config.toml"
    assert load_config(config).broker.port == broker.port

    alerts: list[bytes] = []
    watcher = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="sim-test-watcher")
    subscribed = threading.Event()
    watcher.on_connect = lambda c, u, f, rc, p: (c.subscribe("watchdog/+/alerts", qos=1), None)
    watcher.on_subscribe = lambda c, u, mid, rcs, p: subscribed.set()
    watcher.on_message = lambda c, u, msg: alerts.append(msg.payload)
    watcher.connect(broker.host, broker.port)
    watcher.loop_start()
    rec = tmp_path / "live.jsonl"
    log = open(tmp_path / "agent.log", "w")
    agent = subprocess.Popen(
        cli + ["run", "--config", str(config), "--record", str(rec)],
        stdout=log,
        stderr=subprocess.STDOUT,
        env=env,
        cwd=files,
    )
    try:
        assert subscribed.wait(10)
        deadline = time.monotonic() + 20
        while "connected to" not in (tmp_path / "agent.log").read_text():
            assert agent.poll() is None and time.monotonic() < deadline, (tmp_path / "agent.log").read_text()
            time.sleep(0.05)
        # two simulated hours (the step incident at 1 h) at 1200x: about six seconds
        pub = subprocess.run(
            cli
            + [
                "simulate",
                "dairy-chiller",
                "--broker",
                f"{broker.host}:{broker.port}",
                "--duration",
                "2h",
                "--speed",
                "1200",
                "--seed",
                "3",
            ],
            env=env,
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert pub.returncode == 0, pub.stderr
        sent = len(simulate(load_scenario("dairy-chiller"), seed=3, duration_h=2).messages)
        deadline = time.monotonic() + 20
        while sum(1 for ln in read_recording(rec) if not ln.tick) < sent:
            assert time.monotonic() < deadline, "the agent did not record every message"
            time.sleep(0.1)
        time.sleep(1.5)  # a tick or two after the last message, then a clean stop
    finally:
        if agent.poll() is None:
            os.kill(agent.pid, signal.SIGTERM)
        rc = agent.wait(20)
        log.close()
    time.sleep(0.5)
    watcher.disconnect()
    watcher.loop_stop()
    assert rc == 0, (tmp_path / "agent.log").read_text()

    cfg = load_config(config)
    replayed = [
        alert_payload(e) for e in replay(Monitor(cfg, load_cards(cfg)), read_recording(rec)) if isinstance(e, Alert)
    ]
    live: dict[str, bytes] = {}
    for a in alerts:  # QoS 1 may deliver a message twice: same id, same bytes
        live.setdefault(json.loads(a)["alert_id"], a)
    assert replayed, "two hours with a step offset should raise alerts"
    assert {json.loads(a)["check"] for a in replayed} & {"gap", "range"}
    assert replayed == list(live.values())
