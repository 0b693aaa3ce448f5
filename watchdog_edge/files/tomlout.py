"""A small TOML writer for resolved settings and ready-to-paste snippets.

TOML has no null: a key whose value is ``None`` is written as a comment saying it is not set.
"""

from __future__ import annotations

import json
import math
import re
from typing import Any

_BARE = re.compile(r"^[A-Za-z0-9_-]+$")


def _key(k: str) -> str:
    return k if _BARE.match(k) else json.dumps(k)


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items() if x is not None) + " }"
    raise TypeError(f"cannot write {type(v).__name__} as TOML")


def _is_table_array(v: Any) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def _emit(data: dict[str, Any], path: list[str], lines: list[str], array_item: bool = False) -> None:
    scalars = [(k, v) for k, v in data.items() if not isinstance(v, dict) and not _is_table_array(v)]
    tables = [(k, v) for k, v in data.items() if isinstance(v, dict)]
    arrays = [(k, v) for k, v in data.items() if _is_table_array(v)]
    if path and (scalars or array_item or not tables):
        header = ".".join(_key(p) for p in path)
        lines.append(f"[[{header}]]" if array_item else f"[{header}]")
    for k, v in scalars:
        lines.append(f"# {_key(k)} is not set" if v is None else f"{_key(k)} = {_value(v)}")
    if path and (scalars or array_item):
        lines.append("")
    for k, v in tables:
        _emit(v, path + [k], lines)
    for k, items in arrays:
        for item in items:
            _emit(item, path + [k], lines, array_item=True)


def dumps(data: dict[str, Any]) -> str:
    """TOML text for nested plain data.

    >>> print(dumps({"a": 1, "b": {"c": "x", "d": None}}).strip())
    a = 1
    <BLANKLINE>
    [b]
    c = "x"
    # d is not set
    """
    lines: list[str] = []
    top_scalars = {k: v for k, v in data.items() if not isinstance(v, dict) and not _is_table_array(v)}
    for k, v in top_scalars.items():
        lines.append(f"# {_key(k)} is not set" if v is None else f"{_key(k)} = {_value(v)}")
    if top_scalars:
        lines.append("")
    _emit({k: v for k, v in data.items() if k not in top_scalars}, [], lines)
    return "\n".join(lines).rstrip() + "\n"
