"""Kills at seeded random moments: a run killed anywhere leaves no partial run and a free lock.

A reference run gives the timeline of the stages (start-up until the store lock is taken, then
the stage seconds of its run.json); twenty moments are drawn with a seeded generator, spread
evenly over those stages, and a ``leanset run`` subprocess is killed with SIGKILL at each. After
every kill the store shows only complete, conserved runs (every input row in the manifest exactly
once) and its lock can be taken at once; after every fifth kill, and at the end, the next run
completes with conservation and clears what the killed runs left hidden.
"""

from __future__ import annotations

import fcntl
import signal
import time

import numpy as np
import pyarrow.parquet as pq

from store_helpers import assert_conserved, config, part, published, run_json, run_ok, subprocess_run

KILLS = 20


def _ids(folder) -> set:
    return set(pq.read_table(folder, columns=["rid"]).column("rid").to_pylist())


def _lock_free(store) -> bool:
    with open(store / ".lock", "a+") as handle:
        try:
            fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            return False
        fcntl.flock(handle, fcntl.LOCK_UN)
        return True


def _timeline(cfg, store, api) -> list[tuple[str, float, float]]:
    """(stage, start, end) in seconds since the process started, from one uninterrupted run."""
    t0 = time.monotonic()
    proc = subprocess_run(["run", cfg], api)
    locked = None
    while proc.poll() is None:
        if locked is None and (store / ".lock").exists() and (store / ".lock").read_text().startswith("pid"):
            locked = time.monotonic() - t0
        time.sleep(0.005)
    assert proc.returncode == 0, proc.communicate()
    stages, at = [("start-up", 0.0, locked)], locked
    for name, seconds in run_json(published(store)[-1])["timings"].items():
        stages.append((name, at, at + seconds))
        at += seconds
    return stages


def test_sigkill_at_twenty_seeded_moments(prefect_api, tmp_path):
    folder = tmp_path / "t"
    part(folder, "a.parquet", 0, 3000, seed=8)
    # later runs must take as long as the timed one: no reuse of its full-data fit (verify.reuse_full_fit)
    cfg = config(tmp_path, folder, input__id="rid", verify__reuse_full_fit=False)
    store, ids = tmp_path / "store", _ids(folder)
    run_ok(cfg)  # warm the store's score cache first, so the timeline is that of the runs to be killed
    stages = _timeline(cfg, store, prefect_api)
    rng = np.random.default_rng(18)
    # stage by stage in turn, so that every stage gets kills even when one stage takes most of the time
    moments = [(stages[i % len(stages)][0], rng.uniform(*stages[i % len(stages)][1:])) for i in range(KILLS)]
    killed = 0
    for i, (stage, at) in enumerate(moments):
        before = len(published(store))
        start = time.monotonic()
        proc = subprocess_run(["run", cfg], prefect_api)
        while proc.poll() is None and time.monotonic() - start < at:
            time.sleep(0.002)
        finished = proc.poll() is not None
        if not finished:
            proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)
        proc.communicate()
        killed += proc.returncode == -signal.SIGKILL
        # a run either is published whole or is not visible at all; a kill that lands after the
        # atomic rename but before the process exits leaves a whole run, which is correct
        grown = len(published(store)) - before
        assert grown in ((1,) if proc.returncode == 0 else (0, 1)), f"kill {i} in {stage} at {at:.2f} s"
        for d in published(store):
            assert_conserved(d, ids)
        assert _lock_free(store), f"kill {i} in {stage}: the lock is still held"
        if i % 5 == 4 or i == KILLS - 1:
            run_ok(cfg, "--wait", "0")
            assert not [p for p in (store / "runs").iterdir() if p.name.startswith(".")]  # leftovers cleared
            assert_conserved(published(store)[-1], ids)
    assert killed >= KILLS - 2, f"only {killed} of {KILLS} runs were killed before they finished"
