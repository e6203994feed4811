"""Proxy–target agreement: does the proxy's difficulty rank rows as the target's own loss does?

The check cross-fits the target on a seeded sample of training rows and correlates its
out-of-fold loss with the proxy's difficulty. It is a warning light, not a measurement to three
decimals, so it is kept cheap by default (docs/economics.md): ``proxy.agreement_rows`` (2,000)
rows, ``proxy.agreement_folds`` (2) folds, at most ``proxy.agreement_rounds`` (10) boosting rounds
at a learning rate raised by the same factor, one thread. Its seconds are the ``agreement``
stage of the run's cost ledger.
"""

from __future__ import annotations

import time

import numpy as np
from scipy import stats

from ..config import Config, TargetConfig
from ..load.rows import RowFrame
from ..load.split import deal_folds
from ..models.target import LIGHTGBM_DEFAULTS, LIGHTGBM_ROUNDS, fit_target
from .dynamics import Scores

#: The most the agreement check raises the target's learning rate to (a leanset choice; common
#: practice, no source: above it boosting steps overshoot).
MAX_RATE = 0.5


def agreement_target(target: TargetConfig, rounds: int | None) -> TargetConfig:
    """The LightGBM target as the agreement check fits it: one thread (a fit on a few thousand
    rows gains nothing from more, and loses much on a shared machine), at most ``rounds`` boosting
    rounds, its learning rate raised by the same factor (at most to :data:`MAX_RATE`) so the shorter
    fit goes about as far. A scikit-learn target is fitted as configured; ``rounds`` None keeps the
    target's rounds."""
    if target.family != "lightgbm":
        return target
    params = {**target.params, "num_threads": 1}
    full = int(params.get("num_boost_round", params.get("n_estimators", LIGHTGBM_ROUNDS)))
    if rounds is not None and full > rounds:
        params.pop("n_estimators", None)
        rate = float(params.pop("eta", params.get("learning_rate", LIGHTGBM_DEFAULTS["learning_rate"])))
        params.update(num_boost_round=rounds, learning_rate=min(MAX_RATE, rate * full / rounds))
    return target.model_copy(update={"params": params})


def agreement(frame: RowFrame, scores: Scores, config: Config) -> dict | None:
    """How well the proxy stands in for the target: Spearman correlation between the proxy's
    difficulty (``selection.score``) and the target model's out-of-fold loss on a seeded sample.

    The target (:func:`agreement_target`) is cross-fitted within the sample of
    ``proxy.agreement_rows`` rows, over ``proxy.agreement_folds`` folds drawn afresh per class or
    label bin; its loss is −log p[y], or the squared error on a regression table. Correlation is
    ``scipy.stats.spearmanr``; ``None`` when ``proxy.agreement_rows`` is 0.

    Returns
    -------
    dict or None
        ``score``, ``rows``, ``folds``, ``spearman``, ``floor``, ``below_floor`` and ``seconds``.
    """
    t0 = time.perf_counter()
    pc = config.proxy
    target = agreement_target(config.target, pc.agreement_rounds)
    train = frame.train
    m = min(pc.agreement_rows, len(train))
    if m == 0:
        return None
    rng = np.random.default_rng([config.seed, 0xA9E])
    sample = np.sort(rng.choice(len(train), size=m, replace=False))
    rows = train[sample]
    X, y = frame.features(rows), frame.y[rows]
    fold = deal_folds(frame.groups[rows], pc.agreement_folds, rng)
    n_classes = len(frame.classes)
    loss = np.empty(m)
    for k in range(pc.agreement_folds):
        fit, out = fold != k, fold == k
        model = fit_target(X[fit], y[fit], None, n_classes, frame.categorical, target, config.seed + k)
        pred = model.predict_proba(X[out])
        if n_classes:
            loss[out] = -np.log(np.clip(pred[np.arange(len(pred)), y[out]], np.finfo(np.float64).eps, 1.0))
        else:
            loss[out] = (pred - y[out]) ** 2
    name = config.selection.score
    rho = float(stats.spearmanr(scores.difficulty(name)[sample], loss).statistic)
    return {"score": name, "rows": int(m), "folds": pc.agreement_folds, "spearman": rho,
            "floor": pc.agreement_floor, "below_floor": bool(not rho >= pc.agreement_floor),
            "seconds": round(time.perf_counter() - t0, 3)}
