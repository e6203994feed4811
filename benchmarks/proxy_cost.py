"""The score stage's cost against target fits, and how far the cheap default proxy moves each score.

On an invented table (``leanset.tools.bench.make_table``) it runs, in one process: the score stage with
the earlier proxy settings (5 folds, every row in every round, 255 bins, threshold-sample passes),
the same on another fold split (how far scores move by chance), the default proxy, then one fit of
the default target (300 rounds) and of an expensive one (1,000 rounds, 127 leaves, learning rate
0.05), both with ``num_threads`` 1. It prints seconds, the score stage as a share of each fit, and
the Spearman correlation (``scipy.stats.spearmanr``) of every score with the earlier proxy's.

    OMP_NUM_THREADS=1 python benchmarks/proxy_cost.py --rows 300000 --classes 4
    OMP_NUM_THREADS=1 python benchmarks/proxy_cost.py --rows 25000 --classes 26 --targets default
"""

from __future__ import annotations

import argparse
import dataclasses
import time

import numpy as np
from scipy import stats

from leanset.tools.bench import machine
from leanset.tools.invented import make_table
from leanset.config import SCORE_NAMES, Config, TargetConfig
from leanset.scores.dynamics import _refold, score
from leanset.models.target import fit_target

EARLIER = {"folds": 5, "threshold_samples": True,
           "params": {"bagging_fraction": 1.0, "bagging_freq": 0, "max_bin": 255, "bin_construct_sample_cnt": 200_000}}
TARGETS = {"default": {"num_threads": 1},
           "expensive": {"num_boost_round": 1000, "num_leaves": 127, "learning_rate": 0.05, "num_threads": 1}}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=300_000)
    ap.add_argument("--features", type=int, default=30)
    ap.add_argument("--classes", type=int, default=4)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--targets", default="default,expensive", help="Target fits to time: default, expensive or both.")
    args = ap.parse_args()
    print(machine())
    runs = {}
    for name, proxy, refold in (("earlier", EARLIER, False), ("earlier, other folds", EARLIER, True), ("default", {}, False)):
        config = Config.model_validate({"input": {"path": "bench", "label": "label"}, "seed": args.seed, "proxy": proxy})
        frame = make_table(args.rows, args.features, args.classes, args.seed, folds=config.proxy.folds)
        if refold:
            fold = frame.fold.copy()
            fold[frame.train] = _refold(frame.groups[frame.train], config.proxy.folds, np.random.default_rng([args.seed, 1]))
            frame = dataclasses.replace(frame, fold=fold)
        t0 = time.perf_counter()
        runs[name] = (score(frame, config), time.perf_counter() - t0)
        print(f"score stage, {name} proxy: {runs[name][1]:.2f} s", flush=True)
    X, y = frame.X[frame.train], frame.y[frame.train]
    for name in args.targets.split(","):
        params = TARGETS[name]
        t0 = time.perf_counter()
        fit_target(X, y, None, args.classes, [], TargetConfig(params=params), args.seed)
        seconds = time.perf_counter() - t0
        shares = "; ".join(f"{n} {s / seconds:.1%}" for n, (_, s) in runs.items())
        print(f"target {name} fit on {len(y):,} rows: {seconds:.2f} s; score stage as a share of it: {shares}", flush=True)
    base = runs["earlier"][0].table
    for name in ("earlier, other folds", "default"):
        rho = {s: round(float(stats.spearmanr(base[s], runs[name][0].table[s]).statistic), 3) for s in SCORE_NAMES}
        print(f"Spearman with the earlier proxy, {name}: {rho}")


if __name__ == "__main__":
    main()
