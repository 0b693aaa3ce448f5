"""The ``page`` command (registered on the main app by ``register``)."""

from __future__ import annotations

import logging
import sys
from pathlib import Path
from typing import Optional

import typer

from watchdog_edge.errors import WatchdogError

PAGE_HELP = """Serve a read-only page of what the agents publish: per model a plot of the live loss with its interval against the expected loss and the warning and critical limits, alerts marked, planned work shaded; every check's level; agents online or offline; the latest alerts with their summaries.

It is a process of its own (the agent stays lean): it subscribes to the broker's retained state, status and alert topics, keeps a bounded history in SQLite (--keep-days, --history-max-bytes) and serves the page over HTTP. Everything the page needs ships in the package; nothing is fetched from the internet.

Advisory only: the page shows how far a model's predictions are from measured values; it is not a protection or safety system, and what to do about the equipment is for your site's rules and qualified people to decide.

It binds to 127.0.0.1 by default. To reach it from other machines give --bind with an address, --allow-remote, and a secret in a file or environment variable (--secret-file, --secret-env): every request then needs it as the HTTP Basic password of --user, or as a bearer token. Add --tls-cert and --tls-key so that the secret does not cross the network in clear text.

\b
Examples:
  watchdog-edge page --config config.toml
  watchdog-edge page --broker 127.0.0.1:1883 --port 8470
  watchdog-edge page --config config.toml --bind 0.0.0.0 --allow-remote \\
      --secret-file /etc/watchdog-edge/page-secret \\
      --tls-cert page.crt --tls-key page.key
"""


def _fail(message: str, code: int = 2) -> None:
    typer.echo(f"watchdog-edge page: {message}", err=True)
    raise typer.Exit(code)


def page(
    config: Optional[Path] = typer.Option(
        None,
        "--config",
        "-c",
        help="An agent's TOML config: the page uses its broker section (host, port, TLS, user, topic templates).",
    ),
    broker: Optional[str] = typer.Option(
        None, "--broker", help="HOST:PORT of the broker, instead of (or over) the config's; default 127.0.0.1:1883."
    ),
    broker_user: Optional[str] = typer.Option(
        None, "--broker-user", help="Broker user name for the page (a read-only account is enough)."
    ),
    broker_password_file: Optional[Path] = typer.Option(
        None, "--broker-password-file", help="File holding that user's broker password."
    ),
    bind: str = typer.Option("127.0.0.1", "--bind", help="Address to listen on; not loopback needs --allow-remote."),
    port: int = typer.Option(8470, "--port", min=0, max=65535, help="TCP port of the page (0: any free port)."),
    allow_remote: bool = typer.Option(
        False, "--allow-remote", help="Allow a --bind address that other machines can reach (needs a secret)."
    ),
    secret_file: Optional[str] = typer.Option(
        None, "--secret-file", help="File whose first line is the page's password or token."
    ),
    secret_env: Optional[str] = typer.Option(
        None, "--secret-env", help="Environment variable holding the page's password or token."
    ),
    user: str = typer.Option("operator", "--user", help="User name for HTTP Basic when a secret is set."),
    tls_cert: Optional[str] = typer.Option(None, "--tls-cert", help="Serve HTTPS with this certificate (PEM)."),
    tls_key: Optional[str] = typer.Option(None, "--tls-key", help="The certificate's private key (PEM)."),
    history: Path = typer.Option(
        Path("watchdog-page.sqlite"), "--history", help="SQLite file of the page's history (created if missing)."
    ),
    keep_days: float = typer.Option(7.0, "--keep-days", min=0.01, help="Days of history kept."),
    history_max_bytes: int = typer.Option(
        64 * 1024 * 1024,
        "--history-max-bytes",
        min=1_000_000,
        help="Size bound of the history; the oldest rows go first.",
    ),
    log_level: str = typer.Option("info", "--log-level", help="debug, info, warning or error."),
) -> None:
    from watchdog_edge.readers.page import PageOptions, read_broker_settings, run_page

    level = getattr(logging, log_level.upper(), None)
    if not isinstance(level, int):
        _fail(f"--log-level {log_level!r} is not one of debug, info, warning, error")
    logging.basicConfig(level=level, stream=sys.stderr, format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        settings, base_dir = read_broker_settings(config)
    except WatchdogError as e:
        _fail(str(e).replace("\n", " "))
    update: dict[str, object] = {}
    if broker is not None:
        host, sep, port_text = broker.rpartition(":")
        if not sep or not host or not port_text.isdigit() or not 0 < int(port_text) < 65536:
            _fail(f"--broker = {broker!r}: give HOST:PORT, for example 127.0.0.1:1883")
        update.update(host=host.strip("[]"), port=int(port_text))
    password = None
    if broker_user is not None:
        update.update(username=broker_user, password_file=None, password_env=None)
    if broker_password_file is not None:
        try:
            password = broker_password_file.read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as e:
            _fail(f"--broker-password-file = {str(broker_password_file)!r}: cannot read it ({e.strerror})")
    if update:
        settings = settings.model_copy(update=update)
    if password is not None and settings.username is None:
        _fail(
            "--broker-password-file is given but no broker user: add --broker-user (or broker.username in the config)"
        )
    opts = PageOptions(
        broker=settings,
        base_dir=base_dir,
        history_path=history,
        bind=bind,
        port=port,
        allow_remote=allow_remote,
        secret_file=secret_file,
        secret_env=secret_env,
        user=user,
        keep_days=keep_days,
        history_max_bytes=history_max_bytes,
        tls_cert=tls_cert,
        tls_key=tls_key,
        broker_password=password,
    )
    raise typer.Exit(run_page(opts))


def register(app: typer.Typer) -> None:
    """Add ``page`` to the main command line."""
    app.command("page", help=PAGE_HELP)(page)
