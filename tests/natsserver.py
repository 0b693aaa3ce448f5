"""Real nats-server processes for tests: JetStream, an MQTT listener, the workers' subject mappings.

Each server runs on free loopback ports with its own store folder and is stopped by its
process id; it is never the system one on 4222. If nats-server is missing the test fails
(never skips) with the install hint.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import time
from pathlib import Path

import pytest
from broker import free_port, read_log, stop_process

INSTALL_HINT = "apt-get install -y nats-server"


def nats_binary() -> str:
    found = shutil.which("nats-server") or (
        "/usr/sbin/nats-server" if os.path.exists("/usr/sbin/nats-server") else None
    )
    if not found:
        pytest.fail(f"nats-server is not installed; this test needs a real server: {INSTALL_HINT}")
    return found


class NatsServer:
    """One nats-server with JetStream (and optionally MQTT); ``kill()`` and ``start()`` keep ports and data."""

    def __init__(
        self,
        folder: Path,
        name: str = "n1",
        mappings: str = "",
        mqtt: bool = True,
        cluster_port: int | None = None,
        routes: list[int] | None = None,
        port: int | None = None,
        wait: bool = True,
        launch: bool = True,
    ) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.name = name
        self.port = port or free_port()
        self.mqtt_port = free_port() if mqtt else None
        self.url = f"nats://127.0.0.1:{self.port}"
        self.log = folder / "nats.log"
        lines = [
            f"server_name: {name}",
            f"listen: 127.0.0.1:{self.port}",
            f'jetstream {{ store_dir: "{folder / "js"}" }}',
            f'log_file: "{self.log}"',
            "max_payload: 8MB",
        ]
        if self.mqtt_port:
            lines.append(f"mqtt {{ listen: 127.0.0.1:{self.mqtt_port} }}")
        if cluster_port is not None:
            route_urls = ", ".join(f'"nats-route://127.0.0.1:{r}"' for r in routes or [])
            lines.append(f"cluster {{ name: wd, listen: 127.0.0.1:{cluster_port}, routes: [{route_urls}] }}")
        lines.append(mappings)
        self.conf = folder / "nats.conf"
        self.conf.write_text("\n".join(lines) + "\n")
        self.proc: subprocess.Popen | None = None
        if launch:
            self.start(wait=wait)

    def start(self, timeout: float = 10.0, wait: bool = True) -> None:
        self.proc = subprocess.Popen(
            [nats_binary(), "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
        )
        if not wait:
            return
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                err = self.proc.stderr.read().decode(errors="replace") if self.proc.stderr else ""
                pytest.fail(f"nats-server could not start: {err.strip()} {self.log_text()[-800:]} ({INSTALL_HINT})")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.05)
        self.stop()
        pytest.fail(f"nats-server did not listen on port {self.port} within {timeout} s: {self.log_text()[-800:]}")

    def kill(self) -> None:
        """SIGKILL by pid: a crash."""
        if self.proc is not None and self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait(timeout=5)
        self.proc = None

    def stop(self) -> None:
        """SIGTERM by pid, then wait."""
        stop_process(self.proc)
        self.proc = None

    def log_text(self) -> str:
        return read_log(self.log)


def cluster(folder: Path, mappings: str, ports: list[int], launch: int | None = None) -> list[NatsServer]:
    """One server per client port, routed to each other, JetStream clustered (no MQTT listener).

    Only the first ``launch`` servers are started (all when None); ``start()`` the others later.
    """
    size = len(ports)
    cports = [free_port() for _ in range(size)]
    return [
        NatsServer(
            folder / f"n{i + 1}",
            name=f"n{i + 1}",
            mappings=mappings,
            mqtt=False,
            cluster_port=cports[i],
            routes=[c for j, c in enumerate(cports) if j != i],
            port=ports[i],
            wait=False,
            launch=launch is None or i < launch,
        )
        for i in range(size)
    ]
