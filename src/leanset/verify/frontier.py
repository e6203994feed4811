"""How much to keep: the metric-vs-fraction frontier and the search for the smallest passing fraction.

Both reuse one scoring pass and one full-data target fit: a :class:`FractionEvaluator` holds the
full model's holdout predictions and evaluates any (fraction, strategy) against them.
"""

from __future__ import annotations

import io
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from ..config import Config
from ..scores.dynamics import Scores
from ..select.frame import select_frame
from ..load.rows import RowFrame
from ..load.split import validation_split
from ..models.target import fit_timed
from .stats import calibration, calibration_interval, metric_interval, metric_value
from .verdict import Reference, compare

DEFAULT_GRID = (0.05, 0.1, 0.2, 0.3, 0.5, 0.7)
STRATEGIES = ("stratified", "hardest", "easiest", "random")


class FractionEvaluator:
    """Train the target on all pool rows once; judge kept sets of any size against it.

    By default the pool is every training row and the judge is the holdout. With ``validation``
    the judge is a seeded stratified slice of the training rows (``selection.validation``) and the
    pool the rest, so the holdout is never read: the fraction search looks there as often as it
    likes and leaves the holdout an unbiased judge of the one fraction it picks.

    Parameters
    ----------
    frame : RowFrame
    scores : Scores
    config : Config
    validation : bool
    """

    def __init__(self, frame: RowFrame, scores: Scores, config: Config, validation: bool = False):
        self.frame, self.scores, self.config = frame, scores, config
        train = frame.train
        if validation:
            self.pool, judge_local = validation_split(frame.groups[train], config.selection.validation, config.seed)
            judge = train[judge_local]
        else:
            self.pool, judge = np.arange(len(train)), np.flatnonzero(frame.holdout)
        self.X, self.X_hold = frame.feature_rows(train[self.pool]), frame.features(judge)
        self.y, self.y_hold = frame.y[train[self.pool]], frame.y[judge]
        self.segments_hold = None if frame.segments is None else frame.segments[judge]
        self.full_model_, self.full_seconds_ = fit_timed(self.X, self.y, None, len(frame.classes), frame.categorical,
                                                         config.target, config.seed)
        self.proba_full_ = self.full_model_.predict_proba(self.X_hold)

    @property
    def reference(self) -> Reference:
        """The full-data fit and the feature rows it used, for :func:`~leanset.verify.verdict.verify` to reuse."""
        return Reference(self.full_model_, self.full_seconds_, self.X, self.X_hold)

    def _fit(self, idx: np.ndarray, weight: np.ndarray | None, seed: int) -> tuple[np.ndarray, float]:
        model, seconds = fit_timed(self.X[idx], self.y[idx], weight, len(self.frame.classes), self.frame.categorical,
                                   self.config.target, seed)
        return model.predict_proba(self.X_hold), seconds

    def point(self, fraction: float, strategy: str, size: int | None = None, selection=None) -> dict[str, Any]:
        """Evaluate one fraction and strategy; ``random`` means uniform subsets of ``size`` rows (default
        ``fraction`` of the pool), repeated ``verify.random_repeats`` times. ``selection`` replaces
        ``config.selection`` (its fraction and strategy are set from the arguments)."""
        cfg = self.config
        rng = np.random.default_rng([cfg.seed, 0xF407, int(round(fraction * 1e6))])
        if strategy == "random":
            size = size or max(1, int(round(fraction * len(self.y))))
            fits = [self._fit(np.sort(rng.choice(len(self.y), size=size, replace=False)), None, cfg.seed + r)
                    for r in range(cfg.verify.random_repeats)]
            kept = size
        else:
            sel_cfg = (selection or cfg.selection).model_copy(update={"fraction": fraction, "strategy": strategy})
            sel = select_frame(self.frame, self.scores, cfg, sel_cfg, rows=self.pool)
            idx = np.flatnonzero(sel.keep)
            w = sel.weight[idx]
            fits = [self._fit(idx, None if np.allclose(w, 1.0) else w, cfg.seed)]
            kept = len(idx)
        probas = [p for p, _ in fits]
        m = cfg.verify.metric
        lo, hi = metric_interval(self.y_hold, probas, m, cfg.verify.bootstrap, cfg.verify.confidence, rng)
        cmp = compare(self.y_hold, self.proba_full_, probas[0], self.frame.classes, cfg.verify, rng,
                      self.segments_hold, self.frame.segment_names)
        return {
            "fraction": float(fraction), "strategy": strategy, "kept": int(kept),
            "metric": float(np.mean([metric_value(m, self.y_hold, p) for p in probas])),
            "ci_lo": lo, "ci_hi": hi, "delta": cmp.delta, "delta_lo": cmp.ci[0], "delta_hi": cmp.ci[1],
            **self._calibration(probas, rng),
            "train_seconds": float(np.mean([s for _, s in fits])), "status": cmp.status,
            "blocked_by": ",".join(cmp.blocked_by),
        }

    def _calibration(self, probas: list[np.ndarray], rng: np.random.Generator) -> dict[str, float]:
        """``calibration`` (mean over the models) and its interval; NaN on a regression table."""
        if probas[0].ndim == 1:
            return {"calibration": np.nan, "calibration_lo": np.nan, "calibration_hi": np.nan}
        v = self.config.verify
        lo, hi = calibration_interval(self.y_hold, probas, v.bootstrap, v.confidence, rng)
        return {"calibration": float(np.mean([calibration(self.y_hold, p) for p in probas])),
                "calibration_lo": lo, "calibration_hi": hi}

    def full_point(self) -> dict[str, Any]:
        """The full-data model as a frontier row (fraction 1)."""
        cfg = self.config
        rng = np.random.default_rng([cfg.seed, 0xF407, 10**6])
        lo, hi = metric_interval(self.y_hold, [self.proba_full_], cfg.verify.metric, cfg.verify.bootstrap,
                                 cfg.verify.confidence, rng)
        return {"fraction": 1.0, "strategy": "full", "kept": len(self.y),
                "metric": metric_value(cfg.verify.metric, self.y_hold, self.proba_full_), "ci_lo": lo, "ci_hi": hi,
                "delta": 0.0, "delta_lo": 0.0, "delta_hi": 0.0, **self._calibration([self.proba_full_], rng),
                "train_seconds": self.full_seconds_, "status": "pass", "blocked_by": ""}


def sweep(evaluator: FractionEvaluator, fractions=DEFAULT_GRID, strategies=STRATEGIES) -> pd.DataFrame:
    """The frontier: one row per (fraction, strategy), plus the full-data row.

    Returns
    -------
    pandas.DataFrame
        Columns ``fraction, strategy, kept, metric, ci_lo, ci_hi, delta, delta_lo, delta_hi,
        calibration, calibration_lo, calibration_hi, train_seconds, status, blocked_by``; calibration
        is the Brier score (binary) or log loss (multiclass), NaN for regression; ``blocked_by``
        names the guards that kept a point from passing.
    """
    rows = [evaluator.point(f, s) for f in sorted(fractions) for s in strategies]
    return pd.DataFrame([*rows, evaluator.full_point()])


def search_fraction(evaluator: FractionEvaluator, strategy: str, grid=DEFAULT_GRID, steps: int = 4) -> tuple[float, list[dict]]:
    """Smallest fraction that passes: scan the grid upwards, then bisect between the last miss and the first pass
    (between 0 and the smallest grid point when that one passes).

    Returns the fraction (1.0 when nothing on the grid passes) and every point tried, in order; each
    point's ``blocked_by`` names the guards that kept it from passing.
    """
    tried: list[dict] = []
    low, high = 0.0, None
    for f in sorted(grid):
        tried.append(evaluator.point(f, strategy))
        if tried[-1]["status"] == "pass":
            high = f
            break
        low = f
    if high is None:
        return 1.0, tried
    for _ in range(steps):
        mid = round((low + high) / 2, 4)
        if mid in (low, high):
            break
        tried.append(evaluator.point(mid, strategy))
        low, high = (low, mid) if tried[-1]["status"] == "pass" else (mid, high)
    return high, tried


def choose_fraction(frame: RowFrame, scores: Scores, config: Config, steps: int = 4) -> tuple[float, list[dict]]:
    """``fraction: auto`` without reading the holdout: :func:`search_fraction` over ``selection.grid``
    with the target fit on the training rows less a validation slice and judged on that slice
    (``FractionEvaluator(..., validation=True)``). The holdout then judges the chosen fraction once."""
    evaluator = FractionEvaluator(frame, scores, config, validation=True)
    fraction, tried = search_fraction(evaluator, config.selection.strategy, config.selection.grid, steps)
    return fraction, [{**t, "judge": f"validation slice of {len(evaluator.y_hold):,} training rows"} for t in tried]


def frontier_files(table: pd.DataFrame, metric: str) -> dict[str, bytes]:
    """``frontier.parquet`` and ``frontier.png`` for the run directory, as bytes."""
    buf = io.BytesIO()
    pq.write_table(pa.Table.from_pandas(table, preserve_index=False), buf)
    return {"frontier.parquet": buf.getvalue(), "frontier.png": plot_frontier(table, metric)}


def plot_frontier(table: pd.DataFrame, metric: str) -> bytes:
    """PNG of metric vs fraction, one line per strategy with its interval; the full-data value as a line."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib import pyplot as plt

    fig, ax = plt.subplots(figsize=(7, 4.2), dpi=110)
    full = table[table["strategy"] == "full"]
    for strategy, part in table[table["strategy"] != "full"].groupby("strategy", sort=False):
        part = part.sort_values("fraction")
        ax.plot(part["fraction"], part["metric"], marker="o", label=strategy)
        ax.fill_between(part["fraction"], part["ci_lo"], part["ci_hi"], alpha=0.15)
    if len(full):
        ax.axhline(full["metric"].iloc[0], color="black", linestyle="--", linewidth=1, label="all rows")
    ax.set_xlabel("fraction of training rows kept")
    ax.set_ylabel(f"holdout {metric}")
    ax.grid(alpha=0.3)
    ax.legend()
    buf = io.BytesIO()
    fig.tight_layout()
    fig.savefig(buf, format="png")
    plt.close(fig)
    return buf.getvalue()
