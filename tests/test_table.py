"""Load stage: input checks, row ids, holdout split and folds, file formats."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_iris, load_wine

from leanset.config import Config
from leanset.errors import InputError
from leanset.load.table import check_input, load_table

STAGES = [check_input, load_table]


def iris() -> pd.DataFrame:
    d = load_iris(as_frame=True).frame
    d.columns = ["sl", "sw", "pl", "pw", "species"]
    d["species"] = d["species"].map({0: "setosa", 1: "versicolor", 2: "virginica"})
    d.insert(0, "rid", [f"r{i}" for i in range(len(d))])
    return d


def wine() -> pd.DataFrame:
    d = load_wine(as_frame=True).frame
    d.columns = [f"f{i}" for i in range(d.shape[1] - 1)] + ["cultivar"]
    d.insert(0, "rid", [f"w{i}" for i in range(len(d))])
    return d


def config(path: Path, label: str = "species", seed: int = 0, **input_kw) -> Config:
    return Config.model_validate({"input": {"path": str(path), "label": label, **input_kw}, "seed": seed})


def write_parquet(tmp_path: Path, df: pd.DataFrame, name: str = "t.parquet") -> Path:
    path = tmp_path / name
    df.to_parquet(path, index=False)
    return path


def sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# ---------------------------------------------------------------- bad inputs

def _garbage(tmp_path):
    path = tmp_path / "garbage.parquet"
    path.write_bytes(b"this is not a parquet file\x00\x01\x02" * 40)
    return path, {}, []


def _truncated(tmp_path):
    full = write_parquet(tmp_path, iris(), "full.parquet").read_bytes()
    path = tmp_path / "truncated.parquet"
    path.write_bytes(full[: len(full) // 2])
    return path, {}, []


def _label_absent(tmp_path):
    return write_parquet(tmp_path, iris()), {"label": "speceis"}, ["'speceis'"]


def _single_class(tmp_path):
    d = iris()
    d["species"] = "setosa"
    return write_parquet(tmp_path, d), {}, ["'species'", "single class", "'setosa'"]


def _missing_label(tmp_path):
    d = iris()
    d.loc[[3, 77, 140], "species"] = None
    return write_parquet(tmp_path, d), {}, ["'species'", "3 missing"]


def _continuous_label(tmp_path):
    d = iris().drop(columns="species")
    # with input.task auto this label is read as regression (tests/test_regression.py); forced to classes it is refused
    return write_parquet(tmp_path, d), {"label": "pw", "task": "classification"}, ["'pw'", "continuous"]


def _duplicate_id(tmp_path):
    d = iris()
    d.loc[9, "rid"] = "r7"
    return write_parquet(tmp_path, d), {"id": "rid"}, ["'rid'", "'r7'"]


def _tiny_class(tmp_path):
    d = iris()
    d.loc[[0, 1], "species"] = "rare"  # 2 rows; 2 folds (the default) + 1 holdout row need 3
    return write_parquet(tmp_path, d), {}, ["'rare'", "2 rows"]


def _list_feature(tmp_path):
    t = pa.Table.from_pandas(iris(), preserve_index=False)
    t = t.append_column("tags", pa.array([[i, i + 1] for i in range(t.num_rows)]))
    path = tmp_path / "t.parquet"
    pq.write_table(t, path)
    return path, {}, ["'tags'", "list"]


def _timestamp_feature(tmp_path):
    d = iris()
    d["seen_at"] = pd.date_range("2024-01-01", periods=len(d), freq="h")
    return write_parquet(tmp_path, d), {}, ["'seen_at'", "timestamp"]


def _missing_file(tmp_path):
    return tmp_path / "nowhere" / "absent.parquet", {}, ["not found"]


BAD = {
    "missing-file": _missing_file,
    "garbage-bytes": _garbage,
    "truncated-parquet": _truncated,
    "label-absent": _label_absent,
    "single-class": _single_class,
    "missing-label": _missing_label,
    "continuous-label": _continuous_label,
    "duplicate-id": _duplicate_id,
    "class-too-small": _tiny_class,
    "list-feature": _list_feature,
    "timestamp-feature": _timestamp_feature,
}


@pytest.mark.parametrize("stage", STAGES, ids=lambda f: f.__name__)
@pytest.mark.parametrize("case", BAD.values(), ids=BAD.keys())
def test_bad_input_raises_one_line_input_error_naming_it(tmp_path, case, stage):
    path, input_kw, fragments = case(tmp_path)
    before = sha(path) if path.exists() else None
    with pytest.raises(InputError) as err:
        stage(config(path, **{"label": "species", **input_kw}))
    msg = str(err.value)
    assert "\n" not in msg
    assert str(path) in msg  # names the file
    for fragment in fragments:  # and the column / value at fault
        assert fragment in msg, (fragment, msg)
    if before is not None:
        assert sha(path) == before  # input left untouched


def test_feature_listed_but_absent_is_named(tmp_path):
    path = write_parquet(tmp_path, iris())
    with pytest.raises(InputError, match="'petal_area'"):
        load_table(config(path, features=["sl", "petal_area"]))


def test_unsupported_column_can_be_excluded_when_hashable(tmp_path):
    path, _, _ = _timestamp_feature(tmp_path)
    frame = load_table(config(path, id="rid", exclude=["seen_at"]))
    assert frame.feature_names == ["sl", "sw", "pl", "pw"]
    assert frame.X.shape == (150, 4)


def test_excluded_list_column_loads(tmp_path):
    path, _, _ = _list_feature(tmp_path)
    frame = load_table(config(path, exclude=["tags"]))
    assert "tags" not in frame.feature_names


def test_input_file_unchanged_by_a_successful_load(tmp_path):
    path = write_parquet(tmp_path, iris())
    before = sha(path)
    check_input(config(path, id="rid"))
    load_table(config(path, id="rid"))
    assert sha(path) == before


# ---------------------------------------------------------------- frame contents

def test_frame_types_and_categorical_codes(tmp_path):
    d = iris()
    d["colour"] = np.where(np.arange(len(d)) % 3 == 0, "red", "blue")
    d.loc[5, "colour"] = None
    frame = load_table(config(write_parquet(tmp_path, d), id="rid"))
    assert frame.X.dtype == np.float32 and frame.y.dtype == np.int32
    assert frame.classes == ["setosa", "versicolor", "virginica"]
    assert frame.feature_names == ["sl", "sw", "pl", "pw", "colour"]
    assert frame.categorical == [4]
    assert frame.categories["colour"] == ["blue", "red"]
    col = frame.X[:, 4]
    assert np.isnan(col[5])
    expected = np.where(np.arange(len(d)) % 3 == 0, 1.0, 0.0)
    mask = np.arange(len(d)) != 5
    np.testing.assert_array_equal(col[mask], expected[mask])
    np.testing.assert_array_equal(frame.X[:, :4], d[["sl", "sw", "pl", "pw"]].to_numpy(np.float32))
    np.testing.assert_array_equal(np.asarray(frame.classes)[frame.y], d["species"].to_numpy())
    assert list(frame.row_id) == list(d["rid"])


def test_fingerprint_is_stable_and_tracks_content(tmp_path):
    d = iris()
    a = load_table(config(write_parquet(tmp_path, d, "a.parquet")))
    b = load_table(config(write_parquet(tmp_path, d, "b.parquet")))
    d.loc[42, "sl"] += 0.1
    c = load_table(config(write_parquet(tmp_path, d, "c.parquet")))
    assert a.fingerprint == b.fingerprint
    assert a.fingerprint != c.fingerprint


# ---------------------------------------------------------------- holdout and folds

@pytest.mark.parametrize("fraction", [0.2, 0.35])
def test_holdout_is_stratified_at_fraction(tmp_path, fraction):
    d = wine()  # classes of 59, 71 and 48 rows
    cfg = Config.model_validate({"input": {"path": str(write_parquet(tmp_path, d)), "label": "cultivar", "id": "rid"},
                                 "holdout": {"fraction": fraction}})
    frame = load_table(cfg)
    for c in range(len(frame.classes)):
        in_class = frame.y == c
        n_hold = int(frame.holdout[in_class].sum())
        # each class at its share, up to rounding (what sklearn's train_test_split(stratify=y) does)
        assert n_hold >= 1 and abs(n_hold - fraction * in_class.sum()) <= 1, (c, n_hold)
    # folds: -1 on the holdout only; every class spread evenly over the folds
    # (the sizes sklearn.model_selection.StratifiedKFold gives: within one row of each other)
    assert np.all(frame.fold[frame.holdout] == -1)
    assert set(frame.fold[~frame.holdout]) == set(range(cfg.proxy.folds))
    for c in range(len(frame.classes)):
        sizes = np.bincount(frame.fold[~frame.holdout & (frame.y == c)], minlength=cfg.proxy.folds)
        assert sizes.max() - sizes.min() <= 1, (c, sizes)
    np.testing.assert_array_equal(frame.train, np.flatnonzero(~frame.holdout))


def _split_by_id(frame) -> dict[str, tuple[bool, int]]:
    return {r: (bool(h), int(f)) for r, h, f in zip(frame.row_id, frame.holdout, frame.fold)}


@pytest.mark.parametrize("id_column", ["rid", None], ids=["given-ids", "derived-ids"])
def test_split_is_deterministic_and_independent_of_row_order(tmp_path, id_column):
    d = wine()
    if id_column is None:
        d = d.drop(columns="rid")
    path = write_parquet(tmp_path, d)
    first = load_table(config(path, label="cultivar", id=id_column))
    again = load_table(config(path, label="cultivar", id=id_column))
    np.testing.assert_array_equal(first.holdout, again.holdout)
    np.testing.assert_array_equal(first.fold, again.fold)
    np.testing.assert_array_equal(first.row_id, again.row_id)

    shuffled = d.sample(frac=1.0, random_state=np.random.RandomState(7)).reset_index(drop=True)
    assert not shuffled.equals(d)
    moved = load_table(config(write_parquet(tmp_path, shuffled, "shuffled.parquet"), label="cultivar", id=id_column))
    assert _split_by_id(moved) == _split_by_id(first)


def test_another_seed_gives_another_holdout(tmp_path):
    path = write_parquet(tmp_path, wine())
    a = load_table(config(path, label="cultivar", id="rid", seed=0))
    b = load_table(config(path, label="cultivar", id="rid", seed=1))
    hold_a, hold_b = set(a.row_id[a.holdout]), set(b.row_id[b.holdout])
    assert hold_a != hold_b
    # same per-class sizes: only the choice of rows moves
    np.testing.assert_array_equal(np.bincount(a.y[a.holdout]), np.bincount(b.y[b.holdout]))


def test_derived_ids_are_unique_and_stable_with_exact_duplicates(tmp_path):
    d = iris().drop(columns="rid")
    d = pd.concat([d, d.iloc[:10], d.iloc[:10]], ignore_index=True)  # rows 0..9 three times each
    assert d.duplicated().sum() >= 20
    path = write_parquet(tmp_path, d)
    frame = load_table(config(path))
    assert len(frame.row_id) == len(d) == len(set(frame.row_id))
    np.testing.assert_array_equal(load_table(config(path)).row_id, frame.row_id)
    shuffled = d.sample(frac=1.0, random_state=np.random.RandomState(3)).reset_index(drop=True)
    moved = load_table(config(write_parquet(tmp_path, shuffled, "shuffled.parquet")))
    assert _split_by_id(moved) == _split_by_id(frame)
    # the derived ids are carried in the source table for writing kept rows
    assert frame.source.column("row_id").to_pylist() == list(frame.row_id)


# ---------------------------------------------------------------- formats

def test_csv_gives_the_same_frame_as_parquet(tmp_path):
    d = iris()
    csv = tmp_path / "t.csv"
    d.to_csv(csv, index=False)
    a = load_table(config(csv, id="rid"))
    b = load_table(config(write_parquet(tmp_path, d), id="rid"))
    assert a.feature_names == b.feature_names == ["sl", "sw", "pl", "pw"]
    assert a.classes == b.classes
    np.testing.assert_array_equal(a.X, b.X)
    np.testing.assert_array_equal(a.y, b.y)
    np.testing.assert_array_equal(a.row_id, b.row_id)
    np.testing.assert_array_equal(a.holdout, b.holdout)


def test_folder_of_parquet_files_gives_the_same_rows_as_one_file(tmp_path):
    d = wine().drop(columns="rid")
    one = load_table(config(write_parquet(tmp_path, d, "whole.parquet"), label="cultivar"))
    folder = tmp_path / "parts"
    folder.mkdir()
    for k, part in enumerate(np.array_split(np.arange(len(d)), 3)):
        d.iloc[part].to_parquet(folder / f"part-{k}.parquet", index=False)
    many = load_table(config(folder, label="cultivar"))
    assert len(many.row_id) == len(d)
    assert _split_by_id(many) == _split_by_id(one)
    order_one, order_many = np.argsort(one.row_id), np.argsort(many.row_id)
    np.testing.assert_array_equal(many.X[order_many], one.X[order_one])
    np.testing.assert_array_equal(many.y[order_many], one.y[order_one])


def test_take_reads_the_rows_pyarrow_takes_in_any_order(tmp_path):
    """``TableSource.take`` reads only the row groups that hold the rows; the rows must be those
    pyarrow's own ``Dataset.take`` returns, in the order asked, repeats and all."""
    import pyarrow.dataset as ds

    from leanset.load.table import TableSource

    d = wine()
    folder = tmp_path / "parts"
    folder.mkdir()
    for k, part in enumerate(np.array_split(np.arange(len(d)), 3)):
        pq.write_table(pa.Table.from_pandas(d.iloc[part], preserve_index=False), folder / f"part-{k}.parquet", row_group_size=20)
    dataset = ds.dataset(folder, format="parquet")
    source = TableSource(dataset, folder, None, batch_rows=16)
    rng = np.random.default_rng(0)
    for rows in (rng.integers(0, len(d), 25), np.array([len(d) - 1, 0, 0, 59, 60]), np.arange(len(d))[::-1], np.array([], int)):
        assert source.take(rows).equals(dataset.take(pa.array(rows, pa.int64())))  # pyarrow's Dataset.take
    with pytest.raises(IndexError):
        source.take([len(d)])
