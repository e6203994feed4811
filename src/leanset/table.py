"""Load stage: read the table, check it, derive row ids, split off the holdout, assign folds.

The holdout and the folds are drawn from seeded hashes of the row ids, per class, so they do
not depend on row order or on how the table is cut into files.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.dataset as ds

from .config import Config
from .errors import InputError

#: Columns leanset adds to its outputs; an input column of the same name would be shadowed.
RESERVED = ("weight",)


@dataclass(frozen=True)
class RowFrame:
    """The checked, typed table every later stage works on.

    Attributes
    ----------
    row_id : ndarray of str, shape (n,)
    y : ndarray of int32, shape (n,)
        Label codes, indices into ``classes``.
    classes : list
        The label values, sorted.
    X : ndarray of float32, shape (n, n_features)
        Numeric features as given, categorical features as integer codes (NaN for missing).
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
    source : pyarrow.Table
        The original columns (plus ``row_id`` when it was derived), for writing kept rows.
    """

    row_id: np.ndarray
    y: np.ndarray
    classes: list
    X: np.ndarray
    feature_names: list[str]
    categorical: list[int]
    categories: dict[str, list]
    holdout: np.ndarray
    fold: np.ndarray
    fingerprint: str
    source: pa.Table

    @property
    def train(self) -> np.ndarray:
        """Indices of the training rows (those that may be pruned)."""
        return np.flatnonzero(~self.holdout)


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


def _read(dataset: ds.Dataset, path: Path, columns: list[str] | None = None) -> pa.Table:
    try:
        return dataset.to_table(columns=columns)
    except (pa.ArrowInvalid, OSError) as exc:
        first = str(exc).splitlines()[0]
        raise InputError(f"{path}: cannot be read ({first}); check that the file is complete and not corrupt") from None


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
    if not numeric and not categorical:
        raise InputError(f"{path}: no feature columns besides the label and id; add feature columns or fix input.features")
    return numeric, categorical


def _check_label_and_id(table: pa.Table, config: Config, path: Path) -> None:
    inp = config.input
    if inp.label not in table.column_names:
        raise InputError(f"{path}: label column '{inp.label}' not found (columns: {', '.join(table.column_names[:20])}); fix input.label")
    label = table.column(inp.label)
    if label.null_count:
        raise InputError(f"{path}: label column '{inp.label}' has {label.null_count} missing values; fill or drop those rows")
    t = label.type
    if pa.types.is_floating(t):
        vals = label.to_numpy()
        if not np.all(np.isfinite(vals)) or not np.all(vals == np.round(vals)):
            raise InputError(f"{path}: label column '{inp.label}' holds continuous values; leanset classifies, so give it class labels")
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


def _derive_ids(content: np.ndarray) -> np.ndarray:
    occurrence = pd.Series(content).groupby(content).cumcount().to_numpy()
    return np.array([f"{h:016x}-{k}" for h, k in zip(content.tolist(), occurrence.tolist())], dtype=object)


def _split(row_id: np.ndarray, y: np.ndarray, fraction: float, folds: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Stratified holdout and fold assignment from seeded hashes of the row ids."""
    u = pd.util.hash_array(row_id, hash_key=_hash_key("holdout", seed))
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


def load_table(config: Config) -> RowFrame:
    """Read and check the configured table and turn it into a :class:`RowFrame`.

    Raises
    ------
    InputError
        When the table does not fit the config (see :func:`check_input`).
    """
    path = config.input.path
    dataset = _dataset(path)
    numeric, categorical = _feature_columns(dataset.schema, config, path)
    table = _read(dataset, path)
    _check_label_and_id(table, config, path)
    inp = config.input

    used = [c for c in (*numeric, *categorical, inp.label, inp.id) if c is not None]
    df = table.select(used).to_pandas()
    content = _row_hashes(df)
    fingerprint = hashlib.sha256(str(table.select(used).schema).encode() + content.tobytes()).hexdigest()[:32]
    if inp.id is None:
        row_id = _derive_ids(content)
        source = table.append_column("row_id", pa.array(row_id, pa.string()))
    else:
        row_id = df[inp.id].astype(str).to_numpy(dtype=object)
        source = table

    label = df[inp.label]
    classes = sorted(label.unique().tolist(), key=lambda v: (str(type(v)), v))
    y = pd.Categorical(label, categories=classes).codes.astype(np.int32)

    X = np.empty((len(df), len(numeric) + len(categorical)), dtype=np.float32)
    for j, name in enumerate(numeric):
        X[:, j] = pd.to_numeric(df[name], errors="coerce").astype("float64").to_numpy(na_value=np.nan)
    categories: dict[str, list] = {}
    for j, name in enumerate(categorical, start=len(numeric)):
        cat = pd.Categorical(df[name].astype("string"))
        categories[name] = [str(c) for c in cat.categories]
        codes = cat.codes.astype(np.float32)
        codes[codes < 0] = np.nan
        X[:, j] = codes

    holdout, fold = _split(row_id, y, config.holdout.fraction, config.proxy.folds, config.seed)
    return RowFrame(
        row_id=row_id, y=y, classes=classes, X=X,
        feature_names=numeric + categorical,
        categorical=list(range(len(numeric), len(numeric) + len(categorical))),
        categories=categories, holdout=holdout, fold=fold,
        fingerprint=fingerprint, source=source,
    )
