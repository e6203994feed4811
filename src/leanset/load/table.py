"""Load stage: read the table, check it, derive row ids, split off the holdout, assign folds.

The holdout and the folds are drawn from seeded hashes of the row ids, per class, so they do
not depend on row order or on how the table is cut into files.
"""

from __future__ import annotations

import ctypes
import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from ..config import REGRESSION_METRICS, Config
from ..errors import ConfigError, InputError

#: Columns leanset adds to its outputs; an input column of the same name would be shadowed.
RESERVED = ("weight",)


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

    def feature_rows(self, rows: np.ndarray):
        """The float32 features of ``rows`` (ascending positions in table order): an array when ``X``
        is in memory, else a :class:`RowView` that reads them from disk when used."""
        return self.X[rows] if self.X is not None else RowView(self, rows)


class RowView:
    """Rows of a :class:`RowFrame` whose features are not held, read in batches when used.

    ``view[idx]`` is the view of those of its rows (``idx`` ascending), ``np.asarray(view)``
    gathers them, and :meth:`batches` streams them, so LightGBM can train on any subset of a
    table larger than memory through its ``Sequence`` interface.
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


def _dataset(path: Path) -> ds.Dataset:
    if not path.exists():
        raise InputError(f"input.path: {path} not found; point input.path at a parquet file, a folder of parquet files or a CSV file")
    try:
        if path.is_file() and path.suffix.lower() in (".csv", ".tsv", ".txt"):
            parse = pacsv.ParseOptions(delimiter="\t" if path.suffix.lower() == ".tsv" else ",")
            return ds.dataset(pacsv.read_csv(path, parse_options=parse))
        return ds.dataset(path, format="parquet")
    except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
        first = str(exc).splitlines()[0]
        raise InputError(f"{path}: cannot be read as parquet or CSV ({first}); check that the file is complete and in one of those formats") from None


def _unreadable(path: Path, exc: Exception) -> InputError:
    return InputError(f"{path}: cannot be read ({str(exc).splitlines()[0]}); check that the file is complete and not corrupt")


def _read(dataset: ds.Dataset, path: Path, columns: list[str] | None = None) -> pa.Table:
    try:
        return dataset.to_table(columns=columns)
    except (pa.ArrowInvalid, OSError) as exc:
        raise _unreadable(path, exc) from None


def _feature_columns(schema: pa.Schema, config: Config, path: Path) -> tuple[list[str], list[str]]:
    """Return (numeric, categorical) feature names, refusing unsupported types."""
    inp = config.input
    skip = {inp.label, inp.id, *inp.exclude}
    names = inp.features if inp.features is not None else [n for n in schema.names if n not in skip]
    numeric, categorical = [], []
    for name in names:
        if name not in schema.names:
            raise InputError(f"{path}: feature column '{name}' listed in input.features is not in the table")
        t = schema.field(name).type
        if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_boolean(t) or pa.types.is_decimal(t):
            numeric.append(name)
        elif pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_dictionary(t):
            categorical.append(name)
        else:
            raise InputError(f"{path}: feature column '{name}' has unsupported type {t}; convert it to a number or a string, or add it to input.exclude")
    absent = [n for n in inp.segments if n not in schema.names]
    if absent:
        raise InputError(f"{path}: segment column '{absent[0]}' listed in input.segments is not in the table; fix input.segments")
    if not numeric and not categorical:
        raise InputError(f"{path}: no feature columns besides the label and id; add feature columns or fix input.features")
    return numeric, categorical


def _check_classes(label, config: Config, path: Path) -> None:
    inp = config.input
    if config.verify.metric in REGRESSION_METRICS:
        raise ConfigError(f"verify.metric: {config.verify.metric} is a regression metric but '{inp.label}' holds classes; use a classification metric, or set input.task: regression")
    t = label.type
    if pa.types.is_floating(t):
        vals = label.to_numpy()
        if not np.all(np.isfinite(vals)) or not np.all(vals == np.round(vals)):
            raise InputError(f"{path}: label column '{inp.label}' holds continuous values; set input.task: regression, or give it class labels")
    elif not (pa.types.is_integer(t) or pa.types.is_boolean(t) or pa.types.is_string(t) or pa.types.is_large_string(t) or pa.types.is_dictionary(t)):
        raise InputError(f"{path}: label column '{inp.label}' has unsupported type {t}; give it string, integer or boolean class labels")
    counts = pc.value_counts(label.combine_chunks() if not pa.types.is_dictionary(t) else label.cast(pa.string()).combine_chunks())
    values, ns = counts.field("values").to_pylist(), counts.field("counts").to_numpy()
    if len(values) < 2:
        raise InputError(f"{path}: label column '{inp.label}' has a single class ({values[0]!r}); pruning needs at least two classes")
    need = config.proxy.folds + 1
    small = [(v, n) for v, n in zip(values, ns) if n < need]
    if small:
        v, n = small[0]
        raise InputError(f"{path}: class {v!r} of '{inp.label}' has {n} rows; it needs at least {need} (1 for the holdout, {config.proxy.folds} for the proxy folds); drop or merge it, or lower proxy.folds")


def _check_label_and_id(table: pa.Table, config: Config, path: Path) -> None:
    inp = config.input
    if inp.label not in table.column_names:
        raise InputError(f"{path}: label column '{inp.label}' not found (columns: {', '.join(table.column_names[:20])}); fix input.label")
    label = table.column(inp.label)
    if label.null_count:
        raise InputError(f"{path}: label column '{inp.label}' has {label.null_count} missing values; fill or drop those rows")
    if task(table, config) == "regression":
        _check_continuous_label(label, config, path)
    else:
        _check_classes(label, config, path)
    if inp.id is not None:
        if inp.id not in table.column_names:
            raise InputError(f"{path}: id column '{inp.id}' not found; fix input.id or remove it to derive row ids")
        ids = table.column(inp.id)
        if ids.null_count:
            raise InputError(f"{path}: id column '{inp.id}' has {ids.null_count} missing values; fill them or remove input.id to derive row ids")
        dup = pc.value_counts(ids.combine_chunks())
        repeated = pc.filter(dup.field("values"), pc.greater(dup.field("counts"), 1))
        if len(repeated):
            raise InputError(f"{path}: id column '{inp.id}' has {len(repeated)} duplicated values (first: {repeated[0].as_py()!r}); make ids unique or remove input.id to derive row ids")
    for name in RESERVED:
        if name in table.column_names and name != inp.label:
            raise InputError(f"{path}: column '{name}' clashes with the column leanset writes into kept rows; rename it or add it to input.exclude after renaming")


#: Label-quantile bins that stand in for classes on a regression table (holdout, folds, quotas).
LABEL_BINS = 10


def task(table: pa.Table, config: Config) -> str:
    """``input.task``, or when ``auto``: regression for a float label holding non-integer values."""
    if config.input.task != "auto":
        return config.input.task
    label = table.column(config.input.label)
    if not pa.types.is_floating(label.type):
        return "classification"
    vals = label.to_numpy()
    return "regression" if np.any(np.isfinite(vals) & (vals != np.round(vals))) else "classification"


def _check_continuous_label(label, config: Config, path: Path) -> None:
    t = label.type
    if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)):
        raise InputError(f"{path}: label column '{config.input.label}' has type {t}; input.task regression needs a numeric label")
    if not np.all(np.isfinite(label.to_numpy().astype(np.float64))):
        raise InputError(f"{path}: label column '{config.input.label}' has infinite or NaN values; fill or drop those rows")
    need = LABEL_BINS * (config.proxy.folds + 1)
    if len(label) < need:
        raise InputError(f"{path}: regression label '{config.input.label}' has {len(label)} rows; it needs at least {need} ({LABEL_BINS} label-quantile bins, each split into a holdout and {config.proxy.folds} proxy folds); lower proxy.folds")
    if config.selection.score in ("confidence", "aleatoric"):
        raise ConfigError(f"selection.score: {config.selection.score} has no regression analogue; use aum, el2n, forgetting, correctness, variability, oof_loss or oof_margin")
    metric = config.verify.metric
    if metric not in REGRESSION_METRICS and "metric" in config.verify.model_fields_set:
        raise ConfigError(f"verify.metric: {metric} is a classification metric but '{config.input.label}' is a regression label; use rmse, mae or r2")


def label_bins(y: np.ndarray, bins: int = LABEL_BINS) -> np.ndarray:
    """Quantile bin (0..bins-1) of each continuous label value, ties kept together."""
    ranks = pd.Series(y).rank(method="min").to_numpy()
    return np.minimum(((ranks - 1) * bins / len(y)).astype(np.int32), bins - 1)


def check_input(config: Config) -> None:
    """Check the table against the config by reading its schema, label and id columns only.

    Raises
    ------
    InputError
        Naming the file, column or value at fault, and the fix.
    """
    path = config.input.path
    dataset = _dataset(path)
    _feature_columns(dataset.schema, config, path)
    cols = [c for c in (config.input.label, config.input.id, *RESERVED) if c is not None and c in dataset.schema.names]
    table = _read(dataset, path, cols)
    _check_label_and_id(table, config, path)


def _hash_key(purpose: str, seed: int) -> str:
    return hashlib.sha256(f"{purpose}:{seed}".encode()).hexdigest()[:16]


def _row_hashes(df: pd.DataFrame) -> np.ndarray:
    return pd.util.hash_pandas_object(df, index=False).to_numpy(np.uint64)


#: Rows per step where a whole-table step makes Python objects or hashes strings (bounds its temporaries).
_STEP = 1 << 16


_HEX = np.frombuffer(b"0123456789abcdef", dtype=np.uint8)
_NIBBLES = np.arange(60, -4, -4, dtype=np.uint64)


def _derive_ids(content: np.ndarray) -> pa.ChunkedArray:
    """Row ids ``<content hash as 16 hex digits>-<occurrence>``, built without a Python object per row."""
    occurrence = pd.Series(content).groupby(content).cumcount().to_numpy()
    chunks = []
    for s in range(0, len(content), _STEP):
        digits = _HEX[((content[s:s + _STEP, None] >> _NIBBLES) & np.uint64(15)).astype(np.uint8)]
        hexes = pa.array(np.ascontiguousarray(digits).view("S16").ravel()).cast(pa.string())
        chunks.append(pc.binary_join_element_wise(hexes, pa.array(occurrence[s:s + _STEP].astype("S20")).cast(pa.string()), "-"))
    return pa.chunked_array(chunks, pa.string())


def split_rows(row_id: np.ndarray, y: np.ndarray, fraction: float, folds: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Stratified holdout and fold assignment from seeded hashes of the row ids."""
    key = _hash_key("holdout", seed)
    # hashed a step at a time: a string array becomes Python objects only one step at a time
    u = np.concatenate([pd.util.hash_array(np.asarray(row_id[s:s + _STEP], dtype=None if isinstance(row_id, np.ndarray) else object),
                                           hash_key=key) for s in range(0, len(row_id), _STEP)] or [np.empty(0, np.uint64)])
    order = np.lexsort((u, y))  # by class, then hash
    counts = np.bincount(y)
    starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
    rank = np.empty(len(y), dtype=np.int64)
    rank[order] = np.arange(len(y)) - np.repeat(starts, counts)
    n_hold = np.maximum(1, np.round(fraction * counts).astype(np.int64))
    holdout = rank < n_hold[y]
    fold = ((rank - n_hold[y]) % folds).astype(np.int8)
    fold[holdout] = -1
    return holdout, fold


def _segment_codes(table: pa.Table, names: list[str], path: Path) -> np.ndarray | None:
    if not names:
        return None
    codes = [pd.factorize(table.column(n).to_pandas(), use_na_sentinel=False, sort=True)[0] for n in names]
    return np.column_stack(codes).astype(np.int32)


def release_memory() -> None:
    """Hand memory freed by a whole-table pass back to the system: Arrow's pool keeps decoded row
    groups, and glibc's heap keeps freed batch-sized blocks unless trimmed (no-op elsewhere)."""
    pa.default_memory_pool().release_unused()
    try:
        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


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
        """The rows at ``indices`` (positions in table order), every column."""
        indices = pa.array(np.asarray(indices, dtype=np.int64))
        try:
            table = self.dataset.take(indices)
        except (pa.ArrowInvalid, OSError) as exc:
            raise _unreadable(self.path, exc) from None
        if self.row_id is not None:
            table = table.append_column("row_id", self.row_id.take(indices))
        return table

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


def load_table(config: Config) -> RowFrame:
    """Read and check the configured table in record batches and turn it into a :class:`RowFrame`.

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
    dataset = _dataset(path)
    numeric, categorical = _feature_columns(dataset.schema, config, path)
    head_cols = [c for c in (inp.label, inp.id, *RESERVED, *inp.segments) if c is not None and c in dataset.schema.names]
    head = _read(dataset, path, list(dict.fromkeys(head_cols)))
    _check_label_and_id(head, config, path)

    used = [c for c in (*numeric, *categorical, inp.label, inp.id) if c is not None]
    n, n_features = head.num_rows, len(numeric) + len(categorical)
    in_memory = n * n_features * 4 <= ex.feature_memory_mb * 2**20
    source = TableSource(dataset, path, None, ex.batch_rows)
    hashes, uniques, blocks, cat_cols = [], {name: set() for name in categorical}, [], {name: [] for name in categorical}
    feature_hashes = []
    for batch in source.batches(used):
        df = batch.to_pandas()
        hashes.append(_row_hashes(df))
        block = encode_columns(df, numeric, [], {})
        cats = pd.DataFrame({name: df[name].astype("string") for name in categorical}, index=df.index)
        # same values, same hash: float32 numbers and category strings (one code per string)
        feature_hashes.append(_row_hashes(pd.concat([pd.DataFrame(block, index=df.index), cats], axis=1)))
        for name in categorical:
            uniques[name].update(cats[name].dropna().unique().tolist())
            if in_memory:
                cat_cols[name].append(cats[name])
        if in_memory:
            blocks.append(block)
    release_memory()  # the pass's decoded row groups and batch frames
    content = np.concatenate(hashes) if hashes else np.empty(0, np.uint64)
    schema = pa.schema([dataset.schema.field(c) for c in used])
    digest = hashlib.sha256(str(schema).encode())
    digest.update(content)
    fingerprint = digest.hexdigest()[:32]
    categories = {name: sorted(uniques[name]) for name in categorical}
    X = None
    if in_memory:
        X = np.empty((n, n_features), dtype=np.float32)
        X[:, :len(numeric)] = np.concatenate(blocks) if blocks else np.empty((0, len(numeric)), np.float32)
        del blocks
        if categorical:
            cats = pd.DataFrame({name: pd.concat(cat_cols[name], ignore_index=True) for name in categorical})
            X[:, len(numeric):] = encode_columns(cats, [], categorical, categories)
    if inp.id is None:
        ids = source.row_id = _derive_ids(content)
    else:
        ids = head.column(inp.id)
        if not (pa.types.is_string(ids.type) or pa.types.is_large_string(ids.type)):
            ids = pa.chunked_array([pa.array(ids.to_pandas().astype(str), pa.string())])
    row_id = pd.arrays.ArrowStringArray(ids.cast(pa.string()))

    label = head.column(inp.label).to_pandas()
    kind = task(head, config)
    if kind == "regression":
        classes, y = [], label.to_numpy(np.float64)
        bins = label_bins(y)
    else:
        classes = sorted(label.unique().tolist(), key=lambda v: (str(type(v)), v))
        y = pd.Categorical(label, categories=classes).codes.astype(np.int32)
        bins = None

    holdout, fold = split_rows(row_id, y if bins is None else bins, config.holdout.fraction, config.proxy.folds, config.seed)
    release_memory()
    return RowFrame(
        row_id=row_id, y=y, classes=classes, X=X,
        feature_names=numeric + categorical,
        categorical=list(range(len(numeric), len(numeric) + len(categorical))),
        categories=categories, holdout=holdout, fold=fold,
        fingerprint=fingerprint, source=source,
        feature_hash=np.concatenate(feature_hashes) if feature_hashes else np.empty(0, np.uint64),
        segments=_segment_codes(head, config.input.segments, path), segment_names=tuple(config.input.segments),
        task=kind, bins=bins,
    )
