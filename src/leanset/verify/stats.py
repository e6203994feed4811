"""Verify stage: train the target on full, kept and random rows; compare them on the holdout.

Δ = metric(full) − metric(kept), oriented so that a positive Δ means the kept-row model is worse
(for ``log_loss`` the sign flips). A paired bootstrap over holdout rows gives its interval; the
verdict is ``pass`` when the upper bound is ≤ tolerance, ``fail`` when the lower bound is above
it, when a class's recall drop is surely above ``class_tolerance`` (its interval's lower bound) or
when the kept model's calibration is surely worse than the full model's by more than
``calibration_tolerance`` (see :func:`calibration_excess`), ``inconclusive`` otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from scipy import stats
from sklearn import metrics

from ..config import REGRESSION_METRICS, Config, TargetConfig, VerifyConfig
from ..errors import ConfigError
from ..models.target import FittedTarget, fit_timed

if TYPE_CHECKING:
    from ..load.rows import RowFrame
    from ..select.rules import Selection

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


def resampled_metric(name: str, y: np.ndarray, proba: np.ndarray):
    """``f(i)``: :func:`metric_value` on the bootstrap resample ``i`` (row indices); NaN where undefined.

    Binary ROC AUC takes a fast path: the scores are sorted once, and each resample's AUC is the
    Mann–Whitney statistic with ties counted half, from the rows' multiplicities in the resample;
    the same value as ``sklearn.metrics.roc_auc_score`` on ``(y[i], proba[i, 1])``, in O(n) a resample.
    """
    if name != "roc_auc" or proba.ndim != 2 or proba.shape[1] != 2:
        return lambda i: _safe_metric(name, y[i], proba[i])
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


@dataclass
class Comparison:
    """Δ between two models' holdout predictions, with its interval and the class, segment and
    calibration guards; ``blocked_by`` names each guard that kept the status from ``pass``
    (``metric``, ``class``, ``segment``, ``calibration``)."""

    status: str
    delta: float
    ci: tuple[float, float]
    per_class_recall: dict[str, dict[str, Any]]
    failed_classes: list[str]
    per_segment: dict[str, dict[str, Any]]
    failed_segments: list[str]
    mcnemar: dict[str, float]
    calibration_excess: dict[str, Any]
    blocked_by: list[str]


def _safe_metric(name: str, y: np.ndarray, proba: np.ndarray) -> float:
    try:
        return metric_value(name, y, proba)
    except ValueError:  # e.g. roc_auc on a segment that holds one class
        return float("nan")


def compare(y_hold: np.ndarray, proba_full: np.ndarray, proba_kept: np.ndarray, classes: list,
            config: VerifyConfig, rng: np.random.Generator, segments: np.ndarray | None = None,
            segment_names: tuple[str, ...] = ()) -> Comparison:
    """Judge the kept-row model against the full-data model on the holdout.

    Parameters
    ----------
    y_hold : ndarray of int, shape (m,)
    proba_full, proba_kept : ndarray, shape (m, k)
    classes : list
        Label values, for naming per-class results.
    config : VerifyConfig
    rng : numpy.random.Generator
    segments : ndarray of int, shape (m, s), optional
        Segment codes of the holdout rows; each segment value's Δ must stay within
        ``segment_tolerance``.
    segment_names : tuple of str

    Returns
    -------
    Comparison
    """
    m, k = config.metric, len(classes)
    delta = ORIENTATION[m] * (metric_value(m, y_hold, proba_full) - metric_value(m, y_hold, proba_kept))
    lo, hi = paired_bootstrap(y_hold, proba_full, proba_kept, m, config.bootstrap, config.confidence, rng)
    recall, failed, guards_clear, mc = {}, [], True, None  # regression: no classes to guard, no McNemar
    if proba_full.ndim == 2:
        hit_full, hit_kept = proba_full.argmax(axis=1) == y_hold, proba_kept.argmax(axis=1) == y_hold
        drop, c_lo, c_hi = recall_drop(y_hold, hit_full, hit_kept, k, config.bootstrap, config.confidence, rng)
        for c in range(k):
            rows = y_hold == c
            recall[str(classes[c])] = {"full": float(hit_full[rows].mean()), "kept": float(hit_kept[rows].mean()),
                                       "drop": float(drop[c]), "ci": [float(c_lo[c]), float(c_hi[c])]}
        failed = [str(classes[c]) for c in range(k) if c_lo[c] > config.class_tolerance]
        guards_clear = bool(np.all(c_hi <= config.class_tolerance))
        mc = mcnemar_exact(hit_full, hit_kept)

    per_segment, failed_segments = {}, []
    for j, column in enumerate(segment_names):
        for v in np.unique(segments[:, j]):
            rows = segments[:, j] == v
            key = f"{column}={v}"
            d = ORIENTATION[m] * (_safe_metric(m, y_hold[rows], proba_full[rows]) - _safe_metric(m, y_hold[rows], proba_kept[rows]))
            if not np.isfinite(d):
                per_segment[key] = {"rows": int(rows.sum()), "delta": None, "ci": None}
                continue
            s_lo, s_hi = paired_bootstrap(y_hold[rows], proba_full[rows], proba_kept[rows], m,
                                          config.bootstrap, config.confidence, rng)
            per_segment[key] = {"rows": int(rows.sum()), "delta": float(d), "ci": [s_lo, s_hi]}
            if s_lo > config.segment_tolerance:
                failed_segments.append(key)
            guards_clear &= s_hi <= config.segment_tolerance

    cal = {}
    if proba_full.ndim == 2:
        excess, e_lo, e_hi = calibration_excess(y_hold, proba_full, proba_kept, config.bootstrap, config.confidence, rng)
        cal = {"excess": excess, "ci": [e_lo, e_hi], "tolerance": config.calibration_tolerance,
               "failed": bool(e_lo > config.calibration_tolerance)}
    blocked = [name for name, surely_bad, clear in (
        ("metric", lo > config.tolerance, hi <= config.tolerance),
        ("class", bool(failed), proba_full.ndim == 1 or bool(np.all(c_hi <= config.class_tolerance))),
        ("segment", bool(failed_segments), all(s["ci"] is None or s["ci"][1] <= config.segment_tolerance
                                               for s in per_segment.values())),
        ("calibration", cal.get("failed", False), True),
    ) if surely_bad or not clear]
    if lo > config.tolerance or failed or failed_segments or cal.get("failed", False):
        status = "fail"
    elif hi <= config.tolerance and guards_clear:
        status = "pass"
    else:
        status = "inconclusive"
    return Comparison(status=status, delta=float(delta), ci=(lo, hi), per_class_recall=recall, failed_classes=failed,
                      per_segment=per_segment, failed_segments=failed_segments,
                      mcnemar=mc, calibration_excess=cal, blocked_by=blocked)


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
    """
    per_model = [resampled_metric(name, y, p) for p in probas]
    values = np.array([per_model[rng.integers(len(probas))](i) for i in _resamples(y, n_resamples, rng, stratify=True)])
    lo, hi = _interval(values[np.isfinite(values)], confidence)
    return float(lo), float(hi)


@dataclass
class Verdict(Comparison):
    """Outcome of the verify stage: the comparison plus each model's figures; ``to_dict`` gives
    the ``verdict`` section of run.json.

    ``random`` is the mean metric of ``verify.random_repeats`` same-size uniform subsets and
    ``random_ci`` its interval (see ``metric_interval``).
    """

    metric: str
    full: float
    kept: float
    random: float
    random_ci: tuple[float, float]
    tolerance: float
    metrics: dict[str, dict[str, float]]
    calibration: dict[str, float]
    train_seconds: dict[str, float]
    speedup: float
    models: dict[str, FittedTarget]

    def to_dict(self) -> dict[str, Any]:
        """Everything but the fitted models, JSON-ready."""
        d = {k: v for k, v in self.__dict__.items() if k != "models"}
        d["ci"], d["random_ci"] = list(self.ci), list(self.random_ci)
        return d


def _calibration_report(y_hold, proba, random_proba, cmp: Comparison, config: VerifyConfig, rng) -> dict[str, Any]:
    """The verdict's ``calibration``: each model's value and interval, the kept model's excess and the guard."""
    out: dict[str, Any] = {"name": "brier" if proba["full"].shape[1] == 2 else "log_loss"}
    for which, p in proba.items():
        out[which] = calibration(y_hold, p)
    out["random"] = float(np.mean([calibration(y_hold, p) for p in random_proba]))
    for which, ps in (("full", [proba["full"]]), ("kept", [proba["kept"]]), ("random", random_proba)):
        out[f"{which}_ci"] = list(calibration_interval(y_hold, ps, config.bootstrap, config.confidence, rng))
    return {**out, **cmp.calibration_excess}


@dataclass(frozen=True)
class Reference:
    """A target already trained on all training rows, and the feature rows it was trained and judged on.

    Attributes
    ----------
    model : FittedTarget
    seconds : float
        Its training time.
    X : ndarray or RowView, shape (n, f)
        The training rows' features, in ``frame.train`` order.
    X_hold : ndarray, shape (m, f)
        The holdout rows' features.
    """

    model: FittedTarget
    seconds: float
    X: Any
    X_hold: np.ndarray


def verify(frame: RowFrame, selection: Selection, config: Config, reference: Reference | None = None) -> Verdict:
    """Verify stage: the target trained on the kept rows against all and random training rows, on the holdout.

    Parameters
    ----------
    frame : RowFrame
    selection : Selection
        Which training rows are kept, and their weights.
    config : Config
        ``target``, ``verify`` and ``seed`` are read.
    reference : Reference, optional
        A full-data fit to reuse (the frontier's, when the fraction was searched); trained here otherwise.

    Returns
    -------
    Verdict

    See Also
    --------
    verify_rows : the same on given arrays, for a split other than the table's own.
    """
    train, hold = frame.train, frame.holdout
    if reference is None:
        X, X_hold, full = frame.feature_rows(train), frame.features(np.flatnonzero(hold)), None
    else:
        X, X_hold, full = reference.X, reference.X_hold, (reference.model, reference.seconds)
    return verify_rows(X, frame.y[train], selection.keep, selection.weight, X_hold, frame.y[hold],
                       classes=frame.classes, categorical=frame.categorical, target=config.target, config=config.verify,
                       seed=config.seed, segments_hold=None if frame.segments is None else frame.segments[hold],
                       segment_names=frame.segment_names, full=full)


def verify_rows(X_train: np.ndarray, y_train: np.ndarray, keep: np.ndarray, weight: np.ndarray,
                X_hold: np.ndarray, y_hold: np.ndarray, *, classes: list, categorical: list[int],
                target: TargetConfig, config: VerifyConfig, seed: int,
                segments_hold: np.ndarray | None = None, segment_names: tuple[str, ...] = (),
                full: tuple[FittedTarget, float] | None = None) -> Verdict:
    """Train the target on full, kept and same-size random training rows; judge Δ on the holdout.

    Parameters
    ----------
    X_train, y_train : ndarray or RowView, and ndarray; shapes (n, f) and (n,)
        All training rows.
    keep : ndarray of bool, shape (n,)
    weight : ndarray of float, shape (n,)
        Weights of the kept rows (entries of dropped rows are ignored).
    X_hold, y_hold : ndarray
        The holdout, never pruned.
    classes : list
        Label values, for naming per-class results.
    segments_hold : ndarray of int, shape (m, s), optional
        Segment codes of the holdout rows, named by ``segment_names``.
    full : (FittedTarget, float), optional
        An already trained full-data model and its training seconds, to reuse.

    Returns
    -------
    Verdict
    """
    rng = np.random.default_rng([seed, 0x7E5])
    k = len(classes)
    if k == 0 and config.metric not in REGRESSION_METRICS:  # regression with the default metric
        config = config.model_copy(update={"metric": "rmse"})
    kept_idx = np.flatnonzero(keep)
    w = weight[kept_idx]
    models, seconds, proba = {}, {}, {}
    models["full"], seconds["full"] = full or fit_timed(X_train, y_train, None, k, categorical, target, seed)
    models["kept"], seconds["kept"] = fit_timed(X_train[kept_idx], y_train[kept_idx], None if np.allclose(w, 1.0) else w,
                                                k, categorical, target, seed)
    random_proba = []
    for r in range(config.random_repeats):
        idx = np.sort(rng.choice(len(y_train), size=len(kept_idx), replace=False))
        model, sec = fit_timed(X_train[idx], y_train[idx], None, k, categorical, target, seed + r)
        if r == 0:
            models["random"], seconds["random"] = model, sec
        random_proba.append(model.predict_proba(X_hold))
    proba = {"full": models["full"].predict_proba(X_hold), "kept": models["kept"].predict_proba(X_hold)}
    m = config.metric
    random_value = float(np.mean([metric_value(m, y_hold, p) for p in random_proba]))
    random_ci = metric_interval(y_hold, random_proba, m, config.bootstrap, config.confidence, rng)
    cmp = compare(y_hold, proba["full"], proba["kept"], classes, config, rng, segments_hold, segment_names)
    proba["random"] = random_proba[0]
    report = {name: {which: metric_value(name, y_hold, p) for which, p in proba.items()}
              for name in dict.fromkeys((m, *(("accuracy", "balanced_accuracy", "macro_f1") if k else REGRESSION_METRICS)))}
    return Verdict(
        **vars(cmp), metric=m, full=metric_value(m, y_hold, proba["full"]),
        kept=metric_value(m, y_hold, proba["kept"]), random=random_value, random_ci=random_ci,
        tolerance=config.tolerance, metrics=report,
        calibration=_calibration_report(y_hold, proba, random_proba, cmp, config, rng) if k else {},
        train_seconds=seconds, speedup=seconds["full"] / max(seconds["kept"], 1e-9), models=models,
    )
