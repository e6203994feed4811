"""Benchmarks that print figures: what the score stage costs, and how a run grows with the table.

The tables are invented (:mod:`leanset.tools.invented`). ``bench score`` builds the table in memory;
``bench make-table`` writes it as parquet files chunk by chunk; ``bench scale`` runs the load, score and
select stages on such files, one fresh process per size. Peak memory is
the process's resident high-water mark (``VmHWM`` in ``/proc/self/status``).
"""

from __future__ import annotations

import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import lightgbm as lgb
import numpy as np

from .. import errors
from ..config import Config
from ..errors import ConfigError, LeansetError
from ..load.table import load_table
from ..models.proxy import gbdt_params
from ..scores.dynamics import score
from ..select.frame import select_frame
from .invented import ensure_table, make_table


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


def machine() -> str:
    """The machine line every benchmark prints: cpus, threads, python and lightgbm versions."""
    return (f"machine: {os.cpu_count()} cpus, OMP_NUM_THREADS={os.environ.get('OMP_NUM_THREADS', 'unset')}, "
            f"python {platform.python_version()}, lightgbm {lgb.__version__}")


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
            machine(),
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
    frame = make_table(rows, features, classes, config.seed, config.holdout.fraction, pc.folds, config.execution.batch_rows)
    train = frame.train
    baseline = _rss()["VmRSS"]

    peak_reset = _reset_peak()
    fold = frame.fold[train]
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


@dataclass(frozen=True)
class SizeBench:
    """Figures of one size of ``bench scale``: seconds of each stage and bytes of the child process."""

    rows: int
    features: int
    load_seconds: float
    score_seconds: float
    select_seconds: float
    start_rss: int
    peak_rss: int
    kept: int
    made: bool

    @property
    def x_bytes(self) -> int:
        """Bytes of the float32 feature matrix of all rows."""
        return self.rows * self.features * 4

    def line(self) -> str:
        """One row of the report, in the columns of :data:`SCALE_HEADER`."""
        total = self.load_seconds + self.score_seconds + self.select_seconds
        return (f"{self.rows:>12,} {self.load_seconds:>8.2f} {self.score_seconds:>8.2f} {self.select_seconds:>9.2f} "
                f"{total:>8.2f} {self.peak_rss / 2**20:>9,.0f} {self.peak_rss / self.x_bytes:>7.2f}x "
                f"{self.start_rss / 2**20:>10,.0f} {self.kept:>11,}  {'made' if self.made else 'reused'}")


SCALE_HEADER = (f"{'rows':>12} {'load s':>8} {'score s':>8} {'select s':>9} {'total s':>8} {'peak MiB':>9} {'peak/X':>8} "
                f"{'start MiB':>10} {'rows kept':>11}  table")


def _scale_child() -> None:
    """Body of the per-size process: read a config (JSON) on stdin, run load, score and select,
    print the figures as one JSON line on stdout; a ``LeansetError`` is printed the same way, exit 2."""
    config = Config.model_validate_json(sys.stdin.read())
    start = _rss()["VmRSS"]
    try:
        t0 = time.perf_counter()
        frame = load_table(config)
        t1 = time.perf_counter()
        scores = score(frame, config)
        t2 = time.perf_counter()
        selection = select_frame(frame, scores, config)
        t3 = time.perf_counter()
    except LeansetError as exc:
        print(json.dumps({"error": str(exc), "kind": type(exc).__name__}))
        sys.exit(2)
    print(json.dumps({"load_seconds": t1 - t0, "score_seconds": t2 - t1, "select_seconds": t3 - t2, "start_rss": start,
                      "peak_rss": _rss()["VmHWM"], "kept": int(selection.keep.sum())}))


def run_size(table: Path, rows: int, features: int, config: Config, made: bool) -> SizeBench:
    """Run load, score and select on the table in ``table`` in a fresh Python process.

    Parameters
    ----------
    table : Path
        Folder of the table; it becomes ``input.path`` (label column ``label``).
    rows, features : int
        Its shape, for the report.
    config : Config
        Everything else of the run (proxy, selection, execution, seed).
    made : bool
        Whether the table was written for this run, for the report.

    Returns
    -------
    SizeBench
    """
    cfg = config.model_copy(update={"input": config.input.model_copy(update={"path": Path(table), "label": "label"})})
    child = subprocess.run([sys.executable, "-c", "from leanset.tools.bench import _scale_child; _scale_child()"],
                           input=cfg.model_dump_json(), capture_output=True, text=True)
    lines = child.stdout.strip().splitlines()
    result = json.loads(lines[-1]) if lines and lines[-1].startswith("{") else None
    if result is not None and "error" in result:
        raise getattr(errors, result["kind"], LeansetError)(result["error"])
    if child.returncode != 0 or result is None:
        last = (child.stderr.strip().splitlines() or ["no message"])[-1]
        raise LeansetError(f"bench scale: the process for {rows:,} rows ended with code {child.returncode} ({last}); "
                           f"if it ran out of memory, give smaller --sizes or a smaller --feature-memory-mb")
    return SizeBench(rows=rows, features=features, made=made, **result)


def time_exponent(results: list[SizeBench]) -> float:
    """Least-squares slope of log(score + select seconds) on log(rows): 1 is linear in the rows."""
    rows = np.log([r.rows for r in results])
    seconds = np.log([r.score_seconds + r.select_seconds for r in results])
    return float(np.polyfit(rows, seconds, 1)[0])


def bench_scale(sizes: list[int], features: int, classes: int, config: Config, folder: Path | None = None) -> Iterator[str]:
    """Time load, score and select on invented parquet tables of growing size; yield the report's lines.

    Each size's table is written under ``folder`` (reused when already there with the same shape and
    seed; a temporary folder, removed at the end, when ``folder`` is None), then run in a fresh
    process, so each size's peak RSS is its own. The last line is ``time_exponent=…``.

    Parameters
    ----------
    sizes : list of int
        Table rows, at least two different counts.
    features, classes : int
        Shape of every table.
    config : Config
        Proxy, selection and execution options and the seed (of the tables too); ``input`` is replaced.

    Yields
    ------
    str
    """
    sizes = sorted(set(sizes))
    if len(sizes) < 2 or sizes[0] < 100:
        raise ConfigError(f"--sizes {','.join(map(str, sizes))}: give at least two different sizes of 100 rows or more, e.g. 250000,500000,1000000")
    with tempfile.TemporaryDirectory(prefix="leanset-scale-") as scratch:
        root = Path(folder) if folder is not None else Path(scratch)
        ex, pc = config.execution, config.proxy
        yield machine()
        yield (f"tables: {features} features, {classes} classes, seed {config.seed}, under {root}; proxy {pc.family}, "
               f"{pc.folds} folds, {pc.rounds} rounds, threshold samples {'on' if pc.threshold_samples else 'off'}; "
               f"execution batch_rows {ex.batch_rows:,}, feature_memory_mb {ex.feature_memory_mb:g}")
        yield SCALE_HEADER
        results = []
        for rows in sizes:
            table = root / f"rows-{rows}-f{features}-c{classes}-seed{config.seed}"
            made = ensure_table(table, rows, features, classes, config.seed) is not None
            results.append(run_size(table, rows, features, config, made))
            yield results[-1].line()
        yield f"time_exponent={time_exponent(results):.3f}"
