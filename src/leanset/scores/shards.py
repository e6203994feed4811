"""The input table on a Dask cluster's workers, for :mod:`leanset.scores.cluster`.

The parquet files are cut into partitions of whole row groups (:func:`partitions`), sliced to at
most ``execution.batch_rows`` rows and spread over the workers; each worker reads its partitions
and encodes them into float32 features as the load stage does (:func:`read_partition`), keeping
the training rows. A partition's place in table order is its row offset, so its training rows
are one contiguous slice of ``frame.train``; :class:`Shards` holds the futures of those slices.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import dask.array as da
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq
from distributed import Client, Future

from ..config import Config
from ..errors import ConfigError, InputError
from ..load.rows import RowFrame, encode_columns


@dataclass(frozen=True)
class Partition:
    """Rows ``start`` .. ``start + rows`` of the table (in load order): row groups of one parquet
    file, read whole, of which the partition skips the first ``skip`` rows."""

    path: str
    row_groups: tuple[int, ...]
    skip: int
    rows: int
    start: int


def partitions(path, size: int) -> list[Partition]:
    """Cut the parquet file or folder at ``path`` into partitions of at most ``size`` rows, in table order."""
    out, start = [], 0
    for fragment in ds.dataset(path, format="parquet").get_fragments():
        sizes = np.array([g.num_rows for g in fragment.row_groups], np.int64)
        ends = np.cumsum(sizes)
        total = int(sizes.sum())
        for a in range(0, total, size):
            b = min(a + size, total)
            first, last = int(np.searchsorted(ends, a, side="right")), int(np.searchsorted(ends, b - 1, side="right"))
            out.append(Partition(fragment.path, tuple(range(first, last + 1)), a - int(ends[first] - sizes[first]), b - a, start + a))
        start += total
    return out


def read_partition(part: Partition, frame_spec: dict, y: np.ndarray, keep: np.ndarray) -> np.ndarray:
    """Read ``part`` and return the features of its rows ``keep`` (a worker task).

    ``y`` holds the label codes (or values) the load stage gave the partition's rows; the rows read
    must carry the same labels, or the file changed since the load stage.
    """
    label = frame_spec["label"]
    table = pq.ParquetFile(part.path).read_row_groups(list(part.row_groups), columns=[*frame_spec["feature_names"], label])
    table = table.slice(part.skip, part.rows)
    values = table.column(label).to_pandas()
    read = values.to_numpy(np.float64) if frame_spec["regression"] else pd.Categorical(values, categories=frame_spec["classes"]).codes
    if len(read) != len(y) or not np.array_equal(read, y):
        raise InputError(f"{part.path}: rows {part.start}..{part.start + part.rows - 1} differ from the table the load stage read; rerun so both stages read the same file")
    names, k = frame_spec["feature_names"], frame_spec["n_numeric"]
    return encode_columns(table.take(pa.array(keep, pa.int64())).to_pandas(), names[:k], names[k:], frame_spec["categories"])


def _take(X: np.ndarray, rows: np.ndarray) -> np.ndarray:
    return X[rows]


@dataclass
class Shards:
    """The training rows' features, held on the workers: shard i is rows ``bounds[i]`` of ``frame.train`` order."""

    client: Client
    futures: list[Future]
    workers: list[str]
    bounds: list[tuple[int, int]]
    n_features: int

    def fit_data(self, rows: np.ndarray, labels: np.ndarray) -> tuple[Any, Any]:
        """Dask arrays of the features and ``labels`` of the rows where ``rows`` (bool, train order) is set."""
        xs, ys = [], []
        for fut, worker, (lo, hi) in zip(self.futures, self.workers, self.bounds):
            sel = np.flatnonzero(rows[lo:hi])
            if len(sel) == 0:
                continue
            x = self.client.submit(_take, fut, sel, workers=[worker], allow_other_workers=False)
            [y] = self.client.scatter([labels[lo:hi][sel]], workers=[worker])
            xs.append(da.from_delayed(x, shape=(len(sel), self.n_features), dtype=np.float32))
            ys.append(da.from_delayed(y, shape=(len(sel),), dtype=labels.dtype))
        return da.concatenate(xs), da.concatenate(ys)

    def broadcast(self, value: Any) -> Future:
        """``value`` copied to every worker once, for tasks to share."""
        [future] = self.client.scatter([value], broadcast=True)
        return future

    def map(self, fn, *per_row: np.ndarray, **shared) -> list:
        """``fn(X_shard, *slices, **shared)`` on every shard's worker, ``per_row`` arrays sliced to the shard; results in order."""
        futures = [self.client.submit(fn, fut, *(a[lo:hi] for a in per_row), **shared, workers=[worker], allow_other_workers=False)
                   for fut, worker, (lo, hi) in zip(self.futures, self.workers, self.bounds)]
        return self.client.gather(futures)


def load_shards(client: Client, frame: RowFrame, config: Config) -> Shards:
    """Read the input on the workers: the training rows' features, partition by partition.

    Raises
    ------
    InputError
        When the files hold another number of rows than ``frame``.
    """
    workers = sorted(client.scheduler_info(n_workers=-1)["workers"])
    if not workers:
        raise ConfigError(f"execution.address: the scheduler at {config.execution.address} has no workers; start some, or leave execution.address unset for a local cluster")
    n = len(frame.row_id)
    parts = partitions(config.input.path, max(1, min(config.execution.batch_rows, math.ceil(n / len(workers)))))
    total = sum(p.rows for p in parts)
    if total != n:
        raise InputError(f"{config.input.path}: holds {total} rows but the load stage read {n}; rerun so both stages read the same files")
    spec = {"label": config.input.label, "feature_names": frame.feature_names, "n_numeric": len(frame.feature_names) - len(frame.categorical),
            "categories": frame.categories, "classes": frame.classes, "regression": not frame.classes}
    [spec] = client.scatter([spec], broadcast=True)
    futures, placed, bounds, lo = [], [], [], 0
    for i, part in enumerate(parts):
        keep = np.flatnonzero(~frame.holdout[part.start:part.start + part.rows])
        worker = workers[i % len(workers)]
        futures.append(client.submit(read_partition, part, spec, frame.y[part.start:part.start + part.rows], keep,
                                     workers=[worker], allow_other_workers=False))
        placed.append(worker)
        bounds.append((lo, lo + len(keep)))
        lo += len(keep)
    return Shards(client, futures, placed, bounds, len(frame.feature_names))
