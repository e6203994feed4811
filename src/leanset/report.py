"""Human-readable views of a finished run, built from its run.json alone."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from rich.table import Table

CAUTION = ("Pruning can hide harm to small groups and rare cases: check per-group metrics, keep a human "
           "review for high-stakes uses, and follow local data-retention rules. The input table is untouched.")


def read_run(run_dir: str | Path) -> dict[str, Any]:
    """The parsed run.json of a run directory."""
    return json.loads((Path(run_dir) / "run.json").read_text())


def summary(run: dict[str, Any], run_dir: str | Path) -> Table:
    """A one-screen summary table of a run: rows, verdict, metrics, speed-up, location."""
    v, c = run["verdict"], run["counts"]
    sel = run["selection"]
    table = Table(title=f"leanset run {run['run_id']}", show_header=False, title_justify="left")
    table.add_column(style="bold")
    table.add_column()
    table.add_row("rows in", f"{run['input']['rows']:,} ({c['train']:,} train, {c['holdout']:,} holdout, never pruned)")
    share = c["kept"] / max(c["train"], 1)
    floor = f"; floors added {sel['floor_adjustment']:,}" if sel.get("floor_adjustment") else ""
    table.add_row("rows kept", f"{c['kept']:,} of {c['train']:,} train rows ({share:.1%}){floor}")
    cfg = run["config"]["selection"]
    table.add_row("selection", f"{cfg['strategy']} on {cfg['score']}, {cfg['quotas']} class quotas")
    lo, hi = v["ci"]
    table.add_row("verdict", f"{v['status'].upper()}: Δ {v['metric']} = {v['delta']:+.4f}, "
                  f"{run['config']['verify']['confidence']:.0%} CI [{lo:+.4f}, {hi:+.4f}], tolerance {v['tolerance']}")
    table.add_row(v["metric"], f"full {v['full']:.4f} · kept {v['kept']:.4f} · random same size {v['random']:.4f}")
    table.add_row("class recall", " · ".join(f"{name} {r['full']:.2f}→{r['kept']:.2f}" for name, r in v["per_class_recall"].items()))
    if v["failed_classes"]:
        table.add_row("class guard", "recall dropped too far for: " + ", ".join(v["failed_classes"]))
    ts = v["train_seconds"]
    table.add_row("target training", f"full {ts['full']:.2f}s · kept {ts['kept']:.2f}s · speed-up {v['speedup']:.1f}×")
    table.add_row("stage seconds", " · ".join(f"{k} {s:.1f}" for k, s in run["timings"].items()))
    table.add_row("written to", str(run_dir))
    table.add_row("caution", CAUTION)
    return table
