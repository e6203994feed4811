"""Preflight: everything about a run that can be checked before the first fit.

:func:`preflight` reads the table's schema, label and id columns and scans its float feature
columns (:func:`leanset.table.check_input`), checks that the store can be created and written,
that the proxy's and the target's LightGBM parameters pass LightGBM's own parameter check on a
tiny invented dataset, and that a scikit-learn target is importable, constructible with its
parameters and accepted by scikit-learn's own parameter check. Nothing is written: the store
probe is a temporary file, removed at once.
"""

from __future__ import annotations

import contextlib
import importlib
import os
import re
import tempfile
import warnings
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np

import pyarrow as pa

from .config import Config, ProxyConfig, TargetConfig, check_engine
from .errors import ConfigError, StoreError
from .load.memory import release_memory
from .load.table import InputSummary, check_input

#: Rows of the invented dataset the LightGBM parameters are tried on.
_TINY_ROWS = 60


class Checked(NamedTuple):
    """What :func:`preflight` returns: the hash of the config it passed (``Config.section_hash``)
    and what it learned of the table. Handed to a flow, it spares the flow a second check of the
    same config (:func:`ensure_checked`)."""

    config_hash: str
    summary: InputSummary


def preflight(config: Config, table: pa.Table | None = None) -> Checked:
    """Check the table, the store, the proxy and the target of ``config`` before any fit.

    Parameters
    ----------
    config : Config
    table : pyarrow.Table, optional
        The input rows in memory, checked in place of ``input.path``.

    Returns
    -------
    Checked
        The config's hash and the task, rows, classes and features of the table.

    Raises
    ------
    LeansetError
        ``InputError``, ``ConfigError`` or ``StoreError`` naming the file, column, key or value
        at fault, and the fix.
    """
    summary = check_input(config, table)
    release_memory()  # the row groups decoded by the table scan
    # the checks that need no LightGBM, scikit-learn or Dask first: their refusals come fastest
    check_engine(config)
    check_store(config.store)
    check_settings(config, summary)
    return Checked(config.section_hash(), summary)


def ensure_checked(config: Config, checked: Checked | None = None) -> None:
    """Run :func:`preflight` unless ``checked`` is what it returned for this very config (same
    hash): the command checks before the flow starts and hands the flow its token, so a run is
    checked once; a flow started any other way (a deployment, a script) checks for itself."""
    if checked is None or checked[0] != config.section_hash():
        preflight(config)


def check_settings(config: Config, summary: InputSummary) -> None:
    """Settings that depend on each other or on the table: checkpoints, proxy and target parameters."""
    pc = config.proxy
    if pc.family == "gbdt":
        if pc.checkpoint_every > pc.rounds:
            raise ConfigError(f"proxy.checkpoint_every: {pc.checkpoint_every} is more than proxy.rounds ({pc.rounds}), "
                              "so no checkpoint would be taken; lower it or raise proxy.rounds")
        if pc.threshold_rounds is not None and pc.threshold_rounds < pc.checkpoint_every:
            raise ConfigError(f"proxy.threshold_rounds: {pc.threshold_rounds} is less than proxy.checkpoint_every "
                              f"({pc.checkpoint_every}); raise it or leave it unset")
        check_proxy(pc, summary, config.seed)
    check_target(config.target, summary, config.seed)


def check_store(store: Path) -> None:
    """Refuse a store that cannot be created or written, before anything is computed.

    Every existing part of the path must be a folder (``runs`` and ``.lock`` inside the store
    too), and the deepest existing folder must take a new file.

    Raises
    ------
    StoreError
    """
    store = Path(store)
    fix = "pass another --store or set store in the config"
    for name, must_be_dir in (("runs", True), (".lock", False)):
        inside = store / name
        if inside.exists() and inside.is_dir() != must_be_dir:
            kind = "a file" if must_be_dir else "a folder"
            raise StoreError(f"store: {inside} is {kind}, not the {'runs folder' if must_be_dir else 'lock file'} leanset writes; move it away or {fix}")
    existing = store
    while not existing.exists():
        if existing.parent == existing:
            break
        existing = existing.parent
    if not existing.is_dir():
        under = "" if existing == store else f", so the store {store} cannot be created under it"
        raise StoreError(f"store: {existing} is a file, not a folder{under}; {fix}")
    probe_dir = store / "runs" if (store / "runs").is_dir() else existing
    try:
        fd, probe = tempfile.mkstemp(prefix=".leanset-probe-", dir=probe_dir)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise StoreError(f"store: {probe_dir} cannot be written ({exc.strerror}); fix its permissions or {fix}") from None


def _tiny(summary: InputSummary, seed: int) -> tuple[np.ndarray, np.ndarray, list[int]]:
    """An invented dataset shaped like the table: its feature count, its classes (or a continuous label)."""
    rng = np.random.default_rng(seed)
    X = rng.normal(size=(_TINY_ROWS, summary.n_features))
    categorical = list(range(summary.n_features - summary.n_categorical, summary.n_features))
    X[:, categorical] = rng.integers(0, 3, size=(_TINY_ROWS, len(categorical)))
    y = rng.normal(size=_TINY_ROWS) if summary.task == "regression" else np.arange(_TINY_ROWS) % max(summary.n_classes, 2)
    return X, y, categorical


@contextlib.contextmanager
def _quiet_fd(fd: int):
    """Send what native code writes to file descriptor ``fd`` to a temporary file; yields that file."""
    with tempfile.TemporaryFile(mode="w+") as sink:
        saved = os.dup(fd)
        try:
            os.dup2(sink.fileno(), fd)
            yield sink
        finally:
            os.dup2(saved, fd)
            os.close(saved)


def _lightgbm_refusal(params: dict[str, Any], rounds: int, X, y, categorical) -> str | None:
    """LightGBM's own verdict on ``params``: None when one boosting round trains on (X, y), else the
    reason in one line (its source path left out). An unknown parameter name counts as a refusal."""
    import io

    import lightgbm as lgb

    text = io.StringIO()
    try:
        with warnings.catch_warnings(), contextlib.redirect_stdout(text), _quiet_fd(1), _quiet_fd(2):
            warnings.simplefilter("ignore")
            # verbosity 0 so that LightGBM names the parameters it does not know
            data = lgb.Dataset(X, label=y, categorical_feature=categorical or "auto", params={**params, "verbose": 0})
            lgb.train({**params, "verbose": 0}, data, num_boost_round=min(rounds, 1))
    except lgb.basic.LightGBMError as exc:
        return re.sub(r"\s+at /\S+, line \d+\s*\.?", "", str(exc)).strip()
    except (ValueError, TypeError) as exc:
        return str(exc).splitlines()[0]
    unknown = re.findall(r"Unknown parameter: (\S+)", text.getvalue())
    return f"unknown parameter '{unknown[0]}'" if unknown else None


def _lightgbm_check(section: str, base: dict[str, Any], user: dict[str, Any], rounds: int, summary: InputSummary, seed: int) -> None:
    """Raise a ConfigError naming the key of ``user`` that LightGBM refuses, when it refuses ``base``."""
    X, y, categorical = _tiny(summary, seed)
    reason = _lightgbm_refusal(base, rounds, X, y, categorical)
    if reason is None:
        return
    defaults = {k: v for k, v in base.items() if k not in user}
    culprit = next((k for k in user if _lightgbm_refusal({**defaults, k: user[k]}, rounds, X, y, categorical)), None)
    where = f"{section}.{culprit}: {user[culprit]!r}" if culprit else section
    raise ConfigError(f"{where}: LightGBM refuses it ({reason}); fix the value or remove the key")


def _rounds(section: str, params: dict[str, Any], default: int) -> int:
    """``num_boost_round`` (or ``n_estimators``) of a target's parameters, checked to be a positive whole number."""
    for key in ("num_boost_round", "n_estimators"):
        if key in params:
            value = params[key]
            if isinstance(value, bool) or not isinstance(value, (int, float)) or value != int(value) or value < 1:
                raise ConfigError(f"{section}.{key}: {value!r} is not a positive whole number of boosting rounds; fix it")
            return int(value)
    return default


def check_proxy(config: ProxyConfig, summary: InputSummary, seed: int) -> None:
    """The gbdt proxy's LightGBM parameters (``proxy.params`` over leanset's defaults) pass LightGBM's check.

    Raises
    ------
    ConfigError
        Naming the ``proxy.params`` key LightGBM refuses and its reason.
    """
    from .models.proxy import gbdt_params

    params = gbdt_params(summary.n_classes if summary.task != "regression" else 0, config, seed)
    _lightgbm_check("proxy.params", params, dict(config.params), config.rounds, summary, seed)


def check_target(config: TargetConfig, summary: InputSummary, seed: int) -> None:
    """The target is trainable as configured: LightGBM's check of its parameters, or a scikit-learn
    estimator that imports, constructs with ``target.params``, passes scikit-learn's parameter
    check and predicts what the task needs (``predict_proba`` for classes).

    Raises
    ------
    ConfigError
        Naming ``target.estimator`` or the ``target.params`` key at fault, and the fix.
    """
    from .models.target import LIGHTGBM_DEFAULTS, LIGHTGBM_ROUNDS, _sklearn_estimator

    n_classes = 0 if summary.task == "regression" else summary.n_classes
    if config.family == "lightgbm":
        params = {**LIGHTGBM_DEFAULTS, **config.params, "seed": seed}
        rounds = _rounds("target.params", params, LIGHTGBM_ROUNDS)
        params = {k: v for k, v in params.items() if k not in ("num_boost_round", "n_estimators")}
        params.update({"objective": "regression"} if n_classes == 0 else
                      {"objective": "multiclass", "num_class": n_classes} if n_classes > 2 else {"objective": "binary"})
        user = {k: v for k, v in config.params.items() if k not in ("num_boost_round", "n_estimators")}
        _lightgbm_check("target.params", params, user, rounds, summary, seed)
        return
    if config.estimator:
        module, _, name = config.estimator.rpartition(".")
        try:
            found = getattr(importlib.import_module(module), name, None)
        except ImportError as exc:
            raise ConfigError(f"target.estimator: cannot import module '{module}' ({exc}); check the module path, or install it") from None
        if found is None:
            raise ConfigError(f"target.estimator: module '{module}' has no '{name}'; check the class name and its spelling")
        if not isinstance(found, type) or not all(hasattr(found, m) for m in ("fit", "predict", "get_params")):
            raise ConfigError(f"target.estimator: '{config.estimator}' is not a scikit-learn estimator class (with fit, predict and get_params); name one")
    try:
        est = _sklearn_estimator(config, seed)
    except (ValueError, TypeError, AttributeError) as exc:
        raise ConfigError(f"target.params: {str(exc).splitlines()[0].rstrip('.')}; fix the parameters of {config.estimator}") from None
    validate = getattr(est, "_validate_params", None)  # scikit-learn's own parameter-constraint check, without data
    if validate is not None:
        try:
            validate()
        except (ValueError, TypeError) as exc:
            raise ConfigError(f"target.params: {str(exc).splitlines()[0].rstrip('.')}; fix the parameters of {config.estimator}") from None
    from sklearn.base import is_classifier

    if not n_classes and is_classifier(est):
        raise ConfigError(f"target.estimator: {config.estimator} is a classifier but the label is continuous (regression); name a regressor")
    if n_classes and not hasattr(est, "predict_proba"):
        raise ConfigError(f"target.estimator: {config.estimator} gives no class probabilities (predict_proba) as configured; "
                          "choose a classifier that does, or set its option for them (e.g. probability: true)")
