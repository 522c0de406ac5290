"""The ``streamrate`` command line: thin wrappers that parse options and call the package."""

from __future__ import annotations

import json

import typer

app = typer.Typer(
    help="streamrate keeps win probabilities current as match results stream in.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


@app.command()
def schema() -> None:
    """Print the JSON Schema of a match event (the format of event files and stream entries)."""
    from streamrate.events import event_schema

    typer.echo(json.dumps(event_schema(), indent=2))


def main() -> None:  # pragma: no cover - console entry point
    app()
