"""Task inference (``leanset.table.task``): classes or regression, from the label and the config's metric."""

import numpy as np
import pyarrow as pa
import pytest
from sklearn.datasets import load_diabetes, load_wine

from leanset.config import Config
from leanset.errors import ConfigError
from leanset.load.checks import MAX_AUTO_CLASSES, task


def _config(**sections):
    return Config.model_validate({"input": {"path": "t.parquet", "label": "y", **sections.pop("input", {})}, **sections})


def _table(values):
    return pa.table({"y": values})


def test_diabetes_target_with_rmse_is_regression():
    # scikit-learn's diabetes target: whole numbers stored as floats (25.0 … 346.0), 214 distinct values
    y = load_diabetes().target
    assert y.dtype == np.float64 and np.all(y == np.round(y)) and len(np.unique(y)) == 214
    assert task(_table(y), _config(verify={"metric": "rmse"})) == "regression"
    assert task(_table(y), _config(verify={"metric": "mae"})) == "regression"
    # the config's task wins over inference
    assert task(_table(y), _config(input={"task": "regression"})) == "regression"


def test_diabetes_target_without_a_metric_is_refused_offering_both_fixes():
    y = load_diabetes().target
    with pytest.raises(ConfigError) as err:
        task(_table(y), _config())
    message = str(err.value)
    assert "214 distinct whole numbers" in message and "'y'" in message
    assert "input.task: regression" in message and "input.task: classification" in message
    assert task(_table(y), _config(input={"task": "classification"})) == "classification"


def test_three_class_integer_label_is_classes():
    # scikit-learn's wine target: classes 0, 1, 2 as integers, and as whole-number floats
    y = load_wine().target
    assert sorted(np.unique(y)) == [0, 1, 2]
    assert task(_table(y), _config()) == "classification"
    assert task(_table(y.astype(np.float64)), _config()) == "classification"
    assert task(_table(y.astype(str)), _config()) == "classification"


def test_limit_and_continuous_values():
    at_limit = np.arange(MAX_AUTO_CLASSES).repeat(2)
    assert task(_table(at_limit), _config()) == "classification"
    with pytest.raises(ConfigError, match=f"{MAX_AUTO_CLASSES + 1} distinct whole numbers"):
        task(_table(np.arange(MAX_AUTO_CLASSES + 1)), _config())
    assert task(_table(np.linspace(0, 1, 30)), _config()) == "regression"
    assert task(_table(np.array([True, False] * 5)), _config()) == "classification"
