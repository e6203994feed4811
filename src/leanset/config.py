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
    "correctness", "aleatoric", "oof_loss", "oof_margin", "oof_entropy",
)
METRICS = ("accuracy", "balanced_accuracy", "macro_f1", "roc_auc", "log_loss", "rmse", "mae", "r2")
REGRESSION_METRICS = ("rmse", "mae", "r2")


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class InputConfig(_Section):
    path: Path = Field(description=(
        "Parquet file, folder of parquet files, or CSV/TSV file; a relative path is read from the config file's "
        "folder."))
    label: str = Field(description="Label column: classes as strings, integers or booleans, or numbers for regression.")
    id: str | None = Field(None, description=(
        "Unique row-id column; when absent a stable id is derived from the row's content and its occurrence index"
        " (`<hash>-<k>`) and added to `kept.parquet` as `row_id`."))
    features: list[str] | None = Field(None, description=(
        "Feature columns (default: every other column); numbers and booleans are used as float32, strings become "
        "categorical codes."))
    exclude: list[str] = Field(default_factory=list, description="Columns to leave out of the features.")
    task: Literal["auto", "classification", "regression"] = Field("auto", description=(
        "`auto` means regression when the label is a float column holding non-integer values; a label of whole "
        "numbers stays classes unless this is set to `regression`."))
    segments: list[str] = Field(default_factory=list, description=(
        "Columns naming groups to protect (region, device type): each keeps its share and a floor, and is checked"
        " in verification."))


class HoldoutConfig(_Section):
    fraction: float = Field(0.2, gt=0, lt=1, description=(
        "Share of each class held out, by seeded hash of the row id, and never pruned."))


class ProxyConfig(_Section):
    family: Literal["gbdt", "linear"] = Field("gbdt", description=(
        "`gbdt` = LightGBM; `linear` = SGD logistic regression on standardised numeric and one-hot categorical "
        "features."))
    folds: int = Field(2, ge=2, le=20, description="Cross-fitting folds K (2 by default: the cheap proxy, docs/economics.md).")
    rounds: int = Field(60, ge=2, description="`gbdt`: boosting rounds of each fold model.")
    checkpoint_every: int = Field(5, ge=1, description=(
        "`gbdt`: boosting rounds between two checkpoints at which the training dynamics are read."))
    max_trees: int | None = Field(800, ge=2, description=(
        "`gbdt` with more than two classes (one tree per class a round): when rounds × classes exceeds this, each "
        "fold model gets max_trees // classes rounds at a learning rate raised by the same factor (at most 0.25); "
        "unset keeps `rounds` (docs/economics.md)."))
    epochs: int = Field(10, ge=2, description="`linear`: epochs, one checkpoint each.")
    el2n_at: float = Field(0.2, gt=0, le=1, description=(
        "EL2N is read at this share of the checkpoints (early in training, as in the EL2N paper)."))
    params: dict[str, Any] = Field(default_factory=dict, description=(
        "Extra LightGBM or SGDClassifier (SGDRegressor for regression) parameters."))
    repeats: int = Field(1, ge=1, le=20, description=(
        "Cross-fitting passes on fresh seeded folds and proxy seeds; each score is the mean over passes and "
        "`run.json` reports its stability (`scores.stability`)."))
    residual_band: float | None = Field(None, gt=0, description=(
        "Regression: largest |ŷ − y| that counts as correct; when unset, the `residual_quantile` of |y − "
        "median(y)| over training rows."))
    residual_quantile: float = Field(0.25, gt=0, lt=1, description=(
        "Regression: quantile of |y − median(y)| that sets the band when `residual_band` is unset."))
    threshold_samples: bool | Literal["auto"] = Field("auto", description=(
        "Flag suspected label errors by AUM threshold samples (two extra proxy fits); `auto` runs them only when "
        "`selection.drop_suspect_labels` is on."))
    threshold_percentile: float = Field(90.0, gt=0, lt=100, description=(
        "Percentile of the threshold rows' AUM that sets the suspected-label cut-off."))
    threshold_share: float = Field(0.1, gt=0, le=0.5, description=(
        "Largest share of rows given the fake class in one threshold-sample pass."))
    threshold_rounds: int | None = Field(None, ge=2, description=(
        "`gbdt`: boosting rounds of each threshold-sample pass; when unset, half of `rounds`."))
    agreement_rows: int = Field(2000, ge=0, description=(
        "Proxy–target agreement: rows sampled to cross-fit the target on (0 turns the check off)."))
    agreement_folds: int = Field(2, ge=2, le=20, description=(
        "Proxy–target agreement: folds of the target's cross-fit within the sample."))
    agreement_rounds: int | None = Field(10, ge=2, description=(
        "Proxy–target agreement: at most this many target boosting rounds on the sample, one thread, the learning "
        "rate raised by the same factor (capped at 0.5); unset keeps the target's own rounds."))
    agreement_floor: float = Field(0.3, ge=-1, le=1, description=(
        "Spearman correlation between proxy difficulty and target loss below which the summary warns (a weak "
        "correlation: common practice, no source)."))


class SelectionConfig(_Section):
    fraction: Annotated[float, Field(gt=0, le=1)] | Literal["auto"] = Field(0.3, description=(
        "Share of the training rows to keep, or `auto`: the smallest fraction that passes verification."))
    grid: list[Annotated[float, Field(gt=0, le=1)]] = Field(default_factory=lambda: [0.05, 0.1, 0.2, 0.3, 0.5, 0.7], min_length=1, description=(
        "Fractions tried by `fraction: auto` and by `leanset frontier`."))
    strategy: Literal["stratified", "hardest", "easiest", "random", "importance"] = Field("stratified", description=(
        "Selection rule within each class: `stratified`, `hardest`, `easiest`, `random` or `importance` (a tilted "
        "draw reweighted by 1/inclusion probability; docs/selection.md)."))
    score: Literal[SCORE_NAMES] = Field("aum", description=(  # type: ignore[valid-type]
        "The score column that ranks difficulty; leanset orients it so that higher means harder."))
    quotas: Literal["balanced", "proportional"] = Field("proportional", description=(
        "Class quotas: `balanced` (water-filling: equal counts, a small class keeps all its rows and what it "
        "leaves goes to the larger ones) or `proportional` (each class keeps its share)."))
    class_floor: int = Field(50, ge=0, description=(
        "Every class keeps at least min(n_c, class_floor) rows; if the floors exceed the budget, the budget grows"
        " and the summary says by how much."))
    strata: Annotated[int, Field(ge=1)] | Literal["auto"] = Field("auto", description=(
        "`stratified`: difficulty bins per class, or `auto`: one bin (a uniform draw within each class) while "
        "less than 70 % of the rows are kept, and 50 from 70 % on; docs/selection.md."))
    spread: bool = Field(False, description=(
        "`stratified`: within a bin, take rows evenly along the score stage's locality key (score column `locus`), "
        "so the kept rows cover the feature space and near-copies are not kept twice before other rows once; "
        "`false`: a uniform draw within each bin. Helps on tables of many near-copies (docs/selection.md)."))
    hard_cut: float = Field(0.0, ge=0, lt=1, description=(
        "`stratified`: hardest share of each class set aside first as likely label noise."))
    weights: Literal["class_prior", "none"] = Field("class_prior", description=(
        "`class_prior`: kept rows carry a `weight` so that weighted class shares equal the full table's; `none`: "
        "weight 1."))
    hysteresis: float = Field(0.1, ge=0, le=1, description=(
        "On a store with a run of this lineage: a row keeps its last decision unless its percentile of difficulty"
        " within its class moved by more than this."))
    drop_suspect_labels: bool | Literal["auto", "share"] = Field("auto", description=(
        "Rows whose `suspect_label` is true: `true` drops them all (`drop:suspect_label`); `share` keeps a uniform "
        "draw of `fraction` of each class's suspects (`keep:suspect_share`) and drops the rest, so the kept rows "
        "hold them at the table's rate; `false` leaves them to the rule; `auto` is `share` while at most "
        "`suspect_limit` of the training rows are flagged, `false` above (docs/selection.md). The budget stays "
        "round(fraction × training rows)."))
    suspect_limit: float = Field(0.2, gt=0, le=1, description=(
        "`drop_suspect_labels: auto`: when more than this share of training rows is flagged, the flags mark "
        "overlapping classes rather than wrong labels, and flagged rows are left to the rule (the summary says so)."))
    segment_floor: int = Field(20, ge=0, description=(
        "Every value of every segment column keeps at least min(n_v, segment_floor) rows."))
    dedupe: bool = Field(True, description=(
        "Exact duplicates (same features and label) collapse to their first occurrence, which carries "
        "`dup_count`."))
    validation: float = Field(0.2, gt=0, lt=1, description=(
        "`fraction: auto`: share of the training rows (stratified, seeded) held aside to choose the fraction, so "
        "the holdout judges the chosen fraction once."))
    tilt: Annotated[float, Field(gt=-1, lt=1)] | Literal["auto"] = Field("auto", description=(
        "`importance`: how far the draw leans toward hard rows (positive) or easy rows (negative); `auto` sets it "
        "from the fraction."))


class TargetConfig(_Section):
    family: Literal["lightgbm", "sklearn"] = Field("lightgbm", description=(
        "`lightgbm` (parameters in `params`, `num_boost_round` default 300) or `sklearn`."))
    estimator: str | None = Field(None, description=(
        "With `sklearn`: import path of an estimator class, e.g. "
        "`sklearn.ensemble.HistGradientBoostingClassifier`."))
    params: dict[str, Any] = Field(default_factory=dict, description="Parameters of the target model.")

    @field_validator("estimator")
    @classmethod
    def _dotted(cls, v: str | None) -> str | None:
        if v is not None and "." not in v:
            raise ValueError(f"'{v}' is not an import path; write it as module.Class, e.g. sklearn.ensemble.HistGradientBoostingClassifier")
        return v


class VerifyConfig(_Section):
    metric: Literal[METRICS] = Field("accuracy", description=(  # type: ignore[valid-type]
        "Holdout metric, from `sklearn.metrics` (`roc_auc` is macro one-vs-rest for multiclass); on a regression "
        "table `rmse`, `mae` or `r2`, and `rmse` by default."))
    tolerance: float = Field(0.01, ge=0, description=(
        "Largest acceptable Δ = metric(full) − metric(kept), in the metric's own units."))
    class_tolerance: float = Field(0.10, ge=0, description="Largest acceptable drop of any class's recall.")
    segment_tolerance: float = Field(0.05, ge=0, description=(
        "Largest acceptable Δ of the metric within any segment value."))
    calibration_tolerance: float = Field(0.25, ge=0, description=(
        "Largest acceptable relative excess of the kept model's calibration loss (Brier score, or log loss with "
        "more than two classes) over the full model's; the guard fails when the interval's lower end is above it."))
    random_repeats: int = Field(3, ge=1, description=(
        "Same-size uniform random subsets trained for the baseline; their spread widens the random interval."))
    bootstrap: int = Field(1000, ge=100, description="Paired bootstrap resamples of the holdout.")
    confidence: float = Field(0.95, gt=0.5, lt=1, description="Level of the bootstrap intervals.")
    reuse_full_fit: bool = Field(True, description=(
        "Keep the LightGBM target fitted on all training rows under the store's cache and reuse it in a later run "
        "whose training rows, target section and seed are unchanged (docs/economics.md)."))
    every: int = Field(1, ge=1, description=(
        "Verify every Nth run of a lineage; the runs between carry the last verdict, marked `carried`."))
    max_new_rows: float | None = Field(0.1, ge=0, le=1, description=(
        "A fresh verification is forced when the share of new rows since the last verified run exceeds this."))
    max_churn: float | None = Field(0.1, ge=0, le=1, description=(
        "A fresh verification is forced when the churn of decisions since the last verified run exceeds this."))


class ExecutionConfig(_Section):
    engine: Literal["local", "dask"] = Field("local", description=(
        "`local`, or `dask`: the score stage runs on a Dask cluster."))
    address: str | None = Field(None, description=(
        "`dask`: scheduler address of an existing cluster (`tcp://host:8786`); when unset, a local cluster of "
        "`workers` processes is started and closed."))
    workers: int = Field(2, ge=1, le=64, description=(
        "`dask`: processes of the local cluster started when `address` is unset."))
    dask_fits: Literal["auto", "data_parallel", "fold_parallel"] = Field("auto", description=(
        "`dask`: `data_parallel` trains each proxy with `lightgbm.dask` over all workers; `fold_parallel` trains "
        "each proxy whole on one worker, so the decisions equal a local run's; `auto` picks `fold_parallel` when "
        "a whole fit (about training rows x (features + 16 x classes) bytes) fits in half the smallest worker's "
        "memory limit, else `data_parallel`."))
    batch_rows: int = Field(65_536, ge=100, description=(
        "Rows per record batch when the table is read, binned, scored and written."))
    feature_memory_mb: float = Field(1024, ge=0, description=(
        "The float32 feature matrix is held in memory when it fits in this many MiB; a larger table is read from "
        "disk in batches."))


class Config(_Section):
    input: InputConfig = Field(description="The table and its columns.")
    holdout: HoldoutConfig = Field(HoldoutConfig(), description="The never-pruned holdout.")
    proxy: ProxyConfig = Field(ProxyConfig(), description="The cheap proxy model and the scores read from it.")
    selection: SelectionConfig = Field(SelectionConfig(), description="Which rows to keep.")
    target: TargetConfig = Field(TargetConfig(), description="The target model trained in verification.")
    verify: VerifyConfig = Field(VerifyConfig(), description="How the kept rows are judged.")
    execution: ExecutionConfig = Field(ExecutionConfig(), description="Where and in what batches the work runs.")
    store: Path = Field(Path("leanset-store"), description=(
        "Folder that receives `runs/`; a relative path is read from the config file's folder."))
    seed: int = Field(0, ge=0, description=(
        "Seeds every random choice: holdout, folds, proxies, tie-breaks, random baseline, bootstrap."))

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
    return parse_config(raw, overrides, str(path))


def parse_config(raw: dict[str, Any], overrides: dict[str, Any] | None = None, source: str = "config") -> Config:
    """Apply dotted-key overrides to a mapping of sections (``raw`` is changed) and validate it.

    ``source`` names the config in error messages.

    Raises
    ------
    ConfigError
        Naming the key at fault and the fix.
    """
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
                raise ConfigError(f"{source}: cannot set '{dotted}': '{p}' is not a section; fix the override or the file")
        node[leaf] = value
    try:
        return Config.model_validate(raw)
    except ValidationError as err:
        raise _first_error(err, source) from None


def check_engine(config: Config) -> None:
    """Refuse what ``execution.engine: dask`` cannot run, before a cluster starts (and without
    importing Dask): the linear proxy, or a CSV input.

    Raises
    ------
    ConfigError
    """
    if config.execution.engine != "dask":
        return
    if config.proxy.family != "gbdt":
        raise ConfigError("proxy.family linear runs on the local engine only; use gbdt or execution.engine local")
    if config.input.path.is_file() and config.input.path.suffix.lower() in (".csv", ".tsv", ".txt"):
        raise ConfigError(f"input.path: {config.input.path} is a CSV file and execution.engine dask reads parquet only; convert it to parquet or use execution.engine local")
