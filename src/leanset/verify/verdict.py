"""Verify stage: train the target on full, kept and random rows; compare them on the holdout.

Δ = metric(full) − metric(kept), oriented so that a positive Δ means the kept-row model is worse
(for ``log_loss`` the sign flips). A paired bootstrap over holdout rows gives its interval; the
verdict is ``pass`` when the upper bound is ≤ tolerance, ``fail`` when the lower bound is above
it, when a class's recall drop is surely above ``class_tolerance`` (its interval's lower bound) or
when the kept model's calibration is surely worse than the full model's by more than
``calibration_tolerance`` (see :func:`~leanset.verify.stats.calibration_excess`), ``inconclusive``
otherwise. The statistics themselves are in :mod:`leanset.verify.stats`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from ..config import REGRESSION_METRICS, Config, TargetConfig, VerifyConfig
from ..models.target import FittedTarget, fit_timed
from .stats import (ORIENTATION, calibration, calibration_excess, calibration_interval, mcnemar_exact, metric_interval,
                    metric_value, paired_bootstrap, recall_drop, safe_metric)

if TYPE_CHECKING:
    from ..load.rows import RowFrame
    from ..select.rules import Selection


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
    m = config.metric
    delta = ORIENTATION[m] * (metric_value(m, y_hold, proba_full) - metric_value(m, y_hold, proba_kept))
    lo, hi = paired_bootstrap(y_hold, proba_full, proba_kept, m, config.bootstrap, config.confidence, rng)
    # the guards draw from rng in this order: classes, segments, calibration
    recall, failed, classes_clear, mc = _class_guard(y_hold, proba_full, proba_kept, classes, config, rng)
    per_segment, failed_segments = _segment_guard(y_hold, proba_full, proba_kept, segments, segment_names, config, rng)
    cal = _calibration_guard(y_hold, proba_full, proba_kept, config, rng)
    # each guard: (surely bad, surely clear)
    guards = {
        "metric": (lo > config.tolerance, hi <= config.tolerance),
        "class": (bool(failed), classes_clear),
        "segment": (bool(failed_segments), all(s["ci"] is None or s["ci"][1] <= config.segment_tolerance
                                                for s in per_segment.values())),
        "calibration": (cal.get("failed", False), True),
    }
    if any(bad for bad, _ in guards.values()):
        status = "fail"
    elif all(clear for _, clear in guards.values()):
        status = "pass"
    else:
        status = "inconclusive"
    return Comparison(status=status, delta=float(delta), ci=(lo, hi), per_class_recall=recall, failed_classes=failed,
                      per_segment=per_segment, failed_segments=failed_segments, mcnemar=mc, calibration_excess=cal,
                      blocked_by=[name for name, (bad, clear) in guards.items() if bad or not clear])


def _class_guard(y_hold, proba_full, proba_kept, classes, config: VerifyConfig, rng):
    """Each class's recall full → kept with the drop's interval; the classes whose drop is surely above
    ``class_tolerance``; whether every drop is surely within it; McNemar's test. Regression: nothing to guard."""
    if proba_full.ndim != 2:
        return {}, [], True, None
    k = len(classes)
    hit_full, hit_kept = proba_full.argmax(axis=1) == y_hold, proba_kept.argmax(axis=1) == y_hold
    drop, c_lo, c_hi = recall_drop(y_hold, hit_full, hit_kept, k, config.bootstrap, config.confidence, rng)
    recall = {}
    for c in range(k):
        rows = y_hold == c
        recall[str(classes[c])] = {"full": float(hit_full[rows].mean()), "kept": float(hit_kept[rows].mean()),
                                   "drop": float(drop[c]), "ci": [float(c_lo[c]), float(c_hi[c])]}
    failed = [str(classes[c]) for c in range(k) if c_lo[c] > config.class_tolerance]
    return recall, failed, bool(np.all(c_hi <= config.class_tolerance)), mcnemar_exact(hit_full, hit_kept)


def _segment_guard(y_hold, proba_full, proba_kept, segments, segment_names, config: VerifyConfig, rng):
    """Δ with its interval for each value of each segment column, and the values whose Δ is surely
    above ``segment_tolerance``; a value where the metric is undefined gets no interval."""
    m = config.metric
    per_segment, failed = {}, []
    for j, column in enumerate(segment_names):
        for v in np.unique(segments[:, j]):
            rows = segments[:, j] == v
            key = f"{column}={v}"
            d = ORIENTATION[m] * (safe_metric(m, y_hold[rows], proba_full[rows]) - safe_metric(m, y_hold[rows], proba_kept[rows]))
            if not np.isfinite(d):
                per_segment[key] = {"rows": int(rows.sum()), "delta": None, "ci": None}
                continue
            s_lo, s_hi = paired_bootstrap(y_hold[rows], proba_full[rows], proba_kept[rows], m,
                                          config.bootstrap, config.confidence, rng)
            per_segment[key] = {"rows": int(rows.sum()), "delta": float(d), "ci": [s_lo, s_hi]}
            if s_lo > config.segment_tolerance:
                failed.append(key)
    return per_segment, failed


def _calibration_guard(y_hold, proba_full, proba_kept, config: VerifyConfig, rng) -> dict[str, Any]:
    """The kept model's calibration excess over the full model's, its interval, and whether it surely
    exceeds ``calibration_tolerance``; empty for regression."""
    if proba_full.ndim != 2:
        return {}
    excess, e_lo, e_hi = calibration_excess(y_hold, proba_full, proba_kept, config.bootstrap, config.confidence, rng)
    return {"excess": excess, "ci": [e_lo, e_hi], "tolerance": config.calibration_tolerance,
            "failed": bool(e_lo > config.calibration_tolerance)}


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
        """Everything but the fitted models, JSON-ready, with :func:`against_random`."""
        d = {k: v for k, v in self.__dict__.items() if k != "models"}
        d["ci"], d["random_ci"] = list(self.ci), list(self.random_ci)
        d["against_random"] = against_random(self.metric, self.kept, self.random_ci, self.calibration)
        return d


def against_random(metric: str, kept: float, random_ci, calibration: dict[str, Any] | None = None) -> dict[str, str]:
    """Where the kept model stands against the same-size random subsets: ``metric`` is ``better``,
    ``on_par`` or ``worse`` as the kept value lies above, inside or below random's interval (in the
    metric's own direction); ``calibration`` likewise against random's calibration interval (lower
    is better), when there is one. On par is no win: a random subset of that size costs nothing."""
    def where(value: float, lo: float, hi: float, sign: int) -> str:
        lo, hi = sorted((sign * lo, sign * hi))
        return "better" if sign * value > hi else "worse" if sign * value < lo else "on_par"
    out = {"metric": where(kept, *random_ci, ORIENTATION[metric])}
    if calibration and "random_ci" in calibration:
        out["calibration"] = where(calibration["kept"], *calibration["random_ci"], -1)
    return out


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
    X_hold : ndarray or RowView, shape (m, f)
        The holdout rows' features.
    """

    model: FittedTarget
    seconds: float
    X: Any
    X_hold: Any


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
        # the holdout is predicted batch by batch, not gathered (61 MiB at 2,000,000 x 40)
        X, X_hold, full = frame.feature_rows(train), frame.feature_rows(np.flatnonzero(hold)), None
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
    X_hold, y_hold : ndarray or RowView, and ndarray
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
