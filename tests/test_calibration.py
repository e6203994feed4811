"""Calibration in the verdict: per-resample agreement with sklearn.metrics, and the calibration guard.

External references:
- Brier score and log loss: ``sklearn.metrics.brier_score_loss`` and ``sklearn.metrics.log_loss``.
- data: scikit-learn's bundled breast_cancer and wine datasets.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn import metrics
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import cross_val_predict, train_test_split

from leanset.config import TargetConfig, VerifyConfig
from leanset.verify.stats import _resamples, calibration, calibration_excess, calibration_interval, row_calibration
from leanset.verify.verdict import verify_rows

LGBM = TargetConfig(params={"num_boost_round": 50, "num_threads": 1})


def _probas(n: int, k: int, seed: int):
    rng = np.random.default_rng(seed)
    y = rng.integers(0, k, n)
    z = rng.normal(size=(n, k))
    z[np.arange(n), y] += 1.5
    p = np.exp(z)
    p /= p.sum(axis=1, keepdims=True)
    z2 = z + rng.normal(scale=1.0, size=(n, k))
    q = np.exp(z2)
    return y, p, q / q.sum(axis=1, keepdims=True)


def _sk(y: np.ndarray, p: np.ndarray) -> float:
    """The calibration score straight from sklearn.metrics."""
    if p.shape[1] == 2:
        return metrics.brier_score_loss(y, p[:, 1])
    return metrics.log_loss(y, p, labels=np.arange(p.shape[1]))


@pytest.mark.parametrize("k", [2, 3])
def test_interval_agrees_with_sklearn_on_each_resample(k):
    # Brier for binary, log loss for multiclass, each from sklearn.metrics on every resample.
    y, p, q = _probas(300, k, seed=k)
    assert calibration(y, p) == pytest.approx(_sk(y, p), rel=1e-12)
    B, conf = 200, 0.9
    resamples = list(_resamples(y, B, np.random.default_rng(7), stratify=True))
    for i in resamples:
        assert row_calibration(y[i], p[i]).mean() == pytest.approx(_sk(y[i], p[i]), rel=1e-9)
    # One model: the interval is the percentile interval of sklearn's values over the same resamples
    # (the generator draws the resample, then the model index, so a copy reproduces them).
    rng = np.random.default_rng(7)
    sk_values = []
    for i in _resamples(y, B, rng, stratify=True):
        rng.integers(1)
        sk_values.append(_sk(y[i], p[i]))
    lo, hi = calibration_interval(y, [p], B, conf, np.random.default_rng(7))
    assert (lo, hi) == pytest.approx((np.quantile(sk_values, 0.05), np.quantile(sk_values, 0.95)), rel=1e-9)
    # Paired excess: sklearn(q) / sklearn(p) − 1 on each shared resample.
    ratios = [_sk(y[i], q[i]) / _sk(y[i], p[i]) - 1 for i in resamples]
    excess, e_lo, e_hi = calibration_excess(y, p, q, B, conf, np.random.default_rng(7))
    assert excess == pytest.approx(_sk(y, q) / _sk(y, p) - 1, rel=1e-9)
    assert (e_lo, e_hi) == pytest.approx((np.quantile(ratios, 0.05), np.quantile(ratios, 0.95)), rel=1e-9)


def test_easy_rows_of_one_class_removed_fail_the_calibration_guard():
    # scikit-learn's bundled breast_cancer. Drop the easiest 95 % of the benign class (by the
    # out-of-fold probability of a logistic regression, sklearn) and fit without weights: the kept
    # model sees benign rows only near the boundary, so its probabilities lean malignant.
    X, y = load_breast_cancer(return_X_y=True)
    X = ((X - X.mean(0)) / X.std(0)).astype(np.float32)
    X_tr, X_ho, y_tr, y_ho = train_test_split(X, y, test_size=0.5, stratify=y, random_state=0)
    oof = cross_val_predict(LogisticRegression(max_iter=2000), X_tr, y_tr, cv=5, method="predict_proba")[:, 1]
    benign = np.flatnonzero(y_tr == 1)
    easiest = benign[np.argsort(-oof[benign])][: int(0.95 * len(benign))]
    keep = np.ones(len(y_tr), bool)
    keep[easiest] = False
    config = VerifyConfig(bootstrap=300, tolerance=1.0, class_tolerance=1.0)  # only the calibration guard can fail
    v = verify_rows(X_tr, y_tr, keep, np.ones(len(y_tr)), X_ho, y_ho, classes=[0, 1], categorical=[], target=LGBM, config=config, seed=0)
    cal = v.calibration
    assert cal["name"] == "brier"
    assert cal["full"] == pytest.approx(metrics.brier_score_loss(y_ho, v.models["full"].predict_proba(X_ho)[:, 1]))
    assert cal["kept"] > cal["full"]
    assert cal["ci"][0] > config.calibration_tolerance and cal["failed"]
    assert v.status == "fail" and v.blocked_by == ["calibration"]
    # Keeping every row: the excess is exactly zero and the guard holds.
    v = verify_rows(X_tr, y_tr, np.ones(len(y_tr), bool), np.ones(len(y_tr)), X_ho, y_ho, classes=[0, 1], categorical=[], target=LGBM, config=config, seed=0)
    assert v.calibration["excess"] == 0.0 and not v.calibration["failed"] and v.status == "pass"


def test_calibration_matches_sklearn():
    """Brier score for binary (sklearn.metrics.brier_score_loss), log loss for multiclass (sklearn.metrics.log_loss)."""
    rng = np.random.default_rng(0)
    p = rng.dirichlet([1, 1], size=200)
    y = rng.integers(0, 2, 200)
    assert calibration(y, p) == pytest.approx(metrics.brier_score_loss(y, p[:, 1]), abs=1e-12)
    p3 = rng.dirichlet([1, 1, 1], size=200)
    y3 = rng.integers(0, 3, 200)
    assert calibration(y3, p3) == pytest.approx(metrics.log_loss(y3, p3), abs=1e-12)
