"""Prefect tasks and flows: the run's outline, load → score → select → verify → write.

Each stage is a plain function of its own module and each task calls one. Tasks take large
in-memory frames, so Prefect does not cache them by input hash (``NO_CACHE``); the score stage
keeps its own cache under the store (:mod:`leanset.cache`) and ends ``Cached`` when it used it.
The load and write tasks retry on I/O errors. Stage logs (the ``leanset`` loggers of the standard
``logging`` module) are sent to Prefect's API with the task run that logged them, and every flow
run publishes its artifacts (summary, reasons table, link to the report). A run whose verdict is
``fail`` ends in a Failed flow run.
"""

from __future__ import annotations

import os

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
# the temporary local API starts in a few seconds on a free machine; Prefect gives it 20 s, which a busy
# 2-core machine can exceed (measured: a timed-out start at load average 6), so allow more unless set
os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")

import contextlib  # noqa: E402
import contextvars  # noqa: E402
import functools  # noqa: E402
import logging  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402
from types import SimpleNamespace  # noqa: E402
from typing import Any  # noqa: E402

import pandas as pd  # noqa: E402
import pyarrow as pa  # noqa: E402
from prefect import flow, task  # noqa: E402
from prefect.cache_policies import NO_CACHE  # noqa: E402
from prefect.context import FlowRunContext  # noqa: E402
from prefect.states import Completed, Failed, State  # noqa: E402

from .config import Config, load_config  # noqa: E402
from .load.memory import release_memory  # noqa: E402
from .load.rows import RowFrame  # noqa: E402
from .load.table import load_table  # noqa: E402
from .preflight import Checked, ensure_checked  # noqa: E402
from .scores.cache import cached_scores  # noqa: E402
from .scores.target_agreement import agreement  # noqa: E402
from .scores.dynamics import Scores, score  # noqa: E402
from .select import Selection, select_frame, stabilise  # noqa: E402
from .store.lineage import CarriedVerdict, ParentRun, VerifyPlan, plan_verification, read_parent  # noqa: E402
from .store.publish import store_lock, write_run  # noqa: E402
from .verify.frontier import FractionEvaluator, choose_fraction, frontier_files, sweep  # noqa: E402
from .verify.reuse import keep_full_fit, reused_full_fit  # noqa: E402
from .verify.verdict import Verdict, verify  # noqa: E402

logger = logging.getLogger(__name__)

#: Callables told the name of each stage as it starts (the CLI draws its progress display from them).
STAGE_LISTENERS: list = []

#: Seconds per stage of the run in progress, written into run.json's ``timings``.
_TIMINGS: contextvars.ContextVar[dict[str, float]] = contextvars.ContextVar("leanset_timings")


def _stage(name: str):
    """Announce the stage to the listeners, record its seconds in the run's timings, and hand the
    memory it freed back to the system (the next stage's peak does not carry this one's leftovers)."""
    def wrap(fn):
        @functools.wraps(fn)
        def timed(*args, **kwargs):
            for listen in STAGE_LISTENERS:
                listen(name)
            t0 = time.perf_counter()
            out = fn(*args, **kwargs)
            release_memory()
            timings = _TIMINGS.get(None)
            if timings is not None:
                timings[name] = round(time.perf_counter() - t0, 3)
            return out
        return timed
    return wrap


def _io_error(task, task_run, state) -> bool:
    """Retry only transient I/O failures, never bad input."""
    return isinstance(state.result(raise_on_failure=False), OSError)


@task(name="load", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
@_stage("load")
def load_task(config: Config, table: pa.Table | None = None) -> RowFrame:
    return load_table(config, table)


def _score(frame: RowFrame, config: Config, use_cache: bool) -> tuple[Scores, bool]:
    if config.execution.engine == "dask":
        from .scores.cluster import score as score_on_cluster

        # the cluster of the DaskTaskRunner that dask_flow runs with
        return cached_scores(frame, config, lambda: score_on_cluster(frame, config, FlowRunContext.get().task_runner.client), use_cache)
    return cached_scores(frame, config, lambda: score(frame, config), use_cache)


@task(name="score", cache_policy=NO_CACHE)
@_stage("score")
def score_task(frame: RowFrame, config: Config, use_cache: bool = True) -> State:
    """The scores, in a Completed state; named Cached, as Prefect names a cached task run's state,
    when they came from the store's cache."""
    scores, hit = _score(frame, config, use_cache)
    return Completed(name="Cached" if hit else "Completed", data=scores,
                     message="scores read from the store's cache" if hit else None)


@task(name="agreement", cache_policy=NO_CACHE)
@_stage("agreement")
def agreement_task(frame: RowFrame, scores: Scores, config: Config) -> dict | None:
    return agreement(frame, scores, config)


@task(name="select", cache_policy=NO_CACHE)
@_stage("select")
def select_task(frame: RowFrame, scores: Scores, config: Config) -> Selection:
    return select_frame(frame, scores, config)


@task(name="verify", cache_policy=NO_CACHE)
@_stage("verify")
def verify_task(frame: RowFrame, selection: Selection, config: Config,
                evaluator: FractionEvaluator | None) -> tuple[Verdict, dict]:
    """The verdict, and whether the full-data fit was reused (``run.json`` ``verification.full_fit``)."""
    # the evaluator of a searched fraction already holds the full-data fit and both feature sets;
    # otherwise an earlier run's fit on the same training rows and target is reused when kept
    reference, reuse = (evaluator.reference, {"reused": False}) if evaluator is not None else reused_full_fit(frame, config)
    verdict = verify(frame, selection, config, reference)
    if reference is None:
        keep_full_fit(frame, config, verdict)
    logger.info("verify: %s, delta %s %+.4f, interval [%+.4f, %+.4f], tolerance %s", verdict.status, verdict.metric,
                verdict.delta, *verdict.ci, verdict.tolerance)
    return verdict, reuse


@task(name="plan-verify", cache_policy=NO_CACHE)
def plan_task(frame: RowFrame, selection: Selection, config: Config) -> VerifyPlan:
    return plan_verification(config, frame.row_id[frame.train], selection.keep)


@task(name="fit-full", cache_policy=NO_CACHE)
@_stage("fit-full")
def full_fit_task(frame: RowFrame, scores: Scores, config: Config) -> FractionEvaluator:
    return FractionEvaluator(frame, scores, config)


@task(name="search-fraction", cache_policy=NO_CACHE)
@_stage("search-fraction")
def search_task(frame: RowFrame, scores: Scores, config: Config) -> tuple[float, list[dict]]:
    return choose_fraction(frame, scores, config)


@task(name="frontier", cache_policy=NO_CACHE)
@_stage("frontier")
def frontier_task(evaluator: FractionEvaluator, config: Config) -> pd.DataFrame:
    return sweep(evaluator, config.selection.grid)


@task(name="parent", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def parent_task(config: Config) -> ParentRun | None:
    return read_parent(config)


@task(name="stabilise", cache_policy=NO_CACHE)
@_stage("stabilise")
def stabilise_task(frame: RowFrame, scores: Scores, fresh: Selection, parent: ParentRun, config: Config) -> Selection:
    previous, pct = parent.align(frame.row_id[frame.train])
    return stabilise(fresh, scores.difficulty(config.selection.score), frame.groups[frame.train], previous, pct,
                     config.selection.hysteresis, config.seed)


@task(name="write", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def write_task(frame, scores, selection, verdict, config, parent, extra, files) -> str:
    return str(write_run(frame, scores, selection, verdict, config, dict(_TIMINGS.get()), parent=parent, locked=True,
                         extra=extra, files=files))


def _score_in_flow(frame: RowFrame, config: Config, use_cache: bool = True) -> Scores:
    # a task that returns a state hands back that state, Cached or not; its result is the scores
    return score_task(frame, config, use_cache, return_state=True).result()


#: The stages as Prefect tasks (inside a flow) ...
TASKS = SimpleNamespace(load=load_task, parent=parent_task, score=_score_in_flow, agreement=agreement_task,
                        fit_full=full_fit_task, search=search_task, select=select_task, stabilise=stabilise_task, plan=plan_task,
                        verify=verify_task, frontier=frontier_task, write=write_task)
#: ... and as the plain functions they call, for a run without Prefect (``leanset.prune``).
PLAIN = SimpleNamespace(**{name: t.fn for name, t in vars(TASKS).items() if name != "score"},
                        score=lambda frame, config, use_cache=True: score_task.fn(frame, config, use_cache).data)


def run_stages(config: Config, stages: SimpleNamespace = TASKS, wait: float = 0.0, frontier: bool = False,
               use_cache: bool = True, table: pa.Table | None = None) -> str:
    """The run's outline; returns the run directory.

    The store lock is held from start to end, so the parent run read here is still the last run
    when this one is published; a second run waits up to ``wait`` seconds, then stops.

    Parameters
    ----------
    stages : namespace
        :data:`TASKS` inside a flow, :data:`PLAIN` without Prefect.
    table : pyarrow.Table, optional
        The input rows in memory, read in place of ``input.path``.
    """
    token = _TIMINGS.set({})
    try:
        with store_lock(config.store, wait):
            frame = stages.load(config, table)
            parent = stages.parent(config)
            scores = stages.score(frame, config, use_cache)
            scores.info["agreement"] = stages.agreement(frame, scores, config)
            auto = config.selection.fraction == "auto"
            evaluator = stages.fit_full(frame, scores, config) if frontier else None
            extra: dict[str, Any] = {}
            if auto:  # chosen on a validation slice of the training rows; the holdout judges it once, in verify
                fraction, tried = stages.search(frame, scores, config)
                extra["search"] = {"strategy": config.selection.strategy, "fraction": fraction, "tried": tried}
                config = config.model_copy(update={"selection": config.selection.model_copy(update={"fraction": fraction})})
            selection = stages.select(frame, scores, config)
            if parent is not None:
                selection = stages.stabilise(frame, scores, selection, parent, config)
            # the cadence applies when no full-data fit was made for the fraction search or the frontier
            plan = (stages.plan(frame, selection, config) if evaluator is None and not auto
                    else VerifyPlan(True, "fraction searched or frontier swept: verified"))
            extra["verification"] = {"verified": plan.verify, "reason": plan.reason}
            verdict = CarriedVerdict(plan)
            if plan.verify:
                verdict, extra["verification"]["full_fit"] = stages.verify(frame, selection, config, evaluator)
            files: dict[str, bytes] = {}
            if frontier:
                front = stages.frontier(evaluator, config)
                extra["frontier"] = front.to_dict(orient="records")
                files = frontier_files(front, config.verify.metric)
            evaluator = None
            frame.release_features()  # every model is trained; the write stage reads no features
            release_memory()
            return stages.write(frame, scores, selection, verdict, config, parent, extra, files)
    finally:
        _TIMINGS.reset(token)


def _config(config: Config | str | Path, overrides: dict[str, Any] | None) -> Config:
    return config if isinstance(config, Config) else load_config(config, overrides)


@contextlib.contextmanager
def _stage_logs():
    """Send the stages' ``leanset`` log records to Prefect's API while a flow runs.

    When the ``leanset`` logger has no level of its own, its INFO records go to Prefect only (not
    to the console handlers of the root logger) for the flow's duration."""
    from prefect.logging.handlers import APILogHandler

    root = logging.getLogger("leanset")
    handler, level, propagate = APILogHandler(), root.level, root.propagate
    root.addHandler(handler)
    if level == logging.NOTSET:
        root.setLevel(logging.INFO)
        root.propagate = False
    try:
        yield
    finally:
        root.removeHandler(handler)
        root.setLevel(level)
        root.propagate = propagate


def _publish(run_dir: str) -> State | str:
    """Publish the run's artifacts; a Failed state (holding the run directory) when its verdict is fail."""
    from .report.summary import read_run

    publish_task(run_dir)
    status = read_run(run_dir)["verdict"]["status"]
    if status == "fail":
        return Failed(message=f"verdict fail: the kept rows' model is outside the tolerance; see {run_dir}", data=run_dir)
    return run_dir


@flow(name="leanset-prune", log_prints=False)
def prune_flow(config: Config | str, overrides: dict[str, Any] | None = None, wait: float = 0.0,
               use_cache: bool = True, checked: Checked | None = None) -> str:
    """One run: load, score, search the fraction when it is ``auto``, select (stable against the
    parent run), verify, write, publish its artifacts; returns the run directory.

    ``config`` is a validated :class:`~leanset.config.Config`, or the path of a YAML config to
    which ``overrides`` (dotted keys) apply. The flow run ends Failed when the verdict is ``fail``.
    ``checked`` is what :func:`~leanset.preflight.preflight` returned for this config, when the
    caller already ran it; without it the flow runs it first.
    """
    with _stage_logs():
        run_dir = _on_engine(_config(config, overrides), wait, frontier=False, use_cache=use_cache, checked=checked)
        return _publish(run_dir)


@flow(name="leanset-frontier", log_prints=False)
def frontier_flow(config: Config | str, overrides: dict[str, Any] | None = None, wait: float = 0.0,
                  use_cache: bool = True, checked: Checked | None = None) -> str:
    """A run plus the frontier: every grid fraction × strategy, judged against one full-data fit.
    It ends Completed whatever the verdict at the configured fraction: the frontier is the result."""
    with _stage_logs():
        run_dir = _on_engine(_config(config, overrides), wait, frontier=True, use_cache=use_cache, checked=checked)
        publish_task(run_dir)
        return run_dir


@flow(name="leanset-dask", log_prints=False)
def dask_flow(config: Config, wait: float, frontier: bool, use_cache: bool = True) -> str:
    """The run's outline under a ``prefect_dask.DaskTaskRunner``, whose cluster the score stage uses."""
    return run_stages(config, TASKS, wait, frontier, use_cache)


def _on_engine(config: Config, wait: float, frontier: bool, use_cache: bool, checked: Checked | None = None) -> str:
    """The run in the calling flow (``execution.engine: local``), or in :func:`dask_flow` on the
    scheduler at ``execution.address`` or a local cluster of ``execution.workers`` processes (``dask``)."""
    ensure_checked(config, checked)  # everything checkable, before the lock is taken or any fit starts
    execution = config.execution
    if execution.engine == "local":
        return run_stages(config, TASKS, wait, frontier, use_cache)
    from .scores.cluster import local_cluster_kwargs
    from prefect_dask import DaskTaskRunner

    runner = (DaskTaskRunner(address=execution.address) if execution.address
              else DaskTaskRunner(cluster_kwargs=local_cluster_kwargs(execution)))
    return dask_flow.with_options(task_runner=runner)(config, wait, frontier, use_cache)


@task(name="publish", cache_policy=NO_CACHE)
def publish_task(run_dir: str) -> None:
    """Prefect artifacts of a run: a markdown summary, a table of row counts by reason, a link to its report."""
    import pyarrow.parquet as pq
    from prefect.artifacts import create_link_artifact, create_markdown_artifact, create_table_artifact

    from .report.summary import markdown_summary, read_run, reason_counts

    run = read_run(run_dir)
    create_markdown_artifact(markdown_summary(run, run_dir), key="leanset-summary",
                             description=f"leanset run {run['run_id']}")
    create_table_artifact(reason_counts(pq.read_table(Path(run_dir) / "manifest.parquet", columns=["row_id", "decision", "reason"])),
                          key="leanset-reasons", description=f"rows by reason in run {run['run_id']}")
    create_link_artifact((Path(run_dir).resolve() / "report.html").as_uri(), link_text="report.html", key="leanset-report",
                         description=f"the report of run {run['run_id']}")


@flow(name="leanset-scheduled", log_prints=False)
def scheduled_flow(config_path: str, wait: float = 0.0) -> State | str:
    """A scheduled run over a growing table: the run, linked to its parent, with its artifacts; it
    ends Failed when the verdict is ``fail``."""
    state = prune_flow(config_path, None, wait, return_state=True)
    # a failed run's state ends this flow Failed too; otherwise the run directory is the result
    return state if state.is_failed() else state.result()
