"""The JetStream workers against real nats-server processes and real worker processes.

Every server is started by the test on free loopback ports (never the system one on 4222);
the workers are separate processes started through the command line and stopped (SIGTERM)
or killed (SIGKILL) by their pid.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import nats
import nats.errors
import paho.mqtt.client as paho
import pytest
from broker import free_port
from jetstream_setup import (
    REPO,
    WorkerProc,
    by_model,
    mappings_for,
    read_alerts,
    replay_stream,
    traffic,
    wait_for,
    write_setup,
)
from natsserver import NatsServer, cluster

from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import parse_config
from watchdog_edge.errors import ConfigError
from watchdog_edge.files.configfile import load_cards, load_config
from watchdog_edge.jetstream.subjects import delivery, mappings, partition_of, topic_to_subject
from watchdog_edge.jetstream.worker import partition_config, state_key
from watchdog_edge.replay.recording import RecordLine, replay

pytestmark = pytest.mark.nats

MODELS = ["a", "b", "c", "d", "e", "f"]


# --- helpers -------------------------------------------------------------------------------
async def _leases(url: str, bucket: str) -> dict[str, str]:
    nc = await nats.connect(url, connect_timeout=2)
    try:
        kv = await nc.jetstream().key_value(bucket)
        out = {}
        try:
            keys = await kv.keys()
        except Exception:
            keys = []
        for k in keys:
            if k.startswith("p."):
                try:
                    out[k] = (await kv.get(k)).value.decode()
                except Exception:
                    pass
        return out
    except Exception:
        return {}
    finally:
        await nc.close()


def leases(url: str) -> dict[str, str]:
    """Partition lease key -> holding worker."""
    return asyncio.run(_leases(url, "watchdog_leases"))


def all_held(url: str, partitions: int, by: set[str] | None = None) -> bool:
    held = leases(url)
    return len(held) == partitions and (by is None or set(held.values()) <= by)


async def _publish_nats(url: str, msgs: list[tuple[str, bytes]]) -> None:
    nc = await nats.connect(url, connect_timeout=2)
    for topic, payload in msgs:
        await nc.publish(topic_to_subject(topic), payload)
    await nc.flush()
    await nc.close()


def publish_nats(url: str, msgs: list[tuple[str, bytes]]) -> None:
    """Publish on the topics' own subjects, as a gateway's NATS client would; the server maps them."""
    asyncio.run(_publish_nats(url, msgs))


def alert_keys(alerts: list[dict]) -> list[tuple]:
    return [(a["model"], a["check"], a["state"], a["severity"]) for a in alerts]


def replay_plain(cfg_path: Path, msgs: list[tuple[str, bytes]]) -> dict[str, list[tuple]]:
    """A plain replay of the same records through one monitor, one second apart (times of our own)."""
    cfg = load_config(cfg_path)
    mon = Monitor(cfg, load_cards(cfg))
    lines = [RecordLine(1_800_000_000.0 + i, t, p) for i, (t, p) in enumerate(msgs)]
    out: dict[str, list[tuple]] = {}
    for ev in replay(mon, lines):
        if hasattr(ev, "alert_id"):
            out.setdefault(ev.model, []).append((ev.model, ev.check, ev.state, ev.severity))
    return out


def start_worker(tmp: Path, cfg: Path, name: str) -> WorkerProc:
    return WorkerProc(cfg, name, tmp / f"{name}.log")


# --- no server needed ----------------------------------------------------------------------
def test_mappings_put_both_topics_of_a_model_on_its_partition_token():
    cfg = parse_config(
        {
            "jetstream": {"partitions": 6},
            "models": [
                {"id": "p1", "card": "c.json", "prediction_topic": "site/p1/pred", "truth_topic": "lab/p1/truth"},
                {"id": "p2", "card": "c.json", "prediction_topic": "site/p2/pred", "truth_topic": "lab/p2/truth"},
            ],
        }
    )
    assert mappings(cfg) == {
        "site.*.pred": "wd.in.{{partition(6,1)}}.m.site.{{wildcard(1)}}.pred",
        "lab.*.truth": "wd.in.{{partition(6,1)}}.m.lab.{{wildcard(1)}}.truth",
        # planned-work commands are not partitioned: every partition's holder reads them
        "watchdog.agents.edge-agent.commands.planned-work": (
            "wd.in.c.m.watchdog.agents.edge-agent.commands.planned-work"
        ),
    }


def test_topics_the_workers_cannot_partition_are_refused_with_the_key_and_the_fix():
    no_id = parse_config(
        {"models": [{"id": "p1", "card": "c", "prediction_topic": "site/pred", "truth_topic": "t/p1"}]}
    )
    with pytest.raises(ConfigError, match=r"models\[p1\].*'site/pred'.*exactly one level"):
        mappings(no_id)
    dotted = parse_config({"models": [{"id": "p1", "card": "c", "prediction_topic": "s.x/p1", "truth_topic": "t/p1"}]})
    with pytest.raises(ConfigError, match="MQTT listener refuses"):
        mappings(dotted)


def test_duplicate_window_must_cover_a_takeover():
    with pytest.raises(ConfigError, match="alert_duplicate_window_s"):
        parse_config(
            {
                "jetstream": {"alert_duplicate_window_s": 10, "snapshot_every_s": 10, "lease_s": 6},
                "models": [{"id": "m", "card": "c", "prediction_topic": "a/m/p", "truth_topic": "a/m/t"}],
            }
        )


def test_state_keys_and_partition_configs():
    assert state_key("pump-7") == "pump-7"
    assert state_key("pumpe ö") == "x." + "pumpe ö".encode().hex()
    cfg = parse_config(
        {
            "jetstream": {"partitions": 3},
            "models": [
                {"id": m, "card": "c", "prediction_topic": f"a/{m}/p", "truth_topic": f"a/{m}/t"} for m in MODELS
            ],
        }
    )
    parts = [partition_config(cfg, p) for p in range(3)]
    assert sorted(m.id for pc in parts for m in pc.models) == MODELS
    assert all(partition_of(m.id, 3) == p for p, pc in enumerate(parts) for m in pc.models)


def test_reply_subject_metadata_both_forms():
    # the two forms of the JetStream ack reply subject (NATS ADR-15, from memory)
    assert delivery("$JS.ACK.S.C.1.42.7.1700000000123456789.3").stream_seq == 42
    d = delivery("$JS.ACK.dom.hash.S.C.1.42.7.1700000000123456789.3.tok")
    assert (d.stream_seq, d.timestamp_ns, d.pending) == (42, 1700000000123456789, 3)


@pytest.mark.slow
def test_no_server_at_start_exits_3_and_a_stop_while_connecting_exits_0(tmp_path):
    cfg = write_setup(tmp_path, [f"nats://127.0.0.1:{free_port()}"], ["a"], jetstream_extra="start_timeout_s = 1.0")
    w = start_worker(tmp_path, cfg, "w1")
    assert w.proc.wait(timeout=30) == 3
    assert w.stop() == 3 and "cannot reach a NATS server" in w.text()
    cfg.write_text(cfg.read_text().replace("start_timeout_s = 1.0", "start_timeout_s = 60.0"))
    w = start_worker(tmp_path, cfg, "w2")
    wait_for(lambda: "Connect call failed" in w.text(), 30, "the worker trying to connect", w.text)
    assert w.stop(timeout=10) == 0, w.text()


# --- one server ----------------------------------------------------------------------------
def test_a_refusal_that_needs_a_person_exits_3_at_once(tmp_path):
    """Replicas 3 on a server without a cluster: no waiting out the start timeout, the server's reason shown."""
    port = free_port()
    cfg = write_setup(
        tmp_path, [f"nats://127.0.0.1:{port}"], ["a"], replicas=3, jetstream_extra="start_timeout_s = 120.0"
    )
    srv = NatsServer(tmp_path / "srv", port=port, mqtt=False)
    try:
        t0 = time.monotonic()
        w = start_worker(tmp_path, cfg, "w1")
        assert w.proc.wait(timeout=60) == 3
        took = time.monotonic() - t0
        # a stream of the workers' name made by someone else for other subjects
        cfg.write_text(cfg.read_text().replace("replicas = 3", "replicas = 1"))

        async def other_stream() -> None:
            nc = await nats.connect(srv.url)
            await nc.jetstream().add_stream(name="WATCHDOG_IN", subjects=["elsewhere.>"])
            await nc.close()

        asyncio.run(other_stream())
        w2 = start_worker(tmp_path, cfg, "w2")
        assert w2.proc.wait(timeout=60) == 3
    finally:
        srv.stop()
    assert w.stop() == 3 and w2.stop() == 3
    assert "replicas > 1 not supported in non-clustered mode" in w.text(), w.text()
    assert took < 60 and "JetStream not ready" not in w.text()
    assert "stream WATCHDOG_IN exists with subjects ['elsewhere.>'], without ['wd.in.>']" in w2.text(), w2.text()


def test_server_partition_function_is_ours(tmp_path):
    """The server's own mapping is the reference for ``partition_of`` (its FNV-1a, modulo N)."""
    port = free_port()
    ids = [f"pump-{i}" for i in range(60)] + ["a", "b", "Z_9", "x-y-z"]
    cfg_path = write_setup(tmp_path, [f"nats://127.0.0.1:{port}"], ids, partitions=7)
    srv = NatsServer(tmp_path / "srv", port=port, mappings=mappings_for(cfg_path), mqtt=False)
    try:

        async def go() -> dict[str, int]:
            nc = await nats.connect(srv.url)
            js = nc.jetstream()
            await js.add_stream(name="T", subjects=["wd.in.>"])
            for m in ids:
                await js.publish(f"plant.{m}.pred", b"{}")
            info = await js.stream_info("T", subjects_filter=">")
            await nc.close()
            return {subj.split(".")[5]: int(subj.split(".")[2]) for subj in info.state.subjects or {}}

        got = asyncio.run(go())
    finally:
        srv.stop()
    assert got == {m: partition_of(m, 7) for m in ids}


async def dead_letters(url: str) -> list:
    """Every message of the dead-letter stream, in order."""
    nc = await nats.connect(url)
    sub = await nc.jetstream().subscribe("wd.dead.>", stream="WATCHDOG_DEAD", ordered_consumer=True)
    out = []
    with contextlib.suppress(nats.errors.TimeoutError):
        while True:
            out.append(await sub.next_msg(timeout=0.5))
    await nc.close()
    return out


@pytest.mark.slow
def test_mqtt_gateway_traffic_gives_the_alerts_of_a_replay(tmp_path):
    """Gateways unchanged: paho publishes to the server's MQTT listener; the alerts equal a replay's."""
    port = free_port()
    cfg = write_setup(tmp_path, [f"nats://127.0.0.1:{port}"], MODELS)
    srv = NatsServer(tmp_path / "srv", port=port, mappings=mappings_for(cfg))
    msgs = traffic(MODELS, seed=3)
    msgs.insert(5, ("plant/b/truth", b"{not json"))  # a bad record: dead-lettered, with its reason
    mirrored: list[dict] = []
    w = start_worker(tmp_path, cfg, "w1")
    sub = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="watcher")
    sub.on_message = lambda c, u, m: mirrored.append(json.loads(m.payload))
    try:
        wait_for(lambda: all_held(srv.url, 4), 20, "the worker holding every partition", w.text)
        sub.connect("127.0.0.1", srv.mqtt_port)
        sub.subscribe("watchdog/+/alerts", qos=1)
        sub.loop_start()
        pub = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="gateway-1")
        pub.connect("127.0.0.1", srv.mqtt_port)
        pub.loop_start()
        for topic, payload in msgs:
            info = pub.publish(topic, payload, qos=1)
            info.wait_for_publish(5)
            assert info.is_published()
        pub.loop_stop()
        pub.disconnect()
        expected = replay_plain(cfg, msgs)
        n = sum(len(v) for v in expected.values())
        assert n >= 6, expected
        wait_for(lambda: len(read_alerts(srv.url, cfg, 0.3)) >= n, 30, f"{n} alerts", w.text)
        time.sleep(1.0)  # a snapshot and the retained state
        alerts = read_alerts(srv.url, cfg)
        assert by_model(alerts) == replay_stream(srv.url, cfg)
        assert {m: alert_keys(v) for m, v in by_model(alerts).items()} == expected
        assert len({a["alert_id"] for a in alerts}) == len(alerts)
        wait_for(lambda: len(mirrored) >= n, 10, "the alerts mirrored to MQTT")
        assert sorted(a["alert_id"] for a in mirrored) == sorted(a["alert_id"] for a in alerts)

        async def state() -> dict:
            nc = await nats.connect(srv.url)
            kv = await nc.jetstream().key_value("watchdog_state")
            out = {m: json.loads((await kv.get(m)).value) for m in MODELS}
            await nc.close()
            return out

        st = asyncio.run(state())

        letters = asyncio.run(dead_letters(srv.url))
        assert [(m.data, m.headers["Wd-Reason"], m.headers["Wd-Topic"]) for m in letters] == [
            (b"{not json", "not_json", "plant/b/truth")
        ]
        assert letters[0].subject == f"wd.dead.{partition_of('b', 4)}"

        # the command line: export one partition with the workers' times, replay it
        p = partition_of("a", 4)
        rec, out = tmp_path / "p.jsonl", tmp_path / "p-alerts.jsonl"
        cli = [sys.executable, "-m", "watchdog_edge.cli.app"]
        env = dict(os.environ, PYTHONPATH=str(REPO))
        done = subprocess.run(
            [*cli, "jetstream", "export", "-c", str(cfg), "-o", str(rec), "--partition", str(p)],
            capture_output=True,
            text=True,
            env=env,
            timeout=60,
        )
        assert done.returncode == 0, done.stderr
        done = subprocess.run(
            [*cli, "replay", str(rec), "-c", str(cfg), "--alerts", str(out), "--quiet"],
            capture_output=True,
            text=True,
            env=env,
            timeout=60,
        )
        assert done.returncode == 0, done.stderr
        mine = [m for m in MODELS if partition_of(m, 4) == p]
        replayed = [json.loads(line) for line in out.read_text().splitlines()]
        assert [a for a in replayed if a["model"] in mine] == [a for a in alerts if a["model"] in mine]
        assert any(a["model"] == "a" for a in replayed)
        assert st["a"]["checks"]["gap"]["level"] == "normal" and st["a"]["pairs"] == 200
        assert st["b"]["partition"] == partition_of("b", 4)
    finally:
        sub.loop_stop()
        rc = w.stop()
        srv.stop()
    assert rc == 0, w.text()


COMMAND_TOPIC = "watchdog/agents/central/commands/planned-work"


def with_commands(msgs: list[tuple[str, bytes]], plan: dict[int, dict]) -> list[tuple[str, bytes]]:
    """``msgs`` with each planned-work command of ``plan`` put before the message at its index."""
    out = list(msgs)
    for i in sorted(plan, reverse=True):
        out.insert(i, (COMMAND_TOPIC, json.dumps(plan[i]).encode()))
    return out


async def _worker_status(url: str, worker: str) -> dict:
    nc = await nats.connect(url, connect_timeout=2)
    try:
        kv = await nc.jetstream().key_value("watchdog_leases")
        return json.loads((await kv.get(f"w.{worker}")).value)
    finally:
        await nc.close()


@pytest.mark.slow
def test_planned_work_commands_reach_every_partition_survive_a_restart_and_equal_a_replay(tmp_path):
    """Commands by MQTT and by NATS: held raises as in a replay, a worker killed inside a window, one dead letter."""
    port = free_port()
    cfg = write_setup(tmp_path, [f"nats://127.0.0.1:{port}"], MODELS)
    srv = NatsServer(tmp_path / "srv", port=port, mappings=mappings_for(cfg))
    assert len({partition_of(m, 4) for m in ("a", "c")}) == 2  # the window spans two partitions
    plain = traffic(MODELS, seed=3)
    plan = {
        4: {"action": "begin", "name": "meter-calibration"},  # no duration: refused, one dead letter
        40: {"action": "begin", "name": "meter-calibration", "duration_s": 86400, "models": ["a", "c"], "by": "t"},
        110: {"action": "end", "name": "meter-calibration"},
        170: {"action": "begin", "name": "plant-stop", "duration_s": 86400, "reason": "stop"},
        200: {"action": "end", "name": "plant-stop"},
    }
    msgs = with_commands(plain, plan)
    half = 80 + 2  # after the window for a and c began (two commands before it)
    expected = replay_plain(cfg, msgs)
    assert expected != replay_plain(cfg, plain), "the commands must change the alerts for this test to mean anything"
    workers = {"w1": start_worker(tmp_path, cfg, "w1")}
    try:
        wait_for(lambda: all_held(srv.url, 4), 20, "the worker holding every partition", workers["w1"].text)
        # the first half through the MQTT listener, as a gateway and an operator would send it
        pub = paho.Client(paho.CallbackAPIVersion.VERSION2, client_id="gateway-1")
        pub.connect("127.0.0.1", srv.mqtt_port)
        pub.loop_start()
        for topic, payload in msgs[:half]:
            info = pub.publish(topic, payload, qos=1)
            info.wait_for_publish(5)
            assert info.is_published()
        pub.loop_stop()
        pub.disconnect()
        wait_for(
            lambda: (
                [w["name"] for w in asyncio.run(_worker_status(srv.url, "w1"))["planned_work"]] == ["meter-calibration"]
            ),
            20,
            "w1 showing the window begun",
            workers["w1"].text,
        )
        workers["w1"].kill()  # inside the window: its successor must still hold a and c
        workers["w2"] = start_worker(tmp_path, cfg, "w2")
        wait_for(lambda: all_held(srv.url, 4, by={"w2"}), 20, "w2 holding every partition", workers["w2"].text)
        publish_nats(srv.url, msgs[half:])  # the rest, the end commands too, on NATS subjects
        n = sum(len(v) for v in expected.values())
        wait_for(lambda: len(read_alerts(srv.url, cfg, 0.3)) >= n, 30, f"{n} alerts", workers["w2"].text)
        time.sleep(1.0)
        alerts = read_alerts(srv.url, cfg)
        assert len({a["alert_id"] for a in alerts}) == len(alerts), "an alert raised twice"
        assert {m: alert_keys(v) for m, v in by_model(alerts).items()} == expected
        assert by_model(alerts) == replay_stream(srv.url, cfg)
        notes = [a for a in alerts if "meter-calibration" in (a.get("note") or "")]
        assert notes and {a["model"] for a in notes} <= {"a", "c"}
        assert "planned work 'meter-calibration' ended" in workers["w2"].text()
        assert "planned work 'plant-stop' began" in workers["w2"].text()

        letters = asyncio.run(dead_letters(srv.url))
        assert [(m.headers["Wd-Reason"], m.headers["Wd-Topic"]) for m in letters] == [("bad_command", COMMAND_TOPIC)]

        # the command line: export a's partition (the commands come with it) and replay it
        p = partition_of("a", 4)
        rec, out = tmp_path / "p.jsonl", tmp_path / "p-alerts.jsonl"
        cli = [sys.executable, "-m", "watchdog_edge.cli.app"]
        env = dict(os.environ, PYTHONPATH=str(REPO))
        for args in (
            ["jetstream", "export", "-c", str(cfg), "-o", str(rec), "--partition", str(p)],
            ["replay", str(rec), "-c", str(cfg), "--alerts", str(out), "--quiet"],
        ):
            done = subprocess.run([*cli, *args], capture_output=True, text=True, env=env, timeout=60)
            assert done.returncode == 0, done.stderr
        assert COMMAND_TOPIC in rec.read_text()
        mine = [m for m in MODELS if partition_of(m, 4) == p]
        replayed = [json.loads(line) for line in out.read_text().splitlines()]
        assert [a for a in replayed if a["model"] in mine] == [a for a in alerts if a["model"] in mine]
    finally:
        codes = {"w2": workers["w2"].stop()} if "w2" in workers else {}
        workers["w1"].kill()
        srv.stop()
    assert codes == {"w2": 0}, workers["w2"].text()[-3000:]


@pytest.mark.slow
def test_killed_worker_partitions_are_taken_over_and_alerts_equal_a_replay(tmp_path):
    port = free_port()
    cfg = write_setup(tmp_path, [f"nats://127.0.0.1:{port}"], MODELS, partitions=6)
    srv = NatsServer(tmp_path / "srv", port=port, mappings=mappings_for(cfg), mqtt=False)
    msgs = traffic(MODELS, seed=11)
    workers = {n: start_worker(tmp_path, cfg, n) for n in ("w1", "w2", "w3")}
    try:
        wait_for(
            lambda: all_held(srv.url, 6) and len(set(leases(srv.url).values())) == 3,
            20,
            "three workers sharing six partitions",
            lambda: leases(srv.url),
        )
        half = len(msgs) // 2
        publish_nats(srv.url, msgs[:half])
        # kill one while it has the first half's messages fed but not yet acknowledged
        time.sleep(0.4)
        held = leases(srv.url)
        victim = "w2"
        lost = sorted(k for k, v in held.items() if v == victim)
        workers[victim].kill()
        t0 = time.monotonic()
        took = wait_for(
            lambda: all_held(srv.url, 6, by={"w1", "w3"}), 15, f"{lost} taken over", lambda: leases(srv.url)
        )
        publish_nats(srv.url, msgs[half:])
        expected = replay_plain(cfg, msgs)
        n = sum(len(v) for v in expected.values())
        wait_for(lambda: len(read_alerts(srv.url, cfg, 0.3)) >= n, 30, f"{n} alerts")
        time.sleep(0.5)
        alerts = read_alerts(srv.url, cfg)
        print(f"failover: partitions {lost} of the killed worker held again after {took:.2f} s")
        assert time.monotonic() - t0 < 60
        assert len({a["alert_id"] for a in alerts}) == len(alerts), "an alert raised twice"
        assert by_model(alerts) == replay_stream(srv.url, cfg)
        assert {m: alert_keys(v) for m, v in by_model(alerts).items()} == expected
    finally:
        codes = {n: w.stop() for n, w in workers.items() if n != "w2"}
        workers["w2"].kill()
        srv.stop()
    assert codes == {"w1": 0, "w3": 0}, {n: workers[n].text()[-2000:] for n in codes}
    assert "claimed" in workers["w1"].text() + workers["w3"].text()


@pytest.mark.slow
def test_a_single_server_killed_and_restarted_loses_nothing(tmp_path):
    """The consumers' state is in the server's memory: after a restart the holder re-makes them from its snapshots."""
    port = free_port()
    cfg = write_setup(tmp_path, [f"nats://127.0.0.1:{port}"], MODELS)
    srv = NatsServer(tmp_path / "srv", port=port, mappings=mappings_for(cfg), mqtt=False)
    msgs = traffic(MODELS, seed=29)
    w = start_worker(tmp_path, cfg, "w1")
    try:
        wait_for(lambda: all_held(srv.url, 4), 20, "the worker holding every partition", w.text)
        half = len(msgs) // 2
        publish_nats(srv.url, msgs[:half])
        time.sleep(0.3)
        srv.kill()
        srv.start()
        wait_for(lambda: publish_nats(srv.url, []) is None, 20, "the server back")
        publish_nats(srv.url, msgs[half:])
        expected = replay_plain(cfg, msgs)
        n = sum(len(v) for v in expected.values())
        wait_for(lambda: len(read_alerts(srv.url, cfg, 0.3)) >= n, 60, f"{n} alerts", w.text)
        time.sleep(1.0)
        alerts = read_alerts(srv.url, cfg)
        assert len({a["alert_id"] for a in alerts}) == len(alerts), "an alert raised twice"
        assert {m: alert_keys(v) for m, v in by_model(alerts).items()} == expected
        assert by_model(alerts) == replay_stream(srv.url, cfg)
        assert "resuming from its snapshot" in w.text()  # the consumers were re-made
    finally:
        rc = w.stop()
        srv.stop()
    assert rc == 0, w.text()[-3000:]


# --- a three-server cluster ----------------------------------------------------------------
@pytest.mark.slow
def test_cluster_r3_loses_nothing_when_a_server_and_a_worker_die_under_load(tmp_path):
    """Workers started on a cluster with no quorum yet wait for it; then a server and a worker die under load."""
    ports = [free_port() for _ in range(3)]
    urls = [f"nats://127.0.0.1:{p}" for p in ports]
    cfg = write_setup(tmp_path, urls, MODELS, partitions=4, replicas=3, jetstream_extra="start_timeout_s = 90.0")
    # one server of three: it answers, but its JetStream cannot elect a leader until a second
    # one joins, so the workers' first requests to make the streams cannot succeed
    servers = cluster(tmp_path / "cluster", mappings_for(cfg), ports=ports, launch=1)
    workers = {n: start_worker(tmp_path, cfg, n) for n in ("w1", "w2")}
    msgs = traffic(MODELS, seed=5)
    stored: list[int] = []
    errors: list[str] = []

    async def publisher() -> None:
        # a gateway that keeps what it sends until the stream acknowledges it: msg id per record,
        # so a re-send after a lost acknowledgement is dropped by the input stream's duplicate window
        nc = await nats.connect(servers=urls, connect_timeout=2, max_reconnect_attempts=-1, reconnect_time_wait=0.2)
        js = nc.jetstream(timeout=2)
        for i, (topic, payload) in enumerate(msgs):
            for _attempt in range(60):
                try:
                    ack = await js.publish(topic_to_subject(topic), payload, headers={"Nats-Msg-Id": f"rec-{i}"})
                    stored.append(ack.seq)
                    break
                except Exception as e:  # a server going away: try again, same id
                    errors.append(type(e).__name__)
                    await asyncio.sleep(0.2)
            else:
                raise AssertionError(f"record {i} was never stored")
            await asyncio.sleep(0.004)
        await nc.close()

    th = threading.Thread(target=lambda: asyncio.run(publisher()))
    try:
        wait_for(
            lambda: "JetStream not ready" in workers["w1"].text(), 30, "w1 waiting for JetStream", workers["w1"].text
        )
        for srv in servers[1:]:
            srv.start(wait=False)
        wait_for(lambda: all_held(urls[0], 4), 90, "two workers holding four partitions", workers["w1"].text)
        assert all(w.proc.poll() is None for w in workers.values())
        th.start()
        time.sleep(1.0)
        servers[1].kill()  # under load
        time.sleep(0.5)
        workers["w1"].kill()
        th.join(timeout=90)
        assert not th.is_alive()
        assert len(stored) == len(msgs)
        expected = replay_plain(cfg, msgs)
        n = sum(len(v) for v in expected.values())
        wait_for(lambda: len(read_alerts(urls[0], cfg, 0.3)) >= n, 40, f"{n} alerts", workers["w2"].text)
        time.sleep(0.5)
        alerts = read_alerts(urls[0], cfg)
        assert len({a["alert_id"] for a in alerts}) == len(alerts), "an alert raised twice"
        assert {m: alert_keys(v) for m, v in by_model(alerts).items()} == expected
        assert by_model(alerts) == replay_stream(urls[0], cfg)
    finally:
        rc = workers["w2"].stop()
        workers["w1"].kill()
        for s in servers:
            s.stop()
    assert rc == 0, workers["w2"].text()[-3000:]


@pytest.mark.slow
def test_a_paused_worker_that_lost_its_leases_writes_nothing_over_its_successor(tmp_path):
    """SIGSTOP past the lease: the other worker takes over; on SIGCONT the paused one's writes fail and it stands back."""
    port = free_port()
    cfg = write_setup(tmp_path, [f"nats://127.0.0.1:{port}"], MODELS, partitions=4)
    srv = NatsServer(tmp_path / "srv", port=port, mappings=mappings_for(cfg), mqtt=False)
    msgs = traffic(MODELS, seed=23)
    workers = {n: start_worker(tmp_path, cfg, n) for n in ("w1", "w2")}
    try:
        wait_for(
            lambda: all_held(srv.url, 4) and len(set(leases(srv.url).values())) == 2,
            20,
            "two workers sharing four partitions",
            lambda: leases(srv.url),
        )
        half = len(msgs) // 2
        publish_nats(srv.url, msgs[:half])
        time.sleep(0.3)
        os.kill(workers["w1"].proc.pid, signal.SIGSTOP)
        wait_for(lambda: all_held(srv.url, 4, by={"w2"}), 15, "w2 holding every partition", lambda: leases(srv.url))
        publish_nats(srv.url, msgs[half:])
        os.kill(workers["w1"].proc.pid, signal.SIGCONT)
        expected = replay_plain(cfg, msgs)
        n = sum(len(v) for v in expected.values())
        wait_for(lambda: len(read_alerts(srv.url, cfg, 0.3)) >= n, 30, f"{n} alerts")
        time.sleep(1.0)
        alerts = read_alerts(srv.url, cfg)
        assert len({a["alert_id"] for a in alerts}) == len(alerts), "an alert raised twice"
        assert {m: alert_keys(v) for m, v in by_model(alerts).items()} == expected
        assert by_model(alerts) == replay_stream(srv.url, cfg)
        wait_for(
            lambda: "lease lost" in workers["w1"].text() or "wrote its snapshot" in workers["w1"].text(),
            10,
            "w1 standing back",
        )
    finally:
        codes = {n: w.stop() for n, w in workers.items()}
        srv.stop()
    assert codes == {"w1": 0, "w2": 0}, {n: w.text()[-2000:] for n, w in workers.items()}
