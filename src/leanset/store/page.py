"""Rebuild report.html of a published run from the run's own files (``leanset report RUN``)."""

from __future__ import annotations

import json
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from ..errors import ConfigError, LeansetError
from ..load.checks import _dataset
from ..report.html import render_html, review_rows
from .reader import Store, published_runs

#: What ``leanset report RUN --list`` can list.
LISTS = ("suspect", "conflict")


def rebuild(store: str | Path, run: str) -> Path:
    """:func:`build_report` for ``run`` (an id, a unique prefix, or ``latest``) of ``store``."""
    opened = Store(store)
    return build_report(opened.path / "runs" / opened.resolve(run)["run_id"])


def review_list(store: str | Path, run: str, which: str) -> tuple[str, list[dict]]:
    """Every training row of ``run`` to review, as manifest records: ``suspect`` (suspected label
    errors, lowest AUM first) or ``conflict`` (same features as a row of another label)."""
    if which not in LISTS:
        raise ConfigError(f"--list {which}: give suspect (suspected label errors) or conflict (conflicting duplicates)")
    opened = Store(store)
    run_id = opened.resolve(run)["run_id"]
    return run_id, review_rows(pq.read_table(opened.path / "runs" / run_id / "manifest.parquet"), which).to_pylist()


def build_report(run_dir: str | Path, out: str | Path | None = None) -> Path:
    """(Re)write ``report.html`` of a published run from its own files, with the current page.

    Reads run.json and manifest.parquet; the segment values and the features of the rows to
    review come from the input table when it still holds the run's rows in the same order, else
    from kept.parquet (segments of the kept rows) or not at all. The page is written aside and
    renamed into place: ``out``, or the run's own ``report.html`` when None.

    Returns
    -------
    Path
        The report's path.
    """
    run_dir = Path(run_dir)
    run = json.loads((run_dir / "run.json").read_text())
    manifest = pq.read_table(run_dir / "manifest.parquet")
    names = run["config"]["input"].get("segments") or []
    source = _input_rows(run, manifest)
    if source is not None:
        table = source.to_table(columns=names)
        segments = {n: table.column(n) for n in names}
        rows = source.take
    else:
        kept = pq.read_table(run_dir / "kept.parquet", columns=names) if names else None
        segments = {n: kept.column(n) for n in names} if kept is not None else None
        rows = None
    store = run_dir.parent.parent
    history = published_runs(store)
    page = render_html(run, manifest, segments, rows=rows, history=history, store=store)
    out = Path(out) if out is not None else run_dir / "report.html"
    tmp = out.with_name(f".{out.name}.tmp")
    tmp.write_text(page)
    tmp.replace(out)
    return out


def _input_rows(run, manifest):
    """The run's input table, when it still holds the run's rows in the same order (checked by the
    id column, so only for tables with ``input.id``); else None."""
    id_col = run["config"]["input"].get("id")
    if not id_col:
        return None
    try:
        dataset = _dataset(Path(run["input"]["path"]))
        ids = dataset.to_table(columns=[id_col]).column(id_col).cast(pa.string())
    except (LeansetError, pa.ArrowException, OSError, KeyError):  # gone, moved or unreadable
        return None
    return dataset if ids.equals(manifest.column("row_id")) else None
