"""Help screens in the usual command-line form: ``Usage: ... [OPTIONS] CONFIG``, and flags without a value.

Recent typer releases show a required argument as ``{config}`` in the usage line and every
flag with a type, as if ``--json`` took a value (``--json <bool>``). These command classes
keep typer's layout but name arguments in capitals (``[NAME]`` when optional) and show no type
for a flag, through the command's ``collect_usage_pieces`` and the parameters' ``metavar``.
"""

from __future__ import annotations

from typing import Any

from typer.core import TyperArgument, TyperCommand, TyperGroup, TyperOption


def _plain_params(params: list[Any]) -> list[Any]:
    for p in params:
        if isinstance(p, TyperOption) and p.is_flag and p.metavar is None:
            p.metavar = ""  # a flag takes no value: show none
    return params


def _usage(command: Any, ctx: Any) -> list[str]:
    pieces = [command.options_metavar] if command.options_metavar else []
    for p in command.get_params(ctx):
        if isinstance(p, TyperArgument):
            name = p.metavar or (p.name or "").upper()
            if p.nargs != 1:
                name += "..."
            pieces.append(name if p.required else f"[{name}]")
    return pieces


class PlainCommand(TyperCommand):
    """A command whose help reads ``[OPTIONS] ARG`` and shows no type beside a flag."""

    def get_params(self, ctx: Any) -> list[Any]:
        return _plain_params(super().get_params(ctx))

    def collect_usage_pieces(self, ctx: Any) -> list[str]:
        return _usage(self, ctx)


class PlainGroup(TyperGroup):
    """A command group with the same plain help as :class:`PlainCommand`."""

    def get_params(self, ctx: Any) -> list[Any]:
        return _plain_params(super().get_params(ctx))
