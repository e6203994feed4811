"""Score stage on a Dask cluster (``execution.engine: dask``), for the gbdt proxy.

The driver keeps only the small per-row arrays of the :class:`~leanset.load.rows.RowFrame` (labels,
folds, holdout); the workers read and hold the training rows' features (:mod:`leanset.scores.shards`).

Each fold model is one ``lightgbm.dask`` fit on the rows with fold != k. Its checkpoints are
replayed on the workers, partition by partition: raw scores are predicted iteration range by
iteration range and summed, and folded into the same
:class:`~leanset.scores.dynamics.Dynamics` (:class:`~leanset.scores.dynamics.ResidualDynamics` for regression) as
the local score stage, so every column means what it means there. A range holds the iterations
the model gained between two checkpoints, as the fit recorded them: ``checkpoint_every``, or fewer
when LightGBM dropped an iteration in which no tree could split (with bagging, a later iteration
may split again). Out-of-fold predictions come
from the same pass. Repeats and the AUM threshold samples run as in :func:`leanset.scores.dynamics.score`.

How a proxy is fitted is ``execution.dask_fits``:

- ``auto`` (default): ``fold_parallel`` when every worker can hold one whole fit (see
  :func:`choose_fits`), else ``data_parallel``; the choice is recorded in ``scores.info["dask_fits"]``.
- ``data_parallel``: each fit is one ``lightgbm.dask`` fit over all workers, each holding
  its own partitions; no worker needs the whole table. Partitions sit on fixed workers (partition
  i on the i-th worker, round robin) and LightGBM ranks the workers in partition order, so
  repeated runs on a cluster of the same size give the same models. The trees differ from the
  local engine's: there LightGBM bins every feature once on all rows; here each fit bins its own
  rows, each feature on one worker's share of them, and leaf sizes are estimated across workers.
- ``fold_parallel``: each fit runs whole on one worker, the folds side by side on as many
  workers; the worker reads the training rows and bins them as the local engine does, so the
  models, and the decisions, are the local engine's. A worker must hold the binned training
  rows (one byte per feature and row, about).

``benchmarks/dask_agreement.py`` measures how far either moves the kept set.
"""

from __future__ import annotations

import time
import warnings
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import replace
from typing import Any

import lightgbm as lgb
import numpy as np
import pandas as pd

from ..config import SCORE_NAMES, Config, ExecutionConfig, ProxyConfig, check_engine
from ..errors import ConfigError
from ..models.proxy import (FittedProxy, binary_logits, binned_dataset, class_rounds, fit_proxy, gbdt_params, n_checkpoints,
                            proba_matrix)
from .dynamics import (Dynamics, ResidualDynamics, Scores, aum_cutoff, margin, oof_scores, repeat_folds, residual_band,
                       stability, threshold_config, wants_threshold_samples)
from .locus import Locus, locus_seed
from ..load.rows import RowFrame

try:
    from distributed import Client, LocalCluster
    from lightgbm.dask import DaskLGBMRegressor
except ImportError:
    raise ConfigError("execution.engine: dask needs the dask extra; pip install 'leanset[dask]' or set execution.engine local") from None

from .shards import Shards, load_shards  # noqa: E402  (needs dask, checked above)


def local_cluster_kwargs(execution: ExecutionConfig) -> dict[str, Any]:
    """Keyword arguments of the ``distributed.LocalCluster`` started when ``execution.address`` is not set."""
    return {"n_workers": execution.workers, "threads_per_worker": 1, "processes": True, "dashboard_address": ":0"}


@contextmanager
def open_client(execution: ExecutionConfig) -> Iterator[Client]:
    """A client of the scheduler at ``execution.address``, or of a new local cluster; closed on exit.

    The client does not become the process's default client; :func:`score` makes it current while it runs.
    """
    if execution.address:
        with Client(execution.address, set_as_default=False) as client:
            yield client
        return
    with LocalCluster(**local_cluster_kwargs(execution)) as cluster, Client(cluster, set_as_default=False) as client:
        yield client


class _AskedOrder:
    """A client whose ``who_has`` answers in the order the futures were asked for.

    ``lightgbm.dask`` ranks the LightGBM machines, and orders each machine's parts, by the order of
    ``who_has``'s answer, which the scheduler gives in no fixed order; each machine bins its share
    of the features from its own rows, so another rank order gives other trees. Asked order is
    shard order: the worker of the first shard is rank 0, and each machine's rows are in table order.
    """

    def __init__(self, client: Client):
        self._client = client

    def __getattr__(self, name: str) -> Any:
        return getattr(self._client, name)

    def who_has(self, futures, **kwargs) -> dict:
        found = self._client.who_has(futures, **kwargs)
        return {f.key: found[f.key] for f in futures}


class _Iterations:
    """A LightGBM callback that notes on the booster the iterations it holds at each checkpoint
    (``booster.leanset_iterations``); the note travels with the booster from a Dask worker."""

    def __init__(self, every: int):
        self.every = every

    def __call__(self, env: lgb.callback.CallbackEnv) -> None:
        if (env.iteration + 1) % self.every == 0:
            env.model.leanset_iterations = (*getattr(env.model, "leanset_iterations", ()), env.model.current_iteration())


def fit_booster(shards: Shards, rows: np.ndarray, labels: np.ndarray, n_classes: int, categorical: list[int],
                config: ProxyConfig, seed: int) -> tuple[str, tuple[int, ...]]:
    """``lightgbm.dask`` fit of the gbdt proxy on the rows where ``rows`` is set, with the params of
    :func:`leanset.models.proxy.gbdt_params` (objective and ``num_class`` included) and ``config.rounds`` trees.

    Classes are fitted through ``DaskLGBMRegressor`` too: it hands the label codes to LightGBM as
    they are, as ``lightgbm.train`` gets them locally, whereas ``DaskLGBMClassifier`` re-encodes
    them on each worker from the classes that worker happens to hold.

    Returns the model text and the iterations it held at each checkpoint.
    """
    model = DaskLGBMRegressor(client=_AskedOrder(shards.client), n_estimators=config.rounds, **gbdt_params(n_classes, config, seed))
    X, y = shards.fit_data(rows, labels)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="Parameter .* will be ignored")
        model.fit(X, y, categorical_feature=categorical or "auto", callbacks=[_Iterations(config.checkpoint_every)])
    return model.booster_.model_to_string(), model.booster_.leanset_iterations


def fit_whole(frame: RowFrame, rows: np.ndarray | None, labels: np.ndarray, n_classes: int, config: Config,
              seed: int) -> tuple[str, tuple[int, ...]]:
    """Fit one gbdt proxy whole, as the local engine does (a worker task); its model text and the
    iterations it held at each checkpoint.

    The training rows are read and binned as :func:`leanset.scores.dynamics.score` bins them, then the fit
    runs on the rows ``rows`` (positions among the training rows; all when None) with ``labels``.
    LightGBM gets the proxy's pinned thread count, as on the local engine.
    """
    pc = config.proxy
    train = frame.train
    binned = binned_dataset(lambda: frame.feature_batches(train_only=True), len(train), frame.y[train], frame.categorical,
                            pc, config.seed, config.execution.batch_rows)
    model = fit_proxy(binned if rows is None else binned.subset(rows), labels, n_classes, frame.categorical, pc, seed,
                      lambda t, z: None)
    return model.model.model_to_string(), model.iterations


#: Share of a worker's memory limit one whole fit may take under ``dask_fits: auto`` (the rest is
#: for the worker's shards of the table, the replay of the checkpoints and Dask itself); common
#: practice, no source.
FIT_SHARE = 0.5


def fit_bytes(n_rows: int, n_features: int, n_classes: int) -> int:
    """Bytes one whole proxy fit holds on a worker: the binned training rows (one byte per feature
    and row, LightGBM's bins fit in a byte at its default ``max_bin`` 255) and LightGBM's per-row
    buffers (a float64 score, a float32 gradient and a float32 hessian per row and class)."""
    return n_rows * (n_features + 16 * max(n_classes, 1))


def choose_fits(client: Client, n_rows: int, n_features: int, n_classes: int, setting: str) -> dict[str, Any]:
    """How the proxies are fitted: ``setting`` unless it is ``auto``; then ``fold_parallel`` when
    :func:`fit_bytes` is at most ``FIT_SHARE`` of the smallest worker memory limit (a worker
    without a limit can hold it), else ``data_parallel``.

    Returns
    -------
    dict
        ``chosen``, ``setting``, ``fit_bytes`` and ``worker_memory_limit`` (bytes; None when unlimited).
    """
    need = fit_bytes(n_rows, n_features, n_classes)
    limits = [w.get("memory_limit") or 0 for w in client.scheduler_info(n_workers=-1)["workers"].values()]
    limit = min((m for m in limits if m), default=None)
    chosen = setting
    if setting == "auto":
        chosen = "fold_parallel" if limit is None or need <= FIT_SHARE * limit else "data_parallel"
    return {"chosen": chosen, "setting": setting, "fit_bytes": need, "worker_memory_limit": limit}


class Fitter:
    """Fits the gbdt proxies of one score stage the way ``execution.dask_fits`` asks (:func:`choose_fits`)."""

    def __init__(self, shards: Shards, frame: RowFrame, config: Config):
        self.shards, self.config, self.categorical = shards, config, frame.categorical
        self.choice = choose_fits(shards.client, len(frame.train), len(frame.feature_names), len(frame.classes),
                                  config.execution.dask_fits)
        self.whole = self.choice["chosen"] == "fold_parallel"
        # the per-row arrays only: workers read the features themselves
        self.frame = shards.broadcast(replace(frame, X=None)) if self.whole else None

    def fit(self, jobs: list[tuple[np.ndarray, np.ndarray, int, int]],
            proxy: ProxyConfig | None = None) -> list[tuple[str, tuple[int, ...]]]:
        """Model text and checkpoint iterations of one fit per ``(rows, labels, n_classes, seed)`` job: ``rows`` (bool, training
        order) selects the rows and ``labels`` holds every training row's label. ``proxy`` replaces
        the config's proxy settings."""
        proxy = proxy or self.config.proxy
        if not self.whole:
            return [fit_booster(self.shards, rows, labels, k, self.categorical, proxy, seed) for rows, labels, k, seed in jobs]
        config = self.config.model_copy(update={"proxy": proxy})
        futures = [self.shards.client.submit(fit_whole, self.frame, None if rows.all() else np.flatnonzero(rows), labels[rows],
                                             k, config, seed, pure=False) for rows, labels, k, seed in jobs]
        return self.shards.client.gather(futures)


def _checkpoints(booster: lgb.Booster, X: np.ndarray, n_classes: int, iterations: tuple[int, ...]) -> Iterator[np.ndarray]:
    """Raw scores at each checkpoint, the model's first ``iterations[t]`` iterations, summed range
    by range; binary as logits [0, z]."""
    z = np.zeros((len(X), n_classes) if n_classes > 2 else len(X))
    done = 0
    for upto in iterations:
        if upto > done:  # no iteration since the last checkpoint: the same scores
            z = z + booster.predict(X, raw_score=True, start_iteration=done, num_iteration=upto - done)
            done = upto
        yield binary_logits(z) if n_classes else z


def _every(T: int, every: int) -> tuple[int, ...]:
    """Checkpoint iterations of a fit that dropped none: ``every``, 2 ``every``, … ``T`` ``every``."""
    return tuple(every * t for t in range(1, T + 1))


def shard_scores(X: np.ndarray, y: np.ndarray, fold: np.ndarray, models: list[str], n_classes: int, T: int, every: int,
                 el2n_at: int, band: float, iterations: list[tuple[int, ...]] | None = None,
                 locus_seed: int | None = None) -> pd.DataFrame:
    """Scores of one shard's rows from the fold models (model texts, fold order): a worker task.

    ``iterations`` holds each model's iterations at its ``T`` checkpoints, as its fit recorded them
    (``FittedProxy.iterations``); None when no fit dropped an iteration (``every``, 2 ``every``, …).
    Columns as :func:`leanset.scores.dynamics.score` computes them for one repeat, plus ``never_learned``
    and, unless ``locus_seed`` is None, ``locus`` (of the first model, projections seeded by ``locus_seed``).
    """
    n = len(y)
    locus = None
    dyn = Dynamics(n, el2n_at) if n_classes else ResidualDynamics(n, el2n_at, band)
    oof = np.empty((n, n_classes)) if n_classes else np.empty(n)
    for k, text in enumerate(models):
        booster = lgb.Booster(model_str=text)
        if locus is None and locus_seed is not None:
            locus = Locus.from_booster(booster, locus_seed)(X)
        fit_rows, out_rows = np.flatnonzero(fold != k), np.flatnonzero(fold == k)
        dyn.start_model(fit_rows)
        if len(fit_rows):  # LightGBM predicts shape (0,) for no rows, whatever the classes
            marks = iterations[k] if iterations is not None else _every(T, every)
            for t, z in enumerate(_checkpoints(booster, X[fit_rows], n_classes, marks), start=1):
                dyn.update(t, fit_rows, z, y[fit_rows])
        if len(out_rows):
            pred = booster.predict(X[out_rows])
            oof[out_rows] = proba_matrix(pred) if n_classes else pred
    out = dyn.result(np.arange(n))
    out.update(oof_scores(oof, y, n_classes))
    if locus is not None:
        out["locus"] = locus
    return pd.DataFrame(out)


def shard_aum(X: np.ndarray, labels: np.ndarray, model: str, iterations: tuple[int, ...]) -> np.ndarray:
    """AUM of one shard's rows under ``labels`` from one multiclass model (model text) at its
    checkpoint ``iterations``: a worker task."""
    total = np.zeros(len(labels))
    if not len(labels):
        return total
    booster = lgb.Booster(model_str=model)
    for z in _checkpoints(booster, X, booster.num_model_per_iteration(), iterations):
        total += margin(z, labels)
    return total / len(iterations)


def _cross_fit(fitter: Fitter, y, fold, n_classes, pc: ProxyConfig, seeds, locus_seed: int | None) -> tuple[dict, list[FittedProxy]]:
    """One cross-fitting pass on the cluster: a fold model per fold, then every shard's scores."""
    T = n_checkpoints(pc)
    texts, iterations = zip(*fitter.fit([(fold != k, y, n_classes, seeds[k]) for k in range(pc.folds)]))
    band = 0.0 if n_classes else residual_band(y, pc)
    shards = fitter.shards
    frames = shards.map(shard_scores, y, fold, models=shards.broadcast(list(texts)), n_classes=n_classes, T=T,
                        every=pc.checkpoint_every, el2n_at=max(1, int(round(pc.el2n_at * T))), band=band,
                        iterations=list(iterations), locus_seed=locus_seed)
    table = pd.concat(frames, ignore_index=True)
    return ({name: table[name].to_numpy() for name in table.columns},
            [FittedProxy("gbdt", lgb.Booster(model_str=t), iterations=i) for t, i in zip(texts, iterations)])


def threshold_samples(fitter: Fitter, y: np.ndarray, n_classes: int, config: ProxyConfig, seed: int) -> tuple[np.ndarray, dict]:
    """:func:`leanset.scores.dynamics.threshold_samples` with the cluster's fits: same slices, seeds, cut-offs and verdicts."""
    config = threshold_config(config)
    shards = fitter.shards

    def fit_aum(labels: np.ndarray, k: int, fit_seed: int) -> np.ndarray:
        [(text, iterations)] = fitter.fit([(np.ones(len(y), bool), labels, k, fit_seed)], proxy=config)
        return np.concatenate(shards.map(shard_aum, labels, model=shards.broadcast(text), iterations=iterations))
    return aum_cutoff(y, n_classes, config, seed, fit_aum)


def score(frame: RowFrame, config: Config, client: Client) -> Scores:
    """:func:`leanset.scores.dynamics.score` on the Dask cluster of ``client``: same folds, seeds, columns and ``info`` keys.

    Returns
    -------
    Scores
        Proxies are the fold models of the first repeat.

    Raises
    ------
    ConfigError
        For the linear proxy or a CSV input (:func:`leanset.config.check_engine`).
    """
    check_engine(config)
    with client.as_current():  # lightgbm.dask waits on futures through the current client
        return _score(frame, config, client)


def _score(frame: RowFrame, config: Config, client: Client) -> Scores:
    # many classes: the local stage's fewer rounds at a raised rate (models.proxy.class_rounds)
    config = config.model_copy(update={"proxy": class_rounds(config.proxy, len(frame.classes))})
    pc = config.proxy
    train = frame.train
    y = frame.y[train]
    n_classes = len(frame.classes)
    fitter = Fitter(load_shards(client, frame, config), frame, config)
    runs, proxies = [], []
    for r in range(pc.repeats):
        fold, seeds = repeat_folds(frame, config, r)
        out, models = _cross_fit(fitter, y, fold, n_classes, pc, seeds, locus_seed(config))
        runs.append(out)
        proxies = proxies or models
    table = pd.DataFrame({name: np.mean([o[name] for o in runs], axis=0) for name in SCORE_NAMES})
    table["never_learned"] = np.logical_and.reduce([o["never_learned"] for o in runs])
    if "locus" in runs[0]:
        table["locus"] = runs[0]["locus"]
    info: dict = {"repeats": pc.repeats, "stability": stability(runs) if pc.repeats > 1 else None, "dask_fits": fitter.choice}
    suspect = pd.array(np.full(len(y), pd.NA), dtype="boolean")
    if wants_threshold_samples(config) and n_classes:
        t0 = time.perf_counter()
        flags, info["label_errors"] = threshold_samples(fitter, y, n_classes, pc, config.seed)
        info["timings"] = {"threshold_samples": round(time.perf_counter() - t0, 3)}
        suspect = pd.array(flags, dtype="boolean")
    table["suspect_label"] = suspect
    return Scores(table=table, proxies=proxies, checkpoints=n_checkpoints(pc), info=info)
