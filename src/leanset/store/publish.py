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
import logging
import os
import platform
import shutil
import time
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ..config import SCORE_NAMES, Config
from ..errors import StoreError
from ..load.memory import release_memory
from ..report.ledger import cost_ledger
from ..versions import package_versions
from .lineage import CarriedVerdict, ParentRun, churn, lineage
from .reader import published_runs

logger = logging.getLogger(__name__)

if TYPE_CHECKING:  # the audit commands import this module: keep the model libraries out of their start-up
    from ..scores.dynamics import Scores
    from ..select.rules import Selection
    from ..load.rows import RowFrame
    from ..verify.verdict import Verdict

PACKAGES = ("leanset", "numpy", "pandas", "pyarrow", "scikit-learn", "lightgbm", "scipy", "prefect", "pydantic")


@contextlib.contextmanager
def store_lock(store: Path, wait: float = 0.0) -> Iterator[None]:
    """Hold the store's write lock, waiting up to ``wait`` seconds for another run to finish.

    The lock file names its holder (pid, host, start time) for the refusal message; the lock
    itself is the kernel's ``flock``, released when the holder exits or is killed.

    Raises
    ------
    StoreError
        When another process still holds the lock after ``wait`` seconds.
    """
    store.mkdir(parents=True, exist_ok=True)
    path = store / ".lock"
    with open(path, "a+") as handle:
        deadline = time.monotonic() + wait
        while True:
            try:
                fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    holder = path.read_text().strip() or "another process"
                    raise StoreError(f"{store}: another leanset run holds this store ({holder}); waited {wait:g} s; "
                                     "pass a larger --wait, wait for it to finish, or pass another --store") from None
                time.sleep(0.2)
        try:
            handle.seek(0)
            handle.truncate()
            handle.write(f"pid {os.getpid()} on {platform.node()} since {datetime.now(timezone.utc).isoformat(timespec='seconds')}\n")
            handle.flush()
            yield
        finally:
            handle.seek(0)
            handle.truncate()
            handle.flush()
            fcntl.flock(handle, fcntl.LOCK_UN)


def versions() -> dict[str, str]:
    """Versions of Python and of the packages that decide a run's results."""
    return {"python": platform.python_version(), **package_versions(PACKAGES)}


def new_run_id(config: Config, fingerprint: str) -> str:
    """A sortable id: UTC time, then a hash of config and input."""
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return f"{stamp}-{hashlib.sha256((config.section_hash() + fingerprint).encode()).hexdigest()[:8]}"


def _spread(values: np.ndarray, train: np.ndarray, n: int) -> np.ndarray:
    """Values of the training rows placed at their positions among all ``n`` rows (zeros elsewhere)."""
    values = np.asarray(values)
    full = np.zeros(n, dtype=values.dtype)
    full[train] = values
    return full


def _strings(codes: np.ndarray, values: list[str]) -> pa.Array:
    """The string column ``values[codes]``, built by Arrow from the codes: no Python object per row."""
    return pa.DictionaryArray.from_arrays(pa.array(codes), pa.array(values, pa.string())).cast(pa.string())


def _reasons(selection: Selection, train: np.ndarray, n: int) -> pa.Array:
    """The ``reason`` column: each training row's reason code, ``holdout`` elsewhere."""
    coded = pa.array(selection.reason, pa.string()).dictionary_encode()
    codes = np.full(n, len(coded.dictionary), np.int32)  # holdout, appended to the training rows' codes
    codes[train] = coded.indices.to_numpy()
    return _strings(codes, [*coded.dictionary.to_pylist(), "holdout"])


def manifest_table(frame: RowFrame, scores: Scores, selection: Selection) -> pa.Table:
    """One row per input row, in input order: id, split, label, decision, reason, stratum, weight, scores."""
    n = len(frame.row_id)
    train = frame.train
    decision = np.zeros(n, np.int8)  # holdout, keep, drop
    decision[train] = np.where(selection.keep, 1, 2)
    mask = frame.holdout
    cols: dict[str, pa.Array] = {
        "row_id": pa.array(frame.row_id, pa.string()),
        "split": _strings(mask.astype(np.int8), ["train", "holdout"]),
        "label": (pa.array(frame.y).cast(pa.string()) if frame.task == "regression"
                  else _strings(frame.y, [str(c) for c in frame.classes])),
        "decision": _strings(decision, ["holdout", "keep", "drop"]),
        "reason": _reasons(selection, train, n),
        "stratum": pa.array(_spread(selection.stratum, train, n), pa.int16(), mask=mask),
        "weight": pa.array(_spread(selection.weight, train, n), pa.float64(), mask=mask),
        "dup_count": pa.array(_spread(selection.dup_count, train, n), pa.int64(), mask=mask),
        "conflict": pa.array(_spread(selection.conflict, train, n), pa.bool_(), mask=mask),
    }
    for name in (*SCORE_NAMES, "never_learned"):
        cols[name] = pa.array(_spread(scores.table[name].to_numpy(), train, n), mask=mask)
    # null where the AUM threshold-sample passes did not judge the row (off, or regression)
    suspect = scores.table["suspect_label"]
    cols["suspect_label"] = pa.array(_spread(suspect.fillna(False).to_numpy(bool), train, n),
                                     mask=mask | _spread(suspect.isna().to_numpy(), train, n))
    return pa.table(cols)


def _distinct(values: pa.ChunkedArray) -> int:
    """Distinct values of a column, counted by sorting it: at 2,000,000 ids a sorted copy costs
    about 55 MiB, Arrow's hash set of them 200 to 330 MiB (``unique``, ``count_distinct``)."""
    if len(values) < 2:
        return len(values)
    ordered = values.take(pc.sort_indices(values)).combine_chunks()
    repeats = pc.sum(pc.equal(ordered.slice(1), ordered.slice(0, len(ordered) - 1))).as_py()
    return len(ordered) - int(repeats or 0)


def check_conservation(manifest: pa.Table, n_input: int) -> dict[str, int]:
    """Counts per decision; raises StoreError unless every input row appears exactly once."""
    distinct = _distinct(manifest.column("row_id"))
    if manifest.num_rows != n_input or distinct != n_input:
        raise StoreError(f"conservation check failed: {manifest.num_rows} manifest rows, {distinct} distinct ids, {n_input} input rows; the run was not published")
    found = pc.value_counts(manifest.column("decision")).to_pylist()
    counts = {d: next((int(f["counts"]) for f in found if f["values"] == d), 0) for d in ("keep", "drop", "holdout")}
    if sum(counts.values()) != n_input:
        raise StoreError(f"conservation check failed: kept + dropped + holdout = {sum(counts.values())} != {n_input} input rows; the run was not published")
    return counts


def _write_json(path: Path, data: dict[str, Any]) -> None:
    path.write_text(json.dumps(data, indent=2, sort_keys=False, default=str) + "\n")


def write_run(frame: RowFrame, scores: Scores, selection: Selection, verdict: Verdict | CarriedVerdict,
              config: Config, timings: dict[str, float], wait: float = 0.0,
              parent: ParentRun | None = None, locked: bool = False,
              extra: dict[str, Any] | None = None, files: dict[str, bytes] | None = None) -> Path:
    """Write the run directory and rename it into place; return its path.

    Parameters
    ----------
    parent : ParentRun, optional
        The last run of this lineage; when given, run.json records ``parent_run`` and ``churn``.
    locked : bool
        True when the caller already holds the store lock (the flows hold it for the whole run).
    extra : dict, optional
        More top-level entries for run.json (``search``, ``frontier``).
    files : dict of str to bytes, optional
        More files for the run directory, by name.

    Raises
    ------
    StoreError
        When the store is locked by another run or the conservation check fails.
    """
    with contextlib.nullcontext() if locked else store_lock(config.store, wait):
        return _write_locked(frame, scores, selection, verdict, config, timings, parent, extra or {}, files or {})


def _write_kept(frame: RowFrame, selection: Selection, path: Path, row_group_size: int) -> None:
    """The kept rows with every original column, plus ``weight`` and ``dup_count``, written as they are read."""
    weight, dup_count = selection.weight[selection.keep], selection.dup_count[selection.keep]
    schema = frame.source.schema.append(pa.field("weight", pa.float64())).append(pa.field("dup_count", pa.int64()))
    at = 0
    with pq.ParquetWriter(path, schema) as writer:
        for piece in frame.source.take_batches(frame.train[selection.keep]):
            m = piece.num_rows
            writer.write_table(piece.append_column("weight", pa.array(weight[at:at + m], pa.float64()))
                               .append_column("dup_count", pa.array(dup_count[at:at + m], pa.int64())), row_group_size=row_group_size)
            at += m


def _write_locked(frame, scores, selection, verdict, config, timings, parent, extra, files) -> Path:
    """Assemble the run in a hidden ``.tmp-*`` folder, check it, then rename it into place; on any
    failure the folder is removed and nothing is published."""
    t0 = time.perf_counter()
    runs = config.store / "runs"
    runs.mkdir(parents=True, exist_ok=True)
    for stale in runs.glob(".tmp-*"):
        shutil.rmtree(stale, ignore_errors=True)
    previous = published_runs(config.store)
    run_id = new_run_id(config, frame.fingerprint)
    while (runs / run_id).exists():
        run_id += "x"
    tmp = runs / f".tmp-{run_id}"
    tmp.mkdir()
    try:
        # kept rows first, so that their pass over the table does not hold the manifest as well
        _write_kept(frame, selection, tmp / "kept.parquet", config.execution.batch_rows)
        release_memory()
        manifest = manifest_table(frame, scores, selection)
        counts = check_conservation(manifest, len(frame.row_id))
        pq.write_table(manifest, tmp / "manifest.parquet", row_group_size=config.execution.batch_rows)
        release_memory()
        _write_models(tmp / "models", scores, verdict)
        run = _run_record(run_id, frame, scores, selection, verdict, config, timings, parent, manifest, counts, previous)
        run.update(extra)
        for name, data in files.items():
            (tmp / name).write_bytes(data)
        _write_report(tmp / "report.html", run, manifest, frame, config, previous)
        run["timings"] = {**timings, "write": round(time.perf_counter() - t0, 3)}
        carried = run["verdict"].get("carried")
        run["cost"] = cost_ledger(run["timings"], run["verdict"].get("train_seconds"),
                                  carried["from_run"] if carried else None)
        _write_json(tmp / "run.json", run)
        os.rename(tmp, runs / run_id)
        logger.info("write: run %s published, %d kept of %d training rows", run_id, counts["keep"], len(frame.train))
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return runs / run_id


def _write_models(folder: Path, scores: Scores, verdict: Verdict | CarriedVerdict) -> None:
    """The proxies (LightGBM text or JSON) and the trained targets (LightGBM text) of the run."""
    folder.mkdir()
    for k, proxy in enumerate(scores.proxies):
        (folder / f"proxy_fold{k}.{'txt' if proxy.family == 'gbdt' else 'json'}").write_text(proxy.to_text())
    for name, target in verdict.models.items():
        if target.booster is not None:
            target.booster.save_model(str(folder / f"target_{name}.txt"))


def _run_record(run_id: str, frame: RowFrame, scores: Scores, selection: Selection, verdict: Verdict | CarriedVerdict,
                config: Config, timings: dict[str, float], parent: ParentRun | None, manifest: pa.Table,
                counts: dict[str, int], previous: list[dict[str, Any]]) -> dict[str, Any]:
    """The content of run.json, but the write stage's seconds and the cost ledger."""
    moved = churn(manifest, parent) if parent is not None else None
    return {
        "run_id": run_id,
        "sequence": 1 + max((r.get("sequence", 0) for r in previous), default=0),
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "config": config.model_dump(mode="json"),
        "config_hash": config.section_hash(),
        "lineage": lineage(config),
        "parent_run": parent.run_id if parent is not None else None,
        "input": {"path": str(config.input.path), "fingerprint": frame.fingerprint, "rows": len(frame.row_id),
                  "classes": [str(c) for c in frame.classes]},
        "counts": {"train": int(len(frame.train)), "holdout": counts["holdout"],
                   "kept": counts["keep"], "dropped": counts["drop"],
                   "new": moved["new_rows"] if moved else len(frame.row_id)},
        "churn": moved,
        "selection": selection.info,
        "scores": {k: v for k, v in scores.info.items() if k != "agreement"},
        "agreement": scores.info.get("agreement"),
        "verdict": verdict.to_dict(),
        "timings": timings,
        "seed": config.seed,
        "versions": versions(),
    }


def _write_report(path: Path, run: dict[str, Any], manifest: pa.Table, frame: RowFrame, config: Config,
                  previous: list[dict[str, Any]]) -> None:
    """report.html of the run, from its records, the segment columns and the input rows to review."""
    from ..report.html import render_html

    segments = {name: frame.source.column(name) for name in config.input.segments}
    path.write_text(render_html(run, manifest, segments, rows=frame.source.take, history=previous, store=config.store))
