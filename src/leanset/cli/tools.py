"""The tools beside the pipeline: ``leanset open-data`` and the ``leanset bench`` benchmarks."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Optional

import typer
from rich.console import Console

from ..errors import LeansetError
from .common import TOOLS, app, fail


@app.command("open-data", rich_help_panel=TOOLS)
def open_data(
    name: str = typer.Argument(..., help="digits, breast_cancer, wine, iris or diabetes."),
    out: Path = typer.Option(..., help="Parquet file to write."),
) -> None:
    """Write one of scikit-learn's bundled datasets as a parquet table (label column: label)."""
    from ..tools.datasets import export_bundled

    try:
        path = export_bundled(name, out)
    except LeansetError as exc:
        fail(exc)
    Console().print(f"wrote {path}")


bench_app = typer.Typer(no_args_is_help=True, help="Benchmarks that print figures (time, peak memory).")
app.add_typer(bench_app, name="bench", rich_help_panel=TOOLS)


def _bench_config(command: str, seed: int, proxy: dict, execution: dict | None = None):
    """The Config of a benchmark on an invented table, from its options; an invalid value is one line and exit 2."""
    from pydantic import ValidationError

    from ..config import Config
    from ..errors import ConfigError

    try:
        return Config.model_validate({"input": {"path": "bench", "label": "label"}, "seed": seed, "proxy": proxy,
                                      "execution": execution or {}})
    except ValidationError as exc:
        fail(ConfigError(f"{command}: {exc.errors()[0]['loc'][-1]}: {exc.errors()[0]['msg']}"))


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
    from ..tools.bench import bench_score

    cfg = _bench_config("bench score", seed, {"folds": folds, "rounds": rounds, "checkpoint_every": checkpoint_every,
                                              "threshold_samples": threshold_samples})
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
    from ..tools.invented import write_table

    try:
        written = write_table(out, rows, features, classes, seed, files)
    except LeansetError as exc:
        fail(exc)
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
    from ..errors import ConfigError
    from ..tools.bench import bench_scale

    try:
        rows = [int(part) for part in sizes.split(",") if part.strip()]
    except ValueError:
        fail(ConfigError(f"--sizes {sizes}: not whole numbers; give row counts separated by commas, e.g. 250000,500000,1000000"))
    cfg = _bench_config("bench scale", seed, {"folds": folds, "rounds": rounds, "checkpoint_every": checkpoint_every,
                                              "threshold_samples": threshold_samples},
                        {"batch_rows": batch_rows, "feature_memory_mb": feature_memory_mb})
    try:
        for line in bench_scale(rows, features, classes, cfg, dir):
            typer.echo(line)
    except LeansetError as exc:
        fail(exc)


SET_HELP = "A selection key to measure instead of its default, KEY=VALUE (YAML value); repeatable."


def _selection_overrides(items: list[str]) -> dict:
    """``--set KEY=VALUE`` options as selection keys (values read as YAML); a malformed one exits 2."""
    import yaml

    from ..errors import ConfigError

    selection = {}
    for item in items:
        key, eq, value = item.partition("=")
        if not eq:
            fail(ConfigError(f"--set {item}: write it as KEY=VALUE, e.g. --set quotas=balanced"))
        selection[key.strip().removeprefix("selection.")] = yaml.safe_load(value)
    return selection


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
    set_: list[str] = typer.Option([], "--set", help=SET_HELP),
) -> None:
    """Whole pipeline (fraction auto) on an invented redundant table with an expensive target; the last line is end_to_end_speedup=…"""
    import tempfile

    from ..tools.economics import economics_config, economics_lines, write_economics_table
    from ..flows import prune_flow
    from ..report.summary import read_run

    os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
    with tempfile.TemporaryDirectory(prefix="leanset-economics-") as scratch:
        folder = Path(dir) if dir is not None else Path(scratch)
        try:
            table = write_economics_table(folder / f"table-{rows}-{features}-{classes}-{seed}", rows, features, classes,
                                          flip, copies, seed)
            run_dir = prune_flow(str(economics_config(folder, table, rounds, leaves, threads, random_repeats, seed,
                                                      _selection_overrides(set_))))
        except LeansetError as exc:
            fail(exc)
        for line in economics_lines(read_run(run_dir), rows):
            typer.echo(line)


@bench_app.command("suite")
def bench_suite_command(
    quick: bool = typer.Option(False, "--quick", help="CI-sized invented tables (4,000 rows) and a 100-round target."),
    tables: Optional[str] = typer.Option(None, help="Only these suite tables, comma-separated."),
    rows: Optional[int] = typer.Option(None, min=500, help="Rows of the invented tables (default 200,000, or 4,000 with --quick)."),
    set_: list[str] = typer.Option([], "--set", help=SET_HELP),
    seed: int = typer.Option(0, help="seed (of the tables and the runs)."),
    jobs: int = typer.Option(1, min=1, help="Tables run at once, one process and one thread each (2 on a 2-core machine)."),
) -> None:
    """The default selection rule against same-size random subsets over a fixed list of tables; the last line is below_random=N above_mean=M points=P"""
    from ..errors import ConfigError
    from ..tools.suite import TABLES, run_suite

    names = None if tables is None else [t.strip() for t in tables.split(",") if t.strip()]
    unknown = sorted(set(names or []) - {t.name for t in TABLES})
    if unknown:
        fail(ConfigError(f"--tables: unknown table {', '.join(unknown)}; choose from {', '.join(t.name for t in TABLES)}"))
    try:
        for line in run_suite(quick=quick, seed=seed, selection=_selection_overrides(set_), tables=names, rows=rows,
                              jobs=jobs):
            typer.echo(line)
    except LeansetError as exc:
        fail(exc)
