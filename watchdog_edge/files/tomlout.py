"""TOML for resolved settings and ready-to-paste snippets, written by tomlkit.

tomlkit writes comments beside the values, so derived figures (the expected loss, where a
password comes from) can stand in the text as comments while the text still loads as a config.
TOML has no null: a key whose value is ``None`` is written as a comment saying it is not set.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import tomlkit
from tomlkit.items import AoT

# Comments to put in the text: a path of keys and list indexes -> lines at the top of that table,
# or, for a path that ends at a value, one comment on that value's line.
Comments = Mapping[tuple[str | int, ...], Sequence[str] | str]


def _is_table_array(v: Any) -> bool:
    return isinstance(v, list) and bool(v) and all(isinstance(x, dict) for x in v)


def _fill(
    table: Any, data: Mapping[str, Any], path: tuple[str | int, ...], comments: Comments, top: bool = False
) -> None:
    head = comments.get(path)
    if head and not top:
        for line in [head] if isinstance(head, str) else head:
            table.add(tomlkit.comment(line))
    # values first, then tables, then arrays of tables: TOML wants a table's own keys before its subtables
    for k, v in data.items():
        if isinstance(v, dict) or _is_table_array(v):
            continue
        if v is None:
            table.add(tomlkit.comment(f"{k} is not set"))
            continue
        item = tomlkit.item(v)
        note = comments.get((*path, k))
        if isinstance(note, str):
            item.comment(note)
        table.add(k, item)
    for k, v in data.items():
        if isinstance(v, dict):
            sub = tomlkit.table()
            _fill(sub, v, (*path, k), comments)
            table.add(k, sub)
    for k, v in data.items():
        if _is_table_array(v):
            aot = AoT([])
            for i, entry in enumerate(v):
                sub = tomlkit.table()
                _fill(sub, entry, (*path, k, i), comments)
                aot.append(sub)
            table.add(k, aot)


def dumps(data: Mapping[str, Any], comments: Comments | None = None, header: Sequence[str] = ()) -> str:
    """TOML text for nested plain data, with optional comments (see ``Comments``) and header lines.

    >>> print(dumps({"a": 1, "b": {"c": "x", "d": None}}, {("b",): "derived: nothing"}).strip())
    a = 1
    <BLANKLINE>
    [b]
    # derived: nothing
    c = "x"
    # d is not set
    """
    doc = tomlkit.document()
    for line in header:
        doc.add(tomlkit.comment(line) if line else tomlkit.nl())
    if header:
        doc.add(tomlkit.nl())
    _fill(doc, data, (), comments or {}, top=True)
    return tomlkit.dumps(doc).strip() + "\n"
