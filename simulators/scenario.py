"""Scenario files: an invented site, its sensors, its deployed model and the incidents to inject.

A scenario is one TOML file (see ``simulators/scenarios/``). Loading validates it with pydantic;
an error names the key, the value and the rule. Times inside a scenario are hours from the
start of the run (``start_h``, ``end_h``), so a file reads like a shift log.
"""

from __future__ import annotations

import sys
from datetime import datetime
from pathlib import Path
from typing import Annotated, Literal, Union

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

from watchdog_edge.core.renames import (
    SCENARIO_RENAMES,
    SCENARIO_VALUE_RENAMES,
    renamed_messages,
    renamed_value_messages,
)
from watchdog_edge.core.validation import format_validation
from watchdog_edge.errors import ConfigError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

SCENARIO_DIR = Path(__file__).resolve().parent / "scenarios"


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Site(_Strict):
    """Where the gateway stands and when the run starts."""

    name: str
    description: str = ""
    start: str = Field(description="Start of the run, RFC 3339 (UTC), e.g. 2025-06-02T00:00:00Z.")
    utc_offset_h: float = Field(0.0, ge=-14, le=14, description="Local time offset; daily cycles follow local time.")
    duration_h: float = Field(24.0, gt=0, le=24 * 60)
    seed: int = Field(1, ge=0)

    @field_validator("start")
    @classmethod
    def _rfc3339(cls, v: str) -> str:
        try:
            dt = datetime.fromisoformat(v.replace("Z", "+00:00"))
        except ValueError:
            raise ValueError("start must be RFC 3339 text such as 2025-06-02T00:00:00Z") from None
        if dt.tzinfo is None:
            raise ValueError("start needs a time zone, e.g. a trailing Z for UTC")
        return v

    @property
    def start_t(self) -> float:
        return datetime.fromisoformat(self.start.replace("Z", "+00:00")).timestamp()


class Sensor(_Strict):
    """A physical quantity measured at the site, in real units.

    ``kind = "cycle"``: mean + daily_amplitude * cos(2 pi (hour - peak_hour) / 24) plus
    autocorrelated noise (standard deviation ``noise_sd``, correlation time ``noise_tau_min``).
    ``kind = "counts"``: a Poisson count per prediction interval whose hourly rate follows the
    same daily cycle (``mean`` and ``daily_amplitude`` are then events per hour).
    """

    name: str = Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]*$")
    unit: str
    kind: Literal["cycle", "counts"] = "cycle"
    mean: float
    daily_amplitude: float = Field(0.0, ge=0)
    peak_hour: float = Field(12.0, ge=0, lt=24)
    noise_sd: float = Field(0.0, ge=0)
    noise_tau_min: float = Field(30.0, gt=0)
    count_window_min: float = Field(15.0, gt=0, description="Counts: the trailing window a count covers.")
    min: float | None = None
    max: float | None = None

    @model_validator(mode="after")
    def _bounds(self) -> Sensor:
        if self.min is not None and self.max is not None and self.max <= self.min:
            raise ValueError(f"sensor {self.name!r}: max {self.max} must be above min {self.min}")
        if self.kind == "counts" and self.mean < self.daily_amplitude:
            raise ValueError(
                f"sensor {self.name!r}: a count rate needs mean >= daily_amplitude (rates cannot go negative)"
            )
        return self


class Term(_Strict):
    """One term of the true process: ``coef`` times a product of sensor powers, or a hinge.

    ``of = { outdoor_c = 1, door_opens = 1 }`` is coef * outdoor_c * door_opens;
    ``hinge = "outdoor_c"`` with ``above = 27`` is coef * max(0, outdoor_c - 27), a behaviour
    that only shows outside the usual operating range.
    """

    coef: float
    of: dict[str, int] = Field(default_factory=dict)
    hinge: str | None = None
    above: float | None = None

    @model_validator(mode="after")
    def _shape(self) -> Term:
        if (self.hinge is None) == (not self.of):
            raise ValueError(
                "a term has either 'of' (a product of sensor powers) or 'hinge' (with 'above'), not both or neither"
            )
        if self.hinge is not None and self.above is None:
            raise ValueError(f"hinge term on {self.hinge!r} needs 'above' (the knee of the hinge)")
        if any(p < 1 for p in self.of.values()):
            raise ValueError("powers in 'of' must be whole numbers >= 1")
        return self

    def sensors(self) -> list[str]:
        return [self.hinge] if self.hinge else list(self.of)


class Process(_Strict):
    """How the measured truth depends on the real (not the measured) sensor values."""

    intercept: float = 0.0
    terms: list[Term] = Field(default_factory=list)
    noise_sd: float = Field(0.0, ge=0, description="Autocorrelated process disturbance.")
    noise_tau_min: float = Field(20.0, gt=0)
    meter_sd: float = Field(0.0, ge=0, description="Independent noise of the truth meter.")


class DeployedModel(_Strict):
    """The model the gateway runs: a polynomial of ``degree`` in ``features``, fitted by least squares."""

    id: str = Field(pattern=r"^[A-Za-z0-9_.-]+$")
    version: str = "v1"
    target: str
    target_unit: str
    features: list[str] = Field(min_length=1)
    degree: int = Field(1, ge=1, le=6)
    training_rows: int = Field(ge=2)
    training_days: float = Field(14.0, gt=0, description="Length of the history the training rows are drawn from.")
    holdout_rows: int = Field(0, ge=0, description="0: the card has no holdout, the expected loss comes from FPE.")
    loss: Literal["squared", "absolute"] = "squared"
    id_prefix: str = Field("p", pattern=r"^[A-Za-z0-9_-]+$")


class Timing(_Strict):
    """How often the model predicts, and how late and how often the truth comes."""

    prediction_every_s: float = Field(gt=0)
    truth_share: float = Field(gt=0, le=1, description="Share of predictions that ever get a truth.")
    truth_delay_min_s: float = Field(0.0, ge=0)
    truth_delay_max_s: float = Field(ge=0)
    latency_max_s: float = Field(0.2, ge=0, description="Network latency between publish and receipt.")

    @model_validator(mode="after")
    def _delays(self) -> Timing:
        if self.truth_delay_max_s < self.truth_delay_min_s:
            raise ValueError("truth_delay_max_s must be >= truth_delay_min_s")
        return self


class Topics(_Strict):
    prediction: str
    truth: str


class PredictionFields(_Strict):
    value: str = "value"
    features: str = "features"


class TruthFields(_Strict):
    value: str = "value"


class Fields(_Strict):
    """Dotted paths of the fields in the site's payloads, as the config's ``[models.fields]`` names them."""

    prediction: PredictionFields = PredictionFields()
    truth: TruthFields = TruthFields()


class WindowHints(_Strict):
    size_pairs: int = Field(200, ge=2)
    min_pairs: int = Field(100, ge=2)


class PairingHints(_Strict):
    horizon_s: float = Field(3600.0, gt=0)


class MonitorHints(_Strict):
    """Settings written into the config next to a recording, under the config's own keys."""

    window: WindowHints = WindowHints()
    pairing: PairingHints = PairingHints()
    checks: dict[str, dict] = Field(default_factory=dict)


class _Incident(_Strict):
    start_h: float = Field(ge=0)
    end_h: float | None = Field(None, description="Default: the end of the run.")
    detail: str = Field("", description="What happened, in the site's words; shown in the incidents file.")

    @model_validator(mode="after")
    def _order(self) -> _Incident:
        if self.end_h is not None and self.end_h <= self.start_h:
            raise ValueError(f"end_h {self.end_h} must be after start_h {self.start_h}")
        return self


class Drift(_Incident):
    """A sensor's reading drifts away from the real value, then is recalibrated at ``end_h``."""

    kind: Literal["drift"]
    sensor: str
    rate_per_h: float


class Step(_Incident):
    """A sensor's reading jumps by ``offset`` (a knocked probe, a wrong scaling)."""

    kind: Literal["step"]
    sensor: str
    offset: float


class Regime(_Incident):
    """The site really runs somewhere new: the real sensor value moves by ``offset``."""

    kind: Literal["regime"]
    sensor: str
    offset: float


class FeedStop(_Incident):
    """The truth feed stops: truths due in the span are never published."""

    kind: Literal["feed_stop"]


class Overfit(_Incident):
    """The deployed model itself is the trouble (too complex for its rows): nothing is injected."""

    kind: Literal["overfit"]


Incident = Annotated[Union[Drift, Step, Regime, FeedStop, Overfit], Field(discriminator="kind")]


class Scenario(_Strict):
    """A whole scenario file."""

    site: Site
    sensors: list[Sensor] = Field(min_length=1)
    process: Process
    model: DeployedModel
    timing: Timing
    topics: Topics
    fields: Fields = Fields()
    monitor: MonitorHints = MonitorHints()
    incidents: list[Incident] = Field(default_factory=list)

    @model_validator(mode="after")
    def _names(self) -> Scenario:
        names = [s.name for s in self.sensors]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise ValueError(f"sensor {sorted(dup)[0]!r} is listed twice")
        known = set(names)
        for f in self.model.features:
            if f not in known:
                raise ValueError(f"model.features names {f!r}, which is not a sensor; sensors are {', '.join(names)}")
        for i, term in enumerate(self.process.terms):
            for s in term.sensors():
                if s not in known:
                    raise ValueError(f"process.terms[{i}] uses {s!r}, which is not a sensor")
        for i, inc in enumerate(self.incidents):
            sensor = getattr(inc, "sensor", None)
            if sensor is not None and sensor not in known:
                raise ValueError(f"incidents[{i}] ({inc.kind}) names sensor {sensor!r}, which is not a sensor")
            if inc.start_h >= self.site.duration_h:
                raise ValueError(
                    f"incidents[{i}] ({inc.kind}) starts at hour {inc.start_h}, after the run ends "
                    f"(site.duration_h = {self.site.duration_h})"
                )
        if self.model.loss == "absolute" and self.model.holdout_rows == 0:
            raise ValueError(
                "model.loss = 'absolute' needs model.holdout_rows > 0: only a squared-loss "
                "least-squares card can take its expected loss from the training loss"
            )
        if self.monitor.window.min_pairs > self.monitor.window.size_pairs:
            raise ValueError(
                "monitor.window.min_pairs must not exceed monitor.window.size_pairs; lower one or raise the other"
            )
        return self

    def sensor(self, name: str) -> Sensor:
        return next(s for s in self.sensors if s.name == name)


def scenario_names() -> list[str]:
    """Names of the scenarios shipped in ``simulators/scenarios``."""
    return sorted(p.stem for p in SCENARIO_DIR.glob("*.toml"))


def resolve_scenario(name_or_path: str | Path) -> Path:
    """A scenario file from a path, or from the name of a shipped scenario."""
    p = Path(name_or_path)
    if p.is_file():
        return p
    shipped = SCENARIO_DIR / f"{name_or_path}.toml"
    if shipped.is_file():
        return shipped
    raise ConfigError(
        f"scenario {str(name_or_path)!r} is neither a file nor a shipped scenario; "
        f"shipped scenarios are: {', '.join(scenario_names())}"
    )


def parse_scenario(data: dict, source: str = "scenario") -> Scenario:
    """Validate scenario data held in memory; keys renamed since are refused with their new name."""
    renamed = renamed_messages(data, SCENARIO_RENAMES) + renamed_value_messages(data, SCENARIO_VALUE_RENAMES)
    if renamed:
        raise ConfigError(f"{source} is invalid:\n" + "\n".join("  " + line for line in renamed))
    try:
        return Scenario.model_validate(data)
    except ValidationError as e:
        raise ConfigError(f"{source} is invalid:\n{format_validation(e, data)}") from None


def load_scenario(name_or_path: str | Path) -> Scenario:
    """Read and validate a scenario file (or a shipped scenario by name)."""
    p = resolve_scenario(name_or_path)
    try:
        data = tomllib.loads(p.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as e:
        raise ConfigError(f"scenario {p} is not valid TOML: {e}") from None
    return parse_scenario(data, str(p))
