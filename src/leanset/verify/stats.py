"""Statistics of the verify stage: metrics via ``sklearn.metrics``, paired and stratified bootstrap
intervals, per-class recall drops, McNemar's exact test and calibration (Brier score or log loss).

The verdict built from them is in :mod:`leanset.verify.verdict`.
"""

from __future__ import annotations

import numpy as np
from scipy import stats
from sklearn import metrics

from ..errors import ConfigError

#: +1 when higher is better.
ORIENTATION = {"accuracy": 1, "balanced_accuracy": 1, "macro_f1": 1, "roc_auc": 1, "log_loss": -1,
               "rmse": -1, "mae": -1, "r2": 1}


def regression_metric(name: str, y: np.ndarray, pred: np.ndarray) -> float:
    """``rmse``, ``mae`` or ``r2`` of predicted values ``pred`` (n,) against ``y``, via sklearn.metrics."""
    if name == "rmse":
        return float(np.sqrt(metrics.mean_squared_error(y, pred)))
    if name == "mae":
        return float(metrics.mean_absolute_error(y, pred))
    if name == "r2":
        return float(metrics.r2_score(y, pred))
    raise ConfigError(f"verify.metric: {name} is a classification metric but the label is a regression label; use rmse, mae or r2")


def metric_value(name: str, y: np.ndarray, proba: np.ndarray) -> float:
    """The named metric of class probabilities ``proba`` (n, k) against labels ``y``, via sklearn.metrics.

    A 1-D ``proba`` holds a regression target's predicted values (see :func:`regression_metric`).
    """
    if proba.ndim == 1:
        return regression_metric(name, y, proba)
    k = proba.shape[1]
    if name == "log_loss":
        return float(metrics.log_loss(y, np.clip(proba, 1e-15, 1.0), labels=np.arange(k)))
    if name == "roc_auc":
        present = np.unique(y)
        if k == 2:
            return float(metrics.roc_auc_score(y, proba[:, 1]))
        p = proba[:, present] / np.maximum(proba[:, present].sum(axis=1, keepdims=True), 1e-300)
        return float(metrics.roc_auc_score(y, p, multi_class="ovr", average="macro", labels=present))
    pred = proba.argmax(axis=1)
    if name == "accuracy":
        return float(metrics.accuracy_score(y, pred))
    if name == "balanced_accuracy":
        return float(metrics.balanced_accuracy_score(y, pred))
    return float(metrics.f1_score(y, pred, average="macro", labels=np.unique(y), zero_division=0))


def _row_shares(name: str, y: np.ndarray, proba: np.ndarray) -> tuple[np.ndarray, bool] | None:
    """Each row's share of a metric that is a mean over rows, and whether the metric is its square root;
    None for the others (ROC AUC, balanced accuracy, macro F1, R²)."""
    if proba.ndim == 1:
        err = np.asarray(proba, np.float64) - y
        return {"rmse": (err**2, True), "mae": (np.abs(err), False)}.get(name)
    if name == "accuracy":
        return (proba.argmax(axis=1) == y).astype(np.float64), False
    if name == "log_loss":
        p = np.clip(proba, 1e-15, 1.0)
        return -np.log(p[np.arange(len(y)), y] / p.sum(axis=1)), False
    return None


def resampled_metric(name: str, y: np.ndarray, proba: np.ndarray):
    """``f(i)``: :func:`metric_value` on the bootstrap resample ``i`` (row indices); NaN where undefined.

    Metrics that are a mean over rows (accuracy, log loss, MAE, and RMSE as the root of one) take each
    row's share once and average it over the resample: the value ``sklearn.metrics`` gives on
    ``(y[i], proba[i])``, without its input checks on every resample. Binary ROC AUC takes a fast path
    too: the scores are sorted once, and each resample's AUC is the Mann–Whitney statistic with ties
    counted half, from the rows' multiplicities in the resample; the same value as
    ``sklearn.metrics.roc_auc_score`` on ``(y[i], proba[i, 1])``, in O(n) a resample.
    """
    rows = _row_shares(name, y, proba)
    if rows is not None:
        share, root = rows
        return (lambda i: float(np.sqrt(share[i].mean()))) if root else (lambda i: float(share[i].mean()))
    if name != "roc_auc" or proba.ndim != 2 or proba.shape[1] != 2:
        return lambda i: safe_metric(name, y[i], proba[i])
    order = np.argsort(proba[:, 1], kind="stable")
    ranked = proba[order, 1]
    positive = y[order] == 1
    tie = np.concatenate(([0], np.cumsum(ranked[1:] != ranked[:-1])))  # tie group of each sorted row
    groups = int(tie[-1]) + 1 if len(tie) else 0

    def auc(i: np.ndarray) -> float:
        w = np.bincount(i, minlength=len(y))[order].astype(np.float64)
        pos = np.bincount(tie, weights=np.where(positive, w, 0.0), minlength=groups)
        neg = np.bincount(tie, weights=np.where(positive, 0.0, w), minlength=groups)
        n_pos, n_neg = pos.sum(), neg.sum()
        if n_pos == 0 or n_neg == 0:
            return float("nan")
        below = np.cumsum(neg) - neg  # negatives scored strictly lower than each tie group
        return float((pos * (below + 0.5 * neg)).sum() / (n_pos * n_neg))
    return auc


def _resamples(y: np.ndarray, n_resamples: int, rng: np.random.Generator, stratify: bool):
    """Bootstrap row indices; stratified by class, each class keeps its count in every resample."""
    stratify = stratify and y.dtype.kind != "f"  # float labels are regression values, not classes
    groups = [np.flatnonzero(y == c) for c in np.unique(y)] if stratify else [np.arange(len(y))]
    for _ in range(n_resamples):
        yield np.concatenate([g[rng.integers(0, len(g), len(g))] for g in groups])


def _interval(values: np.ndarray, confidence: float) -> tuple[np.ndarray, np.ndarray]:
    alpha = (1 - confidence) / 2
    return np.quantile(values, alpha, axis=0), np.quantile(values, 1 - alpha, axis=0)


def paired_bootstrap(y: np.ndarray, proba_a: np.ndarray, proba_b: np.ndarray, name: str, n_resamples: int,
                     confidence: float, rng: np.random.Generator, stratify: bool = True) -> tuple[float, float]:
    """Percentile interval of Δ = oriented(metric(a) − metric(b)) over paired resamples of the rows.

    With ``stratify`` every resample keeps each class's count, so ``roc_auc`` stays defined.
    """
    sign = ORIENTATION[name]
    metric_a, metric_b = resampled_metric(name, y, proba_a), resampled_metric(name, y, proba_b)
    deltas = np.array([sign * (metric_a(i) - metric_b(i)) for i in _resamples(y, n_resamples, rng, stratify)])
    lo, hi = _interval(deltas, confidence)
    return float(lo), float(hi)


def recall_drop(y: np.ndarray, correct_a: np.ndarray, correct_b: np.ndarray, n_classes: int, n_resamples: int,
                confidence: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per-class recall(a) − recall(b), with its stratified paired-bootstrap interval.

    Returns (drop, lo, hi), each of shape (n_classes,); NaN for a class absent from ``y``.
    """
    drop, lo, hi = (np.full(n_classes, np.nan) for _ in range(3))
    diff = correct_a.astype(np.float64) - correct_b.astype(np.float64)
    for c in np.unique(y):
        d = diff[y == c]
        # resamples drawn in blocks of about 2**22 indices: the same draws as one (n_resamples, len(d))
        # array, without holding it on a large holdout
        step = max(1, 2**22 // len(d))
        means = np.concatenate([d[rng.integers(0, len(d), (min(step, n_resamples - a), len(d)))].mean(axis=1)
                                for a in range(0, n_resamples, step)])
        drop[c] = d.mean()
        lo[c], hi[c] = _interval(means, confidence)
    return drop, lo, hi


def mcnemar_exact(correct_a: np.ndarray, correct_b: np.ndarray) -> dict[str, float]:
    """McNemar's exact test on paired correctness: two-sided binomial p on the discordant pairs."""
    b = int(np.sum(correct_a & ~correct_b))
    c = int(np.sum(~correct_a & correct_b))
    p = 1.0 if b + c == 0 else min(1.0, 2.0 * stats.binom.cdf(min(b, c), b + c, 0.5))
    return {"a_only": b, "b_only": c, "p_value": float(p)}


def safe_metric(name: str, y: np.ndarray, proba: np.ndarray) -> float:
    """:func:`metric_value`, or NaN where the metric is undefined on these rows."""
    try:
        return metric_value(name, y, proba)
    except ValueError:  # e.g. roc_auc on a segment that holds one class
        return float("nan")


def calibration(y: np.ndarray, proba: np.ndarray) -> float:
    """Brier score (binary, ``sklearn.metrics.brier_score_loss``) or log loss (multiclass)."""
    if proba.shape[1] == 2:
        return float(metrics.brier_score_loss(y, proba[:, 1]))
    return metric_value("log_loss", y, proba)


def row_calibration(y: np.ndarray, proba: np.ndarray) -> np.ndarray:
    """Each row's share of :func:`calibration`: its mean over any rows is that rows' calibration.

    Binary: the squared error of P(class 1); multiclass: −log of the label's probability,
    clipped at 1e-15 as :func:`metric_value` does.
    """
    if proba.shape[1] == 2:
        return (proba[:, 1] - (y == 1)) ** 2
    return -np.log(np.clip(proba[np.arange(len(y)), y], 1e-15, 1.0))


def calibration_interval(y: np.ndarray, probas: list[np.ndarray], n_resamples: int, confidence: float,
                         rng: np.random.Generator) -> tuple[float, float]:
    """Percentile interval of :func:`calibration` over stratified holdout resamples; with several
    models (repeated random subsets), each resample is scored with one of them picked at random."""
    losses = [row_calibration(y, p) for p in probas]
    values = np.array([losses[rng.integers(len(losses))][i].mean() for i in _resamples(y, n_resamples, rng, stratify=True)])
    lo, hi = _interval(values, confidence)
    return float(lo), float(hi)


def calibration_excess(y: np.ndarray, proba_full: np.ndarray, proba_kept: np.ndarray, n_resamples: int,
                       confidence: float, rng: np.random.Generator) -> tuple[float, float, float]:
    """How much worse the kept model's calibration is, relative to the full model's:
    calibration(kept) / calibration(full) − 1, with its paired stratified bootstrap interval.

    A relative excess reads the same for the Brier score and log loss, whose scales differ.
    Returns (excess, lo, hi).
    """
    full, kept = row_calibration(y, proba_full), row_calibration(y, proba_kept)
    ratios = np.array([kept[i].mean() / max(full[i].mean(), 1e-300) - 1 for i in _resamples(y, n_resamples, rng, stratify=True)])
    lo, hi = _interval(ratios, confidence)
    return float(kept.mean() / max(full.mean(), 1e-300) - 1), float(lo), float(hi)


def metric_interval(y: np.ndarray, probas: list[np.ndarray], name: str, n_resamples: int, confidence: float,
                    rng: np.random.Generator) -> tuple[float, float]:
    """Percentile interval of a metric over holdout resamples and, with several models, over models.

    Each bootstrap resample of the holdout is scored with one of ``probas`` picked at random, so for
    repeated random subsets the interval carries both the holdout's noise and the luck of the draw.
    For ``accuracy`` the interval is widened, where narrower, to the Wilson score interval of the mean
    accuracy (Wilson, 1927; ``scipy.stats.binomtest``): when every model gets every holdout row right
    the percentile bootstrap collapses to [1, 1], which no finite holdout supports.
    """
    per_model = [resampled_metric(name, y, p) for p in probas]
    values = np.array([per_model[rng.integers(len(probas))](i) for i in _resamples(y, n_resamples, rng, stratify=True)])
    lo, hi = _interval(values[np.isfinite(values)], confidence)
    if name == "accuracy":
        right = int(round(np.mean([metric_value(name, y, p) for p in probas]) * len(y)))
        wilson = stats.binomtest(right, len(y)).proportion_ci(confidence, method="wilson")
        lo, hi = min(lo, wilson.low), max(hi, wilson.high)
    return float(lo), float(hi)
