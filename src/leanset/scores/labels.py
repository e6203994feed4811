"""Suspected label errors by AUM threshold samples (Pleiss et al., NeurIPS 2020): the settings of the
two extra proxy passes and the cut-off they set. The passes themselves are fitted by
:func:`leanset.scores.dynamics.threshold_samples` (or on a Dask cluster by :mod:`leanset.scores.cluster`).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..config import Config, ProxyConfig


def wants_threshold_samples(config: Config) -> bool:
    """Whether the AUM threshold-sample passes run: ``proxy.threshold_samples`` true, or ``auto``
    (the default) when ``selection.drop_suspect_labels`` may drop suspected label errors (true, ``share`` or ``auto``)."""
    ts = config.proxy.threshold_samples
    return ts is True or (ts == "auto" and config.selection.drop_suspect_labels is not False)


#: The threshold-sample passes grow every tree on all rows unless ``proxy.params`` says otherwise:
#: with the proxy's per-round bagging their cut-off missed half the flipped labels of breast cancer
#: at a 20 % flip rate (tests/test_label_errors.py).
FULL_ROWS = {"bagging_fraction": 1.0, "bagging_freq": 0}


def threshold_config(config: ProxyConfig) -> ProxyConfig:
    """The proxy settings of the threshold-sample passes: ``threshold_rounds`` boosting rounds,
    by default half of ``rounds`` (the paper reads AUM before the network memorises its noise),
    every tree grown on all rows (:data:`FULL_ROWS`, LightGBM's ``gbdt`` proxy only: the linear proxy has no
    bagging and its estimator refuses these keys)."""
    full_rows = FULL_ROWS if config.family == "gbdt" else {}
    return config.model_copy(update={"rounds": config.threshold_rounds or max(config.checkpoint_every, config.rounds // 2),
                                     "params": {**full_rows, **config.params}})


def aum_cutoff(y: np.ndarray, n_classes: int, config: ProxyConfig, seed: int,
               fit_aum: Callable[[np.ndarray, int, int], np.ndarray]) -> tuple[np.ndarray, dict]:
    """The threshold-sample procedure of :func:`threshold_samples` around ``fit_aum(labels, k, seed)``,
    which fits a proxy with ``k`` classes on all rows and returns each row's AUM under ``labels``."""
    n = len(y)
    rng = np.random.default_rng([seed, 0xA0C])
    order = rng.permutation(n)
    m = max(1, min(n // (n_classes + 1), int(n * config.threshold_share)))
    gap, judged, cutoffs = np.zeros(n), np.zeros(n, np.int64), []
    for j in range(2):
        fake = order[j * m:(j + 1) * m]
        labels = y.astype(np.int32, copy=True)
        labels[fake] = n_classes
        aum = fit_aum(labels, n_classes + 1, int(rng.integers(2**31)))
        cutoff = float(np.percentile(aum[fake], config.threshold_percentile))
        real = np.ones(n, bool)
        real[fake] = False
        gap[real] += aum[real] - cutoff
        judged[real] += 1
        cutoffs.append(cutoff)
    suspect = gap / np.maximum(judged, 1) < 0
    return suspect, {"cutoffs": cutoffs, "threshold_rows": int(m), "suspects": int(suspect.sum()),
                     "percentile": config.threshold_percentile}


