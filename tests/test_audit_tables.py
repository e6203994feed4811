"""The terminal tables of the audit answers (leanset.report.audit_tables), drawn from answers shaped as
leanset.store.audit returns them. Numbers are checked against Python's own format specification
(thousands separator ``,`` of PEP 378, ``%`` and ``g`` presentation types of the format mini-language);
the store answers themselves are checked in test_audit.py."""

import io
import subprocess
import sys

from rich.console import Console, Group
from rich.table import Table

from leanset.report.audit_tables import (REVIEW_COLUMNS, diff_view, history_table, restore_table, review_table,
                                         runs_table, value_text, why_table)


def _text(renderable) -> str:
    console = Console(file=io.StringIO(), width=240, color_system=None)
    console.print(renderable)
    return console.file.getvalue()


RUNS = [
    {"sequence": 1, "run_id": "20260101T000000Z-aaaa", "created": "2026-01-01T00:00:05+00:00", "rows": 1234567,
     "kept": 345678, "verdict": "pass", "churn_rows": None, "churn_fraction": None},
    {"sequence": 2, "run_id": "20260102T000000Z-bbbb", "created": "2026-01-02T10:30:00+00:00", "rows": 1300000,
     "kept": 350001, "verdict": "inconclusive", "churn_rows": 4321, "churn_fraction": 0.0123},
]


def test_runs_table_has_one_line_per_run_with_its_figures():
    table = runs_table(RUNS, "some-store")
    assert table.row_count == len(RUNS)
    text = _text(table)
    for r in RUNS:
        # PEP 378 thousands separator, as format(n, ",") gives it
        assert r["run_id"] in text and format(r["rows"], ",") in text and format(r["kept"], ",") in text
    assert "2026-01-02 10:30" in text  # the minute of the UTC stamp, T replaced by a space
    assert f"{4321:,} {0.0123:.1%}" in text  # format spec "%" presentation type
    assert "some-store" in text


WHY = {
    "row_id": "r-17", "run_id": "20260102T000000Z-bbbb", "created": "2026-01-02T10:30:00+00:00", "split": "train",
    "label": "b", "decision": "drop", "reason": "drop:stratified", "stratum": 3, "weight": None,
    "scores": {"aum": -0.123456789, "el2n": 0.5, "never_learned": False},
    "percentiles": {"aum": 12.3456, "el2n": 88.0}, "percentile_within": "class b",
    "thresholds": {"score": "aum", "strategy": "stratified", "fraction": 0.3, "quotas": "proportional", "class_floor": 50,
                   "strata": 10, "hard_cut": 0.0, "hysteresis": None, "class_quota": 1200, "class_rows": 4000,
                   "score_range_by_reason": {"drop:stratified": {"rows": 2800, "low": -1.5, "high": 2.25},
                                             "keep:stratified": {"rows": 1200, "low": -1.25, "high": 2.5}}},
}


def test_why_table_marks_the_selection_score_and_gives_percentiles():
    text = _text(why_table(WHY))
    assert "row r-17 in run 20260102T000000Z-bbbb" in text
    assert "drop (drop:stratified)" in text
    cells = [line.strip("│ ").split() for line in text.splitlines()]
    lines = {words[0]: " ".join(words) for words in cells if words and words[0] in ("aum", "el2n")}
    # format spec "g" with 4 significant digits; percentile to one decimal
    assert f"{-0.123456789:.4g}" in lines["aum"] and "12.3th percentile in class b" in lines["aum"]
    assert "selection score" in lines["aum"] and "selection score" not in lines["el2n"]
    assert "stratum · weight" in text and "3 · –" in text  # a missing weight shows as a dash
    assert f"{1200:,} of {4000:,} training rows of b" in text
    assert f"{2800:,} rows, aum in [-1.5, 2.25]" in text


def test_why_table_on_a_holdout_row_has_no_percentiles_or_quota():
    holdout = {**WHY, "split": "holdout", "decision": "holdout", "reason": "holdout", "percentiles": {},
               "thresholds": {**WHY["thresholds"], "class_quota": None, "class_rows": None, "score_range_by_reason": {}}}
    holdout.pop("percentile_within")
    text = _text(why_table(holdout))
    assert "percentile" not in text and "class quota" not in text


def test_history_table_lists_every_run_and_absent_rows():
    rows = [{"sequence": 1, "run_id": "a", "created": "x", "decision": "absent", "reason": None, "label": None,
             "stratum": None, "weight": None},
            {"sequence": 2, "run_id": "b", "created": "y", "decision": "keep", "reason": "keep:stratified", "label": "b",
             "stratum": 4, "weight": 1.2345678}]
    table = history_table(rows, "r-17")
    assert table.row_count == 2
    text = _text(table)
    assert "history of row r-17" in text and "absent" in text and f"{1.2345678:.4g}" in text


DIFF = {"run_a": "A", "run_b": "B",
        "counts": {"rows_a": 1000, "rows_b": 1300, "both": 1000, "only_a": 0, "only_b": 300, "changed": 25,
                   "unchanged": 975, "churn_fraction": 0.025},
        "transitions": [{"decision_a": "keep", "reason_a": "keep:stratified", "decision_b": "drop",
                         "reason_b": "drop:stratified", "rows": 25}],
        "rows": [{"row_id": "r-1", "label": "a", "reason_a": "keep:stratified", "reason_b": "drop:stratified"}],
        "out": "/tmp/changed.parquet"}


def test_diff_view_shows_counts_transitions_and_rows():
    view = diff_view(DIFF)
    assert isinstance(view, Group) and len(view.renderables) == 3
    text = _text(view)
    assert f"{1000:,} → {1300:,} ({1000:,} in both, 300 new, 0 gone)" in text
    assert f"25 of {1000:,} rows in both ({0.025:.2%})" in text
    assert "first 1 changed rows (all in /tmp/changed.parquet)" in text and "r-1" in text


def test_diff_view_without_changes_is_the_counts_alone():
    same = {**DIFF, "transitions": [], "rows": [], "out": None,
            "counts": {**DIFF["counts"], "changed": 0, "unchanged": 1000, "churn_fraction": 0.0}}
    view = diff_view(same)
    assert isinstance(view, Table) and view.row_count == 2


def test_restore_and_review_tables():
    text = _text(restore_table({"run_id": "B", "reasons": ["drop:suspect_label", "drop:duplicate"], "rows": 1500,
                                "kept": 1400, "restored": 100, "out": "restore-B.parquet"}))
    assert f"{1500:,} = {1400:,} kept + 100 restored (drop:suspect_label, drop:duplicate)" in text
    rows = [{"row_id": f"r-{i}", "label": "a", "decision": "drop", "reason": "drop:suspect_label", "aum": -2.0 - i,
             "el2n": None, "confidence": 0.1} for i in range(3)]
    table = review_table(rows, "B", "suspect")
    assert table.row_count == 3 and [c.header for c in table.columns] == list(REVIEW_COLUMNS)
    text = _text(table)
    assert "3 suspect rows of run B" in text and all(f"r-{i}" in text for i in range(3))


def test_value_text():
    assert value_text(None) == "–"
    assert value_text(1 / 3) == format(1 / 3, ".4g")
    assert value_text(7) == "7" and value_text("keep") == "keep"


def test_the_command_starts_without_the_table_and_model_libraries():
    # the audit commands import the command, the audit questions and their tables: none loads pandas, pyarrow,
    # numpy, matplotlib or LightGBM at start-up
    code = ("import sys, leanset.cli, leanset.store.audit, leanset.report.audit_tables; "
            "print(sorted(m for m in ('pandas', 'pyarrow', 'numpy', 'matplotlib', 'lightgbm', 'prefect') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
