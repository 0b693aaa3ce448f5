"""Settings evaluated per minute by ``tune`` on a one-day recording, one worker against one per CPU.

The recording is one simulated day of the dairy-chiller scenario (a prediction every 10 s,
about 13,000 messages). References measured in the same run:

- a full replay of the recording (parse, pair, windows, checks, alerts) with the config as
  written: the cost one more setting would have without the shared parse pass;
- the marginal cost of one added setting inside ``tune``: (time for G settings - time for one
  setting) / (G - 1), with one worker.

Targets: marginal cost <= 1/10 of a full replay; two workers >= 1.6x the settings per minute
of one. Timings are the fastest of ``--repeat`` interleaved rounds; the machine may be shared, so
read the ratios, not the seconds. Every run starts with the core's quantile caches empty, as a
``tune`` command does (rounds in one process would otherwise find them filled).

Then the two-worker ratio again with each run in a new process, as a ``tune`` command runs:
rounds in one process leave the memory earlier runs freed in its heap, where the parse pass
allocates; a worker forked before the parse shares those pages, so the parse copies them
(about 2,700 more page faults per run in one process, 950 more in a new one).

Then the phases of a run (wall time, the fastest of the rounds), the serial share (everything
outside the workers' phase) and the ratio it allows (Amdahl: 1 / (serial + rest / workers)),
and the CPU time the workers spent against one worker's: what parallel running adds.

    python3 bench/tune_speed.py [--hours 24] [--repeat 3] [--grid default|gap]
"""

from __future__ import annotations

import argparse
import functools
import json
import math
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from simulators.bundle import write_bundle
from simulators.generate import simulate
from simulators.scenario import load_scenario
from simulators.tune import _reap as reap
from simulators.tune import default_grid, expand, tune
from watchdog_edge.core import stats, tails
from watchdog_edge.files.configfile import (
    load_config,
    load_monitor,
)
from watchdog_edge.replay.recording import read_recording, replay

GAP_GRID = {
    "window.size_pairs": [60, 120, 240, 480],
    "checks.gap.confidence": [0.9, 0.95, 0.99],
    "checks.gap.warning_tolerance": [0.25, 0.5, 1.0],
}


def cold() -> None:
    """Empty the core's cached quantiles, as in a fresh process."""
    for mod in (stats, tails):
        for v in vars(mod).values():
            if isinstance(v, functools._lru_cache_wrapper):
                v.cache_clear()


def children_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def best_times(fns: dict, repeat: int, clock=time.perf_counter) -> dict[str, float]:
    """The fastest of ``repeat`` rounds for each function, rounds interleaved: on a shared
    machine the minimum is the least disturbed figure, and interleaving spreads any burst of
    load over every measurement alike."""
    times: dict[str, list[float]] = {k: [] for k in fns}
    for _ in range(repeat):
        for k, fn in fns.items():
            cold()
            t = clock()
            fn()
            times[k].append(clock() - t)
    return {k: min(v) for k, v in times.items()}


_FRESH = """
import json, sys, time
from simulators.tune import tune
grid = json.loads(sys.argv[3])
t = time.perf_counter()
tune(sys.argv[1], sys.argv[2], None, grid=grid, workers=int(sys.argv[4]))
print(time.perf_counter() - t)
"""


def fresh_run(config: Path, recording: Path, grid: dict, workers: int) -> float:
    """Wall time of ``tune`` alone in a new Python process, as a ``tune`` command runs it: no
    earlier run has left its freed memory in the process (which a forked worker then shares,
    so that the parse pass, writing into it, copies its pages)."""
    root = str(Path(__file__).resolve().parents[1])
    env = {**os.environ, "PYTHONPATH": root + os.pathsep + os.environ.get("PYTHONPATH", "")}
    out = subprocess.run(
        [sys.executable, "-c", _FRESH, str(config), str(recording), json.dumps(grid), str(workers)],
        env=env,
        capture_output=True,
        text=True,
        check=True,
    )
    return float(out.stdout.split()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hours", type=float, default=24.0)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--grid", choices=["default", "gap"], default="default")
    args = ap.parse_args()
    cpus = os.cpu_count() or 1

    with tempfile.TemporaryDirectory() as tmp:
        run = simulate(load_scenario("dairy-chiller"), seed=1, duration_h=args.hours)
        paths = write_bundle(run, Path(tmp) / "day.jsonl")
        cfg = load_config(paths.config)
        grid = default_grid(cfg) if args.grid == "default" else GAP_GRID
        g = len(expand(grid))
        one = {k: v[:1] for k, v in grid.items()}
        print(
            f"recording: {len(run.messages)} messages over {args.hours:g} h; grid '{args.grid}': {g} settings; "
            f"{cpus} CPUs"
        )

        t = best_times(
            {
                "full": lambda: replay(load_monitor(paths.config), read_recording(paths.recording)),
                "one": lambda: tune(paths.config, paths.recording, None, grid=one, workers=1),
                "g1": lambda: tune(paths.config, paths.recording, None, grid=grid, workers=1),
                "gn": lambda: tune(paths.config, paths.recording, None, grid=grid, workers=cpus),
            },
            args.repeat,
        )
        full, t_one, t_g1, t_gn = t["full"], t["one"], t["g1"], t["gn"]
        # the phases of a run, and the CPU time of the workers (the pool's children)
        phases: dict[int, dict[str, float]] = {}
        cpu: dict[int, float] = {}
        for n in (1, cpus):
            for _ in range(args.repeat):
                cold()
                ph: dict[str, float] = {}
                c0, k0 = time.process_time(), children_cpu()
                tune(paths.config, paths.recording, None, grid=grid, workers=n, timings=ph)
                reap()  # the workers' CPU time counts once they are waited for
                spent = time.process_time() - c0 + children_cpu() - k0
                cpu[n] = min(cpu.get(n, spent), spent)
                if n not in phases or sum(ph.values()) < sum(phases[n].values()):
                    phases[n] = ph
        # the same in-process runs in CPU time of this process: what one added setting costs,
        # whatever else the machine is doing (the pool's children are not in it, so not gn)
        fresh = {1: math.inf, cpus: math.inf}
        for _ in range(args.repeat):
            for n in fresh:
                fresh[n] = min(fresh[n], fresh_run(paths.config, paths.recording, grid, n))
        c = best_times(
            {
                k: v
                for k, v in {
                    "full": lambda: replay(load_monitor(paths.config), read_recording(paths.recording)),
                    "one": lambda: tune(paths.config, paths.recording, None, grid=one, workers=1),
                    "g1": lambda: tune(paths.config, paths.recording, None, grid=grid, workers=1),
                }.items()
            },
            args.repeat,
            clock=time.process_time,
        )

    marginal = (t_g1 - t_one) / (g - 1)
    per_min_1 = g / t_g1 * 60
    per_min_n = g / t_gn * 60
    print(f"full replay (reference)          {full * 1000:8.1f} ms")
    print(f"tune, 1 setting, 1 worker        {t_one * 1000:8.1f} ms")
    print(f"tune, {g} settings, 1 worker      {t_g1 * 1000:8.1f} ms  -> {per_min_1:8.0f} settings/min")
    print(f"tune, {g} settings, {cpus} workers     {t_gn * 1000:8.1f} ms  -> {per_min_n:8.0f} settings/min")
    print(f"added setting / full replay      {marginal / full:8.3f}   (target <= 0.100; wall time)")
    cpu_marginal = (c["g1"] - c["one"]) / (g - 1)
    print(f"added setting / full replay      {cpu_marginal / c['full']:8.3f}   (target <= 0.100; CPU time)")
    print(f"{cpus} workers / 1 worker            {per_min_n / per_min_1:8.2f}x  (target >= 1.6x with 2)")
    print(
        f"the same, each run a new process   {fresh[1] / fresh[cpus]:8.2f}x  ({fresh[1] * 1000:.0f} ms and "
        f"{fresh[cpus] * 1000:.0f} ms: a tune command)"
    )
    p1, pn = phases[1], phases[cpus]
    total1 = sum(p1.values())
    serial = (total1 - p1["workers"]) / total1
    print(
        f"phases of a run, ms (1 worker | {cpus} workers): "
        + ", ".join(f"{k} {p1[k] * 1000:.0f} | {pn[k] * 1000:.0f}" for k in p1)
    )
    print(
        f"serial share of a 1-worker run   {serial:8.3f}   -> at most {1 / (serial + (1 - serial) / cpus):.2f}x with {cpus} workers"
    )
    print(f"workers' phase, {cpus} over 1        {p1['workers'] / pn['workers']:8.2f}x")
    print(f"CPU time of a run, {cpus} workers / 1 {cpu[cpus] / cpu[1]:8.2f}   (1 = parallel running adds nothing)")
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    print(f"load average at the end: {load:.2f} on {cpus} CPUs (other work on the machine takes from the workers)")


if __name__ == "__main__":
    main()
