"""Command line: parses arguments and calls the flows; every LeansetError becomes one line and exit 2."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from .config import load_config
from .errors import LeansetError
from .table import check_input

app = typer.Typer(add_completion=False, no_args_is_help=True, help="Shrink a labeled table, verify the target model, record why.")
_err = Console(stderr=True)


@app.callback()
def _group() -> None:
    """Shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why."""


def _fail(exc: LeansetError) -> None:
    _err.print(f"[red]leanset: error:[/red] {exc}", soft_wrap=True, highlight=False)
    raise typer.Exit(2)


@app.command()
def run(
    config: Path = typer.Argument(..., help="YAML config file."),
    fraction: Optional[float] = typer.Option(None, help="Override selection.fraction, in (0, 1]."),
    strategy: Optional[str] = typer.Option(None, help="Override selection.strategy: stratified, hardest, easiest or random."),
    seed: Optional[int] = typer.Option(None, help="Override seed."),
    store: Optional[Path] = typer.Option(None, help="Override store (the folder that receives runs/)."),
    wait: float = typer.Option(0.0, help="Seconds to wait for another run holding the store's lock."),
    verbose: bool = typer.Option(False, "--verbose", help="Show Prefect's own log lines."),
) -> None:
    """Score, prune and verify the configured table; write a run directory and print a summary."""
    overrides = {"selection.fraction": fraction, "selection.strategy": strategy, "seed": seed,
                 "store": str(store.resolve()) if store else None}
    try:
        cfg = load_config(config, overrides)
        check_input(cfg)
    except LeansetError as exc:
        _fail(exc)
    if not verbose:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
    from .flows import prune_flow
    from .report import read_run, summary

    try:
        run_dir = prune_flow(str(config), overrides, wait)
    except LeansetError as exc:
        _fail(exc)
    Console().print(summary(read_run(run_dir), run_dir))


def main() -> None:
    """Console-script entry point."""
    app()
