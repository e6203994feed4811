"""Prefect tasks and flows that run the stages in order; they orchestrate and hold no logic.

Each stage is a plain function of its own module; here each becomes a task. Tasks take large
in-memory frames, so they are not cached by input hash (``NO_CACHE``); the load and write tasks
retry on I/O errors.
"""

from __future__ import annotations

import os

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")

import time  # noqa: E402
from typing import Any  # noqa: E402

from prefect import flow, task  # noqa: E402
from prefect.cache_policies import NO_CACHE  # noqa: E402

from .config import Config, load_config  # noqa: E402
from .scores import Scores, score  # noqa: E402
from .select import Selection, select  # noqa: E402
from .store import write_run  # noqa: E402
from .table import RowFrame, load_table  # noqa: E402
from .verify import Verdict, verify  # noqa: E402


def _io_error(task, task_run, state) -> bool:
    """Retry only transient I/O failures, never bad input."""
    return isinstance(state.result(raise_on_failure=False), OSError)


@task(name="load", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def load_task(config: Config) -> RowFrame:
    return load_table(config)


@task(name="score", cache_policy=NO_CACHE)
def score_task(frame: RowFrame, config: Config) -> Scores:
    return score(frame, config)


@task(name="select", cache_policy=NO_CACHE)
def select_task(frame: RowFrame, scores: Scores, config: Config) -> Selection:
    return select(scores.difficulty(config.selection.score), frame.y[frame.train], config.selection, config.seed)


@task(name="verify", cache_policy=NO_CACHE)
def verify_task(frame: RowFrame, selection: Selection, config: Config) -> Verdict:
    train, hold = frame.train, frame.holdout
    return verify(frame.X[train], frame.y[train], selection.keep, selection.weight,
                  frame.X[hold], frame.y[hold], frame.classes, frame.categorical,
                  config.target, config.verify, config.seed)


@task(name="write", cache_policy=NO_CACHE, retries=2, retry_delay_seconds=1, retry_condition_fn=_io_error)
def write_task(frame, scores, selection, verdict, config, timings, wait) -> str:
    return str(write_run(frame, scores, selection, verdict, config, timings, wait))


@flow(name="leanset-prune", log_prints=False)
def prune_flow(config_path: str, overrides: dict[str, Any] | None = None, wait: float = 0.0) -> str:
    """One-off run: load, score, select, verify, write; returns the run directory."""
    config = load_config(config_path, overrides)
    timings: dict[str, float] = {}

    def timed(name, fn, *args):
        t0 = time.perf_counter()
        out = fn(*args)
        timings[name] = round(time.perf_counter() - t0, 3)
        return out

    frame = timed("load", load_task, config)
    scores = timed("score", score_task, frame, config)
    selection = timed("select", select_task, frame, scores, config)
    verdict = timed("verify", verify_task, frame, selection, config)
    return write_task(frame, scores, selection, verdict, config, timings, wait)
