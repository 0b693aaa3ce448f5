"""A real mosquitto for tests: free port, generated config, TLS material, password file.

The broker is started by the test and stopped by its process id; it is never the system one on
port 1883. If mosquitto is missing the test fails (never skips) with the install hint.
"""

from __future__ import annotations

import datetime as dt
import getpass
import ipaddress
import os
import shutil
import signal
import socket
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path

import pytest

INSTALL_HINT = "apt-get install -y mosquitto mosquitto-clients"


def stop_process(proc: subprocess.Popen | None) -> None:
    """SIGTERM a test server by pid (mosquitto saves its persistence file then), SIGKILL after 10 s."""
    if proc is None or proc.poll() is not None:
        return
    os.kill(proc.pid, signal.SIGTERM)
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait(timeout=5)


def read_log(path: Path) -> str:
    """A server's log so far ('' before it wrote one)."""
    try:
        return path.read_text(errors="replace")
    except FileNotFoundError:
        return ""


def free_port() -> int:
    """A TCP port nobody listens on right now (the OS picks it)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def mosquitto_binary() -> str:
    found = shutil.which("mosquitto") or ("/usr/sbin/mosquitto" if os.path.exists("/usr/sbin/mosquitto") else None)
    if not found:
        pytest.fail(f"mosquitto is not installed; this test needs a real broker: {INSTALL_HINT}")
    return found


# --- TLS material --------------------------------------------------------------------------
@dataclass(frozen=True)
class TLSFiles:
    ca: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path


def make_tls(folder: Path, name: str = "test", server_host: str = "localhost") -> TLSFiles:
    """A CA, a server certificate for ``server_host`` (and 127.0.0.1) and a client certificate."""
    folder.mkdir(parents=True, exist_ok=True)
    try:
        return _make_tls_cryptography(folder, name, server_host)
    except ImportError:
        return _make_tls_openssl(folder, name, server_host)


def _make_tls_cryptography(folder: Path, name: str, server_host: str) -> TLSFiles:
    from cryptography import x509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec
    from cryptography.x509.oid import ExtendedKeyUsageOID, NameOID

    now = dt.datetime.now(dt.timezone.utc)

    def key():
        return ec.generate_private_key(ec.SECP256R1())

    def write_key(k, path: Path) -> None:
        path.write_bytes(
            k.private_bytes(serialization.Encoding.PEM, serialization.PrivateFormat.PKCS8, serialization.NoEncryption())
        )

    def subject(cn: str):
        return x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn)])

    ca_key = key()
    ca_cert = (
        x509.CertificateBuilder()
        .subject_name(subject(f"{name} CA"))
        .issuer_name(subject(f"{name} CA"))
        .public_key(ca_key.public_key())
        .serial_number(x509.random_serial_number())
        .not_valid_before(now - dt.timedelta(minutes=5))
        .not_valid_after(now + dt.timedelta(days=2))
        .add_extension(x509.BasicConstraints(ca=True, path_length=None), critical=True)
        .add_extension(
            x509.KeyUsage(
                digital_signature=True,
                key_cert_sign=True,
                crl_sign=True,
                content_commitment=False,
                key_encipherment=False,
                data_encipherment=False,
                key_agreement=False,
                encipher_only=False,
                decipher_only=False,
            ),
            critical=True,
        )
        .sign(ca_key, hashes.SHA256())
    )

    def leaf(cn: str, server: bool):
        k = key()
        b = (
            x509.CertificateBuilder()
            .subject_name(subject(cn))
            .issuer_name(ca_cert.subject)
            .public_key(k.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5))
            .not_valid_after(now + dt.timedelta(days=2))
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .add_extension(
                x509.ExtendedKeyUsage([ExtendedKeyUsageOID.SERVER_AUTH if server else ExtendedKeyUsageOID.CLIENT_AUTH]),
                critical=False,
            )
        )
        if server:
            b = b.add_extension(
                x509.SubjectAlternativeName(
                    [x509.DNSName(server_host), x509.IPAddress(ipaddress.ip_address("127.0.0.1"))]
                ),
                critical=False,
            )
        return k, b.sign(ca_key, hashes.SHA256())

    files = TLSFiles(
        folder / f"{name}-ca.crt",
        folder / f"{name}-server.crt",
        folder / f"{name}-server.key",
        folder / f"{name}-client.crt",
        folder / f"{name}-client.key",
    )
    files.ca.write_bytes(ca_cert.public_bytes(serialization.Encoding.PEM))
    sk, sc = leaf(server_host, True)
    write_key(sk, files.server_key)
    files.server_cert.write_bytes(sc.public_bytes(serialization.Encoding.PEM))
    ck, cc = leaf(f"{name}-client", False)
    write_key(ck, files.client_key)
    files.client_cert.write_bytes(cc.public_bytes(serialization.Encoding.PEM))
    return files


def _make_tls_openssl(folder: Path, name: str, server_host: str) -> TLSFiles:
    openssl = shutil.which("openssl")
    if not openssl:
        pytest.fail(
            "neither the 'cryptography' package nor the openssl binary is available to make test "
            "certificates: pip install cryptography"
        )
    files = TLSFiles(
        folder / f"{name}-ca.crt",
        folder / f"{name}-server.crt",
        folder / f"{name}-server.key",
        folder / f"{name}-client.crt",
        folder / f"{name}-client.key",
    )
    ca_key = folder / f"{name}-ca.key"

    def run(*args: str) -> None:
        subprocess.run([openssl, *args], check=True, capture_output=True, cwd=folder)

    run(
        "req",
        "-x509",
        "-newkey",
        "rsa:2048",
        "-nodes",
        "-days",
        "2",
        "-subj",
        f"/CN={name} CA",
        "-keyout",
        str(ca_key),
        "-out",
        str(files.ca),
    )
    for cn, key, crt, ext in (
        (
            server_host,
            files.server_key,
            files.server_cert,
            f"subjectAltName=DNS:{server_host},IP:127.0.0.1\nextendedKeyUsage=serverAuth",
        ),
        (f"{name}-client", files.client_key, files.client_cert, "extendedKeyUsage=clientAuth"),
    ):
        csr = folder / f"{cn}.csr"
        extfile = folder / f"{cn}.ext"
        extfile.write_text(ext + "\n")
        run("req", "-newkey", "rsa:2048", "-nodes", "-subj", f"/CN={cn}", "-keyout", str(key), "-out", str(csr))
        run(
            "x509",
            "-req",
            "-in",
            str(csr),
            "-CA",
            str(files.ca),
            "-CAkey",
            str(ca_key),
            "-CAcreateserial",
            "-days",
            "2",
            "-extfile",
            str(extfile),
            "-out",
            str(crt),
        )
    return files


def make_password_file(path: Path, users: dict[str, str]) -> Path:
    """A mosquitto password file made by mosquitto_passwd (hashed, as the broker expects)."""
    tool = shutil.which("mosquitto_passwd")
    if not tool:
        pytest.fail(f"mosquitto_passwd is not installed: {INSTALL_HINT}")
    path.write_text("")
    for user, password in users.items():
        subprocess.run([tool, "-b", str(path), user, password], check=True, capture_output=True)
    os.chmod(path, 0o600)
    return path


# --- the broker ----------------------------------------------------------------------------
class Broker:
    """One mosquitto process on a free port; ``stop()`` and ``start()`` keep port and data.

    Persistence is on (sessions and queued QoS 1 messages survive a restart), as the deploy
    notes advise for the field.
    """

    def __init__(
        self,
        folder: Path,
        tls: TLSFiles | None = None,
        passwords: dict[str, str] | None = None,
        require_client_cert: bool = False,
        max_queued: int = 10000,
        acl: str | None = None,
    ) -> None:
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.port = free_port()
        self.host = "127.0.0.1"
        self.tls = tls
        self.proc: subprocess.Popen | None = None
        self.log = folder / "mosquitto.log"
        lines = [
            "per_listener_settings false",
            # run as whoever runs the tests (as root mosquitto would switch to user
            # 'mosquitto', which cannot read the test's temporary folder)
            f"user {getpass.getuser()}",
            f"listener {self.port} 127.0.0.1",
            "persistence true",
            f"persistence_location {folder}/",
            "autosave_interval 1",
            f"max_queued_messages {max_queued}",
            "max_inflight_messages 20",
            f"log_dest file {self.log}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
            "connection_messages true",
        ]
        if passwords:
            pw = make_password_file(folder / "passwords", passwords)
            lines += ["allow_anonymous false", f"password_file {pw}"]
        else:
            lines += ["allow_anonymous true"]
        if acl is not None:
            acl_path = folder / "acl"
            acl_path.write_text(acl)
            lines.append(f"acl_file {acl_path}")
        if tls is not None:
            lines += [
                f"cafile {tls.ca}",
                f"certfile {tls.server_cert}",
                f"keyfile {tls.server_key}",
                "tls_version tlsv1.2",
            ]
            if require_client_cert:
                lines += ["require_certificate true"]
        self.conf = folder / "mosquitto.conf"
        self.conf.write_text("\n".join(lines) + "\n")
        self.start()

    def start(self, timeout: float = 10.0) -> None:
        exe = mosquitto_binary()
        self.proc = subprocess.Popen([exe, "-c", str(self.conf)], stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                err = self.proc.stderr.read().decode(errors="replace") if self.proc.stderr else ""
                pytest.fail(
                    f"mosquitto could not start on port {self.port}: {err.strip()} {self.log_text()[-800:]}"
                    f" (is it installed? {INSTALL_HINT})"
                )
            try:
                with socket.create_connection((self.host, self.port), timeout=0.2):
                    return
            except OSError:
                time.sleep(0.05)
        self.stop()
        pytest.fail(f"mosquitto did not listen on port {self.port} within {timeout} s: {self.log_text()[-800:]}")

    def stop(self) -> None:
        """SIGTERM by pid (mosquitto saves its persistence file), then wait."""
        stop_process(self.proc)
        self.proc = None

    def log_text(self) -> str:
        return read_log(self.log)

    def __enter__(self) -> Broker:
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop()
