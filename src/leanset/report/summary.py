"""Human-readable views of a finished run, built from its run.json alone."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

from rich import box
from rich.table import Table
from rich.text import Text

from .wording import against_random_text
from .ledger import ledger_lines

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
    dups = f"; {sel['duplicates_dropped']:,} exact duplicates dropped" if sel.get("duplicates_dropped") else ""
    table.add_row("rows kept", f"{c['kept']:,} of {c['train']:,} train rows ({share:.1%}){floor}{dups}")
    cfg = run["config"]["selection"]
    kept = sel.get("suspects_kept")
    shared = f" ({sel['suspect_shared']:,} more kept at their share)" if sel.get("suspect_shared") else ""
    suspects = (f"; {sel['suspect_dropped']:,} suspected label errors dropped{shared}" if sel.get("suspect_dropped") else
                f"; {kept['rows']:,} suspected label errors left eligible ({kept['because']})" if kept else "")
    table.add_row("selection", f"{cfg['strategy']} on {cfg['score']}, {cfg['quotas']} class quotas{suspects}")
    _verdict_rows(table, run)
    if "search" in run:
        tried = ", ".join(f"{t['fraction']:g} {t['status']}" + (f" ({t['blocked_by']})" if t.get("blocked_by") else "")
                          for t in run["search"]["tried"])
        found = run["search"]["fraction"]
        head = f"smallest passing {found:g}" if found < 1 else "no grid fraction passed; all rows kept"
        table.add_row("fraction search", f"{head} (tried {tried})")
    table.add_row("random interval", f"{v['random_ci'][0]:.4f} – {v['random_ci'][1]:.4f} over "
                  f"{run['config']['verify']['random_repeats']} random subsets")
    if v.get("against_random"):
        table.add_row("against random", against_random_text(v["against_random"]))
    if v.get("failed_segments"):
        table.add_row("segment guard", "metric dropped too far for: " + ", ".join(v["failed_segments"]))
    ag = run.get("agreement")
    if ag:
        warn = " (below the floor: the proxy may be a poor stand-in for the target)" if ag["below_floor"] else ""
        table.add_row("proxy-target", f"Spearman {ag['spearman']:+.2f} between {ag['score']} and target out-of-fold loss "
                      f"on {ag['rows']:,} rows, floor {ag['floor']:+.2f}{warn}")
    if run.get("cost"):
        for label, text in ledger_lines(run["cost"]):
            table.add_row(label, text)
    else:  # runs written before the cost ledger
        ts = v["train_seconds"]
        table.add_row("target training", f"full {ts['full']:.2f}s · kept {ts['kept']:.2f}s · speed-up {v['speedup']:.1f}×")
        table.add_row("stage seconds", " · ".join(f"{k} {s:.1f}" for k, s in run["timings"].items()))
    ch = run.get("churn")
    if ch:
        table.add_row("churn", f"{ch['rows']:,} of {ch['rows_in_both']:,} rows changed decision since run {ch['parent_run']} "
                      f"({ch['fraction']:.2%}); {ch['new_rows']:,} new rows")
    table.add_row("written to", str(run_dir))
    table.add_row("report", Text(str(Path(run_dir) / "report.html"), overflow="fold"))
    table.add_row("caution", CAUTION)
    return table


def _verdict_rows(table: Table, run: dict[str, Any]) -> None:
    """The verdict's rows of the summary: status and Δ, the metric of each model, class recalls,
    calibration and the class guard."""
    v = run["verdict"]
    lo, hi = v["ci"]
    carried = v.get("carried")
    if carried:  # never shown as a fresh verdict: the figures below are the source run's
        table.add_row("verdict", carried_text(v))
    table.add_row("carried verdict" if carried else "verdict",
                  f"{(carried or v)['status'].upper()}: Δ {v['metric']} = {v['delta']:+.4f}, "
                  f"{run['config']['verify']['confidence']:.0%} CI [{lo:+.4f}, {hi:+.4f}], tolerance {v['tolerance']}")
    table.add_row(v["metric"], f"full {v['full']:.4f} · kept {v['kept']:.4f} · random same size {v['random']:.4f}")
    table.add_row("class recall", " · ".join(f"{name} {r['full']:.2f}→{r['kept']:.2f}" for name, r in v["per_class_recall"].items()))
    if v.get("calibration"):
        cal, name = v["calibration"], "Brier score" if len(v["per_class_recall"]) == 2 else "log loss"
        guard = ""
        if "excess" in cal:
            guard = (f"; kept {cal['excess']:+.1%} against full, CI [{cal['ci'][0]:+.1%}, {cal['ci'][1]:+.1%}], "
                     f"guard {'FAILED' if cal['failed'] else 'ok'} at +{cal['tolerance']:.0%}")
        table.add_row("calibration", f"{name} (lower is better): full {cal['full']:.4f} · kept {cal['kept']:.4f} · "
                      f"random {cal['random']:.4f}{guard}")
    if v["failed_classes"]:
        table.add_row("class guard", "recall dropped too far for: " + ", ".join(v["failed_classes"]))


def carried_text(v: dict[str, Any]) -> str:
    """One line for a carried verdict: not verified on this run, whose verdict, how old, what drifted."""
    c = v["carried"]
    d = c.get("drift") or {}
    hours = c["age_seconds"] / 3600
    return (f"CARRIED, not verified on this run: the last verdict was {c['status'].upper()} in run {c['from_run']}, "
            f"{c['age_runs']} run(s) and {hours:.1f} h ago; since then {d.get('new_rows', 0):,} new training rows "
            f"({d.get('new_share', 0.0):.1%}) and {d.get('churn', 0.0):.1%} of decisions changed ({c['reason']})")


def frontier_table(run: dict[str, Any]) -> Table:
    """The frontier of a run as a table: metric and interval per fraction and strategy (timings are in frontier.parquet)."""
    metric = run["verdict"]["metric"]
    table = Table(title=f"frontier: holdout {metric} by fraction kept", title_justify="left", box=box.SIMPLE_HEAD)
    for name in ("frac", "strategy", "kept", metric[:10], "interval", "Δ", "status"):
        table.add_column(name, no_wrap=True, justify="left" if name in ("strategy", "status") else "right")
    for r in run["frontier"]:
        table.add_row(f"{r['fraction']:g}", r["strategy"], f"{r['kept']:,}", f"{r['metric']:.4f}",
                      f"{r['ci_lo']:.3f}–{r['ci_hi']:.3f}", f"{r['delta']:+.4f}", r["status"])
    return table


def markdown_summary(run: dict[str, Any], run_dir: str | Path) -> str:
    """A short markdown summary of a run (the scheduled flow publishes it as a Prefect artifact)."""
    v, c = run["verdict"], run["counts"]
    lo, hi = v["ci"]
    head = (f"**{carried_text(v)}**; its figures: " if v.get("carried") else f"**{v['status'].upper()}**: ")
    lines = [f"# leanset run `{run['run_id']}`", "",
             f"{head}Δ {v['metric']} = {v['delta']:+.4f}, interval [{lo:+.4f}, {hi:+.4f}], "
             f"tolerance {v['tolerance']}", "",
             "| | |", "|---|---|",
             f"| rows in | {run['input']['rows']:,} ({c['train']:,} train, {c['holdout']:,} holdout) |",
             f"| rows kept | {c['kept']:,} of {c['train']:,} ({c['kept'] / max(c['train'], 1):.1%}) |",
             f"| {v['metric']} | full {v['full']:.4f} · kept {v['kept']:.4f} · random {v['random']:.4f} |",
             *([f"| against random | {against_random_text(v['against_random'])} |"] if v.get("against_random") else []),
             f"| new rows | {c.get('new', run['input']['rows']):,} |"]
    ch = run.get("churn")
    if ch:
        lines.append(f"| churn | {ch['rows']:,} of {ch['rows_in_both']:,} ({ch['fraction']:.2%}) since `{ch['parent_run']}` |")
    for label, text in ledger_lines(run["cost"]) if run.get("cost") else []:
        lines.append(f"| {label} | {text} |")
    lines += [f"| report | `{Path(run_dir) / 'report.html'}` |", "", f"_{CAUTION}_"]
    return "\n".join(lines)


def reason_counts(manifest) -> list[dict[str, Any]]:
    """Rows per (decision, reason) of a manifest (a pyarrow Table), largest first."""
    counts = manifest.group_by(["decision", "reason"]).aggregate([("row_id", "count")])
    rows = [{"decision": d, "reason": r, "rows": int(n)} for d, r, n in
            zip(*(counts.column(k).to_pylist() for k in ("decision", "reason", "row_id_count")))]
    return sorted(rows, key=lambda r: (-r["rows"], r["reason"]))
