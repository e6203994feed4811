"""Verify stage: train the target on full, kept and random rows; compare them on the holdout.

Δ = metric(full) − metric(kept), oriented so that a positive Δ means the kept-row model is worse
(for ``log_loss`` the sign flips). A paired bootstrap over holdout rows gives its interval; the
verdict is ``pass`` when the upper bound is ≤ tolerance, ``fail`` when the lower bound is above
it or when a class's recall drop is surely above ``class_tolerance`` (its interval's lower bound),
``inconclusive`` otherwise.
"""

from __future__ import annotations

import importlib
import time
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np
from scipy import stats
from sklearn import metrics

from .config import TargetConfig, VerifyConfig
from .errors import ConfigError

LIGHTGBM_DEFAULTS: dict[str, Any] = {
    "learning_rate": 0.05, "num_leaves": 63, "min_data_in_leaf": 20, "feature_fraction": 0.9,
    "verbose": -1, "deterministic": True, "force_col_wise": True, "num_threads": 2,
}
LIGHTGBM_ROUNDS = 300
#: +1 when higher is better.
ORIENTATION = {"accuracy": 1, "balanced_accuracy": 1, "macro_f1": 1, "roc_auc": 1, "log_loss": -1}


def metric_value(name: str, y: np.ndarray, proba: np.ndarray) -> float:
    """The named metric of class probabilities ``proba`` (n, k) against labels ``y``, via sklearn.metrics."""
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


def _resamples(y: np.ndarray, n_resamples: int, rng: np.random.Generator, stratify: bool):
    """Bootstrap row indices; stratified by class, each class keeps its count in every resample."""
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
    deltas = np.array([sign * (metric_value(name, y[i], proba_a[i]) - metric_value(name, y[i], proba_b[i]))
                       for i in _resamples(y, n_resamples, rng, stratify)])
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
        means = d[rng.integers(0, len(d), (n_resamples, len(d)))].mean(axis=1)
        drop[c] = d.mean()
        lo[c], hi[c] = _interval(means, confidence)
    return drop, lo, hi


def mcnemar_exact(correct_a: np.ndarray, correct_b: np.ndarray) -> dict[str, float]:
    """McNemar's exact test on paired correctness: two-sided binomial p on the discordant pairs."""
    b = int(np.sum(correct_a & ~correct_b))
    c = int(np.sum(~correct_a & correct_b))
    p = 1.0 if b + c == 0 else min(1.0, 2.0 * stats.binom.cdf(min(b, c), b + c, 0.5))
    return {"a_only": b, "b_only": c, "p_value": float(p)}


@dataclass
class FittedTarget:
    """A trained target model; ``booster`` is set for LightGBM, ``estimator`` for scikit-learn."""

    n_classes: int
    booster: lgb.Booster | None = None
    estimator: Any = None

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Class probabilities, shape (n, n_classes), columns in class-code order."""
        if self.booster is not None:
            p = self.booster.predict(X)
            return np.column_stack((1 - p, p)) if p.ndim == 1 else p
        out = np.zeros((len(X), self.n_classes))
        out[:, self.estimator.classes_.astype(int)] = self.estimator.predict_proba(X)
        return out


def _sklearn_estimator(config: TargetConfig, seed: int):
    if not config.estimator:
        raise ConfigError("target.estimator: required when target.family is sklearn; give an import path such as sklearn.ensemble.HistGradientBoostingClassifier")
    module, _, name = config.estimator.rpartition(".")
    try:
        cls = getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError):
        raise ConfigError(f"target.estimator: cannot import '{config.estimator}'; check the module path and class name") from None
    params = dict(config.params)
    if "random_state" in cls().get_params():
        params.setdefault("random_state", seed)
    try:
        return cls(**params)
    except TypeError as exc:
        raise ConfigError(f"target.params: {exc}; fix the parameters of {config.estimator}") from None


def fit_target(X: np.ndarray, y: np.ndarray, weight: np.ndarray | None, n_classes: int,
               categorical: list[int], config: TargetConfig, seed: int) -> FittedTarget:
    """Train the configured target on (X, y) with optional per-row weights."""
    if config.family == "sklearn":
        est = _sklearn_estimator(config, seed)
        est.fit(X, y, sample_weight=weight) if weight is not None else est.fit(X, y)
        return FittedTarget(n_classes, estimator=est)
    params = {**LIGHTGBM_DEFAULTS, **config.params, "seed": seed}
    rounds = int(params.pop("num_boost_round", params.pop("n_estimators", LIGHTGBM_ROUNDS)))
    params.update({"objective": "multiclass", "num_class": n_classes} if n_classes > 2 else {"objective": "binary"})
    data = lgb.Dataset(X, label=y, weight=weight, categorical_feature=categorical or "auto")
    return FittedTarget(n_classes, booster=lgb.train(params, data, num_boost_round=rounds))


@dataclass
class Verdict:
    """Outcome of the verify stage; ``to_dict`` gives the ``verdict`` section of run.json."""

    status: str
    metric: str
    full: float
    kept: float
    random: float
    delta: float
    ci: tuple[float, float]
    tolerance: float
    mcnemar: dict[str, float]
    per_class_recall: dict[str, dict[str, float]]
    failed_classes: list[str]
    train_seconds: dict[str, float]
    speedup: float
    models: dict[str, FittedTarget]

    def to_dict(self) -> dict[str, Any]:
        """Everything but the fitted models, JSON-ready."""
        d = {k: v for k, v in self.__dict__.items() if k != "models"}
        d["ci"] = list(self.ci)
        return d


def verify(X_train: np.ndarray, y_train: np.ndarray, keep: np.ndarray, weight: np.ndarray,
           X_hold: np.ndarray, y_hold: np.ndarray, classes: list, categorical: list[int],
           target: TargetConfig, config: VerifyConfig, seed: int) -> Verdict:
    """Train the target on full, kept and same-size random training rows; judge Δ on the holdout.

    Parameters
    ----------
    X_train, y_train : ndarray, shapes (n, f) and (n,)
        All training rows.
    keep : ndarray of bool, shape (n,)
    weight : ndarray of float, shape (n,)
        Weights of the kept rows (entries of dropped rows are ignored).
    X_hold, y_hold : ndarray
        The holdout, never pruned.
    classes : list
        Label values, for naming per-class results.

    Returns
    -------
    Verdict
    """
    rng = np.random.default_rng([seed, 0x7E5])
    k = len(classes)
    kept_idx = np.flatnonzero(keep)
    random_idx = np.sort(rng.choice(len(y_train), size=len(kept_idx), replace=False))
    w = weight[kept_idx]
    runs = {"full": (np.arange(len(y_train)), None), "kept": (kept_idx, None if np.allclose(w, 1.0) else w),
            "random": (random_idx, None)}
    models, seconds, proba = {}, {}, {}
    for name, (idx, wt) in runs.items():
        t0 = time.perf_counter()
        models[name] = fit_target(X_train[idx], y_train[idx], wt, k, categorical, target, seed)
        seconds[name] = time.perf_counter() - t0
        proba[name] = models[name].predict_proba(X_hold)
    m = config.metric
    value = {name: metric_value(m, y_hold, p) for name, p in proba.items()}
    delta = ORIENTATION[m] * (value["full"] - value["kept"])
    lo, hi = paired_bootstrap(y_hold, proba["full"], proba["kept"], m, config.bootstrap, config.confidence, rng)

    hit = {name: p.argmax(axis=1) == y_hold for name, p in proba.items()}
    drop, c_lo, c_hi = recall_drop(y_hold, hit["full"], hit["kept"], k, config.bootstrap, config.confidence, rng)
    recall = {}
    for c in range(k):
        rows = y_hold == c
        recall[str(classes[c])] = {"full": float(hit["full"][rows].mean()), "kept": float(hit["kept"][rows].mean()),
                                   "drop": float(drop[c]), "ci": [float(c_lo[c]), float(c_hi[c])]}
    tol_c = config.class_tolerance
    failed = [str(classes[c]) for c in range(k) if c_lo[c] > tol_c]
    if lo > config.tolerance or failed:
        status = "fail"
    elif hi <= config.tolerance and np.all(c_hi <= tol_c):
        status = "pass"
    else:
        status = "inconclusive"
    mc = mcnemar_exact(hit["full"], hit["kept"])
    return Verdict(
        status=status, metric=m, full=value["full"], kept=value["kept"], random=value["random"],
        delta=float(delta), ci=(lo, hi), tolerance=config.tolerance, mcnemar=mc,
        per_class_recall=recall, failed_classes=failed,
        train_seconds=seconds, speedup=seconds["full"] / max(seconds["kept"], 1e-9), models=models,
    )
