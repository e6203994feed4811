"""report.html: one self-contained page per run, rendered from a Jinja2 template with autoescape.

Every chart (:mod:`leanset.report.charts`) has the table of its figures beside it. The page loads
nothing from anywhere. Every section is a ``<section id=…>`` named in ``SECTIONS``; each is built
here from the run's records by a function of the section's name.

:func:`render_html` builds the page from a run's run.json content and manifest (and, when given,
the input rows to show and the store's other runs); ``leanset.store.page.build_report`` rebuilds it
for any published run from the run directory, so older runs get the current page.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable

import numpy as np
import pyarrow as pa

from ..config import REGRESSION_METRICS, SCORE_NAMES
from ..difficulty import DIFFICULTY_SIGN
from ..errors import LeansetError
from ..reasons import REASONS
from .coded import Coded
from .wording import against_random_text
from .charts import (Charts, bars_chart, calibration_name, churn_chart, cost_chart, frontier_chart, metrics_chart,
                     reasons_chart, scores_chart, verdict_chart)
from .format import interval, number, seconds, share, signed

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
#: Rows shown per list of rows to review; the CLI lists them all.
REVIEW_ROWS = 15
#: Input columns shown beside each row to review (the first ones of the table).
REVIEW_FEATURES = 8
#: Classes drawn in the per-class score chart; the table lists every class.
SCORE_CLASSES = 12

_TEMPLATE = "report.html.j2"


def _regression(run) -> bool:
    """Whether the run's label is a regression target."""
    return run["verdict"]["metric"] in REGRESSION_METRICS or run["config"]["input"].get("task") == "regression"


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
        guards.append({"what": "calibration", "kind": f"relative excess of {calibration_name(run)}", "value": cal["excess"],
                       "ci": cal.get("ci"), "tolerance": cal.get("tolerance"), "failed": bool(cal.get("failed"))})
    return {"v": v, "conf": conf, "carried": carried, "guards": guards, "blocked_by": v.get("blocked_by") or [],
            "chart": verdict_chart(run, draw)}


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
    return {"models": models, "others": others, "calibration_name": calibration_name(run) if cal else None,
            "calibration_ci": any(m["calibration_ci"] for m in models),
            "ci_kept": [v["full"] - v["ci"][1], v["full"] - v["ci"][0]], "chart": metrics_chart(run, draw)}


def _cost(run, draw) -> dict[str, Any] | None:
    cost = run.get("cost")
    if not cost:
        return None
    stages = cost.get("stages") or {}
    fits = cost.get("target_fit_seconds") or {}
    return {"c": cost, "stages": stages, "fits": fits, "chart": cost_chart(stages, fits, draw) if stages else None}


def _group_rows(names, labels: Coded, train, kept, weight, weighted: bool) -> list[dict]:
    rows = []
    nb, nk = max(int(train.sum()), 1), max(int(kept.sum()), 1)
    wk = float(weight[kept].sum()) or 1.0
    for n in names:
        member = labels.eq(n)
        b, k = int((member & train).sum()), int((member & kept).sum())
        w = weight[member & kept]
        rows.append({"name": str(n), "before": b, "share_before": b / nb, "after": k, "share_after": k / nk,
                     "kept_share": k / b if b else None, "weight": float(w.mean()) if len(w) else None,
                     "share_weighted": float(w.sum()) / wk if weighted else None})
    return rows


def _composition(run, manifest, segments, draw) -> dict[str, Any]:
    decision = Coded.of(manifest.column("decision"))
    train, kept = ~decision.eq("holdout"), decision.eq("keep")
    weight = np.nan_to_num(manifest.column("weight").to_numpy(zero_copy_only=False).astype(np.float64))
    weighted = run["config"]["selection"].get("weights") == "class_prior"
    groups = []
    if not _regression(run):
        groups.append(("class", Coded.of(manifest.column("label")), True))
    for name, values in (segments or {}).items():
        coded = Coded.of(values)
        # one value per input row, or the kept rows' values only (a rebuilt page when the input table is gone)
        groups.append((f"segment {name}", coded, len(coded) == len(decision)))
    out = []
    for title, labels, full in groups:
        if not full:
            names, counts = labels.counts()
            out.append({"title": title, "partial": True,
                        "rows": [{"name": str(n), "after": int(k), "share_after": k / max(counts.sum(), 1)} for n, k in zip(names, counts)]})
            continue
        names = labels.counts(train)[0]
        rows = _group_rows(names, labels, train, kept, weight, weighted and title == "class")
        item = {"title": title, "partial": False, "rows": rows, "too_many": len(names) > 40}
        if not item["too_many"]:
            item["chart"] = bars_chart(rows, title, draw)
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
    decision = Coded.of(manifest.column("decision"))
    keep, drop = decision.eq("keep"), decision.eq("drop")
    reason = Coded.of(manifest.column("reason"))
    pooled = _regression(run)
    # strata and hard cuts are per label bin on a regression table, which the manifest does not record: one panel, no edges
    label = (Coded(np.zeros(len(values), np.int8), np.array(["all rows"])) if pooled
             else Coded.of(manifest.column("label")))
    has_stratum = manifest.column("stratum").fill_null(-1).to_numpy() >= 0
    train = ~decision.eq("holdout") & np.isfinite(values)
    label_errors = (run.get("scores") or {}).get("label_errors") or {}
    cutoffs = label_errors.get("cutoffs") or []
    suspect_cut = float(np.mean(cutoffs)) if cutoffs and name == "aum" else None
    classes = []
    for c in label.counts(train)[0]:
        m = train & label.eq(c)
        d = values[m]
        rest = m & has_stratum
        edges, span = [], None
        if sel.get("strategy") == "stratified" and rest.any() and not pooled:
            lo, hi = np.min(sign * values[rest]), np.max(sign * values[rest])
            bounds = sorted(float(sign * e) for e in np.linspace(lo, hi, _strata(run) + 1))
            edges, span = bounds[1:-1], (bounds[0], bounds[-1], (bounds[-1] - bounds[0]) / max(len(bounds) - 1, 1))
        cut_rows = m & reason.eq("drop:hard_cut") & (not pooled)
        hard_cut = float(sign * np.min(sign * values[cut_rows])) if cut_rows.any() else None
        by_reason = {str(r): int(k) for r, k in zip(*reason.counts(m))}
        classes.append({"name": str(c), "rows": int(m.sum()), "kept": int((m & keep).sum()),
                        "low": float(d.min()), "high": float(d.max()), "edges": edges, "span": span, "hard_cut": hard_cut,
                        "by_reason": by_reason, "keep_values": values[m & keep], "drop_values": values[m & drop]})
    return {"name": name, "classes": classes, "suspect_cut": suspect_cut, "cutoffs": cutoffs,
            "higher_is_harder": sign > 0, "strategy": sel.get("strategy"), "hard_cut_share": sel.get("hard_cut"),
            "strata": _strata(run)}


def _strata(run) -> int:
    """The difficulty bins per class the run used (``strata: auto`` resolved; runs that predate it: the config's)."""
    strata = (run.get("selection") or {}).get("strata", run["config"]["selection"].get("strata", 1))
    return strata if isinstance(strata, int) else 1


def _scores(run, manifest, draw) -> dict[str, Any]:
    view = _score_view(run, manifest)
    shown = sorted(view["classes"], key=lambda c: -c["rows"])[:SCORE_CLASSES]
    if shown:
        view["chart"] = scores_chart(view, shown, draw)
    for c in view["classes"]:
        del c["keep_values"], c["drop_values"]
    view["hidden"] = max(0, len(view["classes"]) - SCORE_CLASSES)
    return view


def _review(run, manifest, rows: Callable | None, store_hint: str) -> dict[str, Any]:
    """A sample of suspected label errors (most suspicious first) and of conflicting duplicates."""
    train = _training(manifest)
    score_cols = [n for n in SCORE_NAMES if n in manifest.column_names]
    lists = []
    if "suspect_label" in manifest.column_names:
        sus = np.asarray(manifest.column("suspect_label").fill_null(False).to_numpy(zero_copy_only=False), bool)
        idx = np.flatnonzero(sus & train)
        if "aum" in manifest.column_names and len(idx):
            idx = idx[np.argsort(manifest.column("aum").to_numpy(zero_copy_only=False)[idx], kind="stable")]
        lists.append(("suspect", "suspected label errors", "lowest AUM first", idx))
    if "conflict" in manifest.column_names:
        con = np.asarray(manifest.column("conflict").fill_null(False).to_numpy(zero_copy_only=False), bool)
        idx = np.flatnonzero(con & train)
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
    column = "suspect_label" if which == "suspect" else "conflict"
    if column not in manifest.column_names:
        return manifest.slice(0, 0)
    flag = np.asarray(manifest.column(column).fill_null(False).to_numpy(zero_copy_only=False), bool)
    idx = np.flatnonzero(flag & _training(manifest))
    if which == "suspect" and "aum" in manifest.column_names and len(idx):
        idx = idx[np.argsort(manifest.column("aum").to_numpy(zero_copy_only=False)[idx], kind="stable")]
    return manifest.take(idx)


def _training(manifest) -> np.ndarray:
    """Mask of the manifest's training rows (decision keep or drop)."""
    return ~Coded.of(manifest.column("decision")).eq("holdout")


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
    chart = churn_chart(points, draw) if len(points) > 1 else None
    return {"c": run.get("churn"), "stable": (run.get("selection") or {}).get("stable"), "points": points, "chart": chart,
            "hysteresis": run["config"]["selection"].get("hysteresis")}


def _frontier(run, draw) -> dict[str, Any]:
    points = run.get("frontier") or []
    search = run.get("search")
    keys = list(points[0]) if points else []
    chart = frontier_chart(run, points, keys, draw) if points and {"fraction", "metric"} <= set(keys) else None
    return {"points": points, "keys": keys, "chart": chart, "search": search}


def _agreement(run) -> dict[str, Any]:
    scores = run.get("scores") or {}
    return {"a": run.get("agreement"), "stability": scores.get("stability"), "repeats": scores.get("repeats"),
            "label_errors": scores.get("label_errors"), "suspect_dropped": (run.get("selection") or {}).get("suspect_dropped"),
            "suspect_shared": (run.get("selection") or {}).get("suspect_shared")}


def _reasons(manifest, draw) -> dict[str, Any]:
    codes, counts = Coded.of(manifest.column("reason")).counts()
    total = max(int(_training(manifest).sum()), 1)
    rows = [{"code": str(c), "rows": int(k), "share": (k / total if c != "holdout" else None),
             "meaning": REASONS.get(str(c), "")} for c, k in sorted(zip(codes, counts), key=lambda t: (t[0] == "holdout", -t[1]))]
    return {"rows": rows, "chart": reasons_chart(rows, draw)}


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
    decision = Coded.of(manifest.column("decision"))
    codes, counts = Coded.of(manifest.column("reason")).counts(decision.eq("drop"))
    drops = sorted(({"code": str(k), "rows": int(n)} for k, n in zip(codes, counts)), key=lambda d: -d["rows"])
    train = ~decision.eq("holdout")
    sus = conflict = 0
    if "suspect_label" in manifest.column_names:
        sus = int(np.asarray(manifest.column("suspect_label").fill_null(False).to_numpy(zero_copy_only=False), bool)[train].sum())
    if "conflict" in manifest.column_names:
        conflict = int(np.asarray(manifest.column("conflict").fill_null(False).to_numpy(zero_copy_only=False), bool)[train].sum())
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
        page whose input table is gone, for the kept rows only), as a pyarrow array or any array-like.
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
    draw = Charts()
    hint = f" --store {store}" if store is not None else ""
    context = {
        "run": run, "c": run["counts"], "sel": run["config"]["selection"], "sections": SECTIONS, "cautions": CAUTIONS,
        "head": _headline(run, manifest), "verdict": _verdict(run, draw), "metrics": _metrics(run, draw),
        "cost": _cost(run, draw), "composition": _composition(run, manifest, segments, draw),
        "scores": _scores(run, manifest, draw), "review": _review(run, manifest, rows, hint),
        "churn": _churn(run, history, draw), "frontier": _frontier(run, draw), "agreement": _agreement(run),
        "reasons": _reasons(manifest, draw), "config": _config(run), "store_hint": hint,
        "against_random": against_random_text(run["verdict"]["against_random"]) if run["verdict"].get("against_random") else None,
    }
    return _environment().get_template(_TEMPLATE).render(**context)
