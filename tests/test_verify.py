"""Verify stage: metrics, paired bootstrap, McNemar, per-class recall guard, and the verdict.

External references:
- metrics: ``sklearn.metrics`` (accuracy_score, balanced_accuracy_score, f1_score, roc_auc_score, log_loss).
- bootstrap: ``scipy.stats.bootstrap`` (paired=True, method="percentile").
- McNemar's exact test: the two-sided binomial test on the discordant pairs, ``scipy.stats.binomtest``
  (McNemar, Psychometrika 1947; the exact binomial form is from memory, as found in e.g. Fagerland
  et al., BMC Med Res Methodol 2013, "The McNemar test for binary matched-pairs data").
- data: scikit-learn's bundled wine, digits and breast_cancer datasets.
"""

from __future__ import annotations

import importlib

import numpy as np
import pytest
from scipy import stats
from sklearn import metrics
from sklearn.datasets import load_breast_cancer, load_diabetes, load_digits, load_wine
from sklearn.linear_model import LogisticRegression, Ridge
from sklearn.model_selection import train_test_split

from leanset.config import SelectionConfig, TargetConfig, VerifyConfig
from leanset.errors import ConfigError
from leanset.select.rules import select
from leanset.models.target import FittedTarget, fit_target
from leanset.verify.stats import mcnemar_exact, metric_interval, metric_value, paired_bootstrap, recall_drop, resampled_metric
from leanset.verify.verdict import verify_rows

# The module whose ``fit_target`` every fit of ``verify_rows`` goes through, for monkeypatching.
target_mod = importlib.import_module("leanset.models.target")

# One LightGBM thread and 50 rounds keep the fits quick when other processes share the CPU
# (OpenMP threads spin under contention); neither weakens the checks below.
LGBM = TargetConfig(params={"num_boost_round": 50, "num_threads": 1})
LOGREG = TargetConfig(family="sklearn", estimator="sklearn.linear_model.LogisticRegression",
                      params={"C": 0.5, "max_iter": 2000})


def _probas(n: int, k: int, seed: int, skill: float = 2.0):
    """Labels covering all k classes and two fixed probability arrays that lean toward them."""
    rng = np.random.default_rng(seed)
    y = np.arange(n) % k
    rng.shuffle(y)
    out = []
    for s in (skill, skill / 2):
        z = rng.normal(size=(n, k))
        z[np.arange(n), y] += s
        p = np.exp(z)
        out.append(p / p.sum(axis=1, keepdims=True))
    return y, out[0], out[1]


def _split(loader, seed=0, standardise=False):
    X, y = loader(return_X_y=True)
    X = X.astype(np.float32)
    if standardise:
        X = (X - X.mean(0)) / X.std(0)
    X_tr, X_ho, y_tr, y_ho = train_test_split(X, y, test_size=0.2, stratify=y, random_state=seed)
    return X_tr, y_tr.astype(np.int32), X_ho, y_ho.astype(np.int32)


# ---------------------------------------------------------------- metric_value vs sklearn.metrics

@pytest.mark.parametrize("k", [2, 3, 5])
def test_metric_value_equals_sklearn_metrics(k):
    y, p, _ = _probas(60, k, seed=k)
    pred = p.argmax(axis=1)
    assert set(pred) == set(range(k))  # every class predicted, so macro-F1 label sets agree
    # sklearn.metrics reference values
    ref = {
        "accuracy": metrics.accuracy_score(y, pred),
        "balanced_accuracy": metrics.balanced_accuracy_score(y, pred),
        "macro_f1": metrics.f1_score(y, pred, average="macro"),
        "roc_auc": (metrics.roc_auc_score(y, p[:, 1]) if k == 2
                    else metrics.roc_auc_score(y, p, multi_class="ovr", average="macro")),
        "log_loss": metrics.log_loss(y, p),
    }
    for name, value in ref.items():
        assert metric_value(name, y, p) == pytest.approx(value, rel=1e-12, abs=1e-12), name


def test_metric_value_hand_arrays():
    # Tiny hand-written arrays, binary and 3-class, against sklearn.metrics.
    y2 = np.array([0, 0, 1, 1, 1])
    p2 = np.array([[.9, .1], [.4, .6], [.3, .7], [.8, .2], [.1, .9]])
    assert metric_value("accuracy", y2, p2) == pytest.approx(3 / 5)
    assert metric_value("roc_auc", y2, p2) == pytest.approx(metrics.roc_auc_score(y2, p2[:, 1]))
    # by hand: positives score .7, .2, .9 and negatives .1, .6; of the 6 (pos, neg) pairs only
    # (.2, .6) is misordered -> AUC = 5/6
    assert metric_value("roc_auc", y2, p2) == pytest.approx(5 / 6)
    assert metric_value("log_loss", y2, p2) == pytest.approx(metrics.log_loss(y2, p2))
    y3 = np.array([0, 1, 2, 1])
    p3 = np.array([[.7, .2, .1], [.1, .8, .1], [.2, .2, .6], [.5, .4, .1]])
    assert metric_value("accuracy", y3, p3) == pytest.approx(0.75)
    assert metric_value("balanced_accuracy", y3, p3) == pytest.approx(metrics.balanced_accuracy_score(y3, p3.argmax(1)))
    assert metric_value("macro_f1", y3, p3) == pytest.approx(metrics.f1_score(y3, p3.argmax(1), average="macro"))
    assert metric_value("log_loss", y3, p3) == pytest.approx(metrics.log_loss(y3, p3))
    assert metric_value("roc_auc", y3, p3) == pytest.approx(metrics.roc_auc_score(y3, p3, multi_class="ovr"))


def test_macro_f1_averages_over_classes_present_in_y():
    # leanset's choice: macro-F1 over the classes present in y (so a bootstrap resample or a
    # holdout without some class is not scored on it), i.e. sklearn.metrics.f1_score with
    # labels=np.unique(y); sklearn's default would also average in predicted-only classes.
    y = np.array([0, 0, 1, 1])
    p = np.array([[.9, .05, .05], [.1, .1, .8], [.1, .8, .1], [.1, .8, .1]])  # class 2 only predicted
    ours = metric_value("macro_f1", y, p)
    assert ours == pytest.approx(metrics.f1_score(y, p.argmax(1), average="macro", labels=[0, 1]))
    assert ours > metrics.f1_score(y, p.argmax(1), average="macro", zero_division=0)


# ---------------------------------------------------------------- paired bootstrap vs scipy.stats

def test_paired_bootstrap_matches_scipy_accuracy_multiclass():
    y, pa, pb = _probas(400, 3, seed=11)
    ca, cb = pa.argmax(1), pb.argmax(1)

    def stat(y, a, b, axis=-1):
        return np.mean(a == y, axis=axis) - np.mean(b == y, axis=axis)

    # scipy.stats.bootstrap, paired resampling of rows, percentile interval
    ref = stats.bootstrap((y, ca, cb), stat, paired=True, vectorized=True, n_resamples=2000,
                          confidence_level=0.95, method="percentile", rng=np.random.default_rng(1))
    lo, hi = paired_bootstrap(y, pa, pb, "accuracy", 2000, 0.95, np.random.default_rng(2), stratify=False)
    # Monte-Carlo tolerance: two independent 2000-resample estimates of each bound; the standard
    # error of their difference is ~0.003 here (bootstrap sd of Δ ~0.03), so 0.01 is > 3 SE.
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.01)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.01)
    assert lo < stat(y, ca, cb) < hi


def test_paired_bootstrap_matches_scipy_log_loss_binary():
    y, pa, pb = _probas(400, 2, seed=12)

    def stat(y, a, b, axis=-1):
        # oriented Δ for log_loss: loss(b) − loss(a), from per-row cross-entropy (numpy, not sklearn)
        la = -np.log(np.where(y == 1, a, 1 - a))
        lb = -np.log(np.where(y == 1, b, 1 - b))
        return np.mean(lb - la, axis=axis)

    ref = stats.bootstrap((y, pa[:, 1], pb[:, 1]), stat, paired=True, vectorized=True, n_resamples=2000,
                          confidence_level=0.90, method="percentile", rng=np.random.default_rng(3))
    lo, hi = paired_bootstrap(y, pa, pb, "log_loss", 2000, 0.90, np.random.default_rng(4), stratify=False)
    # Monte-Carlo tolerance, as above (bootstrap sd of Δ ~0.03 here).
    assert lo == pytest.approx(ref.confidence_interval.low, abs=0.01)
    assert hi == pytest.approx(ref.confidence_interval.high, abs=0.01)
    assert lo > 0  # a leans harder toward the truth than b, so b's loss is higher: Δ > 0


def test_paired_bootstrap_identical_models_and_stratified_roc_auc():
    # 3 rows of a rare class among 60: plain resamples would sometimes miss it and roc_auc would be
    # undefined; stratified resamples keep every class's count.
    y = np.array([0] * 57 + [1] * 3)
    rng = np.random.default_rng(5)
    p1 = rng.random(60)
    p = np.column_stack((1 - p1, p1))
    assert paired_bootstrap(y, p, p, "roc_auc", 200, 0.95, np.random.default_rng(0)) == (0.0, 0.0)
    q1 = np.where(y == 1, 0.99, rng.random(60) * 0.5)
    q = np.column_stack((1 - q1, q1))  # perfect ranking
    lo, hi = paired_bootstrap(y, q, p, "roc_auc", 200, 0.95, np.random.default_rng(0))
    assert 0 <= lo <= hi


def test_resampled_roc_auc_equals_sklearn_on_every_resample():
    # The binary fast path (scores sorted once, Mann-Whitney from multiplicities) against
    # sklearn.metrics.roc_auc_score on the resampled rows: breast cancer, a logistic regression's
    # probabilities rounded to 2 decimals so that many scores tie.
    X, y = load_breast_cancer(return_X_y=True)
    X_tr, X_te, y_tr, y_te = train_test_split(X, y, test_size=0.5, random_state=0, stratify=y)
    p1 = np.round(LogisticRegression(max_iter=5000).fit(X_tr, y_tr).predict_proba(X_te)[:, 1], 2)
    proba = np.column_stack((1 - p1, p1))
    fast = resampled_metric("roc_auc", y_te, proba)
    rng = np.random.default_rng(3)
    for _ in range(50):
        i = rng.integers(0, len(y_te), len(y_te))
        assert fast(i) == pytest.approx(metrics.roc_auc_score(y_te[i], p1[i]), abs=1e-12)
    assert np.isnan(fast(np.flatnonzero(y_te == 1)))  # one class only: undefined, as sklearn refuses it
    assert resampled_metric("accuracy", y_te, proba)(i) == metrics.accuracy_score(y_te[i], proba[i].argmax(axis=1))


def test_resampled_row_mean_metrics_equal_sklearn_on_every_resample():
    # The per-row fast path against sklearn.metrics on the resampled rows: a logistic regression's
    # probabilities on scikit-learn's wine (3 classes) for accuracy and log loss, and a ridge
    # regression's predictions on scikit-learn's diabetes for RMSE and MAE.
    X, y = load_wine(return_X_y=True)
    proba = LogisticRegression(max_iter=5000).fit(X[::2], y[::2]).predict_proba(X[1::2])
    yt = y[1::2]
    Xd, yd = load_diabetes(return_X_y=True)
    pred = Ridge().fit(Xd[::2], yd[::2]).predict(Xd[1::2])
    yr = yd[1::2]
    rng = np.random.default_rng(5)
    for _ in range(20):
        i = rng.integers(0, len(yt), len(yt))
        assert resampled_metric("accuracy", yt, proba)(i) == pytest.approx(metrics.accuracy_score(yt[i], proba[i].argmax(axis=1)), abs=1e-12)
        assert resampled_metric("log_loss", yt, proba)(i) == pytest.approx(metrics.log_loss(yt[i], proba[i], labels=[0, 1, 2]), abs=1e-12)
        j = rng.integers(0, len(yr), len(yr))
        assert resampled_metric("rmse", yr, pred)(j) == pytest.approx(np.sqrt(metrics.mean_squared_error(yr[j], pred[j])), abs=1e-9)
        assert resampled_metric("mae", yr, pred)(j) == pytest.approx(metrics.mean_absolute_error(yr[j], pred[j]), abs=1e-9)


# ---------------------------------------------------------------- McNemar vs scipy.stats.binomtest

def _pairs(b: int, c: int, both: int = 7, neither: int = 4):
    a = np.array([True] * b + [False] * c + [True] * both + [False] * neither)
    bb = np.array([False] * b + [True] * c + [True] * both + [False] * neither)
    return a, bb


@pytest.mark.parametrize("b,c", [(1, 0), (0, 5), (3, 3), (10, 2), (2, 10), (7, 20), (40, 55), (0, 25), (12, 13)])
def test_mcnemar_exact_equals_binomtest(b, c):
    ca, cb = _pairs(b, c)
    out = mcnemar_exact(ca, cb)
    assert (out["a_only"], out["b_only"]) == (b, c)
    # scipy.stats.binomtest two-sided p-value on the discordant pairs
    assert out["p_value"] == pytest.approx(stats.binomtest(min(b, c), b + c, 0.5).pvalue, rel=1e-10, abs=1e-15)


def test_mcnemar_exact_no_discordant_pairs():
    # b + c = 0: no evidence either way, p = 1 (scipy.stats.binomtest refuses n = 0, so the value
    # is the convention, no source).
    ca, cb = _pairs(0, 0)
    assert mcnemar_exact(ca, cb) == {"a_only": 0, "b_only": 0, "p_value": 1.0}
    with pytest.raises(ValueError):
        stats.binomtest(0, 0, 0.5)


# ---------------------------------------------------------------- recall_drop vs numpy

def test_recall_drop_against_numpy():
    rng = np.random.default_rng(6)
    # class 0: identical correctness; class 1: a always right, b always wrong; class 2: mixed;
    # class 3: absent.
    y = np.repeat([0, 1, 2], [30, 20, 300])
    ca = np.concatenate((rng.random(30) < .5, np.ones(20, bool), rng.random(300) < .8))
    cb = np.concatenate((ca[:30], np.zeros(20, bool), rng.random(300) < .6))
    drop, lo, hi = recall_drop(y, ca, cb, 4, 4000, 0.95, np.random.default_rng(7))
    for c in range(3):  # direct numpy: recall(a) − recall(b) within the class
        assert drop[c] == pytest.approx(ca[y == c].mean() - cb[y == c].mean(), abs=1e-15)
    assert np.isnan(drop[3]) and np.isnan(lo[3]) and np.isnan(hi[3])
    assert (lo[0], drop[0], hi[0]) == (0.0, 0.0, 0.0)
    assert (lo[1], drop[1], hi[1]) == (1.0, 1.0, 1.0)
    # class 2 interval: an independent numpy percentile bootstrap within the class;
    # Monte-Carlo tolerance (bootstrap sd ~0.04; SE of the difference of the two bounds ~0.002).
    d = ca[y == 2].astype(float) - cb[y == 2]
    means = d[np.random.default_rng(8).integers(0, len(d), (4000, len(d)))].mean(axis=1)
    assert lo[2] == pytest.approx(np.quantile(means, 0.025), abs=0.01)
    assert hi[2] == pytest.approx(np.quantile(means, 0.975), abs=0.01)


# ---------------------------------------------------------------- verify with scripted models

class _Scripted:
    """Stands in for fit_target: the model's holdout probabilities depend on which rows it saw."""

    def __init__(self, keep, probas):
        self.kept_idx = np.flatnonzero(keep)
        self.probas = probas
        self.calls = []

    def __call__(self, X, y, weight, n_classes, categorical, config, seed):
        rows = X[:, 0].astype(int)
        role = "full" if len(rows) == len(self.probas["n"]) else "kept" if np.array_equal(rows, self.kept_idx) else "random"
        self.calls.append((role, len(rows), weight))
        p = self.probas[role]
        return FittedTarget(n_classes, estimator=type("M", (), {"classes_": np.arange(n_classes),
                                                                 "predict_proba": lambda self, X: p})())


def _scripted_verify(monkeypatch, kept_wrong, metric="accuracy", tolerance=0.02, class_tolerance=0.5,
                     p_full=1.0, p_kept=1.0, calibration_tolerance=np.inf):
    """Holdout of 200 rows, 4 classes; full right everywhere, kept wrong on ``kept_wrong`` rows.

    The calibration guard is out of reach unless ``calibration_tolerance`` is given (it has its own tests)."""
    k, n_hold, n_train = 4, 200, 100
    y_hold = np.arange(n_hold) % k

    def proba(p_true, wrong):
        out = np.full((n_hold, k), (1 - p_true) / (k - 1))
        out[np.arange(n_hold), y_hold] = p_true
        out[wrong] = np.roll(out[wrong], 1, axis=1)  # mass moves to the next class: misclassified
        return out

    wrong = np.zeros(n_hold, bool)
    wrong[kept_wrong] = True
    probas = {"n": np.zeros(n_train), "full": proba(p_full, np.zeros(n_hold, bool)),
              "kept": proba(p_kept, wrong), "random": proba(0.5, np.zeros(n_hold, bool))}
    keep = np.zeros(n_train, bool)
    keep[::4] = True
    fake = _Scripted(keep, probas)
    monkeypatch.setattr(target_mod, "fit_target", fake)
    X_train = np.arange(n_train, dtype=float)[:, None]
    v = verify_rows(X_train, np.arange(n_train) % k, keep, np.ones(n_train), np.zeros((n_hold, 1)), y_hold,
                    classes=[f"c{c}" for c in range(k)], categorical=[], target=LGBM,
                    config=VerifyConfig(metric=metric, tolerance=tolerance, class_tolerance=class_tolerance, bootstrap=200,
                                        random_repeats=2, calibration_tolerance=calibration_tolerance), seed=0)
    assert sorted(r for r, _, _ in fake.calls) == ["full", "kept", "random", "random"]
    return v, probas


def test_verdict_pass_fail_inconclusive(monkeypatch):
    v, _ = _scripted_verify(monkeypatch, [])
    assert (v.status, v.delta, v.ci) == ("pass", 0.0, (0.0, 0.0))
    # 60 of 200 wrong (15 per class): Δ = 0.3, its interval is far above 0.02 -> fail; each class's
    # recall drop (0.3) stays below class_tolerance 0.5, so the failure is the overall one.
    v, _ = _scripted_verify(monkeypatch, np.arange(60))
    assert v.status == "fail" and v.failed_classes == []
    assert v.delta == pytest.approx(0.3) and v.ci[0] > v.tolerance
    assert v.mcnemar["a_only"] == 60 and v.mcnemar["b_only"] == 0
    # 4 of 200 wrong: Δ = 0.02 = tolerance, the interval straddles it -> inconclusive.
    v, _ = _scripted_verify(monkeypatch, np.arange(4))
    assert v.delta == pytest.approx(0.02)
    assert v.ci[0] <= 0.02 < v.ci[1]
    assert v.status == "inconclusive"
    # Every row of class c2 wrong with the overall tolerance out of reach (1.0): the per-class
    # guard alone fails the run.
    v, _ = _scripted_verify(monkeypatch, np.arange(2, 200, 4), tolerance=1.0)
    assert v.status == "fail" and v.failed_classes == ["c2"]
    assert v.per_class_recall["c2"] == {"full": 1.0, "kept": 0.0, "drop": 1.0, "ci": [1.0, 1.0]}
    # 5 of class c2's 50 rows wrong: its recall drop 0.1 sits on class_tolerance 0.1, its interval
    # straddles it -> not failed, but not a pass either.
    v, _ = _scripted_verify(monkeypatch, np.arange(2, 22, 4), tolerance=1.0, class_tolerance=0.1)
    assert v.per_class_recall["c2"]["drop"] == pytest.approx(0.1)
    lo, hi = v.per_class_recall["c2"]["ci"]
    assert lo <= 0.1 < hi
    assert v.failed_classes == [] and v.status == "inconclusive"


def test_delta_orientation_log_loss_scripted(monkeypatch):
    # Same argmax, kept less confident: accuracy Δ = 0; log_loss Δ = loss(kept) − loss(full)
    # = −log 0.6 + log 0.9 = log 1.5 > 0 on every row, so the interval collapses onto it.
    v, _ = _scripted_verify(monkeypatch, [], metric="log_loss", tolerance=0.1, p_full=0.9, p_kept=0.6)
    assert v.full == pytest.approx(-np.log(0.9)) and v.kept == pytest.approx(-np.log(0.6))
    assert v.delta == pytest.approx(np.log(1.5))
    assert v.ci == pytest.approx((np.log(1.5), np.log(1.5)))
    assert v.status == "fail"
    v, _ = _scripted_verify(monkeypatch, [], metric="accuracy", p_full=0.9, p_kept=0.6)
    assert v.delta == 0.0 and v.status == "pass"
    # The other way round (kept more confident) gives Δ < 0: the kept model is better.
    v, _ = _scripted_verify(monkeypatch, [], metric="log_loss", p_full=0.6, p_kept=0.9)
    assert v.delta == pytest.approx(-np.log(1.5)) and v.status == "pass"


# ---------------------------------------------------------------- verify with real fits

def test_delta_positive_when_kept_is_worse_digits():
    # scikit-learn's bundled digits; kept = a 5 % random subset, far worse than all rows.
    X_tr, y_tr, X_ho, y_ho = _split(load_digits)
    keep = np.zeros(len(y_tr), bool)
    keep[np.random.default_rng(0).choice(len(y_tr), len(y_tr) // 20, replace=False)] = True
    v = verify_rows(X_tr, y_tr, keep, np.ones(len(y_tr)), X_ho, y_ho, classes=list(range(10)), categorical=[], target=LGBM,
                    config=VerifyConfig(bootstrap=200), seed=0)
    assert v.full == pytest.approx(metric_value("accuracy", y_ho, v.models["full"].predict_proba(X_ho)))
    assert v.kept == pytest.approx(metric_value("accuracy", y_ho, v.models["kept"].predict_proba(X_ho)))
    assert v.full > v.kept
    assert v.delta == pytest.approx(v.full - v.kept) and v.delta > 0
    assert v.ci[0] > 0.01 and v.status == "fail"
    assert v.mcnemar["a_only"] > v.mcnemar["b_only"]


def test_delta_positive_when_kept_is_worse_log_loss_breast_cancer():
    # scikit-learn's bundled breast_cancer (binary); log_loss is lower-is-better, Δ = kept − full.
    X_tr, y_tr, X_ho, y_ho = _split(load_breast_cancer)
    keep = np.zeros(len(y_tr), bool)
    keep[np.random.default_rng(1).choice(len(y_tr), 45, replace=False)] = True
    v = verify_rows(X_tr, y_tr, keep, np.ones(len(y_tr)), X_ho, y_ho, classes=[0, 1], categorical=[], target=LGBM,
                    config=VerifyConfig(metric="log_loss", bootstrap=200), seed=0)
    assert v.kept > v.full
    assert v.delta == pytest.approx(v.kept - v.full) and v.delta > 0
    assert v.ci[1] > 0


def test_dropping_a_class_fails_naming_it():
    # scikit-learn's bundled digits with every training row of digit 3 dropped.
    X_tr, y_tr, X_ho, y_ho = _split(load_digits)
    keep = y_tr != 3
    v = verify_rows(X_tr, y_tr, keep, np.ones(len(y_tr)), X_ho, y_ho, classes=list(range(10)), categorical=[], target=LGBM,
                    config=VerifyConfig(bootstrap=200), seed=0)
    assert v.status == "fail"
    assert v.failed_classes == ["3"]
    assert v.per_class_recall["3"]["kept"] == 0.0
    assert v.per_class_recall["3"]["full"] > 0.8
    assert v.delta > 0


def test_keeping_everything_passes_with_zero_delta():
    # scikit-learn's bundled wine; select at fraction 1 keeps every row with weight 1.
    X_tr, y_tr, X_ho, y_ho = _split(load_wine)
    sel = select(np.zeros(len(y_tr)), y_tr, SelectionConfig(fraction=1.0), seed=0)
    assert sel.keep.all() and np.allclose(sel.weight, 1.0)
    v = verify_rows(X_tr, y_tr, sel.keep, sel.weight, X_ho, y_ho, classes=["a", "b", "c"], categorical=[], target=LGBM,
                    config=VerifyConfig(tolerance=0.0, class_tolerance=0.0, bootstrap=200), seed=0)
    assert v.status == "pass"
    assert v.delta == 0.0 and v.ci == (0.0, 0.0) and v.full == v.kept
    assert v.failed_classes == []
    assert v.mcnemar == {"a_only": 0, "b_only": 0, "p_value": 1.0}
    assert all(r["drop"] == 0.0 for r in v.per_class_recall.values())


# ---------------------------------------------------------------- target families

def test_sklearn_family_by_import_path():
    X_tr, y_tr, X_ho, y_ho = _split(load_wine, standardise=True)
    keep = np.zeros(len(y_tr), bool)
    keep[::2] = True
    v = verify_rows(X_tr, y_tr, keep, np.ones(len(y_tr)), X_ho, y_ho, classes=[0, 1, 2], categorical=[], target=LOGREG,
                    config=VerifyConfig(bootstrap=200), seed=5)
    est = v.models["full"].estimator
    assert isinstance(est, LogisticRegression) and v.models["full"].booster is None
    assert est.C == 0.5 and est.random_state == 5  # params passed, seed filled in
    # Same as fitting sklearn's LogisticRegression directly on all training rows.
    ref = LogisticRegression(C=0.5, max_iter=2000, random_state=5).fit(X_tr, y_tr)
    np.testing.assert_allclose(v.models["full"].predict_proba(X_ho), ref.predict_proba(X_ho), rtol=0, atol=1e-12)
    assert v.full == pytest.approx(metrics.accuracy_score(y_ho, ref.predict(X_ho)))


def test_sklearn_estimator_missing_class_column_is_zero():
    # A kept fit that never saw class 1 still yields 3 probability columns, class 1's all zero.
    X_tr, y_tr, X_ho, _ = _split(load_wine, standardise=True)
    m = fit_target(X_tr[y_tr != 1], y_tr[y_tr != 1], None, 3, [], LOGREG, seed=0)
    p = m.predict_proba(X_ho)
    assert p.shape == (len(X_ho), 3)
    assert np.all(p[:, 1] == 0) and np.allclose(p.sum(axis=1), 1.0)


@pytest.mark.parametrize("path,fragment", [
    ("sklearn.linear_model.NoSuchClassifier", "sklearn.linear_model.NoSuchClassifier"),
    ("no_such_package_xyz.Model", "no_such_package_xyz.Model"),
])
def test_bad_import_path_raises_config_error(path, fragment):
    X_tr, y_tr, X_ho, y_ho = _split(load_wine)
    target = TargetConfig(family="sklearn", estimator=path)
    with pytest.raises(ConfigError, match=fragment.replace(".", r"\.")):
        verify_rows(X_tr, y_tr, np.ones(len(y_tr), bool), np.ones(len(y_tr)), X_ho, y_ho, classes=[0, 1, 2], categorical=[], target=target,
                    config=VerifyConfig(bootstrap=200), seed=0)


def test_sklearn_family_missing_estimator_or_bad_params():
    X, y = np.zeros((10, 2)), np.arange(10) % 2
    with pytest.raises(ConfigError, match="target.estimator"):
        fit_target(X, y, None, 2, [], TargetConfig(family="sklearn"), seed=0)
    bad = TargetConfig(family="sklearn", estimator="sklearn.linear_model.LogisticRegression", params={"no_such_param": 1})
    with pytest.raises(ConfigError, match="no_such_param"):
        fit_target(X, y, None, 2, [], bad, seed=0)


# ---------------------------------------------------------------- weights reach the kept fit

def _weighted_selection():
    # scikit-learn's bundled breast_cancer (212 / 357): balanced quotas shift the class shares,
    # so class_prior weights differ from 1.
    X_tr, y_tr, X_ho, y_ho = _split(load_breast_cancer, standardise=True)
    d = np.random.default_rng(0).random(len(y_tr))
    sel = select(d, y_tr, SelectionConfig(fraction=0.3, strategy="random", class_floor=0), seed=0)
    assert not np.allclose(sel.weight[sel.keep], 1.0)
    return X_tr, y_tr, X_ho, y_ho, sel


def test_weights_passed_to_kept_fit_only(monkeypatch):
    X_tr, y_tr, X_ho, y_ho, sel = _weighted_selection()
    calls = []

    def spy(X, y, weight, *args, **kwargs):
        calls.append((len(y), None if weight is None else weight.copy()))
        return fit_target(X, y, weight, *args, **kwargs)

    monkeypatch.setattr(target_mod, "fit_target", spy)
    v = verify_rows(X_tr, y_tr, sel.keep, sel.weight, X_ho, y_ho, classes=[0, 1], categorical=[], target=LGBM,
                    config=VerifyConfig(bootstrap=200, random_repeats=1), seed=0)
    n_keep = int(sel.keep.sum())
    (n_full, w_full), (n_kept, w_kept), (n_rand, w_rand) = calls
    assert (n_full, n_kept, n_rand) == (len(y_tr), n_keep, n_keep)
    assert w_full is None and w_rand is None
    np.testing.assert_array_equal(w_kept, sel.weight[sel.keep])
    # The weights change the LightGBM model: the kept model equals a weighted fit, not an unweighted one.
    monkeypatch.undo()
    weighted = fit_target(X_tr[sel.keep], y_tr[sel.keep], sel.weight[sel.keep], 2, [], LGBM, seed=0)
    plain = fit_target(X_tr[sel.keep], y_tr[sel.keep], None, 2, [], LGBM, seed=0)
    np.testing.assert_allclose(v.models["kept"].predict_proba(X_ho), weighted.predict_proba(X_ho), rtol=0, atol=1e-12)
    assert not np.allclose(v.models["kept"].predict_proba(X_ho), plain.predict_proba(X_ho))


def test_weights_reach_sklearn_estimator():
    X_tr, y_tr, X_ho, y_ho, sel = _weighted_selection()
    v = verify_rows(X_tr, y_tr, sel.keep, sel.weight, X_ho, y_ho, classes=[0, 1], categorical=[], target=LOGREG, config=VerifyConfig(bootstrap=200), seed=0)
    # sklearn's LogisticRegression fitted directly with sample_weight is the reference.
    ref = LogisticRegression(C=0.5, max_iter=2000, random_state=0)
    ref.fit(X_tr[sel.keep], y_tr[sel.keep], sample_weight=sel.weight[sel.keep])
    np.testing.assert_allclose(v.models["kept"].estimator.coef_, ref.coef_, rtol=1e-6, atol=1e-8)
    unweighted = LogisticRegression(C=0.5, max_iter=2000, random_state=0).fit(X_tr[sel.keep], y_tr[sel.keep])
    assert not np.allclose(v.models["kept"].estimator.coef_, unweighted.coef_, rtol=1e-3, atol=1e-4)


def test_accuracy_interval_does_not_collapse_when_every_row_is_right():
    # Wilson score interval (Wilson, 1927) as scipy.stats.binomtest computes it: 36 of 36 right gives
    # [0.904, 1.0] at 95 %, while every bootstrap resample of a perfect model scores 1.0.
    y = np.repeat([0, 1, 2], 12)
    proba = np.eye(3)[y]
    lo, hi = metric_interval(y, [proba], "accuracy", 200, 0.95, np.random.default_rng(0))
    wilson = stats.binomtest(36, 36).proportion_ci(0.95, method="wilson")
    assert (lo, hi) == pytest.approx((wilson.low, wilson.high))
    assert lo < 0.95
    # a metric that is not a proportion keeps the plain percentile interval
    assert metric_interval(y, [proba], "macro_f1", 200, 0.95, np.random.default_rng(0)) == (1.0, 1.0)


def test_against_random_places_kept_against_randoms_interval_in_the_metrics_direction():
    # hand-worked (this project's wording of the comparison the selection suite flags):
    # above random's interval is "better", inside "on_par", below "worse"; rmse and
    # calibration losses are lower-is-better, so their sides swap.
    from leanset.verify.verdict import against_random
    assert against_random("accuracy", 0.90, (0.85, 0.88)) == {"metric": "better"}
    assert against_random("accuracy", 0.90, (0.89, 0.92)) == {"metric": "on_par"}
    assert against_random("accuracy", 0.80, (0.85, 0.88)) == {"metric": "worse"}
    assert against_random("rmse", 1.0, (1.2, 1.5)) == {"metric": "better"}
    assert against_random("rmse", 1.6, (1.2, 1.5)) == {"metric": "worse"}
    cal = {"kept": 0.40, "random_ci": [0.30, 0.35]}
    assert against_random("accuracy", 0.90, (0.89, 0.92), cal) == {"metric": "on_par", "calibration": "worse"}
