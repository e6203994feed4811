"""Frontier on an invented imbalanced table: 1 % positives, most negatives easy.

Writes the table (invented data: 20 float32 features; positives around one centre, 90 % of the
negatives far from it and 10 % of them overlapping it), a config that verifies ROC AUC, then runs
``leanset frontier`` on it and prints the frontier table. Every fraction is compared for the
default strategy and for ``random``.

    python benchmarks/imbalanced_frontier.py --out DIR [--rows 1000000] [--positives 0.01]
        [--fractions 0.005,0.01,0.05]
"""

from __future__ import annotations

import argparse
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd

FEATURES = 20


def make_table(rows: int, positives: float, seed: int = 0) -> pd.DataFrame:
    """``rows`` invented rows: label 1 for a ``positives`` share, and 0 for the rest (10 % of them hard)."""
    rng = np.random.default_rng([seed, 0x1B])
    centre = np.zeros(FEATURES, np.float32)
    centre[:4] = 1.5
    label = (rng.random(rows) < positives).astype(np.int8)
    hard = (label == 0) & (rng.random(rows) < 0.10)
    X = rng.standard_normal((rows, FEATURES), dtype=np.float32)
    X[label == 1] += centre
    X[hard] += 0.6 * centre
    X[(label == 0) & ~hard] -= 1.5 * centre
    frame = pd.DataFrame(X, columns=[f"x{j}" for j in range(FEATURES)])
    frame.insert(0, "event_id", np.char.add("ev", np.arange(rows).astype("U8")))
    frame["label"] = label
    return frame


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, required=True, help="folder for the table, config and store")
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--positives", type=float, default=0.01)
    ap.add_argument("--fractions", help="grid of fractions, comma-separated (default: selection.grid's)")
    args = ap.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    table = args.out / "events.parquet"
    if not table.exists():
        make_table(args.rows, args.positives).to_parquet(table, index=False, row_group_size=65_536)
    config = args.out / "imbalanced.yaml"
    config.write_text(f"""input: {{path: {table.name}, label: label, id: event_id}}
selection: {{strategy: stratified, score: aum}}
verify: {{metric: roc_auc, tolerance: 0.005}}
store: store
seed: 0
""")
    grid = ["--fractions", args.fractions] if args.fractions else []
    subprocess.run(["leanset", "frontier", str(config), *grid], check=True)


if __name__ == "__main__":
    main()
