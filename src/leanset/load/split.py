"""Row ids, and the holdout and folds drawn from seeded hashes of them, per class.

Neither depends on row order or on how the table is cut into files.
"""

import hashlib

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc


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
    n_hold = np.maximum(1 if fraction > 0 else 0, np.round(fraction * counts).astype(np.int64))
    holdout = rank < n_hold[y]
    fold = ((rank - n_hold[y]) % folds).astype(np.int8)
    fold[holdout] = -1
    return holdout, fold


def validation_split(groups: np.ndarray, fraction: float, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """A seeded split of the training rows, stratified by ``groups``: (fit rows, validation rows),
    positions in ascending order. Each group gives ``round(fraction * n_g)`` rows to validation,
    at least one when it has two or more."""
    rng = np.random.default_rng([seed, 0x7A1D])
    slice_ = np.zeros(len(groups), bool)
    for g in np.unique(groups):
        rows = np.flatnonzero(groups == g)
        take = min(len(rows) - 1, max(1, int(round(fraction * len(rows))))) if len(rows) > 1 else 0
        slice_[rng.choice(rows, size=take, replace=False)] = True
    return np.flatnonzero(~slice_), np.flatnonzero(slice_)


def deal_folds(groups: np.ndarray, folds: int, rng: np.random.Generator) -> np.ndarray:
    """A fresh stratified fold assignment: within each group, a seeded shuffle dealt round-robin."""
    order = np.lexsort((rng.random(len(groups)), groups))
    counts = np.bincount(groups)
    starts = np.repeat(np.concatenate(([0], np.cumsum(counts)[:-1])), counts)
    fold = np.empty(len(groups), np.int8)
    fold[order] = (np.arange(len(groups)) - starts) % folds
    return fold
