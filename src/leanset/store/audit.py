"""Audit: answer "was this row used, and if not, why?" from the run store alone.

The catalog is a DuckDB connection over the store, built on demand: the view ``runs`` holds one
row per published run (from each ``run.json``) and the view ``manifests`` reads every published
run's ``manifest.parquet`` in place, with a ``run_id`` column; no data is copied. Runs being
written (hidden ``.tmp-*`` folders) are never in the catalog. Every function returns plain,
JSON-ready dicts and lists; the CLI prints them as tables or as JSON. The questions of ``runs``,
``why``, ``history`` and ``diff`` need neither pandas nor pyarrow, so the commands start quickly.

>>> con = catalog("leanset-store")
>>> con.sql("SELECT run_id, reason, count(*) FROM manifests GROUP BY ALL").show()
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import duckdb

from ..config import SCORE_NAMES, Config
from ..errors import StoreError

if TYPE_CHECKING:
    import pyarrow as pa

#: Columns of the ``runs`` view (and of ``leanset runs``).
RUN_COLUMNS = ("sequence", "run_id", "created", "parent_run", "rows", "train", "kept", "dropped", "holdout",
               "new_rows", "churn_rows", "churn_fraction", "verdict", "metric", "delta", "ci_low", "ci_high")
_RUN_TYPES = ("INTEGER", "VARCHAR", "VARCHAR", "VARCHAR", "BIGINT", "BIGINT", "BIGINT", "BIGINT", "BIGINT",
              "BIGINT", "BIGINT", "DOUBLE", "VARCHAR", "VARCHAR", "DOUBLE", "DOUBLE", "DOUBLE")


def published_runs(store: Path) -> list[dict[str, Any]]:
    """The run.json of every published run in ``store``, in publication order.

    Hidden folders (runs being written, or left by a crash) are not runs.
    """
    runs = Path(store) / "runs"
    found = []
    if runs.is_dir():
        for d in runs.iterdir():
            if not d.name.startswith(".") and (d / "run.json").is_file() and (d / "manifest.parquet").is_file():
                found.append(json.loads((d / "run.json").read_text()))
    return sorted(found, key=lambda r: (r.get("sequence", 0), r["run_id"]))


def _records(result: duckdb.DuckDBPyConnection) -> list[dict[str, Any]]:
    """The rows of a query's result as dicts keyed by column name."""
    names = [d[0] for d in result.description]
    return [dict(zip(names, row)) for row in result.fetchall()]


def _manifest(store: Path, run_id: str) -> str:
    return str(Path(store) / "runs" / run_id / "manifest.parquet")


def _sql_str(value: str) -> str:
    return "'" + value.replace("'", "''") + "'"


def _run_row(run: dict[str, Any]) -> dict[str, Any]:
    c, v, ch = run["counts"], run["verdict"], run.get("churn") or {}
    return {
        "sequence": run.get("sequence", 0), "run_id": run["run_id"], "created": run["created"],
        "parent_run": run.get("parent_run"), "rows": run["input"]["rows"], "train": c["train"],
        "kept": c["kept"], "dropped": c["dropped"], "holdout": c["holdout"],
        "new_rows": c.get("new", run["input"]["rows"]),
        "churn_rows": ch.get("rows"), "churn_fraction": ch.get("fraction"),
        "verdict": v["status"], "metric": v["metric"], "delta": v["delta"], "ci_low": v["ci"][0], "ci_high": v["ci"][1],
    }


class Store:
    """A run store opened for audit: its published runs and a DuckDB catalog over their manifests.

    Parameters
    ----------
    path : str or Path
        The store folder (the one that holds ``runs/``).
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        if not (self.path / "runs").is_dir():
            raise StoreError(f"{self.path}: no runs/ folder; pass the folder a config's 'store' names (--store)")
        self.runs = published_runs(self.path)
        if not self.runs:
            raise StoreError(f"{self.path}: the store has no published runs yet; run 'leanset run CONFIG' first")
        self.by_id = {r["run_id"]: r for r in self.runs}
        self._con: duckdb.DuckDBPyConnection | None = None

    @property
    def con(self) -> duckdb.DuckDBPyConnection:
        """The catalog: views ``runs`` and ``manifests``."""
        if self._con is None:
            con = duckdb.connect()
            con.execute(f"CREATE TABLE runs ({', '.join(f'{c} {t}' for c, t in zip(RUN_COLUMNS, _RUN_TYPES))})")
            con.executemany(f"INSERT INTO runs VALUES ({', '.join('?' * len(RUN_COLUMNS))})",
                            [[r[c] for c in RUN_COLUMNS] for r in map(_run_row, self.runs)])
            files = ", ".join(_sql_str(_manifest(self.path, r["run_id"])) for r in self.runs)
            con.execute(f"""CREATE VIEW manifests AS
                SELECT regexp_extract(filename, '([^/\\\\]+)[/\\\\]manifest\\.parquet$', 1) AS run_id, * EXCLUDE (filename)
                FROM read_parquet([{files}], filename = true, union_by_name = true)""")
            self._con = con
        return self._con

    def resolve(self, run: str) -> dict[str, Any]:
        """The run.json of ``run``: a run id, a unique prefix of one, or ``latest``."""
        if run == "latest":
            return self.runs[-1]
        if run in self.by_id:
            return self.by_id[run]
        hits = [r for r in self.by_id if r.startswith(run)]
        if len(hits) == 1:
            return self.by_id[hits[0]]
        if hits:
            raise StoreError(f"run '{run}' is ambiguous in {self.path}: it starts {len(hits)} run ids ({', '.join(hits[:3])}, …); give more of the id")
        raise StoreError(f"run '{run}' is not in {self.path}; 'leanset runs --store {self.path}' lists the runs")


def catalog(store: str | Path) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection over the store with the views ``runs`` and ``manifests``."""
    return Store(store).con


def runs(store: str | Path) -> list[dict[str, Any]]:
    """One dict per published run, in publication order (see ``RUN_COLUMNS``)."""
    return [_run_row(r) for r in Store(store).runs]


def _clean(value: Any) -> Any:
    """JSON-ready scalar: NaN becomes None, numpy scalars become Python ones."""
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and math.isnan(value):
        return None
    return value


def history(store: str | Path, row_id: str) -> list[dict[str, Any]]:
    """The row's decision in every run of the store, in publication order.

    A run whose input did not hold the row has ``decision`` = ``absent``.

    Raises
    ------
    StoreError
        When no run holds the row.
    """
    s = Store(store)
    found = _records(s.con.execute("SELECT run_id, split, label, decision, reason, stratum, weight FROM manifests WHERE row_id = ?",
                                   [row_id]))
    if not found:
        raise StoreError(f"row '{row_id}' is in no run of {s.path}; check the id (ids are compared as text)")
    at = {r["run_id"]: r for r in found}
    out = []
    for run in s.runs:
        hit = at.get(run["run_id"])
        base = {"sequence": run.get("sequence", 0), "run_id": run["run_id"], "created": run["created"]}
        if hit is None:
            out.append({**base, "decision": "absent", "reason": None, "label": None, "stratum": None, "weight": None})
        else:
            out.append({**base, **{k: _clean(hit[k]) for k in ("decision", "reason", "label", "stratum", "weight")}})
    return out


def why(store: str | Path, row_id: str, run: str | None = None) -> dict[str, Any]:
    """Everything the store says about one row in one run.

    Parameters
    ----------
    run : str, optional
        A run id or unique prefix; by default the latest run that holds the row.

    Returns
    -------
    dict
        ``decision``, ``reason``, ``label``, ``split``, ``stratum``, ``weight``; ``scores``
        (every score) and ``percentiles`` (each score's percentile within the row's class
        among the run's training rows, ties counted half, as ``scipy.stats.percentileofscore``
        with ``kind="mean"``); and ``thresholds``: the run's selection settings and, within the
        row's class, the range of the selection score of the rows given each reason.
    """
    s = Store(store)
    con = s.con
    # newest run first: by default the search ends at the first (usually the latest) run holding the row
    for target in [s.resolve(run)] if run else reversed(s.runs):
        path = _manifest(s.path, target["run_id"])
        rows = _records(con.execute(f"SELECT * FROM read_parquet({_sql_str(path)}) WHERE row_id = ?", [row_id]))
        if rows:
            break
    else:
        if run:
            raise StoreError(f"row '{row_id}' is not in run {target['run_id']}; 'leanset history {row_id}' shows the runs that hold it")
        raise StoreError(f"row '{row_id}' is in no run of {s.path}; check the id (ids are compared as text)")
    row = rows[0]
    names = [n for n in SCORE_NAMES if n in row]
    sel = target["config"]["selection"]
    out: dict[str, Any] = {
        "row_id": row_id, "run_id": target["run_id"], "created": target["created"],
        **{k: _clean(row[k]) for k in ("split", "label", "decision", "reason", "stratum", "weight")},
        "scores": {n: _clean(row[n]) for n in [*names, "never_learned"] if n in row},
        "percentiles": {},
    }
    if row["split"] == "train":
        # within the row's class; a regression run has no classes, so among all its training rows
        by_class = row["label"] in target["input"].get("classes", [])
        where, params = ("split = 'train' AND label = ?", [row["label"]]) if by_class else ("split = 'train'", [])
        known = [n for n in names if _clean(row[n]) is not None]
        parts = ", ".join(f"count(*) FILTER (WHERE {n} < ?) AS {n}_lt, count(*) FILTER (WHERE {n} <= ?) AS {n}_le" for n in known)
        values = [float(row[n]) for n in known for _ in range(2)]
        [agg] = _records(con.execute(f"SELECT count(*) AS n{', ' if parts else ''}{parts} FROM read_parquet({_sql_str(path)}) WHERE {where}",
                                     values + params))
        n = int(agg["n"])
        out["percentiles"] = {k: 100.0 * (int(agg[f"{k}_lt"]) + int(agg[f"{k}_le"])) / (2 * n) for k in known}
        out["percentile_within"] = f"class {row['label']}" if by_class else "all training rows"
        score = sel["score"]
        ranges = _records(con.execute(f"SELECT reason, count(*) AS rows, min({score}) AS low, max({score}) AS high "
                                      f"FROM read_parquet({_sql_str(path)}) WHERE {where} GROUP BY reason ORDER BY reason", params))
        by_reason = {r["reason"]: {"rows": int(r["rows"]), "low": _clean(r["low"]), "high": _clean(r["high"])} for r in ranges}
    else:
        by_reason = {}
    classes = target["input"]["classes"]
    info = target.get("selection", {})
    k = classes.index(row["label"]) if row["label"] in classes else None
    out["thresholds"] = {
        "score": sel["score"], "strategy": sel["strategy"], "fraction": sel["fraction"], "quotas": sel["quotas"],
        "class_floor": sel["class_floor"], "strata": sel["strata"], "hard_cut": sel["hard_cut"],
        "hysteresis": sel.get("hysteresis"),
        "class_quota": info["quota"][k] if k is not None and "quota" in info else None,
        "class_rows": info["class_counts"][k] if k is not None and "class_counts" in info else None,
        "score_range_by_reason": by_reason,
    }
    return out


def diff(store: str | Path, run_a: str, run_b: str, limit: int = 20, out: str | Path | None = None) -> dict[str, Any]:
    """Rows whose decision changed from run A to run B.

    Returns
    -------
    dict
        ``counts`` (rows in A, in B, in both, only in A, only in B, changed, unchanged);
        ``transitions``: one entry per (reason in A, reason in B) pair among changed rows,
        with its row count; ``rows``: the first ``limit`` changed rows by row id. With ``out``,
        every changed row is written to that parquet file.
    """
    s = Store(store)
    a, b = s.resolve(run_a), s.resolve(run_b)
    con = s.con
    files = {side: f"read_parquet({_sql_str(_manifest(s.path, run['run_id']))})" for side, run in (("a", a), ("b", b))}
    # one join, grouped by the pair of reasons: each group's size and, if its decision changed, its first row ids
    groups = _records(con.execute(f"""SELECT a.decision AS decision_a, a.reason AS reason_a, b.decision AS decision_b,
            b.reason AS reason_b, count(*) AS rows, min(row_id, ?) FILTER (WHERE a.decision <> b.decision) AS first_ids,
            arg_min(b.label, row_id, ?) FILTER (WHERE a.decision <> b.decision) AS first_labels
        FROM {files['a']} a JOIN {files['b']} b USING (row_id) GROUP BY ALL ORDER BY rows DESC, reason_a, reason_b""",
                                  [max(int(limit), 1)] * 2))
    trans = [g for g in groups if g["decision_a"] != g["decision_b"]]
    rows_a, rows_b = (con.execute(f"SELECT count(*) FROM {files[side]}").fetchone()[0] for side in "ab")
    both = sum(g["rows"] for g in groups)
    changed = sum(g["rows"] for g in trans)
    counts = {"rows_a": rows_a, "rows_b": rows_b, "both": both, "only_a": rows_a - both, "only_b": rows_b - both,
              "changed": changed, "unchanged": both - changed}
    first = sorted((row_id, label, g["reason_a"], g["reason_b"]) for g in trans
                   for row_id, label in zip(g["first_ids"], g["first_labels"]))[:max(int(limit), 0)]
    if out is not None:
        con.execute(f"""COPY (SELECT row_id, a.label AS label_a, b.label AS label_b, a.decision AS decision_a, a.reason AS reason_a,
                b.decision AS decision_b, b.reason AS reason_b
            FROM {files['a']} a JOIN {files['b']} b USING (row_id) WHERE a.decision <> b.decision ORDER BY row_id)
            TO {_sql_str(str(out))} (FORMAT parquet)""")
    counts["churn_fraction"] = counts["changed"] / counts["both"] if counts["both"] else 0.0
    return {"run_a": a["run_id"], "run_b": b["run_id"], "counts": counts,
            "transitions": [{k: _clean(t[k]) for k in ("decision_a", "reason_a", "decision_b", "reason_b", "rows")} for t in trans],
            "rows": [dict(zip(("row_id", "label", "reason_a", "reason_b"), map(_clean, r))) for r in first],
            "out": str(out) if out is not None else None}


def restore_ids(store: str | Path, run: str, reasons: Sequence[str], _opened: Store | None = None) -> tuple[dict[str, Any], pa.Table]:
    """The manifest rows of the kept rows plus the dropped rows given ``reasons``, with new weights.

    Weights follow the run's ``selection.weights``: with ``class_prior`` each restored row
    carries n_c / n × m / m_c for its class c (n rows and n_c of class c among the run's
    training rows, m and m_c in the restored set), so weighted class shares again equal the
    full table's; with ``none``, 1.

    Raises
    ------
    StoreError
        When a reason is not a drop reason of the run.
    """
    s = _opened or Store(store)
    target = s.resolve(run)
    path = _manifest(s.path, target["run_id"])
    con = s.con
    present = {r["reason"] for r in _records(con.execute(
        f"SELECT DISTINCT reason FROM read_parquet({_sql_str(path)}) WHERE decision = 'drop'"))}
    unknown = [r for r in reasons if r not in present]
    if unknown:
        raise StoreError(f"run {target['run_id']} dropped no row with reason {unknown[0]!r}; "
                         f"its drop reasons are: {', '.join(sorted(present)) or 'none'}")
    prior = target["config"]["selection"]["weights"] == "class_prior"
    picked = con.sql(f"""WITH m AS (SELECT * FROM read_parquet({_sql_str(path)}, file_row_number = true)),
        picked AS (SELECT file_row_number, row_id, label, decision, reason FROM m
                   WHERE decision = 'keep' OR (decision = 'drop' AND list_contains(?, reason))),
        full_share AS (SELECT label, count(*) / sum(count(*)) OVER () AS share FROM m WHERE split = 'train' GROUP BY label),
        own_share AS (SELECT label, count(*) / sum(count(*)) OVER () AS own FROM picked GROUP BY label)
        SELECT row_id, label, decision, reason, {'share / own' if prior else '1.0'}::DOUBLE AS weight
        FROM picked JOIN full_share USING (label) JOIN own_share USING (label) ORDER BY file_row_number""",
                     params=[list(reasons)]).to_arrow_table()
    decisions = picked.column("decision").to_pylist()
    info = {"run_id": target["run_id"], "reasons": list(reasons), "rows": picked.num_rows, "kept": decisions.count("keep")}
    info["restored"] = info["rows"] - info["kept"]
    return info, picked


def restore(store: str | Path, run: str, reasons: Sequence[str], out: str | Path, rows: bool = True) -> dict[str, Any]:
    """Write the kept rows plus the dropped rows given ``reasons`` to ``out`` (parquet, or CSV by suffix).

    With ``rows`` (the default), the table holds each row's original columns, read from the
    run's input table, plus ``row_id`` (when ids were derived), ``decision``, ``reason`` and the
    new ``weight``; otherwise only the manifest columns. The input table is only read.

    Raises
    ------
    StoreError
        When the input table no longer holds some of the rows to write.
    """
    s = Store(store)
    info, picked = restore_ids(store, run, reasons, s)
    table = _original_rows(s.resolve(info["run_id"]), picked) if rows else picked
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(f".tmp-{out.name}")
    if out.suffix.lower() in (".csv", ".tsv"):
        import pyarrow.csv as pacsv

        pacsv.write_csv(table, tmp, pacsv.WriteOptions(delimiter="\t" if out.suffix.lower() == ".tsv" else ","))
    else:
        import pyarrow.parquet as pq

        pq.write_table(table, tmp)
    tmp.replace(out)
    return {**info, "out": str(out), "columns": table.column_names}


def _original_rows(run: dict[str, Any], picked: pa.Table) -> pa.Table:
    """The original columns of ``picked``'s rows, in the order of the input table, read with the run's config."""
    import pandas as pd
    import pyarrow as pa

    from ..load.table import load_table

    config = Config.model_validate(run["config"])
    frame = load_table(config)
    at = pd.Index(frame.row_id).get_indexer(pd.Index(picked.column("row_id").to_numpy(zero_copy_only=False)))
    missing = int((at < 0).sum())
    if missing:
        raise StoreError(f"{config.input.path}: {missing} of the {picked.num_rows} rows to restore are no longer in the input table; "
                         "pass --ids-only to write their ids from the manifest instead")
    order = pd.Series(range(len(at)), index=at).sort_index()
    source = frame.source.take(pa.array(order.index.to_numpy()))
    extra = picked.take(pa.array(order.to_numpy()))
    for name in ("decision", "reason", "weight"):
        source = source.append_column(f"leanset_{name}" if name in source.column_names else name, extra.column(name))
    return source


def _tidy(data: Any) -> Any:
    if isinstance(data, dict):
        return {str(k): _tidy(v) for k, v in data.items()}
    if isinstance(data, (list, tuple)):
        return [_tidy(v) for v in data]
    return _clean(data)


def as_json(data: Any) -> str:
    """``data`` as indented JSON, NaN as null."""
    return json.dumps(_tidy(data), indent=2, allow_nan=False, default=str)
