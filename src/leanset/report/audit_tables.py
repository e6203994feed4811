"""Terminal tables of the audit answers (``leanset runs``, ``why``, ``history``, ``diff``, ``restore``,
``report --list``), drawn with Rich from the plain dicts of :mod:`leanset.store.audit`.

Only Rich is imported, so the audit commands start quickly.
"""

from __future__ import annotations

from typing import Any

from rich import box
from rich.console import Group
from rich.table import Table


def value_text(value: Any, digits: int = 4) -> str:
    """A value as table text: ``–`` for None, a float to ``digits`` significant digits, anything else as text."""
    if value is None:
        return "–"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def _fields(title: str) -> Table:
    """A two-column table of named fields: the name in bold, then its value."""
    table = Table(title=title, show_header=False, title_justify="left")
    table.add_column(style="bold")
    table.add_column()
    return table


def runs_table(rows: list[dict[str, Any]], store: Any) -> Table:
    """``leanset runs``: one line per run of ``store`` (the dicts of :func:`leanset.store.audit.runs`)."""
    table = Table(title=f"runs in {store}", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False, collapse_padding=True)
    for col in ("#", "run", "when (UTC)", "rows", "kept", "verdict", "churn"):
        table.add_column(col, justify="left" if col in ("run", "when (UTC)", "verdict") else "right", no_wrap=col != "when (UTC)")
    for r in rows:
        churn = "–" if r["churn_rows"] is None else f"{r['churn_rows']:,} {r['churn_fraction']:.1%}"
        table.add_row(str(r["sequence"]), r["run_id"], r["created"][:16].replace("T", " "), f"{r['rows']:,}",
                      f"{r['kept']:,}", r["verdict"], churn)
    return table


def why_table(w: dict[str, Any]) -> Table:
    """``leanset why``: a row's decision, scores with their percentiles, and the run's selection settings
    (the dict of :func:`leanset.store.audit.why`)."""
    t = w["thresholds"]
    table = _fields(f"row {w['row_id']} in run {w['run_id']}")
    table.add_row("decision", f"{w['decision']} ({w['reason']})")
    table.add_row("label · split", f"{w['label']} · {w['split']}")
    table.add_row("stratum · weight", f"{value_text(w['stratum'])} · {value_text(w['weight'])}")
    for name, value in w["scores"].items():
        pct = w["percentiles"].get(name)
        mark = " ◀ selection score" if name == t["score"] else ""
        within = f"  ({pct:.1f}th percentile in {w['percentile_within']})" if pct is not None else ""
        table.add_row(name, value_text(value) + within + mark)
    table.add_row("selection", f"{t['strategy']} on {t['score']}, fraction {t['fraction']}, {t['quotas']} quotas, "
                  f"floor {t['class_floor']}, hard cut {t['hard_cut']}, hysteresis {value_text(t['hysteresis'])}")
    if t["class_quota"] is not None:
        table.add_row("class quota", f"{t['class_quota']:,} of {t['class_rows']:,} training rows of {w['label']}")
    for reason, r in t["score_range_by_reason"].items():
        table.add_row(f"  {reason}", f"{r['rows']:,} rows, {t['score']} in [{value_text(r['low'])}, {value_text(r['high'])}]")
    return table


def history_table(rows: list[dict[str, Any]], row_id: str) -> Table:
    """``leanset history``: the row's decision in every run (the dicts of :func:`leanset.store.audit.history`)."""
    table = Table(title=f"history of row {row_id}", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    for col in ("#", "run", "decision", "reason", "stratum", "weight"):
        table.add_column(col, no_wrap=col != "reason")
    for r in rows:
        table.add_row(str(r["sequence"]), r["run_id"], r["decision"], value_text(r["reason"]),
                      value_text(r["stratum"]), value_text(r["weight"]))
    return table


def diff_view(d: dict[str, Any]) -> Table | Group:
    """``leanset diff``: the counts, then the changed rows by pair of reasons and the first changed rows
    (the dict of :func:`leanset.store.audit.diff`); the counts alone when no decision changed."""
    c = d["counts"]
    head = _fields(f"{d['run_a']} → {d['run_b']}")
    head.add_row("rows", f"{c['rows_a']:,} → {c['rows_b']:,} ({c['both']:,} in both, {c['only_b']:,} new, {c['only_a']:,} gone)")
    head.add_row("decision changed", f"{c['changed']:,} of {c['both']:,} rows in both ({c['churn_fraction']:.2%})")
    if not d["transitions"]:
        return head
    trans = Table(title="changed rows by reason", title_justify="left")
    for col in ("from", "to", "rows"):
        trans.add_column(col, justify="right" if col == "rows" else "left")
    for t in d["transitions"]:
        trans.add_row(t["reason_a"], t["reason_b"], f"{t['rows']:,}")
    out = d.get("out")
    rows = Table(title=f"first {len(d['rows'])} changed rows" + (f" (all in {out})" if out else ""), title_justify="left")
    for col in ("row_id", "label", "from", "to"):
        rows.add_column(col)
    for r in d["rows"]:
        rows.add_row(r["row_id"], value_text(r["label"]), r["reason_a"], r["reason_b"])
    return Group(head, trans, rows)


def restore_table(r: dict[str, Any]) -> Table:
    """``leanset restore``: rows written, kept and restored, and where (the dict of :func:`leanset.store.audit.restore`)."""
    table = _fields(f"restore from run {r['run_id']}")
    table.add_row("rows written", f"{r['rows']:,} = {r['kept']:,} kept + {r['restored']:,} restored ({', '.join(r['reasons'])})")
    table.add_row("written to", r["out"])
    return table


#: Manifest columns shown by ``leanset report RUN --list``.
REVIEW_COLUMNS = ("row_id", "label", "decision", "reason", "aum", "el2n", "confidence")


def review_table(rows: list[dict[str, Any]], run_id: str, which: str) -> Table:
    """``leanset report RUN --list``: every row to review, as manifest records."""
    table = Table(title=f"{len(rows):,} {which} rows of run {run_id}", title_justify="left", box=box.SIMPLE_HEAD)
    for col in REVIEW_COLUMNS:
        table.add_column(col)
    for r in rows:
        table.add_row(*(value_text(r.get(c)) for c in REVIEW_COLUMNS))
    return table
