"""Prefect tasks and flows that run the stages in order; they orchestrate and hold no logic.

Each stage is a plain function of its own module; here each becomes a task. Tasks take large
in-memory frames, so they are not cached by input hash (``NO_CACHE``); the load and write tasks
retry on I/O errors.
"""

from __future__ import annotations

import os

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")

import time  # noqa: E402
from pathlib import Path  # noqa: E402
from typing import Any  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from prefect import flow, task  # noqa: E402
from prefect.cache_policies import NO_CACHE  # noqa: E402
from prefect.context import FlowRunContext  # noqa: E402

from .config import Config, load_config  # noqa: E402
from .verify.frontier import FractionEvaluator, choose_fraction, frontier_files, sweep  # noqa: E402
from .scores.dynamics import Scores, agreement, score  # noqa: E402
from .select.rules import Selection, select_frame, stabilise  # noqa: E402
from .store.publish import ParentRun, read_parent, store_lock, write_run  # noqa: E402
from .load.table import RowFrame, load_table  # noqa: E402
from .verify.stats import Verdict, verify  # noqa: E402


#: Callables told the name of each stage as it starts (the CLI draws its progress display from them).
STAGE_LISTENERS: list = []


def _io_error(task, task_run, state) -> bool:
    """Retry only transient I/O failures, never bad input."""
    return isinstance(state.result(raise_on_failure=False), OSError)


@task(name="load", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def load_task(config: Config) -> RowFrame:
    return load_table(config)


@task(name="score", cache_policy=NO_CACHE)
def score_task(frame: RowFrame, config: Config) -> Scores:
    if config.execution.engine == "dask":
        from .scores.cluster import score as score_on_cluster
        # the cluster of the DaskTaskRunner that dask_flow runs with
        return score_on_cluster(frame, config, FlowRunContext.get().task_runner.client)
    return score(frame, config)


@task(name="agreement", cache_policy=NO_CACHE)
def agreement_task(frame: RowFrame, scores: Scores, config: Config) -> dict | None:
    return agreement(frame, scores, config)


@task(name="select", cache_policy=NO_CACHE)
def select_task(frame: RowFrame, scores: Scores, config: Config) -> Selection:
    return select_frame(frame, scores, config)


@task(name="verify", cache_policy=NO_CACHE)
def verify_task(frame: RowFrame, selection: Selection, config: Config, evaluator: FractionEvaluator | None) -> Verdict:
    train, hold = frame.train, frame.holdout
    # the evaluator of a searched fraction already holds both feature sets
    X, X_hold = ((evaluator.X, evaluator.X_hold) if evaluator is not None
                 else (frame.feature_rows(train), frame.features(np.flatnonzero(hold))))
    return verify(X, frame.y[train], selection.keep, selection.weight,
                  X_hold, frame.y[hold], frame.classes, frame.categorical,
                  config.target, config.verify, config.seed,
                  None if frame.segments is None else frame.segments[hold], frame.segment_names,
                  full=None if evaluator is None else (evaluator.full_model_, evaluator.full_seconds_))


@task(name="fit-full", cache_policy=NO_CACHE)
def full_fit_task(frame: RowFrame, scores: Scores, config: Config) -> FractionEvaluator:
    return FractionEvaluator(frame, scores, config)


@task(name="search-fraction", cache_policy=NO_CACHE)
def search_task(frame: RowFrame, scores: Scores, config: Config) -> tuple[float, list[dict]]:
    return choose_fraction(frame, scores, config)


@task(name="frontier", cache_policy=NO_CACHE)
def frontier_task(evaluator: FractionEvaluator, config: Config) -> pd.DataFrame:
    return sweep(evaluator, config.selection.grid)


@task(name="parent", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def parent_task(config: Config) -> ParentRun | None:
    return read_parent(config)


@task(name="stabilise", cache_policy=NO_CACHE)
def stabilise_task(frame: RowFrame, scores: Scores, fresh: Selection, parent: ParentRun, config: Config) -> Selection:
    previous, pct = parent.align(frame.row_id[frame.train])
    return stabilise(fresh, scores.difficulty(config.selection.score), frame.groups[frame.train], previous, pct,
                     config.selection.hysteresis, config.seed)


@task(name="write", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def write_task(frame, scores, selection, verdict, config, timings, parent, extra, files) -> str:
    return str(write_run(frame, scores, selection, verdict, config, timings, parent=parent, locked=True,
                         extra=extra, files=files))


def _pipeline(config_path: str, overrides: dict[str, Any] | None, wait: float, frontier: bool) -> str:
    """The run's outline. The store lock is held from start to end, so the parent run read here is
    still the last run when this one is published; a second run waits up to ``wait`` seconds, then stops."""
    config = load_config(config_path, overrides)
    timings: dict[str, float] = {}

    def timed(name, fn, *args):
        for listen in STAGE_LISTENERS:
            listen(name)
        t0 = time.perf_counter()
        out = fn(*args)
        timings[name] = round(time.perf_counter() - t0, 3)
        return out

    with store_lock(config.store, wait):
        frame = timed("load", load_task, config)
        parent = parent_task(config)
        scores = timed("score", score_task, frame, config)
        scores.info["agreement"] = timed("agreement", agreement_task, frame, scores, config)
        auto = config.selection.fraction == "auto"
        evaluator = timed("fit-full", full_fit_task, frame, scores, config) if frontier else None
        extra: dict[str, Any] = {}
        files: dict[str, bytes] = {}
        if auto:  # chosen on a validation slice of the training rows; the holdout judges it once, in verify
            fraction, tried = timed("search-fraction", search_task, frame, scores, config)
            extra["search"] = {"strategy": config.selection.strategy, "fraction": fraction, "tried": tried}
            config = config.model_copy(update={"selection": config.selection.model_copy(update={"fraction": fraction})})
        selection = timed("select", select_task, frame, scores, config)
        if parent is not None:
            selection = timed("stabilise", stabilise_task, frame, scores, selection, parent, config)
        verdict = timed("verify", verify_task, frame, selection, config, evaluator)
        if frontier:
            table = timed("frontier", frontier_task, evaluator, config)
            extra["frontier"] = table.to_dict(orient="records")
            files = frontier_files(table, config.verify.metric)
        return write_task(frame, scores, selection, verdict, config, timings, parent, extra, files)


@flow(name="leanset-prune", log_prints=False)
def prune_flow(config_path: str, overrides: dict[str, Any] | None = None, wait: float = 0.0) -> str:
    """One run: load, score, search the fraction when it is ``auto``, select (stable against the
    parent run), verify, write; returns the run directory."""
    return _on_engine(config_path, overrides, wait, frontier=False)


@flow(name="leanset-frontier", log_prints=False)
def frontier_flow(config_path: str, overrides: dict[str, Any] | None = None, wait: float = 0.0) -> str:
    """A run plus the frontier: every grid fraction × strategy, judged against one full-data fit."""
    return _on_engine(config_path, overrides, wait, frontier=True)


@flow(name="leanset-dask", log_prints=False)
def dask_flow(config_path: str, overrides: dict[str, Any] | None, wait: float, frontier: bool) -> str:
    """The run's outline under a ``prefect_dask.DaskTaskRunner``, whose cluster the score stage uses."""
    return _pipeline(config_path, overrides, wait, frontier)


def _on_engine(config_path: str, overrides: dict[str, Any] | None, wait: float, frontier: bool) -> str:
    """The run in the calling flow (``execution.engine: local``), or in :func:`dask_flow` on the
    scheduler at ``execution.address`` or a local cluster of ``execution.workers`` processes (``dask``)."""
    config = load_config(config_path, overrides)
    execution = config.execution
    if execution.engine == "local":
        return _pipeline(config_path, overrides, wait, frontier)
    from .scores.cluster import check_config, local_cluster_kwargs
    from prefect_dask import DaskTaskRunner

    check_config(config)
    runner = (DaskTaskRunner(address=execution.address) if execution.address
              else DaskTaskRunner(cluster_kwargs=local_cluster_kwargs(execution)))
    return dask_flow.with_options(task_runner=runner)(config_path, overrides, wait, frontier)


@task(name="publish", cache_policy=NO_CACHE)
def publish_task(run_dir: str) -> None:
    """Prefect artifacts of a run: a markdown summary and a table of row counts by reason."""
    import pyarrow.parquet as pq
    from prefect.artifacts import create_markdown_artifact, create_table_artifact

    from .report.summary import markdown_summary, read_run, reason_counts

    run = read_run(run_dir)
    create_markdown_artifact(markdown_summary(run, run_dir), key="leanset-summary",
                             description=f"leanset run {run['run_id']}")
    create_table_artifact(reason_counts(pq.read_table(Path(run_dir) / "manifest.parquet", columns=["row_id", "decision", "reason"])),
                          key="leanset-reasons", description=f"rows by reason in run {run['run_id']}")


@flow(name="leanset-scheduled", log_prints=False)
def scheduled_flow(config_path: str, wait: float = 0.0) -> str:
    """A scheduled run over a growing table: the run (linked to its parent), then its artifacts."""
    run_dir = prune_flow(config_path, None, wait)
    publish_task(run_dir)
    return run_dir
