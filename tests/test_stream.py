"""Streaming: the same decisions whatever the batch size and whether the features sit in memory,
and a run (score, select, verify) that completes on a table larger than the process's memory cap."""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_digits

from leanset.config import Config
from leanset.scores.dynamics import score
from leanset.select.frame import select_frame
from leanset.load import RowView, load_table
from leanset.verify.verdict import verify


def _digits_folder(tmp_path: Path) -> Path:
    """scikit-learn's bundled digits (1,797 rows, 64 pixels) as three parquet files with small row
    groups, plus a string column derived from the pixels so that categorical codes are streamed too."""
    d = load_digits(as_frame=True).frame
    ink = d.drop(columns="target").sum(axis=1)
    d["ink"] = pd.cut(ink, 4, labels=["faint", "light", "dark", "bold"]).astype("string")
    d.loc[d.index % 97 == 0, "ink"] = None
    folder = tmp_path / "digits"
    folder.mkdir()
    for k, part in enumerate(np.array_split(np.arange(len(d)), 3)):
        pq.write_table(pa.Table.from_pandas(d.iloc[part], preserve_index=False), folder / f"part-{k}.parquet", row_group_size=250)
    return folder


def _run(folder: Path, batch_rows: int, feature_memory_mb: float):
    cfg = Config.model_validate({
        "input": {"path": str(folder), "label": "target"},
        "proxy": {"folds": 3, "rounds": 12, "checkpoint_every": 3, "agreement_rows": 0},
        "selection": {"fraction": 0.3},
        "execution": {"batch_rows": batch_rows, "feature_memory_mb": feature_memory_mb},
    })
    frame = load_table(cfg)
    scores = score(frame, cfg)
    return frame, scores, select_frame(frame, scores, cfg)


def test_same_ids_holdout_scores_and_decisions_at_any_batch_size_streamed_or_not(tmp_path):
    folder = _digits_folder(tmp_path)
    runs = {(b, m): _run(folder, b, m) for b, m in ((1_000, 0), (100_000, 0), (1_000, 1024))}
    (f0, s0, d0) = runs[(1_000, 0)]
    assert f0.X is None and runs[(1_000, 1024)][0].X is not None  # streamed, and held in memory
    assert len(f0.categories["ink"]) == 4
    for frame, scores, selection in runs.values():
        np.testing.assert_array_equal(frame.row_id, f0.row_id)
        np.testing.assert_array_equal(frame.holdout, f0.holdout)
        np.testing.assert_array_equal(frame.fold, f0.fold)
        np.testing.assert_array_equal(frame.feature_hash, f0.feature_hash)
        assert frame.fingerprint == f0.fingerprint
        pd.testing.assert_frame_equal(scores.table, s0.table)
        np.testing.assert_array_equal(selection.keep, d0.keep)
        np.testing.assert_array_equal(selection.reason, d0.reason)
    # batches read from disk hold the same features as the matrix in memory
    in_memory = runs[(1_000, 1024)][0]
    streamed = np.concatenate([X for _, X in f0.feature_batches()])
    np.testing.assert_array_equal(streamed, in_memory.X)
    rows = np.array([0, 5, 600, 1796])
    np.testing.assert_array_equal(f0.features(rows), in_memory.X[rows])
    # a frame that lets go of its matrix reads the same features from disk
    held = in_memory.X
    in_memory.release_features()
    assert in_memory.X is None
    np.testing.assert_array_equal(in_memory.features(rows), held[rows])
    np.testing.assert_array_equal(np.concatenate([X for _, X in in_memory.feature_batches()]), held)


def test_verify_streams_the_training_rows_with_the_same_verdict(tmp_path):
    """With the features not held, the target trains on a view of the training rows that LightGBM
    reads batch by batch (its ``Sequence`` interface); on 1,797 rows (under LightGBM's 200,000-row
    bin sample) its bins, models and verdict equal those of the matrix in memory."""
    folder = _digits_folder(tmp_path)
    verdicts = {}
    for memory_mb in (0, 1024):
        frame, _, selection = _run(folder, 1_000, memory_mb)
        cfg = Config.model_validate({"input": {"path": str(folder), "label": "target"},
                                     "target": {"params": {"num_boost_round": 30, "num_threads": 1}}, "verify": {"bootstrap": 200}})
        train = frame.train
        X = frame.feature_rows(train)
        assert isinstance(X, RowView)  # a view either way: gathered only where used
        if memory_mb == 0:
            pick = np.flatnonzero(selection.keep)
            np.testing.assert_array_equal(np.asarray(X[pick]), frame.features(train[pick]))
            assert sum(len(b) for _, b in X[pick].batches()) == len(pick)
        verdicts[memory_mb] = verify(frame, selection, cfg).to_dict()
    streamed, held = verdicts[0], verdicts[1024]
    streamed.pop("train_seconds"), held.pop("train_seconds"), streamed.pop("speedup"), held.pop("speedup")
    assert streamed == held


_CHILD = """
import json, sys
from pathlib import Path
from leanset.config import Config
from leanset.scores.dynamics import score
from leanset.select.frame import select_frame
from leanset.load.table import load_table
from leanset.verify.verdict import verify
cfg = Config.model_validate(json.loads(sys.argv[1]))
frame = load_table(cfg)
scores = score(frame, cfg)
selection = select_frame(frame, scores, cfg)
verdict = verify(frame, selection, cfg)
status = dict(line.split(":", 1) for line in Path("/proc/self/status").read_text().splitlines())
print(json.dumps({"streamed": frame.X is None, "scored": len(scores.table), "train": len(frame.train),
                  "kept": int(selection.keep.sum()), "verdict": verdict.status, "peak_kib": int(status["VmPeak"].split()[0])}))
"""


def _child(folder: Path, feature_memory_mb: float, cap: int | None) -> subprocess.CompletedProcess:
    cfg = {"input": {"path": str(folder), "label": "label"},
           "proxy": {"folds": 2, "rounds": 4, "checkpoint_every": 2, "threshold_samples": False, "agreement_rows": 0,
                     "params": {"bin_construct_sample_cnt": 5000}},
           "target": {"params": {"num_boost_round": 5, "bin_construct_sample_cnt": 5000}},
           "verify": {"bootstrap": 100, "random_repeats": 1},
           "execution": {"batch_rows": 5000, "feature_memory_mb": feature_memory_mb}}

    def limit():
        if cap is not None:
            resource.setrlimit(resource.RLIMIT_AS, (cap, cap))

    env = {**os.environ, "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MALLOC_ARENA_MAX": "1"}
    return subprocess.run([sys.executable, "-c", _CHILD, json.dumps(cfg)], capture_output=True, text=True,
                          env=env, preexec_fn=limit, timeout=600)


def _invented(folder: Path, rows: int, features: int, seed: int) -> int:
    """An invented scale-test table written in row groups of 5,000 rows; returns its float32 matrix bytes."""
    folder.mkdir()
    rng = np.random.default_rng(seed)
    for k, start in enumerate(range(0, rows, 40_000)):
        m = min(40_000, rows - start)
        X = rng.standard_normal((m, features), dtype=np.float32)
        y = (X[:, 0] + X[:, 1] + rng.standard_normal(m, dtype=np.float32) > 0).astype(np.int32)
        table = pa.Table.from_arrays([*X.T, y], names=[f"x{j}" for j in range(features)] + ["label"])
        pq.write_table(table, folder / f"part-{k}.parquet", row_group_size=5_000)
    return rows * features * 4


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="reads VmPeak from /proc (Linux)")
def test_score_select_and_verify_complete_on_a_table_larger_than_the_memory_cap(tmp_path):
    # The cap is the address space a run on a 3,000-row slice needs, plus less than the whole
    # table's float32 matrix: holding the matrix must fail, streaming it must not.
    small, big = tmp_path / "small", tmp_path / "big"
    _invented(small, 3_000, 600, seed=1)
    matrix = _invented(big, 120_000, 600, seed=2)
    base = _child(small, 0, None)
    assert base.returncode == 0, base.stderr[-2000:]
    cap = json.loads(base.stdout.splitlines()[-1])["peak_kib"] * 1024 + matrix
    held = _child(big, 4096, cap)
    assert held.returncode != 0  # the matrix in memory does not fit under the cap
    streamed = _child(big, 0, cap)
    assert streamed.returncode == 0, streamed.stderr[-2000:]
    out = json.loads(streamed.stdout.splitlines()[-1])
    assert out["streamed"] and out["scored"] == out["train"] == 96_000
    assert out["kept"] > 0 and out["verdict"] in ("pass", "fail", "inconclusive")
