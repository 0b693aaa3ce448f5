"""The TOML config on disk, the cards it names, and a core built from both."""

from __future__ import annotations

import sys
from pathlib import Path

from watchdog_edge.core.cards import ModelCard
from watchdog_edge.core.monitor import Monitor
from watchdog_edge.core.settings import Config, expand_models, parse_config
from watchdog_edge.errors import CardError, ConfigError
from watchdog_edge.files.cardfile import load_card
from watchdog_edge.files.documents import read_document

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def load_config(path: str | Path) -> Config:
    """Read and validate a TOML config file."""
    p = Path(path)
    data = read_document(p, "config file", tomllib.loads, ConfigError, "TOML")
    return expand_models(parse_config(data, p.parent, str(p)))


def load_cards(cfg: Config) -> dict[str, ModelCard]:
    """Load every model's card named in the config (paths relative to the config file)."""
    cards = {}
    for m in cfg.models:
        try:
            cards[m.id] = load_card(cfg.resolve(m.card))
        except CardError as e:
            hint = (
                "; give the card's path relative to the config file, or build it with 'watchdog-edge card build'"
                if "not found" in str(e)
                else ""
            )
            raise ConfigError(f"models[{m.id}].card = {m.card!r}: {e}{hint}") from None
    return cards


def load_monitor(config_path: str | Path) -> Monitor:
    """Load the config and every card it names, then build the core."""
    cfg = load_config(config_path)
    return Monitor(cfg, load_cards(cfg))
