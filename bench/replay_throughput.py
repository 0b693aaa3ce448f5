"""Records per second through ``replay`` with the default checks, and peak memory.

A synthetic recording of 1,000,000 records over 20 models (predictions with three features,
and a truth for every second prediction a few minutes later) is written to a temporary
folder, then replayed in this process. The reference measured in the same run is the bare
cost of reading the same file and decoding each payload with ``json.loads``: the ratio says
how much the core adds on top of merely reading the recording.

    python3 bench/replay_throughput.py [--records 1000000] [--models 20]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.files.cardfile import save_card
from watchdog_edge.replay.recording import RecordingWriter, read_recording


def write_recording(path: Path, records: int, models: int, seed: int = 1) -> None:
    rng = np.random.default_rng(seed)
    n_pred = int(records / 1.5)
    t0 = 1_780_000_000.0
    with RecordingWriter(path) as w:
        pending: list[tuple[float, str, bytes]] = []
        written = 0
        for i in range(n_pred):
            t = t0 + i * 0.05
            m = i % models
            x = rng.normal(size=3)
            body = {
                "id": i,
                "value": float(x.sum()),
                "features": {"a": float(x[0]), "b": float(x[1]), "c": float(x[2])},
            }
            w.message(round(t, 3), f"bench/m{m}/pred", json.dumps(body).encode())
            written += 1
            if (i // models) % 2 == 0:  # every second prediction of each model (i % 2 gave only even models truths)
                pending.append(
                    (
                        t + 120,
                        f"bench/m{m}/truth",
                        json.dumps({"id": i, "value": float(x.sum() + rng.normal())}).encode(),
                    )
                )
            while pending and pending[0][0] <= t:
                tt, topic, payload = pending.pop(0)
                w.message(round(tt, 3), topic, payload)
                written += 1
            if written >= records:
                break


def build(folder: Path, models: int) -> Path:
    lines = ["[agent]", 'name = "bench"', ""]
    feats = {
        k: {"min": -4.0, "max": 4.0, "histogram": {"edges": [-4, -1, 0, 1, 4], "shares": [0.16, 0.34, 0.34, 0.16]}}
        for k in "abc"
    }
    for m in range(models):
        card = ModelCard(
            model_id=f"m{m}",
            training={"loss": 1.0, "count": 5000},
            fitted_parameters=4,
            least_squares=True,
            holdout={"loss": 1.0, "count": 1000},
            features=feats,
        )
        save_card(card, folder / f"m{m}.json")
        lines += [
            "[[models]]",
            f'id = "m{m}"',
            f'card = "m{m}.json"',
            f'prediction_topic = "bench/m{m}/pred"',
            f'truth_topic = "bench/m{m}/truth"',
            "",
        ]
    cfg = folder / "config.toml"
    cfg.write_text("\n".join(lines))
    return cfg


def references(rec: Path, clock=time.perf_counter) -> tuple[int, float, float]:
    """Records in the file, and seconds to read it and decode each payload with json / orjson."""
    import orjson

    n = 0
    t = clock()
    for line in read_recording(rec):
        json.loads(line.payload)
        n += 1
    with_json = clock() - t
    loads = orjson.loads
    t = clock()
    for line in read_recording(rec):
        loads(line.payload)
    with_orjson = clock() - t
    return n, with_json, with_orjson


def child(code: str, *args: str) -> dict:
    """Run ``code`` in a fresh interpreter, so its peak memory is what a gateway would see."""
    out = subprocess.run(
        [sys.executable, "-c", code, *args],
        capture_output=True,
        text=True,
        check=True,
        cwd=Path(__file__).resolve().parents[1],
    )
    return json.loads(out.stdout)


def headline(records: int, models: int) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rec = folder / "rec.jsonl"
        write_recording(rec, records, models)
        cfg = build(folder, models)
        n, with_json, with_orjson = references(rec)
        res = child(_CHILD, str(cfg), str(rec))
        # the same in CPU time, and the replay once more: on a shared machine the CPU time
        # moves less than the wall time (the best of two runs of each)
        _, cpu_json, cpu_orjson = references(rec, time.process_time)
        again = child(_CHILD, str(cfg), str(rec))
    full = min(res["seconds"], again["seconds"])
    cpu_full = min(res["cpu"], again["cpu"])
    print(f"records: {n:,} over {models} models; alerts: {res['alerts']}")
    print(f"reference, read + json.loads:   {n / with_json:>9,.0f} records/s")
    print(f"floor, read + orjson.loads:     {n / with_orjson:>9,.0f} records/s")
    print(f"replay, default checks:         {n / full:>9,.0f} records/s  (target >= 200,000)")
    print(f"core cost over the orjson floor: x{full / with_orjson:.2f}   (over json.loads: x{full / with_json:.2f})")
    print(
        f"in CPU time: replay {n / cpu_full:,.0f} records/s, floor {n / cpu_orjson:,.0f}: "
        f"x{cpu_full / cpu_orjson:.2f} over the floor (over json.loads: x{cpu_full / cpu_json:.2f})"
    )
    print(f"peak RSS of the replaying process: {max(res['rss_mb'], again['rss_mb']):.0f} MB (target <= 64 MB)")
    print(f"river or scipy imported: {'yes: ' + ', '.join(res['heavy'][:3]) if res['heavy'] else 'no'}")


def curve(model_counts: list[int], per_model: int) -> None:
    """Records/s, peak RSS and memory per model as models are added, at equal records per model."""
    print(f"\nmodels added, {per_model:,} records per model (target: records/s at the most models within 25 % of")
    print("the fewest; at most 50 KB per model held by the core with the default checks)")
    print(
        f"{'models':>7} {'records':>10} {'records/s':>10} {'x orjson':>9} {'peak RSS MB':>12} {'KB/model':>9}  where a model's memory goes (KB)"
    )
    first = None
    held: list[tuple[int, float]] = []  # (models, bytes the core holds, pending records apart)
    for models in model_counts:
        with tempfile.TemporaryDirectory() as tmp:
            folder = Path(tmp)
            rec = folder / "rec.jsonl"
            write_recording(rec, models * per_model, models)
            cfg = build(folder, models)
            n, _, with_orjson = references(rec)
            res = child(_CHILD, str(cfg), str(rec))
            mem = child(_MEMORY, str(cfg), str(rec))
        rate = n / res["seconds"]
        first = first or rate
        held.append((models, mem["per_model"]))
        parts = ", ".join(f"{k} {v / models / 1024:.1f}" for k, v in mem["parts"].items() if v / models >= 256)
        print(
            f"{models:>7} {n:>10,} {rate:>10,.0f} {res['seconds'] / with_orjson:>9.2f} {res['rss_mb']:>12.0f} "
            f"{mem['per_model'] / models / 1024:>9.1f}  {parts}"
        )
    print("KB/model: what the core holds per model after the replay, pending records excluded;")
    print("pending records (waiting for their other half within the horizon) are listed apart, per model.")
    if len(held) >= 2 and held[-1][0] > held[0][0]:
        # What the core holds once (config, shared tables) is spread over few models in the first
        # row: the cost of a model is the growth from the fewest models to the most.
        (m0, b0), (m1, b1) = held[0], held[-1]
        slope = (b1 - b0) / (m1 - m0)
        print(
            f"an added model costs {slope / 1024:.1f} KB (from {m0} to {m1} models); held once for all: "
            f"{(b0 - slope * m0) / 1024:.0f} KB"
        )


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--records", type=int, default=1_000_000, help="records in the headline run")
    ap.add_argument("--models", type=int, default=20, help="models in the headline run")
    ap.add_argument("--curve", default="20,200,1000", help="model counts for the curve, comma-separated ('' to skip)")
    ap.add_argument("--records-per-model", type=int, default=3000, help="records per model in the curve")
    args = ap.parse_args()
    headline(args.records, args.models)
    if args.curve:
        curve([int(x) for x in args.curve.split(",")], args.records_per_model)


_CHILD = """
import json, resource, sys, time
from watchdog_edge.files.configfile import load_monitor
from watchdog_edge.replay.recording import read_recording, replay
mon = load_monitor(sys.argv[1])
alerts = 0
def count(ev):
    global alerts
    alerts += hasattr(ev, "alert_id")
t, c = time.perf_counter(), time.process_time()
replay(mon, read_recording(sys.argv[2]), on_event=count, keep=False)
seconds, cpu = time.perf_counter() - t, time.process_time() - c
heavy = sorted(m for m in sys.modules if m.split(".")[0] in ("river", "scipy"))
print(json.dumps({"seconds": seconds, "cpu": cpu, "alerts": alerts,
                  "rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, "heavy": heavy}))
"""

# Where the memory goes: tracemalloc over building the core and replaying, grouped by the part
# of the core whose code allocated it (slow, so in a run of its own).
_MEMORY = """
import json, sys, tracemalloc
from watchdog_edge.files.configfile import load_config, load_cards
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.replay.recording import read_recording
cfg = load_config(sys.argv[1]); cards = load_cards(cfg)
tracemalloc.start(12)
mon = Monitor(cfg, cards)
for line in read_recording(sys.argv[2]):
    mon.feed(line.topic, line.payload, line.t)
snap = tracemalloc.take_snapshot()
del line
parts = {}
pending = 0
for st in snap.statistics("traceback"):
    names = [f.filename for f in st.traceback]  # oldest frame first
    if any("importlib" in n for n in names):
        continue  # a check module imported on first use: once per process, not per model
    ours = [n.split("/watchdog_edge/")[1] for n in names if "/watchdog_edge/" in n]
    if not ours or ours[-1].startswith("replay/"):
        continue  # the line being read, and the reader's own buffers
    if any(n.startswith(("core/pairing", "core/parsing")) for n in ours):
        pending += st.size  # waiting records, their ids and values
        continue
    where = ours[-1].removesuffix(".py").replace("core/checks/", "").replace("core/", "")
    parts[where] = parts.get(where, 0) + st.size
parts = dict(sorted(parts.items(), key=lambda kv: -kv[1]))
parts["pending records"] = pending
print(json.dumps({"per_model": sum(v for k, v in parts.items() if k != "pending records"), "parts": parts}))
"""


if __name__ == "__main__":
    main()
