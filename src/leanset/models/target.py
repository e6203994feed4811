"""The target model: the model whose quality on the holdout is verified, fit on all, kept or random rows."""

from __future__ import annotations

import importlib
import time
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np

from ..config import TargetConfig
from ..errors import ConfigError
from ..load.rows import RowView
from .proxy import BatchSequence

LIGHTGBM_DEFAULTS: dict[str, Any] = {
    "learning_rate": 0.05, "num_leaves": 63, "min_data_in_leaf": 20, "feature_fraction": 0.9,
    "verbose": -1, "deterministic": True, "force_col_wise": True, "num_threads": 2,
}
LIGHTGBM_ROUNDS = 300


@dataclass
class FittedTarget:
    """A trained target model; ``booster`` is set for LightGBM, ``estimator`` for scikit-learn."""

    n_classes: int
    booster: lgb.Booster | None = None
    estimator: Any = None

    def predict_proba(self, X: np.ndarray | RowView) -> np.ndarray:
        """Class probabilities, shape (n, n_classes), columns in class-code order; predicted values (n,) for regression.

        A :class:`~leanset.load.rows.RowView` is predicted batch by batch, never gathered whole
        (each row's prediction depends on that row only)."""
        if isinstance(X, RowView):
            parts = [self.predict_proba(block) for _, block in X.batches()]
            return np.concatenate(parts) if parts else self.predict_proba(np.asarray(X))
        if self.n_classes == 0:
            return (self.booster if self.booster is not None else self.estimator).predict(X).astype(np.float64)
        if self.booster is not None:
            p = self.booster.predict(X)
            return np.column_stack((1 - p, p)) if p.ndim == 1 else p
        out = np.zeros((len(X), self.n_classes))
        out[:, self.estimator.classes_.astype(int)] = self.estimator.predict_proba(X)
        return out


def _sklearn_estimator(config: TargetConfig, seed: int):
    if not config.estimator:
        raise ConfigError("target.estimator: required when target.family is sklearn; give an import path such as sklearn.ensemble.HistGradientBoostingClassifier")
    module, _, name = config.estimator.rpartition(".")
    try:
        cls = getattr(importlib.import_module(module), name)
    except (ImportError, AttributeError):
        raise ConfigError(f"target.estimator: cannot import '{config.estimator}'; check the module path and class name") from None
    params = dict(config.params)
    if "random_state" in cls().get_params():
        params.setdefault("random_state", seed)
    try:
        return cls(**params)
    except TypeError as exc:
        raise ConfigError(f"target.params: {exc}; fix the parameters of {config.estimator}") from None


def fit_target(X: np.ndarray, y: np.ndarray, weight: np.ndarray | None, n_classes: int,
               categorical: list[int], config: TargetConfig, seed: int) -> FittedTarget:
    """Train the configured target on (X, y) with optional per-row weights.

    ``X`` may be a :class:`~leanset.load.rows.RowView`: LightGBM then reads it through its
    ``Sequence`` interface, batch by batch, so the rows are never gathered into a copy; a
    scikit-learn estimator gets them gathered. LightGBM's bin sample is drawn with
    ``data_random_seed`` = ``seed`` (unless the params set it), which makes a ``Sequence`` bin as
    the gathered matrix does: the same rows give the same model either way.
    """
    if isinstance(X, RowView):
        X = np.asarray(X) if config.family == "sklearn" else BatchSequence(X.batches, len(X), X.batch_rows)
    if config.family == "sklearn":
        est = _sklearn_estimator(config, seed)
        est.fit(X, y, sample_weight=weight) if weight is not None else est.fit(X, y)
        return FittedTarget(n_classes, estimator=est)
    params = {**LIGHTGBM_DEFAULTS, **config.params, "seed": seed}
    if not {"data_random_seed", "data_seed"} & params.keys():
        # a Sequence's bin sample follows data_random_seed only, a matrix's follows seed too
        params["data_random_seed"] = seed
    rounds = int(params.pop("num_boost_round", params.pop("n_estimators", LIGHTGBM_ROUNDS)))
    params.update({"objective": "multiclass", "num_class": n_classes} if n_classes > 2 else {"objective": "binary"})
    if n_classes == 0:
        params = {k: v for k, v in params.items() if k != "num_class"} | {"objective": "regression"}
    data = lgb.Dataset(X, label=y, weight=weight, categorical_feature=categorical or "auto")
    return FittedTarget(n_classes, booster=lgb.train(params, data, num_boost_round=rounds))


def fit_timed(X: np.ndarray, y: np.ndarray, weight: np.ndarray | None, n_classes: int, categorical: list[int],
              target: TargetConfig, seed: int) -> tuple[FittedTarget, float]:
    """``fit_target`` and its wall time in seconds."""
    t0 = time.perf_counter()
    model = fit_target(X, y, weight, n_classes, categorical, target, seed)
    return model, time.perf_counter() - t0
