"""Frontier sweep and fraction search, on scikit-learn's bundled data and through the command line."""

import json

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from sklearn.datasets import load_breast_cancer
from typer.testing import CliRunner

from leanset.cli import app
from leanset.config import load_config
from leanset.verify.frontier import FractionEvaluator, frontier_files, search_fraction, sweep
from leanset.scores.dynamics import score
from leanset.load.table import load_table
from leanset.verify.stats import metric_value

COLUMNS = ["fraction", "strategy", "metric", "ci_lo", "ci_hi", "train_seconds", "status"]


@pytest.fixture(scope="module")
def cancer(tmp_path_factory):
    """scikit-learn's bundled breast-cancer data as a parquet table and a small, fast config."""
    folder = tmp_path_factory.mktemp("cancer")
    X, y = load_breast_cancer(return_X_y=True)
    df = pd.DataFrame(X[:, :10], columns=[f"f{j}" for j in range(10)])
    df["label"] = np.where(y == 1, "benign", "malignant")
    df.to_parquet(folder / "cancer.parquet")
    cfg = {
        "input": {"path": str(folder / "cancer.parquet"), "label": "label"},
        "proxy": {"folds": 3, "rounds": 20, "params": {"num_threads": 1}},
        "selection": {"fraction": 0.3, "class_floor": 5, "grid": [0.1, 0.3, 0.6]},
        "target": {"params": {"num_boost_round": 40, "num_threads": 1}},
        "verify": {"bootstrap": 200, "tolerance": 0.03, "random_repeats": 2},
        "store": str(folder / "store"), "seed": 4,
    }
    (folder / "config.yaml").write_text(yaml.safe_dump(cfg))
    return folder / "config.yaml"


def test_sweep_table_and_files(cancer):
    config = load_config(cancer)
    frame = load_table(config)
    ev = FractionEvaluator(frame, score(frame, config), config)
    table = sweep(ev, fractions=[0.1, 0.3], strategies=["stratified", "random"])
    assert set(COLUMNS) <= set(table.columns)
    assert len(table) == 5 and table.iloc[-1]["strategy"] == "full"
    assert (table["ci_lo"] <= table["metric"] + 1e-12).all() and (table["metric"] <= table["ci_hi"] + 1e-12).all()
    full = table.iloc[-1]["metric"]
    # The full row's metric is the accuracy of the full model (sklearn.metrics via metric_value).
    assert full == pytest.approx(metric_value("accuracy", ev.y_hold, ev.proba_full_))
    # Δ = metric(full) − metric(kept) for a higher-is-better metric (the verification rule in docs/verification.md).
    # A selection row has one fit; a random row's metric is the mean of its repeats while its Δ is the first repeat's.
    one_fit = table["strategy"] == "stratified"
    assert one_fit.sum() == 2
    assert np.allclose(table.loc[one_fit, "delta"], full - table.loc[one_fit, "metric"], atol=1e-9)
    files = frontier_files(table, "accuracy")
    assert files["frontier.png"][:8] == b"\x89PNG\r\n\x1a\n"


class _Scripted:
    """Stands in for FractionEvaluator: a fraction passes when it is at least ``threshold``."""

    def __init__(self, threshold):
        self.threshold, self.seen = threshold, []

    def point(self, fraction, strategy):
        self.seen.append(fraction)
        return {"fraction": fraction, "strategy": strategy, "status": "pass" if fraction >= self.threshold else "fail"}


def test_search_scans_grid_then_bisects():
    # Grid, then bisection between the last miss and the first pass (common practice, no source).
    ev = _Scripted(0.37)
    fraction, tried = search_fraction(ev, "stratified", grid=[0.1, 0.2, 0.3, 0.5, 0.7], steps=4)
    assert ev.seen == [0.1, 0.2, 0.3, 0.5, 0.4, 0.35, 0.375, 0.3625]
    assert fraction == 0.375 and len(tried) == 8


def test_search_without_a_pass_keeps_everything():
    fraction, tried = search_fraction(_Scripted(2.0), "stratified", grid=[0.2, 0.1])
    assert fraction == 1.0 and [t["fraction"] for t in tried] == [0.1, 0.2]


def test_frontier_and_auto_through_the_cli(prefect_api, cancer, tmp_path):
    runner = CliRunner()
    store = tmp_path / "store"
    result = runner.invoke(app, ["frontier", str(cancer), "--fractions", "0.1,0.3", "--store", str(store)])
    assert result.exit_code == 0, result.output
    assert "frontier" in result.output and "stratified" in result.output
    (run_dir,) = list((store / "runs").iterdir())
    table = pq.read_table(run_dir / "frontier.parquet").to_pandas()
    assert set(COLUMNS) <= set(table.columns)
    assert sorted(set(table["strategy"])) == ["easiest", "full", "hardest", "random", "stratified"]
    assert (run_dir / "frontier.png").stat().st_size > 1000

    result = runner.invoke(app, ["run", str(cancer), "--fraction", "auto", "--store", str(tmp_path / "auto")])
    assert result.exit_code == 0, result.output
    (run_dir,) = list((tmp_path / "auto" / "runs").iterdir())
    run = json.loads((run_dir / "run.json").read_text())
    tried = run["search"]["tried"]
    assert [t["fraction"] for t in tried][:1] == [0.1]
    assert run["config"]["selection"]["fraction"] == run["search"]["fraction"]
    passing = [t["fraction"] for t in tried if t["status"] == "pass"]
    assert run["search"]["fraction"] == (min(passing) if passing else 1.0)


def test_search_goes_below_the_smallest_grid_point_and_names_blocking_guards():
    # The smallest grid point passes: bisection between 0 and it (common practice, no source).
    ev = _Scripted(0.02)
    fraction, tried = search_fraction(ev, "importance", grid=[0.1, 0.2], steps=3)
    assert ev.seen == [0.1, 0.05, 0.025, 0.0125] and fraction == 0.025


def test_auto_never_reads_the_holdout(cancer, monkeypatch):
    # scikit-learn's bundled breast_cancer. The holdout's features are poisoned (NaN) and every
    # feature read is recorded: the choice must not change and no holdout row may be read.
    from dataclasses import replace

    from leanset.load.table import RowFrame
    from leanset.verify.frontier import choose_fraction

    config = load_config(cancer)
    frame = load_table(config)
    scores = score(frame, config)
    fraction, tried = choose_fraction(frame, scores, config)
    X = frame.X.copy()
    X[frame.holdout] = np.nan
    poisoned = replace(frame, X=X)
    read = []
    original = RowFrame.features
    monkeypatch.setattr(RowFrame, "features", lambda self, rows: read.append(np.asarray(rows)) or original(self, rows))
    fraction2, tried2 = choose_fraction(poisoned, scores, config)
    assert read and not frame.holdout[np.concatenate(read)].any()
    assert fraction2 == fraction
    assert [(t["fraction"], t["status"], t["metric"]) for t in tried2] == [(t["fraction"], t["status"], t["metric"]) for t in tried]
    assert all("validation slice" in t["judge"] and "blocked_by" in t for t in tried)
