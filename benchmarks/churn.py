"""Churn of a growing table: run on the demo table less its last 5 %, then on all of it.

Prints, for each selection.hysteresis, the churn among old rows (decision flips, as counted
in run.json) and the same-data rerun churn. Invented data (the demo table); figures, not tests.

    python benchmarks/churn.py [--hysteresis 0 0.05 0.1 0.2] [--append 0.05]
"""

from __future__ import annotations

import argparse
import json
import os
import tempfile
import time
from pathlib import Path

os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")

import pyarrow.parquet as pq  # noqa: E402
import yaml  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--hysteresis", type=float, nargs="+", default=[0.0, 0.05, 0.1, 0.2])
    ap.add_argument("--append", type=float, default=0.05, help="share of new rows, relative to the first table")
    args = ap.parse_args()
    from leanset.flows import prune_flow

    table = pq.read_table(ROOT / "data_samples" / "pump_faults.parquet")
    n_old = int(round(table.num_rows / (1 + args.append)))
    demo = yaml.safe_load((ROOT / "configs" / "demo.yaml").read_text())
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        print(f"old rows {n_old:,}, new rows {table.num_rows - n_old:,} ({args.append:.0%})")
        print("hysteresis  same-data churn  churn among old rows  keep→drop  drop→keep  seconds/run")
        for h in args.hysteresis:
            folder = tmp / f"h{h}" / "table"
            folder.mkdir(parents=True)
            pq.write_table(table.slice(0, n_old), folder / "part-0.parquet")
            # churn depends on scoring and selection only: verification is kept light here
            cfg = {**demo, "input": {**demo["input"], "path": str(folder)}, "store": str(tmp / f"h{h}" / "store"),
                   "selection": {**demo["selection"], "hysteresis": h},
                   "target": {"params": {"num_boost_round": 50}}, "verify": {**demo["verify"], "bootstrap": 200}}
            path = tmp / f"h{h}" / "config.yaml"
            path.write_text(yaml.safe_dump(cfg))
            t0 = time.perf_counter()
            prune_flow(str(path))
            same = json.loads((Path(prune_flow(str(path))) / "run.json").read_text())["churn"]
            pq.write_table(table.slice(n_old), folder / "part-1.parquet")
            grown = json.loads((Path(prune_flow(str(path))) / "run.json").read_text())["churn"]
            secs = (time.perf_counter() - t0) / 3
            print(f"{h:10.2f}  {same['rows']:>15,}  {grown['rows']:>9,} ({grown['fraction']:6.2%})  "
                  f"{grown['keep_to_drop']:>9,}  {grown['drop_to_keep']:>9,}  {secs:11.1f}")


if __name__ == "__main__":
    main()
