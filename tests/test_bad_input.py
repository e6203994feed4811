"""The bad-input battery: every case is refused before any fit, in one line naming the culprit.

Each case writes a table and a config into its own folder, runs ``leanset run`` in-process and
asserts: exit code 2, one line ``leanset: error: …`` holding the culprit's name, no run directory,
and every file of the folder (table and config) byte for byte as before, with no file added.
``benchmarks/refusals.py`` runs the same cases through the ``leanset`` command and prints the
seconds to each refusal.
"""

from __future__ import annotations

import fcntl
import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml

sys.path.insert(0, str(Path(__file__).parent))
from store_helpers import CLI, config, part, runner  # noqa: E402

from leanset.cli import app, main  # noqa: E402


def _table(d: Path, **columns) -> Path:
    """600 invented rows (rid, x0, x1, x2, color, label) with ``columns`` set or added; returns the file."""
    path = part(d, "t.parquet", 0, 600, seed=1)
    if columns:
        df = pd.read_parquet(path)
        for name, values in columns.items():
            df[name] = values
        df.to_parquet(path)
    return path


def _cfg(d: Path, table: Path | None = None, **extra) -> list:
    return ["run", config(d, table or _table(d), **extra)]


def _write(path: Path, text: str) -> Path:
    path.write_text(text)
    return path


def _inf(d, value):
    x = np.random.default_rng(0).normal(size=600)
    x[[7, 40, 41]] = value
    return _table(d, x1=x)


def _regression(d, n=600, **extra):
    df = pd.read_parquet(_table(d))
    df = df.iloc[:n].assign(label=np.linspace(0.5, 9.7, n) + df["x0"].to_numpy()[:n], **extra)
    df.to_parquet(d / "t.parquet")
    return d / "t.parquet"


def _sklearn(estimator, **params):
    return {"target__family": "sklearn", "target__estimator": estimator, "target__params": params}


def _locked(d):
    (d / "store").mkdir()
    holder = open(d / "store" / ".lock", "a+")  # another process's lock: flock is per open file
    fcntl.flock(holder, fcntl.LOCK_EX | fcntl.LOCK_NB)
    _locked.holders.append(holder)
    return _cfg(d)


_locked.holders = []

# (id, builder of the command's arguments, words the message must hold)
CASES = [
    # --- config ----------------------------------------------------------------------------
    ("config-missing", lambda d: ["run", d / "nope.yaml"], ("nope.yaml", "not found")),
    ("config-not-yaml", lambda d: ["run", _write(d / "c.yaml", "input: [unclosed\n")], ("c.yaml", "not valid YAML")),
    ("config-top-level-list", lambda d: ["run", _write(d / "c.yaml", "- input\n- store\n")], ("c.yaml", "mapping")),
    ("config-unknown-top-key", lambda d: _cfg(d, sead=3), ("'sead'", "unknown key")),
    ("config-unknown-nested-key", lambda d: _cfg(d, selection__fractoin=0.3), ("selection.fractoin", "unknown key")),
    ("config-missing-label", lambda d: ["run", _write(d / "c.yaml", yaml.safe_dump({"input": {"path": str(_table(d))}}))],
     ("input.label", "missing key")),
    ("config-fraction-above-one", lambda d: [*_cfg(d), "--fraction", "1.5"], ("selection.fraction",)),
    ("config-strategy-unknown", lambda d: _cfg(d, selection__strategy="smartest"), ("selection.strategy",)),
    ("config-one-fold", lambda d: _cfg(d, proxy__folds=1), ("proxy.folds",)),
    ("config-holdout-all", lambda d: _cfg(d, holdout__fraction=1.0), ("holdout.fraction",)),
    ("config-metric-unknown", lambda d: _cfg(d, verify__metric="f2"), ("verify.metric",)),
    ("config-negative-seed", lambda d: _cfg(d, seed=-1), ("seed",)),
    ("config-checkpoint-after-last-round", lambda d: _cfg(d, proxy__checkpoint_every=30), ("proxy.checkpoint_every", "proxy.rounds")),
    ("config-threshold-rounds-below-checkpoint", lambda d: _cfg(d, proxy__threshold_rounds=2), ("proxy.threshold_rounds",)),
    ("config-engine-unknown", lambda d: _cfg(d, execution__engine="spark"), ("execution.engine",)),
    ("config-batch-rows-tiny", lambda d: _cfg(d, execution__batch_rows=10), ("execution.batch_rows",)),
    ("config-regression-metric-on-classes", lambda d: _cfg(d, verify__metric="rmse"), ("verify.metric", "rmse")),
    ("config-proxy-num-leaves", lambda d: _cfg(d, proxy__params={"num_leaves": -5}), ("proxy.params.num_leaves", "-5")),
    ("config-proxy-learning-rate-word", lambda d: _cfg(d, proxy__params={"learning_rate": "fast"}), ("proxy.params.learning_rate",)),
    ("config-proxy-unknown-param", lambda d: _cfg(d, proxy__params={"num_leafs": 7}), ("proxy.params.num_leafs", "unknown parameter")),
    ("config-confidence-on-regression", lambda d: _cfg(d, _regression(d), selection__score="confidence"), ("selection.score", "confidence")),
    ("config-feature-absent", lambda d: _cfg(d, input__features=["x0", "x9"]), ("'x9'", "input.features")),
    ("config-segment-absent", lambda d: _cfg(d, input__segments=["region"]), ("'region'", "input.segments")),
    ("config-dask-on-csv", lambda d: _cfg(d, _csv(d), execution__engine="dask"), ("CSV", "execution.engine")),
    # --- table -----------------------------------------------------------------------------
    ("table-missing", lambda d: _cfg(d, d / "nope.parquet"), ("nope.parquet", "not found")),
    ("table-corrupt", lambda d: _cfg(d, _write(d / "broken.parquet", "PAR1 not parquet")), ("broken.parquet", "cannot be read")),
    ("table-zero-rows", lambda d: _cfg(d, _empty(d)), ("empty.parquet", "no rows")),
    ("table-csv-header-only", lambda d: _cfg(d, _write(d / "h.csv", "x0,x1,label\n")), ("h.csv", "no rows")),
    ("table-empty-folder", lambda d: _cfg(d, _folder(d)), ("parts", "without parquet files")),
    ("table-label-absent", lambda d: _cfg(d, input__label="fault"), ("'fault'", "input.label")),
    ("table-single-class", lambda d: _cfg(d, _table(d, label=["a"] * 600)), ("'label'", "single class")),
    ("table-missing-labels", lambda d: _cfg(d, _nulls(d, "label")), ("'label'", "missing values")),
    ("table-duplicate-ids", lambda d: _cfg(d, _table(d, rid=[f"r{i}" for i in range(599)] + ["r0"]), input__id="rid"),
     ("'rid'", "'r0'")),
    ("table-missing-ids", lambda d: _cfg(d, _nulls(d, "rid"), input__id="rid"), ("'rid'", "missing values")),
    ("table-id-absent", lambda d: _cfg(d, input__id="inspection"), ("'inspection'", "input.id")),
    ("table-class-too-small", lambda d: _cfg(d, _table(d, label=["a"] * 300 + ["b"] * 298 + ["z"] * 2)), ("'z'", "proxy.folds")),
    ("table-timestamp-feature", lambda d: _cfg(d, _table(d, seen=pd.date_range("2026-01-01", periods=600, freq="h"))),
     ("'seen'", "input.exclude")),
    ("table-positive-infinity", lambda d: _cfg(d, _inf(d, np.inf)), ("'x1'", "3 infinite values", "row 7")),
    ("table-negative-infinity-csv", lambda d: _cfg(d, _csv(d, inf=True)), ("'x1'", "1 infinite values")),
    ("table-no-features", lambda d: _cfg(d, input__features=[]), ("no feature columns",)),
    ("table-reserved-column", lambda d: _cfg(d, _table(d, weight=1.0)), ("'weight'",)),
    ("table-regression-label-infinite", lambda d: _cfg(d, _label_inf(d), input__task="regression"), ("'label'", "infinite")),
    ("table-continuous-label-as-classes", lambda d: _cfg(d, _regression(d), input__task="classification"), ("'label'", "continuous")),
    ("table-regression-too-few-rows", lambda d: _cfg(d, _regression(d, n=30)), ("'label'", "at least 40")),
    # --- target ----------------------------------------------------------------------------
    ("target-class-missing", lambda d: _cfg(d, **_sklearn("sklearn.ensemble.NoSuchClassifier")), ("target.estimator", "NoSuchClassifier")),
    ("target-module-missing", lambda d: _cfg(d, **_sklearn("nosuchpackage.Model")), ("target.estimator", "nosuchpackage")),
    ("target-not-dotted", lambda d: _cfg(d, **_sklearn("RandomForestClassifier")), ("target.estimator", "module.Class")),
    ("target-sklearn-without-estimator", lambda d: _cfg(d, target__family="sklearn"), ("target.estimator", "required")),
    ("target-sklearn-unknown-param", lambda d: _cfg(d, **_sklearn("sklearn.ensemble.HistGradientBoostingClassifier", bogus=1)),
     ("target.params", "bogus")),
    ("target-sklearn-invalid-value", lambda d: _cfg(d, **_sklearn("sklearn.ensemble.HistGradientBoostingClassifier", max_iter=-1)),
     ("target.params", "max_iter")),
    ("target-sklearn-no-probabilities", lambda d: _cfg(d, **_sklearn("sklearn.svm.LinearSVC")), ("LinearSVC", "predict_proba")),
    ("target-not-an-estimator", lambda d: _cfg(d, **_sklearn("sklearn.metrics.accuracy_score")), ("accuracy_score", "not a scikit-learn estimator")),
    ("target-classifier-on-regression", lambda d: _cfg(d, _regression(d), **_sklearn("sklearn.tree.DecisionTreeClassifier")),
     ("DecisionTreeClassifier", "regressor")),
    ("target-lightgbm-num-leaves", lambda d: _cfg(d, target__params={"num_leaves": -5}), ("target.params.num_leaves", "-5")),
    ("target-lightgbm-word-for-number", lambda d: _cfg(d, target__params={"learning_rate": "fast"}), ("target.params.learning_rate",)),
    ("target-lightgbm-unknown-param", lambda d: _cfg(d, target__params={"num_leafs": 7}), ("target.params.num_leafs",)),
    ("target-lightgbm-zero-rounds", lambda d: _cfg(d, target__params={"num_boost_round": 0}), ("target.params.num_boost_round",)),
    ("target-lightgbm-rounds-word", lambda d: _cfg(d, target__params={"n_estimators": "many"}), ("target.params.n_estimators",)),
    # --- store -----------------------------------------------------------------------------
    ("store-under-a-file", lambda d: _cfg(d, store=_write(d / "notes.txt", "x") / "store"), ("notes.txt", "is a file")),
    ("store-is-a-file", lambda d: _cfg(d, store=_write(d / "store.txt", "x")), ("store.txt", "is a file")),
    ("store-runs-is-a-file", lambda d: _cfg(d, store=_runs_file(d)), ("runs", "is a file")),
    ("store-lock-is-a-folder", lambda d: _cfg(d, store=_lock_dir(d)), (".lock", "is a folder")),
]


def _empty(d):
    pq.write_table(pq.read_table(_table(d)).slice(0, 0), d / "empty.parquet")
    return d / "empty.parquet"


def _folder(d):
    (d / "parts").mkdir()
    return d / "parts"


def _csv(d, inf=False):
    df = pd.read_parquet(_table(d))
    if inf:
        df.loc[3, "x1"] = -np.inf
    df.to_csv(d / "t.csv", index=False)
    return d / "t.csv"


def _nulls(d, column):
    table = pq.read_table(_table(d))
    values = table.column(column).to_pylist()
    values[11] = None
    pq.write_table(table.set_column(table.schema.get_field_index(column), column, pa.array(values, pa.string())), d / "t.parquet")
    return d / "t.parquet"


def _label_inf(d):
    path = _regression(d)
    df = pd.read_parquet(path)
    df.loc[5, "label"] = np.inf
    df.to_parquet(path)
    return path


def _runs_file(d):
    (d / "store").mkdir()
    _write(d / "store" / "runs", "x")
    return d / "store"


def _lock_dir(d):
    (d / "store" / ".lock").mkdir(parents=True)
    return d / "store"


def _snapshot(d: Path) -> dict[str, str]:
    """sha256 of every file under ``d`` (folders listed too), by relative path."""
    return {str(p.relative_to(d)): hashlib.sha256(p.read_bytes()).hexdigest() if p.is_file() else "dir"
            for p in sorted(d.rglob("*"))}


def _runs(d: Path) -> list[Path]:
    return [p for p in d.rglob("runs/*")]


def _refused(d: Path, args: list, needles) -> str:
    before = _snapshot(d)
    result = runner.invoke(app, [str(a) for a in args])
    out = " ".join(result.output.split())  # the terminal may fold a long line
    assert result.exit_code == 2, result.output
    assert out.startswith("leanset: error:") and result.output.count("leanset: error:") == 1, result.output
    assert "Traceback" not in result.output, result.output
    for needle in needles:
        assert needle in out, out
    assert _runs(d) == [], "a run directory was created"
    assert _snapshot(d) == before, "a file was written or changed"
    return out


@pytest.mark.parametrize("build,needles", [pytest.param(b, n, id=i) for i, b, n in CASES])
def test_refused_before_any_fit(tmp_path, build, needles):
    """exit 2, one line naming the culprit, no run directory, input bytes unchanged."""
    _refused(tmp_path, build(tmp_path), needles)


def test_battery_covers_each_kind(tmp_path):
    """At least 35 cases, across config, table, target and store (the issue's battery)."""
    kinds = pd.Series([i.split("-")[0] for i, _, _ in CASES]).value_counts()
    assert len(CASES) >= 35 and set(kinds.index) == {"config", "table", "target", "store"}


def test_store_held_by_another_run(prefect_api, tmp_path):
    """A store whose lock another process holds, through the ``leanset`` command (Prefect's own
    logs included): refused with one line naming the store, exit 2, nothing written."""
    args = _locked(tmp_path)
    before = _snapshot(tmp_path)
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_LOGGING_LEVEL"}
    try:
        done = subprocess.run([*CLI, *map(str, args)], env={**env, "PREFECT_API_URL": prefect_api, "COLUMNS": "300"},
                              capture_output=True, text=True, timeout=300)
    finally:
        _locked.holders.pop().close()
    out = " ".join((done.stdout + done.stderr).split())
    assert done.returncode == 2, out
    assert out.startswith("leanset: error:") and "another leanset run holds this store" in out and "Traceback" not in out, out
    assert _runs(tmp_path) == [] and _snapshot(tmp_path) == before


def test_internal_error_is_one_line_and_a_log(monkeypatch, tmp_path, capsys):
    """An unexpected error: one line naming a log file that holds the traceback, exit 1."""
    import leanset.preflight

    def broken(config):
        raise ZeroDivisionError("division by zero in a stage")

    monkeypatch.setattr(leanset.preflight, "preflight", broken)
    monkeypatch.delenv("PREFECT_LOGGING_LEVEL", raising=False)  # main() sets it; undone after the test
    monkeypatch.setenv("LEANSET_LOG_DIR", str(tmp_path / "logs"))
    monkeypatch.setattr(sys, "argv", ["leanset", *map(str, _cfg(tmp_path))])
    with pytest.raises(SystemExit) as exit_:
        main()
    assert exit_.value.code == 1
    err = " ".join(capsys.readouterr().err.split())
    (log,) = (tmp_path / "logs").iterdir()
    assert err.startswith("leanset: internal error: ZeroDivisionError") and str(log) in err
    text = log.read_text()
    assert "Traceback" in text and "division by zero in a stage" in text and "broken" in text


def test_environment_error_is_one_line(monkeypatch, tmp_path, capsys):
    """An OSError (here a denied write) is the environment's: one line naming the path, exit 2."""
    import leanset.preflight

    def denied(config):
        raise PermissionError(13, "Permission denied", str(tmp_path / "store"))

    monkeypatch.setattr(leanset.preflight, "preflight", denied)
    monkeypatch.delenv("PREFECT_LOGGING_LEVEL", raising=False)
    monkeypatch.setattr(sys, "argv", ["leanset", *map(str, _cfg(tmp_path))])
    with pytest.raises(SystemExit) as exit_:
        main()
    assert exit_.value.code == 2
    err = " ".join(capsys.readouterr().err.split())
    assert err.startswith("leanset: error:") and "Permission denied" in err and str(tmp_path / "store") in err
