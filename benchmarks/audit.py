"""Audit speed: `why`, `history`, `diff` and `runs` over a store of 20 runs of 1M rows each.

The store is generated directly (invented manifests and run.json files with leanset's own
layout, no model is trained): a table that grows by `--growth` rows a run, decisions that
flip for about 1 % of rows between runs. Prints the seconds of each audit question, answered
in-process (after imports) and end to end by the `leanset` command in a fresh process.

    python benchmarks/audit.py [--runs 20] [--rows 1000000] [--store DIR] [--repeat 3]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from leanset.config import SCORE_NAMES, Config

REASONS_KEEP = np.array(["keep:stratum", "keep:floor"])
REASONS_DROP = np.array(["drop:over_budget", "drop:hard_cut", "drop:duplicate"])


def make_store(store: Path, runs: int, rows: int, growth: int, seed: int = 0) -> None:
    """Write ``runs`` runs of ``rows`` rows each (the last ``rows`` ids of a growing table)."""
    rng = np.random.default_rng(seed)
    total = rows + growth * (runs - 1)
    label = rng.choice(np.array(["ok", "wear", "leak", "clog"]), total, p=[0.7, 0.15, 0.1, 0.05])
    holdout = rng.random(total) < 0.2
    keep = rng.random(total) < 0.3
    config = Config.model_validate({"input": {"path": "/data/events", "label": "label", "id": "event_id"},
                                    "store": str(store)}).model_dump(mode="json")
    start = datetime(2026, 1, 1, 2, 0, tzinfo=timezone.utc)
    parent = None
    for k in range(runs):
        lo = k * growth
        ids = pa.array(np.char.add("e", np.arange(lo, lo + rows).astype("U9")).astype(object), pa.string())
        flip = rng.random(total) < 0.01
        keep = np.where(flip, ~keep, keep)
        hold = holdout[lo:lo + rows]
        kp = keep[lo:lo + rows] & ~hold
        decision = np.where(hold, "holdout", np.where(kp, "keep", "drop"))
        reason = np.where(hold, "holdout", np.where(kp, rng.choice(REASONS_KEEP, rows, p=[0.97, 0.03]),
                                                    rng.choice(REASONS_DROP, rows, p=[0.9, 0.08, 0.02])))
        cols = {"row_id": ids, "split": pa.array(np.where(hold, "holdout", "train")), "label": pa.array(label[lo:lo + rows]),
                "decision": pa.array(decision), "reason": pa.array(reason),
                "stratum": pa.array(rng.integers(0, 50, rows).astype(np.int16), mask=hold),
                "weight": pa.array(np.where(kp, 1.2, 0.0), mask=hold)}
        for name in SCORE_NAMES:
            cols[name] = pa.array(rng.normal(size=rows), mask=hold)
        cols["never_learned"] = pa.array(rng.random(rows) < 0.02, mask=hold)
        run_id = (start + timedelta(days=k)).strftime("%Y%m%dT%H%M%SZ") + f"-{k:08x}"
        d = store / "runs" / run_id
        d.mkdir(parents=True)
        pq.write_table(pa.table(cols), d / "manifest.parquet")
        n_keep, n_hold = int(kp.sum()), int(hold.sum())
        (d / "run.json").write_text(json.dumps({
            "run_id": run_id, "sequence": k + 1, "created": (start + timedelta(days=k)).isoformat(timespec="seconds"),
            "config": config, "lineage": "bench", "parent_run": parent,
            "input": {"path": "/data/events", "fingerprint": f"{k:032x}", "rows": rows, "classes": ["clog", "leak", "ok", "wear"]},
            "counts": {"train": rows - n_hold, "holdout": n_hold, "kept": n_keep, "dropped": rows - n_hold - n_keep,
                       "new": rows if parent is None else growth},
            "churn": None if parent is None else {"parent_run": parent, "rows": int(flip[lo:lo + rows].sum()),
                                                   "fraction": float(flip[lo:lo + rows].mean())},
            "selection": {}, "verdict": {"status": "pass", "metric": "accuracy", "full": 0.9, "kept": 0.89, "random": 0.87,
                                         "delta": 0.01, "ci": [0.0, 0.02], "tolerance": 0.02},
        }))
        parent = run_id
        print(f"  wrote run {k + 1}/{runs}", end="\r", flush=True)
    print()


def _time(fn, repeat: int) -> float:
    best = float("inf")
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--runs", type=int, default=20)
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--growth", type=int, default=20_000, help="new rows per run")
    ap.add_argument("--store", type=Path, help="reuse or create the store here (default: a temporary folder)")
    ap.add_argument("--repeat", type=int, default=3, help="take the best of this many timings")
    args = ap.parse_args()
    from leanset.store import audit

    with tempfile.TemporaryDirectory() as tmp:
        store = args.store or Path(tmp) / "store"
        if not (store / "runs").exists():
            t0 = time.perf_counter()
            make_store(store, args.runs, args.rows, args.growth)
            print(f"generated {args.runs} runs × {args.rows:,} rows in {time.perf_counter() - t0:.1f} s")
        size = sum(p.stat().st_size for p in store.glob("runs/*/manifest.parquet"))
        runs = audit.runs(store)
        first, last = runs[0]["run_id"], runs[-1]["run_id"]
        row = f"e{args.growth * (len(runs) - 1) + 12_345}"  # a row every later run holds
        old = "e12345"  # a row only the first run holds
        questions = {
            "runs": lambda: audit.runs(store),
            "why ROW (latest run holding it)": lambda: audit.why(store, row),
            "why ROW --run FIRST": lambda: audit.why(store, old, first),
            "history ROW": lambda: audit.history(store, row),
            "diff RUN_19 RUN_20": lambda: audit.diff(store, runs[-2]["run_id"], last),
            "diff FIRST LAST": lambda: audit.diff(store, first, last),
        }
        cli = {
            "runs": ["runs"],
            "why ROW (latest run holding it)": ["why", row],
            "why ROW --run FIRST": ["why", old, "--run", first],
            "history ROW": ["history", row],
            "diff RUN_19 RUN_20": ["diff", runs[-2]["run_id"], last],
            "diff FIRST LAST": ["diff", first, last],
        }
        print(f"store: {len(runs)} runs × {args.rows:,} rows, manifests {size / 2**20:,.0f} MiB")
        print(f"{'question':34s} {'in-process s':>12s} {'leanset CLI s':>13s}")
        for name, fn in questions.items():
            inproc = _time(fn, args.repeat)
            cmd = [sys.executable, "-c", "from leanset.cli import main; main()", *cli[name], "--store", str(store), "--json"]

            def call():
                subprocess.run(cmd, check=True, stdout=subprocess.DEVNULL)

            print(f"{name:34s} {inproc:12.3f} {_time(call, args.repeat):13.3f}")


if __name__ == "__main__":
    main()
