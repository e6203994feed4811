"""Reading the store: its published runs, and a DuckDB catalog over their manifests (:class:`Store`).

The catalog is built on demand: the view ``runs`` holds one row per published run (from each
``run.json``) and the view ``manifests`` reads every published run's ``manifest.parquet`` in place,
with a ``run_id`` column; no data is copied. Runs being written (hidden ``.tmp-*`` folders) are never
in the catalog. Neither pandas nor pyarrow is imported.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import duckdb

from ..errors import StoreError

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


def records(result: duckdb.DuckDBPyConnection) -> list[dict[str, Any]]:
    """The rows of a query's result as dicts keyed by column name."""
    names = [d[0] for d in result.description]
    return [dict(zip(names, row)) for row in result.fetchall()]


def manifest_path(store: Path, run_id: str) -> str:
    """The path of a run's manifest, as text for SQL."""
    return str(Path(store) / "runs" / run_id / "manifest.parquet")


def sql_str(value: str) -> str:
    """A SQL string literal of ``value``."""
    return "'" + value.replace("'", "''") + "'"


def run_row(run: dict[str, Any]) -> dict[str, Any]:
    """One row of the ``runs`` view from a run.json (see ``RUN_COLUMNS``)."""
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
                            [[r[c] for c in RUN_COLUMNS] for r in map(run_row, self.runs)])
            files = ", ".join(sql_str(manifest_path(self.path, r["run_id"])) for r in self.runs)
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


def clean(value: Any) -> Any:
    """JSON-ready scalar: NaN becomes None, numpy scalars become Python ones."""
    if hasattr(value, "item"):
        value = value.item()
    if isinstance(value, float) and math.isnan(value):
        return None
    return value
