"""Configuration: one YAML file validated into one typed, frozen object.

Paths inside a config file are resolved against the file's own folder, so a config
and its table can move together. Unknown keys are refused, naming the key.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Annotated, Any, Literal

import yaml
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from .errors import ConfigError

SCORE_NAMES = (
    "forgetting", "aum", "el2n", "confidence", "variability",
    "correctness", "aleatoric", "oof_loss", "oof_margin",
)
METRICS = ("accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "log_loss", "rmse", "mae", "r2")
REGRESSION_METRICS = ("rmse", "mae", "r2")


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class InputConfig(_Section):
    path: Path
    label: str
    id: str | None = None
    features: list[str] | None = None
    exclude: list[str] = Field(default_factory=list)
    task: Literal["auto", "classification", "regression"] = "auto"
    segments: list[str] = Field(default_factory=list)


class HoldoutConfig(_Section):
    fraction: float = Field(0.2, gt=0, lt=1)


class ProxyConfig(_Section):
    family: Literal["gbdt", "linear"] = "gbdt"
    folds: int = Field(5, ge=2, le=20)
    rounds: int = Field(60, ge=2)
    checkpoint_every: int = Field(5, ge=1)
    epochs: int = Field(10, ge=2)
    el2n_at: float = Field(0.2, gt=0, le=1)
    params: dict[str, Any] = Field(default_factory=dict)
    repeats: int = Field(1, ge=1, le=20)
    residual_band: float | None = Field(None, gt=0)
    residual_quantile: float = Field(0.25, gt=0, lt=1)
    threshold_samples: bool = True
    threshold_percentile: float = Field(90.0, gt=0, lt=100)
    threshold_share: float = Field(0.1, gt=0, le=0.5)
    threshold_rounds: int | None = Field(None, ge=2)
    agreement_rows: int = Field(2000, ge=0)
    agreement_floor: float = Field(0.3, ge=-1, le=1)


class SelectionConfig(_Section):
    fraction: Annotated[float, Field(gt=0, le=1)] | Literal["auto"] = 0.3
    grid: list[Annotated[float, Field(gt=0, le=1)]] = Field(default_factory=lambda: [0.05, 0.1, 0.2, 0.3, 0.5, 0.7], min_length=1)
    strategy: Literal["stratified", "hardest", "easiest", "random", "importance"] = "stratified"
    score: Literal[SCORE_NAMES] = "aum"  # type: ignore[valid-type]
    quotas: Literal["balanced", "proportional"] = "balanced"
    class_floor: int = Field(50, ge=0)
    strata: int = Field(50, ge=1)
    hard_cut: float = Field(0.05, ge=0, lt=1)
    weights: Literal["class_prior", "none"] = "class_prior"
    hysteresis: float = Field(0.1, ge=0, le=1)
    drop_suspect_labels: bool = False
    segment_floor: int = Field(20, ge=0)
    dedupe: bool = True
    validation: float = Field(0.2, gt=0, lt=1)
    tilt: Annotated[float, Field(gt=-1, lt=1)] | Literal["auto"] = "auto"


class TargetConfig(_Section):
    family: Literal["lightgbm", "sklearn"] = "lightgbm"
    estimator: str | None = None
    params: dict[str, Any] = Field(default_factory=dict)

    @field_validator("estimator")
    @classmethod
    def _dotted(cls, v: str | None) -> str | None:
        if v is not None and "." not in v:
            raise ValueError(f"'{v}' is not an import path; write it as module.Class, e.g. sklearn.ensemble.HistGradientBoostingClassifier")
        return v


class VerifyConfig(_Section):
    metric: Literal[METRICS] = "accuracy"  # type: ignore[valid-type]
    tolerance: float = Field(0.01, ge=0)
    class_tolerance: float = Field(0.10, ge=0)
    segment_tolerance: float = Field(0.05, ge=0)
    calibration_tolerance: float = Field(0.25, ge=0)
    random_repeats: int = Field(3, ge=1)
    bootstrap: int = Field(1000, ge=100)
    confidence: float = Field(0.95, gt=0.5, lt=1)


class ExecutionConfig(_Section):
    engine: Literal["local", "dask"] = "local"
    address: str | None = None
    workers: int = Field(2, ge=1, le=64)
    dask_fits: Literal["data_parallel", "fold_parallel"] = "data_parallel"
    batch_rows: int = Field(65_536, ge=100)
    feature_memory_mb: float = Field(1024, ge=0)


class Config(_Section):
    input: InputConfig
    holdout: HoldoutConfig = HoldoutConfig()
    proxy: ProxyConfig = ProxyConfig()
    selection: SelectionConfig = SelectionConfig()
    target: TargetConfig = TargetConfig()
    verify: VerifyConfig = VerifyConfig()
    execution: ExecutionConfig = ExecutionConfig()
    store: Path = Path("leanset-store")
    seed: int = Field(0, ge=0)

    def section_hash(self, *sections: str) -> str:
        """Short hash of the named sections (all of them when none is named)."""
        data = self.model_dump(mode="json")
        if sections:
            data = {s: data[s] for s in sections}
        return hashlib.sha256(json.dumps(data, sort_keys=True).encode()).hexdigest()[:16]


def _first_error(err: ValidationError, source: str) -> ConfigError:
    e = err.errors()[0]
    # pydantic adds union-member tags such as 'constrained-float' to the location; users never wrote them
    where = ".".join(str(p) for p in e["loc"] if not any(ch in str(p) for ch in "-[(")) or "<top>"
    if e["type"] == "extra_forbidden":
        return ConfigError(f"{source}: unknown key '{where}'; remove it or check its spelling")
    if e["type"] == "missing":
        return ConfigError(f"{source}: missing key '{where}'; add it")
    return ConfigError(f"{source}: {where}: {e['msg']} (got {e.get('input')!r})")


def load_config(path: str | Path, overrides: dict[str, Any] | None = None) -> Config:
    """Read a YAML config, apply dotted-key overrides, validate, and resolve paths.

    Parameters
    ----------
    path : str or Path
        The YAML file.
    overrides : dict, optional
        Values keyed by dotted path, e.g. ``{"selection.fraction": 0.2}``; ``None`` values are
        ignored. They are applied after path resolution, so relative paths in them stay as given.

    Returns
    -------
    Config
    """
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"{path}: config file not found; pass the path of a YAML config")
    try:
        raw = yaml.safe_load(path.read_text()) or {}
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: not valid YAML ({str(exc).splitlines()[0]}); fix the file") from None
    if not isinstance(raw, dict):
        raise ConfigError(f"{path}: the top level must be a mapping of sections")
    base = path.resolve().parent
    for section, key in (("input", "path"), (None, "store")):
        node = raw.get(section) if section else raw
        if isinstance(node, dict) and node.get(key) is not None and not Path(str(node[key])).is_absolute():
            node[key] = str(base / str(node[key]))
    for dotted, value in (overrides or {}).items():
        if value is None:
            continue
        node = raw
        *parents, leaf = dotted.split(".")
        for p in parents:
            if node.get(p) is None:
                node[p] = {}
            node = node[p]
            if not isinstance(node, dict):
                raise ConfigError(f"{path}: cannot set '{dotted}': '{p}' is not a section; fix the override or the file")
        node[leaf] = value
    try:
        return Config.model_validate(raw)
    except ValidationError as err:
        raise _first_error(err, str(path)) from None
