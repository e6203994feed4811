"""Python API on in-memory tables: :class:`RowPruner` (scikit-learn style) and :func:`prune` (the whole job).

Both read pandas, polars or Arrow tables (and numpy arrays for ``RowPruner``) through the load
stage's in-memory entry point, so nothing is written to disk before the run's own outputs.

>>> from sklearn.datasets import load_breast_cancer
>>> X, y = load_breast_cancer(return_X_y=True, as_frame=True)
>>> X_kept, y_kept = RowPruner(fraction=0.3).fit_resample(X, y)
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
from sklearn.base import BaseEstimator

from .config import Config, load_config, parse_config
from .errors import ConfigError, LeansetError

#: Where ``run.json`` and the manifest say the input was when it came from memory.
IN_MEMORY = "<in-memory table>"
#: Column names the estimator gives the label and the groups inside its working table.
_LABEL, _GROUPS = "__leanset_label__", "__leanset_groups__"
#: Short names accepted by :func:`prune` for the config keys users set most.
ALIASES = {"fraction": "selection.fraction", "strategy": "selection.strategy", "score": "selection.score",
           "metric": "verify.metric", "tolerance": "verify.tolerance", "id": "input.id", "task": "input.task",
           "segments": "input.segments", "seed": "seed", "store": "store"}


class PrunerInputError(LeansetError, ValueError):
    """Bad data or parameters given to :class:`RowPruner` (a ``ValueError``, as scikit-learn expects)."""


def to_arrow(data: Any, what: str = "X") -> pa.Table:
    """An Arrow table of a pandas or polars data frame, an Arrow table or record batch, or a 2-D array
    (whose columns are named ``x0``, ``x1``, …)."""
    if isinstance(data, pa.Table):
        return data
    if isinstance(data, pa.RecordBatch):
        return pa.Table.from_batches([data])
    if isinstance(data, pd.DataFrame):
        return pa.Table.from_pandas(data.set_axis([str(c) for c in data.columns], axis=1), preserve_index=False)
    if type(data).__module__.startswith("polars") and hasattr(data, "to_arrow"):
        return data.to_arrow()
    if hasattr(data, "toarray") or hasattr(data, "tocsr"):
        raise PrunerInputError(f"{what} is a sparse matrix; leanset needs dense features (call .toarray() if it fits in memory)")
    arr = np.asarray(data)
    if arr.dtype.kind == "c":
        raise PrunerInputError(f"{what}: Complex data not supported; give real-valued features")
    if arr.ndim != 2:
        raise PrunerInputError(f"{what} must be 2-D (rows × features), got an array of shape {arr.shape}; "
                               "reshape a single feature with X.reshape(-1, 1)")
    if arr.shape[1] == 0:
        raise PrunerInputError(f"{what} has 0 feature(s) (shape={arr.shape}) while a minimum of 1 is required.")
    return pa.table({f"x{j}": arr[:, j] for j in range(arr.shape[1])})


def _column(values: Any, what: str) -> pa.Array | pa.ChunkedArray:
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        return values
    if isinstance(values, pd.Series):
        return pa.Array.from_pandas(values)
    if type(values).__module__.startswith("polars") and hasattr(values, "to_arrow"):
        return values.to_arrow()
    arr = np.asarray(values)
    if arr.ndim == 2 and arr.shape[1] == 1:
        arr = arr.ravel()
    if arr.ndim != 1:
        raise PrunerInputError(f"{what} must be 1-D, got shape {arr.shape}")
    return pa.array(arr)


def take_rows(data: Any, mask: np.ndarray) -> Any:
    """The rows of ``data`` where ``mask`` is true, in ``data``'s own type (pandas, polars, Arrow, numpy)."""
    if isinstance(data, (pd.DataFrame, pd.Series)):
        return data.iloc[np.flatnonzero(mask)]
    if isinstance(data, (pa.Table, pa.RecordBatch, pa.Array, pa.ChunkedArray)):
        return data.filter(pa.array(mask))
    if type(data).__module__.startswith("polars"):
        import polars as pl

        return data.filter(pl.Series(mask))
    return np.asarray(data)[mask]


class RowPruner(BaseEstimator):
    """Keep a fraction of the rows of a labeled table, chosen from a cheap proxy's training dynamics.

    A resampler in imbalanced-learn's sense: :meth:`fit_resample` returns the kept rows. The proxy
    is cross-fitted over every row (there is no holdout: verify the model you train on the kept
    rows on your own test set, or use :func:`prune`, which does).

    Parameters
    ----------
    fraction : float, default 0.3
        Share of the rows to keep, in (0, 1].
    strategy : {"stratified", "hardest", "easiest", "random"}, default "stratified"
    proxy : str or dict, optional
        The proxy's family (``"gbdt"`` or ``"linear"``), or a mapping of ``proxy`` config keys
        (e.g. ``{"rounds": 30, "folds": 3}``).
    seed : int, default 0
        Seeds every random choice.
    selection : dict, optional
        More ``selection`` config keys (``score``, ``quotas``, ``class_floor``, ``dedupe``, …).

    Attributes
    ----------
    keep_ : ndarray of bool, shape (n_samples,)
    sample_weight_ : ndarray of float, shape (n_samples,)
        Training weight of each kept row (0 on dropped rows), times ``sample_weight`` when given.
    scores_ : pandas.DataFrame
        Every score of every row (``aum``, ``forgetting``, ``el2n``, …, ``suspect_label``).
    reason_ : ndarray of str, shape (n_samples,)
        Reason code of each decision (``keep:stratum``, ``drop:over_budget``, …).
    row_id_ : ndarray of str, shape (n_samples,)
        Row ids derived from each row's content.
    classes_ : ndarray
        The label's classes (empty for a regression label).
    n_features_in_ : int
    feature_names_in_ : ndarray of str
        Only when ``X`` has column names.
    selection_info_ : dict
        Budget, quotas per class, duplicates.
    """

    def __init__(self, fraction: float = 0.3, strategy: str = "stratified", proxy: str | dict | None = None,
                 seed: int = 0, selection: dict | None = None):
        self.fraction = fraction
        self.strategy = strategy
        self.proxy = proxy
        self.seed = seed
        self.selection = selection

    def _config(self, segments: list[str]) -> Config:
        if self.fraction == "auto":
            raise PrunerInputError("fraction='auto' needs a verified target; use leanset.prune, or give a number in (0, 1]")
        proxy = {"family": self.proxy} if isinstance(self.proxy, str) else dict(self.proxy or {})
        raw = {"input": {"path": IN_MEMORY, "label": _LABEL, "segments": segments},
               "proxy": proxy, "selection": {**(self.selection or {}), "fraction": self.fraction, "strategy": self.strategy},
               "seed": self.seed}
        try:
            return parse_config(raw, source="RowPruner")
        except ConfigError as exc:
            raise PrunerInputError(str(exc)) from None

    def fit(self, X: Any, y: Any, sample_weight: Any = None, groups: Any = None) -> RowPruner:
        """Score every row with the cross-fitted proxy and decide which to keep.

        Parameters
        ----------
        X : pandas or polars DataFrame, Arrow table, or array of shape (n_samples, n_features)
            Numeric and string (categorical) columns.
        y : array-like of shape (n_samples,)
            Classes (strings, integers, booleans) or, for regression, numbers.
        sample_weight : array-like of shape (n_samples,), optional
            Multiplied into ``sample_weight_``; the proxy itself is trained unweighted.
        groups : array-like of shape (n_samples,), optional
            A group per row (a segment): each group keeps at least ``selection.segment_floor``
            rows where it has them.

        Returns
        -------
        self
        """
        from .load.table import load_table
        from .scores.dynamics import score
        from .select.frame import select_frame

        table, names, weight = _fit_table(X, y, sample_weight, groups)
        config = self._config([_GROUPS] if groups is not None else [])
        if groups is not None:
            config = config.model_copy(update={"input": config.input.model_copy(update={"exclude": [_GROUPS]})})
        try:
            frame = load_table(config, table, holdout=False)
            scores = score(frame, config)
            selection = select_frame(frame, scores, config)
        except LeansetError as exc:
            raise PrunerInputError(str(exc).replace(f"{IN_MEMORY}: ", "").replace(_LABEL, "y")) from None
        self.keep_ = selection.keep.copy()
        self.sample_weight_ = selection.weight * (1.0 if weight is None else weight)
        self.scores_ = scores.table.copy()
        self.reason_ = np.asarray(selection.reason, dtype=str)
        self.row_id_ = np.asarray(frame.row_id, dtype=str)
        self.classes_ = np.asarray(frame.classes)
        self.selection_info_ = selection.info
        self.n_features_in_ = len(names)
        if not isinstance(X, np.ndarray) and not isinstance(X, list):
            self.feature_names_in_ = np.asarray(names, dtype=object)
        return self

    def fit_resample(self, X: Any, y: Any, **fit_params) -> tuple[Any, Any]:
        """Fit, then return the kept rows of ``X`` and ``y``, each in its own type.

        Returns
        -------
        X_kept, y_kept
        """
        self.fit(X, y, **fit_params)
        return take_rows(X, self.keep_), take_rows(y, self.keep_)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True       # LightGBM routes missing values
        tags.input_tags.string = True          # string columns are categorical features
        tags.input_tags.categorical = True
        tags.target_tags.required = True
        tags.non_deterministic = False
        return tags


@dataclass(frozen=True)
class PruneResult:
    """The outcome of :func:`prune`: its run directory and what it holds.

    Attributes
    ----------
    run_dir : Path
    run : dict
        ``run.json``: counts, selection, verdict, timings, …
    """

    run_dir: Path
    run: dict

    @property
    def verdict(self) -> dict:
        """The verify stage's verdict: ``status`` (pass, fail or inconclusive), ``delta``, ``ci``, metrics."""
        return self.run["verdict"]

    @property
    def status(self) -> str:
        """``pass``, ``fail`` or ``inconclusive``."""
        return self.verdict["status"]

    @property
    def kept(self) -> pd.DataFrame:
        """The kept rows with every original column, plus ``weight`` and ``dup_count``."""
        return pd.read_parquet(self.run_dir / "kept.parquet")

    @property
    def manifest(self) -> pd.DataFrame:
        """One row per input row: id, split, label, decision, reason, stratum, weight, every score."""
        return pd.read_parquet(self.run_dir / "manifest.parquet")

    def __repr__(self) -> str:
        c = self.run["counts"]
        return f"PruneResult({self.status}: kept {c['kept']:,} of {c['train']:,} training rows, run_dir={str(self.run_dir)!r})"


def _overrides(overrides: dict[str, Any]) -> dict[str, Any]:
    """``fraction=0.2`` or ``selection__fraction=0.2`` as the dotted key ``selection.fraction``."""
    out = {}
    for key, value in overrides.items():
        dotted = ALIASES.get(key, key.replace("__", "."))
        out[dotted] = str(value) if dotted == "store" and isinstance(value, Path) else value
    return out


def prune(data: Any, label: str | None = None, config: str | Path | dict | Config | None = None,
          cache: bool = True, **overrides: Any) -> PruneResult:
    """The whole job, without Prefect: load, score, select, verify, write a run into the store.

    Parameters
    ----------
    data : str, Path, pandas or polars DataFrame, or Arrow table
        A parquet file, folder of parquet files or CSV file, or the rows in memory.
    label : str, optional
        The label column (``input.label``); needed unless ``config`` names it.
    config : str, Path, dict or Config, optional
        A YAML config file, a mapping of its sections, or a validated config; defaults apply to
        what it leaves out. Its ``input.path`` is replaced by ``data``.
    cache : bool, default True
        Reuse scores of the same rows and proxy settings from the store's cache.
    **overrides
        Config keys: ``fraction``, ``strategy``, ``score``, ``metric``, ``tolerance``, ``id``,
        ``task``, ``segments``, ``seed``, ``store``, or any ``section__key`` (``proxy__rounds=30``).

    Returns
    -------
    PruneResult

    Raises
    ------
    LeansetError
        Bad config or table, before anything is written.
    """
    from .flows import PLAIN, run_stages
    from .preflight import preflight

    table = None if isinstance(data, (str, Path)) else to_arrow(data, "data")
    dotted = {**_overrides(overrides), "input.label": label,
              "input.path": IN_MEMORY if table is not None else str(Path(data).resolve())}
    if isinstance(config, Config):
        config = config.model_dump(mode="json")
    if isinstance(config, (str, Path)):
        cfg = load_config(config, dotted)
    else:
        cfg = parse_config(json.loads(json.dumps(config or {}, default=str)), dotted, source="leanset.prune")
    if cfg.execution.engine != "local":
        raise ConfigError("execution.engine: leanset.prune runs locally; run leanset.flows.prune_flow for the dask engine")
    preflight(cfg, table)
    run_dir = Path(run_stages(cfg, PLAIN, use_cache=cache, table=table))
    return PruneResult(run_dir, json.loads((run_dir / "run.json").read_text()))


def _fit_table(X: Any, y: Any, sample_weight: Any, groups: Any) -> tuple[pa.Table, list[str], np.ndarray | None]:
    """The checked input of :meth:`RowPruner.fit` as one Arrow table (features, label, groups), the feature
    names and the weights; raises :class:`PrunerInputError` on what scikit-learn's conventions refuse."""
    if y is None:
        raise PrunerInputError("RowPruner requires y to be passed, but the target y is None")
    table = to_arrow(X)
    if table.num_columns == 0:
        raise PrunerInputError(f"X has 0 feature(s) (shape=({table.num_rows}, 0)) while a minimum of 1 is required.")
    if table.num_rows < 2:
        raise PrunerInputError(f"X has {table.num_rows} sample(s); pruning needs rows of at least two classes")
    label = _column(y, "y")
    if len(label) != table.num_rows:
        raise PrunerInputError(f"X has {table.num_rows} rows but y has {len(label)} values")
    if _LABEL in table.column_names or _GROUPS in table.column_names:
        raise PrunerInputError(f"X has a column named {_LABEL} or {_GROUPS}; rename it")
    names = table.column_names
    table = table.append_column(_LABEL, label)
    if groups is not None:
        table = table.append_column(_GROUPS, _column(groups, "groups"))
    weight = None if sample_weight is None else np.asarray(sample_weight, dtype=np.float64).ravel()
    if weight is not None and len(weight) != table.num_rows:
        raise PrunerInputError(f"sample_weight has {len(weight)} values for {table.num_rows} rows")
    if weight is not None and (np.any(weight < 0) or not np.any(weight > 0)):
        raise PrunerInputError("sample_weight must be non-negative and not all zero")
    return table, names, weight
