"""report.html: one self-contained page per run, written with the run and readable offline.

Plots are drawn with matplotlib's Agg canvas (no display, no pyplot state) and inlined as
base64 PNG; the page loads nothing from anywhere. Every section is a ``<section id=…>`` named
in ``SECTIONS``.
"""

from __future__ import annotations

import base64
import html
import io
from typing import Any

import numpy as np

from ..config import SCORE_NAMES

#: Section ids of report.html, in page order.
SECTIONS = ("verdict", "metrics", "composition", "scores", "churn", "frontier", "cautions")
CAUTIONS = (
    "Pruning can hurt people downstream: a group that is rare in the table, or a rare failure mode, can lose most "
    "of its rows. Check per-class and per-group metrics of the kept-row model, not just the headline metric; "
    "leanset's guards cover classes and the configured segments, not other groups.",
    "Keep a human review for high-stakes uses (credit, health, safety, hiring): a pass says the target's holdout "
    "metric stayed within tolerance, not that the model is fit for purpose.",
    "The manifest and kept.parquet copy row ids and rows: follow your local rules on data retention and deletion "
    "for the run store as for the input table. leanset never deletes or rewrites the input table.",
    "Rows dropped as likely label noise or as duplicates deserve a review before they are treated as wrong; "
    "'leanset restore' puts them back by reason.",
)
_CSS = """body{font-family:system-ui,-apple-system,Segoe UI,Roboto,sans-serif;max-width:1000px;margin:2em auto;padding:0 1em;color:#222}
h1{font-size:1.5em}h2{font-size:1.2em;border-bottom:1px solid #ddd;padding-bottom:.2em;margin-top:1.6em}h3{font-size:1em}
table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #ddd;padding:.25em .6em;text-align:right}
th{background:#f4f4f4}td:first-child,th:first-child{text-align:left}img{max-width:100%}
.status{font-weight:bold;padding:.1em .5em;border-radius:.3em}.pass{background:#d6f5d6}.fail{background:#f8d0d0}
.inconclusive{background:#f8ecc0}.muted{color:#666}"""


def _esc(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _num(value: Any, digits: int = 4) -> str:
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return str(bool(value))
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if isinstance(value, (float, np.floating)):
        return f"{float(value):.{digits}f}"
    return _esc(value)


def _table(header: list[str], rows: list[list[Any]]) -> str:
    head = "".join(f"<th>{_esc(h)}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{_num(v)}</td>" for v in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _img(fig, alt: str) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png")
    return f'<img alt="{_esc(alt)}" src="data:image/png;base64,{base64.b64encode(buf.getvalue()).decode()}">'


def _verdict(run: dict[str, Any]) -> str:
    v, conf = run["verdict"], run["config"]["verify"]
    lo, hi = v["ci"]
    out = [f'<p><span class="status {_esc(v["status"])}">{_esc(v["status"].upper())}</span> '
           f"Δ {_esc(v['metric'])} = {v['delta']:+.4f} (all rows minus kept rows; positive means the kept rows do worse), "
           f"{conf['confidence']:.0%} interval [{lo:+.4f}, {hi:+.4f}], tolerance {_esc(v['tolerance'])}; "
           f"paired bootstrap over {conf['bootstrap']:,} resamples of the holdout, which is never pruned.</p>",
           "<p class=muted>pass: the interval's upper bound is within tolerance and no class or segment guard fails; "
           "fail: its lower bound is above tolerance, or a class or segment surely dropped too far; inconclusive otherwise.</p>"]
    if v.get("mcnemar"):
        out.append("<p class=muted>McNemar's exact test on paired correctness: "
                   + ", ".join(f"{_esc(k)} {_num(x)}" for k, x in v["mcnemar"].items()) + "</p>")
    for key, what in (("failed_classes", "Class"), ("failed_segments", "Segment")):
        if v.get(key):
            out.append(f"<p><b>{what} guard failed for: {_esc(', '.join(v[key]))}</b></p>")
    return "".join(out)


def _metrics(run: dict[str, Any]) -> str:
    v, c = run["verdict"], run["counts"]
    ts = v.get("train_seconds", {})
    out = [_table(["target trained on", "rows", v["metric"], "train seconds"],
                  [["all training rows", c["train"], v["full"], ts.get("full")],
                   ["kept rows", c["kept"], v["kept"], ts.get("kept")],
                   ["random rows, same count", c["kept"], v["random"], ts.get("random")]])]
    if v.get("random_ci"):
        out.append(f"<p class=muted>Over the random subsets, {_esc(v['metric'])} ranged over "
                   f"[{_num(v['random_ci'][0])}, {_num(v['random_ci'][1])}].</p>")
    if v.get("speedup") is not None:
        out.append(f"<p>Target training speed-up on the kept rows: {v['speedup']:.1f}×.</p>")
    recall = v.get("per_class_recall") or {}
    if recall:
        out.append(_table(["class", "recall, all rows", "recall, kept rows", "drop", "interval"],
                          [[k, r["full"], r["kept"], r["drop"], f"[{r['ci'][0]:+.3f}, {r['ci'][1]:+.3f}]"] for k, r in recall.items()]))
    fig = _figure(6.5, 2.4)
    ax = fig.add_subplot()
    vals = [v["full"], v["kept"], v["random"]]
    ax.barh(["all rows", "kept rows", "random rows"], vals, color=["#888", "#2a7", "#c84"])
    span = max(vals) - min(vals) + 1e-3
    ax.set_xlim(min(vals) - 2 * span, max(vals) + span)
    for y, x in enumerate(vals):
        ax.text(x, y, f" {x:.4f}", va="center", fontsize="small")
    ax.set_xlabel(f"holdout {v['metric']} (axis zoomed to the differences)")
    ax.invert_yaxis()
    out.append(_img(fig, f"holdout {v['metric']} of the target trained on all, kept and random rows"))
    return "".join(out)


def _composition(run: dict[str, Any], manifest, segments: dict[str, Any] | None) -> str:
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    train = decision != "holdout"
    groups: dict[str, np.ndarray] = {}
    if run["config"]["input"].get("task", "classification") != "regression":
        groups["class"] = manifest.column("label").to_numpy(zero_copy_only=False)
    for name, values in (segments or {}).items():
        groups[f"segment {name}"] = np.asarray(values, dtype=object).astype(str)
    out = []
    for title, labels in groups.items():
        names, before = np.unique(labels[train], return_counts=True)
        kept = np.array([((labels == n) & (decision == "keep")).sum() for n in names])
        if len(names) > 40:
            out.append(f"<p class=muted>{_esc(title)}: {len(names)} values, too many to chart.</p>")
            continue
        nb, nk = max(before.sum(), 1), max(kept.sum(), 1)
        out.append(f"<h3>{_esc(title)}</h3>")
        out.append(_table([title, "training rows", "share before", "kept rows", "share after"],
                          [[str(n), int(b), b / nb, int(k), k / nk] for n, b, k in zip(names, before, kept)]))
        fig = _figure(8, 0.4 * len(names) + 1.2)
        ax = fig.add_subplot()
        y = np.arange(len(names))
        ax.barh(y - 0.2, before / nb, height=0.4, label="before (training rows)", color="#888")
        ax.barh(y + 0.2, kept / nk, height=0.4, label="after (kept rows)", color="#2a7")
        ax.set_yticks(y, [str(n) for n in names])
        ax.invert_yaxis()
        ax.set_xlabel("share of rows")
        ax.legend(loc="lower right", fontsize="small")
        out.append(_img(fig, f"{title} composition before and after pruning"))
    if "class" in groups and run["config"]["selection"].get("weights") == "class_prior":
        out.append("<p class=muted>Kept rows carry class weights, so that their weighted class shares equal the full table's.</p>")
    seg = run["verdict"].get("per_segment") or {}
    if seg:
        out.append("<h3>segment guard on the holdout</h3>" + _table(
            ["segment", "holdout rows", "Δ", "interval"],
            [[k, s["rows"], s["delta"], "–" if not s.get("ci") else f"[{s['ci'][0]:+.4f}, {s['ci'][1]:+.4f}]"] for k, s in seg.items()]))
    return "".join(out) or "<p class=muted>No class or segment columns to show.</p>"


def _scores(run: dict[str, Any], manifest) -> str:
    names = [n for n in SCORE_NAMES if n in manifest.column_names]
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    chosen = run["config"]["selection"]["score"]
    rows = (len(names) + 2) // 3
    fig = _figure(9, 2.0 * rows + 0.4)
    axes = fig.subplots(rows, 3, squeeze=False).ravel()
    for ax, name in zip(axes, names):
        values = manifest.column(name).to_numpy(zero_copy_only=False).astype(np.float64)
        ok = np.isfinite(values) & (decision != "holdout")
        if not ok.any():
            ax.set_visible(False)
            continue
        bins = np.histogram_bin_edges(values[ok], bins=40)
        for d, color in (("keep", "#2a7"), ("drop", "#c44")):
            part = values[ok & (decision == d)]
            if len(part):
                ax.hist(part, bins=bins, alpha=0.55, color=color, label=f"{d} ({len(part):,})")
        ax.set_title(name + ("  (selection score)" if name == chosen else ""), fontsize="small")
        ax.tick_params(labelsize="x-small")
    for ax in axes[len(names):]:
        ax.set_visible(False)
    axes[0].legend(fontsize="x-small")
    codes, counts = np.unique(manifest.column("reason").to_numpy(zero_copy_only=False), return_counts=True)
    return (f"<p>Every score of the training rows, kept against dropped; {_esc(chosen)} ranked difficulty.</p>"
            + _img(fig, "score distributions of kept and dropped rows")
            + "<h3>rows by reason</h3>" + _table(["reason", "rows"], [[c, int(k)] for c, k in zip(codes, counts)]))


def _churn(run: dict[str, Any]) -> str:
    ch = run.get("churn")
    if not ch:
        return "<p>First run of its lineage in this store: no parent run to compare with.</p>"
    rows = [["parent run", ch["parent_run"]], ["rows in both runs", ch["rows_in_both"]],
            ["decision changed", f"{ch['rows']:,} ({ch['fraction']:.2%})"],
            ["kept before, dropped now", ch["keep_to_drop"]], ["dropped before, kept now", ch["drop_to_keep"]],
            ["new rows", ch["new_rows"]], ["rows gone from the input", ch["removed_rows"]]]
    stable = (run.get("selection") or {}).get("stable")
    if stable:
        rows += [["kept as before, score within the band", stable["kept_as_before"]],
                 ["dropped as before, score within the band", stable["dropped_as_before"]],
                 ["score moved past the band", stable["moved"]]]
    return (f"<p>Against the parent run, with selection.hysteresis = {_esc(run['config']['selection'].get('hysteresis'))} "
            "(in percentiles of the selection score within a class).</p>" + _table(["", "value"], rows))


def _frontier(run: dict[str, Any]) -> str:
    points = run.get("frontier")
    if not points:
        return "<p class=muted>No frontier in this run.</p>"
    keys = list(points[0])
    out = [_table(keys, [[p.get(k) for k in keys] for p in points])]
    if {"fraction", "metric"} <= set(keys):
        fig = _figure(7, 3.2)
        ax = fig.add_subplot()
        by: dict[str, list] = {}
        for p in points:
            by.setdefault(str(p.get("strategy", "kept")), []).append(p)
        for name, ps in by.items():
            ps = sorted(ps, key=lambda p: p["fraction"])
            x = [p["fraction"] for p in ps]
            ax.plot(x, [p["metric"] for p in ps], marker="o", label=name)
            if {"ci_lo", "ci_hi"} <= set(keys):
                ax.fill_between(x, [p["ci_lo"] for p in ps], [p["ci_hi"] for p in ps], alpha=0.15)
        ax.axhline(run["verdict"]["full"], color="#888", linestyle="--", label="all rows")
        ax.set_xlabel("fraction kept")
        ax.set_ylabel(run["verdict"]["metric"])
        ax.legend(fontsize="small")
        out.append(_img(fig, "frontier: holdout metric by fraction kept"))
    return "".join(out)


def render_html(run: dict[str, Any], manifest, segments: dict[str, Any] | None = None) -> str:
    """The run's report as one self-contained HTML page.

    Parameters
    ----------
    run : dict
        The run.json content.
    manifest : pyarrow.Table
        The run's manifest.
    segments : dict, optional
        Segment column name → its value for every input row, in manifest order.

    Returns
    -------
    str
        HTML with one ``<section id=…>`` per name in ``SECTIONS``.
    """
    c, sel = run["counts"], run["config"]["selection"]
    body = {
        "verdict": ("Verdict", _verdict(run)),
        "metrics": ("Metrics: all, kept and random rows", _metrics(run)),
        "composition": ("Composition before and after", _composition(run, manifest, segments)),
        "scores": ("Score distributions by decision", _scores(run, manifest)),
        "churn": ("Churn against the parent run", _churn(run)),
        "frontier": ("Frontier", _frontier(run)),
        "cautions": ("Cautions", "<ul>" + "".join(f"<li>{_esc(t)}</li>" for t in CAUTIONS) + "</ul>"),
    }
    sections = "".join(f'<section id="{k}"><h2>{_esc(t)}</h2>{h}</section>' for k, (t, h) in body.items())
    return (f"<!DOCTYPE html><html lang=en><head><meta charset=utf-8><title>leanset run {_esc(run['run_id'])}</title>"
            f"<style>{_CSS}</style></head><body><h1>leanset run {_esc(run['run_id'])}</h1>"
            f"<p class=muted>{_esc(run['created'])} · input {_esc(run['input']['path'])} · {run['input']['rows']:,} rows "
            f"({c['train']:,} train, {c['holdout']:,} holdout) · kept {c['kept']:,} · {_esc(sel['strategy'])} on "
            f"{_esc(sel['score'])} · seed {_esc(run['seed'])}</p>{sections}</body></html>\n")
