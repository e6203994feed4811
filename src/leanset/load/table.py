"""Load stage: read the table in batches, check it against the config, and build the :class:`RowFrame`.

The checks live in :mod:`leanset.load.checks`; row ids, the holdout and the folds come from
:mod:`leanset.load.split`; the frame and its lazy row view live in :mod:`leanset.load.rows`.
"""

from __future__ import annotations

import hashlib
import logging
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from ..config import Config
from .checks import (RESERVED, InputSummary, _check_label_and_id, _count_infinite, _dataset, _feature_columns, _read,
                     _refuse_infinite, _unreadable, label_bins, task)
from .memory import release_memory
from .rows import RowFrame, encode_columns
from .split import _derive_ids, _row_hashes, split_rows

logger = logging.getLogger(__name__)
def check_input(config: Config, table: pa.Table | None = None) -> InputSummary:
    """Check the table against the config: its schema, label and id columns, and one pass over its
    float feature columns for infinite values (NaN is read as missing; infinity is refused).

    ``table``, when given, is an Arrow table in memory that stands in for ``input.path``.

    Raises
    ------
    InputError
        Naming the file, column or value at fault, and the fix.
    """
    path = config.input.path
    dataset = _dataset(path, table)
    numeric, categorical = _feature_columns(dataset.schema, config, path)
    cols = [c for c in (config.input.label, config.input.id, *RESERVED) if c is not None and c in dataset.schema.names]
    table = _read(dataset, path, cols)
    _check_label_and_id(table, config, path)
    floats = [n for n in numeric if pa.types.is_floating(dataset.schema.field(n).type)]
    counts, first_row, start = dict.fromkeys(floats, 0), {}, 0
    if floats:
        for batch in TableSource(dataset, path, None, config.execution.batch_rows).batches(floats):
            _count_infinite(batch, floats, start, counts, first_row)
            start += batch.num_rows
    _refuse_infinite(counts, first_row, path)
    kind = task(table, config)
    n_classes = 0 if kind == "regression" else len(pc.unique(table.column(config.input.label).combine_chunks()))
    return InputSummary(kind, table.num_rows, n_classes, len(numeric) + len(categorical), len(categorical))


def _segment_codes(table: pa.Table, names: list[str], path: Path) -> np.ndarray | None:
    if not names:
        return None
    codes = [pd.factorize(table.column(n).to_pandas(), use_na_sentinel=False, sort=True)[0] for n in names]
    return np.column_stack(codes).astype(np.int32)


class TableSource:
    """The input table's original columns, read from disk on demand, plus ``row_id`` when it was derived.

    Parameters
    ----------
    dataset : pyarrow.dataset.Dataset
    path : Path
    row_id : pyarrow.ChunkedArray or None
        Derived row ids, appended as a ``row_id`` column; None when the table has its own id column.
    batch_rows : int
        Rows per record batch when reading in batches.
    """

    def __init__(self, dataset: ds.Dataset, path: Path, row_id: pa.ChunkedArray | None, batch_rows: int):
        self.dataset, self.path, self.row_id, self.batch_rows = dataset, path, row_id, batch_rows

    @property
    def column_names(self) -> list[str]:
        """The original column names, then ``row_id`` when derived."""
        return self.dataset.schema.names + (["row_id"] if self.row_id is not None else [])

    def column(self, name: str) -> pa.ChunkedArray:
        """One column, read whole."""
        if name == "row_id" and self.row_id is not None:
            return self.row_id
        return _read(self.dataset, self.path, [name]).column(name)

    def take(self, indices) -> pa.Table:
        """The rows at ``indices`` (positions in table order, any order), every column.

        Of parquet files, only the row groups that hold the rows are read (a few rows to show
        do not cost a read of the whole table)."""
        indices = np.asarray(indices, dtype=np.int64)
        try:
            table = (self._take_groups(indices) if isinstance(self.dataset, ds.FileSystemDataset)
                     else self.dataset.take(pa.array(indices)))
        except (pa.ArrowInvalid, OSError) as exc:
            raise _unreadable(self.path, exc) from None
        if self.row_id is not None:
            table = table.append_column("row_id", self.row_id.take(pa.array(indices)))
        return table

    def _take_groups(self, indices: np.ndarray) -> pa.Table:
        """:meth:`take` of the parquet files' rows, reading only the row groups that hold them, one at a time."""
        fs, schema = self.dataset.filesystem, self.dataset.schema
        metas = [(file, pq.read_metadata(file, filesystem=fs)) for file in self.dataset.files]
        groups = [(file, g, meta.row_group(g).num_rows) for file, meta in metas for g in range(meta.num_row_groups)]
        starts = np.cumsum([0] + [m for _, _, m in groups])
        if len(indices) and (indices.min() < 0 or indices.max() >= starts[-1]):
            raise IndexError(f"row positions out of range: the table has {starts[-1]} rows")
        order = np.argsort(indices, kind="stable")
        of = np.searchsorted(starts, indices[order], side="right") - 1
        pieces = [schema.empty_table()]
        for g in np.unique(of):
            file, group, _ = groups[g]
            rows = pq.ParquetFile(file, filesystem=fs).read_row_group(group, use_threads=False)
            pieces.append(rows.take(pa.array(indices[order][of == g] - starts[g])).select(schema.names).cast(schema))
        unsort = np.empty_like(order)
        unsort[order] = np.arange(len(order))
        return pa.concat_tables(pieces).take(pa.array(unsort))

    @property
    def schema(self) -> pa.Schema:
        """The schema of :meth:`take`'s tables: the original columns, then ``row_id`` when derived."""
        schema = self.dataset.schema
        return schema if self.row_id is None else schema.append(pa.field("row_id", self.row_id.type))

    def take_batches(self, rows: np.ndarray):
        """The rows at ``rows`` (ascending positions in table order) as :meth:`take` gives them, in
        tables of at most one batch each, read batch by batch rather than all at once."""
        schema, start = self.dataset.schema, 0
        for batch in self.batches():
            lo, hi = np.searchsorted(rows, (start, start + batch.num_rows))
            if hi > lo:
                picked = pa.array(rows[lo:hi], pa.int64())
                table = pa.Table.from_batches([batch]).take(pc.subtract(picked, start)).select(schema.names).cast(schema)
                yield table if self.row_id is None else table.append_column("row_id", self.row_id.take(picked))
            start += batch.num_rows

    def batches(self, columns: list[str] | None = None):
        """Record batches of ``columns`` (all original columns when None), in table order.

        Parquet files are read one row group at a time (the scanner's read-ahead holds several),
        so a pass holds about one row group, decoded.
        """
        try:
            if not isinstance(self.dataset, ds.FileSystemDataset):
                yield from self.dataset.to_batches(columns=columns, batch_size=self.batch_rows)
                return
            for file in self.dataset.files:
                reader = pq.ParquetFile(file, filesystem=self.dataset.filesystem)
                for group in range(reader.num_row_groups):
                    yield from reader.read_row_group(group, columns=columns, use_threads=False).to_batches(self.batch_rows)
        except (pa.ArrowInvalid, OSError) as exc:
            raise _unreadable(self.path, exc) from None


def load_table(config: Config, table: pa.Table | None = None, holdout: bool = True) -> RowFrame:
    """Read and check the configured table in record batches and turn it into a :class:`RowFrame`.

    ``table``, when given, is an Arrow table in memory read in place of ``input.path`` (the same
    rows give the same frame either way). With ``holdout`` False no row is held out and every row
    is a training row in one of the proxy folds.

    Row ids, the fingerprint, the holdout and the folds do not depend on ``execution.batch_rows``.
    The float32 feature matrix is held in memory when it fits in ``execution.feature_memory_mb``;
    otherwise ``X`` is None and later stages read features in batches (:meth:`RowFrame.feature_batches`).

    Raises
    ------
    InputError
        When the table does not fit the config (see :func:`check_input`).
    """
    path = config.input.path
    inp, ex = config.input, config.execution
    dataset = _dataset(path, table)
    numeric, categorical = _feature_columns(dataset.schema, config, path)
    head_cols = [c for c in (inp.label, inp.id, *RESERVED, *inp.segments) if c is not None and c in dataset.schema.names]
    head = _read(dataset, path, list(dict.fromkeys(head_cols)))
    _check_label_and_id(head, config, path)

    used = [c for c in (*numeric, *categorical, inp.label, inp.id) if c is not None]
    n, n_features = head.num_rows, len(numeric) + len(categorical)
    in_memory = n * n_features * 4 <= ex.feature_memory_mb * 2**20
    source = TableSource(dataset, path, None, ex.batch_rows)
    scan = _scan(source, dataset.schema, used, numeric, categorical, n if in_memory else None)
    release_memory()  # the pass's decoded row groups and batch frames
    _refuse_infinite(scan.inf_counts, scan.inf_first, path)
    digest = hashlib.sha256(str(pa.schema([dataset.schema.field(c) for c in used])).encode())
    digest.update(scan.content)
    if inp.id is None:
        ids = source.row_id = _derive_ids(scan.content)
    else:
        ids = head.column(inp.id)
        if not (pa.types.is_string(ids.type) or pa.types.is_large_string(ids.type)):
            ids = pa.chunked_array([pa.array(ids.to_pandas().astype(str), pa.string())])
    row_id = pd.arrays.ArrowStringArray(ids.cast(pa.string()))
    kind, classes, y, bins = _labels(head, config)
    logger.info("load: %d rows, %d features (%d categorical), %s task, features %s", n, n_features, len(categorical),
                kind, "in memory" if in_memory else "read in batches")
    is_holdout, fold = split_rows(row_id, y if bins is None else bins, config.holdout.fraction if holdout else 0.0,
                                  config.proxy.folds, config.seed)
    release_memory()
    return RowFrame(
        row_id=row_id, y=y, classes=classes, X=scan.X, feature_names=numeric + categorical,
        categorical=list(range(len(numeric), len(numeric) + len(categorical))),
        categories=scan.categories, holdout=is_holdout, fold=fold, fingerprint=digest.hexdigest()[:32], source=source,
        feature_hash=scan.feature_hash, segments=_segment_codes(head, config.input.segments, path),
        segment_names=tuple(config.input.segments), task=kind, bins=bins,
    )


class _Scan(NamedTuple):
    """What one pass over the feature columns yields."""

    X: np.ndarray | None
    content: np.ndarray
    feature_hash: np.ndarray
    categories: dict[str, list]
    inf_counts: dict[str, int]
    inf_first: dict[str, int]


def _scan(source: TableSource, schema: pa.Schema, used: list[str], numeric: list[str], categorical: list[str],
          rows_in_memory: int | None) -> _Scan:
    """One pass in record batches: row and feature hashes, category values, infinite-value counts, and the
    float32 matrix when ``rows_in_memory`` is given (numeric columns written batch by batch, no concatenated
    copy; categorical codes filled in at the end, once every category is known)."""
    hashes, feature_hashes = [], []
    uniques, cat_cols = {name: set() for name in categorical}, {name: [] for name in categorical}
    X = None if rows_in_memory is None else np.empty((rows_in_memory, len(numeric) + len(categorical)), dtype=np.float32)
    floats = [c for c in numeric if pa.types.is_floating(schema.field(c).type)]
    inf_counts, inf_first, at = dict.fromkeys(floats, 0), {}, 0
    for batch in source.batches(used):
        _count_infinite(batch, floats, at, inf_counts, inf_first)
        at += batch.num_rows
        df = batch.to_pandas()
        hashes.append(_row_hashes(df))
        block = encode_columns(df, numeric, [], {})
        cats = pd.DataFrame({name: df[name].astype("string") for name in categorical}, index=df.index)
        # same values, same hash: float32 numbers and category strings (one code per string)
        feature_hashes.append(_row_hashes(pd.concat([pd.DataFrame(block, index=df.index), cats], axis=1)))
        for name in categorical:
            uniques[name].update(cats[name].dropna().unique().tolist())
            if X is not None:
                cat_cols[name].append(cats[name])
        if X is not None:
            X[at - batch.num_rows:at, :len(numeric)] = block
    categories = {name: sorted(uniques[name]) for name in categorical}
    if X is not None and categorical:
        cats = pd.DataFrame({name: pd.concat(cat_cols[name], ignore_index=True) for name in categorical})
        X[:, len(numeric):] = encode_columns(cats, [], categorical, categories)
    empty = np.empty(0, np.uint64)
    return _Scan(X, np.concatenate(hashes) if hashes else empty,
                 np.concatenate(feature_hashes) if feature_hashes else empty, categories, inf_counts, inf_first)


def _labels(head: pa.Table, config: Config) -> tuple[str, list, np.ndarray, np.ndarray | None]:
    """The task, the classes (none for regression), the label as class codes or floats, and the label bins that
    stratify a regression table's splits."""
    label = head.column(config.input.label).to_pandas()
    kind = task(head, config)
    if kind == "regression":
        y = label.to_numpy(np.float64)
        return kind, [], y, label_bins(y)
    classes = sorted(label.unique().tolist(), key=lambda v: (str(type(v)), v))
    return kind, classes, pd.Categorical(label, categories=classes).codes.astype(np.int32), None
