"""Precision and recall of the AUM threshold-sample cut-off on flipped labels of open datasets.

scikit-learn's bundled digits, wine and breast-cancer data; a share of labels (``--rates``)
is moved at random to another class with each flip seed (``--seeds``); the default score
stage runs (one LightGBM thread) and its ``suspect_label`` flags are compared with the flips
(``sklearn.metrics.precision_score`` / ``recall_score``). Figures, not tests.

    python benchmarks/label_errors.py [--rates 0.05 0.1 0.2] [--seeds 20240601 7 11]
        [--share 0.1] [--percentile 90] [--rounds 30]
"""

from __future__ import annotations

import argparse
import tempfile
from pathlib import Path

import numpy as np
from sklearn.metrics import precision_score, recall_score

from leanset.config import Config
from leanset.tools.datasets import flipped_table
from leanset.scores.dynamics import score
from leanset.load.table import load_table

DATASETS = ("digits", "wine", "breast_cancer")


def flipped_run(name: str, rate: float, seed: int, proxy: dict, tmp: Path) -> tuple[float, float]:
    """Precision and recall of the cut-off on ``name`` with ``rate`` of its labels flipped."""
    d, flip = flipped_table(name, rate, seed)
    path = tmp / f"{name}_{rate}_{seed}.parquet"
    d.to_parquet(path, index=False)
    cfg = Config.model_validate({"input": {"path": str(path), "label": "label", "id": "rid"},
                                 "proxy": {"params": {"num_threads": 1}, **proxy}, "seed": 0})
    frame = load_table(cfg)
    flipped = np.isin(np.arange(len(d)), flip)[frame.train]
    suspect = score(frame, cfg).table["suspect_label"].to_numpy(bool)
    return precision_score(flipped, suspect, zero_division=0), recall_score(flipped, suspect)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rates", type=float, nargs="+", default=[0.05, 0.1, 0.2])
    ap.add_argument("--seeds", type=int, nargs="+", default=[20240601, 7, 11])
    ap.add_argument("--share", type=float, help="proxy.threshold_share (default: the config's)")
    ap.add_argument("--percentile", type=float, help="proxy.threshold_percentile (default: the config's)")
    ap.add_argument("--rounds", type=int, help="proxy.threshold_rounds (default: half of proxy.rounds)")
    args = ap.parse_args()
    proxy = {key: v for key, v in (("threshold_share", args.share), ("threshold_percentile", args.percentile),
                                   ("threshold_rounds", args.rounds)) if v is not None}
    print("dataset        flipped  seed       precision  recall")
    with tempfile.TemporaryDirectory() as tmp:
        for name in DATASETS:
            for rate in args.rates:
                for seed in args.seeds:
                    p, r = flipped_run(name, rate, seed, proxy, Path(tmp))
                    print(f"{name:<14} {rate:>7.0%}  {seed:<9}  {p:>9.2f}  {r:>6.2f}", flush=True)


if __name__ == "__main__":
    main()
