"""Invented tables for the benchmarks: a seeded random linear rule with Gumbel label noise.

The rows are drawn in fixed-size chunks, each from its own seeded generator, so the same seed gives the
same rows however the table is cut into files, and a smaller table is the first rows of a larger one.
:func:`make_table` builds the table in memory; :func:`write_table` writes it as parquet files chunk by chunk.
"""

from __future__ import annotations

import json
import shutil
import time
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from ..config import ExecutionConfig
from ..errors import ConfigError
from ..load.rows import RowFrame
from ..load.split import split_rows
from ..load.table import TableSource

#: Rows drawn per generator chunk. Fixed: the data depend on it, never on the number of files.
CHUNK_ROWS = 100_000
#: Most rows per parquet file when the number of files is not given.
FILE_ROWS = 1_000_000
#: Written beside the parquet files of a generated table (the leading ``_`` keeps readers off it).
META_NAME = "_leanset_table.json"
#: Version of the generator; a table written by another version is not reused.
GENERATOR = 1


def _rule(features: int, classes: int, seed: int) -> np.ndarray:
    """The seeded linear rule (features × classes weights) that labels every chunk."""
    return np.random.default_rng([seed, 0xBE7C]).standard_normal((features, classes)).astype(np.float32)


def table_chunks(rows: int, features: int, classes: int, seed: int = 0) -> Iterator[tuple[int, np.ndarray, np.ndarray]]:
    """The invented table, ``CHUNK_ROWS`` rows at a time.

    Chunk ``i`` draws its features and its label noise from two generators seeded from ``seed``
    and ``i``; both fill row by row, so a shorter last chunk is a prefix of the full one.

    Yields
    ------
    start : int
        Index of the chunk's first row.
    X : ndarray of float32, shape (m, features)
    y : ndarray of int32, shape (m,)
        Class of each row: argmax of ``X @ W`` plus Gumbel noise (scale 2, so not separable).
    """
    W = _rule(features, classes, seed)
    for index, start in enumerate(range(0, rows, CHUNK_ROWS)):
        m = min(CHUNK_ROWS, rows - start)
        X = np.random.default_rng([seed, 0xBE7C, index, 0]).standard_normal((m, features), dtype=np.float32)
        logits = X @ W
        logits += np.random.default_rng([seed, 0xBE7C, index, 1]).gumbel(size=logits.shape).astype(np.float32) * 2.0
        yield start, X, logits.argmax(axis=1).astype(np.int32)


def make_table(rows: int, features: int, classes: int, seed: int = 0, holdout: float = 0.2, folds: int = 5,
               batch_rows: int = ExecutionConfig.model_fields["batch_rows"].default) -> RowFrame:
    """The invented classification table of :func:`table_chunks`, in memory, split as ``load_table`` splits;
    ``batch_rows`` is the rows per batch of :meth:`RowFrame.feature_batches`."""
    X = np.empty((rows, features), dtype=np.float32)
    y = np.empty(rows, dtype=np.int32)
    for start, Xc, yc in table_chunks(rows, features, classes, seed):
        X[start:start + len(yc)], y[start:start + len(yc)] = Xc, yc
    row_id = np.arange(rows, dtype=np.int64)
    hold, fold = split_rows(row_id, y, holdout, folds, seed)
    return RowFrame(row_id=row_id, y=y, classes=list(range(classes)), X=X,
                    feature_names=[f"x{j}" for j in range(features)], categorical=[], categories={},
                    holdout=hold, fold=fold, fingerprint="bench",
                    source=TableSource(ds.dataset(pa.table({"row_id": row_id})), Path("bench"), None, batch_rows))


@dataclass(frozen=True)
class WrittenTable:
    """What :func:`write_table` wrote."""

    path: Path
    rows: int
    features: int
    classes: int
    files: int
    bytes: int
    seconds: float

    def line(self) -> str:
        """One line: rows, files, bytes, seconds."""
        return (f"wrote {self.rows:,} rows x {self.features} features, {self.classes} classes to {self.path}: "
                f"{self.files} parquet files, {self.bytes / 2**20:,.1f} MiB in {self.seconds:.1f} s")


def _meta(rows: int, features: int, classes: int, seed: int) -> dict:
    """What identifies a generated table: generator version, chunk size, shape and seed."""
    return {"generator": GENERATOR, "chunk_rows": CHUNK_ROWS, "rows": rows, "features": features, "classes": classes, "seed": seed}



def write_table(out: Path, rows: int, features: int, classes: int, seed: int = 0, files: int | None = None) -> WrittenTable:
    """Write the invented table of :func:`table_chunks` as ``out/part-00000.parquet``, … chunk by chunk.

    Columns ``x0`` … ``x{features-1}`` (float32) and ``label`` (int32, 0 … classes-1). The files are
    built in a ``<out>.tmp-*`` folder beside ``out``, then renamed to ``out``.

    Parameters
    ----------
    out : Path
        A folder that does not exist yet, or is empty.
    rows, features, classes, seed : int
        Shape of the table and seed of its generator.
    files : int, optional
        Number of files, rows spread evenly; default the fewest of at most ``FILE_ROWS`` rows, and at least 2.

    Returns
    -------
    WrittenTable

    Raises
    ------
    ConfigError
        When ``out`` is not empty, or the shape or number of files is out of range.
    """
    out = Path(out)
    files = files if files is not None else max(2, -(-rows // FILE_ROWS))
    if features < 1 or classes < 2:
        raise ConfigError(f"bench table: {features} features and {classes} classes; give at least 1 feature and 2 classes")
    if not 1 <= files <= rows:
        raise ConfigError(f"bench table: {files} files for {rows:,} rows; give between 1 and {rows:,} files so none is empty")
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise ConfigError(f"{out}: already exists and is not an empty folder; pass a new --out folder or remove this one")
    t0 = time.perf_counter()
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.parent / f"{out.name}.tmp-{uuid.uuid4().hex[:12]}"
    tmp.mkdir()
    try:
        _write_parts(tmp, rows, features, classes, seed, files)
        (tmp / META_NAME).write_text(json.dumps({**_meta(rows, features, classes, seed), "files": files}))
        size = sum(f.stat().st_size for f in tmp.glob("part-*.parquet"))
        try:
            tmp.rename(out)
        except OSError:
            raise ConfigError(f"{out}: was filled while the table was written; pass a new --out folder or remove this one") from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return WrittenTable(path=out, rows=rows, features=features, classes=classes, files=files, bytes=size,
                        seconds=time.perf_counter() - t0)


def _write_parts(folder: Path, rows: int, features: int, classes: int, seed: int, files: int) -> None:
    """The chunks of :func:`table_chunks` cut into ``files`` parquet files of even row counts."""
    schema = pa.schema([(f"x{j}", pa.float32()) for j in range(features)] + [("label", pa.int32())])
    bounds = [rows * i // files for i in range(files + 1)]
    writer, part = None, 0
    try:
        for start, X, y in table_chunks(rows, features, classes, seed):
            a = 0
            while a < len(y):
                if writer is None:
                    writer = pq.ParquetWriter(folder / f"part-{part:05d}.parquet", schema)
                b = min(len(y), bounds[part + 1] - start)
                writer.write_table(pa.Table.from_arrays([*np.ascontiguousarray(X[a:b].T), y[a:b]], schema=schema))
                a = b
                if start + b == bounds[part + 1]:
                    writer.close()
                    writer, part = None, part + 1
    finally:
        if writer is not None:
            writer.close()


def ensure_table(out: Path, rows: int, features: int, classes: int, seed: int = 0) -> WrittenTable | None:
    """Write the table to ``out`` unless ``out`` already holds it (same shape, seed and generator).

    Returns
    -------
    WrittenTable or None
        None when the table was already there.

    Raises
    ------
    ConfigError
        When ``out`` holds anything else.
    """
    out, want = Path(out), _meta(rows, features, classes, seed)
    meta = out / META_NAME
    if meta.is_file() and {k: json.loads(meta.read_text()).get(k) for k in want} == want:
        return None
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise ConfigError(f"{out}: holds something other than the table of {rows:,} rows x {features} features, "
                          f"{classes} classes, seed {seed}; remove it or pass another --dir")
    return write_table(out, rows, features, classes, seed)
