"""Command line: parses arguments and calls the flows; every LeansetError becomes one line and exit 2
(a JSON object with ``--json``).

Stage modules are imported inside the commands that use them, so the audit commands start
without loading pandas, LightGBM or Prefect. Commands are grouped in the help by the panels
``PIPELINE``, ``AUDIT`` and ``TOOLS``; a new command names its panel with ``rich_help_panel=``.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
from enum import Enum
from pathlib import Path
from typing import Optional

import typer
from rich import box
from rich.console import Console

from . import __version__
from .config import load_config
from .errors import LeansetError

#: Help panels that group the commands.
PIPELINE, AUDIT, TOOLS = "Pipeline", "Audit (reads the store only)", "Tools"

app = typer.Typer(no_args_is_help=True, help="Shrink a labeled table, verify the target model, record why.")
_err = Console(stderr=True)


def _show_version(value: bool) -> None:
    if value:
        typer.echo(f"leanset {__version__}")
        raise typer.Exit()


@app.callback()
def _group(version: bool = typer.Option(False, "--version", callback=_show_version, is_eager=True,
                                        help="Print leanset's version and exit.")) -> None:
    """Shrink a labeled table with a cheap proxy model, verify a target model on the kept rows, record why."""


def _fail(exc: LeansetError, as_json: bool = False) -> None:
    """Report bad input as one line on stderr (a JSON object on stdout with ``--json``) and exit 2."""
    if as_json:
        typer.echo(json.dumps({"error": str(exc), "type": type(exc).__name__, "exit_code": 2}))
    else:
        _err.print(f"[red]leanset: error:[/red] {exc}", soft_wrap=True, highlight=False)
    raise typer.Exit(2)


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


_CONFIG = typer.Argument(..., help="YAML config file.")
_SEED = typer.Option(None, help="Override seed.")
_STORE_OVERRIDE = typer.Option(None, help="Override store (the folder that receives runs/).")
_WAIT = typer.Option(0.0, help="Seconds to wait for another run holding the store's lock.")
_VERBOSE = typer.Option(False, "--verbose", help="Show the stages' and Prefect's log lines.")
_NO_CACHE = typer.Option(False, "--no-cache", help="Score afresh even when the store's cache holds this table's scores.")


@app.command(rich_help_panel=PIPELINE)
def run(
    config: Path = _CONFIG,
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
    config: Path = _CONFIG,
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
    from .preflight import preflight

    try:
        cfg = load_config(config, overrides)
        checked = preflight(cfg)  # the flow is handed the token and does not check again
    except LeansetError as exc:
        _fail(exc)
    if verbose:
        from rich.logging import RichHandler

        stages = logging.getLogger("leanset")
        stages.addHandler(RichHandler(console=_err, show_path=False))
        stages.setLevel(logging.INFO)
    else:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
        os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "warning")  # read by the scheduler and worker processes too
        logging.getLogger("distributed").setLevel(logging.WARNING)
    from .flows import frontier_flow, prune_flow
    from .report.summary import frontier_table, read_run, summary

    with _progress(enabled=not verbose):
        state = (frontier_flow if frontier else prune_flow)(cfg, None, wait, use_cache, checked, return_state=True)
    # a fail verdict ends the flow run Failed, holding the run directory; an exception is raised again here
    run_dir = state.result(raise_on_failure=False)
    if isinstance(run_dir, LeansetError):
        _fail(run_dir)
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

    from .flows import STAGE_LISTENERS

    if not enabled or not _err.is_terminal:
        yield
        return
    with Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(), TextColumn("{task.completed} stages done"),
                  TimeElapsedColumn(), console=_err, transient=True) as bar:
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
        _fail(exc)
    from prefect.client.schemas.schedules import CronSchedule

    try:
        schedule = CronSchedule(cron=cron, timezone=timezone or "UTC")
    except ValueError as exc:
        msg = exc.errors()[0]["msg"] if hasattr(exc, "errors") else str(exc)
        _fail(LeansetError(f"--cron {cron!r} --timezone {timezone or 'UTC'}: {msg}; "
                           "give five cron fields, e.g. \"0 2 * * *\", and an IANA time zone"))
    from prefect.deployments.runner import EntrypointType

    from .flows import scheduled_flow

    # by module path, so that the served runs find the flow in the installed package from any folder
    scheduled_flow.serve(name=name or f"leanset-{config.stem}", schedules=[schedule],
                         parameters={"config_path": str(config.resolve()), "wait": wait},
                         entrypoint_type=EntrypointType.MODULE_PATH)


# --- audit: questions answered from the run store alone ---------------------------------------

_STORE = typer.Option(None, "--store", help="The run store (the folder that holds runs/); default ./leanset-store.")
_CONFIG_STORE = typer.Option(None, "--config", help="A YAML config: use the store it names.")
_JSON = typer.Option(False, "--json", help="Print JSON for machines instead of a table (errors too).")


def _store(store: Optional[Path], config: Optional[Path], as_json: bool) -> Path:
    """The store given by --store, or named by --config's ``store``, or ./leanset-store."""
    if store is not None and config is not None:
        _fail(LeansetError("--store and --config both name a store; give one of them"), as_json)
    if config is None:
        return store or Path("leanset-store")
    try:
        return load_config(config).store
    except LeansetError as exc:
        _fail(exc, as_json)


def _audit(fn, as_json: bool, *args, **kwargs):
    from .store import audit

    try:
        return getattr(audit, fn)(*args, **kwargs)
    except LeansetError as exc:
        _fail(exc, as_json)


def _emit(data, as_json: bool, table) -> None:
    if as_json:
        from .store.audit import as_json as dump

        typer.echo(dump(data))
    else:
        Console().print(table)


def _fields(title: str):
    """A two-column table of named fields: the name in bold, then its value."""
    from rich.table import Table

    table = Table(title=title, show_header=False, title_justify="left")
    table.add_column(style="bold")
    table.add_column()
    return table


def _fmt(value, digits: int = 4) -> str:
    if value is None:
        return "–"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


@app.command("runs", rich_help_panel=AUDIT)
def runs_command(store: Optional[Path] = _STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = _JSON) -> None:
    """List the runs in a store: when, input rows, kept, verdict, churn."""
    from rich.table import Table

    store = _store(store, config, json_)
    rows = _audit("runs", json_, store)
    table = Table(title=f"runs in {store}", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False, collapse_padding=True)
    for col in ("#", "run", "when (UTC)", "rows", "kept", "verdict", "churn"):
        table.add_column(col, justify="left" if col in ("run", "when (UTC)", "verdict") else "right", no_wrap=col != "when (UTC)")
    for r in rows:
        churn = "–" if r["churn_rows"] is None else f"{r['churn_rows']:,} {r['churn_fraction']:.1%}"
        table.add_row(str(r["sequence"]), r["run_id"], r["created"][:16].replace("T", " "), f"{r['rows']:,}",
                      f"{r['kept']:,}", r["verdict"], churn)
    _emit(rows, json_, table)


@app.command("why", rich_help_panel=AUDIT)
def why_command(row_id: Optional[str] = typer.Argument(None, help="The row id: the value of the table's id column (input.id), or the derived id in the manifest's row_id."),
                find: Optional[str] = typer.Option(None, "--find", metavar="COLUMN=VALUE", help="Find the row by the value of any column of the run's input table (reads the table)."),
                run: Optional[str] = typer.Option(None, "--run", help="Run id or unique prefix; default: the latest run holding the row."),
                store: Optional[Path] = _STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = _JSON) -> None:
    """Why a row was kept or dropped: decision, reason, scores and their class percentiles, thresholds."""
    store = _store(store, config, json_)
    if (row_id is None) == (find is None):
        _fail(LeansetError("give a ROW_ID or --find COLUMN=VALUE (one of them)"), json_)
    if find is not None:
        column, sep, value = find.partition("=")
        if not sep or not column:
            _fail(LeansetError(f"--find {find!r}: write it as COLUMN=VALUE, e.g. --find serial=A-1017"), json_)
        row_id = _audit("find", json_, store, column, value, run)
    w = _audit("why", json_, store, row_id, run)
    t = w["thresholds"]
    table = _fields(f"row {row_id} in run {w['run_id']}")
    table.add_row("decision", f"{w['decision']} ({w['reason']})")
    table.add_row("label · split", f"{w['label']} · {w['split']}")
    table.add_row("stratum · weight", f"{_fmt(w['stratum'])} · {_fmt(w['weight'])}")
    for name, value in w["scores"].items():
        pct = w["percentiles"].get(name)
        mark = " ◀ selection score" if name == t["score"] else ""
        table.add_row(name, _fmt(value) + (f"  ({pct:.1f}th percentile in {w['percentile_within']})" if pct is not None else "") + mark)
    table.add_row("selection", f"{t['strategy']} on {t['score']}, fraction {t['fraction']}, {t['quotas']} quotas, "
                  f"floor {t['class_floor']}, hard cut {t['hard_cut']}, hysteresis {_fmt(t['hysteresis'])}")
    if t["class_quota"] is not None:
        table.add_row("class quota", f"{t['class_quota']:,} of {t['class_rows']:,} training rows of {w['label']}")
    for reason, r in t["score_range_by_reason"].items():
        table.add_row(f"  {reason}", f"{r['rows']:,} rows, {t['score']} in [{_fmt(r['low'])}, {_fmt(r['high'])}]")
    _emit(w, json_, table)


@app.command("history", rich_help_panel=AUDIT)
def history_command(row_id: str = typer.Argument(..., help="The row id."), store: Optional[Path] = _STORE,
                    config: Optional[Path] = _CONFIG_STORE, json_: bool = _JSON) -> None:
    """A row's decision in every run of the store."""
    from rich.table import Table

    store = _store(store, config, json_)
    rows = _audit("history", json_, store, row_id)
    table = Table(title=f"history of row {row_id}", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    for col in ("#", "run", "decision", "reason", "stratum", "weight"):
        table.add_column(col, no_wrap=col != "reason")
    for r in rows:
        table.add_row(str(r["sequence"]), r["run_id"], r["decision"], _fmt(r["reason"]),
                      _fmt(r["stratum"]), _fmt(r["weight"]))
    _emit(rows, json_, table)


@app.command("diff", rich_help_panel=AUDIT)
def diff_command(run_a: str = typer.Argument(..., help="The earlier run (id or unique prefix)."),
                 run_b: str = typer.Argument(..., help="The later run (id or unique prefix)."),
                 limit: int = typer.Option(20, help="Changed rows to list."),
                 out: Optional[Path] = typer.Option(None, "--out", help="Write every changed row to this parquet file."),
                 store: Optional[Path] = _STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = _JSON) -> None:
    """Counts, and the rows whose decision changed between two runs, by reason."""
    from rich.console import Group
    from rich.table import Table

    store = _store(store, config, json_)
    d = _audit("diff", json_, store, run_a, run_b, limit, out)
    c = d["counts"]
    head = _fields(f"{d['run_a']} → {d['run_b']}")
    head.add_row("rows", f"{c['rows_a']:,} → {c['rows_b']:,} ({c['both']:,} in both, {c['only_b']:,} new, {c['only_a']:,} gone)")
    head.add_row("decision changed", f"{c['changed']:,} of {c['both']:,} rows in both ({c['churn_fraction']:.2%})")
    trans = Table(title="changed rows by reason", title_justify="left")
    for col in ("from", "to", "rows"):
        trans.add_column(col, justify="right" if col == "rows" else "left")
    for t in d["transitions"]:
        trans.add_row(t["reason_a"], t["reason_b"], f"{t['rows']:,}")
    rows = Table(title=f"first {len(d['rows'])} changed rows" + (f" (all in {out})" if out else ""), title_justify="left")
    for col in ("row_id", "label", "from", "to"):
        rows.add_column(col)
    for r in d["rows"]:
        rows.add_row(r["row_id"], _fmt(r["label"]), r["reason_a"], r["reason_b"])
    _emit(d, json_, Group(head, trans, rows) if d["transitions"] else head)


@app.command("restore", rich_help_panel=AUDIT)
def restore_command(run: str = typer.Argument(..., help="Run id or unique prefix."),
                    reason: list[str] = typer.Option(..., "--reason", help="A drop reason to put back (repeat for several)."),
                    out: Optional[Path] = typer.Option(None, "--out", help="Output file (.parquet, .csv or .tsv); default restore-<run>.parquet."),
                    ids_only: bool = typer.Option(False, "--ids-only", help="Write only the manifest columns (row_id, label, decision, reason, weight); do not read the input table."),
                    store: Optional[Path] = _STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = _JSON) -> None:
    """Write the kept rows plus the dropped rows of the given reasons, with re-balanced weights."""
    store = _store(store, config, json_)
    if out is None:
        out = Path(f"restore-{run}.parquet")
    r = _audit("restore", json_, store, run, reason, out, rows=not ids_only)
    table = _fields(f"restore from run {r['run_id']}")
    table.add_row("rows written", f"{r['rows']:,} = {r['kept']:,} kept + {r['restored']:,} restored ({', '.join(r['reasons'])})")
    table.add_row("written to", r["out"])
    _emit(r, json_, table)


@app.command("report", rich_help_panel=AUDIT)
def report_command(run: str = typer.Argument(..., help="Run id, unique prefix, or latest."),
                   list_: Optional[str] = typer.Option(None, "--list", help="Instead, print every row to review: suspect or conflict."),
                   store: Path = _STORE, json_: bool = _JSON) -> None:
    """(Re)build a run's report.html from its files, so older runs get the current page."""
    from .store import page

    try:
        if list_ is None:
            Console().print(f"wrote {page.rebuild(store, run)}", soft_wrap=True, highlight=False)
            return
        run_id, rows = page.review_list(store, run, list_)
    except LeansetError as exc:
        _fail(exc)
    from rich.table import Table

    table = Table(title=f"{len(rows):,} {list_} rows of run {run_id}", title_justify="left", box=box.SIMPLE_HEAD)
    cols = ["row_id", "label", "decision", "reason", "aum", "el2n", "confidence"]
    for col in cols:
        table.add_column(col)
    for r in rows:
        table.add_row(*(_fmt(r.get(c)) for c in cols))
    _emit(rows, json_, table)


@app.command("open-data", rich_help_panel=TOOLS)
def open_data(
    name: str = typer.Argument(..., help="digits, breast_cancer, wine, iris or diabetes."),
    out: Path = typer.Option(..., help="Parquet file to write."),
) -> None:
    """Write one of scikit-learn's bundled datasets as a parquet table (label column: label)."""
    from .tools.datasets import export_bundled

    try:
        path = export_bundled(name, out)
    except LeansetError as exc:
        _fail(exc)
    Console().print(f"wrote {path}")


bench_app = typer.Typer(no_args_is_help=True, help="Benchmarks that print figures (time, peak memory).")
app.add_typer(bench_app, name="bench", rich_help_panel=TOOLS)


@bench_app.command("score")
def bench_score_command(
    rows: int = typer.Option(100_000, min=100, help="Rows of the invented table."),
    features: int = typer.Option(50, min=1, help="Float32 feature columns."),
    classes: int = typer.Option(3, min=2, help="Label classes."),
    folds: int = typer.Option(5, help="proxy.folds."),
    rounds: int = typer.Option(60, help="proxy.rounds."),
    checkpoint_every: int = typer.Option(5, help="proxy.checkpoint_every."),
    threshold_samples: bool = typer.Option(True, help="proxy.threshold_samples: include the two AUM threshold-sample passes."),
    seed: int = typer.Option(0, help="seed."),
) -> None:
    """Time the score stage against K plain fits of the same gbdt proxy; the last line is score_overhead_ratio=…"""
    from pydantic import ValidationError

    from .tools.bench import bench_score
    from .config import Config
    from .errors import ConfigError

    try:
        cfg = Config.model_validate({"input": {"path": "bench", "label": "label"}, "seed": seed, "proxy": {
            "folds": folds, "rounds": rounds, "checkpoint_every": checkpoint_every, "threshold_samples": threshold_samples}})
    except ValidationError as err:
        _fail(ConfigError(f"bench score: {err.errors()[0]['loc'][-1]}: {err.errors()[0]['msg']}"))
    for line in bench_score(rows, features, classes, cfg).lines():
        typer.echo(line)


@bench_app.command("make-table")
def bench_make_table_command(
    rows: int = typer.Option(..., min=2, help="Rows of the invented table."),
    features: int = typer.Option(..., min=1, help="Float32 feature columns x0, x1, …"),
    classes: int = typer.Option(..., min=2, help="Label classes (int32 column label)."),
    out: Path = typer.Option(..., help="Folder to create (must not exist, or be empty)."),
    files: Optional[int] = typer.Option(None, min=1, help="Parquet files; default at most 1M rows each, at least 2."),
    seed: int = typer.Option(0, help="Seed of the generator."),
) -> None:
    """Write an invented classification table as parquet files, chunk by chunk; same seed, same rows."""
    from .tools.bench import write_table

    try:
        written = write_table(out, rows, features, classes, seed, files)
    except LeansetError as exc:
        _fail(exc)
    typer.echo(written.line())


@bench_app.command("scale")
def bench_scale_command(
    sizes: str = typer.Option("250000,500000,1000000", help="Table rows, comma-separated (at least two sizes)."),
    features: int = typer.Option(20, min=1, help="Float32 feature columns."),
    classes: int = typer.Option(3, min=2, help="Label classes."),
    dir: Optional[Path] = typer.Option(None, "--dir", help="Folder for the tables, kept and reused; default a temporary folder."),
    folds: int = typer.Option(5, help="proxy.folds."),
    rounds: int = typer.Option(60, help="proxy.rounds."),
    checkpoint_every: int = typer.Option(5, help="proxy.checkpoint_every."),
    threshold_samples: bool = typer.Option(True, help="proxy.threshold_samples: include the two AUM threshold-sample passes."),
    batch_rows: int = typer.Option(65_536, help="execution.batch_rows."),
    feature_memory_mb: float = typer.Option(1024, help="execution.feature_memory_mb."),
    seed: int = typer.Option(0, help="seed (of the tables and the run)."),
) -> None:
    """Time load, score and select on parquet tables of growing size, one fresh process each; the last line is time_exponent=…"""
    from pydantic import ValidationError

    from .tools.bench import bench_scale
    from .config import Config
    from .errors import ConfigError

    try:
        rows = [int(part) for part in sizes.split(",") if part.strip()]
    except ValueError:
        _fail(ConfigError(f"--sizes {sizes}: not whole numbers; give row counts separated by commas, e.g. 250000,500000,1000000"))
    try:
        cfg = Config.model_validate({"input": {"path": "bench", "label": "label"}, "seed": seed, "proxy": {
            "folds": folds, "rounds": rounds, "checkpoint_every": checkpoint_every, "threshold_samples": threshold_samples},
            "execution": {"batch_rows": batch_rows, "feature_memory_mb": feature_memory_mb}})
    except ValidationError as err:
        _fail(ConfigError(f"bench scale: {err.errors()[0]['loc'][-1]}: {err.errors()[0]['msg']}"))
    try:
        for line in bench_scale(rows, features, classes, cfg, dir):
            typer.echo(line)
    except LeansetError as exc:
        _fail(exc)


@bench_app.command("economics")
def bench_economics_command(
    rows: int = typer.Option(1_000_000, min=1000, help="Rows of the invented table."),
    features: int = typer.Option(30, min=2, help="Float32 feature columns (20 informative, the rest mixes of them)."),
    classes: int = typer.Option(4, min=2, help="Label classes."),
    flip: float = typer.Option(0.03, help="Share of labels moved to another class."),
    copies: int = typer.Option(10, min=1, help="Rows per prototype on average (row redundancy)."),
    rounds: int = typer.Option(1000, min=1, help="Target boosting rounds."),
    leaves: int = typer.Option(127, min=2, help="Target num_leaves."),
    threads: int = typer.Option(int(os.environ.get("OMP_NUM_THREADS", "1") or 1), min=1, help="Target num_threads (default OMP_NUM_THREADS)."),
    random_repeats: int = typer.Option(1, min=1, help="verify.random_repeats."),
    dir: Optional[Path] = typer.Option(None, "--dir", help="Folder for the table, config and store (kept); default a temporary folder."),
    seed: int = typer.Option(0, help="Seed of the table and the run."),
) -> None:
    """Whole pipeline (fraction auto) on an invented redundant table with an expensive target; the last line is end_to_end_speedup=…"""
    import tempfile

    from .tools.economics import economics_config, economics_lines, write_economics_table
    from .flows import prune_flow
    from .report.summary import read_run

    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
    with tempfile.TemporaryDirectory(prefix="leanset-economics-") as scratch:
        folder = Path(dir) if dir is not None else Path(scratch)
        try:
            table = write_economics_table(folder / f"table-{rows}-{features}-{classes}-{seed}", rows, features, classes,
                                          flip, copies, seed)
            run_dir = prune_flow(str(economics_config(folder, table, rounds, leaves, threads, random_repeats, seed)))
        except LeansetError as exc:
            _fail(exc)
        for line in economics_lines(read_run(run_dir), rows):
            typer.echo(line)


@bench_app.command("suite")
def bench_suite_command(
    quick: bool = typer.Option(False, "--quick", help="CI-sized invented tables (4,000 rows) and a 100-round target."),
    tables: Optional[str] = typer.Option(None, help="Only these suite tables, comma-separated."),
    rows: Optional[int] = typer.Option(None, min=500, help="Rows of the invented tables (default 200,000, or 4,000 with --quick)."),
    set_: list[str] = typer.Option([], "--set", help="A selection key to measure instead of its default, KEY=VALUE (YAML value); repeatable."),
    seed: int = typer.Option(0, help="seed (of the tables and the runs)."),
) -> None:
    """The default selection rule against same-size random subsets over a fixed list of tables; the last line is below_random=N above_mean=M points=P"""
    import yaml

    from .errors import ConfigError
    from .tools.suite import TABLES, run_suite

    names = None if tables is None else [t.strip() for t in tables.split(",") if t.strip()]
    unknown = sorted(set(names or []) - {t.name for t in TABLES})
    if unknown:
        _fail(ConfigError(f"--tables: unknown table {', '.join(unknown)}; choose from {', '.join(t.name for t in TABLES)}"))
    selection = {}
    for item in set_:
        key, eq, value = item.partition("=")
        if not eq:
            _fail(ConfigError(f"--set {item}: write it as KEY=VALUE, e.g. --set quotas=balanced"))
        selection[key.strip().removeprefix("selection.")] = yaml.safe_load(value)
    try:
        for line in run_suite(quick=quick, seed=seed, selection=selection, tables=names, rows=rows):
            typer.echo(line)
    except LeansetError as exc:
        _fail(exc)


def main() -> None:
    """Console-script entry point.

    A problem of the input or the environment (a ``LeansetError``, an ``OSError`` such as a full
    disk or a denied write, memory running out) is one line and exit 2; any other error is one
    line naming a log file that holds its traceback, and exit 1. Without ``--verbose``, Prefect logs
    nothing below CRITICAL, so that a failed task's traceback reaches the log file, not the terminal.
    """
    import sys

    if "--verbose" not in sys.argv[1:]:
        os.environ.setdefault("PREFECT_LOGGING_LEVEL", "CRITICAL")
    try:
        app()
    except LeansetError as exc:
        _line(str(exc))
    except OSError as exc:
        where = f"{exc.filename}: " if exc.filename else ""
        _line(f"{where}{exc.strerror or exc}; check that the path exists, its permissions and the free space")
    except MemoryError:
        _line("out of memory; lower execution.feature_memory_mb so that features are read in batches, or use a larger machine")
    except Exception as exc:
        first = (str(exc).splitlines() or [""])[0]
        _line(f"{type(exc).__name__}: {first} (unexpected, a leanset bug; the traceback is in {_traceback_log()})",
              code=1, kind="internal error")


def _line(message: str, code: int = 2, kind: str = "error") -> None:
    from rich.markup import escape

    _err.print(f"[red]leanset: {kind}:[/red] {escape(message)}", soft_wrap=True, highlight=False)
    raise SystemExit(code)


def _traceback_log() -> Path:
    """Write the exception being handled, with its traceback, to a new log file; return its path."""
    import tempfile
    import traceback

    folder = Path(os.environ.get("LEANSET_LOG_DIR") or tempfile.gettempdir())
    folder.mkdir(parents=True, exist_ok=True)
    fd, name = tempfile.mkstemp(prefix="leanset-error-", suffix=".log", dir=folder)
    with os.fdopen(fd, "w") as handle:
        handle.write(traceback.format_exc())
    return Path(name)
