"""Model cards on disk: read with errors that name the file and the field, written as JSON."""

from __future__ import annotations

import json
from pathlib import Path

from pydantic import ValidationError

from watchdog_edge.core.cards import ModelCard, format_validation
from watchdog_edge.errors import CardError
from watchdog_edge.files.documents import read_document


def load_card(path: str | Path) -> ModelCard:
    """Read and validate a card; errors name the file and the field."""
    p = Path(path)
    raw = read_document(p, "model card", json.loads, CardError, "JSON")
    try:
        return ModelCard.model_validate(raw)
    except ValidationError as e:
        raise CardError(f"model card {p} is invalid:\n{format_validation(e)}") from None


def save_card(card: ModelCard, path: str | Path) -> None:
    """Write a card as indented JSON."""
    Path(path).write_text(card.model_dump_json(indent=2, exclude_none=True) + "\n", encoding="utf-8")
