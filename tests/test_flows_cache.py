"""The flows as Prefect users see them: the score stage's cache, task states, artifacts, Failed runs, exit codes."""

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from prefect.client.orchestration import get_client
from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId

from leanset.config import load_config
from leanset.flows import prune_flow
from store_helpers import config as write_config, manifest, published, runner, run_json
from leanset.cli import app


def _table(tmp_path, n=600, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    label = np.where(x[:, 0] + 0.3 * rng.normal(size=n) > 0.3, "b", "a")
    label[: n // 6] = "c"
    path = tmp_path / "t.parquet"
    pd.DataFrame({"x0": x[:, 0], "x1": x[:, 1], "x2": x[:, 2], "label": label}).to_parquet(path)
    return path


def _task_states(flow_run_id) -> dict[str, str]:
    """Prefect's final state name of each task run of a flow run, by task name."""
    import asyncio

    async def read():
        async with get_client() as client:
            runs = await client.read_task_runs(flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[flow_run_id])))
            return {r.name.rsplit("-", 1)[0]: r.state.name for r in runs}

    return asyncio.run(read())


def _artifact_keys(flow_run_id) -> set[str]:
    import asyncio

    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterFlowRunId

    async def read():
        async with get_client() as client:
            arts = await client.read_artifacts(artifact_filter=ArtifactFilter(flow_run_id=ArtifactFilterFlowRunId(any_=[flow_run_id])))
            return {a.key for a in arts}

    return asyncio.run(read())


def _logs(flow_run_id) -> list[tuple[str, bool]]:
    """The messages Prefect's API holds for a flow run, each with whether a task run logged it."""
    import asyncio

    from prefect.client.schemas.filters import LogFilter, LogFilterFlowRunId
    from prefect.logging.handlers import APILogWorker

    APILogWorker.drain_all()

    async def read():
        async with get_client() as client:
            logs = await client.read_logs(log_filter=LogFilter(flow_run_id=LogFilterFlowRunId(any_=[flow_run_id])))
            return [(log.message, log.task_run_id is not None) for log in logs]

    return asyncio.run(read())


def _run(cfg, **overrides):
    state = prune_flow(load_config(cfg, overrides or None), return_state=True)
    return state, Path(state.result(raise_on_failure=False))


def test_second_run_reads_the_scores_from_the_cache_and_a_proxy_change_rescores(prefect_api, tmp_path):
    cfg = write_config(tmp_path, _table(tmp_path), proxy__agreement_rows=0, verify__tolerance=1.0, verify__class_tolerance=1.0)
    first, dir1 = _run(cfg)
    second, dir2 = _run(cfg)
    assert _task_states(first.state_details.flow_run_id)["score"] == "Completed"
    assert _task_states(second.state_details.flow_run_id)["score"] == "Cached"
    assert run_json(dir1)["scores"]["cache"]["hit"] is False and run_json(dir2)["scores"]["cache"]["hit"] is True
    a, b = manifest(dir1), manifest(dir2)
    pd.testing.assert_frame_equal(a, b)  # identical scores and decisions
    # every flow run publishes its artifacts
    assert {"leanset-summary", "leanset-reasons", "leanset-report"} <= _artifact_keys(second.state_details.flow_run_id)
    # the stages' standard-library log records reach Prefect, attached to their task runs
    first_logs, second_logs = _logs(first.state_details.flow_run_id), _logs(second.state_details.flow_run_id)
    assert any(m.startswith("load: 600 rows") and by_task for m, by_task in first_logs), first_logs
    assert any(m.startswith("score: 480 training rows") and by_task for m, by_task in first_logs), first_logs
    assert any(m.startswith("score stage: cache hit") and by_task for m, by_task in second_logs), second_logs

    # another fraction reuses the scores ...
    _, dir3 = _run(cfg, **{"selection.fraction": 0.2})
    assert run_json(dir3)["scores"]["cache"]["hit"] is True
    # ... fewer proxy rounds do not, and neither does use_cache=False
    changed, dir4 = _run(cfg, **{"proxy.rounds": 12})
    assert _task_states(changed.state_details.flow_run_id)["score"] == "Completed"
    assert run_json(dir4)["scores"]["cache"]["hit"] is False
    assert not np.allclose(manifest(dir4)["aum"].fillna(0), a["aum"].fillna(0))
    fresh = prune_flow(load_config(cfg), use_cache=False, return_state=True)
    assert _task_states(fresh.state_details.flow_run_id)["score"] == "Completed"
    assert run_json(Path(fresh.result()))["scores"]["cache"]["hit"] is False
    # a changed row misses too: the key holds the table's fingerprint
    df = pd.read_parquet(tmp_path / "t.parquet")
    df.loc[5, "x0"] += 1.0
    df.to_parquet(tmp_path / "t.parquet")
    _, dir6 = _run(cfg)
    assert run_json(dir6)["scores"]["cache"]["hit"] is False
    # the run records stage timings as before
    assert set(run_json(dir6)["timings"]) >= {"load", "score", "select", "verify", "write"}


@pytest.mark.parametrize("overrides, status", [
    # a tolerance no kept subset can miss (class guard off): pass
    ({"verify__tolerance": 1.0, "verify__class_tolerance": 1.0}, "pass"),
    # the easiest 5 % with a zero tolerance: the kept model is clearly worse, so the interval lies above it
    ({"verify__tolerance": 0.0, "selection__fraction": 0.05, "selection__strategy": "easiest", "selection__class_floor": 0,
      "selection__dedupe": False}, "fail"),
    # half the rows against a zero tolerance: the interval straddles it (measured: Δ 0.0, [-0.017, +0.025])
    ({"verify__tolerance": 0.0, "verify__class_tolerance": 1.0, "selection__fraction": 0.2}, "inconclusive"),
])
def test_fail_on_exit_codes_and_failed_flow_runs(prefect_api, tmp_path, overrides, status):
    cfg = write_config(tmp_path, _table(tmp_path), proxy__agreement_rows=0, **overrides)
    codes = {}
    for fail_on in ("fail", "inconclusive"):
        result = runner.invoke(app, ["run", str(cfg), "--fail-on", fail_on])
        codes[fail_on] = result.exit_code
        assert result.exception is None or isinstance(result.exception, SystemExit), result.output
    assert {run_json(d)["verdict"]["status"] for d in published(tmp_path / "store")} == {status}
    expected = {"pass": {"fail": 0, "inconclusive": 0},
                "fail": {"fail": 3, "inconclusive": 3},
                "inconclusive": {"fail": 0, "inconclusive": 4}}[status]
    assert codes == expected
    state = prune_flow(load_config(cfg), return_state=True)
    assert state.is_failed() == (status == "fail")
    # a Failed flow run still holds its published run directory
    assert json.loads((Path(state.result(raise_on_failure=False)) / "run.json").read_text())["verdict"]["status"] == status


def test_bad_input_exits_2_even_with_fail_on(tmp_path):
    cfg = write_config(tmp_path, tmp_path / "absent.parquet")
    result = runner.invoke(app, ["run", str(cfg), "--fail-on", "inconclusive"])
    assert result.exit_code == 2 and "absent.parquet" in result.output
