"""Score stage: cross-fit the proxy and give every training row its difficulty statistics.

Definitions (docs/scoring.md; z_t logits at checkpoint t of a model that trained on the row,
p_t = softmax(z_t), y the label, correct_t = [argmax p_t = y]):

- ``forgetting``: count of t > 1 with correct_{t-1} = 1 and correct_t = 0, summed over the
  models that trained on the row (Toneva et al., ICLR 2019). A row never correct at any
  checkpoint is "never learned" and gets the number of checkpoints it was seen at, more than
  any row that was learned can reach, so it ranks as most forgettable.
- ``aum``: mean of z_t[y] - max_{k != y} z_t[k] (Pleiss et al., NeurIPS 2020).
- ``el2n``: ||p_e - onehot(y)||_2 at the early checkpoint e, averaged over models
  (Paul, Ganguli, Dziugaite, NeurIPS 2021).
- ``confidence``, ``variability``, ``correctness``: mean and population standard deviation of
  p_t[y], and mean of correct_t (Swayamdipta et al., EMNLP 2020).
- ``aleatoric``: mean of p_t[y] (1 - p_t[y]) (Seedat et al., NeurIPS 2022).
- ``oof_loss``, ``oof_margin``: -log p[y] and p[y] - max_{k != y} p[k] from the fold model that
  never saw the row.

Statistics are accumulated checkpoint by checkpoint in row chunks; no rows x checkpoints array exists.

Also here: the regression analogues (``ResidualDynamics``), repeated cross-fitting with Spearman
stability, and the fits of the AUM threshold-sample passes (``threshold_samples``; the procedure
and its settings are :mod:`leanset.scores.labels`). The proxy–target agreement check is
:mod:`leanset.scores.target_agreement`.
"""

from __future__ import annotations

import logging
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from itertools import combinations

import numpy as np
import pandas as pd
from scipy import stats

from ..config import Config, ProxyConfig, SCORE_NAMES
from ..difficulty import DIFFICULTY_SIGN
from ..errors import ConfigError
from ..models.proxy import FittedProxy, binned_dataset, class_rounds, fit_proxy, n_checkpoints, softmax
from ..load.memory import release_memory
from ..load.rows import RowFrame
from ..load.split import deal_folds
# scores/cluster.py imports these from here too
from .labels import aum_cutoff, threshold_config, wants_threshold_samples  # noqa: F401
from .locus import Locus, locus_seed

logger = logging.getLogger(__name__)

CHUNK = 65_536


def _other_max(values: np.ndarray, y: np.ndarray) -> np.ndarray:
    masked = values.copy()
    masked[np.arange(len(y)), y] = -np.inf
    return masked.max(axis=1)


def margin(values: np.ndarray, y: np.ndarray) -> np.ndarray:
    """values[y] - max over the other classes, per row; values is (n, k)."""
    return values[np.arange(len(y)), y] - _other_max(values, y)


class Dynamics:
    """Running per-row statistics of a proxy's checkpoints.

    Parameters
    ----------
    n : int
        Number of rows.
    el2n_checkpoint : int
        The (1-based) checkpoint at which EL2N is taken.
    """

    def __init__(self, n: int, el2n_checkpoint: int):
        self.el2n_checkpoint = el2n_checkpoint
        self.count = np.zeros(n, np.int32)
        self.forgetting = np.zeros(n, np.int32)
        self.ever_correct = np.zeros(n, bool)
        self.prev_correct = np.zeros(n, np.int8)  # -1: no previous checkpoint in this model
        self.margin_sum = np.zeros(n)
        self.correct_sum = np.zeros(n)
        self.aleatoric_sum = np.zeros(n)
        self.p_mean = np.zeros(n)
        self.p_m2 = np.zeros(n)
        self.el2n_sum = np.zeros(n)
        self.el2n_count = np.zeros(n, np.int32)

    def start_model(self, rows: np.ndarray) -> None:
        """Mark the start of a new model's checkpoints for ``rows``."""
        self.prev_correct[rows] = -1

    def update(self, t: int, rows: np.ndarray, logits: np.ndarray, y: np.ndarray) -> None:
        """Fold in checkpoint ``t`` (1-based) for ``rows``; ``logits`` is (len(rows), k), ``y`` their labels."""
        for s in range(0, len(rows), CHUNK):
            self._update(t, rows[s:s + CHUNK], logits[s:s + CHUNK], y[s:s + CHUNK])

    def _update(self, t, rows, z, y):
        idx = np.arange(len(y))
        z = np.asarray(z, dtype=np.float64)
        p = softmax(z)
        py = p[idx, y]
        m = margin(z, y)
        self.aleatoric_sum[rows] += py * (1.0 - py)
        if t == self.el2n_checkpoint:
            p[idx, y] -= 1.0
            self.el2n_sum[rows] += np.sqrt(np.einsum("ij,ij->i", p, p))
            self.el2n_count[rows] += 1
        # correct: z[y] above every other logit; for finite floats a - b > 0 exactly when a > b
        self.accumulate(rows, m > 0, m, py)

    def accumulate(self, rows: np.ndarray, correct: np.ndarray, margin_t: np.ndarray, value: np.ndarray) -> None:
        """Fold one checkpoint's correctness, margin and tracked value (p_t[y], or ŷ_t) into ``rows``."""
        prev = self.prev_correct[rows]
        self.forgetting[rows] += (prev == 1) & ~correct
        self.prev_correct[rows] = correct
        self.ever_correct[rows] |= correct
        self.margin_sum[rows] += margin_t
        self.correct_sum[rows] += correct
        n = self.count[rows] + 1
        delta = value - self.p_mean[rows]
        mean = self.p_mean[rows] + delta / n
        self.p_m2[rows] += delta * (value - mean)
        self.p_mean[rows] = mean
        self.count[rows] = n

    def result(self, rows) -> dict[str, np.ndarray]:
        """The finished statistics of ``rows`` (an index array, or ``slice(None)`` for all rows)."""
        c = self.count[rows].astype(np.float64)
        forgetting = np.where(self.ever_correct[rows], self.forgetting[rows], self.count[rows]).astype(np.float64)
        return {
            "forgetting": forgetting,
            "aum": self.margin_sum[rows] / c,
            "el2n": self.el2n_sum[rows] / np.maximum(self.el2n_count[rows], 1),
            "confidence": self.p_mean[rows],
            "variability": np.sqrt(self.p_m2[rows] / c),
            "correctness": self.correct_sum[rows] / c,
            "aleatoric": self.aleatoric_sum[rows] / c,
            "never_learned": ~self.ever_correct[rows],
        }


class ResidualDynamics:
    """Running per-row statistics of a regression proxy's checkpoints (the analogues in docs/scoring.md).

    With r_t = ŷ_t − y and correct_t = [|r_t| ≤ band]: ``forgetting`` and ``correctness`` as for
    classes, ``aum`` the mean of the margin analogue −|r_t|, ``el2n`` |r_e| at the early
    checkpoint, ``variability`` the population standard deviation of ŷ_t; ``confidence`` and
    ``aleatoric`` have no analogue and are NaN.

    Parameters
    ----------
    n : int
    el2n_checkpoint : int
    band : float
        Largest |r_t| that counts as correct.
    """

    def __init__(self, n: int, el2n_checkpoint: int, band: float):
        self.core = Dynamics(n, el2n_checkpoint)
        self.band = band

    def start_model(self, rows: np.ndarray) -> None:
        """Mark the start of a new model's checkpoints for ``rows``."""
        self.core.start_model(rows)

    def update(self, t: int, rows: np.ndarray, pred: np.ndarray, y: np.ndarray) -> None:
        """Fold in checkpoint ``t`` for ``rows``; ``pred`` is (len(rows),), ``y`` their labels."""
        d = self.core
        for s in range(0, len(rows), CHUNK):
            r, p, yy = rows[s:s + CHUNK], pred[s:s + CHUNK], y[s:s + CHUNK]
            res = np.abs(p - yy)
            if t == d.el2n_checkpoint:
                d.el2n_sum[r] += res
                d.el2n_count[r] += 1
            d.accumulate(r, res <= self.band, -res, p)

    def result(self, rows) -> dict[str, np.ndarray]:
        """The finished statistics of ``rows``."""
        out = self.core.result(rows)
        out["confidence"] = np.full(len(out["aum"]), np.nan)
        out["aleatoric"] = np.full(len(out["aum"]), np.nan)
        return out


def _margin_sums(n: int) -> tuple[np.ndarray, Callable]:
    """A zeroed per-row margin sum and the checkpoint callback that adds to it."""
    total = np.zeros(n)

    def add(rows: np.ndarray, z: np.ndarray, y: np.ndarray) -> None:
        for s in range(0, len(rows), CHUNK):
            total[rows[s:s + CHUNK]] += margin(np.asarray(z[s:s + CHUNK], dtype=np.float64), y[s:s + CHUNK])
    return total, add


def residual_band(y: np.ndarray, config: ProxyConfig) -> float:
    """``proxy.residual_band``, or the ``residual_quantile`` of |y − median(y)| (the constant model's residuals)."""
    if config.residual_band is not None:
        return float(config.residual_band)
    return float(np.quantile(np.abs(y - np.median(y)), config.residual_quantile))


@dataclass
class Scores:
    """Per-row scores of the training rows.

    Attributes
    ----------
    table : pandas.DataFrame
        One row per training row, in ``frame.train`` order: a column per score in
        ``SCORE_NAMES``, ``never_learned``, ``suspect_label`` (nullable boolean: null when the
        threshold-sample passes did not run), and with ``selection.spread`` ``locus`` (:class:`Locus`
        of the first repeat's first fold model; 0 for the linear proxy).
    proxies : list of FittedProxy
        The fold models of the first repeat, in fold order.
    checkpoints : int
        Checkpoints per fold model.
    info : dict
        ``repeats`` and ``stability`` (Spearman between repeats per score), ``label_errors``
        (threshold-sample cut-offs), and ``agreement`` once :func:`leanset.scores.target_agreement.agreement` has run.
    """

    table: pd.DataFrame
    proxies: list[FittedProxy]
    checkpoints: int
    info: dict = field(default_factory=dict)

    def difficulty(self, name: str) -> np.ndarray:
        """Score ``name`` oriented so that higher means harder."""
        return DIFFICULTY_SIGN[name] * self.table[name].to_numpy(np.float64)

    def locus(self) -> np.ndarray | None:
        """``locus`` as int64, or None for scores saved without it."""
        return self.table["locus"].to_numpy(np.int64) if "locus" in self.table else None

    def suspects(self) -> np.ndarray:
        """``suspect_label`` as a boolean array; rows without a verdict (null) count as not suspect."""
        return self.table["suspect_label"].fillna(False).to_numpy(bool)


def repeat_folds(frame: RowFrame, config: Config, r: int) -> tuple[np.ndarray, list[int]]:
    """Folds of the training rows and proxy seeds of cross-fitting pass ``r``: the load stage's
    folds and ``seed + k`` first, then fresh seeded folds and seeds."""
    train = frame.train
    if r == 0:
        return frame.fold[train], [config.seed + k for k in range(config.proxy.folds)]
    rng = np.random.default_rng([config.seed, 0x2E9, r])
    return deal_folds(frame.groups[train], config.proxy.folds, rng), [int(v) for v in rng.integers(2**31, size=config.proxy.folds)]


def _cross_fit(frame: RowFrame, binned, rows, y, fold, n_classes, pc: ProxyConfig, seeds: list[int],
               locus_seed: int | None) -> tuple[dict, list[FittedProxy]]:
    """One cross-fitting pass: in-fold dynamics and out-of-fold scores of the training rows ``rows``,
    and, unless ``locus_seed`` is None, their ``locus`` (:class:`Locus` of the first fold model, projections
    seeded by ``locus_seed``).

    The gbdt proxy trains on subsets of ``binned`` (the rows ``rows``, binned once); the linear proxy on
    copies of its fold's rows of ``frame.X``. Out-of-fold predictions take one pass over the
    feature batches, each row predicted by the fold model that never saw it.
    """
    n, T = len(y), n_checkpoints(pc)
    el2n_at = max(1, int(round(pc.el2n_at * T)))
    dyn = Dynamics(n, el2n_at) if n_classes else ResidualDynamics(n, el2n_at, residual_band(y, pc))
    proxies = []
    for k in range(pc.folds):
        fit_rows = np.flatnonzero(fold != k)
        y_fit = y[fit_rows]
        dyn.start_model(fit_rows)
        data = binned.subset(fit_rows) if binned is not None else frame.X[rows[fit_rows]]
        proxies.append(fit_proxy(data, y_fit, n_classes, frame.categorical, pc, seeds[k],
                                 lambda t, z: dyn.update(t, fit_rows, z, y_fit)))
        del data
    out = dyn.result(slice(None))
    dyn = None  # its running sums go before the out-of-fold pass allocates
    oof = np.empty((n, n_classes)) if n_classes else np.empty(n)
    locus = None if locus_seed is None else np.zeros(n, np.int64)  # the linear proxy keeps the zeros
    key = Locus.from_booster(proxies[0].model, locus_seed) if pc.family == "gbdt" and locus is not None else None
    for start, X in frame.feature_batches(train_only=True):  # rows is frame.train, in order
        here = fold[start:start + len(X)]
        if key is not None:
            locus[start:start + len(X)] = key(X)
        for k, model in enumerate(proxies):
            pick = np.flatnonzero(here == k)
            if len(pick):
                oof[start + pick] = model.predict_proba(X[pick]) if n_classes else model.predict(X[pick])
    out.update(oof_scores(oof, y, n_classes))
    if locus is not None:
        out["locus"] = locus
    return out, proxies


def oof_scores(oof: np.ndarray, y: np.ndarray, n_classes: int) -> dict[str, np.ndarray]:
    """``oof_loss``, ``oof_margin`` and ``oof_entropy`` from out-of-fold predictions ``oof``
    ((n, k) probabilities, or (n,) values for regression, where ``oof_entropy`` is NaN)."""
    if not n_classes:
        # per-row squared error: averages to sklearn.metrics.mean_squared_error
        return {"oof_loss": (oof - y) ** 2, "oof_margin": -np.abs(oof - y), "oof_entropy": np.full(len(y), np.nan)}
    # clip as sklearn.metrics.log_loss does (float64 eps), so oof_loss averages to its value
    p_true = np.clip(oof[np.arange(len(y)), y], np.finfo(np.float64).eps, 1.0)
    p = np.clip(oof, np.finfo(np.float64).tiny, 1.0)
    entropy = -(oof * np.log(p)).sum(axis=1) / np.log(max(n_classes, 2))
    return {"oof_loss": -np.log(p_true), "oof_margin": margin(oof, y), "oof_entropy": entropy}


def stability(repeats: list[dict]) -> dict[str, float | None]:
    """Mean Spearman correlation (``scipy.stats.spearmanr``) of each score over pairs of repeats."""
    out: dict[str, float | None] = {}
    for name in SCORE_NAMES:
        rhos = [stats.spearmanr(a[name], b[name]).statistic for a, b in combinations(repeats, 2)
                if np.ptp(a[name]) > 0 and np.ptp(b[name]) > 0]
        out[name] = float(np.mean(rhos)) if rhos else None
    return out


def score(frame: RowFrame, config: Config) -> Scores:
    """Cross-fit the proxy over the folds of ``frame`` and score every training row.

    With ``proxy.repeats`` > 1 the cross-fitting runs again on fresh seeded folds and proxy seeds,
    and every score is the mean over repeats (the EL2N paper averages over initialisations). With
    ``proxy.threshold_samples`` the AUM threshold-sample passes mark suspected label errors. On a
    table of many classes the gbdt proxy runs fewer rounds at a raised rate (``proxy.max_trees``,
    :func:`~leanset.models.proxy.class_rounds`).

    Returns
    -------
    Scores
    """
    n_classes = len(frame.classes)
    pc = class_rounds(config.proxy, n_classes)
    train = frame.train
    y = frame.y[train]
    if pc.family == "linear" and frame.X is None:
        mb = len(frame.y) * len(frame.feature_names) * 4 / 2**20
        raise ConfigError(f"proxy.family: linear needs the {mb:,.0f} MiB feature matrix in memory; "
                          f"raise execution.feature_memory_mb above {mb:,.0f} or use proxy.family gbdt")
    binned = None
    if pc.family == "gbdt":
        binned = binned_dataset(lambda: frame.feature_batches(train_only=True), len(train), y, frame.categorical, pc,
                                config.seed, config.execution.batch_rows)
        release_memory()  # the row groups read while binning
    info: dict = {"repeats": pc.repeats, "stability": None}
    if pc is not config.proxy:  # many classes: fewer rounds at a raised rate (models.proxy.class_rounds)
        info["class_rounds"] = {"rounds": pc.rounds, "learning_rate": pc.params["learning_rate"]}
    suspect = pd.array(np.full(len(y), pd.NA), dtype="boolean")
    if wants_threshold_samples(config) and n_classes:  # first, while no per-row statistics are held
        t0 = time.perf_counter()
        flags, info["label_errors"] = threshold_samples(binned if binned is not None else frame.X[train], y, n_classes,
                                                        frame.categorical, pc, config.seed)
        info["timings"] = {"threshold_samples": round(time.perf_counter() - t0, 3)}
        suspect = pd.array(flags, dtype="boolean")
    runs, proxies = [], []
    for r in range(pc.repeats):
        fold, seeds = repeat_folds(frame, config, r)
        out, models = _cross_fit(frame, binned, train, y, fold, n_classes, pc, seeds, locus_seed(config))
        runs.append(out)
        proxies = proxies or models
    del binned
    # one repeat: its arrays become the columns as they are (copy=False), not a second copy
    table = pd.DataFrame({name: runs[0][name] if len(runs) == 1 else np.mean([o[name] for o in runs], axis=0)
                          for name in SCORE_NAMES}, copy=False)
    table["never_learned"] = np.logical_and.reduce([o["never_learned"] for o in runs])
    if "locus" in runs[0]:
        table["locus"] = runs[0]["locus"]
    if pc.repeats > 1:
        info["stability"] = stability(runs)
    del runs
    table["suspect_label"] = suspect
    logger.info("score: %d training rows, %d folds x %d repeats of the %s proxy", len(y), pc.folds, pc.repeats, pc.family)
    return Scores(table=table, proxies=proxies, checkpoints=n_checkpoints(pc), info=info)


def threshold_samples(X, y: np.ndarray, n_classes: int, categorical: list[int], config: ProxyConfig,
                      seed: int) -> tuple[np.ndarray, dict]:
    """Suspected label errors by the AUM threshold-sample procedure (Pleiss et al., NeurIPS 2020).

    Two extra proxy fits on all rows, with the rounds of :func:`threshold_config`. In each, a
    seeded random slice of n / (k + 1) rows (the paper's size), at most ``threshold_share`` × n, is
    relabelled to a fake class k + 1, so those rows are mislabelled by construction; the
    ``threshold_percentile`` of their AUM is the cut-off. The slices of the two fits are disjoint,
    so every row is judged in at least one fit as a row with its own label; its gap to the cut-off
    is averaged over the fits that judged it, and a negative gap marks it suspect.

    Returns
    -------
    suspect : ndarray of bool, shape (n,)
    info : dict
        The cut-off of each fit and the number of suspects.
    """
    config = threshold_config(config)
    T, rows = n_checkpoints(config), np.arange(len(y))

    def fit_aum(labels: np.ndarray, k: int, fit_seed: int) -> np.ndarray:
        total, add = _margin_sums(len(y))
        fit_proxy(X, labels, k, categorical, config, fit_seed, lambda t, z: add(rows, z, labels))
        return total / T
    return aum_cutoff(y, n_classes, config, seed, fit_aum)
