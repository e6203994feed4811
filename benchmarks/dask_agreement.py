"""Single machine vs Dask: score one config on both engines and compare the kept sets and scores.

Runs the score stage locally (``leanset.scores.dynamics.score``) and on local Dask clusters
(``leanset.scores.cluster.score``) of ``--workers`` workers and of one worker, selects with the
config's selection, and prints the Jaccard index of the kept sets, the Spearman correlation
(``scipy.stats.spearmanr``) of every score, the agreement of the suspected label errors, and
whether a second Dask run repeats the first exactly. The one-worker cluster trains without
distribution, so it separates what distributed training changes (one worker vs many) from what
binning each fit's own rows changes (local, which bins all rows once, vs one worker). Last, the
same with ``execution.dask_fits: fold_parallel`` (each fit whole on one worker, local bins).
Figures, not tests.

    OMP_NUM_THREADS=1 python benchmarks/dask_agreement.py [--config configs/demo.yaml] [--workers 2] [--batch-rows N]
"""

from __future__ import annotations

import argparse
import time
from pathlib import Path

import numpy as np
from scipy import stats

from leanset.config import SCORE_NAMES, load_config
from leanset.select.frame import select_frame
from leanset.load.table import load_table

ROOT = Path(__file__).resolve().parents[1]


def jaccard(a: np.ndarray, b: np.ndarray) -> float:
    return float((a & b).sum() / max((a | b).sum(), 1))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", type=Path, default=ROOT / "configs" / "demo.yaml")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--batch-rows", type=int, default=None, help="rows per partition (execution.batch_rows)")
    args = ap.parse_args()
    from leanset.scores import cluster, dynamics as scores

    config = load_config(args.config, {"execution.engine": "dask", "execution.batch_rows": args.batch_rows})
    frame = load_table(config)
    t0 = time.perf_counter()
    local = scores.score(frame, config)
    seconds = {"local": time.perf_counter() - t0}
    runs = {}
    for workers, fits in dict.fromkeys(((args.workers, "data_parallel"), (1, "data_parallel"), (args.workers, "fold_parallel"))):
        execution = config.execution.model_copy(update={"workers": workers, "dask_fits": fits})
        name = f"dask {workers}" + (" fold_parallel" if fits == "fold_parallel" else "")
        with cluster.open_client(execution) as client:
            t0 = time.perf_counter()
            runs[name] = cluster.score(frame, config.model_copy(update={"execution": execution}), client)
            seconds[name] = time.perf_counter() - t0
            if (workers, fits) == (args.workers, "data_parallel"):
                again = cluster.score(frame, config.model_copy(update={"execution": execution}), client)
    dask = runs[f"dask {args.workers}"]
    keep = {"local": select_frame(frame, local, config).keep, **{w: select_frame(frame, s, config).keep for w, s in runs.items()}}
    print(f"{args.config.name}: {len(frame.row_id):,} rows, {len(frame.train):,} scored, {config.proxy.folds} folds, "
          f"{config.proxy.rounds} rounds; selection.score {config.selection.score}, strategy {config.selection.strategy}, "
          f"fraction {config.selection.fraction}")
    print("score stage seconds: " + ", ".join(f"{k} {v:.1f}" for k, v in seconds.items()))
    names = list(keep)
    print("Jaccard of kept sets: " + ", ".join(f"{a} vs {b} {jaccard(keep[a], keep[b]):.3f}"
                                                for i, a in enumerate(names) for b in names[i + 1:]))
    print(f"Spearman local vs dask {args.workers}: " + ", ".join(
        f"{name} {stats.spearmanr(local.table[name], dask.table[name]).statistic:.3f}" for name in SCORE_NAMES
        if np.ptp(local.table[name].to_numpy(float)) > 0 and np.ptp(dask.table[name].to_numpy(float)) > 0))
    if "label_errors" in local.info:
        s_local, s_dask = local.suspects(), dask.suspects()
        print(f"suspected label errors: local {s_local.sum():,}, dask {args.workers} {s_dask.sum():,}, Jaccard {jaccard(s_local, s_dask):.3f}")
    print(f"second dask {args.workers} run identical: {dask.table.equals(again.table)}")

if __name__ == "__main__":
    main()
