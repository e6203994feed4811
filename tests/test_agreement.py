"""Proxy–target agreement: Spearman between the proxy's difficulty and the target's out-of-fold loss.

Outside sources:
- Spearman's rank correlation: ``scipy.stats.spearmanr``.
- per-row log loss and squared error: ``sklearn.metrics.log_loss`` / ``mean_squared_error``.
- data: scikit-learn's bundled breast-cancer and diabetes data.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import spearmanr
from sklearn import metrics
from sklearn.datasets import load_breast_cancer, load_diabetes

import leanset.scores.target_agreement as agreement_mod
from leanset.config import Config
from leanset.scores.target_agreement import agreement
from leanset.scores.dynamics import score
from leanset.load.table import load_table

ONE_THREAD = {"num_threads": 1}


def _table(tmp_path, loader, **input_extra):
    X, y = loader(return_X_y=True)
    d = pd.DataFrame(X.astype(np.float32), columns=[f"f{i}" for i in range(X.shape[1])])
    d.insert(0, "rid", [f"r{i}" for i in range(len(y))])
    d["label"] = y
    d.to_parquet(tmp_path / "t.parquet", index=False)
    cfg = Config.model_validate({
        "input": {"path": str(tmp_path / "t.parquet"), "label": "label", "id": "rid", **input_extra},
        "proxy": {"folds": 3, "rounds": 30, "params": ONE_THREAD, "threshold_samples": False, "agreement_rows": 300},
        "target": {"params": {"num_boost_round": 60, "num_threads": 1}},
        "seed": 5,
    })
    frame = load_table(cfg)
    return cfg, frame, score(frame, cfg)


def _recorded(monkeypatch):
    """Spy on the target fits: every (training X, predicted X, predictions) triple."""
    calls = []
    real = agreement_mod.fit_target

    def spy(X, y, weight, n_classes, categorical, config, seed):
        model = real(X, y, weight, n_classes, categorical, config, seed)
        predict = model.predict_proba

        def recorded(Xo):
            out = predict(Xo)
            calls.append((X.copy(), Xo.copy(), out.copy()))
            return out
        model.predict_proba = recorded
        return model

    monkeypatch.setattr(agreement_mod, "fit_target", spy)
    return calls


def _row_index(frame):
    train = frame.train
    keys = {frame.X[i].tobytes(): j for j, i in enumerate(train)}
    assert len(keys) == len(train)  # these tables have no repeated feature rows
    return keys


@pytest.mark.parametrize("loader, task", [(load_breast_cancer, "classification"), (load_diabetes, "regression")],
                         ids=["breast_cancer", "diabetes"])
def test_agreement_is_spearman_of_difficulty_and_target_oof_loss(tmp_path, monkeypatch, loader, task):
    cfg, frame, s = _table(tmp_path, loader, task=task)
    calls = _recorded(monkeypatch)
    ag = agreement(frame, s, cfg)
    assert ag["rows"] == 300 and len(calls) == cfg.proxy.agreement_folds == ag["folds"]
    keys = _row_index(frame)
    y = frame.y[frame.train]
    rows, losses = [], []
    for X_fit, X_out, pred in calls:
        fit = {keys[x.tobytes()] for x in X_fit}
        out = [keys[x.tobytes()] for x in X_out]
        assert not fit & set(out)  # out of fold: the target never trained on the rows it scores
        for j, p in zip(out, pred):
            if task == "classification":  # sklearn.metrics.log_loss of one row
                losses.append(metrics.log_loss([y[j]], [p], labels=[0, 1]))
            else:  # sklearn.metrics.mean_squared_error of one row
                losses.append(metrics.mean_squared_error([y[j]], [p]))
            rows.append(j)
    assert len(rows) == len(set(rows)) == 300
    want = spearmanr(s.difficulty("aum")[rows], losses).statistic
    assert ag["spearman"] == pytest.approx(want, abs=1e-9)
    # a fitted proxy's difficulty agrees with the target's loss on these tables (common practice, no source)
    assert ag["spearman"] > ag["floor"] and not ag["below_floor"]


def test_a_proxy_that_knows_nothing_falls_below_the_floor(tmp_path):
    cfg, frame, s = _table(tmp_path, load_breast_cancer)
    # the proxy's scores shuffled across rows: a stand-in that carries no information about the rows
    rng = np.random.default_rng(0)
    s.table = s.table.iloc[rng.permutation(len(s.table))].reset_index(drop=True)
    ag = agreement(frame, s, cfg)
    assert abs(ag["spearman"]) < 0.2 and ag["below_floor"]


def test_agreement_off(tmp_path):
    cfg, frame, s = _table(tmp_path, load_breast_cancer)
    off = cfg.model_copy(update={"proxy": cfg.proxy.model_copy(update={"agreement_rows": 0})})
    assert agreement(frame, s, off) is None


def test_agreement_fits_a_shorter_target_at_a_raised_rate():
    # proxy.agreement_rounds caps the target's rounds and raises its learning rate by the same factor
    # (a leanset choice: rounds x rate held about constant, common practice, no source)
    from leanset.config import TargetConfig
    from leanset.scores.target_agreement import agreement_target

    one = {"num_threads": 1}  # the sample fits run on one thread whatever the target's own setting
    short = agreement_target(TargetConfig(params={"num_boost_round": 300, "learning_rate": 0.05, "num_leaves": 31,
                                                  "num_threads": 4}), 50)
    assert short.params == {"num_boost_round": 50, "learning_rate": pytest.approx(0.3), "num_leaves": 31, **one}
    default = agreement_target(TargetConfig(), 50)  # LightGBM target defaults: 300 rounds at 0.05
    assert default.params == {"num_boost_round": 50, "learning_rate": pytest.approx(0.3), **one}
    assert agreement_target(TargetConfig(), 10).params["learning_rate"] == 0.5  # 0.05 x 30, capped
    many = agreement_target(TargetConfig(params={"n_estimators": 1000, "learning_rate": 0.05}), 50).params
    assert many == {"num_boost_round": 50, "learning_rate": 0.5, **one}
    few = TargetConfig(params={"num_boost_round": 40})
    assert agreement_target(few, 50).params == {"num_boost_round": 40, **one}
    assert agreement_target(few, None).params == {"num_boost_round": 40, **one}
    sk = TargetConfig(family="sklearn", estimator="sklearn.linear_model.LogisticRegression")
    assert agreement_target(sk, 50) is sk


def test_agreement_reports_its_seconds(tmp_path):
    cfg, frame, s = _table(tmp_path, load_breast_cancer)
    ag = agreement(frame, s, cfg)
    assert ag["seconds"] > 0
