"""The charts of report.html, drawn with matplotlib's Agg canvas (no display, no pyplot state) and
inlined as SVG (text kept as text), or as a base64 PNG when the SVG would be too large.

Colours come from the Okabe–Ito palette and every series also has its own hatching or marker, so
nothing is told apart by colour alone. Each function takes the figures it draws and ``draw``
(a :class:`Charts`) and returns the chart for the template, or None.
"""

from __future__ import annotations

import base64
import io
import re
from typing import Any

import numpy as np

from .format import seconds

#: Okabe & Ito (2008), "Color Universal Design": a palette told apart with every common colour-vision deficiency.
OKABE_ITO = {"orange": "#E69F00", "sky": "#56B4E9", "green": "#009E73", "yellow": "#F0E442",
             "blue": "#0072B2", "vermillion": "#D55E00", "purple": "#CC79A7", "grey": "#999999", "black": "#000000"}
#: How each model or decision is drawn: colour, hatching and marker.
STYLE = {
    "full": (OKABE_ITO["grey"], "", "s"), "kept": (OKABE_ITO["blue"], "", "o"), "random": (OKABE_ITO["orange"], "//", "^"),
    "keep": (OKABE_ITO["blue"], "", "o"), "drop": (OKABE_ITO["vermillion"], "xx", "x"),
    "before": (OKABE_ITO["grey"], "//", "s"), "after": (OKABE_ITO["blue"], "", "o"),
}

#: Strata edges drawn one by one up to this many strata; beyond, only the stratified range.
DRAWN_EDGES = 20
#: An SVG chart larger than this is inlined as PNG instead.
SVG_LIMIT = 250_000
#: Metrics where a smaller value is better: no "all rows minus tolerance" line is drawn for them.
LOWER_IS_BETTER = ("log_loss", "rmse", "mae")


def figure(width: float, height: float):
    """A matplotlib Figure on an Agg canvas, laid out with constrained layout."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height), dpi=100, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


class Charts:
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
    """``text`` escaped for an HTML attribute."""
    from markupsafe import escape

    return str(escape(text))


def style_axes(ax) -> None:
    """The house style of every axis: no top or right spine, small tick labels."""
    ax.spines[["top", "right"]].set_visible(False)
    ax.tick_params(labelsize="small")


def calibration_name(run) -> str:
    """The verdict's calibration measure: Brier score for two classes, log loss otherwise."""
    v = run["verdict"]
    return "Brier score" if len(v.get("per_class_recall") or {}) == 2 else "log loss"


def verdict_chart(run, draw) -> dict | None:
    """Δ with its interval against the tolerance, then each class's recall drop and each segment's Δ."""
    v, conf = run["verdict"], run["config"]["verify"]
    rows = [(f"overall Δ {v['metric']}", v["delta"], v["ci"], v["tolerance"], "overall")]
    for name, r in (v.get("per_class_recall") or {}).items():
        rows.append((f"class {name}: recall drop", r["drop"], r.get("ci"), conf.get("class_tolerance"), "class"))
    for name, s in (v.get("per_segment") or {}).items():
        rows.append((f"segment {name}: Δ", s["delta"], s.get("ci"), conf.get("segment_tolerance"), "segment"))
    rows = rows[:40]
    marker = {"overall": ("D", OKABE_ITO["black"]), "class": ("o", OKABE_ITO["blue"]), "segment": ("s", OKABE_ITO["purple"])}
    fig = figure(8, 0.32 * len(rows) + 1.3)
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
    style_axes(ax)
    return draw(fig, "verdict: each drop with its interval against its tolerance")


def metrics_chart(run, draw) -> dict | None:
    """Holdout metric and calibration of full, kept and random, each with its interval; axis from 0."""
    v = run["verdict"]
    cal = v.get("calibration") or {}
    lower = v["metric"] in LOWER_IS_BETTER
    panels = [(f"holdout {v['metric']} ({'lower' if lower else 'higher'} is better)", {k: v[k] for k in ("full", "kept", "random")},
               {"kept": None if lower else [v["full"] - v["ci"][1], v["full"] - v["ci"][0]], "random": v.get("random_ci")},
               None if lower else v["full"] - v["tolerance"])]
    if all(k in cal for k in ("full", "kept", "random")):
        panels.append((f"{calibration_name(run)} (lower is better)", {k: cal[k] for k in ("full", "kept", "random")},
                       {k: cal.get(f"{k}_ci") for k in ("full", "kept", "random")}, None))
    fig = figure(8, 1.9 * len(panels) + 0.4)
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
        style_axes(ax)
    return draw(fig, f"holdout {v['metric']} and calibration of the target trained on all, kept and random rows")


def bars_chart(groups: list[dict], title: str, draw) -> dict | None:
    """Grouped horizontal bars of share before and after, hatched differently."""
    fig = figure(8, 0.38 * len(groups) + 1.3)
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
    style_axes(ax)
    return draw(fig, f"{title}: share of rows before and after pruning")


def cost_chart(stages: dict[str, float], fits: dict[str, float], draw) -> dict | None:
    """Seconds of each stage (largest first), then of each target fit."""
    order = sorted(stages.items(), key=lambda kv: -kv[1])
    fig = figure(8, 0.3 * (len(order) + len(fits)) + 1.3)
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
    style_axes(ax)
    return draw(fig, "seconds spent by stage and by target fit")


def scores_chart(view: dict[str, Any], shown: list[dict[str, Any]], draw) -> dict | None:
    """Per class shown: a stacked histogram of the selection score of kept and dropped rows, with the
    strata edges (or the stratified range), the hard cut and the suspect cut-off."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    cols = 3 if len(shown) > 4 else min(2, len(shown))
    rows = -(-len(shown) // cols)
    fig = figure(9, 2.1 * rows + 0.6)
    axes = fig.subplots(rows, cols, squeeze=False).ravel()
    for ax, c in zip(axes, shown):
        _score_panel(ax, c, view["suspect_cut"])
    for ax in axes[len(shown):]:
        ax.set_visible(False)
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
    return draw(fig, f"{view['name']} of kept and dropped training rows, per class")


def _score_panel(ax, c: dict[str, Any], suspect_cut: float | None) -> None:
    """One class's histogram of kept and dropped rows' scores and its cut lines."""
    bins = np.histogram_bin_edges(np.concatenate([c["keep_values"], c["drop_values"]]), bins=30)
    ax.hist([c["keep_values"], c["drop_values"]], bins=bins, stacked=True, histtype="bar",
            color=[STYLE["keep"][0], STYLE["drop"][0]], hatch=None, label=["kept", "dropped"], edgecolor="white",
            linewidth=0.3)
    for patch in ax.patches[len(bins) - 1:]:
        patch.set_hatch("xxx")
        patch.set_edgecolor("white")
    for e in (c["edges"] if len(c["edges"]) <= DRAWN_EDGES else []) + ([*c["span"][:2]] if c["span"] else []):
        ax.axvline(e, color=OKABE_ITO["black"], linestyle=":", linewidth=1)
    if c["hard_cut"] is not None:
        ax.axvline(c["hard_cut"], color=OKABE_ITO["purple"], linestyle="-.", linewidth=1.6)
    if suspect_cut is not None:
        ax.axvline(suspect_cut, color=OKABE_ITO["vermillion"], linestyle="--", linewidth=1.6)
    ax.set_title(f"class {c['name']}: {c['kept']:,} of {c['rows']:,} kept", fontsize="small", loc="left")
    style_axes(ax)


def churn_chart(points: list[dict[str, Any]], draw) -> dict | None:
    """Churn and kept share of each run of the lineage, in store order."""
    fig = figure(8, 2.6)
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
    style_axes(ax)
    return draw(fig, "churn and kept share across the lineage's runs")


def frontier_chart(run: dict[str, Any], points: list[dict[str, Any]], keys: list[str], draw) -> dict | None:
    """Holdout metric by share kept, one line per strategy, with intervals when recorded."""
    fig = figure(8, 3.2)
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
    style_axes(ax)
    return draw(fig, "frontier: holdout metric by share kept")


def reasons_chart(rows: list[dict[str, Any]], draw) -> dict | None:
    """Rows per reason code, kept, dropped and holdout told apart by colour and hatching."""
    fig = figure(8, 0.32 * len(rows) + 1.1)
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
    style_axes(ax)
    return draw(fig, "rows by reason code")
