"""Select stage: turn per-row difficulty into keep / drop decisions under class quotas.

Every strategy yields a priority order within each class; a class keeps the first ``quota``
rows of its order. Strategies:

- ``hardest`` / ``easiest``: highest / lowest difficulty first (Sorscher et al., NeurIPS 2022,
  "Beyond neural scaling laws").
- ``stratified``: coverage-centric coreset selection (Zheng et al., ICLR 2023): the hardest
  ``hard_cut`` share of a class is set aside as likely label noise, the rest is binned by
  difficulty into ``strata`` equal-width bins, and the budget is filled evenly across bins, so a
  small bin keeps all its rows and what it leaves goes to the larger ones. With ``spread``, a
  bin's rows are taken evenly along the score stage's locality key (``locus``) rather than
  uniformly, so they cover the feature space; ``strata: auto`` (the default) uses one bin below
  70 % of the rows kept (a uniform draw, or with ``spread`` coverage of the feature space alone)
  and 50 from 70 % on (:func:`strata_count`).
- ``random``: uniform, the baseline.
- ``importance``: importance sampling with Horvitz–Thompson weights. Each row of a class is
  drawn with inclusion probability π_i ∝ 1 + t·(2 r_i − 1), capped at 1 and summing to the
  quota (r_i: the row's difficulty percentile in its class; t: ``selection.tilt``), by
  systematic sampling, so the quota is met exactly; a kept row weighs 1/π_i (scaled so each
  class keeps its weight), so the weighted kept rows stand for the whole class and the
  model's calibration is kept. ``tilt: auto`` follows Sorscher et al. (NeurIPS 2022): toward
  easy rows when little is kept, toward hard ones when much is (see :func:`auto_tilt`).

Exact duplicates (same features and label) collapse to their first occurrence first. Within a
class, segments (``input.segments``) share the quota in proportion to their size, and each
segment value keeps at least ``min(n_v, segment_floor)`` rows.

Class quotas are water-filled: ``balanced`` offers every class the same count, ``proportional``
the same share of its size; both respect ``min(n_c, class_floor)`` and ``n_c``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..config import SelectionConfig
from .spread import spread_keys
from ..reasons import REASONS  # noqa: F401  (the codes this stage writes; defined below the stages for the reports)

_KEEP_REASON = {"stratified": "keep:stratum", "hardest": "keep:hard", "easiest": "keep:easy", "random": "keep:random",
                "importance": "keep:sampled"}


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
    dup_count : ndarray of int64, shape (n,)
        Size of the row's exact-duplicate group (1 for a unique row).
    conflict : ndarray of bool, shape (n,)
        The row shares its features with a row of another label.
    info : dict
        Budget, quotas per class, any adjustment forced by the floors, duplicate counts.
    """

    keep: np.ndarray
    reason: np.ndarray
    stratum: np.ndarray
    weight: np.ndarray
    dup_count: np.ndarray
    conflict: np.ndarray
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


#: ``strata: auto`` fills difficulty bins evenly from this kept fraction on (one bin below it).
STRATA_FROM = 0.7


def strata_count(config: SelectionConfig) -> int:
    """``config.strata``, or for ``auto``: 1 below ``STRATA_FROM`` (70 %) of the rows kept, 50 from there on.

    After Sorscher et al. (NeurIPS 2022): hard rows carry what is left to learn only when much is
    kept; below that, equal-width difficulty bins filled evenly over-sample the sparse tails of the
    score (label noise, ambiguous rows, heavy-tailed residuals), and on 50,000-row suite tables that put
    the kept model below random subsets' interval at 5–50 % kept. The 70 % line and the 50 bins are
    this project's choice, measured by ``leanset bench suite`` (docs/selection.md).
    """
    if config.strata != "auto":
        return int(config.strata)
    return 1 if config.fraction < STRATA_FROM else 50


def auto_tilt(fraction: float) -> float:
    """The ``importance`` tilt for ``tilt: auto``: 2·fraction − 0.4, clipped to [−0.5, 0.8].

    Negative (toward easy rows) below 20 % kept, toward hard rows above; after Sorscher et al.
    (NeurIPS 2022), whose best pruning keeps easy examples when little data is kept and hard ones
    when much is. The line itself is this project's choice, measured by ``leanset bench suite``.
    """
    return float(np.clip(2 * fraction - 0.4, -0.5, 0.8))


def inclusion_probabilities(size: np.ndarray, quota: int) -> np.ndarray:
    """π_i = min(1, c·size_i) with c set so that the π sum to ``quota`` (sizes > 0, quota ≤ n)."""
    size = np.asarray(size, np.float64)
    pi = np.zeros(len(size))
    capped = np.zeros(len(size), bool)
    for _ in range(len(size) + 1):
        c = (quota - capped.sum()) / size[~capped].sum() if (~capped).any() else 0.0
        pi = np.where(capped, 1.0, c * size)
        over = ~capped & (pi >= 1.0)
        if not over.any():
            break
        capped |= over
    return np.minimum(pi, 1.0)


def systematic_sample(pi: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Indices drawn by systematic sampling in random order (Madow, 1949): row i is drawn with
    probability ``pi[i]``, and exactly ``round(pi.sum())`` rows are drawn."""
    perm = rng.permutation(len(pi))
    upper = np.cumsum(pi[perm])
    u = rng.random()
    hits = np.floor(upper - u + 1e-12) - np.floor(np.concatenate(([0.0], upper[:-1])) - u + 1e-12)
    return np.sort(perm[hits > 0])


def _turns(s: np.ndarray, tie: np.ndarray) -> np.ndarray:
    """Each row's turn inside its stratum ``s``, in the order of ``tie``."""
    turn = np.empty(len(s), np.int64)
    order = np.lexsort((tie, s))
    starts = np.searchsorted(s[order], s[order], side="left")
    turn[order] = np.arange(len(s)) - starts
    return turn


def _priority(d: np.ndarray, quota: int, config: SelectionConfig, rng: np.random.Generator,
              locus: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, int]:
    """Priority order of one class's rows, their strata, and how many lead the order after a hard cut.

    Returns (order, stratum, n_cut): ``order`` lists local indices, best first; the last
    ``n_cut`` entries are the rows removed by the hard cut (``stratified`` only). For
    ``importance``, the first ``quota`` entries are the drawn rows. With ``stratified`` and ``spread``,
    a stratum's rows take their turns in the order of :func:`spread_keys` over ``locus``.
    """
    n = len(d)
    tie = rng.random(n)
    stratum = np.full(n, -1, np.int16)
    if config.strategy == "importance":
        pi = _importance_pi(d, quota, config, tie)
        drawn = np.zeros(n, bool)
        drawn[systematic_sample(pi, rng)] = True
        return np.lexsort((tie, -pi, ~drawn)), stratum, 0
    if config.strategy == "hardest":
        return np.lexsort((tie, -d)), stratum, 0
    if config.strategy == "easiest":
        return np.lexsort((tie, d)), stratum, 0
    if config.strategy == "random":
        return np.argsort(tie, kind="stable"), stratum, 0
    n_cut = min(int(np.floor(config.hard_cut * n)), n - quota)
    by_difficulty = np.lexsort((tie, -d))
    cut, rest = by_difficulty[:n_cut], by_difficulty[n_cut:]
    stratum[rest] = _strata(d[rest], strata_count(config))
    # Round-robin over strata: a row's turn inside its stratum decides its place, so taking the
    # first q rows gives every stratum min(size, share) rows, the smallest strata filled first.
    s = stratum[rest].astype(np.int64)
    spread = spread_keys(locus, tie, rng)[rest] if locus is not None and config.spread else tie[rest]
    within = _turns(s, spread)
    order = rest[np.lexsort((tie[rest], within))]
    return np.concatenate((order, cut)), stratum, n_cut


def _importance_pi(d: np.ndarray, quota: int, config: SelectionConfig, tie: np.ndarray) -> np.ndarray:
    """Inclusion probabilities of one class's rows under ``importance`` (see the module docstring)."""
    t = auto_tilt(config.fraction) if config.tilt == "auto" else config.tilt
    rank = np.empty(len(d))
    rank[np.lexsort((tie, d))] = (np.arange(len(d)) + 0.5) / len(d)  # difficulty percentile, hardest near 1
    return inclusion_probabilities(1 + t * (2 * rank - 1), min(quota, len(d)))


def find_duplicates(X: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact duplicates (same features and label) and conflicts (same features, other labels).

    Rows are compared by 64-bit hashes of their feature values (NaN equal to NaN); ``X`` is the
    (n, f) feature matrix, or those hashes already computed, shape (n,) (``RowFrame.feature_hash``).

    Returns
    -------
    is_copy : ndarray of bool, shape (n,)
        True for every duplicate but the first occurrence of its group.
    dup_count : ndarray of int64, shape (n,)
        Size of the row's duplicate group (1 for a unique row).
    conflict : ndarray of bool, shape (n,)
        True when another row has the same features and a different label.
    """
    features = X if X.ndim == 1 else pd.util.hash_pandas_object(pd.DataFrame(X), index=False).to_numpy()
    pairs = pd.DataFrame({"x": features, "y": np.asarray(y)})
    is_copy = pairs.duplicated(keep="first").to_numpy()
    dup_count = pairs.groupby(["x", "y"], sort=False)["y"].transform("size").to_numpy(np.int64)
    conflict = (pairs.groupby("x", sort=False)["y"].transform("nunique") > 1).to_numpy()
    return is_copy, dup_count, conflict


def _take_by_cell(order: np.ndarray, cells: np.ndarray, quota: int) -> np.ndarray:
    """First rows of ``order`` giving each cell its proportional share of ``quota``."""
    codes, counts = np.unique(cells[order], return_counts=True)
    share = class_quotas(counts, quota, "proportional", 0)
    pos = np.searchsorted(codes, cells[order])
    rank = np.empty(len(order), np.int64)
    by_cell = np.argsort(pos, kind="stable")
    starts = np.searchsorted(pos[by_cell], pos[by_cell])
    rank[by_cell] = np.arange(len(order)) - starts
    return order[rank < share[pos]]


def select(difficulty: np.ndarray, y: np.ndarray, config: SelectionConfig, seed: int,
           segments: np.ndarray | None = None, X: np.ndarray | None = None, locus: np.ndarray | None = None) -> Selection:
    """Decide which training rows to keep.

    Parameters
    ----------
    difficulty : ndarray of float, shape (n,)
        Higher means harder (see ``Scores.difficulty``).
    y : ndarray of int, shape (n,)
        Class codes, 0..k-1.
    config : SelectionConfig
    seed : int
    segments : ndarray of int, shape (n, s), optional
        Segment codes: within each class the quota is shared among segments in proportion to
        their size, and each segment value keeps at least ``min(n_v, segment_floor)`` rows.
    X : ndarray, shape (n, f) or (n,), optional
        Features, or their per-row hashes, to collapse exact duplicates when ``config.dedupe`` is on.
    locus : ndarray of int, shape (n,), optional
        Locality key (``Scores.table["locus"]``): with ``stratified`` and ``config.spread``, a stratum's
        rows are taken evenly along it instead of uniformly.

    Returns
    -------
    Selection
    """
    n = len(y)
    k = int(y.max()) + 1
    all_counts = np.bincount(y, minlength=k)
    if X is not None and config.dedupe:
        is_copy, dup_count, conflict = find_duplicates(X, y)
    else:
        is_copy, dup_count, conflict = np.zeros(n, bool), np.ones(n, np.int64), np.zeros(n, bool)
    pool = ~is_copy
    counts = np.bincount(y[pool], minlength=k)
    budget = max(1, int(round(config.fraction * n)))
    quota = class_quotas(counts, budget, config.quotas, config.class_floor)
    unfloored = class_quotas(counts, budget, config.quotas, 0)
    keep, reason, stratum, rank = _fill_classes(difficulty, y, pool, quota, unfloored, config, seed, segments, locus)
    reason[is_copy] = "drop:duplicate"
    segment_added = _segment_floors(keep, reason, rank, pool, segments, config.segment_floor)
    w, weight = _weights(difficulty, y, keep, pool, quota, all_counts, config)
    info = {
        "budget": budget,
        "kept": int(keep.sum()),
        "floor_adjustment": int(quota.sum() - min(budget, pool.sum())) + segment_added,
        "segment_floor_added": segment_added,
        "quota": quota.tolist(),
        "class_counts": all_counts.tolist(),
        "class_weights": w.tolist(),
        "duplicates_dropped": int(is_copy.sum()),
        "conflicting_rows": int(conflict.sum()),
        **({"strata": strata_count(config)} if config.strategy == "stratified" else {}),
    }
    return Selection(keep=keep, reason=reason, stratum=stratum, weight=weight,
                     dup_count=dup_count, conflict=conflict, info=info)


def _fill_classes(difficulty: np.ndarray, y: np.ndarray, pool: np.ndarray, quota: np.ndarray, unfloored: np.ndarray,
                  config: SelectionConfig, seed: int, segments: np.ndarray | None, locus: np.ndarray | None = None):
    """Each class keeps the first ``quota`` rows of its priority order (shared among segment cells in
    proportion); returns keep, reason, stratum and each row's rank in its class's order (a share)."""
    n = len(y)
    rng = np.random.default_rng([seed, 0x5E1EC7])
    cells = None if segments is None else np.unique(segments, axis=0, return_inverse=True)[1].ravel()
    keep = np.zeros(n, bool)
    reason = np.full(n, "drop:over_budget", dtype=object)
    stratum = np.full(n, -1, np.int16)
    rank = np.full(n, np.inf)  # position in its class's priority order, as a share of the class
    for c in range(len(quota)):
        rows = np.flatnonzero((y == c) & pool)
        if len(rows) == 0:  # a class code absent from y: nothing to order (its quota is 0)
            continue
        order, s, n_cut = _priority(difficulty[rows], int(quota[c]), config, rng, None if locus is None else locus[rows])
        stratum[rows] = s
        rank[rows[order]] = np.arange(len(order)) / len(order)
        candidates = order[: len(order) - n_cut]
        kept = rows[candidates[: quota[c]] if cells is None else _take_by_cell(candidates, cells[rows], int(quota[c]))]
        keep[kept] = True
        reason[kept] = _KEEP_REASON[config.strategy]
        extra = int(quota[c] - min(unfloored[c], quota[c]))
        if extra:
            reason[kept[np.argsort(rank[kept])[-extra:]]] = "keep:floor"
        if n_cut:
            reason[rows[order[len(order) - n_cut:]]] = "drop:hard_cut"
    return keep, reason, stratum, rank


def _segment_floors(keep: np.ndarray, reason: np.ndarray, rank: np.ndarray, pool: np.ndarray,
                    segments: np.ndarray | None, floor: int) -> int:
    """Raise every segment value to ``min(n_v, floor)`` kept rows, best-ranked first (in place); rows added."""
    added_total = 0
    for j in range(0 if segments is None else segments.shape[1]):
        for v in np.unique(segments[:, j]):
            members = pool & (segments[:, j] == v)
            need = min(int(members.sum()), floor) - int((keep & members).sum())
            if need > 0:
                spare = np.flatnonzero(members & ~keep)
                added = spare[np.argsort(rank[spare], kind="stable")[:need]]
                keep[added] = True
                reason[added] = "keep:floor"
                added_total += len(added)
    return added_total


def _weights(difficulty: np.ndarray, y: np.ndarray, keep: np.ndarray, pool: np.ndarray, quota: np.ndarray,
             all_counts: np.ndarray, config: SelectionConfig) -> tuple[np.ndarray, np.ndarray]:
    """Class weights (``class_prior`` or ones) and each row's weight (0 when dropped; times the
    Horvitz–Thompson factor under ``importance``)."""
    n, k = len(y), len(all_counts)
    ht = np.ones(n)
    if config.strategy == "importance":
        # Horvitz–Thompson: 1/π of each drawn row, scaled to mean 1 within its class
        for c in range(k):
            rows = np.flatnonzero((y == c) & pool)
            if len(rows):
                ht[rows] = 1 / np.maximum(_importance_pi(difficulty[rows], int(quota[c]), config, np.zeros(len(rows))), 1e-12)
        in_keep = np.flatnonzero(keep)
        scale = np.bincount(y[in_keep], weights=ht[in_keep], minlength=k) / np.maximum(np.bincount(y[in_keep], minlength=k), 1)
        ht[in_keep] /= np.where(scale[y[in_keep]] > 0, scale[y[in_keep]], 1.0)
    kept_counts = np.bincount(y[keep], minlength=k).astype(np.float64)
    if config.weights == "class_prior":
        with np.errstate(divide="ignore", invalid="ignore"):
            w = np.where(kept_counts > 0, all_counts * kept_counts.sum() / (n * kept_counts), 0.0)
    else:
        w = np.ones(k)
    weight = np.zeros(n)
    weight[keep] = w[y[keep]] * ht[keep]
    return w, weight
