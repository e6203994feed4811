"""report.html: one self-contained page per run, rendered from a Jinja2 template with autoescape.

Charts are drawn with matplotlib's Agg canvas (no display, no pyplot state) and inlined as SVG
(text kept as text), or as a base64 PNG when the SVG would be too large; every chart has the
table of its figures beside it. Colours come from the Okabe–Ito palette and every series also has
its own hatching or marker, so nothing is told apart by colour alone. The page loads nothing from
anywhere. Every section is a ``<section id=…>`` named in ``SECTIONS``.

:func:`render_html` builds the page from a run's run.json content and manifest (and, when given,
the input rows to show and the store's other runs); ``leanset.store.page.build_report`` rebuilds it
for any published run from the run directory, so older runs get the current page.
"""

from __future__ import annotations

import base64
import io
import re
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow as pa

from ..config import REGRESSION_METRICS, SCORE_NAMES
from ..difficulty import DIFFICULTY_SIGN
from ..errors import LeansetError
from ..reasons import REASONS

#: Section ids of report.html, in page order.
SECTIONS = ("verdict", "metrics", "cost", "composition", "scores", "review", "churn", "frontier",
            "agreement", "reasons", "config", "cautions")
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
#: Okabe & Ito (2008), "Color Universal Design": a palette told apart with every common colour-vision deficiency.
OKABE_ITO = {"orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73", "yellow": "#F0E442",
             "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7", "grey": "#999999", "black": "#000000"}
#: How each model or decision is drawn: colour, hatching and marker.
STYLE = {
    "full": (OKABE_ITO["grey"], "", "s"), "kept": (OKABE_ITO["blue"], "", "o"), "random": (OKABE_ITO["orange"], "//", "^"),
    "keep": (OKABE_ITO["blue"], "", "o"), "drop": (OKABE_ITO["vermillion"], "xx", "x"),
    "before": (OKABE_ITO["grey"], "//", "s"), "after": (OKABE_ITO["blue"], "", "o"),
}
#: Rows shown per list of rows to review; the CLI lists them all.
REVIEW_ROWS = 15
#: Input columns shown beside each row to review (the first ones of the table).
REVIEW_FEATURES = 8
#: Classes drawn in the per-class score chart; the table lists every class.
SCORE_CLASSES = 12
#: Strata edges drawn one by one up to this many strata; beyond, only the stratified range.
DRAWN_EDGES = 20
#: An SVG chart larger than this is inlined as PNG instead.
SVG_LIMIT = 250_000

_TEMPLATE = "report.html.j2"


# --- formatting -----------------------------------------------------------------------------

def share(value: float | None, digits: int = 1) -> str:
    """A share as a percentage with a thin space: 0.1305 → ``13.1 %``."""
    return "–" if value is None else f"{100 * float(value):.{digits}f} %"


def seconds(value: float | None) -> str:
    """Seconds with sensible precision: 0.0123 s, 0.41 s, 2.0 s, 75 s."""
    if value is None:
        return "–"
    v = float(value)
    if v < 0.1:
        return f"{v:.3f} s"
    if v < 1:
        return f"{v:.2f} s"
    if v < 60:
        return f"{v:.1f} s"
    return f"{v:,.0f} s"


def number(value: Any, digits: int = 4) -> str:
    """An integer with thousands separators, a float with ``digits`` decimals, anything else as text."""
    if value is None:
        return "–"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return f"{int(value):,}"
    if isinstance(value, (float, np.floating)):
        return "–" if not np.isfinite(value) else f"{float(value):.{digits}f}"
    return str(value)


def signed(value: float | None, digits: int = 4) -> str:
    return "–" if value is None else f"{float(value):+.{digits}f}"


def interval(ci, digits: int = 4, sign: bool = True) -> str:
    if not ci or ci[0] is None:
        return "–"
    f = "+" if sign else ""
    return f"[{ci[0]:{f}.{digits}f}, {ci[1]:{f}.{digits}f}]"


# --- charts ---------------------------------------------------------------------------------

def _figure(width: float, height: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


class _Charts:
    """Renders figures to inline SVG (ids prefixed per chart so several SVGs share a page), or PNG."""

    def __init__(self):
        self.count = 0

    def __call__(self, fig, alt: str) -> dict[str, str]:
        import matplotlib

        self.count += 1
        buf = io.BytesIO()
        with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "leanset"}):
            fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None})
        svg = buf.getvalue().decode()
        if len(svg) <= SVG_LIMIT:
            svg = svg[svg.index("<svg"):]
            prefix = f"c{self.count}-"
            svg = re.sub(r'id="([^"]+)"', lambda m: f'id="{prefix}{m.group(1)}"', svg)
            svg = re.sub(r'(href="#|url\(#)([^")]+)', lambda m: f"{m.group(1)}{prefix}{m.group(2)}", svg)
            svg = re.sub(r'<svg ', f'<svg role="img" aria-label="{_attr(alt)}" ', svg, count=1)
            return {"svg": svg, "alt": alt}
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=90)
        return {"png": base64.b64encode(buf.getvalue()).decode(), "alt": alt}


def _attr(text: str) -> str:
    from markupsafe import escape

    return str(escape(text))


def _style(ax) -> None:
    ax.spines[["top", "right"]].set_visible(False)
    ax.tick_params(labelsize="small")


def _verdict_chart(run, draw) -> dict | None:
    """Δ with its interval against the tolerance, then each class's recall drop and each segment's Δ."""
    v, conf = run["verdict"], run["config"]["verify"]
    rows = [(f"overall Δ {v['metric']}", v["delta"], v["ci"], v["tolerance"], "overall")]
    for name, r in (v.get("per_class_recall") or {}).items():
        rows.append((f"class {name}: recall drop", r["drop"], r.get("ci"), conf.get("class_tolerance"), "class"))
    for name, s in (v.get("per_segment") or {}).items():
        rows.append((f"segment {name}: Δ", s["delta"], s.get("ci"), conf.get("segment_tolerance"), "segment"))
    rows = rows[:40]
    marker = {"overall": ("D", OKABE_ITO["black"]), "class": ("o", OKABE_ITO["blue"]), "segment": ("s", OKABE_ITO["purple"])}
    fig = _figure(8, 0.32 * len(rows) + 1.3)
    ax = fig.add_subplot()
    for y, (label, value, ci, tol, kind) in enumerate(rows):
        m, colour = marker[kind]
        if ci and ci[0] is not None:
            ax.plot(ci, [y, y], color=colour, linewidth=2, solid_capstyle="butt")
        ax.plot([value], [y], marker=m, color=colour, markersize=7, linestyle="none")
        if tol is not None:
            ax.plot([tol, tol], [y - 0.4, y + 0.4], color=OKABE_ITO["vermillion"], linewidth=2, linestyle=(0, (2, 1)))
    ax.axvline(0, color="#555", linewidth=0.8)
    ax.set_yticks(range(len(rows)), [r[0] for r in rows])
    ax.invert_yaxis()
    ax.set_xlabel("drop from all rows to kept rows (positive: kept rows do worse); dashed tick: tolerance")
    _style(ax)
    return draw(fig, "verdict: each drop with its interval against its tolerance")


def _metrics_chart(run, draw) -> dict | None:
    """Holdout metric and calibration of full, kept and random, each with its interval; axis from 0."""
    v = run["verdict"]
    cal = v.get("calibration") or {}
    lower = v["metric"] in _LOWER_IS_BETTER
    panels = [(f"holdout {v['metric']} ({'lower' if lower else 'higher'} is better)", {k: v[k] for k in ("full", "kept", "random")},
               {"kept": None if lower else [v["full"] - v["ci"][1], v["full"] - v["ci"][0]], "random": v.get("random_ci")},
               None if lower else v["full"] - v["tolerance"])]
    if all(k in cal for k in ("full", "kept", "random")):
        panels.append((f"{_calibration_name(run)} (lower is better)", {k: cal[k] for k in ("full", "kept", "random")},
                       {k: cal.get(f"{k}_ci") for k in ("full", "kept", "random")}, None))
    fig = _figure(8, 1.9 * len(panels) + 0.4)
    axes = fig.subplots(len(panels), 1, squeeze=False).ravel()
    names = ["all rows", "kept rows", "random rows"]
    for ax, (title, values, cis, tol) in zip(axes, panels):
        for y, key in enumerate(("full", "kept", "random")):
            colour, hatch, _ = STYLE[key]
            ax.barh(y, values[key], color=colour, hatch=hatch, edgecolor="white" if not hatch else "#333", height=0.6)
            ci = cis.get(key)
            right = values[key]
            if ci and ci[0] is not None:
                ax.errorbar([values[key]], [y], xerr=[[max(values[key] - ci[0], 0)], [max(ci[1] - values[key], 0)]],
                            fmt="none", ecolor="black", capsize=4, linewidth=1.2)
                right = max(right, ci[1])
            ax.text(right, y, f"  {values[key]:.4f}", va="center", ha="left", fontsize="small")
        if tol is not None:
            ax.axvline(tol, color=OKABE_ITO["vermillion"], linestyle="--", linewidth=1.5, label="all rows minus tolerance")
            ax.legend(loc="lower left", bbox_to_anchor=(1.0, 0.0), fontsize="x-small", frameon=False)
        ax.set_yticks(range(3), names)
        ax.invert_yaxis()
        top = max([*values.values(), *(ci[1] for ci in cis.values() if ci and ci[0] is not None)])
        ax.set_xlim(0, max(top * 1.25, 1e-9))
        ax.set_title(title, fontsize="small", loc="left")
        _style(ax)
    return draw(fig, f"holdout {v['metric']} and calibration of the target trained on all, kept and random rows")


#: Metrics where a smaller value is better: no "all rows minus tolerance" line is drawn for them.
_LOWER_IS_BETTER = ("log_loss", "rmse", "mae")


def _regression(run) -> bool:
    return run["verdict"]["metric"] in REGRESSION_METRICS or run["config"]["input"].get("task") == "regression"


def _calibration_name(run) -> str:
    v = run["verdict"]
    return "Brier score" if len(v.get("per_class_recall") or {}) == 2 else "log loss"


def _bars(groups: list[dict], title: str, draw) -> dict | None:
    """Grouped horizontal bars of share before and after, hatched differently."""
    fig = _figure(8, 0.38 * len(groups) + 1.3)
    ax = fig.add_subplot()
    y = np.arange(len(groups))
    for off, key in ((-0.2, "before"), (0.2, "after")):
        colour, hatch, _ = STYLE[key]
        vals = [g[f"share_{key}"] for g in groups]
        ax.barh(y + off, vals, height=0.4, color=colour, hatch=hatch, edgecolor="#333" if hatch else "white",
                label="before (training rows)" if key == "before" else "after (kept rows)")
        for yy, val in zip(y + off, vals):
            ax.text(val, yy, f" {100 * val:.1f} %", va="center", fontsize="x-small")
    ax.set_yticks(y, [g["name"] for g in groups])
    ax.invert_yaxis()
    ax.set_xlim(0, max(max(g["share_before"], g["share_after"]) for g in groups) * 1.2 + 1e-9)
    ax.xaxis.set_major_formatter(lambda x, _: f"{100 * x:.0f} %")
    ax.set_xlabel("share of rows")
    fig.legend(loc="outside upper center", ncols=2, fontsize="small", frameon=False)
    _style(ax)
    return draw(fig, f"{title}: share of rows before and after pruning")


# --- sections -------------------------------------------------------------------------------

def _verdict(run, draw) -> dict[str, Any]:
    v, conf = run["verdict"], run["config"]["verify"]
    carried = v.get("carried")
    guards = []
    for name, r in (v.get("per_class_recall") or {}).items():
        guards.append({"what": f"class {name}", "kind": "recall drop", "value": r["drop"], "ci": r.get("ci"),
                       "tolerance": conf.get("class_tolerance"), "failed": name in (v.get("failed_classes") or [])})
    for name, s in (v.get("per_segment") or {}).items():
        guards.append({"what": f"segment {name}", "kind": f"Δ {v['metric']}", "value": s["delta"], "ci": s.get("ci"),
                       "tolerance": conf.get("segment_tolerance"), "failed": name in (v.get("failed_segments") or []),
                       "rows": s.get("rows")})
    cal = v.get("calibration") or {}
    if "excess" in cal:
        guards.append({"what": "calibration", "kind": f"relative excess of {_calibration_name(run)}", "value": cal["excess"],
                       "ci": cal.get("ci"), "tolerance": cal.get("tolerance"), "failed": bool(cal.get("failed"))})
    return {"v": v, "conf": conf, "carried": carried, "guards": guards, "blocked_by": v.get("blocked_by") or [],
            "chart": _verdict_chart(run, draw)}


def _metrics(run, draw) -> dict[str, Any]:
    v, c = run["verdict"], run["counts"]
    cal = v.get("calibration") or {}
    ts = v.get("train_seconds") or {}
    models = []
    for key, label, rows in (("full", "all training rows", c["train"]), ("kept", "kept rows", c["kept"]),
                             ("random", "random rows, same count", c["kept"])):
        models.append({"label": label, "rows": rows, "metric": v[key], "calibration": cal.get(key),
                       "calibration_ci": cal.get(f"{key}_ci"), "seconds": ts.get(key),
                       "others": {m: vals.get(key) for m, vals in (v.get("metrics") or {}).items() if m != v["metric"]}})
    others = [m for m in (v.get("metrics") or {}) if m != v["metric"]]
    return {"models": models, "others": others, "calibration_name": _calibration_name(run) if cal else None,
            "calibration_ci": any(m["calibration_ci"] for m in models),
            "ci_kept": [v["full"] - v["ci"][1], v["full"] - v["ci"][0]], "chart": _metrics_chart(run, draw)}


def _cost(run, draw) -> dict[str, Any] | None:
    cost = run.get("cost")
    if not cost:
        return None
    stages = cost.get("stages") or {}
    fits = cost.get("target_fit_seconds") or {}
    chart = None
    if stages:
        order = sorted(stages.items(), key=lambda kv: -kv[1])
        fig = _figure(8, 0.3 * (len(order) + len(fits)) + 1.3)
        ax = fig.add_subplot()
        labels = [f"stage {k}" for k, _ in order] + [f"target fit, {k} rows" for k in fits]
        vals = [s for _, s in order] + list(fits.values())
        hatches = [""] * len(order) + [STYLE.get(k, ("", "..", ""))[1] or ".." for k in fits]
        colours = [OKABE_ITO["sky"]] * len(order) + [STYLE.get(k, (OKABE_ITO["grey"],))[0] for k in fits]
        ax.barh(range(len(vals)), vals, color=colours, hatch=hatches, edgecolor="#333")
        for y, s in enumerate(vals):
            ax.text(s, y, " " + seconds(s), va="center", fontsize="x-small")
        ax.set_yticks(range(len(vals)), labels)
        ax.invert_yaxis()
        ax.set_xlim(0, max(vals + [1e-9]) * 1.2)
        ax.set_xlabel("seconds (wall time; plain bars: leanset's stages, dotted or hatched: target fits)")
        _style(ax)
        chart = draw(fig, "seconds spent by stage and by target fit")
    return {"c": cost, "stages": stages, "fits": fits, "chart": chart}


def _group_rows(names, labels, train, kept, weight, weighted: bool) -> list[dict]:
    rows = []
    nb, nk = max(int(train.sum()), 1), max(int(kept.sum()), 1)
    wk = float(weight[kept].sum()) or 1.0
    for n in names:
        member = labels == n
        b, k = int((member & train).sum()), int((member & kept).sum())
        w = weight[member & kept]
        rows.append({"name": str(n), "before": b, "share_before": b / nb, "after": k, "share_after": k / nk,
                     "kept_share": k / b if b else None, "weight": float(w.mean()) if len(w) else None,
                     "share_weighted": float(w.sum()) / wk if weighted else None})
    return rows


def _composition(run, manifest, segments, draw) -> dict[str, Any]:
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    train, kept = decision != "holdout", decision == "keep"
    weight = np.nan_to_num(manifest.column("weight").to_numpy(zero_copy_only=False).astype(np.float64))
    weighted = run["config"]["selection"].get("weights") == "class_prior"
    groups = []
    if not _regression(run):
        groups.append(("class", manifest.column("label").to_numpy(zero_copy_only=False).astype(str), True))
    for name, values in (segments or {}).items():
        if len(values) == len(decision):  # one value per input row
            groups.append((f"segment {name}", np.asarray(values, dtype=object).astype(str), True))
        else:  # the kept rows' values only (a rebuilt page when the input table is gone)
            groups.append((f"segment {name}", np.asarray(values, dtype=object).astype(str), False))
    out = []
    for title, labels, full in groups:
        if not full:
            names, counts = np.unique(labels, return_counts=True)
            out.append({"title": title, "partial": True,
                        "rows": [{"name": str(n), "after": int(k), "share_after": k / max(counts.sum(), 1)} for n, k in zip(names, counts)]})
            continue
        names = np.unique(labels[train])
        rows = _group_rows(names, labels, train, kept, weight, weighted and title == "class")
        item = {"title": title, "partial": False, "rows": rows, "too_many": len(names) > 40}
        if not item["too_many"]:
            item["chart"] = _bars(rows, title, draw)
        out.append(item)
    seg = run["verdict"].get("per_segment") or {}
    return {"groups": out, "weighted": weighted, "segment_guard": seg}


def _score_view(run, manifest) -> dict[str, Any]:
    """Per class: the selection score of kept and dropped training rows, strata edges, hard cut, suspect cut-off."""
    sel = run["config"]["selection"]
    name = sel["score"]
    if name not in manifest.column_names:
        return {"name": name, "classes": []}
    sign = DIFFICULTY_SIGN.get(name, 1)
    values = manifest.column(name).to_numpy(zero_copy_only=False).astype(np.float64)
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    reason = manifest.column("reason").to_numpy(zero_copy_only=False)
    label = manifest.column("label").to_numpy(zero_copy_only=False).astype(str)
    pooled = _regression(run)
    if pooled:  # strata and hard cuts are per label bin, which the manifest does not record: one panel, no edges
        label = np.full(len(label), "all rows")
    stratum = manifest.column("stratum").to_numpy(zero_copy_only=False)
    stratum = np.where(np.isnan(stratum.astype(np.float64)), -1, stratum).astype(np.int64)
    train = (decision != "holdout") & np.isfinite(values)
    label_errors = (run.get("scores") or {}).get("label_errors") or {}
    cutoffs = label_errors.get("cutoffs") or []
    suspect_cut = float(np.mean(cutoffs)) if cutoffs and name == "aum" else None
    classes = []
    for c in np.unique(label[train]):
        m = train & (label == c)
        d = values[m]
        rest = m & (stratum >= 0)
        edges, span = [], None
        if sel.get("strategy") == "stratified" and rest.any() and not pooled:
            lo, hi = np.min(sign * values[rest]), np.max(sign * values[rest])
            bounds = sorted(float(sign * e) for e in np.linspace(lo, hi, int(sel.get("strata", 1)) + 1))
            edges, span = bounds[1:-1], (bounds[0], bounds[-1], (bounds[-1] - bounds[0]) / max(len(bounds) - 1, 1))
        cut_rows = m & (reason == "drop:hard_cut") & (not pooled)
        hard_cut = float(sign * np.min(sign * values[cut_rows])) if cut_rows.any() else None
        by_reason = {r: int(k) for r, k in zip(*np.unique(reason[m], return_counts=True))}
        classes.append({"name": str(c), "rows": int(m.sum()), "kept": int((m & (decision == "keep")).sum()),
                        "low": float(d.min()), "high": float(d.max()), "edges": edges, "span": span, "hard_cut": hard_cut,
                        "by_reason": by_reason, "keep_values": values[m & (decision == "keep")],
                        "drop_values": values[m & (decision == "drop")]})
    return {"name": name, "classes": classes, "suspect_cut": suspect_cut, "cutoffs": cutoffs,
            "higher_is_harder": sign > 0, "strategy": sel.get("strategy"), "hard_cut_share": sel.get("hard_cut"),
            "strata": sel.get("strata")}


def _scores(run, manifest, draw) -> dict[str, Any]:
    view = _score_view(run, manifest)
    shown = sorted(view["classes"], key=lambda c: -c["rows"])[:SCORE_CLASSES]
    if shown:
        cols = 3 if len(shown) > 4 else min(2, len(shown))
        rows = -(-len(shown) // cols)
        fig = _figure(9, 2.1 * rows + 0.6)
        axes = fig.subplots(rows, cols, squeeze=False).ravel()
        for ax, c in zip(axes, shown):
            bins = np.histogram_bin_edges(np.concatenate([c["keep_values"], c["drop_values"]]), bins=30)
            ax.hist([c["keep_values"], c["drop_values"]], bins=bins, stacked=True, histtype="bar",
                    color=[STYLE["keep"][0], STYLE["drop"][0]], hatch=None, label=["kept", "dropped"], edgecolor="white",
                    linewidth=0.3)
            for patch in ax.patches[len(bins) - 1:]:
                patch.set_hatch("xxx")
                patch.set_edgecolor("white")
            for e in (c["edges"] if len(c["edges"]) <= DRAWN_EDGES else [])+ ([*c["span"][:2]] if c["span"] else []):
                ax.axvline(e, color=OKABE_ITO["black"], linestyle=":", linewidth=1)
            if c["hard_cut"] is not None:
                ax.axvline(c["hard_cut"], color=OKABE_ITO["purple"], linestyle="-.", linewidth=1.6)
            if view["suspect_cut"] is not None:
                ax.axvline(view["suspect_cut"], color=OKABE_ITO["vermillion"], linestyle="--", linewidth=1.6)
            ax.set_title(f"class {c['name']}: {c['kept']:,} of {c['rows']:,} kept", fontsize="small", loc="left")
            _style(ax)
        for ax in axes[len(shown):]:
            ax.set_visible(False)
        from matplotlib.lines import Line2D
        from matplotlib.patches import Patch

        handles = [Patch(facecolor=STYLE["keep"][0], label="kept"),
                   Patch(facecolor=STYLE["drop"][0], hatch="xxx", edgecolor="white", label="dropped"),
                   Line2D([], [], color="black", linestyle=":", label="strata edges" if view["strata"] and view["strata"] <= DRAWN_EDGES
                          else "stratified range")]
        if any(c["hard_cut"] is not None for c in shown):
            handles.append(Line2D([], [], color=OKABE_ITO["purple"], linestyle="-.", label="hard cut"))
        if view["suspect_cut"] is not None:
            handles.append(Line2D([], [], color=OKABE_ITO["vermillion"], linestyle="--", label="suspect cut-off"))
        fig.legend(handles=handles, loc="outside upper center", ncols=len(handles), fontsize="small", frameon=False)
        fig.supxlabel(f"{view['name']} ({'higher' if view['higher_is_harder'] else 'lower'} is harder)", fontsize="small")
        view["chart"] = draw(fig, f"{view['name']} of kept and dropped training rows, per class")
    for c in view["classes"]:
        del c["keep_values"], c["drop_values"]
    view["hidden"] = max(0, len(view["classes"]) - SCORE_CLASSES)
    return view


def _review(run, manifest, rows: Callable | None, store_hint: str) -> dict[str, Any]:
    """A sample of suspected label errors (most suspicious first) and of conflicting duplicates."""
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    score_cols = [n for n in SCORE_NAMES if n in manifest.column_names]
    lists = []
    if "suspect_label" in manifest.column_names:
        sus = np.asarray(manifest.column("suspect_label").fill_null(False).to_numpy(zero_copy_only=False), bool)
        idx = np.flatnonzero(sus & (decision != "holdout"))
        if "aum" in manifest.column_names and len(idx):
            idx = idx[np.argsort(manifest.column("aum").to_numpy(zero_copy_only=False)[idx], kind="stable")]
        lists.append(("suspect", "suspected label errors", "lowest AUM first", idx))
    if "conflict" in manifest.column_names:
        con = np.asarray(manifest.column("conflict").fill_null(False).to_numpy(zero_copy_only=False), bool)
        idx = np.flatnonzero(con & (decision != "holdout"))
        lists.append(("conflict", "conflicting duplicates (same features, another label)", "in table order", idx))
    out = []
    for key, title, order, idx in lists:
        sample = idx[:REVIEW_ROWS]
        cols = ["row_id", "label", "decision", "reason", *score_cols]
        picked = manifest.take(sample).select(cols).to_pylist() if len(sample) else []
        features: list[str] = []
        note = None
        if len(sample) and rows is not None:
            try:
                table = rows(sample)
            except (LeansetError, pa.ArrowException, OSError) as exc:  # the input table moved: manifest columns only
                table, note = None, f"features not shown: the input table could not be read ({str(exc).splitlines()[0]})"
            if table is not None:
                inp = run["config"]["input"]
                skip = {*cols, inp.get("id"), inp.get("label"), "row_id"}
                features = [n for n in table.column_names if n not in skip][:REVIEW_FEATURES]
                for rec, frow in zip(picked, table.select(features).to_pylist()):
                    rec["features"] = frow
        out.append({"key": key, "title": title, "order": order, "total": int(len(idx)), "rows": picked,
                    "features": features, "scores": score_cols, "note": note,
                    "command": f"leanset report {run['run_id']} --list {key}{store_hint}"})
    return {"lists": out}


def review_rows(manifest, which: str):
    """Every training row to review: ``suspect`` (suspected label errors, lowest AUM first) or
    ``conflict`` (rows sharing their features with a row of another label), as a manifest slice."""
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    column = "suspect_label" if which == "suspect" else "conflict"
    if column not in manifest.column_names:
        return manifest.slice(0, 0)
    flag = np.asarray(manifest.column(column).fill_null(False).to_numpy(zero_copy_only=False), bool)
    idx = np.flatnonzero(flag & (decision != "holdout"))
    if which == "suspect" and "aum" in manifest.column_names and len(idx):
        idx = idx[np.argsort(manifest.column("aum").to_numpy(zero_copy_only=False)[idx], kind="stable")]
    return manifest.take(idx)


def _churn(run, history, draw) -> dict[str, Any]:
    lineage = [r for r in (history or []) if r.get("lineage") == run.get("lineage") and r["run_id"] != run["run_id"]]
    lineage = sorted(lineage, key=lambda r: r.get("sequence", 0)) + [run]
    points = []
    for r in lineage:
        ch, c = r.get("churn") or {}, r["counts"]
        points.append({"run_id": r["run_id"], "sequence": r.get("sequence"), "created": r.get("created", "")[:16].replace("T", " "),
                       "rows": r["input"]["rows"], "kept": c["kept"], "kept_share": c["kept"] / max(c["train"], 1),
                       "churn": ch.get("fraction"), "changed": ch.get("rows"), "new": ch.get("new_rows"),
                       "status": r["verdict"]["status"]})
    chart = None
    if len(points) > 1:
        fig = _figure(8, 2.6)
        ax = fig.add_subplot()
        x = np.arange(len(points))
        churn = [p["churn"] if p["churn"] is not None else np.nan for p in points]
        ax.plot(x, churn, marker="o", color=OKABE_ITO["vermillion"], label="churn: share of rows whose decision changed")
        ax.plot(x, [p["kept_share"] for p in points], marker="s", linestyle="--", color=OKABE_ITO["blue"], label="kept share")
        ax.set_xticks(x, [str(p["sequence"]) for p in points])
        ax.set_xlabel("run of the lineage (store sequence number)")
        ax.yaxis.set_major_formatter(lambda y, _: f"{100 * y:.0f} %")
        ax.set_ylim(0, max([1e-3] + [v for v in churn if np.isfinite(v)] + [p["kept_share"] for p in points]) * 1.15)
        ax.legend(fontsize="small")
        _style(ax)
        chart = draw(fig, "churn and kept share across the lineage's runs")
    return {"c": run.get("churn"), "stable": (run.get("selection") or {}).get("stable"), "points": points, "chart": chart,
            "hysteresis": run["config"]["selection"].get("hysteresis")}


def _frontier(run, draw) -> dict[str, Any]:
    points = run.get("frontier") or []
    search = run.get("search")
    chart = None
    keys = list(points[0]) if points else []
    if points and {"fraction", "metric"} <= set(keys):
        fig = _figure(8, 3.2)
        ax = fig.add_subplot()
        by: dict[str, list] = {}
        for p in points:
            by.setdefault(str(p.get("strategy", "kept")), []).append(p)
        markers, colours = "o^sDvP", [OKABE_ITO[k] for k in ("blue", "orange", "green", "purple", "sky", "vermillion")]
        lines = ["-", "--", "-.", ":", "-", "--"]
        for i, (name, ps) in enumerate(by.items()):
            ps = sorted(ps, key=lambda p: p["fraction"])
            x = [p["fraction"] for p in ps]
            ax.plot(x, [p["metric"] for p in ps], marker=markers[i % 6], color=colours[i % 6], linestyle=lines[i % 6], label=name)
            if {"ci_lo", "ci_hi"} <= set(keys):
                ax.vlines(x, [p["ci_lo"] for p in ps], [p["ci_hi"] for p in ps], color=colours[i % 6], alpha=0.6)
        ax.axhline(run["verdict"]["full"], color="#555", linestyle="--", linewidth=1, label="all rows")
        ax.axhline(run["verdict"]["full"] - run["verdict"]["tolerance"], color=OKABE_ITO["vermillion"], linestyle=":",
                   linewidth=1.5, label="all rows minus tolerance")
        ax.xaxis.set_major_formatter(lambda x, _: f"{100 * x:.0f} %")
        ax.set_xlabel("share of training rows kept")
        ax.set_ylabel(f"holdout {run['verdict']['metric']}")
        ax.legend(fontsize="small")
        _style(ax)
        chart = draw(fig, "frontier: holdout metric by share kept")
    return {"points": points, "keys": keys, "chart": chart, "search": search}


def _agreement(run) -> dict[str, Any]:
    scores = run.get("scores") or {}
    return {"a": run.get("agreement"), "stability": scores.get("stability"), "repeats": scores.get("repeats"),
            "label_errors": scores.get("label_errors"), "suspect_dropped": (run.get("selection") or {}).get("suspect_dropped")}


def _reasons(manifest, draw) -> dict[str, Any]:
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    reason = manifest.column("reason").to_numpy(zero_copy_only=False)
    codes, counts = np.unique(reason, return_counts=True)
    total = max(int((decision != "holdout").sum()), 1)
    rows = [{"code": str(c), "rows": int(k), "share": (k / total if c != "holdout" else None),
             "meaning": REASONS.get(str(c), "")} for c, k in sorted(zip(codes, counts), key=lambda t: (t[0] == "holdout", -t[1]))]
    fig = _figure(8, 0.32 * len(rows) + 1.1)
    ax = fig.add_subplot()
    for y, r in enumerate(rows):
        kind = r["code"].split(":")[0]
        colour, hatch, _ = STYLE.get(kind, (OKABE_ITO["grey"], "..", ""))
        ax.barh(y, r["rows"], color=colour, hatch=hatch, edgecolor="white" if not hatch else "#333")
        ax.text(r["rows"], y, f" {r['rows']:,}", va="center", fontsize="x-small")
    ax.set_yticks(range(len(rows)), [r["code"] for r in rows])
    ax.invert_yaxis()
    ax.set_xlim(0, max(r["rows"] for r in rows) * 1.18)
    ax.set_xlabel("rows (plain: kept, crossed: dropped, dotted: holdout)")
    _style(ax)
    return {"rows": rows, "chart": draw(fig, "rows by reason code")}


def _config(run) -> dict[str, Any]:
    timings = run.get("timings") or {}
    return {"yaml": _yaml(run.get("config") or {}), "versions": run.get("versions") or {}, "timings": timings,
            "total": sum(float(s) for s in timings.values()), "seed": run.get("seed"), "hash": run.get("config_hash"),
            "lineage": run.get("lineage"), "fingerprint": (run.get("input") or {}).get("fingerprint")}


def _yaml(data) -> str:
    import yaml

    return yaml.safe_dump(data, sort_keys=False, default_flow_style=None, width=100)


def _headline(run, manifest) -> dict[str, Any]:
    """The four questions first: did it pass, what did it cost and save, what was dropped and why, what to review."""
    c, v = run["counts"], run["verdict"]
    reason = manifest.column("reason").to_numpy(zero_copy_only=False)
    decision = manifest.column("decision").to_numpy(zero_copy_only=False)
    codes, counts = np.unique(reason[decision == "drop"], return_counts=True)
    drops = sorted(({"code": str(k), "rows": int(n)} for k, n in zip(codes, counts)), key=lambda d: -d["rows"])
    sus = conflict = 0
    if "suspect_label" in manifest.column_names:
        sus = int(np.asarray(manifest.column("suspect_label").fill_null(False).to_numpy(zero_copy_only=False), bool)[decision != "holdout"].sum())
    if "conflict" in manifest.column_names:
        conflict = int(np.asarray(manifest.column("conflict").fill_null(False).to_numpy(zero_copy_only=False), bool)[decision != "holdout"].sum())
    return {"status": v["status"], "kept_share": c["kept"] / max(c["train"], 1), "drops": drops,
            "suspects": sus, "conflicts": conflict, "cost": run.get("cost"), "speedup": v.get("speedup"),
            "train_seconds": v.get("train_seconds") or {}}


def _environment():
    from jinja2 import ChainableUndefined, Environment, PackageLoader, select_autoescape

    env = Environment(loader=PackageLoader("leanset.report", "templates"), autoescape=select_autoescape(["html", "j2"], default=True),
                      undefined=ChainableUndefined, trim_blocks=True, lstrip_blocks=True)
    env.filters.update(share=share, seconds=seconds, number=number, signed=signed, interval=interval)
    return env


def render_html(run: dict[str, Any], manifest, segments: dict[str, Any] | None = None,
                rows: Callable | None = None, history: list[dict[str, Any]] | None = None,
                store: str | Path | None = None) -> str:
    """The run's report as one self-contained HTML page.

    Parameters
    ----------
    run : dict
        The run.json content (sections added by later versions are shown when present).
    manifest : pyarrow.Table
        The run's manifest.
    segments : dict, optional
        Segment column name → its value for every input row, in manifest order (or, on a rebuilt
        page whose input table is gone, for the kept rows only).
    rows : callable, optional
        Positions in the input table → a pyarrow Table of those rows' original columns, for the
        features of the rows to review; None shows their manifest columns only.
    history : list of dict, optional
        run.json of the store's other runs, for the churn across the lineage.
    store : str or Path, optional
        The store, named in the commands the page prints.

    Returns
    -------
    str
        HTML with one ``<section id=…>`` per name in ``SECTIONS``.
    """
    draw = _Charts()
    hint = f" --store {store}" if store is not None else ""
    context = {
        "run": run, "c": run["counts"], "sel": run["config"]["selection"], "sections": SECTIONS, "cautions": CAUTIONS,
        "head": _headline(run, manifest), "verdict": _verdict(run, draw), "metrics": _metrics(run, draw),
        "cost": _cost(run, draw), "composition": _composition(run, manifest, segments, draw),
        "scores": _scores(run, manifest, draw), "review": _review(run, manifest, rows, hint),
        "churn": _churn(run, history, draw), "frontier": _frontier(run, draw), "agreement": _agreement(run),
        "reasons": _reasons(manifest, draw), "config": _config(run), "store_hint": hint,
    }
    return _environment().get_template(_TEMPLATE).render(**context)
