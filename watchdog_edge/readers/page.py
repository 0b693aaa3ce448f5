"""The page process: MQTT in (retained states, statuses, alerts), a bounded history, a read-only page out.

The rules of this file:

1. It only reads. It subscribes to the broker's state, status and alert topics (filters made
   from the same topic templates the agent publishes with) and publishes nothing. Its HTTP
   server answers GET and HEAD only; every other method gets 405. The page holds no form and
   its content security policy forbids form submission and every resource not served by it.
2. It binds to 127.0.0.1 unless told otherwise. A bind address that is not loopback needs
   ``allow_remote`` and a secret (a password file or environment variable); the log says the
   page is reachable from other machines and how requests are checked. With a secret, every
   request needs it: as the HTTP Basic password (RFC 7617) of the configured user, or as a
   bearer token (``Authorization: Bearer``, RFC 6750). Secrets never come from the command line.
3. Threads: paho's network thread writes the history (under the history's lock); the HTTP
   server answers each request in its own thread with its own read-only SQLite connection;
   the main thread prunes the history once a minute and waits for SIGTERM or SIGINT.
4. The broker may be away: the page still serves what the history holds and says that it is
   not connected; paho reconnects with a growing delay.
"""

from __future__ import annotations

import base64
import hmac
import ipaddress
import json
import logging
import os
import re
import signal
import socket
import ssl
import sys
import threading
import time
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from importlib import resources
from pathlib import Path
from typing import Any
from urllib.parse import parse_qs, urlsplit

from watchdog_edge import __version__
from watchdog_edge.agent.link import client_tls
from watchdog_edge.core.settings import BrokerSettings, TopicTemplates
from watchdog_edge.errors import BrokerError, ConfigError
from watchdog_edge.readers.history import History, number, parse_time
from watchdog_edge.readers.render import CAUTION, DEFAULT_SPAN, SPANS, esc, full_page, main_part, utc

log = logging.getLogger("watchdog_edge.readers.page")

DEFAULT_PORT = 8470
PRUNE_EVERY_S = 60.0
_LOG_EVERY_S = 60.0
MAX_PAYLOAD_BYTES = 1_000_000  # far above any state, status or alert an agent publishes


# --- binding and secrets -------------------------------------------------------------------
def is_loopback(host: str) -> bool:
    """True for a loopback address (127.0.0.0/8, ::1) or the name ``localhost``.

    >>> is_loopback("127.0.0.1"), is_loopback("::1"), is_loopback("0.0.0.0"), is_loopback("localhost")
    (True, True, False, True)
    """
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        return False


def read_secret(secret_file: str | Path | None, secret_env: str | None) -> str | None:
    """The page's password or token from a file (first line) or an environment variable."""
    if secret_file and secret_env:
        raise ConfigError("--secret-file and --secret-env are both given; give one of them")
    if secret_file:
        p = Path(secret_file).expanduser()
        try:
            value = p.read_text(encoding="utf-8").splitlines()[0] if p.stat().st_size else ""
        except OSError as e:
            raise ConfigError(
                f"--secret-file = {str(secret_file)!r}: cannot read it ({e.strerror}); fix the path"
            ) from None
        if not value:
            raise ConfigError(
                f"--secret-file = {str(secret_file)!r}: the file is empty; write the secret on its first line"
            )
        return value
    if secret_env:
        env_value = os.environ.get(secret_env)
        if not env_value:
            raise ConfigError(
                f"--secret-env = {secret_env!r}: that environment variable is not set or empty; export it first"
            )
        return env_value
    return None


def check_bind(host: str, allow_remote: bool, secret: str | None) -> None:
    """Refuse a bind that is not loopback unless ``allow_remote`` and a secret are both given.

    >>> check_bind("127.0.0.1", False, None)
    >>> check_bind("0.0.0.0", False, "s")
    Traceback (most recent call last):
    ...
    watchdog_edge.errors.ConfigError: --bind = '0.0.0.0': not a loopback address, so other machines could reach the page; add --allow-remote to mean it, with --secret-file or --secret-env for a password
    """
    if is_loopback(host):
        return
    if not allow_remote:
        raise ConfigError(
            f"--bind = {host!r}: not a loopback address, so other machines could reach the page; "
            "add --allow-remote to mean it, with --secret-file or --secret-env for a password"
        )
    if not secret:
        raise ConfigError(
            f"--bind = {host!r} with --allow-remote: a page reachable from other machines needs a password "
            "or token; give --secret-file or --secret-env"
        )


class Gate:
    """Checks the ``Authorization`` header against the secret (constant-time comparisons).

    >>> g = Gate("s3cret", user="operator")
    >>> g.allows(None), g.allows("Bearer s3cret"), g.allows("Basic " + base64.b64encode(b"operator:s3cret").decode())
    (False, True, True)
    >>> Gate(None).allows(None)
    True
    """

    def __init__(self, secret: str | None, user: str = "operator") -> None:
        self.secret = secret.encode() if secret else None
        self.user = user.encode()

    def allows(self, header: str | None) -> bool:
        """True when no secret is set, or the header carries it."""
        if self.secret is None:
            return True
        if not header:
            return False
        scheme, _, value = header.strip().partition(" ")
        value = value.strip()
        if scheme.lower() == "bearer":
            return hmac.compare_digest(value.encode(), self.secret)
        if scheme.lower() == "basic":
            try:
                decoded = base64.b64decode(value, validate=True)
            except ValueError:
                return False
            user, sep, password = decoded.partition(b":")
            ok_user = hmac.compare_digest(user, self.user)
            ok_password = hmac.compare_digest(password, self.secret)
            return bool(sep) and ok_user and ok_password
        return False


# --- MQTT in ---------------------------------------------------------------------------------
class TopicShape:
    """A topic template (``watchdog/{model}/state``) as a subscription filter and a matcher.

    >>> s = TopicShape("watchdog/agents/{agent}/status")
    >>> s.filter, s.match("watchdog/agents/gw-1/status"), s.match("watchdog/m/state")
    ('watchdog/agents/+/status', {'agent': 'gw-1'}, None)
    """

    def __init__(self, template: str) -> None:
        self.template = template
        levels = template.split("/")
        self.filter = "/".join("+" if "{" in lv else lv for lv in levels)
        pattern = re.escape(template)
        for key in ("model", "agent"):
            pattern = pattern.replace(re.escape("{" + key + "}"), f"(?P<{key}>[^/]+)", 1)
            pattern = pattern.replace(re.escape("{" + key + "}"), f"(?P={key})")
        self.regex = re.compile(pattern + r"\Z")

    def match(self, topic: str) -> dict[str, str] | None:
        """The template's fields in ``topic``, or None when the topic is not of this shape."""
        m = self.regex.match(topic)
        return m.groupdict() if m else None


class Intake:
    """Turns received messages into history rows; counts and (at most once a minute) logs what it cannot use."""

    def __init__(self, history: History, topics: TopicTemplates) -> None:
        self.history = history
        self.status = TopicShape(topics.status)
        self.state = TopicShape(topics.state)
        self.alerts = TopicShape(topics.alerts)
        self.counts: dict[str, int] = {"states": 0, "alerts": 0, "statuses": 0}
        self.bad: dict[str, int] = {}
        self._logged: dict[str, float] = {}

    def filters(self) -> list[str]:
        """The subscription filters, without repeats."""
        out: list[str] = []
        for s in (self.status, self.state, self.alerts):
            if s.filter not in out:
                out.append(s.filter)
        return out

    def _bad(self, reason: str, topic: str) -> str:
        self.bad[reason] = self.bad.get(reason, 0) + 1
        now = time.monotonic()
        if now - self._logged.get(reason, -_LOG_EVERY_S) >= _LOG_EVERY_S:
            self._logged[reason] = now
            log.warning("message on %s left out (%s); logged once a minute per reason", topic, reason)
        return "bad"

    def message(self, topic: str, payload: bytes, received: float) -> str:
        """Keep what one message says; returns what it was: ``state``, ``alert``, ``status``, ``cleared``, ``bad`` or ``other``."""
        kind, fields = "other", None
        for shape, name in ((self.status, "status"), (self.state, "state"), (self.alerts, "alert")):
            fields = shape.match(topic)
            if fields is not None:
                kind = name
                break
        if fields is None:
            return "other"
        if not payload:  # a retained message being cleared
            if kind == "status" and "agent" in fields:
                self.history.forget_agent(fields["agent"])
            return "cleared"
        if len(payload) > MAX_PAYLOAD_BYTES:
            return self._bad("oversize", topic)
        try:
            data = json.loads(payload)
        except (ValueError, UnicodeDecodeError):
            return self._bad("not_json", topic)
        if not isinstance(data, dict):
            return self._bad("not_object", topic)
        if kind == "status":
            agent = data.get("agent") if isinstance(data.get("agent"), str) else fields.get("agent")
            if not agent:
                return self._bad("no_agent", topic)
            self.history.set_status(agent[:200], received, data)
            self.counts["statuses"] += 1
            return kind
        model = data.get("model") if isinstance(data.get("model"), str) else fields.get("model")
        if not model:
            return self._bad("no_model", topic)
        t = parse_time(data.get("ts"))
        t = received if t is None else t
        if kind == "state":
            agent = data.get("agent") if isinstance(data.get("agent"), str) else fields.get("agent")
            self.history.add_state(model[:200], t, data, agent)
            self.counts["states"] += 1
            return kind
        if not isinstance(data.get("alert_id"), str):
            return self._bad("no_alert_id", topic)
        self.history.add_alert(data, t, model[:200])
        self.counts["alerts"] += 1
        return kind


class Listener:
    """A clean-session, subscribe-only MQTT client on paho's own network thread."""

    def __init__(self, settings: BrokerSettings, base_dir: Path, intake: Intake, password: str | None) -> None:
        import paho.mqtt.client as paho
        from paho.mqtt.enums import CallbackAPIVersion, MQTTProtocolVersion

        self.settings = settings
        self.intake = intake
        self.connected = threading.Event()
        self.since = time.time()  # of the latest change of ``connected``
        self.last_problem = "not connected yet"
        self.closing = False
        v5 = settings.protocol == "5"
        kwargs: dict[str, Any] = dict(
            callback_api_version=CallbackAPIVersion.VERSION2,
            client_id=f"watchdog-edge-page-{socket.gethostname()[:40]}-{os.getpid()}",
            protocol=MQTTProtocolVersion.MQTTv5 if v5 else MQTTProtocolVersion.MQTTv311,
        )
        if not v5:
            kwargs["clean_session"] = True
        c = paho.Client(**kwargs)
        client_tls(c, settings, base_dir)
        if settings.username is not None:
            c.username_pw_set(settings.username, password)
        c.reconnect_delay_set(min_delay=1, max_delay=30)
        c.on_connect = self._on_connect
        c.on_disconnect = self._on_disconnect
        c.on_message = self._on_message
        self.client = c

    def start(self) -> None:
        """Connect in the background; paho keeps reconnecting while the broker is away."""
        s = self.settings
        self.client.connect_async(s.host, s.port, keepalive=s.keepalive_s)
        self.client.loop_start()

    def stop(self) -> None:
        """Disconnect and end paho's thread."""
        self.closing = True
        try:
            self.client.disconnect()
        finally:
            self.client.loop_stop()

    def _on_connect(self, client: Any, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        s = self.settings
        if reason_code.is_failure:
            self.last_problem = f"broker at {s.host}:{s.port} refused the page: {reason_code}"
            log.error("%s; check the broker user and password the page uses", self.last_problem)
            return
        for flt in self.intake.filters():
            client.subscribe(flt, qos=1)
        self.connected.set()
        self.since = time.time()
        log.info("connected to the broker at %s:%d; reading %s", s.host, s.port, ", ".join(self.intake.filters()))

    def _on_disconnect(self, client: Any, userdata: Any, flags: Any, reason_code: Any, properties: Any) -> None:
        if self.connected.is_set():
            self.connected.clear()
            self.since = time.time()
            self.last_problem = f"connection lost ({reason_code})"
            if self.closing:
                return
            log.warning("lost the broker (%s); reconnecting; the page shows what it kept meanwhile", reason_code)

    def _on_message(self, client: Any, userdata: Any, msg: Any) -> None:
        try:
            self.intake.message(msg.topic, msg.payload, time.time())
        except Exception:  # a history write failing must not end paho's thread
            log.exception("could not keep a message from %s", msg.topic)

    def note(self) -> str:
        """An HTML line for the page when not connected (empty when connected)."""
        if self.connected.is_set():
            return ""
        s = self.settings
        return (
            f'<p class="caution broker-away">Not connected to the broker at {esc(s.host)}:{s.port} since '
            f"{esc(utc(self.since))} UTC ({esc(self.last_problem)}): what this page shows may be out of date.</p>"
        )


# --- HTTP out --------------------------------------------------------------------------------
SECURITY_HEADERS = {
    "Content-Security-Policy": (
        "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; "
        "base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
    ),
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-store",
}
STATIC_TYPES = {".js": "text/javascript; charset=utf-8", ".css": "text/css; charset=utf-8", ".svg": "image/svg+xml"}


def static_files() -> dict[str, bytes]:
    """The page's script, stylesheet and icon, read from the package."""
    root = resources.files("watchdog_edge.readers") / "static"
    return {f"/static/{name}": (root / name).read_bytes() for name in ("page.js", "page.css", "icon.svg")}


@dataclass
class PageApp:
    """What a request handler needs: the history, the gate, the listener's state, the static files."""

    history: History
    gate: Gate
    listener: Listener | None = None
    static: dict[str, bytes] = field(default_factory=static_files)
    nonce: str = field(default_factory=lambda: f"{os.getpid():x}{int(time.time()):x}")
    realm: str = "watchdog-edge page"

    def version(self) -> str:
        """Changes whenever the history or the broker connection changes."""
        connected = "c" if self.listener is None or self.listener.connected.is_set() else "d"
        return f"{self.nonce}.{self.history.version}.{connected}"

    def note(self) -> str:
        return self.listener.note() if self.listener is not None else ""

    def footer(self) -> str:
        with self.history.reader() as r:
            c = r.counts()
        reading = ""
        if self.listener is not None:
            s = self.listener.settings
            bad = sum(self.listener.intake.bad.values())
            reading = f"Reading the broker at {esc(s.host)}:{s.port}" + (
                f"; {bad} messages left out as unusable (see the log). " if bad else ". "
            )
        return (
            reading + f"History: {c['states']} states and {c['alerts']} alerts kept, {c['bytes'] / 1e6:.1f} MB of "
            f"{self.history.max_bytes / 1e6:.0f} MB, at most {self.history.max_age_s / 86400:g} days. "
            f"watchdog-edge {esc(__version__)}. "
        )


class Handler(BaseHTTPRequestHandler):
    """GET and HEAD for the page, its fragment, its version, a JSON summary and its static files."""

    server_version = "watchdog-edge-page"
    protocol_version = "HTTP/1.1"
    timeout = 30  # seconds an idle kept-alive connection may hold its thread

    def version_string(self) -> str:
        return self.server_version

    @property
    def app(self) -> PageApp:
        return self.server.app  # type: ignore[attr-defined]

    def log_message(self, format: str, *args: Any) -> None:
        log.debug("%s " + format, self.address_string(), *args)

    def _send(self, code: int, body: bytes, ctype: str, extra: dict[str, str] | None = None) -> None:
        self.send_response(code)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        for k, v in SECURITY_HEADERS.items():
            self.send_header(k, v)
        for k, v in (extra or {}).items():
            self.send_header(k, v)
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _refuse_write(self) -> None:
        # The request's body is not read, so the connection cannot carry another request.
        self.close_connection = True
        self._send(
            405,
            b"This page only reads: use GET.\n",
            "text/plain; charset=utf-8",
            {"Allow": "GET, HEAD", "Connection": "close"},
        )

    do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _refuse_write

    def do_HEAD(self) -> None:
        self.do_GET()

    def do_GET(self) -> None:
        app = self.app
        if not app.gate.allows(self.headers.get("Authorization")):
            self._send(
                401,
                b"This page needs the password (HTTP Basic) or the token (Authorization: Bearer).\n",
                "text/plain; charset=utf-8",
                {"WWW-Authenticate": f'Basic realm="{app.realm}", charset="UTF-8"'},
            )
            return
        url = urlsplit(self.path)
        query = parse_qs(url.query)
        span = query.get("span", [DEFAULT_SPAN])[0]
        span = span if span in SPANS else DEFAULT_SPAN
        path = url.path
        html_type = "text/html; charset=utf-8"
        if path in app.static:
            ext = path[path.rfind(".") :]
            self._send(200, app.static[path], STATIC_TYPES.get(ext, "application/octet-stream"))
        elif path == "/":
            version = app.version()
            with app.history.reader() as r:
                body = full_page(r, span, version, footer=app.footer()).replace(
                    '<div id="live"', app.note() + '<div id="live"', 1
                )
            self._send(200, body.encode(), html_type)
        elif path == "/fragment":
            version = app.version()
            with app.history.reader() as r:
                body = app.note() + main_part(r, span, time.time(), version)
            self._send(200, body.encode(), html_type)
        elif path == "/api/version":
            self._send(200, json.dumps({"version": app.version()}).encode(), "application/json")
        elif path == "/api/summary":
            self._send(200, json.dumps(summary(app)).encode(), "application/json")
        else:
            self._send(404, b"Not found. The page is at /.\n", "text/plain; charset=utf-8")


def summary(app: PageApp) -> dict[str, Any]:
    """What the page shows, as JSON for scripts: models with their levels, agents, latest alerts."""
    with app.history.reader() as r:
        states = r.latest_states()
        agents = r.agents()
        alerts = r.alerts(limit=20)
    models = {}
    for m, (t, st) in states.items():
        raw = st.get("checks")
        checks: dict[str, Any] = raw if isinstance(raw, dict) else {}
        models[m] = {
            "ts": utc(t),
            "model_version": st.get("model_version"),
            "levels": {n: c.get("level") for n, c in checks.items() if isinstance(c, dict)},
            "expected_loss": number(st.get("expected_loss")),
        }
    return {
        "connected": app.listener.connected.is_set() if app.listener is not None else None,
        "models": models,
        "agents": {
            a: {"connection": st.get("connection"), "heartbeat": st.get("heartbeat")} for a, (_, st) in agents.items()
        },
        "alerts": [
            {
                "alert_id": a.alert_id,
                "ts": utc(a.t),
                "model": a.model,
                "check": a.check,
                "state": a.state,
                "severity": a.severity,
                "summary": a.summary,
            }
            for a in alerts
        ],
    }


class PageServer(ThreadingHTTPServer):
    """The HTTP server; ``app`` is what its handlers read."""

    daemon_threads = True
    allow_reuse_address = True

    def __init__(self, host: str, port: int, app: PageApp, tls: ssl.SSLContext | None = None) -> None:
        self.address_family = socket.AF_INET6 if ":" in host else socket.AF_INET
        self.app = app
        super().__init__((host, port), Handler)
        if tls is not None:
            # the handshake happens in the request's own thread, not in the accepting one
            self.socket = tls.wrap_socket(self.socket, server_side=True, do_handshake_on_connect=False)

    def finish_request(self, request: Any, client_address: Any) -> None:
        if isinstance(request, ssl.SSLSocket):
            try:
                request.settimeout(10.0)
                request.do_handshake()
            except (OSError, ssl.SSLError) as e:
                log.debug("TLS handshake with %s failed: %s", client_address, e)
                return
        super().finish_request(request, client_address)


# --- the process -----------------------------------------------------------------------------
@dataclass
class PageOptions:
    """Everything ``watchdog-edge page`` is told."""

    broker: BrokerSettings
    base_dir: Path
    history_path: Path
    bind: str = "127.0.0.1"
    port: int = DEFAULT_PORT
    allow_remote: bool = False
    secret_file: str | None = None
    secret_env: str | None = None
    user: str = "operator"
    keep_days: float = 7.0
    history_max_bytes: int = 64 * 1024 * 1024
    tls_cert: str | None = None
    tls_key: str | None = None
    broker_password: str | None = None


def read_broker_settings(config: Path | None) -> tuple[BrokerSettings, Path]:
    """The ``[broker]`` section (and the folder its paths are relative to) of an agent's config, or defaults."""
    if config is None:
        return BrokerSettings.model_validate({}), Path.cwd()
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover
        import tomli as tomllib

    from watchdog_edge.core.settings import parse_config
    from watchdog_edge.files.documents import read_document

    data = read_document(config, "config file", tomllib.loads, ConfigError, "TOML")
    cfg = parse_config(data, config.parent, str(config))
    return cfg.broker, cfg.base_dir


class PageProcess:
    """The running page: history, listener, HTTP server; ``run()`` blocks until a signal."""

    def __init__(self, opts: PageOptions) -> None:
        secret = read_secret(opts.secret_file, opts.secret_env)
        check_bind(opts.bind, opts.allow_remote, secret)
        tls_ctx = None
        if opts.tls_cert or opts.tls_key:
            if not (opts.tls_cert and opts.tls_key):
                raise ConfigError("--tls-cert and --tls-key go together; give both or neither")
            tls_ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
            try:
                tls_ctx.load_cert_chain(opts.tls_cert, opts.tls_key)
            except (OSError, ssl.SSLError) as e:
                raise ConfigError(
                    f"--tls-cert = {opts.tls_cert!r}, --tls-key = {opts.tls_key!r}: cannot load them ({e})"
                ) from None
        self.opts = opts
        self.stopping = threading.Event()
        self.history = History(opts.history_path, opts.keep_days, opts.history_max_bytes)
        self.intake = Intake(self.history, opts.broker.topics)
        password = opts.broker_password
        if password is None:
            from watchdog_edge.agent.link import read_password

            password = read_password(opts.broker, opts.base_dir)
        self.listener = Listener(opts.broker, opts.base_dir, self.intake, password)
        self.app = PageApp(self.history, Gate(secret, opts.user), self.listener)
        try:
            self.server = PageServer(opts.bind, opts.port, self.app, tls_ctx)
        except OSError as e:
            self.history.close()
            raise ConfigError(
                f"--bind = {opts.bind!r}, --port = {opts.port}: cannot listen there ({e.strerror or e}); "
                "choose another --port or address"
            ) from None
        self.port = self.server.server_address[1]
        self.secret_set = secret is not None
        self.tls = tls_ctx is not None

    def url(self) -> str:
        """Where the page is served."""
        host = f"[{self.opts.bind}]" if ":" in self.opts.bind else self.opts.bind
        return f"{'https' if self.tls else 'http'}://{host}:{self.port}/"

    def run(self) -> int:
        """Serve until SIGTERM or SIGINT; 0 after a clean stop."""
        opts = self.opts
        log.info("%s", CAUTION)
        if is_loopback(opts.bind):
            log.info("page at %s (read-only; loopback only: reachable from this machine alone)", self.url())
        else:
            log.warning(
                "page at %s (read-only) is reachable from other machines; every request needs the secret, as the "
                "HTTP Basic password of user %r or as a bearer token",
                self.url(),
                opts.user,
            )
            if not self.tls:
                log.warning(
                    "the page is served without TLS: the password crosses the network in clear text; "
                    "give --tls-cert and --tls-key, or reach the page through an SSH tunnel"
                )
        if self.secret_set and is_loopback(opts.bind):
            log.info("every request needs the secret (HTTP Basic user %r, or a bearer token)", opts.user)
        log.info(
            "history in %s: at most %g days and %.0f MB",
            opts.history_path,
            opts.keep_days,
            opts.history_max_bytes / 1e6,
        )
        if threading.current_thread() is threading.main_thread():
            for sig in (signal.SIGTERM, signal.SIGINT):
                signal.signal(sig, lambda *_: self.stopping.set())
        self.history.prune(time.time())
        self.listener.start()
        web = threading.Thread(target=self.server.serve_forever, kwargs={"poll_interval": 0.2}, name="page-http")
        web.start()
        next_prune = time.monotonic() + PRUNE_EVERY_S
        try:
            while not self.stopping.wait(1.0):
                if time.monotonic() >= next_prune:
                    next_prune = time.monotonic() + PRUNE_EVERY_S
                    removed = self.history.prune(time.time())
                    if removed["size"]:
                        log.info("history over its size bound: %d oldest rows removed", removed["size"])
        finally:
            log.info("stopping the page")
            self.server.shutdown()
            web.join(5.0)
            self.server.server_close()
            self.listener.stop()
            self.history.close()
            log.info("page stopped")
        return 0


def run_page(opts: PageOptions) -> int:
    """Start the page process and serve until a signal: 0 after a clean stop, 2 on bad options."""
    try:
        proc = PageProcess(opts)
    except (ConfigError, BrokerError) as e:
        print(f"watchdog-edge page: {e}", file=sys.stderr, flush=True)
        return 2
    return proc.run()
