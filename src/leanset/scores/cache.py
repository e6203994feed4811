"""The score stage's cache: a run's scores kept as parquet under the store, keyed by what decides them.

The key hashes the table's fingerprint, the holdout and fold of every row, the config sections the
score stage reads (``input`` but its path and segments, ``proxy``, ``execution`` but its batch and
memory settings, ``seed``, and whether the AUM threshold-sample passes run) and the versions of the libraries that compute the scores. A run at
another fraction, with another strategy or target, or a ``frontier`` after a ``run`` of the same
config finds the scores of the earlier pass; any change to the rows or to those sections misses.
Entries are written aside and renamed into place, so a killed run leaves none half-written.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import shutil
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pyarrow as pa
import pyarrow.parquet as pq

from ..config import SCORE_NAMES, Config
from ..load.rows import RowFrame
from ..versions import package_versions
from .dynamics import Scores
from .labels import wants_threshold_samples

logger = logging.getLogger(__name__)

#: Libraries whose version can change a score.
_LIBRARIES = ("leanset", "lightgbm", "scikit-learn", "numpy", "scipy")


@dataclass(frozen=True)
class StoredProxy:
    """A fold's proxy read back from the cache: its family and its saved text (LightGBM text or JSON)."""

    family: str
    text: str

    def to_text(self) -> str:
        """The model as it was saved."""
        return self.text


def library_versions() -> dict[str, str]:
    """Versions of the libraries whose version can change a score or a fitted model."""
    return package_versions(_LIBRARIES)


def publish_entry(folder: Path, fill: Callable[[Path], None]) -> None:
    """Create the cache entry ``folder``: ``fill(tmp)`` writes its files into a folder aside, which is
    then renamed into place. When another run published the same key first, its entry is kept."""
    folder.parent.mkdir(parents=True, exist_ok=True)
    tmp = folder.parent / f".tmp-{folder.name}-{os.getpid()}"
    shutil.rmtree(tmp, ignore_errors=True)
    tmp.mkdir()
    try:
        fill(tmp)
        if folder.exists():  # same key, same content
            shutil.rmtree(tmp)
            return
        os.rename(tmp, folder)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise


def score_key(frame: RowFrame, config: Config) -> str:
    """Hash of everything that decides the score stage's output for ``frame`` under ``config``."""
    data = config.model_dump(mode="json")
    parts = {
        "fingerprint": frame.fingerprint,
        "fold": hashlib.sha256(frame.fold.tobytes()).hexdigest(),
        "input": {k: v for k, v in data["input"].items() if k not in ("path", "segments")},
        "proxy": data["proxy"],
        # with proxy.threshold_samples auto, whether the label-error passes run is a selection setting
        "threshold_samples": wants_threshold_samples(config),
        # selection.spread asks the score stage for the locality key
        "locus": config.selection.spread,
        "execution": {k: v for k, v in data["execution"].items() if k not in ("batch_rows", "feature_memory_mb")},
        "seed": config.seed,
        "versions": library_versions(),
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:24]


def _json_default(value):
    return value.item() if hasattr(value, "item") else str(value)


def write_scores(folder: Path, scores: Scores) -> None:
    """Save ``scores`` as ``folder/scores.parquet`` (its info in the file's metadata) and the fold
    proxies as text, built aside and renamed into place."""
    def fill(tmp: Path) -> None:
        table = pa.Table.from_pandas(scores.table, preserve_index=False)
        meta = {"info": scores.info, "checkpoints": scores.checkpoints, "families": [p.family for p in scores.proxies]}
        table = table.replace_schema_metadata({**(table.schema.metadata or {}),
                                               b"leanset": json.dumps(meta, default=_json_default).encode()})
        pq.write_table(table, tmp / "scores.parquet")
        for k, proxy in enumerate(scores.proxies):
            (tmp / f"proxy_fold{k}.txt").write_text(proxy.to_text())
    publish_entry(folder, fill)


def read_scores(folder: Path) -> Scores | None:
    """The scores saved in ``folder``, or None when there are none (or they cannot be read)."""
    path = folder / "scores.parquet"
    if not path.is_file():
        return None
    try:
        table = pq.read_table(path)
        meta = json.loads(table.schema.metadata[b"leanset"])
        proxies = [StoredProxy(family, (folder / f"proxy_fold{k}.txt").read_text())
                   for k, family in enumerate(meta["families"])]
    except (OSError, KeyError, ValueError, pa.ArrowException) as exc:
        logger.warning("score cache %s unreadable (%s); scoring afresh", folder, exc)
        return None
    if missing := set(SCORE_NAMES) - set(table.column_names):
        logger.warning("score cache %s lacks %s (saved by an earlier version); scoring afresh", folder, sorted(missing))
        return None
    return Scores(table=table.to_pandas(), proxies=proxies, checkpoints=meta["checkpoints"], info=meta["info"])


def cached_scores(frame: RowFrame, config: Config, compute: Callable[[], Scores], use_cache: bool = True) -> tuple[Scores, bool]:
    """The scores of ``frame`` from ``<store>/cache/scores/<key>/`` when there, else ``compute()``'s,
    then saved there.

    Parameters
    ----------
    compute : callable
        Runs the score stage; called only on a miss (or when ``use_cache`` is False).
    use_cache : bool
        False scores afresh and replaces any saved entry of the same key.

    Returns
    -------
    (Scores, bool)
        The scores, and whether they came from the cache.
    """
    key = score_key(frame, config)
    folder = config.store / "cache" / "scores" / key
    if use_cache:
        found = read_scores(folder)
        if found is not None:
            logger.info("score stage: cache hit %s, %d rows scored by an earlier pass", key, len(found.table))
            found.info["cache"] = {"key": key, "hit": True}
            return found, True
    elif folder.exists():
        shutil.rmtree(folder, ignore_errors=True)
    scores = compute()
    scores.info["cache"] = {"key": key, "hit": False}
    write_scores(folder, scores)
    logger.info("score stage: scores saved under cache key %s", key)
    return scores, False
