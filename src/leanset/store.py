"""Write stage: publish one run directory atomically under ``<store>/runs/``.

A run is assembled in a hidden ``.tmp-*`` folder and renamed into place only after the
conservation check passes, so a crash leaves no visible half-run. An exclusive ``flock`` on
``<store>/.lock`` keeps two runs from writing one store at once; the kernel drops it when the
holding process dies, so no stale lock survives a crash.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import platform
import shutil
import time
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import Any, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .config import SCORE_NAMES, Config
from .errors import StoreError
from .scores import Scores
from .select import Selection
from .table import RowFrame
from .verify import Verdict

PACKAGES = ("leanset", "numpy", "pandas", "pyarrow", "scikit-learn", "lightgbm", "scipy", "prefect", "pydantic")


@contextlib.contextmanager
def store_lock(store: Path, wait: float = 0.0) -> Iterator[None]:
    """Hold the store's write lock, waiting up to ``wait`` seconds for another run to finish."""
    store.mkdir(parents=True, exist_ok=True)
    with open(store / ".lock", "a") as handle:
        deadline = time.monotonic() + wait
        while True:
            try:
                fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    raise StoreError(f"{store}: another leanset run is writing this store; wait for it to finish or pass another --store") from None
                time.sleep(0.2)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def versions() -> dict[str, str]:
    """Versions of Python and of the packages that decide a run's results."""
    out = {"python": platform.python_version()}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "absent"
    return out


def new_run_id(config: Config, fingerprint: str) -> str:
    """A sortable id: UTC time, then a hash of config and input."""
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return f"{stamp}-{hashlib.sha256((config.section_hash() + fingerprint).encode()).hexdigest()[:8]}"


def manifest_table(frame: RowFrame, scores: Scores, selection: Selection) -> pa.Table:
    """One row per input row, in input order: id, split, label, decision, reason, stratum, weight, scores."""
    n = len(frame.row_id)
    train = frame.train
    decision = np.full(n, "holdout", dtype=object)
    decision[train] = np.where(selection.keep, "keep", "drop")
    reason = np.full(n, "holdout", dtype=object)
    reason[train] = selection.reason
    stratum = np.full(n, -1, np.int16)
    stratum[train] = selection.stratum
    weight = np.zeros(n)
    weight[train] = selection.weight
    mask = frame.holdout
    cols: dict[str, pa.Array] = {
        "row_id": pa.array(frame.row_id, pa.string()),
        "split": pa.array(np.where(mask, "holdout", "train"), pa.string()),
        "label": pa.array([str(c) for c in frame.classes], pa.string()).take(pa.array(frame.y)),
        "decision": pa.array(decision, pa.string()),
        "reason": pa.array(reason, pa.string()),
        "stratum": pa.array(stratum, pa.int16(), mask=mask),
        "weight": pa.array(weight, pa.float64(), mask=mask),
    }
    for name in (*SCORE_NAMES, "never_learned"):
        values = scores.table[name].to_numpy()
        full = np.zeros(n, dtype=values.dtype)
        full[train] = values
        cols[name] = pa.array(full, mask=mask)
    return pa.table(cols)


def check_conservation(manifest: pa.Table, n_input: int) -> dict[str, int]:
    """Counts per decision; raises StoreError unless every input row appears exactly once."""
    ids = manifest.column("row_id")
    if manifest.num_rows != n_input or len(ids.unique()) != n_input:
        raise StoreError(f"conservation check failed: {manifest.num_rows} manifest rows, {len(ids.unique())} distinct ids, {n_input} input rows; the run was not published")
    decisions = manifest.column("decision").to_numpy(zero_copy_only=False)
    counts = {d: int(np.sum(decisions == d)) for d in ("keep", "drop", "holdout")}
    if sum(counts.values()) != n_input:
        raise StoreError(f"conservation check failed: kept + dropped + holdout = {sum(counts.values())} != {n_input} input rows; the run was not published")
    return counts


def _write_json(path: Path, data: dict[str, Any]) -> None:
    path.write_text(json.dumps(data, indent=2, sort_keys=False, default=str) + "\n")


def write_run(frame: RowFrame, scores: Scores, selection: Selection, verdict: Verdict,
              config: Config, timings: dict[str, float], wait: float = 0.0) -> Path:
    """Write the run directory and rename it into place; return its path.

    Raises
    ------
    StoreError
        When the store is locked by another run or the conservation check fails.
    """
    t0 = time.perf_counter()
    runs = config.store / "runs"
    with store_lock(config.store, wait):
        runs.mkdir(parents=True, exist_ok=True)
        for stale in runs.glob(".tmp-*"):
            shutil.rmtree(stale, ignore_errors=True)
        run_id = new_run_id(config, frame.fingerprint)
        while (runs / run_id).exists():
            run_id += "x"
        tmp = runs / f".tmp-{run_id}"
        tmp.mkdir()
        try:
            manifest = manifest_table(frame, scores, selection)
            counts = check_conservation(manifest, len(frame.row_id))
            pq.write_table(manifest, tmp / "manifest.parquet")
            kept_rows = frame.train[selection.keep]
            kept = frame.source.take(pa.array(kept_rows)).append_column(
                "weight", pa.array(selection.weight[selection.keep], pa.float64()))
            pq.write_table(kept, tmp / "kept.parquet")
            models = tmp / "models"
            models.mkdir()
            for k, proxy in enumerate(scores.proxies):
                (models / f"proxy_fold{k}.{'txt' if proxy.family == 'gbdt' else 'json'}").write_text(proxy.to_text())
            for name, target in verdict.models.items():
                if target.booster is not None:
                    target.booster.save_model(str(models / f"target_{name}.txt"))
            timings = {**timings, "write": round(time.perf_counter() - t0, 3)}
            _write_json(tmp / "run.json", {
                "run_id": run_id,
                "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
                "config": config.model_dump(mode="json"),
                "config_hash": config.section_hash(),
                "input": {"path": str(config.input.path), "fingerprint": frame.fingerprint, "rows": len(frame.row_id),
                          "classes": [str(c) for c in frame.classes]},
                "counts": {"train": int(len(frame.train)), "holdout": counts["holdout"],
                           "kept": counts["keep"], "dropped": counts["drop"]},
                "selection": selection.info,
                "verdict": verdict.to_dict(),
                "timings": timings,
                "seed": config.seed,
                "versions": versions(),
            })
            os.rename(tmp, runs / run_id)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
    return runs / run_id
