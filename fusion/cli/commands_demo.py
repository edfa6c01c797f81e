"""``magfuse demo``: the whole job on the bundled, invented demo network."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

__all__ = ["register"]


def register(app: typer.Typer) -> None:
    """Mount ``demo``."""
    app.command("demo")(demo_command)


def demo_command(
    workdir: Annotated[
        Path,
        typer.Option(
            "--workdir",
            metavar="FOLDER",
            help="Folder for the demo's store, input split and report.",
        ),
    ] = Path("magfuse-demo"),
) -> None:
    """Ingest, learn, adopt, fuse, dry-run a second half-year, explain an event, report.

    Runs on the invented demo network shipped in sample_events/ and scores the network
    magnitudes against the demo's known truth.
    """
    from fusion.workflows.demo import run_demo

    run_demo(workdir, echo=typer.echo)
