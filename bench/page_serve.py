"""Time to serve the page and memory of the page process, with 20 models and 7 days of history.

Everything runs in one go, on a mosquitto started here on a free port:

1. A history file is filled as the page process would fill it: 20 models, one retained state
   a minute for 7 days (201,600 states), 10 alerts per model and a planned-work window on
   every other model.
2. ``watchdog-edge page`` is started on that file (and the broker), and a fresh state per
   model and an agent status are published, so it is also reading live.
3. The page is fetched over HTTP many times with the 7-day span (every state drawn from)
   and with the default 1-day span; the median time of each is taken.
4. The reference: the standard library's own static file server (``python3 -m http.server``),
   in a process of its own, serving a file of the very bytes of the 7-day page, fetched the
   same way. The ratio page / reference says what the page's own work costs over sending
   the same bytes.
5. The page process's resident memory (VmRSS, and the peak VmHWM) after all that.

    python3 bench/page_serve.py [--models 20] [--days 7] [--repeats 15]

Targets (issue 12): the page served in under 1 s; the page process's RSS at most 80 MB.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import shutil
import signal
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO))

from watchdog_edge.core.events import rfc3339  # noqa: E402
from watchdog_edge.readers.history import History  # noqa: E402


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_listening(port: int, proc: subprocess.Popen, what: str, timeout: float = 20.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise SystemExit(f"{what} exited with {proc.returncode}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.05)
    raise SystemExit(f"{what} did not listen on {port} within {timeout} s")


def state(model: str, t: float, live: float, planned: dict | None) -> dict:
    """A retained state shaped as the agent publishes it."""
    fig = {
        "live_loss": live,
        "lower": live * 0.9,
        "upper": live * 1.1,
        "confidence": 0.95,
        "expected_loss": 1.0,
        "warning_limit": 1.25,
        "critical_limit": 2.0,
        "pairs": 500,
        "level": "normal",
    }
    checks = {"gap": {"level": "normal", "figures": fig}}
    for name in ("range", "shift", "feed_stop"):
        checks[name] = {"level": "normal", "figures": {}}
    return {
        "model": model,
        "model_version": "v1",
        "pairs": 500,
        "expected_loss": 1.0,
        "checks": checks,
        "pending": 2,
        "planned_work": planned,
        "agent": "bench",
        "ts": rfc3339(t),
    }


def fill(path: Path, models: int, days: float, now: float) -> int:
    h = History(path, max_age_days=days + 1, max_bytes=1 << 30)
    n = 0
    minutes = int(days * 1440)
    h.db.execute("BEGIN")
    for m in range(models):
        model = f"model-{m:02d}"
        window = None
        if m % 2 == 0:
            a = now - 3 * 86400
            window = {"name": "cleaning", "start": rfc3339(a), "end": rfc3339(a + 3600)}
        for k in range(minutes):
            t = now - (minutes - k) * 60.0
            live = 1.0 + 0.2 * math.sin(k / 97 + m) + 0.1 * math.sin(k / 7)
            in_window = window is not None and now - 3 * 86400 <= t <= now - 3 * 86400 + 3600
            h.add_state(model, t, state(model, t, live, window if in_window else None))
            n += 1
        for j in range(10):
            t = now - (j + 1) * days * 86400 / 11
            h.add_alert(
                {
                    "alert_id": f"{model}-{j}",
                    "model": model,
                    "check": "gap",
                    "state": "raised" if j % 2 else "cleared",
                    "severity": "warning",
                    "summary": "Live mean squared error 1.4 over 500 pairs is above the warning limit 1.25.",
                    "ts": rfc3339(t),
                },
                t,
                model,
            )
    h.db.execute("COMMIT")
    h.close()
    return n


def fetch(url: str) -> tuple[float, int]:
    t0 = time.perf_counter()
    with urllib.request.urlopen(url, timeout=30) as r:
        body = r.read()
    return time.perf_counter() - t0, len(body)


def timed(url: str, repeats: int) -> tuple[float, int]:
    fetch(url)  # warm: connections, caches
    times, size = [], 0
    for _ in range(repeats):
        dt, size = fetch(url)
        times.append(dt)
    return statistics.median(times), size


def cpu_s(pid: int) -> float:
    """User plus system CPU seconds the process has used (proc(5): fields 14 and 15 of /proc/PID/stat)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def timed_with_cpu(url: str, repeats: int, pid: int) -> tuple[float, int, float]:
    """Median wall time, size, and the serving process's CPU seconds per request."""
    fetch(url)
    c0 = cpu_s(pid)
    median, size = timed(url, repeats)
    return median, size, (cpu_s(pid) - c0) / (repeats + 1)


def memory_kb(pid: int) -> dict[str, int]:
    out = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key = line.split(":")[0]
        if key in ("VmRSS", "VmHWM"):
            out[key] = int(line.split()[1])
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--models", type=int, default=20)
    ap.add_argument("--days", type=float, default=7.0)
    ap.add_argument("--repeats", type=int, default=15)
    args = ap.parse_args()
    mosquitto = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
    if not os.path.exists(mosquitto):
        raise SystemExit("mosquitto is missing: apt-get install -y mosquitto")
    env = dict(os.environ, PYTHONPATH=str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    with tempfile.TemporaryDirectory(prefix="page-bench-") as tmp_name:
        tmp = Path(tmp_name)
        now = time.time()
        t0 = time.perf_counter()
        states = fill(tmp / "history.sqlite", args.models, args.days, now)
        size_mb = (tmp / "history.sqlite").stat().st_size / 1e6
        print(f"history: {states:,} states of {args.models} models over {args.days:g} days, {size_mb:.1f} MB file")
        print(f"  filled in {time.perf_counter() - t0:.1f} s")

        bport = free_port()
        conf = tmp / "mosquitto.conf"
        user = "root" if os.geteuid() == 0 else os.environ.get("USER", "")
        conf.write_text(f"listener {bport} 127.0.0.1\nallow_anonymous true\nuser {user}\n")
        procs: list[subprocess.Popen] = []
        try:
            broker = subprocess.Popen([mosquitto, "-c", str(conf)], stderr=subprocess.DEVNULL)
            procs.append(broker)
            wait_listening(bport, broker, "mosquitto")
            pport = free_port()
            page = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "watchdog_edge.cli.app",
                    "page",
                    "--broker",
                    f"127.0.0.1:{bport}",
                    "--port",
                    str(pport),
                    "--history",
                    str(tmp / "history.sqlite"),
                    "--keep-days",
                    str(args.days + 1),
                    "--history-max-bytes",
                    str(1 << 30),
                    "--log-level",
                    "warning",
                ],
                env=env,
                cwd=tmp,
            )
            procs.append(page)
            wait_listening(pport, page, "the page process")
            pub = subprocess.run(
                [
                    "mosquitto_pub",
                    "-p",
                    str(bport),
                    "-r",
                    "-q",
                    "1",
                    "-t",
                    "watchdog/agents/bench/status",
                    "-m",
                    json.dumps({"agent": "bench", "connection": "online", "heartbeat": rfc3339(time.time())}),
                ],
                check=False,
            )
            if pub.returncode == 0:
                for m in range(args.models):
                    model = f"model-{m:02d}"
                    subprocess.run(
                        [
                            "mosquitto_pub",
                            "-p",
                            str(bport),
                            "-r",
                            "-q",
                            "1",
                            "-t",
                            f"watchdog/{model}/state",
                            "-m",
                            json.dumps(state(model, time.time(), 1.05, None)),
                        ],
                        check=True,
                    )
            time.sleep(1.0)
            base = f"http://127.0.0.1:{pport}/"
            week, week_bytes, week_cpu = timed_with_cpu(base + "?span=7d", args.repeats, page.pid)
            day, day_bytes, day_cpu = timed_with_cpu(base + "?span=1d", args.repeats, page.pid)
            with urllib.request.urlopen(base + "?span=7d", timeout=30) as r:
                body = r.read()
            mem = memory_kb(page.pid)

            static_dir = tmp / "static"
            static_dir.mkdir()
            (static_dir / "page.html").write_bytes(body)
            sport = free_port()
            ref = subprocess.Popen(
                [
                    sys.executable,
                    "-m",
                    "http.server",
                    str(sport),
                    "--bind",
                    "127.0.0.1",
                    "--directory",
                    str(static_dir),
                ],
                stdout=subprocess.DEVNULL,
                stderr=subprocess.DEVNULL,
            )
            procs.append(ref)
            wait_listening(sport, ref, "the reference server")
            static, static_bytes, static_cpu = timed_with_cpu(
                f"http://127.0.0.1:{sport}/page.html", args.repeats, ref.pid
            )
        finally:
            for p in reversed(procs):
                if p.poll() is None:
                    os.kill(p.pid, signal.SIGTERM)
                    try:
                        p.wait(10)
                    except subprocess.TimeoutExpired:
                        os.kill(p.pid, signal.SIGKILL)
                        p.wait(5)

    load = os.getloadavg()[0]
    print(
        f"load average while measuring: {load:.1f} on {os.cpu_count()} cores (wall times grow with it; CPU times less)"
    )
    print(
        f"page, 7-day span: {week * 1000:.0f} ms median of {args.repeats}, "
        f"{week_cpu * 1000:.0f} ms CPU per request ({week_bytes / 1e3:.0f} kB)"
    )
    print(
        f"page, 1-day span: {day * 1000:.0f} ms median of {args.repeats}, "
        f"{day_cpu * 1000:.0f} ms CPU per request ({day_bytes / 1e3:.0f} kB)"
    )
    print(
        f"reference, the same 7-day bytes from python3 -m http.server: {static * 1000:.1f} ms, "
        f"{static_cpu * 1000:.1f} ms CPU per request, at the kernel's 10 ms resolution ({static_bytes / 1e3:.0f} kB)"
    )
    print(f"ratio page / reference, wall time: {week / static:.0f} x (7-day), {day / static:.0f} x (1-day)")
    print(f"page process memory: VmRSS {mem['VmRSS'] / 1024:.1f} MB, peak VmHWM {mem['VmHWM'] / 1024:.1f} MB")
    ok_time = week < 1.0
    ok_mem = mem["VmHWM"] / 1024 <= 80
    print(f"target: page served in under 1 s: {'met' if ok_time else 'NOT met'}")
    print(f"target: page process RSS at most 80 MB: {'met' if ok_mem else 'NOT met'}")


if __name__ == "__main__":
    main()
