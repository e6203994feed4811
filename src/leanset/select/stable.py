"""Stable decisions over a growing table: a row keeps its parent run's decision while its difficulty barely moved."""

from __future__ import annotations

from dataclasses import replace

import numpy as np

from ..difficulty import class_percentile
from .rules import Selection


def stabilise(fresh: Selection, difficulty: np.ndarray, y: np.ndarray, previous: np.ndarray,
              previous_pct: np.ndarray, hysteresis: float, seed: int) -> Selection:
    """Keep a parent run's decisions where a row's difficulty barely moved.

    A training row that the parent run kept (dropped) stays kept (dropped) while its percentile
    of difficulty within its class moved by at most ``hysteresis``. Each class keeps exactly as
    many rows as ``fresh`` does, so quotas and weights are unchanged; the rows still needed are
    taken from the rows ``fresh`` keeps, new rows first, then rows whose score moved, then rows
    the parent dropped. When the stable rows alone exceed the quota, those ``fresh`` would drop
    go first.

    Parameters
    ----------
    fresh : Selection
        The selection of this run without regard to the parent (from :func:`select`).
    difficulty : ndarray of float, shape (n,)
    y : ndarray of int, shape (n,)
    previous : ndarray of int8, shape (n,)
        1 where the parent run kept the row, 0 where it dropped it, -1 for a row new to this
        run or in the parent's holdout.
    previous_pct : ndarray of float, shape (n,)
        The row's percentile of difficulty within its class in the parent run (NaN where
        ``previous`` is -1).
    hysteresis : float
        The band, in percentile units (0.1 = ten percentiles).
    seed : int

    Returns
    -------
    Selection
        ``info["stable"]`` counts the rows kept and dropped as before, the rows whose score
        moved, and the new rows.
    """
    n = len(y)
    rng = np.random.default_rng([seed, 0x57AB1E])
    old = previous >= 0
    moved = old & ~(np.abs(class_percentile(difficulty, y) - previous_pct) <= hysteresis)
    # rows a filter drops (duplicates, suspected label errors) are never kept for stability
    eligible = fresh.keep | np.isin(fresh.reason, ("drop:over_budget", "drop:hard_cut"))
    sticky_keep = old & ~moved & (previous == 1) & eligible
    sticky_drop = old & ~moved & (previous == 0)
    fk = fresh.keep
    keep = _keep_per_class(fk, y, old, moved, sticky_keep, rng)

    reason = fresh.reason.copy()
    reason[keep & ~fk] = "keep:stable"
    reason[~keep & fk] = "drop:over_budget"
    reason[~keep & fk & sticky_drop] = "drop:stable"
    weight = np.zeros(n)
    weight[keep & fk] = fresh.weight[keep & fk]
    for c in np.unique(y[keep & ~fk]):
        in_c = y == c
        weight[keep & ~fk & in_c] = fresh.weight[fk & in_c].mean()
    info = {**fresh.info, "kept": int(keep.sum()), "stable": {
        "hysteresis": hysteresis, "kept_as_before": int((keep & sticky_keep).sum()),
        "dropped_as_before": int((~keep & sticky_drop).sum()), "moved": int(moved.sum()), "new": int((~old).sum())}}
    return replace(fresh, keep=keep, reason=reason, weight=weight, info=info)


def _keep_per_class(fk: np.ndarray, y: np.ndarray, old: np.ndarray, moved: np.ndarray, sticky_keep: np.ndarray,
                    rng: np.random.Generator) -> np.ndarray:
    """Each class keeps as many rows as ``fk`` (the fresh selection) does: its sticky rows first, then
    fresh-kept rows by tier (new, moved, parent-dropped); when the sticky rows exceed the quota, the
    fresh-dropped among them leave first. Ties at random."""
    keep = np.zeros(len(y), bool)
    for c in np.unique(y):
        rows = np.flatnonzero(y == c)
        quota = int(fk[rows].sum())
        tie = rng.random(len(rows))
        chosen = rows[sticky_keep[rows]]
        if len(chosen) > quota:
            # fresh-dropped rows leave first (False sorts before True), ties at random
            local = np.flatnonzero(sticky_keep[rows])
            order = np.lexsort((tie[local], ~fk[rows][local]))
            chosen = rows[local[order[:quota]]]
        else:
            local = np.flatnonzero(fk[rows] & ~sticky_keep[rows])
            tier = np.where(~old[rows][local], 0, np.where(moved[rows][local], 1, 2))
            order = np.lexsort((tie[local], tier))
            chosen = np.concatenate((chosen, rows[local[order[: quota - len(chosen)]]]))
        keep[chosen] = True
    return keep
