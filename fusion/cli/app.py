"""The ``magfuse`` command: one Typer app, command groups registered from sibling modules.

Each command parses options, loads the configuration once, calls one library function and
renders the result. Expected failures (:class:`stations.errors.MagfuseError`) become one line
``Error: <message>`` on stderr and exit status 1 in :class:`_ErrorBoundary`, here and nowhere
else; anything unexpected keeps its traceback because it is a bug.

Command modules import heavy libraries (pandas, pyarrow, scipy, obspy) inside the command
bodies, so ``magfuse --help`` and ``magfuse event`` start fast.
"""

from __future__ import annotations

from typing import Any

import typer
from typer.core import TyperGroup

from fusion.advisory import ADVISORY
from stations.errors import MagfuseError

__all__ = ["app", "main"]


class _ErrorBoundary(TyperGroup):
    """Turn every :class:`MagfuseError` raised by a command into ``Error: ...`` and exit 1."""

    def invoke(self, ctx: Any) -> Any:  # a click Context (typer vendors click)
        try:
            return super().invoke(ctx)
        except MagfuseError as exc:
            typer.echo(f"Error: {exc}", err=True)
            raise typer.Exit(code=1) from None


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


#: Command modules, each with ``register(app)``; order is the order of ``magfuse --help``.
_COMMAND_MODULES: tuple[str, ...] = (
    "commands_store",
    "commands_compute",
    "commands_model",
    "commands_review",
    "commands_output",
    "commands_nightly",
    "commands_demo",
    "commands_service",
)


_register()


def main() -> None:
    """Console-script entry point."""
    app()
