"""The run store over time: a growing folder (parent links, churn, new rows), the
store lock, concurrent runs, and crash safety under SIGKILL.

Churn and new-row counts are checked against pandas merges of the manifests; conservation
against the input files read with pandas.
"""

import os
import signal
import threading
import time

import pandas as pd
import pytest

from leanset.store.publish import store_lock
from store_helpers import assert_conserved, cli, config, manifest, part, published, run_json, run_ok, subprocess_run


def _ids(folder):
    return set(pd.concat([pd.read_parquet(p, columns=["rid"]) for p in folder.glob("*.parquet")])["rid"])


def test_growing_folder_three_runs(prefect_api, tmp_path):
    """Three runs, each after new files arrive, then one on unchanged data with the same seed."""
    folder = tmp_path / "table"
    cfg = config(tmp_path, folder, input__id="rid")
    sizes = [(0, 700), (700, 140), (840, 35)]
    for day, (start, n) in enumerate(sizes):
        part(folder, f"day{day}.parquet", start, n, seed=10 + day)
        run_ok(cfg)
        assert_conserved(published(tmp_path / "store")[-1], _ids(folder))
    run_ok(cfg)  # nothing new: the same data, config and seed
    dirs = published(tmp_path / "store")
    runs = [run_json(d) for d in dirs]
    assert [r["sequence"] for r in runs] == [1, 2, 3, 4]
    assert [r["parent_run"] for r in runs] == [None, dirs[0].name, dirs[1].name, dirs[2].name]
    assert runs[0]["churn"] is None and runs[0]["counts"]["new"] == 700
    for prev, cur, r in zip(dirs, dirs[1:], runs[1:]):
        a, b = manifest(prev), manifest(cur)
        j = a.merge(b, on="row_id", suffixes=("_a", "_b"))
        flipped = (j["decision_a"] != j["decision_b"]).sum()
        ch = r["churn"]
        assert ch["parent_run"] == prev.name
        assert ch["new_rows"] == r["counts"]["new"] == len(set(b["row_id"]) - set(a["row_id"]))
        assert ch["rows_in_both"] == len(j) and ch["removed_rows"] == 0
        assert ch["rows"] == flipped and ch["fraction"] == pytest.approx(flipped / len(j))
        keep_to_drop = ((j["decision_a"] == "keep") & (j["decision_b"] == "drop")).sum()
        assert ch["keep_to_drop"] == keep_to_drop
    assert [r["counts"]["new"] for r in runs] == [700, 140, 35, 0]
    assert runs[3]["churn"]["rows"] == 0  # same data, same seed: no decision moves
    # the same decisions; a reason may now read "as in the parent run" (keep:stable / drop:stable)
    pd.testing.assert_frame_equal(manifest(dirs[2])[["row_id", "decision"]], manifest(dirs[3])[["row_id", "decision"]])


def test_another_seed_starts_another_lineage(prefect_api, tmp_path):
    cfg = config(tmp_path, part(tmp_path / "t", "a.parquet", 0, 500, seed=4))
    run_ok(cfg)
    run_ok(cfg, "--seed", "9")
    run_ok(cfg, "--fraction", "0.3")
    a, b, c = (run_json(d) for d in published(tmp_path / "store"))
    assert b["parent_run"] is None and b["lineage"] != a["lineage"]
    # the fraction is not part of the lineage: a changed or searched fraction keeps its history
    assert c["parent_run"] == a["run_id"] and c["counts"]["kept"] == round(0.3 * c["counts"]["train"])


# --- the lock and concurrent runs ---------------------------------------------------------------

def test_a_held_lock_refuses_then_lets_a_waiting_run_through(prefect_api, tmp_path):
    cfg = config(tmp_path, part(tmp_path / "t", "a.parquet", 0, 400, seed=6))
    store = tmp_path / "store"
    with store_lock(store):
        refused = cli("run", cfg, "--wait", "0.5")
    assert refused.exit_code == 2
    line = " ".join(refused.output.split())
    assert "another leanset run holds this store" in line and f"pid {os.getpid()}" in line and "--wait" in line
    assert published(store) == []

    holder = threading.Event()

    def hold():
        with store_lock(store):
            holder.set()
            time.sleep(2.0)

    t = threading.Thread(target=hold)
    t.start()
    holder.wait()
    t0 = time.monotonic()
    run_ok(cfg, "--wait", "60")
    t.join()
    assert time.monotonic() - t0 >= 1.5  # it waited for the holder
    assert_conserved(published(store)[-1], set(manifest(published(store)[-1])["row_id"]))


def test_two_concurrent_runs_on_one_store(prefect_api, tmp_path):
    folder = tmp_path / "t"
    part(folder, "a.parquet", 0, 800, seed=7)
    cfg = config(tmp_path, folder, input__id="rid")
    procs = [subprocess_run(["run", cfg, "--wait", "300"], prefect_api) for _ in range(2)]
    outs = [p.communicate(timeout=600) for p in procs]
    assert [p.returncode for p in procs] == [0, 0], outs
    dirs = published(tmp_path / "store")
    assert len(dirs) == 2
    for d in dirs:
        assert_conserved(d, _ids(folder))
    first, second = (run_json(d) for d in dirs)
    assert second["parent_run"] == first["run_id"] and second["churn"]["rows"] == 0
    # without --wait the one that comes second refuses at once
    procs = [subprocess_run(["run", cfg], prefect_api) for _ in range(2)]
    outs = [p.communicate(timeout=600) for p in procs]
    codes = sorted(p.returncode for p in procs)
    assert codes[0] == 0 and codes[1] in (0, 2), outs
    if codes[1] == 2:
        refused = next(o for p, o in zip(procs, outs) if p.returncode == 2)
        assert "another leanset run holds this store" in " ".join(refused[1].split())
    for d in published(tmp_path / "store"):
        assert_conserved(d, _ids(folder))


# --- crash safety -------------------------------------------------------------------------------

def _kill_when(proc, ready, timeout=120.0):
    """SIGKILL ``proc`` as soon as ``ready()`` holds; True if it was killed while running."""
    deadline = time.monotonic() + timeout
    try:
        while time.monotonic() < deadline:
            if proc.poll() is not None:
                return False
            if ready():
                proc.send_signal(signal.SIGKILL)
                proc.wait(timeout=30)
                return True
            time.sleep(0.002)
        raise AssertionError("the kill point was never reached")
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()


def test_sigkill_at_any_point_leaves_the_store_usable(prefect_api, tmp_path):
    """Kill a run at startup, while it holds the lock, while it writes, and just after it publishes;
    after each, the store holds only complete runs and the next run (no --wait) completes."""
    folder = tmp_path / "t"
    part(folder, "a.parquet", 0, 1500, seed=8)
    cfg = config(tmp_path, folder, input__id="rid")
    store = tmp_path / "store"
    runs = store / "runs"
    started = {}

    def after(seconds):
        return lambda: time.monotonic() - started["t"] > seconds

    def lock_held():
        lock = store / ".lock"
        return lock.exists() and lock.read_text().startswith("pid")

    def writing():
        return runs.exists() and any(p.name.startswith(".tmp-") for p in runs.iterdir())

    def published_one_more(before):
        return lambda: len(published(store)) > before

    points = {"startup": (after(0.3), True), "lock held": (lock_held, True), "writing": (writing, True)}
    for name, (ready, must_kill) in points.items():
        before = len(published(store))
        proc = subprocess_run(["run", cfg], prefect_api)
        started["t"] = time.monotonic()
        killed = _kill_when(proc, ready)
        assert killed and proc.returncode == -signal.SIGKILL, f"{name}: not killed ({proc.returncode})"
        assert len(published(store)) == before, f"{name}: a killed run is visible"
        for d in published(store):
            assert_conserved(d, _ids(folder))
        run_ok(cfg, "--wait", "0")  # no stale lock: it runs at once
        assert not any(p.name.startswith(".tmp-") for p in runs.iterdir())  # leftovers cleared
        assert_conserved(published(store)[-1], _ids(folder))
    # just after publishing: the run may be visible, and then it is complete
    before = len(published(store))
    proc = subprocess_run(["run", cfg], prefect_api)
    _kill_when(proc, published_one_more(before))
    for d in published(store):
        assert_conserved(d, _ids(folder))
    run_ok(cfg, "--wait", "0")
    assert_conserved(published(store)[-1], _ids(folder))


# --- the scheduled flow and `leanset serve` --------------------------------------------------

def test_scheduled_flow_publishes_a_summary_and_counts_by_reason(prefect_api, tmp_path):
    """Under Prefect's test harness, read the artifacts back through Prefect's client."""
    import json as _json

    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

    from leanset.flows import scheduled_flow

    folder = tmp_path / "t"
    part(folder, "a.parquet", 0, 600, seed=13)
    cfg = config(tmp_path, folder, input__id="rid")
    scheduled_flow(str(cfg))
    part(folder, "b.parquet", 600, 60, seed=14)
    run_dir = scheduled_flow(str(cfg))
    run = run_json(published(tmp_path / "store")[-1])
    assert str(published(tmp_path / "store")[-1]) == run_dir and run["parent_run"] is not None
    with get_client(sync_client=True) as client:
        arts = client.read_artifacts(artifact_filter=ArtifactFilter(key=ArtifactFilterKey(any_=["leanset-summary", "leanset-reasons"])))
    summary = [a for a in arts if a.type == "markdown" and run["run_id"] in a.data]
    table = [a for a in arts if a.type == "table" and run["run_id"] in (a.description or "")]
    assert len(summary) == 1 and len(table) == 1
    text = summary[0].data
    assert run["verdict"]["status"].upper() in text and f"{run['churn']['rows']:,} of" in text and "human review" in text
    rows = _json.loads(table[0].data) if isinstance(table[0].data, str) else table[0].data
    got = {(r["decision"], r["reason"]): r["rows"] for r in rows}
    m = manifest(published(tmp_path / "store")[-1])
    assert got == m.groupby(["decision", "reason"]).size().to_dict()


def test_serve_hands_the_schedule_to_prefect(tmp_path, monkeypatch):
    from leanset import flows

    seen = {}
    monkeypatch.setattr(flows.scheduled_flow, "serve", lambda **kw: seen.update(kw))
    cfg = config(tmp_path, part(tmp_path / "t", "a.parquet", 0, 100, seed=1))
    result = cli("serve", cfg, "--cron", "0 2 * * *", "--timezone", "Europe/Paris", "--wait", "60")
    assert result.exit_code == 0, result.output
    (schedule,) = seen["schedules"]
    assert (schedule.cron, schedule.timezone) == ("0 2 * * *", "Europe/Paris")
    assert seen["parameters"] == {"config_path": str(cfg.resolve()), "wait": 60.0}
    assert seen["name"] == "leanset-config"
    bad = cli("serve", cfg, "--cron", "every day")
    assert bad.exit_code == 2 and "Invalid cron string" in bad.output and len(bad.output.strip().splitlines()) == 1


def test_schedule_example_config_is_valid():
    """configs/schedule.yaml validates and points at a folder with hysteresis set."""
    from pathlib import Path

    from leanset.config import load_config

    cfg = load_config(Path(__file__).resolve().parents[1] / "configs" / "schedule.yaml")
    assert cfg.input.path.name == "pump_daily" and cfg.selection.hysteresis == 0.1


def test_batch_and_memory_settings_leave_the_lineage_but_the_engine_does_not():
    # batch size and streaming change no decision (tests/test_stream.py), so a run that only changes
    # them keeps its history; the dask engine trains other proxies, so it starts its own lineage
    from leanset.config import Config
    from leanset.store.lineage import lineage

    base = {"input": {"path": "t.parquet", "label": "y"}}
    one = Config.model_validate(base)
    assert lineage(one) == lineage(Config.model_validate({**base, "execution": {"batch_rows": 1000, "feature_memory_mb": 0}}))
    assert lineage(one) != lineage(Config.model_validate({**base, "execution": {"engine": "dask"}}))


def test_cadence_carries_the_last_verdict_then_new_rows_force_a_fresh_one(prefect_api, tmp_path):
    """verify.every 3: the second run carries the first run's verdict, marked carried with its source
    run; the third run would carry too, but its new rows (> verify.max_new_rows) force a verification.
    New-row counts are checked against a pandas set difference of the input ids."""
    folder = tmp_path / "table"
    cfg = config(tmp_path, folder, input__id="rid", verify__every=3, verify__max_new_rows=0.3, verify__max_churn=1.0)
    part(folder, "day0.parquet", 0, 600, seed=10)
    run_ok(cfg)
    run_ok(cfg)  # the same rows: within every threshold
    part(folder, "day1.parquet", 600, 400, seed=11)
    third = run_ok(cfg)
    dirs = published(tmp_path / "store")
    first, second, last = (run_json(d) for d in dirs)
    assert first["verification"]["verified"] and first["verdict"]["status"] != "carried"
    v = second["verdict"]
    assert second["verification"]["verified"] is False and v["status"] == "carried"
    c = v["carried"]
    assert c["from_run"] == first["run_id"] and c["status"] == first["verdict"]["status"] and c["age_runs"] == 1
    assert c["drift"]["new_rows"] == 0 and c["age_seconds"] >= 0
    assert second["cost"]["target_fits_from"] == first["run_id"] and "verify" not in second["timings"]
    assert second["cost"]["target_fit_seconds"]["full"] == pytest.approx(first["verdict"]["train_seconds"]["full"], abs=1e-3)
    assert not list((dirs[1] / "models").glob("target_*"))  # no target trained on a carried run
    # the third run: 400 new ids of 1,000 (pandas), 40 % of the training rows > 30 %
    new_ids = _ids(folder) - set(manifest(dirs[0])["row_id"])
    assert len(new_ids) == 400
    assert last["verification"]["verified"] and "new rows" in last["verification"]["reason"]
    assert last["verdict"]["status"] in ("pass", "fail", "inconclusive") and "carried" not in last["verdict"]
    # a carried verdict is never shown as a fresh pass
    shown = cli("runs", "--store", tmp_path / "store").output
    assert "carried" in shown
    assert "CARRIED, not verified on this run" in second_summary(dirs[1]) and "leanset cost" in third.output


def second_summary(run_dir) -> str:
    from rich.console import Console

    from leanset.report import read_run, summary

    console = Console(width=250, record=True)
    console.print(summary(read_run(run_dir), run_dir))
    return console.export_text()
