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
