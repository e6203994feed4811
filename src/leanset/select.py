"""Select stage: turn per-row difficulty into keep / drop decisions under class quotas.

Every strategy yields a priority order within each class; a class keeps the first ``quota``
rows of its order. Strategies:

- ``hardest`` / ``easiest``: highest / lowest difficulty first (Sorscher et al., NeurIPS 2022,
  "Beyond neural scaling laws").
- ``stratified``: coverage-centric coreset selection (Zheng et al., ICLR 2023): the hardest
  ``hard_cut`` share of a class is set aside as likely label noise, the rest is binned by
  difficulty into ``strata`` equal-width bins, and the budget is filled evenly across bins, so a
  small bin keeps all its rows and what it leaves goes to the larger ones.
- ``random``: uniform, the baseline.

Class quotas are water-filled: ``balanced`` offers every class the same count, ``proportional``
the same share of its size; both respect ``min(n_c, class_floor)`` and ``n_c``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .config import SelectionConfig

REASONS = {
    "keep:stratum": "kept to fill its class's budget evenly across difficulty strata (stratified)",
    "keep:hard": "kept as one of the hardest rows of its class (hardest)",
    "keep:easy": "kept as one of the easiest rows of its class (easiest)",
    "keep:random": "kept by a uniform random draw within its class (random)",
    "keep:floor": "kept only because its class would otherwise fall below selection.class_floor",
    "drop:over_budget": "dropped: its class's budget was filled by higher-priority rows",
    "drop:hard_cut": "dropped: among the hardest selection.hard_cut of its class, set aside as likely label noise (stratified)",
    "holdout": "in the holdout: never pruned, used only to verify",
}
_KEEP_REASON = {"stratified": "keep:stratum", "hardest": "keep:hard", "easiest": "keep:easy", "random": "keep:random"}


@dataclass
class Selection:
    """Decisions for the training rows, in the order they were given.

    Attributes
    ----------
    keep : ndarray of bool, shape (n,)
    reason : ndarray of str, shape (n,)
        A reason code from ``REASONS``.
    stratum : ndarray of int16, shape (n,)
        Difficulty stratum within the row's class (``stratified`` only; -1 otherwise).
    weight : ndarray of float64, shape (n,)
        Training weight of kept rows (0 on dropped rows); the weighted class shares of the kept
        rows equal the class shares of all ``n`` rows when ``weights`` is ``class_prior``.
    info : dict
        Budget, quotas per class, and any adjustment forced by the floors.
    """

    keep: np.ndarray
    reason: np.ndarray
    stratum: np.ndarray
    weight: np.ndarray
    info: dict = field(default_factory=dict)


def class_quotas(counts: np.ndarray, budget: int, mode: str, floor: int) -> np.ndarray:
    """Rows to keep per class, summing to ``max(budget, sum of floors)``.

    Water-filling: find the level L with sum_c clip(g_c(L), f_c, n_c) = budget, where g_c(L) = L
    for ``balanced`` and L * n_c for ``proportional`` and f_c = min(n_c, floor); then round down
    and hand the remaining units to the largest fractional parts (ties to the lower class index).

    Parameters
    ----------
    counts : ndarray of int, shape (k,)
        Rows per class.
    budget : int
        Rows to keep in all; at most ``counts.sum()``.
    mode : {"balanced", "proportional"}
    floor : int

    Returns
    -------
    ndarray of int64, shape (k,)
    """
    counts = np.asarray(counts, dtype=np.int64)
    lo = np.minimum(counts, floor)
    budget = int(min(max(budget, lo.sum()), counts.sum()))
    scale = np.ones(len(counts)) if mode == "balanced" else counts / counts.sum()

    def filled(level: float) -> np.ndarray:
        return np.clip(level * scale, lo, counts)

    # an empty class has scale 0 under proportional; it must not set the upper bracket (inf * 0 = NaN)
    a, b = 0.0, float(counts.max() / np.where(counts > 0, scale, np.inf).min())
    for _ in range(200):
        mid = (a + b) / 2
        a, b = (mid, b) if filled(mid).sum() < budget else (a, mid)
    real = filled(b)
    quota = np.floor(real + 1e-9).astype(np.int64)
    short = budget - quota.sum()
    if short > 0:
        room = quota < counts
        order = np.lexsort((np.arange(len(counts)), -(real - quota)))
        order = order[room[order]][:short]
        quota[order] += 1
    return quota


def _strata(d: np.ndarray, n_strata: int) -> np.ndarray:
    """Equal-width difficulty bins over the range of ``d``."""
    lo, hi = d.min(), d.max()
    if hi <= lo:
        return np.zeros(len(d), np.int16)
    return np.minimum(((d - lo) / (hi - lo) * n_strata).astype(np.int64), n_strata - 1).astype(np.int16)


def _priority(d: np.ndarray, quota: int, config: SelectionConfig, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, int]:
    """Priority order of one class's rows, their strata, and how many lead the order after a hard cut.

    Returns (order, stratum, n_cut): ``order`` lists local indices, best first; the last
    ``n_cut`` entries are the rows removed by the hard cut (``stratified`` only).
    """
    n = len(d)
    tie = rng.random(n)
    stratum = np.full(n, -1, np.int16)
    if config.strategy == "hardest":
        return np.lexsort((tie, -d)), stratum, 0
    if config.strategy == "easiest":
        return np.lexsort((tie, d)), stratum, 0
    if config.strategy == "random":
        return np.argsort(tie, kind="stable"), stratum, 0
    n_cut = min(int(np.floor(config.hard_cut * n)), n - quota)
    by_difficulty = np.lexsort((tie, -d))
    cut, rest = by_difficulty[:n_cut], by_difficulty[n_cut:]
    stratum[rest] = _strata(d[rest], config.strata)
    # Round-robin over strata: a row's rank inside its stratum decides its turn, so taking the
    # first q rows gives every stratum min(size, share) rows, the smallest strata filled first.
    s = stratum[rest].astype(np.int64)
    within = np.empty(len(rest), np.int64)
    shuffled = np.lexsort((tie[rest], s))
    starts = np.searchsorted(s[shuffled], s[shuffled], side="left")
    within[shuffled] = np.arange(len(rest)) - starts
    order = rest[np.lexsort((tie[rest], within))]
    return np.concatenate((order, cut)), stratum, n_cut


def select(difficulty: np.ndarray, y: np.ndarray, config: SelectionConfig, seed: int) -> Selection:
    """Decide which training rows to keep.

    Parameters
    ----------
    difficulty : ndarray of float, shape (n,)
        Higher means harder (see ``Scores.difficulty``).
    y : ndarray of int, shape (n,)
        Class codes, 0..k-1.
    config : SelectionConfig
    seed : int

    Returns
    -------
    Selection
    """
    n = len(y)
    k = int(y.max()) + 1
    counts = np.bincount(y, minlength=k)
    budget = max(1, int(round(config.fraction * n)))
    quota = class_quotas(counts, budget, config.quotas, config.class_floor)
    unfloored = class_quotas(counts, budget, config.quotas, 0)
    rng = np.random.default_rng([seed, 0x5E1EC7])

    keep = np.zeros(n, bool)
    reason = np.full(n, "drop:over_budget", dtype=object)
    stratum = np.full(n, -1, np.int16)
    for c in range(k):
        rows = np.flatnonzero(y == c)
        if len(rows) == 0:  # a class code absent from y: nothing to order (its quota is 0)
            continue
        order, s, n_cut = _priority(difficulty[rows], int(quota[c]), config, rng)
        stratum[rows] = s
        kept = rows[order[: quota[c]]]
        keep[kept] = True
        reason[kept] = _KEEP_REASON[config.strategy]
        reason[rows[order[min(unfloored[c], quota[c]): quota[c]]]] = "keep:floor"
        if n_cut:
            reason[rows[order[len(order) - n_cut:]]] = "drop:hard_cut"

    weight = np.zeros(n)
    kept_counts = quota.astype(np.float64)
    if config.weights == "class_prior":
        with np.errstate(divide="ignore", invalid="ignore"):
            w = np.where(kept_counts > 0, counts * kept_counts.sum() / (n * kept_counts), 0.0)
    else:
        w = np.ones(k)
    weight[keep] = w[y[keep]]
    info = {
        "budget": budget,
        "kept": int(keep.sum()),
        "floor_adjustment": int(quota.sum() - budget),
        "quota": quota.tolist(),
        "class_counts": counts.tolist(),
        "class_weights": w.tolist(),
    }
    return Selection(keep=keep, reason=reason, stratum=stratum, weight=weight, info=info)
