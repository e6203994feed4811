"""Audit: answer "was this row used, and if not, why?" from the run store alone.

The questions run as DuckDB queries over the store's catalog (:class:`leanset.store.reader.Store`:
the views ``runs`` and ``manifests``, read in place). Every function returns plain, JSON-ready dicts
and lists; the CLI prints them with :mod:`leanset.report.audit_tables` or as JSON. The questions of
``runs``, ``why``, ``history`` and ``diff`` need neither pandas nor pyarrow, so the commands start quickly.

>>> con = catalog("leanset-store")
>>> con.sql("SELECT run_id, reason, count(*) FROM manifests GROUP BY ALL").show()
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import TYPE_CHECKING, Any, Sequence

import duckdb

from ..config import SCORE_NAMES, Config
from ..errors import StoreError
from .reader import Store, clean, manifest_path, records, run_row, sql_str

if TYPE_CHECKING:
    import pyarrow as pa


def catalog(store: str | Path) -> duckdb.DuckDBPyConnection:
    """A DuckDB connection over the store with the views ``runs`` and ``manifests``."""
    return Store(store).con


def runs(store: str | Path) -> list[dict[str, Any]]:
    """One dict per published run, in publication order (see ``RUN_COLUMNS``)."""
    return [run_row(r) for r in Store(store).runs]


def history(store: str | Path, row_id: str) -> list[dict[str, Any]]:
    """The row's decision in every run of the store, in publication order.

    A run whose input did not hold the row has ``decision`` = ``absent``.

    Raises
    ------
    StoreError
        When no run holds the row.
    """
    s = Store(store)
    found = records(s.con.execute("SELECT run_id, split, label, decision, reason, stratum, weight FROM manifests WHERE row_id = ?",
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
            out.append({**base, **{k: clean(hit[k]) for k in ("decision", "reason", "label", "stratum", "weight")}})
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
    target, path, row = _row_in_run(s, row_id, run)
    names = [n for n in SCORE_NAMES if n in row]
    out: dict[str, Any] = {
        "row_id": row_id, "run_id": target["run_id"], "created": target["created"],
        **{k: clean(row[k]) for k in ("split", "label", "decision", "reason", "stratum", "weight")},
        "scores": {n: clean(row[n]) for n in [*names, "never_learned"] if n in row},
        "percentiles": {},
    }
    by_reason = {}
    if row["split"] == "train":
        # within the row's class; a regression run has no classes, so among all its training rows
        by_class = row["label"] in target["input"].get("classes", [])
        where, params = ("split = 'train' AND label = ?", [row["label"]]) if by_class else ("split = 'train'", [])
        out["percentiles"] = _percentiles(s.con, path, row, names, where, params)
        out["percentile_within"] = f"class {row['label']}" if by_class else "all training rows"
        by_reason = _score_ranges(s.con, path, target["config"]["selection"]["score"], where, params)
    out["thresholds"] = _thresholds(target, row["label"], by_reason)
    return out


def _row_in_run(s: Store, row_id: str, run: str | None) -> tuple[dict[str, Any], str, dict[str, Any]]:
    """The run (``run``, or the latest holding the row), its manifest's path and the row's manifest record."""
    # newest run first: by default the search ends at the first (usually the latest) run holding the row
    for target in [s.resolve(run)] if run else reversed(s.runs):
        path = manifest_path(s.path, target["run_id"])
        rows = records(s.con.execute(f"SELECT * FROM read_parquet({sql_str(path)}) WHERE row_id = ?", [row_id]))
        if rows:
            return target, path, rows[0]
    if run:
        raise StoreError(f"row '{row_id}' is not in run {target['run_id']}; 'leanset history {row_id}' shows the runs that hold it")
    raise StoreError(f"row '{row_id}' is in no run of {s.path}; check the id (ids are compared as text)")


def _percentiles(con: duckdb.DuckDBPyConnection, path: str, row: dict[str, Any], names: list[str], where: str,
                 params: list) -> dict[str, float]:
    """Each known score's percentile of ``row`` among the manifest's rows matching ``where``, ties counted half."""
    known = [n for n in names if clean(row[n]) is not None]
    parts = ", ".join(f"count(*) FILTER (WHERE {n} < ?) AS {n}_lt, count(*) FILTER (WHERE {n} <= ?) AS {n}_le" for n in known)
    values = [float(row[n]) for n in known for _ in range(2)]
    [agg] = records(con.execute(f"SELECT count(*) AS n{', ' if parts else ''}{parts} FROM read_parquet({sql_str(path)}) WHERE {where}",
                                values + params))
    n = int(agg["n"])
    return {k: 100.0 * (int(agg[f"{k}_lt"]) + int(agg[f"{k}_le"])) / (2 * n) for k in known}


def _score_ranges(con: duckdb.DuckDBPyConnection, path: str, score: str, where: str, params: list) -> dict[str, dict[str, Any]]:
    """Rows and range of the selection score per reason, among the manifest's rows matching ``where``."""
    ranges = records(con.execute(f"SELECT reason, count(*) AS rows, min({score}) AS low, max({score}) AS high "
                                 f"FROM read_parquet({sql_str(path)}) WHERE {where} GROUP BY reason ORDER BY reason", params))
    return {r["reason"]: {"rows": int(r["rows"]), "low": clean(r["low"]), "high": clean(r["high"])} for r in ranges}


def _thresholds(target: dict[str, Any], label: str, by_reason: dict[str, dict[str, Any]]) -> dict[str, Any]:
    """The run's selection settings, and the quota and training rows of the row's class."""
    sel, classes, info = target["config"]["selection"], target["input"]["classes"], target.get("selection", {})
    k = classes.index(label) if label in classes else None
    return {
        "score": sel["score"], "strategy": sel["strategy"], "fraction": sel["fraction"], "quotas": sel["quotas"],
        "class_floor": sel["class_floor"], "strata": info.get("strata", sel["strata"]), "hard_cut": sel["hard_cut"],
        "hysteresis": sel.get("hysteresis"),
        "class_quota": info["quota"][k] if k is not None and "quota" in info else None,
        "class_rows": info["class_counts"][k] if k is not None and "class_counts" in info else None,
        "score_range_by_reason": by_reason,
    }


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
    files = {side: f"read_parquet({sql_str(manifest_path(s.path, run['run_id']))})" for side, run in (("a", a), ("b", b))}
    # one join, grouped by the pair of reasons: each group's size and, if its decision changed, its first row ids
    groups = records(con.execute(f"""SELECT a.decision AS decision_a, a.reason AS reason_a, b.decision AS decision_b,
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
            TO {sql_str(str(out))} (FORMAT parquet)""")
    counts["churn_fraction"] = counts["changed"] / counts["both"] if counts["both"] else 0.0
    return {"run_a": a["run_id"], "run_b": b["run_id"], "counts": counts,
            "transitions": [{k: clean(t[k]) for k in ("decision_a", "reason_a", "decision_b", "reason_b", "rows")} for t in trans],
            "rows": [dict(zip(("row_id", "label", "reason_a", "reason_b"), map(clean, r))) for r in first],
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
    path = manifest_path(s.path, target["run_id"])
    con = s.con
    present = {r["reason"] for r in records(con.execute(
        f"SELECT DISTINCT reason FROM read_parquet({sql_str(path)}) WHERE decision = 'drop'"))}
    unknown = [r for r in reasons if r not in present]
    if unknown:
        raise StoreError(f"run {target['run_id']} dropped no row with reason {unknown[0]!r}; "
                         f"its drop reasons are: {', '.join(sorted(present)) or 'none'}")
    prior = target["config"]["selection"]["weights"] == "class_prior"
    picked = con.sql(f"""WITH m AS (SELECT * FROM read_parquet({sql_str(path)}, file_row_number = true)),
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
    return clean(data)


def as_json(data: Any) -> str:
    """``data`` as indented JSON, NaN as null."""
    return json.dumps(_tidy(data), indent=2, allow_nan=False, default=str)


def find(store: str | Path, column: str, value: str, run: str | None = None) -> str:
    """The row id of the one row of a run's input table whose ``column`` holds ``value`` (as text).

    For tables without an id column, whose row ids are derived from the rows' content: the run's
    input table is read with the run's config, so its rows get the ids the run gave them.

    Raises
    ------
    StoreError
        When the column is absent, or no row or more than one row holds the value.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    from ..load.table import load_table

    target = Store(store).resolve(run or "latest")
    config = Config.model_validate(target["config"])
    frame = load_table(config)
    if column not in frame.source.column_names:
        raise StoreError(f"{config.input.path}: no column '{column}' (columns: {', '.join(frame.source.column_names[:20])}); fix --find")
    hits = pc.indices_nonzero(pc.equal(frame.source.column(column).cast(pa.string()), pa.scalar(value, pa.string()))).to_numpy()
    if len(hits) == 0:
        raise StoreError(f"{config.input.path}: no row has {column} = {value!r} (compared as text); check the value")
    if len(hits) > 1:
        ids = ", ".join(str(frame.row_id[i]) for i in hits[:3])
        raise StoreError(f"{config.input.path}: {len(hits)} rows have {column} = {value!r} (ids {ids}, …); "
                         "pass one of the ids as ROW_ID, or a column whose values are unique")
    return str(frame.row_id[int(hits[0])])
