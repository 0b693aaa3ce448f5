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
            if i % 2 == 0:
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


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--records", type=int, default=1_000_000)
    ap.add_argument("--models", type=int, default=20)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rec = folder / "rec.jsonl"
        write_recording(rec, args.records, args.models)
        cfg = build(folder, args.models)
        n = sum(1 for _ in read_recording(rec))

        t = time.perf_counter()
        for line in read_recording(rec):
            json.loads(line.payload)
        bare = time.perf_counter() - t

        # The replay itself runs in a fresh process, so its peak memory is what a gateway sees.
        out = subprocess.run(
            [sys.executable, "-c", _CHILD, str(cfg), str(rec)],
            capture_output=True,
            text=True,
            check=True,
            cwd=Path(__file__).resolve().parents[1],
        )
        res = json.loads(out.stdout)
    full = res["seconds"]
    print(f"records: {n:,} over {args.models} models; alerts: {res['alerts']}")
    print(f"reference (read + json.loads): {n / bare:,.0f} records/s")
    print(f"replay, default checks:        {n / full:,.0f} records/s  (target >= 100,000)")
    print(f"core cost over the reference:  x{full / bare:.2f}")
    print(f"peak RSS of the replaying process: {res['rss_mb']:.0f} MB (target <= 100 MB)")
    print(f"river or scipy imported: {'yes: ' + ', '.join(res['heavy'][:3]) if res['heavy'] else 'no'}")


_CHILD = """
import json, resource, sys, time
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.files.configfile import load_monitor
from watchdog_edge.replay.recording import read_recording, replay
mon = load_monitor(sys.argv[1])
t = time.perf_counter()
events = replay(mon, read_recording(sys.argv[2]))
seconds = time.perf_counter() - t
heavy = sorted(m for m in sys.modules if m.split(".")[0] in ("river", "scipy"))
print(json.dumps({"seconds": seconds, "alerts": sum(1 for e in events if hasattr(e, "alert_id")),
                  "rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, "heavy": heavy}))
"""


if __name__ == "__main__":
    main()
