"""The proxy–target agreement check's seconds against one full-data target fit, in one process.

Loads a config's table, scores it (or reads the scores from the store's cache), then twice in turn:
the agreement check with the config's settings, one fit of the target on all training rows, and the
check with the earlier settings (``proxy.folds`` folds, 50 rounds). The target and the check run on
one thread. It prints seconds, the check's share of the full-data fit and its Spearman correlation.

    OMP_NUM_THREADS=1 python benchmarks/agreement_cost.py --config configs/demo.yaml --store /tmp/agreement-store
"""

from __future__ import annotations

import argparse
import time

from leanset.config import load_config
from leanset.load.table import load_table
from leanset.models.target import fit_target
from leanset.scores.cache import cached_scores
from leanset.scores.dynamics import score
from leanset.scores.target_agreement import agreement
from leanset.tools.bench import machine


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--config", default="configs/demo.yaml")
    ap.add_argument("--store", default="/tmp/agreement-store")
    ap.add_argument("--repeats", type=int, default=2)
    args = ap.parse_args()
    print(machine())
    cfg = load_config(args.config, {"store": args.store, "target.params.num_threads": 1})
    frame = load_table(cfg, None)
    scores, _ = cached_scores(frame, cfg, lambda: score(frame, cfg))
    X, y = frame.features(frame.train), frame.y[frame.train]
    earlier = cfg.model_copy(update={"proxy": cfg.proxy.model_copy(update={"agreement_folds": cfg.proxy.folds,
                                                                           "agreement_rounds": 50})})
    for _ in range(args.repeats):
        t0 = time.perf_counter()
        now = agreement(frame, scores, cfg)
        t1 = time.perf_counter()
        fit_target(X, y, None, len(frame.classes), frame.categorical, cfg.target, cfg.seed)
        t2 = time.perf_counter()
        before = agreement(frame, scores, earlier)
        t3 = time.perf_counter()
        full = t2 - t1
        print(f"agreement {t1 - t0:.2f} s (Spearman {now['spearman']:.3f}, {now['folds']} folds); full-data fit on "
              f"{len(y):,} rows {full:.2f} s; agreement_share={(t1 - t0) / full:.3f}; earlier settings ({cfg.proxy.folds} "
              f"folds, 50 rounds) {t3 - t2:.2f} s = {(t3 - t2) / full:.1%} (Spearman {before['spearman']:.3f})", flush=True)


if __name__ == "__main__":
    main()
