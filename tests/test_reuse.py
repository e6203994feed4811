"""A run reuses the full-data target fit of an earlier run on the same training rows and target.

Outside sources: scikit-learn's bundled breast-cancer data; the verdict's figures are compared
between the two runs exactly, so they come from the same models.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer

import leanset.verify.verdict as stats_mod
from leanset.api import prune

ONE_THREAD = {"num_threads": 1}


def _settings(tmp_path, rounds=40):
    return dict(store=tmp_path / "store", seed=3, proxy__rounds=20, proxy__params=ONE_THREAD, proxy__agreement_rows=0,
                target__params={"num_boost_round": rounds, "num_threads": 1}, verify__bootstrap=200,
                verify__random_repeats=1)


@pytest.fixture
def table(tmp_path):
    X, y = load_breast_cancer(return_X_y=True)
    d = pd.DataFrame(X.astype(np.float32), columns=[f"f{i}" for i in range(X.shape[1])])
    d.insert(0, "rid", [f"r{i}" for i in range(len(y))])
    d["label"] = y
    path = tmp_path / "bc.parquet"
    d.to_parquet(path, index=False)
    return path


@pytest.fixture
def fit_sizes(monkeypatch):
    """Rows of every target fit the verify stage makes."""
    sizes = []
    real = stats_mod.fit_timed

    def spy(X, y, *args, **kwargs):
        sizes.append(len(y))
        return real(X, y, *args, **kwargs)
    monkeypatch.setattr(stats_mod, "fit_timed", spy)
    return sizes


def test_second_identical_run_does_not_refit_all_rows_and_gives_the_same_verdict(tmp_path, table, fit_sizes):
    first = prune(table, label="label", id="rid", **_settings(tmp_path))
    n_train = first.run["counts"]["train"]
    assert n_train in fit_sizes and not first.run["verification"]["full_fit"]["reused"]
    fit_sizes.clear()
    second = prune(table, label="label", id="rid", **_settings(tmp_path))
    assert n_train not in fit_sizes and fit_sizes  # kept and random rows are still trained on
    reuse = second.run["verification"]["full_fit"]
    assert reuse["reused"] and (tmp_path / "store" / "cache" / "target" / reuse["key"] / "model.txt").is_file()
    a, b = first.verdict, second.verdict
    assert (b["status"], b["full"], b["kept"], b["delta"], b["ci"]) == (a["status"], a["full"], a["kept"], a["delta"], a["ci"])
    # the ledger counts the full-data fit as it was measured when it was made
    assert b["train_seconds"]["full"] == pytest.approx(a["train_seconds"]["full"], abs=1e-9)


def test_another_target_or_reuse_off_trains_all_rows_again(tmp_path, table, fit_sizes):
    first = prune(table, label="label", id="rid", **_settings(tmp_path))
    n_train = first.run["counts"]["train"]
    fit_sizes.clear()
    other = prune(table, label="label", id="rid", **_settings(tmp_path, rounds=41))
    assert n_train in fit_sizes and not other.run["verification"]["full_fit"]["reused"]
    fit_sizes.clear()
    off = prune(table, label="label", id="rid", verify__reuse_full_fit=False, **_settings(tmp_path))
    assert n_train in fit_sizes and not off.run["verification"]["full_fit"]["reused"]


def test_changed_training_rows_miss(tmp_path, table, fit_sizes):
    prune(table, label="label", id="rid", **_settings(tmp_path))
    d = pd.read_parquet(table)
    d["f0"] += 1.0  # every row's values change, their ids do not
    d.to_parquet(table, index=False)
    fit_sizes.clear()
    again = prune(table, label="label", id="rid", **_settings(tmp_path))
    assert again.run["counts"]["train"] in fit_sizes and not again.run["verification"]["full_fit"]["reused"]
