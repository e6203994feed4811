"""Regression tables end to end: task inference, residual dynamics, out-of-fold loss, metrics, a run.

Outside sources:
- data: scikit-learn's bundled diabetes data (``load_diabetes``, unscaled target).
- per-row and mean squared error, ``rmse``, ``mae``, ``r2``: ``sklearn.metrics``.
- the residual analogues of the scores, as docs/scoring.md defines them (residual r_t = ŷ_t − y;
  correct_t = |r_t| ≤ τ; loss r²; margin analogue −|r|), with forgetting after Toneva et al.,
  ICLR 2019, and AUM after Pleiss et al., NeurIPS 2020.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from sklearn import metrics
from sklearn.datasets import load_diabetes

import leanset.scores.dynamics as scores_mod
from leanset.flows import prune_flow
from leanset.config import Config
from leanset.errors import ConfigError, InputError
from leanset.scores.dynamics import residual_band, score
from leanset.load.table import load_table
from leanset.verify.stats import ORIENTATION, metric_value

ONE_THREAD = {"num_threads": 1}
PROXIES = {
    "gbdt": {"family": "gbdt", "folds": 3, "rounds": 20, "checkpoint_every": 5, "el2n_at": 0.5, "params": ONE_THREAD},
    "linear": {"family": "linear", "folds": 3, "epochs": 4, "el2n_at": 0.5},
}


def _diabetes(tmp_path, **sections):
    X, y = load_diabetes(return_X_y=True, scaled=False)
    d = pd.DataFrame(X.astype(np.float32), columns=[f"f{i}" for i in range(X.shape[1])])
    d.insert(0, "rid", [f"p{i}" for i in range(len(y))])
    d["progression"] = y
    path = tmp_path / "diabetes.parquet"
    d.to_parquet(path, index=False)
    raw = {"input": {"path": str(path), "label": "progression", "id": "rid", "task": "regression"}, "seed": 1, **sections}
    cfg = Config.model_validate(raw)
    return cfg, load_table(cfg)


def test_task_is_inferred_from_the_label(tmp_path):
    rng = np.random.default_rng(0)
    d = pd.DataFrame({"x": rng.normal(size=60), "y": rng.normal(size=60)})
    d.to_parquet(tmp_path / "t.parquet")
    frame = load_table(Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "y"}}))
    assert frame.task == "regression" and frame.classes == [] and frame.y.dtype == np.float64
    # bins stand in for classes: the holdout takes about its share of every label-quantile bin
    assert 0.15 < frame.holdout.mean() < 0.25 and len(np.unique(frame.bins)) == 10
    d["y"] = (d["y"] > 0).astype(float)  # whole numbers in a float column stay classes
    d.to_parquet(tmp_path / "t.parquet")
    frame = load_table(Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "y"}}))
    assert frame.task == "classification" and frame.classes == [0.0, 1.0]


def test_bad_regression_input_is_refused(tmp_path):
    d = pd.DataFrame({"x": np.arange(60.0), "y": ["a", "b", "c"] * 20})
    d.to_parquet(tmp_path / "t.parquet")
    with pytest.raises(InputError, match="numeric label"):
        load_table(Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "y", "task": "regression"}}))
    d["y"] = np.linspace(0, 1, 60)
    d.to_parquet(tmp_path / "t.parquet")
    with pytest.raises(ConfigError, match="verify.metric: accuracy"):
        load_table(Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "y"},
                                          "verify": {"metric": "accuracy"}}))
    d["c"] = np.arange(60) % 2
    d.to_parquet(tmp_path / "t.parquet")
    # with input.task auto a regression metric means regression; classes stated outright refuse it
    with pytest.raises(ConfigError, match="verify.metric: rmse is a regression metric"):
        load_table(Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "c", "task": "classification"},
                                          "verify": {"metric": "rmse"}}))
    with pytest.raises(ConfigError, match="selection.score: confidence"):
        load_table(Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "y"},
                                          "selection": {"score": "confidence"}}))


@pytest.mark.parametrize("family", PROXIES)
def test_oof_loss_is_sklearn_squared_error_per_row(tmp_path, family):
    cfg, frame = _diabetes(tmp_path, proxy=PROXIES[family])
    s = score(frame, cfg)
    train = frame.train
    X, y, fold = frame.X[train], frame.y[train], frame.fold[train]
    oof = np.full(len(y), np.nan)
    for k, model in enumerate(s.proxies):
        oof[fold == k] = model.predict(X[fold == k])
    assert not np.isnan(oof).any()
    loss = s.table["oof_loss"].to_numpy()
    # sklearn.metrics.mean_squared_error, row by row and over all rows
    per_row = np.array([metrics.mean_squared_error([a], [b]) for a, b in zip(y, oof)])
    np.testing.assert_allclose(loss, per_row, rtol=1e-12, atol=1e-9)
    assert loss.mean() == pytest.approx(metrics.mean_squared_error(y, oof), rel=1e-12)
    np.testing.assert_allclose(s.table["oof_margin"].to_numpy(), -np.abs(oof - y), atol=1e-9)
    assert s.table["oof_entropy"].isna().all()  # no label-free analogue for a regression target
    # the proxy learned something: its out-of-fold R² beats the constant model's 0 (sklearn.metrics.r2_score)
    assert metrics.r2_score(y, oof) > 0.2
    assert s.table["suspect_label"].isna().all()  # no threshold samples without classes
    assert s.table[["confidence", "aleatoric"]].isna().all().all()


@pytest.mark.parametrize("family", PROXIES)
def test_residual_streaming_statistics_equal_direct_computation(tmp_path, monkeypatch, family):
    cfg, frame = _diabetes(tmp_path, proxy=PROXIES[family])
    seen_by_model: list[list[np.ndarray]] = []
    real_fit = scores_mod.fit_proxy

    def spy(X, y, n_classes, categorical, config, seed, on_checkpoint):
        seen: list[np.ndarray] = []
        seen_by_model.append(seen)
        return real_fit(X, y, n_classes, categorical, config, seed,
                        lambda t, z: (seen.append(np.array(z, dtype=np.float64, copy=True)), on_checkpoint(t, z)))

    monkeypatch.setattr(scores_mod, "fit_proxy", spy)
    s = score(frame, cfg)
    y, fold = frame.y[frame.train], frame.fold[frame.train]
    K, T, n = cfg.proxy.folds, 4, len(y)
    assert len(seen_by_model) == K and all(len(v) == T for v in seen_by_model)
    P = np.full((n, K, T), np.nan)  # the rows x models x checkpoints array the stage never builds
    for k, seen in enumerate(seen_by_model):
        P[fold != k, k] = np.stack(seen, axis=1)
    P = P[fold[:, None] != np.arange(K)[None, :]].reshape(n, K - 1, T)
    R = np.abs(P - y[:, None, None])
    band = residual_band(y, cfg.proxy)
    # the band is the 0.25 quantile of the constant (median) model's absolute residuals
    assert band == pytest.approx(np.quantile(np.abs(y - np.median(y)), 0.25))
    correct = R <= band
    learned = correct.any(axis=(1, 2))
    direct = {
        "forgetting": (correct[:, :, :-1] & ~correct[:, :, 1:]).sum(axis=(1, 2)).astype(float),
        "aum": (-R).mean(axis=(1, 2)),
        "el2n": R[:, :, 1].mean(axis=1),  # early checkpoint round(0.5 * 4) = 2
        "variability": P.reshape(n, -1).std(axis=1),
        "correctness": correct.mean(axis=(1, 2)),
    }
    np.testing.assert_array_equal(s.table["never_learned"].to_numpy(), ~learned)
    for name, want in direct.items():
        got = s.table[name].to_numpy(np.float64)
        if name == "forgetting":
            got, want = got[learned], want[learned]
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-9, err_msg=name)
    assert s.table[list(direct)].std().gt(0).all()


def test_regression_metrics_equal_sklearn_and_delta_is_oriented():
    rng = np.random.default_rng(3)
    y = rng.normal(100, 20, 200)
    good, bad = y + rng.normal(0, 5, 200), y + rng.normal(0, 15, 200)
    ref = {"rmse": np.sqrt(metrics.mean_squared_error(y, good)), "mae": metrics.mean_absolute_error(y, good),
           "r2": metrics.r2_score(y, good)}
    for name, want in ref.items():
        assert metric_value(name, y, good) == pytest.approx(want, rel=1e-12)
        # Δ = oriented(metric(full) − metric(kept)) is positive when the kept-row model is worse
        assert ORIENTATION[name] * (metric_value(name, y, good) - metric_value(name, y, bad)) > 0


def test_regression_run_completes_with_a_verdict(tmp_path, prefect_api):
    _, frame = _diabetes(tmp_path)
    config = {
        "input": {"path": str(tmp_path / "diabetes.parquet"), "label": "progression", "id": "rid"},
        "proxy": {"folds": 3, "rounds": 20, "checkpoint_every": 5, "params": ONE_THREAD},
        "selection": {"fraction": 0.5, "class_floor": 5, "drop_suspect_labels": True},
        "target": {"params": {"num_boost_round": 50, "num_threads": 1}},
        "verify": {"bootstrap": 200, "tolerance": 5.0, "random_repeats": 1},
        "store": str(tmp_path / "store"), "seed": 2,
    }
    # the label holds 214 distinct whole numbers, so auto inference would refuse it: the config says regression
    config["input"]["task"] = "regression"
    path = tmp_path / "regression.yaml"
    path.write_text(yaml.safe_dump(config))
    # a fail verdict ends the flow run Failed; its state still holds the run directory
    run_dir = Path(prune_flow(str(path), return_state=True).result(raise_on_failure=False))
    run = json.loads((run_dir / "run.json").read_text())
    v = run["verdict"]
    assert v["status"] in {"pass", "fail", "inconclusive"} and v["metric"] == "rmse"
    assert v["per_class_recall"] == {} and v["mcnemar"] is None
    assert run["agreement"]["rows"] == len(frame.train) and -1 <= run["agreement"]["spearman"] <= 1
    assert run["scores"]["repeats"] == 1 and "label_errors" not in run["scores"]
    hold = frame.holdout
    assert v["full"] > 0 and v["ci"][0] <= v["delta"] <= v["ci"][1]
    manifest = pq.read_table(run_dir / "manifest.parquet").to_pandas()
    assert len(manifest) == len(frame.row_id) and (manifest["split"] == "holdout").sum() == hold.sum()
    train = manifest[manifest["split"] == "train"]
    assert train["suspect_label"].isna().all()
    assert abs((train["decision"] == "keep").sum() - round(0.5 * len(train))) <= 10
    # kept rows cover every label-quantile bin (the bins stand in for classes in the quotas)
    kept_labels = train.loc[train["decision"] == "keep", "label"].astype(float)
    assert kept_labels.min() < np.quantile(frame.y[frame.train], 0.1) and kept_labels.max() > np.quantile(frame.y[frame.train], 0.9)
