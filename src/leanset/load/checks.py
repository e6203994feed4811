"""Load stage, the checks: read the table's schema and label, refuse what does not fit the config, tell the task.

Everything here runs before any fit (through :func:`leanset.load.table.check_input`, which preflight calls);
:mod:`leanset.load.table` builds the :class:`~leanset.load.rows.RowFrame` from the same reads.
"""

from __future__ import annotations

from pathlib import Path
from typing import NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.dataset as ds

from ..config import REGRESSION_METRICS, Config
from ..errors import ConfigError, InputError

RESERVED = ("weight",)


def _dataset(path: Path, table: pa.Table | None = None) -> ds.Dataset:
    """The table at ``path`` as an Arrow dataset, refused when it is missing, unreadable or empty;
    ``table``, an Arrow table in memory, stands in for it when given."""
    if table is not None:
        return ds.dataset(table)
    if not path.exists():
        raise InputError(f"input.path: {path} not found; point input.path at a parquet file, a folder of parquet files or a CSV file")
    try:
        if path.is_file() and path.suffix.lower() in (".csv", ".tsv", ".txt"):
            parse = pacsv.ParseOptions(delimiter="\t" if path.suffix.lower() == ".tsv" else ",")
            dataset = ds.dataset(pacsv.read_csv(path, parse_options=parse))
        else:
            dataset = ds.dataset(path, format="parquet")
        if path.is_dir() and not dataset.files:
            raise InputError(f"input.path: {path} is a folder without parquet files; put the table's files in it or point input.path at the table")
        rows = dataset.count_rows()
    except (pa.ArrowInvalid, pa.ArrowTypeError, OSError) as exc:
        first = str(exc).splitlines()[0]
        raise InputError(f"{path}: cannot be read as parquet or CSV ({first}); check that the file is complete and in one of those formats") from None
    if rows == 0:
        raise InputError(f"{path}: the table has no rows; point input.path at a table that holds data")
    return dataset


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
    if inp.label not in schema.names:
        raise InputError(f"{path}: label column '{inp.label}' not found (columns: {', '.join(schema.names[:20])}); fix input.label")
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


#: Most distinct values a label of whole numbers may hold to be taken as classes when ``input.task``
#: is ``auto``; above it the task is ambiguous and the label is refused (common practice, no source:
#: a class label with more values than this is more often a count or a measurement).
MAX_AUTO_CLASSES = 50


def task(table: pa.Table, config: Config) -> str:
    """The task of the table's label: ``input.task`` when set, else inferred.

    With ``input.task: auto``, a regression metric (``verify.metric`` rmse, mae or r2) means
    regression; a float label holding non-integer values means regression; strings, booleans and
    whole numbers (integers, or floats holding whole numbers) with at most :data:`MAX_AUTO_CLASSES`
    distinct values mean classification.

    Raises
    ------
    ConfigError
        When a label of whole numbers holds more than :data:`MAX_AUTO_CLASSES` distinct values:
        the config must say which task it means.
    """
    inp = config.input
    if inp.task != "auto":
        return inp.task
    if config.verify.metric in REGRESSION_METRICS:
        return "regression"
    label = table.column(inp.label)
    t = label.type
    if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)):
        return "classification"
    vals = label.to_numpy().astype(np.float64) if not pa.types.is_decimal(t) else label.cast(pa.float64()).to_numpy()
    if np.any(np.isfinite(vals) & (vals != np.round(vals))):
        return "regression"
    distinct = len(pc.unique(label.combine_chunks()))
    if distinct > MAX_AUTO_CLASSES:
        raise ConfigError(f"input.label: '{inp.label}' holds {distinct} distinct whole numbers (more than {MAX_AUTO_CLASSES} "
                          "for classes by default); set input.task: regression and verify.metric: rmse to predict it as a number, "
                          "or input.task: classification to keep each value as a class")
    return "classification"


def _check_continuous_label(label, config: Config, path: Path) -> None:
    t = label.type
    if not (pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t)):
        if config.input.task == "auto" and config.verify.metric in REGRESSION_METRICS:
            raise ConfigError(f"verify.metric: {config.verify.metric} is a regression metric but label column '{config.input.label}' "
                              f"holds classes (type {t}); use a classification metric such as accuracy, or a numeric label")
        raise InputError(f"{path}: label column '{config.input.label}' has type {t}; input.task regression needs a numeric label")
    if not np.all(np.isfinite(label.to_numpy().astype(np.float64))):
        raise InputError(f"{path}: label column '{config.input.label}' has infinite or NaN values; fill or drop those rows")
    need = LABEL_BINS * (config.proxy.folds + 1)
    if len(label) < need:
        raise InputError(f"{path}: regression label '{config.input.label}' has {len(label)} rows; it needs at least {need} ({LABEL_BINS} label-quantile bins, each split into a holdout and {config.proxy.folds} proxy folds); lower proxy.folds")
    if config.selection.score in ("confidence", "aleatoric", "oof_entropy"):
        raise ConfigError(f"selection.score: {config.selection.score} has no regression analogue; use aum, el2n, forgetting, correctness, variability, oof_loss or oof_margin")
    metric = config.verify.metric
    if metric not in REGRESSION_METRICS and "metric" in config.verify.model_fields_set:
        raise ConfigError(f"verify.metric: {metric} is a classification metric but '{config.input.label}' is a regression label; use rmse, mae or r2")


def label_bins(y: np.ndarray, bins: int = LABEL_BINS) -> np.ndarray:
    """Quantile bin (0..bins-1) of each continuous label value, ties kept together."""
    ranks = pd.Series(y).rank(method="min").to_numpy()
    return np.minimum(((ranks - 1) * bins / len(y)).astype(np.int32), bins - 1)


class InputSummary(NamedTuple):
    """What :func:`check_input` learned of the table: enough to check the models' settings."""

    task: str
    rows: int
    n_classes: int
    n_features: int
    n_categorical: int


def _refuse_infinite(counts: dict[str, int], first_row: dict[str, int], path: Path) -> None:
    """Refuse infinite feature values, naming the first column that holds them and its count."""
    bad = [name for name, k in counts.items() if k]
    if bad:
        name = bad[0]
        more = f" (and {len(bad) - 1} more columns)" if len(bad) > 1 else ""
        raise InputError(f"{path}: feature column '{name}' holds {counts[name]} infinite values, the first in row {first_row[name]}{more}; "
                         f"replace them with NaN (read as missing) or finite numbers, or add '{name}' to input.exclude")


def _count_infinite(batch, names: list[str], start: int, counts: dict[str, int], first_row: dict[str, int]) -> None:
    """Add the infinite values of the float columns ``names`` of ``batch`` (rows from ``start``) to ``counts``."""
    for name in names:
        inf = pc.is_inf(batch.column(name))
        k = pc.sum(inf).as_py() or 0
        if k and not counts[name]:
            first_row[name] = start + int(np.flatnonzero(inf.to_numpy(zero_copy_only=False))[0])
        counts[name] += k
