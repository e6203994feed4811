"""``leanset bench suite``: the default selection rule against free random subsets, over fixed tables.

Each table is scored once and the target is fit once on all its training rows; at every grid
fraction the default rule's kept set and ``verify.random_repeats`` uniform random subsets *of the
same size* are fit and judged on the holdout (the frontier machinery, :class:`FractionEvaluator`).
A point counts as ``below`` when the rule is worse than random's interval in the metric or in
calibration (Brier score for binary, log loss for multiclass), and as ``above`` when its metric
beats random's mean.

Tables: scikit-learn's bundled digits, wine and breast cancer, each also with 10 % of its labels
flipped (:func:`leanset.tools.datasets.flipped_table`), and diabetes (regression); invented tables that
each isolate one property (redundant, noisy, imbalanced, many classes and clean, mixed numeric and
categorical with ordered overlapping classes, regression), of ``FULL_ROWS`` rows, or
``QUICK_ROWS`` with ``--quick``.
"""

from __future__ import annotations

import multiprocessing
import tempfile
from collections.abc import Callable, Iterator
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from ..config import REGRESSION_METRICS, Config
from ..load.table import load_table
from ..scores.dynamics import score
from ..verify.frontier import DEFAULT_GRID, FractionEvaluator
from ..verify.stats import ORIENTATION
from .datasets import BUNDLED, flipped_table

FULL_ROWS = 200_000
QUICK_ROWS = 4_000


@dataclass(frozen=True)
class SuiteTable:
    """One table of the suite: how to make it, the metric it is judged by and its tolerance."""

    name: str
    make: Callable[[int, int], pd.DataFrame]
    metric: str = "accuracy"
    tolerance: float | None = 0.01  # None: 2 % of the label's standard deviation (regression)
    invented: bool = True


def _bundled(name: str, rate: float) -> Callable[[int, int], pd.DataFrame]:
    def make(rows: int, seed: int) -> pd.DataFrame:
        if rate:
            return flipped_table(name, rate, seed)[0].drop(columns="rid")
        X, y = BUNDLED[name](return_X_y=True)
        df = pd.DataFrame(X.astype(np.float32), columns=[f"f{i}" for i in range(X.shape[1])])
        df["label"] = y
        return df
    return make


def _frame(X: np.ndarray, y: np.ndarray) -> pd.DataFrame:
    df = pd.DataFrame(X.astype(np.float32), columns=[f"x{i}" for i in range(X.shape[1])])
    df["label"] = y
    return df


def redundant(rows: int, seed: int) -> pd.DataFrame:
    """Most rows are near-copies of a few hundred prototypes; 4 classes set by a linear rule on the prototype."""
    rng = np.random.default_rng([seed, 1])
    protos = rng.normal(size=(200, 16))
    label = (protos @ rng.normal(size=(16, 4))).argmax(axis=1)
    which = rng.integers(0, len(protos), rows)
    return _frame(protos[which] + rng.normal(scale=0.15, size=(rows, 16)), label[which])


def _rule(X: np.ndarray, k: int, rng: np.random.Generator) -> np.ndarray:
    """A non-linear k-class rule: argmax of a linear map plus pairwise products."""
    z = X @ rng.normal(size=(X.shape[1], k)) + (X[:, :6] * X[:, 6:12]) @ rng.normal(size=(6, k))
    return z.argmax(axis=1)


def noisy(rows: int, seed: int) -> pd.DataFrame:
    """3 classes from a non-linear rule, 8 % of labels moved to another class at random."""
    rng = np.random.default_rng([seed, 2])
    X = rng.normal(size=(rows, 16))
    y = _rule(X, 3, rng)
    flip = rng.random(rows) < 0.08
    y[flip] = (y[flip] + rng.integers(1, 3, flip.sum())) % 3
    return _frame(X, y)


def imbalanced(rows: int, seed: int) -> pd.DataFrame:
    """Binary, 2 % positives: the top 2 % of a noisy non-linear score."""
    rng = np.random.default_rng([seed, 3])
    X = rng.normal(size=(rows, 16))
    s = X @ rng.normal(size=16) * 0.5 + X[:, 0] * X[:, 1] + rng.normal(scale=1.0, size=rows)
    return _frame(X, (s > np.quantile(s, 0.98)).astype(np.int64))


def many_classes(rows: int, seed: int, k: int = 26) -> pd.DataFrame:
    """``k`` clean Gaussian classes whose neighbours overlap: hard rows carry the boundaries."""
    rng = np.random.default_rng([seed, 4])
    centres = rng.normal(scale=1.6, size=(k, 16))
    y = rng.integers(0, k, rows)
    return _frame(centres[y] + rng.normal(size=(rows, 16)), y)


def mixed(rows: int, seed: int) -> pd.DataFrame:
    """6 numeric and 4 categorical (string) columns; 5 ordered classes cut from a noisy latent score."""
    rng = np.random.default_rng([seed, 5])
    X = rng.normal(size=(rows, 6))
    latent = X @ rng.normal(size=6) + np.sin(2 * X[:, 0])
    df = pd.DataFrame(X.astype(np.float32), columns=[f"x{i}" for i in range(6)])
    for j, levels in enumerate((4, 8, 16, 30)):
        codes = rng.integers(0, levels, rows)
        latent = latent + rng.normal(scale=0.8, size=levels)[codes]
        df[f"c{j}"] = pd.Series([f"v{c}" for c in range(levels)])[codes].to_numpy()
    latent = latent + rng.normal(scale=1.0, size=rows)
    df["label"] = np.searchsorted(np.quantile(latent, [0.2, 0.4, 0.6, 0.8]), latent)
    return df


def regression(rows: int, seed: int) -> pd.DataFrame:
    """A non-linear regression target with Gaussian noise and a heavy-tailed 5 % of rows."""
    rng = np.random.default_rng([seed, 6])
    X = rng.normal(size=(rows, 10))
    y = 3 * np.sin(X[:, 0]) + X[:, 1] ** 2 + X[:, 2] * X[:, 3] + rng.normal(scale=0.5, size=rows)
    tail = rng.random(rows) < 0.05
    y[tail] += rng.standard_t(2, tail.sum()) * 2
    return _frame(X, y)


TABLES = (
    SuiteTable("digits", _bundled("digits", 0), invented=False),
    SuiteTable("digits_flip10", _bundled("digits", 0.1), invented=False),
    SuiteTable("wine", _bundled("wine", 0), invented=False),
    SuiteTable("wine_flip10", _bundled("wine", 0.1), invented=False),
    SuiteTable("breast_cancer", _bundled("breast_cancer", 0), invented=False),
    SuiteTable("breast_cancer_flip10", _bundled("breast_cancer", 0.1), invented=False),
    SuiteTable("redundant", redundant),
    SuiteTable("noisy", noisy),
    SuiteTable("imbalanced", imbalanced, metric="roc_auc", tolerance=0.005),
    SuiteTable("many_classes", many_classes),
    SuiteTable("mixed", mixed),
    # regression tolerance: 2 % of the label's standard deviation (common practice, no source)
    SuiteTable("diabetes", _bundled("diabetes", 0), metric="rmse", tolerance=None, invented=False),
    SuiteTable("regression", regression, metric="rmse", tolerance=None),
)


def suite_config(path: Path, table: SuiteTable, quick: bool, seed: int, selection: dict[str, Any],
                 tolerance: float) -> Config:
    """The run config of one suite table: defaults but for one thread, the metric and tolerance, and in
    ``quick`` a 100-round target and 500 bootstrap resamples; ``selection`` overrides the selection defaults."""
    target = {"params": {"num_threads": 1, **({"num_boost_round": 100} if quick else {})}}
    return Config.model_validate({
        "input": {"path": str(path), "label": "label",
                  "task": "regression" if table.metric in REGRESSION_METRICS else "classification"}, "seed": seed,
        "proxy": {"params": {"num_threads": 1}}, "selection": selection, "target": target,
        "verify": {"metric": table.metric, "tolerance": tolerance, **({"bootstrap": 500} if quick else {})},
    })


def _better(metric: str, a: float, b: float) -> bool:
    return ORIENTATION[metric] * (a - b) > 0


def run_table(table: SuiteTable, config: Config, grid=DEFAULT_GRID, hardest_from: float | None = None) -> list[dict]:
    """Score, fit all rows once, then at each grid fraction the default rule and same-size random subsets.

    Returns one dict per fraction: the rule's and random's metric, interval, calibration and status,
    ``below`` and ``above`` flags, and ``hardest`` (metric of ``hardest``) from ``hardest_from`` up.
    """
    frame = load_table(config)
    ev = FractionEvaluator(frame, score(frame, config), config)
    m, strategy = config.verify.metric, config.selection.strategy
    out = []
    for f in sorted(grid):
        rule = ev.point(f, strategy)
        rnd = ev.point(f, "random", size=rule["kept"])
        worse_metric = _better(m, rnd["ci_lo"] if ORIENTATION[m] > 0 else rnd["ci_hi"], rule["metric"])
        worse_cal = bool(rule["calibration"] > rnd["calibration_hi"])  # NaN (regression) compares False
        row = {"table": table.name, "fraction": f, "kept": rule["kept"], "metric_name": m,
               **{f"rule_{k}": rule[k] for k in ("metric", "ci_lo", "ci_hi", "calibration", "status", "blocked_by")},
               **{f"random_{k}": rnd[k] for k in ("metric", "ci_lo", "ci_hi", "calibration", "calibration_lo",
                                                  "calibration_hi", "status")},
               "below": bool(worse_metric or worse_cal), "above": _better(m, rule["metric"], rnd["metric"]),
               **({k: out[0][k] for k in ("full", "full_calibration")} if out else
                  {"full": (full := ev.full_point())["metric"], "full_calibration": full["calibration"]})}
        if hardest_from is not None and f >= hardest_from:
            row["hardest"] = ev.point(f, "hardest")["metric"]
        out.append(row)
    return out


def smallest_passing(points: list[dict], who: str) -> float | None:
    """The smallest grid fraction whose status is ``pass`` for ``who`` (``rule`` or ``random``)."""
    passing = [p["fraction"] for p in points if p[f"{who}_status"] == "pass"]
    return min(passing) if passing else None


def table_lines(points: list[dict], rows: int) -> list[str]:
    """The printed block of one table."""
    p0 = points[0]
    lines = [f"table {p0['table']}: {rows:,} rows, {p0['metric_name']} (full {p0['full']:.4f}), calibration "
             f"(full {p0['full_calibration']:.4f}) = Brier (binary) or log loss, lower is better",
             "  frac   kept  rule_metric  random_metric [interval]      rule_cal  random_cal [interval]       flag"]
    for p in points:
        flag = " ".join(word for word, on in (("BELOW", p["below"]), ("above", p["above"])) if on) or "-"
        extra = f"  hardest {p['hardest']:.4f}" if "hardest" in p else ""
        lines.append(f"  {p['fraction']:<5g} {p['kept']:>6,}  {p['rule_metric']:.4f}       {p['random_metric']:.4f} "
                     f"[{p['random_ci_lo']:.4f}, {p['random_ci_hi']:.4f}]  {p['rule_calibration']:.4f}    "
                     f"{p['random_calibration']:.4f} [{p['random_calibration_lo']:.4f}, {p['random_calibration_hi']:.4f}]  "
                     f"{flag}{extra}")
    fmt = lambda v: "none" if v is None else f"{v:g}"  # noqa: E731
    lines.append(f"  smallest passing fraction: rule {fmt(smallest_passing(points, 'rule'))}, "
                 f"random {fmt(smallest_passing(points, 'random'))}")
    return lines


def totals(points: list[dict]) -> str:
    """The last line: ``below_random=N above_mean=M points=P``."""
    return (f"below_random={sum(p['below'] for p in points)} above_mean={sum(p['above'] for p in points)} "
            f"points={len(points)}")


def _run_one(name: str, quick: bool, seed: int, selection: dict[str, Any], grid, rows: int, where: Path) -> tuple[list[str], list[dict]]:
    """One table of the suite: written to ``where``, run, and its printed block and points."""
    t = next(t for t in TABLES if t.name == name)
    make = (lambda r, s: many_classes(r, s, 12)) if quick and t.name == "many_classes" else t.make
    df = make(rows, seed)
    path = where / f"{t.name}.parquet"
    df.to_parquet(path, index=False)
    tolerance = t.tolerance if t.tolerance is not None else round(0.02 * float(df["label"].std()), 4)
    config = suite_config(path, t, quick, seed, selection, tolerance)
    points = run_table(t, config, grid, hardest_from=0.5 if t.name == "many_classes" else None)
    return table_lines(points, len(df)), points


def run_suite(quick: bool = False, seed: int = 0, selection: dict[str, Any] | None = None, tables: list[str] | None = None,
              grid=DEFAULT_GRID, rows: int | None = None, folder: Path | None = None, jobs: int = 1) -> Iterator[str]:
    """Yield the suite's printed lines, table by table, then :func:`totals`.

    Parameters
    ----------
    quick : bool
        Invented tables of ``QUICK_ROWS`` rows (12 classes on the many-class table) and a 100-round target.
    seed : int
    selection : dict, optional
        Selection keys that replace the defaults (to measure another rule).
    tables : list of str, optional
        Names from ``TABLES``; all by default.
    grid : sequence of float
    rows : int, optional
        Rows of the invented tables, replacing the quick or full size.
    folder : Path, optional
        Where the tables are written as parquet; a temporary folder by default.
    jobs : int
        Tables run at once, each in its own process with one thread (the blocks print in table order).
    """
    chosen = [t.name for t in TABLES if tables is None or t.name in tables]
    n = rows or (QUICK_ROWS if quick else FULL_ROWS)
    all_points: list[dict] = []
    with tempfile.TemporaryDirectory(prefix="leanset-suite-") as tmp:
        where = Path(folder or tmp)
        where.mkdir(parents=True, exist_ok=True)
        args = [(name, quick, seed, selection or {}, grid, n, where) for name in chosen]
        if jobs > 1:
            # spawned, not forked: a forked child can hang in LightGBM's OpenMP runtime
            with ProcessPoolExecutor(jobs, mp_context=multiprocessing.get_context("spawn")) as pool:
                blocks = pool.map(_run_one, *zip(*args))
                for lines, points in blocks:
                    all_points += points
                    yield from lines
        else:
            for a in args:
                lines, points = _run_one(*a)
                all_points += points
                yield from lines
    yield totals(all_points)
