"""Files of a simulated run: the recording, its incidents, the model card and a config for replay.

Next to ``RECORDING.jsonl`` go ``RECORDING.incidents.json``, ``RECORDING.config.toml`` and
``RECORDING.card.json`` (named for the recording: two seeds in one folder have two cards), so ``watchdog-edge replay RECORDING.jsonl --config
RECORDING.config.toml`` works straight away.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from watchdog_edge.errors import RecordingError
from watchdog_edge.files import tomlout
from watchdog_edge.files.cardfile import save_card
from watchdog_edge.files.documents import read_document
from watchdog_edge.replay.recording import RecordingWriter

from .generate import Run
from .scenario import Scenario


@dataclass(frozen=True)
class BundlePaths:
    recording: Path
    incidents: Path
    config: Path
    card: Path


def sibling(recording: Path, suffix: str) -> Path:
    """``out/a.jsonl`` -> ``out/a<suffix>``."""
    stem = recording.name[: -len(recording.suffix)] if recording.suffix else recording.name
    return recording.with_name(stem + suffix)


def config_data(
    sc: Scenario, card_file: str, agent: str | None = None, broker: tuple[str, int] | None = None
) -> dict[str, Any]:
    """The config (plain data) that watches this scenario's model."""
    model: dict[str, Any] = {
        "id": sc.model.id,
        "card": card_file,
        "prediction_topic": sc.topics.prediction,
        "truth_topic": sc.topics.truth,
    }
    # the scenario names its payload fields, window and pairing with the config's keys
    fields = sc.fields.model_dump(exclude_defaults=True)
    if fields:
        model["fields"] = fields
    model["pairing"] = sc.monitor.pairing.model_dump()
    model["window"] = sc.monitor.window.model_dump()
    # written even when empty: the table makes every default check explicit to the reader
    model["checks"] = {k: dict(v) for k, v in sc.monitor.checks.items()}
    data: dict[str, Any] = {"agent": {"name": agent or f"sim-{sc.model.id}"}}
    if broker is not None:
        data["broker"] = {"host": broker[0], "port": broker[1]}
    data["models"] = [model]
    return data


def incidents_data(run: Run, scenario_name: str) -> dict[str, Any]:
    """The incidents file: each injected incident's kind and span in core time."""
    return {
        "scenario": scenario_name,
        "site": run.scenario.site.name,
        "seed": run.seed,
        "model": run.scenario.model.id,
        "start": run.start_t,
        "end": run.end_t,
        "incidents": run.incidents,
    }


def write_bundle(run: Run, recording: str | Path, scenario_name: str = "") -> BundlePaths:
    """Write the recording and the files that go with it; returns their paths."""
    rec = Path(recording)
    rec.parent.mkdir(parents=True, exist_ok=True)
    with RecordingWriter(rec) as w:
        for m in run.messages:
            w.message(m.t, m.topic, m.payload)
    card_path = sibling(rec, ".card.json")
    save_card(run.card, card_path)
    inc_path = sibling(rec, ".incidents.json")
    inc_path.write_text(json.dumps(incidents_data(run, scenario_name), indent=2) + "\n", encoding="utf-8")
    cfg_path = sibling(rec, ".config.toml")
    header = [
        f"Config for replaying a simulated run of {run.scenario.site.name!r} (seed {run.seed}).",
        "Written by watchdog-edge simulate; edit freely.",
    ]
    cfg_path.write_text(tomlout.dumps(config_data(run.scenario, card_path.name), header=header), encoding="utf-8")
    return BundlePaths(rec, inc_path, cfg_path, card_path)


def load_incidents(path: str | Path) -> list[dict[str, Any]]:
    """Incidents from an incidents file (the object written above, or a bare list).

    Each incident needs ``start`` and ``end`` (core time, Unix seconds); ``kind`` is shown.
    """
    p = Path(path)
    raw = read_document(p, "incidents file", json.loads, RecordingError, "JSON")
    items = raw.get("incidents") if isinstance(raw, dict) else raw
    if not isinstance(items, list):
        raise RecordingError(f"incidents file {p} must hold a list of incidents (or an object with 'incidents')")
    out = []
    for i, inc in enumerate(items):
        if not isinstance(inc, dict):
            raise RecordingError(f"incidents file {p}: incidents[{i}] must be an object")
        for key in ("start", "end"):
            v = inc.get(key)
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise RecordingError(
                    f"incidents file {p}: incidents[{i}].{key} must be a time in Unix seconds, got {v!r}"
                )
        if inc["end"] < inc["start"]:
            raise RecordingError(
                f"incidents file {p}: incidents[{i}] ends ({inc['end']}) before it starts ({inc['start']})"
            )
        out.append({**inc, "kind": str(inc.get("kind", f"incident {i + 1}"))})
    return out
