"""The TOML config: agent, broker and per-model settings, validated on load.

An error names the key, the value and the rule, for example
``models[0] (id 'pump').window.size_pairs = 0: Input should be greater than or equal to 2``.
A key that was renamed is refused with its new name (``renames.CONFIG_RENAMES``).
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, PrivateAttr, ValidationError, field_validator, model_validator

import watchdog_edge.core.checks as registry
from watchdog_edge.core.parsing import FieldMap
from watchdog_edge.core.renames import CONFIG_RENAMES, renamed_messages
from watchdog_edge.core.topics import validate_filter, validate_level
from watchdog_edge.core.validation import error_lines, nested_error
from watchdog_edge.errors import ConfigError


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class AgentSettings(_Strict):
    """The agent itself: its name, where it keeps state, its bounds and timers."""

    name: str = Field("edge-agent", description="Names this agent in alerts and in the status topic.")
    state_dir: str = Field(
        "watchdog-state", description="Folder of the SQLite state file (relative to the config file)."
    )
    max_payload_bytes: int = Field(65536, ge=64, description="Payloads over this size are dead-lettered unparsed.")
    dead_letter_max_count: int = Field(1000, ge=1, description="Dead letters kept at most, oldest dropped first.")
    dead_letter_max_bytes: int = Field(1_048_576, ge=1024, description="Bytes of dead letters kept at most.")
    tick_every_s: float = Field(1.0, gt=0, description="Timer tick of the live agent (feed_stop, age bounds).")
    snapshot_every_s: float = Field(300.0, gt=0, description="How often the core is snapshotted to disk.")
    state_every_s: float = Field(60.0, gt=0, description="How often retained state and status are refreshed.")
    journal_batch_ms: float = Field(
        20.0, gt=0, le=1000, description="Longest wait before a journal batch commits and acks."
    )
    journal_batch_max_messages: int = Field(
        10, ge=1, le=1000, description="Messages per journal batch at most (keep below the broker's inflight window)."
    )
    sqlite_synchronous: Literal["NORMAL", "FULL"] = Field(
        "NORMAL", description="FULL survives a power cut at some write cost."
    )

    @field_validator("name")
    @classmethod
    def _name_level(cls, v: str) -> str:
        validate_level(v, "agent name")
        return v


class TLSSettings(_Strict):
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    verify_hostname: bool = True


class TopicTemplates(_Strict):
    alerts: str = "watchdog/{model}/alerts"
    state: str = "watchdog/{model}/state"
    status: str = "watchdog/agents/{agent}/status"
    planned_work: str = Field(
        default="watchdog/agents/{agent}/commands/planned-work",
        description="Inbound: planned-work commands for this agent; let only operators publish here (deploy/acl).",
    )

    @field_validator("alerts", "state", "status", "planned_work")
    @classmethod
    def _template(cls, v: str) -> str:
        if "+" in v or "#" in v:
            raise ValueError("an outbound topic template must not hold '+' or '#'")
        return v


class BrokerSettings(_Strict):
    """Where the broker is and how to talk to it; secrets come from a file or the environment."""

    host: str = "127.0.0.1"
    port: int = Field(1883, ge=1, le=65535)
    protocol: Literal["3.1.1", "5"] = "3.1.1"
    client_id: str | None = Field(
        None, description="Fixed client id of the persistent session; default watchdog-edge-<agent name>."
    )
    keepalive_s: int = Field(30, ge=5, le=65535, description="MQTT keepalive: seconds between pings when idle.")
    session_expiry_s: int = Field(7 * 86400, ge=0, description="MQTT 5 session expiry interval.")
    username: str | None = None
    password_file: str | None = None
    password_env: str | None = None
    tls: TLSSettings | None = None
    topics: TopicTemplates = TopicTemplates()
    reconnect_min_s: float = Field(0.5, gt=0)
    reconnect_max_s: float = Field(30.0, gt=0)

    @model_validator(mode="after")
    def _one_password_source(self) -> BrokerSettings:
        if self.password_file and self.password_env:
            raise ValueError("give password_file or password_env, not both")
        return self


class JetStreamSettings(_Strict):
    """The JetStream workers (``watchdog-edge jetstream run``): servers, streams, buckets, partitions."""

    servers: list[str] = Field(
        default_factory=lambda: ["nats://127.0.0.1:4222"], min_length=1, description="NATS server URLs."
    )
    subject_prefix: str = Field(
        "wd", description="First token of the partition subjects (PREFIX.in.<partition>.m.<topic>) and alert subjects."
    )
    partitions: int = Field(8, ge=1, le=1024, description="Partitions of the models (the server's mapping uses it).")
    input_stream: str = Field("WATCHDOG_IN", description="Stream holding the partitioned inbound messages.")
    alert_stream: str = Field("WATCHDOG_ALERTS", description="Stream the alerts are published to.")
    dead_letter_stream: str = Field(
        "WATCHDOG_DEAD",
        description="Stream of the bad records, bounded by agent.dead_letter_max_count and agent.dead_letter_max_bytes.",
    )
    durable_prefix: str = Field("watchdog-p", description="Durable consumer names: this and the partition number.")
    snapshot_bucket: str = Field("watchdog_snapshots", description="Key-value bucket of the per-partition snapshots.")
    state_bucket: str = Field("watchdog_state", description="Key-value bucket of the retained state per model.")
    lease_bucket: str = Field("watchdog_leases", description="Key-value bucket of partition leases and live workers.")
    start_timeout_s: float = Field(
        10.0, gt=0, description="A worker that reaches no server within this long at start exits with status 3."
    )
    replicas: int = Field(1, ge=1, le=5, description="Replicas of the streams and buckets the workers create.")
    create_streams: bool = Field(True, description="Create missing streams and buckets at start.")
    input_max_age_s: float = Field(7 * 86400.0, gt=0, description="How long the input stream keeps messages.")
    alert_duplicate_window_s: float = Field(
        600.0, gt=0, description="The alert stream's duplicate window: a re-sent alert id within it is dropped."
    )
    lease_s: float = Field(
        6.0, ge=0.5, le=600, description="A partition lease lapses this long after its worker stops renewing it."
    )
    snapshot_every_messages: int = Field(
        5000, ge=1, description="Snapshot a partition (then acknowledge) after this many messages at most."
    )
    snapshot_every_s: float = Field(10.0, gt=0, description="... or after this long, whichever comes first.")
    fetch_batch_messages: int = Field(
        5000, ge=1, le=10000, description="Messages asked for in one pull request (fewer requests, less server CPU)."
    )
    mirror_alerts_to_mqtt: bool = Field(
        True, description="Also publish each alert on broker.topics.alerts, which the server's MQTT listener serves."
    )

    @field_validator("subject_prefix")
    @classmethod
    def _prefix(cls, v: str) -> str:
        if not v or any(c in v for c in " .*>/\t"):
            raise ValueError("subject_prefix must be one subject token: no spaces, '.', '*', '>' or '/'")
        return v

    @model_validator(mode="after")
    def _windows(self) -> JetStreamSettings:
        # A worker that takes a partition over re-sends alerts of at most one snapshot period
        # and one lease: the duplicate window must cover that, or a re-send could slip through.
        if self.alert_duplicate_window_s < 2 * (self.snapshot_every_s + self.lease_s):
            raise ValueError(
                f"alert_duplicate_window_s ({self.alert_duplicate_window_s}) must be at least twice "
                f"snapshot_every_s + lease_s ({2 * (self.snapshot_every_s + self.lease_s)}); raise it"
            )
        return self


class PredictionFields(_Strict):
    id: str = "id"
    value: str = "value"
    ts: str = "ts"
    features: str = "features"
    model_version: str = "model_version"


class TruthFields(_Strict):
    id: str = "id"
    value: str = "value"
    ts: str = "ts"


class FieldSettings(_Strict):
    """Dotted paths of the fields in this model's payloads."""

    prediction: PredictionFields = PredictionFields()
    truth: TruthFields = TruthFields()

    def prediction_map(self) -> FieldMap:
        return FieldMap(**self.prediction.model_dump())

    def truth_map(self) -> FieldMap:
        return FieldMap(**self.truth.model_dump())


class PairingSettings(_Strict):
    horizon_s: float = Field(
        7200.0, gt=0, description="How long an unpaired prediction or truth waits for its other half."
    )
    max_unpaired_records: int = Field(
        20000, ge=1, description="Unpaired records kept at most; the oldest is evicted and counted."
    )


class WindowSettings(_Strict):
    size_pairs: int = Field(500, ge=2, description="Live window: the last N pairs.")
    max_age_s: float | None = Field(None, gt=0, description="Also drop pairs older than this (core time).")
    min_pairs: int = Field(100, ge=2, description="Pairs needed before the first evaluation.")

    @model_validator(mode="after")
    def _min_le_size(self) -> WindowSettings:
        if self.min_pairs > self.size_pairs:
            raise ValueError(
                f"min_pairs ({self.min_pairs}) must not exceed size_pairs ({self.size_pairs}); lower one or raise the other"
            )
        return self


class ModelSettings(_Strict):
    """One monitored model."""

    id: str
    card: str = Field(description="Path of the model card JSON (relative to the config file).")
    prediction_topic: str
    truth_topic: str
    model_level: int | None = Field(
        None,
        ge=1,
        description="Many models in one entry: the model id is this level (1 = first) of both "
        "topics, which must be '+' there, and 'card' names the cards with {model} in the file name.",
    )
    fields: FieldSettings = FieldSettings()
    pairing: PairingSettings = PairingSettings()
    window: WindowSettings = WindowSettings()
    checks: dict[str, Any] = Field(default_factory=dict, validate_default=True)

    @field_validator("id")
    @classmethod
    def _id_level(cls, v: str) -> str:
        validate_level(v, "model id")
        return v

    @field_validator("prediction_topic", "truth_topic")
    @classmethod
    def _filter(cls, v: str) -> str:
        validate_filter(v)
        return v

    @model_validator(mode="after")
    def _template(self) -> ModelSettings:
        if self.model_level is None:
            if "{model}" in self.card:
                raise ValueError(
                    "card holds {model} but model_level is not set; set model_level to the topic level of the id"
                )
            return self
        for name in ("prediction_topic", "truth_topic"):
            levels = getattr(self, name).split("/")
            if len(levels) < self.model_level or levels[self.model_level - 1] != "+":
                raise ValueError(
                    f"with model_level = {self.model_level}, {name} must have '+' at level "
                    f"{self.model_level}, got {getattr(self, name)!r}"
                )
        if "{model}" not in Path(self.card).name:
            raise ValueError(
                "with model_level set, card must name the card files with {model} in the "
                'file name, e.g. "cards/{model}.json"'
            )
        return self

    @field_validator("checks", mode="before")
    @classmethod
    def _resolve_checks(cls, raw: Any) -> dict[str, Any]:
        if not isinstance(raw, dict):
            raise ValueError("must be a table of check name -> settings, e.g. [models.checks.gap]")
        known = registry.registered()
        unknown = [k for k in raw if k not in registry.CHECK_NAMES]
        if unknown:
            raise ValueError(f"unknown check {unknown[0]!r}; use one of {', '.join(registry.CHECK_NAMES)}")
        resolved: dict[str, Any] = {}
        for name in known:
            cls_ = registry.settings_class(name)
            given = raw.get(name)
            if isinstance(given, cls_):
                resolved[name] = given
                continue
            if given is None:
                given = {} if registry.default_on(name) else {"enabled": False}
            if not isinstance(given, dict):
                raise ValueError(f"{name} must be a table, e.g. [models.checks.{name}]")
            try:
                resolved[name] = cls_.model_validate(given)
            except ValidationError as e:
                raise nested_error(e, name) from None
        missing = [k for k in raw if k not in known]
        if missing:
            raise ValueError(
                f"check {missing[0]!r} is not available in this installation; install river, or set enabled = false"
            )
        return resolved

    def enabled_checks(self) -> list[str]:
        return [n for n, s in self.checks.items() if s.enabled]


def parse_rfc3339(text: str) -> float:
    """RFC 3339 text with a UTC offset as Unix seconds; ValueError otherwise.

    >>> parse_rfc3339("2025-12-01T02:00:00Z")
    1764554400.0
    """
    try:
        dt = datetime.fromisoformat(text.replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError:
        raise ValueError(f"{text!r} is not RFC 3339 text, e.g. 2026-12-03T06:00:00Z") from None
    if dt.tzinfo is None:
        raise ValueError(f"{text!r} has no UTC offset; end it with Z or +HH:MM")
    return dt.timestamp()


class PlannedWorkSettings(_Strict):
    """A planned-work window from the config: daily at a local time for a duration, or a dated span."""

    name: str = Field(min_length=1, description="Shown in state, status and the note of held raises.")
    models: list[str] | None = Field(None, description="Model ids held back; left out: every model.")
    reason: str = ""
    daily_at: str | None = Field(None, description="Every day at this local time, HH:MM (24-hour), in timezone.")
    duration_s: float | None = Field(None, gt=0, le=86400, description="Length of the daily window in seconds.")
    timezone: str = Field("UTC", description="IANA time zone of daily_at, e.g. Europe/Berlin; default UTC.")
    start: str | None = Field(None, description="Start of a dated span, RFC 3339 with an offset.")
    end: str | None = Field(None, description="End of a dated span, RFC 3339 with an offset.")

    @field_validator("daily_at")
    @classmethod
    def _hh_mm(cls, v: str | None) -> str | None:
        if v is None:
            return v
        hh, sep, mm = v.partition(":")
        if not (sep and hh.isdigit() and mm.isdigit() and len(mm) == 2 and int(hh) < 24 and int(mm) < 60):
            raise ValueError(f"daily_at must be HH:MM on a 24-hour clock, e.g. '02:30', not {v!r}")
        return v

    @field_validator("timezone")
    @classmethod
    def _zone(cls, v: str) -> str:
        from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

        try:
            ZoneInfo(v)
        except (ZoneInfoNotFoundError, ValueError):
            raise ValueError(f"unknown time zone {v!r}; give an IANA name such as 'UTC' or 'Europe/Berlin'") from None
        return v

    @field_validator("start", "end")
    @classmethod
    def _time(cls, v: str | None) -> str | None:
        if v is not None:
            parse_rfc3339(v)
        return v

    @model_validator(mode="after")
    def _one_form(self) -> PlannedWorkSettings:
        daily = self.daily_at is not None or self.duration_s is not None
        dated = self.start is not None or self.end is not None
        if daily == dated:
            raise ValueError("give daily_at with duration_s (every day) or start with end (one dated span)")
        if daily and (self.daily_at is None or self.duration_s is None):
            raise ValueError("a daily window needs both daily_at (HH:MM) and duration_s (seconds)")
        if dated:
            if self.start is None or self.end is None:
                raise ValueError("a dated window needs both start and end")
            if parse_rfc3339(self.end) <= parse_rfc3339(self.start):
                raise ValueError(f"end {self.end!r} must come after start {self.start!r}")
        return self


class Config(_Strict):
    """The whole config file."""

    agent: AgentSettings = AgentSettings()
    broker: BrokerSettings = BrokerSettings()
    jetstream: JetStreamSettings = JetStreamSettings()
    models: list[ModelSettings] = Field(min_length=1)
    planned_work: list[PlannedWorkSettings] = Field(
        default_factory=list, description="Windows in which raises are held back (see core/planned.py)."
    )
    _base_dir: Path = PrivateAttr(default_factory=Path.cwd)

    @model_validator(mode="after")
    def _unique_ids(self) -> Config:
        seen: set[str] = set()
        for m in self.models:
            if m.id in seen:
                raise ValueError(f"model id {m.id!r} appears twice; give each [[models]] entry its own id")
            seen.add(m.id)
        names = [w.name for w in self.planned_work]
        dup = next((n for n in names if names.count(n) > 1), None)
        if dup is not None:
            raise ValueError(f"planned_work name {dup!r} appears twice; each window needs its own name")
        return self

    @property
    def base_dir(self) -> Path:
        return self._base_dir

    def resolve(self, path: str) -> Path:
        """A path from the config, relative to the config file's folder."""
        p = Path(path).expanduser()
        return p if p.is_absolute() else self._base_dir / p

    def model(self, model_id: str) -> ModelSettings:
        for m in self.models:
            if m.id == model_id:
                return m
        raise KeyError(model_id)


def parse_config(data: dict[str, Any], base_dir: Path | None = None, source: str = "config") -> Config:
    """Validate a config held in memory; paths resolve against ``base_dir``.

    >>> parse_config({"broker": {"keepalive": 30}, "models": []})
    Traceback (most recent call last):
    ...
    watchdog_edge.errors.ConfigError: config is invalid:
      broker.keepalive = 30: this key was renamed; write broker.keepalive_s instead
    """
    renamed = renamed_messages(data, CONFIG_RENAMES)
    if renamed:
        raise ConfigError(f"{source} is invalid:\n" + "\n".join("  " + line for line in renamed))
    try:
        cfg = Config.model_validate(data)
    except ValidationError as e:
        raise ConfigError(f"{source} is invalid:\n" + "\n".join("  " + line for line in error_lines(e, data))) from None
    cfg._base_dir = (base_dir or Path.cwd()).resolve()
    return cfg


def _with_level(flt: str, level: int, value: str) -> str:
    parts = flt.split("/")
    parts[level - 1] = value
    return "/".join(parts)


def expand_models(cfg: Config) -> Config:
    """Turn each entry with ``model_level`` into one model per card file that matches it.

    ``card = "cards/{model}.json"`` with files ``cards/pump-1.json`` and ``cards/pump-2.json``
    gives models ``pump-1`` and ``pump-2``, each on its own topics (the ``+`` at
    ``model_level`` replaced by the id). A message for a model with no card then meets no
    route and is dead-lettered as ``unknown_topic``.
    """
    if all(m.model_level is None for m in cfg.models):
        return cfg
    out: list[ModelSettings] = []
    for m in cfg.models:
        if m.model_level is None:
            out.append(m)
            continue
        pattern = cfg.resolve(m.card)
        head, _, tail = pattern.name.partition("{model}")
        found = sorted(pattern.parent.glob(head + "*" + tail)) if pattern.parent.is_dir() else []
        if not found:
            raise ConfigError(
                f"models[{m.id}].card = {m.card!r}: no card file matches {pattern}; "
                "write one card per model, named by its id"
            )
        for f in found:
            mid = f.name[len(head) : len(f.name) - len(tail)]
            try:
                validate_level(mid, "model id")
            except ValueError as e:
                raise ConfigError(f"models[{m.id}].card: card file {f.name}: {e}") from None
            out.append(
                m.model_copy(
                    update={
                        "id": mid,
                        "card": str(f),
                        "model_level": None,
                        "prediction_topic": _with_level(m.prediction_topic, m.model_level, mid),
                        "truth_topic": _with_level(m.truth_topic, m.model_level, mid),
                    }
                )
            )
    ids = [m.id for m in out]
    dup = next((i for i in ids if ids.count(i) > 1), None)
    if dup is not None:
        raise ConfigError(
            f"model id {dup!r} appears twice after expanding model_level entries; each model needs its own id"
        )
    expanded = cfg.model_copy(update={"models": out})
    expanded._base_dir = cfg.base_dir
    return expanded


def config_warnings(cfg: Config) -> list[str]:
    """Advice that is not an error (for example a window too small for a check)."""
    out: list[str] = []
    for m in cfg.models:
        for name in m.enabled_checks():
            mod = __import__(registry._REGISTRY[name][0], fromlist=["settings_warnings"])
            fn = getattr(mod, "settings_warnings", None)
            if fn is not None:
                out.extend(f"models[{m.id}].checks.{name}: {w}" for w in fn(m.checks[name]))
    return out
