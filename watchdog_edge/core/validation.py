"""Validation errors in one form: key path, value, rule, what to do.

Used for the config, model cards and scenarios alike, so that an error inside a check's table
reads like one anywhere else.

>>> from pydantic import BaseModel, ConfigDict, Field, ValidationError
>>> class M(BaseModel):
...     model_config = ConfigDict(extra="forbid")
...     size_pairs: int = Field(2, ge=2)
>>> try:
...     M.model_validate({"size_pairs": 0, "colour": "red"})
... except ValidationError as e:
...     print(format_validation(e))
  size_pairs = 0: Input should be greater than or equal to 2
  colour = 'red': unknown key; check the spelling against the documented keys
"""

from __future__ import annotations

from typing import Any

from pydantic import ValidationError
from pydantic_core import PydanticCustomError

NESTED = "nested_lines"


def nested_error(e: ValidationError, prefix: str) -> PydanticCustomError:
    """Raise this from a validator that checks a nested table itself, so its lines keep the form."""
    lines = "\n".join(error_lines(e, None, prefix))
    return PydanticCustomError(NESTED, "{lines}", {"lines": lines})


def key_path(loc: tuple[Any, ...], data: Any = None, prefix: str = "") -> str:
    """Dotted key path; a list index also names the element's ``id`` when ``data`` has one.

    >>> key_path(("models", 0, "window", "size_pairs"), {"models": [{"id": "pump"}]})
    "models[0] (id 'pump').window.size_pairs"
    """
    out = prefix
    cur = data
    for p in loc:
        if isinstance(p, int):
            out += f"[{p}]"
            item = cur[p] if isinstance(cur, list) and 0 <= p < len(cur) else None
            if isinstance(item, dict) and isinstance(item.get("id"), str):
                out += f" (id {item['id']!r})"
            cur = item
        else:
            out += f".{p}" if out else str(p)
            cur = cur.get(p) if isinstance(cur, dict) else None
    return out or "(top level)"


def shown_value(value: Any) -> str:
    """A value as the user wrote it, cut short."""
    shown = "{...}" if isinstance(value, dict) else repr(value)
    return shown if len(shown) <= 60 else shown[:57] + "..."


def error_lines(e: ValidationError, data: Any = None, prefix: str = "") -> list[str]:
    """One line per problem, each ``key = value: rule``; the validator's own wording removed."""
    lines = []
    for err in e.errors():
        key = key_path(tuple(err["loc"]), data, prefix)
        value = err.get("input")
        msg = str(err["msg"]).removeprefix("Value error, ").removeprefix("Assertion failed, ")
        if err["type"] == "missing":
            lines.append(f"{key}: required but missing; add it")
        elif err["type"] == "extra_forbidden":
            lines.append(f"{key} = {shown_value(value)}: unknown key; check the spelling against the documented keys")
        elif err["type"] == NESTED:  # lines already in this form, relative to this key
            lines.extend(f"{key}.{line}" for line in str(err.get("ctx", {}).get("lines", msg)).splitlines())
        elif isinstance(value, dict):  # a rule across the keys of a table: the keys are in the message
            lines.append(f"{key}: {msg}")
        else:
            lines.append(f"{key} = {shown_value(value)}: {msg}")
    return lines


def format_validation(e: ValidationError, data: Any = None, prefix: str = "") -> str:
    """The lines of :func:`error_lines`, indented, one per problem."""
    return "\n".join("  " + line for line in error_lines(e, data, prefix))
