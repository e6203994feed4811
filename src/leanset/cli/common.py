"""What every command shares: the Typer app, its help panels, the one-line refusal, common options."""

from __future__ import annotations

import json

import typer
from rich.console import Console

from .. import __version__
from ..errors import LeansetError

#: Help panels that group the commands.
PIPELINE, AUDIT, TOOLS = "Pipeline", "Audit (reads the store only)", "Tools"

app = typer.Typer(no_args_is_help=True, help="Shrink a labeled table, verify the target model, record why.")
err = Console(stderr=True)


def _show_version(value: bool) -> None:
    if value:
        typer.echo(f"leanset {__version__}")
        raise typer.Exit()


@app.callback()
def _group(version: bool = typer.Option(False, "--version", callback=_show_version, is_eager=True,
                                        help="Print leanset's version and exit.")) -> None:
    """Shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why."""


def fail(exc: LeansetError, as_json: bool = False) -> None:
    """Report bad input as one line on stderr (a JSON object on stdout with ``--json``) and exit 2."""
    if as_json:
        typer.echo(json.dumps({"error": str(exc), "type": type(exc).__name__, "exit_code": 2}))
    else:
        err.print(f"[red]leanset: error:[/red] {exc}", soft_wrap=True, highlight=False)
    raise typer.Exit(2)


CONFIG = typer.Argument(..., help="YAML config file.")
STORE = typer.Option(None, "--store", help="The run store (the folder that holds runs/); default ./leanset-store.")
JSON = typer.Option(False, "--json", help="Print JSON for machines instead of a table (errors too).")
