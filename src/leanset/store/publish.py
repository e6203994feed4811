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
from dataclasses import dataclass, field
from datetime import datetime, timezone
from importlib import metadata
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterator

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from .audit import published_runs
from ..config import SCORE_NAMES, Config
from ..errors import StoreError
from ..difficulty import DIFFICULTY_SIGN, class_percentile
from ..report.ledger import cost_ledger

logger = logging.getLogger(__name__)

if TYPE_CHECKING:  # the audit commands import this module: keep the model libraries out of their start-up
    from ..scores.dynamics import Scores
    from ..select.rules import Selection
    from ..load.rows import RowFrame
    from ..verify.stats import Verdict

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


def lineage(config: Config) -> str:
    """Hash of the config but ``store``, ``selection.fraction`` and the batch and memory settings:
    the runs of one lineage form one history.

    The fraction is left out so that a run whose fraction was searched (``auto``) or changed
    still links to its parent; its quotas change and :func:`leanset.select.stable.stabilise` follows them.
    ``execution.batch_rows`` and ``feature_memory_mb`` change no decision (``tests/test_stream.py``).
    """
    data = config.model_dump(mode="json")
    data.pop("store")
    data["selection"].pop("fraction")
    for key in ("batch_rows", "feature_memory_mb"):
        data["execution"].pop(key)
    for key in CADENCE_KEYS:  # when to verify changes no decision
        data["verify"].pop(key, None)
    return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()[:16]


@dataclass(frozen=True)
class ParentRun:
    """What a run needs from the last run of its lineage: each row's decision and percentile.

    Attributes
    ----------
    run_id : str
    row_id : ndarray of str, shape (m,)
    decision : ndarray of str, shape (m,)
        ``keep``, ``drop`` or ``holdout``.
    percentile : ndarray of float, shape (m,)
        Percentile of the selection score's difficulty within the row's class, among the
        parent's training rows (NaN on holdout rows).
    """

    run_id: str
    row_id: np.ndarray
    decision: np.ndarray
    percentile: np.ndarray

    def align(self, row_id: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Previous decision (1 keep, 0 drop, -1 holdout or absent) and percentile of each of ``row_id``."""
        at = pd.Index(self.row_id).get_indexer(pd.Index(row_id))
        found = at >= 0
        code = np.full(len(row_id), -1, np.int8)
        pct = np.full(len(row_id), np.nan)
        d = self.decision[at[found]]
        code[found] = np.where(d == "keep", 1, np.where(d == "drop", 0, -1))
        pct[found] = self.percentile[at[found]]
        return code, pct


def read_parent(config: Config) -> ParentRun | None:
    """The last published run of this config's lineage in its store, or None."""
    mine = lineage(config)
    runs = [r for r in published_runs(config.store) if r.get("lineage") == mine]
    if not runs:
        return None
    run_id = runs[-1]["run_id"]
    name = config.selection.score
    m = pq.read_table(config.store / "runs" / run_id / "manifest.parquet",
                      columns=["row_id", "label", "decision", name]).to_pandas()
    train = (m["decision"] != "holdout").to_numpy()
    pct = np.full(len(m), np.nan)
    pct[train] = class_percentile(DIFFICULTY_SIGN[name] * m[name].to_numpy(np.float64)[train], m["label"].to_numpy()[train])
    return ParentRun(run_id=run_id, row_id=m["row_id"].to_numpy(object), decision=m["decision"].to_numpy(object), percentile=pct)


#: The ``verify`` keys of the cadence; they are left out of the lineage.
CADENCE_KEYS = ("every", "max_new_rows", "max_churn")


@dataclass(frozen=True)
class VerifyPlan:
    """Whether this run verifies, and if not, the verdict it carries.

    Attributes
    ----------
    verify : bool
    reason : str
        Why, in words (``every run``, ``run 5 of every 5 since the last verified run``, ``new rows ...``).
    source : dict or None
        run.json of the last verified run of the lineage (None when there is none).
    runs_since : int
        Runs of the lineage published after ``source``.
    drift : dict
        ``new_rows`` (training rows absent from ``source``'s training rows), ``new_share`` (of this
        run's training rows), ``churn_rows`` and ``churn`` (share of the training rows in both
        whose keep/drop decision differs from ``source``'s).
    """

    verify: bool
    reason: str
    source: dict[str, Any] | None = None
    runs_since: int = 0
    drift: dict[str, Any] | None = None


def plan_verification(config: Config, row_id: np.ndarray, keep: np.ndarray) -> VerifyPlan:
    """Apply the cadence (``verify.every``, ``verify.max_new_rows``, ``verify.max_churn``) to this run.

    The run verifies when it is the ``every``-th run since the lineage's last verified run, when
    there is no verified run yet, or when the new training rows or the churn of keep/drop
    decisions since that run exceed their thresholds; otherwise it carries that run's verdict.

    Parameters
    ----------
    config : Config
    row_id : ndarray of str, shape (n,)
        Ids of this run's training rows.
    keep : ndarray of bool, shape (n,)
        This run's decisions on them.
    """
    vc = config.verify
    if vc.every == 1:  # the thresholds can only force a verification that is due anyway
        return VerifyPlan(True, "every run")
    mine = lineage(config)
    runs = [r for r in published_runs(config.store) if r.get("lineage") == mine]
    fresh = [i for i, r in enumerate(runs) if not r["verdict"].get("carried")]
    if not fresh:
        return VerifyPlan(True, "no verified run in this lineage yet")
    source = runs[fresh[-1]]
    since = len(runs) - 1 - fresh[-1]
    m = pq.read_table(config.store / "runs" / source["run_id"] / "manifest.parquet", columns=["row_id", "decision"])
    before = ParentRun(source["run_id"], m.column("row_id").to_numpy(zero_copy_only=False).astype(object),
                       m.column("decision").to_numpy(zero_copy_only=False).astype(object), np.full(m.num_rows, np.nan))
    code, _ = before.align(np.asarray(row_id, dtype=object))
    known = code >= 0
    changed = int((code[known] != keep[known].astype(np.int8)).sum())
    drift = {"new_rows": int((~known).sum()), "new_share": float((~known).mean()) if len(known) else 0.0,
             "churn_rows": changed, "churn": changed / max(int(known.sum()), 1)}
    if since + 1 >= vc.every:
        return VerifyPlan(True, f"run {since + 1} of every {vc.every} since the last verified run", source, since, drift)
    if vc.max_new_rows is not None and drift["new_share"] > vc.max_new_rows:
        return VerifyPlan(True, f"new rows {drift['new_share']:.1%} above verify.max_new_rows {vc.max_new_rows:.1%}",
                          source, since, drift)
    if vc.max_churn is not None and drift["churn"] > vc.max_churn:
        return VerifyPlan(True, f"churn {drift['churn']:.1%} above verify.max_churn {vc.max_churn:.1%}", source, since, drift)
    return VerifyPlan(False, f"run {since + 1} of every {vc.every}; drift within thresholds", source, since, drift)


@dataclass
class CarriedVerdict:
    """The verdict of an earlier run, carried by a run that skipped verification; never a fresh pass.

    ``to_dict`` gives the earlier verdict with ``status`` ``carried`` and a ``carried`` entry: the
    run it came from, its status there, its age (runs and seconds) and the drift since.
    """

    plan: VerifyPlan
    models: dict = field(default_factory=dict)  # no target was trained

    @property
    def train_seconds(self) -> dict[str, float]:
        """The target's fit seconds measured in the source run."""
        return self.plan.source["verdict"]["train_seconds"]

    def to_dict(self) -> dict[str, Any]:
        """The source verdict, marked carried."""
        src = self.plan.source
        created = datetime.fromisoformat(src["created"])
        age = (datetime.now(timezone.utc) - created).total_seconds()
        return {**src["verdict"], "status": "carried",
                "carried": {"from_run": src["run_id"], "status": src["verdict"]["status"], "age_runs": self.plan.runs_since + 1,
                            "age_seconds": round(age, 1), "drift": self.plan.drift, "reason": self.plan.reason}}


def churn(manifest: pa.Table, parent: ParentRun) -> dict[str, Any]:
    """Rows of ``manifest`` whose decision differs from the parent run's, and the new and removed rows.

    ``rows`` / ``fraction`` count every change of decision (keep, drop, holdout) among the rows
    present in both runs; ``keep_to_drop`` and ``drop_to_keep`` split the changes between training rows.
    """
    now = manifest.column("decision").to_numpy(zero_copy_only=False)
    at = pd.Index(parent.row_id).get_indexer(pd.Index(manifest.column("row_id").to_numpy(zero_copy_only=False)))
    both = at >= 0
    before = parent.decision[at[both]]
    after = now[both]
    flipped = before != after
    n_both = int(both.sum())
    return {
        "parent_run": parent.run_id,
        "rows": int(flipped.sum()),
        "fraction": float(flipped.sum() / n_both) if n_both else 0.0,
        "rows_in_both": n_both,
        "keep_to_drop": int(((before == "keep") & (after == "drop")).sum()),
        "drop_to_keep": int(((before == "drop") & (after == "keep")).sum()),
        "new_rows": int((~both).sum()),
        "removed_rows": int(len(parent.row_id) - n_both),
    }


def _spread(values: np.ndarray, train: np.ndarray, n: int) -> np.ndarray:
    """Values of the training rows placed at their positions among all ``n`` rows (zeros elsewhere)."""
    values = np.asarray(values)
    full = np.zeros(n, dtype=values.dtype)
    full[train] = values
    return full


def manifest_table(frame: RowFrame, scores: Scores, selection: Selection) -> pa.Table:
    """One row per input row, in input order: id, split, label, decision, reason, stratum, weight, scores."""
    n = len(frame.row_id)
    train = frame.train
    decision = np.full(n, "holdout", dtype=object)
    decision[train] = np.where(selection.keep, "keep", "drop")
    reason = np.full(n, "holdout", dtype=object)
    reason[train] = selection.reason
    mask = frame.holdout
    cols: dict[str, pa.Array] = {
        "row_id": pa.array(frame.row_id, pa.string()),
        "split": pa.array(np.where(mask, "holdout", "train"), pa.string()),
        "label": (pa.array(frame.y).cast(pa.string()) if frame.task == "regression"
                  else pa.array([str(c) for c in frame.classes], pa.string()).take(pa.array(frame.y))),
        "decision": pa.array(decision, pa.string()),
        "reason": pa.array(reason, pa.string()),
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
    from ..report.html import render_html

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
        manifest = manifest_table(frame, scores, selection)
        counts = check_conservation(manifest, len(frame.row_id))
        pq.write_table(manifest, tmp / "manifest.parquet", row_group_size=config.execution.batch_rows)
        _write_kept(frame, selection, tmp / "kept.parquet", config.execution.batch_rows)
        models = tmp / "models"
        models.mkdir()
        for k, proxy in enumerate(scores.proxies):
            (models / f"proxy_fold{k}.{'txt' if proxy.family == 'gbdt' else 'json'}").write_text(proxy.to_text())
        for name, target in verdict.models.items():
            if target.booster is not None:
                target.booster.save_model(str(models / f"target_{name}.txt"))
        moved = churn(manifest, parent) if parent is not None else None
        run = {
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
            **extra,
        }
        for name, data in files.items():
            (tmp / name).write_bytes(data)
        segments = {name: frame.source.column(name).to_numpy(zero_copy_only=False) for name in config.input.segments}
        (tmp / "report.html").write_text(render_html(run, manifest, segments, rows=frame.source.take, history=previous,
                                                      store=config.store))
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
