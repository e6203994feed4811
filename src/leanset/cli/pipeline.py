"""The pipeline commands: ``leanset run``, ``frontier`` and ``serve``."""

from __future__ import annotations

import contextlib
import logging
import os
from enum import Enum
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from ..config import load_config
from ..errors import LeansetError
from .common import CONFIG, PIPELINE, app, err, fail


class Strategy(str, Enum):
    """``selection.strategy`` choices."""

    stratified = "stratified"
    hardest = "hardest"
    easiest = "easiest"
    random = "random"


class FailOn(str, Enum):
    """Verdicts that make ``leanset run`` exit non-zero."""

    never = "never"
    fail = "fail"
    inconclusive = "inconclusive"


#: Exit codes of a run whose verdict is not ``pass`` (bad input stays 2).
EXIT_FAIL, EXIT_INCONCLUSIVE = 3, 4


_SEED = typer.Option(None, help="Override seed.")
_STORE_OVERRIDE = typer.Option(None, help="Override store (the folder that receives runs/).")
_WAIT = typer.Option(0.0, help="Seconds to wait for another run holding the store's lock.")
_VERBOSE = typer.Option(False, "--verbose", help="Show the stages' and Prefect's log lines.")
_NO_CACHE = typer.Option(False, "--no-cache", help="Score afresh even when the store's cache holds this table's scores.")


@app.command(rich_help_panel=PIPELINE)
def run(
    config: Path = CONFIG,
    fraction: Optional[str] = typer.Option(None, metavar="[0<F<=1|auto]", help="Override selection.fraction: a number in (0, 1], or auto (searched)."),
    strategy: Optional[Strategy] = typer.Option(None, help="Override selection.strategy."),
    seed: Optional[int] = _SEED, store: Optional[Path] = _STORE_OVERRIDE, wait: float = _WAIT, verbose: bool = _VERBOSE,
    no_cache: bool = _NO_CACHE,
    fail_on: FailOn = typer.Option(FailOn.never, "--fail-on", help=f"Exit {EXIT_FAIL} on a fail verdict (fail), and also {EXIT_INCONCLUSIVE} on an inconclusive one (inconclusive)."),
) -> None:
    """Score, prune and verify the configured table; write a run directory and print a summary."""
    overrides = {"selection.fraction": fraction, "selection.strategy": strategy.value if strategy else None, "seed": seed,
                 "store": str(store.resolve()) if store else None}
    status = _launch(config, overrides, wait, verbose, frontier=False, use_cache=not no_cache)
    if status == "fail" and fail_on != FailOn.never:
        raise typer.Exit(EXIT_FAIL)
    if status == "inconclusive" and fail_on == FailOn.inconclusive:
        raise typer.Exit(EXIT_INCONCLUSIVE)


@app.command(rich_help_panel=PIPELINE)
def frontier(
    config: Path = CONFIG,
    fractions: Optional[str] = typer.Option(None, metavar="F,F,...", help="Override selection.grid: comma-separated fractions in (0, 1], e.g. 0.05,0.1,0.3."),
    seed: Optional[int] = _SEED, store: Optional[Path] = _STORE_OVERRIDE, wait: float = _WAIT, verbose: bool = _VERBOSE,
    no_cache: bool = _NO_CACHE,
) -> None:
    """A run plus the frontier: the target's holdout metric for every grid fraction and strategy, and random."""
    grid = None if fractions is None else [part.strip() for part in fractions.split(",") if part.strip()]
    overrides = {"selection.grid": grid, "seed": seed, "store": str(store.resolve()) if store else None}
    _launch(config, overrides, wait, verbose, frontier=True, use_cache=not no_cache)


def _launch(config: Path, overrides: dict, wait: float, verbose: bool, frontier: bool, use_cache: bool) -> str:
    """Check config and input before any flow starts, run the flow, print the summary; return the verdict's status."""
    from ..preflight import preflight

    try:
        cfg = load_config(config, overrides)
        checked = preflight(cfg)  # the flow is handed the token and does not check again
    except LeansetError as exc:
        fail(exc)
    if verbose:
        from rich.logging import RichHandler

        stages = logging.getLogger("leanset")
        stages.addHandler(RichHandler(console=err, show_path=False))
        stages.setLevel(logging.INFO)
    else:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "warning")  # read by the scheduler and worker processes too
        logging.getLogger("distributed").setLevel(logging.WARNING)
    from ..flows import frontier_flow, prune_flow
    from ..report.summary import frontier_table, read_run, summary

    with _progress(enabled=not verbose):
        state = (frontier_flow if frontier else prune_flow)(cfg, None, wait, use_cache, checked, return_state=True)
    # a fail verdict ends the flow run Failed, holding the run directory; an exception is raised again here
    run_dir = state.result(raise_on_failure=False)
    if isinstance(run_dir, LeansetError):
        fail(run_dir)
    if isinstance(run_dir, BaseException):
        raise run_dir
    run = read_run(run_dir)
    console = Console()
    if frontier:
        console.print(frontier_table(run))
    console.print(summary(run, run_dir))
    return run["verdict"]["status"]


@contextlib.contextmanager
def _progress(enabled: bool):
    """A progress display on the terminal (stderr): the stage running, stages done, time taken."""
    from rich.progress import BarColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    from ..flows import STAGE_LISTENERS

    if not enabled or not err.is_terminal:
        yield
        return
    with Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(), TextColumn("{task.completed} stages done"),
                  TimeElapsedColumn(), console=err, transient=True) as bar:
        job = bar.add_task("starting", total=None)
        seen: list[str] = []

        def listen(stage: str) -> None:
            bar.update(job, description=f"stage: {stage}", completed=len(seen))
            seen.append(stage)

        STAGE_LISTENERS.append(listen)
        try:
            yield
        finally:
            STAGE_LISTENERS.remove(listen)


@app.command(rich_help_panel=PIPELINE)
def serve(
    config: Path = typer.Argument(..., help="YAML config file; input.path is usually a folder that receives new parquet files."),
    cron: str = typer.Option(..., "--cron", help='Cron schedule, e.g. "0 2 * * *" for 02:00 every day.'),
    name: Optional[str] = typer.Option(None, help="Deployment name; default leanset-<config file name>."),
    timezone: Optional[str] = typer.Option(None, help="Time zone of the cron schedule, e.g. Europe/Paris; default UTC."),
    wait: float = typer.Option(0.0, help="Seconds a scheduled run waits for another run holding the store's lock."),
) -> None:
    """Serve the scheduled flow (leanset-scheduled) on a cron schedule until stopped (Ctrl-C).

    Needs a Prefect API that outlives the command: `prefect server start` elsewhere, or PREFECT_API_URL.
    """
    try:
        load_config(config)
    except LeansetError as exc:
        fail(exc)
    from prefect.client.schemas.schedules import CronSchedule

    try:
        schedule = CronSchedule(cron=cron, timezone=timezone or "UTC")
    except ValueError as exc:
        msg = exc.errors()[0]["msg"] if hasattr(exc, "errors") else str(exc)
        fail(LeansetError(f"--cron {cron!r} --timezone {timezone or 'UTC'}: {msg}; "
                           "give five cron fields, e.g. \"0 2 * * *\", and an IANA time zone"))
    from prefect.deployments.runner import EntrypointType

    from ..flows import scheduled_flow

    # by module path, so that the served runs find the flow in the installed package from any folder
    scheduled_flow.serve(name=name or f"leanset-{config.stem}", schedules=[schedule],
                         parameters={"config_path": str(config.resolve()), "wait": wait},
                         entrypoint_type=EntrypointType.MODULE_PATH)
