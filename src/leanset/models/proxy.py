"""The cheap proxy models that the score stage cross-fits: LightGBM or SGD logistic regression.

Each fit reports the per-row logits of its own training rows at every checkpoint through a
callback, so that the score stage can accumulate training dynamics without storing them.
Logits are always an (n, n_classes) array; for LightGBM they are log-probabilities read from the
booster's own running training scores (no extra prediction pass). Softmax is shift-invariant, so
their margins and probabilities equal those of the raw scores.
On a regression table (``n_classes`` 0) the callback gets the (n,) predicted values instead.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np
from sklearn.compose import ColumnTransformer
from sklearn.impute import SimpleImputer
from sklearn.linear_model import SGDClassifier, SGDRegressor
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import OneHotEncoder, StandardScaler

from ..config import ProxyConfig
from ._lightgbm import training_scores
from ..load.memory import release_memory

Checkpoint = Callable[[int, np.ndarray], None]
_EPS = 1e-300

#: The cheap proxy: each round grows its trees on a seeded half of the rows (bagging; every row
#: still trains the model and is scored at every checkpoint), on 63 bins per feature taken from a
#: 50,000-row sample. Together with two folds and no threshold-sample passes unless suspected label
#: errors are asked for, this keeps the score stage a small share of one target fit (docs/economics.md). ``num_threads`` is pinned so that a run does not depend on the machine's core
#: count or on ``OMP_NUM_THREADS``; ``proxy.params`` may raise it (docs/reliability.md).
GBDT_DEFAULTS: dict[str, Any] = {
    "learning_rate": 0.1, "num_leaves": 15, "min_data_in_leaf": 20,
    "bagging_fraction": 0.5, "bagging_freq": 1, "max_bin": 63, "bin_construct_sample_cnt": 50_000,
    "verbose": -1, "deterministic": True, "force_col_wise": True, "num_threads": 1,
}


def softmax(logits: np.ndarray) -> np.ndarray:
    """Row-wise softmax of an (n, k) array, computed stably."""
    z = logits - logits.max(axis=1, keepdims=True)
    np.exp(z, out=z)
    z /= z.sum(axis=1, keepdims=True)
    return z


def proba_matrix(p: np.ndarray) -> np.ndarray:
    """Binary probabilities p of the positive class as columns [1 - p, p]; multiclass unchanged."""
    return np.column_stack((1.0 - p, p)) if p.ndim == 1 else p


def binary_logits(z: np.ndarray) -> np.ndarray:
    """Binary decision values z as logits [0, z]; multiclass values unchanged."""
    return np.column_stack((np.zeros_like(z), z)) if z.ndim == 1 else z


@dataclass
class FittedProxy:
    """One fold's proxy: predicts class probabilities (or values) and serialises without pickling.

    ``y_shift`` and ``y_scale`` undo the label standardisation of a linear regression proxy.
    ``iterations`` holds the boosting iterations a gbdt model had at each checkpoint: LightGBM drops
    an iteration in which no tree could split (with bagging, a later one may split again), so a
    checkpoint can hold fewer iterations than rounds.
    """

    family: str
    model: Any
    y_shift: float = 0.0
    y_scale: float = 1.0
    iterations: tuple[int, ...] = ()

    def predict(self, X: np.ndarray) -> np.ndarray:
        """Predicted values of a regression proxy, shape (n,)."""
        return self.y_shift + self.y_scale * np.asarray(self.model.predict(X), dtype=np.float64)

    def predict_proba(self, X: np.ndarray) -> np.ndarray:
        """Class probabilities, shape (n, n_classes)."""
        if self.family == "gbdt":
            return proba_matrix(self.model.predict(X))
        return softmax(_linear_logits(self.model, X))

    def to_text(self) -> str:
        """LightGBM's text model format, or the linear model's coefficients as JSON."""
        if self.family == "gbdt":
            return self.model.model_to_string()
        sgd = self.model[-1]
        classes = sgd.classes_.tolist() if hasattr(sgd, "classes_") else None
        return json.dumps({"coef": sgd.coef_.tolist(), "intercept": sgd.intercept_.tolist(), "classes": classes,
                           "y_shift": self.y_shift, "y_scale": self.y_scale})


def gbdt_params(n_classes: int, config: ProxyConfig, seed: int) -> dict[str, Any]:
    """LightGBM parameters of the gbdt proxy (``n_classes`` 0: regression)."""
    params = {**GBDT_DEFAULTS, **config.params, "seed": seed}
    if n_classes == 0:
        params["objective"] = "regression"
    else:
        params.update({"objective": "multiclass", "num_class": n_classes} if n_classes > 2 else {"objective": "binary"})
    return params


class BatchSequence(lgb.Sequence):
    """LightGBM's ``Sequence`` over a stream of feature batches: rows served from a cursor that
    moves forward batch by batch and restarts the stream when asked for an earlier row.

    LightGBM reads its bin-construction sample in ascending row order, then every row in
    consecutive slices, so the stream is read about twice and never held whole.
    """

    def __init__(self, batches: Callable[[], Any], n: int, batch_size: int):
        self._batches, self._n, self.batch_size = batches, n, batch_size
        self._it, self._start, self._block = None, 0, None

    def __len__(self) -> int:
        return self._n

    def __getitem__(self, idx):
        if isinstance(idx, slice):
            start, stop, _ = idx.indices(self._n)
            return self._rows(start, stop)
        return self._rows(int(idx), int(idx) + 1)[0].astype(np.float64)  # LightGBM's bin sample must be float64

    def _rows(self, start: int, stop: int) -> np.ndarray:
        parts, pos = [], start
        while pos < stop:
            if self._block is None or pos < self._start:
                self._it = iter(self._batches())
                self._start, self._block = next(self._it)
            while pos >= self._start + len(self._block):
                self._start, self._block = next(self._it)
            a, b = pos - self._start, min(stop - self._start, len(self._block))
            parts.append(self._block[a:b])
            pos = self._start + b
        return parts[0] if len(parts) == 1 else np.concatenate(parts)


def binned_dataset(batches: Callable[[], Any], n: int, label: np.ndarray, categorical: list[int],
                   config: ProxyConfig, seed: int, batch_size: int) -> lgb.Dataset:
    """One LightGBM Dataset of ``n`` rows, built from feature batches without holding them whole.

    ``batches()`` yields ``(start, X_batch)`` in row order. The folds and threshold-sample passes
    train on subsets of it (``Dataset.subset``), so the rows are binned once, with one set of bin
    edges. Bin edges use feature values only, never labels.
    """
    params = gbdt_params(2, config, seed)
    data = lgb.Dataset(BatchSequence(batches, n, batch_size), label=label, categorical_feature=categorical or "auto",
                       params={k: v for k, v in params.items() if k not in ("objective", "num_class")}, free_raw_data=True)
    return data.construct()


def fit_gbdt(X, y, n_classes, categorical, config: ProxyConfig, seed: int, on_checkpoint: Checkpoint) -> FittedProxy:
    """Fit LightGBM for ``config.rounds`` rounds, reporting logits every ``checkpoint_every`` rounds.

    ``X`` is a feature matrix, or :func:`binned_dataset`'s Dataset or a subset of it; either way
    the fit's labels are ``y``. With ``n_classes`` 0 (regression) it reports the (n,)
    predicted values instead of logits.
    """
    params = gbdt_params(n_classes, config, seed)
    if isinstance(X, lgb.Dataset):
        data = X.construct()
        data.set_label(y)
    else:
        data = lgb.Dataset(X, label=y, categorical_feature=categorical or "auto", free_raw_data=True)
    t, iterations = 0, []

    def record(env: lgb.callback.CallbackEnv) -> None:
        nonlocal t
        if (env.iteration + 1) % config.checkpoint_every == 0:
            t += 1
            iterations.append(env.model.current_iteration())
            raw = training_scores(env.model)
            on_checkpoint(t, _LogProba(raw) if n_classes else raw)

    booster = lgb.train(params, data, num_boost_round=config.rounds, callbacks=[record])
    # a prediction-only copy: the trained booster's training scores, buffers and data are let go
    model = lgb.Booster(model_str=booster.model_to_string())
    del booster
    release_memory()
    return FittedProxy("gbdt", model, iterations=tuple(iterations))


class _LogProba:
    """Log-probabilities (n, k) of a booster's probability buffer, computed a slice at a time on
    read, so no full-size copy is made; the buffer stays untouched."""

    def __init__(self, p: np.ndarray):
        self._p = p
        self.shape = (len(p), 2) if p.ndim == 1 else p.shape

    def __len__(self) -> int:
        return self.shape[0]

    def __getitem__(self, rows) -> np.ndarray:
        z = np.maximum(proba_matrix(self._p[rows]), _EPS)
        return np.log(z, out=z)

    def __array__(self, dtype=None, copy=None) -> np.ndarray:
        return self[:] if dtype is None else self[:].astype(dtype)


def _linear_logits(pipe, X: np.ndarray) -> np.ndarray:
    return binary_logits(pipe.decision_function(X))


def fit_linear(X, y, n_classes, categorical, config: ProxyConfig, seed: int, on_checkpoint: Checkpoint) -> FittedProxy:
    """SGD logistic regression on standardised numeric and one-hot categorical features, one checkpoint per epoch."""
    numeric = [j for j in range(X.shape[1]) if j not in set(categorical)]
    prep = ColumnTransformer([
        ("num", make_pipeline(SimpleImputer(strategy="mean", keep_empty_features=True), StandardScaler()), numeric),
        ("cat", make_pipeline(SimpleImputer(strategy="most_frequent", keep_empty_features=True),
                              OneHotEncoder(handle_unknown="ignore", max_categories=64, sparse_output=False)), categorical),
    ])
    Z = prep.fit_transform(X).astype(np.float64)
    rng = np.random.default_rng(seed)
    if n_classes == 0:
        return _fit_linear_regression(Z, y, prep, config, seed, rng, on_checkpoint)
    params = {"loss": "log_loss", "alpha": 1e-4, **config.params, "random_state": seed}
    sgd = SGDClassifier(**params)
    classes = np.arange(n_classes)
    pipe = make_pipeline(prep, sgd)
    for t in range(1, config.epochs + 1):
        order = rng.permutation(len(y))
        sgd.partial_fit(Z[order], y[order], classes=classes)
        on_checkpoint(t, binary_logits(sgd.decision_function(Z)))
    return FittedProxy("linear", pipe)


def _fit_linear_regression(Z, y, prep, config: ProxyConfig, seed: int, rng, on_checkpoint: Checkpoint) -> FittedProxy:
    """SGD least squares on a standardised label (SGD's step sizes assume unit scale), one checkpoint per epoch."""
    shift, scale = float(np.mean(y)), float(np.std(y)) or 1.0
    target = (y - shift) / scale
    sgd = SGDRegressor(**{"alpha": 1e-4, **config.params, "random_state": seed})
    for t in range(1, config.epochs + 1):
        order = rng.permutation(len(y))
        sgd.partial_fit(Z[order], target[order])
        on_checkpoint(t, shift + scale * sgd.predict(Z))
    return FittedProxy("linear", make_pipeline(prep, sgd), y_shift=shift, y_scale=scale)


#: The most :func:`class_rounds` raises the proxy's learning rate to (a leanset choice; common practice,
#: no source): at 0.3 with 26 classes the scores lost their ranks (docs/economics.md).
MAX_CLASS_RATE = 0.25
_RATE_ALIASES = ("learning_rate", "eta", "shrinkage_rate")


def class_rounds(config: ProxyConfig, n_classes: int) -> ProxyConfig:
    """The gbdt proxy settings for a table of ``n_classes`` classes.

    With more than two classes LightGBM grows one tree per class each round, so a fold model
    costs about ``rounds × n_classes`` trees to grow and to predict. When that exceeds
    ``config.max_trees`` the rounds are cut to ``max_trees // n_classes`` (never below two
    checkpoints) and the learning rate is raised by the same factor, at most to
    :data:`MAX_CLASS_RATE`, so the shorter fit goes about as far; ``checkpoint_every`` is kept.
    Other tables, the linear proxy and ``max_trees`` None leave the settings as they are.
    """
    if config.family != "gbdt" or n_classes <= 2 or config.max_trees is None:
        return config
    rounds = max(2 * config.checkpoint_every, config.max_trees // n_classes)
    if rounds >= config.rounds:
        return config
    params = dict(config.params)
    rate = next((float(params.pop(a)) for a in _RATE_ALIASES if a in params), GBDT_DEFAULTS["learning_rate"])
    for alias in _RATE_ALIASES:
        params.pop(alias, None)
    params["learning_rate"] = max(rate, min(MAX_CLASS_RATE, rate * config.rounds / rounds))
    return config.model_copy(update={"rounds": rounds, "params": params})


def n_checkpoints(config: ProxyConfig) -> int:
    """Checkpoints per fitted proxy."""
    return config.rounds // config.checkpoint_every if config.family == "gbdt" else config.epochs


def fit_proxy(X, y, n_classes, categorical, config: ProxyConfig, seed: int, on_checkpoint: Checkpoint) -> FittedProxy:
    """Fit the configured proxy family on (X, y) and report its checkpoints (``n_classes`` 0: regression)."""
    fit = fit_gbdt if config.family == "gbdt" else fit_linear
    return fit(X, y, n_classes, categorical, config, seed, on_checkpoint)
