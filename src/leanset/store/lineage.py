"""Runs over time: the lineage of a run, its parent run and the churn since it, and the
verification cadence (``verify.every``, ``max_new_rows``, ``max_churn``) with the verdict a run carries
when it skips verification.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from datetime import datetime, timezone
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from ..config import Config
from ..difficulty import DIFFICULTY_SIGN, class_percentile
from .reader import published_runs

if TYPE_CHECKING:
    import pyarrow as pa


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
