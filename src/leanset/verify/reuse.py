"""Reuse of a full-data target fit: a run whose training rows and target settings equal an earlier
run's takes that run's fitted model instead of training the target on every row again.

The model is kept as LightGBM text under ``<store>/cache/target/<key>/`` beside its training
seconds. The key hashes the training rows (ids, label codes and each row's feature-value hash, in
order), the feature columns and their categories, the ``target`` section, the seed and the library
versions, so any change to the training rows or to the target misses. The holdout is predicted
afresh on every run. A scikit-learn target is never kept (no pickles) and is always trained.
``verify.reuse_full_fit: false`` turns reuse off.
"""

from __future__ import annotations

import hashlib
import json
import logging
import time
from pathlib import Path

import lightgbm as lgb
import numpy as np

from ..config import Config
from ..load.rows import RowFrame
from ..models.target import FittedTarget
from ..scores.cache import library_versions, publish_entry
from .verdict import Reference, Verdict

logger = logging.getLogger(__name__)


def full_fit_key(frame: RowFrame, config: Config) -> str:
    """Hash of everything that decides the target trained on all training rows of ``frame``."""
    train = frame.train
    digest = hashlib.sha256()
    digest.update("\x1f".join(map(str, frame.row_id[train])).encode())
    digest.update(np.ascontiguousarray(frame.y[train]).tobytes())
    digest.update(np.ascontiguousarray(frame.feature_hash[train]).tobytes())
    digest.update(json.dumps({
        "features": frame.feature_names, "categorical": frame.categorical, "categories": frame.categories,
        "classes": [str(c) for c in frame.classes], "target": config.target.model_dump(mode="json"),
        "seed": config.seed, "versions": library_versions(),
    }, sort_keys=True, default=str).encode())
    return digest.hexdigest()[:24]


def _folder(frame: RowFrame, config: Config) -> Path | None:
    """The cache entry of the full-data fit, or None when it is not kept (scikit-learn target, reuse off)."""
    if config.target.family != "lightgbm" or not config.verify.reuse_full_fit:
        return None
    return config.store / "cache" / "target" / full_fit_key(frame, config)


def reused_full_fit(frame: RowFrame, config: Config) -> tuple[Reference | None, dict]:
    """The kept full-data fit of ``frame``'s training rows as a :class:`Reference` for
    :func:`~leanset.verify.verdict.verify`, or None.

    Returns
    -------
    (Reference or None, dict)
        The reference, and what the run records: ``reused`` and, when reused, the ``key``, the
        seconds the fit took when it was made and when that was (``fitted_at``, UTC).
    """
    folder = _folder(frame, config)
    if folder is None or not (folder / "model.txt").is_file():
        return None, {"reused": False}
    try:
        meta = json.loads((folder / "fit.json").read_text())
        booster = lgb.Booster(model_str=(folder / "model.txt").read_text())
    except (OSError, ValueError, KeyError, lgb.basic.LightGBMError) as exc:
        logger.warning("full-data fit %s unreadable (%s); training afresh", folder, exc)
        return None, {"reused": False}
    model = FittedTarget(len(frame.classes), booster=booster)
    reference = Reference(model=model, seconds=float(meta["seconds"]), X=frame.feature_rows(frame.train),
                          X_hold=frame.feature_rows(np.flatnonzero(frame.holdout)))
    logger.info("verify: full-data fit reused from the cache (key %s, made %s)", folder.name, meta["fitted_at"])
    return reference, {"reused": True, "key": folder.name, "seconds": float(meta["seconds"]), "fitted_at": meta["fitted_at"]}


def keep_full_fit(frame: RowFrame, config: Config, verdict: Verdict) -> None:
    """Keep the verdict's full-data model (LightGBM text) and its training seconds for later runs."""
    folder = _folder(frame, config)
    model = verdict.models.get("full")
    if folder is None or folder.exists() or model is None or model.booster is None:
        return

    def fill(tmp: Path) -> None:
        (tmp / "model.txt").write_text(model.booster.model_to_string())
        (tmp / "fit.json").write_text(json.dumps({
            "seconds": verdict.train_seconds["full"],
            "fitted_at": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}))
    publish_entry(folder, fill)
