"""The rows every later stage works on: :class:`RowFrame`, its features in memory or read in batches, and :class:`RowView`."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
import pandas as pd
import pyarrow as pa

if TYPE_CHECKING:
    from .table import TableSource


@dataclass(frozen=True)
class RowFrame:
    """The checked, typed table every later stage works on.

    Attributes
    ----------
    row_id : pandas.arrays.ArrowStringArray, shape (n,)
        Row ids as Arrow strings (a Python object per row would outweigh the features).
    y : ndarray of int32, shape (n,)
        Label codes, indices into ``classes``; float64 label values on a regression table.
    classes : list
        The label values, sorted; empty on a regression table.
    X : ndarray of float32, shape (n, n_features), or None
        Numeric features as given, categorical features as integer codes (NaN for missing); None
        when the matrix is larger than ``execution.feature_memory_mb`` and is read in batches.
    feature_names : list of str
    categorical : list of int
        Column indices of ``X`` that hold categorical codes.
    categories : dict
        Category values of each categorical feature, in code order.
    holdout : ndarray of bool, shape (n,)
    fold : ndarray of int8, shape (n,)
        Cross-fitting fold of each training row, -1 on holdout rows.
    fingerprint : str
        Hash of the schema and the content of every row, in order.
    segments : ndarray of int32, shape (n, len(segment_names)), optional
        Codes of the ``input.segments`` columns (missing values form their own code).
    task : str
        ``classification`` or ``regression``.
    bins : ndarray of int32, shape (n,), optional
        Label-quantile bin of each row on a regression table, standing in for classes.
    source : TableSource
        The original columns (plus ``row_id`` when it was derived), read on demand.
    feature_hash : ndarray of uint64, shape (n,)
        A 64-bit hash of each row's feature values (NaN equal to NaN), to find exact duplicates.
    """

    row_id: pd.api.extensions.ExtensionArray | np.ndarray
    y: np.ndarray
    classes: list
    X: np.ndarray | None
    feature_names: list[str]
    categorical: list[int]
    categories: dict[str, list]
    holdout: np.ndarray
    fold: np.ndarray
    fingerprint: str
    source: TableSource
    feature_hash: np.ndarray | None = None
    segments: np.ndarray | None = None
    segment_names: tuple[str, ...] = ()
    task: str = "classification"
    bins: np.ndarray | None = None

    @property
    def groups(self) -> np.ndarray:
        """Codes that stratify the holdout, folds and quotas: the class, or the label-quantile bin (regression)."""
        return self.y if self.bins is None else self.bins

    @property
    def train(self) -> np.ndarray:
        """Indices of the training rows (those that may be pruned)."""
        return np.flatnonzero(~self.holdout)

    def release_features(self) -> None:
        """Let go of the feature matrix held in memory (``X`` becomes None): from then on features
        are read from the table in batches, as when the matrix did not fit. The run calls it once
        the last model is trained, so the write stage does not hold the matrix as well.

        The frame is otherwise frozen; this is the one field that may change, and only to None.
        """
        object.__setattr__(self, "X", None)

    def encode(self, batch: pa.Table | pa.RecordBatch) -> np.ndarray:
        """The float32 feature matrix of a batch of original columns, with this run's category codes."""
        k = len(self.feature_names) - len(self.categorical)
        names = self.feature_names
        return encode_columns(batch.select(names).to_pandas(), names[:k], names[k:], self.categories)

    def feature_batches(self, train_only: bool = False):
        """Yield ``(start, X_batch)`` over all rows in table order: slices of ``X``, or batches read
        from disk. With ``train_only``, holdout rows are left out and ``start`` counts training rows."""
        at = 0
        for start, X in self._batches():
            if train_only:
                X = X[~self.holdout[start:start + len(X)]]
            yield (at if train_only else start), X
            at += len(X)

    def _batches(self):
        if self.X is not None:
            step = self.source.batch_rows
            for start in range(0, len(self.X), step):
                yield start, self.X[start:start + step]
            return
        start = 0
        for batch in self.source.batches(self.feature_names):
            yield start, self.encode(batch)
            start += batch.num_rows

    def features(self, rows: np.ndarray) -> np.ndarray:
        """The float32 features of ``rows`` (ascending positions in table order), gathered in one
        pass over the batches when ``X`` is not in memory."""
        if self.X is not None:
            return self.X[rows]
        out = np.empty((len(rows), len(self.feature_names)), np.float32)
        for lo, X in RowView(self, rows).batches():
            out[lo:lo + len(X)] = X
        return out

    def feature_rows(self, rows: np.ndarray) -> RowView:
        """The features of ``rows`` (ascending positions in table order) as a :class:`RowView`: no
        copy is made until it is used, whether ``X`` is in memory or read from disk."""
        return RowView(self, rows)


class RowView:
    """Rows of a :class:`RowFrame`, gathered or read in batches only when used.

    ``view[idx]`` is the view of those of its rows (``idx`` ascending), ``np.asarray(view)``
    gathers them, and :meth:`batches` streams them, so LightGBM can train on any subset of the
    table through its ``Sequence`` interface without a gathered copy, in memory or not.
    """

    def __init__(self, frame: RowFrame, rows: np.ndarray):
        self.frame, self.rows = frame, np.asarray(rows)
        self.batch_rows = frame.source.batch_rows

    def __len__(self) -> int:
        return len(self.rows)

    @property
    def shape(self) -> tuple[int, int]:
        return len(self.rows), len(self.frame.feature_names)

    def __getitem__(self, idx) -> RowView:
        return RowView(self.frame, self.rows[idx])

    def __array__(self, dtype=None, copy=None) -> np.ndarray:
        X = self.frame.features(self.rows)
        return X if dtype is None else X.astype(dtype, copy=False)

    def batches(self):
        """Yield ``(start, X_batch)``: the view's rows in order, ``start`` counting them."""
        for start, X in self.frame.feature_batches():
            lo, hi = np.searchsorted(self.rows, (start, start + len(X)))
            if hi > lo:
                yield int(lo), X[self.rows[lo:hi] - start]


def encode_columns(df: pd.DataFrame, numeric: list[str], categorical: list[str], categories: dict[str, list]) -> np.ndarray:
    """Float32 features of a frame of original columns: numbers as given, categories as codes (NaN for missing or unseen)."""
    X = np.empty((len(df), len(numeric) + len(categorical)), dtype=np.float32)
    for j, name in enumerate(numeric):
        X[:, j] = pd.to_numeric(df[name], errors="coerce").astype("float64").to_numpy(na_value=np.nan)
    for j, name in enumerate(categorical, start=len(numeric)):
        codes = pd.Categorical(df[name].astype("string"), categories=categories[name]).codes.astype(np.float32)
        codes[codes < 0] = np.nan
        X[:, j] = codes
    return X
