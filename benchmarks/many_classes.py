"""The score stage on a table of many classes, with and without ``proxy.max_trees``.

On the selection suite's invented ``many_classes`` table (``leanset.tools.suite.many_classes``: 26
overlapping Gaussian classes, 16 features) it runs, in one process: the score stage with
``proxy.max_trees`` unset (every fold model grows ``rounds`` × classes trees), the same on another
fold split (how far scores move by chance), the default (fewer rounds at a raised rate), then one fit
of the default target with ``num_threads`` 1. It prints seconds and the Spearman correlation
(``scipy.stats.spearmanr``) of every score with the first pass's.

    OMP_NUM_THREADS=1 python benchmarks/many_classes.py --rows 20000
"""

from __future__ import annotations

import argparse
import dataclasses
import time

import numpy as np
import pyarrow as pa
from scipy import stats

from leanset.config import SCORE_NAMES, Config, TargetConfig
from leanset.load.table import load_table
from leanset.models.target import fit_target
from leanset.scores.dynamics import _refold, score
from leanset.tools.bench import machine
from leanset.tools.suite import many_classes


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=20_000)
    ap.add_argument("--classes", type=int, default=26)
    ap.add_argument("--seed", type=int, default=0)
    args = ap.parse_args()
    print(machine())
    table = pa.Table.from_pandas(many_classes(args.rows, args.seed, args.classes), preserve_index=False)
    runs = {}
    for name, max_trees, refold in (("max_trees unset", None, False), ("max_trees unset, other folds", None, True),
                                    ("default", 800, False)):
        config = Config.model_validate({"input": {"path": "suite", "label": "label", "task": "classification"},
                                        "seed": args.seed, "proxy": {"max_trees": max_trees, "params": {"num_threads": 1}}})
        frame = load_table(config, table)
        if refold:
            fold = frame.fold.copy()
            fold[frame.train] = _refold(frame.groups[frame.train], config.proxy.folds, np.random.default_rng([args.seed, 1]))
            frame = dataclasses.replace(frame, fold=fold)
        t0 = time.perf_counter()
        runs[name] = score(frame, config)
        print(f"score stage, {name}: {time.perf_counter() - t0:.2f} s {runs[name].info.get('class_rounds', '')}", flush=True)
    t0 = time.perf_counter()
    fit_target(frame.X[frame.train], frame.y[frame.train], None, len(frame.classes), [], TargetConfig(params={"num_threads": 1}),
               args.seed)
    print(f"default target (300 rounds) on {len(frame.train):,} rows: {time.perf_counter() - t0:.2f} s", flush=True)
    base = runs["max_trees unset"].table
    for name in ("max_trees unset, other folds", "default"):
        rho = {s: round(float(stats.spearmanr(base[s], runs[name].table[s]).statistic), 3) for s in SCORE_NAMES}
        print(f"Spearman with max_trees unset, {name}: {rho}")


if __name__ == "__main__":
    main()
