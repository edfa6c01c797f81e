"""The ``magfuse`` command: one Typer app, command groups registered from sibling modules.

Each command parses options, loads the configuration once, calls one library function and
renders the result. Expected failures (:class:`stations.errors.MagfuseError`) become one line
``Error: <message>`` on stderr and exit status 1 in :class:`_ErrorBoundary`, here and nowhere
else; anything unexpected keeps its traceback because it is a bug.

Command modules import heavy libraries (pandas, pyarrow, scipy, obspy) inside the command
bodies, so ``magfuse --help`` and ``magfuse event`` start fast.
"""

from __future__ import annotations

from typing import Any, get_args

import typer
from typer.core import TyperArgument, TyperCommand, TyperGroup

from fusion.advisory import ADVISORY
from stations.errors import MagfuseError

__all__ = ["app", "main"]


class _ErrorBoundary(TyperGroup):
    """Turn every :class:`MagfuseError` raised by a command into ``Error: ...`` and exit 1."""

    def resolve_command(self, ctx: Any, args: list[str]) -> Any:
        """Find the sub-command; name it in the store lock files this process takes."""
        name, cmd, rest = super().resolve_command(ctx, args)
        if name:
            from stations.store.lock import set_holder_command

            set_holder_command(f"magfuse {name}")
        return name, cmd, rest

    def invoke(self, ctx: Any) -> Any:  # a click Context (typer vendors click)
        try:
            return super().invoke(ctx)
        except MagfuseError as exc:
            typer.echo(f"Error: {exc}", err=True)
            raise typer.Exit(code=1) from None


def _metavar(param: Any) -> str:
    """A plain word for a parameter's value: its choices, FILE/FOLDER/PATH, INTEGER, NUMBER,
    TEXT (an argument without choices is named by itself, e.g. ``VERSION``)."""
    desc = param.type_descriptor
    if desc.is_choice:
        return "|".join(str(getattr(c, "value", c)) for c in desc.choices)
    if desc.is_path:
        return {"file": "FILE", "dir": "FOLDER"}.get(desc.path_type, "PATH")
    if isinstance(param, TyperArgument):
        return str(param.name or "value").upper()
    inner = get_args(desc.annotation)[0] if desc.is_list else desc.annotation
    return {int: "INTEGER", float: "NUMBER"}.get(inner, "TEXT")


class _PlainHelpCommand(TyperCommand):
    """A command whose ``--help`` shows plain words: ``FILE...``, ``--top INTEGER``, never
    Python type names (``<list[Path]>``) or braces (``{paths}...``).

    Each parameter without a ``metavar`` gets one from :func:`_metavar`; an argument's help
    line and the usage line are written here because Typer would add its type name to them.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        for param in self.params:
            if param.metavar is None and not getattr(param, "is_flag", False):
                param.metavar = _metavar(param)

    @staticmethod
    def _argument_word(param: Any) -> str:
        word = param.metavar or (param.name or "").upper()
        return f"{word}..." if param.nargs != 1 else word

    def collect_usage_pieces(self, ctx: Any) -> list[str]:
        pieces = [self.options_metavar] if self.options_metavar else []
        for param in self.get_params(ctx):
            if isinstance(param, TyperArgument):
                word = self._argument_word(param)
                pieces.append(word if param.required else f"[{word}]")
        return pieces

    def format_options(self, ctx: Any, formatter: Any) -> None:
        rows = [
            (self._argument_word(p), (p.help or "") + ("  [required]" if p.required else ""))
            for p in self.get_params(ctx)
            if isinstance(p, TyperArgument)
        ]
        opts = [
            rv
            for p in self.get_params(ctx)
            if p.param_type_name == "option" and (rv := p.get_help_record(ctx)) is not None
        ]
        for title, records in (("Arguments", rows), ("Options", opts)):
            if records:
                with formatter.section(title):
                    formatter.write_dl(records)


app = typer.Typer(
    name="magfuse",
    cls=_ErrorBoundary,
    help=(
        "Network magnitudes from station magnitudes, with learned station biases, error "
        f"variances and correlated pairs.\n\n{ADVISORY}"
    ),
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # help texts name config sections as [learn]: no markup
    add_completion=False,
)


def _register() -> None:
    """Mount the command modules; the list of command groups is readable here in one place."""
    import importlib

    for name in _COMMAND_MODULES:
        importlib.import_module(f"fusion.cli.{name}").register(app)
    for info in app.registered_commands:  # plain help words for every command (see class)
        if info.cls in (None, TyperCommand):
            info.cls = _PlainHelpCommand


#: Command modules, each with ``register(app)``; order is the order of ``magfuse --help``.
_COMMAND_MODULES: tuple[str, ...] = (
    "commands_store",
    "commands_verify",
    "commands_compute",
    "commands_model",
    "commands_review",
    "commands_check",
    "commands_output",
    "commands_nightly",
    "commands_demo",
    "commands_service",
)


_register()


def main() -> None:
    """Console-script entry point."""
    app()
