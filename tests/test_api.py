"""The Python API: RowPruner on data frames of any kind, scikit-learn's estimator checks, leanset.prune."""

import json

import numpy as np
import pandas as pd
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.utils.estimator_checks import parametrize_with_checks

import leanset
from leanset import RowPruner
from leanset.api import PrunerInputError
from store_helpers import config as write_config, published, runner
from leanset.cli import app

FAST = {"rounds": 20, "folds": 3}


@pytest.fixture(scope="module")
def cancer():
    # scikit-learn's bundled breast-cancer data (569 rows, 30 numeric features, 2 classes)
    return load_breast_cancer(return_X_y=True, as_frame=True)


def test_same_mask_from_pandas_polars_numpy_and_arrow(cancer):
    """One table in four containers gives one decision per row: ids, folds and features are the same."""
    X, y = cancer
    fits = {
        "pandas": RowPruner(fraction=0.3, proxy=FAST).fit(X, y),
        "polars": RowPruner(fraction=0.3, proxy=FAST).fit(pl.from_pandas(X), pl.Series("y", y.to_numpy())),
        "numpy": RowPruner(fraction=0.3, proxy=FAST).fit(X.to_numpy(), y.to_numpy()),
        "arrow": RowPruner(fraction=0.3, proxy=FAST).fit(pa.Table.from_pandas(X), pa.array(y.to_numpy())),
    }
    ref = fits["pandas"]
    assert ref.keep_.dtype == bool and len(ref.keep_) == len(X)
    # every row is a training row (no holdout): the budget is round(0.3 * 569) rows
    assert ref.keep_.sum() == round(0.3 * len(X))
    for name, fit in fits.items():
        np.testing.assert_array_equal(fit.keep_, ref.keep_, err_msg=name)
        np.testing.assert_array_equal(fit.reason_, ref.reason_, err_msg=name)
        pd.testing.assert_frame_equal(fit.scores_, ref.scores_)
    assert set(ref.scores_.columns) >= set(leanset.config.SCORE_NAMES)
    # the default rule: stratified, with suspected label errors kept at their share (drop_suspect_labels: auto)
    assert "keep:stratum" in set(ref.reason_[ref.keep_]) <= {"keep:stratum", "keep:suspect_share"}
    assert (ref.sample_weight_[~ref.keep_] == 0).all() and (ref.sample_weight_[ref.keep_] > 0).all()
    assert list(ref.feature_names_in_) == list(X.columns) and ref.n_features_in_ == 30
    assert not hasattr(fits["numpy"], "feature_names_in_")


def test_fit_resample_returns_the_kept_rows_in_the_callers_type(cancer):
    X, y = cancer
    pruner = RowPruner(fraction=0.2, proxy=FAST, seed=4)
    X_kept, y_kept = pruner.fit_resample(X, y)
    pd.testing.assert_frame_equal(X_kept, X[pruner.keep_])
    pd.testing.assert_series_equal(y_kept, y[pruner.keep_])
    Xp, yp = pruner.fit_resample(pl.from_pandas(X), y.to_numpy())
    assert isinstance(Xp, pl.DataFrame)
    np.testing.assert_array_equal(Xp.to_numpy(), X.to_numpy()[pruner.keep_])
    np.testing.assert_array_equal(yp, y.to_numpy()[pruner.keep_])


def test_sample_weight_and_groups(cancer):
    X, y = cancer
    w = np.linspace(0.5, 1.5, len(X))
    plain = RowPruner(fraction=0.3, proxy=FAST).fit(X, y)
    weighted = RowPruner(fraction=0.3, proxy=FAST).fit(X, y, sample_weight=w)
    np.testing.assert_array_equal(weighted.keep_, plain.keep_)
    np.testing.assert_allclose(weighted.sample_weight_, plain.sample_weight_ * w)
    # a small group keeps at least selection.segment_floor rows (here all 12 of them)
    groups = np.where(np.arange(len(X)) % 47 == 0, "rare", "common")
    fit = RowPruner(fraction=0.1, proxy=FAST, selection={"segment_floor": 12}).fit(X, y, groups=groups)
    assert (groups == "rare").sum() == 13 and fit.keep_[groups == "rare"].sum() >= 12


def test_bad_parameters_are_value_errors_raised_in_fit(cancer):
    X, y = cancer
    pruner = RowPruner(fraction=1.5)  # accepted by __init__, refused by fit
    with pytest.raises(ValueError, match="selection.fraction"):
        pruner.fit(X, y)
    with pytest.raises(PrunerInputError, match="strategy"):
        RowPruner(strategy="softest").fit(X, y)
    with pytest.raises(ValueError, match="rows but y has"):
        RowPruner().fit(X, y[:10])


# scikit-learn's own estimator checks. These do not apply, and are expected to fail:
# the cross-fitted proxy needs at least proxy.folds + 1 rows of every class, and these checks fit
# on tables of 10-30 rows whose classes hold 2 rows each (RowPruner raises a ValueError naming the
# class and the fix); with neither predict nor transform there is nothing else for them to check.
_TOO_FEW_ROWS = "classes of 2 rows: cross-fitting needs proxy.folds + 1 rows per class"
EXPECTED_FAILED = {name: _TOO_FEW_ROWS for name in (
    "check_dont_overwrite_parameters", "check_f_contiguous_array_estimator", "check_methods_sample_order_invariance",
    "check_methods_subset_invariance", "check_fit2d_1feature", "check_dict_unchanged", "check_fit2d_predict1d")}


@parametrize_with_checks([RowPruner(proxy={"rounds": 10, "folds": 2}, selection={"class_floor": 0})],
                         expected_failed_checks=lambda est: EXPECTED_FAILED)
def test_sklearn_estimator_checks(estimator, check):
    check(estimator)


def _table(tmp_path, n=600, seed=0):
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    label = np.where(x[:, 0] + 0.3 * rng.normal(size=n) > 0.3, "b", "a")
    label[: n // 6] = "c"
    df = pd.DataFrame({"x0": x[:, 0], "x1": x[:, 1], "color": rng.choice(["red", "blue"], n), "label": label})
    path = tmp_path / "t.parquet"
    df.to_parquet(path)
    return df, path


def test_prune_in_memory_writes_the_manifest_of_leanset_run(prefect_api, tmp_path):
    """The same rows in memory and as parquet: same ids, splits, scores and decisions."""
    df, path = _table(tmp_path)
    cfg = write_config(tmp_path, path, proxy__agreement_rows=0)
    assert runner.invoke(app, ["run", str(cfg)]).exit_code == 0
    (cli_run,) = published(tmp_path / "store")
    result = leanset.prune(df, config=cfg, store=tmp_path / "api-store")
    assert result.run_dir.parent == tmp_path / "api-store" / "runs"
    cli_manifest = pq.read_table(cli_run / "manifest.parquet").to_pandas()
    pd.testing.assert_frame_equal(result.manifest, cli_manifest)
    cli_json = json.loads((cli_run / "run.json").read_text())
    assert result.run["input"]["fingerprint"] == cli_json["input"]["fingerprint"]
    for key in ("status", "metric", "delta", "ci", "full", "kept", "random"):
        assert result.verdict[key] == cli_json["verdict"][key], key
    assert result.status in {"pass", "fail", "inconclusive"}
    kept = result.kept
    assert len(kept) == (cli_manifest["decision"] == "keep").sum() == result.run["counts"]["kept"]
    assert list(kept.columns) == [*df.columns, "row_id", "weight", "dup_count"]
    assert df.equals(pd.read_parquet(path))  # the caller's frame is not modified


def test_prune_from_a_path_with_label_and_overrides_only(tmp_path):
    df, path = _table(tmp_path, n=400)
    result = leanset.prune(path, label="label", fraction=0.25, selection__class_floor=5, proxy__rounds=10, proxy__folds=3, proxy__agreement_rows=0,
                           target__params={"num_boost_round": 20}, verify__bootstrap=100, verify__random_repeats=1,
                           store=tmp_path / "s")
    c = result.run["counts"]
    assert c["kept"] == round(0.25 * c["train"]) and result.run["input"]["path"] == str(path)
    assert c["kept"] + c["dropped"] + c["holdout"] == len(df)
    with pytest.raises(leanset.ConfigError, match="selection.fractoin|fractoin"):
        leanset.prune(df, label="label", selection__fractoin=0.2, store=tmp_path / "s")
    with pytest.raises(leanset.InputError, match="'nope'"):
        leanset.prune(df, label="nope", store=tmp_path / "s2")
    assert not (tmp_path / "s2").exists()
