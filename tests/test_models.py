"""The guarded read of LightGBM's training predictions, held against LightGBM's own public predict."""

import lightgbm as lgb
import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer, load_wine

from leanset.errors import LeansetError
from leanset.models._lightgbm import training_scores

PARAMS = {"verbose": -1, "num_threads": 1, "deterministic": True, "force_col_wise": True, "seed": 0}


@pytest.mark.parametrize("loader, objective", [(load_breast_cancer, {"objective": "binary"}),
                                               (load_wine, {"objective": "multiclass", "num_class": 3})],
                         ids=["binary", "multiclass"])
def test_training_scores_are_what_lightgbm_predicts_for_the_training_rows(loader, objective):
    # scikit-learn's bundled datasets; the reference is LightGBM's public Booster.predict on the same
    # training rows with the same number of rounds (probabilities, (n,) binary and (n, k) multiclass).
    X, y = loader(return_X_y=True)
    seen = []

    def record(env):
        if env.iteration + 1 == 7:
            seen.append(training_scores(env.model).copy())  # the array is LightGBM's reused buffer

    booster = lgb.train({**PARAMS, **objective}, lgb.Dataset(X, label=y), num_boost_round=10, callbacks=[record])
    expected = booster.predict(X, num_iteration=7)
    assert seen[0].shape == expected.shape and seen[0].dtype == np.float64
    np.testing.assert_allclose(seen[0], expected, rtol=0, atol=1e-9)


def test_a_lightgbm_without_the_private_method_is_refused_with_its_version():
    with pytest.raises(LeansetError, match=rf"lightgbm {lgb.__version__}: .*__inner_predict.*pip install"):
        training_scores(object())


def test_many_classes_get_fewer_rounds_at_a_raised_rate(tmp_path, monkeypatch):
    # proxy.max_trees: rounds x classes capped, rate raised by the same factor up to 0.25 (a leanset
    # choice, measured in docs/economics.md); the tree count is LightGBM's own (Booster.num_trees)
    import pandas as pd

    from leanset.config import Config, ProxyConfig
    from leanset.load.table import load_table
    from leanset.models.proxy import class_rounds
    from leanset.scores.dynamics import score

    many = class_rounds(ProxyConfig(), 26)
    assert (many.rounds, many.params["learning_rate"]) == (30, pytest.approx(0.2))
    assert class_rounds(ProxyConfig(), 13) == ProxyConfig() and class_rounds(ProxyConfig(), 2) == ProxyConfig()
    assert class_rounds(ProxyConfig(max_trees=None), 26) == ProxyConfig(max_trees=None)
    assert class_rounds(ProxyConfig(family="linear"), 26).rounds == 60
    capped = class_rounds(ProxyConfig(params={"eta": 0.2}), 40)  # 20 rounds, 0.2 x 3 capped at 0.25
    assert (capped.rounds, capped.params) == (20, {"learning_rate": 0.25})
    floor = class_rounds(ProxyConfig(max_trees=50), 26)  # never below two checkpoints
    assert floor.rounds == 10 and floor.params["learning_rate"] == 0.25
    # the score stage asks LightGBM for the cut proxy: 30 rounds at 0.2 per fold model, 6 checkpoints
    asked, train = [], lgb.train
    monkeypatch.setattr(lgb, "train", lambda params, data, num_boost_round, **kw: (
        asked.append((num_boost_round, params["learning_rate"], params["num_class"])), train(params, data, num_boost_round, **kw))[1])
    rng = np.random.default_rng(0)
    y = np.repeat(np.arange(26), 30)
    d = pd.DataFrame(rng.normal(size=(len(y), 4)).astype(np.float32) + y[:, None] * 0.3, columns=list("abcd"))
    d["label"] = y
    d.to_parquet(tmp_path / "t.parquet", index=False)
    cfg = Config.model_validate({"input": {"path": str(tmp_path / "t.parquet"), "label": "label"},
                                 "proxy": {"params": {"num_threads": 1, "min_data_in_leaf": 5}, "agreement_rows": 0,
                                           "threshold_samples": False}})
    s = score(load_table(cfg), cfg)
    assert s.checkpoints == 6 and s.info["class_rounds"] == {"rounds": 30, "learning_rate": pytest.approx(0.2)}
    assert asked == [(30, pytest.approx(0.2), 26)] * 2
