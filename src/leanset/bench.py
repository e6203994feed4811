"""Benchmarks that print figures: what the score stage costs beyond plain proxy fits.

The table is invented (a seeded random linear rule with label noise), built in memory; the score
stage runs on it exactly as in a run. Peak memory is the process's resident high-water mark
(``VmHWM`` in ``/proc/self/status``), reset before each measured part where Linux allows it.
"""

from __future__ import annotations

import os
import platform
import time
from dataclasses import dataclass
from pathlib import Path

import lightgbm as lgb
import numpy as np
import pyarrow as pa

from .config import Config
from .errors import ConfigError
from .proxy import gbdt_params
from .scores import score
from .table import RowFrame, _split


def make_table(rows: int, features: int, classes: int, seed: int = 0, holdout: float = 0.2, folds: int = 5) -> RowFrame:
    """An invented classification table: float32 features, labels from a noisy random linear rule."""
    rng = np.random.default_rng([seed, 0xBE7C])
    X = rng.standard_normal((rows, features), dtype=np.float32)
    W = rng.standard_normal((features, classes)).astype(np.float32)
    logits = X @ W
    logits += rng.gumbel(size=logits.shape).astype(np.float32) * 2.0  # label noise: not separable
    y = logits.argmax(axis=1).astype(np.int32)
    del logits
    row_id = np.arange(rows, dtype=np.int64)
    hold, fold = _split(row_id, y, holdout, folds, seed)
    return RowFrame(row_id=row_id, y=y, classes=list(range(classes)), X=X,
                    feature_names=[f"x{j}" for j in range(features)], categorical=[], categories={},
                    holdout=hold, fold=fold, fingerprint="bench", source=pa.table({"row_id": row_id}))


def _rss() -> dict[str, int]:
    out = {}
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(("VmRSS:", "VmHWM:")):
            out[line.split(":")[0]] = int(line.split()[1]) * 1024
    return out


def _reset_peak() -> bool:
    """Reset the resident high-water mark (Linux ≥ 4.0); False where that is not allowed."""
    try:
        Path(f"/proc/{os.getpid()}/clear_refs").write_text("5")
        return True
    except OSError:
        return False


@dataclass
class ScoreBench:
    """Figures of one ``bench score`` run (seconds and bytes)."""

    rows: int
    features: int
    classes: int
    folds: int
    score_seconds: float
    dynamics_seconds: float
    threshold_seconds: float
    plain_seconds: float
    x_bytes: int
    baseline_rss: int
    score_peak_rss: int
    plain_peak_rss: int
    peak_reset: bool

    @property
    def ratio(self) -> float:
        """Score-stage seconds over the seconds of K plain proxy fits."""
        return self.score_seconds / self.plain_seconds

    def lines(self) -> list[str]:
        """The report, one figure per line; the ratio is the last line."""
        mb = 1 / 2**20
        return [
            f"table: {self.rows:,} rows x {self.features} features, {self.classes} classes; float32 X {self.x_bytes * mb:,.0f} MiB",
            f"machine: {os.cpu_count()} cpus, OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}, python {platform.python_version()}, lightgbm {lgb.__version__}",
            f"plain proxy fits (K={self.folds}): {self.plain_seconds:.2f} s",
            f"score stage: {self.score_seconds:.2f} s (cross-fitting with dynamics {self.dynamics_seconds:.2f} s, threshold-sample passes {self.threshold_seconds:.2f} s)",
            f"dynamics_overhead_ratio={self.dynamics_seconds / self.plain_seconds:.3f}",
            f"peak RSS: baseline {self.baseline_rss * mb:,.0f} MiB; score stage {self.score_peak_rss * mb:,.0f} MiB "
            f"(+{(self.score_peak_rss - self.baseline_rss) * mb:,.0f} MiB = {(self.score_peak_rss - self.baseline_rss) / self.x_bytes:.2f}x X); "
            f"plain fits {self.plain_peak_rss * mb:,.0f} MiB" + ("" if self.peak_reset else " (peak could not be reset: figures are cumulative)"),
            f"score_overhead_ratio={self.ratio:.3f}",
        ]


def bench_score(rows: int, features: int, classes: int, config: Config) -> ScoreBench:
    """Time the full score stage against K plain fits of the same proxy with the same parameters.

    Parameters
    ----------
    rows, features, classes : int
        Shape of the invented table.
    config : Config
        Its ``proxy`` section sets the gbdt proxy (folds, rounds, params, threshold samples) and
        ``seed`` the draws; ``input`` is not read.

    Returns
    -------
    ScoreBench
    """
    pc = config.proxy
    if pc.family != "gbdt":
        raise ConfigError("proxy.family: bench score times the gbdt proxy only; the linear proxy has no plain fit without its per-epoch decision values")
    frame = make_table(rows, features, classes, config.seed, config.holdout.fraction, pc.folds)
    train = frame.train
    baseline = _rss()["VmRSS"]

    peak_reset = _reset_peak()
    y, fold = frame.y[train], frame.fold[train]
    plain = 0.0
    for k in range(pc.folds):
        fit_rows = train[fold != k]
        t0 = time.perf_counter()
        data = lgb.Dataset(frame.X[fit_rows], label=frame.y[fit_rows], free_raw_data=True)
        lgb.train(gbdt_params(classes, pc, config.seed + k), data, num_boost_round=pc.rounds)
        del data
        plain += time.perf_counter() - t0
        del fit_rows
    plain_peak = _rss()["VmHWM"]

    _reset_peak()
    t0 = time.perf_counter()
    scores = score(frame, config)
    seconds = time.perf_counter() - t0
    score_peak = _rss()["VmHWM"]
    threshold = scores.info.get("timings", {}).get("threshold_samples", 0.0)
    return ScoreBench(rows=rows, features=features, classes=classes, folds=pc.folds, score_seconds=seconds,
                      dynamics_seconds=seconds - threshold, threshold_seconds=threshold, plain_seconds=plain,
                      x_bytes=frame.X.nbytes, baseline_rss=baseline, score_peak_rss=score_peak,
                      plain_peak_rss=plain_peak, peak_reset=peak_reset)
