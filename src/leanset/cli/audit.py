"""The audit commands: questions answered from the run store alone (``leanset runs``, ``why``, ``history``,
``diff``, ``restore``, ``report``). They call :mod:`leanset.store.audit` and print its answers with
:mod:`leanset.report.audit_tables`, or as JSON."""

from __future__ import annotations

from pathlib import Path
from typing import Any, Callable, Optional

import typer
from rich.console import Console

from ..config import load_config
from ..errors import LeansetError
from ..report import audit_tables
from .common import AUDIT, JSON, STORE, app, fail


_CONFIG_STORE = typer.Option(None, "--config", help="A YAML config: use the store it names.")


def _store(store: Optional[Path], config: Optional[Path], as_json: bool) -> Path:
    """The store given by --store, or named by --config's ``store``, or ./leanset-store."""
    if store is not None and config is not None:
        fail(LeansetError("--store and --config both name a store; give one of them"), as_json)
    if config is None:
        return store or Path("leanset-store")
    try:
        return load_config(config).store
    except LeansetError as exc:
        fail(exc, as_json)


def _ask(question: str, as_json: bool, *args, **kwargs):
    """The answer of :mod:`leanset.store.audit`'s function ``question``; a refusal is one line and exit 2."""
    from ..store import audit

    try:
        return getattr(audit, question)(*args, **kwargs)
    except LeansetError as exc:
        fail(exc, as_json)


def _emit(data, as_json: bool, table: Callable[[], Any]) -> None:
    """Print ``data`` as JSON, or the table that ``table()`` draws."""
    if as_json:
        from ..store.audit import as_json as dump

        typer.echo(dump(data))
    else:
        Console().print(table())


@app.command("runs", rich_help_panel=AUDIT)
def runs_command(store: Optional[Path] = STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = JSON) -> None:
    """List the runs in a store: when, input rows, kept, verdict, churn."""
    store = _store(store, config, json_)
    rows = _ask("runs", json_, store)
    _emit(rows, json_, lambda: audit_tables.runs_table(rows, store))


@app.command("why", rich_help_panel=AUDIT)
def why_command(row_id: Optional[str] = typer.Argument(None, help="The row id: the value of the table's id column (input.id), or the derived id in the manifest's row_id."),
                find: Optional[str] = typer.Option(None, "--find", metavar="COLUMN=VALUE", help="Find the row by the value of any column of the run's input table (reads the table)."),
                run: Optional[str] = typer.Option(None, "--run", help="Run id or unique prefix; default: the latest run holding the row."),
                store: Optional[Path] = STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = JSON) -> None:
    """Why a row was kept or dropped: decision, reason, scores and their class percentiles, thresholds."""
    store = _store(store, config, json_)
    if (row_id is None) == (find is None):
        fail(LeansetError("give a ROW_ID or --find COLUMN=VALUE (one of them)"), json_)
    if find is not None:
        column, sep, value = find.partition("=")
        if not sep or not column:
            fail(LeansetError(f"--find {find!r}: write it as COLUMN=VALUE, e.g. --find serial=A-1017"), json_)
        row_id = _ask("find", json_, store, column, value, run)
    answer = _ask("why", json_, store, row_id, run)
    _emit(answer, json_, lambda: audit_tables.why_table(answer))


@app.command("history", rich_help_panel=AUDIT)
def history_command(row_id: str = typer.Argument(..., help="The row id."), store: Optional[Path] = STORE,
                    config: Optional[Path] = _CONFIG_STORE, json_: bool = JSON) -> None:
    """A row's decision in every run of the store."""
    store = _store(store, config, json_)
    rows = _ask("history", json_, store, row_id)
    _emit(rows, json_, lambda: audit_tables.history_table(rows, row_id))


@app.command("diff", rich_help_panel=AUDIT)
def diff_command(run_a: str = typer.Argument(..., help="The earlier run (id or unique prefix)."),
                 run_b: str = typer.Argument(..., help="The later run (id or unique prefix)."),
                 limit: int = typer.Option(20, help="Changed rows to list."),
                 out: Optional[Path] = typer.Option(None, "--out", help="Write every changed row to this parquet file."),
                 store: Optional[Path] = STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = JSON) -> None:
    """Counts, and the rows whose decision changed between two runs, by reason."""
    store = _store(store, config, json_)
    answer = _ask("diff", json_, store, run_a, run_b, limit, out)
    _emit(answer, json_, lambda: audit_tables.diff_view(answer))


@app.command("restore", rich_help_panel=AUDIT)
def restore_command(run: str = typer.Argument(..., help="Run id or unique prefix."),
                    reason: list[str] = typer.Option(..., "--reason", help="A drop reason to put back (repeat for several)."),
                    out: Optional[Path] = typer.Option(None, "--out", help="Output file (.parquet, .csv or .tsv); default restore-<run>.parquet."),
                    ids_only: bool = typer.Option(False, "--ids-only", help="Write only the manifest columns (row_id, label, decision, reason, weight); do not read the input table."),
                    store: Optional[Path] = STORE, config: Optional[Path] = _CONFIG_STORE, json_: bool = JSON) -> None:
    """Write the kept rows plus the dropped rows of the given reasons, with re-balanced weights."""
    store = _store(store, config, json_)
    if out is None:
        out = Path(f"restore-{run}.parquet")
    answer = _ask("restore", json_, store, run, reason, out, rows=not ids_only)
    _emit(answer, json_, lambda: audit_tables.restore_table(answer))


@app.command("report", rich_help_panel=AUDIT)
def report_command(run: str = typer.Argument(..., help="Run id, unique prefix, or latest."),
                   list_: Optional[str] = typer.Option(None, "--list", help="Instead, print every row to review: suspect or conflict."),
                   store: Path = STORE, json_: bool = JSON) -> None:
    """(Re)build a run's report.html from its files, so older runs get the current page."""
    from ..store import page

    store = _store(store, None, json_)
    try:
        if list_ is None:
            Console().print(f"wrote {page.rebuild(store, run)}", soft_wrap=True, highlight=False)
            return
        run_id, rows = page.review_list(store, run, list_)
    except LeansetError as exc:
        fail(exc)
    _emit(rows, json_, lambda: audit_tables.review_table(rows, run_id, list_))
